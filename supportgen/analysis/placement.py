"""Placement: put the part where it will print, and refuse it if it cannot.

The plate is the square ``|x| <= build_x/2, |y| <= build_y/2`` at ``z = 0``.  The
part is lifted so its lowest point sits ``elevation_mm`` above the plate, leaving
room for the supports and base beneath it; x and y are kept as given (so a
user's arrangement of several parts survives) unless ``centre=True``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import trimesh

from ..errors import PlacementError
from ..settings import Settings

__all__ = ["Placement", "place"]


@dataclass(frozen=True)
class Placement:
    """A placed part and the translation that put it there.

    Attributes
    ----------
    mesh : trimesh.Trimesh
        The part in build coordinates (a new mesh; the input is not modified).
    offset : (3,) float ndarray
        The translation applied to the input (mm).
    """

    mesh: trimesh.Trimesh
    offset: np.ndarray


def place(mesh: trimesh.Trimesh, settings: Settings, *, centre: bool = False, name: str = "part") -> Placement:
    """Lift ``mesh`` to ``rules.elevation_mm`` above the plate and check it fits.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part, oriented as it will print (z up, away from the plate).
    settings : Settings
        Uses ``rules.elevation_mm``, ``rules.base_margin_mm`` and the printer's
        build volume.
    centre : bool
        Move the part's x/y bounding-box centre to the plate centre first.
    name : str
        Name of the input, for error messages.

    Returns
    -------
    Placement

    Raises
    ------
    PlacementError
        The part (with its base margin) is larger than the build area or
        taller than the build height, or lies off the plate.

    Examples
    --------
    >>> box = trimesh.creation.box((10, 10, 10))
    >>> p = place(box, Settings())
    >>> float(p.mesh.bounds[0, 2])
    5.0
    """
    pr, rules = settings.printer, settings.rules
    lo, hi = mesh.bounds
    offset = np.array([0.0, 0.0, rules.elevation_mm - lo[2]])
    if centre:
        offset[:2] = -(lo[:2] + hi[:2]) / 2
    size = hi - lo
    margin = 2 * rules.base_margin_mm
    if size[0] + margin > pr.build_x_mm or size[1] + margin > pr.build_y_mm:
        raise PlacementError(
            f"{name}: footprint {size[0]:.1f} x {size[1]:.1f} mm (plus {margin:.1f} mm of base) does not fit the "
            f"{pr.build_x_mm:g} x {pr.build_y_mm:g} mm build area; scale it down, split it or use a larger printer profile")
    if size[2] + rules.elevation_mm > pr.build_z_mm:
        raise PlacementError(
            f"{name}: height {size[2]:.1f} mm plus {rules.elevation_mm:g} mm lift exceeds the {pr.build_z_mm:g} mm build "
            "height; reorient it, scale it down or lower the lift")
    new_lo, new_hi = lo[:2] + offset[:2], hi[:2] + offset[:2]
    half = np.array([pr.build_x_mm, pr.build_y_mm]) / 2 - rules.base_margin_mm
    if np.any(new_lo < -half) or np.any(new_hi > half):
        raise PlacementError(
            f"{name}: the part lies off the plate (x {new_lo[0]:.1f}..{new_hi[0]:.1f}, y {new_lo[1]:.1f}..{new_hi[1]:.1f} mm; "
            f"the plate spans +/-{pr.build_x_mm / 2:g} x +/-{pr.build_y_mm / 2:g} mm); move it or ask for centring (--centre)")
    placed = mesh.copy()
    placed.apply_translation(offset)
    return Placement(placed, offset)
