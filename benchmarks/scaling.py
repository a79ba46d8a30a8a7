"""Benchmark: time and peak memory of ``generate`` against face count and part height.

Two sweeps, each point one ``supportgen.generate`` run (strategy ``--strategy``,
default ``straight``), timed side by side in the same process with the reference:
``trimesh.Trimesh.section_multiplane`` of the same part at the same layer heights
(one plane per layer: the least a layer-exact tool must do).

* faces: the shared corpus's ``spot.obj`` (vertices merged), subdivided with
  ``trimesh.Trimesh.subdivide`` 0-4 times (5,856 / 23,424 / 93,696 / 374,784 /
  1,499,136 faces), each scaled to ``--size`` mm (default 50) on its longest side;
  levels above ``--max-faces`` (default 300,000) are left out, because a million
  faces takes long. Without the corpus: icospheres of 5,120 to 1,310,720 faces.
* height: the 93,696-face spot (or an 81,920-face icosphere), ``--size`` mm on its
  longest side, stretched along z only to ``--heights`` (default 12.5, 25, 50, 100
  mm), so the footprint and face count stay and the layer count grows with height.

Peak memory: the growth of the resident set during the call (supportgen.runs.bench.
measure_peak, method ``rss``: high-water mark reset through /proc/self/clear_refs).
Times are the best of ``--repeat`` runs (default 3), the least disturbed by other
processes; stage times in the table are those of the last run.
The speed target quoted in the project's issue is generate <= 3 x section time for
a ~100k-face, 50 mm model; the log-log slopes say whether time grows faster than
linearly. Everything is deterministic (settings seed ``--seed``); the core count
and load average are printed, as other processes may share the cores.

Usage::

    python benchmarks/scaling.py [--max-faces 300000] [--heights 12.5,25,50,100] [--size 50]
                                 [--pixel 0.05] [--layer 0.05] [--repeat 3] [--png scaling.png]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import trimesh

import supportgen
from supportgen.analysis.placement import place
from supportgen.runs.bench import grid_settings, machine_line, measure_peak

CORPUS = (Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus").resolve()


def base_mesh() -> tuple[trimesh.Trimesh, str]:
    """spot.obj with its texture-seam vertices merged, or a unit icosphere without the corpus."""
    spot = CORPUS / "spot.obj"
    if spot.is_file():
        m = trimesh.load(spot, force="mesh")
        m.merge_vertices(merge_tex=True, merge_norm=True)
        return m, "spot.obj (merged)"
    return trimesh.creation.icosphere(subdivisions=2, radius=1.0), "icosphere"


def sized(mesh: trimesh.Trimesh, size_mm: float, height_mm: float | None = None) -> trimesh.Trimesh:
    """Scaled so the longest side is ``size_mm``, centred in x/y, then stretched along z to ``height_mm``."""
    m = mesh.copy()
    m.apply_translation(-m.bounds.mean(axis=0))
    m.apply_scale(size_mm / float(np.max(m.extents)))
    if height_mm is not None:
        m.apply_transform(np.diag([1.0, 1.0, height_mm / m.extents[2], 1.0]))
    return m


def reference_sections(part: trimesh.Trimesh, layer_mm: float) -> int:
    """Section the placed part at every layer's mid-height with trimesh; return the number of layers."""
    lo, hi = part.bounds[:, 2]
    z = np.arange(np.floor(lo / layer_mm), np.ceil(hi / layer_mm)) * layer_mm + layer_mm / 2
    part.section_multiplane([0.0, 0.0, 0.0], [0.0, 0.0, 1.0], z)
    return len(z)


def point(mesh: trimesh.Trimesh, settings, strategy: str, repeat: int = 1) -> dict:
    """One measured point: generate and the reference sections of the same placed part.

    Times are the best of ``repeat`` runs (least disturbed by other processes); peak
    memory the largest of them.
    """
    part = place(mesh, settings, name="part").mesh
    gen, sec = [], []
    for _ in range(repeat):
        t0 = time.perf_counter()
        result, gen_mb, method = measure_peak(lambda: supportgen.generate(mesh, settings, strategy=strategy), "rss")
        gen.append((time.perf_counter() - t0, gen_mb))
        fresh = part.copy()  # no cached data from earlier calls
        t0 = time.perf_counter()
        n_layers, sec_mb, _ = measure_peak(
            lambda fresh=fresh: reference_sections(fresh, settings.printer.layer_mm), "rss"
        )
        sec.append((time.perf_counter() - t0, sec_mb))
    gen_s, sec_s = min(t for t, _ in gen), min(t for t, _ in sec)
    r = result.report
    return {
        "faces": len(mesh.faces),
        "height_mm": float(mesh.extents[2]),
        "layers": n_layers,
        "generate_s": gen_s,
        "section_s": sec_s,
        "ratio": gen_s / sec_s,
        "generate_mb": max(m for _, m in gen),
        "section_mb": max(m for _, m in sec),
        "memory": method,
        "contacts": r["supports"]["contacts"],
        "passed": r["verification"]["passed"],
        "stages": r["timing_s"],
    }


def slope(x, y) -> float:
    """Least-squares slope of log y against log x (1 = linear growth)."""
    return float(np.polyfit(np.log(x), np.log(y), 1)[0]) if len(x) > 1 else float("nan")


def show(title: str, rows: list[dict], key: str) -> None:
    print(f"\n== {title}")
    print(
        f"{'faces':>9s} {'height':>7s} {'layers':>6s} {'generate s':>10s} {'section s':>9s} {'ratio':>6s} "
        f"{'gen MB':>7s} {'sec MB':>7s} {'contacts':>8s} passed  slowest stages"
    )
    for p in rows:
        st = sorted(((v, k) for k, v in p["stages"].items() if k != "total"), reverse=True)[:3]
        print(
            f"{p['faces']:9d} {p['height_mm']:7.1f} {p['layers']:6d} {p['generate_s']:10.2f} "
            f"{p['section_s']:9.2f} {p['ratio']:6.2f} {p['generate_mb']:7.0f} {p['section_mb']:7.0f} "
            f"{p['contacts']:8d} {str(p['passed']):6s}  {', '.join(f'{k} {v:.1f}' for v, k in st)}"
        )
    x = [p[key] for p in rows]
    print(
        f"log-log slope against {key}: generate {slope(x, [p['generate_s'] for p in rows]):.2f}, "
        f"section {slope(x, [p['section_s'] for p in rows]):.2f} (1.00 = linear)"
    )


def plot(face_rows, height_rows, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import matplotlib.ticker

    fig, axes = plt.subplots(1, 3, figsize=(13, 3.8))
    for ax, rows, key, label in (
        (axes[0], face_rows, "faces", "faces"),
        (axes[1], height_rows, "layers", "layers (part height)"),
    ):
        x = [p[key] for p in rows]
        ax.loglog(x, [p["generate_s"] for p in rows], "o-", label="generate")
        ax.loglog(x, [p["section_s"] for p in rows], "s--", label="trimesh section_multiplane")
        ax.set_xlabel(label)
        ax.set_ylabel("seconds")
        ax.legend(fontsize=8)
        ax.grid(True, which="both", alpha=0.3)
    axes[0].set_title("time against face count")
    axes[1].set_title("time against layer count")
    axes[2].loglog(
        [p["faces"] for p in face_rows], [max(p["generate_mb"], 1e-3) for p in face_rows], "o-", label="generate"
    )
    axes[2].loglog(
        [p["faces"] for p in face_rows],
        [max(p["section_mb"], 1e-3) for p in face_rows],
        "s--",
        label="section_multiplane",
    )
    axes[2].set_xlabel("faces")
    axes[2].set_ylabel("peak RSS growth, MB")
    axes[2].set_title("peak memory against face count")
    axes[2].legend(fontsize=8)
    for ax in axes:
        ax.xaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
    fig.tight_layout()
    fig.savefig(path, dpi=110, metadata={"Software": None})
    plt.close(fig)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--max-faces", type=int, default=300_000)
    ap.add_argument("--heights", default="12.5,25,50,100", help="part heights for the layer sweep, mm")
    ap.add_argument("--size", type=float, default=50.0, help="longest side, mm")
    ap.add_argument("--pixel", type=float, default=None, help="pixel pitch, mm (default: the profile's)")
    ap.add_argument("--layer", type=float, default=None, help="layer height, mm (default: the profile's)")
    ap.add_argument("--strategy", default="straight")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--repeat", type=int, default=3, help="runs per point; the best time is kept")
    ap.add_argument("--skip-faces", action="store_true")
    ap.add_argument("--skip-heights", action="store_true")
    ap.add_argument("--png", type=Path, default=Path(tempfile.gettempdir()) / "supportgen-scaling.png")
    args = ap.parse_args()

    settings = grid_settings(args.pixel, args.layer, args.seed)
    base, name = base_mesh()
    print(machine_line())
    print(
        f"model: {name}, longest side {args.size:g} mm; pixel {settings.printer.pixel_mm} mm, layer "
        f"{settings.printer.layer_mm} mm, strategy {args.strategy}, seed {settings.rules.seed}, "
        f"best of {args.repeat} run(s) per point"
    )

    # Warm-up (untimed): first calls load modules and fill caches.
    supportgen.generate(trimesh.creation.icosphere(subdivisions=2, radius=5.0), settings, strategy=args.strategy)
    levels = [base]
    while len(levels[-1].faces) * 4 <= args.max_faces:
        levels.append(levels[-1].subdivide())
    if name == "icosphere":
        levels = levels[1:]  # start near 5k faces like the corpus mesh
    face_rows = (
        [] if args.skip_faces else [point(sized(m, args.size), settings, args.strategy, args.repeat) for m in levels]
    )
    if face_rows:
        show(f"against face count ({name} subdivided, {args.size:g} mm)", face_rows, "faces")
    mid = base.subdivide().subdivide()
    heights = [float(h) for h in args.heights.split(",")]
    height_rows = (
        []
        if args.skip_heights
        else [point(sized(mid, args.size, h), settings, args.strategy, args.repeat) for h in heights]
    )
    if height_rows:
        show(f"against part height ({len(mid.faces)} faces, stretched along z)", height_rows, "layers")
    target = [p for p in face_rows if 50_000 <= p["faces"] <= 200_000]
    for p in target[:1]:
        verdict = "meets" if p["ratio"] <= 3.0 else "misses"
        print(
            f"\ntarget: generate within 3x trimesh sectioning for a ~100k-face {args.size:g} mm model: "
            f"{p['faces']} faces, {p['generate_s']:.1f} s / {p['section_s']:.1f} s = {p['ratio']:.2f}x ({verdict})"
        )
    if face_rows and height_rows:
        plot(face_rows, height_rows, args.png)
        print(f"curves: {args.png}")
    print(f"load average {os.getloadavg()[0]:.2f} at the end (other processes share the cores)")


if __name__ == "__main__":
    main()
