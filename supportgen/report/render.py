"""Report: the JSON record scripts rely on, and a human summary with plots.

The JSON keys listed in the project's README (input, settings, outputs,
supports, forces, verification, estimates, timing_s, warnings) are a contract;
more may be added, none removed or renamed without notice.  The human report
is Markdown with PNG plots beside it: area and separation force per layer, and
the tips' safety factors.
"""

from __future__ import annotations

import io
import json
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["CAUTIONS", "REPORT_KEYS", "to_json", "plot_layers", "plot_tips", "markdown"]

REPORT_KEYS = ("input", "settings", "outputs", "supports", "forces", "verification", "estimates",
               "timing_s", "warnings")

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


def _figure():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _png(fig) -> bytes:
    """The figure laid out, as PNG bytes; the figure is closed."""
    import matplotlib.pyplot as plt

    fig.tight_layout()
    buf = io.BytesIO()
    # Fixed metadata so the same figures give the same bytes.
    fig.savefig(buf, format="png", dpi=110, metadata={"Software": None})
    plt.close(fig)
    return buf.getvalue()


def plot_layers(z_mm: np.ndarray, area_mm2: np.ndarray, force_n: np.ndarray | None, title: str,
                rated_force_n: float | None = None) -> bytes:
    """PNG bytes: cured area and separation force per layer, side by side against height."""
    plt = _figure()
    ncols = 2 if force_n is not None else 1
    fig, axes = plt.subplots(1, ncols, figsize=(4.2 * ncols, 4.2), sharey=True, squeeze=False)
    ax = axes[0, 0]
    ax.plot(area_mm2, z_mm, color="#2a6f97", lw=1)
    ax.set_xlabel("cured area per layer (mm²)")
    ax.set_ylabel("height above plate (mm)")
    ax.grid(alpha=0.3)
    if force_n is not None:
        ax = axes[0, 1]
        ax.plot(force_n, z_mm, color="#b5502d", lw=1)
        if rated_force_n and np.nanmax(force_n, initial=0.0) >= 0.3 * rated_force_n:
            ax.axvline(rated_force_n, color="k", ls="--", lw=0.8, label="printer's rated force")
            ax.legend(loc="lower right", fontsize=8)
        ax.set_xlabel("separation force per layer (N)" if not rated_force_n else
                      f"separation force per layer (N; printer rated {rated_force_n:g} N)")
        ax.grid(alpha=0.3)
    fig.suptitle(title, fontsize=10)
    return _png(fig)


def plot_tips(safety: np.ndarray, target: float, title: str) -> bytes:
    """PNG bytes: histogram of the tips' safety factors (capacity over peak load), with the target."""
    plt = _figure()
    fig, ax = plt.subplots(figsize=(5, 3.4))
    s = np.asarray(safety, float)
    s = s[np.isfinite(s)]
    if len(s):
        ax.hist(np.clip(s, 0, 50), bins=30, color="#4f772d")
    ax.axvline(target, color="k", ls="--", lw=0.8, label=f"required safety factor {target:g}")
    ax.set_xlabel("tip safety factor (capacity / peak load, capped at 50)")
    ax.set_ylabel("tips")
    ax.legend(fontsize=8)
    ax.set_title(title, fontsize=10)
    return _png(fig)


def _fmt(v, digits=2):
    if v is None:
        return "n/a"
    if isinstance(v, float):
        return f"{v:.{digits}f}"
    return str(v)


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
        f"| lowest tip safety factor, tips over capacity | {_fmt(frc.get('min_safety_factor'))}, {frc.get('tips_over_capacity')} |",
        f"| islands left, largest reach (mm) | {ver.get('islands')}, {_fmt(ver.get('max_unsupported_reach_mm'))} (limit {_fmt(ver.get('reach_limit_mm'))}) |",
        f"| layers, print time (h), resin (ml) | {est.get('layers')}, {_fmt((est.get('print_time_s') or 0) / 3600)}, {_fmt(est.get('resin_ml'), 1)} |",
        "",
    ]
    for failure in ver.get("failures") or []:
        lines.append(f"- check failed: {failure}")
    for w in report.get("warnings") or []:
        lines.append(f"- warning ({w['code']}): {w['message']}")
    if images:
        lines += ["", "## Plots", ""]
        lines += [f"![{label}]({file})" for label, file in images.items()]
    lines += ["", "## Cautions", "", CAUTIONS]
    return "\n".join(lines)


def write_json(report: dict, path: Path) -> None:
    """Write the report atomically as JSON."""
    from ..io.meshio import atomic_write_text

    atomic_write_text(path, to_json(report))


def plot_preview(part, supports, title: str) -> bytes:
    """PNG bytes: the part (grey) on its supports (orange), seen from two sides.

    Flat shading by the face normal's angle to a fixed light; painter's ordering
    by matplotlib.  Cost O(faces); a 100k-face scene renders in a few seconds.
    """
    plt = _figure()
    import trimesh
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection

    fig = plt.figure(figsize=(9, 4.8))
    lo = np.minimum(part.bounds[0], supports.bounds[0]) if len(supports.faces) else part.bounds[0]
    hi = np.maximum(part.bounds[1], supports.bounds[1]) if len(supports.faces) else part.bounds[1]
    span = float((hi - lo).max()) / 2
    mid = (hi + lo) / 2
    for k, azim in enumerate((-60, 120)):
        ax = fig.add_subplot(1, 2, k + 1, projection="3d")
        a = np.radians(azim + 35)   # light from over the viewer's shoulder
        light = np.array([0.55 * np.cos(a), 0.55 * np.sin(a), 0.8])
        light /= np.linalg.norm(light)
        tris, colours = [], []
        for mesh, rgb in ((supports, (0.91, 0.55, 0.2)), (part, (0.7, 0.72, 0.75))):
            if len(mesh.faces) == 0:
                continue
            # Long faces sort badly in matplotlib's painter's ordering: split them first.
            triangles = mesh.triangles
            if len(mesh.faces) < 60_000:
                verts, faces = trimesh.remesh.subdivide_to_size(mesh.vertices, mesh.faces, max_edge=span / 8,
                                                                max_iter=6)
                triangles = verts[faces]
            cross = np.cross(triangles[:, 1] - triangles[:, 0], triangles[:, 2] - triangles[:, 0])
            normals = cross / np.maximum(np.linalg.norm(cross, axis=1, keepdims=True), 1e-300)
            shade = 0.35 + 0.65 * np.clip(normals @ light, 0, 1)
            tris.append(triangles)
            colours.append(np.column_stack([np.outer(shade, rgb), np.ones(len(shade))]))
        # One collection, so faces of part and supports are depth-sorted together.
        ax.add_collection3d(Poly3DCollection(np.concatenate(tris), facecolors=np.concatenate(colours),
                                             linewidths=0, antialiased=False))
        ax.set_xlim(mid[0] - span, mid[0] + span)
        ax.set_ylim(mid[1] - span, mid[1] + span)
        ax.set_zlim(mid[2] - span, mid[2] + span)
        ax.view_init(elev=18, azim=azim)
        ax.set_box_aspect((1, 1, 1), zoom=1.35)
        ax.set_axis_off()
    fig.suptitle(title, fontsize=10)
    return _png(fig)
