"""What every sub-command shares: the common options, the strategy option,
number checks, settings from the options, and the one-line error printer."""

from __future__ import annotations

import argparse
import sys

__all__ = [
    "common_options",
    "strategy_option",
    "rotate_option",
    "orientation_options",
    "positive",
    "nonnegative_seconds",
    "settings_from",
    "err",
]


def common_options() -> argparse.ArgumentParser:
    """--profile, --set, --quiet and --debug, as a parent parser."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--profile", metavar="FILE", help="built-in profile name or TOML profile file")
    common.add_argument(
        "--set",
        action="append",
        metavar="NAME=VALUE",
        help="override one setting (repeatable), e.g. --set contact_spacing_mm=1.8",
    )
    common.add_argument("--quiet", action="store_true", help="no progress bars or summaries")
    common.add_argument(
        "--progress",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="progress bars on stderr (default: only when stderr is a terminal, so logs stay clean)",
    )
    common.add_argument("--debug", action="store_true", help="show tracebacks")
    return common


def show_progress(args) -> bool:
    """Progress bars: never with --quiet; else as --progress/--no-progress say; else only on a terminal."""
    if args.quiet:
        return False
    if getattr(args, "progress", None) is not None:
        return bool(args.progress)
    return sys.stderr.isatty()


def strategy_option() -> argparse.ArgumentParser:
    """--strategy with the registered names and the pipeline's default, as a parent parser."""
    from supportgen.settings import DEFAULT_STRATEGY, STRATEGY_NAMES

    parent = argparse.ArgumentParser(add_help=False)
    parent.add_argument(
        "--strategy",
        default=DEFAULT_STRATEGY,
        choices=STRATEGY_NAMES,
        help=f"support strategy (default: {DEFAULT_STRATEGY})",
    )
    return parent


def orientation_options(parser) -> None:
    """Add ``--orient keep|auto`` (``generate(orient=...)``) and ``--rotate X Y Z`` to ``parser``."""
    from supportgen.settings import ORIENT_CHOICES

    parser.add_argument(
        "--orient",
        choices=ORIENT_CHOICES,
        default="keep",
        help="keep each part's given orientation (default) or choose one from the physics (auto)",
    )
    rotate_option(parser)


def rotate_option(parser) -> None:
    """Add ``--rotate X Y Z`` (degrees about x, then y, then z; ``generate(rotate=...)``) to ``parser``."""
    parser.add_argument(
        "--rotate",
        type=float,
        nargs=3,
        metavar=("X", "Y", "Z"),
        help="turn each part by these degrees about x, then y, then z first",
    )


def positive(cast, what: str = "a positive number"):
    """An argparse type: ``cast(text)`` that must be > 0, else a usage error saying ``what`` to give.

    Examples
    --------
    >>> positive(float)("2.5")
    2.5
    >>> positive(int, "a worker count")("0")
    Traceback (most recent call last):
    ...
    argparse.ArgumentTypeError: '0': give a worker count
    """

    def parse(text: str):
        try:
            value = cast(text)
        except ValueError:
            value = None
        if value is None or not value > 0:
            raise argparse.ArgumentTypeError(f"{text!r}: give {what}")
        return value

    parse.__name__ = f"positive {cast.__name__}"
    return parse


def nonnegative_seconds(text: str) -> float:
    """An argparse type: a time in seconds, 0 or more.

    >>> nonnegative_seconds("2.5"), nonnegative_seconds("0")
    (2.5, 0.0)
    """
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"{text!r}: give a time in seconds, 0 or more")
    return value


def _value(text: str):
    for cast in (int, float):
        try:
            return cast(text)
        except ValueError:
            pass
    return text


def settings_from(args):
    """Settings from ``--profile`` and every ``--set NAME=VALUE`` (and ``--elevation`` where a command has it)."""
    import supportgen

    overrides = {}
    for item in args.set or []:
        if "=" not in item:
            raise supportgen.SettingsError(f"--set {item!r}: write it as NAME=VALUE, e.g. --set contact_spacing_mm=1.8")
        key, value = item.split("=", 1)
        overrides[key.strip()] = _value(value.strip())
    if getattr(args, "elevation", None) is not None:
        overrides["elevation_mm"] = args.elevation
    return supportgen.load_settings(args.profile, **overrides)


def err(msg: str) -> None:
    """One line on stderr, prefixed with the command's name."""
    print(f"supportgen: {msg}", file=sys.stderr)
