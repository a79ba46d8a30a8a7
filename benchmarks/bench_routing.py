"""Time the ``tree`` strategy on ~200 and ~1000 seeded contacts.

Run from the repository root::

    python benchmarks/bench_routing.py [--sizes 200 1000] [--seed 0] [--mesh PATH]

The part is the Stanford bunny from the shared corpus (../shared/corpus), scaled to
60 mm on its longest side and lifted ``elevation_mm``; without the corpus a synthetic part
(a plate over a sphere) is used.  Contacts are sampled, area-weighted, on faces that
face down more than 55 degrees from vertical.  Prints, per size: wall time, peak
traced memory (second, traced run), process peak RSS, core count, contacts served, feet, landings and the
total post length against straight posts from the same first nodes.
"""

from __future__ import annotations

import argparse
import math
import os
import resource
import time
import tracemalloc
from pathlib import Path

import numpy as np
import trimesh

from supportgen.settings import Settings
from supportgen.supports.plan import Contacts
from supportgen.supports.routing import plan_tree

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"


def load_part(path: Path | None, lift: float) -> tuple[trimesh.Trimesh, str]:
    path = path or CORPUS / "stanford-bunny.obj"
    if path.exists():
        part, name = trimesh.load(path, force="mesh"), path.name
    else:
        plate = trimesh.creation.box((50, 50, 2))
        plate.apply_translation((0, 0, 30))
        part, name = trimesh.util.concatenate([plate, trimesh.creation.icosphere(3, 10.0)]), "plate+sphere"
    part.apply_scale(60.0 / part.extents.max())
    part.apply_translation(-part.bounds[0] + [0, 0, lift])
    return part, name


def sample_contacts(part: trimesh.Trimesh, n: int, rng: np.random.Generator) -> Contacts:
    down = np.flatnonzero(part.face_normals[:, 2] < -math.cos(math.radians(55)))
    faces = rng.choice(down, n, p=part.area_faces[down] / part.area_faces[down].sum())
    r = rng.random((n, 2))
    r[r.sum(axis=1) > 1] = 1 - r[r.sum(axis=1) > 1]
    tri = part.triangles[faces]
    pts = tri[:, 0] + r[:, :1] * (tri[:, 1] - tri[:, 0]) + r[:, 1:] * (tri[:, 2] - tri[:, 0])
    return Contacts(pts, part.face_normals[faces], np.full(n, "overhang"), np.full(n, 0.4))


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[200, 1000])
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--mesh", type=Path, default=None)
    args = ap.parse_args(argv)
    settings = Settings()
    s = settings.rules
    part, name = load_part(args.mesh, s.elevation_mm)
    print(
        f"part {name}: {len(part.faces)} faces, extents {np.round(part.extents, 1).tolist()} mm; "
        f"cores {os.cpu_count()}; seed {args.seed}"
    )
    for n in args.sizes:
        contacts = sample_contacts(part, n, np.random.default_rng(args.seed))
        t0 = time.perf_counter()
        plan = plan_tree(part, contacts, settings)
        wall = time.perf_counter() - t0
        tracemalloc.start()  # a second run for memory: tracing slows it down
        plan_tree(part, contacts, settings)
        peak = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        served = plan.tip_contact >= 0
        straight = float((plan.nodes[plan.tip_nodes[served], 2] - s.base_thickness_mm).sum())
        length = plan.segment_length()
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        print(
            f"contacts {n:5d}: {wall:6.2f} s, peak traced {peak:6.1f} MiB, peak RSS {rss:6.0f} MiB; "
            f"served {int(served.sum())}, feet {len(plan.feet)}, landings {plan.landings}; "
            f"post length {length:.0f} mm vs straight {straight:.0f} mm ({100 * (1 - length / straight):.1f} % less)"
        )


if __name__ == "__main__":
    main()
