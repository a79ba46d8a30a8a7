"""Benchmark: the layer stack (islands and reach) against multi-plane sectioning.

A ~100k-face closed model 50 mm tall, 50 um pixels and layers.  Timed side by
side in one run:

* ``analyse_layers``: masks, area, perimeter, components, islands and reach of
  every layer;
* the reference: ``trimesh.Trimesh.section_multiplane`` at the same sample
  heights plus the shapely areas of each section's polygons (area only).

The model is the shared corpus's ``spot.obj`` (vertices merged, subdivided twice:
93,696 faces), scaled to 50 mm tall; without the corpus, a torus of about
100k faces tilted by a seeded random rotation.  Timings are the best of
``--repeat`` runs (wall clock and process CPU time, the latter steadier on a
shared machine); peak memory of each is measured in a separate traced run
(tracemalloc, which sees numpy's buffers).

Usage::

    python benchmarks/bench_layers.py [--pixel 0.05] [--layer 0.05] [--repeat 3]
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import time
import tracemalloc
from pathlib import Path

import numpy as np
import trimesh

from supportgen.analysis.layers import analyse_layers

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"
HEIGHT_MM = 50.0


def model(seed: int = 0) -> tuple[trimesh.Trimesh, str]:
    """The benchmark part, standing on the plate, 50 mm tall."""
    spot = CORPUS / "spot.obj"
    if spot.exists():
        m = trimesh.load(spot, force="mesh")
        m.merge_vertices(merge_tex=True, merge_norm=True)
        m = m.subdivide().subdivide()
        name = "spot.obj, merged, subdivided x2"
    else:
        m = trimesh.creation.torus(20.0, 6.0, major_sections=400, minor_sections=125)
        m.apply_transform(trimesh.transformations.random_rotation_matrix(np.random.default_rng(seed).random(3)))
        name = f"torus R=20 r=6, random rotation seed {seed}"
    m.apply_scale(HEIGHT_MM / m.extents[2])
    m.apply_translation(-m.bounds[0])
    return m, name


def reference(mesh: trimesh.Trimesh, z: np.ndarray) -> np.ndarray:
    """Per-layer areas from trimesh sections and shapely polygon areas."""
    sections = mesh.section_multiplane([0.0, 0.0, 0.0], [0.0, 0.0, 1.0], z)
    return np.array([sum(p.area for p in s.polygons_full) if s is not None else 0.0 for s in sections])


def timed(fn, repeat: int):
    """Best wall and CPU time of ``repeat`` runs, then the traced peak memory of one more."""
    best, cpu, out = np.inf, np.inf, None
    for _ in range(repeat):
        t, c = time.perf_counter(), time.process_time()
        out = fn()
        best, cpu = min(best, time.perf_counter() - t), min(cpu, time.process_time() - c)
    tracemalloc.start()
    fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return best, cpu, peak, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pixel", type=float, default=0.05)
    ap.add_argument("--layer", type=float, default=0.05)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--seed", type=int, default=0)
    a = ap.parse_args()
    mesh, name = model(a.seed)
    print(
        f"model: {name}; {len(mesh.faces)} faces, extents {np.round(mesh.extents, 2).tolist()} mm, "
        f"closed={mesh.is_watertight}"
    )
    print(
        f"cores: {os.cpu_count()} ({platform.processor() or platform.machine()}), numpy {np.__version__}, "
        f"trimesh {trimesh.__version__}; pixel {a.pixel} mm, layer {a.layer} mm"
    )
    t_ours, c_ours, m_ours, stack = timed(lambda: analyse_layers(mesh, a.pixel, a.layer, 1.5), a.repeat)
    t_ref, c_ref, m_ref, ref = timed(lambda: reference(mesh, stack.z_mm), a.repeat)
    print(
        f"layers: {len(stack.z_mm)}, grid {stack.grid.ny}x{stack.grid.nx} pixels, "
        f"islands {len(stack.islands)}, max reach {stack.max_unsupported_reach_mm:.3f} mm at layer {stack.max_unsupported_reach_layer}"
    )
    print(f"analyse_layers : {t_ours:7.3f} s wall, {c_ours:7.3f} s CPU, peak {m_ours / 2**20:7.1f} MiB")
    print(f"sections+areas : {t_ref:7.3f} s wall, {c_ref:7.3f} s CPU, peak {m_ref / 2**20:7.1f} MiB")
    print(f"speed-up       : {t_ref / t_ours:7.2f}x wall, {c_ref / c_ours:7.2f}x CPU")
    print(f"max RSS        : {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:7.1f} MiB (whole process)")
    rel = np.abs(stack.area_mm2 - ref) / np.maximum(ref, 1.0)
    print(f"area agreement : median {np.median(rel):.2e}, max {rel.max():.2e} (relative)")


if __name__ == "__main__":
    main()
