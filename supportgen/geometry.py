"""Geometry: solids for tips, posts, joints and base, and one union with the part.

Every primitive is a manifold3d solid; all are joined in one
``Manifold.batch_boolean`` union, and ``status()`` is checked after it, so the
output is one closed, oriented solid or an error.

Tip: a cone frustum from the tip diameter at the contact (extended
``tip_depth_mm`` into the part along its axis) to the post radius at its node.
Post segment: a frustum between two nodes.  Joint: a sphere at every node
where segments meet, of the largest radius there.  Base: a raft (one slab
under the convex hull of the feet, grown by the base margin) or pads (one disc
per foot), with a 45 degree chamfer on the bottom edge so a scraper gets under
it.
"""

from __future__ import annotations

from dataclasses import dataclass

import manifold3d as m3d
import numpy as np
import trimesh
from scipy.spatial import ConvexHull, QhullError

from .errors import GeometryError
from .plan import SupportPlan
from .settings import Settings

__all__ = ["Solids", "to_manifold", "to_trimesh", "frustum", "build_supports", "combine"]

_SEGMENTS = 16


def to_manifold(mesh: trimesh.Trimesh) -> m3d.Manifold:
    """A manifold3d solid from a closed trimesh (raises GeometryError if it is not one)."""
    solid = m3d.Manifold(m3d.Mesh(vert_properties=np.asarray(mesh.vertices, np.float32),
                                  tri_verts=np.asarray(mesh.faces, np.uint32)))
    if solid.status() != m3d.Error.NoError:
        raise GeometryError(f"the part is not a closed manifold solid ({solid.status().name}); repair it first")
    return solid


def to_trimesh(solid: m3d.Manifold) -> trimesh.Trimesh:
    """The triangle mesh of a manifold3d solid."""
    out = solid.to_mesh()
    return trimesh.Trimesh(np.asarray(out.vert_properties)[:, :3].astype(float),
                           np.asarray(out.tri_verts, dtype=np.int64), process=False)


def _rotation_to(direction: np.ndarray) -> np.ndarray:
    """A 3x3 rotation taking +z to the unit vector ``direction``."""
    z = np.array([0.0, 0.0, 1.0])
    d = direction / np.linalg.norm(direction)
    c = float(z @ d)
    if c > 1 - 1e-12:
        return np.eye(3)
    if c < -1 + 1e-12:
        return np.diag([1.0, -1.0, -1.0])
    v = np.cross(z, d)
    vx = np.array([[0, -v[2], v[1]], [v[2], 0, -v[0]], [-v[1], v[0], 0]])
    return np.eye(3) + vx + vx @ vx * (1 / (1 + c))


def frustum(p0, p1, r0: float, r1: float, segments: int = _SEGMENTS) -> m3d.Manifold:
    """A cone frustum from ``p0`` (radius ``r0``) to ``p1`` (radius ``r1``).

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
    rot = _rotation_to(axis)
    return solid.transform(np.column_stack([rot, p0]))


def _base(plan: SupportPlan, settings: Settings) -> list[m3d.Manifold]:
    sp = settings.supports
    t = sp.base_thickness_mm
    chamfer = min(t * 0.5, 0.5)
    feet_xy = plan.nodes[plan.feet, :2] if len(plan.feet) else np.zeros((0, 2))
    if len(feet_xy) == 0:
        return []
    foot_r = plan.edge_radius.max() if len(plan.edge_radius) else sp.post_diameter_mm / 2
    if sp.base == "pads":
        pad_r = foot_r + sp.base_margin_mm
        return [m3d.Manifold.cylinder(chamfer, pad_r - chamfer, pad_r, _SEGMENTS).translate((x, y, 0))
                + m3d.Manifold.cylinder(t - chamfer, pad_r, pad_r, _SEGMENTS).translate((x, y, chamfer))
                for x, y in feet_xy]
    grow = foot_r + sp.base_margin_mm
    ring = np.stack([np.cos(np.linspace(0, 2 * np.pi, _SEGMENTS, endpoint=False)),
                     np.sin(np.linspace(0, 2 * np.pi, _SEGMENTS, endpoint=False))], axis=1)
    pts = []
    for z, r in ((0.0, grow - chamfer), (chamfer, grow), (t, grow)):
        layer = (feet_xy[:, None, :] + r * ring[None]).reshape(-1, 2)
        pts.append(np.column_stack([layer, np.full(len(layer), z)]))
    pts = np.vstack(pts)
    try:
        ConvexHull(pts)
    except QhullError as exc:
        raise GeometryError(f"the base outline is degenerate ({exc}); check the support feet") from None
    return [m3d.Manifold.hull_points(pts.tolist())]


@dataclass(frozen=True)
class Solids:
    """The supports alone and the part joined with them."""

    supports: trimesh.Trimesh
    combined: trimesh.Trimesh
    supports_volume_mm3: float
    base_volume_mm3: float


def build_supports(plan: SupportPlan, settings: Settings) -> tuple[list[m3d.Manifold], list[m3d.Manifold]]:
    """Primitive solids of a plan: (tips, posts and joints; base parts).

    Notes
    -----
    O(tips + edges + nodes) primitives of ``_SEGMENTS`` sides each.
    """
    sp = settings.supports
    parts: list[m3d.Manifold] = []
    node_r = np.zeros(len(plan.nodes))
    if len(plan.edges):
        np.maximum.at(node_r, plan.edges[:, 0], plan.edge_radius)
        np.maximum.at(node_r, plan.edges[:, 1], plan.edge_radius)
    no_edge = node_r == 0
    node_r[no_edge] = sp.post_diameter_mm / 2
    for (a, b), r in zip(plan.edges, plan.edge_radius):
        parts.append(frustum(plan.nodes[a], plan.nodes[b], r, r))
    for a, b in plan.braces:
        r = 0.5 * min(node_r[a], node_r[b])
        parts.append(frustum(plan.nodes[a], plan.nodes[b], r, r))
    degree = np.bincount(plan.edges.ravel(), minlength=len(plan.nodes)) if len(plan.edges) else np.zeros(len(plan.nodes), int)
    for i in np.flatnonzero(degree >= 2):
        parts.append(m3d.Manifold.sphere(float(node_r[i]), _SEGMENTS).translate(tuple(plan.nodes[i])))
    for p, node, d in zip(plan.tip_points, plan.tip_nodes, plan.tip_diameters):
        q = plan.nodes[node]
        axis = p - q
        length = np.linalg.norm(axis)
        if length < 1e-9:
            continue
        p_in = p + axis / length * sp.tip_depth_mm
        parts.append(frustum(q, p_in, node_r[node], d / 2))
        parts.append(m3d.Manifold.sphere(float(node_r[node]), _SEGMENTS).translate(tuple(q)))
    # Feet: posts sink half the base thickness into the base so the union is sound.
    base = _base(plan, settings)
    for f in plan.feet:
        q = plan.nodes[f]
        parts.append(frustum(q - [0, 0, sp.base_thickness_mm / 2], q, node_r[f], node_r[f]))
    return parts, base


def _union(solids: list[m3d.Manifold], what: str) -> m3d.Manifold:
    if not solids:
        return m3d.Manifold()
    out = m3d.Manifold.batch_boolean(solids, m3d.OpType.Add)
    if out.status() != m3d.Error.NoError:
        raise GeometryError(f"joining the {what} failed ({out.status().name})")
    return out


def combine(part: trimesh.Trimesh, plan: SupportPlan, settings: Settings) -> Solids:
    """The supports as one solid, and the part joined with them.

    Raises
    ------
    GeometryError
        A union failed (manifold3d ``status()`` not ``NoError``).
    """
    parts, base = build_supports(plan, settings)
    base_solid = _union(base, "base")
    supports = _union(parts + base, "supports")
    combined = _union([to_manifold(part), supports], "part and supports")
    return Solids(to_trimesh(supports), to_trimesh(combined), float(supports.volume()), float(base_solid.volume()))
