"""Pressure field of a layer: the thin-film Poisson problem and its torsion constant.

A cured layer pulled straight off the film draws resin into the widening gap.
Thin-film (Reynolds) flow gives the pressure ``p = -(12 mu hdot / h^3) phi`` with
``laplacian(phi) = -1`` on the layer and ``phi = 0`` on its open boundary: ``phi``
is Prandtl's torsion function, ``J = 4 int(phi dA)`` the Saint-Venant torsion
constant, and the force is ``F = 3 mu hdot J / h^3`` (Stefan's law for a disc).
The laws that turn ``J`` into a force per mechanism are in
:mod:`supportgen.physics.separation`; the per-layer walk that shares them among
contacts is :mod:`supportgen.physics.loadpath`.

Discretisation
--------------
Nodes are pixel (or coarse cell) centres.  A coarse cell of side ``H = s*h``
carries the covered fraction ``f`` of its ``s x s`` pixels; cells with
``f >= 1/2`` are unknowns.  Toward a cell outside, the boundary is placed at
``d = (f_in + f_out - 1/2) H`` from the centre and ``phi = 0`` is imposed there by
linear extrapolation to a ghost node, which only adds ``H/d`` to the diagonal:
the matrix stays symmetric positive definite (Gibou, Fedkiw, Cheng & Kang 2002).
At ``s = 1`` this puts the boundary on the pixel edges, so the region solved is
exactly the union of cured pixels, with an ``O(h^2)`` error where the true outline
runs along pixel edges (convergence table in ``benchmarks/bench_forces.py``; a
square 32 pixels wide is 0.4 % high).  A curved outline is stepped by the
pixels, and the staircase's area error dominates: against the true region, J
converges at **first order** in ``h`` (RMS over sub-pixel placements of a disc,
fitted order 1.0 from R = 8 to 64 pixels; 0.5 % RMS at R = 32 pixels), checked
in ``tests/test_forces.py``.

Coarse grid.  With ``w = 2A/P`` (area over half the pixel-edge perimeter; about
``0.79 R`` for a pixelated disc, the width for a strip) the coarse factor is the
largest ``s`` with ``w / (s h) >= 12``.  :func:`solve_components` places the blocks
at multiples of ``s`` in the image, so a part meets them at any offset in
``[0, s)``.  Measured against the pixel solve over a disc, a 5:1 rectangle, a
ring, an L and a triangle at eight block offsets spread over ``[0, s)``, the
coarse ``J`` is within 1.1 % at ``w/H >= 12`` (2.4 % at ``w/H`` = 9, 4 % at 3):
the stated bound is 2 % (``python benchmarks/bench_forces.py --convergence``
prints the table).  Kept solves (:mod:`supportgen.physics.loadpath`) return the fresh
coarse answer to a 1e-10 residual, so they add nothing to the bound.

Examples
--------
>>> import numpy as np
>>> yy, xx = np.mgrid[-60:60, -60:60] + 0.5
>>> disc = xx**2 + yy**2 < 50**2                      # R = 50 pixels of 0.1 mm
>>> J = torsion_constant(disc, 0.1)
>>> bool(abs(J / (np.pi * 5.0**4 / 2) - 1) < 0.01)
True
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sparse
import scipy.sparse.linalg as spl
from scipy import linalg, ndimage

from ..analysis.runlength import mask_runs, run_overlaps
from ..errors import SettingsError

__all__ = [
    "pressure_shape",
    "torsion_constant",
    "coarse_factor",
    "solve_runs",
    "solve_components",
    "sealed_cavities",
    "CELLS_ACROSS",
    "strip_width",
    "strip_bound_phi",
    "ring_bound_phi",
]

#: Coarse cells across the half-width ``2A/P`` the coarse grid keeps (see Notes above).
CELLS_ACROSS = 12
_STEPS = ((-1, 0), (0, -1), (0, 1), (1, 0))  # up, left, right, down: index order


def _cells(frac: np.ndarray):
    """Cells solved (``frac >= 1/2``), and per cell (in row-major order) the diagonal of the
    scheme's matrix (Notes above, scaled by H^2) and its five columns in index order (up,
    left, self, right, down) with a flag for each neighbour inside; O(cells)."""
    inside = frac >= 0.5
    n = int(inside.sum())
    pin, pfr = np.pad(inside, 1), np.pad(frac, 1)
    index = np.full(pin.shape, -1, dtype=np.int64)
    index[pin] = np.arange(n)
    f = frac[inside]
    diag = np.zeros(n)
    cols, ok = np.zeros((n, 5), np.int64), np.zeros((n, 5), bool)
    ny, nx = pin.shape
    for slot, (dr, dc) in zip((0, 1, 3, 4), _STEPS):
        sl = (slice(1 + dr, ny - 1 + dr), slice(1 + dc, nx - 1 + dc))
        nb = pin[sl][inside]
        d = np.clip(f + pfr[sl][inside] - 0.5, 0.02, 1.0)
        diag += np.where(nb, 1.0, 1.0 / d)
        cols[:, slot], ok[:, slot] = index[sl][inside], nb
    cols[:, 2], ok[:, 2] = np.arange(n), True
    return inside, diag, cols, ok


def _csc(diag: np.ndarray, cols: np.ndarray, ok: np.ndarray):
    """The SPD matrix of :func:`_cells` as CSC, built column by column in index order, so
    its arrays come out sorted without a sort."""
    n = len(diag)
    vals = np.full((n, 5), -1.0)
    vals[:, 2] = diag
    indptr = np.concatenate([[0], np.cumsum(ok.sum(axis=1))])
    return sparse.csc_matrix((vals[ok], cols[ok], indptr), shape=(n, n))


def _solve_fraction(frac: np.ndarray, cell_mm: float) -> np.ndarray:
    """phi on cells of side ``cell_mm`` covered by fraction ``frac`` (0 outside)."""
    return _factor_solve(frac, cell_mm)[0]


#: Conjugate-gradient steps with a kept factorisation as preconditioner before
#: factorising afresh, and the residual (max norm, relative to the right-hand side)
#: they must reach: the reused answer is the fresh one to this tolerance, so reuse
#: adds nothing to the stated error bound.
REFINE_STEPS, REFINE_TOL = 8, 1e-10


def _pcg(a, b, lu):
    """Preconditioned CG on ``a x = b`` from ``lu.solve(b)``; x, or None if not converged."""
    x = lu.solve(b)
    r = b - a @ x
    z = lu.solve(r)
    p, rz = z.copy(), r @ z
    for _ in range(REFINE_STEPS):
        if np.abs(r).max() <= REFINE_TOL * np.abs(b).max():
            return x
        q = a @ p
        alpha = rz / (p @ q)
        x, r = x + alpha * p, r - alpha * q
        z = lu.solve(r)
        rz, rz_old = r @ z, rz
        p = z + (rz / rz_old) * p
    return x if np.abs(r).max() <= REFINE_TOL * np.abs(b).max() else None


def _lump(inside: np.ndarray, cav: np.ndarray | None):
    """(n_cells, n_unknowns) sparse map: cells of one 4-connected cavity share one unknown; None if none."""
    if cav is None or not (cav & inside).any():
        return None
    lab, m = ndimage.label(cav & inside)
    cells = lab[inside]  # 0 for film cells, 1..m for cavity cells
    n = cells.size
    film = cells == 0
    col = np.empty(n, np.int64)
    col[film] = np.arange(int(film.sum()))
    col[~film] = int(film.sum()) + cells[~film] - 1
    return sparse.csr_matrix((np.ones(n), (np.arange(n), col)), shape=(n, int(film.sum()) + m))


def _factor_solve(frac: np.ndarray, cell_mm: float, kept=None, cav: np.ndarray | None = None):
    """phi on cells, and the state ``(frac, inside, lu, phi, cav)`` a later call can reuse.

    ``kept`` (a state from an earlier call, or None): the same ``frac`` (and cavity
    cells) returns its phi unchanged; the same solved cells (``frac >= 1/2``, the
    coarse mask) keep its LU factors as the preconditioner of conjugate gradients
    (the matrices differ only in boundary diagonal terms, so a few steps reach
    ``REFINE_TOL``); otherwise, or if CG has not converged in ``REFINE_STEPS``, the
    system is factorised afresh: banded Cholesky (:func:`_banded`), or
    ``scipy.sparse.linalg.splu`` for lumped cavities and wide bands.

    ``cav`` (bool per cell, optional): cells of sealed cavities.  A deep cavity's
    resin moves freely, so its pressure is uniform: the cells of each 4-connected
    cavity are lumped into one unknown (``P^T A P``, sources summed), which is
    the thin-film equation with an infinitely conductive cavity; the rim keeps the
    film law.  For a ring of radii ``Ro > Ri`` over a sealed cavity this gives
    ``J = (pi/2)(Ro^4 - Ri^4)``, not the full disc's ``pi Ro^4 / 2``.
    """

    def same_cav(a, b):
        return (a is None and b is None) or (
            a is not None and b is not None and a.shape == b.shape and np.array_equal(a, b)
        )

    if (
        kept is not None
        and kept[0].shape == frac.shape
        and np.array_equal(kept[0], frac)
        and same_cav(kept[4] if len(kept) > 4 else None, cav)
    ):
        return kept[3], kept
    phi = np.zeros(frac.shape)
    inside, diag, cols, ok = _cells(frac)
    n = len(diag)
    if n == 0:
        return phi, (frac, inside, None, phi, cav)
    b = np.full(n, cell_mm * cell_mm)
    lump = _lump(inside, cav)
    kept_cav = kept[4] if kept is not None and len(kept) > 4 else None
    reuse = kept is not None and kept[2] is not None and np.array_equal(kept[1], inside) and same_cav(kept_cav, cav)
    a = None  # the sparse matrix, built only where conjugate gradients, a lump or LU need it
    if lump is not None or reuse:
        a = _csc(diag, cols, ok)
        if lump is not None:
            a = (lump.T @ a @ lump).tocsc()
            b = lump.T @ b
    if reuse:
        x = _pcg(a, b, kept[2])
        if x is not None:
            phi[inside] = x if lump is None else lump @ x
            return phi, (frac, inside, kept[2], phi, cav)
    lu = _banded(inside, diag, cols, ok) if lump is None else None
    if lu is None:
        lu = _sparse_lu(_csc(diag, cols, ok) if a is None else a)
    x = lu.solve(b)
    phi[inside] = x if lump is None else lump @ x
    return phi, (frac, inside, lu, phi, cav)


#: Largest work ``n b^2`` (unknowns times the squared half-bandwidth) given to a banded
#: Cholesky factorisation (some 30 ms here); above it, sparse LU with a fill-reducing
#: order is cheaper.  On the 1,317 systems a 50 mm bunny's layers factorise (median 1,225
#: unknowns, largest 5,752), timed together: 4e6 2.0 s, 1.6e7 1.3 s, 6.4e7 and above
#: 1.2 s, sparse LU for all 3.7-4.9 s.
_BANDED_WORK = 6.4e7


class _BandedCholesky:
    """Cholesky factors of a symmetric positive definite matrix in band storage
    (``scipy.linalg.cholesky_banded``), with the numbering it was banded in."""

    def __init__(self, factors: np.ndarray, order: np.ndarray | None):
        self.factors, self.order = factors, order

    def solve(self, b: np.ndarray) -> np.ndarray:
        if self.order is None:
            return linalg.cho_solve_banded((self.factors, True), b, check_finite=False)
        x = np.empty_like(b)
        x[self.order] = linalg.cho_solve_banded((self.factors, True), b[self.order], check_finite=False)
        return x


def _banded(inside: np.ndarray, diag: np.ndarray, cols: np.ndarray, ok: np.ndarray):
    """Banded Cholesky factors of the matrix of :func:`_cells`, or None where the band is too wide.

    Cells numbered row by row (``inside``'s order) have their neighbours above and below
    one row of cells apart; numbered down the columns when the box is wider than tall,
    that distance is at most the short side, and a banded Cholesky factorisation costs
    ``n b^2`` for ``n`` unknowns and half-bandwidth ``b``.  In either numbering a cell's
    right and lower neighbours come after it, so they are the band below the diagonal.
    """
    n = len(diag)
    order = None
    at = np.arange(n)
    if inside.shape[1] > inside.shape[0]:
        r, c = np.nonzero(inside)
        order = np.lexsort((r, c))  # new position k holds old unknown order[k]
        at = np.empty_like(order)
        at[order] = np.arange(n)
    later = ok[:, 3:]  # right and down neighbours
    own = np.broadcast_to(at[:, None], later.shape)[later]
    offset = at[cols[:, 3:][later]] - own
    band = int(offset.max(initial=0))
    if n * band * band > _BANDED_WORK:
        return None
    ab = np.zeros((band + 1, n))
    ab[0, at] = diag
    ab[offset, own] = -1.0
    try:
        return _BandedCholesky(linalg.cholesky_banded(ab, lower=True, check_finite=False), order)
    except linalg.LinAlgError:
        return None  # not positive definite to round-off: sparse LU instead


def _sparse_lu(a):
    """``scipy.sparse.linalg.splu`` of a symmetric matrix with a minimum-degree order."""
    return spl.splu(a, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options={"SymmetricMode": True})


def _run_fraction(rows, starts, ends, s: int, box=None):
    """Covered fraction of the ``s x s`` blocks (aligned to multiples of ``s``) under runs.

    Returns the (nI, nJ) fractions and the block index (I0, J0) of their corner;
    ``box = (I0, J0, nI, nJ)`` fixes the blocks (for a second set of runs on the
    same blocks).  Cost O(runs + nI nJ s).
    """
    if box is None:
        i0, j0 = int(rows.min()) // s, int(starts.min()) // s
        ni, nj = int(rows.max()) // s - i0 + 1, (int(ends.max()) - 1) // s - j0 + 1
    else:
        i0, j0, ni, nj = box
    width = nj * s + 1
    bi = rows // s - i0
    diff = np.bincount(bi * width + starts - j0 * s, minlength=ni * width).astype(np.int64)
    diff -= np.bincount(bi * width + ends - j0 * s, minlength=ni * width)
    cover = np.cumsum(diff.reshape(ni, width)[:, :-1], axis=1)
    return cover.reshape(ni, nj, s).sum(axis=2) / float(s * s), (i0, j0)


def solve_runs(rows, starts, ends, edges: int, pixel_mm: float, origin, kept=None, factor=None, cavity=None):
    """J, area, pressure samples ``(points, phi dA, dA)`` and ``((s, I0, J0), state)`` of one component.

    The component is given by its runs; ``cavity`` (bool per run, optional) marks
    the runs of sealed cavities, whose pressure is uniform (see :func:`_factor_solve`).

    ``kept``: dict of earlier states by block key ``(s, I0, J0)``; the one with this
    component's key, if any, is offered to :func:`_factor_solve`.
    """
    area = int((ends - starts).sum())
    has_cav = cavity is not None and bool(np.any(cavity))
    film_area, film_edges = area, edges
    if has_cav:  # the film is the rim: its width sets the grid, the cavity's edge counts too
        c = np.asarray(cavity, bool)
        cav_runs = (rows[c], starts[c], ends[c])
        cav_area = int((cav_runs[2] - cav_runs[1]).sum())
        _, _, shared = run_overlaps(cav_runs, (cav_runs[0] - 1, cav_runs[1], cav_runs[2]))
        film_area -= cav_area
        film_edges += 2 * int(c.sum()) + 2 * cav_area - 2 * int(np.sum(shared))
    s = int(coarse_factor(film_area, film_edges)) if factor is None else max(1, int(factor))
    frac, (i0, j0) = _run_fraction(rows, starts, ends, s)
    cav = None
    if has_cav:
        cf, _ = _run_fraction(rows[c], starts[c], ends[c], s, (i0, j0) + frac.shape)
        cav = cf >= 0.5
    cell = s * pixel_mm
    phi, state = _factor_solve(frac, cell, None if kept is None else kept.get((s, i0, j0)), cav)
    da = frac * cell * cell
    w = phi * da
    r, c = np.nonzero(w > 0)
    pts = np.column_stack(
        [origin[0] + ((j0 + c) * s + (s - 1) / 2) * pixel_mm, origin[1] + ((i0 + r) * s + (s - 1) / 2) * pixel_mm]
    )
    return 4.0 * float(w.sum()), area * pixel_mm**2, pts, w[r, c], da[r, c], ((s, i0, j0), state)


def _pads(mask: np.ndarray, s: int) -> tuple[int, int]:
    """Pixels padded before row 0 and column 0 so the blocks sit centred on the mask."""
    return ((-mask.shape[0]) % s) // 2, ((-mask.shape[1]) % s) // 2


def _block_fraction(mask: np.ndarray, s: int) -> np.ndarray:
    """Covered fraction of each ``s x s`` block (blocks centred, see :func:`_pads`)."""
    if s == 1:
        return mask.astype(float)
    (ny, nx), (py, px) = mask.shape, _pads(mask, s)
    m = np.pad(mask, ((py, (-ny) % s - py), (px, (-nx) % s - px)))
    return m.reshape(m.shape[0] // s, s, m.shape[1] // s, s).mean(axis=(1, 3))


def _check_mask(mask, pixel_mm) -> np.ndarray:
    mask = np.asarray(mask)
    if mask.ndim != 2 or mask.dtype != bool:
        raise SettingsError(f"layer mask has shape {mask.shape} and dtype {mask.dtype}; pass a 2-D bool array")
    if not (np.isfinite(pixel_mm) and pixel_mm > 0):
        raise SettingsError(f"pixel_mm = {pixel_mm!r}; pass a positive pixel pitch in mm")
    return mask


def pressure_shape(mask: np.ndarray, pixel_mm: float, factor: int = 1) -> np.ndarray:
    """Prandtl torsion function of a layer: ``laplacian(phi) = -1``, ``phi = 0`` outside.

    Parameters
    ----------
    mask : (ny, nx) bool ndarray
        Cured pixels.  The region solved is the union of the pixel squares.
    pixel_mm : float
        Pixel pitch (mm).
    factor : int, optional
        Solve on cells of ``factor x factor`` pixels and spread back (see the module
        Notes for the error bound); 1 solves on the pixels.

    Returns
    -------
    (ny, nx) float ndarray
        phi (mm^2), zero outside the mask.  The squeeze-film pressure is
        ``-(12 mu hdot / h^3) phi``.

    Raises
    ------
    SettingsError
        Mask not 2-D bool, or pixel pitch not positive.

    Notes
    -----
    One sparse direct solve of ``n / factor^2`` unknowns (n cured pixels).

    References
    ----------
    F. Gibou, R. Fedkiw, L.-T. Cheng, M. Kang, "A second-order-accurate symmetric
    discretization of the Poisson equation on irregular domains", J. Comput. Phys.
    176:205-227 (2002).  Hamrock, Schmid & Jacobson, Fundamentals of Fluid Film
    Lubrication (2004), Reynolds equation.
    """
    mask = _check_mask(mask, pixel_mm)
    s = max(1, int(factor))
    phi = _solve_fraction(_block_fraction(mask, s), s * pixel_mm)
    if s > 1:
        py, px = _pads(mask, s)
        phi = np.repeat(np.repeat(phi, s, 0), s, 1)[py : py + mask.shape[0], px : px + mask.shape[1]] * mask
    return phi


def torsion_constant(mask: np.ndarray, pixel_mm: float, factor: int = 1) -> float:
    """Saint-Venant torsion constant ``J = 4 int(phi dA)`` of a layer mask (mm^4).

    Parameters
    ----------
    mask : (ny, nx) bool ndarray
        Cured pixels.
    pixel_mm : float
        Pixel pitch (mm).
    factor : int, optional
        Coarse factor, as in :func:`pressure_shape`.

    Returns
    -------
    float
        J in mm^4; a disc of radius R gives ``pi R^4 / 2``.

    Notes
    -----
    Coarse cells are weighted by their covered fraction.  Cost as
    :func:`pressure_shape`.

    References
    ----------
    Timoshenko & Goodier, Theory of Elasticity, 3rd ed. (1970), torsion chapter.
    """
    mask = _check_mask(mask, pixel_mm)
    s = max(1, int(factor))
    frac = _block_fraction(mask, s)
    phi = _solve_fraction(frac, s * pixel_mm)
    return float(4.0 * (phi * frac).sum() * (s * pixel_mm) ** 2)


def coarse_factor(area_px: np.ndarray, edges_px: np.ndarray) -> np.ndarray:
    """Largest coarse factor keeping ``CELLS_ACROSS`` cells across ``w = 2A/P``.

    ``area_px`` counts pixels, ``edges_px`` counts pixel edges between the region
    and the outside; returns integers >= 1.
    """
    w = 2.0 * np.asarray(area_px, float) / np.maximum(np.asarray(edges_px, float), 1.0)
    return np.maximum(1, np.floor(w / CELLS_ACROSS)).astype(int)


def _edges(crop: np.ndarray) -> int:
    p = np.pad(crop, 1)
    return int((p[1:, :] != p[:-1, :]).sum() + (p[:, 1:] != p[:, :-1]).sum())


def solve_components(
    labels: np.ndarray,
    ids,
    pixel_mm: float,
    origin=(0.0, 0.0),
    objects=None,
    factor: int | None = None,
    cavities: np.ndarray | None = None,
):
    """Torsion constant and pressure samples of chosen labelled components.

    Parameters
    ----------
    labels : (ny, nx) int ndarray
        Component labels (0 empty), e.g. from ``scipy.ndimage.label``.
    ids : iterable of int
        Labels to solve.
    pixel_mm : float
        Pixel pitch (mm).
    origin : (x0, y0)
        Centre of pixel ``[0, 0]`` (mm).
    objects : list of slices, optional
        ``scipy.ndimage.find_objects(labels)``, if already known.
    factor : int, optional
        Coarse factor for every component; default :func:`coarse_factor` of each.
    cavities : (ny, nx) bool ndarray, optional
        Pixels of sealed cavities (e.g. :func:`sealed_cavities`) inside the labels:
        uniform pressure there (see :func:`_factor_solve`).

    Returns
    -------
    dict
        label -> ``(J_mm4, area_mm2, points (k, 2), weights (k,))``: the weights are
        ``phi dA`` at the sample points (pixel or coarse cell centres) and sum to J/4.

    Notes
    -----
    Each component gets its own coarse factor (:func:`coarse_factor`); its blocks sit
    at multiples of ``s`` in ``labels`` (not centred on the component), so a
    component's coarse mask does not move with its bounding box and a solve can be
    kept from layer to layer (:mod:`supportgen.physics.loadpath`).  Cost: O(pixels of each
    component's box) to find its runs, then one sparse LU of about ``A_i / s_i^2``
    unknowns, i.e. roughly ``144 A / w^2`` for ``w = 2A/P``.
    """
    objects = ndimage.find_objects(labels) if objects is None else objects
    out = {}
    for i in ids:
        sl = objects[i - 1]
        crop = labels[sl] == i
        rows, starts, ends = mask_runs(crop, sl[0].start, sl[1].start)
        cav = None
        if cavities is not None:
            cav_crop = cavities[sl] & crop
            if cav_crop.any():
                cr, cs, ce = mask_runs(cav_crop, sl[0].start, sl[1].start)
                film = ~cav_crop & crop
                rows, starts, ends = mask_runs(film, sl[0].start, sl[1].start)
                rows, starts, ends = (np.r_[a, b] for a, b in ((rows, cr), (starts, cs), (ends, ce)))
                cav = np.r_[np.zeros(len(rows) - len(cr), bool), np.ones(len(cr), bool)]
        out[i] = solve_runs(rows, starts, ends, _edges(crop), pixel_mm, origin, factor=factor, cavity=cav)[:4]
    return out


def sealed_cavities(
    mask: np.ndarray, below_mask: np.ndarray | None = None, below_sealed: np.ndarray | None = None
) -> np.ndarray:
    """Holes of a layer that no resin can reach: they pull like cured area.

    Parameters
    ----------
    mask : (ny, nx) bool ndarray
        This layer.
    below_mask, below_sealed : (ny, nx) bool ndarray or None
        The layer printed before, and its sealed pixels (this function's result for
        it).  ``None``: nothing below, every hole is vented.

    Returns
    -------
    (ny, nx) bool ndarray
        Empty pixels of holes that neither touch the grid border nor overlap an
        empty, vented pixel of the layer below.

    Notes
    -----
    Empty space is labelled with 4-connectivity (the dual of the 8-connected parts)
    inside the layer's bounding box; cost O(pixels of the box).

    Examples
    --------
    >>> cup = np.pad(np.ones((5, 5), bool), 1)
    >>> ring = cup.copy(); ring[3, 3] = False
    >>> int(sealed_cavities(ring, cup, np.zeros_like(cup)).sum())
    1
    >>> int(sealed_cavities(ring, ring, np.zeros_like(cup)).sum())
    0
    """
    sealed = np.zeros(mask.shape, bool)
    if below_mask is None or not mask.any():
        return sealed
    rows, cols = np.nonzero(mask.any(axis=1))[0], np.nonzero(mask.any(axis=0))[0]
    sl = (slice(max(rows[0] - 1, 0), rows[-1] + 2), slice(max(cols[0] - 1, 0), cols[-1] + 2))
    lab, n = ndimage.label(~mask[sl])
    open_ = np.zeros(n + 1, bool)
    open_[0] = True
    for edge in (lab[0], lab[-1], lab[:, 0], lab[:, -1]):
        open_[edge] = True
    if open_.all():
        return sealed
    vented_below = ~below_mask[sl]
    if below_sealed is not None:
        vented_below &= ~below_sealed[sl]
    open_[lab[vented_below]] = True
    sealed[sl] = ~open_[lab]
    return sealed


def strip_width(rows, starts, ends) -> float:
    """Least width (pixels) of the convex hull of a region's pixels: the narrowest strip holding it.

    The hull is that of each row's outermost pixel corners (qhull, through
    ``scipy.spatial.ConvexHull``); its least width is the least, over the hull's
    edges, of the farthest hull vertex from that edge's line (rotating calipers,
    Shamos 1978; Toussaint 1983).  Cost O(runs + rows log rows).

    Examples
    --------
    >>> import numpy as np
    >>> strip_width(np.arange(3), np.zeros(3, int), np.full(3, 10))   # a 3 x 10 block
    3.0
    """
    from scipy.spatial import ConvexHull

    r = np.asarray(rows, np.int64)
    if r.size == 0:
        return 0.0
    # each row's leftmost start and rightmost end (runs are sorted by row within a component
    # only loosely, so reduce by row explicitly)
    uniq, inv = np.unique(r, return_inverse=True)
    lo = np.full(uniq.size, np.iinfo(np.int64).max)
    hi = np.full(uniq.size, np.iinfo(np.int64).min)
    np.minimum.at(lo, inv, np.asarray(starts, np.int64))
    np.maximum.at(hi, inv, np.asarray(ends, np.int64))
    y = uniq.astype(float)
    pts = np.column_stack([np.r_[lo, hi, lo, hi], np.r_[y, y, y + 1, y + 1]]).astype(float)
    hull = pts[ConvexHull(pts).vertices]  # counter-clockwise
    edge = np.roll(hull, -1, axis=0) - hull
    length = np.hypot(edge[:, 0], edge[:, 1])
    normal = np.column_stack([-edge[:, 1], edge[:, 0]]) / length[:, None]
    dist = np.abs(normal @ hull.T - np.einsum("ij,ij->i", normal, hull)[:, None])
    return float(dist.max(axis=1).min())


def strip_bound_phi(width_mm: float) -> float:
    """Upper bound of the torsion function on any region inside a strip ``width_mm`` wide (mm^2).

    On the strip ``|y| < t/2`` the torsion function is ``(t^2/4 - y^2)/2`` (exact:
    ``laplacian = -1``, zero on both edges), at most ``t^2/8``; a region inside the strip
    has a torsion function no larger at any point (domain monotonicity, from the maximum
    principle: the difference is harmonic and non-negative on the smaller region's
    boundary).  So its ``J = 4 int(phi dA) <= t^2 A / 2``.
    """
    return width_mm * width_mm / 8.0


def ring_bound_phi(rows, starts, ends, pixel_mm: float) -> float:
    """Upper bound of the torsion function (mm^2) of a region from the thinnest annulus about its box's centre.

    Every pixel corner of the region lies between radii ``a`` and ``b`` of the centre of
    its bounding box, so the region lies in that annulus and its torsion function is at
    most the annulus's (domain monotonicity, as :func:`strip_bound_phi`), which is exact:
    ``phi(r) = (b^2 - r^2)/4 - (b^2 - a^2) ln(b/r) / (4 ln(b/a))``, largest at
    ``r^2 = (b^2 - a^2) / (2 ln(b/a))`` (Timoshenko & Goodier, Theory of Elasticity,
    torsion of a hollow circular shaft's Prandtl function with both rims at zero;
    derived from ``laplacian = -1`` in polar coordinates).  A thin ring of width
    ``t = b - a`` gets about ``t^2/8``, as a strip; a region with no hole round the
    centre gets the disc's ``b^2/4``.
    """
    r = np.asarray(rows, float)
    s, e = np.asarray(starts, float), np.asarray(ends, float)
    cy, cx = (r.min() + r.max() + 1) / 2, (s.min() + e.max()) / 2  # box centre, pixel-corner units
    # each run is the rectangle [s, e] x [r, r + 1]: its nearest and farthest points from the centre
    xn = np.where((s <= cx) & (cx <= e), 0.0, np.minimum(np.abs(s - cx), np.abs(e - cx)))
    yn = np.where((r <= cy) & (cy <= r + 1), 0.0, np.minimum(np.abs(r - cy), np.abs(r + 1 - cy)))
    xf = np.maximum(np.abs(s - cx), np.abs(e - cx))
    yf = np.maximum(np.abs(r - cy), np.abs(r + 1 - cy))
    a = float(np.sqrt(xn**2 + yn**2).min()) * pixel_mm
    b = float(np.sqrt(xf**2 + yf**2).max()) * pixel_mm
    if a <= 0:
        return b * b / 4.0
    log = np.log(b / a)
    rm2 = (b * b - a * a) / (2.0 * log)
    return float((b * b - rm2) / 4.0 - (b * b - a * a) * np.log(b / np.sqrt(rm2)) / (4.0 * log))
