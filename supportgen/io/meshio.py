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
failure leaves no partial file; a part's whole output set is committed together by
:func:`supportgen.io.outputs.commit_set`.  Input caps (faces after instancing, a 3MF
archive's decompressed size) are checked before the parser runs.
"""

from __future__ import annotations

import io
import os
import re
import warnings
import zipfile
from dataclasses import dataclass
from pathlib import Path
from xml.sax.saxutils import quoteattr

import numpy as np
import trimesh

from supportgen.errors import MeshError
from supportgen.io.outputs import stage_file
from supportgen.io.repair import HOLE_FRACTION, repair_arrays
from supportgen.settings import Limits

__all__ = [
    "READ_FORMATS",
    "part_name",
    "WRITE_FORMATS",
    "HOLE_FRACTION",
    "LoadedMesh",
    "load_mesh",
    "prepare_mesh",
    "write_mesh",
    "mesh_bytes",
    "count_faces",
    "decode_text",
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


def load_mesh(
    path,
    *,
    name=None,
    hole_fraction: float = HOLE_FRACTION,
    max_faces: int = Limits.max_faces,
    max_unpacked_mb: float = Limits.max_unpacked_mb,
    budget=None,
) -> LoadedMesh:
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
    max_faces : int
        Largest triangle count accepted, counted before parsing (3MF: after instancing).
    max_unpacked_mb : float
        Largest decompressed size of a 3MF archive, MB (2**20 bytes), checked before parsing.
    budget : callable, optional
        Called with the face count before parsing; may raise to refuse the file (a memory guard).

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
        or open surfaces that cannot be closed; over ``max_faces`` triangles or (3MF) over
        ``max_unpacked_mb`` decompressed, refused before parsing with the setting to raise.

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
        raise MeshError(
            f"{label}: unknown file type {ext or '(no extension)'!r}; "
            f"export the model as one of {', '.join(READ_FORMATS)}"
        )
    if not p.is_file():
        raise MeshError(f"{label}: file not found; check the path")
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise MeshError(f"{label}: cannot read the file ({exc.strerror}); check its permissions") from exc
    if not data.strip():
        raise MeshError(f"{label}: the file is empty; export the model again")
    repairs = []
    faces_before = count_faces(data, ext, label, max_unpacked_mb=max_unpacked_mb)
    _cap_faces(faces_before, max_faces, label)
    if budget is not None:
        budget(faces_before)
    if ext == ".stl" and _is_ascii_stl(data):
        vertices, faces = _read_ascii_stl(data, label)
    else:
        if ext == ".stl":
            data = _check_stl_size(data, label, repairs)
        vertices, faces = _parse(data, ext, label)
    _cap_faces(len(faces), max_faces, label)
    mesh, fixed = repair_arrays(vertices, faces, label, merge_is_repair=ext != ".stl", hole_fraction=hole_fraction)
    return LoadedMesh(mesh=mesh, repairs=tuple(repairs) + fixed, source=str(path))


def _cap_faces(n: int, cap: int, label: str) -> None:
    if n > cap:
        raise MeshError(
            f"{label}: {n:,} triangles (after instancing) is over the limit of {cap:,}; "
            f"simplify the model, or raise the limit with --set max_faces={n}"
        )


def _parse(data: bytes, ext: str, label: str):
    """Vertices and faces through trimesh (binary STL, OBJ, PLY, 3MF), text decoded here."""
    try:
        with warnings.catch_warnings():  # bad numbers are reported by our own checks below
            warnings.simplefilter("ignore", RuntimeWarning)
            if ext == ".obj":
                # Decoded here (UTF-8, else Latin-1): trimesh would reach for an optional package.
                stream = io.StringIO(decode_text(data))
            else:
                stream = trimesh.util.wrap_as_stream(data)
            loaded = trimesh.load_mesh(stream, file_type=ext[1:], process=False)
        return np.asarray(loaded.vertices), np.asarray(loaded.faces)
    except Exception as exc:  # parsers of untrusted files raise many types; report them all
        raise MeshError(
            f"{label}: unreadable {ext[1:].upper()} file ({type(exc).__name__}: "
            f"{str(exc).splitlines()[0] if str(exc) else 'no detail'}); "
            "export the model again"
        ) from exc


def decode_text(data: bytes) -> str:
    """Text of a mesh file: UTF-8 (a byte-order mark is dropped), else Latin-1, which decodes any
    byte; only names and comments can hold non-ASCII text, and the geometry is ASCII either way.

    >>> decode_text(b"\\xef\\xbb\\xbfv 1 2 3"), decode_text(b"# caf\\xe9")
    ('v 1 2 3', '# café')
    """
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError:
        return data.decode("latin-1")


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
        raise MeshError(f"{name}: expected a trimesh.Trimesh, got {type(mesh).__name__}; pass a mesh or a file path")
    fixed, repairs = repair_arrays(
        np.array(mesh.vertices, dtype=float),
        np.array(mesh.faces, dtype=np.int64),
        str(name),
        merge_is_repair=True,
        hole_fraction=hole_fraction,
    )
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
    try:
        data = mesh_bytes(mesh, Path(path).suffix.lower(), path)
        atomic_write(path, data)
    except OSError as exc:
        raise MeshError(
            f"{path}: cannot write ({exc.strerror or exc}); check that the folder exists and is writable"
        ) from exc


def mesh_bytes(mesh, ext: str, label="mesh") -> bytes:
    """The bytes :func:`write_mesh` writes for ``mesh`` as ``ext`` (``.stl``, ``.3mf`` or ``.ply``).

    Raises
    ------
    MeshError
        Unknown extension or empty mesh; the message names ``label``.
    """
    if ext not in WRITE_FORMATS:
        raise MeshError(
            f"{label}: cannot write file type {ext or '(no extension)'!r}; use one of {', '.join(WRITE_FORMATS)}"
        )
    if not isinstance(mesh, trimesh.Trimesh) or len(mesh.faces) == 0:
        raise MeshError(f"{label}: nothing to write (no triangles); check the model")
    if ext == ".3mf":
        return _threemf_bytes(np.asarray(mesh.vertices), np.asarray(mesh.faces))
    if ext == ".ply":
        return mesh.export(file_type="ply", encoding="binary")
    return mesh.export(file_type="stl")  # trimesh writes binary STL


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
    tmp = stage_file(path, data)
    try:
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


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
    if len(data) < 84:
        raise MeshError(
            f"{label}: binary STL too short ({len(data)} bytes, the header alone is 84); export the model again"
        )
    count = int.from_bytes(data[80:84], "little")
    expected = 84 + 50 * count
    if len(data) < expected:
        raise MeshError(
            f"{label}: truncated binary STL (header promises {count} triangles "
            f"= {expected} bytes, file has {len(data)}); export or copy it again"
        )
    if len(data) > expected:
        repairs.append(f"ignored {len(data) - expected} bytes after the last triangle")
    return data[:expected]


_BOM = b"\xef\xbb\xbf"
_VERTEX = re.compile(rb"vertex\s+(\S+)\s+(\S+)\s+(\S+)", re.IGNORECASE)


def _is_ascii_stl(data: bytes) -> bool:
    """ASCII STL by its structure: ``solid`` first (after a byte-order mark and blanks), facets
    with vertices and their ends, and not a binary STL whose size matches its own header (a
    binary header may start with "solid" too).  The solid's name may be in any encoding."""
    if len(data) >= 84 and len(data) == 84 + 50 * int.from_bytes(data[80:84], "little"):
        return False
    body = data[3:] if data.startswith(_BOM) else data
    if body.lstrip()[:5].lower() != b"solid":
        return False
    low = body.lower()
    return (b"vertex" in low and b"endfacet" in low) or b"endsolid" in low


def _read_ascii_stl(data: bytes, label: str):
    """Vertices (3 per facet) and faces of an ASCII STL, read from the ``vertex x y z`` lines alone
    (3D Systems, *StereoLithography Interface Specification*, 1989: names and comments are free text)."""
    coords = _VERTEX.findall(data)
    if not coords:
        return np.zeros((0, 3)), np.zeros((0, 3), np.int64)  # "contains no triangles" from the checks
    if len(coords) % 3:
        raise MeshError(
            f"{label}: unreadable ASCII STL ({len(coords)} vertex lines, not three per facet); export the model again"
        )
    try:
        v = np.array(coords, dtype=float)
    except ValueError as exc:
        raise MeshError(
            f"{label}: unreadable ASCII STL (a vertex coordinate is not a number: "
            f"{str(exc)[:60]}); export the model again"
        ) from exc
    return v, np.arange(len(v), dtype=np.int64).reshape(-1, 3)


_PLY_FACES = re.compile(rb"^element\s+face\s+(\d+)", re.MULTILINE)
_CORE_NS = b"http://schemas.microsoft.com/3dmanufacturing/core/2015/02"


def count_faces(data: bytes, ext: str, label: str, *, max_unpacked_mb: float = Limits.max_unpacked_mb) -> int:
    """Triangles a mesh file will make, counted without parsing it (0 where it cannot tell).

    Binary STL: the header's count; ASCII STL: ``endfacet`` lines; PLY: the header's
    ``element face``; OBJ: ``f`` lines; 3MF: the triangles of every build item's object,
    components multiplied out (3MF Core Specification 1.2.3, sections 4.1-4.2 and 5), after
    checking the archive's decompressed size (the sizes its ZIP central directory declares,
    APPNOTE 6.3.9 section 4.4.9; Python's ``zipfile`` never returns more than a member declares).

    Raises
    ------
    MeshError
        A 3MF archive that would decompress to more than ``max_unpacked_mb``.
    """
    if ext == ".stl":
        if _is_ascii_stl(data):
            return data.lower().count(b"endfacet")
        return int.from_bytes(data[80:84], "little") if len(data) >= 84 else 0
    if ext == ".ply":
        m = _PLY_FACES.search(data[:65536])
        return int(m.group(1)) if m else 0
    if ext == ".obj":
        return data.count(b"\nf ") + data.startswith(b"f ")
    if ext == ".3mf":
        return _threemf_faces(data, label, max_unpacked_mb)
    return 0


def _threemf_faces(data: bytes, label: str, max_unpacked_mb: float) -> int:
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
        infos = archive.infolist()
    except (zipfile.BadZipFile, ValueError, OSError):
        return 0  # not a ZIP: the parser reports it
    unpacked = sum(i.file_size for i in infos)
    cap = int(max_unpacked_mb * 2**20)
    if unpacked > cap:
        raise MeshError(
            f"{label}: the 3MF archive would unpack to {unpacked / 2**20:,.0f} MB, over the limit of "
            f"{max_unpacked_mb:g} MB; check the file's origin, or raise the limit with "
            f"--set max_unpacked_mb={int(unpacked / 2**20) + 1}"
        )
    objects: dict[tuple[str, str], tuple[int, list]] = {}
    items: list[tuple[str, str]] = []
    for info in infos:
        if not info.filename.lower().endswith(".model"):
            continue
        try:
            xml = archive.read(info)
        except Exception:  # noqa: BLE001 - a damaged member: the parser reports it
            return 0
        part = "/" + info.filename.lstrip("/")
        _model_objects(xml, part, objects, items)
    memo: dict = {}

    def faces(key, depth=0) -> int:
        if key in memo:
            return memo[key]
        if key not in objects or depth > 64:
            return 0
        own, comps = objects[key]
        memo[key] = own + sum(faces(c, depth + 1) for c in comps)
        return memo[key]

    return sum(faces(k) for k in items)


_ATTR = re.compile(rb'([\w:]+)\s*=\s*["\']([^"\']*)["\']')


def _model_objects(xml: bytes, part: str, objects: dict, items: list) -> None:
    """Objects (own triangles, component references) and build items of one 3MF model part."""
    m = re.search(rb'xmlns(?::(\w+))?\s*=\s*["\']' + re.escape(_CORE_NS), xml[:65536])
    pre = (m.group(1) + b":") if m and m.group(1) else b""
    tri, tris = b"<" + pre + b"triangle", b"<" + pre + b"triangles"
    obj_re = re.compile(rb"<" + re.escape(pre) + rb"object\b([^>]*)>(.*?)</" + re.escape(pre) + rb"object>", re.S)
    comp_re = re.compile(rb"<" + re.escape(pre) + rb"component\b([^>]*)>")
    item_re = re.compile(rb"<" + re.escape(pre) + rb"item\b([^>]*)>")

    def attrs(text: bytes) -> dict:
        return {k.split(b":")[-1].decode("latin-1"): v.decode("latin-1") for k, v in _ATTR.findall(text)}

    for om in obj_re.finditer(xml):
        a, body = attrs(om.group(1)), om.group(2)
        comps = []
        for cm in comp_re.finditer(body):
            c = attrs(cm.group(1))
            comps.append((c.get("path", part), c.get("objectid", "")))
        objects[(part, a.get("id", ""))] = (body.count(tri) - body.count(tris), comps)
    build = re.search(rb"<" + re.escape(pre) + rb"build\b(.*?)</" + re.escape(pre) + rb"build>", xml, re.S)
    if build:
        for im in item_re.finditer(build.group(1)):
            a = attrs(im.group(1))
            items.append((a.get("path", part), a.get("objectid", "")))


# ----------------------------------------------------------------------------- writing


def _threemf_bytes(v, f) -> bytes:
    """A 3MF package (3MF Core Specification 1.2.3): one object, one build item."""
    core = "http://schemas.microsoft.com/3dmanufacturing/core/2015/02"
    verts = "".join(f'<vertex x="{x!r}" y="{y!r}" z="{z!r}"/>' for x, y, z in v.tolist())
    tris = "".join(f'<triangle v1="{a}" v2="{b}" v3="{c}"/>' for a, b, c in f.tolist())
    model = (
        f'<?xml version="1.0" encoding="UTF-8"?>\n<model unit="millimeter" '
        f'xml:lang="en-US" xmlns={quoteattr(core)}><resources><object id="1" '
        f'type="model"><mesh><vertices>{verts}</vertices><triangles>{tris}</triangles>'
        '</mesh></object></resources><build><item objectid="1"/></build></model>'
    )
    types = (
        '<?xml version="1.0" encoding="UTF-8"?>\n<Types xmlns="http://schemas.'
        'openxmlformats.org/package/2006/content-types"><Default Extension="rels" '
        'ContentType="application/vnd.openxmlformats-package.relationships+xml"/>'
        '<Default Extension="model" '
        'ContentType="application/vnd.ms-package.3dmanufacturing-3dmodel+xml"/></Types>'
    )
    rels = (
        '<?xml version="1.0" encoding="UTF-8"?>\n<Relationships xmlns="http://schemas.'
        'openxmlformats.org/package/2006/relationships"><Relationship '
        'Target="/3D/3dmodel.model" Id="rel0" '
        'Type="http://schemas.microsoft.com/3dmanufacturing/2013/01/3dmodel"/>'
        "</Relationships>"
    )
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        for name, text in (("[Content_Types].xml", types), ("_rels/.rels", rels), ("3D/3dmodel.model", model)):
            info = zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            archive.writestr(info, text.encode("utf-8"))
    return buffer.getvalue()
