"""Length units of mesh files: STL, OBJ and PLY carry none, 3MF says its own.

Everything inside supportgen is in millimetres.  A file drawn in other units is
scaled once, right after loading, by :func:`scale_loaded`; a part that reads far
too small for millimetres gets :func:`unit_hint`'s advice in its refusal.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from ..errors import SettingsError
from .meshio import LoadedMesh

__all__ = ["UNITS", "unit_factor", "unit_hint", "scale_loaded", "group_bounds"]

#: Millimetres per unit.
UNITS = {"mm": 1.0, "cm": 10.0, "m": 1000.0, "in": 25.4}  # the inch is 25.4 mm exactly (1959 agreement)
_NAMES = {"cm": "centimetres", "m": "metres", "in": "inches"}


def unit_factor(units: str = "mm", scale: float = 1.0) -> float:
    """Millimetres per file unit: the unit's size times a further ``scale``.

    >>> unit_factor("in"), unit_factor("mm", 1000)
    (25.4, 1000.0)
    """
    if units not in UNITS:
        raise SettingsError(f"units {units!r} unknown; valid units: {', '.join(UNITS)}")
    if not (isinstance(scale, (int, float)) and math.isfinite(scale) and scale > 0):
        raise SettingsError(f"scale {scale!r} must be a positive number")
    return UNITS[units] * float(scale)


def unit_hint(size_mm: float) -> str:
    """The likely unit of a part whose longest side reads ``size_mm``, as advice.

    The unit whose scaled size lands nearest a typical print (about 40 mm,
    geometrically) is named with the options that scale it.

    >>> unit_hint(0.05)
    'it was probably drawn in metres: 0.05 m is 50 mm; scale it with --units m (or --scale 1000)'
    >>> unit_hint(1.5)
    'it was probably drawn in inches: 1.5 in is 38.1 mm; scale it with --units in (or --scale 25.4)'
    """
    size_mm = max(float(size_mm), 1e-30)
    best = min((u for u in UNITS if u != "mm"), key=lambda u: abs(math.log(size_mm * UNITS[u] / 40.0)))
    f = UNITS[best]
    return (
        f"it was probably drawn in {_NAMES[best]}: {size_mm:g} {best} is {size_mm * f:.4g} mm; "
        f"scale it with --units {best} (or --scale {f:g})"
    )


def scale_loaded(loaded: LoadedMesh, factor: float) -> LoadedMesh:
    """``loaded`` scaled about the origin by ``factor`` (a new record; 1 returns it as is).

    The scaling is recorded among the repairs, so the report says what was done.
    """
    if factor == 1.0:
        return loaded
    mesh = loaded.mesh.copy()
    mesh.apply_scale(factor)
    return dataclasses.replace(loaded, mesh=mesh, repairs=(*loaded.repairs, f"scaled by {factor:g} to millimetres"))


def group_bounds(paths, factor: float = 1.0):
    """Bounds (mm) of several mesh files together, or None when fewer than two can be read.

    Used to place the parts of one run as a group, keeping their arrangement.  The
    files are read without repair (positions only); an unreadable file is left out
    here and reported when it is processed.
    """
    import trimesh

    boxes = []
    for path in paths:
        try:
            mesh = trimesh.load(str(path), force="mesh", process=False)
            b = np.asarray(mesh.bounds, float) * factor
        except Exception:  # noqa: BLE001 - any reader failure: the part is reported on its own turn
            continue
        if b.shape == (2, 3) and np.all(np.isfinite(b)):
            boxes.append(b)
    if len(boxes) < 2:
        return None
    boxes = np.array(boxes)
    return np.array([boxes[:, 0].min(axis=0), boxes[:, 1].max(axis=0)])
