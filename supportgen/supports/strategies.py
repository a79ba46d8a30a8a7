"""Strategies: how contacts become a support plan, chosen by name.

``straight``
    Every contact gets its own vertical post.  The tip leaves the part straight
    down; the post drops to the base, or, where the way down meets the part,
    stops above it and stands on it with a landing tip (model-to-model).
``tree``
    Contacts routed around the part and merged into trunks
    (:func:`supportgen.supports.routing.plan_tree`); a contact with no way down that
    keeps the clearance from the part gets a straight post instead.

A strategy is a function ``(mesh, contacts, settings) -> SupportPlan``; add one
by writing such a function and registering it in :data:`STRATEGIES`.  Where the
part has protected faces the pipeline also passes ``avoid=``, a function of
(k, 3) landing points that is True where a post must not stand
(:meth:`supportgen.supports.protect.Guard.avoid`); both strategies honour it.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import trimesh

from ..constants import EPS_SMALL, OFFSET_MM
from ..errors import SettingsError
from ..io.winding import BallProbe
from ..settings import STRATEGY_NAMES, Settings
from .freespace import surface_below
from .geometry import LANDING_SINKS, deepest_sink, landing_holds
from .plan import Contacts, SupportPlan

__all__ = ["STRATEGIES", "get_strategy", "plan_straight", "join_plans"]


def plan_straight(
    mesh: trimesh.Trimesh,
    contacts: Contacts,
    settings: Settings,
    *,
    avoid: Callable[[np.ndarray], np.ndarray] | None = None,
    reroute: bool = True,
) -> SupportPlan:
    """One vertical post per contact.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The placed part.
    contacts : Contacts
    settings : Settings
        Uses ``tip_length_mm``, ``post_diameter_mm`` and ``base_thickness_mm``.
    avoid : callable, optional
        ``avoid(points) -> bool`` per landing point: True where no post may stand
        (a protected face).  Those contacts are routed around the part by the tree
        router (to the base or an allowed landing) when ``reroute``; otherwise, or
        where that finds no way, they are left out (unserved).
    reroute : bool

    Returns
    -------
    SupportPlan
        Nodes: for contact ``i``, node ``2i`` under the tip and node ``2i+1`` at the
        post's foot (on the base) or above its landing on the part (without
        ``avoid``; with refused landings the plan is a join of sub-plans).

    Notes
    -----
    One downward ray per contact: O(n log faces).
    """
    rules = settings.rules
    n = len(contacts)
    r_post = rules.post_diameter_mm / 2
    base_top = rules.base_thickness_mm
    tip_len = rules.tip_length_mm
    top = contacts.points.copy()
    # Node under each tip; a contact too close to the base gets a shorter tip.
    node_top = top - np.array([0.0, 0.0, tip_len])
    node_top[:, 2] = np.maximum(node_top[:, 2], base_top + OFFSET_MM)
    # The first surface under each contact (the ray starts just below it, off its own face).
    # Where the part lies closer below than a tip's length (a slot narrower than the tip), the
    # node goes halfway down the slot so the tip does not pass through the part below, and
    # the post lands right there: its landing tip hangs from the same node.
    hit_z, up = surface_below(mesh, top[:, :2], np.arange(n), top[:, 2] - OFFSET_MM)
    hit_z = np.nan_to_num(hit_z, nan=-np.inf)
    slot = up & (hit_z >= node_top[:, 2])
    node_top[slot, 2] = 0.5 * (top[slot, 2] + hit_z[slot])
    lands = hit_z > base_top
    # A landing on an edge or a sliver would leave its tip's end in mid-air: such a post
    # leans to the nearest spot below that holds its landing (or to the base).
    low_xy, hit_z = _holding_landings(mesh, settings, node_top, hit_z, lands)
    lands = hit_z > base_top
    if avoid is not None and lands.any():
        land_at = np.column_stack([low_xy, hit_z])
        refused = np.zeros(n, bool)
        refused[lands] = np.asarray(avoid(land_at[lands]), bool)
        if refused.any():
            return _without_refused(mesh, contacts, settings, refused, avoid, reroute)
    node_low = np.column_stack([low_xy, np.where(lands, hit_z + tip_len, base_top)])
    # A landing whose post would be shorter than nothing: hang the tip straight on the landing.
    node_low[:, 2] = np.minimum(node_low[:, 2], node_top[:, 2])
    nodes = np.empty((2 * n, 3))
    nodes[0::2], nodes[1::2] = node_top, node_low
    edges = np.column_stack([np.arange(0, 2 * n, 2), np.arange(1, 2 * n, 2)])
    long_enough = np.linalg.norm(node_top - node_low, axis=1) > EPS_SMALL
    edges = edges[long_enough]
    land_idx = np.flatnonzero(lands)
    land_pts = node_low[land_idx].copy()
    land_pts[:, 2] = hit_z[land_idx]
    tip_points = np.vstack([top, land_pts])
    tip_nodes = np.concatenate([np.arange(0, 2 * n, 2), 2 * land_idx + 1])
    tip_diam = np.concatenate([contacts.diameters, contacts.diameters[land_idx]])
    tip_contact = np.concatenate([np.arange(n), np.full(len(land_idx), -1)])
    return SupportPlan(
        strategy="straight",
        nodes=nodes,
        edges=edges,
        edge_radius=np.full(len(edges), r_post),
        tip_points=tip_points,
        tip_nodes=tip_nodes,
        tip_diameters=tip_diam,
        tip_contact=tip_contact,
        feet=2 * np.flatnonzero(~lands) + 1,
    )


#: Distances (mm) a straight post may lean by to find a landing that holds, tried in turn,
#: each in eight directions; at most the branch angle from vertical.
_LEAN_MM = (0.25, 0.5, 0.75, 1.0, 1.5)


def _holding_landings(mesh, settings: Settings, top: np.ndarray, hit_z: np.ndarray, lands: np.ndarray):
    """The lower end of each straight post: ``(xy, hit_z)``, leaning where the landing below does not hold.

    A post lands where the surface straight below its tip's node looks up, but a landing
    on an edge or on a sliver thinner than its sunk end leaves that end curing in mid-air
    (:func:`~supportgen.supports.geometry.landing_holds`, at the shallowest sink the solids
    use).  Such a post leans, within ``branch_angle_deg`` of vertical, to the nearest of
    :data:`_LEAN_MM` x 8 spots where the landing holds or the base is reached, the leaning
    segment clear of the part (one ray each); where none is, it stays as it was.
    """
    s = settings.rules
    xy, hit_z = top[:, :2].copy(), hit_z.copy()
    weak = np.flatnonzero(lands)
    if weak.size == 0:
        return xy, hit_z
    shallow = LANDING_SINKS[0] * deepest_sink(settings)  # the least a landing sinks (tip_reach)
    probe = BallProbe.of(mesh)
    ok = landing_holds(mesh, settings, np.column_stack([xy[weak], hit_z[weak]]), shallow, probe)
    weak = weak[~ok]
    if weak.size == 0:
        return xy, hit_z
    ang = np.linspace(0.0, 2 * np.pi, 8, endpoint=False)
    off = (np.asarray(_LEAN_MM)[:, None, None] * np.stack([np.cos(ang), np.sin(ang)], -1)[None]).reshape(-1, 2)
    k = len(off)
    cand = (xy[weak][:, None, :] + off[None]).reshape(-1, 2)
    z_top = np.repeat(top[weak, 2], k)
    h, up = surface_below(mesh, cand, np.arange(len(cand)), z_top - OFFSET_MM)
    h = np.nan_to_num(h, nan=-np.inf)
    base_top = s.base_thickness_mm
    on_base = h <= base_top
    low_z = np.minimum(np.where(on_base, base_top, h + s.tip_length_mm), z_top)
    lean = np.tile(np.hypot(*off.T), len(weak))
    good = (on_base | up) & (lean <= (z_top - low_z) * np.tan(np.radians(s.branch_angle_deg)))
    land = np.flatnonzero(good & ~on_base)
    if land.size:
        good[land] = landing_holds(mesh, settings, np.column_stack([cand[land], h[land]]), shallow, probe)
    idx = np.flatnonzero(good)
    if idx.size:
        start = np.repeat(top[weak], k, axis=0)[idx]
        end = np.column_stack([cand[idx], low_z[idx]])
        way = end - start
        length = np.linalg.norm(way, axis=1)
        locs, ray, _ = mesh.ray.intersects_location(start, way / length[:, None], multiple_hits=False)
        cut = np.zeros(len(idx), bool)
        cut[ray] = np.linalg.norm(locs - start[ray], axis=1) < length[ray]
        good[idx[cut]] = False
    choice = good.reshape(len(weak), k)
    found = choice.any(axis=1)
    first = np.argmax(choice, axis=1)
    pick = np.arange(len(weak)) * k + first
    xy[weak[found]] = cand[pick[found]]
    hit_z[weak[found]] = h[pick[found]]
    return xy, hit_z


def _without_refused(mesh, contacts, settings, refused, avoid, reroute) -> SupportPlan:
    """Straight posts for the contacts whose landing is allowed; the refused ones routed
    by the tree router (when ``reroute``) or left out."""
    ok = np.flatnonzero(~refused)
    plan = plan_straight(mesh, contacts.take(ok), settings)
    plan = join_plans("straight", _empty_plan("straight"), plan, ok)
    if reroute:
        from .routing import plan_tree  # imported on use: routing pulls in the free-space graph

        bad = np.flatnonzero(refused)
        plan = join_plans("straight", plan, plan_tree(mesh, contacts.take(bad), settings, avoid=avoid), bad)
    return plan


def _empty_plan(strategy: str) -> SupportPlan:
    return SupportPlan(
        strategy,
        np.zeros((0, 3)),
        np.zeros((0, 2), int),
        np.zeros(0),
        np.zeros((0, 3)),
        np.zeros(0, int),
        np.zeros(0),
        np.zeros(0, int),
        np.zeros(0, int),
    )


def join_plans(strategy: str, first: SupportPlan, second: SupportPlan, second_contacts: np.ndarray) -> SupportPlan:
    """One plan holding both: ``second``'s nodes renumbered after ``first``'s, and its
    tips' contact indices mapped through ``second_contacts`` (landings stay -1)."""
    off = len(first.nodes)
    tip_contact = np.where(second.tip_contact >= 0, second_contacts[np.maximum(second.tip_contact, 0)], -1)
    return SupportPlan(
        strategy=strategy,
        nodes=np.vstack([first.nodes, second.nodes]),
        edges=np.vstack([first.edges, second.edges + off]),
        edge_radius=np.concatenate([first.edge_radius, second.edge_radius]),
        tip_points=np.vstack([first.tip_points, second.tip_points]),
        tip_nodes=np.concatenate([first.tip_nodes, second.tip_nodes + off]),
        tip_diameters=np.concatenate([first.tip_diameters, second.tip_diameters]),
        tip_contact=np.concatenate([first.tip_contact, tip_contact]),
        feet=np.concatenate([first.feet, second.feet + off]),
        braces=np.vstack([first.braces, second.braces + off]),
    )


def _plan_tree(mesh, contacts, settings, *, avoid=None):
    """Tree routing; a contact with no clear way down for a branch gets a straight post
    (unless that post would stand on a face ``avoid`` refuses)."""
    from .routing import plan_tree  # imported on use: routing pulls in the free-space graph

    plan = plan_tree(mesh, contacts, settings, avoid=avoid)
    left = np.setdiff1d(np.arange(len(contacts)), plan.tip_contact[plan.tip_contact >= 0])
    if len(left) == 0:
        return plan
    straight = plan_straight(mesh, contacts.take(left), settings, avoid=avoid, reroute=False)
    return join_plans("tree", plan, straight, left)


#: Strategy name -> function (mesh, contacts, settings) -> SupportPlan.
STRATEGIES: dict[str, Callable[[trimesh.Trimesh, Contacts, Settings], SupportPlan]] = {
    "straight": plan_straight,
    "tree": _plan_tree,
}
assert tuple(sorted(STRATEGIES)) == STRATEGY_NAMES, "register every name of settings.STRATEGY_NAMES"


def get_strategy(name: str):
    """The strategy function registered under ``name``.

    Raises
    ------
    SettingsError
        ``name`` is not registered; the message lists the valid names.

    Examples
    --------
    >>> get_strategy("pillars")
    Traceback (most recent call last):
    ...
    supportgen.errors.SettingsError: unknown strategy 'pillars'; valid strategies: straight, tree
    """
    try:
        return STRATEGIES[name]
    except KeyError:
        raise SettingsError(f"unknown strategy '{name}'; valid strategies: {', '.join(STRATEGIES)}") from None
