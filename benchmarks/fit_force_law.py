"""Fit the force law's defaults to published separation-force data, or say why not.

Reads ``benchmarks/force_data.csv``: one row per published (or recalled) fact
about separation forces, with its source.  Rows whose ``kind`` is ``absolute``
and that give ``area_mm2``, ``torsion_mm4`` and ``peak_force_n`` are measured
test layers: with two or more of them the squeeze factor and the adhesion term
are fitted by :func:`supportgen.physics.calibration.fit_calibration` and
printed.  The searches made for this file (Kovalenko et al. 2016; Pan et al.
2017; Liravi, Das & Zhou 2015; Ye et al. 2017; Wu et al. 2020) reached only
abstracts: **no absolute force-against-area values**, so no fit is possible and
the defaults stay marked "memory" in :mod:`supportgen.settings`.

What the script does instead is check the default law against the sourced
*relations*:

* linear in area (Kovalenko et al. 2016): the default force of discs from 1 to
  50 cm^2, its straight-line fit (R^2) and the share of the linear term;
* independent of layer thickness (Kovalenko et al. 2016): the law has no
  layer-thickness input (structural);
* the cavitation ceiling (ISO 2533): the squeeze term never exceeds ambient
  pressure times area;
* the recalled range (REFERENCE.md, memory): a few N to tens of N for
  cm^2-scale layers.

Usage::

    python benchmarks/fit_force_law.py [--csv benchmarks/force_data.csv]
"""

from __future__ import annotations

import argparse
import csv
import math
from pathlib import Path

import numpy as np

from supportgen.physics.calibration import COLUMNS, fit_calibration
from supportgen.physics.separation import LayerShape, film_constants, pull_force
from supportgen.settings import Settings

HERE = Path(__file__).resolve().parent


def absolute_rows(rows) -> np.ndarray:
    out = []
    for r in rows:
        try:
            vals = [float(r["area_mm2"]), float(r["torsion_mm4"]), float(r["peak_force_n"])]
        except (KeyError, ValueError):
            continue
        if r.get("kind") == "absolute":
            out.append(vals + [math.nan] * (len(COLUMNS) - 3))
    return np.array(out, float).reshape(-1, len(COLUMNS))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--csv", type=Path, default=HERE / "force_data.csv")
    args = ap.parse_args()
    with open(args.csv, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    print(f"{len(rows)} sourced rows in {args.csv.name}:")
    for r in rows:
        print(f"  [{r['kind']}] {r['quantity']}: {r['value']} {r['unit']}  ({r['source']})")
    s = Settings()
    meas = absolute_rows(rows)
    if len(meas) >= 2:
        fit = fit_calibration(meas, s)
        print("\nfit to the absolute rows:\n" + fit.to_text())
    else:
        print(
            f"\n{len(meas)} absolute force-area row(s): no fit possible. The defaults "
            f"force_calibration = {s.printer.force_calibration:g} and force_area_n_mm2 = "
            f"{s.printer.force_area_n_mm2:g} N/mm^2 stay from memory."
        )
    # the default law against the sourced relations
    area_cm2 = np.array([1.0, 2.0, 5.0, 10.0, 20.0, 50.0])
    area = area_cm2 * 100.0
    r = np.sqrt(area / np.pi)
    shape = LayerShape(np.zeros((0, 0), np.int32), s.printer.pixel_mm, area, np.pi * r**4 / 2)
    force = pull_force(shape, s)
    _, ceiling, b = film_constants(s)
    linear = b * area
    slope, icpt = np.polyfit(area, force, 1)
    pred = slope * area + icpt
    r2 = 1 - ((force - pred) ** 2).sum() / ((force - force.mean()) ** 2).sum()
    print("\ndefault pull force of a disc layer (area, force, linear share, squeeze / ceiling*A):")
    for a, f, lin in zip(area_cm2, force, linear):
        sq = f - lin
        print(f"  {a:5.0f} cm^2  {f:8.2f} N  {lin / f:5.1%}  {sq / (ceiling * a * 100):5.1%}")
    print(
        f"straight-line fit over 1-50 cm^2: {slope * 100:.3f} N/cm^2, R^2 = {r2:.4f} "
        "(Kovalenko et al. 2016: linear in area)"
    )
    print(f"cavitation ceiling: {ceiling * 100:.2f} N/cm^2 (ISO 2533); layer thickness is no input of the law")
    print(f"1 cm^2: {force[0]:.1f} N, 10 cm^2: {force[3]:.1f} N (recalled range: a few N to tens of N)")


if __name__ == "__main__":
    main()
