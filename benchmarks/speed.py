"""Benchmark: every stage of ``generate`` against trimesh's sectioning of the same layers.

For each part, in one worker process per part (so one part's caches never help the
next): ``supportgen.generate`` with default settings, its per-stage times from the
report, and the reference, ``trimesh.Trimesh.section_multiplane`` of the placed part at
every layer's mid-height (one plane per layer: the least a layer-exact tool must do),
timed in the same process right after.  Then ``supportgen check`` of the written
supported STL as a whole command (a fresh interpreter: start-up, loading and the
check), against sectioning that STL the same way.

Parts:

* the shared corpus (``../shared/corpus/``), each at 50 mm as it comes;
* the kinds the speed issue names, rebuilt from our own procedural and corpus parts:
  ``kind-scan`` (the horse, 97k faces, 50 mm), ``kind-lattice`` (a frame of 0.8 mm
  struts), ``kind-drips`` (a plate with many small drips under it) and ``kind-dome``
  (a thin dome shell opening downward);
* a seeded sample of the stress corpus (``benchmarks/stress_corpus.py``, ``--cases N``;
  ``--all`` for every case; refused cases are listed but carry no ratio).

Writes ``speed.json``, ``speed.csv``, ``speed.md`` (table; median and worst ratio; the
slowest five with their stage times) and ``speed.png`` (ratio against faces and
against layers).  Targets (issue): generate within 3x sectioning for every part of
20k faces or more, no part above 3x the 100k-face scan's time, ``check`` at least 3x
faster than sectioning; median ratio under 1.5x as the goal beyond.

Usage::

    python benchmarks/speed.py -o OUT [--cases 40] [--all] [--timeout 900] [--only ID ...]
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import multiprocessing as mp
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import trimesh

sys.path.insert(0, str(Path(__file__).resolve().parent))
import stress_corpus as sc  # noqa: E402

import supportgen  # noqa: E402
from supportgen.io.meshio import write_mesh  # noqa: E402
from supportgen.runs.bench import machine_line  # noqa: E402

STAGES = ("load", "overhangs", "contacts", "layers", "forces", "routing", "sizing", "geometry", "verify")


# ----------------------------------------------------------------------------- parts


def kind_lattice(rng) -> trimesh.Trimesh:
    """A 4 x 4 x 3 frame of 0.8 mm square struts, 8 mm cells, turned a little."""
    s, cell, (nx, ny, nz) = 0.8, 8.0, (4, 4, 3)
    struts = []
    for j in range(ny + 1):
        for k in range(nz + 1):
            struts.append(sc._box((nx * cell + s, s, s), (nx * cell / 2, j * cell, k * cell)))
    for i in range(nx + 1):
        for k in range(nz + 1):
            struts.append(sc._box((s, ny * cell + s, s), (i * cell, ny * cell / 2, k * cell)))
    for i in range(nx + 1):
        for j in range(ny + 1):
            struts.append(sc._box((s, s, nz * cell + s), (i * cell, j * cell, nz * cell / 2)))
    return sc._tilt(sc._union(struts), 20.0, rng)


def kind_drips(rng) -> trimesh.Trimesh:
    """A 40 x 30 x 3 mm plate with 90 small cones (drips) hanging under it at random places."""
    plate = sc._box((40.0, 30.0, 3.0), (0, 0, 0))
    drips = []
    for x, y in rng.uniform((-18, -13), (18, 13), (90, 2)):
        c = trimesh.creation.cone(radius=rng.uniform(0.4, 0.9), height=rng.uniform(0.8, 2.0), sections=8)
        c.apply_transform(trimesh.transformations.rotation_matrix(np.pi, (1, 0, 0)))
        c.apply_translation((x, y, -1.4))
        drips.append(c)
    return sc._union([plate, *drips])


def kind_dome(rng) -> trimesh.Trimesh:
    """A hemispherical shell 40 mm across and 1 mm thick, opening downward."""
    outer = trimesh.creation.icosphere(4, 20.0)
    inner = trimesh.creation.icosphere(4, 19.0)
    cut = sc._box((50, 50, 25), (0, 0, -12.5))
    return sc._difference(sc._difference(outer, inner), cut)


def kind_scan(rng) -> trimesh.Trimesh:
    """The horse scan at 50 mm, turned at random: the 100k-face organic scan."""
    return sc._turn_to_corner(sc._scaled(sc.corpus_mesh("horse.ply"), 50.0), rng)


KINDS = {"kind-scan": kind_scan, "kind-lattice": kind_lattice, "kind-drips": kind_drips, "kind-dome": kind_dome}


def parts(n_cases: int, every: bool, seed: int) -> list[tuple[str, object]]:
    """(id, maker) of every part of the run, in order: corpus, kinds, stress sample."""
    out: list[tuple[str, object]] = []
    if sc.corpus_available():
        for model in sc.CORPUS_MODELS:
            out.append((f"corpus-{model.split('.')[0]}-50", ("corpus", model)))
        out += [(k, ("kind", k)) for k in KINDS]
    else:
        out += [(k, ("kind", k)) for k in KINDS if k != "kind-scan"]
    cases = sc.make_cases(seed)
    if not every:
        rng = np.random.default_rng(seed)
        cases = [cases[i] for i in sorted(rng.choice(len(cases), min(n_cases, len(cases)), replace=False))]
    out += [(c.id, ("stress", c)) for c in cases]
    return out


def build(maker) -> trimesh.Trimesh:
    kind, what = maker
    if kind == "corpus":
        return sc._scaled(sc.corpus_mesh(what), 50.0)
    if kind == "kind":
        return KINDS[what](np.random.default_rng(sc.case_seed(0, what)))
    return sc.build_case(what)


# ----------------------------------------------------------------------------- one part


def sections_s(mesh: trimesh.Trimesh, layer_mm: float) -> tuple[float, int]:
    """Seconds for trimesh to section ``mesh`` at every layer's mid-height, and the layer count."""
    fresh = trimesh.Trimesh(mesh.vertices.copy(), mesh.faces.copy(), process=False)
    lo, hi = fresh.bounds[:, 2]
    z = np.arange(np.floor(lo / layer_mm), np.ceil(hi / layer_mm)) * layer_mm + layer_mm / 2
    t0 = time.perf_counter()
    fresh.section_multiplane([0.0, 0.0, 0.0], [0.0, 0.0, 1.0], z)
    return time.perf_counter() - t0, len(z)


def run_part(pid: str, maker, workdir: Path) -> dict:
    """Generate, section and check one part; a row of the table."""
    settings = supportgen.Settings()
    row: dict = {"id": pid}
    try:
        mesh = build(maker)
    except Exception as e:  # a generator failing is a row, not a stop
        return row | {"outcome": "no-input", "reason": f"{type(e).__name__}: {e}"[:160]}
    row["faces"] = int(len(mesh.faces))
    src = workdir / f"{pid}.stl"
    write_mesh(mesh, src)
    t0 = time.perf_counter()
    try:
        result = supportgen.generate(str(src), settings, name=pid)
    except supportgen.SupportGenError as e:
        return row | {"outcome": "refused", "reason": str(e)[:160], "generate_s": time.perf_counter() - t0}
    gen_s = time.perf_counter() - t0
    timing = result.report.get("timing_s", {})
    sec_s, n_layers = sections_s(result.part, settings.printer.layer_mm)
    row |= {
        "outcome": "passed" if result.report["verification"]["passed"] else "failed-check",
        "part_faces": int(len(result.part.faces)),
        "layers": n_layers,
        "generate_s": gen_s,
        "section_s": sec_s,
        "ratio": gen_s / sec_s if sec_s > 0 else None,
        "stages_s": {k: float(timing.get(k, 0.0)) for k in STAGES},
    }
    out = workdir / f"{pid}.supported.stl"
    write_mesh(result.combined, out)
    t0 = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "supportgen", "check", str(out)], capture_output=True, text=True, timeout=1800
    )
    check_s = time.perf_counter() - t0
    loaded = trimesh.load(out, force="mesh")
    sec2_s, _ = sections_s(loaded, settings.printer.layer_mm)
    row |= {
        "check_s": check_s,
        "check_exit": proc.returncode,
        "check_section_s": sec2_s,
        "check_speedup": sec2_s / check_s if check_s > 0 else None,
    }
    return row


def _child(pid, maker, workdir, conn):
    try:
        conn.send(run_part(pid, maker, Path(workdir)))
    except Exception as e:  # reported as a row: the benchmark goes on
        conn.send({"id": pid, "outcome": "crash", "reason": f"{type(e).__name__}: {e}"[:160]})
    finally:
        conn.close()


def run_isolated(pid, maker, workdir: Path, timeout: float) -> dict:
    """:func:`run_part` in its own process, stopped after ``timeout`` seconds."""
    ctx = mp.get_context("spawn")
    recv, send = ctx.Pipe(duplex=False)
    t0 = time.perf_counter()
    proc = ctx.Process(target=_child, args=(pid, maker, str(workdir), send))
    proc.start()
    send.close()
    row = None
    if recv.poll(timeout):
        try:
            row = recv.recv()
        except EOFError:
            row = None
    proc.join(5)
    if proc.is_alive():
        proc.kill()
        proc.join()
    if row is None:
        row = {"id": pid, "outcome": "timeout", "reason": f"no result in {timeout:.0f} s"}
    row["wall_s"] = time.perf_counter() - t0
    return row


# ----------------------------------------------------------------------------- tables


def summary(rows: list[dict]) -> dict:
    """Median and worst ratios, the targets and the slowest five."""
    timed = [r for r in rows if r.get("ratio") is not None]
    big = [r for r in timed if r.get("part_faces", 0) >= 20_000]
    ratios = np.array([r["ratio"] for r in timed]) if timed else np.zeros(0)
    scan = next((r for r in timed if r["id"] == "kind-scan"), None)
    checks = [r["check_speedup"] for r in timed if r.get("check_speedup")]
    worst = max(timed, key=lambda r: r["ratio"]) if timed else None
    return {
        "parts": len(rows),
        "timed": len(timed),
        "median_ratio": float(np.median(ratios)) if timed else None,
        "worst_ratio": float(ratios.max()) if timed else None,
        "worst_part": worst["id"] if worst else None,
        "parts_20k_faces": len(big),
        "parts_20k_over_3x": [r["id"] for r in big if r["ratio"] > 3.0],
        "scan_generate_s": scan["generate_s"] if scan else None,
        "parts_over_3x_scan_time": [r["id"] for r in timed if scan and r["generate_s"] > 3 * scan["generate_s"]],
        "check_speedup_median": float(np.median(checks)) if checks else None,
        "check_speedup_worst": float(min(checks)) if checks else None,
        "slowest": [r["id"] for r in sorted(timed, key=lambda r: -r["generate_s"])[:5]],
    }


def markdown(rows: list[dict], summ: dict, command: str, machine: str) -> str:
    f = lambda v, d=2: "" if v is None else f"{v:.{d}f}"  # noqa: E731
    lines = [
        f"# Speed: generate against sectioning, {summ['parts']} parts",
        "",
        f"`{command}`",
        "",
        machine,
        "",
        f"- generate / sectioning: median **{f(summ['median_ratio'])}x**, worst **{f(summ['worst_ratio'])}x** "
        f"({summ['worst_part']}), over {summ['timed']} supported parts",
        f"- parts of 20k faces or more: {summ['parts_20k_faces']}; over 3x: "
        f"{', '.join(summ['parts_20k_over_3x']) or 'none'}",
        f"- the 100k-face scan took {f(summ['scan_generate_s'], 1)} s; parts over 3x that: "
        f"{', '.join(summ['parts_over_3x_scan_time']) or 'none'}",
        f"- `supportgen check` (whole command) against sectioning its STL: median "
        f"{f(summ['check_speedup_median'])}x faster, worst {f(summ['check_speedup_worst'])}x",
        "",
        "| part | faces | layers | outcome | generate s | section s | ratio | check s | check speed-up |",
        "|---|---:|---:|---|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        lines.append(
            f"| {r['id']} | {r.get('part_faces', r.get('faces', ''))} | {r.get('layers', '')} | {r['outcome']} | "
            f"{f(r.get('generate_s'), 1)} | {f(r.get('section_s'))} | {f(r.get('ratio'))} | "
            f"{f(r.get('check_s'), 1)} | {f(r.get('check_speedup'))} |"
        )
    lines += ["", "## Slowest five, stage times (s)", "", "| part | " + " | ".join(STAGES) + " |"]
    lines.append("|---|" + "---:|" * len(STAGES))
    by_id = {r["id"]: r for r in rows}
    for pid in summ["slowest"]:
        st = by_id[pid]["stages_s"]
        lines.append(f"| {pid} | " + " | ".join(f"{st.get(k, 0.0):.1f}" for k in STAGES) + " |")
    refused = [r for r in rows if r.get("ratio") is None]
    if refused:
        lines += ["", "## Parts without a ratio", ""]
        lines += [f"- `{r['id']}`: {r['outcome']}: {r.get('reason', '')}" for r in refused]
    return "\n".join(lines) + "\n"


def plot(rows: list[dict], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    timed = [r for r in rows if r.get("ratio") is not None]
    fig, axes = plt.subplots(1, 2, figsize=(11, 4.2), constrained_layout=True)
    for ax, key, label in ((axes[0], "part_faces", "faces"), (axes[1], "layers", "layers")):
        x = [r[key] for r in timed]
        y = [r["ratio"] for r in timed]
        ax.scatter(x, y, s=18, color="#0072b2")
        ax.axhline(3.0, color="#d55e00", ls="--", lw=1, label="target 3x")
        ax.axhline(1.5, color="#009e73", ls=":", lw=1, label="goal 1.5x")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel(label)
        ax.set_ylabel("generate / trimesh sectioning")
        ax.legend(loc="upper left", fontsize=8)
    fig.suptitle("generate time over section_multiplane time of the same layers")
    fig.savefig(path, dpi=110)
    plt.close(fig)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("-o", "--output", default="speed-out", help="folder for the tables and plot")
    ap.add_argument("--cases", type=int, default=40, help="seeded stress-corpus cases to include")
    ap.add_argument("--all", action="store_true", help="every stress-corpus case")
    ap.add_argument("--only", action="append", default=[], help="run only this part id (repeatable)")
    ap.add_argument("--seed", type=int, default=0, help="seed of the stress corpus and its sample")
    ap.add_argument("--timeout", type=float, default=900.0, help="seconds per part")
    ap.add_argument("--resume", action="store_true", help="keep the rows already in OUT/speed.jsonl")
    args = ap.parse_args(argv)
    out = Path(args.output)
    out.mkdir(parents=True, exist_ok=True)
    machine = machine_line()
    print(machine, flush=True)
    todo = parts(args.cases, args.all, args.seed)
    if args.only:
        todo = [p for p in todo if p[0] in set(args.only)]
    log = out / "speed.jsonl"
    rows = [json.loads(x) for x in log.read_text().splitlines() if x.strip()] if args.resume and log.exists() else []
    done = {r["id"] for r in rows}
    if not args.resume:
        log.write_text("")
    with tempfile.TemporaryDirectory() as tmp:
        for i, (pid, maker) in enumerate(todo, 1):
            if pid in done:
                continue
            row = run_isolated(pid, maker, Path(tmp), args.timeout)
            rows.append(row)
            with log.open("a") as fh:
                fh.write(json.dumps(row) + "\n")
            print(
                f"[{i}/{len(todo)}] {pid}: {row['outcome']} generate {row.get('generate_s', 0):.1f} s, "
                f"section {row.get('section_s', 0):.2f} s, ratio {row.get('ratio') or 0:.2f}",
                flush=True,
            )
    order = {pid: k for k, (pid, _) in enumerate(todo)}
    rows.sort(key=lambda r: order.get(r["id"], len(order)))
    summ = summary(rows)
    command = "python benchmarks/speed.py " + " ".join(sys.argv[1:] if argv is None else argv)
    (out / "speed.json").write_text(json.dumps({"machine": machine, "summary": summ, "rows": rows}, indent=1))
    (out / "speed.md").write_text(markdown(rows, summ, command, machine))
    buf = io.StringIO()
    cols = ["id", "faces", "part_faces", "layers", "outcome", "generate_s", "section_s", "ratio", "check_s"]
    cols += ["check_section_s", "check_speedup", *STAGES]
    w = csv.writer(buf)
    w.writerow(cols)
    for r in rows:
        w.writerow([r.get(c, r.get("stages_s", {}).get(c, "")) for c in cols])
    (out / "speed.csv").write_text(buf.getvalue())
    if summ["timed"]:
        plot(rows, out / "speed.png")
    print((out / "speed.md").read_text().split("\n\n| part")[0])
    return 0


if __name__ == "__main__":
    sys.exit(main())
