"""Plots of a run, as PNG bytes: area and force per layer, tip safety factors, a preview.

Figures are made with :class:`matplotlib.figure.Figure` directly, never through
``pyplot``, so calling them never changes the plotting backend of a host
program (a notebook keeps its own).
"""

from __future__ import annotations

import io

import numpy as np

from ..constants import EPS_FLOOR

__all__ = ["plot_layers", "plot_tips", "plot_preview", "PREVIEW_VIEWS", "new_figure", "png_bytes"]


def new_figure(**kwargs):
    """A new figure that belongs to no pyplot state."""
    from matplotlib.figure import Figure

    return Figure(**kwargs)


def png_bytes(fig) -> bytes:
    """The figure laid out, as PNG bytes."""
    fig.tight_layout()
    buf = io.BytesIO()
    # Fixed metadata so the same figures give the same bytes.
    fig.savefig(buf, format="png", dpi=110, metadata={"Software": None})
    return buf.getvalue()


def plot_layers(
    z_mm: np.ndarray, area_mm2: np.ndarray, force_n: np.ndarray | None, title: str, rated_force_n: float | None = None
) -> bytes:
    """PNG bytes: cured area and separation force per layer, side by side against height."""
    ncols = 2 if force_n is not None else 1
    fig = new_figure(figsize=(4.2 * ncols, 4.2))
    axes = fig.subplots(1, ncols, sharey=True, squeeze=False)
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
        ax.set_xlabel(
            "separation force per layer (N)"
            if not rated_force_n
            else f"separation force per layer (N; printer rated {rated_force_n:g} N)"
        )
        ax.grid(alpha=0.3)
    fig.suptitle(title, fontsize=10)
    return png_bytes(fig)


def plot_tips(safety: np.ndarray, target: float, title: str) -> bytes:
    """PNG bytes: histogram of the tips' safety factors (capacity over peak load), with the target."""
    fig = new_figure(figsize=(5, 3.4))
    ax = fig.subplots()
    s = np.asarray(safety, float)
    s = s[np.isfinite(s)]
    if len(s):
        ax.hist(np.clip(s, 0, 50), bins=30, color="#4f772d")
    ax.axvline(target, color="k", ls="--", lw=0.8, label=f"required safety factor {target:g}")
    ax.set_xlabel("tip safety factor (capacity / peak load, capped at 50)")
    ax.set_ylabel("tips")
    ax.legend(fontsize=8)
    ax.set_title(title, fontsize=10)
    return png_bytes(fig)


#: Preview views: (label, elevation, azimuth) in degrees; the last looks up from the plate.
PREVIEW_VIEWS = (("front", 18, -60), ("back", 18, 120), ("from below", -90, -90))


def _scale_bar_mm(span_mm: float) -> float:
    """A round length (1, 2 or 5 times a power of ten) near a fifth of ``span_mm``.

    >>> _scale_bar_mm(48.0), _scale_bar_mm(7.0), _scale_bar_mm(130.0)
    (10.0, 1.0, 20.0)
    """
    raw = max(span_mm, 1e-9) / 5
    power = 10 ** np.floor(np.log10(raw))
    return float(min((1, 2, 5, 10), key=lambda m: abs(np.log(m * power / raw))) * power)


def plot_preview(part, supports, title: str) -> bytes:
    """PNG bytes: the part (grey) on its supports (orange) from two sides and from below.

    The views are orthographic and never crop (the whole scene's bounding cube
    fits each panel); the view from below, where the contacts are, carries a
    scale bar.  Flat shading by the face normal's angle to a light over the
    viewer's shoulder; painter's ordering by matplotlib.  Cost O(faces); a
    100k-face scene renders in a few seconds.
    """
    import trimesh
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection

    fig = new_figure(figsize=(12, 4.6))
    lo = np.minimum(part.bounds[0], supports.bounds[0]) if len(supports.faces) else part.bounds[0]
    hi = np.maximum(part.bounds[1], supports.bounds[1]) if len(supports.faces) else part.bounds[1]
    span = float((hi - lo).max()) / 2
    mid = (hi + lo) / 2
    meshes = []
    for mesh, rgb in ((supports, (0.91, 0.55, 0.2)), (part, (0.7, 0.72, 0.75))):
        if len(mesh.faces) == 0:
            continue
        # Long faces sort badly in matplotlib's painter's ordering: split them first.
        triangles = mesh.triangles
        if len(mesh.faces) < 60_000:
            verts, faces = trimesh.remesh.subdivide_to_size(mesh.vertices, mesh.faces, max_edge=span / 8, max_iter=6)
            triangles = verts[faces]
        cross = np.cross(triangles[:, 1] - triangles[:, 0], triangles[:, 2] - triangles[:, 0])
        meshes.append((triangles, cross / np.maximum(np.linalg.norm(cross, axis=1, keepdims=True), EPS_FLOOR), rgb))
    for k, (label, elev, azim) in enumerate(PREVIEW_VIEWS):
        ax = fig.add_subplot(1, len(PREVIEW_VIEWS), k + 1, projection="3d")
        ax.set_proj_type("ortho")
        e, a = np.radians(elev), np.radians(azim + 35)
        light = np.array([np.cos(e) * np.cos(a), np.cos(e) * np.sin(a), np.sin(e) + 0.6 * np.sign(elev or 1)])
        light /= np.linalg.norm(light)
        tris, colours = [], []
        for triangles, normals, rgb in meshes:
            shade = 0.35 + 0.65 * np.clip(normals @ light, 0, 1)
            tris.append(triangles)
            colours.append(np.column_stack([np.outer(shade, rgb), np.ones(len(shade))]))
        # One collection, so faces of part and supports are depth-sorted together.
        ax.add_collection3d(
            Poly3DCollection(np.concatenate(tris), facecolors=np.concatenate(colours), linewidths=0, antialiased=False)
        )
        ax.set_xlim(mid[0] - span, mid[0] + span)
        ax.set_ylim(mid[1] - span, mid[1] + span)
        ax.set_zlim(mid[2] - span, mid[2] + span)
        ax.view_init(elev=elev, azim=azim)
        ax.set_box_aspect((1, 1, 1), zoom=0.95)
        ax.set_axis_off()
        ax.set_title(label, fontsize=9)
        if elev < 0:
            bar = _scale_bar_mm(2 * span)
            x0, y0, z0 = mid[0] - 0.9 * span, mid[1] - 0.95 * span, lo[2]
            ax.plot([x0, x0 + bar], [y0, y0], [z0, z0], color="k", lw=2)
            ax.text(x0 + bar / 2, y0 + 0.12 * span, z0, f"{bar:g} mm", ha="center", va="center", fontsize=8)
    fig.suptitle(title, fontsize=10)
    return png_bytes(fig)
