"""Contacts: where support tips touch the part.

Overhang regions are covered by Poisson-disk samples (random sequential
addition: candidates drawn uniformly over the area, in random order, each kept
when no kept sample lies within its radius).  The radius is the contact
spacing on a horizontal face and grows to 1.5x at the critical angle, so flatter
surfaces are held more densely.  Every local minimum, every island and every
place a layer reaches too far gets a contact of its own.

Packing density: a maximal random sequential addition of discs of diameter
``r`` covers the fraction 0.547 of the plane at jamming (Feder, "Random
sequential adsorption", J. Theor. Biol. 87:237, 1980), i.e.
``0.547 / (pi r^2 / 4) = 0.6965 / r^2`` samples per unit area away from edges.
Samples crowd a little along a face's edges (no competitors beyond it): in
our runs a square face of side ``a`` got about ``0.6965 (a^2 + 4a r/4) / r^2``,
a measured, not published, edge term.  With a finite number of candidates
(100 per ``r^2`` here) the set stops 1-3 % short of jamming.
"""

from __future__ import annotations

import numpy as np
import trimesh
from scipy.spatial import cKDTree

from ..analysis.overhangs import Overhangs
from ..constants import EPS_REL
from ..errors import SizingError
from ..io.contactsfile import ContactRows, read_contacts
from ..io.winding import part_winding_number
from ..settings import Settings
from .plan import CONTACT_KINDS, Contacts

__all__ = [
    "RSA_DENSITY",
    "poisson_disk",
    "sample_overhangs",
    "contacts_at",
    "merge_contacts",
    "add_unheld",
    "expected_count",
    "densify_points",
    "extend_toward_loads",
    "contacts_from_rows",
    "RESTING_MM",
    "faces_air",
]

#: Samples per r^2 of a jammed random sequential addition (Feder 1980: coverage 0.547).
RSA_DENSITY = 0.547 / (np.pi / 4)

_CANDIDATES_PER_R2 = 100


def poisson_disk(points: np.ndarray, radius: np.ndarray) -> np.ndarray:
    """Indices of a Poisson-disk subset of ``points``, kept in the given order.

    Point ``i`` is kept when no kept point lies closer than ``radius[i]``.

    Parameters
    ----------
    points : (n, 3) float ndarray
        Candidates, already in the (random) order to try them.
    radius : (n,) float ndarray
        Exclusion radius of each candidate.

    Returns
    -------
    (k,) int ndarray

    Notes
    -----
    A hash grid with cells of the largest radius: O(n) expected.

    Examples
    --------
    >>> pts = np.array([[0, 0, 0], [0.5, 0, 0], [2, 0, 0]], float)
    >>> poisson_disk(pts, np.ones(3)).tolist()
    [0, 2]
    """
    points = np.asarray(points, float)
    radius = np.broadcast_to(np.asarray(radius, float), (len(points),))
    if len(points) == 0:
        return np.zeros(0, int)
    cell = float(radius.max())
    keys = np.floor(points / cell).astype(np.int64)
    grid: dict[tuple, list[int]] = {}
    kept = []
    offsets = [(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)]
    for idx in range(len(points)):
        kx, ky, kz = keys[idx]
        p, r2 = points[idx], radius[idx] ** 2
        ok = True
        for dx, dy, dz in offsets:
            for j in grid.get((kx + dx, ky + dy, kz + dz), ()):
                d = points[j] - p
                if d @ d < r2:
                    ok = False
                    break
            if not ok:
                break
        if ok:
            kept.append(idx)
            grid.setdefault((kx, ky, kz), []).append(idx)
    return np.asarray(kept, int)


#: How far below a down-facing surface point the part must be empty for the point to need a
#: tip (mm).  Shells that touch or nest (two bodies in one file, a doubled shell) leave
#: down-facing faces that rest on other material: an exact gap of zero, or a slit of a few
#: single-precision steps (1e-6 mm on a tilted face) that a union keeps.  A tip there would
#: have to grow through the part below, and its cone crossing the slit's two faces makes
#: vertices a file merges.  One micron: a hundred times the single-precision step of a
#: 100 mm part, fifty times below a layer (a gap a printer never resolves).
RESTING_MM = 1e-3


def faces_air(mesh: trimesh.Trimesh, points: np.ndarray, depth: float = RESTING_MM) -> np.ndarray:
    """Whether the part is empty ``depth`` straight below each surface point ``points`` (k, 3).

    Inside is a generalised winding number above 1/2 (libigl's fast winding number, Barill
    et al. 2018), so shells that overlap count once and a slit thinner than ``depth``
    between two shells counts as part.

    Examples
    --------
    >>> a = trimesh.creation.box((2, 2, 2))
    >>> b = trimesh.creation.box((2, 2, 2)); _ = b.apply_translation((1, 0, 2))  # on a's top, half over
    >>> two = trimesh.util.concatenate([a, b])
    >>> faces_air(two, np.array([[0.0, 0, 1], [1.5, 0, 1], [0, 0, -1]])).tolist()
    [False, True, True]
    """
    points = np.asarray(points, float).reshape(-1, 3)
    if len(points) == 0:
        return np.zeros(0, bool)
    below = points - [0.0, 0.0, depth]
    return part_winding_number(mesh, below) <= 0.5


def expected_count(area: float, spacing: float) -> float:
    """Samples expected on a flat region of ``area`` far larger than ``spacing^2``
    (jamming density of random sequential addition; edges add a few percent)."""
    return RSA_DENSITY * area / spacing**2


def sample_overhangs(
    mesh: trimesh.Trimesh, overhangs: Overhangs, spacing: float, angle_deg: float, diameter: float, seed: int = 0
) -> Contacts:
    """Poisson-disk contacts over the overhang faces.

    Parameters
    ----------
    mesh : trimesh.Trimesh
    overhangs : Overhangs
        From :func:`supportgen.analysis.overhangs.find_overhangs`.
    spacing : float
        Sample radius on a horizontal face (mm).
    angle_deg : float
        The critical angle; faces tilted ``t`` from horizontal use the radius
        ``spacing * (1 + 0.5 t / angle)``.
    diameter : float
        Initial tip diameter (mm).
    seed : int

    Returns
    -------
    Contacts
        kind ``"overhang"``.

    Notes
    -----
    O(A / spacing^2) candidates: cost scales with overhang area, not faces.
    """
    faces = overhangs.faces
    if len(faces) == 0:
        return Contacts.empty()
    rng = np.random.default_rng(seed)
    areas = mesh.area_faces[faces]
    total = float(areas.sum())
    n = max(int(np.ceil(_CANDIDATES_PER_R2 * total / spacing**2)), 1)
    # Floor each face's share so every face gets at least one candidate, then add by area.
    pick = rng.choice(len(faces), size=n, p=areas / total)
    pick = np.concatenate([np.arange(len(faces)), pick]) if len(faces) < n else pick
    tri = mesh.triangles[faces[pick]]
    u, v = rng.random((2, len(pick)))
    flip = u + v > 1
    u[flip], v[flip] = 1 - u[flip], 1 - v[flip]
    pts = tri[:, 0] + u[:, None] * (tri[:, 1] - tri[:, 0]) + v[:, None] * (tri[:, 2] - tri[:, 0])
    normals = mesh.face_normals[faces[pick]]
    # Down-facing faces that rest on another shell are no underside.
    air = faces_air(mesh, pts)
    pts, normals = pts[air], normals[air]
    if len(pts) == 0:
        return Contacts.empty()
    tilt = np.degrees(np.arccos(np.clip(-normals[:, 2], -1, 1)))
    radius = spacing * (1 + 0.5 * np.clip(tilt / max(angle_deg, EPS_REL), 0, 1))
    order = rng.permutation(len(pts))
    keep = order[poisson_disk(pts[order], radius[order])]
    keep.sort()
    return Contacts(pts[keep], normals[keep], np.full(len(keep), "overhang"), np.full(len(keep), diameter))


def contacts_at(mesh: trimesh.Trimesh, xyz: np.ndarray, kind: str, diameter: float, reach_mm: float = 0.0) -> Contacts:
    """Contacts on the part's surface straight above the given points.

    Each point ``(x, y, z)`` is moved to the first surface crossing of an
    upward ray from it (the underside a tip would reach).  A ray that meets no
    down-facing surface (a sliver thinner than the ray's aim) falls back to the
    nearest point of the surface, if that lies within ``reach_mm``; other
    points are dropped, and so are points that rest on another shell
    (:func:`faces_air`).

    Notes
    -----
    One ray query per point (trimesh's BVH ray intersector), one nearest-point
    query per miss.
    """
    xyz = np.asarray(xyz, float).reshape(-1, 3)
    if len(xyz) == 0:
        return Contacts.empty()
    dirs = np.tile([0.0, 0.0, 1.0], (len(xyz), 1))
    locs, ray_idx, tri_idx = mesh.ray.intersects_location(xyz, dirs, multiple_hits=True)
    pts = np.full((len(xyz), 3), np.nan)
    nrm = np.full((len(xyz), 3), np.nan)
    if len(locs):
        # First hit per ray: the lowest z above the origin.
        order = np.lexsort((locs[:, 2], ray_idx))
        ray_sorted = ray_idx[order]
        first = order[np.r_[True, ray_sorted[1:] != ray_sorted[:-1]]]
        pts[ray_idx[first]], nrm[ray_idx[first]] = locs[first], mesh.face_normals[tri_idx[first]]
    hit = nrm[:, 2] < 0
    miss = np.flatnonzero(~hit)
    if reach_mm > 0 and len(miss):
        near, dist, tri = trimesh.proximity.closest_point(mesh, xyz[miss])
        ok = dist <= reach_mm
        pts[miss[ok]], nrm[miss[ok]] = near[ok], mesh.face_normals[tri[ok]]
        hit[miss[ok]] = True
    hit[hit] = faces_air(mesh, pts[hit])  # an underside resting on another shell needs no tip
    n = int(hit.sum())
    return Contacts(pts[hit], nrm[hit], np.full(n, kind), np.full(n, diameter))


def merge_contacts(existing: Contacts, new: Contacts, min_distance: float) -> Contacts:
    """``existing`` plus those of ``new`` farther than ``min_distance`` from every contact kept so far.

    Examples
    --------
    >>> a = Contacts([[0, 0, 0]], [[0, 0, -1]], ["overhang"], [0.4])
    >>> b = Contacts([[0.1, 0, 0], [5, 0, 0]], [[0, 0, -1]] * 2, ["minimum"] * 2, [0.4] * 2)
    >>> len(merge_contacts(a, b, 1.0))
    2
    """
    both = Contacts.concat([existing, new])
    if len(new) == 0 or min_distance <= 0:
        return both
    keep = poisson_disk(both.points, np.full(len(both), min_distance))
    keep = np.union1d(keep, np.arange(len(existing)))  # never drop an existing contact
    keep.sort()
    return both.take(keep)


def add_unheld(existing: Contacts, new: Contacts, radius_mm: float, rise_mm: float) -> Contacts:
    """``existing`` plus each contact of ``new`` that no contact kept so far already holds.

    A contact at ``q`` holds a point ``p`` that must be held (an island's first
    layer, a local minimum) when its tip covers it: ``q`` lies within
    ``radius_mm`` of ``p`` across, no more than ``rise_mm`` above it (a tip
    higher up touches the part only after ``p``'s layer has cured in mid-air) and no
    more than twice ``rise_mm`` below it (a tip lower down ends on other material:
    ``p`` is the lowest point of what must be held, so nothing of it lies lower).
    Unlike :func:`merge_contacts`, a contact nearby but higher, lower or off to the
    side does not count.

    Parameters
    ----------
    existing, new : Contacts
    radius_mm : float
        Reach of a tip across (half the smallest tip diameter plus a pixel is safe).
    rise_mm : float
        How far above ``p`` a holding tip may touch (a layer height).

    Examples
    --------
    >>> a = Contacts([[0, 0, 1.0]], [[0, 0, -1]], ["overhang"], [0.4])
    >>> b = Contacts([[0.1, 0, 0.5], [0.05, 0, 1.0]], [[0, 0, -1]] * 2, ["island"] * 2, [0.4] * 2)
    >>> add_unheld(a, b, 0.2, 0.05).points.tolist()      # the lower point is not held by the tip above it
    [[0.0, 0.0, 1.0], [0.1, 0.0, 0.5]]
    >>> c = Contacts([[0, 0, 3.0]], [[0, 0, -1]], ["island"], [0.4])
    >>> len(add_unheld(a, c, 0.2, 0.05))                 # nor a point high above by a tip on a lower surface
    2
    """
    kept = existing
    for i in range(len(new)):
        p = new.points[i]
        across = np.hypot(*(kept.points[:, :2] - p[:2]).T) if len(kept) else np.zeros(0)
        dz = kept.points[:, 2] - p[2]
        if not np.any((across <= radius_mm) & (dz <= rise_mm) & (dz >= -2 * rise_mm)):
            kept = Contacts.concat([kept, new.take([i])])
    return kept


def densify_points(
    contacts: Contacts, over, mesh: trimesh.Trimesh, settings: Settings, radius_mm: float | None = None, count: int = 6
) -> Contacts:
    """Add contacts in a ring around each over-capacity contact, on down-facing surface.

    Parameters
    ----------
    contacts : Contacts
    over : (n,) bool ndarray
        Contacts whose tip cannot hold its load at ``tip_max_mm``
        (:func:`supportgen.supports.sizing.over_capacity` of ``contacts.loads``).
    mesh : trimesh.Trimesh
        The part in build coordinates.
    settings : Settings
    radius_mm : float, optional
        Ring radius; default half of ``contact_spacing_mm``.
    count : int
        Points per ring.

    Returns
    -------
    Contacts
        The given contacts unchanged, then the new ones (kind ``"densify"``,
        diameter ``tip_diameter_mm``, no load yet).  Candidates are projected onto
        the surface (closest point), kept only on faces whose normal points down,
        and dropped within half the ring radius of any contact; when nothing is
        added the input comes back, which ends the caller's densify loop.

    Notes
    -----
    O(k log F) for k = count * (contacts over capacity) candidates on F faces.
    """
    over = np.asarray(over, dtype=bool)
    if over.shape != (len(contacts),):
        raise SizingError(f"over has shape {over.shape}, expected ({len(contacts)},); pass one flag per contact")
    idx = np.flatnonzero(over)
    if idx.size == 0:
        return contacts
    r = 0.5 * settings.rules.contact_spacing_mm if radius_mm is None else float(radius_mm)
    n = contacts.normals[idx]
    helper = np.where(np.abs(n[:, :1]) < 0.9, [[1.0, 0.0, 0.0]], [[0.0, 1.0, 0.0]])
    u = np.cross(n, helper)
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    w = np.cross(n, u)
    phase = 2.0 * np.pi * np.arange(count) / count
    ring = contacts.points[idx, None, :] + r * (
        np.cos(phase)[None, :, None] * u[:, None, :] + np.sin(phase)[None, :, None] * w[:, None, :]
    )
    closest, _, tri = trimesh.proximity.closest_point(mesh, ring.reshape(-1, 3))
    normals = mesh.face_normals[tri]
    keep = np.flatnonzero(normals[:, 2] < 0.0)
    return _add_apart(contacts, mesh, closest[keep], normals[keep], 0.5 * r, settings)


def extend_toward_loads(
    contacts: Contacts,
    over,
    toward_xy,
    below_z,
    mesh: trimesh.Trimesh,
    settings: Settings,
    spread=None,
    max_steps: int = 8,
) -> Contacts:
    """Add contacts under the load that over-capacity contacts carry: on the way to its centre, and around it.

    The part is a rigid body on its supports (:mod:`supportgen.physics.loadpath`):
    when the pull on a component is centred far outside the patch of contacts that
    hold it, moment balance makes the contacts at the patch's edge carry many times
    the pull itself, and contacts added beside them (:func:`densify_points`) barely
    shorten the lever.  Contacts under the load shorten it.  And where a wide section
    is held by a small patch (a part standing on a point, its sides too steep to need
    contacts of their own), the rings around the patch fill up before the load is
    shared: contacts under the rest of the section share it.

    Parameters
    ----------
    contacts : Contacts
    over : (m,) bool ndarray, m <= len(contacts)
        The first ``m`` contacts' tips are over capacity.
    toward_xy : (m, 2) float ndarray
        Centre of the pull that gave each of them its peak load (mm); NaN: none
        (:attr:`~supportgen.physics.loadpath.ForceProfile.contact_peak_xy`).
    below_z : (m,) float ndarray
        Height (mm) of the layer of that peak: a new contact must touch the part
        no higher, or it would attach only after the peak.
    mesh : trimesh.Trimesh
        The part in build coordinates.
    settings : Settings
        ``contact_spacing_mm``: only a centre farther than it counts as a lever; points
        are taken about that far apart along the way, at most ``max_steps`` per contact.
    spread : (m,) float ndarray, optional
        RMS radius (mm) of each such pull
        (:attr:`~supportgen.physics.loadpath.ForceProfile.contact_peak_spread`); where it
        is wider than the spacing, the centre and rings at half and all of it (6 and 12
        points) are tried too.

    Returns
    -------
    Contacts
        ``contacts`` then the new ones (kind ``"densify"``): at each point of the way
        the highest down-facing crossing of an upward ray that lies at or below
        ``below_z`` (the underside of the material at that layer), kept when no contact
        lies within a quarter of the spacing (the gap :func:`densify_points` keeps).

    Notes
    -----
    One batched ray query (trimesh's BVH intersector) for all points of the way.

    Examples
    --------
    A 20 x 4 mm slab 2 mm thick at z 5 held at its left end and pulled at its middle:

    >>> import trimesh
    >>> from supportgen import Settings
    >>> slab = trimesh.creation.box((20.0, 4.0, 2.0)).apply_translation((0.0, 0.0, 6.0))
    >>> held = Contacts([[-9.5, 0.0, 5.0]], [[0, 0, -1]], ["overhang"], [0.4])
    >>> out = extend_toward_loads(held, [True], [[0.0, 0.0]], [6.5], slab, Settings())
    >>> bool(len(out) > 1 and (out.points[1:, 2] == 5.0).all() and out.points[1:, 0].max() == 0.0)
    True

    A 20 x 20 mm slab held at its middle, its pull spread 5 mm about it: rings of 6 and 12
    contacts under it (its centre is taken already).

    >>> wide = trimesh.creation.box((20.0, 20.0, 2.0)).apply_translation((0.0, 0.0, 6.0))
    >>> mid = Contacts([[0.0, 0.0, 5.0]], [[0, 0, -1]], ["minimum"], [0.4])
    >>> len(extend_toward_loads(mid, [True], [[0.0, 0.0]], [6.5], wide, Settings(), spread=[5.0])) - 1
    18
    """
    over = np.asarray(over, dtype=bool)
    toward = np.asarray(toward_xy, float).reshape(-1, 2)
    below = np.asarray(below_z, float).reshape(-1)
    if not (over.shape[0] == toward.shape[0] == below.shape[0] <= len(contacts)):
        raise SizingError(
            f"over, toward_xy and below_z have {over.shape[0]}, {toward.shape[0]} and {below.shape[0]} rows for "
            f"{len(contacts)} contacts; pass one row per contact checked"
        )
    spacing = settings.rules.contact_spacing_mm
    start = contacts.points[: len(over), :2]
    way = toward - start
    dist = np.hypot(way[:, 0], way[:, 1])
    lever = np.flatnonzero(over & np.isfinite(dist) & (dist > spacing))
    steps = np.minimum(np.ceil(dist[lever] / spacing).astype(int), max_steps)
    owner = [np.repeat(lever, steps)]
    frac = np.concatenate([np.arange(1, k + 1) / k for k in steps] + [np.zeros(0)])
    xy = [start[owner[0]] + frac[:, None] * way[owner[0]]]
    if spread is not None:
        spread = np.asarray(spread, float).reshape(-1)
        wide = np.flatnonzero(over & np.isfinite(dist) & (np.nan_to_num(spread) > spacing))
        # one set of points per distinct load (many tips share a component's pull)
        _, first = np.unique(np.round(np.column_stack([toward[wide], below[wide]]), 6), axis=0, return_index=True)
        wide = wide[np.sort(first)]
        ring = np.vstack([[0.0, 0.0]] + [_circle(k, f) for k, f in ((6, 0.5), (12, 1.0))])
        owner.append(np.repeat(wide, len(ring)))
        xy.append((toward[wide, None, :] + spread[wide, None, None] * ring[None]).reshape(-1, 2))
    owner, xy = np.concatenate(owner), np.vstack(xy)
    if len(xy) == 0:
        return contacts
    origins = np.column_stack([xy, np.full(len(xy), mesh.bounds[0, 2] - 1.0)])
    dirs = np.tile([0.0, 0.0, 1.0], (len(xy), 1))
    locs, ray, tri = mesh.ray.intersects_location(origins, dirs, multiple_hits=True)
    down = mesh.face_normals[tri, 2] < 0.0
    ok = down & (locs[:, 2] <= below[owner[ray]] + EPS_REL)
    best = np.full(len(xy), -1)
    for h in np.flatnonzero(ok):  # the highest underside at or below the peak layer, per ray
        if best[ray[h]] < 0 or locs[h, 2] > locs[best[ray[h]], 2]:
            best[ray[h]] = h
    hits = best[best >= 0]
    if hits.size == 0:
        return contacts
    return _add_apart(contacts, mesh, locs[hits], mesh.face_normals[tri[hits]], 0.25 * spacing, settings)


def _add_apart(contacts: Contacts, mesh: trimesh.Trimesh, points, normals, gap: float, settings: Settings) -> Contacts:
    """``contacts`` then each candidate (in order, kind ``"densify"``) that faces air (:func:`faces_air`)
    and lies at least ``gap`` from every contact and every candidate kept before it;
    ``contacts`` itself when none is."""
    air = faces_air(mesh, points)
    points, normals = np.asarray(points, float)[air], np.asarray(normals, float)[air]
    tree, taken = cKDTree(contacts.points), []
    for i, p in enumerate(points):
        if tree.query(p)[0] >= gap and all(np.linalg.norm(p - points[j]) >= gap for j in taken):
            taken.append(i)
    if not taken:
        return contacts
    k = len(taken)
    new = Contacts(points[taken], normals[taken], np.full(k, "densify"), np.full(k, settings.rules.tip_diameter_mm))
    return Contacts.concat([contacts, new])


def _circle(count: int, radius: float) -> np.ndarray:
    """``count`` points evenly on a circle of ``radius`` about the origin, (count, 2)."""
    a = 2.0 * np.pi * np.arange(count) / count
    return radius * np.column_stack([np.cos(a), np.sin(a)])


def contacts_from_rows(rows, mesh: trimesh.Trimesh, offset, settings: Settings) -> tuple[Contacts, int]:
    """Contacts from a contacts file (a path or :class:`~supportgen.io.contactsfile.ContactRows`,
    input coordinates) on the placed part ``mesh`` (input moved by ``offset``).

    Returns the contacts, locked rows first (in file order, points and given normals
    exact), then the unlocked rows moved to the nearest point of the surface, and the
    number of locked rows.  Kinds not in :data:`CONTACT_KINDS` (or blank) become
    ``"manual"``; diameters start at ``tip_diameter_mm`` (tips are sized from loads later).

    Examples
    --------
    >>> from supportgen.io.contactsfile import parse_contacts
    >>> rows = parse_contacts("id,x_mm,y_mm,z_mm,locked\\n,0.5,0.5,-1.2,0\\n")
    >>> c, k = contacts_from_rows(rows, trimesh.creation.box((2, 2, 2)), [0, 0, 0], Settings())
    >>> c.points.round(6).tolist(), c.kinds.tolist(), k
    ([[0.5, 0.5, -1.0]], ['manual'], 0)
    """
    if not isinstance(rows, ContactRows):
        rows = read_contacts(rows)
    order = np.r_[np.flatnonzero(rows.locked), np.flatnonzero(~rows.locked)]
    pts = rows.points[order] + np.asarray(offset, float)
    normals = rows.normals[order].copy()
    locked = rows.locked[order]
    need = ~locked | ~np.isfinite(normals).all(axis=1)
    if need.any():
        near, _, tri = trimesh.proximity.closest_point(mesh, pts[need])
        moved = ~locked[need]
        sel = np.flatnonzero(need)
        pts[sel[moved]] = near[moved]
        normals[sel] = np.asarray(mesh.face_normals)[tri]
    kinds = np.array([k if k in CONTACT_KINDS else "manual" for k in rows.kinds[order]], "<U8")
    n = len(pts)
    return Contacts(pts, normals, kinds, np.full(n, settings.rules.tip_diameter_mm)), int(locked.sum())
