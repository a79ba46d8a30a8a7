"""Contacts files: a run's contacts as CSV, in the part's input coordinates, to edit and read back.

Every run writes ``NAME.contacts.csv``, one row per contact::

    id,x_mm,y_mm,z_mm,kind,diameter_mm,load_n,safety_factor,locked,nx,ny,nz

``x_mm, y_mm, z_mm`` are in the coordinates of the input file (before the part
is lifted onto the plate), written with ``repr`` precision so that reading a file
back gives the same numbers.  ``diameter_mm``, ``load_n`` and ``safety_factor``
describe the run that wrote the file; on reading they are ignored (tips are
sized again from the recomputed loads).  ``nx, ny, nz`` are the outward normal
of the part at the contact.

Reading a file back (``generate --contacts FILE``, or ``contacts=`` in the API):

* rows deleted from the file are gone; a row with an empty ``id`` is a new
  contact (kind ``manual`` unless a kind is given);
* ``locked`` 1 (what runs write): the point, and the normal where given, are
  used exactly, never moved or merged away, even on a protected surface (the
  report then counts that scar);
* ``locked`` 0: the point is a hint: it is moved to the nearest point of the
  part's surface, and off a protected surface like a generated contact;
* empty normals are taken from the nearest face of the part.

Blank lines and lines starting with ``#`` are skipped.  A row that cannot be
read stops the run with one line naming the file, the line and what to fix.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import SettingsError

__all__ = [
    "COLUMNS",
    "SIDECAR_SUFFIX",
    "ContactRows",
    "format_contacts",
    "parse_contacts",
    "read_contacts",
    "sidecar_for",
]

#: Side-car contacts file next to a part (``part.stl`` -> ``part.contacts.csv``): a batch
#: reads it as that part's contacts (``generate`` reads a contacts file only when given one).
SIDECAR_SUFFIX = ".contacts.csv"

COLUMNS = ("id", "x_mm", "y_mm", "z_mm", "kind", "diameter_mm", "load_n", "safety_factor", "locked", "nx", "ny", "nz")
_REQUIRED = ("x_mm", "y_mm", "z_mm")


@dataclass(frozen=True)
class ContactRows:
    """The rows of a contacts file, as arrays (input coordinates).

    ``ids`` is -1 for a new row; ``normals`` and ``diameters`` are nan where blank;
    ``kinds`` is ``""`` where blank; ``locked`` defaults to True.
    """

    ids: np.ndarray
    points: np.ndarray
    kinds: np.ndarray
    diameters: np.ndarray
    normals: np.ndarray
    locked: np.ndarray
    source: str = ""

    def __len__(self) -> int:
        return len(self.points)


def _num(v: float) -> str:
    v = float(v)
    return repr(v) if math.isfinite(v) else ""


def format_contacts(points, normals, kinds, diameters, loads, safety_factors, locked=None) -> str:
    """CSV text of contacts (input coordinates), ids 0..n-1, in the given order.

    Examples
    --------
    >>> text = format_contacts([[1.5, 2.0, 0.25]], [[0, 0, -1.0]], ["overhang"], [0.4], [0.02], [3.1])
    >>> text.splitlines()[1]
    '0,1.5,2.0,0.25,overhang,0.4,0.02,3.1,1,0.0,0.0,-1.0'
    >>> parse_contacts(text).points.tolist()
    [[1.5, 2.0, 0.25]]
    """
    points = np.asarray(points, float).reshape(-1, 3)
    normals = np.asarray(normals, float).reshape(-1, 3)
    n = len(points)
    locked = np.ones(n, bool) if locked is None else np.asarray(locked, bool)
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(COLUMNS)
    for i in range(n):
        w.writerow(
            [
                i,
                *map(_num, points[i]),
                str(kinds[i]),
                _num(diameters[i]),
                _num(loads[i]),
                _num(safety_factors[i]),
                int(bool(locked[i])),
                *map(_num, normals[i]),
            ]
        )
    return out.getvalue()


def parse_contacts(text: str, label: str = "contacts") -> ContactRows:
    """Rows of contacts CSV text; see the module notes.

    Raises
    ------
    SettingsError
        Missing columns, a bad number, a repeated id; the message names ``label`` and the line.
    """
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise SettingsError(f"{label}: no header row; the first line must be {','.join(COLUMNS)}")
    reader = csv.DictReader(lines)
    header = [h.strip() for h in (reader.fieldnames or [])]
    reader.fieldnames = header
    missing = [c for c in _REQUIRED if c not in header]
    if missing:
        raise SettingsError(
            f"{label}: missing column(s) {', '.join(missing)}; the header must include {','.join(COLUMNS)}"
        )
    ids, pts, kinds, diam, nrm, locked = [], [], [], [], [], []
    seen = set()
    for k, row in enumerate(reader, start=2):

        def number(col, blank=math.nan, row=row, k=k):
            raw = (row.get(col) or "").strip()
            if not raw:
                if col in _REQUIRED:
                    raise SettingsError(f"{label}: line {k}: {col} is empty; give a number in millimetres")
                return blank
            try:
                v = float(raw)
            except ValueError:
                raise SettingsError(
                    f"{label}: line {k}: {col} {raw!r} is not a number; fix or delete the row"
                ) from None
            if not math.isfinite(v):
                raise SettingsError(f"{label}: line {k}: {col} {raw!r} is not finite; fix or delete the row")
            return v

        raw_id = (row.get("id") or "").strip()
        if raw_id:
            try:
                cid = int(raw_id)
            except ValueError:
                raise SettingsError(
                    f"{label}: line {k}: id {raw_id!r} is not a whole number; leave it empty for a new contact"
                ) from None
            if cid < 0 or cid in seen:
                raise SettingsError(
                    f"{label}: line {k}: id {cid} is {'negative' if cid < 0 else 'repeated'}; "
                    "give each kept row its own id, leave it empty for a new contact"
                )
            seen.add(cid)
        else:
            cid = -1
        raw_lock = (row.get("locked") or "").strip().lower()
        if raw_lock not in ("", "0", "1", "true", "false", "yes", "no"):
            raise SettingsError(f"{label}: line {k}: locked {raw_lock!r} must be 1 or 0")
        ids.append(cid)
        pts.append([number("x_mm"), number("y_mm"), number("z_mm")])
        kinds.append((row.get("kind") or "").strip())
        diam.append(number("diameter_mm"))
        nrm.append([number("nx"), number("ny"), number("nz")])
        locked.append(raw_lock not in ("0", "false", "no"))
    normals = np.array(nrm, float).reshape(-1, 3)
    length = np.linalg.norm(normals, axis=1)
    bad = np.isfinite(length) & (length == 0)
    if bad.any():
        raise SettingsError(
            f"{label}: row {int(np.flatnonzero(bad)[0]) + 1}: the normal is zero; "
            "leave nx, ny, nz empty to take the part's"
        )
    normals = normals / np.where(np.isfinite(length), length, 1.0)[:, None]
    return ContactRows(
        np.array(ids, int),
        np.array(pts, float).reshape(-1, 3),
        np.array(kinds, str),
        np.array(diam, float),
        normals,
        np.array(locked, bool),
        label,
    )


def read_contacts(path: str | Path) -> ContactRows:
    """Read a contacts file (see the module notes).

    Raises
    ------
    SettingsError
        Missing or unreadable file, or a row that cannot be read.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise SettingsError(f"{path}: contacts file not found; check the path") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SettingsError(f"{path}: cannot read the contacts file ({exc}); save it as UTF-8 CSV") from None
    return parse_contacts(text, str(path))


def sidecar_for(source: str | Path) -> Path | None:
    """The side-car contacts file of a part file, if it exists (``part.stl`` -> ``part.contacts.csv``).

    Examples
    --------
    >>> sidecar_for("/nonexistent/part.stl") is None
    True
    """
    p = Path(source)
    side = p.with_name((p.name[: -len(p.suffix)] if p.suffix else p.name) + SIDECAR_SUFFIX)
    return side if side.is_file() else None
