"""The scar budget of a run: where tips touch the part, protected regions first.

:func:`protection_section` counts the contacts (and landings) whose tip disc
reaches each protected region (must be 0) and those on the rest of the part,
with their total tip area; :func:`add_protection` puts it in the report as
``protection`` with warnings; :func:`plot_underside` draws the part seen from
below (x mirrored, as a person looking up at it sees it) with the protected
faces shaded and every contact marked; :func:`contacts_csv` is the text of
``NAME.contacts.csv``.

A tip of diameter ``d`` at a point scars the part within ``d / 2`` of it, so it
counts for a protected region when that region's surface is closer than ``d / 2``
(trimesh's exact closest point).
"""

from __future__ import annotations

import numpy as np
import trimesh

from ..io.contactsfile import format_contacts
from ..supports.plan import Contacts, SupportPlan
from ..supports.protect import Guard, Holder
from .plots import new_figure, png_bytes

__all__ = ["protection_section", "add_protection", "plot_underside", "contacts_csv", "TrackedHolder"]


class TrackedHolder(Holder):
    """A :class:`~supportgen.supports.protect.Holder` that also keeps where moved contacts went
    (build coordinates), so the report can mark them: the points of each relocation's result that
    were not among its input contacts (a moved contact that was merged into another is not kept)."""

    def __init__(self, guard: Guard, settings):
        super().__init__(guard, settings)
        self.moved_points = np.zeros((0, 3))

    def __call__(self, contacts: Contacts, start: int = 0) -> Contacts:
        out = super().__call__(contacts, start)
        if not np.array_equal(out.points, contacts.points):
            before = {tuple(p) for p in np.asarray(contacts.points, float).tolist()}
            new = [p for p in np.asarray(out.points, float).tolist() if tuple(p) not in before]
            if new:
                self.moved_points = np.vstack([self.moved_points, np.array(new, float)])
        return out


def _moved_still_there(holder, contacts: Contacts) -> np.ndarray:
    """The moved points of ``holder`` (a :class:`TrackedHolder`) that are contacts of the final plan."""
    pts = getattr(holder, "moved_points", None)
    if pts is None or not len(pts):
        return np.zeros((0, 3))
    final = {tuple(p) for p in np.asarray(contacts.points, float).tolist()}
    return np.array([p for p in pts.tolist() if tuple(p) in final], float).reshape(-1, 3)


def _tip_diameters(contacts: Contacts, plan: SupportPlan) -> np.ndarray:
    """Largest tip diameter serving each contact (its own diameter where no tip serves it)."""
    d = np.array(contacts.diameters, float)
    served = plan.tip_contact >= 0
    best = np.zeros(len(contacts))
    np.maximum.at(best, plan.tip_contact[served], plan.tip_diameters[served])
    return np.where(best > 0, best, d)


def _split(guard: Guard, points: np.ndarray, diam: np.ndarray):
    dist, region = guard.nearest(points)
    on = dist < diam / 2
    return on, np.where(on, region, -1)


def protection_section(
    guard: Guard,
    holder: Holder | None,
    contacts: Contacts,
    plan: SupportPlan,
    file_info: dict | None = None,
    landings_avoided: int | None = None,
) -> dict:
    """The ``protection`` section (see the module notes); coordinates are input coordinates.

    ``landings_avoided`` is how many posts the same contacts, planned without the
    keep-off, would stand on protected faces (None when nothing is protected)."""
    diam = _tip_diameters(contacts, plan)
    area = np.pi * diam**2 / 4
    on, region = _split(guard, contacts.points, diam)
    land = plan.tip_contact < 0
    l_on, l_region = _split(guard, plan.tip_points[land], plan.tip_diameters[land])
    part, surf = guard.part, guard.surface
    regions = []
    for r in range(guard.n_regions):
        faces = np.flatnonzero(guard.surface_region == r)
        fa = np.asarray(surf.area_faces)[faces]
        centre = (np.asarray(surf.triangles_center)[faces] * fa[:, None]).sum(0) / max(fa.sum(), 1e-300) - guard.offset
        regions.append(
            {
                "region": r,
                "faces": int(len(faces)),
                "area_mm2": float(fa.sum()),
                "centre_mm": [round(float(v), 3) for v in centre],
                "contacts": int(np.count_nonzero(region == r)),
                "tip_area_mm2": float(area[region == r].sum()),
                "landings": int(np.count_nonzero(l_region == r)),
            }
        )
    return {
        "selectors": list(guard.described),
        "protected_faces": int(guard.faces.sum()),
        "protected_area_mm2": float(np.asarray(part.area_faces)[guard.faces].sum()),
        "protected_surface_mm2": float(surf.area) if guard.active else 0.0,
        "keep_off_mm": guard.keep_off_mm,
        "regions": regions,
        "rest": {
            "contacts": int(np.count_nonzero(~on)),
            "tip_area_mm2": float(area[~on].sum()),
            "landings": int(np.count_nonzero(~l_on)),
        },
        "contacts_on_protected": int(np.count_nonzero(on)),
        "landings_on_protected": int(np.count_nonzero(l_on)),
        "landings_avoided": landings_avoided,
        "contacts_moved": holder.moved if holder else 0,
        "contacts_merged_after_moving": holder.merged if holder else 0,
        # Where the moved contacts now sit (input coordinates), when the holder kept them.
        "moved_to_mm": [[round(float(v), 3) for v in p - guard.offset] for p in _moved_still_there(holder, contacts)],
        "unholdable": list(holder.unholdable) if holder else [],
        "contacts_file": file_info,
        "notes": list(guard.notes),
    }


def add_protection(report: dict, section: dict, name: str) -> dict:
    """A new report with ``protection`` and its warnings added."""
    warnings = list(report.get("warnings") or [])
    if section["contacts_on_protected"] or section["landings_on_protected"]:
        warnings.append(
            {
                "code": "protected-scar",
                "message": (
                    f"{name}: {section['contacts_on_protected']} contact(s) and {section['landings_on_protected']} "
                    "landing(s) touch a protected surface (locked rows of the contacts file); unlock or move them"
                ),
            }
        )
    for note in section.get("notes") or []:
        warnings.append({"code": "protect-not-carried", "message": note})
    for u in section["unholdable"]:
        warnings.append({"code": "protected-unholdable", "message": f"{name}: {u['message']}"})
    info = section.get("contacts_file")
    if info and info.get("added_by_check"):
        warnings.append(
            {
                "code": "contacts-added",
                "message": (
                    f"{name}: the check needed {info['added_by_check']} contact(s) that {info['path']} does not have; "
                    "they were added (see NAME.contacts.csv)"
                ),
            }
        )
    return {**report, "protection": section, "warnings": warnings}


_PROTECTED_RGB = (0.8, 0.475, 0.655)  # #cc79a7, as on the report page


def plot_underside(
    part: trimesh.Trimesh, protected: np.ndarray | None, contacts: Contacts, plan: SupportPlan, title: str
) -> bytes:
    """PNG bytes: the part seen from below (x mirrored), protected faces shaded reddish purple
    (the report page's colour, #cc79a7 of Okabe and Ito's colour-blind-safe palette),
    contacts marked (crosses on a protected face), landings as triangles."""
    from matplotlib.collections import PolyCollection

    tri = np.asarray(part.triangles)
    nz = np.asarray(part.face_normals)[:, 2]
    prot = np.zeros(len(tri), bool) if protected is None else np.asarray(protected, bool)
    # Seen from below: the lowest faces are in front, so draw from the top down.
    order = np.argsort(-tri[:, :, 2].min(axis=1), kind="stable")
    shade = 0.55 + 0.4 * np.clip(-nz, 0, 1)
    colours = np.column_stack([shade, shade, shade, np.ones(len(tri))])
    colours[prot, :3] = np.outer(0.6 + 0.4 * shade[prot], _PROTECTED_RGB)
    fig = new_figure(figsize=(5.6, 5.6))
    ax = fig.subplots()
    xy = tri[order][:, :, :2] * np.array([-1.0, 1.0])
    # Edges in the face colour close the hairline gaps that would show faces behind.
    ax.add_collection(PolyCollection(xy, facecolors=colours[order], edgecolors=colours[order], linewidths=0.3))
    p = contacts.points
    ax.scatter(-p[:, 0], p[:, 1], s=10, c="#1f4e79", marker="o", label=f"contacts ({len(p)})", zorder=3)
    land = plan.tip_points[plan.tip_contact < 0]
    if len(land):
        ax.scatter(-land[:, 0], land[:, 1], s=14, c="#e0a100", marker="^", label=f"landings ({len(land)})", zorder=3)
    if prot.any():
        from matplotlib.patches import Patch

        handles, _ = ax.get_legend_handles_labels()
        handles.append(Patch(color=_PROTECTED_RGB, label=f"protected faces ({int(prot.sum())})"))
        ax.legend(handles=handles, loc="upper right", fontsize=7)
    else:
        ax.legend(loc="upper right", fontsize=7)
    lo, hi = part.bounds
    pad = 0.05 * max(hi[0] - lo[0], hi[1] - lo[1], 1e-6)
    ax.set_xlim(-hi[0] - pad, -lo[0] + pad)
    ax.set_ylim(lo[1] - pad, hi[1] + pad)
    ax.set_aspect("equal")
    ax.set_xlabel("-x (mm): seen from below")
    ax.set_ylabel("y (mm)")
    ax.set_title(title, fontsize=10)
    return png_bytes(fig)


def contacts_csv(contacts: Contacts, plan: SupportPlan, tip_safety, offset) -> str:
    """``NAME.contacts.csv`` text: contacts in input coordinates (``points - offset``), each
    with the smallest safety factor of the tips serving it (empty where none serves it)."""
    sf = np.array([np.nan if v is None else v for v in tip_safety], float)
    per = np.full(len(contacts), np.inf)
    served = plan.tip_contact >= 0
    if len(sf) == len(plan.tip_contact):
        np.fmin.at(per, plan.tip_contact[served], sf[served])  # fmin: a missing factor (nan) is skipped
    per[~np.isfinite(per)] = np.nan
    return format_contacts(
        contacts.points - np.asarray(offset, float),
        contacts.normals,
        contacts.kinds,
        _tip_diameters(contacts, plan),
        contacts.loads,
        per,
    )
