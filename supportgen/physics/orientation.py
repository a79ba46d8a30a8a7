"""Orientation: choose how a part stands on the plate from the physics of printing it.

Every candidate is an *up-direction* ``d`` in the part's own frame: the part is
turned by the shortest rotation that takes ``d`` to build +z (away from the
plate; :func:`rotation_to_up`).  Candidates are spread evenly over the whole
sphere by a Fibonacci lattice (:func:`fibonacci_sphere`), the given orientation
(``d = +z``) is always one of them, and the best few are refined in a cap of
one lattice spacing around each.  Each candidate is scored on terms in
physical units (:data:`TERMS`):

``peak_force_n``
    the largest layer separation force, from the project's law
    (:func:`supportgen.physics.separation.separation` on a :class:`LayerShape`);
``near_peak_layers``
    layers whose force is at least ``orient_near_fraction`` of that peak;
``cup_area_mm2``
    the largest sealed cavity of a layer facing the film (a suction cup: empty
    pixels enclosed in the layer and closed below, as in
    :func:`supportgen.physics.pressure.sealed_cavities`);
``overhang_area_mm2``, ``minima``
    down-facing area tilted less than the critical angle from horizontal, and
    strict local minima of height (each needs a contact), the rules of
    :mod:`supportgen.analysis.overhangs`;
``support_volume_mm3``
    the volume under the overhang faces down to the plate (projected area times
    height above the plate, including the elevation), the support-volume measure
    of Ezair, Massarwi and Elber, "Orientation analysis of 3D objects toward
    minimal support volume in 3D-printing", Computers & Graphics 51 (2015),
    without their occlusion step (so it errs high where the part shades itself);
``height_mm``
    print height, so layers and time;
``protected_mm2``
    with a protect mask (the faces that must carry no tip,
    :mod:`supportgen.supports.protect`): the area of protected faces that would
    face down steeper than the overhang angle (they would need tips), plus one
    tip's scar ``pi tip_diameter_mm^2 / 4`` for each strict local minimum on a
    protected face; 0 everywhere without a mask;
``tip_load_n``
    the worst tip load the plan would need at the layers near the peak force
    (:func:`tip_loads`): the contactable surface (overhang faces below the
    layer, strict local minima and the lowest point) is a group of tips at the
    rule's contact spacing, and each near-peak layer's force, acting at its
    area centroid, is shared among them by the elastic bolt-group method
    (:func:`bolt_group_loads`).  A stance whose tips all cluster under one
    point while the peak layer lies far off carries the layer's moment on a
    short lever, so its worst tip takes many times the layer's force.

The total is ``sum_i w_i t_i / median(t_i)`` over the first, even set of
candidates (so the weights are unitless and a term's scale does not matter);
the weights and their reasoning are in :class:`supportgen.settings.OrientRules`.
A candidate whose worst tip load exceeds what the largest tip holds at the
safety factor (:func:`allowed_tip_load`, the rule of
:func:`supportgen.supports.sizing.over_capacity`) is *infeasible*: while the
``tip_load_n`` weight is above 0 every infeasible candidate scores worse than
every feasible one (:func:`weighted_totals`).
The Pareto-optimal candidates (no other is at least as good in every weighted
term and better in one) are listed so that a user can pick another.

Layer grid and its error
------------------------
The layer terms slice the turned part on a coarse grid: pixel and layer both
``pixel_mm`` (:func:`scoring_pixel`: ``orient_pixel_mm``, raised so the grid
over the part's bounding sphere stays under :data:`MAX_CELLS`).  A pixel is
cured when its centre is inside (the rasteriser of
:mod:`supportgen.analysis.raster`), so every layer's outline is within half a
pixel of the true section: its area is within ``perimeter * pixel_mm / 2`` of
the exact section at the sampled height (:func:`area_error_bound`), and the
sampled height is within half a layer of any given plane.  The force of each
component uses Saint-Venant's estimate of the torsion constant,
``J ~ A^4 / (4 pi^2 I_p)`` (exact for an ellipse, +8 % for a square, -6 % for a
thin strip; S. P. Timoshenko and J. N. Goodier, Theory of Elasticity, 3rd ed.,
1970, torsion chapter), and the :data:`EXACT_LAYERS` layers with the largest
estimated force are solved exactly on the coarse grid
(:func:`supportgen.physics.pressure.solve_components`, 2 % bound), so the peak
is the exact coarse value unless the estimate misranks layers by more than its
own error.  Since ``J`` grows as ``A^2`` for a fixed shape, the peak force is
within about twice the relative area bound plus 2 %.

Examples
--------
>>> d = fibonacci_sphere(500)
>>> d.shape, bool(np.allclose(np.linalg.norm(d, axis=1), 1.0))
((500, 3), True)
>>> r = rotation_to_up(np.array([1.0, 0.0, 0.0]))
>>> (r @ [1.0, 0.0, 0.0]).round(12).tolist()
[0.0, 0.0, 1.0]
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sparse
import trimesh
from scipy import ndimage

from ..analysis.layers import Grid
from ..analysis.raster import layer_count, ray_crossings
from ..constants import EPS_REL, EPS_SMALL, EPS_ZERO
from ..errors import MeshError, SettingsError
from ..settings import ORIENT_CHOICES
from .pressure import solve_components
from .separation import READS_LABELS, LayerShape, separation

__all__ = [
    "ORIENT_CHOICES",
    "apply_orientation",
    "check_orientation_choice",
    "TERMS",
    "WEIGHTS",
    "MAX_CELLS",
    "EXACT_LAYERS",
    "Orientation",
    "LayerProfile",
    "fibonacci_sphere",
    "rotation_to_up",
    "rotation_from_angles",
    "scoring_pixel",
    "area_error_bound",
    "surface_terms",
    "bolt_group_loads",
    "allowed_tip_load",
    "tip_loads",
    "minima_pairs",
    "weighted_totals",
    "layer_profile",
    "score_directions",
    "pareto_front",
    "orient",
    "turn",
]

#: Score terms, in physical units, and the weight setting of each.
TERMS = (
    "peak_force_n",
    "near_peak_layers",
    "cup_area_mm2",
    "overhang_area_mm2",
    "minima",
    "support_volume_mm3",
    "height_mm",
    "protected_mm2",
    "tip_load_n",
)
WEIGHTS = {
    "peak_force_n": "weight_force",
    "near_peak_layers": "weight_near_peak",
    "cup_area_mm2": "weight_cup",
    "overhang_area_mm2": "weight_overhang",
    "minima": "weight_minima",
    "support_volume_mm3": "weight_volume",
    "height_mm": "weight_height",
    "protected_mm2": "weight_protect",
    "tip_load_n": "weight_tip_load",
}
#: Cells (layers x rows x columns over the part's bounding sphere) the scoring grid may have:
#: a few million keeps one candidate to tens of milliseconds (benchmarks/bench_orient.py).
MAX_CELLS = 1_500_000
#: Layers per candidate whose torsion constant is solved exactly (the rest use the estimate).
EXACT_LAYERS = 2
#: Best candidates of the even set refined, and directions tried in the cap around each.
REFINE_BEST, REFINE_EACH = 3, 30
#: Smallest scale of a term, as a fraction of its largest value over the candidates (see :func:`orient`).
SCALE_FLOOR = 1e-3
_DIR_CHUNK = 16  # directions per vectorised block of the surface terms
#: Layers per candidate whose force is shared among the tips (:func:`tip_loads`): the largest-force
#: layers among those within ``orient_near_fraction`` of the peak.
NEAR_LOADS = 3
#: Tips per unit area of a random sequential addition at jamming, times spacing^2 (Feder, "Random
#: sequential adsorption", J. Theor. Biol. 87:237, 1980: coverage 0.547 of discs of diameter r); the
#: density :mod:`supportgen.supports.contacts` samples overhangs at (physics may not import supports).
RSA_DENSITY = 0.547 / (np.pi / 4.0)
#: Tips in the ring the plan adds around a tip over capacity, at half the contact spacing
#: (:func:`supportgen.supports.contacts.densify_points`): a local minimum is held by that patch.
DENSIFY_RING = 6


def fibonacci_sphere(n: int) -> np.ndarray:
    """``n`` unit vectors spread evenly over the sphere (Fibonacci lattice), (n, 3).

    Point ``i`` has ``z = 1 - (2 i + 1) / n`` and longitude ``i`` times the golden
    angle ``pi (3 - sqrt 5)``: equal areas in z, so even on the sphere (Archimedes).
    """
    if n < 1:
        raise SettingsError(f"orientation: {n} directions asked for; ask for at least 1")
    i = np.arange(n) + 0.5
    z = 1.0 - 2.0 * i / n
    r = np.sqrt(np.clip(1.0 - z * z, 0.0, None))
    phi = i * np.pi * (3.0 - np.sqrt(5.0))
    return np.column_stack([r * np.cos(phi), r * np.sin(phi), z])


def rotation_to_up(d) -> np.ndarray:
    """The shortest rotation (3, 3) taking unit vector ``d`` to +z (Rodrigues); half a turn about x for -z."""
    d = np.asarray(d, float)
    d = d / max(float(np.linalg.norm(d)), EPS_ZERO)
    c = float(d[2])
    if c < -1.0 + EPS_ZERO:
        return np.diag([1.0, -1.0, -1.0])
    v = np.array([d[1], -d[0], 0.0])  # d x z
    vx = np.array([[0.0, -v[2], v[1]], [v[2], 0.0, -v[0]], [-v[1], v[0], 0.0]])
    return np.eye(3) + vx + vx @ vx / (1.0 + c)


def rotation_from_angles(rx: float, ry: float, rz: float) -> np.ndarray:
    """Rotation (3, 3) turning a part by ``rx``, then ``ry``, then ``rz`` degrees about the fixed x, y, z axes.

    >>> rotation_from_angles(90, 0, 0).round(12) @ [0, 0, 1]
    array([ 0., -1.,  0.])
    """
    a = np.radians([rx, ry, rz])
    c, s = np.cos(a), np.sin(a)
    x = np.array([[1, 0, 0], [0, c[0], -s[0]], [0, s[0], c[0]]])
    y = np.array([[c[1], 0, s[1]], [0, 1, 0], [-s[1], 0, c[1]]])
    z = np.array([[c[2], -s[2], 0], [s[2], c[2], 0], [0, 0, 1]])
    return z @ y @ x


def turn(mesh: trimesh.Trimesh, rotation) -> trimesh.Trimesh:
    """A copy of ``mesh`` turned by ``rotation`` (3, 3) about the origin."""
    t = np.eye(4)
    t[:3, :3] = np.asarray(rotation, float)
    out = mesh.copy()
    out.apply_transform(t)
    return out


def scoring_pixel(mesh: trimesh.Trimesh, settings) -> float:
    """Pixel (and layer) of the scoring grid: ``orient_pixel_mm``, raised so a cube around the
    part's bounding sphere has at most :data:`MAX_CELLS` cells."""
    diag = float(np.linalg.norm(mesh.extents))
    return max(settings.orient.orient_pixel_mm, diag / MAX_CELLS ** (1.0 / 3.0))


def area_error_bound(perimeter_mm: float, pixel_mm: float) -> float:
    """Largest difference (mm^2) between a layer's pixel area and its exact section: the outline
    is within half a pixel, so at most ``perimeter * pixel / 2``."""
    return perimeter_mm * pixel_mm / 2.0


def _check_mesh(mesh) -> None:
    if not isinstance(mesh, trimesh.Trimesh) or len(mesh.faces) == 0:
        raise MeshError("orientation: the mesh has no faces; load a closed triangle mesh first")


def surface_terms(
    mesh: trimesh.Trimesh, dirs: np.ndarray, settings, protect=None, minima=None
) -> dict[str, np.ndarray]:
    """Height, overhang area, strict local minima, support volume and protected area facing down
    for many up-directions at once.

    Vectorised over blocks of directions: O(F K) for F faces and K directions.
    Overhang faces are those with ``-n . d > cos(overhang_angle_deg)`` (the rule
    of :func:`supportgen.analysis.overhangs.overhang_faces`); every face counts,
    since the part stands ``elevation_mm`` above the plate on its supports.
    ``protect`` is a bool mask over the faces (None: no protected face); a
    local minimum is protected when any face at it is.  ``minima``: the pairs of
    :func:`minima_pairs` for ``dirs``, when already found.
    """
    vt = np.ascontiguousarray(np.asarray(mesh.vertices, float).T)
    nt = np.ascontiguousarray(np.asarray(mesh.face_normals, float).T)
    a = np.asarray(mesh.area_faces, float)
    ct = np.ascontiguousarray(np.asarray(mesh.triangles_center, float).T)
    cos_a = np.cos(np.radians(settings.rules.overhang_angle_deg))
    elev = settings.rules.elevation_mm
    mk, mv = minima_pairs(mesh, dirs) if minima is None else minima
    keys = ("height_mm", "overhang_area_mm2", "minima", "support_volume_mm3", "protected_mm2")
    out = {k: np.zeros(len(dirs)) for k in keys}
    guarded = _protect_mask(mesh, protect)
    a_guarded = np.where(guarded, a, 0.0)
    v_guarded = np.zeros(len(mesh.vertices), bool)
    v_guarded[np.asarray(mesh.faces)[guarded].ravel()] = True
    out["minima"] = np.bincount(mk, minlength=len(dirs)).astype(float)
    scar = np.pi * settings.rules.tip_diameter_mm**2 / 4.0
    for lo in range(0, len(dirs), _DIR_CHUNK):
        d = np.asarray(dirs[lo : lo + _DIR_CHUNK], float)  # (k, 3): rows are directions
        sl = slice(lo, lo + len(d))
        h = d @ vt
        hmin = h.min(axis=1)
        out["height_mm"][sl] = h.max(axis=1) - hmin
        down = -(d @ nt)
        over = down > cos_a
        out["overhang_area_mm2"][sl] = over @ a
        lift = d @ ct - hmin[:, None] + elev
        out["support_volume_mm3"][sl] = np.where(over, down * lift, 0.0) @ a
        if guarded.any():
            out["protected_mm2"][sl] = over @ a_guarded
    if guarded.any():
        out["protected_mm2"] += scar * np.bincount(mk[v_guarded[mv]], minlength=len(dirs))
    return out


def minima_pairs(mesh: trimesh.Trimesh, dirs) -> tuple[np.ndarray, np.ndarray]:
    """Strict local minima of height along each up-direction: (direction index, vertex index) pairs.

    A vertex is a strict minimum when every edge from it rises by more than
    ``EPS_SMALL`` (the rule of :mod:`supportgen.analysis.overhangs`).  Vectorised over
    blocks of directions, O(E K) for E edges and K directions.
    """
    dirs = np.atleast_2d(np.asarray(dirs, float))
    vt = np.asarray(mesh.vertices, float).T
    e = np.asarray(mesh.edges_unique)
    src = np.concatenate([e[:, 0], e[:, 1]])
    dst = np.concatenate([e[:, 1], e[:, 0]])
    order = np.argsort(src, kind="stable")
    src, dst = src[order], dst[order]
    starts = np.flatnonzero(np.r_[True, src[1:] != src[:-1]])
    edge_t = np.ascontiguousarray(vt[:, dst] - vt[:, src])
    ks, vs = [], []
    for lo in range(0, len(dirs), _DIR_CHUNK):
        rise = np.minimum.reduceat(dirs[lo : lo + _DIR_CHUNK] @ edge_t, starts, axis=1)
        k, g = np.nonzero(rise > EPS_SMALL)
        ks.append(k + lo)
        vs.append(src[starts][g])
    return np.concatenate(ks).astype(np.int64), np.concatenate(vs).astype(np.int64)


def _protect_mask(mesh, protect) -> np.ndarray:
    """``protect`` as a bool mask over the faces of ``mesh`` (all False when None)."""
    n = len(mesh.faces)
    if protect is None:
        return np.zeros(n, bool)
    mask = np.asarray(protect, bool).reshape(-1)
    if mask.shape != (n,):
        raise SettingsError(
            f"orientation: the protect mask has {mask.size} values for {n} faces; give one bool per face"
        )
    return mask


def bolt_group_loads(xy, force, at) -> np.ndarray:
    """Tension in each of equal tips at ``xy`` (n, 2) holding a rigid part under a force ``force``
    normal to the plate acting at ``at`` (2,): the elastic bolt-group method.

    ``P_i = F / n + F (a - g)^T S^-1 (r_i - g)``, with ``g`` the group's centroid and
    ``S = sum_j (r_j - g)(r_j - g)^T`` its second-moment tensor: the direct share plus
    the moment ``F (a - g)`` resisted in proportion to each tip's distance from the
    centroid (equal stiffness, a rigid part).  About the group's principal axes it is
    the textbook ``F/n + M_x y_i / sum y_j^2 + M_y x_i / sum x_j^2`` for a fastener group
    under tension and moment (Budynas and Nisbett, Shigley's Mechanical Engineering
    Design, 10th ed., 2015, bolted joints: eccentric and prying loads on bolt groups;
    the in-plane ``F/n + M r_i / sum r_j^2`` of a group in shear is its twin for a
    load in the plane).  Tips in a line cannot resist the moment about that line
    (``S`` singular): the pseudo-inverse drops it.

    >>> bolt_group_loads([[-1, -1], [1, -1], [1, 1], [-1, 1]], 4.0, [0.5, 0.0]).round(6).tolist()
    [0.5, 1.5, 1.5, 0.5]
    """
    r = np.asarray(xy, float).reshape(-1, 2)
    g = r.mean(axis=0)
    d = r - g
    u = np.linalg.pinv(d.T @ d) @ (np.asarray(at, float) - g)
    return float(force) * (1.0 / len(r) + d @ u)


def allowed_tip_load(settings) -> float:
    """Largest load (N) one tip may take: a tip of ``tip_max_mm`` at the green tensile strength,
    ``sigma pi d^2 / 4``, over the safety factor.

    The formula of :func:`supportgen.supports.sizing.tip_capacity` and the rule of
    :func:`supportgen.supports.sizing.over_capacity` (a tip is over capacity when it
    would need more than ``tip_max_mm`` at ``safety_factor`` times its load),
    written out here because ``physics`` may not import ``supports``.
    """
    d = settings.rules.tip_max_mm
    return settings.resin.green_tensile_mpa * np.pi * d * d / 4.0 / settings.rules.safety_factor


def tip_loads(mesh: trimesh.Trimesh, dirs, z_mm, force_n, centroid_xy, settings, minima=None) -> np.ndarray:
    """Worst tip load (N) of each up-direction's estimated plan under its near-peak layers.

    Parameters
    ----------
    mesh : trimesh.Trimesh
    dirs : (K, 3) up-directions.
    z_mm, force_n : (K, J)
        Height above the turned part's lowest point and separation force of J layers each.
    centroid_xy : (K, J, 2)
        Where each layer's force acts (its area centroid), in the frame of
        :func:`rotation_to_up` of the direction (as :func:`layer_profile` gives it).
    settings : Settings
    minima : tuple of two int arrays, optional
        :func:`minima_pairs` of ``dirs``, when already found.

    Returns
    -------
    (K,) ndarray
        The largest tip load over the J layers.

    Notes
    -----
    The tips that can hold a layer are those on the contactable surface below it:
    every overhang face (``-n . d > cos(overhang_angle_deg)``) whose centre lies
    below the layer, carrying tips at the jamming density of random sequential
    addition, :data:`RSA_DENSITY` per ``r^2``, with ``r`` the contact spacing grown to
    1.5x at the critical angle (the rule of :mod:`supportgen.supports.contacts`);
    and each strict local minimum below the layer, and the lowest point, held by
    the patch the plan grows there once a tip is over capacity: the tip and a ring
    of :data:`DENSIFY_RING` at half the spacing.  The tips are spread evenly over
    the faces projected to the plate, so the group's count, centroid and second
    moment are sums over faces of exact triangle moments (a triangle's second
    moment about its centroid is ``A/12 sum_i (v_i - c)(v_i - c)^T``), found by
    (K, F) x (F, 9) products; the layer's force is shared by
    :func:`bolt_group_loads` in that continuous form, and the worst tip is at the
    group's extreme point in the direction ``S^-1 (a - g)`` (a vertex below the
    layer of a face carrying tips, or a ring's edge).  Not modelled: contacts the plan adds where a layer reaches too
    far, and which 3-D component a tip holds (every tip below a layer holds it).
    Cost O(K (F + V) J).
    """
    dirs = np.atleast_2d(np.asarray(dirs, float))
    # Blocks of nearby directions share most of their down-facing faces: visit them in bands.
    all_k, all_v = minima_pairs(dirs=dirs, mesh=mesh) if minima is None else minima
    visit = _banded_order(dirs)
    rank = np.empty_like(visit)
    rank[visit] = np.arange(len(visit))
    all_k = rank[all_k]  # direction indices in visiting order
    dirs = dirs[visit]
    z_mm, force_n = np.atleast_2d(z_mm)[visit], np.atleast_2d(force_n)[visit]
    centroid_xy = np.asarray(centroid_xy, float).reshape(len(visit), -1, 2)[visit]
    rules = settings.rules
    verts = np.asarray(mesh.vertices, float)
    origin = verts.mean(axis=0)
    v = verts - origin
    vt = np.ascontiguousarray(v.T)
    faces = np.asarray(mesh.faces)
    tri = v[faces]  # (F, 3, 3)
    c = tri.mean(axis=1)
    ct = np.ascontiguousarray(c.T)
    nt = np.ascontiguousarray(np.asarray(mesh.face_normals, float).T)
    a = np.asarray(mesh.area_faces, float)
    dev = tri - c[:, None, :]
    # Per face, per unit weight: first moment c and second moment about the origin,
    # (1/12) sum (v_i - c)(v_i - c)^T + c c^T; per vertex: v and v v^T. One product gives all.
    t_face = np.hstack([c, (np.einsum("fia,fib->fab", dev, dev) / 12.0 + c[:, :, None] * c[:, None, :]).reshape(-1, 9)])
    t_vert = np.hstack([v, (v[:, :, None] * v[:, None, :]).reshape(-1, 9)])
    # Which faces touch each vertex: a (V, F) incidence, to find the vertices of the faces carrying tips.
    nf = len(faces)
    touch = sparse.csr_matrix((np.ones(3 * nf), (faces.ravel(), np.repeat(np.arange(nf), 3))), shape=(len(v), nf))
    cos_a = np.cos(np.radians(rules.overhang_angle_deg))
    s = rules.contact_spacing_mm
    ring_r = 0.5 * s
    patch_n = 1.0 + DENSIFY_RING
    patch_m2 = DENSIFY_RING * ring_r**2 / 2.0  # a ring's second moment about any axis through its centre
    out = np.zeros(len(dirs))
    for lo in range(0, len(dirs), _DIR_CHUNK):
        d = dirs[lo : lo + _DIR_CHUNK]
        k = len(d)
        rows = np.arange(k)
        proj = np.stack([rotation_to_up(x)[:2] for x in d])  # (k, 2, 3): plate axes of each turned frame
        hv = d @ vt
        hmin = hv.min(axis=1, keepdims=True)
        hv -= hmin
        # Only the faces that face down in some direction of the block can carry tips.
        down = -(d @ nt)
        over_all = down > cos_a
        in_u = over_all.any(axis=0)
        over = over_all[:, in_u]
        hf = d @ ct[:, in_u] - hmin
        tilt = np.degrees(np.arccos(np.clip(down[:, in_u][over], -1.0, 1.0)))
        spacing = s * (1.0 + 0.5 * np.clip(tilt / max(rules.overhang_angle_deg, EPS_ZERO), 0.0, 1.0))
        w0 = np.zeros(over.shape)
        w0[over] = RSA_DENSITY * np.broadcast_to(a[in_u], over.shape)[over] / spacing**2
        t_u = t_face[in_u]
        # Vertices of the faces carrying tips (a tip may sit there once it is below the layer).
        on_v = (touch @ np.ascontiguousarray(over_all.T, dtype=float)).T > 0  # (k, V)
        v_on = np.flatnonzero(on_v.any(axis=0))
        h_on = np.where(on_v[:, v_on], hv[:, v_on], np.inf)
        pv_on = np.einsum("kij,jv->kiv", proj, vt[:, v_on])  # plate coordinates of those vertices
        # Strict local minima, and the lowest point, as (direction, vertex) pairs.
        pick = (all_k >= lo) & (all_k < lo + k)
        mk, mv = np.r_[all_k[pick] - lo, rows], np.r_[all_v[pick], np.argmin(hv, axis=1)]
        mk, mv = np.unique(np.column_stack([mk, mv]), axis=0).T
        m_h = hv[mk, mv]
        m_t = t_vert[mv]
        m_xy = np.einsum("pij,pj->pi", proj[mk], v[mv])
        shift = proj @ origin  # (k, 2): the layer centroids are in the turned frame of the mesh as given
        worst = np.zeros(k)
        for j in range(z_mm.shape[1]):
            zj = z_mm[lo : lo + k, j]
            w = np.where(hf < zj[:, None], w0, 0.0)
            held = m_h < zj[mk]
            nm = np.bincount(mk[held], minlength=k).astype(float)
            n = w.sum(axis=1) + patch_n * nm
            mom = w @ t_u
            np.add.at(mom, mk[held], patch_n * m_t[held])
            m1 = np.einsum("kij,kj->ki", proj, mom[:, :3])
            m2 = np.einsum("kia,kab,kjb->kij", proj, mom[:, 3:].reshape(k, 3, 3), proj)
            m2 += (patch_m2 * nm)[:, None, None] * np.eye(2)
            g = m1 / n[:, None]
            sm = m2 - n[:, None, None] * g[:, :, None] * g[:, None, :]
            ecc = centroid_xy[lo : lo + k, j] - shift - g
            u = np.einsum("kij,kj->ki", np.linalg.pinv(sm, rcond=EPS_SMALL), ecc)
            reach = np.full(k, -np.inf)
            if len(v_on):
                reach = np.where(h_on < zj[:, None], np.einsum("ki,kiv->kv", u, pv_on), -np.inf).max(axis=1)
            at_min = np.where(held, (u[mk] * m_xy).sum(axis=1) + ring_r * np.linalg.norm(u[mk], axis=1), -np.inf)
            np.maximum.at(reach, mk, at_min)
            lever = np.maximum(reach - (u * g).sum(axis=1), 0.0)
            f = force_n[lo : lo + k, j]
            worst = np.maximum(worst, f / n + f * lever)
        out[visit[lo : lo + k]] = worst
    return out


def _banded_order(dirs: np.ndarray) -> np.ndarray:
    """An order of unit vectors in which blocks of :data:`_DIR_CHUNK` lie close together: bands of
    equal z width holding about two blocks each, walked in alternating longitude."""
    bands = max(int(np.sqrt(2.0 * len(dirs) / _DIR_CHUNK)), 1)
    band = np.minimum(((1.0 - dirs[:, 2]) / 2.0 * bands).astype(int), bands - 1)
    lon = np.arctan2(dirs[:, 1], dirs[:, 0])
    return np.lexsort((np.where(band % 2 == 1, lon, -lon), band))


@dataclass(frozen=True)
class LayerProfile:
    """Per-layer figures of one candidate on the scoring grid (arrays of length L)."""

    pixel_mm: float
    z_mm: np.ndarray
    area_mm2: np.ndarray
    sealed_mm2: np.ndarray
    force_n: np.ndarray
    exact: np.ndarray  # layers whose force used the solved torsion constant
    centroid_xy: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))  # (L, 2) of the suction area

    @property
    def peak_force_n(self) -> float:
        return float(self.force_n.max(initial=0.0))


class _Posed:
    """Vertices and faces, all that the rasteriser reads of a mesh."""

    def __init__(self, vertices, faces):
        self.vertices, self.faces = vertices, faces


_IN_LAYER_4 = np.zeros((3, 3, 3), bool)
_IN_LAYER_4[1] = ndimage.generate_binary_structure(2, 1)
_IN_LAYER_8 = np.zeros((3, 3, 3), bool)
_IN_LAYER_8[1] = True


def _occupancy(vertices, faces, pixel_mm):
    """Cured cells (L, ny, nx) of a turned part, plate at its lowest point; and the grid."""
    vz = vertices.copy()
    vz[:, 2] -= vz[:, 2].min()
    lo, hi = vz.min(axis=0), vz.max(axis=0)
    grid = Grid.covering(np.array([lo, hi]), pixel_mm)
    nl = max(layer_count(float(hi[2]), pixel_mm), 1)
    # Triangles whose x/y box holds no pixel centre cross no ray: leave them out
    # (the same box test as the rasteriser; most of a fine mesh on a coarse grid).
    u = (vz[:, 0] - grid.x0) / grid.pixel_mm
    w = (vz[:, 1] - grid.y0) / grid.pixel_mm
    hit = np.ones(len(faces), bool)
    for c in (u, w):
        c0, c1, c2 = c[faces[:, 0]], c[faces[:, 1]], c[faces[:, 2]]
        hit &= np.ceil(np.minimum(np.minimum(c0, c1), c2)) <= np.floor(np.maximum(np.maximum(c0, c1), c2))
    idx, z, sg = ray_crossings(_Posed(vz, faces[hit]), grid)
    k = np.clip(np.floor(z / pixel_mm - 0.5).astype(np.int64) + 1, 0, nl)
    npx = grid.ny * grid.nx
    wind = np.bincount(k * npx + idx, weights=sg, minlength=(nl + 1) * npx)[: nl * npx]
    occ = np.cumsum(wind.reshape(nl, grid.ny, grid.nx), axis=0) > 0.5
    return occ, grid


def _sealed(occ: np.ndarray) -> np.ndarray:
    """Sealed cavities of every layer: the rule of :func:`supportgen.physics.pressure.sealed_cavities`
    (4-connected holes not reaching the border nor an empty vented pixel of the layer below)."""
    lab, n = ndimage.label(~occ, _IN_LAYER_4)
    outside = np.zeros(n + 1, bool)
    outside[0] = True
    for edge in (lab[:, 0], lab[:, -1], lab[:, :, 0], lab[:, :, -1]):
        outside[edge] = True
    sealed = np.zeros_like(occ)
    if outside.all():
        return sealed
    holes = ~outside[lab]
    for k in np.flatnonzero(holes.any(axis=(1, 2))):
        if k == 0:
            continue  # nothing below the first layer: vented
        vent_below = ~occ[k - 1] & ~sealed[k - 1]
        hk = holes[k]
        vented = outside.copy()
        vented[lab[k][hk & vent_below]] = True
        sealed[k] = ~vented[lab[k]]
    return sealed


def _layer_forces(suction, pixel_mm, settings):
    """Force per layer (estimate), components' labels, the first label of each layer, and the law."""
    lab, n = ndimage.label(suction, _IN_LAYER_8)
    nl = suction.shape[0]
    law = separation(settings.printer.mechanism)
    force = np.zeros(nl)
    if n == 0:
        return force, lab, np.zeros(nl + 1, np.int64), law
    kk, rr, cc = np.nonzero(lab)
    li = lab[kk, rr, cc] - 1
    cnt = np.bincount(li, minlength=n).astype(float)
    sr, sc = np.bincount(li, rr, n), np.bincount(li, cc, n)
    srr, scc = np.bincount(li, rr.astype(float) ** 2, n), np.bincount(li, cc.astype(float) ** 2, n)
    p2 = pixel_mm * pixel_mm
    ip = p2 * p2 * ((srr - sr * sr / cnt) + (scc - sc * sc / cnt) + cnt / 6.0)
    area = cnt * p2
    j_est = area**4 / (4.0 * np.pi**2 * ip)
    comp_layer = np.zeros(n, np.int64)
    comp_layer[li] = kk
    first = np.searchsorted(comp_layer, np.arange(nl + 1))  # labels run in scan order, layer by layer
    if settings.printer.mechanism in READS_LABELS:
        for k in np.flatnonzero(first[1:] > first[:-1]):
            a, b = first[k], first[k + 1]
            sub = np.where(lab[k] > 0, lab[k] - a, 0)
            force[k] = law(LayerShape(sub, pixel_mm, area[a:b], j_est[a:b]), settings).sum()
    else:
        f = law(LayerShape(np.zeros((0, 0), np.int32), pixel_mm, area, j_est), settings)
        force = np.bincount(comp_layer, f, nl)
    return force, lab, first, law


def layer_profile(mesh, rotation, pixel_mm: float, settings) -> LayerProfile:
    """Area, sealed-cavity area and separation force of every layer of ``mesh`` turned by ``rotation``.

    Layer ``k`` is sampled at ``(k + 1/2) pixel_mm`` above the turned part's
    lowest point, on pixels of ``pixel_mm``; errors as in the module notes.
    The :data:`EXACT_LAYERS` layers of largest estimated force are solved by
    :func:`supportgen.physics.pressure.solve_components`.
    """
    _check_mesh(mesh)
    v = (np.asarray(rotation, float) @ np.asarray(mesh.vertices, float).T).T
    occ, grid = _occupancy(v, np.asarray(mesh.faces), pixel_mm)
    sealed = _sealed(occ)
    p2 = pixel_mm * pixel_mm
    suction = occ | sealed
    force, lab, first, law = _layer_forces(suction, pixel_mm, settings)
    cnt = np.maximum(suction.sum(axis=(1, 2)), 1)
    cx = suction.sum(axis=1) @ (grid.x0 + np.arange(grid.nx) * pixel_mm) / cnt
    cy = suction.sum(axis=2) @ (grid.y0 + np.arange(grid.ny) * pixel_mm) / cnt
    exact = np.zeros(len(force), bool)
    for k in np.argsort(force)[::-1][:EXACT_LAYERS]:
        a, b = first[k], first[k + 1]
        if b <= a:
            continue
        sub = np.where(lab[k] > 0, lab[k] - a, 0).astype(np.int32)
        solved = solve_components(sub, range(1, b - a + 1), pixel_mm)
        jj = np.array([solved[i][0] for i in range(1, b - a + 1)])
        aa = np.array([solved[i][1] for i in range(1, b - a + 1)])
        force[k] = law(LayerShape(sub, pixel_mm, aa, jj), settings).sum()
        exact[k] = True
    nl = occ.shape[0]
    return LayerProfile(
        pixel_mm,
        (np.arange(nl) + 0.5) * pixel_mm,
        occ.sum(axis=(1, 2)) * p2,
        sealed.sum(axis=(1, 2)) * p2,
        force,
        exact,
        np.column_stack([cx, cy]),
    )


def score_directions(
    mesh: trimesh.Trimesh, dirs: np.ndarray, settings, pixel_mm: float | None = None, protect=None
) -> dict[str, np.ndarray]:
    """Every term of :data:`TERMS` for each up-direction of ``dirs`` (K, 3), in physical units;
    ``protect``: bool mask over the faces that must carry no tip (see :func:`surface_terms`)."""
    _check_mesh(mesh)
    dirs = np.atleast_2d(np.asarray(dirs, float))
    pixel_mm = scoring_pixel(mesh, settings) if pixel_mm is None else pixel_mm
    minima = minima_pairs(mesh, dirs)
    out = surface_terms(mesh, dirs, settings, protect, minima)
    frac = settings.orient.orient_near_fraction
    for key in ("peak_force_n", "near_peak_layers", "cup_area_mm2", "peak_area_mm2"):
        out[key] = np.zeros(len(dirs))
    near_z, near_f = np.zeros((len(dirs), NEAR_LOADS)), np.zeros((len(dirs), NEAR_LOADS))
    near_c = np.zeros((len(dirs), NEAR_LOADS, 2))
    for i, d in enumerate(dirs):
        prof = layer_profile(mesh, rotation_to_up(d), pixel_mm, settings)
        peak = prof.peak_force_n
        out["peak_force_n"][i] = peak
        out["near_peak_layers"][i] = np.count_nonzero(prof.force_n >= frac * peak) if peak > 0 else 0
        out["cup_area_mm2"][i] = prof.sealed_mm2.max(initial=0.0)
        out["peak_area_mm2"][i] = prof.area_mm2.max(initial=0.0)
        if len(prof.force_n):
            top = np.argsort(prof.force_n)[::-1][:NEAR_LOADS]
            top = top[prof.force_n[top] >= frac * peak]  # the peak itself always passes
            top = np.resize(top, NEAR_LOADS)
            near_z[i], near_f[i], near_c[i] = prof.z_mm[top], prof.force_n[top], prof.centroid_xy[top]
    out["tip_load_n"] = tip_loads(mesh, dirs, near_z, near_f, near_c, settings, minima)
    return out


def pareto_front(values: np.ndarray) -> np.ndarray:
    """Indices of the rows of ``values`` (n, m) that no other row dominates (lower is better).

    >>> pareto_front(np.array([[1, 2], [2, 1], [2, 2], [1, 2]])).tolist()
    [0, 1, 3]
    """
    v = np.asarray(values, float)
    le = (v[:, None, :] <= v[None, :, :]).all(axis=2)  # le[j, i]: row j at least as good as row i
    lt = (v[:, None, :] < v[None, :, :]).any(axis=2)
    dominated = (le & lt).any(axis=0)
    return np.flatnonzero(~dominated)


@dataclass(frozen=True)
class Orientation:
    """Every scored candidate and the one chosen.

    ``directions`` (n, 3) are up-directions in the input frame, ``rotations`` (n, 3, 3)
    turn the input so that direction points away from the plate; ``terms`` maps each
    name of :data:`TERMS` (and ``peak_area_mm2``) to (n,) values; ``total`` is the
    weighted score (lower is better); ``keep`` is the given orientation's index.
    """

    directions: np.ndarray
    rotations: np.ndarray
    terms: dict
    total: np.ndarray
    chosen: int
    keep: int
    pareto: np.ndarray
    refined: np.ndarray
    pixel_mm: float
    weights: dict
    scales: dict = field(default_factory=dict)
    allowed_tip_load_n: float = float("inf")

    @property
    def feasible(self) -> np.ndarray:
        """Candidates whose estimated worst tip load is within :func:`allowed_tip_load`."""
        return self.terms["tip_load_n"] <= self.allowed_tip_load_n * (1.0 + EPS_REL)

    @property
    def rotation(self) -> np.ndarray:
        return self.rotations[self.chosen]

    def candidate(self, i: int) -> dict:
        """One candidate as plain values."""
        return {
            "index": int(i),
            "direction": [round(float(x), 6) for x in self.directions[i]],
            "rotation": [[round(float(x), 9) for x in row] for row in self.rotations[i]],
            "refined": bool(self.refined[i]),
            "terms": {k: float(self.terms[k][i]) for k in (*TERMS, "peak_area_mm2")},
            "tips_hold": bool(self.feasible[i]),
            "total": float(self.total[i]),
        }

    def to_dict(self) -> dict:
        return {
            "chosen": self.candidate(self.chosen),
            "given": self.candidate(self.keep),
            "pareto": [int(i) for i in self.pareto],
            "weights": dict(self.weights),
            "scales": {k: float(v) for k, v in self.scales.items()},
            "allowed_tip_load_n": float(self.allowed_tip_load_n),
            "grid": {
                "pixel_mm": self.pixel_mm,
                "layer_mm": self.pixel_mm,
                "error": "each layer's outline within half a pixel of the exact section (area within "
                "perimeter x pixel / 2); force within about twice that, relative, plus 2 %",
            },
            "candidates": [self.candidate(i) for i in range(len(self.total))],
        }


def weighted_totals(terms, weights, scales, allowed_n: float) -> np.ndarray:
    """``sum_k w_k t_k / scale_k`` over :data:`TERMS`, with the feasibility penalty: while the
    ``tip_load_n`` weight is above 0 and some candidates' worst tip load is within ``allowed_n``
    (:func:`allowed_tip_load`), every other candidate is raised by the spread of the totals plus 1,
    so it scores worse than every feasible one (and keeps its order among the infeasible)."""
    total = sum(weights[k] * np.asarray(terms[k], float) / scales[k] for k in TERMS)
    over = np.asarray(terms["tip_load_n"]) > allowed_n * (1.0 + EPS_REL)
    if weights["tip_load_n"] > 0 and over.any() and not over.all():
        total = total + np.where(over, total[~over].max() - total[over].min() + 1.0, 0.0)
    return total


def orient(
    mesh: trimesh.Trimesh,
    settings=None,
    *,
    n_directions: int | None = None,
    pixel_mm: float | None = None,
    protect=None,
) -> Orientation:
    """Score up-directions over the whole sphere and choose the best (lowest weighted total).

    Parameters
    ----------
    mesh : trimesh.Trimesh
        A closed part, in any position and orientation.
    settings : Settings, optional
        Uses the printer, resin and rules (force law, overhang angle, elevation) and
        the ``[orient]`` group (directions, scoring pixel, weights).
    n_directions : int, optional
        Directions of the even set (default ``orient_directions``).
    pixel_mm : float, optional
        Scoring pixel (default :func:`scoring_pixel`).
    protect : bool array, optional
        Mask over the faces of ``mesh`` that must carry no tip
        (:func:`supportgen.supports.protect.protect_mask`): scored as ``protected_mm2``.

    Returns
    -------
    Orientation

    Notes
    -----
    The even set (plus the given orientation) is scored, the :data:`REFINE_BEST`
    best are refined by :data:`REFINE_EACH` directions each within one lattice
    spacing ``sqrt(4 pi / n)``, and the terms of every candidate are divided by
    their medians over the even set (the protected area over the overhang area's
    median: scars on protected faces against the scars a typical direction makes
    anywhere; its own median is 0 whenever the protected faces are a small part).  Cost O(K (F + cells)) for K candidates.
    """
    from ..settings import Settings

    settings = Settings() if settings is None else settings
    _check_mesh(mesh)
    o = settings.orient
    n = o.orient_directions if n_directions is None else int(n_directions)
    pixel_mm = scoring_pixel(mesh, settings) if pixel_mm is None else float(pixel_mm)
    dirs = np.vstack([[0.0, 0.0, 1.0], fibonacci_sphere(n)])
    terms = score_directions(mesh, dirs, settings, pixel_mm, protect)
    weights = {k: float(getattr(o, WEIGHTS[k])) for k in TERMS}
    # A term zero for most directions (minima of a convex part) is scaled by a thousandth of its largest value.
    scales = {k: max(float(np.median(terms[k])), float(np.abs(terms[k]).max()) * SCALE_FLOOR, EPS_SMALL) for k in TERMS}
    # A cup is measured against a layer's area: most directions have none, so its own median would be 0.
    scales["cup_area_mm2"] = max(float(np.median(terms["peak_area_mm2"])), EPS_SMALL)
    # Protected area facing down is measured against the overhang area: most directions turn none of it down.
    scales["protected_mm2"] = scales["overhang_area_mm2"]
    allowed = allowed_tip_load(settings)
    total = weighted_totals(terms, weights, scales, allowed)
    best = np.argsort(total)[:REFINE_BEST]
    spacing = np.sqrt(4.0 * np.pi / n)
    rng = np.random.default_rng(settings.rules.seed)
    extra = []
    for b in best:
        r = rotation_to_up(dirs[b]).T  # takes +z to dirs[b]
        t = spacing * np.sqrt(rng.random(REFINE_EACH))
        ph = rng.random(REFINE_EACH) * 2 * np.pi
        local = np.column_stack([np.sin(t) * np.cos(ph), np.sin(t) * np.sin(ph), np.cos(t)])
        extra.append(local @ r.T)
    extra = np.vstack(extra)
    more = score_directions(mesh, extra, settings, pixel_mm, protect)
    dirs = np.vstack([dirs, extra])
    terms = {k: np.concatenate([terms[k], more[k]]) for k in terms}
    total = weighted_totals(terms, weights, scales, allowed)
    refined = np.r_[np.zeros(n + 1, bool), np.ones(len(extra), bool)]
    active = [k for k in TERMS if weights[k] > 0]
    pareto = pareto_front(np.column_stack([terms[k] for k in active]))
    rotations = np.stack([rotation_to_up(d) for d in dirs])
    return Orientation(
        dirs, rotations, terms, total, int(np.argmin(total)), 0, pareto, refined, pixel_mm, weights, scales, allowed
    )


#: ``generate(orient=...)``: keep the given orientation, or choose one from the physics.


def check_orientation_choice(how: str, rotate) -> list[float] | None:
    """Refuse an unknown ``how`` or a ``rotate`` that is not three finite angles; the angles as floats."""
    if how not in ORIENT_CHOICES:
        raise SettingsError(f"orient={how!r}: choose one of {', '.join(ORIENT_CHOICES)}")
    if rotate is None:
        return None
    angles = np.asarray(rotate, float).ravel()
    if angles.shape != (3,) or not np.isfinite(angles).all():
        raise SettingsError(f"rotate={rotate!r}: give three finite angles in degrees, about x, y and z")
    return [float(a) for a in angles]


def apply_orientation(mesh: trimesh.Trimesh, how: str, rotate, settings, protect=None) -> tuple[trimesh.Trimesh, dict]:
    """``mesh`` turned by ``rotate`` (degrees about x, y, z) and, for ``how="auto"``, to the
    up-direction :func:`orient` chooses (scoring ``protect``, a bool mask over the faces);
    and the report's record ``{rotation, chosen_by}``.

    The mesh is returned as given (the same object) when nothing turns it.
    """
    angles = check_orientation_choice(how, rotate)
    rot, by = np.eye(3), "given"
    if angles is not None:
        rot, by = rotation_from_angles(*angles), "rotate"
    if how == "auto":
        found = orient(turn(mesh, rot), settings, protect=protect)
        rot, by = found.rotation @ rot, ("rotate+auto" if by == "rotate" else "auto")
    turned = turn(mesh, rot) if by != "given" else mesh
    return turned, {"rotation": [[float(x) for x in row] for row in rot], "chosen_by": by}
