"""Free space: certified distances to the part, and a lattice of clear downward paths.

Routing (:mod:`supportgen.supports.routing`) must prove that every post it adds keeps
``clearance_mm`` from the part, and needs somewhere to send a node whose straight
drop to the base is blocked.  This module provides both.

* :class:`Clearance` (built by :func:`clearance_field`) answers distance
  queries with certified lower bounds.  Every triangle is sampled on a
  barycentric grid, split ``k`` times per edge, so its sub-triangles are similar
  to it and every surface point lies within ``longest_sub_edge / sqrt(3)`` (the
  *slack*) of a sample; a k-d tree distance minus the slack can never exceed the
  true distance, so every "clear" answer is a proof, never an estimate.  A
  segment is proven clear by samples at most ``step`` apart that each clear
  ``clearance + step / 2``, because the distance to a surface is 1-Lipschitz.
* :func:`free_space_lattice` (as arrays; :func:`free_space_graph` gives the same as a
  networkx graph) lays a lattice over a box: layers ``step`` apart,
  an x-y grid of pitch ``step tan(angle) / sqrt(2)`` so that each node reaches
  the nine below it within the branch angle, only nodes that clear the part,
  and only strictly downward edges proven clear.  Edge weight is material
  (post cross-section times length) plus an optional penalty function
  (:data:`Penalty`); two sinks, ``"base"`` below the bottom layer and
  ``"land"`` for nodes with the part's upper surface just below them, let a
  shortest-path search end on the base or on a landing tip.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from functools import cached_property

import networkx as nx
import numpy as np
import trimesh
from scipy.spatial import cKDTree

from ..constants import EPS_REL, EPS_SMALL, EPS_ZERO
from ..errors import SettingsError
from .geometry import landing_holds

__all__ = [
    "Penalty",
    "Clearance",
    "clearance_field",
    "FreeLattice",
    "free_space_lattice",
    "free_space_graph",
    "edge_cost",
    "surface_below",
]

#: ``cost(upper, lower) -> penalty``: (k, 3) upper and lower segment ends to (k,) extra cost (mm^3).
Penalty = Callable[[np.ndarray, np.ndarray], np.ndarray]


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
        """Lower bound of each point's distance to the surface (capped near ``upto``).

        Batches of more than 4096 points run on every core (``workers=-1``; 50k points against
        a 50 mm scan's samples took 0.43 s instead of 0.82 s on 2 cores); smaller ones stay on
        one, sparing the threads' start-up (the 4096 is our choice, not measured).  The answers
        do not depend on it."""
        pts = np.asarray(points, float).reshape(-1, 3)
        d, _ = self.tree.query(pts, distance_upper_bound=upto + self.slack, workers=-1 if len(pts) > 4096 else 1)
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


def clearance_field(
    mesh: trimesh.Trimesh, clearance: float, spacing: float | None = None, max_samples: int = 3_000_000
) -> Clearance:
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


def surface_below(mesh: trimesh.Trimesh, xy: np.ndarray, col: np.ndarray, z: np.ndarray):
    """First surface crossing straight below each query (column ``col`` of ``xy``, height ``z``).

    The one downward-ray query of the project: exact point-in-triangle tests in
    x/y over the faces near each column, so many queries down one column cost one
    column's worth of faces.

    Parameters
    ----------
    mesh : trimesh.Trimesh
    xy : (C, 2) float ndarray
        The distinct columns.
    col, z : (Q,) int and float ndarrays
        Each query's column and the height it looks down from.

    Returns
    -------
    hit : (Q,) float ndarray
        Height of the first crossing strictly below ``z`` (nan where none).
    up : (Q,) bool ndarray
        Whether the face crossed there looks up.

    Notes
    -----
    Cost: O(F + hits) with a k-d tree over the columns.
    """
    if len(z) == 0:
        return np.zeros(0), np.zeros(0, bool)
    tri = np.asarray(mesh.triangles, float)
    up = np.asarray(mesh.face_normals)[:, 2]
    centre = tri[:, :, :2].mean(axis=1)
    radius = np.linalg.norm(tri[:, :, :2] - centre[:, None], axis=2).max(axis=1) + EPS_REL
    near = cKDTree(xy).query_ball_point(centre, radius, return_sorted=False)
    counts = np.fromiter((len(n) for n in near), int, len(near))
    f = np.repeat(np.arange(len(tri)), counts)
    c = np.fromiter((i for n in near for i in n), int, counts.sum())
    a, b, d = tri[f, 0], tri[f, 1], tri[f, 2]
    p = xy[c]
    e1, e2, q = (b - a)[:, :2], (d - a)[:, :2], p - a[:, :2]
    det = e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0]
    ok = np.abs(det) > EPS_ZERO
    det = np.where(ok, det, 1.0)
    u = (q[:, 0] * e2[:, 1] - q[:, 1] * e2[:, 0]) / det
    v = (e1[:, 0] * q[:, 1] - e1[:, 1] * q[:, 0]) / det
    ok &= (u >= -EPS_REL) & (v >= -EPS_REL) & (u + v <= 1 + EPS_REL)
    zc = a[:, 2] + u * (b - a)[:, 2] + v * (d - a)[:, 2]
    c, zc, fu = c[ok], zc[ok], up[f[ok]] > 0
    span = float(np.ptp(np.concatenate([zc, z])) + 1.0) if len(zc) else 1.0
    base = min(zc.min(), z.min()) if len(zc) else 0.0
    key = c * span + (zc - base)
    order = np.argsort(key)
    key, zc, fu, c = key[order], zc[order], fu[order], c[order]
    idx = np.searchsorted(key, col * span + (z - base) - EPS_REL) - 1
    found = (idx >= 0) & (c[np.maximum(idx, 0)] == col) if len(c) else np.zeros(len(z), bool)
    idx = np.maximum(idx, 0)
    hit = np.where(found, zc[idx] if len(zc) else np.nan, np.nan)
    return hit, found & (fu[idx] if len(fu) else False)


def edge_cost(upper, lower, area, cost):
    material = area * np.linalg.norm(np.asarray(lower) - np.asarray(upper), axis=-1)
    return material if cost is None else material + np.asarray(cost(upper, lower), float)


@dataclass(frozen=True)
class FreeLattice:
    """The free-space lattice as arrays (:func:`free_space_lattice`).

    Nodes are numbered ``(i * shape[1] + j) * shape[2] + k`` over the whole grid; ``kept``
    lists those that clear the part (ascending) and ``pos`` holds every grid point.  Edges
    run from ``src`` down to ``dst`` with ``weight``; ``bottom`` nodes reach the base at no
    cost; ``land`` nodes reach a landing tip at ``land_weight``, landing at ``land_hit``.
    """

    step: float
    pitch: float
    origin: np.ndarray
    shape: tuple
    pos: np.ndarray
    kept: np.ndarray
    src: np.ndarray
    dst: np.ndarray
    weight: np.ndarray
    bottom: np.ndarray
    land: np.ndarray
    land_weight: np.ndarray
    land_hit: np.ndarray

    @cached_property
    def at(self) -> np.ndarray:
        """Each grid node's position in ``kept`` (-1 where the node was not kept)."""
        at = np.full(len(self.pos), -1)
        at[self.kept] = np.arange(len(self.kept))
        return at

    def graph(self) -> nx.DiGraph:
        """The lattice as a networkx graph (see :func:`free_space_graph`)."""
        g = nx.DiGraph(step=self.step, pitch=self.pitch, origin=self.origin, shape=self.shape)
        g.add_nodes_from((int(n), {"pos": self.pos[n]}) for n in self.kept)
        g.add_weighted_edges_from(zip(self.src.tolist(), self.dst.tolist(), self.weight.tolist()))
        g.add_edges_from((int(n), "base", {"weight": 0.0}) for n in self.bottom)
        for n, w, h in zip(self.land, self.land_weight, self.land_hit):
            g.add_edge(int(n), "land", weight=float(w), hit=h)
        return g


def free_space_graph(
    mesh: trimesh.Trimesh,
    settings,
    field: Clearance,
    bounds: np.ndarray,
    *,
    step_mm: float | None = None,
    cost: Penalty | None = None,
    max_nodes: int = 60_000,
) -> nx.DiGraph:
    """:func:`free_space_lattice` as a networkx graph.

    Returns
    -------
    networkx.DiGraph
        Integer nodes with ``pos``; edges (upper, lower) with ``weight``; sink ``"base"``
        reached from the bottom layer at zero cost, sink ``"land"`` from the landing nodes
        (``weight`` = landing tip material, ``hit`` = landing point).  Graph attributes
        ``step``, ``pitch``, ``origin``, ``shape``.
    """
    return free_space_lattice(mesh, settings, field, bounds, step_mm=step_mm, cost=cost, max_nodes=max_nodes).graph()


def free_space_lattice(
    mesh: trimesh.Trimesh,
    settings,
    field: Clearance,
    bounds: np.ndarray,
    *,
    step_mm: float | None = None,
    cost: Penalty | None = None,
    max_nodes: int = 60_000,
) -> FreeLattice:
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
    FreeLattice
        Kept nodes, downward edges with ``weight``; the bottom layer reaches the base at
        zero cost; landing nodes are those with the part's upper surface at most
        ``tip_length + step`` below where a landing tip's end stays inside the part
        (:func:`~supportgen.supports.geometry.landing_holds`; weight = landing tip
        material, and the landing point).

    Notes
    -----
    A layer holds an x-y grid of pitch ``step tan(angle) / sqrt(2)``, so each node reaches the
    nine nodes below it at angles within the limit.  An edge whose ends are ``da`` and ``db``
    from the part is clear when ``(da + db - length) / 2`` clears, the distance being
    1-Lipschitz; the rest are checked by sampling.  Cost: O(V) nodes, O(9 V) edges, each
    edge O(length / step) queries of O(log m).
    """
    s = settings.rules
    t = math.tan(math.radians(s.branch_angle_deg))
    z0 = s.base_thickness_mm
    lo, hi = np.asarray(bounds, float)
    hz = step_mm or max(2 * s.clearance_mm, s.tip_length_mm)
    while True:
        pitch = hz * t / math.sqrt(2) * (1 - EPS_REL) if t > EPS_SMALL else hz
        shape = (np.maximum(np.ceil((hi[:2] - lo[:2]) / pitch), 0).astype(int) + 1).tolist() + [
            int(max(math.floor((hi[2] - z0) / hz), 0)) + 1
        ]
        if math.prod(shape) <= max_nodes:
            break
        hz *= 1.2
    origin = np.array([lo[0], lo[1], z0])
    ijk = np.indices(shape).reshape(3, -1).T
    pos = origin + ijk * np.array([pitch, pitch, hz])
    upto = s.clearance_mm + hz
    # lower bounds, capped at ``upto`` (a point beyond it comes back as inf: "at least upto")
    dist = np.minimum(field.lower(pos, upto), upto)
    keep = dist >= s.clearance_mm + field.step / 2
    nodes = np.flatnonzero(keep)
    grid = keep.reshape(shape)
    area = math.pi * (s.post_diameter_mm / 2) ** 2
    offsets = [(di, dj) for di in (-1, 0, 1) for dj in (-1, 0, 1) if t > EPS_SMALL or di == dj == 0]
    flat = np.arange(len(pos)).reshape(shape)
    srcs, dsts, weights = [np.zeros(0, np.int64)], [np.zeros(0, np.int64)], [np.zeros(0)]
    for di, dj in offsets:
        src = flat[max(0, -di) : shape[0] - max(0, di), max(0, -dj) : shape[1] - max(0, dj), 1:]
        dst = flat[max(0, di) : shape[0] - max(0, -di), max(0, dj) : shape[1] - max(0, -dj), :-1]
        src, dst = src.ravel(), dst.ravel()
        both = grid.ravel()[src] & grid.ravel()[dst]
        src, dst = src[both], dst[both]
        length = np.linalg.norm(pos[src] - pos[dst], axis=1)
        # the distance is 1-Lipschitz: a point t along the edge is at least max(da - t, db - (L - t))
        # from the part, which is least, (da + db - L) / 2, where the two meet
        sure = (dist[src] + dist[dst] - length) / 2 >= s.clearance_mm
        sure[~sure] = field.clear(pos[src[~sure]], pos[dst[~sure]])
        src, dst = src[sure], dst[sure]
        srcs.append(src)
        dsts.append(dst)
        weights.append(np.asarray(edge_cost(pos[src], pos[dst], area, cost), float).reshape(-1))
    bottom = nodes[ijk[nodes, 2] == 0]
    land_n, land_w, land_hit = np.zeros(0, np.int64), np.zeros(0), np.zeros((0, 3))
    if len(nodes):
        cols = ijk[nodes, 0] * shape[1] + ijk[nodes, 1]
        xy = origin[:2] + np.indices(shape[:2]).reshape(2, -1).T * pitch
        hit, up = surface_below(mesh, xy, cols, pos[nodes, 2])
        drop = pos[nodes, 2] - hit
        land = up & (drop <= s.tip_length_mm + hz) & (hit > z0)
        land[land] = landing_holds(mesh, settings, np.column_stack([pos[nodes[land], :2], hit[land]]))
        tip_area = math.pi * (s.tip_diameter_mm / 2) ** 2
        land_n, land_w = nodes[land], tip_area * drop[land]
        land_hit = np.column_stack([pos[land_n, :2], hit[land]])
    return FreeLattice(
        hz,
        pitch,
        origin,
        tuple(shape),
        pos,
        nodes,
        np.concatenate(srcs),
        np.concatenate(dsts),
        np.concatenate(weights),
        bottom,
        land_n,
        np.asarray(land_w, float),
        land_hit,
    )
