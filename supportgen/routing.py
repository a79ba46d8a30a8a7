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
   routed through a coarse networkx lattice of free space (nodes at least the
   clearance from the part, strictly downward edges within the branch angle,
   edge cost = material + a penalty passed in) to the base, or, where no path
   reaches the base, to a landing tip on the part's upper surface below.

Distances to the part come from :class:`Clearance`: a k-d tree over points
sampled on every triangle, corrected by the samples' covering radius so that
every "clear" answer is a proof, never an estimate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import networkx as nx
import numpy as np
import trimesh
from scipy.spatial import cKDTree

from .errors import SettingsError
from .plan import Contacts, SupportPlan

__all__ = ["Clearance", "clearance_field", "free_space_graph", "plan_tree"]

#: ``cost(upper, lower) -> penalty``: (k, 3) upper and lower segment ends to (k,) extra cost (mm^3).
Penalty = Callable[[np.ndarray, np.ndarray], np.ndarray]

_MIN_DROP = 1e-3  # mm: every segment falls at least this much (strictly downward edges)


@dataclass(frozen=True)
class Clearance:
    """Certified lower bounds of the distance from points to a mesh surface.

    Attributes
    ----------
    tree : scipy.spatial.cKDTree
        Points sampled on every triangle.
    slack : float
        Covering radius of the samples: every surface point lies within it of a sample (mm).
    step : float
        Spacing of the samples taken along a segment when checking it (mm).
    clearance : float
        Distance that posts must keep from the part (mm).
    """

    tree: cKDTree
    slack: float
    step: float
    clearance: float

    def lower(self, points: np.ndarray, upto: float = np.inf) -> np.ndarray:
        """Lower bound of each point's distance to the surface (capped near ``upto``)."""
        d, _ = self.tree.query(np.asarray(points, float).reshape(-1, 3), distance_upper_bound=upto + self.slack)
        return d - self.slack

    def clear(self, upper: np.ndarray, lower: np.ndarray) -> np.ndarray:
        """Whether each segment ``upper[i] -> lower[i]`` keeps the clearance, proven.

        The distance to a surface is 1-Lipschitz, so samples spaced at most
        ``step`` apart that each clear ``clearance + step / 2`` prove the whole segment.
        A clear segment never meets the surface, so both ends lie on the same side of it:
        routes that start outside the part stay outside.
        """
        a = np.asarray(upper, float).reshape(-1, 3)
        b = np.asarray(lower, float).reshape(-1, 3)
        if len(a) == 0:
            return np.zeros(0, bool)
        counts = np.ceil(np.linalg.norm(b - a, axis=1) / self.step).astype(int) + 1
        seg = np.repeat(np.arange(len(a)), counts)
        first = np.cumsum(counts) - counts
        t = (np.arange(len(seg)) - first[seg]) / np.maximum(counts[seg] - 1, 1)
        pts = a[seg] + (b - a)[seg] * t[:, None]
        need = self.clearance + self.step / 2
        ok = self.lower(pts, need) >= need
        return np.logical_and.reduceat(ok, first)


def clearance_field(mesh: trimesh.Trimesh, clearance: float, spacing: float | None = None,
                    max_samples: int = 3_000_000) -> Clearance:
    """Sample the surface of ``mesh`` for certified clearance queries.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part.
    clearance : float
        Least distance posts keep from the part (mm).
    spacing : float, optional
        Largest sub-edge of the barycentric sampling of each triangle; default ``clearance / 4``.
    max_samples : int
        The spacing grows until the samples fit this budget.

    Returns
    -------
    Clearance

    Notes
    -----
    A triangle split ``k`` times per edge is covered by sub-triangles similar to it,
    so every point lies within ``longest_sub_edge / sqrt(3)`` of a sample (the slack).
    Cost: O(A / spacing^2) samples for surface area A, O(m log m) to build the tree;
    a query is O(log m).

    Examples
    --------
    >>> f = clearance_field(trimesh.creation.box((2, 2, 2)), 0.5)
    >>> bool(f.lower(np.array([[0.0, 0.0, 3.0]]))[0] <= 2.0)
    True
    """
    if not clearance > 0:
        raise SettingsError(f"clearance {clearance!r} mm must be positive; set clearance_mm above zero")
    tri = np.asarray(mesh.triangles, float)
    longest = np.linalg.norm(tri - np.roll(tri, 1, axis=1), axis=2).max(axis=1)
    s = clearance / 4 if spacing is None else float(spacing)
    while True:
        k = np.maximum(np.ceil(longest / s), 1).astype(int)
        if ((k + 1) * (k + 2) // 2).sum() <= max_samples or s > longest.max():
            break
        s *= 1.25
    chunks = []
    for kk in np.unique(k):
        i, j = np.meshgrid(np.arange(kk + 1), np.arange(kk + 1), indexing="ij")
        keep = i + j <= kk
        w = np.stack([kk - i[keep] - j[keep], i[keep], j[keep]], axis=1) / kk
        chunks.append(np.einsum("wv,tvc->twc", w, tri[k == kk]).reshape(-1, 3))
    slack = float((longest / k).max() / math.sqrt(3))
    return Clearance(cKDTree(np.concatenate(chunks)), slack, clearance / 4, float(clearance))


def _hits_below(mesh: trimesh.Trimesh, xy: np.ndarray, col: np.ndarray, z: np.ndarray):
    """First surface crossing straight below each query (column ``col`` of ``xy``, height ``z``).

    Returns the crossing heights (nan where none) and whether the face there looks up.
    Cost: O(F + hits) with a k-d tree over the columns.
    """
    tri = np.asarray(mesh.triangles, float)
    up = np.asarray(mesh.face_normals)[:, 2]
    centre = tri[:, :, :2].mean(axis=1)
    radius = np.linalg.norm(tri[:, :, :2] - centre[:, None], axis=2).max(axis=1) + 1e-9
    near = cKDTree(xy).query_ball_point(centre, radius, return_sorted=False)
    counts = np.fromiter((len(n) for n in near), int, len(near))
    f = np.repeat(np.arange(len(tri)), counts)
    c = np.fromiter((i for n in near for i in n), int, counts.sum())
    a, b, d = tri[f, 0], tri[f, 1], tri[f, 2]
    p = xy[c]
    e1, e2, q = (b - a)[:, :2], (d - a)[:, :2], p - a[:, :2]
    det = e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0]
    ok = np.abs(det) > 1e-12
    det = np.where(ok, det, 1.0)
    u = (q[:, 0] * e2[:, 1] - q[:, 1] * e2[:, 0]) / det
    v = (e1[:, 0] * q[:, 1] - e1[:, 1] * q[:, 0]) / det
    ok &= (u >= -1e-9) & (v >= -1e-9) & (u + v <= 1 + 1e-9)
    zc = a[:, 2] + u * (b - a)[:, 2] + v * (d - a)[:, 2]
    c, zc, fu = c[ok], zc[ok], up[f[ok]] > 0
    span = float(np.ptp(np.concatenate([zc, z])) + 1.0) if len(zc) else 1.0
    base = min(zc.min(), z.min()) if len(zc) else 0.0
    key = c * span + (zc - base)
    order = np.argsort(key)
    key, zc, fu, c = key[order], zc[order], fu[order], c[order]
    idx = np.searchsorted(key, col * span + (z - base) - 1e-9) - 1
    found = (idx >= 0) & (c[np.maximum(idx, 0)] == col) if len(c) else np.zeros(len(z), bool)
    idx = np.maximum(idx, 0)
    hit = np.where(found, zc[idx] if len(zc) else np.nan, np.nan)
    return hit, found & (fu[idx] if len(fu) else False)


def _edge_cost(upper, lower, area, cost):
    material = area * np.linalg.norm(np.asarray(lower) - np.asarray(upper), axis=-1)
    return material if cost is None else material + np.asarray(cost(upper, lower), float)


def free_space_graph(mesh: trimesh.Trimesh, settings, field: Clearance, bounds: np.ndarray, *,
                     step_mm: float | None = None, cost: Penalty | None = None,
                     max_nodes: int = 60_000) -> nx.DiGraph:
    """A lattice of free space: downward edges within the branch angle, clear of the part.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The lifted part.
    settings : Settings
        Uses ``supports.clearance_mm``, ``branch_angle_deg``, ``base_thickness_mm``,
        ``post_diameter_mm`` and ``tip_length_mm``.
    field : Clearance
        Distance queries for ``mesh``.
    bounds : (2, 3) ndarray
        Box to cover; the lattice starts at the base top.
    step_mm : float, optional
        Height between lattice layers; default the larger of 2 x clearance and the tip length,
        raised until the lattice fits ``max_nodes``.
    cost : callable, optional
        Penalty ``cost(upper, lower)`` on (k, 3) arrays, added to each edge's material.
    max_nodes : int
        Node budget of the lattice.

    Returns
    -------
    networkx.DiGraph
        Integer nodes with ``pos``; edges (upper, lower) with ``weight``; sink ``"base"``
        reached from the bottom layer at zero cost, sink ``"land"`` from nodes with the part's
        upper surface at most ``tip_length + step`` below (``weight`` = landing tip material,
        ``hit`` = landing point).  Graph attributes ``step``, ``pitch``, ``origin``, ``shape``.

    Notes
    -----
    A layer holds an x-y grid of pitch ``step tan(angle) / sqrt(2)``, so each node reaches the
    nine nodes below it at angles within the limit.  Edges whose ends clear
    ``clearance + length / 2`` are clear by the distance being 1-Lipschitz; the rest are checked
    by sampling.  Cost: O(V) nodes, O(9 V) edges, each edge O(length / step) queries of O(log m).
    """
    s = settings.supports
    t = math.tan(math.radians(s.branch_angle_deg))
    z0 = s.base_thickness_mm
    lo, hi = np.asarray(bounds, float)
    hz = step_mm or max(2 * s.clearance_mm, s.tip_length_mm)
    while True:
        pitch = hz * t / math.sqrt(2) * (1 - 1e-9) if t > 1e-6 else hz
        shape = (np.maximum(np.ceil((hi[:2] - lo[:2]) / pitch), 0).astype(int) + 1).tolist() + \
            [int(max(math.floor((hi[2] - z0) / hz), 0)) + 1]
        if math.prod(shape) <= max_nodes:
            break
        hz *= 1.2
    origin = np.array([lo[0], lo[1], z0])
    ijk = np.indices(shape).reshape(3, -1).T
    pos = origin + ijk * np.array([pitch, pitch, hz])
    dist = field.lower(pos, s.clearance_mm + hz)
    keep = dist >= s.clearance_mm + field.step / 2
    lid = np.full(len(pos), -1)
    lid[keep] = np.arange(keep.sum())
    g = nx.DiGraph(step=hz, pitch=pitch, origin=origin, shape=tuple(shape))
    nodes = np.flatnonzero(keep)
    g.add_nodes_from((int(n), {"pos": pos[n]}) for n in nodes)
    grid = lid.reshape(shape) >= 0
    area = math.pi * (s.post_diameter_mm / 2) ** 2
    offsets = [(di, dj) for di in (-1, 0, 1) for dj in (-1, 0, 1) if t > 1e-6 or di == dj == 0]
    flat = np.arange(len(pos)).reshape(shape)
    for di, dj in offsets:
        src = flat[max(0, -di):shape[0] - max(0, di), max(0, -dj):shape[1] - max(0, dj), 1:]
        dst = flat[max(0, di):shape[0] - max(0, -di), max(0, dj):shape[1] - max(0, -dj), :-1]
        src, dst = src.ravel(), dst.ravel()
        both = grid.ravel()[src] & grid.ravel()[dst]
        src, dst = src[both], dst[both]
        length = np.linalg.norm(pos[src] - pos[dst], axis=1)
        sure = np.minimum(dist[src], dist[dst]) >= s.clearance_mm + length / 2
        sure[~sure] = field.clear(pos[src[~sure]], pos[dst[~sure]])
        src, dst = src[sure], dst[sure]
        w = _edge_cost(pos[src], pos[dst], area, cost)
        g.add_weighted_edges_from(zip(src.tolist(), dst.tolist(), w.tolist()))
    bottom = nodes[ijk[nodes, 2] == 0]
    g.add_edges_from(((int(n), "base", {"weight": 0.0}) for n in bottom))
    if len(nodes):
        cols = ijk[nodes, 0] * shape[1] + ijk[nodes, 1]
        xy = origin[:2] + np.indices(shape[:2]).reshape(2, -1).T * pitch
        hit, up = _hits_below(mesh, xy, cols, pos[nodes, 2])
        drop = pos[nodes, 2] - hit
        land = up & (drop <= s.tip_length_mm + hz) & (hit > z0)
        tip_area = math.pi * (s.tip_diameter_mm / 2) ** 2
        for n, h, d in zip(nodes[land], hit[land], drop[land]):
            g.add_edge(int(n), "land", weight=float(tip_area * d), hit=np.array([*pos[n, :2], h]))
    return g


def _tip_ends(contacts: Contacts, s, field: Clearance) -> tuple[np.ndarray, np.ndarray]:
    """First node of each tip, and whether one was found.

    The tip runs along the outward normal blended with -z, tilted at most the branch angle;
    its length grows from ``tip_length_mm`` until the node clears the part.  Cost: O(n log m).
    """
    n = len(contacts)
    p, nrm = contacts.points, contacts.normals
    down = np.array([0.0, 0.0, -1.0])
    d = nrm / np.maximum(np.linalg.norm(nrm, axis=1, keepdims=True), 1e-12) + down
    d[np.linalg.norm(d, axis=1) < 1e-6] = down
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    cap = math.tan(math.radians(s.branch_angle_deg))
    horiz = np.linalg.norm(d[:, :2], axis=1)
    fall = np.maximum(-d[:, 2], 0.0)
    scale = np.where(horiz > cap * fall, cap * np.maximum(fall, 1e-12) / np.maximum(horiz, 1e-12), 1.0)
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
            ok = (~found & leaves & (cand[:, 2] >= s.base_thickness_mm + _MIN_DROP)
                  & (field.lower(cand, need) >= need) & (field.lower(mid, need) > 0))
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
    t = math.tan(math.radians(s.branch_angle_deg)) * (1 - 1e-9)
    z0 = s.base_thickness_mm
    area = math.pi * (s.post_diameter_mm / 2) ** 2
    pos = tips.copy()
    ids = np.array([b.node(p) for p in tips], int)
    alive = np.ones(len(pos), bool)
    trunks: list[list[int]] = []          # node ids on each upright trunk, its foot last
    trunk_xyz = np.zeros((0, 3))          # x, y of each trunk and the height of its top
    blocked = []

    def ground(q):
        return np.column_stack([q[:, 0], q[:, 1], np.full(len(q), z0)])

    def down(q):
        return _edge_cost(q, ground(q), area, cost)

    while alive.any():
        i = int(np.flatnonzero(alive)[np.argmax(pos[alive, 2])])
        alive[i] = False
        p = pos[i]
        others = np.flatnonzero(alive)
        q = pos[others]
        dz = p[2] - q[:, 2]
        dxy = np.linalg.norm(q[:, :2] - p[:2], axis=1)
        inside = dxy <= dz * t
        zm = np.where(inside, q[:, 2], (p[2] + q[:, 2] - dxy / max(t, 1e-12)) / 2)
        zm = np.where(inside, zm, np.minimum(zm, q[:, 2] - _MIN_DROP))
        inside &= dz >= _MIN_DROP
        frac = np.where(dxy > 1e-12, np.minimum((p[2] - zm) * t / np.maximum(dxy, 1e-12), 1.0), 0.0)
        m = np.column_stack([p[:2] + (q[:, :2] - p[:2]) * frac[:, None], zm])
        m[inside] = q[inside]
        pp = np.broadcast_to(p, m.shape)
        gain = down(p[None])[0] + down(q) - _edge_cost(pp, m, area, cost) - np.where(
            inside, down(q), _edge_cost(q, m, area, cost) + down(m))
        gain[(zm <= z0 + _MIN_DROP) | (p[2] - zm < _MIN_DROP)] = -np.inf
        # joining an upright trunk already standing on the base
        tdxy = np.linalg.norm(trunk_xyz[:, :2] - p[:2], axis=1)
        tz = np.minimum(p[2] - tdxy / max(t, 1e-12), trunk_xyz[:, 2])
        tm = np.column_stack([trunk_xyz[:, :2], tz])
        tgain = down(p[None])[0] - _edge_cost(np.broadcast_to(p, tm.shape), tm, area, cost)
        tgain[(tz <= z0 + _MIN_DROP) | (p[2] - tz < _MIN_DROP)] = -np.inf
        allg = np.concatenate([gain, tgain])
        order = np.argsort(-allg, kind="stable")[:8]
        order = order[allg[order] > 0]
        # the new segments of each candidate, as (owner, upper, lower)
        segs = [(k, p, m[k]) for k in order if k < len(gain)]
        segs += [(k, q[k], m[k]) for k in order if k < len(gain) and not inside[k]]
        segs += [(k, p, tm[k - len(gain)]) for k in order if k >= len(gain)]
        ok = field.clear(np.array([u for _, u, _ in segs]).reshape(-1, 3),
                         np.array([v for _, _, v in segs]).reshape(-1, 3))
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


def _route_blocked(mesh, settings, field, cost, b: _Builder, blocked, step_mm, max_nodes):
    """Route nodes whose straight drop is blocked through the free-space graph.

    Each node joins the lattice nodes of the two layers below it inside its cone; one
    reverse Dijkstra per sink gives every lattice node its cheapest way down, so routes
    that meet share their way from there.  Returns the nodes left unrouted.
    Cost: O(E + V log V) for the two searches on a lattice of V nodes and E edges.
    """
    s = settings.supports
    start = np.array([b.nodes[i] for i in blocked])
    lo = np.minimum(mesh.bounds[0], start.min(axis=0)) - 2 * s.clearance_mm - s.tip_length_mm
    hi = np.maximum(mesh.bounds[1], start.max(axis=0)) + 2 * s.clearance_mm + s.tip_length_mm
    hi[2] = start[:, 2].max()
    g = free_space_graph(mesh, settings, field, np.array([lo, hi]), step_mm=step_mm, cost=cost,
                         max_nodes=max_nodes)
    hz, pitch, origin, shape = g.graph["step"], g.graph["pitch"], g.graph["origin"], g.graph["shape"]
    rev = g.reverse(copy=False)
    search = {sink: nx.dijkstra_predecessor_and_distance(rev, sink) for sink in ("base", "land")
              if sink in g}
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
            for i in range(max(i0, 0), min(i1, shape[0] - 1) + 1):
                for j in range(max(j0, 0), min(j1, shape[1] - 1) + 1):
                    n = (i * shape[1] + j) * shape[2] + k
                    if n in g and np.linalg.norm(g.nodes[n]["pos"][:2] - p[:2]) <= reach * (1 - 1e-9):
                        cands.append(n)
        chosen = None
        if cands:
            cpos = np.array([g.nodes[n]["pos"] for n in cands])
            ok = field.clear(np.broadcast_to(p, cpos.shape), cpos)
            first = _edge_cost(np.broadcast_to(p, cpos.shape), cpos, area, cost)
            for sink in ("base", "land"):
                if sink not in search:
                    continue
                dist = search[sink][1]
                total = np.array([first[c] + dist.get(n, np.inf) if ok[c] else np.inf
                                  for c, n in enumerate(cands)])
                if np.isfinite(total).any():
                    chosen = (cands[int(np.argmin(total))], sink)
                    break
        if chosen is None:
            unrouted.append(nid)
            continue
        n, sink = chosen
        pred = search[sink][0]
        upper = nid
        while n != sink:
            if n not in lattice_node:
                lattice_node[n] = b.node(g.nodes[n]["pos"])
            b.edge(upper, lattice_node[n])
            upper, nxt = lattice_node[n], pred[n][0]
            if nxt == "base":
                b.feet.append(upper)
            elif nxt == "land":
                b.landings[upper] = g.edges[n, "land"]["hit"]
            n = nxt
    return unrouted



def plan_tree(mesh: trimesh.Trimesh, contacts: Contacts, settings, *, cost: Penalty | None = None,
              graph_step_mm: float | None = None, max_graph_nodes: int = 60_000) -> SupportPlan:
    """Branching supports: contacts merged into trunks that stand on the base or land on the part.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part, already lifted: its lowest point ``lift_mm`` above the plate.
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
    s = settings.supports
    field = clearance_field(mesh, s.clearance_mm)
    b = _Builder()
    tips, found = _tip_ends(contacts, s, field)
    served = np.flatnonzero(found)
    # _merge makes the first nodes first, so served tip i sits on node i
    blocked = _merge(tips[served], s, field, cost, b) if len(served) else []
    if blocked:
        _route_blocked(mesh, settings, field, cost, b, blocked, graph_step_mm, max_graph_nodes)
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
        tip_diameters=np.concatenate([contacts.diameters[served][tip_ok],
                                      np.full(len(land_nodes), s.tip_diameter_mm)]),
        tip_contact=np.concatenate([served[tip_ok], np.full(len(land_nodes), -1)]),
        feet=np.array(sorted(set(b.feet)), int),
    )
