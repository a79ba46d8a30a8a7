"""Repair: validate a triangle soup and make it a closed, consistently wound solid.

Every step works on plain arrays (vertices ``(n, 3)`` float, faces ``(m, 3)``
int) and records one short line per repair it makes, so that the report can list
them.  :func:`repair_arrays` runs the steps in this order:

1. **Merge** coincident vertices: positions equal to 1e-9 of the bounding-box
   diagonal (below float32 STL resolution) become one vertex.  For STL this is
   decoding, not a repair (the format stores no shared vertices), so it is only
   recorded for the other formats.
2. **Drop faces** with a repeated corner or zero area, then duplicate faces (the
   same three corners in any winding).  A zero-area face with three distinct
   corners is kept when the surface is closed with it: boolean unions make such
   slivers, and dropping them would open holes.
3. **Orient** each connected shell consistently: faces are 2-coloured by a
   breadth-first search over shared edges (keep or flip relative to the root)
   and the minority is flipped; a contradiction means the shell is not
   orientable (a Moebius strip) and is refused.
4. **Fill small holes**: each boundary loop is closed with a fan of triangles
   around the loop's centroid (one triangle for a three-edge loop).  A hole is
   *small* when that fan's area is at most ``hole_fraction`` (default
   :data:`HOLE_FRACTION` = 0.25, our choice) of the surface area of the shell it
   belongs to: a box missing one face (fan = 1/5 of the rest) is closed, an open
   bowl (fan = 1/2 of the rest) is refused.  Loops whose edges touch (pinched:
   a vertex on two boundary edges of one side) are never closed.
5. **Orient shells**: inside-out shells are flipped, so that no region of space
   has a negative winding number.  Shells are visited from the largest
   |signed volume| down; a shell's parent is the smallest shell containing all
   of its sampled vertices (generalised winding number > 1/2).  A shell whose
   interior would get winding -1 is flipped together with the shells nested in
   it, so a cavity (a nested shell of opposite orientation) is kept.
6. What remains must enclose positive volume and be closed and consistently
   wound, or :class:`~supportgen.errors.MeshError` is raised with one line
   naming the input, what is wrong and what to do.

References
----------
.. [1] A. van Oosterom and J. Strackee, "The solid angle of a plane triangle",
   IEEE Trans. Biomed. Eng. 30(2):125-126, 1983 (solid angle of a triangle).
.. [2] A. Jacobson, L. Kavan and O. Sorkine-Hornung, "Robust inside-outside
   segmentation using generalized winding numbers", ACM TOG 32(4), 2013.
.. [3] C. Zhang and T. Chen, "Efficient feature extraction for 2D/3D objects in
   mesh representation", ICIP 2001 (volume as a sum of signed tetrahedra, i.e.
   the divergence theorem).
"""

from __future__ import annotations

import numpy as np
import trimesh
from scipy.sparse import coo_matrix, csr_matrix
from scipy.sparse.csgraph import breadth_first_order, connected_components

from ..constants import EPS_FLOOR, MERGE_FRACTION
from ..errors import MeshError

__all__ = ["HOLE_FRACTION", "repair_arrays"]

#: A hole is "small" (closed automatically) when the fan that closes it covers at most this
#: fraction of the surface area of the shell it is in. Our choice: a box missing one face
#: (fan = 1/5 of the rest) is closed, an open bowl (fan = 1/2 of the rest) is refused.
HOLE_FRACTION = 0.25
_FLAT = 1e-6  # a part thinner than this fraction of its largest extent is flat
_TINY = 1e-12  # face area (x diag^2) / volume (x diag^3) below this is zero to precision


def repair_arrays(vertices, faces, label: str, *, merge_is_repair: bool = True,
                  hole_fraction: float = HOLE_FRACTION) -> tuple[trimesh.Trimesh, tuple[str, ...]]:
    """Validate a triangle mesh given as arrays and repair what can be repaired safely.

    Parameters
    ----------
    vertices : (n, 3) array_like of float
        Vertex positions; never modified (copied).
    faces : (m, 3) array_like of int
        Vertex indices of each triangle; never modified (copied).
    label : str
        How the input is named in error messages (a path or a name).
    merge_is_repair : bool
        Record merged coincident vertices as a repair (False for STL, where
        merging is how the format is decoded).
    hole_fraction : float
        Largest hole closed automatically, as a fraction of its shell's surface area.

    Returns
    -------
    mesh : trimesh.Trimesh
        Closed, consistently wound, encloses positive volume (built with ``process=False``).
        ``mesh.metadata["source_face"]`` maps each face to the input face it came
        from (-1 for faces added to close a hole), so per-face marks on the input
        (protected surfaces, colours) survive the repair.
    repairs : tuple of str
        One short line per repair made, in the order of the module notes.

    Raises
    ------
    MeshError
        No triangles; indices out of range; NaN/inf coordinates; flat or
        zero-volume parts; every face degenerate; non-manifold edges;
        non-orientable surfaces; holes too large or pinched to close.

    Notes
    -----
    Cost O(m log m) in the number of faces m (sorting edges), plus O(s m) for the
    nesting test (s = 16 sampled vertices) when shells' bounding boxes nest.

    References
    ----------
    See the module references: [1]_ and [2]_ for the nesting test, [3]_ for volumes.

    Examples
    --------
    A unit cube missing one triangle has a three-edge hole, closed with one face:

    >>> box = trimesh.creation.box((1, 1, 1))
    >>> mesh, repairs = repair_arrays(box.vertices, box.faces[1:], "box")
    >>> repairs, round(float(mesh.volume), 6)
    (('closed 1 hole (1 face)',), 1.0)
    """
    repairs = []
    mesh = _repair(vertices, faces, label, merge_is_repair=merge_is_repair, repairs=repairs,
                   hole_fraction=hole_fraction)
    return mesh, tuple(repairs)


def _count(n: int, word: str) -> str:
    """``"1 face"``, ``"2 faces"``."""
    return f"{n} {word}{'s' * (n != 1)}"



def _repair(vertices, faces, label, *, merge_is_repair, repairs, hole_fraction):
    """The shared validation and repair path; see the module docstring for the order."""
    v = np.array(vertices, dtype=float).reshape(-1, 3)
    f = np.array(faces, dtype=np.int64).reshape(-1, 3)
    if len(f) == 0:
        raise MeshError(f"{label}: contains no triangles; export the surface as a mesh")
    if f.min() < 0 or f.max() >= len(v):
        raise MeshError(f"{label}: faces refer to vertices that do not exist; export again")
    used = np.unique(f)
    bad = ~np.isfinite(v[used]).all(axis=1)
    if bad.any():
        raise MeshError(f"{label}: {int(bad.sum())} vertex/vertices with NaN or infinite "
                        "coordinates; fix them or export the model again")
    extent = np.ptp(v[used], axis=0)
    diag = float(np.linalg.norm(extent))
    if extent.min() <= _FLAT * extent.max() or diag == 0:
        raise MeshError(f"{label}: flat part ({extent.min():.3g} thick across "
                        f"{extent.max():.3g}), it encloses no volume; give it thickness")
    source = np.arange(len(f))
    v, f, merged = _merge(v, f, diag)
    if merged and merge_is_repair:
        repairs.append(f"merged {merged} coincident vertices" if merged > 1
                       else "merged 1 coincident vertex")
    kept = _drop_faces(v, f, diag, repairs)
    f, source = f[kept], source[kept]
    if len(f) == 0:
        raise MeshError(f"{label}: every face is degenerate; export the model again")
    edges = _edges(f, len(v))
    if edges["nonmanifold"]:
        raise MeshError(f"{label}: {_count(edges['nonmanifold'], 'edge')} shared by more than two "
                        "faces (non-manifold); separate or join the bodies and export again")
    f = _orient(f, edges, label, repairs)
    v, f = _fill_holes(v, f, _edges(f, len(v)), label, hole_fraction, repairs)
    f = _orient_shells(v, f, _edges(f, len(v)), repairs)
    volume = float(_signed_volumes(v, f, np.zeros(len(f), int), 1)[0])
    if volume <= _TINY * diag**3:
        raise MeshError(f"{label}: encloses no volume ({volume:.3g}); "
                        "check the model is a solid, not a surface")
    mesh = trimesh.Trimesh(v, f, process=False)
    mesh.metadata["source_face"] = np.concatenate([source, np.full(len(f) - len(source), -1)])
    if not (mesh.is_watertight and mesh.is_winding_consistent):
        raise MeshError(f"{label}: repair could not close the surface; "
                        "close it in a modeller and export again")
    return mesh


# ----------------------------------------------------------------------------- steps


def _merge(v, f, diag):
    """Merge vertices equal to 1e-9 of the diagonal (below float32 STL resolution)."""
    used = np.unique(f)
    key = np.round((v[used] - v[used].min(axis=0)) / (MERGE_FRACTION * diag)).astype(np.int64)
    _, first, inverse = np.unique(key, axis=0, return_index=True, return_inverse=True)
    remap = np.full(len(v), -1, dtype=np.int64)
    remap[used] = inverse.ravel()
    return v[used[first]], remap[f], len(used) - len(first)


def _drop_faces(v, f, diag, repairs):
    """Indices of the faces kept after dropping those with a repeated corner or zero
    area, then duplicates (any winding).

    A zero-area face with three distinct corners is kept when the surface is
    closed with it: there it is a sliver of a sound solid (boolean unions make
    them), and dropping it would open a hole.
    """
    tri = v[f]
    area2 = np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
    s = np.sort(f, axis=1)
    distinct = (s[:, 0] != s[:, 1]) & (s[:, 1] != s[:, 2])
    keep = distinct & (area2 > 2 * _TINY * diag**2)
    if (distinct & ~keep).any():
        closed = _edges(f[distinct], len(v))
        if len(closed["boundary"]) == 0 and closed["nonmanifold"] == 0:
            keep = distinct
    if (~keep).sum():
        n = int((~keep).sum())
        repairs.append(f"dropped {_count(n, 'degenerate face')}")
    idx, s = np.flatnonzero(keep), s[keep]
    _, first = np.unique(s, axis=0, return_index=True)
    if len(first) < len(idx):
        n = len(idx) - len(first)
        repairs.append(f"dropped {_count(n, 'duplicate face')}")
    return idx[np.sort(first)]


def _edges(f, nv):
    """Pair each directed edge with its twin; boundary and non-manifold edges."""
    d = f[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2)
    owner = np.repeat(np.arange(len(f)), 3)
    key = d.min(axis=1) * nv + d.max(axis=1)
    order = np.argsort(key, kind="stable")
    ks = key[order]
    starts = np.flatnonzero(np.r_[True, ks[1:] != ks[:-1]])
    counts = np.diff(np.r_[starts, len(ks)])
    e1, e2 = order[starts[counts == 2]], order[starts[counts == 2] + 1]
    one = order[starts[counts == 1]]
    pairs = np.column_stack([owner[e1], owner[e2]])
    shells = connected_components(
        coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(len(f),) * 2),
        directed=False)
    return {"pairs": pairs, "same": d[e1, 0] == d[e2, 0], "boundary": d[one],
            "boundary_face": owner[one], "nonmanifold": int((counts > 2).sum()),
            "n_shells": shells[0], "shell": shells[1]}


def _orient(f, edges, label, repairs):
    """Consistent winding per shell: BFS 2-colouring of faces; flip the minority."""
    pairs, same, shell, k = edges["pairs"], edges["same"], edges["shell"], edges["n_shells"]
    if not same.any():
        return f
    m = len(f)
    roots = np.unique(shell, return_index=True)[1]  # one face per shell, joined to node m
    rows = np.r_[pairs[:, 0], pairs[:, 1], np.full(k, m), roots]
    cols = np.r_[pairs[:, 1], pairs[:, 0], roots, np.full(k, m)]
    w = np.r_[same, same, np.zeros(2 * k, bool)].astype(np.int8) + 1  # 1 keep, 2 flip
    graph = csr_matrix((w, (rows, cols)), shape=(m + 1, m + 1))
    order, pred = breadth_first_order(graph, m, directed=False, return_predecessors=True)
    nodes = order[1:]
    weights = (np.asarray(graph[pred[nodes], nodes]).ravel() - 1).tolist()
    parity = [0] * (m + 1)
    for node, parent, wt in zip(nodes.tolist(), pred[nodes].tolist(), weights):
        parity[node] = parity[parent] ^ wt
    flip = np.array(parity[:m], dtype=bool)
    if (same ^ flip[pairs[:, 0]] ^ flip[pairs[:, 1]]).any():
        raise MeshError(f"{label}: the surface is not orientable (it has no inside and "
                        "outside, like a Moebius strip); rebuild it as a closed solid")
    flipped = np.bincount(shell, weights=flip, minlength=k)
    flip ^= (2 * flipped > np.bincount(shell, minlength=k))[shell]
    n = int(flip.sum())
    if n:
        repairs.append(f"fixed winding of {_count(n, 'face')}")
    return np.where(flip[:, None], f[:, ::-1], f)


def _fill_holes(v, f, edges, label, hole_fraction, repairs):
    """Close each small boundary loop with a fan around its centroid (one triangle for
    a three-edge loop). Small: fan area <= ``hole_fraction`` x its shell's area."""
    bd, bface = edges["boundary"], edges["boundary_face"]
    if len(bd) == 0:
        return v, f
    nv = len(v)
    n_loops, vlabel = connected_components(
        coo_matrix((np.ones(len(bd)), (bd[:, 0], bd[:, 1])), shape=(nv, nv)), directed=False)
    loop = vlabel[bd[:, 0]]
    loops, loop = np.unique(loop, return_inverse=True)
    n_loops = len(loops)
    size = np.bincount(loop, minlength=n_loops)
    pinched = np.zeros(n_loops, bool)
    for col in (0, 1):
        multi = np.bincount(bd[:, col], minlength=nv) > 1
        pinched[loop[multi[bd[:, col]]]] = True
    centre = np.stack([np.bincount(loop, v[bd[:, 0], i], n_loops) for i in range(3)], 1)
    centre /= size[:, None]
    a, b, c = v[bd[:, 0]], v[bd[:, 1]], centre[loop]
    fan = np.bincount(loop, 0.5 * np.linalg.norm(np.cross(a - c, b - c), axis=1), n_loops)
    tri = v[f]
    area = 0.5 * np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
    shell_area = np.bincount(edges["shell"], area)[edges["shell"][bface]]
    limit = np.zeros(n_loops)
    np.maximum.at(limit, loop, hole_fraction * shell_area)
    ok = ~pinched & (fan <= limit)
    if not ok.all():
        worst = float((fan[~ok] / np.maximum(limit[~ok] / hole_fraction, EPS_FLOOR)).max())
        why = (" whose edges touch" if pinched[~ok].any() else
               f", the largest would cover {100 * worst:.0f}% of its shell's surface "
               f"(limit {100 * hole_fraction:.0f}%)")
        holes = _count(int((~ok).sum()), "hole")
        raise MeshError(f"{label}: open surface with {holes} that cannot be closed "
                        f"safely{why}; close it in a modeller and export again")
    three = size == 3
    fan_loop = np.flatnonzero(~three)
    centre_index = np.full(n_loops, -1)
    centre_index[fan_loop] = nv + np.arange(len(fan_loop))
    in_fan = ~three[loop]
    new = [np.column_stack([bd[in_fan, 1], bd[in_fan, 0], centre_index[loop[in_fan]]])]
    first = np.unique(loop, return_index=True)[1][three]  # one edge (a, b) per 3-loop
    third = (np.bincount(loop, bd[:, 0], n_loops)[three] - bd[first].sum(axis=1)).astype(int)
    new.append(np.column_stack([bd[first, 1], bd[first, 0], third]))
    added = sum(len(x) for x in new)
    repairs.append(f"closed {_count(n_loops, 'hole')} ({_count(added, 'face')})")
    return np.vstack([v, centre[fan_loop]]), np.vstack([f] + new)


def _signed_volumes(v, f, label, k):
    """Signed volume enclosed by each labelled closed shell (divergence theorem)."""
    tri = v[f] - v.min(axis=0)
    six = np.einsum("ij,ij->i", tri[:, 0], np.cross(tri[:, 1], tri[:, 2]))
    return np.bincount(label, six, minlength=k) / 6.0


def _winding_number(points, tri):
    """Generalised winding number of ``points`` (p, 3) w.r.t. triangles (t, 3, 3): the
    sum of solid angles / 4 pi (Van Oosterom & Strackee, IEEE Trans. Biomed. Eng.
    30(2):125, 1983; Jacobson, Kavan & Sorkine-Hornung, ACM TOG 32(4), 2013)."""
    out = np.empty(len(points))
    for i, p in enumerate(points):
        a, b, c = (tri[:, j] - p for j in range(3))
        la, lb, lc = (np.linalg.norm(x, axis=1) for x in (a, b, c))
        num = np.einsum("ij,ij->i", a, np.cross(b, c))
        den = (la * lb * lc + np.einsum("ij,ij->i", a, b) * lc
               + np.einsum("ij,ij->i", a, c) * lb + np.einsum("ij,ij->i", b, c) * la)
        out[i] = np.arctan2(num, den).sum() / (2 * np.pi)
    return out


def _orient_shells(v, f, edges, repairs, samples=16):
    """Flip shells so that no region has a negative winding number. Shells are visited
    from the largest |volume| down; a shell's parent is the smallest shell that contains
    all of its sampled vertices. A shell whose interior would get winding -1 is flipped
    together with the shells nested in it, which keeps each nested shell's meaning
    (opposite to its parent: cavity; same: embedded body)."""
    shell, k = edges["shell"], edges["n_shells"]
    vol = _signed_volumes(v, f, shell, k)
    lo = np.full((k, 3), np.inf)
    hi = np.full((k, 3), -np.inf)
    np.minimum.at(lo, shell, v[f].min(axis=1))
    np.maximum.at(hi, shell, v[f].max(axis=1))
    order = np.argsort(-np.abs(vol), kind="stable")
    wind = np.zeros(k, int)
    parity = np.zeros(k, bool)
    for rank, i in enumerate(order):
        parent = -1
        bigger = order[:rank][::-1]  # smaller shells first: the innermost container wins
        boxed = bigger[(lo[bigger] <= lo[i]).all(axis=1) & (hi[i] <= hi[bigger]).all(axis=1)]
        for j in boxed:
            corners = np.unique(f[shell == i])
            pts = v[corners[np.linspace(0, len(corners) - 1, samples).astype(int)]]
            if (np.abs(_winding_number(pts, v[f[shell == j]])) > 0.5).all():
                parent = j
                break
        w0, p0 = (wind[parent], parity[parent]) if parent >= 0 else (0, False)
        s = int(np.sign(vol[i])) * (-1 if p0 else 1)
        parity[i] = p0 ^ (w0 + s < 0)
        wind[i] = w0 + (abs(s) if w0 + s < 0 else s)
    n = int(parity.sum())
    if n:
        repairs.append(f"flipped {_count(n, 'inside-out shell')}")
    return np.where(parity[shell][:, None], f[:, ::-1], f)
