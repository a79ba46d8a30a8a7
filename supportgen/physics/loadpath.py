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
components of successive layers that overlap) of that pixel from then on.

Sharing a load.  The part is a rigid body on elastic supports: each holding
contact is a spring of stiffness ``E A / L`` (tip area ``A``, ``L`` its height
above the plate), and its reaction follows from force and moment balance about
both plan axes (:func:`statics_shares`; least squares with the unresisted moment
dropped when the contacts lie in a line, one contact takes it all).  Only the
resultant and its two first moments of each component's load enter, so a whole
peel sweep is shared with one small matrix product.  By mechanism:

* ``pull``: the bounded pressure field of each component (its samples);
* ``tilt``: the peel band at every front position (:func:`~supportgen.physics.separation.peel_sweep`),
  clamped to the pull force; each contact keeps its peak over the sweep;
* ``slide``: the shear is horizontal; it is shared by tip area (equal tips, equal
  shares) and reported as ``contact_side_loads``.

Whatever the mechanism, the plate coming back down for the next layer squeezes
the same film (Reynolds' pressure is linear in the gap speed), so the pull shares
are kept as ``contact_squeeze_loads`` (compression for buckling), together with any
push a contact takes while the part tips on its supports.  A component with no
holding contact is carried by the plate or not supported at all; its force is
reported as ``unheld_force_n``.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..analysis.runlength import edge_components, run_overlaps
from ..constants import EPS_REL, EPS_SMALL, EPS_ZERO, STATICS_RCOND
from .pressure import ring_bound_phi, solve_runs, strip_bound_phi, strip_width
from .separation import (
    SIDE_LOAD,
    capped_sample_forces,
    clamp_to_pull,
    film_constants,
    peel_sweep,
    separation,
    slide_force,
)

__all__ = ["ForceTracker", "ForceProfile", "LayerRecord", "LayerRecorder", "statics_shares", "statics_matrix"]


def statics_matrix(xy, stiffness, length_scale: float = 0.0) -> np.ndarray:
    """(n, 3) matrix ``G``: reactions ``G @ (F, sum f x, sum f y)`` of a rigid part on springs.

    Parameters
    ----------
    xy : (n, 2) float ndarray
        Support positions (mm).
    stiffness : (n,) float ndarray
        Spring stiffness of each support (any common unit, e.g. ``E A / L``).
    length_scale : float
        Size of the loaded region (mm), e.g. its RMS radius: the supports' spread is
        measured against the larger of it and their own spread, so a cluster of
        contacts far smaller than the part it holds shares the load by stiffness
        instead of resisting the part's moments with huge, opposite reactions.

    Notes
    -----
    Reactions ``R_i = k_i (u + a dx_i + b dy_i)`` about the stiffness-weighted centre,
    with ``sum R = F`` and ``sum R dx``, ``sum R dy`` equal to the load's moments
    (force and moment balance of the rigid part).  The 3 x 3 system is solved by a
    pseudo-inverse: where the supports lie in a line the moment about that line
    cannot be resisted and is dropped (``STATICS_RCOND``), so two supports share by
    the lever rule and one takes all.  Cost O(n).

    References
    ----------
    Rigid body on elastic supports: any statics text (e.g. Timoshenko & Young,
    Engineering Mechanics), the bolt-group / pile-group formula.
    """
    xy = np.asarray(xy, float).reshape(-1, 2)
    k = np.asarray(stiffness, float)
    c = (k[:, None] * xy).sum(axis=0) / k.sum()
    # An offset under EPS_SMALL is the round-off of the centre, not a spread: with the loaded region a
    # single pixel (length_scale 0) it would be divided by EPS_ZERO and resist the moment with
    # reactions of 1e9 times the load (a one-pixel first layer on one tip).
    d = np.where(np.abs(xy - c) < EPS_SMALL, 0.0, xy - c)
    scale = max(float(np.sqrt((k[:, None] * d**2).sum() / k.sum())), float(length_scale), EPS_ZERO)
    b = np.column_stack([np.ones(len(k)), d / scale])
    n = b.T @ (k[:, None] * b)
    g = (k[:, None] * b) @ np.linalg.pinv(n, rcond=STATICS_RCOND)
    # inputs (F, Fx, Fy) -> (F, (Fx - F cx)/scale, (Fy - F cy)/scale)
    t = np.array([[1.0, 0.0, 0.0], [-c[0] / scale, 1.0 / scale, 0.0], [-c[1] / scale, 0.0, 1.0 / scale]])
    return g @ t


def statics_shares(xy, stiffness, force, fx, fy) -> np.ndarray:
    """Reactions of supports at ``xy`` under loads ``force`` with moments ``fx = F x_P``, ``fy = F y_P``.

    ``force``, ``fx``, ``fy`` may be arrays of M load cases; returns (n, M) (or (n,)
    for scalars).  See :func:`statics_matrix`.

    Examples
    --------
    >>> statics_shares([[-1.0, 0], [0, 0], [1.0, 0]], [1, 1, 1], 3.0, 0.0, 0.0).round(6).tolist()
    [1.0, 1.0, 1.0]
    """
    g = statics_matrix(xy, stiffness)
    return g @ np.array([force, fx, fy], float)


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
        Peak tensile (pulling) load of each contact (N); zero for a sliding film.
    contact_peak_layers : (n,) int ndarray
        Layer of that peak; -1 for a contact that never attached or carried nothing.
    warnings : tuple of (code, message)
    contact_side_loads : (n,) float ndarray
        Peak horizontal load of each contact (N): the sliding film's shear.
    contact_squeeze_loads : (n,) float ndarray
        Peak compressive load of each contact (N): the film squeezed as the plate
        comes back down (the pull shares), or a push while the part tips.
    mechanism : str
    support_force_n : (L,) float ndarray
        Force of the raft and post cross-sections in each layer (N), added to
        ``force_n`` by :meth:`with_supports`; zeros until then.
    rated_force_n : float or None
    strip_bound_n : (L,) float ndarray or None
        The most each layer's force is overstated (never understated) where thin
        components took their strip bound instead of a pressure solve (N).
    strip_bounded : int
        How many components (over all layers) took it.
    contact_peak_xy : (n, 2) float ndarray or None
        Centre (x, y, mm) of the pull on the component that gave each contact its
        peak load; NaN where the contact carried nothing or the film slides (shear
        is shared by tip area, with no lever).  A contact far from it carries the
        load by lever (moment balance of the rigid part), which more contacts beside
        it barely relieve: :func:`supportgen.supports.contacts.extend_toward_loads`.
    contact_peak_spread : (n,) float ndarray or None
        RMS radius (mm) of that pull about its centre (how far the loaded section
        reaches); NaN and None as ``contact_peak_xy``.
    """

    force_n: np.ndarray
    area_mm2: np.ndarray
    unheld_force_n: np.ndarray
    peak_layer_index: int
    peak_force_n: float
    contact_loads: np.ndarray
    contact_peak_layers: np.ndarray
    warnings: tuple
    contact_side_loads: np.ndarray | None = None
    contact_squeeze_loads: np.ndarray | None = None
    mechanism: str = "pull"
    support_force_n: np.ndarray | None = None
    rated_force_n: float | None = None
    strip_bound_n: np.ndarray | None = None
    strip_bounded: int = 0
    contact_peak_xy: np.ndarray | None = None
    contact_peak_spread: np.ndarray | None = None

    @property
    def contact_tip_loads(self) -> np.ndarray:
        """Axial load with the von Mises stress of each tip's peak tension and shear (N).

        ``sqrt(T^2 + (16/3) S^2)``: tension ``4T/(pi d^2)`` with the peak shear
        ``(4/3) 4S/(pi d^2)`` of a round section (Roark).
        """
        side = _or_zeros(self.contact_side_loads, self.contact_loads)
        return np.sqrt(self.contact_loads**2 + (16.0 / 3.0) * side**2)

    def with_supports(self, force_n, area_mm2) -> ForceProfile:
        """This profile with the raft and post layers' force and area added (per layer index).

        The arrays are cut or padded with zeros to the part's record (layer ``k`` at
        ``[k, k + 1) * layer_mm`` above the plate).  The peak and the rated-force
        warning are recomputed.
        """
        extra_f, extra_a = np.asarray(force_n, float), np.asarray(area_mm2, float)
        n = self.force_n.size or extra_f.size
        pad = lambda a: np.pad(a[:n], (0, n - min(a.size, n)))  # noqa: E731
        support = pad(extra_f) + (pad(self.support_force_n) if self.support_force_n is not None else 0.0)
        force, area = pad(self.force_n) + pad(extra_f), pad(self.area_mm2) + pad(extra_a)
        unheld = pad(self.unheld_force_n)
        peak = int(np.argmax(force)) if n else -1
        warns = tuple(w for w in self.warnings if w[0] != "force-over-rated")
        rated = self.rated_force_n
        over = _over_rated(force, rated) if rated is not None else ()
        return dataclasses.replace(
            self,
            force_n=force,
            area_mm2=area,
            unheld_force_n=unheld,
            peak_layer_index=peak,
            peak_force_n=float(force[peak]) if n else 0.0,
            warnings=over + warns,
            support_force_n=support,
        )

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
            "contact_side_loads_n": [float(v) for v in _or_zeros(self.contact_side_loads, self.contact_loads)],
            "contact_squeeze_loads_n": [float(v) for v in _or_zeros(self.contact_squeeze_loads, self.contact_loads)],
            "support_force_n": [float(v) for v in _or_zeros(self.support_force_n, self.force_n)],
            "mechanism": self.mechanism,
            "strip_bound": _strip_bound(self),
            "warnings": [{"code": c, "message": m} for c, m in self.warnings],
        }


def _strip_bound(profile: ForceProfile) -> dict:
    """The thin-component shortcut's error bound, for the report."""
    bound = _or_zeros(profile.strip_bound_n, profile.force_n)
    share = np.divide(
        bound, profile.force_n[: bound.size], out=np.zeros(bound.size), where=profile.force_n[: bound.size] > 0
    )
    return {
        "components": int(profile.strip_bounded),
        "tolerance_share_of_adhesion": THIN_SHARE,
        "max_overstatement_n": float(bound.max(initial=0.0)),
        "max_overstatement_share": float(share.max(initial=0.0)),
        "note": "thin components (no sealed cavity) whose narrowest strip or thinnest ring bounds their suction to at most "
        f"{THIN_SHARE:g} of their adhesion take that bound as a uniform pressure instead of a solve: "
        "each layer's force is overstated by at most max_overstatement_n, never understated",
    }


def _or_zeros(a, like):
    return np.zeros(np.shape(like)) if a is None else a


def _over_rated(force, rated) -> tuple:
    """The force-over-rated warning, naming the worst layer and the first one over."""
    over = np.nonzero(force > rated)[0]
    if not over.size:
        return ()
    worst = int(np.argmax(force))
    return (
        (
            "force-over-rated",
            f"{over.size} layer(s) exceed the rated separation force of {rated:g} N: the worst is layer "
            f"{worst} at {force[worst]:.1f} N, the first layer {int(over[0])} at {force[over[0]]:.1f} N; "
            "reorient the part, slow the lift or add a slower mode",
        ),
    )


#: Largest suction, as a share of the adhesion of the same area, that a thin component may be
#: given by its strip or ring bound instead of a solve (see ``LayerRecorder._geometry``): the layer's
#: force is then overstated (never understated) by at most this share of its adhesion term:
#: the 2 % the coarse-grid solves are held to (:mod:`supportgen.physics.pressure`), our choice.
#: At the default film and resin a region inside a strip 1.8 mm wide takes it.
THIN_SHARE = 0.02

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
    Call ``tracker(layer, labels)`` for every layer in print order (labels: the
    8-connected components of ``layer.mask``,
    :class:`~supportgen.analysis.layers.LayerLabels`), then :meth:`result`.
    After each call ``last_loads`` (n,) and ``last_unheld_n`` hold that layer's
    shares, which sum to its force.
    After each call ``last_torsion_mm4`` holds J of that layer's suction components.
    Cost per layer: O(pixels of the layer's box) once to find its runs, O(runs log
    runs) for overlaps, cavities and perimeters, plus one coarse solve per component
    whose cell fractions changed (kept factorisations, see the module notes).
    """

    def __init__(self, grid, layer_mm: float, contact_points, settings):
        self.grid, self.layer_mm, self.settings = grid, float(layer_mm), settings
        self.mechanism = settings.printer.mechanism
        separation(self.mechanism)  # SettingsError on an unknown name
        pts = np.asarray(contact_points, float).reshape(-1, 3)
        self.points = pts
        # spring of each load path: E A / L with equal tips before sizing, L its height above the plate
        self._stiff = 1.0 / np.maximum(pts[:, 2], self.layer_mm) if len(pts) else np.zeros(0)
        r = max(settings.rules.tip_diameter_mm / 2.0, grid.pixel_mm / 2.0)
        k = int(np.ceil(r / grid.pixel_mm))
        dr, dc = np.mgrid[-k : k + 1, -k : k + 1]
        keep = (dr**2 + dc**2) * grid.pixel_mm**2 <= r * r + EPS_ZERO
        order = np.argsort((dr**2 + dc**2)[keep], kind="stable")  # nearest first
        self._off = (dr[keep][order], dc[keep][order])
        self._rc = np.column_stack(grid.index(pts[:, :2])) if len(pts) else np.zeros((0, 2), int)
        self._node = np.full(len(pts), -1)  # union-find node each contact holds
        self._parent: list[int] = []
        self._held: dict[int, list[int]] = {}  # root -> contacts
        self._prev_node0 = None  # first union-find node of the layer below
        self._recorder = LayerRecorder(grid, settings, keep=False)  # when fed layer by layer
        self._force, self._area, self._unheld, self._bound, self._bounded = {}, {}, {}, {}, 0
        self._peak = np.zeros(len(pts))
        self._peak_layer = np.full(len(pts), -1)
        self._peak_pull = np.full((len(pts), 3), np.nan)  # centre (x, y) and RMS radius of the peak's pull
        self._side = np.zeros(len(pts))
        self._squeeze = np.zeros(len(pts))
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
    def __call__(self, layer, labels) -> None:
        self.apply(self._recorder(layer, labels))

    def replay(self, records) -> ForceProfile:
        """Apply recorded layers (a :class:`LayerRecorder`'s ``records``, in print order); the profile."""
        for rec in records:
            self.apply(rec)
        return self.result()

    def apply(self, rec: LayerRecord) -> None:
        """The contact-dependent part of a layer: attach tips, find holders, share the loads."""
        k, nf, n_labels = rec.index, rec.nf, rec.n_labels
        node0 = len(self._parent)
        self._parent.extend(range(node0, node0 + n_labels))
        if self._prev_node0 is not None:  # 3-D connectivity with the layer below
            for a, b in rec.links.tolist():
                self._union(node0 + a - 1, self._prev_node0 + b - 1)
        self._attach(rec, node0)
        holders: list[list] = [[] for _ in range(nf + 1)]
        for a in range(1, n_labels + 1):
            holders[rec.fmap[a]].extend(self._held.get(self._find(node0 + a - 1), ()))
        pull, comp_force = rec.pull, rec.comp_force
        n = len(self.points)
        squeeze_load, load, side = np.zeros(n), np.zeros(n), np.zeros(n)
        centre = np.full((n, 3), np.nan)  # centre and RMS radius of the pull on the component each contact holds
        unheld = 0.0
        for i in range(1, nf + 1):
            hold = sorted(set(holders[i]))
            if not hold:
                unheld += comp_force[i - 1]
                continue
            g = statics_matrix(self.points[hold, :2], self._stiff[hold], rec.spread[i - 1])
            r_pull = g @ pull[:, i - 1]
            if pull[0, i - 1] > 0:
                centre[hold] = [*(pull[1:, i - 1] / pull[0, i - 1]), rec.spread[i - 1]]
            squeeze_load[hold] += r_pull
            if self.mechanism == "tilt" and rec.sweep is not None:
                force, fx, fy = rec.sweep
                r = g @ np.vstack([force[i - 1], fx[i - 1], fy[i - 1]])  # (n_hold, M): every front position
                load[hold] += r[:, rec.worst]
                up = np.maximum(r.max(axis=1), 0.0)
                push = np.maximum(-r.min(axis=1), 0.0)
                self._squeeze[hold] = np.maximum(self._squeeze[hold], push)
                gain = up > self._peak[hold]
                better = np.array(hold)[gain]
                self._peak[better], self._peak_layer[better] = up[gain], k
                self._peak_pull[better] = centre[better]  # the pull's centre: the sweep's moves with the front
            elif self.mechanism in SIDE_LOAD:
                share = comp_force[i - 1] / len(hold)  # equal tips: shear shared by tip area
                side[hold] += share
            else:
                load[hold] += r_pull
        # squeeze on the way back down: compression, plus any pull share that came out negative (a push)
        self._squeeze = np.maximum(self._squeeze, np.maximum(squeeze_load, 0.0))
        self._squeeze = np.maximum(self._squeeze, np.maximum(-load, 0.0))
        if self.mechanism in SIDE_LOAD:
            self.last_loads = side
            self._side = np.maximum(self._side, side)
            up = side > self._peak
            self._peak_layer[up] = k
            self._peak[up] = side[up]
        else:
            self.last_loads = load
            if self.mechanism != "tilt":
                up = load > self._peak
                self._peak[up], self._peak_layer[up], self._peak_pull[up] = load[up], k, centre[up]
        self.last_unheld_n = float(unheld)
        self.last_torsion_mm4 = rec.torsion_mm4
        self._force[k] = float(comp_force.sum())
        self._area[k] = rec.area_mm2
        self._unheld[k] = float(unheld)
        self._bound[k] = rec.bound_n
        self._bounded += rec.bounded
        self._prev_node0 = node0

    def _attach(self, rec: LayerRecord, node0: int) -> None:
        """Attach pending contacts whose tip disc touches this layer's cured pixels."""
        top = rec.z_mm + self.layer_mm / 2.0
        pend = np.nonzero((self._node < 0) & (self.points[:, 2] <= top + EPS_REL))[0]
        if pend.size == 0 or rec.n_labels == 0:
            return
        rr = self._rc[pend, 0][:, None] + self._off[0][None, :]
        cc = self._rc[pend, 1][:, None] + self._off[1][None, :]
        lab = rec.label_at(rr, cc)
        hit = lab > 0
        for j, row in zip(pend[hit.any(axis=1)], lab[hit.any(axis=1)]):
            node = self._find(node0 + int(row[row > 0][0]) - 1)
            self._node[j] = node
            self._held.setdefault(node, []).append(int(j))

    def result(self) -> ForceProfile:
        """The :class:`ForceProfile` of the layers seen so far."""
        n = max(self._force) + 1 if self._force else 0
        force, area, unheld, bound = np.zeros(n), np.zeros(n), np.zeros(n), np.zeros(n)
        for k in self._force:
            force[k], area[k], unheld[k] = self._force[k], self._area[k], self._unheld[k]
            bound[k] = self._bound.get(k, 0.0)
        peak = int(np.argmax(force)) if n else -1
        peak_f = float(force[peak]) if n else 0.0
        rated = self.settings.printer.rated_force_n
        warns = list(_over_rated(force, rated))
        never = np.nonzero(self._node < 0)[0]
        if never.size:
            warns.append(
                (
                    "contact-unattached",
                    f"{never.size} contact(s) never touched a cured pixel within the tip radius "
                    f"(first: #{never[0]}); check the contact points against the part",
                )
            )
        # Slivers of a pixel or two the rasteriser splits off an edge pull with
        # micro-newtons: only a share that matters to a tip is worth a warning.
        significant = unheld > np.maximum(UNHELD_TOLERANCE_N, 1e-3 * force)
        if len(self.points) and significant.any():
            first = int(np.nonzero(significant)[0][0])
            warns.append(
                (
                    "force-unheld",
                    f"{int(significant.sum())} layer(s) pull on parts no contact holds yet (first: layer "
                    f"{first}, {unheld[first]:.3g} N); add contacts under them",
                )
            )
        side = self.mechanism in SIDE_LOAD
        tension = np.zeros(len(self.points)) if side else self._peak.copy()
        return ForceProfile(
            force,
            area,
            unheld,
            peak,
            peak_f,
            tension,
            np.where(self._peak > 0, self._peak_layer, -1),
            tuple(warns),
            contact_side_loads=self._side.copy(),
            contact_squeeze_loads=self._squeeze.copy(),
            mechanism=self.mechanism,
            support_force_n=np.zeros(n),
            rated_force_n=rated,
            strip_bound_n=bound,
            strip_bounded=self._bounded,
            contact_peak_xy=None if side else self._peak_pull[:, :2].copy(),
            contact_peak_spread=None if side else self._peak_pull[:, 2].copy(),
        )


@dataclass(frozen=True, eq=False)
class LayerRecord:
    """What the load path needs of one layer that does not depend on the contacts.

    Made once per layer by :class:`LayerRecorder` (runs, components, cavities,
    pressure solves, separation laws) and applied to any set of contacts by
    :meth:`ForceTracker.apply`, so densifying and repair rounds share the layers and
    the solves of the first pass (issue: no stage repeated without need).

    Attributes
    ----------
    index, z_mm : layer index and mid-height (mm)
    runs : (rows, starts, ends) int64 arrays, full-grid coordinates
    lab : (runs,) int64, 8-connected label of each run (1..n_labels)
    n_labels : int
    links : (m, 2) int64, label pairs (this layer, layer below) that overlap
    fmap : (n_labels + 1,) int, label -> suction component (1..nf)
    nf : int
    pull : (3, nf) float, each component's pull resultant and its two first moments
    spread : (nf,) float, RMS radius of each component's pressure samples (mm)
    comp_force : (nf,) float, each component's force under the printer's mechanism (N)
    sweep : (force, fx, fy) of the peel sweep (tilt only), else None; ``worst`` its peak column
    torsion_mm4 : (nf,) float, J of each suction component
    area_mm2 : float, cured area of the layer
    width : int, the grid's columns
    bound_n, bounded : the most this layer's force is overstated by thin components given their
        strip bound instead of a solve (N), and how many (``LayerRecorder._geometry``)
    """

    index: int
    z_mm: float
    runs: tuple
    lab: np.ndarray
    n_labels: int
    links: np.ndarray
    fmap: np.ndarray
    nf: int
    pull: np.ndarray
    spread: np.ndarray
    comp_force: np.ndarray
    sweep: tuple | None
    worst: int
    torsion_mm4: np.ndarray
    area_mm2: float
    width: int
    bound_n: float = 0.0
    bounded: int = 0

    def label_at(self, rr: np.ndarray, cc: np.ndarray) -> np.ndarray:
        """Label of the pixels ``(rr, cc)`` (any shape; 0 where empty or off the grid), from the runs.

        The run starting last at or before a pixel in row-major order holds it when
        it is in that row and ends after it.  O(q log runs).
        """
        r, s, e = self.runs
        out = np.zeros(np.shape(rr), np.int64)
        if r.size == 0:
            return out
        ok = (rr >= 0) & (cc >= 0) & (cc < self.width)
        key = r * (self.width + 1) + s
        q = np.where(ok, rr * (self.width + 1) + cc, -1)
        i = np.searchsorted(key, q, side="right") - 1
        ic = np.clip(i, 0, r.size - 1)
        inside = ok & (i >= 0) & (r[ic] == rr) & (cc < e[ic])
        out[inside] = self.lab[ic[inside]]
        return out


class LayerRecorder:
    """Per-layer observer that makes the :class:`LayerRecord` of every layer.

    Parameters
    ----------
    grid : supportgen.analysis.layers.Grid
    settings : supportgen.settings.Settings
    keep : bool
        Keep the records in ``records`` (to replay them against contacts later).

    Notes
    -----
    Memory grows with the print when kept: the runs of each layer (three int64 per
    row run) and one pressure sample per coarse cell of each component (the coarse
    grid keeps a component to a few thousand cells, :mod:`supportgen.physics.pressure`):
    measured 22 MB for a 75 mm scan standing on end (1600 layers) and 18 MB for a 70 mm
    CAD part (1380 layers), against about 1 GB for the layer grid's working set; no pixel image is kept.
    """

    #: :func:`~supportgen.analysis.layers.analyse_layers` may call it in a forked helper
    #: (its records come back through :meth:`handover` and :meth:`take`).
    runs_in_helper = True

    def __init__(self, grid, settings, keep: bool = True):
        self.grid, self.settings = grid, settings
        self.mechanism = settings.printer.mechanism
        separation(self.mechanism)  # SettingsError on an unknown name
        self.keep = keep
        self.records: list[LayerRecord] = []
        self._prev = None  # the layer below: runs, labels, suction, solves

    def __call__(self, layer, labels) -> LayerRecord:
        """Record ``layer`` from its components' runs (a :class:`~supportgen.analysis.layers.LayerLabels`)."""
        h, prev = self.grid.pixel_mm, self._prev
        runs, n_labels = labels.runs, labels.n
        lab = labels.label.astype(np.int64)
        links = np.zeros((0, 2), np.int64)
        if prev is not None and runs[0].size and prev["runs"][0].size:
            ia, ib, _ = run_overlaps(runs, prev["runs"])
            base = int(prev["lab"].max()) + 1
            codes = np.unique(lab[ia] * base + prev["lab"][ib])
            links = np.column_stack([codes // base, codes % base])
        suction, fmap, nf, edges = _suction(runs, lab, n_labels, None if prev is None else prev["suction"])
        geo, cache, bound_n, bounded = self._geometry(suction, nf, edges, {} if prev is None else prev["cache"])
        area = np.array([geo[i][1] for i in range(1, nf + 1)])
        jt = np.array([geo[i][0] for i in range(1, nf + 1)])
        cured = np.bincount(fmap[lab] - 1, runs[2] - runs[1], nf) * h * h if nf else np.zeros(0)
        # pull: the bounded pressure field of each component, its resultant and first moments
        _, _, adh = film_constants(self.settings)
        pull, spread = np.zeros((3, nf)), np.zeros(nf)
        for i in range(1, nf + 1):
            pts, w, da = geo[i][2], geo[i][3], geo[i][4]
            f = capped_sample_forces(w, da, self.settings)
            fa = adh * cured[i - 1] * da / max(float(da.sum()), EPS_ZERO)
            f = f + fa
            pull[:, i - 1] = f.sum(), f @ pts[:, 0], f @ pts[:, 1]
            if da.sum() > 0:
                spread[i - 1] = float(np.sqrt((da @ ((pts - da @ pts / da.sum()) ** 2).sum(axis=1)) / da.sum()))
        sweep, worst = None, 0
        if self.mechanism == "tilt":
            raw = peel_sweep(*suction[:4], nf, h, (self.grid.x0, self.grid.y0), self.settings)
            force, fx, fy = clamp_to_pull(*raw, pull[0])
            sweep = (force, fx, fy)
            worst = int(np.argmax(force.sum(axis=0))) if force.shape[1] else 0
            comp_force = force[:, worst] if force.shape[1] else np.zeros(nf)
            if not force.shape[1]:
                sweep = None
        elif self.mechanism in SIDE_LOAD:
            comp_force = slide_force(_Areas(area), self.settings)
        else:
            comp_force = pull[0]
        rec = LayerRecord(
            int(layer.index),
            float(layer.z_mm),
            runs,
            lab,
            int(n_labels),
            links,
            fmap,
            int(nf),
            pull,
            spread,
            np.asarray(comp_force, float),
            sweep,
            worst,
            jt,
            float((runs[2] - runs[1]).sum()) * h * h,
            int(self.grid.nx),
            float(bound_n),
            int(bounded),
        )
        self._prev = {"runs": runs, "lab": lab, "suction": suction[:3], "cache": cache}
        if self.keep:
            self.records.append(rec)
        return rec

    def handover(self) -> list[LayerRecord]:
        """The records, from a copy that ran in a helper process (the solver state stays there)."""
        return self.records

    def take(self, records: list[LayerRecord]) -> None:
        """Take the records a helper's copy made over all the layers."""
        self.records, self._prev = records, None

    def _geometry(self, suction, nf, edges, kept):
        """J, area and pressure samples per suction component; solves kept by coarse block key.

        A component with no sealed cavity whose thinnest annulus about its box's centre
        (:func:`ring_bound_phi`) or narrowest strip (:func:`strip_width`) bounds its suction to at most :data:`THIN_SHARE` of its adhesion is not solved:
        it takes that bound as a uniform pressure (:func:`strip_bound_phi`), which
        overstates its force by no more than the bound itself, recorded per component.
        Returns ``geo`` (per component: J, area, points, phi dA, dA), the solve cache and
        the summed overstatement bound (N) of the components so taken, with their count.
        """
        g, h = self.grid, self.grid.pixel_mm
        kp, ceiling, adh = film_constants(self.settings)
        rows, starts, ends, comp, cav = suction
        order = np.argsort(comp, kind="stable")
        cut = np.searchsorted(comp[order], np.arange(1, nf + 2))
        geo, cache, bound_n, bounded = {}, {}, 0.0, 0
        # widest strip whose bound passes (strip_bound_phi is t^2 / 8); none without adhesion
        thin_mm = float(np.sqrt(8.0 * THIN_SHARE * adh / kp)) if kp > 0 else np.inf
        for i in range(1, nf + 1):
            o = order[cut[i - 1] : cut[i]]
            r, s0, e = rows[o], starts[o], ends[o]
            if adh > 0 and not cav[o].any():
                # the thinnest annulus about the box centre (O(runs)); then the narrowest strip, whose
                # width is at least the area over the box's diagonal (skip the hull when that is wide)
                phi = ring_bound_phi(r, s0, e, h)
                if kp * phi > THIN_SHARE * adh and _may_be_thin(r, s0, e, h, thin_mm):
                    phi = min(phi, strip_bound_phi(strip_width(r, s0, e) * h))
                if min(kp * phi, ceiling) <= THIN_SHARE * adh:
                    da = (e - s0) * h * h
                    pts = np.column_stack([g.x0 + ((s0 + e - 1) / 2) * h, g.y0 + r * h])
                    area = float(da.sum())
                    geo[i] = (4.0 * phi * area, area, pts, phi * da, da)
                    bound_n += min(kp * phi, ceiling) * area
                    bounded += 1
                    continue
            *out, (key, state) = solve_runs(
                r, s0, e, int(edges[i - 1]), h, (g.x0, g.y0), kept, cavity=cav[o] if cav[o].any() else None
            )
            geo[i] = tuple(out)
            cache[key] = state
        return geo, cache, bound_n, bounded


def _may_be_thin(rows, starts, ends, pixel_mm: float, thin_mm: float) -> bool:
    """False when a region cannot lie in a strip ``thin_mm`` wide: its convex hull's width is
    at least its area over its diameter, and the diameter at most its box's diagonal."""
    area = float((ends - starts).sum())
    diag = float(np.hypot(rows.max() - rows.min() + 1, ends.max() - starts.min()))
    return area / diag * pixel_mm <= thin_mm


class _Areas:
    """The part of :class:`~supportgen.physics.separation.LayerShape` the slide law reads."""

    def __init__(self, area):
        self.area_mm2 = area


def _suction(runs, lab, n_labels: int, below):
    """Suction region of a layer (cured runs plus sealed cavities) from its runs.

    Parameters: the layer's runs and their 8-connected labels, and ``below`` the
    layer below's suction runs (None for the first layer: every hole is vented).
    Returns the suction runs ``(rows, starts, ends, component, is_cavity)`` sorted by
    row and start, the map label -> component (components of ``mask | sealed``, 8-connected),
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
    gi = np.flatnonzero(r[1:] == r[:-1])  # gap between run i and run i + 1
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
        if not vent.any():  # every gap sealed: no need to join them
            sealed = gi
        elif not vent.all():
            nc, cl = edge_components(gi.size, *run_overlaps(gaps, (gaps[0] - 1, gaps[1], gaps[2]))[:2])
            sealed = gi[~(np.bincount(cl, vent, nc) > 0)[cl]]
    if sealed.size:
        nf, cl = (
            edge_components(n_labels, lab[sealed] - 1, lab[sealed + 1] - 1) if n_labels > 1 else (1, np.zeros(1, int))
        )
        fmap = np.r_[0, cl + 1]
    comp = fmap[lab]
    suc = [
        np.r_[r, r[sealed]],
        np.r_[s, e[sealed]],
        np.r_[e, s[sealed + 1]],
        np.r_[comp, comp[sealed]],
        np.r_[np.zeros(r.size, bool), np.ones(sealed.size, bool)],
    ]
    order = np.lexsort((suc[1], suc[0]))
    suc = tuple(x[order] for x in suc)
    ia, _, ln = run_overlaps(suc, (suc[0] - 1, suc[1], suc[2]))  # cured length shared with the next row
    area = np.bincount(suc[3] - 1, suc[2] - suc[1], nf)
    merged = np.bincount(comp - 1, minlength=nf) - np.bincount(comp[sealed] - 1, minlength=nf)
    edges = 2 * merged + 2 * area - 2 * np.bincount(suc[3][ia] - 1, ln, nf)
    return suc, fmap, nf, np.rint(edges).astype(np.int64)
