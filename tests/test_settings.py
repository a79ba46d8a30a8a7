"""Settings: defaults, ranges, TOML profiles and their errors."""

import dataclasses

import pytest

from supportgen.errors import SettingsError
from supportgen.settings import PROFILES, Settings, describe, load_settings


def test_defaults_follow_common_practice():
    # Common practice (REFERENCE.md section 5-6): 50 um pixels and layers, 5 mm lift,
    # tips 0.2-0.6 mm, reach limit at most 3 mm.
    s = Settings()
    assert s.printer.pixel_mm == 0.05 and s.printer.layer_mm == 0.05
    assert s.rules.elevation_mm == 5.0
    assert 0.2 <= s.rules.tip_diameter_mm <= 0.6
    assert s.rules.reach_limit_mm <= 3.0


def test_every_default_says_where_it_comes_from():
    for row in describe():
        assert row["source"] in {"pub", "practice", "memory"}, row
        assert row["doc"], row


def test_unknown_key_names_it_and_lists_valid_names():
    with pytest.raises(SettingsError, match=r"unknown setting 'spacing'; valid names: .*contact_spacing_mm"):
        Settings().override(spacing=2)


def test_out_of_range_names_key_and_range():
    with pytest.raises(SettingsError, match=r"'reach_limit_mm' = 5.0 is out of range; valid range: 0.05 to 3.0 mm"):
        Settings().override(reach_limit_mm=5.0)
    with pytest.raises(SettingsError, match=r"'mechanism' is 'yank'; valid choices: pull, slide, tilt"):
        Settings().override(mechanism="yank")


def test_toml_round_trip_and_tables(tmp_path):
    s = Settings().override(contact_spacing_mm=1.7, mechanism="slide", seed=3)
    path = tmp_path / "mine.toml"
    path.write_text(s.to_toml())
    assert load_settings(path) == s
    bad = tmp_path / "bad.toml"
    bad.write_text("[printers]\npixel_mm = 0.05\n")
    with pytest.raises(SettingsError, match=r"unknown settings table \[printers\]"):
        load_settings(bad)
    wrong_group = tmp_path / "wrong.toml"
    wrong_group.write_text("[resin]\npixel_mm = 0.05\n")
    with pytest.raises(SettingsError, match="unknown setting 'resin.pixel_mm'"):
        load_settings(wrong_group)


def test_broken_toml_and_missing_file(tmp_path):
    bad = tmp_path / "broken.toml"
    bad.write_text("[printer\n")
    with pytest.raises(SettingsError, match="broken.toml: not a valid TOML file"):
        load_settings(bad)
    with pytest.raises(SettingsError, match="no such profile file or built-in profile"):
        load_settings(tmp_path / "nope.toml")


def test_builtin_profiles_are_valid_and_frozen():
    for name in PROFILES:
        s = load_settings(name)
        with pytest.raises(dataclasses.FrozenInstanceError):
            s.printer.pixel_mm = 1.0


def test_tip_limits_are_consistent():
    with pytest.raises(SettingsError, match="exceeds 'tip_max_mm'"):
        Settings().override(tip_min_mm=0.8, tip_max_mm=0.5)
    # Smallest reliable feature is 2-3 pixels (common practice).
    with pytest.raises(SettingsError, match="under 2 pixels"):
        Settings().override(pixel_mm=0.1, tip_min_mm=0.15)


def test_old_names_still_read_with_a_warning(tmp_path):
    """``lift_mm`` and the ``[supports]`` table were renamed; both are read for one release, with a warning."""
    prof = tmp_path / "old.toml"
    prof.write_text("[supports]\nlift_mm = 7.5\ncontact_spacing_mm = 2.5\n")
    with pytest.warns(FutureWarning) as seen:
        s = load_settings(prof)
    said = " ".join(str(w.message) for w in seen)
    assert "'lift_mm' is now 'elevation_mm'" in said and "'supports' is now 'rules'" in said
    assert s.rules.elevation_mm == 7.5 and s.rules.contact_spacing_mm == 2.5


def test_mistyped_setting_suggests_the_name():
    with pytest.raises(SettingsError, match=r"did you mean 'contact_spacing_mm'"):
        Settings().override(contact_spacing=2.0)
