"""Raster: the layer masks of a closed mesh, from vertical rays through the pixel centres.

A vertical ray through every pixel centre crosses the surface; a vectorised
triangle rasteriser (:func:`ray_crossings`) finds, for every triangle, the pixel
centres inside its x/y projection, the height of the crossing and whether the
ray enters (face normal down, +1) or leaves (normal up, -1) the solid.  A pixel
is cured in a layer when its winding number, the sum of the signs of the
crossings below the layer's sample height, is positive (:func:`winding_masks`):
overlapping shells print as their union and inside-out shells (negative
winding) are counted, not printed.  Layers stream in order; memory is one
layer plus the crossing list.

:func:`supportgen.analysis.layers.iter_layers` wraps :func:`winding_masks` into
:class:`~supportgen.analysis.layers.Layer` records; use that.  The grid is any object
with ``x0, y0, pixel_mm, ny, nx`` and ``shape`` (a :class:`~supportgen.analysis.layers.Grid`).

References
----------
.. [1] J. Pineda, "A parallel algorithm for polygon rasterization", SIGGRAPH 1988
   (edge functions; the top-left tie rule).
.. [2] D. Sunday, "Fast winding number inclusion of a point into a polygon"; the
   winding number of a ray through a closed surface, e.g. A. Jacobson, L. Kavan
   and O. Sorkine-Hornung, "Robust inside-outside segmentation using generalized
   winding numbers", ACM TOG 32(4), 2013.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import trimesh

from .runlength import ranks

__all__ = ["layer_count", "ray_crossings", "winding_masks", "SortedCrossings"]

_CHUNK = 1 << 20  # candidate pixel-triangle pairs (of whole bounding boxes) per rasteriser chunk
#: Least |dv| (pixels) of an edge whose bound on a row's columns is used: the bound's
#: rounding error is below 1e-8 pixels times the grid's size over this, far inside the
#: column of slack each side.
_FIRM_SLOPE = 1e-3


def layer_count(top_mm: float, layer_mm: float) -> int:
    """Layers printed under a top at ``top_mm``: each layer is sampled at its mid-height.

    Layer ``k`` spans ``[k h, (k + 1) h]`` and is cured where its mid-plane
    ``(k + 1/2) h`` lies inside the part, so the count is ``ceil(top / h - 1/2)``.

    >>> layer_count(1.0, 0.05), layer_count(1.02, 0.05), layer_count(0.0, 0.05)
    (20, 20, 0)
    """
    return max(0, int(np.ceil(top_mm / layer_mm - 0.5)))


def ray_crossings(mesh: trimesh.Trimesh, grid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Vertical-ray crossings of the surface: flat pixel index, height and sign.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part in build coordinates.
    grid : supportgen.analysis.layers.Grid
        Pixel grid; a ray runs up through every pixel centre.

    Returns
    -------
    index : (c,) int64 ndarray
        Flat pixel index ``row * nx + col`` of each crossing.
    z : (c,) float ndarray
        Height of the crossing, mm (linear in the triangle's corners).
    sign : (c,) int8 ndarray
        +1 where the ray enters the solid (face normal down), -1 where it leaves.

    Notes
    -----
    Pixel centres on an edge shared by two triangles belong to exactly one of them:
    edge functions are evaluated with the edge's end points in a canonical order
    (so both triangles get bit-identical values of opposite sign) and ties go by a
    fixed symbolic nudge of the point, the top-left rule of rasterisation [1]_.
    Vertical faces cross no ray and are skipped.  Cost O(F + C) for F faces and C
    candidate pixel/triangle pairs, in chunks of 2**20 pairs.

    References
    ----------
    .. [1] J. Pineda, "A parallel algorithm for polygon rasterization", SIGGRAPH 1988.

    Examples
    --------
    A unit square of two triangles at z = 1 over a 0.5 mm grid whose 2 x 2 pixel
    centres lie inside it: each is crossed, entering (the normals point down), and
    once only, although two of them lie on the diagonal both triangles share:

    >>> from supportgen.analysis.layers import Grid
    >>> sq = trimesh.Trimesh([[0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]], [[0, 2, 1], [0, 3, 2]])
    >>> i, z, s = ray_crossings(sq, Grid(0.25, 0.25, 0.5, 2, 2))
    >>> sorted(i.tolist()), set(z.tolist()), set(s.tolist())
    ([0, 1, 2, 3], {1.0}, {1})
    """
    tri = np.asarray(mesh.vertices, float)[np.asarray(mesh.faces)]
    u = (tri[..., 0] - grid.x0) / grid.pixel_mm
    v = (tri[..., 1] - grid.y0) / grid.pixel_mm
    z = tri[..., 2]
    area2 = (u[:, 1] - u[:, 0]) * (v[:, 2] - v[:, 0]) - (v[:, 1] - v[:, 0]) * (u[:, 2] - u[:, 0])
    keep = area2 != 0.0  # vertical faces cross no vertical ray
    u, v, z, area2 = u[keep], v[keep], z[keep], area2[keep]
    sign = np.where(area2 > 0, -1, 1).astype(np.int8)  # normal up: the ray leaves the solid
    cw = area2 < 0  # make every projection counter-clockwise
    for a in (u, v, z):
        a[cw, 1], a[cw, 2] = a[cw, 2].copy(), a[cw, 1].copy()
    c0 = np.clip(np.ceil(u.min(1)), 0, grid.nx).astype(np.int64)
    c1 = np.clip(np.floor(u.max(1)), -1, grid.nx - 1).astype(np.int64)
    r0 = np.clip(np.ceil(v.min(1)), 0, grid.ny).astype(np.int64)
    r1 = np.clip(np.floor(v.max(1)), -1, grid.ny - 1).astype(np.int64)
    nc = np.maximum(c1 - c0 + 1, 0)
    n = nc * np.maximum(r1 - r0 + 1, 0)
    edges = []  # e(p) = a * v_p - b * u_p + c, signed
    for i, j in ((0, 1), (1, 2), (2, 0)):
        du, dv = u[:, j] - u[:, i], v[:, j] - v[:, i]
        swap = (u[:, i] > u[:, j]) | ((u[:, i] == u[:, j]) & (v[:, i] > v[:, j]))
        pu, pv = np.where(swap, u[:, j], u[:, i]), np.where(swap, v[:, j], v[:, i])
        cu, cv = np.where(swap, -du, du), np.where(swap, -dv, dv)  # canonical direction
        s = np.where(swap, -1.0, 1.0)
        edges.append((s * cu, s * cv, s * (cv * pu - cu * pv), (dv < 0) | ((dv == 0) & (du > 0))))
    cum = np.concatenate([[0], np.cumsum(n)])
    cuts = np.unique(np.searchsorted(cum, np.arange(0, cum[-1] + _CHUNK, _CHUNK), side="right") - 1)
    cuts = np.unique(np.concatenate([[0], np.clip(cuts, 0, len(n)), [len(n)]]))
    out_i, out_z, out_s = [], [], []
    for a, b in zip(cuts[:-1], cuts[1:]):
        # each triangle's rows, and on each row the columns the three edges allow, found by
        # division and widened by a column each side: a superset of the pixels the exact
        # edge test below accepts, in the same (row, column) order as the whole box
        nr = np.where(nc[a:b] > 0, np.maximum(r1[a:b] - r0[a:b] + 1, 0), 0)
        t = np.repeat(np.arange(a, b), nr)
        if t.size == 0:
            continue
        rr = r0[t] + ranks(nr)
        lo, hi = c0[t].astype(float), c1[t].astype(float)
        fv = rr.astype(float)
        for a_, b_, c_, _ in edges:
            bt = b_[t]
            # e = a v - b u + c >= 0 bounds u by (a v + c) / b; only where |b| is large
            # enough that rounding moves the bound by far less than the column of slack
            firm = np.abs(bt) >= _FIRM_SLOPE
            bound = (a_[t][firm] * fv[firm] + c_[t][firm]) / bt[firm]
            up = bt[firm] > 0
            hi[firm] = np.where(up, np.minimum(hi[firm], np.floor(bound) + 1), hi[firm])
            lo[firm] = np.where(up, lo[firm], np.maximum(lo[firm], np.ceil(bound) - 1))
        first = lo.astype(np.int64)
        k = np.maximum(hi.astype(np.int64) - first + 1, 0)
        t, rr = np.repeat(t, k), np.repeat(rr, k)
        cc = np.repeat(first, k) + ranks(k)
        fu, fv = cc.astype(float), rr.astype(float)
        ok = np.ones(t.size, bool)
        e = []
        for a_, b_, c_, tie in edges:
            ei = a_[t] * fv - b_[t] * fu + c_[t]
            ok &= ei >= 0
            zero = np.flatnonzero(ei == 0)
            ok[zero] &= tie[t[zero]]
            e.append(ei)
        t, e0, e1, e2 = t[ok], e[0][ok], e[1][ok], e[2][ok]
        out_z.append((e1 * z[t, 0] + e2 * z[t, 1] + e0 * z[t, 2]) / (e0 + e1 + e2))
        out_i.append(rr[ok] * grid.nx + cc[ok])
        out_s.append(sign[t])
    if not out_i:
        return np.zeros(0, np.int64), np.zeros(0), np.zeros(0, np.int8)
    return np.concatenate(out_i), np.concatenate(out_z), np.concatenate(out_s)


def winding_masks(
    mesh: trimesh.Trimesh, grid, layer_mm: float, first: int = 0, last: int | None = None, crossings=None
) -> Iterator[tuple[int, np.ndarray, int]]:
    """Cured masks of layers ``first..last``, streamed in print order.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part in build coordinates (plate at z = 0), with faces; should be closed.
    grid : supportgen.analysis.layers.Grid
        Pixel grid; material outside it is not seen.
    layer_mm : float
        Layer height, positive; layer ``k`` is sampled at ``z = (k + 0.5) * layer_mm``.
    first, last : int
        First and last (inclusive) layer; ``last=None`` stops at the last layer
        sampled below the mesh's top.
    crossings : tuple, optional
        :func:`ray_crossings` of ``mesh`` on ``grid``, when already found (it is not
        changed); found here if None.

    Yields
    ------
    index : int
        The layer number.
    mask : (ny, nx) bool ndarray
        A fresh array, True where the winding number of the vertical ray below
        the sample height is positive.
    inverted : int
        Pixels whose winding number is negative (inside-out shells).

    Notes
    -----
    The inputs are not checked here (:func:`supportgen.analysis.layers.iter_layers` does).
    Rasterising costs O(F + C) (:func:`ray_crossings`); each layer then costs O(P)
    for a grid of P pixels (one copy) plus the crossings it passes.  Memory: one
    winding array, one mask and the crossing list (12 bytes a crossing; 17 while
    it is built and sorted).

    References
    ----------
    See the module references [1]_ and [2]_.

    Examples
    --------
    >>> from supportgen.analysis.layers import Grid
    >>> box = trimesh.creation.box(extents=(1.0, 1.0, 1.0)).apply_translation((0.5, 0.5, 0.5))
    >>> [(k, int(m.sum()), n) for k, m, n in winding_masks(box, Grid(0.125, 0.125, 0.25, 4, 4), 0.5)]
    [(0, 16, 0), (1, 16, 0)]
    """
    last = layer_count(float(mesh.bounds[1, 2]), layer_mm) - 1 if last is None else int(last)
    found = SortedCrossings(ray_crossings(mesh, grid) if crossings is None else crossings, grid, layer_mm)
    yield from found.masks(first, last)


class SortedCrossings:
    """The crossings of a mesh (:func:`ray_crossings`) sorted by the layer whose sample
    height they lie under and by pixel, so the layers stream from any layer on.

    Crossing ``i`` counts from layer ``k_i = floor(z_i / h - 1/2) + 1`` (the first sampled
    above it).  Sorting costs O(c log c) once; :meth:`winding_before` and :meth:`masks`
    then cost O(c) and O(P) a layer.  Memory: 12 bytes a crossing.
    """

    def __init__(self, crossings, grid, layer_mm: float):
        idx, zc, sg = crossings
        k = np.floor(zc / layer_mm - 0.5).astype(np.int64) + 1  # first layer sampled above the crossing
        np.maximum(k, 0, out=k)
        self.grid, self.n_px = grid, grid.ny * grid.nx
        key = k * self.n_px + idx
        del k
        order = np.argsort(key, kind="stable")
        self.key, self.sign = key[order], np.asarray(sg)[order].astype(np.int32)

    def winding_before(self, first: int) -> np.ndarray:
        """Winding number (flat, int32) of every pixel's ray below layer ``first``'s sample height."""
        m = int(np.searchsorted(self.key, first * self.n_px))
        w = np.bincount(self.key[:m] % self.n_px, weights=self.sign[:m], minlength=self.n_px)
        return np.rint(w).astype(np.int32)

    def masks(self, first: int, last: int, wind: np.ndarray | None = None) -> Iterator[tuple[int, np.ndarray, int]]:
        """``(layer, mask, inverted)`` for layers ``first..last`` as :func:`winding_masks` yields them;
        ``wind`` is :meth:`winding_before` of ``first`` when already found (it is updated in place)."""
        n_px, key, sg = self.n_px, self.key, self.sign
        wind = self.winding_before(first) if wind is None else wind
        flat = wind > 0
        neg = int(np.count_nonzero(wind < 0))
        bounds = np.searchsorted(key, np.arange(first, last + 2) * n_px)
        for n, layer in enumerate(range(first, last + 1)):
            a, b = bounds[n], bounds[n + 1]
            if b > a:
                kk = key[a:b]
                head = np.flatnonzero(np.concatenate([[True], kk[1:] != kk[:-1]]))
                cols = kk[head] - layer * n_px
                w = wind[cols]
                neg -= np.count_nonzero(w < 0)
                w += np.add.reduceat(sg[a:b], head)
                wind[cols] = w
                neg += np.count_nonzero(w < 0)
                flat[cols] = w > 0
            yield layer, flat.reshape(self.grid.shape).copy(), int(neg)
