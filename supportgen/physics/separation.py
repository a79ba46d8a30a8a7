"""Separation laws: the force each layer component needs to leave the film, per mechanism.

Each law maps a :class:`LayerShape` (the torsion constant and area of every
component, from :mod:`supportgen.physics.pressure`, and optionally its pressure
samples) to newtons:

``pull``
    straight off the film: the squeeze-film (Reynolds) pressure ``c 12 mu v phi / h^3``
    capped at the cavitation ceiling ``p_amb - p_vap`` point by point, plus an
    adhesion term ``b A`` linear in the cured area;
``slide``
    the film slides sideways: Couette shear, ``k mu A v / h``, a *side* load;
``tilt``
    the vat tilts and the film peels from one side: the same bounded law on the
    strip behind the peel front, swept across the layer; never more than ``pull``.

Bounds every law respects (``tests/test_forces.py`` checks each):

* cavitation: a liquid film cannot be pulled below its vapour pressure, so the
  suction is at most ``p_amb - p_vap`` (``printer.ambient_pressure_pa``, ISO 2533
  standard atmosphere; ``resin.vapour_pressure_pa``) and the squeeze term of a
  component never exceeds that times its suction area;
* domain monotonicity (Polya & Szego 1951): a peel band wets only part of a
  layer, so the tilt force of a component is clamped to its pull force.

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

from ..analysis.runlength import mask_runs, ranks
from ..errors import SettingsError
from ..settings import MECHANISMS

__all__ = [
    "LayerShape",
    "pull_force",
    "slide_force",
    "tilt_force",
    "SEPARATION",
    "READS_LABELS",
    "separation",
    "force_unit_n",
    "squeeze_force_n",
    "film_constants",
    "capped_sample_forces",
    "peel_sweep",
    "SIDE_LOAD",
]


@dataclass(frozen=True)
class LayerShape:
    """One layer's components as the separation laws see them.

    ``labels`` (ny, nx) int labels of the suction region (cured pixels plus sealed
    cavities), ``area_mm2`` and ``torsion_mm4`` per label 1..n (index 0 = label 1).
    ``cured_mm2`` (optional, per label) is the cured part of each area, which the
    adhesion term acts on; None means all of ``area_mm2``.  ``samples`` (optional,
    per label) ``(phi_dA, dA)`` arrays of the pressure field: with them the pull
    law caps the pressure point by point, without them it caps the whole
    component at ``ceiling * area`` (the same value whenever the cap binds
    everywhere or nowhere).  Laws not named in ``READS_LABELS`` may be given an
    empty (0, 0) ``labels``.  ``origin`` is the centre of pixel ``[0, 0]`` (mm).
    """

    labels: np.ndarray
    pixel_mm: float
    area_mm2: np.ndarray
    torsion_mm4: np.ndarray
    cured_mm2: np.ndarray | None = None
    samples: tuple | None = None
    origin: tuple = (0.0, 0.0)


def force_unit_n(settings) -> float:
    """Newtons per (Pa s)(mm/s)(mm) of the laws below: 1 Pa = 1e-6 N/mm^2."""
    return 1e-6 * settings.resin.viscosity_pa_s * settings.printer.lift_speed_mm_s


def film_constants(settings) -> tuple[float, float, float]:
    """``(kp, ceiling, b)``: pressure per unit phi, cavitation ceiling, adhesion per area.

    ``kp = c 12 mu v / h^3`` (N/mm^2 per mm^2 of phi), so the squeeze-film suction is
    ``kp * phi``; ``ceiling = (p_amb - p_vap) * 1e-6`` N/mm^2; ``b`` N/mm^2.
    """
    p, r = settings.printer, settings.resin
    kp = p.force_calibration * 12.0 * force_unit_n(settings) / p.film_gap_mm**3
    ceiling = max(p.ambient_pressure_pa - r.vapour_pressure_pa, 0.0) * 1e-6
    return kp, ceiling, p.force_area_n_mm2


def squeeze_force_n(torsion_mm4, viscosity_pa_s, speed_mm_s, gap_mm):
    """Rigid-gap squeeze-film force ``3 mu v J / h^3`` (N), uncalibrated and uncapped.

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
    return (
        1e-6 * np.asarray(viscosity_pa_s) * speed_mm_s * 3.0 * np.asarray(torsion_mm4, float) / np.asarray(gap_mm) ** 3
    )


def capped_sample_forces(phi_da, da, settings) -> np.ndarray:
    """Squeeze force at each pressure sample, ``min(kp phi, ceiling) dA`` (N). Cost O(samples)."""
    kp, ceiling, _ = film_constants(settings)
    da = np.asarray(da, float)
    phi = np.divide(phi_da, da, out=np.zeros(da.shape), where=da > 0)
    return np.minimum(kp * phi, ceiling) * da


def pull_force(shape: LayerShape, settings) -> np.ndarray:
    """Force per component pulling straight off: bounded squeeze film plus adhesion (N).

    Notes
    -----
    Squeeze term: Reynolds' thin-film equation on a rigid flat gap, scaled by
    ``c = printer.force_calibration`` (a flexible film pulls off far below the
    rigid law), with the suction capped at the cavitation ceiling: point by point
    when ``shape.samples`` holds the pressure field, else ``min(c 3 mu v J / h^3,
    ceiling * A)``.  Adhesion term: ``b = printer.force_area_n_mm2`` times the cured
    area; measured detach forces grow linearly with the built area (Kovalenko et
    al., MATEC Web of Conferences 40, 02005, 2016).  Cost O(components), or
    O(samples) with the field.

    References
    ----------
    J. Stefan, Sitzungsber. Akad. Wiss. Wien 69 (1874); Hamrock, Schmid & Jacobson,
    Fundamentals of Fluid Film Lubrication (2004); ISO 2533 (standard atmosphere).
    """
    p = settings.printer
    kp, ceiling, b = film_constants(settings)
    area = np.asarray(shape.area_mm2, float)
    cured = area if shape.cured_mm2 is None else np.asarray(shape.cured_mm2, float)
    if shape.samples is not None:
        squeeze = np.array([capped_sample_forces(w, da, settings).sum() for w, da in shape.samples])
    else:
        raw = p.force_calibration * squeeze_force_n(
            shape.torsion_mm4, settings.resin.viscosity_pa_s, p.lift_speed_mm_s, p.film_gap_mm
        )
        squeeze = np.minimum(raw, ceiling * area)
    return squeeze.reshape(area.shape) + b * cured


def slide_force(shape: LayerShape, settings, shear_calibration: float | None = None) -> np.ndarray:
    """Shear force per component when the film slides sideways: ``k mu A v / h`` (N).

    A side load: :class:`supportgen.physics.loadpath.ForceTracker` shares it among
    the holding contacts by tip area and reports it as ``contact_side_loads``.

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


def _strip_integral(w, kp, ceiling):
    """``int min(kp (w^2/4 - t^2)/2, ceiling) dt`` over a strip of width ``w`` (open both sides)."""
    w = np.asarray(w, float)
    full = kp * w**3 / 12.0
    if ceiling <= 0:
        return np.zeros_like(w)
    u2 = w**2 / 4.0 - 2.0 * ceiling / max(kp, 1e-300)
    u = np.sqrt(np.maximum(u2, 0.0))
    capped = kp * ((w**2 / 4.0) * (w / 2.0 - u) - ((w / 2.0) ** 3 - u**3) / 3.0) + 2.0 * ceiling * u
    return np.where(u2 > 0, capped, full)


def peel_sweep(rows, starts, ends, comp, n: int, pixel_mm: float, origin, settings, band_mm: float | None = None):
    """Force and first moments of every component at each position of the peel front.

    Model (ours; assumptions): the film peels from the layer's low-x side, the
    front a straight line along y sweeping toward +x.  Only a band ``band_mm`` wide
    (default ``printer.peel_band_mm``) behind the front is still wetted at the
    nominal gap and closing speed; resin enters it from both long sides, so each
    run's piece inside the band is a thin strip with the exact strip field
    ``phi = (w^2/4 - t^2)/2``, its suction capped at the cavitation ceiling, plus
    the adhesion term on its area.  The front steps by half a band (at least one
    pixel) from where the band first meets the layer to where it leaves it.

    Parameters
    ----------
    rows, starts, ends, comp : (R,) int ndarrays
        Runs of the suction region and their component (1..n).
    n : int
        Number of components.
    pixel_mm : float
    origin : (x0, y0)
        Centre of pixel ``[0, 0]`` (mm).

    Returns
    -------
    force, fx, fy : (n, M) ndarrays
        Force (N) and its first moments ``sum f x``, ``sum f y`` (N mm) per
        component and front position, before the clamp to the pull force.

    Notes
    -----
    Cost O(sum over runs of (run width + band) / step): each run meets only the
    positions whose band overlaps it.
    """
    h = pixel_mm
    band_mm = settings.printer.peel_band_mm if band_mm is None else band_mm
    nb = max(1, int(round(band_mm / h)))
    step = max(1, nb // 2)
    rows, starts, ends, comp = _merge_touching(*(np.asarray(a, np.int64) for a in (rows, starts, ends, comp)))
    if rows.size == 0 or n == 0:
        return np.zeros((n, 0)), np.zeros((n, 0)), np.zeros((n, 0))
    first = int(starts.min()) - nb + 1
    m_count = (int(ends.max()) - 1 - first) // step + 1
    lo = -((first - (starts - nb + 1)) // step)  # first position meeting the run
    hi = np.minimum(m_count - 1, (ends - 1 - first) // step)  # last position meeting it
    cnt = np.maximum(hi - lo + 1, 0)
    run = np.repeat(np.arange(rows.size), cnt)
    pos = lo[run] + ranks(cnt)
    j = first + pos * step
    a, b = np.maximum(starts[run], j), np.minimum(ends[run], j + nb)
    w = (b - a) * h
    kp, ceiling, adh = film_constants(settings)
    f = h * _strip_integral(w, kp, ceiling) + adh * w * h
    x = origin[0] + (a + b - 1) / 2.0 * h
    y = origin[1] + rows[run] * h
    key = (np.asarray(comp, np.int64)[run] - 1) * m_count + pos
    size = n * m_count
    out = [np.bincount(key, v, size).reshape(n, m_count) for v in (f, f * x, f * y)]
    return out[0], out[1], out[2]


def _merge_touching(rows, starts, ends, comp):
    """Join runs of a row that touch end to start (a cured run and a sealed gap are one strip)."""
    if rows.size < 2:
        return rows, starts, ends, comp
    order = np.lexsort((starts, rows))
    rows, starts, ends, comp = rows[order], starts[order], ends[order], comp[order]
    new = np.r_[True, (rows[1:] != rows[:-1]) | (starts[1:] != ends[:-1])]
    last = np.r_[new[1:], True]
    return rows[new], starts[new], ends[last], comp[new]


def clamp_to_pull(force, fx, fy, pull):
    """Scale each component's sweep so that it never exceeds its pull force (domain monotonicity)."""
    pull = np.asarray(pull, float)[:, None]
    scale = np.minimum(1.0, np.divide(pull, force, out=np.ones(force.shape), where=force > pull))
    return force * scale, fx * scale, fy * scale


def _label_runs(labels):
    rows, starts, ends = mask_runs(labels > 0)
    return rows, starts, ends, labels[rows, starts].astype(np.int64)


def tilt_force(shape: LayerShape, settings, band_mm: float | None = None) -> np.ndarray:
    """Peel-front force per component when the vat tilts away (N), at the layer's worst instant.

    The sweep of :func:`peel_sweep` on the layer's labels, each component clamped to
    its :func:`pull_force` (a peel band wets only part of the layer: Polya & Szego's
    domain monotonicity), read at the front position where the layer's total is
    largest.  Cost as :func:`peel_sweep`.
    """
    n = shape.area_mm2.size
    if n == 0:
        return np.zeros(0)
    force, fx, fy = peel_sweep(*_label_runs(shape.labels), n, shape.pixel_mm, shape.origin, settings, band_mm)
    force, _, _ = clamp_to_pull(force, fx, fy, pull_force(shape, settings))
    if force.shape[1] == 0:
        return np.zeros(n)
    return force[:, int(np.argmax(force.sum(axis=0)))]


#: Separation mechanisms by name (:data:`supportgen.settings.MECHANISMS`):
#: ``f(shape: LayerShape, settings) -> (n,) N``.
SEPARATION = dict(zip(MECHANISMS, (pull_force, slide_force, tilt_force)))
#: The mechanisms whose law reads ``LayerShape.labels``; the others are given an
#: empty (0, 0) label image by :class:`supportgen.physics.loadpath.ForceTracker`.
READS_LABELS = frozenset({"tilt"})
#: Mechanisms whose force acts sideways on the part (a shear), not as a pull.
SIDE_LOAD = frozenset({"slide"})


def separation(name: str):
    """The separation law called ``name``; SettingsError lists the valid names."""
    try:
        return SEPARATION[name]
    except KeyError:
        raise SettingsError(f"unknown separation mechanism {name!r}; valid names: {', '.join(SEPARATION)}") from None
