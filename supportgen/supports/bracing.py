"""Bracing: which posts are held sideways, how long they are free to buckle, and where braces go.

The sizing stage (:mod:`supportgen.supports.sizing`) asks this module three things: whether
the part holds the tops of its posts from swaying, how the plan's edges group into
straight *runs* (the unbraced lengths that buckle as one column, with their
effective-length factor), and, for runs that come out too slender, where to add
braces.

* **Runs and end conditions.**  A run is a straight chain of edges between
  stations: feet, junctions where branches join or split, tip joints and braced
  nodes.  A foot is fused to the base (fixed); tip cones and junctions are thin
  necks that pass little moment (pinned).  When the part stands on at least three
  feet that are not in one line (RMS spread of at least one post diameter both
  ways), the part and the base hold the tops from swaying, so a foot run is
  fixed-pinned (design K = 0.80) and any other run pinned-pinned (K = 1.0).
  Otherwise the whole part can sway on its posts and every run is taken as
  fixed-free (design K = 2.1).  The values come from :data:`EFFECTIVE_LENGTH`.
* **When to brace.**  A run that would need more than twice the post setting, or
  whose slenderness ``K L / r`` (``r = d / 4``) passes :data:`MAX_SLENDERNESS`, is
  braced at its mid-length.
* **Brace angle.**  Each brace rises from the run's mid-point to a neighbouring
  post (within four contact spacings and the run's length) at least
  :data:`BRACE_MIN_ANGLE_DEG` from horizontal, so it prints without support of its
  own; the cheapest (shortest) such point is taken.
* **Two-direction restraint.**  One brace holds a post in its own plane only, so
  two braces are added, in plan directions at least 45 degrees apart, and a node
  counts as braced, and ends a run, only when held in two such directions.  That
  halves the unbraced length, and sizing is repeated.  A run with no two such
  neighbours (a row of posts) is not braced and simply grows thicker.
* Braces carry no load in the model and are not checked for clearance from the
  part: they lie between posts, below the tips they serve.  Where a brace meets a
  post between nodes the edge is split (points closer than a pixel to an existing
  node reuse it).

References
----------
AISC Specification commentary, effective-length table for idealised end
conditions (design K); S. P. Timoshenko and J. M. Gere, *Theory of Elastic
Stability*, 2nd ed., 1961 (theoretical K); AISC 360 user note to the compression
chapter, slenderness "preferably not over 200" [memory].  The 45 degree
self-supporting brace is common practice.
"""

from __future__ import annotations

import math
from types import MappingProxyType
from typing import NamedTuple

import numpy as np

from ..constants import EPS_REL, EPS_ZERO
from ..settings import Settings
from .plan import SupportPlan

__all__ = ["EFFECTIVE_LENGTH", "EffectiveLength", "MAX_SLENDERNESS", "BRACE_MIN_ANGLE_DEG", "PostRuns", "sway_held",
           "post_runs", "add_braces"]


class EffectiveLength(NamedTuple):
    """Effective-length factor K of a column: the theoretical value and the design value."""

    theoretical: float
    design: float


#: Effective-length factors by end conditions (lower end first), theoretical and
#: recommended design values [pub: AISC Specification commentary, effective-length
#: table for idealised end conditions; theoretical values from Timoshenko & Gere 1961].
#: Sizing uses the design values.
EFFECTIVE_LENGTH = MappingProxyType({
    "fixed-fixed": EffectiveLength(0.5, 0.65),
    "fixed-pinned": EffectiveLength(0.7, 0.80),
    "pinned-pinned": EffectiveLength(1.0, 1.0),
    "fixed-free": EffectiveLength(2.0, 2.1),
})

#: Largest slenderness K L / r of a compression member before a brace is added
#: [memory: AISC 360 user note to the compression chapter, "preferably not over 200"].
MAX_SLENDERNESS = 200.0

#: Least rise of a brace from horizontal, so that it prints without support of
#: its own (common practice: 45 degrees is self-supporting).
BRACE_MIN_ANGLE_DEG = 45.0


class PostRuns(NamedTuple):
    edge_run: np.ndarray      # (E,) run of each edge
    chains: list              # per run: edge indices from top to bottom
    length: np.ndarray        # (R,) unbraced length (mm, along the edges)
    k: np.ndarray             # (R,) design effective-length factor


def _restrained(nodes: np.ndarray, braces: np.ndarray) -> np.ndarray:
    """Nodes held sideways by braces in two plan directions at least 45 degrees apart."""
    held = np.zeros(len(nodes), bool)
    if len(braces) == 0:
        return held
    ends = np.concatenate([braces, braces[:, ::-1]])
    dxy = nodes[ends[:, 1], :2] - nodes[ends[:, 0], :2]
    dxy /= np.maximum(np.linalg.norm(dxy, axis=1, keepdims=True), EPS_ZERO)
    for node in np.unique(ends[:, 0]):
        d = dxy[ends[:, 0] == node]
        cross = np.abs(d[:, None, 0] * d[None, :, 1] - d[:, None, 1] * d[None, :, 0])
        held[node] = bool(np.any(cross >= math.sin(math.radians(45.0)) - EPS_REL))
    return held


def sway_held(plan: SupportPlan, settings: Settings) -> bool:
    """True when at least three feet span an area (RMS spread >= one post diameter both ways)."""
    if len(plan.feet) < 3:
        return False
    xy = plan.nodes[plan.feet, :2]
    spread = np.linalg.svd(xy - xy.mean(axis=0), compute_uv=False) / math.sqrt(len(xy))
    return bool(spread[-1] >= settings.rules.post_diameter_mm)


def post_runs(plan: SupportPlan, restrained: bool) -> PostRuns:
    """Split the edges into straight runs between stations. Cost O(N + E)."""
    nodes, edges = plan.nodes, plan.edges
    n = len(nodes)
    indeg = np.bincount(edges[:, 1], minlength=n)
    outdeg = np.bincount(edges[:, 0], minlength=n)
    station = (indeg != 1) | (outdeg != 1) | _restrained(nodes, plan.braces)
    station[plan.tip_nodes] = True
    station[plan.feet] = True
    out_edge = np.full(n, -1)
    out_edge[edges[:, 0]] = np.arange(len(edges))
    seg = np.linalg.norm(nodes[edges[:, 0]] - nodes[edges[:, 1]], axis=1)
    is_foot = np.zeros(n, bool)
    is_foot[plan.feet] = True
    edge_run = np.full(len(edges), -1)
    chains, lengths, k = [], [], []
    for e in np.flatnonzero(station[edges[:, 0]]):
        chain, cur = [], int(e)
        while True:
            chain.append(cur)
            edge_run[cur] = len(chains)
            v = edges[cur, 1]
            if station[v]:
                break
            cur = int(out_edge[v])
        chains.append(np.array(chain))
        lengths.append(seg[chain].sum())
        end = "fixed-pinned" if is_foot[v] else "pinned-pinned"
        k.append(EFFECTIVE_LENGTH[end if restrained else "fixed-free"].design)
    return PostRuns(edge_run, chains, np.array(lengths), np.array(k))


def _brace_targets(m, nodes, edges, cand, reach, gap, margin):
    """Two braces from point ``m`` up to ``cand`` edges in plan directions >= 45 deg apart, or None.

    Each is ``(edge, t)``: the cheapest (shortest) feasible point sampled on the edges.
    """
    if cand.size == 0:
        return None
    t = np.linspace(0.0, 1.0, 33)
    a, b = nodes[edges[cand, 0]], nodes[edges[cand, 1]]
    rel = a[:, None, :] + t[None, :, None] * (b - a)[:, None, :] - m
    h = np.hypot(rel[..., 0], rel[..., 1])
    ok = (rel[..., 2] >= h * math.tan(math.radians(BRACE_MIN_ANGLE_DEG)) + margin) & (h >= gap) & (h <= reach)
    if not ok.any():
        return None
    cost = np.where(ok, np.sqrt(h**2 + rel[..., 2] ** 2), np.inf)
    i, j = np.unravel_index(np.argmin(cost), cost.shape)
    first = rel[i, j, :2] / h[i, j]
    cross = np.abs(rel[..., 0] * first[1] - rel[..., 1] * first[0]) / np.maximum(h, EPS_ZERO)
    cost[cross < math.sin(math.radians(45.0))] = np.inf
    i2, j2 = np.unravel_index(np.argmin(cost), cost.shape)
    if not np.isfinite(cost[i2, j2]):
        return None
    return (int(cand[i]), float(t[j])), (int(cand[i2]), float(t[j2]))


def _split_edges(plan: SupportPlan, requests, tol: float):
    """Insert nodes on edges at fractions ``t``; returns new nodes, edges, radii and each request's node."""
    nodes, by_edge = list(plan.nodes), {}
    for i, (e, t) in enumerate(requests):
        by_edge.setdefault(e, []).append((t, i))
    req_node = np.zeros(len(requests), int)
    new_edges, new_radius = [], []
    for e, (a, b) in enumerate(plan.edges):
        chain, last_t = [int(a)], 0.0
        seg = float(np.linalg.norm(plan.nodes[b] - plan.nodes[a]))
        for t, i in sorted(by_edge.get(e, [])):
            if (1.0 - t) * seg <= tol:
                req_node[i] = b
            elif (t - last_t) * seg <= tol:
                req_node[i] = chain[-1]
            else:
                nodes.append(plan.nodes[a] + t * (plan.nodes[b] - plan.nodes[a]))
                chain.append(len(nodes) - 1)
                req_node[i], last_t = chain[-1], t
        chain.append(int(b))
        new_edges += list(zip(chain[:-1], chain[1:]))
        new_radius += [plan.edge_radius[e]] * (len(chain) - 1)
    return np.array(nodes), np.array(new_edges, int).reshape(-1, 2), np.array(new_radius), req_node


def add_braces(plan: SupportPlan, chains: list, run_need: np.ndarray, run_slender: np.ndarray,
                settings: Settings) -> tuple[SupportPlan, int]:
    """Brace every run that is too slender, at mid-length, in two directions. Cost O(R * E).

    ``chains``, ``run_need`` and ``run_slender`` are per run (see :class:`PostRuns`): its edges from top
    to bottom, its buckling need before floors (mm) and ``K L / r`` at the chosen diameter.
    Returns the new plan and the number of braces added.
    """
    s = settings.rules
    flagged = np.flatnonzero((run_need > 2.0 * s.post_diameter_mm) | (run_slender > MAX_SLENDERNESS))
    tol = settings.printer.pixel_mm
    seg = np.linalg.norm(plan.nodes[plan.edges[:, 0]] - plan.nodes[plan.edges[:, 1]], axis=1)
    ends = plan.nodes[plan.edges]
    lo, hi = ends.min(axis=1), ends.max(axis=1)    # bounding box of each edge, to cut the search
    requests, pairs = [], []
    for r in flagged:
        chain = chains[r]
        cum = np.cumsum(seg[chain])
        j = int(np.searchsorted(cum, cum[-1] / 2.0))
        t_mid = 1.0 - (cum[j] - cum[-1] / 2.0) / seg[chain[j]]
        a, b = plan.nodes[plan.edges[chain[j]]]
        m = a + t_mid * (b - a)
        reach = min(cum[-1], 4.0 * s.contact_spacing_mm)   # neighbours only; brace no longer than the run
        box = ((hi[:, 2] >= m[2]) & (lo[:, 2] <= m[2] + 2.0 * reach)
               & np.all(lo[:, :2] <= m[:2] + reach, axis=1) & np.all(hi[:, :2] >= m[:2] - reach, axis=1))
        cand = np.flatnonzero(box & ~np.isin(plan.edges, plan.edges[chain]).any(axis=1))
        args = (m, plan.nodes, plan.edges, cand, reach, s.post_diameter_mm, 3.0 * tol)
        found = _brace_targets(*args)
        if found is None:
            continue
        base = len(requests)
        requests += [(int(chain[j]), t_mid), *found]
        pairs += [(base, base + 1), (base, base + 2)]
    if not pairs:
        return plan, 0
    nodes, edges, radius, req_node = _split_edges(plan, requests, tol)
    braces = np.concatenate([plan.braces, req_node[np.array(pairs)]])
    return plan.replace(nodes=nodes, edges=edges, edge_radius=radius, braces=braces), len(pairs)
