"""Hostile and large inputs: how long supportgen takes to load or refuse them, and its peak memory.

- ``tubes``: N concentric tubes (trimesh.creation.annulus, 8 sections), every third inside out,
  written as one binary STL and loaded (shell orientation: one ray per shell, one bulk R-tree query);
- ``bomb``: a 3MF whose model member inflates to 1 GiB (made here), refused by the decompressed-size cap;
- ``instances``: a 3MF placing one 320-face sphere 20,000 times, refused by the face cap before parsing.

Prints the core count and load average with the figures (quote figures from a quiet machine)::

    python benchmarks/bench_files.py            # 800 tubes
    python benchmarks/bench_files.py --tubes 200
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import zipfile
from pathlib import Path

import trimesh

from supportgen.errors import MeshError
from supportgen.io.meshio import load_mesh
from supportgen.runs.memory import measure_peak


def timed(fn):
    """(outcome, seconds, growth of the resident set in MB) of one call (supportgen.runs.memory)."""

    def guarded():
        try:
            return fn()
        except MeshError as exc:
            return f"refused: {str(exc)[:90]}..."

    t0 = time.perf_counter()
    outcome, peak_mb, _ = measure_peak(guarded, "rss")
    return outcome, time.perf_counter() - t0, peak_mb


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tubes", type=int, default=800)
    args = ap.parse_args()
    print(f"cores {os.cpu_count()}, load average {os.getloadavg()[0]:.2f}, python {sys.version.split()[0]}")
    with tempfile.TemporaryDirectory() as d:
        folder = Path(d)
        tubes = [
            trimesh.creation.annulus(r_min=1.0 + 0.2 * i, r_max=1.1 + 0.2 * i, height=10.0, sections=8)
            for i in range(args.tubes)
        ]
        for t in tubes[::3]:
            t.invert()
        trimesh.util.concatenate(tubes).export(folder / "tubes.stl")
        out, s, mb = timed(lambda: load_mesh(folder / "tubes.stl").repairs)
        print(
            f"{args.tubes} nested tubes ({(folder / 'tubes.stl').stat().st_size / 2**20:.1f} MB STL): "
            f"{s:.2f} s, peak RSS growth {mb:.0f} MB, {out}"
        )

        with zipfile.ZipFile(folder / "bomb.3mf", "w", zipfile.ZIP_DEFLATED, compresslevel=1) as z:
            with z.open("3D/3dmodel.model", "w", force_zip64=True) as member:
                for _ in range(1024):
                    member.write(b" " * (1 << 20))
        out, s, mb = timed(lambda: load_mesh(folder / "bomb.3mf"))
        print(
            f"3MF bomb ({(folder / 'bomb.3mf').stat().st_size / 2**20:.1f} MB -> 1024 MB): {s:.3f} s, "
            f"peak RSS growth {mb:.1f} MB, {out}"
        )

        sphere = trimesh.creation.icosphere(subdivisions=2)
        verts = "".join(f'<vertex x="{x}" y="{y}" z="{z}"/>' for x, y, z in sphere.vertices.tolist())
        tris = "".join(f'<triangle v1="{a}" v2="{b}" v3="{c}"/>' for a, b, c in sphere.faces.tolist())
        items = "".join(
            f'<item objectid="1" transform="1 0 0 0 1 0 0 0 1 {3 * (i % 100)} {3 * (i // 100)} 5"/>'
            for i in range(20_000)
        )
        model = (
            '<?xml version="1.0" encoding="UTF-8"?><model unit="millimeter" xmlns="http://schemas.microsoft.'
            'com/3dmanufacturing/core/2015/02"><resources><object id="1" type="model"><mesh><vertices>'
            f"{verts}</vertices><triangles>{tris}</triangles></mesh></object></resources>"
            f"<build>{items}</build></model>"
        )
        with zipfile.ZipFile(folder / "instances.3mf", "w", zipfile.ZIP_DEFLATED) as z:
            z.writestr("3D/3dmodel.model", model)
        out, s, mb = timed(lambda: load_mesh(folder / "instances.3mf"))
        print(
            f"3MF of 20,000 instances ({(folder / 'instances.3mf').stat().st_size / 2**10:.0f} KB): {s:.3f} s, "
            f"peak RSS growth {mb:.1f} MB, {out}"
        )


if __name__ == "__main__":
    main()
