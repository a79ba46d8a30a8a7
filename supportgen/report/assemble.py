"""Assemble a run's report from the records each stage returned.

The pipeline hands over its stage records (the loaded mesh, contacts, plan,
sizing, solids, forces, layers, verification, timings); this module turns them
into the report dict whose keys are the JSON contract
(:data:`supportgen.report.document.REPORT_KEYS`) and into the warnings a person
should read.  No stage is computed here.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from datetime import UTC, datetime

import numpy as np
import trimesh

from ..analysis.layers import LayerStack
from ..analysis.raster import layer_count
from ..analysis.verify import Verification
from ..io.meshio import LoadedMesh
from ..physics.loadpath import ForceProfile
from ..settings import Settings
from ..supports.geometry import Solids
from ..supports.plan import Contacts, SupportPlan
from ..supports.sizing import SizedPlan

__all__ = ["RunRecords", "collect_warnings", "build_report", "provenance"]


@dataclass(frozen=True)
class RunRecords:
    """What the stages of one run returned, as the report reads it."""

    name: str
    source_path: str | None
    loaded: LoadedMesh
    part: trimesh.Trimesh
    settings: Settings
    strategy: str
    overhang_area_mm2: float
    contacts: Contacts
    plan: SupportPlan
    sized: SizedPlan
    solids: Solids
    forces: ForceProfile
    layers: LayerStack
    verification: Verification
    contacts_added_by_densifying: int
    contacts_added_after_check: int
    timing_s: dict
    placement_warnings: tuple[str, ...] = ()
    #: ``{rotation: 3x3, chosen_by: given|rotate|auto|rotate+auto}``: how the input was turned.
    orientation: dict | None = None


def collect_warnings(r: RunRecords) -> list[dict]:
    """The warnings of one run, each ``{code, message}`` with the part's name and what to do."""
    name, rules, ver, plan = r.name, r.settings.rules, r.verification, r.plan
    warnings = [{"code": c, "message": m} for c, m in r.forces.warnings]
    warnings += [{"code": "repair", "message": f"{name}: {rep}"} for rep in r.loaded.repairs]
    warnings += [{"code": "moved", "message": m} for m in r.placement_warnings]
    if r.sized.tips_over_capacity:
        warnings.append(
            {
                "code": "tips-over-capacity",
                "message": f"{name}: {r.sized.tips_over_capacity} tip(s) need more than {rules.tip_max_mm} mm "
                "even after adding contacts; add supports by hand or reorient the part",
            }
        )
    unserved = len(r.contacts) - len(np.unique(plan.tip_contact[plan.tip_contact >= 0]))
    if unserved:
        warnings.append(
            {
                "code": "unserved",
                "message": f"{name}: the {r.strategy} strategy gave {unserved} "
                "contact(s) no way down; reorient the part or try another strategy",
            }
        )
    if ver.specks:
        sk = ver.specks[0]
        warnings.append(
            {
                "code": "specks",
                "message": f"{name}: {len(ver.specks)} speck(s) under two pixels across start "
                f"in mid-air, the first at layer {sk['layer']} near x {sk['xy_mm'][0]:.2f}, y {sk['xy_mm'][1]:.2f} "
                "mm: a fin or sliver thinner than the printer resolves; thicken or remove it",
            }
        )
    if plan.landings:
        warnings.append(
            {
                "code": "landings",
                "message": f"{name}: {plan.landings} post(s) stand on the part; expect small marks there",
            }
        )
    return warnings


def provenance(settings: Settings, source_path: str | None) -> dict:
    """Tool version, creation time (UTC), settings digest and the input file's SHA-256."""
    from .. import __version__
    from .document import to_json

    digest = None
    if source_path is not None:
        h = hashlib.sha256()
        with open(source_path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
        digest = h.hexdigest()
    return {
        "tool_version": __version__,
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "settings_digest": hashlib.sha256(to_json(settings.to_dict()).encode()).hexdigest(),
        "input_sha256": digest,
    }


def build_report(r: RunRecords) -> dict:
    """The report dict of one run (the JSON contract's keys; ``outputs`` is None until saved)."""
    rules, pr = r.settings.rules, r.settings.printer
    sized_dict = r.sized.to_dict()
    contacts, sized, solids = r.contacts, r.sized, r.solids
    layers = layer_count(float(solids.combined.bounds[1, 2]), pr.layer_mm)
    volume_ml = (r.part.volume + solids.supports_volume_mm3) / 1000.0
    return {
        "input": {
            "path": r.source_path,
            "name": r.name,
            "faces": int(len(r.loaded.mesh.faces)),
            "volume_mm3": float(r.loaded.mesh.volume),
            "repairs": list(r.loaded.repairs),
        },
        "settings": r.settings.to_dict(),
        "outputs": None,
        "supports": {
            "strategy": r.strategy,
            "contacts": len(contacts),
            "landings": r.plan.landings,
            "contacts_by_kind": {str(k): int(np.count_nonzero(contacts.kinds == k)) for k in np.unique(contacts.kinds)},
            "contacts_added_by_densifying": r.contacts_added_by_densifying,
            "contacts_added_after_check": r.contacts_added_after_check,
            "tip_diameter_mm": sized_dict["tip_diameter_mm"],
            "tips": sized_dict["tips"],
            "post_diameter_mm": sized_dict["post_diameter_mm"],
            "volume_mm3": solids.supports_volume_mm3,
            "base_volume_mm3": solids.base_volume_mm3,
            "overhang_area_mm2": r.overhang_area_mm2,
            "contact_area_mm2": float(np.sum(np.pi * contacts.diameters**2 / 4)),
            "braces": sized_dict["braces"],
            "contact_points": contacts.to_records(),
        },
        "forces": {
            **r.forces.to_dict(),
            "min_safety_factor": sized.min_safety_factor,
            "tips_over_capacity": sized.tips_over_capacity,
            "min_tip_safety_factor": sized_dict["min_tip_safety_factor"],
            "min_post_safety_factor": sized_dict["min_post_safety_factor"],
            **{k: sized_dict[k] for k in ("min_side_load_safety_factor", "min_brace_safety_factor") if k in sized_dict},
            "target_safety_factor": rules.safety_factor,
        },
        "verification": r.verification.to_dict(),
        "layers": r.layers.to_dict(),
        "estimates": {
            "layers": layers,
            "height_mm": float(solids.combined.bounds[1, 2]),  # print height above the plate, supports included
            "print_time_s": layers * pr.layer_cycle_s,
            "resin_ml": volume_ml,
            "resin_g": volume_ml * r.settings.resin.density_g_cm3,
            "resin_cost": volume_ml / 1000.0 * r.settings.resin.price_per_l,
        },
        "orientation": r.orientation or {"rotation": np.eye(3).tolist(), "chosen_by": "given"},
        "timing_s": dict(r.timing_s),
        "warnings": collect_warnings(r),
        "provenance": provenance(r.settings, r.source_path),
    }
