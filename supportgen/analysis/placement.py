"""Placement: put the part where it will print, and refuse it if it cannot.

The plate is the rectangle ``|x| <= build_x/2, |y| <= build_y/2`` at ``z = 0``.
The part is lifted so its lowest point sits ``elevation_mm`` above the plate,
leaving room for the supports and base beneath it.  In x and y:

``auto`` (default)
    keep the position where the part (with its base margin) lies on the plate,
    so a user's arrangement survives; otherwise centre it and say so.  Parts
    placed together (``group_bounds``) move as one, keeping their arrangement.
``keep``
    keep the position strictly and refuse a part that lies off the plate.
``centre``
    always centre the part (or the group) on the plate.

A part too small to be in millimetres (longest side under
:data:`MIN_PART_MM`) is refused with the likely unit and the option that
scales it: files from other tools often hold metres or inches.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import trimesh

from ..constants import EPS_REL
from ..errors import PlacementError
from ..io.units import unit_hint
from ..settings import Settings

__all__ = ["Placement", "place", "POSITIONS", "MIN_PART_MM", "MIN_CURED_PIXELS", "check_cures"]

#: How x/y are chosen; see the module notes.
POSITIONS = ("auto", "keep", "centre")

#: A part whose longest side is shorter than this (mm) is taken for a unit mistake:
#: nothing this small is supported on a resin printer (a 2 mm part is 40 pixels
#: across at 50 um; smaller ones are printed on a carrier, not supported).
MIN_PART_MM = 2.0

#: A part that cures no more pixels than this in any layer is refused (a speck).
MIN_CURED_PIXELS = 4


@dataclass(frozen=True)
class Placement:
    """A placed part and the translation that put it there.

    Attributes
    ----------
    mesh : trimesh.Trimesh
        The part in build coordinates (a new mesh; the input is not modified).
    offset : (3,) float ndarray
        The translation applied to the input (mm).
    warnings : tuple of str
        What a person should know (the part was moved onto the plate).
    """

    mesh: trimesh.Trimesh
    offset: np.ndarray
    warnings: tuple[str, ...] = ()


def place(
    mesh: trimesh.Trimesh,
    settings: Settings,
    *,
    position: str = "auto",
    name: str = "part",
    group_bounds: np.ndarray | None = None,
) -> Placement:
    """Lift ``mesh`` to ``rules.elevation_mm`` above the plate and check it fits.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part, oriented as it will print (z up, away from the plate).
    settings : Settings
        Uses ``rules.elevation_mm``, ``rules.base_margin_mm`` and the printer's
        build volume.
    position : {"auto", "keep", "centre"}
        How x/y are chosen (see the module notes).
    name : str
        Name of the input, for error messages.
    group_bounds : (2, 3) float ndarray, optional
        Bounds of all parts placed together; x/y decisions are made for the
        group, so the parts keep their arrangement.

    Returns
    -------
    Placement

    Raises
    ------
    PlacementError
        The part is smaller than a unit mistake allows, (with its base margin)
        larger than the build area or taller than the build height, or (with
        ``position="keep"``) lies off the plate.

    Examples
    --------
    >>> box = trimesh.creation.box((10, 10, 10)).apply_translation((100, 100, 0))
    >>> p = place(box, Settings())
    >>> p.mesh.bounds[0].tolist(), p.warnings[0][:33]
    ([-5.0, -5.0, 5.0], 'part: lies off the plate (x 95.0.')
    >>> float(place(box, Settings(), position="centre").mesh.bounds[0, 2])
    5.0
    """
    if position not in POSITIONS:
        raise PlacementError(f"{name}: position {position!r} is not one of {', '.join(POSITIONS)}")
    pr, rules = settings.printer, settings.rules
    lo, hi = mesh.bounds
    size = hi - lo
    if not np.all(np.isfinite(size)) or size.max() < MIN_PART_MM:
        raise PlacementError(
            f"{name}: the part is only {size.max():.3g} mm across, too small to be in millimetres; "
            + unit_hint(float(size.max()))
        )
    margin = 2 * rules.base_margin_mm
    if size[0] + margin > pr.build_x_mm or size[1] + margin > pr.build_y_mm:
        raise PlacementError(
            f"{name}: footprint {size[0]:.1f} x {size[1]:.1f} mm (plus {margin:.1f} mm of base) does not fit the "
            f"{pr.build_x_mm:g} x {pr.build_y_mm:g} mm build area; scale it down, split it or use a larger printer "
            "profile"
        )
    if size[2] + rules.elevation_mm > pr.build_z_mm:
        raise PlacementError(
            f"{name}: height {size[2]:.1f} mm plus {rules.elevation_mm:g} mm elevation exceeds the "
            f"{pr.build_z_mm:g} mm build height; reorient it, scale it down or lower the elevation"
        )
    glo, ghi = (lo, hi) if group_bounds is None else np.asarray(group_bounds, float)
    half = np.array([pr.build_x_mm, pr.build_y_mm]) / 2 - rules.base_margin_mm
    on_plate = bool(np.all(glo[:2] >= -half) and np.all(ghi[:2] <= half))
    whole = "the parts together" if group_bounds is not None else "it"
    where = (
        f"x {glo[0]:.1f}..{ghi[0]:.1f}, y {glo[1]:.1f}..{ghi[1]:.1f} mm; the plate spans "
        f"+/-{pr.build_x_mm / 2:g} x +/-{pr.build_y_mm / 2:g} mm less {rules.base_margin_mm:g} mm of base margin"
    )
    warnings: list[str] = []
    offset = np.array([0.0, 0.0, rules.elevation_mm - lo[2]])
    if position == "centre" or (position == "auto" and not on_plate):
        offset[:2] = -(glo[:2] + ghi[:2]) / 2
        if position == "auto":
            warnings.append(f"{name}: lies off the plate ({where}); {whole} moved to the plate centre")
    elif not on_plate:
        raise PlacementError(
            f"{name}: lies off the plate ({where}); move it, or let supportgen place it (position auto or centre)"
        )
    placed = mesh.copy()
    placed.apply_translation(offset)
    new_lo, new_hi = placed.bounds[0, :2], placed.bounds[1, :2]
    if np.any(new_lo < -half - EPS_REL) or np.any(new_hi > half + EPS_REL):
        raise PlacementError(
            f"{name}: the parts together do not fit the plate ({where}); place them in separate "
            "runs or move them closer"
        )
    return Placement(placed, offset, tuple(warnings))


def check_cures(area_mm2: np.ndarray, settings: Settings, name: str = "part") -> None:
    """Refuse a part that cures no more than a speck in any layer.

    A part whose every layer is under a few pixels (a 10 um cube, a horse drawn
    in metres) prints nothing the tool could support; it is almost always a
    unit mistake.  ``area_mm2`` is the cured area of each layer.

    Raises
    ------
    PlacementError
        No layer cures more than :data:`MIN_CURED_PIXELS` pixels.
    """
    px = settings.printer.pixel_mm
    most = float(np.max(area_mm2, initial=0.0)) / px**2
    if most <= MIN_CURED_PIXELS:
        raise PlacementError(
            f"{name}: no layer cures more than {most:.0f} pixel(s) at {px:g} mm pixels: the part is "
            "smaller than the printer resolves; if it was drawn in other units, scale it "
            "(--units m|cm|in or --scale FACTOR)"
        )
