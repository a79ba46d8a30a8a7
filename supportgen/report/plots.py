"""Plots of a run, as PNG bytes: area and force per layer, tip safety factors, a preview.

Figures are made with :class:`matplotlib.figure.Figure` directly, never through
``pyplot``, so calling them never changes the plotting backend of a host
program (a notebook keeps its own).
"""

from __future__ import annotations

import io

import numpy as np

from ..analysis.runlength import ranks
from ..constants import EPS_FLOOR

__all__ = ["plot_layers", "plot_tips", "plot_preview", "render_view", "PREVIEW_VIEWS", "new_figure", "png_bytes"]


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


def _view_basis(elev: float, azim: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(right, up, toward the viewer) unit vectors of an orthographic view (degrees).

    >>> [(v.round(6) + 0.0).tolist() for v in _view_basis(0, 0)]
    [[0.0, 1.0, 0.0], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0]]
    """
    e, a = np.radians(elev), np.radians(azim)
    eye = np.array([np.cos(e) * np.cos(a), np.cos(e) * np.sin(a), np.sin(e)])
    right = np.array([-np.sin(a), np.cos(a), 0.0])
    return right, np.cross(eye, right), eye


#: Candidate pixels tested at once while rasterising (bounds the memory of one chunk).
_RASTER_CHUNK = 2_000_000


def render_view(triangles, colours, elev, azim, mid, span, size: int = 600) -> np.ndarray:
    """(size, size, 3) float image of flat-coloured triangles, orthographic, nearest face wins.

    ``triangles`` (n, 3, 3) and ``colours`` (n, 3) RGB in [0, 1]; the square
    ``mid +- span`` across the view fills the image; white where nothing is drawn.
    Each triangle facing the viewer covers the pixels whose centres lie inside it
    (edge functions), and a depth buffer keeps the face nearest the viewer; faces
    turned away are skipped, as a closed solid's near side hides them.  Cost O(n + covered
    pixels), in chunks of at most :data:`_RASTER_CHUNK` candidate pixels.
    """
    right, up, eye = _view_basis(elev, azim)
    tri = np.asarray(triangles, float)
    colours = np.asarray(colours, float)
    # faces turned away from the viewer are behind a closed solid's near side: skip them
    front = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]) @ eye >= 0
    tri, colours = tri[front], colours[front]
    scale = size / (2.0 * span)
    u = (tri @ right - mid @ right + span) * scale  # columns
    v = (mid @ up + span - tri @ up) * scale  # rows
    depth = tri @ eye
    image = np.ones((size * size, 3))
    zbuf = np.full(size * size, -np.inf)
    c0 = np.clip(np.floor(u.min(axis=1) - 0.5), 0, size).astype(np.int64)
    c1 = np.clip(np.ceil(u.max(axis=1) - 0.5), -1, size - 1).astype(np.int64)
    r0 = np.clip(np.floor(v.min(axis=1) - 0.5), 0, size).astype(np.int64)
    r1 = np.clip(np.ceil(v.max(axis=1) - 0.5), -1, size - 1).astype(np.int64)
    w, h = np.maximum(c1 - c0 + 1, 0), np.maximum(r1 - r0 + 1, 0)
    count = w * h
    keep = np.flatnonzero(count > 0)
    bounds = np.searchsorted(np.cumsum(count[keep]), np.arange(1, count.sum() // _RASTER_CHUNK + 2) * _RASTER_CHUNK)
    lo_z, hi_z = (float(depth.min()), float(depth.max())) if len(depth) else (0.0, 1.0)
    for chunk in np.split(keep, np.unique(np.minimum(bounds, len(keep)))[:-1] + 1):
        if chunk.size == 0:
            continue
        n = count[chunk]
        t = np.repeat(chunk, n)
        k = ranks(n)
        col = c0[t] + k % w[t]
        row = r0[t] + k // w[t]
        px, py = col + 0.5, row + 0.5
        a, b, c = (u[t, 0], v[t, 0]), (u[t, 1], v[t, 1]), (u[t, 2], v[t, 2])
        area = (b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0])
        w0 = (b[0] - px) * (c[1] - py) - (b[1] - py) * (c[0] - px)
        w1 = (c[0] - px) * (a[1] - py) - (c[1] - py) * (a[0] - px)
        w2 = area - w0 - w1
        sign = np.sign(area)
        inside = (area != 0) & (w0 * sign >= 0) & (w1 * sign >= 0) & (w2 * sign >= 0)
        t, pix = t[inside], (row * size + col)[inside]
        ar = area[inside]
        z = (w0[inside] * depth[t, 0] + w1[inside] * depth[t, 1] + w2[inside] * depth[t, 2]) / ar
        # per pixel, nearest first: one sort on the pixel plus a fraction below 1/2 falling with nearness
        order = np.argsort(pix + 0.5 * (hi_z - z) / max(hi_z - lo_z, EPS_FLOOR), kind="stable")
        pix, z, t = pix[order], z[order], t[order]
        first = np.r_[True, pix[1:] != pix[:-1]]
        pix, z, t = pix[first], z[first], t[first]
        won = z > zbuf[pix]
        zbuf[pix[won]] = z[won]
        image[pix[won]] = colours[t[won]]
    return image.reshape(size, size, 3)


def plot_preview(part, supports, title: str) -> bytes:
    """PNG bytes: the part (grey) on its supports (orange) from two sides and from below.

    The views are orthographic and never crop (the whole scene's bounding cube
    fits each panel); the view from below, where the contacts are, carries a
    scale bar.  Flat shading by the face normal's angle to a light over the
    viewer's shoulder; each view is rasterised with a depth buffer
    (:func:`render_view`), so the nearest surface always shows.  Cost O(faces +
    pixels): a 200k-face scene renders in about a second.
    """
    fig = new_figure(figsize=(12, 4.6))
    lo = np.minimum(part.bounds[0], supports.bounds[0]) if len(supports.faces) else part.bounds[0]
    hi = np.maximum(part.bounds[1], supports.bounds[1]) if len(supports.faces) else part.bounds[1]
    # the bounding cube's diagonal fits each panel, whatever the view
    span = float(np.linalg.norm(hi - lo)) / 2 * 1.04
    mid = (hi + lo) / 2
    meshes = []
    for mesh, rgb in ((supports, (0.91, 0.55, 0.2)), (part, (0.7, 0.72, 0.75))):
        if len(mesh.faces) == 0:
            continue
        triangles = np.asarray(mesh.triangles, float)
        cross = np.cross(triangles[:, 1] - triangles[:, 0], triangles[:, 2] - triangles[:, 0])
        meshes.append((triangles, cross / np.maximum(np.linalg.norm(cross, axis=1, keepdims=True), EPS_FLOOR), rgb))
    for k, (label, elev, azim) in enumerate(PREVIEW_VIEWS):
        ax = fig.add_subplot(1, len(PREVIEW_VIEWS), k + 1)
        e, a = np.radians(elev), np.radians(azim + 35)
        light = np.array([np.cos(e) * np.cos(a), np.cos(e) * np.sin(a), np.sin(e) + 0.6 * np.sign(elev or 1)])
        light /= np.linalg.norm(light)
        tris, colours = [np.zeros((0, 3, 3))], [np.zeros((0, 3))]
        for triangles, normals, rgb in meshes:
            shade = 0.35 + 0.65 * np.clip(normals @ light, 0, 1)
            tris.append(triangles)
            colours.append(np.outer(shade, rgb))
        size = 480  # about the panel's width in the saved PNG
        image = render_view(np.concatenate(tris), np.concatenate(colours), elev, azim, mid, span, size)
        ax.imshow(image, interpolation="antialiased")
        ax.set_axis_off()
        ax.set_title(label, fontsize=9)
        if elev < 0:
            bar = _scale_bar_mm(2 * span)
            x0, y0 = 0.05 * size, 0.95 * size
            ax.plot([x0, x0 + bar * size / (2 * span)], [y0, y0], color="k", lw=2)
            ax.text(x0 + bar * size / (4 * span), y0 - 0.04 * size, f"{bar:g} mm", ha="center", va="bottom", fontsize=8)
    fig.suptitle(title, fontsize=10)
    return png_bytes(fig)
