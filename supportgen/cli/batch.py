"""``supportgen batch``: parse the options, call :func:`supportgen.runs.batch.run_batch`, print the outcome.

Registered from ``cli/main.py``::

    from . import batch as batch_cmd
    batch_cmd.add_parser(sub, [common, strategy])

Exit status: 0 when every row is ``ok`` (supported and passes the check, or up
to date with an ``ok`` row), 1 when any row is ``failed-check``, ``refused``,
``error`` or ``timeout`` (a resumed row keeps its earlier status), 2 for
usage errors, 130 after Ctrl-C or SIGTERM (the summary of what finished is
still written, with ``interrupted: true``).
"""

from __future__ import annotations

import sys
from pathlib import Path

from .options import err, nonnegative_seconds, orientation_options, positive, settings_from, show_progress

__all__ = ["add_parser", "cmd_batch"]


def add_parser(subparsers, parents) -> None:
    """Register ``batch`` on ``subparsers``; ``parents`` carry the common options and --strategy."""
    p = subparsers.add_parser(
        "batch",
        parents=list(parents),
        help="support every mesh in a folder tree, in parallel",
        description="Support every STL/OBJ/PLY/3MF file under DIR (recursively) into a mirrored tree under OUT, "
        "then write OUT/batch-summary.csv and .json and OUT/index.html. Each file's status is one of: "
        "ok (supported, passes the print check); failed-check (supported, outputs saved, the check fails); "
        "refused (the input was refused: bad mesh, units, placement, settings, memory); error (anything else "
        "went wrong, including a worker that died); timeout. The summary ends with totals: parts, resin (ml) "
        "and print time (the sum of the per-part times: parts printed one at a time). Exit status 1 when any "
        "row is not ok.",
    )
    p.add_argument("input", metavar="DIR", help="folder searched recursively for .stl .obj .ply .3mf files")
    p.add_argument("-o", "--output", required=True, metavar="OUT", help="output folder (mirrors DIR)")
    p.add_argument(
        "--workers",
        type=positive(int, "a worker count of 1 or more"),
        metavar="N",
        help="worker processes (default: all cores)",
    )
    p.add_argument(
        "--resume",
        action="store_true",
        help="do not redo files whose outputs exist for the same input bytes, settings and strategy; their rows "
        "keep the status and reason of the run that made them, marked reused",
    )
    p.add_argument(
        "--cluster",
        metavar="ADDRESS",
        help="Dask scheduler address, e.g. tcp://10.0.0.5:8786 (pip install 'supportgen[cluster]'); "
        "workers must see DIR and OUT at the same paths",
    )
    p.add_argument("--pattern", metavar="GLOB", help="only files whose relative path or name matches, e.g. '*lid*'")
    p.add_argument(
        "--timeout",
        type=positive(float, "a time in seconds above 0"),
        metavar="S",
        help="stop any one file after S seconds",
    )
    p.add_argument(
        "--memory-limit",
        type=positive(float, "a memory size in MB above 0"),
        metavar="MB",
        help="refuse files whose estimated peak memory per worker exceeds MB",
    )
    p.add_argument(
        "--name-clash",
        choices=("rename", "refuse"),
        default="rename",
        help="files of one folder whose output names collide: name the later ones NAME-2 ... "
        "(default) or record them as refused",
    )
    p.add_argument(
        "--wait",
        type=nonnegative_seconds,
        default=0.0,
        metavar="SECONDS",
        help="if another run is writing to OUT, wait up to SECONDS for it (default: refuse at once)",
    )
    p.add_argument(
        "--protect",
        action="append",
        metavar="SELECTOR",
        help="faces of every part that must get no tip or landing (repeatable; see generate --help); "
        "a file NAME.protect.toml next to a part adds its own",
    )
    orientation_options(p)
    p.set_defaults(func=cmd_batch)


def cmd_batch(args) -> int:
    """Run the batch described by parsed ``args``; return the exit status."""
    from supportgen.runs.batch import count_line, run_batch

    summary = run_batch(
        Path(args.input),
        Path(args.output),
        settings_from(args),
        strategy=args.strategy,
        workers=args.workers,
        cluster=args.cluster,
        resume=args.resume,
        pattern=args.pattern,
        timeout_s=args.timeout,
        memory_limit_mb=args.memory_limit,
        progress=show_progress(args),
        name_clash=args.name_clash,
        wait_s=args.wait,
        protect=args.protect or (),
        orient=args.orient,
        rotate=args.rotate,
    )
    for row in summary.results:
        if row.bad:
            err(f"{row.status}{' (reused)' if row.reused else ''}: {row.file}: {row.reason}")
    if summary.interrupted:
        err(
            f"interrupted: {len(summary.results)} file(s) finished, {summary.pending} not done; "
            "run again with --resume to finish"
        )
    if not args.quiet:
        line = count_line(summary.results) if summary.results else "no mesh files found"
        print(f"batch: {line}; summary: {summary.csv_path}", file=sys.stdout)
    return summary.exit_code
