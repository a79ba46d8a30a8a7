"""Benchmark: loads and safety margins under each separation mechanism.

Runs :func:`supportgen.generate` on the demo parts (their own size) and on the
shared corpus (``../shared/corpus`` beside the checkout, each mesh scaled so its
longest side is ``--size`` mm, default 50, and centred) with
``Settings().override(mechanism=...)`` for pull, tilt and slide, and prints per run:
the peak layer force (part, raft and posts), the tip diameter range, the lowest
tip, post, side-load and brace safety factors (target: the profile's
``safety_factor``), tips over capacity and the rated-force warning.  A run that
fails prints its error line.

Usage::

    python benchmarks/mechanism_safety.py [--size 50] [--mechanisms pull,tilt,slide]
                                          [--skip-corpus] [--skip-demo] [--pixel P] [--layer L]
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import trimesh

from supportgen import generate, pipeline
from supportgen.errors import SupportGenError
from supportgen.io.meshio import load_mesh
from supportgen.runs.demo import DEMO_PARTS, demo_part
from supportgen.settings import Settings

CORPUS = (Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus").resolve()


def _scaled(path: Path, size: float) -> trimesh.Trimesh:
    mesh = load_mesh(path).mesh.copy()
    mesh.apply_scale(size / float(max(mesh.extents)))
    return mesh


def _fmt(v, f="{:.2f}"):
    return "-" if v is None else f.format(v)


_SIZED = []
_size_plan = pipeline.size_plan


def _recording_size_plan(*args, **kwargs):
    """The pipeline's sizing call, keeping its record (the report shows only some keys)."""
    out = _size_plan(*args, **kwargs)
    _SIZED.append(out)
    return out


pipeline.size_plan = _recording_size_plan


def row(name: str, mesh, settings: Settings) -> str:
    t0 = time.perf_counter()
    _SIZED.clear()
    try:
        res = generate(mesh, settings, name=name, centre=True)
    except SupportGenError as exc:
        return f"{name:>16s} {settings.printer.mechanism:>5s}  ERROR {exc}"
    frc = res.report["forces"]
    sized = _SIZED[-1].to_dict()
    tip = sized.get("tip_diameter_mm", {}) or {}
    warn = [w["code"] for w in frc.get("warnings", [])]
    return (
        f"{name:>16s} {settings.printer.mechanism:>5s} {res.forces.peak_force_n:9.2f} "
        f"{_fmt(tip.get('min'), '{:.3f}')}-{_fmt(tip.get('max'), '{:.3f}')} "
        f"{_fmt(sized.get('min_tip_safety_factor')):>6s} {_fmt(sized.get('min_post_safety_factor')):>6s} "
        f"{_fmt(sized.get('min_side_load_safety_factor')):>6s} {_fmt(sized.get('min_brace_safety_factor')):>6s} "
        f"{sized.get('tips_over_capacity', '-'):>4} {sized.get('braces', '-'):>5} "
        f"{'over-rated' if 'force-over-rated' in warn else '':>10s} {time.perf_counter() - t0:6.1f}s"
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=float, default=50.0)
    ap.add_argument("--mechanisms", default="pull,tilt,slide")
    ap.add_argument("--skip-corpus", action="store_true")
    ap.add_argument("--skip-demo", action="store_true")
    ap.add_argument("--only", default="", help="comma-separated part names to run")
    ap.add_argument("--pixel", type=float, default=None)
    ap.add_argument("--layer", type=float, default=None)
    args = ap.parse_args()
    parts = []
    if not args.skip_demo:
        parts += [(n, demo_part(n)) for n in DEMO_PARTS]
    if not args.skip_corpus and CORPUS.is_dir():
        for p in sorted(CORPUS.iterdir()):
            if p.suffix.lower() in (".obj", ".ply", ".stl"):
                try:
                    parts.append((p.stem, _scaled(p, args.size)))
                except SupportGenError as exc:
                    print(f"{p.stem:>16s} load ERROR {exc}")
    if args.only:
        keep = set(args.only.split(","))
        parts = [(n, m) for n, m in parts if n in keep]
    base = Settings()
    over = {k: v for k, v in (("pixel_mm", args.pixel), ("layer_mm", args.layer)) if v is not None}
    print(f"target safety factor {base.rules.safety_factor:g}; rated force {base.printer.rated_force_n:g} N")
    print(f"{'part':>16s} {'mech':>5s} {'peak_N':>9s} tip_d_mm    tipSF postSF sideSF braceSF over braces")
    for mech in args.mechanisms.split(","):
        s = base.override(mechanism=mech, **over)
        for name, mesh in parts:
            print(row(name, mesh, s), flush=True)


if __name__ == "__main__":
    main()
