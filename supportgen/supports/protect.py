"""Protected surfaces: faces of the part that must carry no contact tip and no landing.

A scar is left wherever a tip is cut off, so some faces must stay clean: a
sealing face, a bore, a visible face, a food-contact floor.  This module turns
what the user says (selectors, a face mask, a function of face centres and
normals) into a mask over the part's faces, and keeps the planner off them.

Selectors, in the part's own input coordinates (mm), repeatable, OR-ed together:

``box:X0,Y0,Z0,X1,Y1,Z1``
    faces whose three corners all lie in the axis-aligned box;
``normal:DX,DY,DZ,DEG``
    faces whose outward normal lies within ``DEG`` degrees of the direction;
``height:Z0,Z1``
    faces whose three corners all lie in the height band;
``mesh:PATH[,TOL]``
    faces whose corners and centre all lie within ``TOL`` mm (default
    :data:`MARK_TOLERANCE_MM`) of the surface of the marking mesh in ``PATH``;
``colour:R,G,B`` (or ``color:``)
    faces whose colour (0-255 each) in a coloured PLY, OBJ or 3MF input equals it.

The mask is carried through repair (``mesh.metadata["source_face"]``, kept by
:func:`supportgen.io.repair.repair_arrays`) and placement (which only translates),
so it always indexes the faces of the placed part.  A part whose solid was rebuilt
from the winding number (non-manifold, self-intersecting or badly open input) has
no face of the input: there the selectors are applied to the input faces (moved as
the part was: scaled, turned) and a rebuilt face is protected when the nearest
input face is protected and lies within :data:`~supportgen.constants.REBUILD_CARRY_CELLS`
grid cells of it (trimesh's closest point).  Protected input surface that no
rebuilt face stands for is named in one warning line, never dropped silently.

How the planner honours it (:class:`Guard`):

* *keep-off distance*: a tip of diameter ``d`` scars a disc of radius ``d / 2``;
  tips are sized after contacts are placed and never exceed ``tip_max_mm``, so a
  contact is *clear* when the protected surface is at least ``tip_max_mm / 2``
  away (an exact distance, trimesh's closest-point query);
* a contact that is not clear is moved to the nearest allowed surface point
  (on a face that looks down or sideways, so a tip can leave it downward) that
  is certified clear (:class:`supportgen.supports.freespace.Clearance` lower
  bounds); moved contacts closer than ``tip_max_mm`` to another contact are
  merged into it;
* a contact with no allowed point within ``max(reach_limit_mm,
  contact_spacing_mm)`` can only be held from protected surface: it is dropped
  and reported with its location and an orientation that would turn the
  protected faces away from the plate, instead of scarring them silently;
* landings (posts standing on the part) within the keep-off distance of a
  protected face are refused (:meth:`Guard.avoid`), so routes go to the base or
  to allowed faces.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import numpy as np
import trimesh
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from ..constants import REBUILD_CARRY_CELLS
from ..errors import MeshError, SettingsError
from ..io.winding import surface_points
from ..settings import Settings
from .contacts import merge_contacts
from .freespace import clearance_field
from .plan import Contacts

__all__ = [
    "MARK_TOLERANCE_MM",
    "SIDE_NORMAL_Z",
    "SIDECAR_SUFFIX",
    "Selector",
    "parse_selector",
    "selectors_from_toml",
    "sidecar_for",
    "face_colours",
    "protect_mask",
    "Guard",
    "Relocation",
    "guard_for",
    "Protected",
    "protected_faces",
    "Holder",
]

#: Default distance (mm) within which a face counts as marked by a marking mesh:
#: one pixel of a desktop printer (common practice: 35-50 um pixels).
MARK_TOLERANCE_MM = 0.05

#: A contact may be moved onto a face whose outward normal has z at most this
#: (down-facing or sideways): a tip leaves such a face downward.  Our choice:
#: walls up to about 6 degrees past vertical.
SIDE_NORMAL_Z = 0.1

#: Candidate points sampled per mm^2 of allowed surface when moving contacts,
#: at most ``_MAX_CANDIDATES``: about one per 0.1 x 0.1 mm, two pixels.
_CANDIDATES_PER_MM2 = 100.0
_MAX_CANDIDATES = 200_000

#: Side-car file next to a part (``part.stl`` -> ``part.protect.toml``) whose
#: ``protect`` list of selectors applies to that part; batches carry it.
SIDECAR_SUFFIX = ".protect.toml"

_KINDS = {"box": 6, "normal": 4, "height": 2, "mesh": None, "colour": 3, "color": 3}


@dataclass(frozen=True)
class Selector:
    """One parsed selector: ``kind`` (box, normal, height, mesh, colour) and its values."""

    kind: str
    values: tuple = ()
    path: Path | None = None
    text: str = ""


def parse_selector(text: str, base_dir: str | Path | None = None) -> Selector:
    """A :class:`Selector` from its text form (see the module notes).

    ``base_dir`` resolves a relative marking-mesh path (a side-car's folder).

    Raises
    ------
    SettingsError
        Unknown kind, wrong count of numbers, a bad number or angle.

    Examples
    --------
    >>> parse_selector("normal:0,0,-1,30").values
    (0.0, 0.0, -1.0, 30.0)
    >>> parse_selector("cone:1,2")
    Traceback (most recent call last):
    ...
    supportgen.errors.SettingsError: protect selector 'cone:1,2': unknown kind 'cone'; use box:...
    """
    hint = "use box:X0,Y0,Z0,X1,Y1,Z1, normal:DX,DY,DZ,DEG, height:Z0,Z1, mesh:PATH[,TOL] or colour:R,G,B"
    kind, sep, rest = str(text).partition(":")
    kind = kind.strip().lower()
    if not sep or kind not in _KINDS:
        raise SettingsError(f"protect selector {text!r}: unknown kind {kind!r}; {hint}")
    if kind == "mesh":
        path_text, _, tol = rest.rpartition(",") if _is_number(rest.rpartition(",")[2]) else (rest, "", "")
        path = Path(path_text.strip())
        if base_dir is not None and not path.is_absolute():
            path = Path(base_dir) / path
        tol_v = float(tol) if tol else MARK_TOLERANCE_MM
        if not tol_v > 0 or not path_text.strip():
            raise SettingsError(
                f"protect selector {text!r}: give a mesh file and a positive tolerance, e.g. mesh:seal.stl,0.05"
            )
        return Selector("mesh", (tol_v,), path, str(text))
    parts = [p.strip() for p in rest.split(",")]
    if len(parts) != _KINDS[kind] or not all(_is_number(p) for p in parts):
        raise SettingsError(
            f"protect selector {text!r}: {kind} needs {_KINDS[kind]} numbers separated by commas; {hint}"
        )
    values = tuple(float(p) for p in parts)
    if kind == "box" and not all(values[i] <= values[i + 3] for i in range(3)):
        raise SettingsError(f"protect selector {text!r}: give the low corner first (X0<=X1, Y0<=Y1, Z0<=Z1)")
    if kind == "height" and values[0] > values[1]:
        raise SettingsError(f"protect selector {text!r}: give the lower height first (Z0<=Z1)")
    if kind == "normal" and (np.linalg.norm(values[:3]) == 0 or not 0 <= values[3] <= 180):
        raise SettingsError(f"protect selector {text!r}: give a non-zero direction and an angle of 0-180 degrees")
    if kind in ("colour", "color"):
        if not all(0 <= v <= 255 and v == int(v) for v in values):
            raise SettingsError(f"protect selector {text!r}: colour values are whole numbers 0-255")
        kind = "colour"
    return Selector(kind, values, None, str(text))


def _is_number(text: str) -> bool:
    try:
        return math.isfinite(float(text))
    except ValueError:
        return False


def selectors_from_toml(path: str | Path) -> list[Selector]:
    """The selectors of a side-car file (``protect = [...]``) or a settings profile's
    ``[protect]`` table (``selectors = [...]``); relative mesh paths are relative to the file.

    Raises
    ------
    SettingsError
        Unreadable TOML, or ``protect`` is not a list of selector strings.
    """
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise SettingsError(f"{path}: cannot read the protect list ({exc}); fix the file") from None
    items = data.get("protect", [])
    if isinstance(items, dict):
        items = items.get("selectors", [])
    if not isinstance(items, list) or not all(isinstance(i, str) for i in items):
        raise SettingsError(
            f"{path}: 'protect' must be a list of selector strings, e.g. protect = [\"normal:0,0,-1,30\"]"
        )
    return [parse_selector(i, path.parent) for i in items]


def sidecar_for(source: str | Path) -> Path | None:
    """The side-car protect file of a part file, if it exists (``part.stl`` -> ``part.protect.toml``)."""
    p = Path(source)
    side = p.with_name(p.name[: -len(p.suffix)] + SIDECAR_SUFFIX if p.suffix else p.name + SIDECAR_SUFFIX)
    return side if side.is_file() else None


def face_colours(path: str | Path) -> np.ndarray:
    """RGB (0-255) of each input face of a coloured PLY, OBJ or 3MF file, as trimesh
    reads it (``process=False``, the face order the repair's face map refers to).

    Raises
    ------
    MeshError
        The file has no colours, or cannot be read.
    """
    try:
        loaded = trimesh.load_mesh(str(path), process=False)
        if isinstance(loaded, trimesh.Scene):
            loaded = loaded.to_mesh()
        visual = loaded.visual
        if visual.kind == "texture":
            visual = visual.to_color()
        if visual.kind is None:
            raise ValueError("no colours")
        colours = np.asarray(visual.face_colors)[:, :3].astype(int)
    except Exception as exc:  # untrusted files: every failure becomes one line
        raise MeshError(
            f"{path}: no face or vertex colours to select from ({type(exc).__name__}: {exc}); "
            "export with colours, or protect faces with box, normal, height or mesh selectors"
        ) from exc
    return colours


def _selector_mask(mesh: trimesh.Trimesh, sel: Selector, source, label: str) -> np.ndarray:
    tri = np.asarray(mesh.triangles)
    if sel.kind == "box":
        lo, hi = np.array(sel.values[:3]), np.array(sel.values[3:])
        return ((tri >= lo) & (tri <= hi)).all(axis=(1, 2))
    if sel.kind == "height":
        z = tri[:, :, 2]
        return ((z >= sel.values[0]) & (z <= sel.values[1])).all(axis=1)
    if sel.kind == "normal":
        d = np.array(sel.values[:3]) / np.linalg.norm(sel.values[:3])
        return np.asarray(mesh.face_normals) @ d >= math.cos(math.radians(sel.values[3])) - 1e-12
    if sel.kind == "mesh":
        if not sel.path.is_file():
            raise SettingsError(f"protect selector {sel.text!r}: marking mesh {sel.path} not found; check the path")
        try:
            mark = trimesh.load_mesh(str(sel.path), process=False)
            if isinstance(mark, trimesh.Scene):
                mark = mark.to_mesh()
            mark = trimesh.Trimesh(mark.vertices, mark.faces, process=True)
        except Exception as exc:  # untrusted file
            raise MeshError(f"{sel.path}: unreadable marking mesh ({type(exc).__name__}); export it again") from exc
        if len(mark.faces) == 0:
            raise MeshError(f"{sel.path}: marking mesh has no triangles; export it again")
        pts = np.concatenate([tri, tri.mean(axis=1, keepdims=True)], axis=1).reshape(-1, 3)
        _, dist, _ = trimesh.proximity.closest_point(mark, pts)
        return (dist.reshape(-1, 4) <= sel.values[0]).all(axis=1)
    # colour
    if source is None:
        raise SettingsError(
            f"protect selector {sel.text!r}: {label} is not a coloured file; colour selectors "
            "need a PLY, OBJ or 3MF input with colours"
        )
    colours = face_colours(source)
    src = np.asarray(mesh.metadata.get("source_face", np.arange(len(mesh.faces))))
    hit = (colours == np.array(sel.values, int)).all(axis=1)
    return np.where(src >= 0, hit[np.clip(src, 0, len(hit) - 1)], False) if len(hit) else np.zeros(len(src), bool)


def protect_mask(
    mesh: trimesh.Trimesh, protect, *, source=None, label: str = "part", notes: list | None = None
) -> np.ndarray:
    """Bool mask over the faces of ``mesh`` (the repaired input, input coordinates).

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part as loaded and repaired; ``mesh.metadata["source_face"]`` maps its faces
        to the input faces (absent: they are the input faces).
    protect : selector text, Selector, bool array, callable or a list of them
        A bool array is a mask over the INPUT faces (before repair); a callable
        takes ``(centres, normals)``, both (m, 3), and returns a bool per face.
    source : path, optional
        The input file, for colour selectors.
    label : str
        How the input is named in messages.
    notes : list, optional
        Receives one line when protected input surface could not be carried onto a
        rebuilt solid (see the module notes).

    Raises
    ------
    SettingsError
        A bad selector, or a mask of the wrong length.
    """
    n = len(mesh.faces)
    out = np.zeros(n, bool)
    if protect is None:
        return out
    items = protect if isinstance(protect, (list, tuple)) else [protect]
    if items and mesh.metadata.get("rebuilt_from") is not None:
        return _carry_rebuilt(mesh, items, source, label, notes)[0]
    src = np.asarray(mesh.metadata.get("source_face", np.arange(n)))
    for item in items:
        if isinstance(item, str):
            item = parse_selector(item)
        if isinstance(item, Selector):
            out |= _selector_mask(mesh, item, source, label)
        elif callable(item):
            got = np.asarray(item(np.asarray(mesh.triangles_center), np.asarray(mesh.face_normals)), bool).reshape(-1)
            if got.shape != (n,):
                raise SettingsError(
                    f"{label}: the protect function returned {got.size} values for {n} faces; return one bool per face"
                )
            out |= got
        else:
            mask = np.asarray(item, bool).reshape(-1)
            n_in = int(src.max()) + 1 if len(src) else 0
            if len(mask) < n_in:
                raise SettingsError(
                    f"{label}: protect mask has {len(mask)} values but the input has at least "
                    f"{n_in} faces; give one bool per input face"
                )
            out |= np.where(src >= 0, mask[np.clip(src, 0, None)], False)
    return out


def _input_surface(mesh: trimesh.Trimesh) -> tuple[trimesh.Trimesh, float]:
    """The input faces of a rebuilt ``mesh``, moved as ``mesh`` was moved since it was built
    (an affine map fitted from its vertices, by least squares), and the map's length scale."""
    rb = mesh.metadata["rebuilt_from"]
    built = np.asarray(rb["built_vertices"], float)
    now = np.asarray(mesh.vertices, float)
    if built.shape != now.shape:
        raise ValueError("the rebuilt part's vertices changed since it was built")
    ones = np.ones((len(built), 1))
    affine, *_ = np.linalg.lstsq(np.hstack([built, ones]), now, rcond=None)
    fit = np.hstack([built, ones]) @ affine
    size = float(np.linalg.norm(np.ptp(now, axis=0)))
    if not np.all(np.isfinite(fit)) or np.abs(fit - now).max() > 1e-6 * max(size, 1.0):
        raise ValueError("the part was moved by more than a scale, turn and shift since it was rebuilt")
    v = np.hstack([np.asarray(rb["vertices"], float), np.ones((len(rb["vertices"]), 1))]) @ affine
    inp = trimesh.Trimesh(v, np.asarray(rb["faces"]), process=False)
    inp.metadata["source_face"] = np.asarray(rb["source_face"])
    return inp, abs(float(np.linalg.det(affine[:3]))) ** (1 / 3)


def _carry_rebuilt(mesh: trimesh.Trimesh, items, source, label: str, notes: list | None):
    """The protection of a rebuilt solid's faces, carried from its input faces (module notes),
    and the protected input surface (moved as ``mesh`` was; None when nothing is protected)."""
    out = np.zeros(len(mesh.faces), bool)
    rb = mesh.metadata["rebuilt_from"]
    try:
        inp, scale = _input_surface(mesh)
    except ValueError as exc:
        if notes is not None:
            notes.append(
                f"{label}: the solid was rebuilt from a messy surface and its protection could not be carried "
                f"({exc}); nothing is protected: repair the input so that it is a clean solid"
            )
        return out, None
    in_mask = protect_mask(inp, items, source=source, label=label)
    if not in_mask.any():
        return out, None
    tol = REBUILD_CARRY_CELLS * float(rb["cell"]) * scale
    # Each rebuilt face is looked at from points on it a cell apart: it is protected when the
    # nearest input face to any of them is protected and within the tolerance (a large face
    # of the simplified rebuild may straddle the edge of a protected region).
    prot = trimesh.Trimesh(inp.vertices, inp.faces[in_mask], process=False)
    lo, hi = prot.bounds[0] - tol, prot.bounds[1] + tol
    tri = np.asarray(mesh.triangles)
    near_box = np.flatnonzero(((tri.max(axis=1) >= lo) & (tri.min(axis=1) <= hi)).all(axis=1))
    pts, owner = surface_points(tri[near_box], tol, owners=True)
    inside = ((pts >= lo) & (pts <= hi)).all(axis=1)
    pts, owner = pts[inside], near_box[owner[inside]]
    if len(pts):
        _, d_prot, _ = trimesh.proximity.closest_point(prot, pts)
        near = d_prot <= tol
        pts, owner, d_prot = pts[near], owner[near], d_prot[near]
    if len(pts) and not in_mask.all():
        # Protected only where the nearest input face is a protected one.
        rest = trimesh.Trimesh(inp.vertices, inp.faces[~in_mask], process=False)
        _, d_rest, _ = trimesh.proximity.closest_point(rest, pts)
        owner = owner[d_prot <= d_rest]
    out[owner] = True
    # Protected input surface with no protected rebuilt face within the tolerance is not protected: say so.
    areas = np.asarray(inp.area_faces)[in_mask]
    if out.any():
        carried = trimesh.Trimesh(mesh.vertices, mesh.faces[out], process=False)
        _, d_back, _ = trimesh.proximity.closest_point(carried, np.asarray(inp.triangles_center)[in_mask])
        lost = d_back > tol
    else:
        lost = np.ones(len(areas), bool)
    if lost.any() and notes is not None:
        notes.append(
            f"{label}: the solid was rebuilt from a messy surface; {areas[lost].sum():.3g} mm² of the "
            f"{areas.sum():.3g} mm² protected input surface ({int(lost.sum())} faces) has no rebuilt face within "
            f"{tol:.3g} mm (inside the solid, or a sheet the rebuild dropped) and is not protected; "
            "repair the input so that it is a clean solid, or protect with a wider selector"
        )
    if not out.any():
        return out, None
    if lost.any():  # what was not carried is not protected, so not measured to either
        keep = np.flatnonzero(in_mask)[~lost]
        return out, trimesh.Trimesh(inp.vertices, inp.faces[keep], process=False)
    return out, prot


def _regions(mesh: trimesh.Trimesh, faces: np.ndarray) -> np.ndarray:
    """Connected region (over shared edges) of each selected face of ``mesh``; -1 elsewhere."""
    region = np.full(len(faces), -1)
    if faces.any():
        adj = np.asarray(mesh.face_adjacency).reshape(-1, 2)
        adj = adj[faces[adj].all(axis=1)]
        idx = np.flatnonzero(faces)
        pos = np.full(len(faces), -1)
        pos[idx] = np.arange(len(idx))
        g = coo_matrix((np.ones(len(adj)), (pos[adj[:, 0]], pos[adj[:, 1]])), shape=(len(idx),) * 2)
        _, lab = connected_components(g, directed=False)
        region[idx] = lab
    return region


@dataclass(frozen=True)
class Relocation:
    """What :meth:`Guard.relocate` did: the new contacts, how many were moved, and the
    contacts that could only be held from protected surface (dropped, with a message)."""

    contacts: Contacts
    moved: int
    merged: int
    unholdable: tuple[dict, ...] = ()


@dataclass(frozen=True)
class Guard:
    """Protected faces of the placed part, and the queries the planner needs.

    Attributes
    ----------
    part : trimesh.Trimesh
        The placed part (build coordinates).
    faces : (m,) bool ndarray
        Protected faces of ``part``.
    offset : (3,) ndarray
        Translation from input to build coordinates.
    keep_off_mm : float
        Least distance from a contact or landing to a protected face: ``tip_max_mm / 2``.
    region : (m,) int ndarray
        Connected protected region of each face (-1 for allowed faces).
    surface : trimesh.Trimesh
        The protected surface distances are measured to (build coordinates): the
        protected faces of ``part``, or for a solid rebuilt from the winding number the
        protected input faces themselves (the rebuilt faces that stand for them are
        coarser, see the module notes).
    surface_region : (k,) int ndarray
        Connected protected region of each face of ``surface``.
    """

    part: trimesh.Trimesh
    faces: np.ndarray
    offset: np.ndarray
    keep_off_mm: float
    region: np.ndarray = field(repr=False, default=None)
    seed: int = 0
    described: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    surface: trimesh.Trimesh | None = field(repr=False, default=None)
    surface_region: np.ndarray | None = field(repr=False, default=None)
    carried: bool = False

    @classmethod
    def build(cls, part: trimesh.Trimesh, faces, offset, settings: Settings, surface=None) -> Guard:
        faces = np.asarray(faces, bool)
        region = _regions(part, faces)
        if surface is None or not faces.any():
            surface = trimesh.Trimesh(part.vertices, part.faces[faces], process=False)
            surface_region, carried = region[faces], False
        else:
            surface_region = _regions(surface, np.ones(len(surface.faces), bool))
            carried = True
        return cls(
            part,
            faces,
            np.asarray(offset, float),
            settings.rules.tip_max_mm / 2,
            region,
            settings.rules.seed,
            surface=surface,
            surface_region=surface_region,
            carried=carried,
        )

    def plan_options(self) -> dict:
        """Keyword arguments for a strategy: ``avoid`` when anything is protected."""
        return {"avoid": self.avoid} if self.active else {}

    @property
    def active(self) -> bool:
        return bool(self.faces.any())

    @property
    def n_regions(self) -> int:
        return int(self.surface_region.max()) + 1 if self.active and len(self.surface_region) else 0

    @property
    def _protected(self) -> trimesh.Trimesh:
        return self.surface

    def nearest(self, points) -> tuple[np.ndarray, np.ndarray]:
        """Exact distance from each point to the protected surface, and that face's region
        (trimesh closest point); inf and -1 when nothing is protected."""
        pts = np.asarray(points, float).reshape(-1, 3)
        if not self.active or len(pts) == 0:
            return np.full(len(pts), np.inf), np.full(len(pts), -1)
        _, dist, tri = trimesh.proximity.closest_point(self._protected, pts)
        return np.asarray(dist, float), self.surface_region[tri]

    def avoid(self, points) -> np.ndarray:
        """True where a landing at the point would lie within the keep-off distance of a protected face."""
        return self.nearest(points)[0] < self.keep_off_mm

    def relocate(self, contacts: Contacts, settings: Settings, start: int = 0) -> Relocation:
        """Move contacts (from index ``start`` on; earlier ones are kept as given) off the
        protected surface to the nearest allowed surface point (see the module notes)."""
        if not self.active or len(contacts) <= start:
            return Relocation(contacts, 0, 0)
        pts = contacts.points
        dist, _ = self.nearest(pts[start:])
        bad = np.flatnonzero(dist < self.keep_off_mm) + start
        if len(bad) == 0:
            return Relocation(contacts, 0, 0)
        rules = settings.rules
        cand, cand_n = self._candidates
        max_move = max(rules.reach_limit_mm, rules.contact_spacing_mm)
        if len(cand):
            d, j = cKDTree(cand).query(pts[bad])
        else:
            d, j = np.full(len(bad), np.inf), np.zeros(len(bad), int)
        ok = d <= max_move
        cols = ("points", "normals", "kinds", "diameters", "loads", "peak_layers")
        keep = np.setdiff1d(np.arange(len(contacts)), bad)
        kept = Contacts(*(getattr(contacts, c)[keep] for c in cols))
        mv = bad[ok]
        moved = Contacts(
            cand[j[ok]],
            cand_n[j[ok]],
            contacts.kinds[mv],
            contacts.diameters[mv],
            contacts.loads[mv],
            contacts.peak_layers[mv],
        )
        # Moved contacts that crowd another contact are merged into it (tips would overlap).
        merged = merge_contacts(kept, moved, rules.tip_max_mm)
        unholdable = tuple(self._unholdable(pts[b]) for b in bad[~ok])
        return Relocation(merged, int(ok.sum()), int(ok.sum()) - (len(merged) - len(kept)), unholdable)

    @cached_property
    def _candidates(self):
        """Allowed surface points a tip may move to: on faces looking down or sideways,
        certified at least the keep-off distance from every protected face."""
        part = self.part
        # Where the protected surface is not the part's own faces (a rebuilt solid), a face
        # may be protected only in part: the clearance test below decides point by point.
        free = np.ones(len(self.faces), bool) if self.carried else ~self.faces
        allowed = np.flatnonzero(free & (np.asarray(part.face_normals)[:, 2] <= SIDE_NORMAL_Z))
        if len(allowed) == 0:
            return np.zeros((0, 3)), np.zeros((0, 3))
        sub = trimesh.Trimesh(part.vertices, part.faces[allowed], process=False)
        count = int(min(max(sub.area * _CANDIDATES_PER_MM2, 1000), _MAX_CANDIDATES))
        pts, fi = trimesh.sample.sample_surface(sub, count, seed=self.seed)
        field_ = clearance_field(self._protected, self.keep_off_mm)
        ok = field_.lower(pts, self.keep_off_mm + field_.slack) >= self.keep_off_mm
        normals = np.asarray(part.face_normals)[allowed[fi]]
        return np.asarray(pts)[ok], normals[ok]

    def _unholdable(self, point) -> dict:
        """Location (input coordinates) and the turn that would face the region there away from the plate."""
        dist, region = self.nearest(point[None])
        faces = np.flatnonzero(self.surface_region == region[0])
        surf = self.surface
        nrm = (np.asarray(surf.face_normals)[faces] * np.asarray(surf.area_faces)[faces, None]).sum(axis=0)
        nrm = nrm / max(np.linalg.norm(nrm), 1e-12)
        angle = math.degrees(math.acos(float(np.clip(nrm[2], -1, 1))))
        axis = np.cross(nrm, [0.0, 0.0, 1.0])
        axis = axis / np.linalg.norm(axis) if np.linalg.norm(axis) > 1e-9 else np.array([1.0, 0.0, 0.0])
        xyz = point - self.offset
        return {
            "point_mm": [round(float(v), 3) for v in xyz],
            "region": int(region[0]),
            "suggested_rotation": {"axis": [round(float(v), 3) for v in axis], "angle_deg": round(angle, 1)},
            "message": (
                f"the contact planned near x {xyz[0]:.2f}, y {xyz[1]:.2f}, z {xyz[2]:.2f} mm (input "
                f"coordinates) could only sit on protected region {int(region[0])}; left out (the "
                "check says whether the part still prints). "
                f"Turn the part {angle:.0f} degrees about the axis ({axis[0]:.2f}, {axis[1]:.2f}, "
                f"{axis[2]:.2f}) so that region faces away from the plate, or protect less"
            ),
        }


def _describe(item) -> str:
    if isinstance(item, Selector):
        return item.text
    if isinstance(item, str):
        return item
    if callable(item):
        return f"function {getattr(item, '__name__', 'protect')}"
    return "face mask"


@dataclasses.dataclass(frozen=True)
class Protected:
    """What a run protects, in the part's own (input) coordinates: ``faces`` (mask over the
    repaired part's faces), ``described`` (one line per selector), ``surface`` (for a solid
    rebuilt from a messy surface, the protected input surface that distances are measured
    to; else None) and ``notes`` (warnings, e.g. protection that could not be carried)."""

    faces: np.ndarray
    described: tuple[str, ...] = ()
    surface: trimesh.Trimesh | None = None
    notes: tuple[str, ...] = ()


def protected_faces(mesh_in: trimesh.Trimesh, protect=None, source=None, label: str = "part") -> Protected:
    """What :func:`protect_mask` protects for ``protect`` plus, for a part read from a file, the
    selectors of its side-car file (:func:`sidecar_for`); carried onto the faces of a solid
    rebuilt from a messy surface (module notes).

    ``mesh_in`` is the repaired part in input coordinates (selectors are in those).
    """
    items = list(protect) if isinstance(protect, (list, tuple)) else ([] if protect is None else [protect])
    if source is not None:
        side = sidecar_for(source)
        if side is not None:
            items += selectors_from_toml(side)
    notes: list[str] = []
    surface = None
    if items and mesh_in.metadata.get("rebuilt_from") is not None:
        faces, surface = _carry_rebuilt(mesh_in, items, source, label, notes)
    else:
        faces = protect_mask(mesh_in, items, source=source, label=label, notes=notes)
    return Protected(faces, tuple(_describe(i) for i in items), surface, tuple(notes))


def guard_for(
    mesh_in: trimesh.Trimesh,
    part: trimesh.Trimesh,
    offset,
    settings: Settings,
    protect=None,
    source=None,
    label: str = "part",
    found: Protected | None = None,
    rotation=None,
) -> Guard:
    """The :class:`Guard` of one run: ``protect`` (see :func:`protect_mask`) plus, for a part
    read from a file, the selectors of its side-car file (:func:`sidecar_for`).

    ``mesh_in`` is the repaired part in input coordinates, ``part`` the placed part
    (the same faces, turned by ``rotation`` (3, 3) about the origin, then moved by
    ``offset``).  ``found``, when given, is what :func:`protected_faces` returned for
    them (not computed again).
    """
    if found is None:
        found = protected_faces(mesh_in, protect, source, label)
    surface = found.surface
    if surface is not None:
        surface = surface.copy()
        if rotation is not None:
            surface.apply_transform(_rotation4(rotation))  # turned as the part was
        surface.apply_translation(np.asarray(offset, float))  # and lifted
    guard = Guard.build(part, found.faces, offset, settings, surface)
    return dataclasses.replace(guard, described=found.described, notes=found.notes)


def _rotation4(rotation) -> np.ndarray:
    """The 4 x 4 transform of a 3 x 3 turn."""
    m = np.eye(4)
    m[:3, :3] = np.asarray(rotation, float)
    return m


class Holder:
    """Applies :meth:`Guard.relocate` to each batch of new contacts of a run and keeps the tally
    (contacts moved, merged, unholdable) for the report."""

    def __init__(self, guard: Guard, settings: Settings):
        self.guard, self.settings = guard, settings
        self.moved = self.merged = 0
        self.unholdable: list[dict] = []

    def __call__(self, contacts: Contacts, start: int = 0) -> Contacts:
        r = self.guard.relocate(contacts, self.settings, start)
        self.moved += r.moved
        self.merged += r.merged
        self.unholdable += list(r.unholdable)
        return r.contacts
