"""End to end: demo parts and the shared corpus through generate, outputs re-sliced."""

import json

import numpy as np
import pytest
import shapely
import trimesh

import supportgen
from supportgen.report.document import REPORT_KEYS
from supportgen.runs.demo import DEMO_PARTS, demo_part


def _islands_by_sections(mesh: trimesh.Trimesh, layer_mm: float) -> list[float]:
    """Heights of regions that start in mid-air, found with trimesh sections and shapely
    (reference libraries, independent of supportgen's rasteriser): a polygon of layer k
    that touches no polygon of layer k-1 starts in mid-air; layer 0 stands on the plate.
    Slivers smaller than a disc two 50 um pixels across are below what a printer cures
    (smallest reliable feature 2-3 pixels, common practice) and are not counted."""
    z = np.arange(layer_mm / 2, mesh.bounds[1, 2], layer_mm)
    sections = mesh.section_multiplane(plane_origin=[0, 0, 0], plane_normal=[0, 0, 1], heights=z)
    below = None
    starts = []
    for height, sec in zip(z, sections):
        polys = [] if sec is None else [p for p in sec.polygons_full if p.area >= np.pi * 0.05**2]
        if below is not None and polys:
            tree = shapely.STRtree(below)
            hits = tree.query(polys, predicate="intersects")
            held = np.zeros(len(polys), bool)
            held[hits[0]] = True
            starts += [float(height)] * int(np.count_nonzero(~held))
        below = polys
    return starts


@pytest.fixture(scope="module")
def demo_results():
    s = supportgen.Settings().override(pixel_mm=0.1, layer_mm=0.1, tip_min_mm=0.2)
    return {name: supportgen.generate(demo_part(name), s, name=name) for name in DEMO_PARTS}, s


def test_demo_parts_are_closed_solids_that_pass_the_check(demo_results):
    results, s = demo_results
    for name, r in results.items():
        assert r.combined.is_watertight and r.combined.is_volume, name  # trimesh
        assert len(r.combined.split(only_watertight=False)) == 1, name  # one body
        assert r.report["verification"]["passed"], (name, r.report["verification"]["failures"])
        assert r.report["verification"]["islands"] == 0
        assert r.report["verification"]["max_unsupported_reach_mm"] <= s.rules.reach_limit_mm


def test_demo_outputs_have_no_region_starting_in_mid_air(demo_results):
    # Independent check with trimesh sections + shapely polygons (reference libraries).
    results, s = demo_results
    for name, r in results.items():
        assert _islands_by_sections(r.combined, 0.1) == [], name


def test_the_lifted_part_alone_has_islands_the_supports_remove(demo_results):
    # Sanity of the reference check itself: the part without supports floats.
    results, _ = demo_results
    part = demo_part("hook")
    part.apply_translation((0, 0, 5 - part.bounds[0, 2]))
    assert len(_islands_by_sections(part, 0.1)) >= 1


def test_report_has_the_contract_keys(demo_results, tmp_path):
    results, _ = demo_results
    r = results["jar_lid"]
    paths = r.save(tmp_path)
    data = json.loads(paths["report"].read_text())
    assert set(REPORT_KEYS) <= set(data)
    for key in ("strategy", "contacts", "tip_diameter_mm", "volume_mm3", "base_volume_mm3"):
        assert key in data["supports"]
    for key in ("peak_layer_force_n", "peak_layer_index", "min_safety_factor", "tips_over_capacity"):
        assert key in data["forces"]
    for key in ("islands", "max_unsupported_reach_mm", "watertight", "passed"):
        assert key in data["verification"]
    assert data["outputs"]["combined"].endswith("jar_lid.supported.stl")
    assert "skin sensitiser" in paths["summary"].read_text()
    # The volumes in the report are those of the files written (trimesh reads them back).
    supports = trimesh.load(paths["supports"])
    assert supports.volume == pytest.approx(data["supports"]["volume_mm3"], rel=1e-4)
    # The report's resin estimate is part plus supports, in ml.
    assert data["estimates"]["resin_ml"] == pytest.approx(
        (data["input"]["volume_mm3"] + data["supports"]["volume_mm3"]) / 1000, rel=1e-3
    )


def test_same_input_gives_the_same_bytes(tmp_path):
    s = supportgen.Settings().override(pixel_mm=0.2, layer_mm=0.2, tip_min_mm=0.4, tip_max_mm=1.0)
    box = trimesh.creation.box((8, 8, 3))
    a = supportgen.generate(box, s, name="box").save(tmp_path / "a")
    b = supportgen.generate(box, s, name="box").save(tmp_path / "b")
    for role in ("combined", "supports", "layers_plot", "tips_plot"):
        assert a[role].read_bytes() == b[role].read_bytes(), role


@pytest.mark.parametrize("name", ["fandisk.obj", "spot.obj", "stanford-bunny.obj"])
def test_corpus_models_run_through_generate(name, corpus, tmp_path):
    # Open meshes from public research collections (../shared/corpus), scaled to 50 mm
    # on the longest side as the corpus README asks.  The bunny is an open scan: it
    # must be repaired into a closed solid or refused with a clear message.
    mesh = trimesh.load(corpus(name), force="mesh", process=False)
    mesh.apply_scale(50.0 / mesh.extents.max())
    s = supportgen.Settings().override(pixel_mm=0.1, layer_mm=0.1, tip_min_mm=0.2)
    try:
        r = supportgen.generate(mesh, s, name=name.split(".")[0], centre=True)
    except supportgen.MeshError as exc:
        assert name == "stanford-bunny.obj", exc
        assert "stanford-bunny" in str(exc) and "\n" not in str(exc)
        return
    assert r.combined.is_watertight
    assert r.report["verification"]["islands"] == 0, r.report["verification"]["failures"]
    assert r.report["verification"]["passed"], r.report["verification"]["failures"]
    assert r.report["forces"]["tips_over_capacity"] == 0
    # The file written checks out too: re-read (single precision, as any slicer reads
    # it) it is still one closed solid without islands.
    paths = r.save(tmp_path)
    assert trimesh.load(paths["combined"]).is_watertight  # trimesh (reference library)
    again = supportgen.check(paths["combined"], s)
    assert again.passed and again.n_islands == 0, again.failures


def test_every_tip_holds_at_the_set_safety_factor(demo_results):
    # Sizing (REFERENCE.md section 3): capacity sigma pi d^2 / 4 must be at least SF x
    # the tip's peak load; the report's figures are checked against that formula here.
    results, s = demo_results
    for name, r in results.items():
        f = r.report["forces"]
        assert f["tips_over_capacity"] == 0, name
        assert f["min_safety_factor"] is None or f["min_safety_factor"] >= s.rules.safety_factor - 1e-9
        c = r.contacts
        capacity = s.resin.green_tensile_mpa * np.pi * c.diameters**2 / 4
        assert np.all(capacity >= s.rules.safety_factor * c.loads * (1 - 1e-9)), name


def test_a_solid_brick_gets_more_tip_area_than_an_open_lattice():
    # Physics (Stefan/Reynolds, REFERENCE.md section 1): a solid layer's suction grows
    # with J ~ R^4, a lattice of thin bars has far smaller J for the same footprint, so
    # the brick's tips must carry more: thicker tips or more contacts per area.
    import manifold3d as m3d

    from supportgen.supports.geometry import to_trimesh

    # The squeeze-film term alone (no adhesion term linear in area), the law this test is about.
    s = supportgen.Settings().override(
        pixel_mm=0.1, layer_mm=0.1, tip_min_mm=0.2, force_calibration=0.2, force_area_n_mm2=0.0
    )
    brick = to_trimesh(m3d.Manifold.cube((24, 24, 4), center=True))
    bars = [m3d.Manifold.cube((24, 1.5, 4), center=True).translate((0, y, 0)) for y in np.arange(-11.25, 12, 4.5)]
    # Cross bars 0.2 mm taller, so no faces of the two sets coincide.
    bars += [m3d.Manifold.cube((1.5, 24, 4.2), center=True).translate((x, 0, 0)) for x in np.arange(-11.25, 12, 4.5)]
    lattice = to_trimesh(m3d.Manifold.batch_boolean(bars, m3d.OpType.Add))
    rb = supportgen.generate(brick, s, strategy="straight", name="brick")
    rl = supportgen.generate(lattice, s, strategy="straight", name="lattice")
    tip_area = lambda r: float(np.sum(np.pi * r.contacts.diameters**2 / 4))
    bottom = lambda m: float(m.area_faces[m.face_normals[:, 2] < -0.99].sum())
    assert rb.report["forces"]["peak_layer_force_n"] > 5 * rl.report["forces"]["peak_layer_force_n"]
    assert tip_area(rb) / bottom(brick) > tip_area(rl) / bottom(lattice)


def test_contacts_are_added_where_a_tip_would_need_more_than_the_largest():
    # Sizing (REFERENCE.md section 3): a tip holds sigma pi d^2 / 4.  A high force factor
    # makes the heaviest tips need more than tip_max_mm; contacts are added nearby until
    # every tip holds SF x its load at a diameter no larger than tip_max_mm.
    s = supportgen.Settings().override(pixel_mm=0.1, layer_mm=0.1, tip_min_mm=0.2)
    brick = trimesh.creation.box((24, 24, 4))
    # Light: squeeze only at a low factor.  Heavy: a strong adhesion term (0.8 N/mm2 over the
    # 576 mm2 underside, several N a tip), which the cavitation ceiling on suction does not cap.
    light = supportgen.generate(
        brick, s.override(force_calibration=0.05, force_area_n_mm2=0.0), strategy="straight", name="brick"
    )
    heavy = supportgen.generate(brick, s.override(force_area_n_mm2=0.8), strategy="straight", name="brick")
    assert light.report["supports"]["contacts_added_by_densifying"] == 0
    assert heavy.report["supports"]["contacts_added_by_densifying"] > 0
    assert len(heavy.contacts) > len(light.contacts)
    c = heavy.contacts
    assert c.diameters.max() <= s.rules.tip_max_mm + 1e-12
    capacity = s.resin.green_tensile_mpa * np.pi * c.diameters**2 / 4
    assert np.all(capacity >= s.rules.safety_factor * c.loads * (1 - 1e-9))
    assert heavy.report["verification"]["passed"]


def test_summary_tip_row_is_the_lowest_tip_factor(coarse):
    # The Markdown row for tips is the minimum of the tips' own safety factors in the JSON
    # (posts have their own row); exact, the same numbers formatted to two places.
    from supportgen.report.document import markdown

    box = trimesh.creation.box((12, 10, 4))
    r = supportgen.generate(box, coarse, strategy="straight", name="box")
    tips = np.asarray(r.report["supports"]["tips"]["safety_factor"], float)
    row = next(line for line in markdown(r.report, "box", {}).splitlines() if line.startswith("| lowest tip"))
    assert f"| {float(np.min(tips[np.isfinite(tips)])):.2f}, " in row
    assert r.report["forces"]["min_tip_safety_factor"] == pytest.approx(np.min(tips[np.isfinite(tips)]), rel=1e-9)
