"""Placement: lift, keep x/y, refuse parts that do not fit."""

import numpy as np
import pytest
import trimesh
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st

from supportgen.analysis.placement import place
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
    p = place(box, Settings(), centre=True)
    assert np.allclose(p.mesh.bounds[:, :2].mean(axis=0), 0)


def test_refuses_what_does_not_fit():
    s = Settings()
    with pytest.raises(PlacementError, match="big: footprint 200.0 x 10.0 mm .* does not fit"):
        place(trimesh.creation.box((200, 10, 10)), s, name="big")
    with pytest.raises(PlacementError, match="tall: height 170.0 mm"):
        place(trimesh.creation.box((10, 10, 170)), s, name="tall")
    off = trimesh.creation.box((10, 10, 10))
    off.apply_translation((100, 0, 0))
    with pytest.raises(PlacementError, match="off: the part lies off the plate .*--centre"):
        place(off, s, name="off")
