"""Benchmark: batch throughput with 1 and 2 workers, and the memory model's constants.

Throughput (the default): the three demo parts (``supportgen.runs.demo.write_demo_inputs``)
at default settings through :func:`supportgen.runs.batch.run_batch` with each worker
count, wall time from the call to its return (worker start-up included), in
parts per minute; peak resident memory of the largest worker (its own ``ru_maxrss``),
and the load average, since other processes on the machine slow both runs.

``--calibrate-memory``: supports a set of parts, each in a fresh ``spawn``
process, and records the face count, the layer-grid size and the peak
resident memory (``resource.getrusage(...).ru_maxrss``) of that process, then
fits ``peak_MB = base + factor * mask_MB + face_bytes * faces / 2**20`` by least
squares (``numpy.linalg.lstsq``) and prints it beside the constants in
``supportgen/batch.py`` and each part's estimate / measured ratio.

Usage::

    python benchmarks/bench_batch.py [--workers 1 2] [--repeat 1]
    python benchmarks/bench_batch.py --calibrate-memory
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import platform
import resource
import tempfile
import time
from pathlib import Path

import numpy as np
import trimesh

from supportgen import Settings
from supportgen.runs.batch import estimate_peak_mb, mesh_footprint, run_batch
from supportgen.runs.demo import write_demo_inputs


def throughput(workers: list[int], repeat: int) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        inputs = write_demo_inputs(Path(tmp) / "in")
        print(f"demo set: {', '.join(p.name for p in inputs)}; default settings; strategy straight")
        for n in workers:
            best = np.inf
            for r in range(repeat):
                t0 = time.perf_counter()
                summary = run_batch(Path(tmp) / "in", Path(tmp) / f"out-{n}-{r}", Settings(), workers=n, progress=False)
                best = min(best, time.perf_counter() - t0)
                assert summary.counts["ok"] == len(inputs), summary.results
            peak = max(r.peak_mb or 0.0 for r in summary.results)
            per_file = ", ".join(f"{r.file} {r.seconds:.1f} s" for r in summary.results)
            print(
                f"workers={n}: {best:.1f} s wall (best of {repeat}), {len(inputs) / best * 60:.2f} parts/min; "
                f"per file (last run): {per_file}; largest worker peak {peak:.0f} MB; "
                f"load average {os.getloadavg()[0]:.1f}"
            )


def _measure(path: str, overrides: dict, queue) -> None:
    from supportgen import SupportGenError, pipeline

    base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    try:
        with tempfile.TemporaryDirectory() as out:
            pipeline.generate(path, Settings().override(overrides)).save(out)
    except SupportGenError as exc:
        queue.put(str(exc))
        return
    queue.put((base / 1024, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024))


def _parts(folder: Path) -> list[tuple[Path, dict]]:
    """Plates (grid size), spheres (face count) and the demo parts; plates and spheres lifted 5 mm."""
    cases = []
    for side, pixel in ((10, 0.05), (25, 0.05), (40, 0.05), (55, 0.05), (70, 0.07)):
        m = trimesh.creation.box((side, side, 1.5))
        m.apply_translation((0, 0, 5.75))
        cases.append((m, f"plate{side}", {"pixel_mm": pixel, "layer_mm": 0.1}))
    for sub in (3, 5, 6):
        m = trimesh.creation.icosphere(subdivisions=sub, radius=6.0)
        m.apply_translation((0, 0, 11.0))
        cases.append((m, f"sphere-s{sub}", {"layer_mm": 0.1}))
    out = [(folder / f"{name}.stl", kw) for m, name, kw in cases]
    for (m, _, _), (path, _) in zip(cases, out):
        m.export(path)
    out += [(p, {}) for p in write_demo_inputs(folder)]
    return out


def calibrate() -> None:
    ctx = multiprocessing.get_context("spawn")
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for path, kw in _parts(Path(tmp)):
            queue = ctx.Queue()
            t0 = time.perf_counter()
            proc = ctx.Process(target=_measure, args=(str(path), kw, queue))
            proc.start()
            got = queue.get()
            proc.join()
            if isinstance(got, str):
                print(f"{path.stem}: skipped: {got}")
                continue
            base, peak = got
            faces, bounds = mesh_footprint(path)
            settings = Settings().override(kw)
            ext = np.ptp(bounds[:, :2], axis=0) / settings.printer.pixel_mm
            rows.append((path.stem, faces, float(np.prod(ext)), base, peak, estimate_peak_mb(faces, bounds, settings)))
            print(
                f"{path.stem:14s} faces {faces:7d}  mask {ext[0]:.0f} x {ext[1]:.0f} px  base {base:.0f} MB  "
                f"peak {peak:.0f} MB  estimate {rows[-1][-1]:.0f} MB  ({time.perf_counter() - t0:.1f} s)",
                flush=True,
            )
    a = np.array([[1.0, r[2] / 2**20, r[1] / 2**20] for r in rows])
    y = np.array([r[4] for r in rows])
    coef, *_ = np.linalg.lstsq(a, y, rcond=None)
    print(f"least squares: peak_MB = {coef[0]:.1f} + {coef[1]:.1f} * mask_MB + {coef[2]:.0f} B * faces / 2**20")
    # An upper bound: the same slopes, the intercept raised until no part is under-estimated.
    lift = max(0.0, float(np.max(y - a @ coef)))
    print(f"bounding: peak_MB <= {coef[0] + lift:.1f} + {coef[1]:.1f} * mask_MB + {coef[2]:.0f} B * faces / 2**20")
    print(
        f"current constants: worst estimate/measured = {min(r[5] / r[4] for r in rows):.2f}, "
        f"mean {np.mean([r[5] / r[4] for r in rows]):.2f}"
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--calibrate-memory", action="store_true")
    args = ap.parse_args()
    print(f"{platform.platform()}; python {platform.python_version()}; {os.cpu_count()} cores")
    if args.calibrate_memory:
        calibrate()
    else:
        throughput(args.workers, args.repeat)


if __name__ == "__main__":
    main()
