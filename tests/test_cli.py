"""The command line: exit codes, one-line errors, atomic outputs, the demo, check and calibrate."""

import json
import shutil
import struct
import subprocess
import sys

import numpy as np
import pytest
import trimesh

from supportgen.cli.main import main
from supportgen.physics.pressure import torsion_constant

COARSE = [
    "--set",
    "pixel_mm=0.2",
    "--set",
    "layer_mm=0.2",
    "--set",
    "tip_min_mm=0.4",
    "--set",
    "tip_max_mm=1.0",
    "--quiet",
]


def _box_stl(path, lift=6.0, size=(8, 8, 3)):
    box = trimesh.creation.box(size)
    box.apply_translation((0, 0, lift + size[2] / 2))
    box.export(path)
    return path


def _bad_files(folder):
    (folder / "empty.stl").write_bytes(b"")
    (folder / "garbage.ply").write_bytes(b"\x00\x01 not a mesh at all \xff" * 10)
    good = trimesh.creation.box((5, 5, 5)).export(file_type="stl")
    declared = struct.unpack("<I", good[80:84])[0]
    assert declared == 12
    (folder / "truncated.stl").write_bytes(good[: 84 + 50 * 5])  # header says 12 triangles, 5 present
    return ["empty", "garbage", "truncated"]


def test_generate_goes_on_past_bad_files_and_leaves_no_partial_output(tmp_path, capsys):
    src = tmp_path / "in"
    src.mkdir()
    good = _box_stl(src / "good.stl")
    bad = _bad_files(src)
    out = tmp_path / "out"
    code = main(
        [
            "generate",
            str(good),
            *(str(src / f) for f in ("empty.stl", "garbage.ply", "truncated.stl")),
            "-o",
            str(out),
            *COARSE,
        ]
    )
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1
    # One line per bad file, naming it; no traceback.
    assert len(err) == 3 and all(line.startswith("supportgen: error: ") for line in err)
    for name, line in zip(bad, err):
        assert name in line
    assert "Traceback" not in "\n".join(err)
    written = sorted(p.name for p in out.iterdir())
    assert all(n.startswith("good.") for n in written), written
    assert "good.supported.stl" in written and "good.report.json" in written
    assert not any(n.endswith(".tmp") or ".tmp" in n for n in written)


def test_usage_errors_exit_2(tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["generate", "x.stl", "--strategy", "pillars"])
    assert exc.value.code == 2
    assert main(["generate", str(_box_stl(tmp_path / "b.stl")), "--set", "spacing=2", "-o", str(tmp_path)]) == 2
    assert "unknown setting 'spacing'" in capsys.readouterr().err
    assert main([]) == 2


def test_check_passes_generated_output_and_fails_an_unsupported_part(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["generate", str(_box_stl(tmp_path / "part.stl")), "-o", str(out), *COARSE]) == 0
    assert main(["check", str(out / "part.supported.stl"), "--json", *COARSE]) == 0
    line = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    assert line["passed"] and line["islands"] == 0
    # The same box lifted with nothing under it starts in mid-air: an island.
    floating = _box_stl(tmp_path / "floating.stl")
    assert main(["check", str(floating), *COARSE]) == 1
    err = capsys.readouterr().err
    assert "island" in err and "layer" in err


def test_profiles_lists_every_setting_with_its_source(capsys):
    assert main(["profiles", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    names = {r["name"] for r in data["settings"]}
    assert {"pixel_mm", "contact_spacing_mm", "green_tensile_mpa", "mechanism"} <= names
    assert all(r["source"] in {"pub", "practice", "memory"} for r in data["settings"])


def test_calibrate_recovers_a_known_factor(tmp_path, capsys):
    # Synthetic measurements made from a known factor with the squeeze-film law
    # F = c 3 mu v J / h^3 (Stefan 1874; Reynolds) on discs, J = pi R^4 / 2 (exact).
    mu, v, h, c = 0.5e-6, 1.0, 0.05, 0.013  # N s/mm^2, mm/s, mm
    rows = ["area_mm2,torsion_mm4,peak_force_n"]
    for R in (2.0, 4.0, 6.0, 9.0):
        J = np.pi * R**4 / 2
        rows.append(f"{np.pi * R**2},{J},{c * 3 * mu * v * J / h**3}")
    csv = tmp_path / "peaks.csv"
    csv.write_text("\n".join(rows) + "\n")
    out = tmp_path / "fitted.toml"
    assert main(["calibrate", str(csv), "-o", str(out)]) == 0
    import supportgen

    fitted = supportgen.load_settings(out)
    assert fitted.printer.force_calibration == pytest.approx(c, rel=0.02)


def test_torsion_constant_used_by_calibration_is_the_disc_value():
    # Cross-check of the CSV column's meaning: a pixel disc's J against pi R^4/2 (exact).
    R, p = 3.0, 0.05
    y, x = np.mgrid[-70:71, -70:71] * p
    assert torsion_constant(x**2 + y**2 <= R**2, p) == pytest.approx(np.pi * R**4 / 2, rel=0.01)


def test_installed_command_and_demo(tmp_path):
    exe = shutil.which("supportgen")
    cmd = [exe] if exe else [sys.executable, "-m", "supportgen"]
    help_text = subprocess.run([*cmd, "--help"], capture_output=True, text=True, check=True).stdout
    assert "generate" in help_text and "demo" in help_text
    run = subprocess.run([*cmd, "demo", "-o", str(tmp_path / "demo"), *COARSE], capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    solids = sorted((tmp_path / "demo").glob("*.supported.stl"))
    from supportgen.runs.demo import DEMO_PARTS

    assert len(solids) == len(DEMO_PARTS)
    for path in solids:
        mesh = trimesh.load(path)
        assert mesh.is_watertight  # trimesh (reference library)


def test_a_part_drawn_in_metres_is_refused_with_the_unit_and_scaled_on_request(tmp_path, capsys):
    # A 12 mm box written in metres reads 0.012 units: too small to be millimetres
    # (placement's 2 mm floor); the message names the unit, and --units m supports it.
    box = trimesh.creation.box((0.012, 0.010, 0.004))
    path = tmp_path / "bracket.stl"
    box.export(path)
    assert main(["generate", str(path), "-o", str(tmp_path / "out"), *COARSE]) == 1
    said = capsys.readouterr().err
    assert "bracket" in said and "--units m" in said and said.count("\n") == 1
    assert main(["generate", str(path), "-o", str(tmp_path / "out"), "--units", "m", *COARSE]) == 0
    made = trimesh.load(tmp_path / "out" / "bracket.supported.stl")
    # Scaled by 1000 exactly: the part's 12 x 10 mm footprint is inside the solid's extent.
    assert made.extents[0] >= 12.0 - 1e-6 and made.extents[1] >= 10.0 - 1e-6


def test_version_folder_pointer_and_no_bars_off_a_terminal(tmp_path, capsys):
    import supportgen

    with pytest.raises(SystemExit) as done:
        main(["--version"])
    assert done.value.code == 0 and capsys.readouterr().out.strip() == f"supportgen {supportgen.__version__}"
    # A folder given to generate points to batch, as a usage error (exit 2), in one line.
    assert main(["generate", str(tmp_path), "-o", str(tmp_path / "out")]) == 2
    said = capsys.readouterr().err.strip().splitlines()
    assert len(said) == 1 and "supportgen batch" in said[0]
    # Off a terminal (stderr is a pipe here) no progress bar is drawn: tqdm's bar pieces never appear.
    part = _box_stl(tmp_path / "box.stl")
    run = subprocess.run(
        [sys.executable, "-m", "supportgen", "generate", str(part), "-o", str(tmp_path / "o2"), *COARSE[:-1]],
        capture_output=True,
        text=True,
    )
    assert run.returncode == 0, run.stderr
    assert "layer/s" not in run.stderr and "%|" not in run.stderr


def _walk(parser, path=("supportgen",)):
    """(command path, parser) for the parser and every sub-command below it (argparse's own records)."""
    import argparse

    yield path, parser
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield from _walk(sub, (*path, name))


def test_every_argument_of_every_command_has_help():
    # Walks the installed command's own argparse tree: every action but -h, and every sub-command,
    # must say what it is for.
    import argparse

    from supportgen.cli.main import build_parser

    missing, commands = [], 0
    for path, parser in _walk(build_parser()):
        commands += 1
        for action in parser._actions:
            if isinstance(action, argparse._HelpAction):
                continue
            if isinstance(action, argparse._SubParsersAction):
                helps = {c.dest: c.help for c in action._choices_actions}
                missing += [f"{' '.join(path)} {n} (the command itself)" for n in action.choices if not helps.get(n)]
                continue
            if not (action.help or "").strip() or action.help == argparse.SUPPRESS:
                missing.append(f"{' '.join(path)} {'/'.join(action.option_strings) or action.dest}")
    assert commands >= 8  # generate, demo, check, profiles, calibrate, batch, bench, orient and the top level
    assert not missing, missing


def test_help_and_check_load_only_what_they_need():
    # Start-up (issue: the command line imports what a sub-command needs): building every
    # sub-command's parser must not import the mesh, solid, graph or plotting libraries, and
    # `check` must not import the support stages.  Run in a fresh interpreter (sys.modules).
    code = """
import sys
from supportgen.cli.main import main
try:
    main(['--help'])
except SystemExit:
    pass
heavy = {'trimesh', 'manifold3d', 'scipy', 'networkx', 'matplotlib', 'shapely', 'rtree'}
print(sorted({m.split('.')[0] for m in sys.modules} & heavy))
import supportgen
supportgen.check
print(sorted(m for m in sys.modules if m.startswith(('supportgen.supports', 'supportgen.report', 'supportgen.pipeline'))))
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.splitlines()
    assert out[-2:] == ["[]", "[]"], out
