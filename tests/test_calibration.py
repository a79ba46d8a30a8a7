"""The coupon plate and sheet of ``supportgen calibrate``: what a lab prints, fills in and fits.

References used beside the checks:
- exact geometry: a disc's area pi d^2 / 4 and torsion constant pi R^4 / 2;
- Roark's Formulas for Stress and Strain / Timoshenko & Goodier (torsion table): a square
  of side a has J = 0.1406 a^4 (k1 = 0.141 at b/a = 1);
- trimesh (split into bodies, plane sections) for the plate's solids;
- Python's csv reader and writer for the sheet.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
import trimesh

from supportgen import Settings, load_settings
from supportgen.cli.main import main
from supportgen.errors import SettingsError
from supportgen.physics import separation as laws
from supportgen.physics.calibration import read_measurements
from supportgen.physics.pressure import torsion_constant

TRUE_C, TRUE_B = 0.006, 0.004  # force_calibration, force_area_n_mm2 the synthetic forces are made with


def _exact_area_j(shape: str, size: float) -> tuple[float, float]:
    if shape == "disc":  # exact geometry
        r = size / 2
        return math.pi * r**2, math.pi * r**4 / 2
    return size**2, 0.1406 * size**4  # square: Roark / Timoshenko & Goodier table


def _sheet(folder) -> list[dict]:
    with open(folder / "coupons.csv", newline="") as handle:
        return list(csv.DictReader(handle))


def _fill(rows: list[dict], path, drop=(), seed=0) -> None:
    """Write the sheet back with peak_force_n from the force law at TRUE_C, TRUE_B (0.3 % noise)."""
    rng = np.random.default_rng(seed)
    truth = Settings().override(force_calibration=TRUE_C, force_area_n_mm2=TRUE_B)
    out = []
    for row in rows:
        area, j = _exact_area_j(row["shape"], float(row["size_mm"]))
        shape = laws.LayerShape(np.zeros((0, 0), int), 0.05, np.array([area]), np.array([j]))
        force = float(laws.pull_force(shape, truth)[0]) * (1 + rng.normal(0, 0.003))
        out.append({**{k: v for k, v in row.items() if k not in drop}, "peak_force_n": f"{force:.6g}"})
    with open(path, "w", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(out[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(out)


@pytest.fixture(scope="module")
def plate(tmp_path_factory):
    folder = tmp_path_factory.mktemp("coupons")
    assert main(["calibrate", "coupons", "-o", str(folder), "--quiet"]) == 0
    return folder


def test_sheet_lists_discs_and_squares_with_their_exact_areas_and_torsion(plate):
    rows = _sheet(plate)
    assert {r["shape"] for r in rows} == {"disc", "square"} and len(rows) >= 8
    areas = sorted(float(r["area_mm2"]) for r in rows)
    assert areas[0] == pytest.approx(25, rel=0.01) and areas[-1] == pytest.approx(400, rel=0.01)
    assert len({r["name"] for r in rows}) == len(rows) and all(r["peak_force_n"] == "" for r in rows)
    for r in rows:
        area, j = _exact_area_j(r["shape"], float(r["size_mm"]))
        assert float(r["area_mm2"]) == pytest.approx(area, rel=1e-4)
        assert float(r["torsion_mm4"]) == pytest.approx(j, rel=1e-4)
    # Coupons' layer windows do not overlap: only one coupon cures at any height.
    windows = sorted((float(r["z_bottom_mm"]), float(r["z_top_mm"])) for r in rows)
    assert all(a[1] < b[0] for a, b in zip(windows, windows[1:]))
    assert "peak_force_n" in (plate / "README.txt").read_text()


def test_plate_bodies_have_the_sheet_areas(plate):
    mesh = trimesh.load(plate / "coupons.stl")
    bodies = mesh.split(only_watertight=True)
    rows = _sheet(plate)
    assert len(bodies) == len(rows)  # one closed body per coupon (coupon, posts and pads joined)
    settings = Settings()
    assert mesh.bounds[0, 2] == pytest.approx(0.0, abs=1e-6)  # stands on the plate
    assert np.all(np.abs(mesh.bounds[:, :2]) <= [settings.printer.build_x_mm / 2, settings.printer.build_y_mm / 2])
    for r in rows:
        xy = np.array([float(r["x_mm"]), float(r["y_mm"])])
        body = min(bodies, key=lambda b: np.linalg.norm(b.bounds.mean(axis=0)[:2] - xy))
        z = (float(r["z_bottom_mm"]) + float(r["z_top_mm"])) / 2
        section, _ = body.section([0, 0, 1], [0, 0, z]).to_2D()
        # trimesh's plane section at the coupon's mid-height: its area within 1 % of the sheet's.
        assert section.area == pytest.approx(float(r["area_mm2"]), rel=0.01), r["name"]
        assert body.bounds[1, 2] == pytest.approx(float(r["z_top_mm"]), abs=1e-6)


@pytest.mark.parametrize("drop", [(), ("area_mm2", "torsion_mm4")], ids=["as-written", "shape-and-size-only"])
def test_coupon_sheet_round_trip_recovers_the_coefficients(plate, tmp_path, capsys, drop):
    # Forces from known coefficients with the project's force law, J and A from exact geometry and the
    # Roark/Timoshenko square value; the fit (which computes J itself when the columns are dropped)
    # recovers both coefficients within 2 %.
    sheet = tmp_path / "filled.csv"
    _fill(_sheet(plate), sheet, drop)
    out = tmp_path / "printer.toml"
    assert main(["calibrate", str(sheet), "-o", str(out)]) == 0
    fitted = load_settings(out)
    assert fitted.printer.force_calibration == pytest.approx(TRUE_C, rel=0.02)
    assert fitted.printer.force_area_n_mm2 == pytest.approx(TRUE_B, rel=0.02)
    assert "rms residual" in capsys.readouterr().out


def test_blank_rows_are_left_out_and_an_unmeasured_sheet_is_refused(plate, tmp_path):
    with pytest.raises(SettingsError, match=r"0 measured row\(s\)"):
        read_measurements(plate / "coupons.csv")  # as written: nothing measured yet
    rows = _sheet(plate)
    sheet = tmp_path / "partial.csv"
    _fill(rows, sheet)
    text = sheet.read_text().splitlines()
    cells = text[1].split(",")
    cells[-1] = ""  # the first coupon not measured
    sheet.write_text("\n".join([text[0], ",".join(cells), *text[2:]]) + "\n")
    assert read_measurements(sheet).shape == (len(rows) - 1, 6)
    bad = tmp_path / "bad.csv"
    bad.write_text("name,shape,size_mm,peak_force_n\nX,hexagon,5,1.0\nY,disc,5,1.0\n")
    with pytest.raises(SettingsError, match=r"bad\.csv: row 2: shape = 'hexagon'"):
        read_measurements(bad)


def test_square_torsion_value_matches_the_pixel_solver():
    # The 0.1406 a^4 table value (Roark; Timoshenko & Goodier) against the project's Saint-Venant
    # solver on a pixel square: they agree within 1 %.
    a, p = 6.0, 0.05
    n = int(round(a / p))
    mask = np.zeros((n + 20, n + 20), bool)
    mask[10 : 10 + n, 10 : 10 + n] = True
    assert torsion_constant(mask, p) == pytest.approx(0.1406 * a**4, rel=0.01)


def test_calibrate_help_documents_the_sheet(capsys):
    with pytest.raises(SystemExit):
        main(["calibrate", "--help"])
    text = capsys.readouterr().out
    for word in ("calibrate coupons -o DIR", "peak_force_n", "shape, size_mm", "0.1406", "area_mm2,torsion_mm4"):
        assert word in text, word
