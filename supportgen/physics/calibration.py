"""Calibration: fit the force factor (and an area term) from measured test layers.

Measurements file (CSV, one printed test layer a row, header required)::

    area_mm2,torsion_mm4,peak_force_n[,lift_speed_mm_s,film_gap_mm,viscosity_pa_s]

``area_mm2`` and ``torsion_mm4`` describe the test layer's shape
(:func:`supportgen.physics.pressure.torsion_constant` gives J of any mask; a disc of radius R
has ``pi R^2`` and ``pi R^4 / 2``); the optional columns override the settings for
that row.  Model: ``F = c * 3 mu v J / h^3 + b * A`` with 1 Pa = 1e-6 N/mm^2,
fitted on relative residuals.  The
area term ``b`` is kept only if it lowers the small-sample Akaike criterion (AICc,
Hurvich & Tsai 1989) against the one-term fit.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..constants import EPS_FLOOR
from ..errors import SettingsError
from .separation import squeeze_force_n

__all__ = ["COLUMNS", "read_measurements", "CalibrationFit", "fit_calibration", "calibrated_settings"]

COLUMNS = ("area_mm2", "torsion_mm4", "peak_force_n", "lift_speed_mm_s", "film_gap_mm", "viscosity_pa_s")
_REQUIRED = COLUMNS[:3]


def read_measurements(path) -> np.ndarray:
    """Rows of a measurements CSV as an (m, 6) float array (missing optional columns NaN).

    Raises
    ------
    SettingsError
        Unreadable file, missing column, or a row with a value that is not a
        positive finite number: the message names the file and the row.

    Notes
    -----
    O(rows).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise SettingsError(f"{path}: cannot read measurements ({exc}); pass a UTF-8 CSV file") from None
    reader = csv.DictReader(text.splitlines())
    head = [h.strip() for h in (reader.fieldnames or [])]
    missing = [c for c in _REQUIRED if c not in head]
    if missing:
        raise SettingsError(
            f"{path}: missing column(s) {', '.join(missing)}; the header must name "
            f"{', '.join(_REQUIRED)} (optional: {', '.join(COLUMNS[3:])})"
        )
    rows = []
    for line, row in enumerate(reader, start=2):
        row = {k.strip(): (v or "").strip() for k, v in row.items() if k is not None}
        vals = []
        for c in COLUMNS:
            raw = row.get(c, "")
            if raw == "" and c not in _REQUIRED:
                vals.append(math.nan)
                continue
            try:
                v = float(raw)
            except ValueError:
                v = math.nan
            if not (math.isfinite(v) and v > 0):
                raise SettingsError(
                    f"{path}: row {line}: {c} = {raw!r} is not a positive number; fix or delete the row"
                )
            vals.append(v)
        rows.append(vals)
    if len(rows) < 2:
        raise SettingsError(f"{path}: {len(rows)} measurement row(s); at least 2 are needed for a fit")
    return np.array(rows, float)


def _predictors(meas: np.ndarray, settings) -> tuple[np.ndarray, np.ndarray]:
    """Raw squeeze-film force (c = 1) and area of each row."""
    p, r = settings.printer, settings.resin
    v = np.where(np.isnan(meas[:, 3]), p.lift_speed_mm_s, meas[:, 3])
    h = np.where(np.isnan(meas[:, 4]), p.film_gap_mm, meas[:, 4])
    mu = np.where(np.isnan(meas[:, 5]), r.viscosity_pa_s, meas[:, 5])
    return squeeze_force_n(meas[:, 1], mu, v, h), meas[:, 0]


def _aicc(rss: float, n: int, k: int) -> float:
    rss = max(rss, EPS_FLOOR)
    return n * math.log(rss / n) + 2 * k + (2 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else math.inf)


@dataclass(frozen=True)
class CalibrationFit:
    """Result of :func:`fit_calibration`.

    ``factor`` multiplies the squeeze-film law; ``area_n_mm2`` is the area term
    (0 when not kept); ``predicted`` and ``residuals`` (N) per row; ``aicc`` of the
    one- and two-term fits.
    """

    factor: float
    area_n_mm2: float
    uses_area: bool
    measured: np.ndarray
    predicted: np.ndarray
    residuals: np.ndarray
    aicc: tuple

    def to_text(self) -> str:
        """The fit and its residuals, for the terminal."""
        lines = [
            f"force_calibration = {self.factor:.6g}",
            f"area term = {self.area_n_mm2:.6g} N/mm^2 ({'kept' if self.uses_area else 'not kept'}: "
            f"AICc {self.aicc[0]:.2f} one term, {self.aicc[1]:.2f} with area)",
            "row  measured_n  predicted_n  residual_n",
        ]
        for i, (m, p, r) in enumerate(zip(self.measured, self.predicted, self.residuals), start=1):
            lines.append(f"{i:3d}  {m:10.4g}  {p:11.4g}  {r:+10.3g}")
        rms = float(np.sqrt(np.mean(self.residuals**2)))
        lines.append(f"rms residual = {rms:.4g} N over {self.measured.size} rows")
        return "\n".join(lines)


def fit_calibration(measurements: np.ndarray, settings) -> CalibrationFit:
    """Least-squares calibration factor, plus an area term if the data call for it.

    Parameters
    ----------
    measurements : (m, 6) ndarray
        As returned by :func:`read_measurements`.
    settings : Settings
        Supplies speed, gap and viscosity for rows that leave them out.

    Returns
    -------
    CalibrationFit

    Raises
    ------
    SettingsError
        Fewer than 2 rows, or the fitted factor is not positive.

    Notes
    -----
    Least squares on relative residuals ``(F - model) / F`` (force-proportional
    scatter, as load cells and repeated prints give): two solves of an (m, <=2)
    system, O(m).

    References
    ----------
    C. M. Hurvich, C.-L. Tsai, "Regression and time series model selection in small
    samples", Biometrika 76:297-307 (1989) (AICc).
    """
    meas = np.asarray(measurements, float)
    if meas.ndim != 2 or meas.shape[0] < 2 or meas.shape[1] != len(COLUMNS):
        raise SettingsError(f"measurements have shape {meas.shape}; pass at least 2 rows from read_measurements")
    x, area = _predictors(meas, settings)
    f = meas[:, 2]
    n = f.size
    xr, ar = x / f, area / f  # relative errors: each row weighs 1/F
    c1 = float(xr.sum() / (xr @ xr))
    rss1 = float(((1 - c1 * xr) ** 2).sum())
    coef2, *_ = np.linalg.lstsq(np.column_stack([xr, ar]), np.ones(n), rcond=None)
    rss2 = float(((1 - np.column_stack([xr, ar]) @ coef2) ** 2).sum())
    a1, a2 = _aicc(rss1, n, 1), _aicc(rss2, n, 2)
    use = bool(a2 < a1 and coef2[0] > 0)
    c, b = (float(coef2[0]), float(coef2[1])) if use else (c1, 0.0)
    if not c > 0:
        raise SettingsError(f"the fitted force factor is {c:.3g}, not positive; check the measured forces and shapes")
    pred = c * x + b * area
    return CalibrationFit(c, b, use, f, pred, f - pred, (a1, a2))


def calibrated_settings(fit: CalibrationFit, settings):
    """``settings`` with ``printer.force_calibration`` and ``force_area_n_mm2`` set from ``fit``.

    The area term is written as fitted, 0 when the fit did not keep it (the factor
    was fitted without one).  The fit uses the rigid-gap law without the
    cavitation ceiling: measurements on layers whose film would cavitate (above
    ``ceiling * A``) bias the factor low.

    Raises
    ------
    SettingsError
        The fitted factor is outside the setting's valid range.
    """
    # the factor was fitted with the area term it came with: 0 when not kept, not the default
    values = {"force_calibration": fit.factor, "force_area_n_mm2": fit.area_n_mm2 if fit.uses_area else 0.0}
    return settings.override(values)
