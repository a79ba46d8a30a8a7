"""Geometry: solids for tips, posts, joints and base, and one union with the part.

Every primitive is a manifold3d solid; all are joined in one
``Manifold.batch_boolean`` union, and ``status()`` is checked after it, so the
output is one closed, oriented solid or an error.

Tip: a cone frustum from the tip diameter at the contact (extended
``tip_depth_mm`` (up to a tenth more, each tip its own) into the part along its axis) to
the post radius at its node.
Post segment: a frustum between two nodes, or along a straight run of edges of
one radius.  Brace: an octagonal prism round its circle.  Joint: a sphere at every
node where segments meet and turn, of the largest radius there.  Base: a raft (slabs under
groups of neighbouring feet, made of overlapping discs) or pads (one disc per
foot), with a 45 degree chamfer on the bottom edge so a scraper gets under it.

Files store single-precision positions, so the union must have no two
vertices at one such position (a "pinch" a reader would merge into a
non-manifold edge); :func:`combine` checks that and, where needed, turns every
facet by a fraction of a segment and joins again.
"""

from __future__ import annotations

from dataclasses import dataclass

import manifold3d as m3d
import numpy as np
import shapely
import trimesh

from ..analysis.layers import HOLD_PIXELS
from ..constants import EPS_REL, EPS_ZERO
from ..errors import GeometryError
from ..io.winding import BallProbe, distance_tree
from ..settings import Settings
from .plan import SupportPlan

__all__ = [
    "Solids",
    "PHASES",
    "to_manifold",
    "to_trimesh",
    "frustum",
    "tip_reach",
    "landing_holds",
    "speck_hold_radius",
    "deepest_sink",
    "LANDING_SINKS",
    "build_supports",
    "pinch_points",
    "pinch_positions",
    "combine",
    "FUSE_MM",
    "SLIVER_MM",
    "fuse_bodies",
]

_SEGMENTS = 16


def to_manifold(mesh: trimesh.Trimesh) -> m3d.Manifold:
    """A manifold3d solid from a closed trimesh (raises GeometryError if it is not one)."""
    solid = m3d.Manifold(
        m3d.Mesh(vert_properties=np.asarray(mesh.vertices, np.float32), tri_verts=np.asarray(mesh.faces, np.uint32))
    )
    if solid.status() != m3d.Error.NoError:
        raise GeometryError(f"the part is not a closed manifold solid ({solid.status().name}); repair it first")
    return solid


def to_trimesh(solid: m3d.Manifold) -> trimesh.Trimesh:
    """The triangle mesh of a manifold3d solid."""
    out = solid.to_mesh()
    return trimesh.Trimesh(
        np.asarray(out.vert_properties)[:, :3].astype(float), np.asarray(out.tri_verts, dtype=np.int64), process=False
    )


def _rotation_to(direction: np.ndarray) -> np.ndarray:
    """A 3x3 rotation taking +z to the unit vector ``direction``."""
    z = np.array([0.0, 0.0, 1.0])
    d = direction / np.linalg.norm(direction)
    c = float(z @ d)
    if c > 1 - EPS_ZERO:
        return np.eye(3)
    if c < -1 + EPS_ZERO:
        return np.diag([1.0, -1.0, -1.0])
    v = np.cross(z, d)
    vx = np.array([[0, -v[2], v[1]], [v[2], 0, -v[0]], [-v[1], v[0], 0]])
    return np.eye(3) + vx + vx @ vx * (1 / (1 + c))


def frustum(p0, p1, r0: float, r1: float, segments: int = _SEGMENTS, phase: float = 0.0) -> m3d.Manifold:
    """A cone frustum from ``p0`` (radius ``r0``) to ``p1`` (radius ``r1``), its
    polygon turned by ``phase`` radians about its axis.

    Examples
    --------
    >>> s = frustum([0, 0, 0], [0, 0, 2], 1.0, 1.0, segments=64)
    >>> abs(s.volume() - 2 * np.pi) < 0.05 * 2 * np.pi
    True
    """
    p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
    axis = p1 - p0
    length = float(np.linalg.norm(axis))
    solid = m3d.Manifold.cylinder(length, float(r0), float(r1), segments)
    if phase:
        solid = solid.rotate((0.0, 0.0, float(np.degrees(phase))))
    rot = _rotation_to(axis)
    return solid.transform(np.column_stack([rot, p0]))


def _ring(phase: float) -> np.ndarray:
    a = np.linspace(0, 2 * np.pi, _SEGMENTS, endpoint=False) + phase
    return np.column_stack([np.cos(a), np.sin(a)])


def _chamfered_disc(xy, radius: float, thickness: float, chamfer: float, phase: float = 0.0) -> np.ndarray:
    """Points whose hull is a disc with a 45 degree chamfer round its bottom edge."""
    ring = _ring(phase)
    rings = [(0.0, radius - chamfer), (chamfer, radius), (thickness, radius)]
    return np.vstack([np.column_stack([xy + r * ring, np.full(len(ring), z)]) for z, r in rings])


def _raft_centres(xy: np.ndarray, radius: float, close: float) -> np.ndarray:
    """Disc centres that fill the raft between the feet.

    The raft's outline is the union of the feet's discs closed by ``close``
    (shapely buffers: feet nearer than ``2 (radius + close)`` share a slab);
    it is filled with discs on a hexagonal grid of pitch ``radius`` fixed to
    the plate's axes, so the same feet always give the same raft.
    """
    region = shapely.MultiPoint(xy).buffer(radius + close, quad_segs=8).buffer(-close, quad_segs=8)
    inner = region.buffer(-0.5 * radius, quad_segs=8)
    if inner.is_empty:
        return xy
    x0, y0, x1, y1 = inner.bounds
    pitch = radius
    rows = np.arange(np.floor(y0 / (pitch * 0.866)), np.ceil(y1 / (pitch * 0.866)) + 1)
    cols = np.arange(np.floor(x0 / pitch) - 1, np.ceil(x1 / pitch) + 1)
    gx = cols[None, :] * pitch + (rows[:, None] % 2) * pitch / 2
    gy = np.broadcast_to(rows[:, None] * pitch * 0.866, gx.shape)
    grid = np.column_stack([gx.ravel(), gy.ravel()])
    fill = grid[shapely.contains_xy(inner, grid[:, 0], grid[:, 1])]
    return np.vstack([xy, fill])


def _base(plan: SupportPlan, settings: Settings, phase: float = 0.0) -> list[m3d.Manifold]:
    """The base under the feet, as chamfered discs.

    Pads: one chamfered disc of radius (foot radius + base margin) per foot,
    merged where they overlap.  Raft: the same discs plus discs filling the
    space between feet closer than twice (disc radius + contact spacing), so
    neighbouring feet share one slab while distant groups get slabs of their
    own.  Discs of one size in general position union cleanly; outlines made
    by offsetting polygons can touch themselves at points files cannot keep.
    """
    rules = settings.rules
    if len(plan.feet) == 0:
        return []
    t = rules.base_thickness_mm
    xy = np.unique(np.round(plan.nodes[plan.feet, :2], 9), axis=0)
    foot_r = float(plan.edge_radius.max()) if len(plan.edge_radius) else rules.post_diameter_mm / 2
    radius = foot_r + rules.base_margin_mm
    chamfer = min(0.5 * t, 0.5, 0.5 * rules.base_margin_mm)
    if rules.base == "raft":
        xy = _raft_centres(xy, radius, rules.contact_spacing_mm)
    return [
        m3d.Manifold.hull_points(_chamfered_disc(p, radius, t, chamfer, ph))
        for p, ph in zip(xy, _phases(phase, len(xy)))
    ]


@dataclass(frozen=True)
class Solids:
    """The supports alone and the part joined with them."""

    supports: trimesh.Trimesh
    combined: trimesh.Trimesh
    supports_volume_mm3: float
    base_volume_mm3: float


def _sphere(centre, radius: float, phase: float) -> m3d.Manifold:
    """A joint sphere turned about a generic axis, so none of its vertex rings lies on a
    post's end ring (a sphere of the post's radius, unturned, shares the ring exactly)."""
    deg = float(np.degrees(phase)) + _SPHERE_TURN_DEG
    solid = m3d.Manifold.sphere(float(radius), _SEGMENTS)
    return solid.rotate((deg, 0.7 * deg, 1.3 * deg)).translate(tuple(centre))


#: A fixed turn of every joint sphere (degrees, about a skew axis): no symmetry of ours.
_SPHERE_TURN_DEG = 7.3
#: Golden-ratio step of the per-primitive phases (fractions of a segment): the
#: sequence never repeats, so two primitives never get one phase.
_GOLDEN = 0.6180339887498949


def _phases(start: float, n: int) -> np.ndarray:
    """``n`` distinct phases (radians) after ``start``: one per primitive.

    Primitives built on one axis or at one node (stacked post segments, a post
    and the foot that sinks it into the base, a joint sphere and the rings
    meeting at it) would otherwise share vertices exactly; a union then keeps
    both copies (a pinch a file merges into a non-manifold edge).  Turning each
    by its own fraction of a segment puts them in general position.
    """
    return start + _fractions(n) * 2 * np.pi / _SEGMENTS


def _fractions(n: int, offset: float = 0.0) -> np.ndarray:
    """``n`` distinct numbers in [0, 1) after ``offset``, from the golden-ratio sequence."""
    return (offset + np.arange(1, n + 1) * _GOLDEN) % 1.0


#: Segments reach this fraction of their radius past each node, into the joint there.
#: Two segments that only abut (a straight run split at a node) have coplanar end caps;
#: a union keeps touching faces apart with coincident vertices, which a file merges
#: into a non-manifold edge.  Overlapping them removes the contact; a quarter radius
#: stays within the joint sphere's polygon to 3 % of the radius.
_OVERLAP = 0.25


def _overlapping(p0, p1, r: float):
    """The ends of a segment from ``p0`` to ``p1`` of radius ``r``, each moved :data:`_OVERLAP` r outward."""
    p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
    d = p1 - p0
    length = float(np.linalg.norm(d))
    if length < EPS_REL:
        return p0, p1
    u = d / length * _OVERLAP * r
    return p0 - u, p1 + u


#: Radius of a joint sphere over the widest segment at its node.  A sphere of the segment's
#: own radius is tangent to that segment's side along a whole circle where the segment runs
#: through the node, and a union of near-tangent facets keeps coincident vertices (seen on a
#: lattice's branch joints).  The sphere's facets lie up to 1 - cos^2(pi/16) = 3.8 % inside
#: its radius, so it must be wider than that: at 1.15 r its facets clear the segment's
#: corners by 10 %, the side leaves it at a clear angle (30 degrees) 0.57 r from the node,
#: and the segments' overlapping ends (:data:`_OVERLAP`, corners at 1.03 r) stay inside it.
_JOINT_FRACTION = 1.15

#: Radius of a tip cone where it leaves its node, over the joint's: a cone of the joint's
#: full radius meets the joint sphere tangentially along its equator, and a union of
#: near-tangent facets keeps coincident vertices; a slightly narrower cone starts inside
#: the sphere and leaves it at a clear angle.
_TIP_BASE_FRACTION = 0.9

#: Tips reach into the part between ``tip_depth_mm`` and this much more (a fraction of it),
#: each by its own amount: tips standing on one flat face at one height would otherwise end
#: in coplanar caps, and two caps that overlap (contacts closer than a tip's width, as an
#: island's point beside a minimum can be) leave coincident vertices no turn removes.
DEPTH_SPREAD = 0.1

#: Radius of a foot (the stub sinking a post into the base) over its post's: inside the
#: post's polygon (whose sides are cos(pi/16) = 0.98 of its radius from the axis).
_FOOT_FRACTION = 0.95


#: Farthest a tip reaches into the part beyond ``tip_depth_mm`` to find a hold (mm), as a
#: multiple of ``tip_depth_mm``: the sharpest drips need a few tenths of a millimetre.
_REACH_MAX = 3.0


#: Depths a landing tip's end may sink to, as fractions of its deepest reach: the deepest
#: the part holds is taken (none: the first, so the end still crosses the surface).
LANDING_SINKS = (0.25, 0.5, 1.0)


def speck_hold_radius(pixel_mm: float) -> float:
    """Radius of a ball that holds a speck: ``HOLD_PIXELS`` pixels across, plus half a pixel."""
    return pixel_mm * (np.sqrt(HOLD_PIXELS / np.pi) + 0.5)


def deepest_sink(settings: Settings) -> float:
    """How deep a tip's end sinks at most before any reach: ``tip_depth_mm`` and the spread."""
    return settings.rules.tip_depth_mm * (1 + DEPTH_SPREAD)


def landing_holds(
    mesh: trimesh.Trimesh,
    settings: Settings,
    points: np.ndarray,
    depth: np.ndarray | float | None = None,
    probe: BallProbe | None = None,
) -> np.ndarray:
    """Whether a landing tip standing at each surface point ``points`` (k, 3) is held by the part.

    A landing sinks its end straight down by ``depth`` (default its deepest reach,
    ``tip_depth_mm`` and the spread :func:`build_supports` adds).  Where the part below is
    thinner than that, or the point lies on an edge or a sliver, the end comes out through
    the part's underside or side, or stands on less than the printer cures: it cures first,
    in mid-air, as an island.  The landing is held when a ball that holds a speck (the
    hold rule of :func:`tip_reach`: ``HOLD_PIXELS`` pixels across, plus half a pixel) fits
    inside the part straight below the point, centred at ``depth`` or deeper if the ball
    needs it (:class:`~supportgen.io.winding.BallProbe`): the end then lies in the ball,
    and the layers under the tip's end hold it.  On a slope the end's rim may stand out
    downhill, in the same layer as the part it touches, so that does not count.
    """
    points = np.asarray(points, float).reshape(-1, 3)
    if len(points) == 0:
        return np.zeros(0, bool)
    pr = settings.printer
    depth = deepest_sink(settings) if depth is None else depth
    radius = speck_hold_radius(pr.pixel_mm)
    below = np.maximum(np.broadcast_to(np.asarray(depth, float), len(points)), radius + pr.pixel_mm / 2)
    centre = points - np.column_stack([np.zeros((len(points), 2)), below])
    return (probe or BallProbe.of(mesh)).holds(centre, np.full(len(points), radius))


def tip_reach(part: trimesh.Trimesh, plan: SupportPlan, settings: Settings) -> tuple[np.ndarray, np.ndarray]:
    """How far, and which way, each tip reaches into the part beyond its cone: ``(extra, pin)``.

    A tip ending in a sharp point of the part (a drip, a cone's apex) ends where the part
    is still narrower than a speck: the layer above is then held by fewer pixels than
    the hold rule asks (:data:`supportgen.analysis.layers.HOLD_PIXELS`) and prints as an
    island.  Each tip's end is moved along its axis, a layer at a time, until a ball of
    the speck's radius plus half a pixel fits in the part around it (:class:`~supportgen.io.winding.BallProbe`: the
    exact distance to the surface, inside by the winding number), at most
    :data:`_REACH_MAX` x ``tip_depth_mm`` further.  Where the axis never
    gets there (a tip meeting a sharp point from the side runs past it), straight up and
    along the inward normal are tried (when more than 30 degrees off the axis: nearer, a pin
    would be near-coaxial with the cone); a tip that finds its hold that way gets a *pin*, a
    short rod from the contact in that direction.  The ball is also at least the tip's
    own end (half its diameter plus half a pixel), so a tip never shows through the far
    side of a thin wall; where no way finds a hold the tip keeps ``tip_depth_mm``.
    Landing tips (posts standing on the part) are left as they are.

    Returns
    -------
    extra : (T,) float ndarray
        Depth added to ``tip_depth_mm`` along the tip's axis, or along its pin (mm).
    pin : (T, 3) float ndarray
        Unit direction of each tip's pin; zeros where the tip needs none.

    Notes
    -----
    Cost O(T log F) for the first step of every tip, then O(S log F) for the S steps of the
    few tips still looking, all in one query per direction.
    """
    rules, pr = settings.rules, settings.printer
    n = len(plan.tip_points)
    extra, pin = np.zeros(n), np.zeros((n, 3))
    if n == 0:
        return extra, pin
    axis = plan.tip_points - plan.nodes[plan.tip_nodes]
    length = np.linalg.norm(axis, axis=1)
    ok = length > EPS_REL
    axis[ok] /= length[ok, None]
    # the ball must hold a speck, and the tip's own end (its radius plus half a pixel) so the
    # end never shows through the far side of a thin wall
    need = np.maximum(speck_hold_radius(pr.pixel_mm), plan.tip_diameters / 2 + pr.pixel_mm / 2)
    steps = np.arange(0.0, _REACH_MAX * rules.tip_depth_mm + EPS_REL, pr.layer_mm)
    depth = BallProbe.of(part)
    inward = -np.asarray(part.face_normals)[depth.nearest_face(plan.tip_points)]
    up = np.tile([0.0, 0.0, 1.0], (n, 1))
    # A landing stands on the part and needs no hold, but its sunk end must not come out
    # below (a thin plate) or beside (an edge): it sinks only as deep as the part holds it.
    land = np.flatnonzero(ok & (plan.tip_contact < 0))
    if land.size:
        deepest = deepest_sink(settings)
        # where none holds, still the shallowest: an end cap left on the surface would be
        # coplanar with the part's face, a pinch along its whole rim
        sink = np.full(land.size, LANDING_SINKS[0] * deepest)
        for frac in LANDING_SINKS[1:]:
            held = landing_holds(part, settings, plan.tip_points[land], deepest * frac, depth)
            sink[held] = deepest * frac
        extra[land] = sink - deepest  # build_supports clamps the sum with the spread at zero
    # contact tips: each reaches on until it holds
    todo = np.flatnonzero(ok & (plan.tip_contact >= 0))
    for k, way in enumerate((axis, up, inward)):
        if k > 0:
            # a pin close to the axis would be near-coaxial with the cone (grazing sides); the
            # axis itself was tried first
            todo = todo[np.abs(np.einsum("ij,ij->i", way[todo], axis[todo])) < _PIN_COS]
        # the first step of every tip, then every further step of the tips still looking
        for chunk in (steps[:1], steps[1:]):
            if todo.size == 0 or chunk.size == 0:
                break
            at = plan.tip_points[todo, None] + way[todo, None] * (rules.tip_depth_mm + chunk)[None, :, None]
            hold = depth.holds(at.reshape(-1, 3), np.repeat(need[todo], chunk.size)).reshape(todo.size, -1)
            found = hold.any(axis=1)
            got = todo[found]
            extra[got] = chunk[np.argmax(hold[found], axis=1)]  # the first step that holds
            if k > 0:
                pin[got] = way[got]
            todo = todo[~found]  # still without a hold: keeps tip_depth_mm, as before
    return extra, pin


#: A pin is used only where its direction is more than 30 degrees off the tip's axis.
_PIN_COS = float(np.cos(np.radians(30.0)))

#: Radius of a pin over its tip's radius at the contact: a little wider, so the pin's side
#: crosses the cone's at a clear angle instead of grazing it (equal radii touch tangentially).
_PIN_FRACTION = 1.1


#: Sides of a brace's polygon.  A brace is half as wide as its posts (0.25-0.5 mm for posts
#: of 0.5-1 mm), so its octagon, drawn round the circle, leaves it by at most
#: r (1 / cos(pi/8) - 1) = 0.08 r, 0.01-0.02 mm, under half a 0.05 mm pixel; braces cross
#: each other and their posts at skew angles, where every side adds intersection edges to the
#: union (with 16 sides, braces alone took 20.6 s of a lattice's 30.5 s union).
_BRACE_SEGMENTS = 8
#: A brace's polygon circumscribes its circle (vertices at r / cos(pi/8)): the section
#: sizing checked (a circle of radius r) lies inside the printed one.
_BRACE_CIRCUMSCRIBE = 1.0 / np.cos(np.pi / _BRACE_SEGMENTS)

#: Largest distance of a node from the line of a straight run through it, over the run's
#: radius: nodes a brace split onto a post lie on it to round-off.
_STRAIGHT_TOL = 1e-6


def _straight_runs(plan: SupportPlan, degree: np.ndarray) -> tuple[list[tuple[int, int, float]], np.ndarray]:
    """Edges joined into straight runs: ``([(a, b, radius), ...], through)``.

    A node *passes through* when exactly two edges of one radius meet there in a straight
    line and it is neither a tip's node nor a foot (a brace split a post there, or routing
    kept a node on a straight drop).  The run is one frustum from its first node to its
    last: two collinear frustums that overlap at a node have sides that nearly coincide
    over the overlap, which a union cuts into slivers, and the joint sphere that covered
    them is not needed where nothing turns.  Order: as the runs' first edges in ``plan.edges``.
    """
    edges, nodes, radius = plan.edges, plan.nodes, plan.edge_radius
    through = np.zeros(len(nodes), bool)
    if len(edges) == 0:
        return [], through
    cand = degree == 2
    cand[plan.tip_nodes] = False
    cand[plan.feet] = False
    # the two edges at each candidate node
    ends = np.concatenate([edges[:, 0], edges[:, 1]])
    which = np.concatenate([np.arange(len(edges))] * 2)
    order = np.argsort(ends, kind="stable")
    ends, which = ends[order], which[order]
    first = np.searchsorted(ends, np.arange(len(nodes)))
    at = np.flatnonzero(cand)
    e1, e2 = which[first[at]], which[first[at] + 1]
    o1 = np.where(edges[e1, 0] == at, edges[e1, 1], edges[e1, 0])
    o2 = np.where(edges[e2, 0] == at, edges[e2, 1], edges[e2, 0])
    d1, d2 = nodes[o1] - nodes[at], nodes[o2] - nodes[at]
    off = np.linalg.norm(np.cross(d1, d2), axis=1) / np.maximum(np.linalg.norm(d2 - d1, axis=1), EPS_ZERO)
    straight = (radius[e1] == radius[e2]) & (np.einsum("ij,ij->i", d1, d2) < 0) & (off <= _STRAIGHT_TOL * radius[e1])
    through[at[straight]] = True
    # walk each run from an edge whose ends do not both pass through
    nxt = {}
    for n, a, b in zip(at[straight], e1[straight], e2[straight]):
        nxt[(int(n), int(a))], nxt[(int(n), int(b))] = int(b), int(a)
    done = np.zeros(len(edges), bool)
    runs = []
    for e in range(len(edges)):
        if done[e]:
            continue
        a, b = int(edges[e, 0]), int(edges[e, 1])
        done[e] = True
        ends_ = []
        for start, come in ((a, e), (b, e)):
            node, edge = start, come
            while through[node]:
                edge = nxt[(node, edge)]
                done[edge] = True
                u, v = int(edges[edge, 0]), int(edges[edge, 1])
                node = v if u == node else u
            ends_.append(node)
        runs.append((ends_[0], ends_[1], float(radius[e])))
    return runs, through


def build_supports(
    plan: SupportPlan, settings: Settings, phase: float = 0.0, reach: tuple | None = None
) -> tuple[list[m3d.Manifold], list[m3d.Manifold]]:
    """Primitive solids of a plan: (tips, posts and joints; base parts).

    ``phase`` turns every polygonal section by that angle (radians), which moves
    the solids' facets without changing their size.  ``reach`` is :func:`tip_reach`'s
    ``(extra, pin)``: depth added to each tip, and the pins of tips that need one.

    Notes
    -----
    O(tips + edges + nodes) primitives of ``_SEGMENTS`` sides each (braces ``_BRACE_SEGMENTS``).
    """
    rules = settings.rules
    parts: list[m3d.Manifold] = []
    node_r = np.zeros(len(plan.nodes))
    if len(plan.edges):
        np.maximum.at(node_r, plan.edges[:, 0], plan.edge_radius)
        np.maximum.at(node_r, plan.edges[:, 1], plan.edge_radius)
    no_edge = node_r == 0
    node_r[no_edge] = rules.post_diameter_mm / 2
    degree = (
        np.bincount(plan.edges.ravel(), minlength=len(plan.nodes))
        if len(plan.edges)
        else np.zeros(len(plan.nodes), int)
    )
    runs, through = _straight_runs(plan, degree)
    joint = (degree >= 2) & ~through
    joint[plan.tip_nodes] = True
    n_prim = len(runs) + len(plan.braces) + int(joint.sum()) + len(plan.tip_points) + len(plan.feet)
    turn = iter(_phases(phase, n_prim))
    # Each tip's own depth, from the same never-repeating sequence (offset by the turn, so a
    # retry at another phase moves the caps too).
    depth = rules.tip_depth_mm * (1 + DEPTH_SPREAD * _fractions(len(plan.tip_points), phase * _SEGMENTS / (2 * np.pi)))
    extra, pins = (np.zeros(len(depth)), np.zeros((len(depth), 3))) if reach is None else reach
    depth = np.maximum(depth + extra, 0.0)
    for a, b, r in runs:
        parts.append(frustum(*_overlapping(plan.nodes[a], plan.nodes[b], r), r, r, phase=next(turn)))
    for a, b in plan.braces:
        r = _BRACE_CIRCUMSCRIBE * 0.5 * min(node_r[a], node_r[b])
        parts.append(frustum(plan.nodes[a], plan.nodes[b], r, r, segments=_BRACE_SEGMENTS, phase=next(turn)))
    # A joint sphere, once, at every node where segments meet or a tip starts.
    for i in np.flatnonzero(joint):
        parts.append(_sphere(plan.nodes[i], _JOINT_FRACTION * node_r[i], next(turn)))
    for p, node, d, dep, way in zip(plan.tip_points, plan.tip_nodes, plan.tip_diameters, depth, pins):
        q = plan.nodes[node]
        axis = p - q
        length = np.linalg.norm(axis)
        ph = next(turn)
        if length < EPS_REL:
            continue
        if way.any():  # the cone to the contact (a little past it), and the pin on into the part
            parts.append(frustum(q, p + axis / length * (d / 4), _TIP_BASE_FRACTION * node_r[node], d / 2, phase=ph))
            parts.append(
                frustum(p - way * (d / 2), p + way * dep, _PIN_FRACTION * d / 2, _PIN_FRACTION * d / 2, phase=ph)
            )
            continue
        p_in = p + axis / length * dep
        parts.append(frustum(q, p_in, _TIP_BASE_FRACTION * node_r[node], d / 2, phase=ph))
    # Feet: posts sink half the base thickness into the base so the union is sound.  The
    # foot is a little narrower than its post and reaches into it, so their side faces and
    # end rings never coincide.
    base = _base(plan, settings, phase)
    for f in plan.feet:
        q, r = plan.nodes[f], node_r[f]
        parts.append(
            frustum(
                q - [0, 0, rules.base_thickness_mm / 2],
                q + [0, 0, 0.5 * r],
                _FOOT_FRACTION * r,
                _FOOT_FRACTION * r,
                phase=next(turn),
            )
        )
    return parts, base


def _union(solids: list[m3d.Manifold], what: str) -> m3d.Manifold:
    if not solids:
        return m3d.Manifold()
    out = m3d.Manifold.batch_boolean(solids, m3d.OpType.Add)
    if out.status() != m3d.Error.NoError:
        raise GeometryError(f"joining the {what} failed ({out.status().name})")
    return out


def pinch_points(mesh: trimesh.Trimesh) -> int:
    """Vertices that a file would merge: distinct vertices at one single-precision position.

    Where two sheets of a solid touch at a point or along an edge, manifold3d
    keeps a vertex for each; STL and 3MF store single-precision positions, so a
    reader merges them into a non-manifold vertex or edge.  Cost O(V log V).

    Examples
    --------
    >>> pinch_points(trimesh.creation.box())
    0
    """
    v32 = np.asarray(mesh.vertices, np.float32)
    return int(len(v32) - len(np.unique(v32, axis=0)))


def pinch_positions(mesh: trimesh.Trimesh) -> tuple[np.ndarray, np.ndarray]:
    """Where a file would merge a solid's sheets: ``(points, segments)``.

    ``points`` (k, 3) are the single-precision positions :func:`pinch_points` counts,
    each once; ``segments`` (m, 2, 3) are the edges that two sheets share along their
    length (both ends pinched and the edge present twice), where sheets touch along a
    line rather than at a point.
    """
    v32 = np.asarray(mesh.vertices, np.float32)
    uniq, inverse, counts = np.unique(v32, axis=0, return_inverse=True, return_counts=True)
    points = uniq[counts > 1].astype(float)
    if len(points) == 0:
        return points, np.zeros((0, 2, 3))
    inverse = inverse.reshape(-1)
    e = np.sort(inverse[np.asarray(mesh.edges_unique)], axis=1)
    e = e[(counts[e[:, 0]] > 1) & (counts[e[:, 1]] > 1)]
    pairs, seen = np.unique(e, axis=0, return_counts=True)
    return points, uniq[pairs[seen > 1]].astype(float)


#: How far a shell that touches another is grown before they are joined (mm): a thousandth
#: of a millimetre, some hundred times the single-precision step of a 100 mm part
#: (8e-6 mm) and fifty times below a pixel.
FUSE_MM = 1e-3


#: Facets of the part narrower than this are folded away (mm): a ten-thousandth of a
#: millimetre, above the single-precision step of parts up to a metre (6e-5 mm) and 500
#: times below a pixel.  A support whose surface crosses a facet narrower than a file
#: resolves cuts it at two points a file merges (a pinch); the sliver of a part made by
#: joining boxes (a lattice) did so at every turn of the tip crossing it, and each weld
#: ball moved the pinch along it.
SLIVER_MM = 1e-4


def fuse_bodies(part: trimesh.Trimesh) -> m3d.Manifold:
    """The part's shells joined into one solid, those that touch another grown by :data:`FUSE_MM`,
    and its facets narrower than :data:`SLIVER_MM` folded (manifold3d ``simplify``: the
    surface moves by less than that).

    Shells that overlap (a doubled shell, a self-intersecting copy) join cleanly.  Shells
    that only touch (two bodies stacked face to face, or side by side along an edge) do not:
    a file stores their shared face or edge rounded to single precision, so they meet with
    gaps and overlaps of a few rounding steps, and their union keeps a slit or a seam a
    millionth of a millimetre wide.  Any support that crosses it (a joint beside the seam,
    a tip through it) makes vertices a file merges (pinch points).  A printer cures such
    shells as one, so each shell with a vertex within ``2 FUSE_MM`` of another shell is
    moved outward along its vertex normals by ``FUSE_MM``: the shells then overlap by about
    a micron and join as one solid, and the part grows by far less than the printer resolves.

    Examples
    --------
    >>> a = trimesh.creation.box((2, 2, 2))
    >>> b = trimesh.creation.box((2, 2, 2)); _ = b.apply_translation((1, 0, 2))  # on a's top
    >>> len(fuse_bodies(trimesh.util.concatenate([a, b])).decompose())
    1
    """
    whole = to_manifold(part).simplify(SLIVER_MM)
    bodies = whole.decompose()
    if len(bodies) == 1:
        return whole
    meshes = [to_trimesh(b) for b in bodies]
    lo = np.array([m.bounds[0] for m in meshes]) - 2 * FUSE_MM
    hi = np.array([m.bounds[1] for m in meshes]) + 2 * FUSE_MM
    touch = np.zeros(len(meshes), bool)
    for j, other in enumerate(meshes):
        near = np.flatnonzero((lo <= hi[j]).all(axis=1) & (hi >= lo[j]).all(axis=1) & (np.arange(len(meshes)) != j))
        if near.size == 0:
            continue
        tree, v, f = distance_tree(other)
        for i in near[~touch[near]]:
            d2 = tree.squared_distance(v, f, np.ascontiguousarray(meshes[i].vertices, np.float64))[0]
            touch[i] = bool((d2 <= (2 * FUSE_MM) ** 2).any())
    grown = [
        to_manifold(trimesh.Trimesh(m.vertices + FUSE_MM * m.vertex_normals, m.faces, process=False)) if t else body
        for m, body, t in zip(meshes, bodies, touch)
    ]
    return _union(grown, "part's bodies").simplify(SLIVER_MM)


#: Radius of a weld over the pixel: half a pixel, below what the printer resolves, and
#: some thousand times the single-precision step of a 100 mm part (8e-6 mm).
_WELD_PIXELS = 0.5
#: Rounds of welds, each a half larger, before the facets are turned and all is joined again.
_WELD_ROUNDS = 3


def _weld(solid: m3d.Manifold, at: tuple[np.ndarray, np.ndarray], radius: float, what: str) -> m3d.Manifold:
    """``solid`` with a small ball over each pinch point of ``at`` and a thin rod (the hull
    of two balls) along each pinched segment (:func:`pinch_positions`).

    Two sheets that touch at a pinch (a post tangent to another, a cone grazing the part)
    meet there in a point or a line a file cannot keep.  A ball centred on the touching
    point overlaps both sides, so their union crosses its sphere transversally and the
    sheets join through a neck: no pinch is left there, and the solid grows by less than
    a pixel's width.
    """
    points, segments = at
    welds = []
    for k, p in enumerate(points):
        welds.append(_sphere(p, radius, k * _GOLDEN * 2 * np.pi / _SEGMENTS))
    for k, (a, b) in enumerate(segments):
        ph = (len(points) + k) * _GOLDEN * 2 * np.pi / _SEGMENTS
        welds.append(m3d.Manifold.batch_hull([_sphere(a, radius, ph), _sphere(b, radius, ph)]))
    return _union([solid, *welds], what)


#: Turns of the facets tried, in order, until the solids come out without pinch
#: points (a pinch is a coincidence of facets; turning them by a fraction of a
#: segment removes it).  The first applies to every primitive; each later one to the
#: primitives at the pinches left (:class:`_Pieces`).
PHASES = (0.0, 0.37, 0.61, 0.83)

#: Primitives per group of :class:`_Pieces`: after the first retry, a retry joins again
#: the groups of the primitives it turned and then the groups' unions, not every primitive
#: (a lattice's 6,500 primitives: 32 groups 14.0 s, their union 3.4 s, one batch of all
#: 15-16 s; a group about 0.5 s).
_GROUP = 256


class _Pieces:
    """Support primitives kept in spatial groups with each group's union, so that turning a
    few primitives joins again only their groups.

    Groups halve the primitives at the median of their bounding-box centres along the
    widest axis until each holds at most :data:`_GROUP`.  Until a primitive is turned,
    and with one group, the union is the plain batch of all primitives (groups and their
    union cost a fifth more than one batch; only retries gain from them).
    """

    def __init__(self, solids: list[m3d.Manifold]):
        self.solids = list(solids)
        box = np.array([m.bounding_box() for m in self.solids]).reshape(-1, 6)
        self.lo, self.hi = box[:, :3], box[:, 3:]
        self.group = np.zeros(len(self.solids), int)
        stack, n = [np.arange(len(self.solids))], 0
        centre = (self.lo + self.hi) / 2
        while stack:
            idx = stack.pop()
            if len(idx) <= _GROUP:
                self.group[idx] = n
                n += 1
                continue
            c = centre[idx]
            order = idx[np.argsort(c[:, int(np.argmax(np.ptp(c, axis=0)))], kind="stable")]
            stack += [order[len(order) // 2 :], order[: len(order) // 2]]
        self.joined: dict[int, m3d.Manifold] = {}
        self.turned = False

    def union(self, what: str) -> m3d.Manifold:
        """The union of all primitives: at first in one batch; once some were turned, by
        groups, those changed since the last call joined again."""
        groups = np.unique(self.group)
        if len(groups) <= 1 or not self.turned:
            return _union(self.solids, what)
        for g in groups:
            if g not in self.joined:
                self.joined[g] = _union([self.solids[i] for i in np.flatnonzero(self.group == g)], what)
        return _union([self.joined[g] for g in groups], what)

    def near(self, points: np.ndarray, margin: float) -> np.ndarray:
        """Indices of primitives whose bounding box, grown by ``margin``, holds one of ``points``."""
        if len(points) == 0 or len(self.solids) == 0:
            return np.zeros(0, int)
        inside = (points[None, :, :] >= self.lo[:, None, :] - margin) & (
            points[None, :, :] <= self.hi[:, None, :] + margin
        )
        return np.flatnonzero(inside.all(axis=2).any(axis=1))

    def replace(self, idx: np.ndarray, solids: list[m3d.Manifold]) -> None:
        """Put ``solids[i]`` in place of primitive ``i`` for each ``i`` of ``idx`` (same indexing)."""
        for i in idx:
            self.solids[i] = solids[i]
            self.joined.pop(int(self.group[i]), None)
        self.turned = True


def combine(part: trimesh.Trimesh, plan: SupportPlan, settings: Settings) -> Solids:
    """The supports as one solid, and the part joined with them.

    Both come out without pinch points (see :func:`pinch_points`): where a
    union has one, a ball smaller than a pixel is welded over it (:func:`_weld`, up
    to ``_WELD_ROUNDS`` rounds); only if pinches remain are the facets of the support
    primitives at them turned by a fraction of a segment (:data:`PHASES`) and their
    groups joined again (:class:`_Pieces`).

    Raises
    ------
    GeometryError
        A union failed (manifold3d ``status()`` not ``NoError``), or every turn
        left a pinch point.
    """
    whole = fuse_bodies(part)
    reach = tip_reach(part, plan, settings)
    weld_r0 = _WELD_PIXELS * settings.printer.pixel_mm
    parts, base = build_supports(plan, settings, 0.0, reach)
    pieces, n_base = _Pieces(parts + base), len(base)
    left, radius = np.zeros((0, 3)), weld_r0
    for attempt, phase in enumerate(PHASES):
        if attempt:
            # turn the primitives at the pinches the welds left (all of them if none is there)
            parts, base = build_supports(plan, settings, phase * 2 * np.pi / _SEGMENTS, reach)
            turned = pieces.near(left, radius + settings.printer.pixel_mm)
            pieces.replace(turned if len(turned) else np.arange(len(pieces.solids)), parts + base)
            left = np.zeros((0, 3))
        supports = pieces.union("supports")
        combined = _union([whole, supports], "part and supports")
        sup_mesh, comb_mesh = to_trimesh(supports), to_trimesh(combined)
        radius = weld_r0
        for round_ in range(_WELD_ROUNDS + 1):
            in_sup, in_comb = pinch_positions(sup_mesh), pinch_positions(comb_mesh)
            left = np.vstack([left, in_sup[0], in_comb[0], in_sup[1].reshape(-1, 3), in_comb[1].reshape(-1, 3)])
            if len(in_sup[0]) == 0 and len(in_comb[0]) == 0:
                base_solid = _union(pieces.solids[len(pieces.solids) - n_base :], "base")
                return Solids(sup_mesh, comb_mesh, float(supports.volume()), float(base_solid.volume()))
            if round_ == _WELD_ROUNDS:
                break  # welds did not close them: turn the facets there and join again
            # A pinch of the supports is welded in both solids; one of the joined solid only
            # (a post grazing the part) is welded there alone, so the supports keep no ball
            # that stands apart from them.
            if len(in_sup[0]):
                supports = _weld(supports, in_sup, radius, "supports and their welds")
                sup_mesh = to_trimesh(supports)
            both = (np.vstack([in_sup[0], in_comb[0]]), np.concatenate([in_sup[1], in_comb[1]]))
            combined = _weld(combined, both, radius, "part, supports and welds")
            comb_mesh = to_trimesh(combined)
            radius *= 1.5
    raise GeometryError(
        f"the supports touch themselves or the part at a point after {len(PHASES)} tries "
        "(pinch points a file cannot keep); change contact_spacing_mm slightly and run again"
    )
