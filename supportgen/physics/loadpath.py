"""Load path: which contacts hold each layer, and the load each one carries.

:class:`ForceTracker` watches the layers stream past in print order.  For each
layer it fills sealed cavities (the cavities of
:func:`~supportgen.physics.pressure.sealed_cavities`), solves the pressure field of each
component, applies the printer's separation law, and shares each component's force
among the contacts that hold it.

Cost.  A layer is read once, to find its row runs inside its bounding box
(O(pixels of the box), a few byte passes); everything after works on the runs
(O(runs log runs)): overlaps with the layer below, cavities, the component
perimeters ``P`` that set the coarse factor, the coarse cell fractions.  The
supplied labels are only looked up at run starts, never relabelled.  A
component's coarse solve is kept by its block position ``(s, I0, J0)``: identical
cell fractions reuse phi as is; the same coarse mask reuses the LU factors as the
preconditioner of conjugate gradients to a 1e-10 residual
(:data:`supportgen.physics.pressure.REFINE_TOL`).  Either way the answer is the fresh coarse
solve to round-off, so the error stays the coarse-grid bound of
:mod:`supportgen.physics.pressure` (2 % against the pixel solve);
``tests/test_forces.py`` checks the tracker layer by layer against full-image
labelling and fresh solves.  About 4 ms per 1000 x 1000 layer on one core
(``benchmarks/bench_forces.py``).

Holding contacts.  A contact attaches at the first layer at or above its z where a
cured pixel lies within its tip radius; it holds the 3-D component (union-find over
components of successive layers that overlap) of that pixel from then on.  A
component's force is shared among its holding contacts by tributary area weighted
by the pressure field: each sample of ``phi dA`` goes to the nearest holding
contact in x/y.  A component with no holding contact is carried by the plate or not
supported at all; its force is reported as ``unheld_force_n``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from ..analysis.runlength import box_runs, edge_components, paint_runs, run_overlaps
from ..constants import EPS_FLOOR, EPS_REL, EPS_ZERO
from .pressure import solve_runs
from .separation import READS_LABELS, LayerShape, separation

__all__ = ["ForceTracker", "ForceProfile"]


@dataclass(frozen=True)
class ForceProfile:
    """Per-layer separation forces and per-contact peak loads of one print.

    Attributes
    ----------
    force_n, area_mm2, unheld_force_n : (L,) float ndarray
        Layer force (N), cured area (mm^2), and the part of the force held by no
        contact (plate or unsupported), per layer index.
    peak_layer_index : int
    peak_force_n : float
    contact_loads : (n,) float ndarray
        Peak load of each contact (N).
    contact_peak_layers : (n,) int ndarray
        Layer of that peak; -1 for a contact that never attached or carried nothing.
    warnings : tuple of (code, message)
    """

    force_n: np.ndarray
    area_mm2: np.ndarray
    unheld_force_n: np.ndarray
    peak_layer_index: int
    peak_force_n: float
    contact_loads: np.ndarray
    contact_peak_layers: np.ndarray
    warnings: tuple

    def to_dict(self) -> dict:
        """Plain dict for the JSON report (``forces.peak_layer_force_n`` etc.)."""
        return {
            "peak_layer_force_n": float(self.peak_force_n),
            "peak_layer_index": int(self.peak_layer_index),
            "layer_force_n": [float(v) for v in self.force_n],
            "layer_area_mm2": [float(v) for v in self.area_mm2],
            "unheld_force_n": [float(v) for v in self.unheld_force_n],
            "contact_loads_n": [float(v) for v in self.contact_loads],
            "contact_peak_layers": [int(v) for v in self.contact_peak_layers],
            "warnings": [{"code": c, "message": m} for c, m in self.warnings],
        }


#: Unheld force below which no warning is given (N): a thousandth of the smallest
#: tip's capacity at common green strengths.
UNHELD_TOLERANCE_N = 1e-3


class ForceTracker:
    """Per-layer observer that builds a :class:`ForceProfile`.

    Parameters
    ----------
    grid : supportgen.analysis.layers.Grid
        The pixel grid of the layer masks.
    layer_mm : float
        Layer height (mm).
    contact_points : (n, 3) float ndarray
        Tip positions on the part (build coordinates, mm).
    settings : supportgen.settings.Settings
        Uses ``printer.mechanism`` and the separation parameters, ``rated_force_n``
        and ``rules.tip_diameter_mm`` (the attach radius is half of it, at least
        half a pixel).

    Notes
    -----
    Call ``tracker(layer, labels, n_labels)`` for every layer in print order (labels:
    8-connected ``scipy.ndimage.label`` of ``layer.mask``), then :meth:`result`.
    After each call ``last_loads`` (n,) and ``last_unheld_n`` hold that layer's
    shares, which sum to its force.
    After each call ``last_torsion_mm4`` holds J of that layer's suction components.
    Cost per layer: O(pixels of the layer's box) once to find its runs, O(runs log
    runs) for overlaps, cavities and perimeters, plus one coarse solve per component
    whose cell fractions changed (kept factorisations, see the module notes).
    """

    def __init__(self, grid, layer_mm: float, contact_points, settings):
        self.grid, self.layer_mm, self.settings = grid, float(layer_mm), settings
        self.law = separation(settings.printer.mechanism)
        self._paints = settings.printer.mechanism in READS_LABELS
        pts = np.asarray(contact_points, float).reshape(-1, 3)
        self.points = pts
        r = max(settings.rules.tip_diameter_mm / 2.0, grid.pixel_mm / 2.0)
        k = int(np.ceil(r / grid.pixel_mm))
        dr, dc = np.mgrid[-k: k + 1, -k: k + 1]
        keep = (dr**2 + dc**2) * grid.pixel_mm**2 <= r * r + EPS_ZERO
        order = np.argsort((dr**2 + dc**2)[keep], kind="stable")  # nearest first
        self._off = (dr[keep][order], dc[keep][order])
        self._rc = np.column_stack(grid.index(pts[:, :2])) if len(pts) else np.zeros((0, 2), int)
        self._node = np.full(len(pts), -1)        # union-find node each contact holds
        self._parent: list[int] = []
        self._held: dict[int, list[int]] = {}     # root -> contacts
        self._prev = None                          # the layer below: runs, labels, nodes, solves
        self._force, self._area, self._unheld = {}, {}, {}
        self._peak = np.zeros(len(pts))
        self._peak_layer = np.full(len(pts), -1)
        self.last_loads, self.last_unheld_n = np.zeros(len(pts)), 0.0
        self.last_torsion_mm4 = np.zeros(0)

    # union-find -----------------------------------------------------------------
    def _find(self, a: int) -> int:
        p = self._parent
        while p[a] != a:
            p[a] = p[p[a]]
            a = p[a]
        return a

    def _union(self, a: int, b: int) -> None:
        ra, rb = self._find(a), self._find(b)
        if ra != rb:
            self._parent[rb] = ra
            self._held.setdefault(ra, []).extend(self._held.pop(rb, []))

    # per layer ------------------------------------------------------------------
    def __call__(self, layer, labels: np.ndarray, n_labels: int) -> None:
        mask, k, h = layer.mask, int(layer.index), self.grid.pixel_mm
        prev = self._prev
        runs = box_runs(mask)
        lab = labels[runs[0], runs[1]].astype(np.int64)
        node0 = len(self._parent)
        self._parent.extend(range(node0, node0 + n_labels))
        if prev is not None and runs[0].size and prev["runs"][0].size:   # 3-D connectivity with the layer below
            ia, ib, _ = run_overlaps(runs, prev["runs"])
            base = int(prev["lab"].max()) + 1
            for code in np.unique(lab[ia] * base + prev["lab"][ib]).tolist():
                self._union(node0 + code // base - 1, prev["node0"] + code % base - 1)
        self._attach(layer, labels, node0)
        suction, fmap, nf, edges = _suction(runs, lab, n_labels, None if prev is None else prev["suction"])
        geo, cache = self._geometry(suction, nf, edges, {} if prev is None else prev["cache"])
        area = np.array([geo[i][1] for i in range(1, nf + 1)])
        jt = np.array([geo[i][0] for i in range(1, nf + 1)])
        shape = LayerShape(paint_runs(*suction, labels.shape) if self._paints else np.zeros((0, 0), np.int32),
                              h, area, jt)
        comp_force = np.asarray(self.law(shape, self.settings), float)
        holders: list[set] = [set() for _ in range(nf + 1)]
        for a in range(1, n_labels + 1):
            holders[fmap[a]].update(self._held.get(self._find(node0 + a - 1), ()))
        load = np.zeros(len(self.points))
        unheld = 0.0
        for i in range(1, nf + 1):
            hold = sorted(holders[i])
            if not hold:
                unheld += comp_force[i - 1]
            elif len(hold) == 1:
                load[hold[0]] += comp_force[i - 1]
            else:
                pts, w = geo[i][2], geo[i][3]
                share = _tributary(self.points[hold, :2], pts, w)
                load[hold] += comp_force[i - 1] * share / max(share.sum(), EPS_FLOOR)
        self.last_loads, self.last_unheld_n = load, float(unheld)   # this layer, for checks
        self.last_torsion_mm4 = jt
        up = load > self._peak
        self._peak[up], self._peak_layer[up] = load[up], k
        self._force[k] = float(comp_force.sum())
        self._area[k] = float((runs[2] - runs[1]).sum()) * h * h
        self._unheld[k] = float(unheld)
        self._prev = {"runs": runs, "lab": lab, "node0": node0, "suction": suction[:3], "cache": cache}

    def _attach(self, layer, labels, node0) -> None:
        """Attach pending contacts whose tip disc touches this layer's cured pixels."""
        top = layer.z_mm + self.layer_mm / 2.0
        pend = np.nonzero((self._node < 0) & (self.points[:, 2] <= top + EPS_REL))[0]
        if pend.size == 0:
            return
        ny, nx = labels.shape
        rr = self._rc[pend, 0][:, None] + self._off[0][None, :]
        cc = self._rc[pend, 1][:, None] + self._off[1][None, :]
        ok = (rr >= 0) & (rr < ny) & (cc >= 0) & (cc < nx)
        lab = np.where(ok, labels[np.clip(rr, 0, ny - 1), np.clip(cc, 0, nx - 1)], 0)
        hit = lab > 0
        for j, row in zip(pend[hit.any(axis=1)], lab[hit.any(axis=1)]):
            node = self._find(node0 + int(row[row > 0][0]) - 1)
            self._node[j] = node
            self._held.setdefault(node, []).append(int(j))

    def _geometry(self, suction, nf, edges, kept):
        """J, area and pressure samples per suction component; solves kept by coarse block key."""
        g = self.grid
        rows, starts, ends, comp = suction
        order = np.argsort(comp, kind="stable")
        cut = np.searchsorted(comp[order], np.arange(1, nf + 2))
        geo, cache = {}, {}
        for i in range(1, nf + 1):
            o = order[cut[i - 1]: cut[i]]
            *out, (key, state) = solve_runs(rows[o], starts[o], ends[o], int(edges[i - 1]), g.pixel_mm,
                                               (g.x0, g.y0), kept)
            geo[i] = tuple(out)
            cache[key] = state
        return geo, cache

    def result(self) -> ForceProfile:
        """The :class:`ForceProfile` of the layers seen so far."""
        n = max(self._force) + 1 if self._force else 0
        force, area, unheld = np.zeros(n), np.zeros(n), np.zeros(n)
        for k in self._force:
            force[k], area[k], unheld[k] = self._force[k], self._area[k], self._unheld[k]
        peak = int(np.argmax(force)) if n else -1
        peak_f = float(force[peak]) if n else 0.0
        warns = []
        rated = self.settings.printer.rated_force_n
        over = np.nonzero(force > rated)[0]
        if over.size:
            warns.append(("force-over-rated",
                          f"{over.size} layer(s) exceed the rated separation force of {rated:g} N, the worst "
                          f"layer {peak} at {peak_f:.1f} N; reorient the part, slow the lift or add a slower mode"))
        never = np.nonzero(self._node < 0)[0]
        if never.size:
            warns.append(("contact-unattached",
                          f"{never.size} contact(s) never touched a cured pixel within the tip radius "
                          f"(first: #{never[0]}); check the contact points against the part"))
        # Slivers of a pixel or two the rasteriser splits off an edge pull with
        # micro-newtons: only a share that matters to a tip is worth a warning.
        significant = unheld > np.maximum(UNHELD_TOLERANCE_N, 1e-3 * force)
        if len(self.points) and significant.any():
            first = int(np.nonzero(significant)[0][0])
            warns.append(("force-unheld",
                          f"{int(significant.sum())} layer(s) pull on parts no contact holds yet (first: layer "
                          f"{first}, {unheld[first]:.3g} N); add contacts under them"))
        return ForceProfile(force, area, unheld, peak, peak_f, self._peak.copy(),
                            np.where(self._peak > 0, self._peak_layer, -1), tuple(warns))


def _suction(runs, lab, n_labels: int, below):
    """Suction region of a layer (cured runs plus sealed cavities) from its runs.

    Parameters: the layer's runs and their 8-connected labels, and ``below`` the
    layer below's suction runs (None for the first layer: every hole is vented).
    Returns the suction runs ``(rows, starts, ends, component)`` sorted by row and
    start, the map label -> component (components of ``mask | sealed``, 8-connected),
    the component count and each component's pixel-edge perimeter.

    The same cavities as :func:`supportgen.physics.pressure.sealed_cavities` (4-connected empty
    space): an empty gap between two runs of a row is open when the row above or below
    is empty there (outside its first and last run), joins the gaps it shares columns
    with in the rows above and below, and is vented when the layer below's suction
    runs do not cover it.  A sealed gap's two neighbouring runs belong to one suction
    component: every cured part 4-adjacent to a hole is met along some row.
    Cost O(runs log runs): no pass over the pixels.
    """
    r, s, e = runs
    fmap, nf, sealed = np.arange(n_labels + 1), n_labels, np.zeros(0, np.int64)
    gi = np.flatnonzero(r[1:] == r[:-1])                   # gap between run i and run i + 1
    if below is not None and gi.size:
        gaps = (r[gi], e[gi], s[gi + 1])
        first, last = np.r_[True, r[1:] != r[:-1]], np.r_[r[1:] != r[:-1], True]
        span_s = np.full(int(r[-1] - r[0]) + 3, np.iinfo(np.int64).max)
        span_e = np.full(span_s.size, -1)
        span_s[r[first] - r[0] + 1], span_e[r[last] - r[0] + 1] = s[first], e[last]
        vent = np.zeros(gi.size, bool)
        for d in (-1, 1):
            j = gaps[0] - r[0] + 1 + d
            vent |= (gaps[1] < span_s[j]) | (gaps[2] > span_e[j])
        ja, jb, ln = run_overlaps(gaps, below)
        vent |= np.bincount(ja, ln, gi.size) < gaps[2] - gaps[1]
        if not vent.any():                                 # every gap sealed: no need to join them
            sealed = gi
        elif not vent.all():
            nc, cl = edge_components(gi.size, *run_overlaps(gaps, (gaps[0] - 1, gaps[1], gaps[2]))[:2])
            sealed = gi[~(np.bincount(cl, vent, nc) > 0)[cl]]
    if sealed.size:
        nf, cl = edge_components(n_labels, lab[sealed] - 1, lab[sealed + 1] - 1) if n_labels > 1 else (1, np.zeros(1, int))
        fmap = np.r_[0, cl + 1]
    comp = fmap[lab]
    suc = [np.r_[r, r[sealed]], np.r_[s, e[sealed]], np.r_[e, s[sealed + 1]], np.r_[comp, comp[sealed]]]
    order = np.lexsort((suc[1], suc[0]))
    suc = tuple(x[order] for x in suc)
    ia, _, ln = run_overlaps(suc, (suc[0] - 1, suc[1], suc[2]))  # cured length shared with the next row
    area = np.bincount(suc[3] - 1, suc[2] - suc[1], nf)
    merged = np.bincount(comp - 1, minlength=nf) - np.bincount(comp[sealed] - 1, minlength=nf)
    edges = 2 * merged + 2 * area - 2 * np.bincount(suc[3][ia] - 1, ln, nf)
    return suc, fmap, nf, np.rint(edges).astype(np.int64)


def _tributary(contacts_xy, pts, w):
    """Sum of weights ``w`` at ``pts`` nearest each contact; exact ties split evenly."""
    dist, near = cKDTree(contacts_xy).query(pts, k=2)
    tie = np.abs(dist[:, 1] - dist[:, 0]) <= EPS_REL * np.maximum(dist[:, 0], EPS_ZERO)
    half = np.where(tie, 0.5, 1.0) * w
    m = len(contacts_xy)
    return np.bincount(near[:, 0], half, m) + np.bincount(near[tie, 1], half[tie], m)
