"""Benchmark: the stress corpus, every case supported with default settings and checked independently.

The cases (``benchmarks/stress_corpus.py``): the shared corpus models at 30, 50 and
80 mm in 30 random orientations each, procedural parts of our own, messy variants of
both, and a few inputs that have no printable inside or are drawn in the wrong units.
Each case's mesh is written as a binary STL (as a user's file arrives), supported by
``supportgen.generate(path, supportgen.Settings(), name=ID)`` and its combined solid
written by the project's writer (``--full-save``: every output, by ``Result.save``); the written
``ID.supported.stl`` is then re-sliced by trimesh ``section_multiplane`` + shapely (not
the project's rasteriser) and must read back watertight with no island.

Outcomes: ``pass``; ``refused-ok`` (a one-line SupportGenError naming the input, for an
input that truly has no inside, has the wrong units, or whose footprint exceeds the
plate); ``refused`` (a printable part refused: a failure); ``fail-check`` (the output
fails the independent check); ``flagged`` (the output passes the independent check but
the project's own verify fails it, e.g. tips under the safety factor: the user sees a
failing report, so it is not a pass, though nothing is silent); ``silent-pass`` (an input that should have been refused
was supported instead); ``crash`` (any other exception); ``timeout``.

Writes ``OUTDIR/stress.json`` (every case) and ``OUTDIR/stress.md`` (the table); each
row is also appended to ``OUTDIR/stress.jsonl`` as it finishes (``--resume`` continues from it).

Usage::

    python benchmarks/stress.py [-o OUTDIR] [--cases N] [--case ID] [--workers 2]
                                [--timeout 300] [--seed 0] [--keep-outputs] [--full-save] [--resume] [--summarise] [--ci] [--list]
                                [--orient keep|auto]
"""

from __future__ import annotations

import argparse
import functools
import json
import multiprocessing as mp
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
import traceback
from collections import Counter
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import stress_corpus as sc  # noqa: E402

import supportgen  # noqa: E402
from supportgen.io.meshio import write_mesh  # noqa: E402
from supportgen.runs.bench import machine_line  # noqa: E402

FAILING = ("refused", "fail-check", "flagged", "silent-pass", "crash", "timeout")


def _one_line_naming(msg: str, case_id: str) -> bool:
    return "\n" not in msg.strip() and case_id in msg


def _too_large(mesh, settings) -> bool:
    """The part's footprint or height (with the base margin and lift) exceeds the build volume."""
    pr, rules = settings.printer, settings.rules
    ext = mesh.extents
    return bool(
        ext[0] + 2 * rules.base_margin_mm > pr.build_x_mm
        or ext[1] + 2 * rules.base_margin_mm > pr.build_y_mm
        or ext[2] + rules.elevation_mm > pr.build_z_mm
    )


def _plural(msg: str) -> str:
    """ "1 edge" and "3 edges" as one class: "# edge(s)" (idempotent)."""
    return re.sub(r"# (edge|hole|face|tip|island|speck|vertex|vertice)s?\b(?!\()", r"# \1(s)", msg)


def _message_class(msg: str, case_id: str) -> str:
    """A message with the input name and the numbers taken out: the failure's class."""
    msg = msg.strip().splitlines()[-1] if msg.strip() else ""
    msg = re.sub(r"\S*" + re.escape(case_id) + r"\.stl", "INPUT", msg).replace(case_id, "ID")
    msg = re.sub(r"[-+]?\d+(\.\d+)?", "#", msg)
    msg = _plural(msg)
    return msg[:110]


@functools.cache
def code_version() -> str:
    """The commit the supportgen package was imported from (``+dirty`` with uncommitted changes), so a
    resumed run shows which rows came from which code."""
    here = Path(supportgen.__file__).resolve().parent
    try:
        rev = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=here, capture_output=True, text=True)
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "."], cwd=here, capture_output=True, text=True)
    except OSError:
        return "unknown"
    if rev.returncode != 0:
        return "unknown"
    return rev.stdout.strip() + ("+dirty" if dirty.stdout.strip() else "")


def run_case(case: sc.Case, outdir: Path, keep: bool = False, full_save: bool = False, orient: str = "keep") -> dict:
    """Build, support (standing as given, or as ``orient="auto"`` chooses), save and check one case;
    never raises."""
    settings = supportgen.Settings()
    pr = settings.printer
    row = {"id": case.id, "generator": case.generator, "seed": case.seed, "params": case.params, "expect": case.expect}
    row["code"] = code_version()
    t0 = time.perf_counter()
    try:
        mesh = sc.build_case(case)
    except Exception as e:  # a generator bug is not the project's: record it apart
        row.update(outcome="crash", cls=f"generator {type(e).__name__}: {e}"[:120], seconds=0.0)
        return row
    inputs = outdir / "inputs"
    inputs.mkdir(parents=True, exist_ok=True)
    path = inputs / f"{case.id}.stl"
    mesh.export(path)
    row["input_faces"] = int(len(mesh.faces))
    # The input's volume bounds the output's only for one clean solid (messy variants overlap shells
    # that count once; a doubled shell reads as twice the volume).
    clean = bool(case.generator in ("corpus",) + sc.PROCEDURAL and mesh.is_watertight and mesh.is_winding_consistent)
    part_volume = abs(float(mesh.volume)) if clean else None
    t0 = time.perf_counter()
    try:
        result = supportgen.generate(str(path), settings, name=case.id, orient=orient)
        if full_save:
            paths = result.save(outdir / "cases" / case.id)
        else:  # the combined solid only, by the writer Result.save uses (the plots cost ~3 s a case)
            paths = {"combined": outdir / "cases" / case.id / f"{case.id}.supported.stl"}
            paths["combined"].parent.mkdir(parents=True, exist_ok=True)
            write_mesh(result.combined, paths["combined"])
        row["generate_s"] = time.perf_counter() - t0
        row["project_passed"] = bool(result.report["verification"]["passed"])
        row["project_failures"] = [_message_class(f, case.id) for f in result.report["verification"]["failures"]]
        row["stages_s"] = {k: round(float(v), 3) for k, v in result.report.get("timing_s", {}).items()}
    except supportgen.SupportGenError as e:
        msg = str(e)
        row.update(seconds=time.perf_counter() - t0, message=msg, exception=type(e).__name__)
        ok_refusal = case.expect == "refuse" or (
            isinstance(e, supportgen.PlacementError) and _too_large(mesh, settings)
        )
        if not _one_line_naming(msg, case.id):
            row.update(
                outcome="refused",
                cls=f"{type(e).__name__} (message not one line naming the input): {_message_class(msg, case.id)}",
            )
        elif ok_refusal:
            row.update(outcome="refused-ok", cls=f"{type(e).__name__}: {_message_class(msg, case.id)}")
        else:
            row.update(outcome="refused", cls=f"{type(e).__name__}: {_message_class(msg, case.id)}")
        return row
    except Exception as e:
        last = traceback.format_exc().strip().splitlines()[-1]
        row.update(
            outcome="crash",
            seconds=time.perf_counter() - t0,
            message=last,
            cls=f"crash {type(e).__name__}: {_message_class(last, case.id)}",
        )
        return row
    try:
        chk = sc.independent_check(paths["combined"], pr.pixel_mm, pr.layer_mm, part_volume)
    except Exception as e:
        last = traceback.format_exc().strip().splitlines()[-1]
        chk = {"failures": [f"check-error {type(e).__name__}: {last}"[:120]]}
    row["check"] = chk
    row["seconds"] = time.perf_counter() - t0
    if case.expect == "refuse":
        row.update(
            outcome="silent-pass",
            cls="silent-pass: supported an input that should be refused "
            f"({case.params.get('shape')}); check: {','.join(chk['failures']) or 'passed'}",
        )
    elif chk["failures"]:
        row.update(
            outcome="fail-check",
            cls="check: "
            + ",".join(chk["failures"])
            + (" (the project's own verify passed it)" if row["project_passed"] else " (verify failed too)"),
        )
    else:
        row.update(**_flagged(row))
    if not keep and row["outcome"] == "pass":  # failing cases keep their input and output for diagnosis
        shutil.rmtree(outdir / "cases" / case.id, ignore_errors=True)
        path.unlink(missing_ok=True)
    return row


def _flagged(row: dict) -> dict:
    """Outcome of a case whose output passed the independent check: ``pass``, or
    ``flagged`` when the project's own verify failed it (rows of older runs carry no
    reasons, only ``project_passed``)."""
    if row.get("project_passed", True):
        return {"outcome": "pass", "cls": ""}
    why = ",".join(row.get("project_failures") or ["reason not recorded"])
    return {"outcome": "flagged", "cls": f"flagged: the project's verify failed it: {why}"}


def _child(case, outdir, keep, full_save, orient, conn):
    try:
        conn.send(run_case(case, outdir, keep, full_save, orient))
    finally:
        conn.close()


def _unfinished(case, outcome: str, cls: str, t0: float) -> dict:
    """The row of a case whose worker gave no result (it died or ran out of time)."""
    return {
        "id": case.id,
        "generator": case.generator,
        "seed": case.seed,
        "params": case.params,
        "expect": case.expect,
        "outcome": outcome,
        "cls": cls,
        "seconds": time.perf_counter() - t0,
    }


def run_cases(
    cases,
    outdir: Path,
    workers: int = 2,
    timeout: float = 300.0,
    keep: bool = False,
    full_save: bool = False,
    echo=print,
    log: Path | None = None,
    orient: str = "keep",
) -> list[dict]:
    """Run ``cases`` in up to ``workers`` forked processes, one per case, each killed past ``timeout``;
    each finished row is appended to ``log`` (JSON lines) as it arrives, when given."""
    ctx = mp.get_context("fork")
    for m in sc.CORPUS_MODELS:  # read the corpus once; children inherit it
        if sc.corpus_available():
            sc.corpus_mesh(m)
    todo = list(cases)
    running: dict = {}
    rows = []
    while todo or running:
        while todo and len(running) < workers:
            case = todo.pop(0)
            recv, send = ctx.Pipe(duplex=False)
            p = ctx.Process(target=_child, args=(case, outdir, keep, full_save, orient, send), daemon=True)
            p.start()
            send.close()
            running[case.id] = (case, p, recv, time.perf_counter())
        time.sleep(0.05)
        for cid, (case, p, recv, t0) in list(running.items()):
            row = None
            if recv.poll():
                try:
                    row = recv.recv()
                except EOFError:
                    row = None
                p.join()
                if row is None:
                    row = _unfinished(case, "crash", "crash: worker died", t0)
            elif not p.is_alive():
                row = _unfinished(case, "crash", f"crash: worker died (exit code {p.exitcode})", t0)
            elif time.perf_counter() - t0 > timeout:
                p.kill()
                p.join()
                row = _unfinished(case, "timeout", f"timeout (> {timeout:g} s)", t0)
            if row is not None:
                recv.close()
                del running[cid]
                rows.append(row)
                if log is not None:
                    with open(log, "a") as fh:
                        fh.write(json.dumps(row, default=str) + "\n")
                echo(
                    f"[{len(rows)}/{len(cases)}] {cid}: {row['outcome']} {row.get('seconds', 0):.1f}s {row.get('cls', '')}"
                )
    order = {c.id: i for i, c in enumerate(cases)}
    return sorted(rows, key=lambda r: order[r["id"]])


def summarise(rows: list[dict]) -> dict:
    n = len(rows)
    times = [r["seconds"] for r in rows if r.get("seconds") is not None]
    for r in rows:  # rows logged by an older run: the same class and outcome rules
        if r["outcome"] == "pass":
            r.update(_flagged(r))
        r["cls"] = _plural(r.get("cls", ""))
    counts = Counter(r["outcome"] for r in rows)
    classes = Counter(r["cls"] for r in rows if r["outcome"] in FAILING)
    example = {}
    for r in rows:
        if r["outcome"] in FAILING:
            example.setdefault(r["cls"], r["id"])
    worst = max(rows, key=lambda r: r.get("seconds") or 0.0) if rows else None
    ok = counts["pass"] + counts["refused-ok"]
    return {
        "cases": n,
        "counts": dict(counts),
        "pass_rate": ok / n if n else 0.0,
        "strict_pass_rate": counts["pass"] / n if n else 0.0,
        "median_s": statistics.median(times) if times else None,
        "worst_s": worst.get("seconds") if worst else None,
        "worst_case": worst["id"] if worst else None,
        "classes": [{"class": c, "cases": k, "example": example[c]} for c, k in classes.most_common()],
        "failing": [r["id"] for r in rows if r["outcome"] in FAILING],
        "code": dict(Counter(r.get("code", "unrecorded") for r in rows)),
        "by_generator": {
            g: dict(Counter(r["outcome"] for r in rows if r["generator"] == g))
            for g in sorted({r["generator"] for r in rows})
        },
    }


def markdown(summary: dict, machine: str, argv: str) -> str:
    s = summary
    lines = [
        f"# Stress corpus: {s['cases']} cases",
        "",
        f"`{argv}`",
        "",
        machine,
        "",
        f"- pass rate (pass + right refusals): **{100 * s['pass_rate']:.1f} %**; "
        f"supported and passing both checks (ours and the independent one): {100 * s['strict_pass_rate']:.1f} %",
        (
            f"- time per case: median {s['median_s']:.1f} s, worst {s['worst_s']:.1f} s ({s['worst_case']})"
            if s["median_s"] is not None
            else "- no case has run"
        ),
        "- code (rows per commit): " + ", ".join(f"{k} {v}" for k, v in s.get("code", {}).items()),
        "",
        "| outcome | cases |",
        "|---|---:|",
    ]
    lines += [f"| {k} | {v} |" for k, v in sorted(s["counts"].items(), key=lambda kv: -kv[1])]
    lines += ["", "## Failure classes", "", "| class | cases | e.g. |", "|---|---:|---|"]
    lines += [f"| {c['class'].replace('|', '/')} | {c['cases']} | `{c['example']}` |" for c in s["classes"]]
    lines += ["", "## By generator", "", "| generator | outcomes |", "|---|---|"]
    lines += [f"| {g} | {', '.join(f'{k} {v}' for k, v in sorted(o.items()))} |" for g, o in s["by_generator"].items()]
    lines += ["", "## Failing cases", "", ", ".join(f"`{i}`" for i in s["failing"]) or "none", ""]
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("-o", "--output", type=Path, default=Path(tempfile.gettempdir()) / "supportgen-stress")
    ap.add_argument("--cases", type=int, default=None, help="a seeded subset of N cases")
    ap.add_argument("--case", action="append", default=[], help="run only this case id (repeatable)")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--timeout", type=float, default=300.0, help="seconds per case")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--keep-outputs", action="store_true", help="keep the input and outputs of passing cases too")
    ap.add_argument(
        "--full-save",
        action="store_true",
        help="save every output with Result.save (plots and reports too), not only the combined STL",
    )
    ap.add_argument("--ci", action="store_true", help="the 30 small cases of tests/test_stress.py instead")
    ap.add_argument("--resume", action="store_true", help="keep the rows already in OUTDIR/stress.jsonl")
    ap.add_argument(
        "--summarise", action="store_true", help="write the table from OUTDIR/stress.jsonl without running anything"
    )
    ap.add_argument("--list", action="store_true", help="list the case ids and stop")
    ap.add_argument(
        "--orient",
        choices=("keep", "auto"),
        default="keep",
        help="support each case as given (default) or standing as the orientation search chooses",
    )
    args = ap.parse_args(argv)
    cases = sc.ci_cases(30, args.seed) if args.ci else sc.make_cases(args.seed)
    if not sc.corpus_available():
        print(f"note: shared corpus not found at {sc.CORPUS}; running the procedural and messy cases only")
    if args.case:
        known = {c.id: c for c in cases}
        missing = [i for i in args.case if i not in known]
        if missing:
            print(f"stress: unknown case id(s) {', '.join(missing)}; see --list", file=sys.stderr)
            return 2
        cases = [known[i] for i in args.case]
    else:
        # A seeded order (and subset), so that any prefix of a run is a fair sample of the corpus.
        pick = np.random.default_rng(args.seed).permutation(len(cases))[: args.cases or len(cases)]
        cases = [cases[i] for i in pick]
    if args.list:
        for c in cases:
            print(c.id, c.generator, c.seed, json.dumps(c.params))
        return 0
    machine = machine_line()
    print(machine)
    args.output.mkdir(parents=True, exist_ok=True)
    log = args.output / "stress.jsonl"
    done = []
    if (args.resume or args.summarise) and log.is_file():
        wanted = {c.id for c in cases}
        done = [r for r in map(json.loads, log.read_text().splitlines()) if r["id"] in wanted]
        seen = {r["id"] for r in done}
        cases_left = [c for c in cases if c.id not in seen]
        print(f"resuming: {len(done)} case(s) already in {log}, {len(cases_left)} to run")
    else:
        log.unlink(missing_ok=True)
        cases_left = cases
    t0 = time.perf_counter()
    if args.summarise:  # the table of the rows logged so far (a seeded-order prefix of the corpus)
        rows = done
        print(f"summarising {len(rows)} of {len(cases)} cases")
    else:
        rows = done + run_cases(
            cases_left,
            args.output,
            args.workers,
            args.timeout,
            args.keep_outputs,
            args.full_save,
            log=log,
            orient=args.orient,
        )
    order = {c.id: i for i, c in enumerate(cases)}
    rows.sort(key=lambda r: order[r["id"]])
    wall = time.perf_counter() - t0
    summary = summarise(rows)
    summary["wall_s"] = wall
    summary["workers"] = args.workers
    summary["corpus_cases"] = len(cases)
    cmd = "python benchmarks/stress.py " + " ".join(sys.argv[1:] if argv is None else argv)
    (args.output / "stress.json").write_text(
        json.dumps({"machine": machine, "command": cmd, "summary": summary, "cases": rows}, indent=1, default=str)
    )
    md = markdown(summary, machine, cmd)
    if len(rows) < len(cases):
        md = md.replace(
            "\n",
            f"\n\n**Partial run: {len(rows)} of {len(cases)} cases** (the first of a seeded order, "
            "so a fair sample; finish with --resume)\n",
            1,
        )
    else:
        md += f"\nwall time {wall:.0f} s with {args.workers} workers\n"
    (args.output / "stress.md").write_text(md)
    print(md)
    print(f"wrote {args.output / 'stress.json'} and {args.output / 'stress.md'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
