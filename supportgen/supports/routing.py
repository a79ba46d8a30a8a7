"""Routing: contacts led through free space down to the base, merging into trunks.

The ``tree`` strategy (:func:`plan_tree`) works in three steps:

1. *Tips.*  Each contact gets a cone that leaves the part along its outward
   normal blended with -z (tilted no more than the branch angle) and ends at the
   first node, placed where the part is at least the clearance away.
2. *Cone merging* (Vanek, Galicia & Benes 2014).  Every node may only be
   supported from inside the downward cone of half-angle ``branch_angle_deg``
   below it.  The highest open node is joined to the partner (another open
   node, or an upright trunk already standing on the base) at the highest point
   the two cones share, when that saves material and the new segments keep
   the clearance; otherwise it drops straight to the base.
3. *Free-space graph.*  Nodes whose straight drop is blocked by the part are
   routed through a coarse lattice of free space (nodes at least the clearance
   from the part, strictly downward edges within the branch angle, edge cost =
   material + a penalty passed in; searched with scipy's Dijkstra) to the base,
   or, where no path reaches the base, to a landing tip on the part's upper
   surface below.

Distances to the part come from :class:`Clearance`: a k-d tree over points
sampled on every triangle, corrected by the samples' covering radius so that
every "clear" answer is a proof, never an estimate.  It and the lattice of
step 3 live in :mod:`supportgen.supports.freespace` (re-exported here).
"""

from __future__ import annotations

import math

import networkx as nx
import numpy as np
import trimesh
from scipy import sparse
from scipy.sparse import csgraph

from ..constants import EPS_REL, EPS_SMALL, EPS_ZERO
from .freespace import Clearance, FreeLattice, Penalty, clearance_field, edge_cost, free_space_graph, free_space_lattice
from .plan import Contacts, SupportPlan

__all__ = ["Clearance", "clearance_field", "free_space_graph", "plan_tree"]

_MIN_DROP = 1e-3  # mm: every segment falls at least this much (strictly downward edges)


def _tip_ends(contacts: Contacts, s, field: Clearance) -> tuple[np.ndarray, np.ndarray]:
    """First node of each tip, and whether one was found.

    The tip runs along the outward normal blended with -z, tilted at most the branch angle;
    its length grows from ``tip_length_mm`` until the node clears the part.  Cost: O(n log m).
    """
    n = len(contacts)
    p, nrm = contacts.points, contacts.normals
    down = np.array([0.0, 0.0, -1.0])
    d = nrm / np.maximum(np.linalg.norm(nrm, axis=1, keepdims=True), EPS_ZERO) + down
    d[np.linalg.norm(d, axis=1) < EPS_SMALL] = down
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    cap = math.tan(math.radians(s.branch_angle_deg))
    horiz = np.linalg.norm(d[:, :2], axis=1)
    fall = np.maximum(-d[:, 2], 0.0)
    scale = np.where(horiz > cap * fall, cap * np.maximum(fall, EPS_ZERO) / np.maximum(horiz, EPS_ZERO), 1.0)
    d[:, :2] *= scale[:, None]
    d[fall == 0] = down
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    need = s.clearance_mm + field.step / 2
    first = max(s.tip_length_mm, need)
    end = np.full((n, 3), np.nan)
    found = np.zeros(n, bool)
    for direction in (d, np.broadcast_to(down, (n, 3))):
        leaves = np.einsum("ij,ij->i", direction, nrm) > 0.05
        for length in first * np.array([1.0, 1.5, 2.0, 3.0, 4.0]):
            cand = p + length * direction
            mid = p + 0.5 * length * direction
            ok = (
                ~found
                & leaves
                & (cand[:, 2] >= s.base_thickness_mm + _MIN_DROP)
                & (field.lower(cand, need) >= need)
                & (field.lower(mid, need) > 0)
            )
            end[ok], found[ok] = cand[ok], True
    return end, found


class _Builder:
    """Nodes and edges of a plan under construction (private, lives inside one call)."""

    def __init__(self):
        self.nodes, self.edges, self.feet, self.landings = [], set(), [], {}

    def node(self, xyz) -> int:
        self.nodes.append(np.asarray(xyz, float))
        return len(self.nodes) - 1

    def edge(self, upper: int, lower: int):
        if upper != lower:
            self.edges.add((upper, lower))


def _merge(tips: np.ndarray, s, field: Clearance, cost, b: _Builder):
    """Cone merging of Vanek et al. (2014), greedy on material saved.

    Returns the node ids that could not drop to the base and need the free-space graph.
    Cost: O(n^2) vector work and O(n) segment checks for n tips.
    """
    t = math.tan(math.radians(s.branch_angle_deg)) * (1 - EPS_REL)
    z0 = s.base_thickness_mm
    area = math.pi * (s.post_diameter_mm / 2) ** 2
    pos = tips.copy()
    ids = np.array([b.node(p) for p in tips], int)
    alive = np.ones(len(pos), bool)
    trunks: list[list[int]] = []  # node ids on each upright trunk, its foot last
    trunk_xyz = np.zeros((0, 3))  # x, y of each trunk and the height of its top
    blocked = []

    def ground(q):
        return np.column_stack([q[:, 0], q[:, 1], np.full(len(q), z0)])

    def down(q):
        return edge_cost(q, ground(q), area, cost)

    while alive.any():
        i = int(np.flatnonzero(alive)[np.argmax(pos[alive, 2])])
        alive[i] = False
        p = pos[i]
        others = np.flatnonzero(alive)
        q = pos[others]
        dz = p[2] - q[:, 2]
        dxy = np.linalg.norm(q[:, :2] - p[:2], axis=1)
        inside = dxy <= dz * t
        zm = np.where(inside, q[:, 2], (p[2] + q[:, 2] - dxy / max(t, EPS_ZERO)) / 2)
        zm = np.where(inside, zm, np.minimum(zm, q[:, 2] - _MIN_DROP))
        inside &= dz >= _MIN_DROP
        frac = np.where(dxy > EPS_ZERO, np.minimum((p[2] - zm) * t / np.maximum(dxy, EPS_ZERO), 1.0), 0.0)
        m = np.column_stack([p[:2] + (q[:, :2] - p[:2]) * frac[:, None], zm])
        m[inside] = q[inside]
        pp = np.broadcast_to(p, m.shape)
        gain = (
            down(p[None])[0]
            + down(q)
            - edge_cost(pp, m, area, cost)
            - np.where(inside, down(q), edge_cost(q, m, area, cost) + down(m))
        )
        gain[(zm <= z0 + _MIN_DROP) | (p[2] - zm < _MIN_DROP)] = -np.inf
        # joining an upright trunk already standing on the base
        tdxy = np.linalg.norm(trunk_xyz[:, :2] - p[:2], axis=1)
        tz = np.minimum(p[2] - tdxy / max(t, EPS_ZERO), trunk_xyz[:, 2])
        tm = np.column_stack([trunk_xyz[:, :2], tz])
        tgain = down(p[None])[0] - edge_cost(np.broadcast_to(p, tm.shape), tm, area, cost)
        tgain[(tz <= z0 + _MIN_DROP) | (p[2] - tz < _MIN_DROP)] = -np.inf
        allg = np.concatenate([gain, tgain])
        order = np.argsort(-allg, kind="stable")[:8]
        order = order[allg[order] > 0]
        # the new segments of each candidate, as (owner, upper, lower)
        segs = [(k, p, m[k]) for k in order if k < len(gain)]
        segs += [(k, q[k], m[k]) for k in order if k < len(gain) and not inside[k]]
        segs += [(k, p, tm[k - len(gain)]) for k in order if k >= len(gain)]
        ok = field.clear(
            np.array([u for _, u, _ in segs]).reshape(-1, 3), np.array([v for _, _, v in segs]).reshape(-1, 3)
        )
        bad = {k for (k, _, _), fine in zip(segs, ok) if not fine}
        good = [k for k in order if k not in bad]
        if good and good[0] < len(gain):
            k = good[0]
            j = others[k]
            if inside[k]:
                b.edge(ids[i], ids[j])
            else:
                mid = b.node(m[k])
                b.edge(ids[i], mid)
                b.edge(ids[j], mid)
                pos[j], ids[j] = m[k], mid
        elif good:
            k = good[0] - len(gain)
            chain = trunks[k]
            zs = np.array([b.nodes[c][2] for c in chain])
            same = np.flatnonzero((zs <= tz[k]) & (zs > tz[k] - _MIN_DROP))
            if len(same):
                b.edge(ids[i], chain[same[0]])
            else:
                mid = b.node(tm[k])
                chain.insert(int(np.searchsorted(-zs, -tz[k])), mid)
                b.edge(ids[i], mid)
        elif field.clear(p[None], ground(p[None]))[0]:
            foot = b.node(ground(p[None])[0])
            b.feet.append(foot)
            trunks.append([ids[i], foot])
            trunk_xyz = np.vstack([trunk_xyz, p])
        else:
            blocked.append(int(ids[i]))
    for chain in trunks:
        for u, v in zip(chain[:-1], chain[1:]):
            b.edge(u, v)
    return blocked


def _ways_down(lat: FreeLattice, avoid=None) -> dict:
    """Each kept lattice node's cheapest way down, per sink: ``{sink: (dist, next)}``.

    ``dist`` and ``next`` are indexed by position in ``lat.kept``; ``next`` is the next
    node's position on the way (-1: the way ends here, on the base or at a landing), and
    ``dist`` is inf where the sink is not reached.  One Dijkstra search over the reversed
    edges (``scipy.sparse.csgraph.dijkstra``) from the bottom layer for ``"base"`` (all at
    distance 0) and from a landing sink for ``"land"``.  ``avoid(hits)`` drops landings.
    """
    n, at = len(lat.kept), lat.at
    src, dst = at[lat.src], at[lat.dst]
    out = {}
    if len(lat.bottom):
        rev = sparse.csr_matrix((lat.weight, (dst, src)), shape=(n, n))
        dist, pred = csgraph.dijkstra(rev, indices=at[lat.bottom], min_only=True, return_predecessors=True)[:2]
        out["base"] = (dist, np.where(pred < 0, -1, pred))
    land, w = lat.land, lat.land_weight
    if avoid is not None and len(land):
        ok = ~np.asarray(avoid(lat.land_hit), bool)
        land, w = land[ok], w[ok]
    if len(land):
        sink = n  # the landing sink, one past the nodes
        rev = sparse.csr_matrix(
            (
                np.concatenate([lat.weight, w]),
                (np.concatenate([dst, np.full(len(land), sink)]), np.concatenate([src, at[land]])),
            ),
            shape=(n + 1, n + 1),
        )
        dist, pred = csgraph.dijkstra(rev, indices=sink, return_predecessors=True)
        out["land"] = (dist[:n], np.where((pred[:n] < 0) | (pred[:n] == sink), -1, pred[:n]))
    return out


def _route_blocked(mesh, settings, field, cost, b: _Builder, blocked, step_mm, max_nodes, avoid=None):
    """Route nodes whose straight drop is blocked through the free-space lattice.

    Each node joins the lattice nodes of the two layers below it inside its cone; one
    reverse Dijkstra per sink (:func:`_ways_down`) gives every lattice node its cheapest
    way down, so routes that meet share their way from there.  Returns the nodes left
    unrouted.  Cost: O(E + V log V) for the two searches on a lattice of V nodes and E edges.
    """
    s = settings.rules
    start = np.array([b.nodes[i] for i in blocked])
    lo = np.minimum(mesh.bounds[0], start.min(axis=0)) - 2 * s.clearance_mm - s.tip_length_mm
    hi = np.maximum(mesh.bounds[1], start.max(axis=0)) + 2 * s.clearance_mm + s.tip_length_mm
    hi[2] = start[:, 2].max()
    lat = free_space_lattice(mesh, settings, field, np.array([lo, hi]), step_mm=step_mm, cost=cost, max_nodes=max_nodes)
    hz, pitch, origin, shape = lat.step, lat.pitch, lat.origin, lat.shape
    at = lat.at
    hit_of = {int(at[n]): h for n, h in zip(lat.land, lat.land_hit)}
    search = _ways_down(lat, avoid)
    t = math.tan(math.radians(s.branch_angle_deg))
    area = math.pi * (s.post_diameter_mm / 2) ** 2
    lattice_node: dict[int, int] = {}
    unrouted = []
    for nid, p in zip(blocked, start):
        kz = int(math.ceil((p[2] - _MIN_DROP - origin[2]) / hz)) - 1
        cands = []
        for k in (kz, kz - 1, kz - 2):
            if k < 0 or k >= shape[2]:
                continue
            reach = (p[2] - (origin[2] + k * hz)) * t
            i0, j0 = np.floor((p[:2] - reach - origin[:2]) / pitch).astype(int)
            i1, j1 = np.ceil((p[:2] + reach - origin[:2]) / pitch).astype(int)
            i, j = np.meshgrid(
                np.arange(max(i0, 0), min(i1, shape[0] - 1) + 1),
                np.arange(max(j0, 0), min(j1, shape[1] - 1) + 1),
                indexing="ij",
            )
            flat = ((i * shape[1] + j) * shape[2] + k).ravel()
            flat = flat[at[flat] >= 0]
            near = np.linalg.norm(lat.pos[flat, :2] - p[:2], axis=1) <= reach * (1 - EPS_REL)
            cands.extend(at[flat[near]].tolist())
        chosen = None
        if cands:
            cands = np.array(cands)
            cpos = lat.pos[lat.kept[cands]]
            ok = field.clear(np.broadcast_to(p, cpos.shape), cpos)
            first = edge_cost(np.broadcast_to(p, cpos.shape), cpos, area, cost)
            for sink in ("base", "land"):
                if sink not in search:
                    continue
                total = np.where(ok, first + search[sink][0][cands], np.inf)
                if np.isfinite(total).any():
                    chosen = (int(cands[int(np.argmin(total))]), sink)
                    break
        if chosen is None:
            unrouted.append(nid)
            continue
        n, sink = chosen
        nxt = search[sink][1]
        upper = nid
        while n >= 0:
            if n not in lattice_node:
                lattice_node[n] = b.node(lat.pos[lat.kept[n]])
            b.edge(upper, lattice_node[n])
            upper = lattice_node[n]
            if nxt[n] < 0:  # the way ends here
                if sink == "base":
                    b.feet.append(upper)
                else:
                    b.landings[upper] = hit_of[n]
            n = int(nxt[n])
    return unrouted


def plan_tree(
    mesh: trimesh.Trimesh,
    contacts: Contacts,
    settings,
    *,
    cost: Penalty | None = None,
    graph_step_mm: float | None = None,
    max_graph_nodes: int = 60_000,
    avoid=None,
) -> SupportPlan:
    """Branching supports: contacts merged into trunks that stand on the base or land on the part.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part, already lifted: its lowest point ``elevation_mm`` above the plate.
    contacts : Contacts
        Where tips touch the part, with outward normals and tip diameters.
    settings : Settings
        Uses ``supports.clearance_mm``, ``branch_angle_deg``, ``tip_length_mm``,
        ``post_diameter_mm``, ``tip_diameter_mm`` and ``base_thickness_mm`` (base top).
    cost : callable, optional
        ``cost(upper, lower) -> penalty``: (k, 3) upper and lower ends of k candidate segments
        to (k,) penalties in mm^3, added to each segment's material ``length * pi r^2``.
        Default: material only.
    graph_step_mm : float, optional
        Layer height of the free-space lattice used for blocked routes (coarser is faster).
    max_graph_nodes : int
        Node budget of that lattice.
    avoid : callable, optional
        ``avoid(points) -> bool`` per (k, 3) landing point: True where no post may stand
        (a protected face); such landings are removed from the lattice.

    Returns
    -------
    SupportPlan
        ``strategy="tree"``; every post segment falls strictly and within the branch angle and
        keeps the clearance (proven by :class:`Clearance`); every tip reaches a foot or a landing
        (``tip_contact == -1``).  Contacts with no clear way down (a tip buried in a crevice, or
        walled in) are left out: compare ``tip_contact`` with ``range(len(contacts))``.

    Raises
    ------
    SettingsError
        If the clearance is not positive.

    Notes
    -----
    Cone merging after Vanek et al.: each node may be held only from inside the downward cone
    of half-angle ``branch_angle_deg`` below it; the highest open node joins the partner whose
    shared cone apex (or upright trunk) saves the most material, else drops to the base.  We
    rank partners by material saved rather than by apex height, and hand nodes whose drop is
    blocked to a free-space graph (:func:`free_space_graph`) searched once per sink with
    Dijkstra.  Cost: O(A / c^2) surface samples for area A and clearance c; O(n^2) vector work
    and O(n) segment checks for n contacts; O(E + V log V) on the lattice when it is needed.

    References
    ----------
    .. [1] J. Vanek, J. A. G. Galicia and B. Benes, "Clever Support: Efficient Support
       Structure Generation for Digital Fabrication", Computer Graphics Forum 33(5),
       pp. 117-125, 2014. doi:10.1111/cgf.12437

    Examples
    --------
    >>> from supportgen.settings import Settings
    >>> plate = trimesh.creation.box((20, 20, 2))
    >>> _ = plate.apply_translation((0, 0, 16))
    >>> xy = np.array([[-6, -6], [-6, 6], [6, -6], [6, 6]], float)
    >>> c = Contacts(np.column_stack([xy, np.full(4, 15.0)]), np.tile([0, 0, -1.0], (4, 1)),
    ...              np.full(4, "overhang"), np.full(4, 0.4))
    >>> plan = plan_tree(plate, c, Settings())
    >>> sorted(plan.tip_contact.tolist()), plan.landings
    ([0, 1, 2, 3], 0)
    >>> bool(plan.segment_length() < 4 * (15.0 - 1.5 - 1.0))
    True
    """
    s = settings.rules
    field = clearance_field(mesh, s.clearance_mm)
    b = _Builder()
    tips, found = _tip_ends(contacts, s, field)
    served = np.flatnonzero(found)
    # _merge makes the first nodes first, so served tip i sits on node i
    blocked = _merge(tips[served], s, field, cost, b) if len(served) else []
    if blocked:
        _route_blocked(mesh, settings, field, cost, b, blocked, graph_step_mm, max_graph_nodes, avoid)
    nodes = np.array(b.nodes).reshape(-1, 3)
    edges = np.array(sorted(b.edges), int).reshape(-1, 2)
    land_nodes = np.array(sorted(b.landings), int)
    # keep what reaches the base or a landing: follow edges upward from the ends
    g = nx.DiGraph()
    g.add_nodes_from(range(len(nodes)))
    g.add_edges_from(map(tuple, edges))
    ends = set(b.feet) | set(land_nodes.tolist())
    good = set(ends)
    for e in ends:
        good |= nx.ancestors(g, e)
    keep_edge = np.array([u in good and v in good for u, v in edges], bool).reshape(-1)
    tip_ok = np.array([i in good for i in range(len(served))], bool).reshape(-1)
    land_pts = np.array([b.landings[n] for n in land_nodes]).reshape(-1, 3)
    return SupportPlan(
        strategy="tree",
        nodes=nodes,
        edges=edges[keep_edge],
        edge_radius=np.full(int(keep_edge.sum()), s.post_diameter_mm / 2),
        tip_points=np.concatenate([contacts.points[served][tip_ok], land_pts]),
        tip_nodes=np.concatenate([np.arange(len(served))[tip_ok], land_nodes]),
        tip_diameters=np.concatenate([contacts.diameters[served][tip_ok], np.full(len(land_nodes), s.tip_diameter_mm)]),
        tip_contact=np.concatenate([served[tip_ok], np.full(len(land_nodes), -1)]),
        feet=np.array(sorted(set(b.feet)), int),
    )
