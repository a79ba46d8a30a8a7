"""Benchmark: separation forces and contact loads for every layer of a 50 mm model.

Model: a 50 mm hollow sphere (outer icosphere 82k faces, inner cavity 20k faces,
a 6 mm bore through the top so the cavity is sealed at the bottom and vented at
the top), lifted 5 mm, about 100k faces; default settings (0.05 mm pixel and
layer), 40 seeded contacts on the lower half.  Layers come from
``supportgen.layers.iter_layers``; the time of rasterising and labelling is shown
apart from the time spent in :class:`~supportgen.loadpath.ForceTracker` (the
figure the 10 s target is about).

``--convergence`` prints the coarse-grid error table quoted in supportgen.forces.

Run: ``python benchmarks/bench_forces.py [--convergence]``
"""

from __future__ import annotations

import argparse
import os
import time
import tracemalloc

import manifold3d
import numpy as np
import trimesh
from scipy import ndimage

from supportgen import forces as fz
from supportgen.layers import Grid, iter_layers
from supportgen.loadpath import ForceTracker
from supportgen.settings import Settings


def model() -> trimesh.Trimesh:
    outer = trimesh.creation.icosphere(subdivisions=6, radius=25.0)
    inner = trimesh.creation.icosphere(subdivisions=5, radius=20.0)
    bore = trimesh.creation.cylinder(radius=3.0, height=20.0, sections=64)
    bore.apply_translation([0, 0, 20.0])
    m = [manifold3d.Manifold(manifold3d.Mesh(np.asarray(t.vertices, np.float32), np.asarray(t.faces, np.uint32)))
         for t in (outer, inner, bore)]
    solid = m[0] - m[1] - m[2]
    out = solid.to_mesh()
    mesh = trimesh.Trimesh(np.asarray(out.vert_properties)[:, :3], np.asarray(out.tri_verts))
    mesh.apply_translation([0, 0, 5.0 - mesh.bounds[0, 2]])
    return mesh


def bench(seed: int = 0) -> None:
    s = Settings()
    mesh = model()
    rng = np.random.default_rng(seed)
    verts = mesh.vertices[mesh.vertices[:, 2] < mesh.bounds[0, 2] + 20]
    contacts = verts[rng.choice(len(verts), 40, replace=False)]
    grid = Grid.covering(mesh.bounds, s.printer.pixel_mm)
    tracker = ForceTracker(grid, s.printer.layer_mm, contacts, s)
    t_layers = t_label = t_force = 0.0
    tracemalloc.start()
    t0 = time.perf_counter()
    it = iter_layers(mesh, grid, s.printer.layer_mm)
    n = 0
    while True:
        a = time.perf_counter()
        layer = next(it, None)
        b = time.perf_counter()
        t_layers += b - a
        if layer is None:
            break
        lab, nl = ndimage.label(layer.mask, np.ones((3, 3), bool))
        c = time.perf_counter()
        tracker(layer, lab, nl)
        t_force += time.perf_counter() - c
        t_label += c - b
        n += 1
    prof = tracker.result()
    total = time.perf_counter() - t0
    peak_mem = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    print(f"cores: {os.cpu_count()}  faces: {len(mesh.faces)}  grid: {grid.ny}x{grid.nx}  layers: {n}")
    print(f"forces (ForceTracker): {t_force:.2f} s   rasterise: {t_layers:.2f} s   label: {t_label:.2f} s   "
          f"total: {total:.2f} s   peak traced memory: {peak_mem:.0f} MiB")
    print(f"peak layer {prof.peak_layer_index}: {prof.peak_force_n:.2f} N; "
          f"largest contact load {prof.contact_loads.max():.3f} N; warnings: {[c for c, _ in prof.warnings]}")


def convergence() -> None:
    """Coarse J against the pixel solve, over shapes and grid offsets (1 px = 1 unit)."""
    shapes = {
        "disc R128": lambda x, y: x**2 + y**2 < 128**2,
        "rect 320x64": lambda x, y: (abs(x) < 160) & (abs(y) < 32),
        "ring 128/96": lambda x, y: (x**2 + y**2 < 128**2) & (x**2 + y**2 > 96**2),
        "L 200": lambda x, y: (abs(x) < 100) & (abs(y) < 100) & ~((x > 0) & (y > 0)),
        "triangle 320": lambda x, y: (y > -80) & (y < -80 + np.sqrt(3) * (160 - abs(x))),
    }
    print("shape          offset  w=2A/P  " + "  ".join(f"s={s:<2d} w/H  err%" for s in (2, 4, 8, 16, 32)))
    for off in range(4):
        x = np.arange(-170 - off, 170) + 0.5
        xx, yy = np.meshgrid(x, x)
        for name, fn in shapes.items():
            m = fn(xx, yy)
            w = 2 * m.sum() / fz._edges(m)
            ref = fz.torsion_constant(m, 1.0)
            cells = "  ".join(f"{w / s:8.1f} {100 * (fz.torsion_constant(m, 1.0, s) / ref - 1):+5.2f}"
                              for s in (2, 4, 8, 16, 32))
            print(f"{name:14s} {off:6d} {w:7.1f}  {cells}")
    print("pixel solve against exact square (Roark 0.140577): " + ", ".join(
        f"{n}px {100 * (fz.torsion_constant(np.ones((n, n), bool), 1 / n) / 0.1405770 - 1):+.3f}%"
        for n in (8, 16, 32, 64, 128)))


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--convergence", action="store_true", help="print the coarse-grid error table")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    convergence() if args.convergence else bench(args.seed)
