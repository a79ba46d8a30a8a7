"""What ``supportgen orient`` tells people and scripts: JSON, a Markdown summary and a sphere map.

The map is made with :class:`matplotlib.figure.Figure` directly, never
``pyplot``: every candidate up-direction on an equal-area map of the sphere
(Lambert azimuthal, upper and lower hemispheres side by side), coloured by its
total score, with the Pareto-optimal candidates ringed, the chosen one starred
and the given orientation marked; beside it, the part in its chosen
orientation.
"""

from __future__ import annotations

import io

import numpy as np

from ..physics.orientation import TERMS, Orientation
from .document import to_json

__all__ = ["orientation_json", "orientation_markdown", "plot_orientation"]

_LABELS = {
    "peak_force_n": "peak layer force (N)",
    "near_peak_layers": "layers near the peak",
    "cup_area_mm2": "sealed cup area facing the film (mm²)",
    "overhang_area_mm2": "overhang area (mm²)",
    "minima": "local minima",
    "support_volume_mm3": "support volume estimate (mm³)",
    "height_mm": "print height (mm)",
    "protected_mm2": "protected surface facing down (mm²)",
    "tip_load_n": "worst tip load, bolt-group estimate (N)",
}


def orientation_json(o: Orientation, name: str, extra: dict | None = None) -> str:
    """Every scored candidate (direction, rotation, each term, total), the chosen, the given and the Pareto set."""
    return to_json({"name": name, **o.to_dict(), **(extra or {})})


def orientation_markdown(o: Orientation, name: str, image: str | None = None, max_pareto: int = 12) -> str:
    """A short human summary: chosen against given, the weights, and the best Pareto alternatives."""
    c, g = o.candidate(o.chosen), o.candidate(o.keep)
    lines = [
        f"# Orientation: {name}",
        "",
        f"Chosen up-direction (input frame) {tuple(round(x, 3) for x in c['direction'])}, "
        f"score {c['total']:.3f} (given orientation: {g['total']:.3f}; lower is better).",
        "",
        "| term | given | chosen | weight |",
        "|---|---|---|---|",
    ]
    for k in TERMS:
        lines.append(f"| {_LABELS[k]} | {g['terms'][k]:.4g} | {c['terms'][k]:.4g} | {o.weights[k]:g} |")
    hold = "hold" if o.feasible[o.chosen] else "do NOT hold (no candidate's tips hold)"
    lines += [
        "",
        f"Tips: the largest tip holds {o.allowed_tip_load_n:.3g} N at the safety factor; the chosen "
        f"orientation's tips {hold}; {int(o.feasible.sum())} of {len(o.total)} candidates' tips hold, and "
        "while the tip-load weight is above 0 every candidate whose tips do not hold scores worse than "
        "every one whose tips do.",
        "",
        f"Scoring grid: {o.pixel_mm:.3g} mm pixels and layers; each layer's outline is within half a "
        "pixel of the exact section. `generate` recomputes every figure at the printer's resolution.",
        "",
        f"## Pareto-optimal candidates ({len(o.pareto)}; best {min(max_pareto, len(o.pareto))} by score)",
        "",
        "| # | direction | score | " + " | ".join(_LABELS[k] for k in TERMS) + " |",
        "|---|---|---|" + "---|" * len(TERMS),
    ]
    for i in sorted(o.pareto, key=lambda i: o.total[i])[:max_pareto]:
        d = ", ".join(f"{x:.3f}" for x in o.directions[i])
        lines.append(f"| {i} | ({d}) | {o.total[i]:.3f} | " + " | ".join(f"{o.terms[k][i]:.4g}" for k in TERMS) + " |")
    if image:
        lines += ["", f"![sphere of directions and the part as chosen]({image})"]
    return "\n".join(lines) + "\n"


def _lambert(d: np.ndarray) -> np.ndarray:
    """Equal-area (Lambert azimuthal) map of unit vectors of one hemisphere about +z: the unit disc."""
    z = np.abs(d[:, 2])
    r = np.sqrt(np.clip(1.0 - z, 0.0, None))  # radius sqrt(2) sin(theta/2), scaled to 1 at the equator
    xy = d[:, :2]
    n = np.linalg.norm(xy, axis=1)
    n[n == 0] = 1.0
    return xy / n[:, None] * r[:, None]


def plot_orientation(o: Orientation, part, title: str) -> bytes:
    """PNG bytes: the sphere of directions coloured by score, and the part (a trimesh) as chosen."""
    from matplotlib.figure import Figure
    from matplotlib.patches import Circle
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection

    fig = Figure(figsize=(12.0, 4.4))
    axes = [fig.add_subplot(1, 3, 1), fig.add_subplot(1, 3, 2), fig.add_subplot(1, 3, 3, projection="3d")]
    lo, hi = np.percentile(o.total, [2, 98])
    up = o.directions[:, 2] >= 0
    sc = None
    for ax, half, label in (
        (axes[0], up, "up-directions with z >= 0 (input frame)"),
        (axes[1], ~up, "up-directions with z < 0"),
    ):
        p = _lambert(o.directions[half])
        sc = ax.scatter(p[:, 0], p[:, 1], c=o.total[half], cmap="viridis_r", vmin=lo, vmax=hi, s=14)
        ids = np.flatnonzero(half)
        par = np.isin(ids, o.pareto)
        ax.scatter(p[par, 0], p[par, 1], facecolors="none", edgecolors="k", s=40, lw=0.7, label="Pareto-optimal")
        for idx, marker, colour, text in ((o.chosen, "*", "#d62728", "chosen"), (o.keep, "s", "#ff7f0e", "given")):
            if half[idx]:
                q = _lambert(o.directions[idx : idx + 1])
                ax.scatter(q[:, 0], q[:, 1], marker=marker, s=160, c=colour, edgecolors="k", label=text, zorder=5)
        ax.add_patch(Circle((0, 0), 1.0, fill=False, lw=0.6))
        ax.set_aspect("equal")
        ax.set_xlim(-1.08, 1.08)
        ax.set_ylim(-1.08, 1.08)
        ax.set_title(label, fontsize=9)
        ax.set_xlabel("x (equal-area map)")
        ax.set_ylabel("y")
        ax.legend(loc="lower left", fontsize=7)
    fig.colorbar(sc, ax=axes[:2], shrink=0.8, label="score (lower is better)")
    ax = axes[2]
    tri = np.asarray(part.vertices)[np.asarray(part.faces)]
    shade = 0.35 + 0.6 * np.clip(np.asarray(part.face_normals) @ np.array([0.3, -0.4, 0.87]), 0, 1)
    colours = np.column_stack([shade * 0.4, shade * 0.6, shade, np.ones_like(shade)])
    ax.add_collection3d(Poly3DCollection(tri, facecolors=colours, linewidths=0))
    lo3, hi3 = part.bounds
    c, r = (lo3 + hi3) / 2, float((hi3 - lo3).max()) / 2
    ax.set_xlim(c[0] - r, c[0] + r)
    ax.set_ylim(c[1] - r, c[1] + r)
    ax.set_zlim(0.0, max(hi3[2], 2 * r))
    ax.set_title("the part as chosen (plate at z = 0)", fontsize=9)
    ax.set_xlabel("x (mm)")
    ax.set_ylabel("y (mm)")
    ax.set_zlabel("z (mm)")
    fig.suptitle(title, fontsize=10)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, metadata={"Software": None})
    return buf.getvalue()
