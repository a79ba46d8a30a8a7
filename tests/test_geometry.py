"""Solids: tips, posts and base joined with the part into one closed solid."""

import manifold3d as m3d
import numpy as np
import pytest
import shapely
import trimesh

from supportgen.analysis.overhangs import find_overhangs
from supportgen.analysis.placement import place
from supportgen.settings import Settings
from supportgen.supports.contacts import sample_overhangs
from supportgen.supports.geometry import combine, frustum, to_manifold
from supportgen.supports.strategies import plan_straight


def _planned(part, s):
    part = place(part, s).mesh
    rules = s.rules
    oh = find_overhangs(part, rules.overhang_angle_deg, floor_z=0.0)
    c = sample_overhangs(part, oh, rules.contact_spacing_mm, rules.overhang_angle_deg, rules.tip_diameter_mm)
    return part, plan_straight(part, c, s)


def _supported(part, s):
    part, plan = _planned(part, s)
    return part, plan, combine(part, plan, s)


@pytest.mark.parametrize("base", ["raft", "pads"])
def test_combined_is_one_closed_solid_with_the_union_volume(base):
    s = Settings().override(base=base)
    part, plan, sol = _supported(trimesh.creation.box((12, 10, 4)), s)
    # trimesh (reference library): closed and oriented, one body.
    assert sol.combined.is_watertight and sol.combined.is_volume
    assert len(sol.combined.split(only_watertight=False)) == 1
    # manifold3d (reference library): the volume of part + supports unioned afresh.
    ref = to_manifold(part) + to_manifold(sol.supports)
    assert sol.combined.volume == pytest.approx(ref.volume(), rel=1e-6)
    # The union cannot exceed the sum of its pieces, nor fall below the larger one.
    assert part.volume < sol.combined.volume < part.volume + sol.supports_volume_mm3
    # The base stands on the plate.
    assert sol.combined.bounds[0, 2] == pytest.approx(0.0, abs=1e-6)


def test_frustum_volume_is_the_cone_frustum_formula():
    # Exact geometry: V = pi h (r0^2 + r0 r1 + r1^2) / 3, for a 256-gon within 0.1 %.
    r0, r1, h = 0.5, 0.2, 3.0
    s = frustum([1, 2, 3], [1, 2 + h * 0.6, 3 - h * 0.8], r0, r1, segments=256)
    exact = np.pi * h * (r0**2 + r0 * r1 + r1**2) / 3
    assert s.volume() == pytest.approx(exact, rel=1e-3)
    assert s.status() == m3d.Error.NoError


def test_landing_post_stands_on_the_part_below():
    # A shelf over a lower block: contacts under the shelf that are above the block
    # must land on it (model-to-model), the others reach the base.
    import manifold3d as m

    from supportgen.supports.geometry import to_trimesh

    shelf = m.Manifold.cube((20, 10, 2)).translate((-10, -5, 12))
    wall = m.Manifold.cube((2, 10, 14)).translate((-10, -5, 0))
    block = m.Manifold.cube((8, 10, 4)).translate((0, -5, 0))
    part = to_trimesh(shelf + wall + block)
    s = Settings().override(elevation_mm=0.0)
    placed, plan, sol = _supported(part, s)
    assert plan.landings > 0
    land_pts = plan.tip_points[plan.tip_contact < 0]
    assert np.all(land_pts[:, 0] >= -1e-6) and np.allclose(land_pts[:, 2], 4.0)
    assert sol.combined.is_watertight


def test_tree_gives_every_contact_a_way_down():
    # Under the lid's inner thread ridge no branch keeps the clearance from the wall, so
    # those contacts get straight posts landing on the lid's floor; every contact is held
    # (followed through the plan graph with networkx, a reference library).
    import networkx as nx

    from supportgen.runs.demo import demo_part
    from supportgen.supports.contacts import sample_overhangs as sample
    from supportgen.supports.strategies import get_strategy

    s = Settings()
    part = place(demo_part("jar_lid"), s).mesh
    rules = s.rules
    c = sample(
        part,
        find_overhangs(part, rules.overhang_angle_deg, floor_z=0.0),
        rules.contact_spacing_mm,
        rules.overhang_angle_deg,
        rules.tip_diameter_mm,
    )
    plan = get_strategy("tree")(part, c, s)
    assert set(plan.tip_contact[plan.tip_contact >= 0]) == set(range(len(c)))
    assert plan.landings > 0
    g = nx.DiGraph([tuple(e) for e in plan.edges])
    g.add_nodes_from(range(len(plan.nodes)))
    ends = set(plan.feet) | set(plan.tip_nodes[plan.tip_contact < 0])
    for node in plan.tip_nodes[plan.tip_contact >= 0]:
        assert ({node} | nx.descendants(g, node)) & ends


def test_runs_split_at_nodes_and_feet_union_without_pinch_points():
    # A straight tilted run split at a middle node, a vertical post with its foot, and a
    # joint at every node: the configuration whose abutting end caps and shared rings made
    # manifold3d keep coincident vertices (pinch points a file merges into a non-manifold
    # edge).  Checked on the first try (no facet turning): pinch_points counts distinct
    # vertices at one float32 position; trimesh reads the written STL back watertight.
    from supportgen.supports.geometry import build_supports, pinch_points, to_trimesh
    from supportgen.supports.plan import SupportPlan

    s = Settings()
    nodes = np.array(
        [[0.0, 0.0, 9.0], [1.2, 0.0, 7.0], [2.4, 0.0, 5.0], [2.4, 0.0, 1.0], [8.0, 3.0, 9.0], [8.0, 3.0, 1.0]]
    )
    plan = SupportPlan(
        "straight",
        nodes,
        np.array([[0, 1], [1, 2], [2, 3], [4, 5]]),
        np.full(4, 0.25),
        np.array([[0.0, 0.0, 10.5], [8.0, 3.0, 10.5]]),
        np.array([0, 4]),
        np.array([0.3, 0.3]),
        np.array([0, 1]),
        np.array([3, 5]),
    )
    parts, base = build_supports(plan, s, 0.0)
    solid = m3d.Manifold.batch_boolean(parts + base, m3d.OpType.Add)
    assert solid.status() == m3d.Error.NoError
    mesh = to_trimesh(solid)
    assert pinch_points(mesh) == 0
    back = trimesh.load(trimesh.util.wrap_as_stream(mesh.export(file_type="stl")), file_type="stl")
    assert back.is_watertight and back.is_volume


@pytest.mark.parametrize("phase", [0.0, 0.37])
def test_close_tips_on_one_flat_face_union_without_pinch_points(phase):
    # Two vertical tips on one flat face, 0.135 mm apart with 0.15 mm tips (an island's
    # point beside a local minimum can be that close), their contacts half a micrometre
    # apart in height (sampling rounding on a turned face): with one depth their end caps
    # are overlapping discs closer than float32 resolves, which manifold3d keeps apart and a
    # file merges, whatever turn the facets take.  Checked as above: pinch_points on float32 positions,
    # trimesh reading the written STL back watertight (reference library).
    from supportgen.supports.geometry import build_supports, pinch_points, to_trimesh
    from supportgen.supports.plan import SupportPlan

    s = Settings()
    # As a plan on a turned part gave them: tips at (9, 6, 5), axes off vertical by 3.5 um
    # over 1.5 mm, one contact 0.47 um higher (the pinch needs all three).
    tips = np.array([[9.0, 6.0, 5.0], [9.135, 6.0, 5.0 + 4.7e-7]])
    nodes = np.vstack([tips - [-3.5e-6, 6e-7, 1.5], tips - [-3.5e-6, 6e-7, 4.0]])
    plan = SupportPlan(
        "straight",
        nodes,
        np.array([[0, 2], [1, 3]]),
        np.full(2, 0.25),
        tips,
        np.array([0, 1]),
        np.array([0.15, 0.15]),
        np.array([0, 1]),
        np.array([2, 3]),
    )
    part = m3d.Manifold.cube((4, 4, 2)).translate((7, 4, 5.0))
    parts, base = build_supports(plan, s, phase * 2 * np.pi / 16)
    solid = m3d.Manifold.batch_boolean([part, *parts, *base], m3d.OpType.Add)
    assert solid.status() == m3d.Error.NoError
    mesh = to_trimesh(solid)
    assert pinch_points(to_trimesh(m3d.Manifold.batch_boolean(parts + base, m3d.OpType.Add))) == 0
    assert pinch_points(mesh) == 0
    back = trimesh.load(trimesh.util.wrap_as_stream(mesh.export(file_type="stl")), file_type="stl")
    assert back.is_watertight and back.is_volume


def test_joint_spheres_clear_the_segments_they_join():
    # A joint sphere no wider than its segments is tangent to a segment's side along a circle
    # where the segment runs through the node; its facets lie inside its radius, so the
    # polygons graze each other and a union keeps coincident vertices (a frame of 0.8 mm struts
    # failed after every turn). The rule checked here on the built solids (distances by
    # trimesh, reference library): the sphere's faces clear the segment's corners (its
    # vertices, at radius r from the axis) by at least 5 % of r, at every turn.
    from supportgen.supports.geometry import PHASES, build_supports, to_trimesh
    from supportgen.supports.plan import SupportPlan

    s = Settings()
    r = 0.25
    # the run turns by 10 degrees at node 1 (a straight run passes through without a joint)
    nodes = np.array([[3.0, 2.0, 7.0], [3.0, 2.0, 5.0], [3.0 + 2.0 * np.tan(np.radians(10.0)), 2.0, 3.0]])
    plan = SupportPlan(
        "straight",
        nodes,
        np.array([[0, 1], [1, 2]]),
        np.full(2, r),
        np.array([[3.0, 2.0, 8.5]]),
        np.array([0]),
        np.array([0.3]),
        np.array([0]),
        np.array([2]),
    )
    for phase in PHASES:
        parts, _ = build_supports(plan, s, phase * 2 * np.pi / 16)
        meshes = [to_trimesh(p) for p in parts]
        centre = nodes[1]
        # the joint at node 1: the solid whose vertices all lie at one distance from it
        sphere = next(
            m for m in meshes if np.ptp(np.linalg.norm(m.vertices - centre, axis=1)) < 1e-6 and len(m.vertices) > 20
        )
        inscribed = float(np.abs(trimesh.proximity.signed_distance(sphere, [centre]))[0])
        assert inscribed >= 1.05 * r


def test_tip_meeting_a_sharp_drip_from_the_side_holds_it_in_every_layer():
    # A thin cone hanging under a plate (a drip: radius 0.4 mm, 2 mm tall) with its tip's post
    # node off to one side, so the tip's axis runs past the drip's point. Every layer from
    # the point up must keep at least a speck (3 pixels, common practice) of solid around the
    # point, or the drip above prints as an island. Checked on trimesh sections of the joined
    # solid (reference library) at every layer's mid-height; the tip gets a pin straight up.
    from supportgen.supports.geometry import tip_reach
    from supportgen.supports.plan import SupportPlan

    s = Settings()
    plate = trimesh.creation.box((6.0, 6.0, 1.0))
    plate.apply_translation((0, 0, 8.5))
    drip = trimesh.creation.cone(radius=0.4, height=2.0, sections=8)
    drip.apply_transform(trimesh.transformations.rotation_matrix(np.pi, (1, 0, 0)))
    drip.apply_translation((0, 0, 8.05))  # apex at z = 6.05, base inside the plate
    part = trimesh.Trimesh(*_union_arrays(plate, drip))
    apex = np.array([0.0, 0.0, 6.05])
    nodes = np.array([[0.9, 0.4, 4.9], [0.9, 0.4, 1.0]])
    plan = SupportPlan(
        "straight",
        nodes,
        np.array([[0, 1]]),
        np.full(1, 0.25),
        apex[None],
        np.array([0]),
        np.array([0.2]),
        np.array([0]),
        np.array([1]),
    )
    extra, pin = tip_reach(part, plan, s)
    assert pin[0] == pytest.approx([0, 0, 1])
    combined = combine(part, plan, s).combined
    px, layer = s.printer.pixel_mm, s.printer.layer_mm
    speck = 3 * px * px
    for z in np.arange(6.05 + layer / 2, 6.8, layer):
        sec = combined.section(plane_origin=(0, 0, z), plane_normal=(0, 0, 1))
        assert sec is not None
        polys = sec.to_2D(to_2D=np.eye(4))[0].polygons_full
        around = [p for p in polys if p.buffer(1e-9).contains(shapely.Point(0.0, 0.0))]
        assert around and around[0].area >= speck, f"layer at z {z:.3f}: {around[0].area if around else 0:.4f} mm^2"


def _union_arrays(a, b):
    solid = to_manifold(a) + to_manifold(b)
    m = solid.to_mesh()
    return np.asarray(m.vert_properties)[:, :3], np.asarray(m.tri_verts)


def test_ball_inside_test_equals_trimesh_signed_distance():
    # Reference library: trimesh.proximity.signed_distance (closest point, sign by ray
    # containment) on a closed torus; the tips' hold test (libigl AABB distance, inside by
    # the fast winding number) must give the same answer at random points and radii.
    from supportgen.io.winding import BallProbe

    torus = trimesh.creation.torus(major_radius=5.0, minor_radius=1.5, major_sections=48, minor_sections=24)
    rng = np.random.default_rng(3)
    pts = rng.uniform(torus.bounds[0] - 0.5, torus.bounds[1] + 0.5, (600, 3))
    radius = rng.uniform(0.0, 1.0, len(pts))
    want = trimesh.proximity.signed_distance(torus, pts) >= radius
    got = BallProbe(torus).holds(pts, radius)
    assert want.sum() > 50 and (~want).sum() > 50  # both answers occur
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("touch", ["point", "edge"])
def test_welds_join_solids_that_touch_at_a_point_or_along_an_edge(touch):
    # Two solids that only touch: manifold3d keeps both sheets (duplicate vertices at the
    # touching point or along the shared edge), which an STL reader merges into a
    # non-manifold vertex or edge.  Welded, the float32 positions are distinct and trimesh
    # (the reference reader) reads the written STL back as a closed volume; the volume grows
    # by less than the welds' own volume (balls of half a pixel; a rod along the edge).
    from supportgen.supports.geometry import _weld, pinch_points, pinch_positions, to_trimesh

    if touch == "point":  # two octahedra tip to tip: an exact shared vertex
        a = m3d.Manifold.sphere(1.0, 4).translate((0.0, 0.0, 0.0))
        b = m3d.Manifold.sphere(1.0, 4).translate((0.0, 0.0, 2.0))
    else:  # two cubes along one edge
        a = m3d.Manifold.cube((1.0, 1.0, 1.0))
        b = m3d.Manifold.cube((1.0, 1.0, 1.0)).translate((1.0, 1.0, 0.0))
    joined = a + b
    mesh = to_trimesh(joined)
    points, segments = pinch_positions(mesh)
    assert pinch_points(mesh) > 0 and len(points) > 0
    assert len(segments) == (1 if touch == "edge" else 0)
    r = 0.025
    welded = _weld(joined, (points, segments), r, "test")
    out = to_trimesh(welded)
    assert pinch_points(out) == 0
    back = trimesh.load(trimesh.util.wrap_as_stream(out.export(file_type="stl")), file_type="stl")
    assert back.is_watertight and back.is_volume and back.body_count == 1
    grown = welded.volume() - joined.volume()
    bound = len(points) * 4 / 3 * np.pi * r**3 + sum(np.pi * r**2 * np.linalg.norm(b - a) for a, b in segments)
    assert 0 < grown <= bound


def test_landing_holds_only_where_the_sunk_end_stays_inside_the_part():
    # A landing tip sinks its end tip_depth (and the spread) below the surface it stands on.
    # On a box's top (exact geometry): held in the middle of a 2 mm block; not on a 0.2 mm
    # plate (the end comes out of the underside), nor at the block's edge (out of the side).
    from supportgen.supports.geometry import landing_holds

    s = Settings()
    block = trimesh.creation.box((4.0, 4.0, 2.0))  # top at z = 1
    plate = trimesh.creation.box((4.0, 4.0, 0.2))  # top at z = 0.1
    assert landing_holds(block, s, [[0.0, 0.0, 1.0], [0.5, -1.0, 1.0]]).tolist() == [True, True]
    assert landing_holds(block, s, [[1.99, 0.0, 1.0], [2.0, 2.0, 1.0]]).tolist() == [False, False]
    assert landing_holds(plate, s, [[0.0, 0.0, 0.1]]).tolist() == [False]


def test_straight_post_over_an_edge_leans_to_a_landing_that_holds():
    # A shelf over a lower block (exact boxes).  Posts under the shelf straight above the
    # block's edge would land on the edge, their sunk end in the air beside the block; they
    # lean (within the branch angle) to a spot where landing_holds does hold, or to the base.
    # Posts over the block's middle land straight down; one beside the block reaches the base.
    import manifold3d as m

    from supportgen.supports.geometry import DEPTH_SPREAD, LANDING_SINKS, landing_holds, to_trimesh
    from supportgen.supports.plan import Contacts

    shelf = m.Manifold.cube((20, 10, 2)).translate((-10, -5, 12))
    wall = m.Manifold.cube((2, 10, 14)).translate((-10, -5, 0))
    block = m.Manifold.cube((8, 10, 4)).translate((0, -5, 0))
    part = to_trimesh(shelf + wall + block)
    s = Settings()
    xs = [0.0, 0.02, 7.99, 4.0, -4.0]
    c = Contacts([[x, 0.0, 12.0] for x in xs], [[0, 0, -1]] * len(xs), ["overhang"] * len(xs), [0.4] * len(xs))
    plan = plan_straight(part, c, s)
    land = plan.tip_contact < 0
    shallow = LANDING_SINKS[0] * s.rules.tip_depth_mm * (1 + DEPTH_SPREAD)
    # each post lands or stands on the base (x = -4 does; an edge post may lean off the block to it)
    assert land.sum() + len(plan.feet) == len(xs) and 2 <= land.sum() <= 4
    # the edge posts moved: none lands on the block's edge
    assert not np.any(np.isclose(plan.tip_points[land, 0], 0.0, atol=0.05) | (plan.tip_points[land, 0] > 7.9))
    assert landing_holds(part, s, plan.tip_points[land], depth=shallow).all()
    middle = np.isclose(plan.tip_points[land, 0], 4.0)
    assert middle.sum() == 1 and np.allclose(plan.tip_points[land][middle], [4.0, 0.0, 4.0])
    # every post within the branch angle of vertical
    a, b = plan.nodes[plan.edges[:, 0]], plan.nodes[plan.edges[:, 1]]
    lean = np.degrees(np.arctan2(np.hypot(*(a - b)[:, :2].T), (a - b)[:, 2]))
    assert (lean <= s.rules.branch_angle_deg + 1e-9).all()


def test_straight_post_in_a_slot_narrower_than_its_tip_stays_out_of_the_part_below():
    # Exact boxes: a 1.3 mm slab under a shelf, 0.25 mm apart (narrower than a 1.5 mm tip).
    # A tip hung its full length from the shelf would pass through the slab and its node's
    # joint would poke out under it, curing in mid-air (found on the stress corpus).  The node
    # goes halfway down the slot, the post lands on the slab's top right there, and the joined
    # solid passes our verify (no island, manifold3d union of exact boxes).
    import manifold3d as m

    from supportgen.analysis.verify import verify
    from supportgen.supports.geometry import to_trimesh
    from supportgen.supports.plan import Contacts

    shelf = m.Manifold.cube((20, 10, 2)).translate((-10, -5, 10))  # underside z = 10
    wall = m.Manifold.cube((2, 10, 12)).translate((-10, -5, 0))
    slab = m.Manifold.cube((10, 10, 1.3)).translate((0, -5, 8.45))  # top z = 9.75
    post = m.Manifold.cube((2, 2, 8.45)).translate((7, -1, 0))
    part = to_trimesh(shelf + wall + slab + post)
    s = Settings()
    c = Contacts([[4.0, 0.0, 10.0]], [[0, 0, -1]], ["overhang"], [0.4])
    plan = plan_straight(part, c, s)
    node = plan.nodes[plan.tip_nodes[plan.tip_contact == 0][0]]
    assert 9.75 < node[2] < 10.0  # in the slot, not in the slab
    land = plan.tip_points[plan.tip_contact < 0]
    assert len(land) == 1 and land[0, 2] == pytest.approx(9.75)
    sol = combine(part, plan, s)
    v = verify(sol.combined, s, name="slot")
    assert v.n_islands == 0, v.failures


def _stacked_boxes(seed: int) -> tuple[trimesh.Trimesh, np.ndarray]:
    """A 10x10x4 box with a 6x6x4 box on its top, half over the edge, turned at random and
    stored in single precision as STL keeps it; and the turn."""
    a = trimesh.creation.box((10, 10, 4))
    b = trimesh.creation.box((6, 6, 4))
    b.apply_translation((4, 1, 4))
    two = trimesh.util.concatenate([a, b])
    turn = trimesh.transformations.random_rotation_matrix(np.random.default_rng(seed).random(3))
    two.apply_transform(turn)
    two.vertices = two.vertices.astype(np.float32).astype(float)
    return two, turn


def test_touching_shells_fuse_into_one_solid_that_a_support_crosses_without_pinch_points():
    """Two boxes stacked face to face, turned and rounded to single precision: a plain union
    keeps a slit or near-coincident faces, and a ball over the seam (a joint beside it) then
    leaves coincident vertices (seen on a corpus case: tips and joints near such a seam).
    Reference: the exact volume of the two boxes (400 + 144 mm^3) and a ray's crossings
    of the surface (trimesh), through the middle of the shared face."""
    from supportgen.supports.geometry import _sphere, _union, fuse_bodies, pinch_points, to_trimesh

    plain_pinches = 0
    for seed in range(6):
        two, turn = _stacked_boxes(seed)
        up = turn[:3, :3] @ [0.0, 0.0, 1.0]
        inside = trimesh.transform_points([[2.0, 1.0, 1.0]], turn)[0]  # in the lower box, under the shared face
        seam = trimesh.transform_points([[1.0, 1.0, 2.0]], turn)[0]  # the upper box's edge on the lower's top
        plain = _union(to_manifold(two).decompose(), "plain")
        plain_pinches += pinch_points(to_trimesh(_union([plain, _sphere(seam, 0.3, 0.0)], "plain and ball")))
        fused = fuse_bodies(two)
        assert len(fused.decompose()) == 1
        assert fused.volume() == pytest.approx(544.0, rel=1e-3)  # grown by a micron only
        hits, _, _ = to_trimesh(fused).ray.intersects_location([inside], [up], multiple_hits=True)
        assert len(hits) == 1  # out through the upper box's top only: no slit between them
        assert pinch_points(to_trimesh(_union([fused, _sphere(seam, 0.3, 0.0)], "fused and ball"))) == 0
    assert plain_pinches > 0  # the plain union shows the fault this test guards against


def test_touching_shells_get_no_tip_on_the_face_they_share_and_print():
    """A 6x6x4 box stuck under a 10x10x4 one, half out past its edge, tilted 20 degrees
    and rounded to single precision: the big box's underside over the small box rests on
    it and needs no tip (without the test below it, 4 tips were planned there), the rest
    of it does, and the output is one closed solid without pinch points that passes the
    check.  Reference: the winding number just below each contact (libigl) and trimesh's
    watertight test."""
    import supportgen
    from supportgen.supports.contacts import faces_air
    from supportgen.supports.geometry import pinch_points

    a = trimesh.creation.box((10, 10, 4))
    b = trimesh.creation.box((6, 6, 4))
    b.apply_translation((4, 1, 4))
    two = trimesh.util.concatenate([a, b])
    two.apply_transform(trimesh.transformations.rotation_matrix(np.radians(200), (1, 0.3, 0)))
    two.vertices = two.vertices.astype(np.float32).astype(float)
    result = supportgen.generate(two, Settings(), name="stacked")
    assert result.report["verification"]["passed"], result.report["verification"]["failures"]
    assert result.combined.is_watertight and pinch_points(result.combined) == 0
    tips = result.contacts.points
    assert len(tips) > 10 and faces_air(result.part, tips).all()


def test_grouped_union_equals_one_batch_and_a_turn_rejoins_only_its_group():
    # manifold3d's batch union of all primitives (reference library) against the union by
    # groups: 600 random posts (four groups of 150), turned at one point, then at another.
    from supportgen.supports import geometry as g

    rng = np.random.default_rng(7)
    a = rng.uniform(0, 20, (600, 3))
    b = a + rng.normal(0, 1.5, (600, 3))
    solids = [frustum(p, q, 0.3, 0.3, phase=float(t)) for p, q, t in zip(a, b, rng.uniform(0, 1, 600))]
    pieces = g._Pieces(solids)
    assert len(np.unique(pieces.group)) == 4 and np.bincount(pieces.group).max() <= g._GROUP  # halved twice

    def same(out, prims):
        ref = m3d.Manifold.batch_boolean(prims, m3d.OpType.Add)
        assert out.volume() == pytest.approx(ref.volume(), rel=1e-9)
        assert (out - ref).volume() < 1e-9 * ref.volume() and (ref - out).volume() < 1e-9 * ref.volume()

    same(pieces.union("posts"), solids)
    current = list(solids)
    for k, phase in ((0, 0.5), (300, 0.7)):
        turned = pieces.near(a[k : k + 1], 0.0)
        assert k in turned and all(np.all(pieces.lo[i] <= a[k]) and np.all(a[k] <= pieces.hi[i]) for i in turned)
        new = [frustum(p, q, 0.3, 0.3, phase=phase) for p, q in zip(a, b)]
        pieces.replace(turned, new)
        if k:  # the groups joined at the first turn are kept, but for those turned now
            assert set(pieces.joined) == set(np.unique(pieces.group)) - set(pieces.group[turned])
        current = [new[i] if i in set(turned) else p for i, p in enumerate(current)]
        same(pieces.union("posts"), current)
        assert set(pieces.joined) == set(np.unique(pieces.group))


def _run_plan():
    from supportgen.supports.plan import SupportPlan

    # a vertical post from a tip node (0) down to a foot (3), split at nodes 1 and 2 where
    # braces from a second post (4 to 5) end
    nodes = np.array(
        [[0.0, 0.0, 9.0], [0.0, 0.0, 6.0], [0.0, 0.0, 3.0], [0.0, 0.0, 1.0], [2.5, 0.0, 9.0], [2.5, 0.0, 1.0]]
    )
    return SupportPlan(
        "straight",
        nodes,
        np.array([[0, 1], [1, 2], [2, 3], [4, 5]]),
        np.full(4, 0.25),
        np.array([[0.0, 0.0, 10.5], [2.5, 0.0, 10.5]]),
        np.array([0, 4]),
        np.array([0.3, 0.3]),
        np.array([0, 1]),
        np.array([3, 5]),
        braces=np.array([[2, 4], [1, 4]]),
    )


def test_a_straight_post_split_by_braces_is_one_prism_and_braces_hold_their_circles():
    # The post's primitive is one 16-sided prism from its top node to its foot, each end
    # 0.25 r into the joint and foot there: its volume is the regular polygon's area
    # n/2 r^2 sin(2 pi/n) (handbook formula) times that length, and no joint sphere sits at
    # the two nodes it passes through.  A brace's octagon contains the circle of the radius
    # sizing gave it (half its posts'): its section across the axis (trimesh) covers the disc
    # (shapely).  The whole unions without pinch points.
    from supportgen.supports.geometry import build_supports, pinch_points, to_trimesh

    s = Settings()
    plan, r = _run_plan(), 0.25
    parts, base = build_supports(plan, s, 0.0)
    length = 8.0 + 2 * 0.25 * r
    prism = 16 / 2 * r**2 * np.sin(2 * np.pi / 16) * length
    vols = np.array([p.volume() for p in parts])
    assert np.isclose(vols, prism, rtol=1e-9).sum() == 2  # the post and the second post, one each
    meshes = [to_trimesh(p) for p in parts]
    for node in plan.nodes[[1, 2]]:  # no solid centred there
        assert not any(np.ptp(np.linalg.norm(m.vertices - node, axis=1)) < 1e-6 for m in meshes)
    for a, b in plan.braces:
        p, q = plan.nodes[a], plan.nodes[b]
        mid, axis = (p + q) / 2, (q - p) / np.linalg.norm(q - p)
        brace = next(m for m in meshes if len(m.vertices) == 16 and np.allclose(m.centroid, mid, atol=1e-6))
        cut = brace.section(plane_origin=mid, plane_normal=axis)
        flat, to_3d = cut.to_2D()
        poly = shapely.Polygon(flat.vertices[flat.entities[0].points])
        centre = trimesh.transform_points([mid], np.linalg.inv(to_3d))[0, :2]
        assert poly.buffer(1e-9).contains(shapely.Point(centre).buffer(0.5 * r, quad_segs=64))
    solid = m3d.Manifold.batch_boolean(parts + base, m3d.OpType.Add)
    assert solid.status() == m3d.Error.NoError and pinch_points(to_trimesh(solid)) == 0


def test_the_fused_part_keeps_no_facet_narrower_than_a_ten_thousandth_of_a_millimetre():
    # Boxes joined into a turned lattice leave facets a few ten-millionths of a millimetre
    # wide; a tip crossing one is cut at two points a file merges.  Folded: no facet of the
    # fused part is narrower than SLIVER_MM (facet heights from trimesh areas and edges),
    # every vertex stays within SLIVER_MM of the part's surface (trimesh closest points),
    # and the volume is kept (reference library: trimesh).
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
    import speed

    from supportgen.supports.geometry import SLIVER_MM, fuse_bodies, to_trimesh

    def narrowest(m):
        tri = m.triangles
        edges = np.linalg.norm(np.roll(tri, -1, axis=1) - tri, axis=2)
        return float((2 * m.area_faces / edges.max(axis=1)).min())

    part = speed.kind_lattice(np.random.default_rng(27))  # the speed benchmark's lattice kind
    assert narrowest(part) < 1e-5  # the case this guards (checked before folding)
    fused = to_trimesh(fuse_bodies(part))
    assert narrowest(fused) >= SLIVER_MM
    _, dist, _ = trimesh.proximity.closest_point(part, fused.vertices)
    assert dist.max() < SLIVER_MM
    assert fused.volume == pytest.approx(part.volume, rel=1e-6)


def test_a_pinch_the_welds_leave_turns_only_the_primitives_there(monkeypatch):
    # Fault injected: the first attempt's pinch checks all report one pinch at a post's
    # node, as if no weld closed it.  The retry must turn the primitives whose boxes hold
    # that point, not all of them, and the result is then checked as usual: one closed
    # solid (trimesh) with the union's volume (manifold3d, reference libraries).
    from supportgen.supports import geometry as g

    s = Settings()
    part, plan = _planned(trimesh.creation.box((12, 10, 4)), s)
    at = plan.nodes[plan.feet[0]]
    real, calls, turned = g.pinch_positions, [0], []

    def pinched(mesh):
        calls[0] += 1
        if calls[0] <= 2 * (g._WELD_ROUNDS + 1):
            return at[None, :], np.zeros((0, 2, 3))
        return real(mesh)

    replace = g._Pieces.replace

    def record(self, idx, solids):
        turned.append((len(idx), len(self.solids)))
        return replace(self, idx, solids)

    monkeypatch.setattr(g, "pinch_positions", pinched)
    monkeypatch.setattr(g._Pieces, "replace", record)
    sol = g.combine(part, plan, s)
    assert len(turned) == 1 and 0 < turned[0][0] < turned[0][1] / 2
    assert sol.combined.is_watertight and sol.combined.is_volume
    ref = to_manifold(part) + to_manifold(sol.supports)
    assert sol.combined.volume == pytest.approx(ref.volume(), rel=1e-6)
