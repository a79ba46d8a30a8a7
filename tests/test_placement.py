"""Placement: lift, keep x/y, refuse parts that do not fit."""

import numpy as np
import pytest
import trimesh
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st

from supportgen.analysis.placement import check_cures, place
from supportgen.errors import PlacementError
from supportgen.settings import Settings


@hsettings(max_examples=25, deadline=None)
@given(st.floats(-20, 20), st.floats(-20, 20), st.floats(-50, 50), st.floats(0, 20))
def test_lowest_point_sits_at_the_lift_and_xy_is_kept(x, y, z, lift):
    box = trimesh.creation.box((10, 8, 6))
    box.apply_translation((x, y, z))
    p = place(box, Settings().override(elevation_mm=lift))
    assert p.mesh.bounds[0, 2] == pytest.approx(lift)
    assert np.allclose(p.mesh.bounds[:, :2], box.bounds[:, :2])
    assert box.bounds[0, 2] == pytest.approx(z - 3)  # the input is not modified


def test_centre_moves_to_the_plate_centre():
    box = trimesh.creation.box((10, 8, 6))
    box.apply_translation((40, -20, 0))
    p = place(box, Settings(), position="centre")
    assert np.allclose(p.mesh.bounds[:, :2].mean(axis=0), 0)
    assert p.warnings == ()


def test_refuses_what_does_not_fit():
    s = Settings()
    with pytest.raises(PlacementError, match="big: footprint 200.0 x 10.0 mm .* does not fit"):
        place(trimesh.creation.box((200, 10, 10)), s, name="big")
    with pytest.raises(PlacementError, match="tall: height 170.0 mm"):
        place(trimesh.creation.box((10, 10, 170)), s, name="tall")
    off = trimesh.creation.box((10, 10, 10))
    off.apply_translation((100, 0, 0))
    with pytest.raises(PlacementError, match="off: lies off the plate .*position auto or centre"):
        place(off, s, name="off", position="keep")


def test_a_cad_export_at_the_origin_is_moved_onto_the_plate_with_a_warning():
    # A part exported with its bounding-box corner at the origin (0..50 mm) overhangs the
    # 80 mm deep default plate, whose centre is the origin; it fits once centred.
    part = trimesh.creation.box((50, 50, 20)).apply_translation((25, 25, 10))
    p = place(part, Settings(), name="corner")
    assert np.allclose(p.mesh.bounds[:, :2].mean(axis=0), 0)
    assert "corner: lies off the plate" in p.warnings[0] and "moved to the plate centre" in p.warnings[0]
    # Inside the plate it stays where it is, with no warning.
    inside = trimesh.creation.box((20, 20, 10)).apply_translation((-30, 10, 0))
    q = place(inside, Settings())
    assert np.allclose(q.mesh.bounds[:, :2], inside.bounds[:, :2]) and q.warnings == ()


def test_parts_placed_together_keep_their_arrangement():
    # Two parts side by side, y 30..50 mm: past the 80 mm deep plate's edge, so the group moves.
    a = trimesh.creation.box((20, 20, 10)).apply_translation((10, 40, 5))
    b = trimesh.creation.box((20, 20, 10)).apply_translation((50, 40, 5))
    group = np.array([np.minimum(a.bounds[0], b.bounds[0]), np.maximum(a.bounds[1], b.bounds[1])])
    pa, pb = (place(m, Settings(), group_bounds=group) for m in (a, b))
    # One offset for both: their distance is unchanged (rigid translation), and the group is centred.
    assert np.allclose(pa.offset[:2], pb.offset[:2])
    assert np.allclose(pb.mesh.bounds - pa.mesh.bounds, b.bounds - a.bounds)
    lo = np.minimum(pa.mesh.bounds[0], pb.mesh.bounds[0])
    hi = np.maximum(pa.mesh.bounds[1], pb.mesh.bounds[1])
    assert np.allclose((lo + hi)[:2] / 2, 0)


@pytest.mark.parametrize(("size", "unit"), [(0.05, "m"), (0.01, "m"), (1.6, "in")])
def test_parts_too_small_for_millimetres_get_the_unit_hint(size, unit):
    # A 50 mm part drawn in metres reads 0.05; a 40 mm part drawn in inches reads about 1.6.
    part = trimesh.creation.box((size, size / 2, size / 3))
    with pytest.raises(PlacementError, match=rf"tiny: the part is only .* --units {unit}"):
        place(part, Settings(), name="tiny")


def test_a_part_that_cures_no_more_than_a_speck_is_refused():
    # 4 pixels of 50 um in the best layer is 0.01 mm2: nothing a tip could hold.
    s = Settings()
    px2 = s.printer.pixel_mm**2
    with pytest.raises(PlacementError, match="needle: no layer cures more than 4 pixel"):
        check_cures(np.array([0.0, 4 * px2, 2 * px2]), s, "needle")
    check_cures(np.array([0.0, 5 * px2]), s, "ok")  # five pixels is a printable feature


def test_check_fails_a_solid_that_cures_nothing():
    # A 0.02 mm cube between two layer mid-planes cures no pixel at all.
    from supportgen.analysis.verify import verify

    cube = trimesh.creation.box((0.02, 0.02, 0.02)).apply_translation((0, 0, 1.0))
    v = verify(cube, Settings(), name="speck")
    assert not v.passed and any("prints nothing" in f for f in v.failures)
