"""The ``supportgen`` command: argument parsing and printing only.

Exit status: 0 when every input succeeded, 1 when any input failed or did not
pass the print check (each failure one line on stderr), 2 for usage errors.
No traceback unless ``--debug``.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

from .options import (
    common_options,
    err,
    nonnegative_seconds,
    orientation_options,
    settings_from,
    show_progress,
    strategy_option,
)

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2


def _summary_line(result, seconds: float) -> str:
    r = result.report
    s, v = r["supports"], r["verification"]
    verdict = "passes" if v["passed"] else "FAILS check"
    return (
        f"{result.name}: {s['contacts']} contacts, supports {s['volume_mm3']:.0f} mm3 "
        f"(base {s['base_volume_mm3']:.0f}), peak force {r['forces']['peak_layer_force_n']:.2f} N, "
        f"{verdict}, {seconds:.1f} s"
    )


def _each(inputs, work, args) -> int:
    """Run ``work(path)`` for every input; it returns the failure lines of its
    check.  An error (bad input, a full disk, a permission) or a failed check is
    reported on stderr as one line and makes the status 1; the other inputs
    still run."""
    import supportgen

    status = EXIT_OK
    for path in inputs:
        try:
            failures = work(path)
        except (supportgen.SupportGenError, OSError) as exc:
            if args.debug:
                raise
            err(f"error: {exc if isinstance(exc, supportgen.SupportGenError) else _os_line(path, exc)}")
            status = EXIT_FAILED
            continue
        for failure in failures:
            err(f"check failed: {failure}")
        if failures:
            status = EXIT_FAILED
    return status


def _os_line(path, exc: OSError) -> str:
    from supportgen.io.outputs import os_error_line

    return os_error_line(path, exc, "read or write")


def _plan_outputs(inputs, outdir: Path, args) -> list[str]:
    """Output names for the inputs, refusing before any work an output that would replace an input
    and an output folder that cannot be used."""
    from supportgen.io.meshio import part_name
    from supportgen.io.outputs import assign_names, prepare_folder, refuse_overwrites
    from supportgen.pipeline import OUTPUTS

    names = assign_names([part_name(p) for p in inputs], args.name_clash, [str(p) for p in inputs])
    for path, name in zip(inputs, names):
        if name != part_name(path):  # said even with --quiet: the user must find the files
            err(f"note: {path}: outputs named {name}.* ({part_name(path)}.* is another input's)")
    refuse_overwrites([outdir / f"{n}{s}" for n in names for s in OUTPUTS.values()], inputs)
    prepare_folder(outdir)
    return names


def _run_generate(inputs, outdir: Path, args) -> int:
    import supportgen
    from supportgen.io.lock import FolderLock
    from supportgen.io.outputs import clean_temps
    from supportgen.io.units import group_bounds, unit_factor
    from supportgen.runs.signals import stop_on_signals

    settings = settings_from(args)
    names = dict(zip(map(str, inputs), _plan_outputs(inputs, outdir, args)))
    saved: list[str] = []
    position = "centre" if args.centre else args.position
    factor = unit_factor(args.units, args.scale)
    turned = getattr(args, "orient", "keep") != "keep" or getattr(args, "rotate", None) is not None
    # Parts keep their arrangement only as given: a part turned on its own has no common frame.
    together = group_bounds(inputs, factor) if position == "auto" and not turned else None

    protect = list(getattr(args, "protect", None) or [])
    if args.profile and Path(args.profile).is_file():  # a profile's [protect] table
        from supportgen.supports.protect import selectors_from_toml

        protect += selectors_from_toml(args.profile)

    def work(path):
        t0 = time.perf_counter()
        result = supportgen.generate(
            path,
            settings,
            strategy=args.strategy,
            position=position,
            units=args.units,
            scale=args.scale,
            group_bounds=together,
            progress=show_progress(args),
            name=names[str(path)],
            orient=getattr(args, "orient", "keep"),
            rotate=getattr(args, "rotate", None),
            protect=protect or None,
            contacts=getattr(args, "contacts", None),
        )
        result.save(outdir)
        saved.append(str(path))
        if not args.quiet:
            print(_summary_line(result, time.perf_counter() - t0))
        return result.report["verification"]["failures"]

    with FolderLock(outdir, wait_s=args.wait, warn=lambda m: err(f"warning: {m}")):
        clean_temps(outdir)
        try:
            with stop_on_signals():
                return _each(inputs, work, args)
        except KeyboardInterrupt:
            err(
                f"interrupted: {len(saved)} of {len(inputs)} input(s) done"
                f"{' (' + ', '.join(saved) + ')' if saved else ''}; every other input has its previous outputs "
                "or a complete new set, never a mix; no partial file left"
            )
            return 130


def cmd_generate(args) -> int:
    folders = [p for p in args.inputs if Path(p).is_dir()]
    if folders:
        err(
            f"error: {folders[0]} is a folder; generate takes mesh files: for a folder tree use "
            f"'supportgen batch {folders[0]} -o OUTDIR'"
        )
        return EXIT_USAGE
    if getattr(args, "contacts", None) and len(args.inputs) != 1:
        err("error: --contacts FILE belongs to one part; give exactly one INPUT with it")
        return EXIT_USAGE
    return _run_generate([Path(p) for p in args.inputs], Path(args.output), args)


def cmd_demo(args) -> int:
    from supportgen.runs.demo import write_demo_inputs

    outdir = Path(args.output)
    inputs = write_demo_inputs(outdir / "inputs")
    if not args.quiet:
        print(f"demo: a kitchenware maker's sample batch, {len(inputs)} parts, written to {outdir}")
    status = _run_generate(inputs, outdir, args)
    if not args.quiet:
        print(f"reports: {outdir}/*.report.md; supported solids: {outdir}/*.supported.stl")
    return status


def cmd_check(args) -> int:
    import supportgen

    settings = settings_from(args)

    def work(path):
        ver = supportgen.check(path, settings, progress=show_progress(args))
        if args.json:
            print(json.dumps({"mesh": str(path), **ver.to_dict()}, sort_keys=True))
        elif ver.passed:
            print(
                f"{path}: passes: no islands, largest reach {ver.max_unsupported_reach_mm:.2f} mm "
                f"(limit {ver.reach_limit_mm:g}), closed solid"
            )
        return list(ver.failures)

    return _each(args.meshes, work, args)


def cmd_profiles(args) -> int:
    from supportgen.settings import PROFILES, describe

    rows = describe()
    if args.json:
        print(json.dumps({"profiles": PROFILES, "settings": rows}, indent=2, default=str))
        return EXIT_OK
    print("built-in profiles (values that differ from the defaults):")
    for name, values in PROFILES.items():
        changes = ", ".join(f"{k}={v}" for k, v in values.items()) or "the defaults"
        print(f"  {name:14s} {changes}")
    print("\nsettings ([group] name = default unit, range, where the default comes from):")
    for r in rows:
        rng = "|".join(r["range"]) if isinstance(r["range"][0], str) else f"{r['range'][0]:g}..{r['range'][1]:g}"
        print(f"  [{r['group']}] {r['name']} = {r['default']} {r['unit']}  ({rng}; {r['source']}) {r['doc']}")
    return EXIT_OK


def cmd_calibrate(args) -> int:
    from supportgen.io.meshio import atomic_write_text
    from supportgen.physics.calibration import (
        calibrated_settings,
        fit_calibration,
        read_measurements,
        write_coupons,
    )

    settings = settings_from(args)
    if args.sheet == "coupons" and not Path(args.sheet).is_file():
        paths = write_coupons(Path(args.output or "coupons"), settings)
        if not args.quiet:
            print("coupon plate written: " + ", ".join(str(p) for p in paths))
            print(f"print it, fill in peak_force_n, then: supportgen calibrate {paths[1]} -o my-printer.toml")
        return EXIT_OK
    output = Path(args.output or "calibrated.toml")
    fit = fit_calibration(read_measurements(args.sheet), settings)
    print(fit.to_text())
    atomic_write_text(output, calibrated_settings(fit, settings).to_toml())
    print(f"profile written: {output}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="supportgen",
        description="Support structures for bottom-up resin printing, sized from the separation force of every layer.",
    )
    from supportgen import __version__

    parser.add_argument("--version", action="version", version=f"supportgen {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    common, strategy = common_options(), strategy_option()
    gen_opts = argparse.ArgumentParser(add_help=False, parents=[strategy])
    gen_opts.add_argument(
        "--elevation",
        type=float,
        metavar="MM",
        help="height of the part's lowest point above the plate (setting elevation_mm)",
    )
    gen_opts.add_argument(
        "--position",
        choices=("auto", "keep", "centre"),
        default="auto",
        help="x/y on the plate: auto keeps the parts where they lie on the plate and moves them "
        "(together, with a warning) where they do not; keep refuses parts off the plate; "
        "centre always centres (default: auto)",
    )
    gen_opts.add_argument("--centre", action="store_true", help="same as --position centre")
    gen_opts.add_argument(
        "--units",
        choices=("mm", "cm", "m", "in"),
        default="mm",
        help="length unit the files were drawn in; parts are scaled to millimetres (default: mm)",
    )
    gen_opts.add_argument(
        "--scale",
        type=float,
        default=1.0,
        metavar="FACTOR",
        help="a further scale factor applied with --units (default: 1)",
    )
    gen_opts.add_argument(
        "--name-clash",
        choices=("rename", "refuse"),
        default="rename",
        help="inputs whose output names collide: name the later ones NAME-2 ... (default) or refuse them",
    )
    gen_opts.add_argument(
        "--wait",
        type=nonnegative_seconds,
        default=0.0,
        metavar="SECONDS",
        help="if another run is writing to the output folder, wait up to SECONDS for it (default: refuse at once)",
    )
    orientation_options(gen_opts)
    gen_opts.add_argument(
        "--protect",
        action="append",
        metavar="SELECTOR",
        help="faces that must get no tip or landing (repeatable), in the part's own "
        "coordinates: box:X0,Y0,Z0,X1,Y1,Z1 | normal:DX,DY,DZ,DEG | height:Z0,Z1 | "
        "mesh:PATH[,TOL] | colour:R,G,B; a file NAME.protect.toml next to a part adds its list",
    )

    p = sub.add_parser("generate", parents=[common, gen_opts], help="support mesh files")
    p.add_argument("inputs", nargs="+", metavar="INPUT", help="STL, OBJ, PLY or 3MF files")
    p.add_argument("-o", "--output", default=".", metavar="OUTDIR", help="output folder (default: here)")
    p.add_argument(
        "--contacts",
        metavar="FILE",
        help="use the contacts in FILE (a NAME.contacts.csv, edited) instead of placing them; "
        "routing, sizing and the check are recomputed",
    )
    p.set_defaults(func=cmd_generate)

    p = sub.add_parser("demo", parents=[common, gen_opts], help="run the built-in example batch end to end")
    p.add_argument(
        "-o",
        "--output",
        default="supportgen-demo",
        metavar="OUTDIR",
        help="folder for the demo parts' outputs and index.html (default: supportgen-demo)",
    )
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("check", parents=[common], help="verify already supported meshes")
    p.add_argument(
        "meshes", nargs="+", metavar="MESH", help="supported meshes to check as they are (STL, OBJ, PLY, 3MF)"
    )
    p.add_argument("--json", action="store_true", help="one JSON line per mesh")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("profiles", help="list built-in profiles and every setting")
    p.add_argument("--json", action="store_true", help="print the profiles and settings as one JSON document")
    p.set_defaults(func=cmd_profiles)

    from supportgen.physics.calibration import SHEET_HELP

    p = sub.add_parser(
        "calibrate",
        parents=[common],
        help="write a coupon plate to print and measure, or fit the force calibration from the filled-in sheet",
        description="Calibrate the separation force law to your printer, film and resin in two steps:\n\n"
        "  supportgen calibrate coupons -o DIR\n"
        "      writes DIR/coupons.stl (a plate of coupons to print), DIR/coupons.csv (the\n"
        "      sheet to fill in) and DIR/README.txt (how to print and measure)\n"
        "  supportgen calibrate SHEET.csv -o PROFILE.toml\n"
        "      fits the law to the measured peak forces and writes a profile with\n"
        "      force_calibration (and force_area_n_mm2) set; use it with --profile",
        epilog=SHEET_HELP,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument(
        "sheet",
        metavar="SHEET.csv|coupons",
        help="the filled-in sheet to fit, or the word coupons to write a coupon plate and an empty sheet",
    )
    p.add_argument(
        "-o",
        "--output",
        metavar="PROFILE.toml|DIR",
        help="the profile written by a fit (default: calibrated.toml), or the folder for the coupon plate "
        "(default: coupons)",
    )
    p.set_defaults(func=cmd_calibrate)

    from . import batch as batch_cmd
    from . import bench as bench_cmd

    batch_cmd.add_parser(sub, [common, strategy])
    bench_cmd.add_parser(sub, [common])
    from . import orient as orient_cmd

    orient_cmd.add_parser(sub, [common])
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    try:
        return args.func(args)
    except BrokenPipeError:
        # The reader went away (e.g. `supportgen profiles | head`): stop quietly.
        sys.stderr.close()
        return EXIT_OK
    except KeyboardInterrupt:
        err("interrupted; finished files are complete, nothing half-written was left")
        return 130
    except OSError as exc:
        if getattr(args, "debug", False):
            raise
        err(f"error: {_os_line(getattr(exc, 'filename', None) or '(file)', exc)}")
        return EXIT_FAILED
    except Exception as exc:  # noqa: BLE001 - the one place that turns errors into a line
        import supportgen

        if getattr(args, "debug", False):
            raise
        if isinstance(exc, supportgen.SettingsError):
            err(f"error: {exc}")
            return EXIT_USAGE
        if isinstance(exc, supportgen.SupportGenError):
            err(f"error: {exc}")
            return EXIT_FAILED
        err(f"internal error: {type(exc).__name__}: {exc} (run again with --debug and report it)")
        return EXIT_FAILED


if __name__ == "__main__":
    sys.exit(main())
