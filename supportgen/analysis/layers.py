"""Layers: the part as the printer sees it (pixel masks, islands, reach).

:func:`iter_layers` streams the cured mask of every layer, rasterised by
:mod:`supportgen.analysis.raster` (a pixel is cured where the winding number of the
vertical ray through its centre, below the layer's sample height, is positive).

:func:`analyse_layers` walks the stack once: area, perimeter and 8-connected
components of every layer, islands (components with nothing cured beneath
them) and the unsupported reach of newly cured pixels.

Examples
--------
>>> import trimesh
>>> box = trimesh.creation.box(extents=(2.0, 2.0, 1.0))
>>> _ = box.apply_translation((0.0, 0.0, 0.5))
>>> stack = analyse_layers(box, 0.125, 0.25, 1.5)
>>> stack.area_mm2.tolist(), len(stack.islands), stack.max_unsupported_reach_mm
([4.0, 4.0, 4.0, 4.0], 0, 0.0)
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass

import numpy as np
import trimesh
from scipy import ndimage

from ..constants import EPS_ZERO
from ..errors import MeshError, SettingsError
from ..io.forked import Helper, may_fork
from .raster import SortedCrossings, layer_count, ray_crossings, winding_masks
from .runlength import box_runs, edge_components, mask_runs, paint_runs, run_overlaps

__all__ = [
    "Grid",
    "Layer",
    "Island",
    "LayerLabels",
    "Overreach",
    "LayerStack",
    "iter_layers",
    "analyse_layers",
    "component_stats",
    "speck_area_mm2",
    "HOLD_PIXELS",
]

_MARGIN = 5  # empty border of a layer window; near reach searched within 4 pixels


def speck_area_mm2(pixel_mm: float) -> float:
    """Area under which a region is a speck: a disc two pixels across (``pi * pixel_mm**2``).

    A speck is below what the printer resolves as a shape; it is also the least contact
    through which a layer holds the region above it (see :func:`analyse_layers`).
    """
    return float(np.pi * pixel_mm**2)


#: Fewest pixels of overlap that hold a region: the whole pixels of a speck (3 of its pi
#: pixels, whatever the pitch).  Not 4: a tip of the smallest diameter, two pixels, cures
#: about a speck, often 3 pixels, and must hold what it touches.
HOLD_PIXELS = 3


def _labels_at(runs, comp, w: int, rows, cols) -> np.ndarray:
    """The component (``comp`` of each run) of cured window pixels (rows, cols)."""
    r, s = runs[0], runs[1]
    return comp[np.searchsorted(r * (w + 1) + s, rows * (w + 1) + cols, side="right") - 1]


@dataclass(frozen=True)
class Grid:
    """The printer's pixel grid over a region of the plate.

    Pixel ``(row, col)`` has its centre at
    ``(x0 + col * pixel_mm, y0 + row * pixel_mm)``; masks are indexed ``[row, col]``
    i.e. ``[y, x]`` with shape ``(ny, nx)``.
    """

    x0: float
    y0: float
    pixel_mm: float
    ny: int
    nx: int

    @property
    def shape(self) -> tuple[int, int]:
        return (self.ny, self.nx)

    @classmethod
    def covering(cls, bounds, pixel_mm: float, pad: int = 2) -> Grid:
        """A grid over the x/y extent of ``bounds`` ((2, 3) array), ``pad`` pixels wider each side."""
        lo = np.floor(np.asarray(bounds)[0, :2] / pixel_mm) - pad
        hi = np.ceil(np.asarray(bounds)[1, :2] / pixel_mm) + pad
        n = (hi - lo + 1).astype(int)
        return cls(float(lo[0] * pixel_mm), float(lo[1] * pixel_mm), float(pixel_mm), int(n[1]), int(n[0]))

    def xy(self, rows, cols) -> np.ndarray:
        """Pixel centres (k, 2) of the given row and column indices."""
        return np.column_stack([self.x0 + np.asarray(cols) * self.pixel_mm, self.y0 + np.asarray(rows) * self.pixel_mm])

    def index(self, xy) -> tuple[np.ndarray, np.ndarray]:
        """Nearest (rows, cols) of points (k, 2); may fall outside the grid."""
        xy = np.atleast_2d(np.asarray(xy, float))
        cols = np.rint((xy[:, 0] - self.x0) / self.pixel_mm).astype(int)
        rows = np.rint((xy[:, 1] - self.y0) / self.pixel_mm).astype(int)
        return rows, cols


@dataclass(frozen=True)
class Layer:
    """One printed layer: index ``k`` cured between ``k*h`` and ``(k+1)*h``,
    sampled at its mid-height ``z_mm``; ``mask[row, col]`` is True where cured.
    ``inverted`` counts pixels whose winding number is negative (inside-out shells)."""

    index: int
    z_mm: float
    mask: np.ndarray
    inverted: int = 0


@dataclass(frozen=True, eq=False)
class LayerLabels:
    """The 8-connected components of one layer as row runs (what observers receive).

    Run ``i`` covers grid row ``rows[i]``, columns ``starts[i]`` to ``ends[i] - 1``;
    runs are in row-major order and ``label[i]`` (1..``n``) is its component.
    :meth:`image` paints the (ny, nx) label image, 0 where nothing is cured; an
    observer that works on runs never pays for it.
    """

    rows: np.ndarray
    starts: np.ndarray
    ends: np.ndarray
    label: np.ndarray
    n: int
    shape: tuple[int, int]

    @property
    def runs(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(rows, starts, ends) of the cured runs."""
        return self.rows, self.starts, self.ends

    def image(self) -> np.ndarray:
        """(ny, nx) int32 label image: ``label[i]`` on run ``i``, 0 elsewhere (O(pixels))."""
        if self.rows.size == 0:
            return np.zeros(self.shape, np.int32)
        r0, r1 = int(self.rows[0]), int(self.rows[-1]) + 1
        out = np.zeros(self.shape, np.int32)
        out[r0:r1] = paint_runs(self.rows - r0, self.starts, self.ends, self.label, (r1 - r0, self.shape[1]))
        return out

    @classmethod
    def empty(cls, shape) -> LayerLabels:
        """No cured pixel."""
        z = np.zeros(0, np.int64)
        return cls(z, z, z, np.zeros(0, np.int32), 0, tuple(shape))

    @classmethod
    def of(cls, mask: np.ndarray) -> LayerLabels:
        """The components of a bool layer image, numbered as ``scipy.ndimage.label``
        with a 3 x 3 structure numbers them (by their first pixel in raster order).

        >>> LayerLabels.of(np.array([[1, 0, 1], [0, 0, 1]], bool)).image().tolist()
        [[1, 0, 2], [0, 0, 2]]
        """
        mask = np.asarray(mask, bool)
        runs = box_runs(mask)
        if runs[0].size == 0:
            return cls.empty(mask.shape)
        comp, n, _, _ = _run_components(*runs, 1.0)
        return cls(*runs, comp.astype(np.int32) + 1, int(n), mask.shape)


@dataclass(frozen=True, eq=False)
class Island:
    """A component that first appears with nothing cured beneath it.

    ``mask`` holds its pixels in its first layer, cropped; pixel ``(i, j)`` of the
    mask is grid pixel ``(row0 + i, col0 + j)``.
    """

    layer: int
    z_mm: float
    area_mm2: float
    centroid_xy: tuple[float, float]
    mask: np.ndarray
    row0: int
    col0: int
    grid: Grid

    @property
    def area_bound_mm2(self) -> float:
        """Area (mm^2) of the pixels with a band half a pixel wide along their exposed edges.

        The printer lights a pixel when the layer's section covers its centre, so the
        section behind these pixels may reach up to half a pixel past each exposed
        edge without lighting another: on a grid shifted by a fraction of a pixel
        (another part's grid, the raft's) the same section may light that much more.
        One pixel gives 3 pixel areas, less than a speck (pi); two give 5.  This bounds
        sections at least a pixel wide; a sliver narrower than a pixel can run between
        pixel centres and be larger than it shows (or light nothing at all), so the
        bound is not one for such slivers.

        Examples
        --------
        >>> g = Grid(0.0, 0.0, 0.1, 10, 10)
        >>> round(Island(3, 0.35, 0.02, (0.45, 0.4), np.ones((1, 2), bool), 4, 4, g).area_bound_mm2, 6)
        0.05
        """
        m = np.pad(self.mask, 1)
        edges = np.count_nonzero(m[1:] != m[:-1]) + np.count_nonzero(m[:, 1:] != m[:, :-1])
        p = self.grid.pixel_mm
        return float(np.count_nonzero(self.mask) * p * p + 0.5 * p * p * edges)

    def held_by(self, xyz: np.ndarray, radius_mm: float, rise_mm: float) -> np.ndarray:
        """Which of the points ``xyz`` (k, 3) would hold this island as tips.

        A tip holds the island when it touches the island's first layer through
        at least a speck (the rule :func:`analyse_layers` holds regions by): the
        island's pixels within ``radius_mm`` (a tip's reach across) of its point
        number at least 3 (all of them for a smaller island), and the point is no
        more than ``rise_mm`` above the layer's mid-plane nor more than twice
        ``rise_mm`` below it.  A tip beside the island or higher up touches the part
        only after the island has cured in mid-air; a tip lower down touches other
        material (the island has none below it), so neither holds it.

        Examples
        --------
        >>> g = Grid(0.0, 0.0, 0.1, 10, 10)
        >>> isl = Island(3, 0.35, 0.04, (0.45, 0.45), np.ones((2, 2), bool), 4, 4, g)
        >>> pts = [[0.45, 0.45, 0.35], [0.45, 0.45, 2.0], [2.0, 2.0, 0.35], [0.6, 0.6, 0.35], [0.45, 0.45, 0.05]]
        >>> isl.held_by(np.array(pts), 0.1, 0.1).tolist()  # the 4th touches one pixel only; the 5th is on a part below
        [True, False, False, False, False]
        """
        xyz = np.atleast_2d(np.asarray(xyz, float))
        if len(xyz) == 0:
            return np.zeros(0, bool)
        p = self.grid.pixel_mm
        k = int(np.ceil(radius_mm / p))
        dr, dc = np.mgrid[-k : k + 1, -k : k + 1]
        disc = (np.hypot(dr, dc) * p <= radius_mm + EPS_ZERO).astype(np.int32)
        padded = np.pad(self.mask, k).astype(np.int32)
        touched = ndimage.correlate(padded, disc, mode="constant")  # island pixels under a tip at each pixel
        need = min(HOLD_PIXELS, int(self.mask.sum()))
        rows, cols = self.grid.index(xyz[:, :2])
        i, j = rows - self.row0 + k, cols - self.col0 + k
        inside = (i >= 0) & (j >= 0) & (i < padded.shape[0]) & (j < padded.shape[1])
        over = np.zeros(len(xyz), bool)
        over[inside] = touched[i[inside], j[inside]] >= max(need, 1)
        return over & (xyz[:, 2] <= self.z_mm + rise_mm) & (xyz[:, 2] >= self.z_mm - 2 * rise_mm)

    def points(self, spacing_mm: float, seed: int = 0) -> np.ndarray:
        """Points (n, 2) covering the island at about ``spacing_mm``, n >= 1.

        The first is the island pixel nearest its centroid; the rest are added by
        farthest-point sampling over the island's pixel centres until every pixel
        lies within ``spacing_mm / sqrt(2)`` of a point, so neighbours sit about
        ``spacing_mm`` apart.  ``seed`` sets the phase of the candidate sub-grid.

        Notes
        -----
        Candidates are the island's pixels thinned to a sub-grid of about a quarter
        of the spacing: cost O(m k) for m candidates and k points.
        """
        if not spacing_mm > 0:
            raise SettingsError(f"island spacing_mm={spacing_mm!r} must be positive; pass a contact spacing in mm")
        r, c = np.nonzero(self.mask)
        xy = self.grid.xy(r + self.row0, c + self.col0)
        first = xy[np.argmin(np.sum((xy - np.asarray(self.centroid_xy)) ** 2, axis=1))]
        stride = max(1, int(spacing_mm / 4 / self.grid.pixel_mm))
        if stride > 1:
            phase = np.random.default_rng(seed).integers(0, stride, size=2)
            keep = ((r - phase[0]) % stride == 0) & ((c - phase[1]) % stride == 0)
            xy = xy[keep] if keep.any() else xy
        pts = [first]
        d = np.hypot(*(xy - first).T)
        while d.size and d.max() > spacing_mm / np.sqrt(2):
            pts.append(xy[np.argmax(d)])
            d = np.minimum(d, np.hypot(*(xy - pts[-1]).T))
        return np.array(pts)


@dataclass(frozen=True)
class Overreach:
    """A connected region of new pixels reaching past the limit, at its worst pixel."""

    layer: int
    z_mm: float
    xy: tuple[float, float]
    reach_mm: float


@dataclass(frozen=True, eq=False)
class LayerStack:
    """Per-layer figures of one pass over the layers (arrays have length L)."""

    grid: Grid
    layer_mm: float
    z_mm: np.ndarray
    area_mm2: np.ndarray
    perimeter_mm: np.ndarray
    n_components: np.ndarray
    islands: tuple[Island, ...]
    reach_mm: np.ndarray
    reach_xy: np.ndarray
    overreach: tuple[Overreach, ...]
    max_unsupported_reach_mm: float
    max_unsupported_reach_layer: int
    inverted_pixels: int

    def to_dict(self) -> dict:
        """Summary for the JSON report: counts, worst reach and the per-layer areas."""
        k = self.max_unsupported_reach_layer
        return {
            "layers": int(len(self.z_mm)),
            "layer_mm": self.layer_mm,
            "pixel_mm": self.grid.pixel_mm,
            "islands": len(self.islands),
            "island_list": [
                {
                    "layer": i.layer,
                    "z_mm": round(i.z_mm, 4),
                    "area_mm2": round(i.area_mm2, 4),
                    "xy_mm": [round(v, 4) for v in i.centroid_xy],
                }
                for i in self.islands
            ],
            "max_unsupported_reach_mm": round(float(self.max_unsupported_reach_mm), 4),
            "max_unsupported_reach_layer": int(k),
            "max_reach_xy": (
                [round(float(v), 4) for v in self.reach_xy[k]]
                if k >= 0 and np.isfinite(self.reach_xy[k]).all()
                else None
            ),
            "overreach_regions": len(self.overreach),
            "inverted_pixels": int(self.inverted_pixels),
            "max_area_mm2": round(float(self.area_mm2.max(initial=0.0)), 4),
            "area_mm2": [round(float(a), 4) for a in self.area_mm2],
        }


def _check(mesh, layer_mm: float) -> None:
    if not isinstance(mesh, trimesh.Trimesh) or len(mesh.faces) == 0:
        raise MeshError("layers: the mesh has no faces; load a closed triangle mesh first")
    if not (np.isfinite(layer_mm) and layer_mm > 0):
        raise SettingsError(f"layers: layer_mm={layer_mm!r} must be a positive number of mm")


def iter_layers(
    mesh: trimesh.Trimesh, grid: Grid, layer_mm: float, first: int = 0, last: int | None = None
) -> Iterator[Layer]:
    """The layers of a mesh, streamed in print order.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part in build coordinates (plate at z = 0); should be closed.
    grid : Grid
        Pixel grid; material outside it is not seen.
    layer_mm : float
        Layer height; layer ``k`` is sampled at ``z = (k + 0.5) * layer_mm``.
    first, last : int
        First and last (inclusive) layer produced; ``last=None`` stops at the
        last layer sampled below the mesh's top.

    Yields
    ------
    Layer
        With a fresh ``(ny, nx)`` bool mask, cured where the winding number of the
        vertical ray below the sample height is positive.

    Raises
    ------
    supportgen.errors.MeshError
        Mesh without faces.
    supportgen.errors.SettingsError
        Non-positive layer height.

    Notes
    -----
    Cost O(F + C) for F faces and C pixel/triangle candidates, then O(P) a layer
    for P pixels; memory one layer plus the crossing list.  The rasteriser and its
    references are in :mod:`supportgen.analysis.raster` (:func:`~supportgen.analysis.raster.winding_masks`).
    """
    _check(mesh, layer_mm)
    for index, mask, inverted in winding_masks(mesh, grid, layer_mm, first, last):
        yield Layer(index, (index + 0.5) * layer_mm, mask, inverted)


def component_stats(labels: np.ndarray, n_labels: int, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Area (n,) in mm^2 and centroid (n, 2) in build x/y of labels ``1..n``.

    Notes
    -----
    O(P) for P pixels in ``labels``.

    Examples
    --------
    >>> g = Grid(0.0, 0.0, 0.5, 3, 4)
    >>> lab = np.array([[1, 1, 0, 0], [1, 1, 0, 2], [0, 0, 0, 2]])
    >>> a, c = component_stats(lab, 2, g)
    >>> a.tolist(), c.tolist()
    ([1.0, 0.5], [[0.25, 0.25], [1.5, 0.75]])
    """
    flat = labels.ravel()
    i = np.flatnonzero(flat)
    lab = flat[i] - 1
    r, c = np.divmod(i, labels.shape[1])
    cnt = np.bincount(lab, minlength=n_labels).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        rc = np.column_stack([np.bincount(lab, r, n_labels), np.bincount(lab, c, n_labels)]) / cnt[:, None]
    return cnt * grid.pixel_mm**2, grid.xy(rc[:, 0], rc[:, 1])


def _window(a: np.ndarray, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
    """``a[r0:r1, c0:c1]``, padded with False where the window leaves the array."""
    if r0 >= 0 and c0 >= 0 and r1 <= a.shape[0] and c1 <= a.shape[1]:
        return a[r0:r1, c0:c1]
    out = np.zeros((r1 - r0, c1 - c0), a.dtype)
    rs, cs = slice(max(r0, 0), min(r1, a.shape[0])), slice(max(c0, 0), min(c1, a.shape[1]))
    out[rs.start - r0 : rs.stop - r0, cs.start - c0 : cs.stop - c0] = a[rs, cs]
    return out


def _near_rings(radius: int) -> tuple[tuple[float, tuple[tuple[int, int], ...]], ...]:
    """Pixel offsets within ``radius``, grouped by distance, nearest first."""
    dr, dc = np.mgrid[-radius : radius + 1, -radius : radius + 1].reshape(2, -1)
    d = np.hypot(dr, dc)
    keep = (d > 0) & (d <= radius)
    return tuple(
        (float(v), tuple(zip(dr[keep & (d == v)].tolist(), dc[keep & (d == v)].tolist()))) for v in np.unique(d[keep])
    )


_RINGS = _near_rings(_MARGIN - 1)


def _run_components(r, s, e, pixel_mm):
    """8-connected components of row runs, with area and Crofton perimeter.

    Returns the component (0-based) of every run, their number, the area (pixels)
    and the perimeter (mm): Cauchy-Crofton over 4 directions, with the transitions
    counted from run lengths and the overlaps of runs in adjacent rows.
    """
    n = r.size
    a, b, _ = run_overlaps((r + 1, s, e), (r, s, e), shift=1)  # run a touches run b of the next row
    area = int((e - s).sum())
    ov = [int(np.maximum(np.minimum(e[a] + t, e[b]) - np.maximum(s[a] + t, s[b]), 0).sum()) for t in (0, 1, -1)]
    transitions = 2 * n + 2 * (area - ov[0]) + (4 * area - 2 * ov[1] - 2 * ov[2]) / np.sqrt(2)
    n_comp, comp = edge_components(n, a, b)
    return comp, n_comp, area, float(np.pi / 8 * pixel_mm * transitions)


def _far_distance(prev: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Exact distance (pixels) from grid pixels (rows, cols) to the nearest True of ``prev``.

    The transform runs in a box around the pixels, grown until every distance found
    is no more than the box margin (then nothing outside the box can be nearer).
    """
    margin = 8
    while True:
        r0, r1 = max(rows.min() - margin, 0), min(rows.max() + margin + 1, prev.shape[0])
        c0, c1 = max(cols.min() - margin, 0), min(cols.max() + margin + 1, prev.shape[1])
        whole = r0 == 0 and c0 == 0 and r1 == prev.shape[0] and c1 == prev.shape[1]
        sub = prev[r0:r1, c0:c1]
        if not sub.any():
            if whole:
                return np.full(rows.shape, np.inf)
            margin *= 4
            continue
        d = ndimage.distance_transform_edt(~sub)[rows - r0, cols - c0]
        if whole or d.max() <= margin:
            return d
        margin = int(np.ceil(d.max())) + 1


def _held(pw, runs, comp, n):
    """Which components of a layer window the layer below holds.

    A component is held when it overlaps the cured pixels of the layer below in at
    least :data:`HOLD_PIXELS` (a speck), or, when it is itself smaller than that, in
    at least one: one pixel of contact does not hold a larger region
    (the independent check in ``benchmarks/stress_corpus.py`` applies a like rule to
    exact sections, holding too a region that shares half a pixel and overhangs by no more
    than a 45 degree step except for less than a speck).
    """
    size = np.bincount(comp, weights=runs[2] - runs[1], minlength=n)
    below = mask_runs(pw)  # overlaps counted run against run: O(runs), not O(pixels)
    if below[0].size == 0 or runs[0].size == 0:
        return np.zeros(n, bool)
    ia, _, length = run_overlaps(runs, below)
    overlap = np.bincount(comp[ia], weights=np.maximum(length, 0), minlength=n)
    return overlap >= np.minimum(HOLD_PIXELS, np.maximum(size, 1))


def _beside(ph: np.ndarray, island, r0: int, c0: int) -> bool:
    """Whether held pixels of the layer below (window ``ph``) lie within a pixel of the
    island's, diagonals included: a speck held only by a corner is the raster of a thin
    feature stepping sideways (the exact sections overlap), not a speck in mid-air."""
    r, c = island.row0 - r0 - 1, island.col0 - c0 - 1
    near = ndimage.binary_dilation(np.pad(island.mask, 1), structure=np.ones((3, 3), bool))
    h, w = near.shape
    return bool((ph[r : r + h, c : c + w] & near).any())


def _without(pw: np.ndarray, specks, r0: int, c0: int, nx: int) -> np.ndarray:
    """The window ``pw`` of the layer below with the pixels of its speck islands cleared
    (``pw`` itself when it has none)."""
    if not specks:
        return pw
    flat = np.concatenate([f for _, f in specks])
    r, c = np.divmod(flat, nx)
    r, c = r - r0, c - c0
    ok = (r >= 0) & (r < pw.shape[0]) & (c >= 0) & (c < pw.shape[1])
    out = pw.copy()
    out[r[ok], c[ok]] = False
    return out


def _flat_pixels(island) -> np.ndarray:
    """Full-grid flat indices of an island's pixels."""
    r, c = island.mask.nonzero()
    return (r + island.row0) * island.grid.nx + c + island.col0


def _grown_specks(specks, labels, m, runs, comp, r0, c0, nx):
    """``(index, label)`` for each of last layer's speck islands that lies under a
    component of this layer with one of ``labels`` (an island here)."""
    w = m.shape[1]
    for idx, flat in specks:
        wr, wc = np.divmod(flat, nx)
        wr, wc = wr - r0, wc - c0
        ok = (wr >= 0) & (wr < m.shape[0]) & (wc >= 0) & (wc < w)
        wr, wc = wr[ok], wc[ok]
        cured = m[wr, wc]
        lab = _labels_at(runs, comp, w, wr[cured], wc[cured])
        hit = lab[np.isin(lab, labels)]
        if hit.size:
            yield idx, int(hit[0])


def _near_reach(pw: np.ndarray, new: np.ndarray, w: int) -> np.ndarray:
    """Distance (pixels) from each new pixel (flat index of a window with a wide False
    border) to the nearest cured pixel of the layer below when that is within the
    border's width, else nan."""
    pf = pw.ravel()
    d = np.full(new.size, np.nan)
    todo = np.arange(new.size)
    for dist, offsets in _RINGS:
        hit = np.zeros(todo.size, bool)
        for dr, dc in offsets:
            hit |= pf[new[todo] + dr * w + dc]
        d[todo[hit]] = dist
        todo = todo[~hit]
        if todo.size == 0:
            break
    return d


def analyse_layers(
    mesh: trimesh.Trimesh,
    pixel_mm: float,
    layer_mm: float,
    reach_limit_mm: float,
    *,
    grid: Grid | None = None,
    observers: Iterable[Callable] = (),
    progress: bool | str = False,
    workers: int = 1,
) -> LayerStack:
    """Area, perimeter, components, islands and unsupported reach of every layer, in one pass.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part in build coordinates (plate at z = 0); should be closed.
    pixel_mm, layer_mm : float
        Pixel pitch and layer height (mm).
    reach_limit_mm : float
        Reach past which a region of new pixels is reported in ``overreach``.
    grid : Grid, optional
        Pixel grid (default: covering the mesh with a 2-pixel margin); its pitch must
        equal ``pixel_mm``.
    observers : iterable of callables
        Each called as ``observer(layer, labels)`` for every layer, with its
        8-connected components as row runs (:class:`LayerLabels`; ``labels.image()``
        paints them when an observer needs pixels).
    progress : bool or str
        Show a progress bar (a string labels it); it is cleared when done.
    workers : int
        2 or more: share the work with a forked helper process (:func:`_run_split`):
        it walks the upper half of the layers while this one walks the lower half, or,
        with observers, it calls them while this one walks.  The result is the same as
        one walk's.  Taken from 96 layers, on a POSIX system with two CPUs for us, not
        in a daemon process (a batch worker), and only with observers that are marked
        ``runs_in_helper`` (the helper's copy of each gives ``handover()``, pickled back,
        and the caller's copy ``take(state)``s it); else one walk.

    Returns
    -------
    LayerStack

    Raises
    ------
    supportgen.errors.MeshError
        Mesh without faces.
    supportgen.errors.SettingsError
        Non-positive pixel, layer or limit, or a grid of another pitch.

    Notes
    -----
    Layer 0 is anchored by the plate.  An edge-connected (4-connected) region of
    layer k > 0 is held by layer k - 1 when they share at least a speck of cured
    pixels (:func:`speck_area_mm2`; one shared pixel suffices only for a region
    smaller than a speck); pixels that meet only at a corner share no area, so they
    do not hold one another.  Any other region is an island; it is recorded once, at its first layer, and counts
    as anchored above it (it will carry contacts), so every cured pixel of layer
    k - 1 counts towards holding layer k, except those of a speck in mid-air: an
    island smaller than a speck with no held pixel of the layer below within a pixel
    (diagonals included) carries no contact and holds nothing, so what grows on it is
    one island with it, starting at the speck's layer (a part growing from a knife
    edge or a point facing down).  The reach of a newly cured
    pixel of an anchored component is its distance (pixel centre to pixel
    centre) to the nearest cured pixel of layer k - 1: searched among the pixels
    within 4 pixels, else an exact Euclidean distance transform [1]_ in a box
    around the far pixels.  Components are found on the row runs of each layer
    (8-connected: runs of adjacent rows that touch, merged by union-find), which
    gives the same labels as ``scipy.ndimage.label`` with a 3 x 3 structure at a
    fraction of the cost; perimeter by the Cauchy-Crofton formula over 4
    directions [2]_ from the same runs.

    Cost per layer: O(P / 8) to find the cured box B, O(B) to extract runs and
    new pixels, O(R log R) for R runs and O(N) for N new pixels, plus a distance
    transform of the box around pixels reaching farther than 4 pixels (rare).
    Memory: the crossing list plus a few (ny, nx) layers.

    References
    ----------
    .. [1] C. R. Maurer, R. Qi and V. Raghavan, "A linear time algorithm for computing
       exact Euclidean distance transforms of binary images in arbitrary dimensions",
       IEEE TPAMI 25(2), 2003 (scipy.ndimage.distance_transform_edt).
    .. [2] G. Lehmann and D. Legland, "Efficient N-dimensional surface estimation using
       Crofton formula and run-length encoding", The Insight Journal, 2012.
    """
    for name, val in (("pixel_mm", pixel_mm), ("layer_mm", layer_mm), ("reach_limit_mm", reach_limit_mm)):
        if not (np.isfinite(val) and val > 0):
            raise SettingsError(f"layers: {name}={val!r} must be a positive number of mm")
    _check(mesh, layer_mm)
    grid = Grid.covering(mesh.bounds, pixel_mm) if grid is None else grid
    if not np.isclose(grid.pixel_mm, pixel_mm, rtol=EPS_ZERO, atol=0):
        raise SettingsError(
            f"layers: grid pitch {grid.pixel_mm} mm differs from pixel_mm={pixel_mm}; "
            "pass a grid of the same pitch or none"
        )
    observers = tuple(observers)
    n_layers = layer_count(float(mesh.bounds[1, 2]), layer_mm)
    bar = None
    if progress:
        from tqdm import tqdm

        label = progress if isinstance(progress, str) else "layers"
        bar = tqdm(total=n_layers, desc=label, unit="layer", leave=False)
    try:
        walk = _Walk(grid, n_layers, reach_limit_mm)
        helped = all(getattr(ob, "runs_in_helper", False) for ob in observers)
        if not helped or int(workers) < 2 or n_layers < SPLIT_MIN_LAYERS or not may_fork():
            walk.run(iter_layers(mesh, grid, layer_mm), observers, bar)
        else:
            _run_split(walk, mesh, grid, layer_mm, bar, observers)
    finally:
        if bar is not None:
            bar.close()
    return walk.stack(layer_mm)


#: Fewest layers worth a second process (:func:`analyse_layers` ``workers``): our choice, not
#: measured; a fork and pickling the helper's half back cost tens of milliseconds, a few
#: layers' walk, so only stacks of many layers gain.
SPLIT_MIN_LAYERS = 96


class _Walk:
    """The state of the walk up the layers (:func:`analyse_layers`) and one step of it.

    ``prev`` is the cured mask of the layer below and ``specks`` last layer's speck
    islands in mid-air (index in ``islands``, full-grid flat pixels); nothing else
    carries from one layer to the next, so a walk started at layer k with the true
    ``prev`` and ``specks`` of layer k - 1 gives the layers from k on exactly as one
    walk from the plate does (what :func:`_run_split` relies on).
    """

    def __init__(self, grid: Grid, n_layers: int, reach_limit_mm: float):
        self.grid, self.reach_limit_mm = grid, reach_limit_mm
        self.rows_out = np.zeros((n_layers, 4))  # area, perimeter, components, reach (pixels)
        self.reach_xy = np.full((n_layers, 2), np.nan)
        self.islands: list[Island] = []
        self.over: list[Overreach] = []
        self.inverted = 0
        self.specks: list = []  # (index in islands, full-grid flat pixels) of last layer's speck islands
        self.drops: list[tuple[int, int]] = []  # (layer, island index) of each speck dropped into a later island
        self.speck_mm2 = speck_area_mm2(grid.pixel_mm)
        self.prev = np.zeros(grid.shape, bool)
        # after each layer, when kept: layer, islands, overreach, inverted, signature, speck islands
        self.log: list | None = None

    def run(self, layers: Iterable[Layer], observers=(), bar=None) -> None:
        for layer in layers:
            self.step(layer, observers)
            if bar is not None:
                bar.update(1)

    def step(self, layer: Layer, observers=()) -> None:
        grid, p, prev, specks = self.grid, self.grid.pixel_mm, self.prev, self.specks
        rows_out, reach_xy, islands, reach_limit_mm = self.rows_out, self.reach_xy, self.islands, self.reach_limit_mm
        speck_mm2 = self.speck_mm2
        k, mask = layer.index, layer.mask
        self.inverted += layer.inverted
        rr = np.flatnonzero(mask.any(axis=1))
        if rr.size == 0:
            for ob in observers:
                ob(layer, LayerLabels.empty(grid.shape))
            self.prev, self.specks = mask, []
            self._note(k)
            return
        cc = np.flatnonzero(mask.any(axis=0))
        r0, r1, c0, c1 = rr[0] - _MARGIN, rr[-1] + _MARGIN + 1, cc[0] - _MARGIN, cc[-1] + _MARGIN + 1
        m, pw = _window(mask, r0, r1, c0, c1), _window(prev, r0, r1, c0, c1)
        w = m.shape[1]
        runs = mask_runs(m)
        comp, n, area, perim = _run_components(*runs, p)
        rows_out[k, :3] = area * p * p, perim, n
        new = np.flatnonzero(m & ~pw) if k > 0 else np.zeros(0, np.int64)
        # A speck in mid-air carries no contact (no tip holds it), so it holds nothing above it:
        # what grows on it is in mid-air too, one island with it (held pixels: ph).
        ph = _without(pw, specks, r0, c0, grid.nx)
        seeds = new if ph is pw else np.flatnonzero(m & ~ph)
        grown = []  # this layer's speck islands, for the next layer
        if seeds.size:
            # Holding is judged on edge-connected (4-connected) regions: pixels that meet
            # only at a corner share no area, so one does not hold the other.
            n4, comp4 = edge_components(runs[0].size, *run_overlaps((runs[0] + 1, *runs[1:]), runs)[:2])
            held4 = _held(ph, runs, comp4, n4)
            ls = _labels_at(runs, comp4, w, *np.divmod(seeds, w))
            isl = ~held4[ls]
            if isl.any():
                found = _islands(seeds[isl], ls[isl], k, layer.z_mm, grid, r0, c0, w)  # in label order
                labels = np.unique(ls[isl])
                for idx, lab in _grown_specks(specks, labels, m, runs, comp4, r0, c0, grid.nx):
                    # The speck was the island's first layer: one island, starting there.
                    j = int(np.searchsorted(labels, lab))
                    found[j] = dataclasses.replace(found[j], layer=islands[idx].layer, z_mm=islands[idx].z_mm)
                    self.drops.append((k, idx))
                grown = [
                    (len(islands) + j, _flat_pixels(i))
                    for j, i in enumerate(found)
                    if i.area_mm2 < speck_mm2 and not _beside(ph, i, r0, c0)
                ]
                islands.extend(found)
        if new.size:
            nr, nc = np.divmod(new, w)
            d = _near_reach(pw, new, w)
            isl = ~held4[_labels_at(runs, comp4, w, nr, nc)]
            if not isl.all():
                nr, nc, d = nr[~isl], nc[~isl], d[~isl]
                far = np.isnan(d)
                if far.any():
                    d[far] = _far_distance(prev, nr[far] + r0, nc[far] + c0)
                j = int(np.argmax(d))
                rows_out[k, 3] = d[j]
                reach_xy[k] = grid.xy(nr[j] + r0, nc[j] + c0)[0]
                if (d * p > reach_limit_mm).any():
                    self.over.extend(_overreach(nr, nc, d, d * p > reach_limit_mm, k, layer.z_mm, grid, r0, c0))
        if observers:
            # the window's margin is empty, so every run lies inside the grid
            labels = LayerLabels(runs[0] + r0, runs[1] + c0, runs[2] + c0, comp + 1, int(n), grid.shape)
            for ob in observers:
                ob(layer, labels)
        self.prev, self.specks = mask, grown
        self._note(k)

    def signature(self) -> tuple:
        """What the next layer takes from this walk besides the mask below: each speck in
        mid-air's pixels and the layer and height its island started at."""
        return tuple((flat.tobytes(), self.islands[i].layer, self.islands[i].z_mm) for i, flat in self.specks)

    def _note(self, k: int) -> None:
        if self.log is not None:
            self.log.append(
                (k, len(self.islands), len(self.over), self.inverted, self.signature(), [i for i, _ in self.specks])
            )

    def part(self, first: int) -> tuple:
        """What the walk found from layer ``first`` on, with its log (for :meth:`join`)."""
        return (
            first,
            self.rows_out[first:],
            self.reach_xy[first:],
            self.islands,
            self.over,
            self.inverted,
            self.drops,
            self.log,
        )

    def join(self, part: tuple, after: int) -> bool:
        """Take over the layers above ``after`` from a walk started at layer ``part[0]``
        (``<= after + 1``), if its state after layer ``after`` was this walk's; False if not.

        The two walks agree from there on when the other one's specks in mid-air after
        ``after`` are this one's (:meth:`signature`): its islands and overreach found
        higher up come over, numbered after this walk's, and its specks dropped into
        islands above ``after`` are mapped to this walk's specks of the same pixels.
        """
        first, rows, xy, islands, over, inverted, drops, log = part
        if after < first - 1:
            return False
        if after == first - 1:
            n_isl, n_over, inv, sig, idx_at = 0, 0, 0, (), []
        else:
            _, n_isl, n_over, inv, sig, idx_at = log[after - first]
        if sig != self.signature():
            return False
        theirs = {other: mine for (mine, _), other in zip(self.specks, idx_at)}
        base = len(self.islands)
        self.drops += [(k, base + idx - n_isl if idx >= n_isl else theirs[idx]) for k, idx in drops if k > after]
        self.rows_out[after + 1 :] = rows[after + 1 - first :]
        self.reach_xy[after + 1 :] = xy[after + 1 - first :]
        self.islands.extend(islands[n_isl:])
        self.over.extend(over[n_over:])
        self.inverted += inverted - inv
        return True

    def stack(self, layer_mm: float) -> LayerStack:
        n_layers, p = len(self.rows_out), self.grid.pixel_mm
        dropped = {idx for _, idx in self.drops}
        reach = self.rows_out[:, 3] * p
        worst = int(np.argmax(reach)) if n_layers and reach.max() > 0 else -1
        return LayerStack(
            self.grid,
            float(layer_mm),
            (np.arange(n_layers) + 0.5) * layer_mm,
            self.rows_out[:, 0],
            self.rows_out[:, 1],
            self.rows_out[:, 2].astype(int),
            tuple(i for j, i in enumerate(self.islands) if j not in dropped),
            reach,
            self.reach_xy,
            tuple(self.over),
            float(reach.max(initial=0.0)),
            worst,
            int(self.inverted),
        )


def _upper_walk(found: SortedCrossings, grid: Grid, layer_mm: float, cut: int, n_layers: int, reach_limit_mm: float):
    """In the helper: walk layers ``cut..`` from the true mask of layer ``cut - 1`` and no
    speck in mid-air; what it found (:meth:`_Walk.part`)."""
    walk = _Walk(grid, n_layers, reach_limit_mm)
    walk.log = []
    wind = found.winding_before(cut)
    walk.prev = (wind > 0).reshape(grid.shape)  # the cured mask of layer cut - 1
    walk.run(_layers_from(found, layer_mm, cut, n_layers - 1, wind))
    return walk.part(cut)


def _observe(found: SortedCrossings, layer_mm: float, n_layers: int, observers) -> list:
    """In the helper: call the observers on every layer with its components, as the walk
    would (:meth:`LayerLabels.of` numbers them as the walk does); what each hands over."""
    for layer in _layers_from(found, layer_mm, 0, n_layers - 1):
        labels = LayerLabels.of(layer.mask)
        for ob in observers:
            ob(layer, labels)
    return [ob.handover() for ob in observers]


#: Fewest faces whose rasterisation is shared with a helper (:func:`_crossings`).
SPLIT_MIN_FACES = 20_000


def _crossings(mesh, grid: Grid):
    """:func:`~supportgen.analysis.raster.ray_crossings` of ``mesh``, the second half of its
    faces rasterised in a forked helper.

    Each triangle's crossings depend on that triangle alone and come out in face order,
    so the two halves joined are the one call's arrays, element for element.
    """
    faces = np.asarray(mesh.faces)
    if len(faces) < SPLIT_MIN_FACES:
        return ray_crossings(mesh, grid)
    half = len(faces) // 2
    lower, upper = (trimesh.Trimesh(mesh.vertices, f, process=False) for f in (faces[:half], faces[half:]))
    try:
        helper = Helper(ray_crossings, upper, grid, name="supportgen-raster")
    except OSError:
        return ray_crossings(mesh, grid)
    with helper:
        first = ray_crossings(lower, grid)
        second = helper.result()
    if second is None:
        second = ray_crossings(upper, grid)
    return tuple(np.concatenate([a, b]) for a, b in zip(first, second))


def _layers_from(found: SortedCrossings, layer_mm: float, first: int, last: int, wind=None) -> Iterator[Layer]:
    """:func:`iter_layers` from ``first`` to ``last`` over crossings already sorted (a checked mesh)."""
    for index, mask, inverted in found.masks(first, last, wind):
        yield Layer(index, (index + 0.5) * layer_mm, mask, inverted)


def _balanced_cut(zmin: np.ndarray, zmax: np.ndarray, layer_mm: float, n_layers: int) -> int:
    """The first layer of the upper half: the layer walk's cost split evenly, each layer
    costing a fixed share plus the faces crossing its sample plane (the runs and
    components it has grow with them); at least a quarter of the layers each side."""
    planes = (np.arange(n_layers) + 0.5) * layer_mm
    spans = np.searchsorted(np.sort(zmin), planes, "right") - np.searchsorted(np.sort(zmax), planes, "left")
    cost = spans + max(float(spans.mean()), 1.0)
    cut = int(np.searchsorted(np.cumsum(cost), cost.sum() / 2))
    return int(np.clip(cut, n_layers // 4, n_layers - n_layers // 4))


def _run_split(walk: _Walk, mesh, grid: Grid, layer_mm: float, bar, observers=()) -> None:
    """:meth:`_Walk.run` over all layers with a forked helper (:mod:`supportgen.io.forked`),
    with the same result as one walk.

    Without observers, the helper walks the upper half of the layers from the true mask
    of the layer below it, taking no speck in mid-air there, while this process walks the
    lower half.  If the lower half ends with a speck in mid-air (what grows on it above is
    an island from the speck's layer), this process walks on until its state meets the
    helper's (:meth:`_Walk.join`; the speck chain ends within a few layers) and takes the
    rest from it.  With
    observers (each marked ``runs_in_helper``), the helper calls them on every layer while
    this process walks all layers, and their states come back from it.  Whenever the
    helper fails, this process does its work, so the result is always that of one walk.
    The crossings are found (half the faces in a first helper, :func:`_crossings`) and
    sorted once, before the fork, and shared.
    """
    n_layers = len(walk.rows_out)
    found = SortedCrossings(_crossings(mesh, grid), grid, layer_mm)
    if observers:
        try:
            helper = Helper(_observe, found, layer_mm, n_layers, observers, name="supportgen-observers")
        except OSError:  # no process to be had: one walk
            walk.run(_layers_from(found, layer_mm, 0, n_layers - 1), observers, bar)
            return
        with helper:
            walk.run(_layers_from(found, layer_mm, 0, n_layers - 1), (), bar)
            states = helper.result()
        if states is None:
            walk_obs = _Walk(walk.grid, n_layers, walk.reach_limit_mm)  # the observers' calls, here
            walk_obs.run(_layers_from(found, layer_mm, 0, n_layers - 1), observers)
        else:
            for ob, state in zip(observers, states):
                ob.take(state)
        return
    tri_z = np.asarray(mesh.vertices, float)[np.asarray(mesh.faces)][..., 2]
    cut = _balanced_cut(tri_z.min(axis=1), tri_z.max(axis=1), layer_mm, n_layers)
    try:
        helper = Helper(
            _upper_walk, found, grid, layer_mm, cut, n_layers, walk.reach_limit_mm, name="supportgen-layers"
        )
    except OSError:
        walk.run(_layers_from(found, layer_mm, 0, n_layers - 1), (), bar)
        return
    with helper:
        walk.run(_layers_from(found, layer_mm, 0, cut - 1), (), bar)
        upper = helper.result()
    # Walk on here until this walk's state meets the helper's (at once, unless the lower
    # half ends on a speck in mid-air), then take the helper's layers from there.
    layers = _layers_from(found, layer_mm, cut, n_layers - 1)
    after = cut - 1
    while not (upper is not None and walk.join(upper, after)):
        layer = next(layers, None)
        if layer is None:
            return
        walk.step(layer)
        after += 1
        if bar is not None:
            bar.update(1)
    if bar is not None:
        bar.update(n_layers - 1 - after)


def _islands(pix, pl, k, z, grid, r0, c0, w):
    """Island records from their pixels (flat window indices) and labels."""
    order = np.argsort(pl, kind="stable")
    pix, pl = pix[order], pl[order]
    out = []
    for group in np.split(pix, np.flatnonzero(np.diff(pl)) + 1):
        r, c = np.divmod(group, w)
        mask = np.zeros((r.max() - r.min() + 1, c.max() - c.min() + 1), bool)
        mask[r - r.min(), c - c.min()] = True
        xy = grid.xy(r.mean() + r0, c.mean() + c0)[0]
        out.append(
            Island(
                k,
                float(z),
                float(group.size * grid.pixel_mm**2),
                (float(xy[0]), float(xy[1])),
                mask,
                int(r.min() + r0),
                int(c.min() + c0),
                grid,
            )
        )
    return out


def _overreach(nr, nc, d, over, k, z, grid, r0, c0):
    """One record per 8-connected region of over-limit pixels, at its worst pixel."""
    r, c, d = nr[over], nc[over], d[over]
    box = np.zeros((r.max() - r.min() + 1, c.max() - c.min() + 1), bool)
    box[r - r.min(), c - c.min()] = True
    lab, _ = ndimage.label(box, ndimage.generate_binary_structure(2, 2))
    reg = lab[r - r.min(), c - c.min()]
    out = []
    for g in np.unique(reg):
        i = np.flatnonzero(reg == g)
        j = i[np.argmax(d[i])]
        xy = grid.xy(r[j] + r0, c[j] + c0)[0]
        out.append(Overreach(k, float(z), (float(xy[0]), float(xy[1])), float(d[j] * grid.pixel_mm)))
    return out
