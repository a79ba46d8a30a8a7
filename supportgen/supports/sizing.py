"""Sizing: tips that hold, posts that do not buckle, braces where posts are slender.

Every diameter is computed from a load instead of picked from a preset.

* A **tip** pulls on the part in tension: its capacity is ``sigma * pi * d**2 / 4``
  with the resin's green (as-printed) tensile strength, so the diameter for a
  peak load ``F`` at safety factor ``SF`` is ``d = sqrt(4 F SF / (pi sigma))``,
  clamped to ``[tip_min_mm, tip_max_mm]``.  A tip that would need more than
  ``tip_max_mm`` is *over capacity*: :func:`densify_points` adds contacts around
  it so that the force stage can share its load out.
* **Load flow.**  Each contact's load enters its tip's node and flows down the
  plan's edges to the feet (or to a landing tip on the part); a node with several
  ways down splits its load equally among them.  The tension in an edge is the
  load it carries.  When the plate comes back down for the next layer the same
  squeeze-film law acts with the sign reversed (Reynolds' pressure is linear in
  the gap speed), so the posts are squeezed by the same loads in compression
  unless the force stage passes its own ``compression_loads``.
* A **post** (a straight run of edges between stations: feet, junctions where
  branches join or split, tip joints and braced nodes) must carry
  ``SF * max(tension, compression)`` at the green strength, and must not buckle:
  ``SF * compression <= P_cr`` with Euler's load for slender runs and Johnson's
  parabola for stocky ones.  Diameters never fall below half the post setting
  nor below the tips a post carries, and never shrink going down the flow.
* **End conditions and braces** are decided in :mod:`supportgen.supports.bracing`: it
  splits the plan into runs (the unbraced lengths), gives each its design
  effective-length factor K from whether the part holds the tops from swaying,
  and braces a run that would need more than twice the post setting, or whose
  slenderness ``K L / r`` passes :data:`MAX_SLENDERNESS`, in two plan directions
  with braces rising at least :data:`BRACE_MIN_ANGLE_DEG`; sizing is then repeated.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import networkx as nx
import numpy as np
import scipy.sparse as sparse
import scipy.sparse.linalg as spla

from ..errors import SizingError
from ..settings import Settings
from .bracing import (
    BRACE_MIN_ANGLE_DEG,
    EFFECTIVE_LENGTH,
    MAX_SLENDERNESS,
    EffectiveLength,
    PostRuns,
    add_braces,
    held_nodes,
    post_runs,
)
from .contacts import densify_points
from .plan import SupportPlan

__all__ = [
    "EFFECTIVE_LENGTH",
    "EffectiveLength",
    "MAX_SLENDERNESS",
    "BRACE_MIN_ANGLE_DEG",
    "SizingError",
    "SizedPlan",
    "tip_capacity",
    "required_tip_diameter",
    "tip_diameter",
    "over_capacity",
    "euler_critical_load",
    "johnson_critical_load",
    "column_critical_load",
    "required_post_diameter",
    "flow_loads",
    "size_plan",
    "densify_points",
    "tip_shear_stress",
    "bending_stress",
    "equivalent_tip_load",
    "required_bending_diameter",
    "BRACE_FRACTION",
    "support_layer_forces",
]


def _loads(values, name: str) -> np.ndarray:
    a = np.asarray(values, dtype=float)
    if not np.all(np.isfinite(a)) or np.any(a < 0):
        raise SizingError(f"{name}: loads must be finite and >= 0 N; check the force stage output")
    return a


def tip_capacity(diameter_mm, green_tensile_mpa):
    """Tensile load a tip of diameter ``d`` carries: ``sigma * pi * d**2 / 4`` (N).

    Parameters
    ----------
    diameter_mm : float or (n,) ndarray
        Tip diameter where it meets the part (mm).
    green_tensile_mpa : float
        Green tensile strength of the resin (MPa = N/mm^2).

    Returns
    -------
    (n,) ndarray or float
        Load at failure (N).  Cost O(n).

    References
    ----------
    Axial stress in a bar, any strength-of-materials text (Timoshenko & Gere).

    Examples
    --------
    >>> round(float(tip_capacity(0.5, 20.0)), 4)
    3.927
    """
    d = np.asarray(diameter_mm, dtype=float)
    return green_tensile_mpa * np.pi * d**2 / 4.0


def required_tip_diameter(load_n, green_tensile_mpa, safety_factor=1.0):
    """Unclamped tip diameter ``sqrt(4 F SF / (pi sigma))`` for a peak load ``F`` (mm).

    Parameters
    ----------
    load_n : float or (n,) ndarray
        Peak tensile load of each tip (N), >= 0.
    green_tensile_mpa : float
        Green tensile strength (MPa).
    safety_factor : float
        Factor on the load.

    Returns
    -------
    (n,) ndarray
        The inverse of :func:`tip_capacity` at ``load * safety_factor``.  Cost O(n).

    Raises
    ------
    SizingError
        A load is negative or not finite.
    """
    f = _loads(load_n, "load_n")
    return np.sqrt(4.0 * f * safety_factor / (np.pi * green_tensile_mpa))


def tip_diameter(load_n, settings: Settings):
    """Tip diameters for peak loads, clamped to ``[tip_min_mm, tip_max_mm]`` (mm).

    Tips whose unclamped need passes ``tip_max_mm`` are flagged by
    :func:`over_capacity`; their clamped diameter holds less than ``SF`` times the load.
    Cost O(n).

    Examples
    --------
    >>> s = Settings()
    >>> tip_diameter([0.0, 1.0, 100.0], s).round(4).tolist()
    [0.15, 0.3568, 0.7]
    """
    s = settings.rules
    need = required_tip_diameter(load_n, settings.resin.green_tensile_mpa, s.safety_factor)
    return np.clip(need, s.tip_min_mm, s.tip_max_mm)


def over_capacity(load_n, settings: Settings):
    """True where a tip at ``tip_max_mm`` cannot hold ``safety_factor`` times its load. Cost O(n)."""
    need = required_tip_diameter(load_n, settings.resin.green_tensile_mpa, settings.rules.safety_factor)
    return need > settings.rules.tip_max_mm


def euler_critical_load(E_mpa, d_mm, L_mm, K):
    """Euler buckling load of a round post: ``pi**2 E I / (K L)**2``, ``I = pi d**4 / 64`` (N).

    Parameters
    ----------
    E_mpa : float
        Young's modulus (MPa); the green modulus for posts being printed.
    d_mm, L_mm : float or ndarray
        Diameter and unbraced length (mm); ``L = 0`` gives ``inf``.
    K : float or ndarray
        Effective-length factor, see :data:`EFFECTIVE_LENGTH`.

    Returns
    -------
    ndarray
        Critical load (N).  Cost O(n).

    Notes
    -----
    Elastic buckling only: for stocky posts it over-predicts; see
    :func:`column_critical_load`.

    References
    ----------
    S. P. Timoshenko and J. M. Gere, *Theory of Elastic Stability*, 2nd ed., 1961, ch. 2.

    Examples
    --------
    >>> round(float(euler_critical_load(2500.0, 0.6, 5.0, 1.0)), 2)
    6.28
    """
    d = np.asarray(d_mm, dtype=float)
    kl = np.asarray(K, dtype=float) * np.asarray(L_mm, dtype=float)
    with np.errstate(divide="ignore"):
        return np.pi**2 * E_mpa * (np.pi * d**4 / 64.0) / kl**2


def johnson_critical_load(E_mpa, sigma_mpa, d_mm, L_mm, K):
    """J. B. Johnson's parabola for stocky round posts: ``A s (1 - s (K L / r)**2 / (4 pi**2 E))`` (N).

    ``r = d / 4`` is the radius of gyration of a round section.  The parabola
    meets Euler's curve tangentially at ``K L / r = sqrt(2 pi**2 E / s)``.
    Cost O(n).

    References
    ----------
    R. G. Budynas and J. K. Nisbett, *Shigley's Mechanical Engineering Design*,
    columns chapter, "intermediate-length columns with central loading" [memory for the section].
    """
    d = np.asarray(d_mm, dtype=float)
    kl = np.asarray(K, float) * np.asarray(L_mm, float)
    return np.pi * d**2 / 4.0 * sigma_mpa - sigma_mpa**2 * kl**2 / (np.pi * E_mpa)  # A s - s^2 (KL)^2 / (pi E)


def column_critical_load(E_mpa, sigma_mpa, d_mm, L_mm, K):
    """Failure load of a round post in compression: Johnson below the tangent slenderness, Euler above (N).

    Uses the green tensile strength as the squash stress (resins are usually
    stronger in compression [memory], so this errs safe).  Cost O(n).
    """
    d = np.asarray(d_mm, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        lam = 4.0 * np.asarray(K, float) * np.asarray(L_mm, float) / d
    lam_c = math.sqrt(2.0 * np.pi**2 * E_mpa / sigma_mpa)
    return np.where(
        lam >= lam_c, euler_critical_load(E_mpa, d, L_mm, K), johnson_critical_load(E_mpa, sigma_mpa, d, L_mm, K)
    )


def required_post_diameter(compression_n, E_mpa, sigma_mpa, L_mm, K, safety_factor=1.0):
    """Smallest diameter whose :func:`column_critical_load` is ``safety_factor * compression`` (mm).

    Closed forms: Euler ``d**4 = 64 P (K L)**2 / (pi**3 E)``; Johnson
    ``d**2 = 4 (P + s**2 (K L)**2 / (pi E)) / (pi s)``.  Cost O(n).
    """
    p = safety_factor * _loads(compression_n, "compression_n")
    kl = np.asarray(K, float) * np.asarray(L_mm, float)
    d_e = (64.0 * p * kl**2 / (np.pi**3 * E_mpa)) ** 0.25
    d_j = np.sqrt(4.0 * (p + sigma_mpa**2 * kl**2 / (np.pi * E_mpa)) / (np.pi * sigma_mpa))
    with np.errstate(divide="ignore", invalid="ignore"):
        lam = 4.0 * kl / d_e
    return np.where(lam >= math.sqrt(2.0 * np.pi**2 * E_mpa / sigma_mpa), d_e, d_j)


def tip_shear_stress(side_n, diameter_mm):
    """Peak shear stress of a round tip under a side force: ``(4/3) 4 F / (pi d**2)`` (MPa).

    References
    ----------
    Roark's *Formulas for Stress and Strain*, shear in a solid circular section
    (peak = 4/3 of the mean).

    Examples
    --------
    >>> round(float(tip_shear_stress(1.0, 0.5)), 4)
    6.7906
    """
    d = np.asarray(diameter_mm, float)
    return (4.0 / 3.0) * 4.0 * np.asarray(side_n, float) / (np.pi * d**2)


def bending_stress(side_n, lever_mm, diameter_mm):
    """Bending stress at the foot of a round post under a side force at its top: ``32 F L / (pi d**3)`` (MPa).

    References
    ----------
    Roark's *Formulas for Stress and Strain*, cantilever with an end load; section
    modulus ``pi d**3 / 32`` of a solid circle.

    Examples
    --------
    >>> round(float(bending_stress(0.1, 5.0, 1.0)), 4)
    5.093
    """
    d = np.asarray(diameter_mm, float)
    return 32.0 * np.asarray(side_n, float) * np.asarray(lever_mm, float) / (np.pi * d**3)


def equivalent_tip_load(tension_n, side_n):
    """Axial load with the same von Mises stress as tension plus the tip's peak shear (N).

    ``sqrt(sigma**2 + 3 tau**2)`` with ``sigma = 4 T / (pi d**2)`` and
    ``tau = (4/3) 4 S / (pi d**2)`` is ``4 sqrt(T**2 + (16/3) S**2) / (pi d**2)``.
    Cost O(n).
    """
    t, s = np.asarray(tension_n, float), np.asarray(side_n, float)
    return np.sqrt(t**2 + (16.0 / 3.0) * s**2)


def required_bending_diameter(axial_n, side_n, lever_mm, sigma_mpa, safety_factor=1.0):
    """Smallest d with ``SF (4 P / (pi d**2) + 32 S L / (pi d**3)) <= sigma`` (mm), by bisection.

    Cost O(n * 60).
    """
    p = safety_factor * np.asarray(axial_n, float)
    m = safety_factor * np.asarray(side_n, float) * np.asarray(lever_mm, float)
    p, m = np.broadcast_arrays(p, m)
    lo = np.zeros(p.shape)
    hi = np.sqrt(4.0 * p / (np.pi * sigma_mpa)) + np.cbrt(32.0 * m / (np.pi * sigma_mpa)) + 1e-9
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            over = 4.0 * p / (np.pi * mid**2) + 32.0 * m / (np.pi * mid**3) > sigma_mpa
        lo, hi = np.where(over, mid, lo), np.where(over, hi, mid)
    return np.where((p > 0) | (m > 0), hi, 0.0)


def _levers(plan: SupportPlan, held: np.ndarray) -> np.ndarray:
    """(E,) lever arm (mm) of the side load at each edge's lower end.

    A side load enters where the tips meet the part and bends every post below
    as a cantilever down to the nearest held node (braces take it there) or foot.
    Cost O(depth * E).
    """
    nodes, edges = plan.nodes, plan.edges
    n = len(nodes)
    top = np.full(n, -np.inf)
    served = plan.tip_contact >= 0
    np.maximum.at(top, plan.tip_nodes[served], plan.tip_points[served, 2])
    u, v = edges[:, 0], edges[:, 1]
    for _ in range(max(len(edges), 1)):
        eff = np.where(held, np.minimum(top, nodes[:, 2]), top)
        new = top.copy()
        np.maximum.at(new, v, eff[u])
        if np.array_equal(new, top):
            break
        top = new
    eff = np.where(held, np.minimum(top, nodes[:, 2]), top)
    return np.maximum(eff[u] - nodes[v, 2], 0.0)


#: Nodal brace strength as a fraction of the column load it steadies, when no side
#: load is larger [memory: AISC 360 Appendix 6, nodal bracing, 0.01 P].
BRACE_FRACTION = 0.01


def _brace_loads(plan: SupportPlan, node_side, node_comp, settings: Settings):
    """Axial load, capacity and diameter of every brace (N, N, mm).

    A held node's horizontal force (the side load arriving there, at least
    :data:`BRACE_FRACTION` of the compression through it) is taken by one of its
    braces alone (errs safe), along the brace: ``H / cos(rise)``.  Capacity: the
    smaller of tension and Euler buckling pinned at both ends (K = 1), at the
    diameter the geometry stage gives a brace (half the thinner post at its ends).
    """
    b = plan.braces.reshape(-1, 2)
    if len(b) == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    node_r = np.zeros(len(plan.nodes))
    np.maximum.at(node_r, plan.edges[:, 0], plan.edge_radius)
    np.maximum.at(node_r, plan.edges[:, 1], plan.edge_radius)
    node_r[node_r == 0] = settings.rules.post_diameter_mm / 2
    d = np.minimum(node_r[b[:, 0]], node_r[b[:, 1]])  # diameter = 2 * (0.5 * min radius)
    vec = plan.nodes[b[:, 1]] - plan.nodes[b[:, 0]]
    length = np.linalg.norm(vec, axis=1)
    cos = np.hypot(vec[:, 0], vec[:, 1]) / np.maximum(length, 1e-12)
    h = np.maximum(node_side, BRACE_FRACTION * node_comp)
    force = np.maximum(h[b[:, 0]], h[b[:, 1]]) / np.maximum(cos, 1e-12)
    e_mod, sigma = settings.resin.green_modulus_mpa, settings.resin.green_tensile_mpa
    cap = np.minimum(tip_capacity(d, sigma), column_critical_load(e_mod, sigma, d, length, 1.0))
    return force, cap, d


def _brace_floor(plan: SupportPlan, sz, settings: Settings):
    """Per-edge diameter floor that gives every brace its safety factor, or None if all have it.

    A brace is as thick as the thinner of the two posts it joins allows (see
    :func:`_brace_loads`), so the posts at both ends of a weak brace are thickened
    until the brace holds ``safety_factor`` times its load in tension and as a
    pinned-pinned column (K = 1; Euler or Johnson).  Cost O(B + E).
    """
    load, cap, _ = _brace_loads(plan, sz.node_side, sz.node_comp, settings)
    sf = settings.rules.safety_factor
    weak = load * sf > cap * (1 + 1e-12)
    if not weak.any():
        return None
    b = plan.braces.reshape(-1, 2)[weak]
    e_mod, sigma = settings.resin.green_modulus_mpa, settings.resin.green_tensile_mpa
    length = np.linalg.norm(plan.nodes[b[:, 1]] - plan.nodes[b[:, 0]], axis=1)
    need = np.maximum(
        required_tip_diameter(load[weak], sigma, sf), required_post_diameter(load[weak], e_mod, sigma, length, 1.0, sf)
    )
    node_need = np.zeros(len(plan.nodes))
    np.maximum.at(node_need, b[:, 0], need)
    np.maximum.at(node_need, b[:, 1], need)
    # brace diameter = the smaller end node's post radius, so each end needs a post of twice it
    return 2.0 * np.maximum(node_need[plan.edges[:, 0]], node_need[plan.edges[:, 1]])


def _out_ways(plan: SupportPlan) -> tuple[np.ndarray, np.ndarray]:
    """Per node: number of ways down (out-edges plus landing tips); mask of landing tips."""
    landing = plan.tip_contact < 0
    ways = np.bincount(plan.edges[:, 0], minlength=len(plan.nodes))
    ways += np.bincount(plan.tip_nodes[landing], minlength=len(plan.nodes))
    return ways, landing


def flow_loads(plan: SupportPlan, contact_loads):
    """Carry each contact's load down the plan: node throughput, edge loads, tip loads.

    Solves ``(I - W) x = b`` where ``b`` holds the contact loads at their tip
    nodes and ``W[v, u] = 1 / ways(u)`` for each edge ``u -> v``: every node
    splits what reaches it equally among its out-edges and landing tips.

    Parameters
    ----------
    plan : SupportPlan
        Must be acyclic (checked by :func:`size_plan`).
    contact_loads : (n,) ndarray
        Load of each contact (N); ``plan.tip_contact`` indexes it.

    Returns
    -------
    node_n : (N,) ndarray
        Load passing through each node.
    edge_n : (E,) ndarray
        Load carried by each edge.
    tip_n : (T,) ndarray
        Load of each tip: its contact's load, or for a landing tip its share of its node.

    Notes
    -----
    One sparse triangular-structured solve: O(N + E) memory, near-linear time.
    """
    loads = _loads(contact_loads, "contact_loads")
    n_nodes = len(plan.nodes)
    ways, landing = _out_ways(plan)
    tip_n = np.zeros(len(plan.tip_nodes))
    tip_n[~landing] = loads[plan.tip_contact[~landing]]
    if n_nodes == 0:
        return np.zeros(0), np.zeros(0), tip_n
    b = np.bincount(plan.tip_nodes[~landing], weights=tip_n[~landing], minlength=n_nodes)
    u, v = plan.edges[:, 0], plan.edges[:, 1]
    w = sparse.csc_matrix((1.0 / ways[u], (v, u)), shape=(n_nodes, n_nodes))
    node_n = np.atleast_1d(spla.spsolve((sparse.identity(n_nodes, format="csc") - w).tocsc(), b))
    share = np.divide(node_n, ways, out=np.zeros(n_nodes), where=ways > 0)
    tip_n[landing] = share[plan.tip_nodes[landing]]
    return node_n, share[u], tip_n


def _check_plan(plan: SupportPlan, n_contacts: int) -> None:
    n = len(plan.nodes)
    for name, idx in (
        ("edges", plan.edges.ravel()),
        ("tip_nodes", plan.tip_nodes),
        ("feet", plan.feet),
        ("braces", plan.braces.ravel()),
    ):
        if idx.size and (idx.min() < 0 or idx.max() >= n):
            raise SizingError(f"SupportPlan.{name} refers to a node outside 0..{n - 1}; rebuild the plan")
    if plan.tip_contact.size and plan.tip_contact.max() >= n_contacts:
        raise SizingError(
            f"SupportPlan.tip_contact refers to contact {plan.tip_contact.max()} but only "
            f"{n_contacts} contact loads were given; pass one load per contact"
        )
    graph = nx.DiGraph(plan.edges.tolist())
    if not nx.is_directed_acyclic_graph(graph):
        raise SizingError("SupportPlan.edges contain a cycle, so load cannot flow down to the feet; fix the routing")


class _Sizing(NamedTuple):
    tip_load: np.ndarray
    tip_side: np.ndarray
    tip_d: np.ndarray
    tension: np.ndarray
    compression: np.ndarray
    side: np.ndarray
    lever: np.ndarray
    diameter: np.ndarray
    buckling: np.ndarray
    length: np.ndarray
    k: np.ndarray
    runs: PostRuns
    run_need: np.ndarray  # (R,) buckling need before floors (mm)
    run_slender: np.ndarray  # (R,) K L / r at the chosen diameter
    node_side: np.ndarray
    node_comp: np.ndarray


def _size(plan: SupportPlan, tension_c, compression_c, side_c, settings: Settings, edge_floor=None) -> _Sizing:
    s, e_mod, sigma = settings.rules, settings.resin.green_modulus_mpa, settings.resin.green_tensile_mpa
    _, tension, tip_load = flow_loads(plan, tension_c)
    node_comp, compression, _ = flow_loads(plan, compression_c)
    node_side, side, tip_side = flow_loads(plan, side_c)
    contact_tip = plan.tip_contact >= 0
    tip_side = np.where(contact_tip, tip_side, 0.0)  # a landing tip passes a post's load, not the film's shear
    tip_d = tip_diameter(equivalent_tip_load(tip_load, tip_side), settings)
    held = held_nodes(plan)
    runs = post_runs(plan, held)
    lever = _levers(plan, held)
    length, k = runs.length[runs.edge_run], runs.k[runs.edge_run]
    need_b = required_post_diameter(compression, e_mod, sigma, length, k, s.safety_factor)
    need_t = required_tip_diameter(np.maximum(tension, compression), sigma, s.safety_factor)
    need_s = required_bending_diameter(np.maximum(tension, compression), side, lever, sigma, s.safety_factor)
    tip_floor = np.zeros(len(plan.nodes))
    np.maximum.at(tip_floor, plan.tip_nodes[contact_tip], tip_d[contact_tip])
    u, v = plan.edges[:, 0], plan.edges[:, 1]
    d = np.maximum.reduce(
        [
            need_b,
            need_t,
            need_s,
            np.full(len(u), 0.5 * s.post_diameter_mm),
            tip_floor[u],
            np.zeros(len(u)) if edge_floor is None else edge_floor,
        ]
    )
    for _ in range(len(d)):  # never thinner than what flows in from above: O(depth * E)
        inflow = np.zeros(len(plan.nodes))
        np.maximum.at(inflow, v, d)
        grown = np.maximum(d, inflow[u])
        if np.array_equal(grown, d):
            break
        d = grown
    n_runs = len(runs.length)
    run_need, run_d = np.zeros(n_runs), np.full(n_runs, np.inf)
    np.maximum.at(run_need, runs.edge_run, need_b)
    np.minimum.at(run_d, runs.edge_run, d)
    buckling = column_critical_load(e_mod, sigma, d, length, k)
    return _Sizing(
        tip_load,
        tip_side,
        tip_d,
        tension,
        compression,
        side,
        lever,
        d,
        buckling,
        length,
        k,
        runs,
        run_need,
        4.0 * runs.k * runs.length / run_d,
        node_side,
        node_comp,
    )


def _stats(a: np.ndarray) -> dict:
    if a.size == 0:
        return {"min": None, "median": None, "max": None}
    return {k: round(float(f(a)), 6) for k, f in (("min", np.min), ("median", np.median), ("max", np.max))}


def _num(x: float):
    return round(float(x), 6) if math.isfinite(x) else None


@dataclass(frozen=True)
class SizedPlan:
    """A support plan with every diameter sized, and the loads and margins behind them.

    Attributes
    ----------
    plan : SupportPlan
        New plan: ``tip_diameters`` and ``edge_radius`` set, braces added (edges
        may be split where braces attach; the edge arrays below follow it).
    tip_load_n, tip_capacity_n, tip_safety_factor : (T,) ndarray
        Peak tensile load, capacity at the chosen diameter, their ratio (inf when unloaded).
    tip_over : (T,) bool ndarray
        Tips that cannot reach the target safety factor at ``tip_max_mm``.
    edge_tension_n, edge_compression_n, edge_buckling_load_n, edge_safety_factor : (E,) ndarray
        Loads carried, failure load in compression (:func:`column_critical_load`),
        and the smaller of the tensile and compressive margins.
    edge_unbraced_length_mm, edge_k : (E,) ndarray
        Length and design K of the run each edge belongs to.
    target_safety_factor : float
    min_safety_factor : float
        Smallest margin of any tip, edge or brace by any check (inf when nothing is loaded).
    tips_over_capacity, braces_added : int
    tip_side_n, tip_side_safety_factor : (T,) ndarray
        Side load of each tip and the margin of its combined tension and peak shear
        (von Mises) against the green strength.
    edge_side_n, edge_lever_mm, edge_side_safety_factor : (E,) ndarray
        Side load through each edge, its lever arm, and the margin of axial plus
        bending stress at the edge's lower end.
    brace_load_n, brace_capacity_n, brace_safety_factor : (B,) ndarray
    """

    plan: SupportPlan
    tip_load_n: np.ndarray
    tip_capacity_n: np.ndarray
    tip_safety_factor: np.ndarray
    tip_over: np.ndarray
    edge_tension_n: np.ndarray
    edge_compression_n: np.ndarray
    edge_buckling_load_n: np.ndarray
    edge_safety_factor: np.ndarray
    edge_unbraced_length_mm: np.ndarray
    edge_k: np.ndarray
    target_safety_factor: float
    min_safety_factor: float
    tips_over_capacity: int
    braces_added: int
    tip_side_n: np.ndarray | None = None
    tip_side_safety_factor: np.ndarray | None = None
    edge_side_n: np.ndarray | None = None
    edge_lever_mm: np.ndarray | None = None
    edge_side_safety_factor: np.ndarray | None = None
    brace_load_n: np.ndarray | None = None
    brace_capacity_n: np.ndarray | None = None
    brace_safety_factor: np.ndarray | None = None

    def contacts_over_capacity(self, n_contacts: int) -> np.ndarray:
        """(n,) bool per contact: its tip is over capacity (input of :func:`densify_points`)."""
        out = np.zeros(n_contacts, bool)
        served = self.plan.tip_contact >= 0
        out[self.plan.tip_contact[served]] = self.tip_over[served]
        return out

    def to_dict(self) -> dict:
        """Plain values for the JSON report (``supports`` and ``forces`` sections draw on it)."""
        low = lambda a: _num(np.min(a, initial=np.inf)) if a is not None else None  # noqa: E731
        side = [a for a in (self.tip_side_safety_factor, self.edge_side_safety_factor) if a is not None]
        return {
            "tip_diameter_mm": _stats(self.plan.tip_diameters),
            "post_diameter_mm": _stats(2.0 * self.plan.edge_radius),
            "tip_load_n": _stats(self.tip_load_n),
            "target_safety_factor": _num(self.target_safety_factor),
            "min_safety_factor": _num(self.min_safety_factor),
            "min_tip_safety_factor": _num(np.min(self.tip_safety_factor, initial=np.inf)),
            "min_post_safety_factor": _num(np.min(self.edge_safety_factor, initial=np.inf)),
            "min_side_load_safety_factor": _num(min((np.min(a, initial=np.inf) for a in side), default=np.inf)),
            "min_tip_side_load_safety_factor": low(self.tip_side_safety_factor),
            "min_post_side_load_safety_factor": low(self.edge_side_safety_factor),
            "min_brace_safety_factor": low(self.brace_safety_factor),
            "tip_side_load_n": _stats(self.tip_side_n if self.tip_side_n is not None else np.zeros(0)),
            "tips_over_capacity": int(self.tips_over_capacity),
            "braces": int(len(self.plan.braces)),
            "braces_added": int(self.braces_added),
            "tips": {
                "load_n": [_num(x) for x in self.tip_load_n],
                "capacity_n": [_num(x) for x in self.tip_capacity_n],
                "safety_factor": [_num(x) for x in self.tip_safety_factor],
                "side_load_n": [_num(x) for x in (self.tip_side_n if self.tip_side_n is not None else [])],
                "side_load_safety_factor": [
                    _num(x) for x in (self.tip_side_safety_factor if self.tip_side_safety_factor is not None else [])
                ],
            },
        }


def _ratio(capacity: np.ndarray, load: np.ndarray) -> np.ndarray:
    with np.errstate(over="ignore"):
        return np.divide(capacity, load, out=np.full(load.shape, np.inf), where=load > 0)


def size_plan(
    plan: SupportPlan,
    contact_loads,
    settings: Settings,
    compression_loads=None,
    *,
    side_loads=None,
    max_brace_rounds: int = 3,
) -> SizedPlan:
    """Size every tip and post of a plan from the contacts' peak loads; brace slender posts.

    Parameters
    ----------
    plan : SupportPlan
        Acyclic graph of posts; load flows from ``edges[:, 0]`` to ``edges[:, 1]``.
    contact_loads : (n,) ndarray
        Peak tensile load of each contact (N), indexed by ``plan.tip_contact``.
    settings : Settings
        Green strength and modulus, safety factor, tip and post limits.
    compression_loads : (n,) ndarray, optional
        Peak squeeze of each contact when the plate comes down (N); defaults to
        ``contact_loads`` (Reynolds' film pressure is linear in the gap speed, so
        closing at the lift speed squeezes as hard as opening pulls).
    side_loads : (n,) ndarray, optional
        Peak horizontal load of each contact (N), e.g. a sliding film's shear;
        default none.  Tips take it in shear, posts in bending.
    max_brace_rounds : int
        Rounds of bracing and re-sizing; 0 sizes without adding braces.

    Returns
    -------
    SizedPlan

    Raises
    ------
    SizingError
        Negative or non-finite loads, too few loads, indices out of range, or a cycle.

    Notes
    -----
    Each round costs one sparse solve per load case and O(N + E) array work for
    the flow and sizing, plus O(R * E) for the brace search over R slender runs.
    Monotone in the loads for a fixed bracing: more load never gives a thinner
    tip or post.  Side loads: tip shear peak ``(4/3) 4 F / (pi d^2)`` combined with
    tension by von Mises; post bending ``32 F L / (pi d^3)`` (Roark) with ``L`` the
    height from the tips down to the section, added to the axial stress.

    References
    ----------
    Timoshenko & Gere, *Theory of Elastic Stability*, 1961 (Euler load); AISC
    Specification commentary, effective-length table (K); Shigley's
    *Mechanical Engineering Design*, columns chapter (Johnson parabola); Roark's
    *Formulas for Stress and Strain* (bending, shear).
    """
    tension_c = _loads(contact_loads, "contact_loads")
    compression_c = tension_c if compression_loads is None else _loads(compression_loads, "compression_loads")
    side_c = np.zeros_like(tension_c) if side_loads is None else _loads(side_loads, "side_loads")
    for name, arr in (("compression_loads", compression_c), ("side_loads", side_c)):
        if arr.shape != tension_c.shape:
            raise SizingError(
                f"{name} has shape {arr.shape}, contact_loads {tension_c.shape}; pass one value per contact"
            )
    _check_plan(plan, len(tension_c))
    added = 0
    sz = _size(plan, tension_c, compression_c, side_c, settings)
    for _ in range(max_brace_rounds):
        plan, n = add_braces(plan, sz.runs, sz.run_need, sz.run_slender, settings)
        if n == 0:
            break
        added += n
        sz = _size(plan, tension_c, compression_c, side_c, settings)
    floor = _brace_floor(plan.replace(edge_radius=sz.diameter / 2.0), sz, settings)
    if floor is not None:
        sz = _size(plan, tension_c, compression_c, side_c, settings, floor)
    s, sigma = settings.rules, settings.resin.green_tensile_mpa
    sized = plan.replace(tip_diameters=sz.tip_d, edge_radius=sz.diameter / 2.0)
    tip_cap = tip_capacity(sz.tip_d, sigma)
    tip_sf = _ratio(tip_cap, sz.tip_load)
    tip_side_sf = np.where(sz.tip_side > 0, _ratio(tip_cap, equivalent_tip_load(sz.tip_load, sz.tip_side)), np.inf)
    edge_sf = np.minimum(
        _ratio(tip_capacity(sz.diameter, sigma), np.maximum(sz.tension, sz.compression)),
        _ratio(sz.buckling, sz.compression),
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        stress = 4.0 * np.maximum(sz.tension, sz.compression) / (np.pi * sz.diameter**2) + bending_stress(
            sz.side, sz.lever, sz.diameter
        )
    edge_side_sf = np.where(sz.side > 0, _ratio(np.full(stress.shape, sigma), stress), np.inf)
    b_load, b_cap, _ = _brace_loads(sized, sz.node_side, sz.node_comp, settings)
    brace_sf = _ratio(b_cap, b_load)
    tip_over = over_capacity(equivalent_tip_load(sz.tip_load, sz.tip_side), settings)
    lowest = min(float(np.min(a, initial=np.inf)) for a in (tip_sf, edge_sf, tip_side_sf, edge_side_sf, brace_sf))
    return SizedPlan(
        sized,
        sz.tip_load,
        tip_cap,
        tip_sf,
        tip_over,
        sz.tension,
        sz.compression,
        sz.buckling,
        edge_sf,
        sz.length,
        sz.k,
        float(s.safety_factor),
        lowest,
        int(tip_over.sum()),
        added,
        sz.tip_side,
        tip_side_sf,
        sz.side,
        sz.lever,
        edge_side_sf,
        b_load,
        b_cap,
        brace_sf,
    )


def support_layer_forces(plan: SupportPlan, settings: Settings, n_layers: int = 0):
    """Separation force and area of the raft and post cross-sections in each layer (N, mm^2).

    The raft is taken as the union of discs of radius ``foot radius + base_margin_mm``
    around the feet (the outline :mod:`supportgen.supports.geometry` builds, without
    its closing between feet), ``base_thickness_mm`` thick from the plate; the posts
    as discs of their sized diameters where they cross each layer.  Each layer's
    force is the printer's separation law on those regions (posts: pull, or shear when sliding) (a disc's torsion constant is
    ``pi R^4 / 2``; the raft's is solved on a coarse grid): the record the rated-force
    check reads.  Layer ``k`` spans ``[k, k + 1) * layer_mm``.  With ``pads`` the
    base is one disc per foot.

    Returns
    -------
    force_n, area_mm2 : (L,) ndarrays
        ``L`` is the larger of ``n_layers`` and the layers the supports reach.

    Notes
    -----
    One Poisson solve of the raft outline (coarse factor as for a part layer) and
    O(L * E) for the posts.
    """
    from ..physics.pressure import coarse_factor, torsion_constant
    from ..physics.separation import LayerShape, pull_force, separation, slide_force

    pr, rules = settings.printer, settings.rules
    lh = pr.layer_mm
    top = float(plan.nodes[:, 2].max()) if len(plan.nodes) else 0.0
    n = max(int(n_layers), int(np.ceil(top / lh)) + 1 if len(plan.nodes) else 0)
    force, area = np.zeros(n), np.zeros(n)
    if n == 0 or len(plan.feet) == 0:
        return force, area
    foot_r = np.zeros(len(plan.nodes))
    if len(plan.edges):
        np.maximum.at(foot_r, plan.edges[:, 1], plan.edge_radius)
    r = foot_r[plan.feet] + rules.base_margin_mm
    xy = plan.nodes[plan.feet, :2]
    h = max(pr.pixel_mm, 0.05)
    lo, hi = (xy - r[:, None]).min(axis=0) - h, (xy + r[:, None]).max(axis=0) + h
    gx = np.arange(lo[0], hi[0], h)
    gy = np.arange(lo[1], hi[1], h)
    raft = np.zeros((gy.size, gx.size), bool)
    for (x, y), ri in zip(xy, r):
        c0, c1 = np.searchsorted(gx, [x - ri, x + ri])
        r0, r1 = np.searchsorted(gy, [y - ri, y + ri])
        yy, xx = np.meshgrid(gy[r0:r1], gx[c0:c1], indexing="ij")
        raft[r0:r1, c0:c1] |= (xx - x) ** 2 + (yy - y) ** 2 <= ri * ri
    from scipy import ndimage

    lab, m = ndimage.label(raft)
    a_raft = np.bincount(lab.ravel())[1:] * h * h
    j_raft = np.zeros(m)
    for i, sl in enumerate(ndimage.find_objects(lab)):
        crop = lab[sl] == i + 1
        p = np.pad(crop, 1)
        edges = int((p[1:, :] != p[:-1, :]).sum() + (p[:, 1:] != p[:, :-1]).sum())
        j_raft[i] = torsion_constant(crop, h, int(coarse_factor(crop.sum(), edges)))
    law = separation(pr.mechanism)  # the raft leaves the film like any layer: by the printer's mechanism
    f_raft = float(law(LayerShape(lab, h, a_raft, j_raft, origin=(gx[0], gy[0])), settings).sum())
    k_raft = int(np.ceil(rules.base_thickness_mm / lh))
    force[:k_raft] += f_raft
    area[:k_raft] += float(a_raft.sum())
    if len(plan.edges):
        zc = (np.arange(n) + 0.5) * lh
        za, zb = plan.nodes[plan.edges[:, 0], 2], plan.nodes[plan.edges[:, 1], 2]
        zlo, zhi = np.minimum(za, zb), np.maximum(za, zb)
        rr = plan.edge_radius
        for k in range(k_raft, n):
            cut = (zlo <= zc[k]) & (zhi > zc[k])
            if not cut.any():
                continue
            a = np.pi * rr[cut] ** 2
            shape = LayerShape(np.zeros((0, 0), np.int32), h, a, np.pi * rr[cut] ** 4 / 2.0)
            # posts are narrower than the peel band, so tilting takes them off like a pull
            force[k] += float((slide_force if pr.mechanism == "slide" else pull_force)(shape, settings).sum())
            area[k] += float(a.sum())
    return force, area
