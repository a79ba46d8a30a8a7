"""Load path: which contacts hold each layer, and the load each one carries.

:class:`ForceTracker` watches the layers stream past in print order.  For each
layer it fills sealed cavities (:func:`~supportgen.forces.sealed_cavities`), solves
the pressure field of each component (reusing the layer below's when the mask
barely changed), applies the printer's separation law, and shares each
component's force among the contacts that hold it.

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
from scipy import ndimage
from scipy.spatial import cKDTree

from . import forces as fz

__all__ = ["ForceTracker", "ForceProfile", "REUSE_CHANGE"]

#: Reuse a component's solve when |symmetric difference| < this fraction of its area;
#: J is scaled by (A/A_below)^2 (exact for a similar shape).
REUSE_CHANGE = 0.005
_EIGHT = np.ones((3, 3), bool)


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


class ForceTracker:
    """Per-layer observer that builds a :class:`ForceProfile`.

    Parameters
    ----------
    grid : supportgen.layers.Grid
        The pixel grid of the layer masks.
    layer_mm : float
        Layer height (mm).
    contact_points : (n, 3) float ndarray
        Tip positions on the part (build coordinates, mm).
    settings : supportgen.settings.Settings
        Uses ``printer.mechanism`` and the separation parameters, ``rated_force_n``
        and ``supports.tip_diameter_mm`` (the attach radius is half of it, at least
        half a pixel).

    Notes
    -----
    Call ``tracker(layer, labels, n_labels)`` for every layer in print order (labels:
    8-connected ``scipy.ndimage.label`` of ``layer.mask``), then :meth:`result`.
    After each call ``last_loads`` (n,) and ``last_unheld_n`` hold that layer's
    shares, which sum to its force.
    Cost per layer: O(pixels of the layer's box) for labelling and overlaps, plus one
    coarse solve per changed component (see :mod:`supportgen.forces`).
    """

    def __init__(self, grid, layer_mm: float, contact_points, settings):
        self.grid, self.layer_mm, self.settings = grid, float(layer_mm), settings
        self.law = fz.separation(settings.printer.mechanism)
        pts = np.asarray(contact_points, float).reshape(-1, 3)
        self.points = pts
        r = max(settings.supports.tip_diameter_mm / 2.0, grid.pixel_mm / 2.0)
        k = int(np.ceil(r / grid.pixel_mm))
        dr, dc = np.mgrid[-k: k + 1, -k: k + 1]
        keep = (dr**2 + dc**2) * grid.pixel_mm**2 <= r * r + 1e-12
        order = np.argsort((dr**2 + dc**2)[keep], kind="stable")  # nearest first
        self._off = (dr[keep][order], dc[keep][order])
        self._rc = np.column_stack(grid.index(pts[:, :2])) if len(pts) else np.zeros((0, 2), int)
        self._node = np.full(len(pts), -1)        # union-find node each contact holds
        self._parent: list[int] = []
        self._held: dict[int, list[int]] = {}     # root -> contacts
        self._prev = None                          # the layer below: masks, labels, nodes, solves
        self._force, self._area, self._unheld = {}, {}, {}
        self._peak = np.zeros(len(pts))
        self._peak_layer = np.full(len(pts), -1)
        self.last_loads, self.last_unheld_n = np.zeros(len(pts)), 0.0

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
        sealed = fz.sealed_cavities(mask, None if prev is None else prev["mask"], None if prev is None else prev["sealed"])
        if sealed.any():
            flab, nf = ndimage.label(mask | sealed, _EIGHT)
            fmap = np.zeros(n_labels + 1, int)
            fmap[labels[mask]] = flab[mask]
        else:
            flab, nf, fmap = labels, n_labels, np.arange(n_labels + 1)
        node0 = len(self._parent)
        self._parent.extend(range(node0, node0 + n_labels))
        pairs = None
        if prev is not None:                      # 3-D connectivity with the layer below
            pairs = _pairs(labels, n_labels, prev["labels"], prev["n"])
            for a, b in pairs[0]:
                self._union(node0 + int(a) - 1, prev["node0"] + int(b) - 1)
        self._attach(layer, labels, node0)
        same = prev is not None and flab is labels and prev["flab"] is prev["labels"]
        geo, cache = self._geometry(flab, nf, prev, pairs if same else None)
        area = np.array([geo[i][1] for i in range(1, nf + 1)])
        jt = np.array([geo[i][0] for i in range(1, nf + 1)])
        comp_force = np.asarray(self.law(fz.LayerShape(flab, h, area, jt), self.settings), float)
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
                load[hold] += comp_force[i - 1] * share / max(share.sum(), 1e-300)
        self.last_loads, self.last_unheld_n = load, float(unheld)   # this layer, for checks
        up = load > self._peak
        self._peak[up], self._peak_layer[up] = load[up], k
        self._force[k] = float(comp_force.sum())
        self._area[k] = float(mask.sum()) * h * h
        self._unheld[k] = float(unheld)
        self._prev = {"mask": mask, "sealed": sealed, "labels": labels, "n": n_labels, "node0": node0,
                      "flab": flab, "nf": nf, "cache": cache}

    def _attach(self, layer, labels, node0) -> None:
        """Attach pending contacts whose tip disc touches this layer's cured pixels."""
        top = layer.z_mm + self.layer_mm / 2.0
        pend = np.nonzero((self._node < 0) & (self.points[:, 2] <= top + 1e-9))[0]
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

    def _geometry(self, flab, nf, prev, pairs=None):
        """J, area and pressure samples per suction component, reusing the layer below."""
        h, g = self.grid.pixel_mm, self.grid
        objects = ndimage.find_objects(flab)
        geo, todo = {}, []
        pairs_prev = None
        if prev is not None and nf and prev["nf"]:
            pairs_prev, counts = pairs if pairs is not None else _pairs(flab, nf, prev["flab"], prev["nf"])
            a_now = np.bincount(flab.ravel(), minlength=nf + 1)
            best = {}
            for (a, b), c in zip(pairs_prev, counts):
                if c > best.get(a, (0, 0))[1]:
                    best[a] = (b, c)
        for i in range(1, nf + 1):
            if pairs_prev is not None and i in best:
                b, c = best[i]
                old = prev["cache"].get(int(b))
                if old is not None:
                    a_old = old[1] / (h * h)
                    if a_now[i] + a_old - 2 * c < REUSE_CHANGE * a_now[i]:
                        scale = (a_now[i] / a_old) ** 2
                        geo[i] = (old[0] * scale, a_now[i] * h * h, old[2], old[3] * scale)
                        continue
            todo.append(i)
        geo.update(fz.solve_components(flab, todo, h, (g.x0, g.y0), objects))
        return geo, geo

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
        if len(self.points) and (unheld > 0).any():
            first = int(np.nonzero(unheld > 0)[0][0])
            warns.append(("force-unheld",
                          f"{int((unheld > 0).sum())} layer(s) pull on parts no contact holds yet (first: layer "
                          f"{first}); add contacts under them"))
        return ForceProfile(force, area, unheld, peak, peak_f, self._peak.copy(),
                            np.where(self._peak > 0, self._peak_layer, -1), tuple(warns))


def _pairs(lab_a, na, lab_b, nb):
    """Overlapping label pairs (a, b) of two label images and their pixel counts."""
    both = (lab_a > 0) & (lab_b > 0)
    a, b = lab_a[both].astype(np.int64), lab_b[both].astype(np.int64)
    if (na + 1) * (nb + 1) <= 4_000_000:
        counts = np.bincount(a * (nb + 1) + b, minlength=(na + 1) * (nb + 1))
        code = np.nonzero(counts)[0]
        counts = counts[code]
    else:
        code, counts = np.unique(a * (nb + 1) + b, return_counts=True)
    return np.column_stack([code // (nb + 1), code % (nb + 1)]), counts


def _tributary(contacts_xy, pts, w):
    """Sum of weights ``w`` at ``pts`` nearest each contact; exact ties split evenly."""
    dist, near = cKDTree(contacts_xy).query(pts, k=2)
    tie = np.abs(dist[:, 1] - dist[:, 0]) <= 1e-9 * np.maximum(dist[:, 0], 1e-12)
    half = np.where(tie, 0.5, 1.0) * w
    m = len(contacts_xy)
    return np.bincount(near[:, 0], half, m) + np.bincount(near[tie, 1], half[tie], m)
