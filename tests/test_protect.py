"""Protected surfaces and contacts files (issue 16), each check against something outside the project."""

from __future__ import annotations

from pathlib import Path

import manifold3d as m3d
import numpy as np
import pytest
import shapely
import trimesh

from supportgen.cli.main import main
from supportgen.errors import SettingsError
from supportgen.io.contactsfile import parse_contacts, read_contacts
from supportgen.io.meshio import load_mesh, prepare_mesh, write_mesh
from supportgen.pipeline import generate
from supportgen.supports.protect import parse_selector, protect_mask

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"


def _slab(a=3.0, b=3.0, h=1.5):
    slab = trimesh.creation.box((a, b, h))
    slab.apply_translation((0, 0, h / 2))
    return slab


def _ring(r_out=4.0, r_in=2.0, h=2.0, n=64):
    bore = m3d.Manifold.cylinder(h + 2, r_in, r_in, n).translate((0, 0, -1))
    solid = m3d.Manifold.cylinder(h, r_out, r_out, n) - bore
    m = solid.to_mesh()
    return trimesh.Trimesh(np.asarray(m.vert_properties)[:, :3], np.asarray(m.tri_verts), process=False)


def _floating(mesh: trimesh.Trimesh, layer_mm: float, z0: float) -> list[tuple[float, float]]:
    """(height, gap) of every region of a re-sliced layer that overlaps nothing in the
    slice below, with its distance to that slice (independent of supportgen: trimesh
    sections at mid-layer, shapely polygons)."""
    top = float(mesh.bounds[1, 2])
    zs = np.arange(z0 + layer_mm / 2, top, layer_mm)
    sections = mesh.section_multiplane([0, 0, 0], [0, 0, 1], zs)
    below = None
    out = []
    for z, sec in zip(zs, sections):
        polys = [p.buffer(0) for p in (sec.polygons_full if sec is not None else [])]
        here = shapely.union_all(polys) if polys else None
        if below is not None and here is not None:
            out += [(float(z), float(p.distance(below))) for p in polys if not p.intersects(below)]
        below = here
    return out


def test_box_selector_matches_trimesh_bounds_contains():
    # Source: trimesh.bounds.contains says which corners lie in the box; a face is
    # protected exactly when all three of its corners do.
    mesh = trimesh.creation.icosphere(subdivisions=3, radius=10.0)
    box = np.array([[-4.0, -6.0, -10.5], [7.0, 5.0, 2.5]])  # no corner on a side (contains is strict)
    got = protect_mask(mesh, "box:-4,-6,-10.5,7,5,2.5")
    inside = trimesh.bounds.contains(box, mesh.vertices)
    expected = inside[mesh.faces].all(axis=1)
    assert got.any() and not got.all()
    assert np.array_equal(got, expected)


def test_normal_and_height_selectors_match_face_geometry():
    # Source: exact geometry of an axis-aligned box (trimesh.creation.box): two
    # triangles per side, normals along the axes.
    box = trimesh.creation.box((2, 3, 4))
    down = protect_mask(box, "normal:0,0,-1,10")
    assert np.array_equal(down, box.face_normals[:, 2] < -0.99)
    band = protect_mask(box, "height:1.9,2.1")  # the top face at z = 2
    assert np.array_equal(band, box.face_normals[:, 2] > 0.99)


def test_bad_selector_is_one_clear_line():
    with pytest.raises(SettingsError, match=r"box needs 6 numbers"):
        parse_selector("box:1,2,3")
    with pytest.raises(SettingsError, match=r"unknown kind"):
        parse_selector("sphere:1,2,3,4")


def test_mesh_selector_marks_the_bore_like_the_box_selector(tmp_path):
    # Source: exact geometry: the bore of radius 2 and a marking cylinder of the same
    # radius and facet count (trimesh.creation.cylinder) coincide within its sagitta.
    ring = _ring()
    by_box = protect_mask(ring, "box:-2.001,-2.001,-0.001,2.001,2.001,2.001")
    mark = trimesh.creation.cylinder(radius=2.0, height=2.0, sections=64)
    mark.apply_translation((0, 0, 1.0))
    path = tmp_path / "bore.stl"
    write_mesh(mark, path)
    by_mesh = protect_mask(ring, f"mesh:{path},0.01")
    assert by_box.sum() == 2 * 64  # two triangles per bore facet
    assert np.array_equal(by_box, by_mesh)


def test_coloured_ply_keeps_its_protected_faces_through_repair(tmp_path):
    # Source: the triangles trimesh writes coloured are compared by their corner
    # positions with the triangles protected after repair (duplicate and
    # degenerate faces dropped, a hole closed).
    box = trimesh.creation.icosphere(subdivisions=2, radius=5.0)
    faces = np.asarray(box.faces)
    colours = np.tile([200, 200, 200, 255], (len(faces), 1)).astype(np.uint8)
    red = np.flatnonzero(box.triangles_center[:, 2] < -2.0)
    colours[red] = [255, 0, 0, 255]
    # A duplicate face, a degenerate face and a missing face (a hole) for the repair to fix.
    faces2 = np.vstack([faces[1:], faces[5], [faces[7][0], faces[7][0], faces[7][1]]])
    colours2 = np.vstack([colours[1:], colours[5], colours[7]])
    soup = trimesh.Trimesh(box.vertices, faces2, face_colors=colours2, process=False)
    path = tmp_path / "ball.ply"
    path.write_bytes(soup.export(file_type="ply", encoding="binary"))
    loaded = load_mesh(path)
    assert loaded.repairs  # the repair did drop and close faces
    got = protect_mask(loaded.mesh, "colour:255,0,0", source=path)
    key = lambda tri: tuple(sorted(map(tuple, np.round(tri, 5))))  # noqa: E731
    want = {key(t) for t in box.triangles[red] if key(t) != key(box.triangles[0])}
    have = {key(t) for t in loaded.mesh.triangles[got]}
    assert have == want


def test_mask_over_input_faces_follows_the_repair():
    # Source: trimesh.creation.box face order; the repair here drops a duplicate first face.
    box = trimesh.creation.box((2, 2, 2))
    soup = trimesh.Trimesh(box.vertices, np.vstack([box.faces[:1], box.faces]), process=False)
    mask = np.zeros(len(soup.faces), bool)
    mask[[3, 4]] = True
    repaired = prepare_mesh(soup, "box").mesh
    got = protect_mask(repaired, mask)
    key = lambda tri: tuple(sorted(map(tuple, np.round(tri, 6))))  # noqa: E731
    assert {key(t) for t in repaired.triangles[got]} == {key(t) for t in soup.triangles[[3, 4]]}


def test_slab_with_protected_underside_is_held_from_its_sides_and_passes():
    slab = _slab()
    r = generate(slab, protect="normal:0,0,-1,5", name="slab")
    prot = r.report["protection"]
    assert prot["contacts_moved"] > 0
    assert prot["contacts_on_protected"] == 0 and prot["landings_on_protected"] == 0
    assert all(reg["contacts"] == 0 and reg["tip_area_mm2"] == 0 for reg in prot["regions"])
    # Every contact is on a side face (normal horizontal), none on the underside (exact geometry of a box).
    assert len(r.contacts) > 0 and np.all(np.abs(r.contacts.normals[:, 2]) < 1e-9)
    # Source: trimesh proximity: each tip's disc stays off the underside.
    under = trimesh.Trimesh(r.part.vertices, r.part.faces[r.part.face_normals[:, 2] < -0.99], process=False)
    _, dist, _ = trimesh.proximity.closest_point(under, r.contacts.points)
    assert np.all(dist >= r.contacts.diameters / 2)
    # The check, and an independent re-slice with trimesh sections and shapely polygons:
    # above the band the tips leave clear (keep-off + one layer) every region of every
    # layer overlaps the layer below; in that band only the slab's first layer overlaps
    # nothing: it lies beside the tips below, at most the keep-off distance away (the
    # check counts a new region within 4 pixels of cured material as anchored,
    # analysis/layers.py; a bottom-up printer may leave such a layer on the film).
    # The slab's first layer lies under the keep-off band of its protected underside, so no
    # tip may touch it there: the check either counts it anchored by a tip passing within its
    # near reach, or names it as an island in that band and nowhere else.
    ver = r.report["verification"]
    s = r.report["settings"]
    if not ver["passed"]:
        assert all(
            i["z_mm"] < float(r.part.bounds[0, 2]) + r.guard.keep_off_mm + s["printer"]["layer_mm"]
            for i in ver["first_islands"]
        ), ver["failures"]
        assert all("island" in f for f in ver["failures"]), ver["failures"]
    lh, z0 = s["printer"]["layer_mm"], float(r.part.bounds[0, 2])
    floating = _floating(r.combined, lh, s["rules"]["base_thickness_mm"])
    assert all(z < z0 + r.guard.keep_off_mm + lh for z, _ in floating), floating
    assert all(gap <= r.guard.keep_off_mm for _, gap in floating), floating


def test_ring_with_protected_bore_gets_no_contact_within_a_tip_radius():
    ring = _ring()
    bore = lambda c, n: (np.hypot(c[:, 0], c[:, 1]) < 2.01) & (np.abs(n[:, 2]) < 0.01)  # noqa: E731
    r = generate(ring, protect=bore, name="ring")
    placed = r.part
    mask = r.guard.faces
    assert mask.sum() == 2 * 64
    # Source: trimesh proximity to the bore faces of the placed part.
    bore_mesh = trimesh.Trimesh(placed.vertices, placed.faces[mask], process=False)
    _, dist, _ = trimesh.proximity.closest_point(bore_mesh, r.contacts.points)
    assert len(r.contacts) and np.all(dist >= r.contacts.diameters / 2)
    land = r.plan.tip_points[r.plan.tip_contact < 0]
    if len(land):
        _, ld, _ = trimesh.proximity.closest_point(bore_mesh, land)
        assert np.all(ld >= r.plan.tip_diameters[r.plan.tip_contact < 0] / 2)
    assert r.report["protection"]["contacts_on_protected"] == 0


def _shelf():
    """A 4 x 4 mm shelf over a 10 x 10 mm floor, held by a wall."""
    floor = trimesh.creation.box((10, 10, 1))
    shelf = trimesh.creation.box((4, 4, 1))
    shelf.apply_translation((0, 0, 4))
    wall = trimesh.creation.box((1, 10, 4))
    wall.apply_translation((-4.5, 0, 2.5))
    return trimesh.boolean.union([floor, shelf, wall], engine="manifold")


def test_landings_refused_on_protected_faces():
    # A shelf over a floor: the straight strategy would stand posts on the floor's top;
    # protecting it (normal up) leaves no landing there (trimesh proximity).
    part = _shelf()
    plain = generate(part, strategy="straight", name="shelf")
    assert plain.plan.landings > 0
    r = generate(part, strategy="straight", protect="normal:0,0,1,5", name="shelf")
    up = trimesh.Trimesh(r.part.vertices, r.part.faces[r.part.face_normals[:, 2] > 0.99], process=False)
    land = r.plan.tip_points[r.plan.tip_contact < 0]
    if len(land):
        _, d, _ = trimesh.proximity.closest_point(up, land)
        assert np.all(d >= r.guard.keep_off_mm)
    assert r.report["protection"]["landings_on_protected"] == 0


def _tee():
    """A small table: a 6 x 6 x 1 mm top on a 2 x 2 mm leg, and a loose 2 mm cube beside it."""
    top = trimesh.creation.box((6, 6, 1))
    top.apply_translation((0, 0, 3.5))
    leg = trimesh.creation.box((2, 2, 3.2))
    leg.apply_translation((0, 0, 1.6))
    cube = trimesh.creation.box((2, 2, 2))
    cube.apply_translation((7, 0, 2))
    return trimesh.boolean.union([top, leg, cube], engine="manifold")


def test_contacts_file_round_trip_is_a_no_op(tmp_path):
    part = _tee()
    r1 = generate(part, name="tee")
    path = tmp_path / "tee.contacts.csv"
    path.write_text(r1.contacts_csv())
    rows = read_contacts(path)
    # Source: the file's own numbers: input coordinates are build coordinates minus the lift.
    assert np.allclose(rows.points + r1.guard.offset, r1.contacts.points, rtol=0, atol=1e-12)
    r2 = generate(part, name="tee", contacts=path)
    assert np.allclose(r2.contacts.points, r1.contacts.points, rtol=0, atol=1e-9)
    assert np.array_equal(r2.contacts.kinds, r1.contacts.kinds)
    assert r2.plan.tip_points.shape == r1.plan.tip_points.shape
    assert np.allclose(r2.plan.tip_points, r1.plan.tip_points, atol=1e-9)
    assert np.allclose(r2.plan.nodes, r1.plan.nodes, atol=1e-9)
    # Source: manifold3d volumes of the two support solids (via trimesh).
    assert r2.supports.volume == pytest.approx(r1.supports.volume, rel=1e-9)
    assert r2.report["protection"]["contacts_file"]["added_by_check"] == 0
    assert r2.report["verification"]["passed"] == r1.report["verification"]["passed"]


def test_deleted_contact_stays_deleted_unless_the_check_needs_it(tmp_path):
    part = _tee()
    r1 = generate(part, name="tee")
    text = r1.contacts_csv().splitlines()
    header, rows = text[0], text[1:]
    pts = parse_contacts("\n".join(text)).points
    # Delete the contacts of the loose cube (x > 5 in input coordinates): an island
    # the check cannot pass without, so contacts come back there, and the report says so.
    on_cube = pts[:, 0] > 5.0
    assert on_cube.any() and (~on_cube).any()
    keep = [row for row, c in zip(rows, on_cube) if not c]
    path = tmp_path / "cut.contacts.csv"
    path.write_text("\n".join([header, *keep]) + "\n")
    r2 = generate(part, name="tee", contacts=path)
    added = r2.report["protection"]["contacts_file"]["added_by_check"]
    assert added > 0
    assert any(w["code"] == "contacts-added" for w in r2.report["warnings"])
    assert len(r2.contacts) == len(keep) + added
    # Delete one contact under the table top instead: it is gone unless the check
    # needed a contact there, which the report then says.
    j = int(np.flatnonzero(~on_cube)[0])
    path.write_text("\n".join([header, *(row for i, row in enumerate(rows) if i != j)]) + "\n")
    r3 = generate(part, name="tee", contacts=path)
    added = r3.report["protection"]["contacts_file"]["added_by_check"]
    assert len(r3.contacts) == len(rows) - 1 + added
    if added == 0:
        gone = pts[j] + r1.guard.offset
        assert np.min(np.linalg.norm(r3.contacts.points - gone, axis=1)) > 1e-6
    else:
        assert any(w["code"] == "contacts-added" for w in r3.report["warnings"])


def test_cli_protect_and_contacts_and_sidecar(tmp_path, capsys):
    part = tmp_path / "slab.stl"
    write_mesh(_slab(), part)
    out = tmp_path / "out"
    # The +x side face (two triangles): the plumbing, on a part that can still be held from below.
    assert main(["generate", str(part), "-o", str(out), "--quiet", "--protect", "normal:1,0,0,5"]) == 0
    csv = out / "slab.contacts.csv"
    assert csv.is_file() and (out / "slab.underside.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    import json

    rep = json.loads((out / "slab.report.json").read_text())
    assert rep["protection"]["protected_faces"] == 2 and rep["protection"]["contacts_on_protected"] == 0
    out2 = tmp_path / "out2"
    assert main(["generate", str(part), "-o", str(out2), "--quiet", "--contacts", str(csv)]) == 0
    assert read_contacts(out2 / "slab.contacts.csv").points.shape == read_contacts(csv).points.shape
    # Side-car file next to the part: the same protection without the option (how batches carry it).
    (tmp_path / "slab.protect.toml").write_text('protect = ["normal:1,0,0,5"]\n')
    out3 = tmp_path / "out3"
    assert main(["generate", str(part), "-o", str(out3), "--quiet"]) == 0
    rep3 = json.loads((out3 / "slab.report.json").read_text())
    assert rep3["protection"]["protected_faces"] == 2 and rep3["protection"]["selectors"] == ["normal:1,0,0,5"]
    # Bad input: one line naming the file.
    bad = tmp_path / "bad.csv"
    bad.write_text("id,x_mm,y_mm,z_mm\n0,1,two,3\n")
    assert main(["generate", str(part), "-o", str(out3), "--quiet", "--contacts", str(bad)]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "bad.csv: line 2: y_mm 'two' is not a number" in err[0]


def test_batch_carries_protect_option_and_sidecar_files(tmp_path):
    import json

    src = tmp_path / "in"
    src.mkdir()
    for name in ("a", "b"):
        write_mesh(_slab(), src / f"{name}.stl")
    # Side-car for a only: its +x side; the batch option adds the top face (z = 1.5) to both.
    (src / "a.protect.toml").write_text('protect = ["normal:1,0,0,5"]\n')
    out = tmp_path / "out"
    assert main(["batch", str(src), "-o", str(out), "--workers", "1", "--quiet", "--protect", "height:1.4,1.6"]) == 0
    a = json.loads((out / "a.report.json").read_text())["protection"]
    b = json.loads((out / "b.report.json").read_text())["protection"]
    # Source: exact geometry of trimesh.creation.box: two triangles per side.
    assert a["protected_faces"] == 4 and b["protected_faces"] == 2
    assert a["contacts_on_protected"] == 0 and b["contacts_on_protected"] == 0
    assert (out / "a.contacts.csv").is_file() and (out / "b.underside.png").is_file()


def test_markdown_protection_section_equals_the_json(tmp_path):
    import json
    import re

    # The shelf with every up-facing face protected: posts that would stand on the floor are refused.
    r = generate(_shelf(), strategy="straight", protect="normal:0,0,1,5", name="shelf")
    paths = r.save(tmp_path)
    sec = json.loads(paths["report"].read_text())["protection"]
    md = paths["summary"].read_text()
    assert "## Protected surfaces" in md
    # Source: the saved JSON, read back with Python's json module; the Markdown table parsed with re.
    rows = re.findall(
        r"^\| region (\d+) \| (\d+) \| ([\d.]+) \| ([-\d., ]+) \| (\d+) \| ([\d.]+) \| (\d+) \|$", md, re.M
    )
    assert len(rows) == len(sec["regions"]) > 0
    for got, want in zip(rows, sec["regions"]):
        assert int(got[0]) == want["region"] and int(got[1]) == want["faces"]
        assert float(got[2]) == pytest.approx(want["area_mm2"], abs=5e-4)
        assert [float(v) for v in got[3].split(",")] == pytest.approx(want["centre_mm"], abs=5e-3)
        assert (int(got[4]), float(got[5]), int(got[6])) == (want["contacts"], want["tip_area_mm2"], want["landings"])
        assert want["contacts"] == want["landings"] == 0  # the budget on a protected region
    rest = re.search(r"^\| rest of the part \| \| \| \| (\d+) \| ([\d.]+) \| (\d+) \|$", md, re.M)
    assert int(rest[1]) == sec["rest"]["contacts"] and int(rest[3]) == sec["rest"]["landings"]
    assert float(rest[2]) == pytest.approx(sec["rest"]["tip_area_mm2"], abs=5e-5)
    moved = re.search(r"contacts moved off protected faces: (\d+) \(merged after moving: (\d+)\)", md)
    assert (int(moved[1]), int(moved[2])) == (sec["contacts_moved"], sec["contacts_merged_after_moving"])
    avoided = int(re.search(r"landings avoided .*: (\d+)$", md, re.M)[1])
    assert avoided == sec["landings_avoided"]
    held = int(re.search(r"could only be held from protected surface: (\d+)", md)[1])
    assert held == len(sec["unholdable"])
    # Landings avoided, independently: the unprotected plan of the same part (no contact is
    # moved: protected faces look up, contacts sit on faces looking down) stands this many
    # posts within the keep-off of an up-facing face (trimesh proximity).
    assert sec["contacts_moved"] == 0
    plain = generate(_shelf(), strategy="straight", name="shelf")
    up = trimesh.Trimesh(plain.part.vertices, plain.part.faces[plain.part.face_normals[:, 2] > 0.99], process=False)
    land = plain.plan.tip_points[plain.plan.tip_contact < 0]
    _, d, _ = trimesh.proximity.closest_point(up, land)
    assert avoided == int(np.count_nonzero(d < r.guard.keep_off_mm)) > 0


def _edge_pair():
    """Two 10 mm boxes sharing one edge (non-manifold: four faces on that edge), the upper
    one overhanging; faces split to 1.25 mm so a box selector can pick a patch."""
    a = trimesh.creation.box(bounds=[[0, -5, 0], [10, 5, 6]])
    b = trimesh.creation.box(bounds=[[10, -5, 6], [20, 5, 12]])
    m = trimesh.util.concatenate([a, b])
    for _ in range(3):
        m = m.subdivide()
    return trimesh.Trimesh(m.vertices, m.faces, process=False)


#: A 2.5 x 2.5 mm patch of the upper box's underside (z = 6), in input coordinates.
_PATCH = ((13.7, -1.3, 5.9), (16.3, 1.3, 6.1))


def _patch_selector() -> str:
    return "box:" + ",".join(str(v) for v in (*_PATCH[0], *_PATCH[1]))


def test_protection_survives_the_winding_number_rebuild():
    part = _edge_pair()
    loaded = prepare_mesh(part, "pair")
    # Source: the repair line itself says the solid was rebuilt (edges shared by four faces).
    assert any("rebuilt" in line for line in loaded.repairs)
    # The input faces in the box, by trimesh.bounds.contains on their corners (strict: no corner on a side).
    inside = trimesh.bounds.contains(np.array(_PATCH), part.vertices)[part.faces].all(axis=1)
    assert inside.sum() == 8
    patch = trimesh.Trimesh(part.vertices, part.faces[inside], process=False)
    r = generate(part, name="pair", protect=_patch_selector())
    sec = r.report["protection"]
    assert sec["notes"] == [] and sec["protected_faces"] > 0
    # The protected region is the patch itself (its area by trimesh), not the coarser rebuilt faces.
    assert len(sec["regions"]) == 1 and sec["regions"][0]["area_mm2"] == pytest.approx(patch.area, rel=1e-9)
    assert sec["regions"][0]["contacts"] == 0 and sec["regions"][0]["landings"] == 0
    assert sec["contacts_on_protected"] == 0 and r.report["verification"]["passed"]
    # No tip disc reaches the input patch (trimesh proximity, input coordinates): the
    # tips are at least the keep-off distance from it, and no tip is wider than twice that.
    _, d, _ = trimesh.proximity.closest_point(patch, r.contacts.points - r.guard.offset)
    assert d.min() >= r.guard.keep_off_mm - 1e-9
    assert np.all(r.plan.tip_diameters / 2 <= r.guard.keep_off_mm + 1e-9)
    # Without protection tips do sit on the patch: the check above can fail.
    plain = generate(part, name="pair")
    _, d0, _ = trimesh.proximity.closest_point(patch, plain.contacts.points - plain.guard.offset)
    assert d0.min() < r.guard.keep_off_mm


def test_protection_that_cannot_be_carried_is_said_in_one_line():
    # A square sheet inside the lower box: the rebuilt solid has no face there, so its
    # protection cannot be carried; the run says so and still protects the patch.
    part = _edge_pair()
    sheet = trimesh.Trimesh([[5, -2, 1], [5, 2, 1], [5, 2, 5], [5, -2, 5]], [[0, 1, 2], [0, 2, 3]], process=False)
    part = trimesh.util.concatenate([part, sheet])
    loaded = prepare_mesh(part, "pair")
    notes: list = []
    mask = protect_mask(loaded.mesh, [_patch_selector(), "box:4.9,-2.1,0.9,5.1,2.1,5.1"], label="pair", notes=notes)
    assert mask.any() and len(notes) == 1 and "\n" not in notes[0]
    # Source: the sheet's area by trimesh (4 x 4 mm), named in the line.
    assert f"{sheet.area:.3g} mm²" in notes[0] and notes[0].startswith("pair: ")
    # Nothing protected can be carried at all: the same line, and no protected face.
    notes = []
    assert not protect_mask(loaded.mesh, "box:4.9,-2.1,0.9,5.1,2.1,5.1", label="pair", notes=notes).any()
    assert len(notes) == 1 and f"{sheet.area:.3g} mm² of the {sheet.area:.3g} mm²" in notes[0]
