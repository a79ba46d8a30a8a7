"""The stress corpus: seeded parts a user might bring, and the independent check of an output.

Shared by ``benchmarks/stress.py`` (the full corpus) and ``tests/test_stress.py``
(a reduced form in CI).  Nothing here is tuned to the project's results: every
case comes from a generator and a seed, and the set is fixed by the master seed.

Case kinds (``Case.generator``):

* ``corpus``: each mesh of ``../shared/corpus`` (unitless) scaled to a longest side of
  30, 50 or 80 mm, turned by a random rotation, then translated so the corner of its
  bounding box is at the origin, as CAD exports arrive;
* procedural parts of our own (``disc``, ``plate``, ``wheel``, ``cup``, ``lattice``,
  ``shell``, ``pins``, ``voids``, ``touching``, and since the fourth pass ``edgedown``, a
  body standing in mid-air on a knife edge or a point, and ``slot``, plates with gaps
  narrower than a tip), about 30 mm, same random turn and corner;
* messy variants of corpus and procedural parts (``hole``, ``dupfaces``, ``flipfaces``,
  ``doubled``, ``nmfan``, ``selfx``, ``f32noise``): open, non-manifold, self-intersecting
  or noisy surfaces that a printer still cures (what matters is which pixels are inside);
* inputs with no printable inside or in the wrong units (``units``, ``noinside``): the only
  cases where a refusal is the right answer (issue 12 lists them).

Each case has a stable id, its generator and its seed, so ``build_case(case)`` makes the
same mesh on every machine.

The check (:func:`independent_check`) does not use the project's rasteriser: it reads
the written STL back with trimesh, sections it at the layer heights with
``trimesh.Trimesh.section_multiplane`` and compares each layer's shapely polygons with
the union of the layer below.
"""

from __future__ import annotations

import zlib
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import trimesh
from scipy.spatial.transform import Rotation

CORPUS = (Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus").resolve()
CORPUS_MODELS = ("fandisk.obj", "spot.obj", "stanford-bunny.obj", "horse.ply")
CORPUS_SIZES_MM = (30.0, 50.0, 80.0)
#: The procedural parts messy variants are made from (fixed, so adding a kind keeps every case id).
MESSY_BASES = ("disc", "plate", "wheel", "cup", "lattice", "shell", "pins", "voids", "touching")
PROCEDURAL = MESSY_BASES + ("edgedown", "slot")
MESSY = ("hole", "dupfaces", "flipfaces", "doubled", "nmfan", "selfx", "f32noise")
REFUSE = ("units", "noinside")
KINDS = ("corpus",) + PROCEDURAL + MESSY + REFUSE
#: The printer's pixel for the fin and pin widths (default settings: 0.05 mm).
PIXEL_MM = 0.05


@dataclass(frozen=True)
class Case:
    """One stress case: ``id`` is stable, ``generator`` a name from :data:`KINDS`, ``seed``
    the generator's seed, ``params`` what else it needs; ``expect`` is ``"print"`` or
    ``"refuse"`` (no printable inside, wrong units)."""

    id: str
    generator: str
    seed: int
    params: dict = field(default_factory=dict)
    expect: str = "print"

    def to_dict(self) -> dict:
        return asdict(self)


def case_seed(master: int, case_id: str) -> int:
    """The seed of one case: a hash of the master seed and the case id (stable across runs)."""
    return zlib.crc32(f"{master}:{case_id}".encode())


# -- corpus meshes -----------------------------------------------------------------------------------

_CORPUS_CACHE: dict[str, trimesh.Trimesh] = {}


def corpus_available() -> bool:
    return all((CORPUS / m).is_file() for m in CORPUS_MODELS)


def corpus_mesh(model: str) -> trimesh.Trimesh:
    """A corpus mesh as stored (unitless, not repaired), cached per process."""
    if model not in _CORPUS_CACHE:
        _CORPUS_CACHE[model] = trimesh.load(CORPUS / model, force="mesh", process=False)
    return _CORPUS_CACHE[model].copy()


def _scaled(mesh: trimesh.Trimesh, longest_mm: float) -> trimesh.Trimesh:
    mesh = mesh.copy()
    mesh.apply_scale(longest_mm / float(np.max(mesh.extents)))
    return mesh


def _turn_to_corner(mesh: trimesh.Trimesh, rng: np.random.Generator, full: bool = True) -> trimesh.Trimesh:
    """A random rotation (uniform over SO(3) when ``full``, else about z only), then the
    bounding-box corner moved to the origin."""
    mesh = mesh.copy()
    if full:
        rot = Rotation.random(random_state=rng).as_matrix()
    else:
        rot = Rotation.from_euler("z", rng.uniform(0, 360), degrees=True).as_matrix()
    t = np.eye(4)
    t[:3, :3] = rot
    mesh.apply_transform(t)
    mesh.apply_translation(-mesh.bounds[0])
    return mesh


def _tilt(mesh: trimesh.Trimesh, deg: float, rng: np.random.Generator) -> trimesh.Trimesh:
    """Tilt by ``deg`` about a random horizontal axis, then a random turn about z."""
    mesh = mesh.copy()
    a = rng.uniform(0, 2 * np.pi)
    axis = np.array([np.cos(a), np.sin(a), 0.0])
    mesh.apply_transform(trimesh.transformations.rotation_matrix(np.radians(deg), axis))
    mesh.apply_transform(trimesh.transformations.rotation_matrix(rng.uniform(0, 2 * np.pi), [0, 0, 1]))
    mesh.apply_translation(-mesh.bounds[0])
    return mesh


# -- procedural parts (about `size` mm; pixel features stay in pixels) ---------------------------------


def _union(meshes):
    return trimesh.boolean.union(meshes, engine="manifold")


def _difference(a, b):
    return trimesh.boolean.difference([a, b], engine="manifold")


def _box(extents, centre=(0, 0, 0)):
    return trimesh.creation.box(extents, trimesh.transformations.translation_matrix(centre))


def gen_disc(rng, size):
    m = trimesh.creation.cylinder(radius=size / 2, height=rng.uniform(0.8, 2.0), sections=96)
    return _tilt(m, rng.uniform(0, 90), rng)


def gen_plate(rng, size):
    m = _box((size, size * rng.uniform(0.4, 0.8), rng.uniform(0.6, 2.0)))
    return _tilt(m, rng.uniform(0, 90), rng)


def gen_wheel(rng, size):
    r = size / 2
    m = trimesh.creation.annulus(r_min=r * rng.uniform(0.2, 0.5), r_max=r, height=rng.uniform(3, 6), sections=96)
    m.apply_transform(trimesh.transformations.rotation_matrix(np.pi / 2, [1, 0, 0]))  # on its edge
    return _tilt(m, rng.uniform(0, 10), rng)


def gen_cup(rng, size):
    r, h, wall = size / 3, size * 0.6, rng.uniform(1.0, 2.0)
    outer = trimesh.creation.cylinder(radius=r, height=h, sections=96)
    inner = trimesh.creation.cylinder(radius=r - wall, height=h, sections=96)
    inner.apply_translation((0, 0, wall))
    m = _difference(outer, inner)
    if rng.random() < 0.5:  # opening down: a cup that seals against the film
        m.apply_transform(trimesh.transformations.rotation_matrix(np.pi, [1, 0, 0]))
    return _tilt(m, rng.uniform(0, 20), rng)


def gen_lattice(rng, size):
    n, s = 3, rng.uniform(0.8, 1.5)
    size = 0.6 * size  # its diagonal, turned, stays near the other parts' size
    cell = size / n
    ticks = np.arange(n + 1) * cell - size / 2
    struts = []
    for i in ticks:
        for j in ticks:
            struts.append(_box((size + s, s, s), (0, i, j)))
            struts.append(_box((s, size + s, s), (i, 0, j)))
            struts.append(_box((s, s, size + s), (i, j, 0)))
    return _turn_to_corner(_union(struts), rng)


def gen_shell(rng, size):
    r, wall = size / 2, rng.uniform(0.6, 1.2)
    dome = _difference(trimesh.creation.icosphere(4, r), trimesh.creation.icosphere(4, r - wall))
    dome = trimesh.boolean.intersection(
        [dome, _box((2 * r + 2, 2 * r + 2, r + 1), (0, 0, r / 2 + 0.5))], engine="manifold"
    )
    return _turn_to_corner(dome, rng)


def gen_pins(rng, size):
    """A block with pins and fins 1-3 pixels wide on its underside and sides."""
    block = _box((size, size * 0.6, 3.0), (0, 0, 1.5))
    parts = [block]
    for _ in range(int(rng.integers(3, 7))):
        w = int(rng.integers(1, 4)) * PIXEL_MM
        x, y = rng.uniform(-size / 2 + 1, size / 2 - 1), rng.uniform(-size * 0.3 + 1, size * 0.3 - 1)
        if rng.random() < 0.5:
            parts.append(_box((w, w, 3.0), (x, y, -1.4)))  # pin hanging under the block
        else:
            parts.append(_box((w, 8.0, 3.0), (x, y, -1.4)))  # fin hanging under the block
    parts.append(_box((2 * PIXEL_MM, 4.0, 2.0), (size / 2 + 0.9, 0, 1.5)))  # a fin off one side
    return _tilt(_union(parts), rng.uniform(0, 30), rng)


def gen_voids(rng, size):
    m = _box((size, size * 0.7, size * 0.5))
    for _ in range(int(rng.integers(1, 4))):
        r = rng.uniform(1.5, 4.0)
        c = rng.uniform(-1, 1, 3) * (np.array([size, size * 0.7, size * 0.5]) / 2 - r - 1.0)
        m = _difference(m, trimesh.creation.icosphere(3, r).apply_translation(c))
    return _turn_to_corner(m, rng)


def gen_touching(rng, size):
    """Two closed bodies in one file that touch (a face or an edge) but are not joined."""
    a = _box((size * 0.5, size * 0.4, size * 0.3))
    b = _box((size * 0.4, size * 0.3, size * 0.3))
    if rng.random() < 0.5:  # stacked: b sits on a's top face, shifted
        b.apply_translation((rng.uniform(-3, 3), rng.uniform(-3, 3), size * 0.3))
    else:  # side by side along one edge
        b.apply_translation((size * 0.45, size * 0.35, 0.0))
    return _turn_to_corner(trimesh.util.concatenate([a, b]), rng)


def gen_edgedown(rng, size):
    """A body whose lowest point is a knife edge or a point: a cone tilted past its half-angle
    (the rim lowest), a pyramid point down, or a wedge edge down; turned a little."""
    shape = int(rng.integers(3))
    if shape == 0:
        r, h = size * 0.3, size * rng.uniform(0.6, 0.9)
        m = trimesh.creation.cone(r, h, sections=64)
        m.apply_transform(trimesh.transformations.rotation_matrix(np.pi, [1, 0, 0]))
        half = np.degrees(np.arctan2(r, h))
        return _tilt(m, half + rng.uniform(2, 15), rng)
    if shape == 1:
        a = size * 0.4
        v = np.array([[a, a, 0], [-a, a, 0], [-a, -a, 0], [a, -a, 0], [0, 0, -size * 0.6]], float)
        m = trimesh.Trimesh(v, [[0, 1, 2], [0, 2, 3], [1, 0, 4], [2, 1, 4], [3, 2, 4], [0, 3, 4]])
        m.fix_normals()
        return _tilt(m, rng.uniform(0, 20), rng)
    w, d = size * rng.uniform(0.3, 0.5), size * rng.uniform(0.5, 0.8)
    v = np.array([[-w / 2, 0, 0], [w / 2, 0, 0], [0, 0, -d], [-w / 2, size, 0], [w / 2, size, 0], [0, size, -d]], float)
    m = trimesh.convex.convex_hull(v)
    return _tilt(m, rng.uniform(0, 20), rng)


def gen_slot(rng, size):
    """Plates stacked on a back wall with slots between them narrower than a tip's length
    (0.1-1.4 mm): contacts under a plate have the part just below them."""
    n, t = int(rng.integers(2, 4)), rng.uniform(1.0, 2.0)
    gaps = rng.uniform(0.1, 1.4, n - 1)
    depth, width = size * 0.6, size * 0.5
    parts, z = [], 0.0
    for k in range(n):
        parts.append(_box((depth, width, t), (depth / 2, 0, z + t / 2)))
        z += t + (gaps[k] if k < n - 1 else 0.0)
    parts.append(_box((2.0, width, z), (-1.0, 0, z / 2)))
    return _tilt(_union(parts), rng.uniform(0, 15), rng)


PROCEDURAL_GENERATORS = {
    "edgedown": gen_edgedown,
    "slot": gen_slot,
    "disc": gen_disc,
    "plate": gen_plate,
    "wheel": gen_wheel,
    "cup": gen_cup,
    "lattice": gen_lattice,
    "shell": gen_shell,
    "pins": gen_pins,
    "voids": gen_voids,
    "touching": gen_touching,
}


# -- messy variants ------------------------------------------------------------------------------------


def _soup(mesh):
    return trimesh.Trimesh(mesh.vertices.copy(), mesh.faces.copy(), process=False)


def mess_hole(m, rng):
    """Punch 1-3 holes: drop the faces within a radius of random surface points."""
    c = m.triangles_center
    keep = np.ones(len(m.faces), bool)
    for _ in range(int(rng.integers(1, 4))):
        p = c[rng.integers(len(c))]
        keep &= np.linalg.norm(c - p, axis=1) > rng.uniform(0.5, 2.0)
    return trimesh.Trimesh(m.vertices, m.faces[keep], process=False)


def mess_dupfaces(m, rng):
    idx = rng.choice(len(m.faces), max(1, len(m.faces) // 20), replace=False)
    return trimesh.Trimesh(m.vertices, np.vstack([m.faces, m.faces[idx]]), process=False)


def mess_flipfaces(m, rng):
    f = m.faces.copy()
    idx = rng.choice(len(f), max(1, len(f) // 20), replace=False)
    f[idx] = f[idx][:, ::-1]
    return trimesh.Trimesh(m.vertices, f, process=False)


def mess_doubled(m, rng):
    """The shell twice: identical, or a copy shrunk by under a pixel (a nested shell)."""
    other = _soup(m)
    if rng.random() < 0.5:
        c = m.bounds.mean(axis=0)
        other.vertices = c + (other.vertices - c) * (1 - 0.03 / max(m.extents))
    return trimesh.util.concatenate([_soup(m), other])


def mess_nmfan(m, rng):
    """Non-manifold fans: 1-4 extra triangles hung on existing edges, pointing inwards."""
    v, f = m.vertices.copy(), m.faces.copy()
    new_v, new_f = [], []
    for _ in range(int(rng.integers(1, 5))):
        i = rng.integers(len(f))
        a, b = f[i, 0], f[i, 1]
        inward = -m.face_normals[i] if len(m.face_normals) == len(f) else np.zeros(3)
        tip = (v[a] + v[b]) / 2 + inward * rng.uniform(0.2, 1.0)
        new_v.append(tip)
        new_f.append([a, b, len(v) + len(new_v) - 1])
    return trimesh.Trimesh(np.vstack([v, new_v]), np.vstack([f, new_f]), process=False)


def mess_selfx(m, rng):
    """Self-intersections: a copy turned a little and moved by a fraction of its size, not unioned."""
    other = _soup(m)
    c = m.bounds.mean(axis=0)
    t = trimesh.transformations.rotation_matrix(np.radians(rng.uniform(5, 30)), rng.normal(size=3), c)
    other.apply_transform(t)
    other.apply_translation(rng.uniform(-0.2, 0.2, 3) * m.extents)
    out = trimesh.util.concatenate([_soup(m), other])
    out.apply_translation(-out.bounds[0])
    return out


def mess_f32noise(m, rng):
    """Every corner its own vertex, moved by float32 rounding plus noise of 1e-6 of the size."""
    tri = m.triangles.reshape(-1, 3)
    tri = tri + rng.normal(scale=1e-6 * max(m.extents), size=tri.shape)
    tri = tri.astype(np.float32).astype(np.float64)
    return trimesh.Trimesh(tri, np.arange(len(tri)).reshape(-1, 3), process=False)


MESSY_GENERATORS = {
    "hole": mess_hole,
    "dupfaces": mess_dupfaces,
    "flipfaces": mess_flipfaces,
    "doubled": mess_doubled,
    "nmfan": mess_nmfan,
    "selfx": mess_selfx,
    "f32noise": mess_f32noise,
}


# -- the case list -------------------------------------------------------------------------------------


def make_cases(
    seed: int = 0,
    *,
    orientations: int = 30,
    procedural_each: int = 10,
    messy_each: int = 8,
    corpus_sizes=CORPUS_SIZES_MM,
    procedural_mm: float = 24.0,
) -> list[Case]:
    """Every case of the corpus for a master ``seed``.

    ``orientations`` random turns of each corpus model at each of ``corpus_sizes``;
    ``procedural_each`` parts of each procedural kind at ``procedural_mm``;
    ``messy_each`` variants of each messy kind (of a seeded choice of corpus model at the
    smallest corpus size, or of a procedural part); a few wrong-unit and no-inside inputs.
    """
    cases = []
    have_corpus = corpus_available()

    def add(cid, gen, params, expect="print"):
        cases.append(Case(cid, gen, case_seed(seed, cid), params, expect))

    if have_corpus:
        for model in CORPUS_MODELS:
            stem = model.split(".")[0]
            for size in corpus_sizes:
                for k in range(orientations):
                    add(f"corpus-{stem}-{size:g}-o{k:02d}", "corpus", {"model": model, "size_mm": size})
    for kind in PROCEDURAL:
        for k in range(procedural_each):
            add(f"{kind}-{k:02d}", kind, {"size_mm": procedural_mm})
    pick = np.random.default_rng(seed)
    bases = (list(CORPUS_MODELS) if have_corpus else []) + list(MESSY_BASES)
    for kind in MESSY:
        for k in range(messy_each):
            base = bases[int(pick.integers(len(bases)))]
            size = min(corpus_sizes) if base in CORPUS_MODELS else procedural_mm
            add(f"messy-{kind}-{base.split('.')[0]}-{k:02d}", kind, {"base": base, "size_mm": size})
    # Wrong units: a part drawn in metres (0.03 "mm" long) or a 10 um cube; no inside: a sheet, one triangle.
    add("units-metres-box", "units", {"shape": "box", "size_mm": 0.03}, "refuse")
    add("units-10um-cube", "units", {"shape": "box", "size_mm": 0.01}, "refuse")
    if have_corpus:
        add("units-horse-as-stored", "units", {"shape": "horse"}, "refuse")
    add("noinside-sheet", "noinside", {"shape": "sheet"}, "refuse")
    add("noinside-triangle", "noinside", {"shape": "triangle"}, "refuse")
    return cases


def ci_cases(n: int = 30, seed: int = 0, size_mm: float = 12.0) -> list[Case]:
    """A reduced corpus for CI: ``n`` seeded cases, at least one of every generator kind
    (corpus models only where the corpus is present), parts about ``size_mm`` across."""
    pool = make_cases(
        seed,
        orientations=1,
        procedural_each=2,
        messy_each=2,
        corpus_sizes=(size_mm, 1.5 * size_mm),
        procedural_mm=size_mm,
    )
    first, rest = {}, []
    for c in pool:
        if c.generator in first:
            rest.append(c)
        else:
            first[c.generator] = c
    chosen = list(first.values())
    rng = np.random.default_rng(seed)
    extra = max(0, min(n - len(chosen), len(rest)))
    chosen += [rest[i] for i in sorted(rng.choice(len(rest), extra, replace=False))]
    order = {c.id: i for i, c in enumerate(pool)}
    return sorted(chosen, key=lambda c: order[c.id])


def _base_part(name: str, size: float, rng) -> trimesh.Trimesh:
    if name in CORPUS_MODELS:
        return _turn_to_corner(_scaled(corpus_mesh(name), size), rng)
    return PROCEDURAL_GENERATORS[name](rng, size)


def build_case(case: Case) -> trimesh.Trimesh:
    """The input mesh of ``case`` (mm, corner at the origin), made from its generator and seed."""
    rng = np.random.default_rng(case.seed)
    p = case.params
    if case.generator == "corpus":
        return _base_part(p["model"], p["size_mm"], rng)
    if case.generator in PROCEDURAL_GENERATORS:
        return PROCEDURAL_GENERATORS[case.generator](rng, p["size_mm"])
    if case.generator in MESSY_GENERATORS:
        return MESSY_GENERATORS[case.generator](_base_part(p["base"], p["size_mm"], rng), rng)
    if case.generator == "units":
        if p["shape"] == "horse":
            return corpus_mesh("horse.ply")
        return _box((p["size_mm"],) * 3, (p["size_mm"] / 2,) * 3)
    if case.generator == "noinside":
        if p["shape"] == "sheet":
            v = np.array([[0, 0, 0], [20, 0, 0], [20, 20, 0], [0, 20, 0]], float) + [0, 0, 5]
            return trimesh.Trimesh(v, [[0, 1, 2], [0, 2, 3]], process=False)
        return trimesh.Trimesh([[0, 0, 5], [20, 0, 5], [0, 20, 8]], [[0, 1, 2]], process=False)
    raise ValueError(f"unknown generator {case.generator!r}; valid: {', '.join(KINDS)}")


# -- the independent check -----------------------------------------------------------------------------


def speck_area_mm2(pixel_mm: float) -> float:
    """A disc two pixels across: regions smaller than this are below the printer's resolution
    (the same rule as the project's verify, written here again so the check stays independent)."""
    return float(np.pi * pixel_mm**2)


def _ring_polygons(segments: np.ndarray):
    """Shapely geometry of one section from its (n, 2, 2) segments: the segments joined into
    closed rings (shapely ``line_merge``), each ring's polygon, combined even-odd (the
    inside of a closed solid).  None when some ring does not close (a pinch point)."""
    import shapely
    from shapely.geometry import Polygon

    if len(segments) == 0:
        return Polygon()
    seg = np.round(segments, 6)
    merged = shapely.line_merge(shapely.multilinestrings(seg))
    lines = list(getattr(merged, "geoms", [merged]))
    if not all(ln.is_closed and len(ln.coords) >= 4 for ln in lines):
        return None
    arr = np.empty(len(lines), dtype=object)
    arr[:] = lines
    xy, idx = shapely.get_coordinates(arr, return_index=True)
    polys = shapely.make_valid(shapely.polygons(shapely.linearrings(xy, indices=idx)))
    # Even-odd: the depth of each ring is the number of other rings around it (a ring's own
    # first vertex is on its boundary, not within it).
    pairs = shapely.STRtree(polys).query(shapely.points([ln.coords[0] for ln in lines]), predicate="within")
    depth = np.bincount(pairs[0], minlength=len(polys))
    if depth.max() <= 1:
        return shapely.difference(shapely.union_all(polys[depth == 0]), shapely.union_all(polys[depth == 1]))
    out = Polygon()
    for g in polys[np.argsort(depth)]:
        out = shapely.symmetric_difference(out, g)
    return out


def layer_polygons(mesh: trimesh.Trimesh, layer_mm: float):
    """(z, shapely geometry, to_3D transform) of every layer, sampled at mid-layer
    ``(k + 0.5) * layer_mm`` (the heights the printer cures).

    The segments come from ``trimesh.intersections.mesh_multiplane`` (the core of
    ``Trimesh.section_multiplane``, without building a Path2D per layer); where a
    section's rings do not close, that layer falls back to ``section_multiplane`` and
    trimesh's ``polygons_full``.
    """
    from shapely.geometry import MultiPolygon, Polygon
    from shapely.ops import unary_union

    n = int(np.ceil(mesh.bounds[1, 2] / layer_mm - 0.5))
    z = (np.arange(n) + 0.5) * layer_mm
    segs, to_3d, _ = trimesh.intersections.mesh_multiplane(mesh, [0, 0, 0], [0, 0, 1], z)
    out = []
    for k, zk in enumerate(z):
        geom = _ring_polygons(segs[k])
        if geom is None:
            sec = mesh.section(plane_origin=[0, 0, zk], plane_normal=[0, 0, 1])
            polys = (
                [] if sec is None else [p.buffer(0) for p in sec.to_2D(to_2D=np.linalg.inv(to_3d[k]))[0].polygons_full]
            )
            geom = unary_union(polys) if polys else Polygon()
        if not isinstance(geom, (Polygon, MultiPolygon)):
            geom = (
                unary_union([g for g in getattr(geom, "geoms", []) if isinstance(g, (Polygon, MultiPolygon))])
                if hasattr(geom, "geoms")
                else Polygon()
            )
        out.append((float(zk), geom, to_3d[k]))
    return out


def independent_check(
    path: str | Path, pixel_mm: float = 0.05, layer_mm: float = 0.05, part_volume_mm3: float | None = None
) -> dict:
    """Check a written combined STL without the project's code.

    Fails (``failures`` lists why) when the file does not read back watertight (trimesh),
    when it cures nothing, when a layer region larger than a speck overlaps held material of
    the layer below by less than a speck and overhangs it past a 45 degree step by a speck or
    more (an island: it starts in mid-air, or grows on a speck in mid-air; regions closer than
    one pixel are one region, as the printer cures them), when its first layer does not sit
    on the plate, or when it holds less volume than the input part (``part_volume_mm3``).
    """
    import shapely

    mesh = trimesh.load(path, force="mesh")
    failures = []
    out = {
        "watertight": bool(mesh.is_watertight),
        "faces": int(len(mesh.faces)),
        "islands": 0,
        "first_island": None,
        "volume_mm3": float(mesh.volume) if mesh.is_watertight else None,
    }
    if not mesh.is_watertight:
        failures.append("not-watertight")
    if len(mesh.faces) == 0 or mesh.bounds[1, 2] < layer_mm:
        failures.append("cures-nothing")
        out["failures"] = failures
        return out
    if mesh.bounds[0, 2] > layer_mm / 2:
        failures.append("off-plate")
    speck = speck_area_mm2(pixel_mm)
    # A printer does not open a gap narrower than one pixel: where pixel centres fall decides
    # whether the gap has an unlit pixel at all, and light spreads past a lit pixel's edge
    # (smallest reliable feature 2-3 pixels, common practice: ../shared/REFERENCE.md section 6).
    # So regions closer than a pixel are one region: each section is closed by half a pixel
    # (buffer out, then in); a region apart by a pixel or more stays apart.
    close = pixel_mm / 2
    layers = [(z, g.buffer(close).buffer(-close), t) for z, g, t in layer_polygons(mesh, layer_mm)]
    cured = sum(g.area for _, g, _ in layers) * layer_mm
    out["cured_mm3"] = float(cured)
    if cured <= speck * layer_mm:
        failures.append("cures-nothing")
    # Held material: the first layer (on the plate), then each region that overlaps held material
    # of the layer below by a speck, or that overlaps it by half a pixel and overhangs it by no
    # more than a 45 degree step (one layer height sideways, common practice for what prints
    # without support) except for less than a speck; a region smaller than a speck is held by
    # half a pixel, or half itself.  A speck of overlap is what a large region hanging from a
    # bridge needs; the top of a tip that narrows and leans rests on less, and prints.  A region
    # in mid-air is an island once, and counts as held above it (it is counted, not counted
    # again per layer); a speck in mid-air is no island but holds nothing above it, so a part
    # that starts as a speck and grows (a knife edge or a point facing down) is one.
    below = None
    for k, (z, geom, to_3d) in enumerate(layers):
        comps = np.array(getattr(geom, "geoms", [geom]), dtype=object) if not geom.is_empty else np.zeros(0, object)
        if below is None:
            below = geom
            continue
        area = shapely.area(comps)
        over = shapely.area(shapely.intersection(comps, below)) if len(comps) and not below.is_empty else area * 0
        held = over >= np.where(area >= speck, speck, 0.5 * np.minimum(area, pixel_mm**2))
        for i in np.flatnonzero(~held & (area >= speck) & (over >= 0.5 * pixel_mm**2)):
            near = shapely.intersection(below, comps[i].buffer(2 * layer_mm))  # held material nearby
            held[i] = shapely.area(shapely.difference(comps[i], near.buffer(layer_mm))) < speck
        island = ~held & (area >= speck)
        below = geom if (held | island).all() else shapely.union_all(comps[held | island])
        if len(comps):
            for comp in comps[island]:
                out["islands"] += 1
                if out["first_island"] is None:
                    c = comp.representative_point()
                    xyz = trimesh.transform_points([[c.x, c.y, 0.0]], to_3d)[0]
                    out["first_island"] = {
                        "layer": k,
                        "z_mm": z,
                        "xy_mm": [float(xyz[0]), float(xyz[1])],
                        "area_mm2": float(comp.area),
                    }
    if out["islands"]:
        failures.append("island")
    if part_volume_mm3 is not None and out["volume_mm3"] is not None and out["volume_mm3"] < 0.97 * part_volume_mm3:
        failures.append("lost-part-volume")
    out["failures"] = failures
    return out
