"""Separation laws: the force each layer component needs to leave the film, per mechanism.

Each law maps a :class:`LayerShape` (the torsion constant and area of every
component, from :mod:`supportgen.physics.pressure`) to newtons:

``pull``
    straight off the film: the squeeze-film (Reynolds) law, ``c 3 mu v J / h^3 + b A``;
``slide``
    the film slides sideways: Couette shear, ``k mu A v / h``;
``tilt``
    the vat tilts and the film peels from one side: the squeeze law on the strip
    behind the peel front, at its worst position.

The names are :data:`supportgen.settings.MECHANISMS`; :func:`separation` looks
them up and lists the valid ones on a mistake.

Examples
--------
>>> import numpy as np
>>> from supportgen.settings import Settings
>>> disc = LayerShape(np.zeros((0, 0), np.int32), 0.05, np.array([np.pi * 5**2]), np.array([np.pi * 5**4 / 2]))
>>> s = Settings()
>>> bool(slide_force(disc, s)[0] < pull_force(disc, s)[0])
True
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import SettingsError
from ..settings import MECHANISMS

__all__ = ["LayerShape", "pull_force", "slide_force", "tilt_force", "SEPARATION", "READS_LABELS",
           "separation", "force_unit_n", "squeeze_force_n"]


@dataclass(frozen=True)
class LayerShape:
    """One layer's components as the separation laws see them.

    ``labels`` (ny, nx) int labels of the suction region (cured pixels plus sealed
    cavities), ``area_mm2`` and ``torsion_mm4`` per label 1..n (index 0 = label 1).
    Laws not named in ``READS_LABELS`` use only the per-label arrays and may be given
    an empty (0, 0) ``labels``.
    """

    labels: np.ndarray
    pixel_mm: float
    area_mm2: np.ndarray
    torsion_mm4: np.ndarray


def force_unit_n(settings) -> float:
    """Newtons per (Pa s)(mm/s)(mm) of the laws below: 1 Pa = 1e-6 N/mm^2."""
    return 1e-6 * settings.resin.viscosity_pa_s * settings.printer.lift_speed_mm_s


def squeeze_force_n(torsion_mm4, viscosity_pa_s, speed_mm_s, gap_mm):
    """Rigid-gap squeeze-film force ``3 mu v J / h^3`` (N), uncalibrated.

    ``J`` in mm^4, ``mu`` in Pa s (1 Pa = 1e-6 N/mm^2), ``v`` in mm/s, ``h`` in mm.
    For a disc (``J = pi R^4 / 2``) this is Stefan's ``3 pi mu R^4 v / (2 h^3)``.

    References
    ----------
    J. Stefan, Sitzungsber. Akad. Wiss. Wien 69 (1874).

    Examples
    --------
    >>> round(float(squeeze_force_n(np.pi * 10.0**4 / 2, 1.0, 1.0, 0.05)), 1)   # about 380 N
    377.0
    """
    return 1e-6 * np.asarray(viscosity_pa_s) * speed_mm_s * 3.0 * np.asarray(torsion_mm4, float) / np.asarray(gap_mm) ** 3


def pull_force(shape: LayerShape, settings) -> np.ndarray:
    """Squeeze-film force per component, pulling straight off: ``c 3 mu v J / h^3 + b A`` (N).

    Notes
    -----
    Reynolds' thin-film equation on a rigid flat gap; ``c`` is
    ``printer.force_calibration`` (a flexible film pulls off far below the rigid law)
    and ``b`` is ``printer.force_area_n_mm2``, an adhesion term per unit area that
    is zero unless a calibration found the measurements call for it.
    Cost O(components).

    References
    ----------
    J. Stefan, Sitzungsber. Akad. Wiss. Wien 69 (1874); Hamrock, Schmid & Jacobson,
    Fundamentals of Fluid Film Lubrication (2004).
    """
    p = settings.printer
    squeeze = p.force_calibration * squeeze_force_n(shape.torsion_mm4, settings.resin.viscosity_pa_s,
                                                    p.lift_speed_mm_s, p.film_gap_mm)
    return squeeze + p.force_area_n_mm2 * np.asarray(shape.area_mm2, float)


def slide_force(shape: LayerShape, settings, shear_calibration: float | None = None) -> np.ndarray:
    """Shear force per component when the film slides sideways: ``k mu A v / h`` (N).

    Notes
    -----
    Couette flow in the gap at the lift speed.  ``k = shear_calibration``, by
    default ``printer.slide_calibration`` (1), not ``printer.force_calibration``: that factor stands for the film
    flexing away from the squeeze, and a film sliding in its own plane has no such
    relief (our assumption).  With equal factors slide/pull is ``A h^2 / (3 J)``,
    ``(2/3)(h/R)^2`` for a disc; with the defaults it is ``1/c`` times that, about a
    hundredth for a disc of 3-5 mm radius.  Cost O(components).

    References
    ----------
    Couette flow: any fluid-mechanics text, e.g. Batchelor, An Introduction to Fluid
    Dynamics (1967), section 4.2.
    """
    k = settings.printer.slide_calibration if shear_calibration is None else shear_calibration
    return k * force_unit_n(settings) * shape.area_mm2 / settings.printer.film_gap_mm


def tilt_force(shape: LayerShape, settings, band_mm: float | None = None) -> np.ndarray:
    """Peel-line force per component when the vat tilts away (N), at the worst instant.

    Model (ours; assumptions): the film peels from the layer's low-x side, the peel
    front a straight line along y sweeping toward +x.  Only a band ``band_mm`` wide
    (default ``printer.peel_band_mm``)
    behind the front is still wetted at the nominal gap and closing speed; resin
    enters it from both long sides (the front, and the already peeled side), so it
    is a thin strip: ``J = sum_rows w_row^3 / 3 * h_px`` with ``w_row`` the cured
    width of each pixel row inside the band (end effects along y neglected, which
    errs high).  The force at each front position is the pull law on that band
    times ``c``; the layer's value is its maximum over the sweep, and each
    component gets its share at that instant.

    Notes
    -----
    O(pixels of the layer's bounding box): one cumulative sum along x.
    """
    lab, h = shape.labels, shape.pixel_mm
    n = shape.area_mm2.size
    out = np.zeros(n)
    if n == 0:
        return out
    band_mm = settings.printer.peel_band_mm if band_mm is None else band_mm
    nb = max(1, int(round(band_mm / h)))
    cured = lab > 0
    cs = np.pad(np.cumsum(cured, axis=1), ((0, 0), (1, 0)))
    nx = lab.shape[1]
    start = np.arange(nx)
    width = cs[:, np.minimum(start + nb, nx)] - cs[:, start]
    j = int(np.argmax((width.astype(float) ** 3).sum(axis=0)))
    band = lab[:, j: j + nb]
    rr = np.broadcast_to(np.arange(lab.shape[0])[:, None], band.shape)
    counts = np.bincount((rr * (n + 1) + band)[band > 0], minlength=lab.shape[0] * (n + 1))
    per = (counts.reshape(-1, n + 1).astype(float) * h) ** 3 / 3.0 * h
    jband = per.sum(axis=0)[1:]
    p = settings.printer
    return p.force_calibration * squeeze_force_n(jband, settings.resin.viscosity_pa_s, p.lift_speed_mm_s, p.film_gap_mm)


#: Separation mechanisms by name (:data:`supportgen.settings.MECHANISMS`):
#: ``f(shape: LayerShape, settings) -> (n,) N``.
SEPARATION = dict(zip(MECHANISMS, (pull_force, slide_force, tilt_force)))
#: The mechanisms whose law reads ``LayerShape.labels``; the others are given an
#: empty (0, 0) label image by :class:`supportgen.physics.loadpath.ForceTracker`.
READS_LABELS = frozenset({"tilt"})


def separation(name: str):
    """The separation law called ``name``; SettingsError lists the valid names."""
    try:
        return SEPARATION[name]
    except KeyError:
        raise SettingsError(
            f"unknown separation mechanism {name!r}; valid names: {', '.join(SEPARATION)}") from None
