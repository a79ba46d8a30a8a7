"""Bracing: which posts are held sideways, how long they are free to buckle, and where braces go.

The sizing stage (:mod:`supportgen.supports.sizing`) asks this module three things: whether
the part holds the tops of its posts from swaying, how the plan's edges group into
straight *runs* (the unbraced lengths that buckle as one column, with their
effective-length factor), and, for runs that come out too slender, where to add
braces.

* **Runs and end conditions.**  A run is a straight chain of edges between
  stations: feet, junctions where branches join or split, tip joints and held
  nodes.  A foot is fused to the base (fixed); tip cones and junctions are thin
  necks that pass little moment (pinned).  Vertical posts pinned to the part at
  their tops can all lean sideways together with the part: spreading their feet
  stops twisting, not this sway.  So a run counts as held at its top only where
  that node is *triangulated*: held by braces or leaning members (down-going
  edges) in two plan directions at least 45 degrees apart (:func:`held_nodes`).
  A run held at its top is fixed-pinned over its length (design K = 0.80) when it
  stands on a foot and pinned-pinned (K = 1.0) when it stands on a held node.
  Any other run sways: it is a fixed-free column (design K = 2.1) whose length
  runs on down through unheld junctions to the nearest foot or held node (a
  continuous post through a braced node restrains the run above it against
  rotation, our assumption).  The values come from :data:`EFFECTIVE_LENGTH`.
* **When to brace.**  A run that would need more than twice the post setting, or
  whose slenderness ``K L / r`` (``r = d / 4``) passes :data:`MAX_SLENDERNESS`, is
  braced: at its top when the top sways (that is what turns K = 2.1 into 0.8),
  otherwise at its mid-length.
* **Brace angle.**  Each brace runs from the braced point up or down to a
  neighbouring post (within four contact spacings and the run's length) at least
  :data:`BRACE_MIN_ANGLE_DEG` from horizontal, so it prints without support of its
  own; the cheapest (shortest) such point is taken.  A brace ends at an existing
  node or inside a vertical edge, never inside a leaning one: the joint ball the
  geometry stage puts at a new node would touch a leaning edge's surface at a
  point.  Braces are stored lower end first.
* **Two-direction restraint.**  One brace holds a post in its own plane only, so
  two braces are added, in plan directions at least 45 degrees apart, and a node
  counts as braced, and ends a run, only when held in two such directions.  That
  halves the unbraced length, and sizing is repeated.  A run with no two such
  neighbours (a row of posts) is not braced and simply grows thicker.
* Braces carry the side load of the node they hold (checked in
  :mod:`supportgen.supports.sizing`) and are not checked for clearance from the
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

__all__ = [
    "EFFECTIVE_LENGTH",
    "EffectiveLength",
    "MAX_SLENDERNESS",
    "BRACE_MIN_ANGLE_DEG",
    "LEAN_MIN_DEG",
    "PostRuns",
    "held_nodes",
    "post_runs",
    "add_braces",
]


class EffectiveLength(NamedTuple):
    """Effective-length factor K of a column: the theoretical value and the design value."""

    theoretical: float
    design: float


#: Effective-length factors by end conditions (lower end first), theoretical and
#: recommended design values [pub: AISC Specification commentary, effective-length
#: table for idealised end conditions; theoretical values from Timoshenko & Gere 1961].
#: Sizing uses the design values.
EFFECTIVE_LENGTH = MappingProxyType(
    {
        "fixed-fixed": EffectiveLength(0.5, 0.65),
        "fixed-pinned": EffectiveLength(0.7, 0.80),
        "pinned-pinned": EffectiveLength(1.0, 1.0),
        "fixed-free": EffectiveLength(2.0, 2.1),
    }
)

#: Largest slenderness K L / r of a compression member before a brace is added
#: [memory: AISC 360 user note to the compression chapter, "preferably not over 200"].
MAX_SLENDERNESS = 200.0

#: Least rise of a brace from horizontal, so that it prints without support of
#: its own (common practice: 45 degrees is self-supporting).
BRACE_MIN_ANGLE_DEG = 45.0


#: Least lean of a down-going edge from vertical for it to hold its upper node
#: sideways (a near-vertical leg adds no lateral stiffness); our choice.
LEAN_MIN_DEG = 10.0


class PostRuns(NamedTuple):
    edge_run: np.ndarray  # (E,) run of each edge
    chains: list  # per run: edge indices from top to bottom
    length: np.ndarray  # (R,) unbraced length (mm): the run, plus the sway length below a swaying run
    k: np.ndarray  # (R,) design effective-length factor
    top_held: np.ndarray  # (R,) bool: the run's top node is triangulated


def held_nodes(plan: SupportPlan) -> np.ndarray:
    """(N,) bool: nodes triangulated sideways in two plan directions at least 45 degrees apart.

    The members that can hold a node are its braces (either end) and its
    down-going edges that lean at least :data:`LEAN_MIN_DEG` from vertical, plus
    a vertical post below it.  A node is held when at least three such members
    meet there (a point in space needs three bars) and two of the leaning ones
    point in plan directions at least 45 degrees apart.  Cost O(N + E + B).
    """
    nodes = plan.nodes
    n = len(nodes)
    held = np.zeros(n, bool)
    braces = np.asarray(plan.braces, int).reshape(-1, 2)
    ends = np.concatenate([braces, braces[:, ::-1], np.asarray(plan.edges, int).reshape(-1, 2)])
    if n == 0 or ends.size == 0:
        return held
    d = nodes[ends[:, 1]] - nodes[ends[:, 0]]
    flat = np.hypot(d[:, 0], d[:, 1])
    horiz = flat / np.maximum(np.linalg.norm(d, axis=1), EPS_ZERO)
    is_edge = np.arange(len(ends)) >= 2 * len(braces)
    lateral = ~is_edge | (horiz >= math.sin(math.radians(LEAN_MIN_DEG)))  # members that hold sideways
    members = np.bincount(ends[:, 0], minlength=n)  # any member, a vertical post too
    cand = np.flatnonzero((members >= 3) & (np.bincount(ends[lateral, 0], minlength=n) >= 2))
    dxy = d[:, :2] / np.maximum(flat, EPS_ZERO)[:, None]
    for node in cand:
        u = dxy[(ends[:, 0] == node) & lateral]
        cross = np.abs(u[:, None, 0] * u[None, :, 1] - u[:, None, 1] * u[None, :, 0])
        held[node] = bool(np.any(cross >= math.sin(math.radians(45.0)) - EPS_REL))
    return held


def post_runs(plan: SupportPlan, held: np.ndarray | None = None) -> PostRuns:
    """Split the edges into straight runs between stations; K and length by restraint. Cost O(depth * E).

    ``held``: (N,) bool from :func:`held_nodes` (computed when None).
    """
    nodes, edges = plan.nodes, plan.edges
    n = len(nodes)
    held = held_nodes(plan) if held is None else np.asarray(held, bool)
    indeg = np.bincount(edges[:, 1], minlength=n)
    outdeg = np.bincount(edges[:, 0], minlength=n)
    station = (indeg != 1) | (outdeg != 1) | held
    station[plan.tip_nodes] = True
    station[plan.feet] = True
    out_edge = np.full(n, -1)
    out_edge[edges[:, 0]] = np.arange(len(edges))
    seg = np.linalg.norm(nodes[edges[:, 0]] - nodes[edges[:, 1]], axis=1)
    is_foot = np.zeros(n, bool)
    is_foot[plan.feet] = True
    grounded = is_foot | held
    # sway length below each node: 0 at feet and held nodes, else the longest way down to one
    sway = np.zeros(n)
    for _ in range(max(len(edges), 1)):
        cand = np.zeros(n)
        np.maximum.at(cand, edges[:, 0], seg + sway[edges[:, 1]])
        cand[grounded] = 0.0
        if np.array_equal(cand, sway):
            break
        sway = cand
    edge_run = np.full(len(edges), -1)
    chains, lengths, k, tops = [], [], [], []
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
        run_len = seg[chain].sum()
        top = bool(held[edges[chain[0], 0]])
        if top and grounded[v]:
            lengths.append(run_len)
            k.append(EFFECTIVE_LENGTH["fixed-pinned" if is_foot[v] else "pinned-pinned"].design)
        else:
            lengths.append(run_len + sway[v])
            k.append(EFFECTIVE_LENGTH["fixed-free"].design)
        tops.append(top)
    return PostRuns(edge_run, chains, np.array(lengths), np.array(k), np.array(tops, bool))


def _vertical(a, b) -> np.ndarray:
    """Edges from ``a`` to ``b`` that are vertical to within float32 resolution."""
    return np.hypot(*(b - a)[:, :2].T) <= 1e-6 * np.maximum(np.abs(b - a)[:, 2], 1.0)


def _brace_targets(m, nodes, edges, cand, reach, gap, margin):
    """Two braces from point ``m`` up or down to ``cand`` edges in plan directions >= 45 deg apart, or None.

    Each is ``(edge, t)``: the cheapest (shortest) feasible point sampled on the edges.
    """
    if cand.size == 0:
        return None
    t = np.linspace(0.0, 1.0, 33)
    a, b = nodes[edges[cand, 0]], nodes[edges[cand, 1]]
    rel = a[:, None, :] + t[None, :, None] * (b - a)[:, None, :] - m
    h = np.hypot(rel[..., 0], rel[..., 1])
    ok = (np.abs(rel[..., 2]) >= h * math.tan(math.radians(BRACE_MIN_ANGLE_DEG)) + margin) & (h >= gap) & (h <= reach)
    # a brace may land inside a vertical edge only: the joint ball the geometry stage puts
    # at a new node on a leaning edge touches that edge's surface tangentially (a pinch)
    ok[~_vertical(a, b), 1:-1] = False
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


def add_braces(
    plan: SupportPlan, runs: PostRuns, run_need: np.ndarray, run_slender: np.ndarray, settings: Settings
) -> tuple[SupportPlan, int]:
    """Brace every run that is too slender, in two directions. Cost O(R * E).

    ``runs`` as from :func:`post_runs`; ``run_need`` and ``run_slender`` per run: its
    buckling need before floors (mm) and ``K L / r`` at the chosen diameter.  A run
    whose top sways is braced at its top; a run held at its top, at mid-length.
    Returns the new plan and the number of braces added.
    """
    s = settings.rules
    flagged = np.flatnonzero((run_need > 2.0 * s.post_diameter_mm) | (run_slender > MAX_SLENDERNESS))
    tol = settings.printer.pixel_mm
    seg = np.linalg.norm(plan.nodes[plan.edges[:, 0]] - plan.nodes[plan.edges[:, 1]], axis=1)
    ends = plan.nodes[plan.edges]
    lo, hi = ends.min(axis=1), ends.max(axis=1)  # bounding box of each edge, to cut the search
    requests, pairs, tops = [], [], set()
    # runs already joined by a brace, either way: a second brace between the same two
    # posts would cross the first in their common plane (and add no new direction)
    partners: dict[int, set] = {}
    if len(plan.braces):
        node_run = np.full(len(plan.nodes), -1)
        node_run[plan.edges[:, 0]] = runs.edge_run
        node_run[plan.edges[:, 1]] = np.where(node_run[plan.edges[:, 1]] < 0, runs.edge_run, node_run[plan.edges[:, 1]])
        for a, b in node_run[plan.braces]:
            partners.setdefault(int(a), set()).add(int(b))
            partners.setdefault(int(b), set()).add(int(a))
    for r in flagged:
        chain = runs.chains[r]
        cum = np.cumsum(seg[chain])
        if not runs.top_held[r]:
            top = int(plan.edges[chain[0], 0])
            if top in tops:
                continue
            tops.add(top)
            j, t_at = 0, 0.0
        else:
            j = int(np.searchsorted(cum, cum[-1] / 2.0))
            t_at = 1.0 - (cum[j] - cum[-1] / 2.0) / seg[chain[j]]
            if not _vertical(*plan.nodes[plan.edges[chain[j]]][:, None, :])[0]:
                continue  # no new node on a leaning edge (see _brace_targets)
        a, b = plan.nodes[plan.edges[chain[j]]]
        m = a + t_at * (b - a)
        reach = min(max(cum[-1], runs.length[r]), 4.0 * s.contact_spacing_mm)  # neighbours only
        box = (
            (hi[:, 2] >= m[2] - 2.0 * reach)
            & (lo[:, 2] <= m[2] + 2.0 * reach)
            & np.all(lo[:, :2] <= m[:2] + reach, axis=1)
            & np.all(hi[:, :2] >= m[:2] - reach, axis=1)
        )
        cand = np.flatnonzero(box & ~np.isin(plan.edges, plan.edges[chain]).any(axis=1))
        cand = cand[~np.isin(runs.edge_run[cand], list(partners.get(int(r), ())))]
        found = _brace_targets(m, plan.nodes, plan.edges, cand, reach, s.post_diameter_mm, 3.0 * tol)
        if found is None:
            continue
        for e, _ in found:
            other = int(runs.edge_run[e])
            partners.setdefault(int(r), set()).add(other)
            partners.setdefault(other, set()).add(int(r))
        base = len(requests)
        requests += [(int(chain[j]), t_at), *found]
        pairs += [(base, base + 1), (base, base + 2)]
    if not pairs:
        return plan, 0
    nodes, edges, radius, req_node = _split_edges(plan, requests, tol)
    new = req_node[np.array(pairs)]
    new = new[new[:, 0] != new[:, 1]]
    swap = nodes[new[:, 0], 2] > nodes[new[:, 1], 2]
    new[swap] = new[swap][:, ::-1]  # lower end first
    # two requests can land on the same pair of nodes (points within a pixel of a node
    # reuse it): one brace there, as the first of them
    braces = np.concatenate([plan.braces.reshape(-1, 2), new])
    _, first = np.unique(np.sort(braces, axis=1), axis=0, return_index=True)
    braces = braces[np.sort(first)]
    if len(braces) == len(plan.braces):
        return plan, 0
    return plan.replace(nodes=nodes, edges=edges, edge_radius=radius, braces=braces), len(braces) - len(plan.braces)
