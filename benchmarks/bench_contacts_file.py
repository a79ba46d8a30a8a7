"""A contacts file replaces sampling: stage times of a plain run and of the same part re-run
from its own NAME.contacts.csv (the no-op round trip), on the demo's canister lid.

    python benchmarks/bench_contacts_file.py            # canister lid, its protected faces
    python benchmarks/bench_contacts_file.py --part hook

Prints the machine's core count and load, the ``timing_s`` stages of both runs
(``contacts`` is sampling in the plain run and reading the file in the second), and
whether the second run's supports are the same solid (volume, vertex count).
"""

from __future__ import annotations

import argparse
import os
import tempfile
from pathlib import Path

from supportgen.pipeline import generate
from supportgen.runs.demo import DEMO_PROTECT, demo_part


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--part", default="canister_lid")
    args = ap.parse_args()
    mesh = demo_part(args.part)
    protect = DEMO_PROTECT.get(args.part)
    print(f"{os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}")
    first = generate(mesh, name=args.part, protect=protect)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / f"{args.part}.contacts.csv"
        path.write_text(first.contacts_csv(), encoding="utf-8")
        again = generate(mesh, name=args.part, protect=protect, contacts=path)
    for label, r in (("sampled", first), ("from file", again)):
        t = r.report["timing_s"]
        print(
            f"{args.part} {label:9s}: contacts {t.get('contacts', 0):.3f} s, layers {t['layers']:.3f} s, "
            f"forces {t['forces']:.2f} s, total {t['total']:.2f} s; {len(r.contacts)} contacts"
        )
    same = abs(again.supports.volume - first.supports.volume) <= 1e-9 * first.supports.volume and len(
        again.supports.vertices
    ) == len(first.supports.vertices)
    print(f"same supports: {same}; load {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
