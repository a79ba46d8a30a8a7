"""Verify: prove that a supported mesh prints, looking only at the mesh.

The check re-slices the final solid at the printer's pixel pitch and layer
height, as the printer will cure it, and passes only when

- it is one closed, oriented solid (trimesh: watertight and a volume),
- no region starts in mid-air (zero islands: the plate anchors the first layer;
  a "speck", an island smaller than a disc two pixels across, is below the
  smallest feature a printer cures reliably (2-3 pixels, common practice): no
  tip can hold it, so it is reported as a warning about the model's geometry,
  not counted as an island; but it holds nothing either, so a region that grows
  on a speck in mid-air is an island from the speck's layer),
- no newly cured pixel lies farther than ``rules.reach_limit_mm`` from
  material cured in the layer below,
- and, when the tips' loads and diameters are known, every tip holds its peak
  load at the set safety factor.

It does not know how the supports were made, so it checks any supported mesh,
including ones from other tools or edited by hand.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import trimesh

from ..constants import EPS_REL
from ..settings import Settings, resolve_settings
from .layers import LayerStack, analyse_layers, speck_area_mm2

__all__ = ["Verification", "verify", "check", "room_for_helper", "speck_area_mm2"]


@dataclass(frozen=True)
class Verification:
    """The outcome of :func:`verify`; ``passed`` is the verdict, ``failures`` says why not."""

    passed: bool
    watertight: bool
    n_islands: int
    first_islands: tuple[dict, ...]
    specks: tuple[dict, ...]
    max_unsupported_reach_mm: float
    max_unsupported_reach_layer: int
    max_unsupported_reach_xy: tuple[float, float] | None
    reach_limit_mm: float
    tips_over_capacity: int | None
    failures: tuple[str, ...] = field(default=())
    layers: LayerStack | None = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict:
        """The report's ``verification`` keys."""
        return {
            "passed": self.passed,
            "watertight": self.watertight,
            "islands": self.n_islands,
            "first_islands": list(self.first_islands),
            "specks": len(self.specks),
            "first_specks": list(self.specks[:10]),
            "max_unsupported_reach_mm": round(self.max_unsupported_reach_mm, 4),
            "max_unsupported_reach_layer": self.max_unsupported_reach_layer,
            "max_unsupported_reach_xy_mm": (
                None if self.max_unsupported_reach_xy is None else [round(v, 3) for v in self.max_unsupported_reach_xy]
            ),
            "reach_limit_mm": self.reach_limit_mm,
            "tips_over_capacity": self.tips_over_capacity,
            "failures": list(self.failures),
        }


def verify(
    mesh: trimesh.Trimesh,
    settings: Settings,
    *,
    tip_safety: np.ndarray | None = None,
    progress: bool | str = False,
    name: str = "mesh",
) -> Verification:
    """Slice ``mesh`` as the printer will and check it prints.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The supported part, standing on the plate (z = 0) in build coordinates.
    settings : Settings
        Pixel pitch, layer height and ``rules.reach_limit_mm``.
    tip_safety : (n,) float ndarray, optional
        Each tip's capacity over its factored load; a tip below 1 fails.
    progress : bool or str
        Show a progress bar over the layers (a string labels it).
    name : str
        Name of the mesh for the failure lines.

    Returns
    -------
    Verification

    Notes
    -----
    One streamed pass over the layers: O(layers x pixels) time, memory of about
    one layer plus the crossing list (:func:`supportgen.analysis.layers.analyse_layers`).
    """
    pr, rules = settings.printer, settings.rules
    watertight = bool(mesh.is_watertight and mesh.is_volume)
    stack = analyse_layers(
        mesh,
        pr.pixel_mm,
        pr.layer_mm,
        rules.reach_limit_mm,
        progress=progress,
        workers=2 if room_for_helper(len(mesh.faces), mesh.bounds, settings) else 1,
    )
    failures = []
    if not watertight:
        failures.append(f"{name}: the solid is not closed and oriented; it cannot be sliced reliably")
    if float(stack.area_mm2.max(initial=0.0)) < speck_area_mm2(pr.pixel_mm):
        failures.append(f"{name}: no layer cures more than a speck; the solid prints nothing (check its units)")
    speck_mm2 = speck_area_mm2(pr.pixel_mm)
    islands = [i for i in stack.islands if i.area_mm2 >= speck_mm2]
    specks = [i for i in stack.islands if i.area_mm2 < speck_mm2]

    def record(i):
        return {
            "layer": int(i.layer),
            "z_mm": round(float(i.z_mm), 3),
            "xy_mm": [round(float(v), 3) for v in i.centroid_xy],
            "area_mm2": round(float(i.area_mm2), 4),
        }

    first = tuple(record(i) for i in islands[:10])
    if islands:
        i = islands[0]
        failures.append(
            f"{name}: {len(islands)} island(s) start in mid-air; the first at layer {i.layer} "
            f"(z {i.z_mm:.2f} mm) near x {i.centroid_xy[0]:.2f}, y {i.centroid_xy[1]:.2f} mm"
        )
    reach = float(stack.max_unsupported_reach_mm)
    worst_xy = None
    if stack.max_unsupported_reach_layer >= 0 and np.all(
        np.isfinite(stack.reach_xy[stack.max_unsupported_reach_layer])
    ):
        worst_xy = tuple(float(v) for v in stack.reach_xy[stack.max_unsupported_reach_layer])
    if reach > rules.reach_limit_mm:
        where = "" if worst_xy is None else f" near x {worst_xy[0]:.2f}, y {worst_xy[1]:.2f} mm"
        failures.append(
            f"{name}: layer {stack.max_unsupported_reach_layer} reaches {reach:.2f} mm past the layer below"
            f"{where} (limit {rules.reach_limit_mm:g} mm)"
        )
    over = None
    if tip_safety is not None:
        # Sizing makes capacity exactly SF x load; allow for rounding in that product.
        tip_safety = np.asarray(tip_safety, dtype=float)
        over = int(np.count_nonzero(tip_safety < 1.0 - EPS_REL))
        if over:
            lowest = float(tip_safety.min()) * rules.safety_factor
            failures.append(
                f"{name}: {over} tip(s) would tear off at the set safety factor (lowest {lowest:.2f}, "
                f"wanted {rules.safety_factor:g}); turn the part (orient auto) or allow larger tips "
                f"(tip_max_mm, now {rules.tip_max_mm:g} mm)"
            )
    return Verification(
        passed=not failures,
        watertight=watertight,
        n_islands=len(islands),
        first_islands=first,
        specks=tuple(record(i) for i in specks),
        max_unsupported_reach_mm=reach,
        max_unsupported_reach_layer=int(stack.max_unsupported_reach_layer),
        max_unsupported_reach_xy=worst_xy,
        reach_limit_mm=rules.reach_limit_mm,
        tips_over_capacity=over,
        failures=tuple(failures),
        layers=stack,
    )


def room_for_helper(faces: int, bounds, settings: Settings) -> bool:
    """Whether a second process may walk half the layers (:func:`analyse_layers` ``workers=2``):
    only without a ``memory_mb`` limit, and while the machine's available memory holds
    another whole run's estimate (:func:`supportgen.io.budget.estimate_peak_mb`; the helper
    shares the crossings and needs far less)."""
    from ..io.budget import available_memory_mb, estimate_peak_mb

    if settings.limits.memory_mb:
        return False
    free = available_memory_mb()
    return free is not None and free >= estimate_peak_mb(faces, bounds, settings)


def check(mesh, settings=None, *, progress: bool = False, **overrides) -> Verification:
    """Verify an already supported mesh (a path or a trimesh) standing on the plate.

    ``settings`` is a :class:`~supportgen.settings.Settings`, a built-in profile name or a
    TOML file (None: the defaults); ``overrides`` are applied to it.  Only the mesh reader
    and the layer analysis are imported, so the ``check`` command starts fast.

    Raises
    ------
    supportgen.errors.SupportGenError
        The file cannot be read.
    """
    from ..io.meshio import load_mesh

    settings = resolve_settings(settings, overrides)
    if isinstance(mesh, trimesh.Trimesh):
        name, tm = "mesh", mesh
    else:
        name = Path(mesh).name
        tm = load_mesh(mesh).mesh
    return verify(tm, settings, progress=progress, name=name)
