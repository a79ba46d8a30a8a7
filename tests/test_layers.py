"""Tests of supportgen.analysis.layers against exact geometry, trimesh/shapely sections and scipy.

Pixel error bound used throughout (derived here): a pixel is cured when its centre
is inside the section S, so the cured area differs from area(S) only on points x
whose pixel centre c(x) lies on the other side of the boundary; then the segment
x-c(x) crosses the boundary and x lies within delta = pixel/sqrt(2) (half a
pixel diagonal) of it.  Hence |A_pixels - A(S)| <= area(boundary dilated by delta),
which for a convex polygon boundary of perimeter P is at most 2*P*delta + pi*delta^2
(Steiner's formula for the outer parallel set; the inner one loses at most P*delta).
"""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path

import numpy as np
import pytest
import trimesh
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st
from scipy import ndimage
from shapely.geometry import LineString, Polygon
from shapely.geometry import box as sbox
from shapely.ops import unary_union

from supportgen.analysis.layers import Grid, LayerLabels, analyse_layers, component_stats, iter_layers
from supportgen.errors import MeshError, SettingsError

m3 = pytest.importorskip("manifold3d")
CORPUS = Path(__file__).parents[1] / ".." / "shared" / "corpus"
S8 = np.ones((3, 3), bool)


def _steiner(perimeter, pixel):
    """Bound on |pixel area - area| for a convex boundary (module docstring)."""
    d = pixel / np.sqrt(2)
    return 2 * perimeter * d + np.pi * d * d


def _mesh(man) -> trimesh.Trimesh:
    """A manifold3d solid as a trimesh mesh (status checked)."""
    assert man.status() == m3.Error.NoError
    out = man.to_mesh()
    return trimesh.Trimesh(np.asarray(out.vert_properties)[:, :3], np.asarray(out.tri_verts), process=False)


# ---------------------------------------------------------------- exact geometry


def test_sphere_areas_and_perimeters_match_the_ball():
    # Exact geometry: an icosphere with vertices on the sphere of radius R is convex, lies
    # inside the ball of radius R and contains the ball of radius rho (its nearest face
    # plane), so its section at height z has area in [pi(rho^2-z^2), pi(R^2-z^2)].
    R, zc, pixel = 10.0, 11.0, 0.1
    mesh = trimesh.creation.icosphere(subdivisions=4, radius=R)
    rho = float(np.min(np.abs(np.einsum("ij,ij->i", mesh.face_normals, mesh.triangles[:, 0]))))
    mesh.apply_translation((0.3, -0.2, zc))
    stack = analyse_layers(mesh, pixel, 0.25, 2.0)
    z = stack.z_mm - zc
    inside = np.abs(z) < R * 0.9
    r = np.sqrt(R * R - z[inside] ** 2)
    bound = np.pi * (R * R - rho * rho) + _steiner(2 * np.pi * r, pixel)
    assert np.all(np.abs(stack.area_mm2[inside] - np.pi * r * r) <= bound)
    assert np.all(stack.area_mm2[np.abs(z) > R] == 0)
    # Cauchy-Crofton (Lehmann & Legland 2012) with 4 directions: for a convex section between
    # radii r_in and r, the continuous estimate lies in [2 pi r_in, 2 pi r]; counting lines
    # through pixel centres is off by at most 4 lines of each direction (derived).
    r_in = np.sqrt(np.maximum(rho * rho - z[inside] ** 2, 0))
    tol = 2 * np.pi * (r - r_in) + np.pi * (2 * pixel + 2 * pixel / np.sqrt(2))
    assert np.all(np.abs(stack.perimeter_mm[inside] - 2 * np.pi * r) <= tol)
    assert stack.n_components[inside].tolist() == [1] * int(inside.sum())
    assert stack.inverted_pixels == 0


def test_cone_areas_are_those_of_its_polygons():
    # Exact geometry: trimesh's cone with n sections has, at height z, a regular n-gon section
    # of circumradius r = R (1 - z / H): area (n/2) r^2 sin(2 pi / n), perimeter 2 n r sin(pi / n).
    R, H, n, pixel = 8.0, 16.0, 64, 0.1
    mesh = trimesh.creation.cone(radius=R, height=H, sections=n)
    assert np.allclose(mesh.bounds[:, 2], [0, H])
    stack = analyse_layers(mesh, pixel, 0.2, 2.0)
    r = R * (1 - stack.z_mm / H)
    exact = n / 2 * r * r * np.sin(2 * np.pi / n)
    bound = _steiner(2 * n * r * np.sin(np.pi / n), pixel)
    assert np.all(np.abs(stack.area_mm2 - exact) <= bound)
    assert stack.islands == ()  # stands on the plate, narrows upwards
    assert stack.max_unsupported_reach_mm == 0.0


def test_torus_areas_are_those_of_its_annuli():
    # Exact geometry: trimesh's torus is a polygon revolved in n planar trapezoid steps, so its
    # section at height z lies between two regular n-gons whose circumradii are where the
    # profile polygon (vertices in the half-plane y = 0, x > 0) meets the line at height z.
    n, pixel, lift = 96, 0.1, 5.0
    mesh = trimesh.creation.torus(major_radius=12.0, minor_radius=4.0, major_sections=n, minor_sections=48)
    v = mesh.vertices
    prof = v[(np.abs(v[:, 1]) < 1e-9) & (v[:, 0] > 0)][:, [0, 2]]
    prof = prof[np.argsort(np.arctan2(prof[:, 1], prof[:, 0] - 12.0))]
    profile = Polygon(prof)
    mesh.apply_translation((0.0, 0.0, lift))
    stack = analyse_layers(mesh, pixel, 0.25, 2.0)
    checked = 0
    for z, area in zip(stack.z_mm, stack.area_mm2):
        cut = profile.intersection(LineString([(0, z - lift), (20, z - lift)]))
        if cut.is_empty or cut.length == 0:
            assert area == 0
            continue
        r_in, r_out = cut.bounds[0], cut.bounds[2]
        exact = n / 2 * np.sin(2 * np.pi / n) * (r_out**2 - r_in**2)
        bound = _steiner(2 * n * r_out * np.sin(np.pi / n), pixel) + _steiner(2 * n * r_in * np.sin(np.pi / n), pixel)
        assert abs(area - exact) <= bound
        checked += 1
    assert checked > 25


def test_overlapping_shells_print_as_their_union():
    # Reference: shapely's union of the boxes present at each height.  Box edges lie on pixel
    # boundaries (x = (i + 1/2) * pixel, exact binary fractions), so the pixel count is exact.
    p, h = 0.125, 0.25
    a = ((1.0625, 1.0625, 0.0), (5.0625, 3.0625, 2.0))
    b = ((3.0625, 2.0625, 1.0), (6.0625, 6.0625, 3.0))
    boxes = [trimesh.creation.box(bounds=np.array(x)) for x in (a, b)]
    mesh = trimesh.util.concatenate(boxes)  # two intersecting shells, not unioned
    grid = Grid(0.0, 0.0, p, 60, 60)
    stack = analyse_layers(mesh, p, h, 2.0, grid=grid)
    for z, area, ncomp in zip(stack.z_mm, stack.area_mm2, stack.n_components):
        present = [sbox(x[0][0], x[0][1], x[1][0], x[1][1]) for x in (a, b) if x[0][2] < z < x[1][2]]
        assert area == pytest.approx(unary_union(present).area, abs=1e-12)
        assert ncomp == 1
    assert stack.inverted_pixels == 0


def test_cavities_and_inside_out_shells():
    # Winding numbers (Jacobson et al. 2013): an inward-facing inner shell cancels the outer
    # one (a sealed cavity, area = shapely difference); an inverted shell alone never cures
    # and every pixel it covers is counted as inverted.
    p, h = 0.125, 0.5
    outer = trimesh.creation.box(bounds=np.array(((0.0625, 0.0625, 0.0), (4.0625, 4.0625, 3.0))))
    inner = trimesh.creation.box(bounds=np.array(((1.0625, 1.0625, 1.0), (3.0625, 3.0625, 2.0))))
    inner.invert()
    grid = Grid(-1.0, -1.0, p, 48, 48)
    stack = analyse_layers(trimesh.util.concatenate([outer, inner]), p, h, 2.0, grid=grid)
    ring = sbox(0.0625, 0.0625, 4.0625, 4.0625).difference(sbox(1.0625, 1.0625, 3.0625, 3.0625)).area
    expect = [16.0 if not 1 < z < 2 else ring for z in stack.z_mm]
    assert stack.area_mm2.tolist() == pytest.approx(expect, abs=1e-12)
    assert stack.inverted_pixels == 0
    alone = analyse_layers(inner, p, h, 2.0, grid=grid)
    assert alone.area_mm2.max() == 0
    assert alone.inverted_pixels == 16 * 16 * 2  # 2 mm x 2 mm of pixels, 2 layers inside


def test_components_match_scipy_label():
    # Reference library: scipy.ndimage.label (8-connectivity) on each streamed mask.
    mesh, _ = _cones_plate()
    seen = []

    def observer(layer, labels):
        ref, n_ref = ndimage.label(layer.mask, S8)
        image = labels.image()
        seen.append(
            (labels.n == n_ref, np.array_equal(image, ref), np.array_equal(LayerLabels.of(layer.mask).image(), ref))
        )
        a, c = component_stats(image, labels.n, Grid.covering(mesh.bounds, 0.2))
        assert a.sum() == pytest.approx(layer.mask.sum() * 0.04)

    stack = analyse_layers(mesh, 0.2, 0.4, 2.0, observers=(observer,))
    assert len(seen) == len(stack.z_mm) and all(all(x) for x in seen)
    assert stack.n_components.max() == 4


@hsettings(max_examples=200, deadline=None)
@given(st.integers(0, 60), st.lists(st.tuples(st.integers(0, 59), st.integers(0, 59)), max_size=120), st.booleans())
def test_edge_components_match_scipy_connected_components(n, pairs, chain):
    # Reference library: scipy.sparse.csgraph.connected_components, count and numbering
    # (components numbered by their smallest node), on random graphs and on long chains
    # (the deepest trees the union-find must flatten).
    import scipy.sparse as sparse
    from scipy.sparse.csgraph import connected_components

    from supportgen.analysis.runlength import edge_components

    if chain and n > 1:
        order = np.random.default_rng(n).permutation(n)
        pairs = list(zip(order[:-1].tolist(), order[1:].tolist()))[: max(1, len(pairs))]
    e = np.array([(a, b) for a, b in pairs if a < n and b < n], np.int64).reshape(-1, 2)
    graph = sparse.coo_matrix((np.ones(len(e)), (e[:, 0], e[:, 1])), shape=(n, n))
    n_ref, ref = connected_components(graph, directed=False) if n else (0, np.zeros(0, np.int32))
    count, comp = edge_components(n, e[:, 0], e[:, 1])
    assert count == n_ref
    assert comp.tolist() == ref.tolist()


# ---------------------------------------------------------------- reference library on the corpus


def _corpus(name):
    path = CORPUS / name
    if not path.exists():
        pytest.skip(f"shared corpus mesh {path} not found")
    # supportgen's own loader merges split vertices (spot's texture seams) and closes the
    # bunny's small scan holes; the check below is against trimesh sections of that mesh.
    from supportgen.io.meshio import load_mesh

    mesh = load_mesh(path).mesh
    assert mesh.is_watertight
    mesh.apply_scale(50.0 / mesh.extents.max())  # 50 mm on the longest side
    mesh.apply_translation(-mesh.bounds[0])
    return mesh


@pytest.mark.parametrize("name", ["spot.obj", "fandisk.obj", "stanford-bunny.obj"])
def test_corpus_areas_match_trimesh_sections(name):
    # Reference libraries: trimesh.section_multiplane and shapely polygon areas; bound: the
    # area of the section boundary dilated by half a pixel diagonal (module docstring).
    mesh = _corpus(name)
    pixel = 0.2
    stack = analyse_layers(mesh, pixel, 0.5, 2.0)
    sections = mesh.section_multiplane([0, 0, 0], [0, 0, 1], stack.z_mm)
    for z, area, sec in zip(stack.z_mm, stack.area_mm2, sections):
        polys = [] if sec is None else list(sec.polygons_full)
        ref = sum(q.area for q in polys)
        bound = sum(q.boundary.buffer(pixel / np.sqrt(2)).area for q in polys) + 1e-9
        assert abs(area - ref) <= bound, f"{name} z={z}: {area} vs {ref} (bound {bound})"
    assert stack.inverted_pixels == 0


# ---------------------------------------------------------------- islands and reach


def test_lifted_ball_is_one_island_at_its_lowest_layer():
    h, p = 0.25, 0.1
    mesh = _mesh(m3.Manifold.sphere(4.0, 48).translate((1.23, -0.77, 7.0)))
    stack = analyse_layers(mesh, p, h, 2.0)
    assert len(stack.islands) == 1
    isl = stack.islands[0]
    k_low = int(np.floor(mesh.bounds[0, 2] / h))  # the layer holding the lowest point
    assert isl.layer in (k_low, k_low + 1)
    assert isl.layer == int(np.flatnonzero(stack.area_mm2)[0])
    assert np.hypot(*(np.array(isl.centroid_xy) - (1.23, -0.77))) <= 2 * p
    assert isl.area_mm2 == pytest.approx(isl.mask.sum() * p * p)


@cache
def _cones_plate():
    """A plate (8-10 mm up) held by four downward cones whose tips are at different heights."""
    tips = ((2.37, 3.11, 2.0), (12.62, 2.93, 2.6), (3.08, 12.71, 3.3), (13.18, 13.39, 4.1))
    parts = [m3.Manifold.cube((16.0, 16.0, 2.0)).translate((0.0, 0.0, 8.0))]
    for x, y, z in tips:
        parts.append(m3.Manifold.cylinder(8.5 - z, 0.0, 1.2, 32).translate((x, y, z)))
    return _mesh(m3.Manifold.batch_boolean(parts, m3.OpType.Add)), tips


def test_plate_on_downward_cones_has_an_island_at_each_tip():
    # Constructed geometry (manifold3d): each cone's apex is the lowest point of its own
    # region, so each starts one island in the layer holding the apex.
    mesh, tips = _cones_plate()
    h, p = 0.25, 0.1
    stack = analyse_layers(mesh, p, h, 1.0)
    assert len(stack.islands) == len(tips)
    for isl, (x, y, z) in zip(sorted(stack.islands, key=lambda i: i.layer), sorted(tips, key=lambda t: t[2])):
        assert isl.layer in (int(np.floor(z / h)), int(np.floor(z / h)) + 1)
        assert np.hypot(isl.centroid_xy[0] - x, isl.centroid_xy[1] - y) <= 2 * p
        pts = isl.points(1.0, seed=0)
        assert len(pts) >= 1
        r, c = stack.grid.index(pts)
        assert isl.mask[r - isl.row0, c - isl.col0].all()
    # The plate's underside reaches out from the cones: over the limit, and reported.
    assert stack.max_unsupported_reach_mm > 1.0 and len(stack.overreach) >= 1
    assert all(o.reach_mm > 1.0 for o in stack.overreach)


def test_mushroom_on_the_plate_reaches_by_its_overhang():
    # Exact geometry: a cap of radius 6 on a stem of radius 2 overhangs by 4 mm; pixel centres
    # discretise both rims, so the reach is 4 mm within two pixels.
    p, h = 0.1, 0.2
    stem = m3.Manifold.cylinder(5.0, 2.0, 2.0, 96)
    cap = m3.Manifold.cylinder(2.0, 6.0, 6.0, 96).translate((0, 0, 5.0))
    mesh = _mesh((stem + cap).translate((0.31, 0.17, 0.0)))
    stack = analyse_layers(mesh, p, h, 1.5)
    assert stack.islands == ()
    assert abs(stack.max_unsupported_reach_mm - 4.0) <= 2 * p
    assert stack.max_unsupported_reach_layer == int(np.floor(5.0 / h - 0.5)) + 1  # first layer sampled in the cap
    assert len(stack.overreach) == 1 and stack.overreach[0].layer == stack.max_unsupported_reach_layer
    xy = np.array(stack.reach_xy[stack.max_unsupported_reach_layer])
    assert abs(np.hypot(*(xy - (0.31, 0.17))) - 6.0) <= 2 * p
    assert np.isnan(stack.reach_xy[0]).all() and stack.reach_mm[0] == 0


def test_island_points_cover_a_flat_island():
    # A lifted 10 x 6 mm slab: one island, its whole underside; farthest-point samples cover it.
    p, spacing = 0.1, 2.0
    slab = trimesh.creation.box(bounds=np.array(((0.03, 0.04, 3.0), (10.03, 6.04, 4.0))))
    stack = analyse_layers(slab, p, 0.25, 2.0)
    (isl,) = stack.islands
    assert isl.area_mm2 == pytest.approx(60.0, abs=_steiner(32.0, p))
    pts = isl.points(spacing, seed=3)
    r, c = np.nonzero(isl.mask)
    xy = stack.grid.xy(r + isl.row0, c + isl.col0)
    far = np.sqrt(((xy[:, None] - pts[None]) ** 2).sum(-1)).min(1).max()
    assert far <= spacing / np.sqrt(2) + spacing / 4
    assert np.hypot(*(pts[0] - isl.centroid_xy)) <= p
    gaps = np.sqrt(((pts[:, None] - pts[None]) ** 2).sum(-1)) + np.eye(len(pts)) * 1e9
    assert gaps.min() >= spacing / np.sqrt(2) - 1e-9
    assert 60.0 / spacing**2 / 2 <= len(pts) <= 60.0 / spacing**2 * 2


@hsettings(max_examples=8, deadline=None)
@given(st.integers(-15, 15), st.integers(-15, 15))
def test_whole_pixel_shifts_change_no_count(dx, dy):
    # Invariance: the grid follows the mesh by whole pixels, so every count must be equal.
    mesh, _ = _cones_plate()
    p, h = 0.25, 0.5
    base = analyse_layers(mesh, p, h, 1.0)
    moved = mesh.copy()
    moved.apply_translation((dx * p, dy * p, 0.0))
    stack = analyse_layers(moved, p, h, 1.0)
    assert stack.n_components.tolist() == base.n_components.tolist()
    assert stack.area_mm2.tolist() == base.area_mm2.tolist()
    assert [i.layer for i in stack.islands] == [i.layer for i in base.islands]
    assert len(stack.overreach) == len(base.overreach)
    assert stack.reach_mm == pytest.approx(base.reach_mm)
    shift = np.array([i.centroid_xy for i in stack.islands]) - [i.centroid_xy for i in base.islands]
    assert shift == pytest.approx(np.tile([dx * p, dy * p], (len(base.islands), 1)))


# ---------------------------------------------------------------- streaming, report, errors


def test_iter_layers_streams_a_window_of_layers():
    mesh = trimesh.creation.box(bounds=np.array(((0.0, 0.0, 0.0), (2.0, 2.0, 3.0))))
    grid = Grid.covering(mesh.bounds, 0.25)
    full = [layer.mask for layer in iter_layers(mesh, grid, 0.5)]
    part = list(iter_layers(mesh, grid, 0.5, first=2, last=7))
    assert len(full) == 6 and [layer.index for layer in part] == list(range(2, 8))
    assert all(np.array_equal(a.mask, b) for a, b in zip(part, full[2:]))
    assert not part[-1].mask.any() and part[0].z_mm == pytest.approx(1.25)


def test_to_dict_is_json():
    stack = analyse_layers(_cones_plate()[0], 0.25, 0.5, 1.0)
    d = json.loads(json.dumps(stack.to_dict()))
    assert d["islands"] == 4 and len(d["area_mm2"]) == len(stack.z_mm)
    assert d["max_unsupported_reach_mm"] == pytest.approx(stack.max_unsupported_reach_mm, abs=1e-4)


def test_bad_inputs_raise_clear_errors():
    mesh = trimesh.creation.box()
    with pytest.raises(SettingsError, match="layer_mm"):
        analyse_layers(mesh, 0.1, 0.0, 1.0)
    with pytest.raises(SettingsError, match="grid pitch"):
        analyse_layers(mesh, 0.1, 0.1, 1.0, grid=Grid(0, 0, 0.2, 10, 10))
    with pytest.raises(MeshError, match="no faces"):
        analyse_layers(trimesh.Trimesh(), 0.1, 0.1, 1.0)


# ---------------------------------------------------------------- two processes, one result


def _same_stack(a, b):
    for f in ("z_mm", "area_mm2", "perimeter_mm", "n_components", "reach_mm"):
        assert np.array_equal(getattr(a, f), getattr(b, f)), f
    assert np.array_equal(a.reach_xy, b.reach_xy, equal_nan=True)
    assert [(i.layer, i.z_mm, i.area_mm2, i.centroid_xy, i.row0, i.col0) for i in a.islands] == [
        (i.layer, i.z_mm, i.area_mm2, i.centroid_xy, i.row0, i.col0) for i in b.islands
    ]
    assert all(np.array_equal(i.mask, j.mask) for i, j in zip(a.islands, b.islands))
    assert a.overreach == b.overreach
    assert (a.max_unsupported_reach_mm, a.max_unsupported_reach_layer, a.inverted_pixels) == (
        b.max_unsupported_reach_mm,
        b.max_unsupported_reach_layer,
        b.inverted_pixels,
    )


@pytest.mark.parametrize("where", ["above the tips", "at a tip", "over a tip"])
def test_a_walk_split_over_two_processes_gives_the_walk_of_one(monkeypatch, where):
    # The reference is the one-process walk, itself checked above against scipy labels and
    # trimesh/shapely sections.  Each downward cone starts as a speck in mid-air that grows
    # into an island: a cut just over a tip's first layer leaves a speck at the seam (this
    # process walks on until the chain ends and its state meets the helper's, whose
    # specks there are mapped to its own); a cut at it joins the helper's half at once,
    # its islands and dropped specks numbered after the lower half's; so does one above.
    import supportgen.analysis.layers as L

    if not L.may_fork():
        pytest.skip("no fork or a single CPU here: analyse_layers walks in one process")
    mesh, _ = _cones_plate()
    p, h = 0.1, 0.1
    one = analyse_layers(mesh, p, h, 1.0)
    first = sorted(i.layer for i in one.islands)
    cut = {"above the tips": first[-1] + 10, "at a tip": first[2], "over a tip": first[2] + 1}[where]
    joined = []

    def join(self, part, after, _join=L._Walk.join):
        ok = _join(self, part, after)
        if ok:
            joined.append(after)
        return ok

    monkeypatch.setattr(L, "_balanced_cut", lambda *a: cut)
    monkeypatch.setattr(L._Walk, "join", join)
    two = analyse_layers(mesh, p, h, 1.0, workers=2)
    _same_stack(one, two)
    assert len(one.z_mm) >= L.SPLIT_MIN_LAYERS
    assert len(joined) == 1
    # over a tip, this process walks on past the seam until the speck chain ends
    assert (joined[0] > cut - 1) == (where == "over a tip")


def test_a_seam_inside_two_speck_chains_maps_the_helpers_specks_to_this_walks(monkeypatch):
    # Two downward cones whose apexes are two layers apart: a cut just over the first
    # apex leaves its speck chain at the seam; this process walks on until that chain
    # has grown into an island, while the second chain (started above the cut, the same
    # in both walks) is still a speck: the walks meet with a speck in mid-air, and the
    # helper's speck (dropped when it grows) is mapped to this walk's.  Reference: the
    # one-process walk, as above.
    import supportgen.analysis.layers as L

    if not L.may_fork():
        pytest.skip("no fork or a single CPU here")
    parts = [m3.Manifold.cube((16.0, 16.0, 2.0)).translate((0.0, 0.0, 8.0))]
    for x, y, z in ((3.0, 3.0, 2.0), (12.0, 12.0, 2.25)):
        parts.append(m3.Manifold.cylinder(8.5 - z, 0.0, 1.2, 32).translate((x, y, z)))
    mesh = _mesh(m3.Manifold.batch_boolean(parts, m3.OpType.Add))
    one = analyse_layers(mesh, 0.1, 0.1, 1.0)
    assert len(one.islands) == 2
    cut = min(i.layer for i in one.islands) + 1
    met = []

    def join(self, part, after, _join=L._Walk.join):
        ok = _join(self, part, after)
        if ok:
            met.append(len(self.specks))
        return ok

    monkeypatch.setattr(L, "_balanced_cut", lambda *a: cut)
    monkeypatch.setattr(L._Walk, "join", join)
    _same_stack(one, analyse_layers(mesh, 0.1, 0.1, 1.0, workers=2))
    assert met == [1]


def test_a_failed_helper_leaves_the_walk_to_this_process(monkeypatch):
    # A helper that raises (or dies) sends no half: this process walks it, same result.
    import supportgen.analysis.layers as L

    if not L.may_fork():
        pytest.skip("no fork or a single CPU here")
    mesh, _ = _cones_plate()
    one = analyse_layers(mesh, 0.1, 0.1, 1.0)

    def broken(*args):
        raise MemoryError("no room")

    monkeypatch.setattr(L, "_upper_walk", broken)
    _same_stack(one, analyse_layers(mesh, 0.1, 0.1, 1.0, workers=2))


def test_the_force_recorder_run_in_a_helper_makes_the_same_records():
    # The load path's records (runs, cavities, pressure solves) made in the helper and
    # pickled back are byte for byte those of the recorder called in the walk.
    import pickle

    import supportgen.analysis.layers as L
    from supportgen.physics.loadpath import LayerRecorder
    from supportgen.settings import Settings

    if not L.may_fork():
        pytest.skip("no fork or a single CPU here")
    mesh, _ = _cones_plate()
    grid = Grid.covering(mesh.bounds, 0.1)
    made = []
    for workers in (1, 2):
        rec = LayerRecorder(grid, Settings())
        stack = analyse_layers(mesh, 0.1, 0.1, 1.0, grid=grid, observers=(rec,), workers=workers)
        made.append((stack, rec.records))
    _same_stack(made[0][0], made[1][0])
    assert len(made[0][1]) == len(made[0][0].z_mm)
    assert pickle.dumps(made[0][1]) == pickle.dumps(made[1][1])


def test_crossings_rasterised_in_two_halves_are_those_of_one_call(monkeypatch):
    # Reference: one ray_crossings call over the whole mesh (itself checked against
    # trimesh sections through the layer areas above); the halves joined must be its
    # arrays element for element, in the same order.
    import supportgen.analysis.layers as L
    from supportgen.analysis.raster import ray_crossings

    if not L.may_fork():
        pytest.skip("no fork or a single CPU here")
    mesh, _ = _cones_plate()
    grid = Grid.covering(mesh.bounds, 0.1)
    monkeypatch.setattr(L, "SPLIT_MIN_FACES", 0)
    joined, whole = L._crossings(mesh, grid), ray_crossings(mesh, grid)
    assert len(whole[0]) > 1000
    assert all(a.dtype == b.dtype and np.array_equal(a, b) for a, b in zip(joined, whole))


def test_crossings_of_long_thin_faces_are_trimeshs_ray_hits():
    # Columns are bounded row by row from the edges (a superset, the exact edge test
    # decides); long thin faces across the grid (a turned thin rod, like a brace) are where
    # a wrong bound would drop pixels.  Reference: trimesh's ray-triangle intersector
    # (reference library), a vertical ray up through every pixel centre: the same pixels
    # are crossed, at the same heights, entering or leaving as the face normal says.
    from trimesh.ray.ray_triangle import RayMeshIntersector

    from supportgen.analysis.raster import ray_crossings

    rod = trimesh.creation.cylinder(radius=0.15, height=9.0, sections=8)
    rod.apply_transform(trimesh.transformations.rotation_matrix(1.1, [0.3, 1.0, 0.2]))
    ball = trimesh.creation.icosphere(subdivisions=2, radius=1.3)
    ball.apply_translation([2.0, -1.0, 0.5])
    mesh = trimesh.util.concatenate([rod, ball])
    mesh.apply_translation(-mesh.bounds[0] + 0.5)
    grid = Grid.covering(mesh.bounds, 0.037)
    index, z, sign = ray_crossings(mesh, grid)
    r, c = np.divmod(np.arange(grid.nx * grid.ny), grid.nx)
    origins = np.column_stack([grid.xy(r, c), np.full(r.size, -1.0)])
    locs, rays, tri = RayMeshIntersector(mesh).intersects_location(
        origins, np.tile([0.0, 0.0, 1.0], (r.size, 1)), multiple_hits=True
    )
    assert len(index) > 2000 and len(locs) == len(index)
    ours = np.lexsort((z, index))
    ref = np.lexsort((locs[:, 2], rays))
    assert np.array_equal(index[ours], rays[ref])
    assert np.allclose(z[ours], locs[ref, 2], atol=1e-9)
    assert np.array_equal(sign[ours], np.where(mesh.face_normals[tri[ref], 2] < 0, 1, -1))
