"""Overhang faces, regions and local minima against exact geometry."""

import numpy as np
import pytest
import trimesh

from supportgen.analysis.overhangs import find_overhangs, local_minima


@pytest.mark.parametrize("angle", [30.0, 45.0, 60.0])
def test_sphere_overhang_area_is_the_spherical_cap(angle):
    # Exact geometry: faces with -n_z > cos(a) form the cap around the lower pole of
    # polar angle a, area 2 pi R^2 (1 - cos a).  A 6-times subdivided icosphere has
    # edges of about R/60; the faces straddling the cap's rim make the error, bounded
    # by rim length x edge length / cap area, under 1 % here.
    R = 10.0
    sphere = trimesh.creation.icosphere(subdivisions=6, radius=R)
    oh = find_overhangs(sphere, angle)
    exact = 2 * np.pi * R**2 * (1 - np.cos(np.radians(angle)))
    assert oh.area_mm2 == pytest.approx(exact, rel=0.01)
    assert oh.n_regions == 1
    # The lowest point of a sphere is its one local minimum (exact geometry).
    assert len(oh.minima) == 1
    assert oh.minima[0] == pytest.approx([0, 0, -R], abs=R * 0.01)


def test_box_on_plate_has_no_overhang_and_no_minimum():
    box = trimesh.creation.box((10, 10, 10))
    box.apply_translation((0, 0, 5))  # bottom face on the plate, z = 0
    oh = find_overhangs(box, 35, floor_z=0.0)
    assert len(oh.faces) == 0 and len(oh.minima) == 0


def test_lifted_box_bottom_is_one_region_and_one_plateau_minimum():
    box = trimesh.creation.box((10, 20, 5))
    box.apply_translation((0, 0, 8))
    oh = find_overhangs(box, 35, floor_z=0.0)
    assert oh.area_mm2 == pytest.approx(200.0)  # exact: the 10 x 20 mm bottom face
    assert oh.n_regions == 1
    assert len(oh.minima) == 1 and oh.minima[0, 2] == pytest.approx(5.5)


def test_dimple_in_an_upper_face_is_not_a_minimum():
    # The bottom of a conical dimple in a lifted block's top face is lower than its
    # neighbours but faces up: material lies under it.  Only the block's underside
    # (one level plateau) is a minimum.  Built with manifold3d (reference library).
    import manifold3d as m3d

    from supportgen.supports.geometry import to_trimesh

    block = m3d.Manifold.cube((20, 20, 6)).translate((-10, -10, 10))
    dimple = m3d.Manifold.cylinder(3, 0.0, 4.0, 32).translate((0, 0, 13.5))
    part = to_trimesh(block - dimple)
    mins = local_minima(part, floor_z=0.0)
    assert len(mins) == 1 and mins[0, 2] == pytest.approx(10.0)


def test_down_pointing_cone_apex_is_a_minimum():
    cone = trimesh.creation.cone(radius=5, height=10)
    flipped = cone.copy()
    flipped.apply_transform(trimesh.transformations.rotation_matrix(np.pi, [1, 0, 0]))
    flipped.apply_translation((0, 0, 20))
    mins = local_minima(flipped, floor_z=0.0)
    assert len(mins) == 1 and mins[0, 2] == pytest.approx(flipped.bounds[0, 2])


def test_faces_facing_down_past_the_angle_are_left_alone():
    # A 60-degree cone's side faces are tilted 60 deg from horizontal: under a 45-degree
    # critical angle they need nothing; under 70 they all do (exact geometry).
    cone = trimesh.creation.cone(radius=5, height=5 * np.tan(np.radians(60)), sections=64)
    cone.apply_transform(trimesh.transformations.rotation_matrix(np.pi, [1, 0, 0]))
    cone.apply_translation((0, 0, 30))
    side = np.flatnonzero(cone.face_normals[:, 2] < -1e-6)
    assert len(find_overhangs(cone, 45).faces) == 0
    assert set(find_overhangs(cone, 70).faces) == set(side)
