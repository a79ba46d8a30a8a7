"""Mesh input and output: read a part, check it is a printable solid, write it.

Reading goes through trimesh for the file formats (a binary STL's size is checked
against its header first); every check and repair after that is done by
:func:`supportgen.io.repair.repair_arrays` on plain ``(n, 3)`` arrays, so that each one
can be counted and reported: coincident vertices merged, degenerate and duplicate
faces dropped, winding made consistent, small holes closed, inside-out shells
flipped.  What remains must be finite, closed, orientable and enclose volume, or
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

from supportgen.errors import MeshError
from supportgen.io.repair import HOLE_FRACTION, repair_arrays

__all__ = [
    "READ_FORMATS",
    "part_name",
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


def part_name(path) -> str:
    """The name a part's outputs take: its file name without the format's extension.

    The one rule for output names (``generate``, ``batch`` and ``bench`` all use
    it): only the extension goes, so ``part.v1.stl`` and ``part.v2.stl`` stay apart.

    >>> part_name("jobs/part.v2.STL"), part_name("lid.3mf"), part_name("notes")
    ('part.v2', 'lid', 'notes')
    """
    p = Path(path)
    return p.name[: -len(p.suffix)] if p.suffix.lower() in READ_FORMATS else p.name
WRITE_FORMATS = (".stl", ".3mf", ".ply")
# HOLE_FRACTION (what "small hole" means) is defined in supportgen.io.repair and re-exported here.


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
    mesh, fixed = repair_arrays(vertices, faces, label, merge_is_repair=ext != ".stl",
                                hole_fraction=hole_fraction)
    return LoadedMesh(mesh=mesh, repairs=tuple(repairs) + fixed, source=str(path))


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
    fixed, repairs = repair_arrays(np.array(mesh.vertices, dtype=float), np.array(mesh.faces, dtype=np.int64),
                                   str(name), merge_is_repair=True, hole_fraction=hole_fraction)
    return LoadedMesh(mesh=fixed, repairs=repairs, source=str(name))


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
