"""Poisson-disk contacts: spacing, counts against the published jamming density."""

import numpy as np
import pytest
import trimesh
from scipy.spatial import cKDTree

from supportgen.analysis.overhangs import find_overhangs
from supportgen.analysis.placement import place
from supportgen.settings import Settings
from supportgen.supports.contacts import RSA_DENSITY, contacts_at, expected_count, merge_contacts, sample_overhangs


def _contacts(mesh, settings):
    rules = settings.rules
    oh = find_overhangs(mesh, rules.overhang_angle_deg, floor_z=0.0)
    return sample_overhangs(
        mesh, oh, rules.contact_spacing_mm, rules.overhang_angle_deg, rules.tip_diameter_mm, rules.seed
    )


def test_jamming_density_constant():
    # Feder, J. Theor. Biol. 87:237 (1980): random sequential addition of discs jams at
    # coverage 0.547; with discs of diameter r that is 0.547 / (pi/4) samples per r^2.
    assert RSA_DENSITY == pytest.approx(0.6965, abs=1e-3)


def test_box_on_plate_needs_no_contact():
    s = Settings().override(elevation_mm=0.0)
    part = place(trimesh.creation.box((20, 20, 10)), s).mesh
    assert len(_contacts(part, s)) == 0


@pytest.mark.parametrize("spacing", [1.5, 2.0, 3.0])
def test_lifted_box_count_matches_packing_density(spacing):
    # Count on a 40 x 40 mm bottom face against area/spacing^2 x 0.6965 (jamming density
    # of random sequential addition, Feder 1980), within the 15 %.
    s = Settings().override(contact_spacing_mm=spacing)
    part = place(trimesh.creation.box((40, 40, 5)), s).mesh
    c = _contacts(part, s)
    assert len(c) == pytest.approx(expected_count(1600.0, spacing), rel=0.15)
    # Every pair at least the spacing apart (the Poisson-disk property), all on the bottom face.
    d, _ = cKDTree(c.points).query(c.points, k=2)
    assert d[:, 1].min() >= spacing - 1e-9
    assert np.allclose(c.points[:, 2], part.bounds[0, 2])


def test_contacts_are_seeded_and_deterministic():
    s = Settings()
    part = place(trimesh.creation.icosphere(subdivisions=4, radius=10), s).mesh
    a, b = _contacts(part, s), _contacts(part, s)
    assert np.array_equal(a.points, b.points)
    c = _contacts(part, s.override(seed=7))
    assert not np.array_equal(a.points, c.points)


def test_flatter_surfaces_are_held_more_densely():
    # Design rule: radius grows from the spacing (horizontal) to 1.5x at the critical angle.
    s = Settings()
    flat = place(trimesh.creation.box((30, 30, 5)), s).mesh
    tilted = flat.copy()
    tilted.apply_transform(trimesh.transformations.rotation_matrix(np.radians(30), [1, 0, 0]))
    tilted = place(tilted, s).mesh
    per_area = lambda m: len(_contacts(m, s)) / find_overhangs(m, 35, 0.0).area_mm2
    assert per_area(tilted) < per_area(flat)


def test_contacts_at_finds_the_underside_above_a_point():
    box = trimesh.creation.box((10, 10, 4))
    box.apply_translation((0, 0, 10))
    c = contacts_at(box, [[1.0, 2.0, 0.0], [50.0, 0.0, 0.0]], "island", 0.4)
    assert len(c) == 1 and c.points[0] == pytest.approx([1.0, 2.0, 8.0])
    assert c.normals[0] == pytest.approx([0, 0, -1])


def test_merge_keeps_existing_and_drops_near_duplicates():
    s = Settings()
    part = place(trimesh.creation.box((20, 20, 5)), s).mesh
    a = _contacts(part, s)
    merged = merge_contacts(a, a, 0.1)
    assert len(merged) == len(a)
