"""Mesh input and output: read a part, check it is a printable solid, repair it, write it.

Reading goes through trimesh for the file formats; every check and repair after that is
done here on plain ``(n, 3)`` arrays so that each one can be counted and reported:

1. coincident vertices are merged (for STL this is decoding, not a repair: the format
   stores no shared vertices);
2. degenerate faces (two corners on one vertex, or zero area) and duplicate faces are
   dropped;
3. the winding is made consistent within each connected shell (the minority is flipped);
4. small holes are closed with a fan of triangles around the hole's centroid;
5. inside-out shells are flipped, so that no region of space has a negative winding
   number (cavities, i.e. shells nested inside a solid with the opposite orientation, are
   kept);
6. what remains must be finite, closed, orientable and enclose volume, or
   :class:`~supportgen.errors.MeshError` is raised with one line naming the file, what
   is wrong and what to do.

Writing is atomic (a temporary file in the same folder, then :func:`os.replace`), so a
failure leaves no partial file.
"""

from __future__ import annotations

import io
import os
import tempfile
import warnings
import zipfile
from dataclasses import dataclass
from pathlib import Path
from xml.sax.saxutils import quoteattr

import numpy as np
import trimesh
from scipy.sparse import coo_matrix, csr_matrix
from scipy.sparse.csgraph import breadth_first_order, connected_components

from supportgen.errors import MeshError

__all__ = [
    "READ_FORMATS",
    "WRITE_FORMATS",
    "HOLE_FRACTION",
    "LoadedMesh",
    "load_mesh",
    "prepare_mesh",
    "write_mesh",
    "atomic_write",
    "atomic_write_text",
]

READ_FORMATS = (".stl", ".obj", ".ply", ".3mf")
WRITE_FORMATS = (".stl", ".3mf", ".ply")
#: A hole is "small" (closed automatically) when the fan that closes it covers at most this
#: fraction of the surface area of the shell it is in. Our choice: a box missing one face
#: (fan = 1/5 of the rest) is closed, an open bowl (fan = 1/2 of the rest) is refused.
HOLE_FRACTION = 0.25
_FLAT = 1e-6  # a part thinner than this fraction of its largest extent is flat
_TINY = 1e-12  # face area (x diag^2) / volume (x diag^3) below this is zero to precision


@dataclass(frozen=True)
class LoadedMesh:
    """A part that passed validation: ``mesh`` is closed, consistently wound and encloses
    positive volume; ``repairs`` holds one short line per repair made; ``source`` is the
    path (or the name given to an in-memory mesh)."""

    mesh: trimesh.Trimesh
    repairs: tuple[str, ...]
    source: str


def load_mesh(path, *, name=None, hole_fraction: float = HOLE_FRACTION) -> LoadedMesh:
    """Read a mesh file, validate it and repair what can be repaired safely.

    Parameters
    ----------
    path : str or os.PathLike
        An ``.stl`` (binary or ASCII), ``.obj``, ``.ply`` or ``.3mf`` file. Scenes with
        several bodies are concatenated into one mesh.
    name : str, optional
        How the file is named in error messages; defaults to ``str(path)``.
    hole_fraction : float
        Largest hole closed automatically, as a fraction of its shell's surface area.

    Returns
    -------
    LoadedMesh
        The repaired mesh, the list of repairs and the source path.

    Raises
    ------
    MeshError
        Missing, empty or unreadable file; unknown extension; truncated binary STL (the
        header's triangle count is checked against the file size before parsing);
        NaN/inf coordinates; flat or zero-volume parts; non-manifold edges; non-orientable
        or open surfaces that cannot be closed.

    Notes
    -----
    A hole (boundary loop) is *small*, and closed with a fan of triangles around its
    centroid, when that fan's area is at most ``hole_fraction`` of the surface area of
    the shell it belongs to (default 0.25, our choice); holes whose edges touch are never
    closed. Inside-out shells: a shell is flipped when the region it encloses would
    otherwise have a negative winding number; shells nested in it flip with it, so a
    correctly oriented cavity is kept. Cost O(n log n) in the number of faces n (sorting
    edges), plus O(s n) for the nesting test (s = 16 sampled vertices) when shells' bounding
    boxes nest.

    References
    ----------
    3MF Consortium, *3MF Core Specification* 1.2.3 (2019). The STL binary layout
    (80-byte header, uint32 count, 50 bytes per triangle) is as in 3D Systems,
    *StereoLithography Interface Specification* (1989).

    Examples
    --------
    >>> import os, tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     write_mesh(trimesh.creation.box((10, 10, 10)), os.path.join(folder, "cube.stl"))
    ...     part = load_mesh(os.path.join(folder, "cube.stl"))
    >>> round(float(part.mesh.volume), 6), part.repairs
    (1000.0, ())
    """
    label = str(path) if name is None else str(name)
    p = Path(path)
    ext = p.suffix.lower()
    if ext not in READ_FORMATS:
        raise MeshError(f"{label}: unknown file type {ext or '(no extension)'!r}; "
                        f"export the model as one of {', '.join(READ_FORMATS)}")
    if not p.is_file():
        raise MeshError(f"{label}: file not found; check the path")
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise MeshError(f"{label}: cannot read the file ({exc.strerror}); "
                        "check its permissions") from exc
    if not data.strip():
        raise MeshError(f"{label}: the file is empty; export the model again")
    repairs = []
    if ext == ".stl":
        data = _check_stl_size(data, label, repairs)
    try:
        with warnings.catch_warnings():  # bad numbers are reported by our own checks below
            warnings.simplefilter("ignore", RuntimeWarning)
            loaded = trimesh.load_mesh(trimesh.util.wrap_as_stream(data), file_type=ext[1:],
                                       process=False)
        vertices, faces = np.asarray(loaded.vertices), np.asarray(loaded.faces)
    except Exception as exc:  # parsers of untrusted files raise many types; report them all
        raise MeshError(f"{label}: unreadable {ext[1:].upper()} file ({type(exc).__name__}: "
                        f"{str(exc).splitlines()[0] if str(exc) else 'no detail'}); "
                        "export the model again") from exc
    return _repair(vertices, faces, label, str(path), merge_is_repair=ext != ".stl",
                   repairs=repairs, hole_fraction=hole_fraction)


def prepare_mesh(mesh, name, *, hole_fraction: float = HOLE_FRACTION) -> LoadedMesh:
    """Validate and repair an in-memory mesh exactly as :func:`load_mesh` does a file.

    Parameters
    ----------
    mesh : trimesh.Trimesh or trimesh.Scene
        The part; never modified (the result is built from copies of its arrays).
    name : str
        How the mesh is named in messages and in ``LoadedMesh.source``.
    hole_fraction : float
        Largest hole closed automatically, as a fraction of its shell's surface area.

    Returns
    -------
    LoadedMesh

    Raises
    ------
    MeshError
        For the same defects as :func:`load_mesh`, or when ``mesh`` is not a mesh.

    Notes
    -----
    Cost as :func:`load_mesh`.

    Examples
    --------
    >>> box = trimesh.creation.box((2, 3, 4))
    >>> prepare_mesh(box.copy().invert(), "box").repairs
    ('flipped 1 inside-out shell',)
    """
    if isinstance(mesh, trimesh.Scene):
        mesh = mesh.to_mesh()
    if not isinstance(mesh, trimesh.Trimesh):
        raise MeshError(f"{name}: expected a trimesh.Trimesh, got {type(mesh).__name__}; "
                        "pass a mesh or a file path")
    return _repair(np.array(mesh.vertices, dtype=float), np.array(mesh.faces, dtype=np.int64),
                   str(name), str(name), merge_is_repair=True, repairs=[],
                   hole_fraction=hole_fraction)


def write_mesh(mesh, path) -> None:
    """Write ``mesh`` atomically as binary STL, 3MF or binary PLY, chosen by extension.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The mesh to write, as it is (no repair).
    path : str or os.PathLike
        Target file; ``.stl``, ``.3mf`` or ``.ply``.

    Raises
    ------
    MeshError
        Unknown extension, empty mesh, or the file cannot be written.

    Notes
    -----
    Cost O(n) in faces. The same mesh always gives the same bytes (3MF is written here,
    with fixed zip timestamps, following the 3MF Core Specification 1.2.3).
    """
    ext = Path(path).suffix.lower()
    if ext not in WRITE_FORMATS:
        raise MeshError(f"{path}: cannot write file type {ext or '(no extension)'!r}; "
                        f"use one of {', '.join(WRITE_FORMATS)}")
    if not isinstance(mesh, trimesh.Trimesh) or len(mesh.faces) == 0:
        raise MeshError(f"{path}: nothing to write (no triangles); check the model")
    if ext == ".3mf":
        data = _threemf_bytes(np.asarray(mesh.vertices), np.asarray(mesh.faces))
    elif ext == ".ply":
        data = mesh.export(file_type="ply", encoding="binary")
    else:
        data = mesh.export(file_type="stl")  # trimesh writes binary STL
    try:
        atomic_write(path, data)
    except OSError as exc:
        raise MeshError(f"{path}: cannot write ({exc.strerror or exc}); "
                        "check that the folder exists and is writable") from exc


def atomic_write(path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same folder.

    Parameters
    ----------
    path : str or os.PathLike
        Target file; replaced in one step by :func:`os.replace`.
    data : bytes
        The whole content.

    Raises
    ------
    OSError
        When the folder is missing or not writable, the disk is full, etc.; the
        temporary file is removed first, so no partial file remains.

    Notes
    -----
    A new file gets mode 0o644; an existing file keeps its mode.
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    done = False
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, path.stat().st_mode & 0o7777 if path.exists() else 0o644)
        os.replace(tmp, path)
        done = True
    finally:
        if not done:
            Path(tmp).unlink(missing_ok=True)


def atomic_write_text(path, text: str) -> None:
    """Write ``text`` to ``path`` as UTF-8, atomically.

    Parameters
    ----------
    path : str or os.PathLike
        Target file.
    text : str
        The whole content.

    Raises
    ------
    OSError
        As :func:`atomic_write`; no partial file remains.

    Notes
    -----
    Cost O(len(text)).
    """
    atomic_write(path, text.encode("utf-8"))


# ----------------------------------------------------------------------------- reading


def _count(n: int, word: str) -> str:
    """``"1 face"``, ``"2 faces"``."""
    return f"{n} {word}{'s' * (n != 1)}"


def _check_stl_size(data: bytes, label: str, repairs: list) -> bytes:
    """Refuse a truncated binary STL before the parser sees it; trim trailing bytes."""
    head = data[:4096]
    text = head.isascii() and not any(b < 9 or 13 < b < 32 for b in head)
    if text and head.lstrip()[:5].lower() == b"solid":
        return data  # ASCII STL
    if len(data) < 84:
        raise MeshError(f"{label}: binary STL too short ({len(data)} bytes, the header "
                        "alone is 84); export the model again")
    count = int.from_bytes(data[80:84], "little")
    expected = 84 + 50 * count
    if len(data) < expected:
        raise MeshError(f"{label}: truncated binary STL (header promises {count} triangles "
                        f"= {expected} bytes, file has {len(data)}); export or copy it again")
    if len(data) > expected:
        repairs.append(f"ignored {len(data) - expected} bytes after the last triangle")
    return data[:expected]


def _repair(vertices, faces, label, source, *, merge_is_repair, repairs, hole_fraction):
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
    v, f, merged = _merge(v, f, diag)
    if merged and merge_is_repair:
        repairs.append(f"merged {merged} coincident vertices" if merged > 1
                       else "merged 1 coincident vertex")
    f = _drop_faces(v, f, diag, repairs)
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
    if not (mesh.is_watertight and mesh.is_winding_consistent):
        raise MeshError(f"{label}: repair could not close the surface; "
                        "close it in a modeller and export again")
    return LoadedMesh(mesh=mesh, repairs=tuple(repairs), source=source)


# ----------------------------------------------------------------------------- repairs


def _merge(v, f, diag):
    """Merge vertices equal to 1e-9 of the diagonal (below float32 STL resolution)."""
    used = np.unique(f)
    key = np.round((v[used] - v[used].min(axis=0)) / (1e-9 * diag)).astype(np.int64)
    _, first, inverse = np.unique(key, axis=0, return_index=True, return_inverse=True)
    remap = np.full(len(v), -1, dtype=np.int64)
    remap[used] = inverse.ravel()
    return v[used[first]], remap[f], len(used) - len(first)


def _drop_faces(v, f, diag, repairs):
    """Drop faces with a repeated corner or zero area, then duplicates (any winding).

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
    f, s = f[keep], s[keep]
    _, first = np.unique(s, axis=0, return_index=True)
    if len(first) < len(f):
        n = len(f) - len(first)
        repairs.append(f"dropped {_count(n, 'duplicate face')}")
    return f[np.sort(first)]


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
        worst = float((fan[~ok] / np.maximum(limit[~ok] / hole_fraction, 1e-300)).max())
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


# ----------------------------------------------------------------------------- writing


def _threemf_bytes(v, f) -> bytes:
    """A 3MF package (3MF Core Specification 1.2.3): one object, one build item."""
    core = "http://schemas.microsoft.com/3dmanufacturing/core/2015/02"
    verts = "".join(f'<vertex x="{x!r}" y="{y!r}" z="{z!r}"/>' for x, y, z in v.tolist())
    tris = "".join(f'<triangle v1="{a}" v2="{b}" v3="{c}"/>' for a, b, c in f.tolist())
    model = (f'<?xml version="1.0" encoding="UTF-8"?>\n<model unit="millimeter" '
             f'xml:lang="en-US" xmlns={quoteattr(core)}><resources><object id="1" '
             f'type="model"><mesh><vertices>{verts}</vertices><triangles>{tris}</triangles>'
             '</mesh></object></resources><build><item objectid="1"/></build></model>')
    types = ('<?xml version="1.0" encoding="UTF-8"?>\n<Types xmlns="http://schemas.'
             'openxmlformats.org/package/2006/content-types"><Default Extension="rels" '
             'ContentType="application/vnd.openxmlformats-package.relationships+xml"/>'
             '<Default Extension="model" '
             'ContentType="application/vnd.ms-package.3dmanufacturing-3dmodel+xml"/></Types>')
    rels = ('<?xml version="1.0" encoding="UTF-8"?>\n<Relationships xmlns="http://schemas.'
            'openxmlformats.org/package/2006/relationships"><Relationship '
            'Target="/3D/3dmodel.model" Id="rel0" '
            'Type="http://schemas.microsoft.com/3dmanufacturing/2013/01/3dmodel"/>'
            '</Relationships>')
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        for name, text in (("[Content_Types].xml", types), ("_rels/.rels", rels),
                           ("3D/3dmodel.model", model)):
            info = zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            archive.writestr(info, text.encode("utf-8"))
    return buffer.getvalue()
