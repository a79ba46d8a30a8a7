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
    post_runs,
    sway_held,
)
from .contacts import densify_points
from .plan import SupportPlan

__all__ = [
    "EFFECTIVE_LENGTH", "EffectiveLength", "MAX_SLENDERNESS", "BRACE_MIN_ANGLE_DEG", "SizingError",
    "SizedPlan", "tip_capacity", "required_tip_diameter", "tip_diameter", "over_capacity",
    "euler_critical_load", "johnson_critical_load", "column_critical_load", "required_post_diameter",
    "flow_loads", "size_plan", "densify_points",
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
    return np.where(lam >= lam_c, euler_critical_load(E_mpa, d, L_mm, K),
                    johnson_critical_load(E_mpa, sigma_mpa, d, L_mm, K))


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
    for name, idx in (("edges", plan.edges.ravel()), ("tip_nodes", plan.tip_nodes), ("feet", plan.feet),
                      ("braces", plan.braces.ravel())):
        if idx.size and (idx.min() < 0 or idx.max() >= n):
            raise SizingError(f"SupportPlan.{name} refers to a node outside 0..{n - 1}; rebuild the plan")
    if plan.tip_contact.size and plan.tip_contact.max() >= n_contacts:
        raise SizingError(f"SupportPlan.tip_contact refers to contact {plan.tip_contact.max()} but only "
                          f"{n_contacts} contact loads were given; pass one load per contact")
    graph = nx.DiGraph(plan.edges.tolist())
    if not nx.is_directed_acyclic_graph(graph):
        raise SizingError("SupportPlan.edges contain a cycle, so load cannot flow down to the feet; fix the routing")


class _Sizing(NamedTuple):
    tip_load: np.ndarray
    tip_d: np.ndarray
    tension: np.ndarray
    compression: np.ndarray
    diameter: np.ndarray
    buckling: np.ndarray
    length: np.ndarray
    k: np.ndarray
    runs: PostRuns
    run_need: np.ndarray      # (R,) buckling need before floors (mm)
    run_slender: np.ndarray   # (R,) K L / r at the chosen diameter


def _size(plan: SupportPlan, tension_c, compression_c, settings: Settings) -> _Sizing:
    s, e_mod, sigma = settings.rules, settings.resin.green_modulus_mpa, settings.resin.green_tensile_mpa
    _, tension, tip_load = flow_loads(plan, tension_c)
    _, compression, _ = flow_loads(plan, compression_c)
    tip_d = tip_diameter(tip_load, settings)
    runs = post_runs(plan, sway_held(plan, settings))
    length, k = runs.length[runs.edge_run], runs.k[runs.edge_run]
    need_b = required_post_diameter(compression, e_mod, sigma, length, k, s.safety_factor)
    need_t = required_tip_diameter(np.maximum(tension, compression), sigma, s.safety_factor)
    contact_tip = plan.tip_contact >= 0
    tip_floor = np.zeros(len(plan.nodes))
    np.maximum.at(tip_floor, plan.tip_nodes[contact_tip], tip_d[contact_tip])
    u, v = plan.edges[:, 0], plan.edges[:, 1]
    d = np.maximum.reduce([need_b, need_t, np.full(len(u), 0.5 * s.post_diameter_mm), tip_floor[u]])
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
    return _Sizing(tip_load, tip_d, tension, compression, d, buckling, length, k, runs,
                   run_need, 4.0 * runs.k * runs.length / run_d)


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
        Smallest margin of any tip or edge (inf when nothing is loaded).
    tips_over_capacity, braces_added : int
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

    def contacts_over_capacity(self, n_contacts: int) -> np.ndarray:
        """(n,) bool per contact: its tip is over capacity (input of :func:`densify_points`)."""
        out = np.zeros(n_contacts, bool)
        served = self.plan.tip_contact >= 0
        out[self.plan.tip_contact[served]] = self.tip_over[served]
        return out

    def to_dict(self) -> dict:
        """Plain values for the JSON report (``supports`` and ``forces`` sections draw on it)."""
        return {
            "tip_diameter_mm": _stats(self.plan.tip_diameters),
            "post_diameter_mm": _stats(2.0 * self.plan.edge_radius),
            "tip_load_n": _stats(self.tip_load_n),
            "target_safety_factor": _num(self.target_safety_factor),
            "min_safety_factor": _num(self.min_safety_factor),
            "min_tip_safety_factor": _num(np.min(self.tip_safety_factor, initial=np.inf)),
            "min_post_safety_factor": _num(np.min(self.edge_safety_factor, initial=np.inf)),
            "tips_over_capacity": int(self.tips_over_capacity),
            "braces": int(len(self.plan.braces)),
            "braces_added": int(self.braces_added),
            "tips": {"load_n": [_num(x) for x in self.tip_load_n],
                     "capacity_n": [_num(x) for x in self.tip_capacity_n],
                     "safety_factor": [_num(x) for x in self.tip_safety_factor]},
        }


def _ratio(capacity: np.ndarray, load: np.ndarray) -> np.ndarray:
    with np.errstate(over="ignore"):
        return np.divide(capacity, load, out=np.full(load.shape, np.inf), where=load > 0)


def size_plan(plan: SupportPlan, contact_loads, settings: Settings, compression_loads=None,
              *, max_brace_rounds: int = 3) -> SizedPlan:
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
    Each round costs one sparse solve and O(N + E) array work for the flow and
    sizing, plus O(R * E) for the brace search over R slender runs.  Monotone
    in the loads for a fixed bracing: more load never gives a thinner tip or post.

    References
    ----------
    Timoshenko & Gere, *Theory of Elastic Stability*, 1961 (Euler load); AISC
    Specification commentary, effective-length table (K); Shigley's
    *Mechanical Engineering Design*, columns chapter (Johnson parabola).
    """
    tension_c = _loads(contact_loads, "contact_loads")
    compression_c = tension_c if compression_loads is None else _loads(compression_loads, "compression_loads")
    if compression_c.shape != tension_c.shape:
        raise SizingError(f"compression_loads has shape {compression_c.shape}, contact_loads "
                          f"{tension_c.shape}; pass one value per contact")
    _check_plan(plan, len(tension_c))
    added = 0
    sz = _size(plan, tension_c, compression_c, settings)
    for _ in range(max_brace_rounds):
        plan, n = add_braces(plan, sz.runs.chains, sz.run_need, sz.run_slender, settings)
        if n == 0:
            break
        added += n
        sz = _size(plan, tension_c, compression_c, settings)
    s, sigma = settings.rules, settings.resin.green_tensile_mpa
    sized = plan.replace(tip_diameters=sz.tip_d, edge_radius=sz.diameter / 2.0)
    tip_cap = tip_capacity(sz.tip_d, sigma)
    tip_sf = _ratio(tip_cap, sz.tip_load)
    edge_sf = np.minimum(_ratio(tip_capacity(sz.diameter, sigma), np.maximum(sz.tension, sz.compression)),
                         _ratio(sz.buckling, sz.compression))
    tip_over = over_capacity(sz.tip_load, settings)
    return SizedPlan(sized, sz.tip_load, tip_cap, tip_sf, tip_over, sz.tension, sz.compression, sz.buckling,
                     edge_sf, sz.length, sz.k, float(s.safety_factor),
                     float(min(np.min(tip_sf, initial=np.inf), np.min(edge_sf, initial=np.inf))),
                     int(tip_over.sum()), added)


