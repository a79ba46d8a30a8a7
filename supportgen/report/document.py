"""The documents of a run: the JSON record scripts rely on, and the Markdown summary.

The JSON keys listed in the project's README (input, settings, outputs,
supports, forces, verification, estimates, timing_s, warnings, provenance) are a
contract; more may be added, none removed or renamed without notice.  The
Markdown summary links the plots of :mod:`supportgen.report.plots`.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

__all__ = ["CAUTIONS", "REPORT_KEYS", "to_json", "markdown", "protection_markdown"]

REPORT_KEYS = (
    "input",
    "settings",
    "outputs",
    "supports",
    "forces",
    "verification",
    "estimates",
    "timing_s",
    "warnings",
)

CAUTIONS = """\
Handle resin and prints with care:

- Liquid and uncured resin is a skin sensitiser: wear nitrile gloves and eye
  protection, and never touch it bare-handed; wash any splash off with soap and water.
- Work with ventilation; do not breathe the vapour or the sanding dust of printed parts.
- Keep resin away from sunlight and UV lamps until you mean to cure it; do not look into the UV source.
- Cleaning solvents such as isopropyl alcohol are flammable: no open flames, store them closed.
- Cut supports off with the part held away from you and wear eye protection: stubs and
  snapped posts are sharp and can fly.
- The resin's safety data sheet and your local rules on handling and disposal come first;
  this report does not replace them.
"""


def _clean(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


def to_json(report: dict) -> str:
    """The report as deterministic JSON text (sorted keys, NaN and inf as null).

    Examples
    --------
    >>> to_json({"b": np.float64(1.5), "a": [np.int64(2), float("nan")]})
    '{\\n  "a": [\\n    2,\\n    null\\n  ],\\n  "b": 1.5\\n}\\n'
    """
    return json.dumps(_clean(report), indent=2, sort_keys=True) + "\n"


def _fmt(v, digits=2):
    if v is None:
        return "n/a"
    if isinstance(v, float):
        return f"{v:.{digits}f}"
    return str(v)


def _xyz(v) -> str:
    return ", ".join(f"{float(c):.2f}" for c in v)


def protection_markdown(section: dict | None) -> list[str]:
    """Lines of the Markdown section on protected surfaces: the scar budget (count and
    tip area of contacts, and landings, on each protected region, which must be 0, and on
    the rest), contacts moved, landings avoided, what could only be held from protected
    surface (with its location) and the contacts file used.  The numbers are those of the
    report's ``protection`` section; empty when the run protected nothing and read no
    contacts file.

    Examples
    --------
    >>> sec = {"protected_faces": 2, "protected_area_mm2": 4.5, "keep_off_mm": 0.5, "selectors": ["normal:1,0,0,5"],
    ...        "regions": [{"region": 0, "faces": 2, "area_mm2": 4.5, "centre_mm": [1.5, 0, 0.75],
    ...                     "contacts": 0, "tip_area_mm2": 0.0, "landings": 0}],
    ...        "rest": {"contacts": 9, "tip_area_mm2": 0.9, "landings": 0}, "contacts_on_protected": 0,
    ...        "landings_on_protected": 0, "landings_avoided": 1, "contacts_moved": 3,
    ...        "contacts_merged_after_moving": 1, "unholdable": [], "contacts_file": None}
    >>> [ln for ln in protection_markdown(sec) if ln.startswith("| region 0")]
    ['| region 0 | 2 | 4.500 | 1.50, 0.00, 0.75 | 0 | 0.0000 | 0 |']
    """
    if not section or (not section.get("protected_faces") and not section.get("contacts_file")):
        return []
    lines = ["", "## Protected surfaces", ""]
    if section.get("protected_faces"):
        sel = ", ".join(f"`{s}`" for s in section.get("selectors") or []) or "given faces"
        lines += [
            f"Protected: {section['protected_faces']} faces, "
            f"{section.get('protected_surface_mm2', section['protected_area_mm2']):.3f} mm² ({sel}); "
            f"no tip or landing within {section['keep_off_mm']:.3f} mm of them.",
            "",
            "Scar budget (a tip counts for a region when its disc reaches it; every protected region must show 0):",
            "",
            "| where | faces | area (mm²) | centre x, y, z (mm, input) | contacts | tip area (mm²) | landings |",
            "|---|---|---|---|---|---|---|",
        ]
        for r in section.get("regions") or []:
            lines.append(
                f"| region {r['region']} | {r['faces']} | {r['area_mm2']:.3f} | {_xyz(r['centre_mm'])} | "
                f"{r['contacts']} | {r['tip_area_mm2']:.4f} | {r['landings']} |"
            )
        rest = section.get("rest") or {}
        lines.append(
            f"| rest of the part | | | | {rest.get('contacts')} | {rest.get('tip_area_mm2', 0.0):.4f} | "
            f"{rest.get('landings')} |"
        )
        avoided = section.get("landings_avoided")
        lines += [
            "",
            f"- contacts on protected faces: {section['contacts_on_protected']}; landings on protected faces: "
            f"{section['landings_on_protected']}",
            f"- contacts moved off protected faces: {section['contacts_moved']} (merged after moving: "
            f"{section['contacts_merged_after_moving']})",
            f"- landings avoided (posts the same contacts would stand on protected faces without the keep-off): "
            f"{'n/a' if avoided is None else avoided}",
        ]
        unholdable = section.get("unholdable") or []
        lines.append(f"- could only be held from protected surface: {len(unholdable)}")
        for u in unholdable:
            rot = u.get("suggested_rotation") or {}
            lines.append(
                f"  - at {_xyz(u['point_mm'])} mm (input), region {u['region']}: turn {rot.get('angle_deg')} degrees "
                f"about ({_xyz(rot.get('axis') or [])})"
            )
    info = section.get("contacts_file")
    if info:
        lines += [
            "",
            f"Contacts file `{info['path']}`: {info['rows']} rows ({info['locked']} locked) used instead of "
            f"generated contacts; the check added {info.get('added_by_check', 0)}.",
        ]
    return lines


def markdown(report: dict, name: str, images: dict[str, str]) -> str:
    """A human summary of one report, with the cautions and links to its plots."""
    sup, frc, ver, est = (report.get(k) or {} for k in ("supports", "forces", "verification", "estimates"))
    tip = sup.get("tip_diameter_mm") or {}
    verdict = "PASSES" if ver.get("passed") else "DOES NOT PASS"
    lines = [
        f"# Support report: {name}",
        "",
        f"The supported part **{verdict}** the print check.",
        "",
        "| what | value |",
        "|---|---|",
        f"| strategy | {sup.get('strategy')} |",
        f"| contacts | {sup.get('contacts')} (landings on the part: {sup.get('landings', 0)}) |",
        f"| tip diameter, min / median / max (mm) | {_fmt(tip.get('min'))} / {_fmt(tip.get('median'))} / {_fmt(tip.get('max'))} |",
        f"| support volume (mm³), of which base | {_fmt(sup.get('volume_mm3'), 1)}, {_fmt(sup.get('base_volume_mm3'), 1)} |",
        f"| peak separation force (N), at layer | {_fmt(frc.get('peak_layer_force_n'))}, {frc.get('peak_layer_index')} |",
        f"| thin regions bounded, not solved: count, most a layer's force is overstated (N) | "
        f"{(frc.get('strip_bound') or {}).get('components', 0)}, "
        f"{_fmt((frc.get('strip_bound') or {}).get('max_overstatement_n'))} |",
        f"| lowest tip safety factor, tips over capacity | {_fmt(frc.get('min_tip_safety_factor'))}, "
        f"{frc.get('tips_over_capacity')} |",
        f"| lowest post safety factor (tension, buckling) | {_fmt(frc.get('min_post_safety_factor'))} |",
        f"| lowest side-load safety factor (shear, bending) | {_fmt(frc.get('min_side_load_safety_factor'))} |",
        f"| lowest brace safety factor | {_fmt(frc.get('min_brace_safety_factor'))} |",
        f"| islands left, largest reach (mm) | {ver.get('islands')}, {_fmt(ver.get('max_unsupported_reach_mm'))} (limit {_fmt(ver.get('reach_limit_mm'))}) |",
        f"| layers, print time (h), resin (ml) | {est.get('layers')}, {_fmt((est.get('print_time_s') or 0) / 3600)}, {_fmt(est.get('resin_ml'), 1)} |",
        "",
    ]
    for failure in ver.get("failures") or []:
        lines.append(f"- check failed: {failure}")
    for w in report.get("warnings") or []:
        lines.append(f"- warning ({w['code']}): {w['message']}")
    lines += protection_markdown(report.get("protection"))
    if images:
        lines += ["", "## Plots", ""]
        lines += [f"![{label}]({file})" for label, file in images.items()]
    lines += ["", "## Cautions", "", CAUTIONS]
    return "\n".join(lines)
