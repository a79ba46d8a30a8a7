"""Protected surfaces: what protection changes on the demo's canister lid and a corpus model.

For each part the plan is made twice, without and with its protected surfaces, and
the script prints: contacts, contacts the unprotected plan puts within the keep-off
distance of a protected face (tips that would scar it), contacts moved and merged
by the protected plan, supports that could only be held from protected surface,
landings on protected faces (unprotected vs protected plan), and the check.

    python benchmarks/protect_figures.py            # canister lid + fandisk (corpus, 50 mm)
    python benchmarks/protect_figures.py --quick    # canister lid only
    python benchmarks/protect_figures.py --whole-bottom   # fandisk with its lowest 3 mm protected

The corpus model is read from ../shared/corpus/ (skipped with a note when absent).
"""

from __future__ import annotations

import argparse
import os
import time
from pathlib import Path

import numpy as np

from supportgen.io.meshio import load_mesh
from supportgen.pipeline import generate
from supportgen.runs.demo import DEMO_PROTECT, demo_part

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"


def figures(name, mesh, protect):
    t0 = time.perf_counter()
    plain = generate(mesh, name=name, centre=True)
    prot = generate(mesh, name=name, protect=protect, centre=True)
    g = prot.guard
    p = prot.report["protection"]
    land_plain = plain.plan.tip_points[plain.plan.tip_contact < 0]
    names = [getattr(x, "__name__", x) for x in protect]
    print(
        f"{name}: selectors {names}; protected faces {p['protected_faces']} in {len(p['regions'])} region(s), "
        f"keep-off {g.keep_off_mm} mm"
    )
    print(
        f"  unprotected plan: {len(plain.contacts)} contacts, {int(np.sum(g.avoid(plain.contacts.points)))} within "
        f"the keep-off of a protected face, {plain.plan.landings} landings of which "
        f"{int(np.sum(g.avoid(land_plain))) if len(land_plain) else 0} on protected faces, "
        f"check {'passes' if plain.report['verification']['passed'] else 'FAILS'}"
    )
    print(
        f"  protected plan:   {len(prot.contacts)} contacts, moved {p['contacts_moved']} (merged "
        f"{p['contacts_merged_after_moving']}), unholdable {len(p['unholdable'])}, on protected "
        f"{p['contacts_on_protected']} contacts / {p['landings_on_protected']} landings, landings avoided "
        f"{p['landings_avoided']}, {prot.plan.landings} "
        f"landings elsewhere, check {'passes' if prot.report['verification']['passed'] else 'FAILS'} "
        f"{prot.report['verification']['failures']}"
    )
    regions = [(r["contacts"], round(r["tip_area_mm2"], 4)) for r in p["regions"]]
    print(f"  scar budget: rest {p['rest']}; regions (contacts, tip area mm2) {regions}")
    for u in p["unholdable"][:3]:
        print("  ", u["message"])
    print(
        f"  warnings: {sorted({w['code'] for w in prot.report['warnings']})}; "
        f"{time.perf_counter() - t0:.0f} s for both runs, {os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}"
    )


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--whole-bottom", action="store_true", help="fandisk: protect the lowest 3 mm (cannot be held)")
    args = ap.parse_args()
    figures("canister_lid", demo_part("canister_lid"), DEMO_PROTECT["canister_lid"])
    if args.quick:
        return
    path = CORPUS / "fandisk.obj"
    if not path.is_file():
        print(f"skipped fandisk: {path} not found (the shared corpus is not beside this checkout)")
        return
    mesh = load_mesh(path).mesh
    mesh.apply_scale(50.0 / float(mesh.extents.max()))  # longest side 50 mm, as benchmarks/compare_strategies.py
    # The lowest 3 mm of the part as given: a sealing face that must stay clean, say.
    z0 = float(mesh.bounds[0, 2])
    if args.whole_bottom:
        figures("fandisk", mesh, [f"box:-1000,-1000,{z0 - 1:.3f},1000,1000,{z0 + 3:.3f}"])
        return

    def patch(centres, normals):
        """A 5 mm patch of the underside (a gasket seat, say): the API's function form."""
        return (np.linalg.norm(centres[:, :2] - [10.15, 143.21], axis=1) < 2.5) & (centres[:, 2] < z0 + 3)

    figures("fandisk", mesh, [patch])


if __name__ == "__main__":
    main()
