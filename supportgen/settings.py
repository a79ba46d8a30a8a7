"""Settings: the printer, the resin and the support rules, as one typed object.

Three frozen dataclasses, grouped in :class:`Settings`, each field carrying its
unit, its valid range and where its default comes from:

``pub``
    a published source, named in the field's doc;
``practice``
    common practice among resin-printer users, no single source;
``memory``
    recalled, not checked against a source: treat as a starting point.

No default is a measurement of ours.  Settings are read from TOML files with
five tables, ``[printer]``, ``[resin]``, ``[rules]``, ``[limits]`` and ``[orient]``; every key is also
accepted on its own (field names are unique across the tables), which is
how keyword overrides work in :func:`supportgen.generate`.

Examples
--------
>>> s = Settings().override(contact_spacing_mm=2.0)
>>> s.rules.contact_spacing_mm
2.0
>>> Settings().override(spacing=2.0)
Traceback (most recent call last):
...
supportgen.errors.SettingsError: unknown setting 'spacing'; valid names: ...
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import tomllib
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from types import MappingProxyType
from typing import Any

from .errors import SettingsError

__all__ = [
    "Printer",
    "Resin",
    "SupportRules",
    "Limits",
    "OrientRules",
    "Settings",
    "PROFILES",
    "MECHANISMS",
    "load_settings",
    "resolve_settings",
    "describe",
    "STRATEGY_NAMES",
    "DEFAULT_STRATEGY",
    "ORIENT_CHOICES",
]

#: The support strategies a user can choose (``supportgen.supports.strategies.STRATEGIES``
#: registers one function per name; named here so the command line can offer them without
#: importing the geometry stages).
STRATEGY_NAMES = ("straight", "tree")
#: ``tree`` verifies on the demo and the shared corpus with less support volume than
#: ``straight`` (benchmarks/compare_strategies.py).
DEFAULT_STRATEGY = "tree"
#: How a part stands: as given (the default: a user's orientation may be deliberate) or as
#: ``supportgen.physics.orientation.orient`` chooses.
ORIENT_CHOICES = ("keep", "auto")

MECHANISMS = ("pull", "slide", "tilt")
BASE_KINDS = ("raft", "pads")


def _f(default, lo, hi, unit, source, doc, choices=None):
    """A dataclass field with its range, unit, provenance and description."""
    return field(
        default=default,
        metadata={"lo": lo, "hi": hi, "unit": unit, "source": source, "doc": doc, "choices": choices},
    )


@dataclass(frozen=True)
class Printer:
    """The machine: its pixel grid, layer height, build volume and separation."""

    pixel_mm: float = _f(
        0.05, 0.005, 0.5, "mm", "practice", "projected pixel pitch; 35-50 um on desktop machines, 50 um a fair default"
    )
    layer_mm: float = _f(0.05, 0.005, 0.3, "mm", "practice", "layer height")
    build_x_mm: float = _f(130.0, 1.0, 2000.0, "mm", "practice", "build area, x (long side of a desktop screen)")
    build_y_mm: float = _f(80.0, 1.0, 2000.0, "mm", "practice", "build area, y")
    build_z_mm: float = _f(160.0, 1.0, 2000.0, "mm", "practice", "largest printable height")
    mechanism: str = _f(
        "pull",
        None,
        None,
        "",
        "practice",
        "how a layer leaves the film: pull (straight off), slide (sideways) or tilt (peel)",
        choices=MECHANISMS,
    )
    lift_speed_mm_s: float = _f(1.0, 0.01, 50.0, "mm/s", "practice", "speed at which the plate leaves the film")
    film_gap_mm: float = _f(
        0.05,
        0.001,
        1.0,
        "mm",
        "practice",
        "liquid gap between cured layer and film as it starts to separate (5-50 um "
        "oxygen-inhibited layer on a silicone window is common practice)",
    )
    force_calibration: float = _f(
        0.02,
        1e-6,
        10.0,
        "",
        "memory",
        "factor on the rigid-gap squeeze-film law: flexible films pull off far "
        "below it. No published absolute force-area data were found to fit it "
        "(benchmarks/force_data.csv); fit it from your own measurements with "
        "`supportgen calibrate`",
    )
    slide_calibration: float = _f(
        1.0,
        1e-6,
        10.0,
        "",
        "practice",
        "factor on the shear law when the film slides: a film sliding in its own "
        "plane gets no relief from flexing (an assumption), so 1; sliding then "
        "needs about a hundredth of the pull, as practice reports",
    )
    peel_band_mm: float = _f(
        2.0, 0.1, 50.0, "mm", "memory", "width of the still-wetted strip behind the peel front when the vat tilts"
    )
    force_area_n_mm2: float = _f(
        0.02,
        0.0,
        10.0,
        "N/mm2",
        "memory",
        "adhesion force per mm2 of cured layer area, added to the squeeze-film "
        "law. Linear in area: Kovalenko et al., MATEC Web of Conferences 40, 02005 "
        "(2016). The value (2 N/cm2) is from memory (measured peaks of a few N to "
        "tens of N for cm2-scale layers): no published absolute value was found; "
        "fit it with `supportgen calibrate`",
    )
    ambient_pressure_pa: float = _f(
        101325.0,
        1000.0,
        200000.0,
        "Pa",
        "pub",
        "ambient pressure over the vat: the most suction a liquid film can hold "
        "before it cavitates is this minus the resin's vapour pressure "
        "(ISO 2533 standard atmosphere, 101,325 Pa at sea level)",
    )
    layer_cycle_s: float = _f(
        9.0, 0.5, 600.0, "s", "practice", "time per layer: exposure (2-3 s) plus lift, peel and return (5-8 s)"
    )
    rated_force_n: float = _f(80.0, 0.1, 5000.0, "N", "memory", "largest separation force the machine is meant to take")


@dataclass(frozen=True)
class Resin:
    """The liquid and its green (as-printed, before post-cure) strength."""

    viscosity_pa_s: float = _f(
        0.5,
        0.01,
        20.0,
        "Pa s",
        "pub",
        "0.1-1.5 Pa s at 25-30 C for bottom-up resins (Simunovic et al., Polymers 17:2706, 2025)",
    )
    green_tensile_mpa: float = _f(
        20.0, 0.5, 200.0, "MPa", "memory", "tensile strength as printed; about half to two-thirds of cured 30-70 MPa"
    )
    green_modulus_mpa: float = _f(
        1200.0, 10.0, 10000.0, "MPa", "memory", "Young's modulus as printed; cured standard resins 1.3-2.9 GPa"
    )
    vapour_pressure_pa: float = _f(
        0.0,
        0.0,
        50000.0,
        "Pa",
        "memory",
        "vapour pressure of the liquid resin; acrylate monomers are of the order "
        "of pascals, negligible against the ambient pressure, so 0 (the highest, "
        "safe, cavitation ceiling)",
    )
    density_g_cm3: float = _f(1.10, 0.5, 3.0, "g/cm3", "memory", "liquid density, 1.05-1.20 typical")
    price_per_l: float = _f(40.0, 0.0, 10000.0, "currency/L", "memory", "price of a litre, for cost estimates")


@dataclass(frozen=True)
class SupportRules:
    """How supports are placed, shaped and sized."""

    overhang_angle_deg: float = _f(
        35.0,
        0.0,
        89.0,
        "deg",
        "practice",
        "a down-facing surface tilted less than this from horizontal needs support (30-45 deg is common practice)",
    )
    contact_spacing_mm: float = _f(
        2.0,
        0.3,
        20.0,
        "mm",
        "practice",
        "least distance between contacts on a horizontal overhang (1.5-5 mm); 1.5x this at the critical angle",
    )
    reach_limit_mm: float = _f(
        2.0,
        0.05,
        3.0,
        "mm",
        "practice",
        "largest distance a newly cured pixel may lie from material in the layer "
        "below (flat overhangs deform beyond spans of about 1.5-3 mm)",
    )
    tip_diameter_mm: float = _f(0.4, 0.05, 3.0, "mm", "practice", "contact diameter before sizing (0.2-0.6 mm)")
    tip_min_mm: float = _f(
        0.15, 0.05, 3.0, "mm", "practice", "smallest tip: 2-3 pixels is the smallest reliable feature"
    )
    tip_max_mm: float = _f(0.7, 0.05, 5.0, "mm", "practice", "largest tip, the largest scar you accept")
    tip_depth_mm: float = _f(0.2, 0.0, 2.0, "mm", "practice", "how far a tip sinks into the part (0.1-0.3 mm)")
    tip_length_mm: float = _f(1.5, 0.2, 10.0, "mm", "practice", "length of the cone from tip to post")
    post_diameter_mm: float = _f(1.0, 0.2, 10.0, "mm", "practice", "post diameter before sizing")
    elevation_mm: float = _f(
        5.0,
        0.0,
        50.0,
        "mm",
        "practice",
        "height of the part's lowest point above the plate (3-10 mm); not the plate's "
        "motion between layers (formerly 'lift_mm')",
    )
    base: str = _f("raft", None, None, "", "practice", "raft (one slab) or pads (one per post)", choices=BASE_KINDS)
    base_thickness_mm: float = _f(1.0, 0.2, 5.0, "mm", "practice", "raft or pad thickness (0.5-1.5 mm)")
    base_margin_mm: float = _f(1.5, 0.0, 20.0, "mm", "practice", "how far the base reaches past the outer posts")
    clearance_mm: float = _f(1.0, 0.1, 20.0, "mm", "practice", "least distance between a branch and the part")
    branch_angle_deg: float = _f(
        40.0,
        0.0,
        60.0,
        "deg",
        "practice",
        "largest tilt of a branch from vertical (a branch is itself printed "
        "layer by layer and must not become an overhang)",
    )
    safety_factor: float = _f(2.0, 1.0, 20.0, "", "practice", "load factor applied when sizing tips and posts")
    seed: int = _f(0, 0, 2**31 - 1, "", "practice", "seed of every random choice, for repeatable output")


@dataclass(frozen=True)
class Limits:
    """Caps on what one input may cost, checked before its file is parsed or its layers computed."""

    max_faces: int = _f(
        3_000_000,
        1,
        2**31 - 1,
        "faces",
        "practice",
        "most triangles accepted in one input, counted after 3MF instancing (scans for "
        "dental and jewellery work are 0.1-2 million)",
    )
    max_unpacked_mb: float = _f(
        512.0,
        1.0,
        1e6,
        "MB",
        "practice",
        "largest decompressed size of a 3MF archive (its XML takes about 100 bytes "
        "a triangle, so the default holds the face limit with room to spare)",
    )
    memory_mb: float = _f(
        0.0, 0.0, 1e7, "MB", "practice", "memory one run may use; 0 means what the machine has available when it starts"
    )


@dataclass(frozen=True)
class OrientRules:
    """How ``supportgen orient`` searches and weighs the up-directions of a part.

    Each weight multiplies its term divided by the term's median over the
    candidates (so the weights are unitless and a weight of 0 switches the term
    off); the reasoning behind each default is in its doc.
    """

    orient_directions: int = _f(
        500,
        20,
        20000,
        "",
        "practice",
        "up-directions tried, spread evenly over the sphere (Fibonacci lattice), before the best are refined",
    )
    orient_pixel_mm: float = _f(
        0.3,
        0.05,
        5.0,
        "mm",
        "practice",
        "pixel and layer of the coarse grid the scorer slices on (raised for large "
        "parts to keep the grid under a few million cells)",
    )
    weight_force: float = _f(
        3.0,
        0.0,
        100.0,
        "",
        "practice",
        "peak layer separation force: it tears parts off their supports and is what "
        "this tool sizes supports from, so it weighs most",
    )
    weight_near_peak: float = _f(
        0.5,
        0.0,
        100.0,
        "",
        "practice",
        "layers within orient_near_fraction of the peak force: many near-peak layers "
        "load the same tips again and again (fatigue), a lesser concern",
    )
    weight_cup: float = _f(
        3.0,
        0.0,
        100.0,
        "",
        "practice",
        "largest sealed cavity area facing the film (suction cup): it multiplies the force "
        "and traps resin, a common cause of failed prints",
    )
    weight_overhang: float = _f(
        1.0, 0.0, 100.0, "", "practice", "overhang area: contacts needed, so scars on the surface"
    )
    weight_minima: float = _f(0.5, 0.0, 100.0, "", "practice", "local minima: each needs a contact of its own")
    weight_volume: float = _f(1.0, 0.0, 100.0, "", "practice", "support volume estimate: resin used and removal work")
    weight_height: float = _f(1.0, 0.0, 100.0, "", "practice", "print height: layers, so print time")
    weight_protect: float = _f(
        5.0,
        0.0,
        100.0,
        "",
        "practice",
        "protected surface facing down (mm², with a tip's scar per protected local minimum), measured "
        "against the median overhang area: the user said those faces must stay clean, and a direction that "
        "turns them down either scars them or leaves them unheld (the contacts are moved off or dropped), "
        "so it weighs more than any other term; 0 ignores the protect mask",
    )
    weight_tip_load: float = _f(
        3.0,
        0.0,
        100.0,
        "",
        "practice",
        "worst tip load of the estimated plan at the near-peak layers (the layer force shared among the "
        "tips on the contactable surface below it by the elastic bolt-group method): it is the peak force "
        "as the tips feel it, lever included, and the figure the print check fails on, so it weighs as much "
        "as the peak force; while it is above 0, a direction whose worst tip would need more than tip_max_mm "
        "at the safety factor scores worse than every direction whose tips hold (feasibility penalty); "
        "0 switches off the term and the penalty",
    )
    orient_near_fraction: float = _f(
        0.9, 0.1, 1.0, "", "practice", "a layer is near the peak when its force is at least this fraction of it"
    )


_GROUPS = {"printer": Printer, "resin": Resin, "rules": SupportRules, "limits": Limits, "orient": OrientRules}

#: Older names still read for one release, with a FutureWarning: old -> new.
#: ``lift_mm`` read like the plate's motion between layers; ``max_reach_mm`` like
#: a measured reach rather than a limit; ``[supports]`` was
#: also the name of the solid and of a report section.
RENAMED = MappingProxyType({"lift_mm": "elevation_mm", "supports": "rules", "max_reach_mm": "reach_limit_mm"})


def _renamed(key: str) -> str:
    new = RENAMED.get(key)
    if new is None:
        return key
    warnings.warn(
        f"setting name '{key}' is now '{new}'; the old name will stop working in the next release",
        FutureWarning,
        stacklevel=4,
    )
    return new


def _field_index() -> dict[str, tuple[str, dataclasses.Field]]:
    index: dict[str, tuple[str, dataclasses.Field]] = {}
    for group, cls in _GROUPS.items():
        for f in fields(cls):
            index[f.name] = (group, f)
    return index


def _did_you_mean(name: str, names) -> str:
    close = difflib.get_close_matches(name, list(names), n=1)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _check_value(name: str, f: dataclasses.Field, value: Any) -> Any:
    """Coerce ``value`` to the field's type and check its range or choices."""
    meta = f.metadata
    default = f.default
    if meta["choices"] is not None:
        if value not in meta["choices"]:
            raise SettingsError(f"setting '{name}' is {value!r}; valid choices: {', '.join(meta['choices'])}")
        return value
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SettingsError(f"setting '{name}' must be a number ({meta['unit'] or 'no unit'}), got {value!r}")
    if isinstance(default, int) and not float(value).is_integer():
        raise SettingsError(f"setting '{name}' must be a whole number, got {value!r}")
    value = type(default)(value)
    if not math.isfinite(value) or not (meta["lo"] <= value <= meta["hi"]):
        raise SettingsError(
            f"setting '{name}' = {value!r} is out of range; valid range: {meta['lo']} to {meta['hi']} {meta['unit']}".rstrip()
        )
    return value


@dataclass(frozen=True)
class Settings:
    """All settings of one run: ``printer``, ``resin``, the support ``rules`` and how to ``orient``."""

    printer: Printer = field(default_factory=Printer)
    resin: Resin = field(default_factory=Resin)
    rules: SupportRules = field(default_factory=SupportRules)
    limits: Limits = field(default_factory=Limits)
    orient: OrientRules = field(default_factory=OrientRules)

    def __post_init__(self):
        for group in _GROUPS:
            obj = getattr(self, group)
            for f in fields(obj):
                _check_value(f.name, f, getattr(obj, f.name))
        s = self.rules
        if s.tip_min_mm > s.tip_max_mm:
            raise SettingsError(
                f"setting 'tip_min_mm' ({s.tip_min_mm}) exceeds 'tip_max_mm' ({s.tip_max_mm}); make the smallest tip no larger than the largest"
            )
        if s.tip_min_mm < 2 * self.printer.pixel_mm:
            raise SettingsError(
                f"setting 'tip_min_mm' ({s.tip_min_mm} mm) is under 2 pixels of {self.printer.pixel_mm} mm; "
                "raise it or use a finer printer"
            )

    def override(self, values: Mapping[str, Any] | None = None, /, **kwargs) -> Settings:
        """Return a copy with the given values replaced.

        Keys are field names (``contact_spacing_mm``) or ``group.name``
        (``rules.contact_spacing_mm``); an unknown key raises
        :class:`~supportgen.errors.SettingsError` listing the valid names.
        """
        merged = {**(values or {}), **kwargs}
        index = _field_index()
        changes: dict[str, dict[str, Any]] = {g: {} for g in _GROUPS}
        for key, value in merged.items():
            name = _renamed(key.split(".", 1)[1] if "." in key else key)
            group = _renamed(key.split(".", 1)[0]) if "." in key else None
            if name not in index or (group is not None and index[name][0] != group):
                raise SettingsError(
                    f"unknown setting '{key}'{_did_you_mean(name, index)}; valid names: {', '.join(sorted(index))}"
                )
            g, f = index[name]
            changes[g][name] = _check_value(name, f, value)
        return Settings(**{g: dataclasses.replace(getattr(self, g), **changes[g]) for g in _GROUPS})

    def to_dict(self) -> dict[str, dict[str, Any]]:
        """The resolved settings as nested plain dicts (TOML and JSON friendly)."""
        return {g: dataclasses.asdict(getattr(self, g)) for g in _GROUPS}

    def to_toml(self) -> str:
        """The settings as a TOML document that :func:`load_settings` reads back."""
        lines = []
        for group, values in self.to_dict().items():
            lines.append(f"[{group}]")
            for k, v in values.items():
                lines.append(f"{k} = {v!r}" if not isinstance(v, str) else f'{k} = "{v}"')
            lines.append("")
        return "\n".join(lines)


# Built-in profiles: named for what they are, values documented in the fields.
PROFILES: dict[str, dict[str, Any]] = {
    "desk-50": {},
    "desk-35-fine": {
        "pixel_mm": 0.035,
        "layer_mm": 0.03,
        "build_x_mm": 120.0,
        "build_y_mm": 68.0,
        "tip_min_mm": 0.1,
        "contact_spacing_mm": 1.6,
    },
    "wide-slide": {
        "pixel_mm": 0.075,
        "build_x_mm": 300.0,
        "build_y_mm": 170.0,
        "build_z_mm": 400.0,
        "mechanism": "slide",
        "tip_min_mm": 0.2,
    },
    "tilt-vat": {"mechanism": "tilt"},
}


def resolve_settings(settings=None, overrides: Mapping[str, Any] | None = None) -> Settings:
    """Settings from ``settings`` (None: the defaults; a :class:`Settings`; else a built-in
    profile name or TOML file for :func:`load_settings`), with ``overrides`` applied."""
    if settings is None:
        settings = Settings()
    elif not isinstance(settings, Settings):
        settings = load_settings(settings)
    return settings.override(overrides) if overrides else settings


def load_settings(source: str | Path | Mapping[str, Any] | None = None, **overrides) -> Settings:
    """Settings from a built-in profile name, a TOML file or a mapping, plus overrides.

    Parameters
    ----------
    source : str, Path, mapping or None
        ``None`` for the defaults; a name from :data:`PROFILES`; a path to a TOML
        file with ``[printer]``, ``[resin]``, ``[rules]`` and ``[limits]`` tables (flat keys
        are accepted too); or a mapping of the same shape.
    **overrides
        Single values by field name, applied last.

    Returns
    -------
    Settings

    Raises
    ------
    SettingsError
        Unknown profile, unreadable file, unknown key or value out of range.

    Examples
    --------
    >>> load_settings("wide-slide").printer.mechanism
    'slide'
    """
    base = Settings()
    data: Mapping[str, Any]
    if source is None:
        data = {}
    elif isinstance(source, Mapping):
        data = source
    elif isinstance(source, str) and source in PROFILES:
        data = PROFILES[source]
    else:
        path = Path(source)
        if not path.is_file():
            raise SettingsError(
                f"{path}: no such profile file or built-in profile; built-in profiles: {', '.join(PROFILES)}"
            )
        try:
            data = tomllib.loads(path.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise SettingsError(f"{path}: not a valid TOML file ({exc}); fix the syntax") from None
        except OSError as exc:
            raise SettingsError(
                f"{path}: cannot read the profile ({exc.strerror or exc}); check its permissions"
            ) from None
    flat: dict[str, Any] = {}
    for key, value in data.items():
        if key == "protect":
            continue  # protected surfaces, read by supportgen.supports.protect.selectors_from_toml
        if isinstance(value, Mapping):
            key = _renamed(key)
            if key not in _GROUPS:
                raise SettingsError(f"unknown settings table [{key}]; valid tables: {', '.join(_GROUPS)}")
            flat.update({f"{key}.{k}": v for k, v in value.items()})
        else:
            flat[key] = value
    return base.override(flat).override(overrides)


def describe() -> list[dict[str, Any]]:
    """One row per setting: group, name, default, unit, range, source, doc."""
    rows = []
    for group, cls in _GROUPS.items():
        for f in fields(cls):
            m = f.metadata
            rows.append(
                {
                    "group": group,
                    "name": f.name,
                    "default": f.default,
                    "unit": m["unit"],
                    "range": list(m["choices"]) if m["choices"] else [m["lo"], m["hi"]],
                    "source": m["source"],
                    "doc": m["doc"],
                }
            )
    return rows
