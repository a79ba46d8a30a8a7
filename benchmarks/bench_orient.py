"""Benchmark: scoring 500 orientations against one multi-plane sectioning of the same part.

The issue's target: scoring 500 candidate up-directions of a ~100k-face part
takes at most 5 times as long as ``trimesh.Trimesh.section_multiplane`` at 50 um
layers over that part (one orientation), timed side by side in one run.

The part is the shared corpus's ``horse.ply`` (96,966 faces; turned right way
out, scaled to 60 mm long); without the corpus, a torus of about 100k faces.
Both sides are timed as wall clock and process CPU time (the latter steadier on a
shared machine); the scorer is :func:`supportgen.physics.orientation.score_directions`
over a Fibonacci set of 500 directions on its default grid
(:func:`~supportgen.physics.orientation.scoring_pixel`), every term included.
BLAS is held to one thread (``OPENBLAS_NUM_THREADS=1``, set before numpy loads):
the scorer's products are (k, 3) by (3, n), where threads only contend.

Usage::

    python benchmarks/bench_orient.py [--directions 500] [--layer 0.05]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import platform  # noqa: E402
import resource  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import trimesh  # noqa: E402

from supportgen.physics.orientation import fibonacci_sphere, score_directions, scoring_pixel  # noqa: E402
from supportgen.settings import Settings  # noqa: E402

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"
LONGEST_MM = 60.0


def model() -> tuple[trimesh.Trimesh, str]:
    horse = CORPUS / "horse.ply"
    if horse.exists():
        m = trimesh.load(horse, force="mesh")
        m.invert()  # stored inside out (corpus README)
        name = "horse.ply, turned right way out"
    else:
        m = trimesh.creation.torus(20.0, 6.0, major_sections=400, minor_sections=125)
        name = "torus R=20 r=6"
    m.apply_scale(LONGEST_MM / m.extents.max())
    m.apply_translation(-m.bounds[0])
    return m, name


def timed(fn):
    w, c = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - w, time.process_time() - c


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--directions", type=int, default=500)
    ap.add_argument("--layer", type=float, default=0.05)
    args = ap.parse_args()
    mesh, name = model()
    settings = Settings()
    _ = mesh.edges_unique, mesh.triangles_center, mesh.face_normals  # trimesh caches, for both sides
    print(
        f"machine: {platform.machine()}, {os.cpu_count()} cores, load average "
        f"{' '.join(f'{x:.2f}' for x in os.getloadavg())}"
    )
    print(f"part: {name}, {len(mesh.faces)} faces, extents {np.round(mesh.extents, 1).tolist()} mm")
    z = np.arange(args.layer / 2, mesh.bounds[1, 2], args.layer)
    _, ref_wall, ref_cpu = timed(lambda: mesh.section_multiplane([0, 0, 0], [0, 0, 1], z))
    print(
        f"reference: section_multiplane, {len(z)} layers of {args.layer * 1000:.0f} um: "
        f"{ref_wall:.2f} s wall, {ref_cpu:.2f} s CPU"
    )
    dirs = fibonacci_sphere(args.directions)
    pixel = scoring_pixel(mesh, settings)
    terms, wall, cpu = timed(lambda: score_directions(mesh, dirs, settings, pixel))
    print(
        f"scorer: {args.directions} directions, every term, {pixel:.3f} mm grid: {wall:.2f} s wall, {cpu:.2f} s CPU "
        f"({1000 * cpu / args.directions:.0f} ms CPU a direction)"
    )
    print(f"ratio scorer / reference: {wall / ref_wall:.2f} wall, {cpu / ref_cpu:.2f} CPU (target <= 5)")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak resident memory of the process: {peak:.0f} MB")
    best = int(np.argmin(terms["peak_force_n"]))
    print(
        f"lowest peak force {terms['peak_force_n'][best]:.2f} N at up-direction {np.round(dirs[best], 3).tolist()}; "
        f"highest {terms['peak_force_n'].max():.2f} N"
    )


if __name__ == "__main__":
    main()
