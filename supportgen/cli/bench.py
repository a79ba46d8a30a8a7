"""``supportgen bench``: compare strategies over a folder of models (parsing and printing only).

Registered from ``cli/main.py``::

    from . import bench as bench_cmd
    bench_cmd.add_parser(sub, [common])
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .options import positive, rotate_option, settings_from, show_progress

__all__ = ["add_parser", "cmd_bench", "parse_strategies", "parse_orients"]

EXIT_OK, EXIT_FAILED = 0, 1


def _names(text: str, valid, what: str, plural: str) -> list[str]:
    """The comma-separated names of ``text``, each one of ``valid``, in order without repeats;
    anything else is an argparse error listing the valid names."""
    names = [n.strip() for n in text.split(",") if n.strip()]
    if not names:
        raise argparse.ArgumentTypeError(f"no {what} named; valid {plural}: {', '.join(valid)}")
    for n in names:
        if n not in valid:
            raise argparse.ArgumentTypeError(f"unknown {what} '{n}'; valid {plural}: {', '.join(valid)}")
    return list(dict.fromkeys(names))


def parse_strategies(text: str) -> list[str]:
    """``"straight,tree"`` -> ``["straight", "tree"]``; an unknown name is an argparse error listing the valid ones.

    Examples
    --------
    >>> parse_strategies("straight, tree")
    ['straight', 'tree']
    >>> parse_strategies("straight,pillars")
    Traceback (most recent call last):
    ...
    argparse.ArgumentTypeError: unknown strategy 'pillars'; valid strategies: straight, tree
    """
    from supportgen.settings import STRATEGY_NAMES

    return _names(text, STRATEGY_NAMES, "strategy", "strategies")


def parse_orients(text: str) -> list[str]:
    """``"keep,auto"`` -> ``["keep", "auto"]``; anything else is an argparse error naming the choices.

    Examples
    --------
    >>> parse_orients("keep, auto")
    ['keep', 'auto']
    >>> parse_orients("up")
    Traceback (most recent call last):
    ...
    argparse.ArgumentTypeError: unknown orientation choice 'up'; valid orientation choices: keep, auto
    """
    from supportgen.settings import ORIENT_CHOICES

    return _names(text, ORIENT_CHOICES, "orientation choice", "orientation choices")


def add_parser(subparsers, parents) -> argparse.ArgumentParser:
    """Register ``bench`` on ``subparsers`` with the common options ``parents``; return its parser."""
    p = subparsers.add_parser(
        "bench",
        parents=list(parents),
        help="compare support strategies over a folder of models",
        description="Support every model in CORPUS_DIR with every strategy; write bench.csv, bench.md, "
        "summary.csv (ratios against the baseline), plots, and each run's files in OUT/<strategy>/.",
    )
    p.add_argument("corpus", metavar="CORPUS_DIR", help="folder of STL, OBJ, PLY or 3MF files")
    p.add_argument("-o", "--output", required=True, metavar="OUT", help="output folder")
    p.add_argument(
        "--strategies",
        type=parse_strategies,
        default=["straight", "tree"],
        metavar="A,B,...",
        help="strategies to run, comma-separated (default: straight,tree)",
    )
    p.add_argument(
        "--baseline",
        metavar="NAME",
        help="strategy the others are compared with (default: straight if run, else the first)",
    )
    p.add_argument(
        "--scale",
        type=positive(float, "the longest side in mm as a positive number, e.g. 50"),
        metavar="MM",
        help="scale each model so its longest side is MM and centre it (for unitless meshes)",
    )
    p.add_argument(
        "--memory",
        choices=("rss", "tracemalloc"),
        default="rss",
        help="peak memory by resident-set growth (default) or traced allocations (slows the run)",
    )
    p.add_argument(
        "--orient",
        type=parse_orients,
        default=["keep"],
        metavar="keep|auto|keep,auto",
        help="orientation of each part: the given one (keep, default), the one chosen from the physics (auto), "
        "or both, compared in OUT/orient.csv and bench.md",
    )
    rotate_option(p)
    p.set_defaults(func=cmd_bench)
    return p


def cmd_bench(args) -> int:
    """Run the bench; exit 0 when every run succeeded and passed verification, else 1."""
    from supportgen.runs.bench import run_bench

    strategies = args.strategies
    baseline = args.baseline or ("straight" if "straight" in strategies else strategies[0])
    table = run_bench(
        Path(args.corpus),
        Path(args.output),
        settings_from(args),
        strategies,
        baseline=baseline,
        scale_mm=args.scale,
        memory=args.memory,
        progress=show_progress(args),
        orients=args.orient,
        rotate=args.rotate,
    )
    status = EXIT_OK
    for r in table.rows:
        if r["status"] != "ok":
            print(f"supportgen: error: {r['model']} / {r['strategy']} / {r['orient']}: {r['error']}", file=sys.stderr)
            status = EXIT_FAILED
        elif not r["passed"]:
            print(
                f"supportgen: check failed: {r['model']} / {r['strategy']} / {r['orient']}: "
                f"{r['islands']} island(s), largest reach {r['max_reach_mm']} mm",
                file=sys.stderr,
            )
            status = EXIT_FAILED
    if not args.quiet:
        for row in table.summary:
            if row["model"].startswith("all"):
                figs = ", ".join(f"{k[:-6]} x{v:.2f}" for k, v in row.items() if k.endswith("_ratio") and v is not None)
                print(f"{row['strategy']} vs {baseline}, {row['model']}: {figs}")
        for row in table.orient_rows:
            if row["model"] == "median over parts":
                figs = ", ".join(f"{k[:-6]} x{v:.2f}" for k, v in row.items() if k.endswith("_ratio") and v is not None)
                print(f"auto vs keep ({row['strategy']}), median over parts: {figs}")
        print(f"table: {table.paths['csv']} and {table.paths['markdown']}; ratios: {table.paths['summary']}")
    return status
