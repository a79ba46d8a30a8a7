"""Calibration: fit the force factor (and an area term) from measured test layers.

Two steps a lab can do without computing anything:

1. :func:`write_coupons` writes a printable coupon plate (``coupons.stl``: discs
   and squares of graded areas, one separate body each, every coupon a few layers
   thick on short posts at its own height, so that only one coupon is being cured
   at any layer), the sheet ``coupons.csv`` (one row per coupon) and
   ``README.txt`` (how to print and measure).
2. The lab fills in ``peak_force_n`` and :func:`read_measurements` reads the sheet;
   :func:`fit_calibration` fits it.

Sheet (CSV, header required, one coupon or test layer a row; columns in any order)::

    name,shape,size_mm,area_mm2,torsion_mm4,peak_force_n[,lift_speed_mm_s,film_gap_mm,viscosity_pa_s]

``peak_force_n`` is required (a row left blank was not measured and is left
out).  The shape of each row is given either by ``area_mm2`` and ``torsion_mm4``
(the older format ``area_mm2,torsion_mm4,peak_force_n`` still works;
:func:`supportgen.physics.pressure.torsion_constant` gives J of any mask), or by
``shape`` (``disc``: ``size_mm`` is the diameter; ``square``: the side) and
``size_mm``, from which a blank area or torsion constant is computed
(:func:`coupon_torsion_mm4`).  ``name`` and the position columns are for people.
The optional columns override the settings for that row.

Model: ``F = c * 3 mu v J / h^3 + b * A`` with 1 Pa = 1e-6 N/mm^2, fitted on
relative residuals.  The area term ``b`` is kept only if it lowers the
small-sample Akaike criterion (AICc, Hurvich & Tsai 1989) against the one-term fit.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..constants import EPS_FLOOR
from ..errors import SettingsError

__all__ = [
    "COLUMNS",
    "SHEET_COLUMNS",
    "SHAPES",
    "SQUARE_TORSION_K",
    "SHEET_HELP",
    "read_measurements",
    "coupon_area_mm2",
    "coupon_torsion_mm4",
    "Coupon",
    "coupon_plan",
    "coupon_plate",
    "write_coupons",
    "CalibrationFit",
    "fit_calibration",
    "calibrated_settings",
]

COLUMNS = ("area_mm2", "torsion_mm4", "peak_force_n", "lift_speed_mm_s", "film_gap_mm", "viscosity_pa_s")
_REQUIRED = COLUMNS[:3]
#: The coupon sheet's columns (``write_coupons``); read_measurements also takes the optional COLUMNS[3:].
SHEET_COLUMNS = (
    "name",
    "shape",
    "size_mm",
    "area_mm2",
    "torsion_mm4",
    "x_mm",
    "y_mm",
    "z_bottom_mm",
    "z_top_mm",
    "peak_force_n",
)
#: Coupon shapes and what ``size_mm`` means for each.
SHAPES = {"disc": "diameter", "square": "side"}
#: Torsion constant of a square of side a: J = 0.1406 a^4.  Timoshenko & Goodier, Theory of Elasticity,
#: 3rd ed. (1970), torsion of a rectangular bar, table of k1 (0.141 at b/a = 1, J = k1 (2a')^3 (2b') for
#: half-sides a', b'); Roark's Formulas for Stress and Strain, torsion table (square of side 2a: K = 2.25 a^4).
SQUARE_TORSION_K = 0.1406

#: The sheet's format, for ``supportgen calibrate --help`` and the README.
SHEET_HELP = """\
The sheet (CSV, a header row, then one row per coupon or test layer):

  name,shape,size_mm,area_mm2,torsion_mm4,peak_force_n

  peak_force_n   the peak separation force measured on that coupon's layers, N
                 (required; a row left blank was not measured and is left out)
  shape, size_mm disc (size = diameter, mm) or square (size = side, mm): the area
                 and torsion constant are computed from them when left blank
                 (disc: pi R^4 / 2, exact; square of side a: 0.1406 a^4)
  area_mm2, torsion_mm4
                 the layer's area and torsion constant J, for any other shape
                 (the older format area_mm2,torsion_mm4,peak_force_n still works)
  lift_speed_mm_s, film_gap_mm, viscosity_pa_s
                 optional: override the settings for that row
  name, x_mm, y_mm, z_bottom_mm, z_top_mm
                 for people: which coupon, where on the plate, which layers

`supportgen calibrate coupons -o DIR` writes a coupon plate (DIR/coupons.stl) and
this sheet (DIR/coupons.csv) ready to fill in, with DIR/README.txt on how to print
and measure.  Model fitted: F = c * 3 mu v J / h^3 + b * A (c: force_calibration,
b: force_area_n_mm2, kept only when the data call for it).
"""


def coupon_area_mm2(shape: str, size_mm: float) -> float:
    """Area of a coupon (mm^2): a disc of diameter ``size_mm`` or a square of side ``size_mm``."""
    _check_shape(shape)
    return float(np.pi * size_mm**2 / 4 if shape == "disc" else size_mm**2)


def coupon_torsion_mm4(shape: str, size_mm: float) -> float:
    """Torsion constant J of a coupon (mm^4), the shape factor of the squeeze-film law.

    A disc of diameter d: ``pi R^4 / 2`` with R = d / 2 (exact).  A square of side a:
    :data:`SQUARE_TORSION_K` ``a^4`` (Timoshenko & Goodier; Roark).  Both agree with
    :func:`supportgen.physics.pressure.torsion_constant` of their masks.
    """
    _check_shape(shape)
    return float(np.pi * (size_mm / 2) ** 4 / 2 if shape == "disc" else SQUARE_TORSION_K * size_mm**4)


def _check_shape(shape: str) -> None:
    if shape not in SHAPES:
        raise SettingsError(f"coupon shape {shape!r} is unknown; use one of {', '.join(SHAPES)}")


def _number(path, line: int, column: str, raw: str) -> float:
    try:
        v = float(raw)
    except ValueError:
        v = math.nan
    if not (math.isfinite(v) and v > 0):
        raise SettingsError(f"{path}: row {line}: {column} = {raw!r} is not a positive number; fix or delete the row")
    return v


def read_measurements(path) -> np.ndarray:
    """Rows of a measurements sheet (module notes) as an (m, 6) float array in :data:`COLUMNS`
    order (missing optional columns NaN); rows with a blank ``peak_force_n`` are left out.

    Raises
    ------
    SettingsError
        Unreadable file, missing column, a row with a value that is not a positive
        finite number, an unknown shape, or fewer than 2 measured rows: the message
        names the file and the row.

    Notes
    -----
    O(rows).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise SettingsError(f"{path}: cannot read measurements ({exc}); pass a UTF-8 CSV file") from None
    reader = csv.DictReader(text.splitlines())
    head = [h.strip() for h in (reader.fieldnames or [])]
    by_shape = "shape" in head and "size_mm" in head
    missing = [c for c in _REQUIRED if c not in head and not (by_shape and c != "peak_force_n")]
    if missing:
        raise SettingsError(
            f"{path}: missing column(s) {', '.join(missing)}; the header must name peak_force_n and either "
            f"area_mm2,torsion_mm4 or shape,size_mm (optional: {', '.join(COLUMNS[3:])}); "
            "see `supportgen calibrate --help`"
        )
    rows = []
    for line, row in enumerate(reader, start=2):
        row = {k.strip(): (v or "").strip() for k, v in row.items() if k is not None}
        if not row.get("peak_force_n"):
            continue  # not measured (a coupon sheet as written has this column blank)
        computed = {}
        if by_shape and (not row.get("area_mm2") or not row.get("torsion_mm4")):
            shape = row.get("shape", "").lower()
            if shape not in SHAPES:
                raise SettingsError(
                    f"{path}: row {line}: shape = {row.get('shape', '')!r} is not one of {', '.join(SHAPES)}; "
                    "fix it or give area_mm2 and torsion_mm4"
                )
            size = _number(path, line, "size_mm", row.get("size_mm", ""))
            computed = {"area_mm2": coupon_area_mm2(shape, size), "torsion_mm4": coupon_torsion_mm4(shape, size)}
        vals = []
        for c in COLUMNS:
            raw = row.get(c, "")
            if raw == "" and c in computed:
                vals.append(computed[c])
            elif raw == "" and c not in _REQUIRED:
                vals.append(math.nan)
            else:
                vals.append(_number(path, line, c, raw))
        rows.append(vals)
    if len(rows) < 2:
        raise SettingsError(
            f"{path}: {len(rows)} measured row(s) (with peak_force_n filled in); at least 2 are needed for a fit"
        )
    return np.array(rows, float)


def _predictors(meas: np.ndarray, settings) -> tuple[np.ndarray, np.ndarray]:
    """Raw squeeze-film force (c = 1) and area of each row."""
    from .separation import squeeze_force_n  # here, so the command line's help does not load the layer code

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


# -- the coupon plate ---------------------------------------------------------------------------------

#: Coupon areas (mm^2), for each shape: a 16:1 range, so both the area term and the J ~ A^2 term show.
COUPON_AREAS_MM2 = (25.0, 50.0, 100.0, 200.0, 400.0)
#: Coupon thickness (mm): a few layers at any usual layer height.
COUPON_THICKNESS_MM = 1.0
#: Clear height between one coupon's top and the next coupon's bottom (mm): a window of plain post layers.
COUPON_GAP_MM = 1.0
#: Height of the lowest coupon's underside above the plate (mm).
COUPON_FIRST_Z_MM = 3.0
#: Posts under each coupon: diameter, largest spacing and inset from the coupon's edge (mm); every post
#: stands on a pad on the plate.  A 1 mm post in green resin holds several newtons, far over a coupon's share.
POST_DIAMETER_MM = 1.0
POST_SPACING_MM = 4.0
POST_INSET_MM = 1.0
PAD_DIAMETER_MM = 3.0
PAD_THICKNESS_MM = 0.5
#: Clear space between coupons on the plate (mm).
COUPON_SPACING_MM = 5.0
#: Segments of a disc's outline: the polygon's area is within 1e-4 of the circle's.
DISC_SEGMENTS = 256


@dataclass(frozen=True)
class Coupon:
    """One coupon of the plate: its sheet row (:data:`SHEET_COLUMNS` but ``peak_force_n``)."""

    name: str
    shape: str
    size_mm: float
    x_mm: float
    y_mm: float
    z_bottom_mm: float

    @property
    def z_top_mm(self) -> float:
        return self.z_bottom_mm + COUPON_THICKNESS_MM

    @property
    def area_mm2(self) -> float:
        return coupon_area_mm2(self.shape, self.size_mm)

    @property
    def torsion_mm4(self) -> float:
        return coupon_torsion_mm4(self.shape, self.size_mm)

    def row(self) -> dict:
        """The sheet row, ``peak_force_n`` blank."""
        return {
            "name": self.name,
            "shape": self.shape,
            "size_mm": f"{self.size_mm:.2f}",
            "area_mm2": f"{self.area_mm2:.4f}",
            "torsion_mm4": f"{self.torsion_mm4:.6g}",
            "x_mm": f"{self.x_mm:.2f}",
            "y_mm": f"{self.y_mm:.2f}",
            "z_bottom_mm": f"{self.z_bottom_mm:.2f}",
            "z_top_mm": f"{self.z_top_mm:.2f}",
            "peak_force_n": "",
        }


def coupon_plan(settings) -> list[Coupon]:
    """The coupons of the plate, lowest first: a disc and a square of each of :data:`COUPON_AREAS_MM2`.

    Named by shape and area (``D25`` ... ``S400``: no engraving needed, the sheet gives each
    one's position).  Sizes are rounded to 0.01 mm and the sheet's areas computed from
    the rounded sizes.  Laid out in rows on the plate (centred on 0, 0), the largest first;
    the largest coupon is lowest and each next one starts ``COUPON_GAP_MM`` above the
    previous one's top, so at any height only one coupon is being cured.

    Raises
    ------
    SettingsError
        The plate does not fit the printer's build area or height.
    """
    sizes = []
    for area in COUPON_AREAS_MM2:
        sizes.append(("disc", round(math.sqrt(4 * area / math.pi), 2), area))
        sizes.append(("square", round(math.sqrt(area), 2), area))
    sizes.sort(key=lambda t: (-t[2], t[0]))
    pr = settings.printer
    width = pr.build_x_mm - 2 * settings.rules.base_margin_mm
    rows, row, used = [], [], 0.0
    for item in sizes:
        need = item[1] + (COUPON_SPACING_MM if row else 0.0)
        if row and used + need > width:
            rows.append(row)
            row, used, need = [], 0.0, item[1]
        row.append(item)
        used += need
    rows.append(row)
    depth = sum(max(s for _, s, _ in r) for r in rows) + COUPON_SPACING_MM * (len(rows) - 1)
    top = COUPON_FIRST_Z_MM + len(sizes) * (COUPON_THICKNESS_MM + COUPON_GAP_MM)
    if any(s > width for _, s, _ in sizes) or depth > pr.build_y_mm - 2 * settings.rules.base_margin_mm:
        raise SettingsError(
            f"the coupon plate does not fit the {pr.build_x_mm:g} x {pr.build_y_mm:g} mm build area; "
            "use a printer profile with a larger plate"
        )
    if top > pr.build_z_mm:
        raise SettingsError(f"the coupon plate is {top:g} mm tall, over the {pr.build_z_mm:g} mm build height")
    placed = []
    y = depth / 2
    for r in rows:
        h = max(s for _, s, _ in r)
        x = -(sum(s for _, s, _ in r) + COUPON_SPACING_MM * (len(r) - 1)) / 2
        for shape, size, area in r:
            placed.append((shape, size, area, round(x + size / 2, 2), round(y - h / 2, 2)))
            x += size + COUPON_SPACING_MM
        y -= h + COUPON_SPACING_MM
    step = COUPON_THICKNESS_MM + COUPON_GAP_MM
    return [
        Coupon(f"{shape[0].upper()}{area:g}", shape, size, x, y, round(COUPON_FIRST_Z_MM + k * step, 3))
        for k, (shape, size, area, x, y) in enumerate(placed)
    ]


def _post_xy(c: Coupon) -> np.ndarray:
    """Post centres under a coupon: a grid no coarser than POST_SPACING_MM, inset from its edge,
    clipped to the disc for a disc."""
    half = c.size_mm / 2 - POST_INSET_MM
    n = int(math.ceil(2 * half / POST_SPACING_MM)) + 1
    g = np.linspace(-half, half, n)
    xy = np.stack(np.meshgrid(g, g), -1).reshape(-1, 2)
    if c.shape == "disc":
        # the square grid inscribed in the disc's inset circle
        xy = xy / math.sqrt(2)
    return xy + (c.x_mm, c.y_mm)


def _solid_to_trimesh(solid):
    import trimesh

    out = solid.to_mesh()
    return trimesh.Trimesh(
        np.asarray(out.vert_properties)[:, :3].astype(float), np.asarray(out.tri_verts, dtype=np.int64), process=True
    )


def coupon_plate(coupons: list[Coupon]):
    """The plate as one trimesh: each coupon, its posts and their pads joined into one body
    (manifold3d), the bodies separate.  Printed as it is, without added supports."""
    import manifold3d as m3d
    import trimesh

    bodies = []
    for c in coupons:
        if c.shape == "disc":
            top = m3d.Manifold.cylinder(COUPON_THICKNESS_MM, c.size_mm / 2, -1.0, DISC_SEGMENTS)
        else:
            top = m3d.Manifold.cube((c.size_mm, c.size_mm, COUPON_THICKNESS_MM), True).translate(
                (0.0, 0.0, COUPON_THICKNESS_MM / 2)
            )
        parts = [top.translate((c.x_mm, c.y_mm, c.z_bottom_mm))]
        for x, y in _post_xy(c):
            post = m3d.Manifold.cylinder(c.z_bottom_mm + 0.1, POST_DIAMETER_MM / 2, -1.0, 24)
            pad = m3d.Manifold.cylinder(PAD_THICKNESS_MM, PAD_DIAMETER_MM / 2, POST_DIAMETER_MM / 2, 24)
            parts += [post.translate((x, y, 0.0)), pad.translate((x, y, 0.0))]
        bodies.append(_solid_to_trimesh(m3d.Manifold.batch_boolean(parts, m3d.OpType.Add)))
    return trimesh.util.concatenate(bodies)


def _readme(coupons: list[Coupon], settings) -> str:
    first, last = coupons[0], coupons[-1]
    return f"""Force calibration coupons (supportgen)

coupons.stl   {len(coupons)} coupons: discs and squares of {COUPON_AREAS_MM2[0]:g} to {COUPON_AREAS_MM2[-1]:g} mm^2,
              each {COUPON_THICKNESS_MM:g} mm thick on {POST_DIAMETER_MM:g} mm posts, each at its own height
coupons.csv   one row per coupon: name (D = disc, S = square, then the area in mm^2),
              shape, size (disc diameter or square side), area, torsion constant,
              position on the plate and the height of its layers; peak_force_n is blank

Print
  Print coupons.stl as it is (it carries its own posts and pads: add no supports,
  do not move or turn it) with the resin, film, layer height, lift speed and
  exposure you want to calibrate for.  The lowest coupon ({first.name}) starts at
  z {first.z_bottom_mm:g} mm, the highest ({last.name}) ends at z {last.z_top_mm:g} mm; at any height
  only one coupon is being cured.

Measure
  Log the separation force of every layer (a load cell under the vat or in the
  Z axis).  For each coupon, take the peak force over the layers between its
  z_bottom_mm and z_top_mm, less the force of the layers just below z_bottom_mm
  (the posts of the coupons above it, which keep curing), and write it in N in
  the coupon's peak_force_n cell.  Leave a coupon blank if it failed or was not
  measured.  If a row was printed at another lift speed, film gap or viscosity
  than the settings say, add a column lift_speed_mm_s, film_gap_mm or
  viscosity_pa_s and give it for that row.

Fit
  supportgen calibrate coupons.csv -o my-printer.toml
  (with the same --profile/--set as the print: lift_speed_mm_s = {settings.printer.lift_speed_mm_s:g},
  film_gap_mm = {settings.printer.film_gap_mm:g}, viscosity_pa_s = {settings.resin.viscosity_pa_s:g} here)
  then use it with --profile my-printer.toml.

Green resin is a skin sensitiser: wear nitrile gloves and eye protection.
"""


def write_coupons(folder, settings) -> list[Path]:
    """Write ``coupons.stl``, ``coupons.csv`` and ``README.txt`` into ``folder``; return their paths.

    Raises
    ------
    SettingsError
        The plate does not fit the printer (:func:`coupon_plan`).
    OutputError, MeshError
        The folder cannot be created or written.
    """
    import io as _io

    from ..io.meshio import atomic_write_text, write_mesh
    from ..io.outputs import prepare_folder

    coupons = coupon_plan(settings)
    folder = prepare_folder(folder)
    buf = _io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=SHEET_COLUMNS, lineterminator="\n")
    writer.writeheader()
    writer.writerows(c.row() for c in coupons)
    paths = [folder / "coupons.stl", folder / "coupons.csv", folder / "README.txt"]
    write_mesh(coupon_plate(coupons), paths[0])
    atomic_write_text(paths[1], buf.getvalue())
    atomic_write_text(paths[2], _readme(coupons, settings))
    return paths
