"""What makes a supported part fail: islands that grow from specks, tips under the safety factor.

References: exact solids (trimesh.creation boxes and cones), the independent check of
``benchmarks/stress_corpus.py`` (trimesh sections + shapely, not the project's rasteriser),
and the shared corpus (``../shared/corpus``) where a case needs a real part.
"""

import sys
from pathlib import Path

import numpy as np
import pytest
import trimesh

import supportgen
from supportgen import Settings
from supportgen.analysis.verify import verify

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
import stress_corpus as sc  # noqa: E402


def tilted_cone(z0: float) -> trimesh.Trimesh:
    """A cone 8 mm in radius and 20 mm tall, point down, tilted 25 degrees (more than its
    21.8 degree half-angle): its lowest point is on the rim, a knife edge, at ``z0``."""
    cone = trimesh.creation.cone(8.0, 20.0, sections=96)
    cone.apply_transform(trimesh.transformations.rotation_matrix(np.pi, [1, 0, 0]))
    cone.apply_transform(trimesh.transformations.rotation_matrix(np.radians(25.0), [0, 1, 0]))
    return cone.apply_translation([0.0, 0.0, z0 - cone.bounds[0, 2]])


def test_check_finds_a_part_that_grows_in_mid_air_from_a_knife_edge(tmp_path):
    # Exact geometry: the cone's first layers are slivers under a speck, each overlapping the
    # one below by more than a speck once it grows; nothing joins it to the block on the plate.
    # A speck in mid-air holds nothing, so the cone is one island where it first covers a
    # speck, a layer or two above its lowest point (z 5).
    block = trimesh.creation.box((4, 4, 4), trimesh.transformations.translation_matrix((-20, 0, 2)))
    path = tmp_path / "m.stl"
    trimesh.util.concatenate([block, tilted_cone(5.0)]).export(path)
    out = sc.independent_check(path)
    assert out["islands"] == 1 and "island" in out["failures"], out
    assert 5.0 < out["first_island"]["z_mm"] < 5.0 + 4 * 0.05


def _block():
    # a box standing on the plate cures every layer from the plate up: the only failure left
    # is the one the tips' factors give
    return trimesh.creation.box((4.0, 4.0, 1.0)).apply_translation((0.0, 0.0, 0.5))


def test_tips_under_the_safety_factor_fail_with_the_lowest_factor_and_the_remedies():
    s = Settings()
    v = verify(_block(), s, tip_safety=np.array([1.5, 0.6, 1.0]), name="bracket")
    assert not v.passed and v.tips_over_capacity == 1
    (line,) = v.failures
    # 0.6 of the wanted factor, in the units the user set (safety_factor, default 2)
    assert line.startswith("bracket: 1 tip(s) would tear off")
    assert f"lowest {0.6 * s.rules.safety_factor:.2f}" in line and f"wanted {s.rules.safety_factor:g}" in line
    assert "orient auto" in line and f"tip_max_mm, now {s.rules.tip_max_mm:g} mm" in line


def test_tips_at_the_safety_factor_pass():
    v = verify(_block(), Settings(), tip_safety=np.array([1.0, 3.0]), name="bracket")
    assert v.passed and v.tips_over_capacity == 0 and v.failures == ()


def test_a_part_growing_from_a_knife_edge_in_mid_air_is_an_island():
    # Exact geometry (tests/test_stress.tilted_cone): the cone's lowest point, a knife edge, is
    # at z 5 with nothing below it.  Its first layers are specks; each later layer overlaps the
    # one below by more than a speck, but a speck in mid-air holds nothing, so the whole cone is
    # one island starting at its lowest layers (a speck holding the next layer passed it before).
    v = verify(tilted_cone(5.0), Settings(), name="cone")
    assert not v.passed and v.n_islands == 1
    assert v.first_islands[0]["z_mm"] < 5.0 + 3 * Settings().printer.layer_mm


def test_a_part_growing_from_a_knife_edge_is_supported_and_passes_both_checks(tmp_path):
    # The same cone through the pipeline: it gets a tip under its knife edge, and the written
    # solid passes our verify and the independent check (trimesh sections + shapely).
    r = supportgen.generate(tilted_cone(5.0), name="cone")
    assert r.report["verification"]["passed"], r.report["verification"]["failures"]
    assert r.report["supports"]["contacts_by_kind"].get("island", 0) >= 1
    path = tmp_path / "cone.supported.stl"
    r.combined.export(path)
    assert sc.independent_check(path)["failures"] == []


@pytest.mark.skipif(not sc.corpus_available(), reason=f"the shared corpus is not at {sc.CORPUS}")
def test_tips_loaded_by_lever_get_contacts_under_the_load(tmp_path):
    # Shared corpus, fandisk at 50 mm in a seeded orientation of the stress corpus: a wing of
    # the part grows from a patch of contacts at its low corner, and its large sections pull far
    # from them, so moment balance (statics of a rigid part on springs) loads the patch's edge
    # tips up to 5.9 N, over what a 0.7 mm tip holds at the safety factor.  Contacts beside them
    # did not relieve it (6 tips short after the densify rounds); contacts under the load do.
    case = next(c for c in sc.make_cases(0) if c.id == "corpus-fandisk-50-o24")
    path = tmp_path / f"{case.id}.stl"
    sc.build_case(case).export(path)
    r = supportgen.generate(str(path), name=case.id)
    ver, forces = r.report["verification"], r.report["forces"]
    assert ver["passed"], ver["failures"]
    assert forces["tips_over_capacity"] == 0
    assert forces["min_tip_safety_factor"] >= Settings().rules.safety_factor * (1 - 1e-9)
    r.combined.export(tmp_path / "out.stl")
    assert sc.independent_check(tmp_path / "out.stl")["failures"] == []


def test_a_wide_part_standing_on_a_point_shares_its_pull_over_its_sides(tmp_path):
    # Exact geometry: a square pyramid 20 mm across, point down, sides at 56 degrees (steep
    # enough to need no contacts of their own).  Only its point is held, and its large top
    # layers pull on the few tips there: rings around them fill up before the load is shared
    # (a stress-corpus case was left with tips under the safety factor).  Contacts under the
    # rest of the loaded section, on the sides, share it: no tip is under the factor, and the
    # written solid passes our verify and the independent check.
    a, h = 10.0, 15.0
    v = np.array([[a, a, 0], [-a, a, 0], [-a, -a, 0], [a, -a, 0], [0, 0, -h]], float)
    pyramid = trimesh.Trimesh(v, [[0, 1, 2], [0, 2, 3], [1, 0, 4], [2, 1, 4], [3, 2, 4], [0, 3, 4]])
    pyramid.fix_normals()
    r = supportgen.generate(pyramid.apply_translation((0.0, 0.0, h)), name="pyramid")
    forces = r.report["forces"]
    assert r.report["verification"]["passed"], r.report["verification"]["failures"]
    assert forces["tips_over_capacity"] == 0
    assert forces["min_tip_safety_factor"] >= Settings().rules.safety_factor * (1 - 1e-9)
    r.combined.export(tmp_path / "out.stl")
    assert sc.independent_check(tmp_path / "out.stl")["failures"] == []
