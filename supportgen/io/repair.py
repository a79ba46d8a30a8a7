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
   wound.
7. Where steps 3-6 cannot make a clean solid (holes too large or pinched,
   edges shared by more than two faces, a non-orientable surface), the solid
   the printer would cure is rebuilt from the generalised winding number
   (:func:`supportgen.io.winding.solid_from_winding`) and recorded with the
   volume before and after; only a surface with no inside at all raises
   :class:`~supportgen.errors.MeshError`, with one line naming the input, what is
   wrong and what to do.

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
from scipy.spatial import cKDTree

from ..constants import EPS_FLOOR, EXACT_FRACTION, MERGE_FRACTION
from ..errors import MeshError
from .winding import solid_from_winding

__all__ = ["HOLE_FRACTION", "repair_arrays"]

#: A hole is "small" (closed automatically) when the fan that closes it covers at most this
#: fraction of the surface area of the shell it is in. Our choice: a box missing one face
#: (fan = 1/5 of the rest) is closed, an open bowl (fan = 1/2 of the rest) is refused.
HOLE_FRACTION = 0.25
_FLAT = 1e-6  # a part thinner than this fraction of its largest extent is flat
_TINY = 1e-12  # face area (x diag^2) / volume (x diag^3) below this is zero to precision


def repair_arrays(
    vertices, faces, label: str, *, merge_is_repair: bool = True, hole_fraction: float = HOLE_FRACTION
) -> tuple[trimesh.Trimesh, tuple[str, ...]]:
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
        (protected surfaces, colours) survive the repair.  A solid rebuilt from the
        winding number (step 7) has no input face (all -1); its
        ``metadata["rebuilt_from"]`` keeps the input faces, the grid step and the
        rebuilt vertices, from which :mod:`supportgen.supports.protect` carries marks.
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
    mesh = _repair(
        vertices, faces, label, merge_is_repair=merge_is_repair, repairs=repairs, hole_fraction=hole_fraction
    )
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
    used = _used(f, len(v))
    bad = ~np.isfinite(v[used]).all(axis=1)
    if bad.any():
        raise MeshError(
            f"{label}: {int(bad.sum())} vertex/vertices with NaN or infinite "
            "coordinates; fix them or export the model again"
        )
    extent = np.ptp(v[used], axis=0)
    diag = float(np.linalg.norm(extent))
    if extent.min() <= _FLAT * extent.max() or diag == 0:
        raise MeshError(
            f"{label}: flat part ({extent.min():.3g} thick across "
            f"{extent.max():.3g}), it encloses no volume; give it thickness"
        )
    source = np.arange(len(f))
    v, f, merged = _merge_best(v, f, diag)
    if merged and merge_is_repair:
        repairs.append(f"merged {merged} coincident vertices" if merged > 1 else "merged 1 coincident vertex")
    kept = _drop_faces(v, f, diag, repairs)
    f, source = f[kept], source[kept]
    if len(f) == 0:
        raise MeshError(f"{label}: every face is degenerate; export the model again")
    done = len(repairs)
    try:
        return _clean_surface(v, f, source, label, repairs, hole_fraction, diag)
    except MeshError as exc:
        del repairs[done:]  # the surface route's partial repairs are not what was done
        # Open, non-manifold or non-orientable: the printer still cures whatever the
        # surface encloses, so build that solid (or say why there is none).
        try:
            mesh, line = solid_from_winding(v, f, label)
        except MeshError as none:
            raise MeshError(f"{none}; the surface also failed repair: {str(exc).removeprefix(label + ': ')}") from exc
        repairs.append(line)
        # A rebuilt solid has no face of the input: none carries an input face's marks
        # directly.  The input is kept so that marks can be carried to the nearest rebuilt
        # faces when they are asked for (supportgen.supports.protect), with the rebuilt
        # vertices as built, so later moves of the part (scale, turn, lift) can be followed.
        mesh.metadata["source_face"] = np.full(len(mesh.faces), -1)
        mesh.metadata["rebuilt_from"] = {
            "vertices": v,
            "faces": f,
            "source_face": source,
            "cell": float(mesh.metadata.get("winding_cell", 0.0)),
            "built_vertices": np.array(mesh.vertices, float),
        }
        return mesh


def _clean_surface(v, f, source, label, repairs, hole_fraction, diag):
    """Steps 3-6 of the module notes on a merged, degenerate-free soup; MeshError where they cannot finish."""
    edges = _edges(f, len(v))
    if edges["nonmanifold"]:
        raise MeshError(
            f"{label}: {_count(edges['nonmanifold'], 'edge')} shared by more than two "
            "faces (non-manifold); separate or join the bodies and export again"
        )
    oriented = _orient(f, edges, label, repairs)
    edges = edges if oriented is f else _edges(oriented, len(v))  # unchanged: the same pairs
    v, filled = _fill_holes(v, oriented, edges, label, hole_fraction, repairs)
    edges = edges if filled is oriented else _edges(filled, len(v))
    f = _orient_shells(v, filled, edges, repairs)
    volume = float(_signed_volumes(v, f, np.zeros(len(f), int), 1)[0])
    if volume <= _TINY * diag**3:
        raise MeshError(f"{label}: encloses no volume ({volume:.3g}); check the model is a solid, not a surface")
    mesh = trimesh.Trimesh(v, f, process=False)
    mesh.metadata["source_face"] = np.concatenate([source, np.full(len(f) - len(source), -1)])
    if not (mesh.is_watertight and mesh.is_winding_consistent):
        raise MeshError(f"{label}: repair could not close the surface; close it in a modeller and export again")
    return mesh


# ----------------------------------------------------------------------------- steps


def _used(f, nv) -> np.ndarray:
    """The vertex indices that faces ``f`` use, ascending (``np.unique(f)`` in O(n + nv))."""
    return np.flatnonzero(np.bincount(np.ravel(f), minlength=nv))


def _unique_rows(a) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(a, axis=0, return_index=True, return_inverse=True)[1:]`` by one stable
    lexicographic sort (about 3x faster on a few 100k rows): the first row of each
    distinct value, in sorted order, and each row's group.

    >>> first, inverse = _unique_rows(np.array([[1.0, 2.0], [0.0, 5.0], [1.0, 2.0]]))
    >>> first.tolist(), inverse.tolist()
    ([1, 0], [1, 0, 1])
    """
    a = np.asarray(a)
    if len(a) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    order = np.lexsort(a.T[::-1])
    s = a[order]
    new = np.r_[True, (s[1:] != s[:-1]).any(axis=1)]
    inverse = np.empty(len(a), np.int64)
    inverse[order] = np.cumsum(new) - 1
    return order[new], inverse


def _open_edges(f, nv) -> int:
    """Boundary plus non-manifold edges: what keeps a surface from being closed."""
    e = _edges(f, nv)
    return len(e["boundary"]) + e["nonmanifold"]


def _merge_best(v, f, diag):
    """Exact duplicates merged; near ones too only where that closes the surface further.

    A sound surface (a boolean union's output) can have edges far below a micron:
    merging its near vertices would collapse them.  So the near merge of
    :func:`_merge` is kept only when it leaves fewer open or non-manifold edges
    than the exact one (float32 noise on shared corners).
    """
    v0, f0, n0 = _merge(v, f, diag, EXACT_FRACTION)
    open0 = _open_edges(f0, len(v0))
    if open0 == 0:
        return v0, f0, n0
    v1, f1, n1 = _merge(v, f, diag, MERGE_FRACTION)
    keep = np.flatnonzero((f1[:, 0] != f1[:, 1]) & (f1[:, 1] != f1[:, 2]) & (f1[:, 0] != f1[:, 2]))
    if _open_edges(f1[keep], len(v1)) < open0:
        return v1, f1, n1
    return v0, f0, n0


def _merge(v, f, diag, fraction=MERGE_FRACTION):
    """Merge vertices closer than :data:`~supportgen.constants.MERGE_FRACTION` of the diagonal.

    Exact duplicates are merged by sorting; near ones (float32 rounding and export
    noise leave a shared corner as several points a few ulps apart) are joined by a
    k-d tree pair query and connected components, so a cluster merges whole wherever
    it sits (rounding to a grid would split clusters that straddle a cell edge).
    """
    used = _used(f, len(v))
    pts = v[used]
    first, inverse = _unique_rows(pts)
    uniq = pts[first]
    pairs = cKDTree(uniq).query_pairs(fraction * diag, output_type="ndarray")
    if len(pairs):
        n, label = connected_components(
            coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(len(uniq), len(uniq))), directed=False
        )
        rep = np.full(n, len(uniq))
        np.minimum.at(rep, label, np.arange(len(uniq)))
        keep, relabel = np.unique(rep[label], return_inverse=True)
        uniq, inverse = uniq[keep], relabel.ravel()[inverse]
    remap = np.full(len(v), -1, dtype=np.int64)
    remap[used] = inverse
    return uniq, remap[f], len(used) - len(uniq)


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
    first = np.sort(_unique_rows(s)[0])
    if len(first) < len(idx):
        n = len(idx) - len(first)
        repairs.append(f"dropped {_count(n, 'duplicate face')}")
    return idx[first]


def _edges(f, nv):
    """Pair each directed edge with its twin; boundary and non-manifold edges."""
    d = f[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2)
    owner = np.repeat(np.arange(len(f)), 3)
    key = np.minimum(d[:, 0], d[:, 1]) * nv + np.maximum(d[:, 0], d[:, 1])  # not .min(axis=1): 10x slower on 2 columns
    order = np.argsort(key, kind="stable")
    ks = key[order]
    starts = np.flatnonzero(np.r_[True, ks[1:] != ks[:-1]])
    counts = np.diff(np.r_[starts, len(ks)])
    e1, e2 = order[starts[counts == 2]], order[starts[counts == 2] + 1]
    one = order[starts[counts == 1]]
    pairs = np.column_stack([owner[e1], owner[e2]])
    shells = connected_components(
        coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(len(f),) * 2), directed=False
    )
    return {
        "pairs": pairs,
        "same": d[e1, 0] == d[e2, 0],
        "boundary": d[one],
        "boundary_face": owner[one],
        "nonmanifold": int((counts > 2).sum()),
        "n_shells": shells[0],
        "shell": shells[1],
    }


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
        raise MeshError(
            f"{label}: the surface is not orientable (it has no inside and "
            "outside, like a Moebius strip); rebuild it as a closed solid"
        )
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
        coo_matrix((np.ones(len(bd)), (bd[:, 0], bd[:, 1])), shape=(nv, nv)), directed=False
    )
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
    loop_shell_area = np.zeros(n_loops)
    np.maximum.at(loop_shell_area, loop, shell_area)
    ok = ~pinched & (fan <= hole_fraction * loop_shell_area)
    if not ok.all():
        worst = float((fan[~ok] / np.maximum(loop_shell_area[~ok], EPS_FLOOR)).max())
        why = (
            " whose edges touch"
            if pinched[~ok].any()
            else f", the largest would cover {100 * worst:.0f}% of its shell's surface "
            f"(limit {100 * hole_fraction:.0f}%)"
        )
        holes = _count(int((~ok).sum()), "hole")
        raise MeshError(
            f"{label}: open surface with {holes} that cannot be closed "
            f"safely{why}; close it in a modeller and export again"
        )
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
        den = (
            la * lb * lc
            + np.einsum("ij,ij->i", a, b) * lc
            + np.einsum("ij,ij->i", a, c) * lb
            + np.einsum("ij,ij->i", b, c) * la
        )
        out[i] = np.arctan2(num, den).sum() / (2 * np.pi)
    return out


def _orient_shells(v, f, edges, repairs, samples=16):
    """Flip shells so that no region has a negative winding number. Shells are visited
    from the largest |volume| down; a shell's parent is the smallest shell that contains
    it.  A shell whose interior would get winding -1 is flipped together with the shells
    nested in it, which keeps each nested shell's meaning (opposite to its parent:
    cavity; same: embedded body).

    Containment comes from one pass over all shells: a ray along +x from a point of
    each shell, its crossings with the other shells' triangles found through an R-tree
    of their (y, z) bounds and counted with their orientation, gives the winding number
    of that point for every shell at once (for a closed oriented surface, crossings out
    minus crossings in).  Cost O(n log n + crossings) rather than a test per pair of
    shells.  A ray that grazes an edge is retried from other points of the shell, and
    after three the generalised winding number of ``samples`` vertices decides."""
    shell, k = edges["shell"], edges["n_shells"]
    vol = _signed_volumes(v, f, shell, k)
    order = np.argsort(-np.abs(vol), kind="stable")
    rank = np.empty(k, int)
    rank[order] = np.arange(k)
    containers = _shell_containers(v, f, shell, k, samples) if k > 1 else [np.zeros(0, int)]
    wind = np.zeros(k, int)
    parity = np.zeros(k, bool)
    for i in order:
        outer = containers[i][rank[containers[i]] < rank[i]]
        parent = int(outer[np.argmax(rank[outer])]) if len(outer) else -1  # the innermost container
        w0, p0 = (wind[parent], parity[parent]) if parent >= 0 else (0, False)
        s = int(np.sign(vol[i])) * (-1 if p0 else 1)
        parity[i] = p0 ^ (w0 + s < 0)
        wind[i] = w0 + (abs(s) if w0 + s < 0 else s)
    n = int(parity.sum())
    if n:
        repairs.append(f"flipped {_count(n, 'inside-out shell')}")
    return np.where(parity[shell][:, None], f[:, ::-1], f)


#: Rays tested against every face's box directly, below which building an R-tree costs more
#: (a tree of n boxes costs about as much as 1000 direct passes over them, measured).
_DIRECT_RAYS = 256


def _boxes_over(boxes, yz, kept: dict):
    """The boxes (n, 4: lower y, z, upper y, z; bounds included) over each point (k, 2):
    indices concatenated point by point, and the count per point (as ``rtree``'s
    ``intersection_v``).  Few points test every box directly; many use an R-tree, built
    once into ``kept`` for the calls that share it."""
    yz = np.asarray(yz, float).reshape(-1, 2)
    if len(yz) > _DIRECT_RAYS:
        if "tree" not in kept:
            kept["tree"] = trimesh.util.bounds_tree(boxes)
        ids, per = kept["tree"].intersection_v(yz, yz)
        return np.asarray(ids, np.int64), np.asarray(per, np.int64)
    hits = [
        np.flatnonzero((boxes[:, 0] <= y) & (y <= boxes[:, 2]) & (boxes[:, 1] <= z) & (z <= boxes[:, 3])) for y, z in yz
    ]
    per = np.array([len(h) for h in hits], np.int64)
    return (np.concatenate(hits) if hits else np.zeros(0, np.int64)), per


def _shell_containers(v, f, shell, k, samples, tries=3):
    """For each shell, the other shells that contain it (non-zero winding number at one of its
    points), from one +x ray per shell; see :func:`_orient_shells`."""
    tri = v[f]
    yz = tri[:, :, 1:]
    boxes, kept = np.column_stack([yz.min(axis=1), yz.max(axis=1)]), {}
    xmax = tri[:, :, 0].max(axis=1)
    # Edge vectors in the (y, z) plane and the sign of each face's normal along +x.
    a, b, c = yz[:, 0], yz[:, 1], yz[:, 2]
    det = (b[:, 0] - a[:, 0]) * (c[:, 1] - a[:, 1]) - (c[:, 0] - a[:, 0]) * (b[:, 1] - a[:, 1])
    # Faces of each shell, those facing most along x first: a ray leaves them cleanly, while one
    # from a face lying in a coordinate plane would run along the faces of other shells in it.
    area2 = np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
    by_shell = np.lexsort((-np.abs(det) / np.maximum(area2, EPS_FLOOR), shell))
    starts = np.searchsorted(shell[by_shell], np.arange(k + 1))
    all_faces = np.argsort(shell, kind="stable")
    scale = np.abs(yz).max() + 1.0
    weights = np.array([0.2113248654, 0.3166247904, 0.4720503442])  # no simple ratios: off every edge
    count = np.diff(starts)
    found: list = [None] * k
    pending = np.arange(k)
    for t in range(tries):
        pending = pending[count[pending] > t]
        if not len(pending):
            break
        step = np.maximum(1, count[pending] // (4 * tries))
        p = np.einsum("j,ijk->ik", weights, tri[by_shell[starts[pending] + t * step]])
        ids, per = _boxes_over(boxes, p[:, 1:], kept)
        owner = np.repeat(np.arange(len(pending)), np.asarray(per, np.int64))
        keep = (shell[ids] != pending[owner]) & (xmax[ids] > p[owner, 0]) & (det[ids] != 0)
        ids, owner = ids[keep], owner[keep]
        # Barycentric coordinates of each ray's (y, z) in each candidate's projection.
        q = p[owner, 1:] - a[ids]
        e1, e2, d = b[ids] - a[ids], c[ids] - a[ids], det[ids]
        wb = (q[:, 0] * e2[:, 1] - q[:, 1] * e2[:, 0]) / d
        wc = (e1[:, 0] * q[:, 1] - e1[:, 1] * q[:, 0]) / d
        bary = np.column_stack([1 - wb - wc, wb, wc])
        x = (bary * tri[ids, :, 0]).sum(axis=1)
        near = ((np.abs(bary) < 1e-9).any(axis=1) | (np.abs(x - p[owner, 0]) < 1e-9 * scale)) & (bary > -1e-9).all(
            axis=1
        )
        grazed = np.bincount(owner[near], minlength=len(pending)) > 0
        hit = (bary >= 0).all(axis=1) & (x > p[owner, 0]) & ~grazed[owner]
        # Winding number of each ray's start for each shell it crosses: signed crossings.
        pair, inverse = np.unique(owner[hit] * k + shell[ids[hit]], return_inverse=True)
        wn = np.rint(np.bincount(inverse, np.sign(d[hit]), minlength=len(pair)))
        inside = pair[wn != 0]
        clean = np.flatnonzero(~grazed)
        split = np.searchsorted(inside // k, clean, side="left"), np.searchsorted(inside // k, clean, side="right")
        for o, lo, hi in zip(clean, *split):
            found[pending[o]] = inside[lo:hi] % k
        pending = pending[grazed]
    for i in range(k):
        faces_i = all_faces[starts[i] : starts[i + 1]]
        if found[i] is not None:
            continue
        # Every ray grazed an edge: the generalised winding number of sampled vertices decides.
        corners = np.unique(f[faces_i])
        pts = v[corners[np.linspace(0, len(corners) - 1, samples).astype(int)]]
        others = [j for j in range(k) if j != i]
        found[i] = np.array(
            [
                j
                for j in others
                if (np.abs(_winding_number(pts, tri[all_faces[starts[j] : starts[j + 1]]])) > 0.5).all()
            ],
            int,
        )
    return found
