"""Benchmark: compare support strategies on the shared corpus and on the demo parts.

Two runs of :func:`supportgen.runs.bench.run_bench`, one table each:

* the shared corpus (``../shared/corpus`` beside the checkout: fandisk, spot and
  the Stanford bunny), each mesh scaled so its longest side is ``--size`` mm
  (default 50) and centred on the plate; the bunny is an open scan, so the
  mesh loader may refuse it: that is recorded as an ``error`` row, not hidden;
* the demo parts (:func:`supportgen.runs.demo.write_demo_inputs`), at their own size in mm.

Every run is seeded (the settings' ``seed``); the machine's core count and load
average are printed with the table, because the times depend on them. Peak
memory is the growth of the resident set during each run (see supportgen.runs.bench).

Usage::

    python benchmarks/compare_strategies.py [-o OUT] [--size 50] [--pixel 0.05] [--layer 0.05]
                                            [--strategies straight,tree] [--skip-corpus] [--skip-demo]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

from supportgen.runs.bench import grid_settings, machine_line, run_bench
from supportgen.runs.demo import write_demo_inputs

CORPUS = (Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus").resolve()
SHOWN = (
    ("model", "{}"),
    ("strategy", "{}"),
    ("contacts", "{}"),
    ("contact_area_mm2", "{:.2f}"),
    ("support_volume_mm3", "{:.0f}"),
    ("base_volume_mm3", "{:.0f}"),
    ("resin_ml", "{:.2f}"),
    ("islands", "{}"),
    ("max_reach_mm", "{:.2f}"),
    ("passed", "{}"),
    ("min_safety_factor", "{:.2f}"),
    ("peak_layer_force_n", "{:.2f}"),
    ("total_s", "{:.1f}"),
    ("peak_memory_mb", "{:.0f}"),
)


def _fmt(fmt: str, v) -> str:
    if v is None:
        return "-"
    try:
        return fmt.format(v)
    except (ValueError, TypeError):
        return str(v)


def print_table(title: str, table) -> None:
    """The main columns of a bench table, its failures and its overall ratios, as text."""
    print(f"\n== {title} ({table.paths['csv']})")
    head = [name for name, _ in SHOWN]
    lines = [head]
    for r in table.rows:
        if r["status"] == "ok":
            lines.append([_fmt(f, r.get(name)) for name, f in SHOWN])
        else:
            lines.append([r["model"], r["strategy"], "ERROR"] + [""] * (len(SHOWN) - 3))
    widths = [max(len(row[i]) for row in lines) for i in range(len(head))]
    for row in lines:
        print("  ".join(c.rjust(w) for c, w in zip(row, widths)))
    for r in table.rows:
        if r["status"] != "ok":
            print(f"  {r['model']} / {r['strategy']} failed: {r['error']}")
    print(f"ratios against {table.baseline} (support volume, contacts, resin, total time):")
    for s in table.summary:
        figs = ", ".join(f"{k[:-6]} {_fmt('{:.3f}', v)}" for k, v in s.items() if k.endswith("_ratio"))
        print(f"  {s['model']:>24s} {s['strategy']}: {figs}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("-o", "--output", type=Path, default=Path(tempfile.gettempdir()) / "supportgen-compare")
    ap.add_argument("--size", type=float, default=50.0, help="longest side of each corpus mesh, mm")
    ap.add_argument("--pixel", type=float, default=None, help="pixel pitch, mm (default: the profile's)")
    ap.add_argument("--layer", type=float, default=None, help="layer height, mm (default: the profile's)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--strategies", default="straight,tree")
    ap.add_argument("--skip-corpus", action="store_true")
    ap.add_argument("--skip-demo", action="store_true")
    args = ap.parse_args()

    settings = grid_settings(args.pixel, args.layer, args.seed)
    strategies = [s.strip() for s in args.strategies.split(",") if s.strip()]
    print(machine_line())
    print(
        f"settings: pixel {settings.printer.pixel_mm} mm, layer {settings.printer.layer_mm} mm, "
        f"seed {settings.rules.seed}, strategies {', '.join(strategies)}; output {args.output}"
    )

    if not args.skip_corpus:
        if CORPUS.is_dir():
            t0 = time.perf_counter()
            table = run_bench(CORPUS, args.output / "corpus", settings, strategies, scale_mm=args.size, progress=False)
            print_table(
                f"shared corpus, each scaled to {args.size:g} mm longest side, {time.perf_counter() - t0:.0f} s", table
            )
        else:
            print(f"\n== shared corpus: skipped, not found at {CORPUS}")
    if not args.skip_demo:
        inputs = write_demo_inputs(args.output / "demo-inputs")
        t0 = time.perf_counter()
        table = run_bench(inputs[0].parent, args.output / "demo", settings, strategies, progress=False)
        print_table(f"demo parts at their own size, {time.perf_counter() - t0:.0f} s", table)
    print(f"\nload average {os.getloadavg()[0]:.2f} at the end (other processes share the cores)")


if __name__ == "__main__":
    main()
