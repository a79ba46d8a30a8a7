"""``supportgen orient``: choose how each part stands, write it turned (parsing and printing only).

Registered from ``cli/main.py``::

    from . import orient as orient_cmd
    orient_cmd.add_parser(sub, [common])
"""

from __future__ import annotations

from pathlib import Path

from .options import err, positive, settings_from

__all__ = ["add_parser", "cmd_orient"]

EXIT_OK, EXIT_FAILED = 0, 1


def add_parser(subparsers, parents) -> None:
    """Register ``orient`` on ``subparsers``; ``parents`` carry the common options."""
    p = subparsers.add_parser(
        "orient",
        parents=list(parents),
        help="choose how each part stands on the plate",
        description="Score up-directions over the whole sphere (peak layer force, suction cups, overhangs, "
        "minima, support volume, height) and write NAME.oriented.stl, NAME.orient.json, "
        "NAME.orient.md and NAME.orient.png.",
    )
    p.add_argument("inputs", nargs="+", metavar="PART", help="STL, OBJ, PLY or 3MF files")
    p.add_argument("-o", "--output", default=".", metavar="OUTDIR", help="output folder (default: here)")
    p.add_argument(
        "--directions",
        type=positive(int, "a number of directions"),
        default=None,
        metavar="N",
        help="directions spread over the sphere (setting orient_directions)",
    )
    p.add_argument(
        "--units", choices=("mm", "cm", "m", "in"), default="mm", help="length unit of the files (default mm)"
    )
    p.add_argument(
        "--scale",
        type=positive(float, "the longest side in mm as a positive number, e.g. 50"),
        metavar="MM",
        help="scale each part so its longest side is MM (for unitless meshes)",
    )
    p.add_argument(
        "--protect",
        action="append",
        metavar="SELECTOR",
        help="faces that must get no tip, in the part's own coordinates (repeatable; see generate --help): "
        "scored so they are not turned down; a file NAME.protect.toml next to a part adds its list",
    )
    p.set_defaults(func=cmd_orient)


def cmd_orient(args) -> int:
    import supportgen
    from supportgen.runs.orient import orient_file

    settings = settings_from(args)
    status = EXIT_OK
    for path in args.inputs:
        try:
            res, paths = orient_file(
                Path(path),
                Path(args.output),
                settings,
                n_directions=args.directions,
                longest_mm=args.scale,
                units=args.units,
                protect=args.protect,
            )
        except supportgen.SupportGenError as exc:
            if args.debug:
                raise
            err(f"error: {exc}")
            status = EXIT_FAILED
            continue
        if not args.quiet:
            o = res.orientation
            c, g = o.candidate(o.chosen), o.candidate(o.keep)
            print(
                f"{res.name}: up-direction {tuple(round(x, 3) for x in c['direction'])}, peak force "
                f"{g['terms']['peak_force_n']:.2f} -> {c['terms']['peak_force_n']:.2f} N, overhang "
                f"{g['terms']['overhang_area_mm2']:.0f} -> {c['terms']['overhang_area_mm2']:.0f} mm2, height "
                f"{g['terms']['height_mm']:.1f} -> {c['terms']['height_mm']:.1f} mm; {paths['mesh']}"
            )
    return status
