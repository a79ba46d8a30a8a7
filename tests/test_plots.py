"""The preview's rasteriser against exact geometry: covered area and which face shows."""

from __future__ import annotations

import numpy as np
import pytest
import trimesh

from supportgen.report.plots import plot_preview, render_view


def _flat(mesh, rgb):
    return np.asarray(mesh.triangles, float), np.tile(rgb, (len(mesh.faces), 1))


def test_box_from_below_covers_its_footprint():
    # Exact geometry: a 6 x 4 mm box seen straight from below (orthographic) covers a
    # 6 x 4 mm rectangle; at 100 px per 20 mm (0.2 mm pixels) that is 30 x 20 = 600 pixel
    # centres, give or take the pixels its edges pass through (a 1-pixel border).
    box = trimesh.creation.box((6.0, 4.0, 2.0))
    tri, col = _flat(box, (0.2, 0.4, 0.6))
    image = render_view(tri, col, -90, -90, np.zeros(3), 10.0, 100)
    drawn = int((image != 1.0).any(axis=2).sum())
    assert 29 * 19 <= drawn <= 31 * 21
    assert drawn == pytest.approx(600, abs=2 * (30 + 20) + 4)


def test_nearest_face_wins_where_two_boxes_overlap():
    # Two boxes one above the other, seen from above: the upper one's colour shows where
    # they overlap, the lower one's only outside the upper's footprint (exact geometry).
    low = trimesh.creation.box((8.0, 8.0, 1.0))
    high = trimesh.creation.box((4.0, 4.0, 1.0), trimesh.transformations.translation_matrix((0, 0, 3.0)))
    t1, c1 = _flat(low, (1.0, 0.0, 0.0))
    t2, c2 = _flat(high, (0.0, 0.0, 1.0))
    for tris, cols in (((t1, t2), (c1, c2)), ((t2, t1), (c2, c1))):  # order of faces does not matter
        image = render_view(np.concatenate(tris), np.concatenate(cols), 90, -90, np.zeros(3), 10.0, 100)
        assert image[50, 50].tolist() == [0.0, 0.0, 1.0]  # centre: the upper box
        assert image[50, 32].tolist() == [1.0, 0.0, 0.0]  # 3.5 mm off the axis: only the lower box
        assert image[2, 2].tolist() == [1.0, 1.0, 1.0]  # corner: background


def test_preview_is_a_png_with_part_and_support_colours():
    # matplotlib's PNG reader: the preview is an image holding both the part's grey and
    # the supports' orange (shaded, so compare hue, not exact values).
    import io

    import matplotlib.image

    part = trimesh.creation.box((10.0, 10.0, 2.0), trimesh.transformations.translation_matrix((0, 0, 6.0)))
    posts = trimesh.creation.cylinder(1.0, 5.0, transform=trimesh.transformations.translation_matrix((0, 0, 2.5)))
    img = matplotlib.image.imread(io.BytesIO(plot_preview(part, posts, "box on a post")), format="png")[..., :3]
    r, g, b = img[..., 0], img[..., 1], img[..., 2]
    orange = (r > g + 0.1) & (g > b + 0.1)
    grey = (np.abs(r - g) < 0.03) & (b > r) & (b - r < 0.1) & (r < 0.9) & (r > 0.2)
    assert orange.sum() > 100 and grey.sum() > 1000
