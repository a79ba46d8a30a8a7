"""Overhangs: the faces and points of the mesh that face the film unsupported.

A face needs support when it faces down and is tilted less than the critical
angle from horizontal: with outward unit normal ``n``, when ``-n_z > cos(a)``.
Such faces are grouped into regions by shared edges.  Local minima are
vertices (or flat plateaus of vertices joined by level edges) lower than every
neighbour and on a down-facing part of the surface: they start in mid-air
whatever their faces' tilt, so each needs a contact of its own.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sparse
import trimesh
from scipy.sparse.csgraph import connected_components

from ..constants import EPS_SMALL, OFFSET_MM

__all__ = ["Overhangs", "find_overhangs", "overhang_faces", "local_minima"]


@dataclass(frozen=True)
class Overhangs:
    """Overhang analysis of one mesh.

    Attributes
    ----------
    faces : (k,) int ndarray
        Indices of faces that need support.
    region : (k,) int ndarray
        Region label (0..n_regions-1) of each of those faces.
    n_regions : int
    area_mm2 : float
        Total area of the faces that need support.
    minima : (m, 3) float ndarray
        Positions of local minima (one per vertex or level plateau).
    """

    faces: np.ndarray
    region: np.ndarray
    n_regions: int
    area_mm2: float
    minima: np.ndarray


def overhang_faces(mesh: trimesh.Trimesh, angle_deg: float, floor_z: float | None = None) -> np.ndarray:
    """Indices of faces that face down at less than ``angle_deg`` from horizontal.

    Faces lying on ``floor_z`` (within a micron), when given, rest on the plate
    and are left out.

    Notes
    -----
    O(faces).
    """
    nz = mesh.face_normals[:, 2]
    mask = -nz > np.cos(np.radians(angle_deg))
    if floor_z is not None:
        fz = mesh.vertices[mesh.faces][:, :, 2].max(axis=1)
        mask &= fz > floor_z + OFFSET_MM
    return np.flatnonzero(mask)


def _region_labels(mesh: trimesh.Trimesh, faces: np.ndarray) -> tuple[np.ndarray, int]:
    if len(faces) == 0:
        return np.zeros(0, int), 0
    adj = mesh.face_adjacency
    chosen = np.zeros(len(mesh.faces), bool)
    chosen[faces] = True
    keep = chosen[adj[:, 0]] & chosen[adj[:, 1]]
    local = np.full(len(mesh.faces), -1)
    local[faces] = np.arange(len(faces))
    a, b = local[adj[keep, 0]], local[adj[keep, 1]]
    graph = sparse.coo_matrix((np.ones(len(a)), (a, b)), shape=(len(faces), len(faces)))
    n, labels = connected_components(graph, directed=False)
    return labels, int(n)


def local_minima(mesh: trimesh.Trimesh, floor_z: float | None = None, tol: float = EPS_SMALL) -> np.ndarray:
    """Positions of local minima of the surface's height, one per plateau.

    A plateau is a set of vertices joined by level edges (height difference
    under ``tol``); it is a minimum when every edge leaving it rises, and the
    surface around it faces down (mean vertex normal pointing below
    horizontal), so the bottom of a dimple in an upper face is not one.
    Plateaus on ``floor_z`` rest on the plate and are left out.

    Notes
    -----
    O(vertices + edges): one connected-components pass over the level edges.

    Examples
    --------
    >>> cone = trimesh.creation.cone(radius=5, height=10)
    >>> _ = cone.apply_transform(trimesh.transformations.rotation_matrix(np.pi, [1, 0, 0]))
    >>> local_minima(cone).round(3)[:, 2].tolist()
    [-10.0]
    """
    v = mesh.vertices
    z = v[:, 2]
    e = mesh.edges_unique
    dz = z[e[:, 1]] - z[e[:, 0]]
    level = np.abs(dz) <= tol
    n = len(v)
    graph = sparse.coo_matrix((np.ones(level.sum()), (e[level, 0], e[level, 1])), shape=(n, n))
    _, plateau = connected_components(graph, directed=False)
    # A plateau fails if any non-level edge leaving it goes down.
    lower = np.zeros(plateau.max() + 1 if n else 0, bool)
    down_from_0 = (~level) & (dz < 0)  # edge goes down from vertex 0 to vertex 1
    down_from_1 = (~level) & (dz > 0)
    lower[plateau[e[down_from_0, 0]]] = True
    lower[plateau[e[down_from_1, 1]]] = True
    used = np.zeros_like(lower)
    used[plateau[np.unique(e)]] = True
    cand = np.flatnonzero(used & ~lower)
    if len(cand) == 0:
        return np.zeros((0, 3))
    counts = np.bincount(plateau, minlength=len(lower))
    centroid = np.column_stack([np.bincount(plateau, weights=v[:, i], minlength=len(lower)) for i in range(3)])
    centroid /= np.maximum(counts, 1)[:, None]
    normal_z = np.bincount(plateau, weights=mesh.vertex_normals[:, 2], minlength=len(lower))
    cand = cand[normal_z[cand] < 0]
    if floor_z is not None:
        cand = cand[centroid[cand, 2] > floor_z + OFFSET_MM]
    # Snap each plateau to its vertex nearest the centroid, so the point lies on the surface.
    d = np.linalg.norm(v - centroid[plateau], axis=1)
    order = np.lexsort((d, plateau))
    first = order[np.r_[True, plateau[order][1:] != plateau[order][:-1]]]  # nearest vertex per plateau
    nearest = np.full(len(lower), -1)
    nearest[plateau[first]] = first
    return v[nearest[cand]].reshape(-1, 3)


def find_overhangs(mesh: trimesh.Trimesh, angle_deg: float, floor_z: float | None = None) -> Overhangs:
    """Overhang faces grouped into regions, and local minima.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        A closed, consistently wound part in build coordinates.
    angle_deg : float
        Critical angle from horizontal (``supports.overhang_angle_deg``).
    floor_z : float, optional
        Height of the plate; faces and minima resting on it need no support.

    Returns
    -------
    Overhangs

    Notes
    -----
    O(faces + vertices).  Checked against the exact area of a spherical cap,
    ``2 pi R^2 (1 - cos a)``, in the tests.
    """
    faces = overhang_faces(mesh, angle_deg, floor_z)
    region, n = _region_labels(mesh, faces)
    area = float(mesh.area_faces[faces].sum())
    return Overhangs(faces, region, n, area, local_minima(mesh, floor_z))
