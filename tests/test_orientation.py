"""Orientation search: sections, symmetry, invariance, cups, the thin plate, and the oriented output.

Directions are kept few (tens, not the default 500) so the file stays quick on 2
shared cores; every check compares against exact geometry, a published table or
trimesh, named beside it.
"""

from __future__ import annotations

import json

import manifold3d as m3d
import numpy as np
import pytest
import trimesh

import supportgen
from supportgen.cli.main import main
from supportgen.physics import orientation as O
from supportgen.physics.loadpath import statics_shares
from supportgen.report.orientation import orientation_markdown
from supportgen.runs.demo import demo_part
from supportgen.runs.orient import ORIENT_OUTPUTS
from supportgen.supports.geometry import to_trimesh


def _roark_j(w: float, t: float) -> float:
    """Torsion constant of a w x t rectangle (w >= t): Roark's Formulas for Stress and Strain,
    7th ed., table 10.7 case 4: K = a b^3 (16/3 - 3.36 (b/a)(1 - b^4 / (12 a^4))), a = w/2, b = t/2."""
    a, b = w / 2, t / 2
    return a * b**3 * (16 / 3 - 3.36 * b / a * (1 - b**4 / (12 * a**4)))


def test_cube_sections_face_and_corner():
    a, p = 20.0, 0.25
    s = supportgen.Settings()
    cube = trimesh.creation.box((a, a, a))
    flat = O.layer_profile(cube, np.eye(3), p, s)
    bound = O.area_error_bound(4 * a, p)
    # Exact geometry: every section of a cube stood on a face is the face, a^2.
    assert np.all(np.abs(flat.area_mm2 - a * a) <= bound)
    assert len(flat.area_mm2) == round(a / p)
    corner = O.layer_profile(cube, O.rotation_to_up(np.array([1.0, 1.0, 1.0])), p, s)
    hexagon = 3 * np.sqrt(3) / 4 * a * a  # exact geometry: the central section is a regular hexagon
    hex_bound = O.area_error_bound(6 * a / np.sqrt(2), p)
    mid = int(np.argmin(np.abs(corner.z_mm - a * np.sqrt(3) / 2)))
    assert abs(corner.area_mm2[mid] - hexagon) <= hex_bound
    assert abs(corner.area_mm2.max() - hexagon) <= hex_bound
    # The same layer by trimesh's section at the same height (reference library).
    turned = O.turn(cube, O.rotation_to_up(np.array([1.0, 1.0, 1.0])))
    turned.apply_translation((0, 0, -turned.bounds[0, 2]))
    ref = turned.section(plane_origin=[0, 0, corner.z_mm[mid]], plane_normal=[0, 0, 1]).to_2D()[0].area
    assert abs(corner.area_mm2[mid] - ref) <= hex_bound


def test_sphere_scores_alike_in_every_direction():
    r, p = 10.0, 0.3
    s = supportgen.Settings()
    sphere = trimesh.creation.icosphere(subdivisions=4, radius=r)
    dirs = np.vstack([O.fibonacci_sphere(9), [[0.0, 0.0, 1.0]]])
    t = O.score_directions(sphere, dirs, s, p)
    # Symmetry: the peak layer is the equator, pi r^2, within the stated bound (outline within half a pixel).
    area_rel = O.area_error_bound(2 * np.pi * r, p) / (np.pi * r * r)
    assert np.all(np.abs(t["peak_area_mm2"] / (np.pi * r * r) - 1) <= area_rel + 0.01)  # +1 %: facets of the icosphere
    # Force ~ J ~ A^2: twice the area bound, plus the 2 % of the coarse pressure solve (module notes).
    f = t["peak_force_n"]
    assert (f.max() - f.min()) / f.mean() <= 2 * (2 * area_rel + 0.02)
    assert np.ptp(t["height_mm"]) <= 0.01 * 2 * r
    assert np.ptp(t["overhang_area_mm2"]) <= 0.03 * t["overhang_area_mm2"].mean()


def test_same_physical_orientation_after_a_random_turn():
    s = supportgen.Settings()
    hook = demo_part("hook")
    rng = np.random.default_rng(7)
    q = rng.normal(size=4)
    q /= np.linalg.norm(q)
    r0 = trimesh.transformations.quaternion_matrix(q)[:3, :3]  # a random rotation (trimesh)
    first = O.orient(hook, s, n_directions=40, pixel_mm=0.8)
    second = O.orient(O.turn(hook, r0), s, n_directions=40, pixel_mm=0.8)
    back = r0.T @ second.directions[second.chosen]  # the second choice in the first frame
    again = O.score_directions(hook, back[None, :], s, 0.8)
    total = sum(first.weights[k] * again[k][0] / first.scales[k] for k in O.TERMS)
    # Invariance within the search resolution: equally good under one scorer (a few % of the score).
    assert total <= first.total[first.chosen] * 1.1
    h1 = first.terms["height_mm"][first.chosen]
    assert abs(again["height_mm"][0] - h1) <= 0.15 * h1


def _open_box(outer=(20.0, 20.0, 15.0), wall=2.0) -> trimesh.Trimesh:
    x, y, z = outer
    box = m3d.Manifold.cube(outer).translate((-x / 2, -y / 2, 0.0))
    hollow = m3d.Manifold.cube((x - 2 * wall, y - 2 * wall, z)).translate((-x / 2 + wall, -y / 2 + wall, wall))
    return to_trimesh(box - hollow)  # opening toward +z


def test_open_box_is_never_stood_as_a_sealed_cup():
    s = supportgen.Settings()
    cup = _open_box()
    o = O.orient(cup, s, n_directions=40, pixel_mm=0.5)
    # Given orientation: opening toward the film, the sealed cavity is the inner 16 x 16 mm (exact geometry).
    assert abs(o.terms["cup_area_mm2"][o.keep] - 16 * 16) <= O.area_error_bound(4 * 16, 0.5)
    opening = o.rotation @ [0.0, 0.0, 1.0]
    assert opening[2] < 0.5, opening  # never within 60 degrees of facing the film
    assert o.terms["cup_area_mm2"][o.chosen] < 0.05 * 16 * 16


def test_thin_plate_is_stood_with_a_lower_peak_force_than_flat():
    # The squeeze-film law alone (no adhesion term, a ceiling the plate's suction stays under:
    # 200 kPa against a peak of about 190 kPa), the law whose torsion constants Roark tabulates.
    s = supportgen.Settings().override(force_area_n_mm2=0.0, ambient_pressure_pa=200000.0)
    plate = trimesh.creation.box((60.0, 40.0, 3.0))
    o = O.orient(plate, s, n_directions=40, pixel_mm=0.5)
    flat, chosen = o.terms["peak_force_n"][o.keep], o.terms["peak_force_n"][o.chosen]
    # The largest layers flat (60 x 40) and on the long edge (60 x 3): Roark's exact rectangle constants.
    ratio = _roark_j(60.0, 40.0) / _roark_j(60.0, 3.0)
    assert flat / chosen >= ratio, (flat, chosen, ratio)


def test_rotation_helpers_against_trimesh():
    # rotation_from_angles is Rz Ry Rx about fixed axes, as trimesh.transformations.euler_matrix 'sxyz'.
    ref = trimesh.transformations.euler_matrix(*np.radians([30.0, -20.0, 75.0]), axes="sxyz")[:3, :3]
    assert np.allclose(O.rotation_from_angles(30.0, -20.0, 75.0), ref)
    for d in O.fibonacci_sphere(7):
        assert np.allclose(O.rotation_to_up(d) @ d, [0, 0, 1])
        assert np.allclose(np.linalg.det(O.rotation_to_up(d)), 1.0)
    # Pareto: a dominated row is left out (definition).
    assert O.pareto_front(np.array([[1.0, 1.0], [2.0, 2.0], [0.5, 3.0]])).tolist() == [0, 2]


def test_one_tip_under_a_one_pixel_layer_carries_that_layer_exactly():
    # Statics (any text: a rigid body on one support): the single support takes the whole load,
    # whatever its position and however small the loaded region (here one pixel, no spread at all).
    # The turned cup's first layer is such a pixel on such a tip; it read 390 N for a 0.2 mN layer.
    xy, f = np.array([[2.50364232, -0.80299562]]), 2e-4
    r = statics_shares(xy, [0.2], f, f * xy[0, 0], f * xy[0, 1])
    assert r[0] == pytest.approx(f, rel=1e-9)
    # Two supports at the same point share by stiffness (force balance, no lever between them).
    r = statics_shares(np.vstack([xy, xy]), [0.2, 0.6], f, f * xy[0, 0], f * xy[0, 1])
    assert r == pytest.approx([f / 4, 3 * f / 4], rel=1e-9)


def test_oriented_output_feeds_generate_and_passes_the_check(tmp_path, coarse):
    src = tmp_path / "cup.stl"
    part = _open_box((12.0, 12.0, 8.0), 2.0)
    part.export(src)
    status = main(
        [
            "orient",
            str(src),
            "-o",
            str(tmp_path / "out"),
            "--directions",
            "30",
            "--quiet",
            "--set",
            "orient_pixel_mm=0.4",
        ]
    )
    assert status == 0
    paths = {role: tmp_path / "out" / f"cup{suffix}" for role, suffix in ORIENT_OUTPUTS.items()}
    assert all(p.is_file() for p in paths.values())
    data = json.loads(paths["json"].read_text())
    assert len(data["candidates"]) >= 31 and data["pareto"]
    assert paths["map"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature
    oriented = trimesh.load(paths["mesh"])
    # trimesh: the turned part is the same closed solid, standing elevation_mm above the plate.
    assert oriented.is_watertight and abs(oriented.volume - part.volume) < 1e-3 * part.volume
    assert abs(oriented.bounds[0, 2] - coarse.rules.elevation_mm) < 1e-3
    result = supportgen.generate(paths["mesh"], coarse, name="cup_oriented")
    assert result.report["verification"]["passed"], result.report["verification"]["failures"]
    assert result.report["orientation"]["chosen_by"] == "given"


def test_generate_rotate_is_recorded_and_bad_values_are_refused(coarse):
    box = trimesh.creation.box((12.0, 8.0, 4.0))
    r = supportgen.generate(box, coarse, rotate=(90.0, 0.0, 0.0), strategy="straight")
    rec = r.report["orientation"]
    assert rec["chosen_by"] == "rotate"
    assert np.allclose(rec["rotation"], O.rotation_from_angles(90, 0, 0))
    assert np.allclose(r.part.extents, [12.0, 4.0, 8.0], atol=1e-6)  # the 8 mm side now stands up
    with pytest.raises(supportgen.SettingsError, match="orient"):
        supportgen.generate(box, coarse, orient="sideways")
    with pytest.raises(supportgen.SettingsError, match="rotate"):
        supportgen.generate(box, coarse, rotate=(1.0, 2.0))


def test_orient_cli_bad_input_one_line(tmp_path, capsys):
    bad = tmp_path / "broken.stl"
    bad.write_text("not a mesh")
    assert main(["orient", str(bad), "-o", str(tmp_path), "--quiet"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "broken.stl" in err[0]


_ONLY_HEIGHT = {k: 0.0 for k in O.WEIGHTS.values()} | {"weight_height": 1.0}


def test_protected_face_is_not_turned_down_when_the_term_is_on():
    box = trimesh.creation.box((20.0, 12.0, 6.0))
    bottom = box.face_normals @ [0.0, 0.0, -1.0] > 0.999  # the 20 x 12 face looking down as given
    cos_a = np.cos(np.radians(supportgen.Settings().rules.overhang_angle_deg))
    # Height alone: lying flat (6 mm) is the lowest stance, so the given orientation, protected face down.
    off = supportgen.Settings().override(**(_ONLY_HEIGHT | {"weight_protect": 0.0}))
    o = O.orient(box, off, n_directions=40, pixel_mm=0.6, protect=bottom)
    assert o.chosen == o.keep  # free to stand on the protected face when its weight is 0
    # Exact geometry: the whole 20 x 12 face faces down; its corners are no strict minima (flat).
    assert o.terms["protected_mm2"][o.keep] == pytest.approx(20.0 * 12.0, rel=1e-12)
    on = supportgen.Settings().override(**(_ONLY_HEIGHT | {"weight_protect": 5.0}))
    o = O.orient(box, on, n_directions=40, pixel_mm=0.6, protect=bottom)
    assert o.terms["protected_mm2"][o.chosen] == 0.0
    assert -(o.rotation @ [0.0, 0.0, -1.0])[2] <= cos_a  # exact geometry: that face is no overhang
    # Near lying flat on the opposite face (6 mm, within the search's resolution): lower than standing
    # on a 20 x 6 or 12 x 6 side (12 and 20 mm tall, exact geometry).
    assert o.terms["height_mm"][o.chosen] < 12.0 and o.directions[o.chosen][2] < 0
    # Without a mask the term is 0 everywhere and changes nothing.
    plain = O.orient(box, on, n_directions=40, pixel_mm=0.6)
    assert not plain.terms["protected_mm2"].any() and plain.chosen == plain.keep


def test_protected_faces_stay_up_under_the_default_weights():
    box = trimesh.creation.box((20.0, 12.0, 6.0))
    s = supportgen.Settings()
    cos_a = np.cos(np.radians(s.rules.overhang_angle_deg))
    for n in ([0.0, 0.0, -1.0], [-1.0, 0.0, 0.0], [0.0, 1.0, 0.0]):
        mask = box.face_normals @ n > 0.999
        o = O.orient(box, s, n_directions=40, pixel_mm=0.6, protect=mask)
        # Exact geometry: the protected face is not turned down past the overhang angle.
        assert -(o.rotation @ n)[2] <= cos_a, n
        assert o.candidate(o.chosen)["terms"]["protected_mm2"] <= np.pi * s.rules.tip_diameter_mm**2  # a scar at most
    md = orientation_markdown(o, "box")
    assert "protected surface facing down" in md and o.weights["protected_mm2"] == s.orient.weight_protect


def test_generate_orient_auto_scores_the_protect_selectors_in_input_coordinates(coarse):
    box = trimesh.creation.box((12.0, 8.0, 4.0))
    s = coarse.override(**(_ONLY_HEIGHT | {"weight_protect": 5.0, "orient_directions": 24, "orient_pixel_mm": 0.8}))
    r = supportgen.generate(box, s, orient="auto", protect="normal:0,0,-1,5", strategy="straight")
    rot = np.array(r.report["orientation"]["rotation"])
    # The face that looked down as given (exact geometry: normal -z) now faces up or sideways.
    assert (rot @ [0.0, 0.0, -1.0])[2] >= -np.cos(np.radians(s.rules.overhang_angle_deg))
    # The guard keeps the same faces (the selector read in the input's coordinates), now on the turned part.
    assert np.array_equal(r.guard.faces, box.face_normals @ [0.0, 0.0, -1.0] > np.cos(np.radians(5)))
    assert r.report["verification"]["passed"]


def test_orient_cli_scores_protect_selectors(tmp_path):
    src = tmp_path / "slab.stl"
    trimesh.creation.box((16.0, 10.0, 3.0)).export(src)
    out = tmp_path / "out"
    argv = ["orient", str(src), "-o", str(out), "--directions", "20", "--quiet", "--set", "orient_pixel_mm=0.8"]
    assert main([*argv, "--protect", "normal:0,0,-1,5"]) == 0
    data = json.loads((out / "slab.orient.json").read_text())
    # Exact geometry: as given, the protected face is the whole 16 x 10 bottom, facing straight down.
    assert data["given"]["terms"]["protected_mm2"] == pytest.approx(160.0, rel=1e-12)
    assert data["chosen"]["terms"]["protected_mm2"] < 160.0
    assert "protected surface facing down" in (out / "slab.orient.md").read_text()


def test_bolt_group_square_of_four_tips_under_an_eccentric_load():
    # Hand-worked, exact statics of a rigid plate on four equal springs at (+-a, +-a) (the elastic
    # bolt-group method, Budynas and Nisbett, Shigley's Mechanical Engineering Design, 10th ed., bolted
    # joints): S = diag(4 a^2, 4 a^2), so P_i = F/4 + F (e_x x_i + e_y y_i) / (4 a^2).
    a, f = 10.0, 8.0
    xy = np.array([[-a, -a], [a, -a], [a, a], [-a, a]])
    p = O.bolt_group_loads(xy, f, [5.0, 0.0])
    assert p == pytest.approx([1.0, 3.0, 3.0, 1.0], rel=1e-12)  # 2 -+ 8 * 5 * 10 / 400
    p = O.bolt_group_loads(xy, f, [5.0, -10.0])
    assert p == pytest.approx([2 - 1 + 2, 2 + 1 + 2, 2 + 1 - 2, 2 - 1 - 2], rel=1e-12)
    # Force and moment balance about both plan axes (statics): sum P = F, sum P r = F e.
    assert p.sum() == pytest.approx(f) and p @ xy == pytest.approx(f * np.array([5.0, -10.0]))
    # A load outside the group lifts the far tips off (a negative share: compression in the far tips).
    assert O.bolt_group_loads(xy, f, [30.0, 0.0]).min() == pytest.approx(2.0 - 8.0 * 30 * 10 / 400)


def _box_with_centred_bottom(lx, ly, h) -> trimesh.Trimesh:
    """A box whose bottom is a fan of 4 triangles about its centre, vertex 0 (the first lowest point)."""
    box = trimesh.creation.box((lx, ly, h))
    keep = box.face_normals[:, 2] > -0.5
    v = np.vstack([[[0.0, 0.0, -h / 2]], box.vertices])
    faces = box.faces[keep] + 1
    low = [i + 1 for i in np.flatnonzero(np.isclose(box.vertices[:, 2], -h / 2))]
    ring = sorted(low, key=lambda i: np.arctan2(v[i, 1], v[i, 0]))  # counter-clockwise seen from above
    fan = [[0, ring[(j + 1) % 4], ring[j]] for j in range(4)]  # clockwise from above: normals down
    mesh = trimesh.Trimesh(v, np.vstack([faces, fan]), process=False)
    assert mesh.is_watertight and mesh.is_volume
    return mesh


def test_tip_loads_of_a_box_standing_flat_against_the_rectangle_moments():
    # A 20 x 12 x 6 box stood flat: its whole bottom is contactable. The estimate spreads tips at the
    # jamming density of random sequential addition (Feder, J. Theor. Biol. 87:237, 1980: 0.547 of the
    # plane covered by discs of the spacing), so n = 0.6965 * 240 / s^2, and their second moment about
    # the y axis is n L^2 / 12 (exact geometry of a rectangle). The lowest point (the bottom's centre
    # here) adds the patch of a tip and a ring of 6 at half the spacing: 7 tips, 6 (s/2)^2 / 2 about
    # any axis through it. A force F at (e, 0): the worst tip is at x = 10 (bolt-group method, Shigley).
    s = supportgen.Settings()
    box = _box_with_centred_bottom(20.0, 12.0, 6.0)
    sp = s.rules.contact_spacing_mm
    f, e = 5.0, 4.0
    got = O.tip_loads(box, [[0.0, 0.0, 1.0]], [[3.0]], [[f]], [[[e, 0.0]]], s)[0]
    n_area = 0.547 / (np.pi / 4) * 240.0 / sp**2
    n = n_area + 7
    sxx = n_area * 20.0**2 / 12 + 6 * (sp / 2) ** 2 / 2
    assert got == pytest.approx(f / n + f * e * 10.0 / sxx, rel=1e-9)
    # Centred, every tip takes the same share F / n (force balance).
    got = O.tip_loads(box, [[0.0, 0.0, 1.0]], [[3.0]], [[f]], [[[0.0, 0.0]]], s)[0]
    assert got == pytest.approx(f / n, rel=1e-9)


def _l_bracket(leg=40.0, width=20.0, t=3.0) -> trimesh.Trimesh:
    return to_trimesh(m3d.Manifold.cube((leg, width, t)) + m3d.Manifold.cube((t, width, leg)))


def test_l_bracket_is_not_stood_on_a_far_corner_when_the_tip_load_term_is_on():
    bracket = _l_bracket()
    off = supportgen.Settings().override(weight_tip_load=0.0)
    o = O.orient(bracket, off, n_directions=60, pixel_mm=0.8)
    c = o.chosen
    # Without the term the scorer stands it on one corner: no overhang, one strict minimum.
    assert o.terms["overhang_area_mm2"][c] == 0.0 and o.terms["minima"][c] == 1
    turned = O.turn(bracket, o.rotation)
    low = turned.vertices[np.argmin(turned.vertices[:, 2]), :2]
    # Exact geometry: the lowest point is a corner of the bracket (a vertex of the two boxes' union).
    corners = {tuple(v) for v in np.round(_l_bracket().vertices, 6)}
    assert tuple(np.round(bracket.vertices[np.argmin(turned.vertices[:, 2])], 6)) in corners
    prof = O.layer_profile(bracket, o.rotation, 0.8, off)
    peak = int(np.argmax(prof.force_n))
    lever = np.linalg.norm(prof.centroid_xy[peak] - low)
    # The peak layer acts far from that corner: many contact spacings away (the fandisk failure).
    assert lever > 5 * off.rules.contact_spacing_mm, lever
    # Statics of the patch the plan grows at a minimum (a tip and a ring of 6 at half the spacing,
    # the densify rule), by the bolt-group method: its worst tip is over what the largest tip holds.
    sp = off.rules.contact_spacing_mm
    ring = low + sp / 2 * np.column_stack([np.cos(np.arange(6) * np.pi / 3), np.sin(np.arange(6) * np.pi / 3)])
    patch = O.bolt_group_loads(np.vstack([low, ring]), prof.force_n[peak], prof.centroid_xy[peak])
    allowed = O.allowed_tip_load(off)
    assert patch.max() > allowed
    assert o.terms["tip_load_n"][c] > allowed and not o.feasible[c]
    # With the term on (default weight) the chosen stance's tips hold, and it is another stance.
    on = supportgen.Settings()
    p = O.orient(bracket, on, n_directions=60, pixel_mm=0.8)
    assert p.feasible[p.chosen] and p.terms["tip_load_n"][p.chosen] <= allowed
    assert np.degrees(np.arccos(np.clip(p.directions[p.chosen] @ o.directions[c], -1, 1))) > 20.0
    # Every candidate whose tips hold scores better than every one whose tips do not (the penalty).
    assert p.total[p.feasible].max() < p.total[~p.feasible].min()
    assert "worst tip load" in orientation_markdown(p, "bracket")
