"""Tests of supportgen.runs.batch and ``supportgen batch``: folders in parallel, faults, resume, Dask.

References used beside the checks:
- the filesystem itself (which files exist, their bytes, their modification times);
- hashlib's sha256 (the manifest's hashes recomputed here);
- Python's csv and json readers (the summary files read back);
- Dask distributed's LocalCluster (a second engine: its outputs against the local pool's).
Parts are small solids from trimesh.creation on coarse settings, so the file stays quick.
"""

from __future__ import annotations

import csv
import hashlib
import html
import json
import multiprocessing
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import trimesh

from supportgen import Settings
from supportgen.runs.batch import (
    OUTPUT_SUFFIXES,
    PRINT_TIME_NOTE,
    TOTAL_ROW,
    FileResult,
    count_line,
    discover,
    estimate_peak_mb,
    mesh_footprint,
    run_batch,
    settings_hash,
)

GOOD = ("good_box.stl", "nested/good_sphere.STL", "nested/deeper/good_block.obj")
BAD = {  # file -> words its reason must contain (the meshio reader's own message)
    "empty.stl": "empty",
    "nested/garbage.ply": "PLY",
    "nested/deeper/truncated.stl": "truncated",
}


def _coarse() -> Settings:
    return Settings().override(pixel_mm=0.2, layer_mm=0.2, tip_min_mm=0.4, tip_max_mm=1.0)


def _write_good(folder: Path, names=GOOD) -> None:
    """Lifted solids about 10 mm across (trimesh.creation), one per name."""
    makers = [
        lambda: trimesh.creation.box((10.0, 8.0, 4.0)),
        lambda: trimesh.creation.icosphere(subdivisions=2, radius=5.0),
        lambda: trimesh.creation.cylinder(radius=4.0, height=6.0, sections=24),
    ]
    for i, name in enumerate(names):
        mesh = makers[i % len(makers)]()
        mesh.apply_translation((0.0, 0.0, 5.0 - mesh.bounds[0, 2]))
        path = folder / name
        path.parent.mkdir(parents=True, exist_ok=True)
        mesh.export(path, file_type=path.suffix.lower()[1:])


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("batch") / "in"
    _write_good(root)
    (root / "empty.stl").write_bytes(b"")
    (root / "nested").mkdir(exist_ok=True)
    (root / "nested" / "garbage.ply").write_bytes(b"ply\nformat nonsense\n" + bytes(range(256)) * 4)
    whole = trimesh.creation.box((5.0, 5.0, 5.0)).export(file_type="stl")
    (root / "nested" / "deeper" / "truncated.stl").write_bytes(whole[: len(whole) // 2])
    (root / "nested" / "notes.txt").write_text("not a mesh")
    return root


@pytest.fixture(scope="module")
def runs(folder) -> dict:
    """The folder through 2 local workers, 1 local worker and (if installed) Dask, each into the same
    output path in turn (moved aside afterwards), so the reports' output paths are the same strings."""
    out, done = folder.parent / "out", {}
    for label, kw in (("w2", {"workers": 2}), ("w1", {"workers": 1, "pattern": "*good*"})):
        done[label] = run_batch(folder, out, _coarse(), progress=False, **kw)
        out.rename(folder.parent / label)
    return done


def _files(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def _same_outputs(a: Path, b: Path) -> None:
    """Byte-identical part outputs; report.json identical once its stage timings and creation time are
    removed (the design notes' determinism rule: reports differ only in those)."""
    batch_level = ("batch-summary", "index.html")
    fa = {k: v for k, v in _files(a).items() if not k.startswith(batch_level)}
    fb = {k: v for k, v in _files(b).items() if not k.startswith(batch_level)}
    assert sorted(fa) == sorted(fb)
    for name in fa:
        if name.endswith(".report.json"):
            ja, jb = json.loads(fa[name]), json.loads(fb[name])
            ja.pop("timing_s"), jb.pop("timing_s")
            ja["provenance"].pop("created"), jb["provenance"].pop("created")
            for doc in (ja, jb):  # the page embeds the report's times: compare its name only
                doc["outputs"]["files"] = [o if o["role"] != "page" else o["file"] for o in doc["outputs"]["files"]]
            assert ja == jb, name
        elif name.endswith(".batch.json"):
            ja, jb = json.loads(fa[name]), json.loads(fb[name])
            ja.pop("seconds"), jb.pop("seconds")
            for doc in (ja, jb):  # the report and page carry timings and times: compare their names only
                doc["outputs"] = [o if o["role"] not in ("report", "page") else o["file"] for o in doc["outputs"]]
            assert ja == jb, name
        elif name.endswith(".report.html"):
            # The page embeds the report (timings, creation time): same parts, same size to within them.
            assert abs(len(fa[name]) - len(fb[name])) < 2000, name
        else:
            assert fa[name] == fb[name], name


def test_discover_pattern_and_exclude(tmp_path):
    names = ["a.STL", "b.obj", "c.Ply", "d.3mf", "sub/lid.stl", "sub/deep/lid2.OBJ", "notes.txt", "e.stl.bak"]
    for name in names:
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_bytes(b"x")
    (tmp_path / "out" / "sub").mkdir(parents=True)
    (tmp_path / "out" / "sub" / "lid.supported.stl").write_bytes(b"x")  # an earlier run's output
    # Expected lists from os.walk and the suffix rule, independently of discover().
    walked = sorted(
        Path(d, f).relative_to(tmp_path).as_posix()
        for d, _, fs in os.walk(tmp_path)
        for f in fs
        if os.path.splitext(f)[1].lower() in (".stl", ".obj", ".ply", ".3mf")
    )
    assert [p.as_posix() for p in discover(tmp_path)] == walked
    got = [p.as_posix() for p in discover(tmp_path, exclude=tmp_path / "out")]
    assert got == [w for w in walked if not w.startswith("out/")] == sorted(names[:6])
    assert [p.as_posix() for p in discover(tmp_path, "*lid*", exclude=tmp_path / "out")] == [
        "sub/deep/lid2.OBJ",
        "sub/lid.stl",
    ]
    assert [p.as_posix() for p in discover(tmp_path, "sub/*.stl", exclude=tmp_path / "out")] == ["sub/lid.stl"]


def test_folder_good_bad_nested(folder, runs):
    summary, out = runs["w2"], folder.parent / "w2"
    # Discovery against the filesystem: every mesh suffix in any case, nothing else.
    assert sorted(p.as_posix() for p in discover(folder)) == sorted([*GOOD, *BAD])
    by_file = {r.file: r for r in summary.results}
    assert sorted(by_file) == sorted([*GOOD, *BAD])  # summary complete
    for name in GOOD:
        row = by_file[name]
        assert (row.status, row.passed) == ("ok", True), row
        stem = Path(name).name.split(".")[0]
        # The output tree mirrors the input tree, and holds exactly what Result.save writes plus the manifest.
        made = {p.name for p in (out / Path(name).parent).iterdir() if p.name.startswith(f"{stem}.")}
        assert made == {f"{stem}{suffix}" for suffix in (*OUTPUT_SUFFIXES, ".batch.json")}
        manifest = json.loads((out / Path(name).parent / f"{stem}.batch.json").read_text())
        assert manifest["input_sha256"] == hashlib.sha256((folder / name).read_bytes()).hexdigest()
        report = json.loads((out / Path(name).parent / f"{stem}.report.json").read_text())
        assert row.contacts == report["supports"]["contacts"] > 0
    for name, words in BAD.items():
        row = by_file[name]
        # Unreadable inputs are refused with the reader's reason (not an "error" of the run).
        assert row.status == "refused" and words in row.reason and name in row.reason, row
        assert not list((out / Path(name).parent).glob(f"{Path(name).name.split('.')[0]}.*"))
    assert summary.exit_code == 1
    with open(out / "batch-summary.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    doc = json.loads((out / "batch-summary.json").read_text())
    assert rows[-1]["file"] == TOTAL_ROW
    rows = rows[:-1]
    assert [r["file"] for r in rows] == [f["file"] for f in doc["files"]] == sorted([*GOOD, *BAD])
    assert {r["file"]: r["status"] for r in rows} == {r.file: r.status for r in summary.results}
    assert doc["counts"]["ok"] == len(GOOD) and doc["counts"]["refused"] == len(BAD) and doc["exit_code"] == 1
    assert set(doc["counts"]) == {"ok", "failed-check", "refused", "error", "timeout"}
    # The index page's header carries the same totals line as the command's last line.
    index = (out / "index.html").read_text()
    assert f'id="batch-summary" class="verdict unknown">{html.escape(count_line(summary.results))}<' in index
    assert f"resin {doc['totals']['resin_ml']:.1f} ml" in index
    assert not list(out.rglob("*.tmp"))


def test_same_outputs_with_one_or_two_workers(folder, runs):
    assert [r.status for r in runs["w1"].results] == ["ok"] * len(GOOD)
    _same_outputs(folder.parent / "w1", folder.parent / "w2")


def test_dask_local_cluster_matches_local_pool(folder, runs):
    distributed = pytest.importorskip("distributed", reason="Dask distributed not installed (extra 'cluster')")
    out = folder.parent / "out"
    with distributed.LocalCluster(
        n_workers=1, threads_per_worker=1, processes=False, host="127.0.0.1", protocol="tcp://", dashboard_address=":0"
    ) as cluster:
        summary = run_batch(folder, out, _coarse(), cluster=cluster.scheduler_address, pattern="*good*", progress=False)
    assert [r.status for r in summary.results] == ["ok"] * len(GOOD)
    # Same output path as the 1-worker local run, so even the paths inside report.json agree.
    _same_outputs(out, folder.parent / "w1")


CHILD = """
import signal
import sys
# A shell that starts jobs in the background hands them SIGINT ignored; a terminal
# user's batch has Python's Ctrl-C handler, so put it back.
signal.signal(signal.SIGINT, signal.default_int_handler)
from supportgen import Settings
from supportgen.runs.batch import run_batch
if __name__ == "__main__":
    settings = Settings().override(pixel_mm=0.2, layer_mm=0.2, tip_min_mm=0.4, tip_max_mm=1.0)
    sys.exit(run_batch(sys.argv[1], sys.argv[2], settings, workers=1, progress=False).exit_code)
"""


def test_ctrl_c_then_resume(tmp_path):
    names = ("a_first.stl", "sub/b_second.stl", "sub/c_third.stl")
    _write_good(tmp_path / "in", names[:1])
    # The files after the first are large lifted spheres (several seconds each at these
    # settings), so the interrupt always lands while the batch is still at work.
    for name in names[1:]:
        big = trimesh.creation.icosphere(subdivisions=5, radius=20.0)
        big.apply_translation((0.0, 0.0, 25.0))
        (tmp_path / "in" / name).parent.mkdir(parents=True, exist_ok=True)
        big.export(tmp_path / "in" / name)
    out = tmp_path / "out"
    script = tmp_path / "child.py"
    script.write_text(CHILD)
    # Ctrl-C as a terminal sends it: SIGINT to the whole process group, once the first file is saved.
    child = subprocess.Popen(
        [sys.executable, str(script), str(tmp_path / "in"), str(out)],
        start_new_session=True,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    manifest = out / "a_first.batch.json"
    deadline = time.monotonic() + 120
    while not manifest.exists() and child.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    os.killpg(child.pid, signal.SIGINT)
    _, err = child.communicate(timeout=60)
    assert child.returncode == 130, err.decode()
    doc = json.loads((out / "batch-summary.json").read_text())
    assert doc["interrupted"] is True and doc["files"][0]["file"] == "a_first.stl"
    assert len(doc["files"]) + doc["pending"] == len(names)
    stamp = manifest.stat().st_mtime_ns
    # Every output set left is complete and has its manifest; no temporary file anywhere.
    assert not list(out.rglob("*.tmp")) and not list(out.rglob(".*"))
    for m in out.rglob("*.batch.json"):
        assert all((m.parent / f"{m.name.split('.')[0]}{s}").is_file() for s in OUTPUT_SUFFIXES)
    assert len(list(out.rglob("*.supported.stl"))) == len(list(out.rglob("*.batch.json"))) == len(doc["files"])

    second = run_batch(tmp_path / "in", out, _coarse(), workers=1, resume=True, progress=False)
    statuses = {r.file: (r.status, r.reused) for r in second.results}
    assert statuses["a_first.stl"] == ("ok", True) and set(statuses) == set(names)
    assert all(statuses[f["file"]] == ("ok", True) for f in doc["files"])  # nothing finished is redone
    assert all(statuses[n] == ("ok", False) for n in names if n not in {f["file"] for f in doc["files"]})
    assert manifest.stat().st_mtime_ns == stamp
    assert second.exit_code == 0 and not list(out.rglob("*.tmp"))
    # A changed setting makes every file stale again (hashes from hashlib, not the manifest's word).
    other = _coarse().override(contact_spacing_mm=2.5)
    assert settings_hash(other, "straight") != json.loads(manifest.read_text())["settings_sha256"]


def test_dead_worker_is_an_error(tmp_path):
    src = tmp_path / "in"
    big = trimesh.creation.icosphere(subdivisions=4, radius=20.0)
    big.apply_translation((0.0, 0.0, 25.0))
    src.mkdir()
    big.export(src / "a_slow.stl")
    (src / "b_empty.stl").write_bytes(b"")

    def kill_workers(row):  # b_empty fails at once, while a_slow is still running
        for proc in multiprocessing.active_children():
            os.kill(proc.pid, signal.SIGKILL)

    summary = run_batch(src, tmp_path / "out", _coarse(), workers=2, progress=False, on_result=kill_workers)
    rows = {r.file: r for r in summary.results}
    assert rows["b_empty.stl"].status == "refused"  # the input's fault: an empty file
    assert rows["a_slow.stl"].status == "error" and "SIGKILL" in rows["a_slow.stl"].reason  # the run's fault
    assert summary.exit_code == 1 and not list((tmp_path / "out").glob("a_slow*"))


def test_timeout_and_memory_refusal(tmp_path):
    src = tmp_path / "in"
    src.mkdir()
    slow = trimesh.creation.icosphere(subdivisions=5, radius=20.0)  # seconds of work, far over 0.2 s
    slow.apply_translation((0.0, 0.0, 25.0))
    slow.export(src / "slow_sphere.stl")
    plate = trimesh.creation.box((120.0, 70.0, 1.0))
    plate.apply_translation((0.0, 0.0, 5.0))
    plate.export(src / "wide_plate.stl")
    settings = _coarse()
    small = estimate_peak_mb(*mesh_footprint(src / "slow_sphere.stl"), settings)
    big = estimate_peak_mb(*mesh_footprint(src / "wide_plate.stl"), settings)
    assert big > small  # 120 x 70 mm against 10 x 10 mm of layer grid
    summary = run_batch(
        src, tmp_path / "out", settings, workers=1, progress=False, timeout_s=0.2, memory_limit_mb=(small + big) / 2
    )
    rows = {r.file: r for r in summary.results}
    assert rows["wide_plate.stl"].status == "refused" and "MB" in rows["wide_plate.stl"].reason
    assert rows["slow_sphere.stl"].status == "timeout" and "0.2 s" in rows["slow_sphere.stl"].reason
    assert summary.exit_code == 1
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [
        "batch-summary.csv",
        "batch-summary.json",
        "index.html",
    ]


def test_command_line(folder, runs, tmp_path, capsys):
    from supportgen.cli.main import build_parser

    parser = build_parser()  # the installed command's own parser
    out = tmp_path / "out"
    shutil.copytree(folder.parent / "w2", out)
    sets = [a for kv in ("pixel_mm=0.2", "layer_mm=0.2", "tip_min_mm=0.4", "tip_max_mm=1.0") for a in ("--set", kv)]
    args = parser.parse_args(["batch", str(folder), "-o", str(out), "--resume", "--pattern", "*good*", *sets])
    assert args.func(args) == 0  # all up to date: nothing redone
    files = json.loads((out / "batch-summary.json").read_text())["files"]
    assert {(r["status"], r["reused"]) for r in files} == {("ok", True)}
    assert "3 part(s): 3 ok (3 reused from an earlier run)" in capsys.readouterr().out
    with pytest.raises(SystemExit):
        parser.parse_args(["batch", str(folder), "-o", str(out), "--workers", "0"])
    assert "--workers" in capsys.readouterr().err
    args = parser.parse_args(["batch", str(folder), "-o", str(out), "--pattern", "empty*", "--quiet", *sets])
    assert args.func(args) == 1
    assert "refused: empty.stl:" in capsys.readouterr().err
    assert os.path.exists(out / "good_box.supported.stl")  # other files' outputs untouched


# Settings under which the box's tips cannot hold at the set safety factor: weak green resin (0.5 MPa,
# the smallest the settings allow), the smallest tips 0.4 mm, safety factor 10.
WEAK = {"green_tensile_mpa": 0.5, "safety_factor": 10.0, "tip_max_mm": 0.4}


def test_failed_check_status_kept_across_resume(tmp_path, capsys):
    from supportgen.cli.main import main

    src, out = tmp_path / "in", tmp_path / "out"
    _write_good(src, ("weak_box.stl",))
    (src / "zero.stl").write_bytes(b"")
    sets = [a for k, v in {**_coarse_kv(), **WEAK}.items() for a in ("--set", f"{k}={v}")]
    assert main(["batch", str(src), "-o", str(out), "--workers", "1", "--progress", *sets]) == 1
    captured = capsys.readouterr()
    doc = json.loads((out / "batch-summary.json").read_text())
    rows = {f["file"]: f for f in doc["files"]}
    box = rows["weak_box.stl"]
    report = json.loads((out / "weak_box.report.json").read_text())
    assert box["status"] == "failed-check" and box["passed"] is False and not box["reused"]
    assert report["verification"]["passed"] is False  # the saved outputs carry the same verdict
    assert "tear off" in box["reason"] and report["verification"]["failures"][0] in box["reason"]
    # Independent of the project's sizing: a tip's tensile capacity is stress x area (a 0.4 mm disc:
    # pi d^2 / 4, exact geometry) over the safety factor; the mean load per contact is above it, so at
    # least one tip must be over its capacity.
    allowed_n = 0.5 * np.pi * 0.4**2 / 4 / 10.0
    assert box["peak_force_n"] / box["contacts"] > allowed_n
    assert rows["zero.stl"]["status"] == "refused" and "empty" in rows["zero.stl"]["reason"]
    assert doc["counts"] == {"ok": 0, "failed-check": 1, "refused": 1, "error": 0, "timeout": 0}
    assert doc["exit_code"] == 1
    # The progress bar ends on the same counts as the final line (both from count_line).
    line = count_line([FileResult(**f) for f in doc["files"]])
    assert f"batch: {line};" in captured.out
    assert captured.err.count(line) >= 1, captured.err
    assert "failed-check: weak_box.stl: check failed:" in captured.err
    stamp = (out / "weak_box.batch.json").stat().st_mtime_ns

    again = run_batch(src, out, _coarse().override(**WEAK), workers=1, resume=True, progress=False)
    by = {r.file: r for r in again.results}
    assert (by["weak_box.stl"].status, by["weak_box.stl"].reason) == ("failed-check", box["reason"])
    assert by["weak_box.stl"].reused and not by["zero.stl"].reused  # the refused input is tried again
    assert by["zero.stl"].status == "refused" and again.exit_code == 1
    assert (out / "weak_box.batch.json").stat().st_mtime_ns == stamp  # not redone


def _coarse_kv() -> dict:
    return {"pixel_mm": 0.2, "layer_mm": 0.2, "tip_min_mm": 0.4, "tip_max_mm": 1.0}


def test_totals_equal_the_sum_of_the_part_reports(folder, runs):
    out, summary = folder.parent / "w2", runs["w2"]
    # Reference: each part's own report.json, read back with json and summed here.
    reports = [
        json.loads((out / Path(n).parent / f"{Path(n).name.split('.')[0]}.report.json").read_text()) for n in GOOD
    ]
    resin = sum(r["estimates"]["resin_ml"] for r in reports)
    hours = sum(r["estimates"]["print_time_s"] for r in reports)
    doc = json.loads((out / "batch-summary.json").read_text())
    for t in (doc["totals"], summary.totals):
        assert t["parts"] == len(GOOD) + len(BAD) and t["supported"] == len(GOOD)
        assert t["resin_ml"] == pytest.approx(resin, abs=1e-3 * len(GOOD))  # rows keep 4 decimals
        assert t["print_time_s"] == pytest.approx(hours, abs=0.01 * len(GOOD))
        assert t["counts"] == doc["counts"] and t["print_time_note"] == PRINT_TIME_NOTE
    with open(out / "batch-summary.csv", newline="") as handle:
        total = list(csv.DictReader(handle))[-1]
    assert total["file"] == TOTAL_ROW and total["status"] == "not ok"
    assert float(total["resin_ml"]) == pytest.approx(resin, abs=1e-3 * len(GOOD))
    assert float(total["print_time_s"]) == pytest.approx(hours, abs=0.01 * len(GOOD))
    assert f"{len(GOOD)} ok, {len(BAD)} refused" in total["reason"]


def _rows(path: Path) -> list[dict]:
    """Rows of a contacts file, read with Python's csv reader (not the project's)."""
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _drop_row(path: Path, index: int) -> int:
    """Delete one data row of a contacts file (a technician's edit); return the rows left."""
    lines = path.read_text(encoding="utf-8").splitlines(keepends=True)
    del lines[1 + index]
    path.write_text("".join(lines), encoding="utf-8")
    return len(lines) - 1


def test_batch_reads_contacts_sidecar_and_resumes_on_its_edit(tmp_path):
    """A part's NAME.contacts.csv beside it is its contacts; an edit re-runs that part only.

    The output folder lies inside the input folder: the batch's own NAME.contacts.csv
    outputs must never be read back as side-cars, nor replace them (checked by bytes).
    """
    from supportgen.pipeline import generate

    root = tmp_path / "in"
    _write_good(root, ("lid.stl", "ball.stl"))
    settings = _coarse()
    # A contacts file as a run writes it, then one row deleted by hand.
    first = generate(root / "lid.stl", settings)
    side = root / "lid.contacts.csv"
    side.write_text(first.contacts_csv(), encoding="utf-8")
    written = len(_rows(side))
    assert written == len(first.contacts) > 2
    left = _drop_row(side, 1)
    assert left == written - 1 == len(_rows(side))  # csv module's count of the edited file
    side_bytes = side.read_bytes()
    out = root / "out"
    summary = run_batch(root, out, settings, workers=1, progress=False)
    assert {r.file: r.status for r in summary.results} == {"ball.stl": "ok", "lid.stl": "ok"}
    report = json.loads((out / "lid.report.json").read_text())
    info = report["protection"]["contacts_file"]
    # One fewer user contact than the file the run wrote: the deleted row is gone.
    assert info["path"] == str(side) and info["rows"] == written - 1
    assert report["supports"]["contacts"] == info["rows"] + info["added_by_check"]
    assert json.loads((out / "ball.report.json").read_text())["protection"]["contacts_file"] is None
    # The output contacts file is written into OUT, never over the side-car.
    assert (out / "lid.contacts.csv").is_file() and side.read_bytes() == side_bytes
    # Unchanged inputs and side-cars: everything reused.
    again = run_batch(root, out, settings, workers=1, progress=False, resume=True)
    assert {(r.status, r.reused) for r in again.results} == {("ok", True)}
    # The batch's own output (under OUT, inside DIR) is not read as an input or side-car.
    assert len(again.results) == 2
    # Editing the side-car re-runs that part only, with the edit honoured.
    _drop_row(side, 0)
    edited = run_batch(root, out, settings, workers=1, progress=False, resume=True)
    assert {r.file: (r.status, r.reused) for r in edited.results} == {
        "ball.stl": ("ok", True),
        "lid.stl": ("ok", False),
    }
    info = json.loads((out / "lid.report.json").read_text())["protection"]["contacts_file"]
    assert info["rows"] == written - 2 == len(_rows(side))
    # Removing the side-car is an edit too.
    side.unlink()
    gone = run_batch(root, out, settings, workers=1, progress=False, resume=True)
    assert {r.file: (r.status, r.reused) for r in gone.results} == {
        "ball.stl": ("ok", True),
        "lid.stl": ("ok", False),
    }
    assert json.loads((out / "lid.report.json").read_text())["protection"]["contacts_file"] is None


def test_bad_contacts_sidecar_fails_that_part_with_one_line(tmp_path):
    """A side-car that cannot be read fails its part with a line naming the file; others go on."""
    root = tmp_path / "in"
    _write_good(root, ("lid.stl", "ball.stl"))
    (root / "lid.contacts.csv").write_text("id,x_mm,y_mm,z_mm\n0,1.0,oops,2.0\n", encoding="utf-8")
    summary = run_batch(root, tmp_path / "out", _coarse(), workers=1, progress=False)
    rows = {r.file: r for r in summary.results}
    assert rows["ball.stl"].status == "ok" and rows["lid.stl"].status == "refused"
    assert "lid.contacts.csv" in rows["lid.stl"].reason and "line 2" in rows["lid.stl"].reason
    assert "\n" not in rows["lid.stl"].reason


def test_orient_auto_and_rotate_are_run_and_part_of_the_resume_key(tmp_path):
    import numpy as np

    from supportgen.cli.main import main
    from supportgen.physics.orientation import rotation_from_angles

    # A 20 x 12 x 2 mm plate lying flat: its given orientation has the largest layer possible.
    plate = trimesh.creation.box((20.0, 12.0, 2.0))
    (tmp_path / "in").mkdir()
    plate.export(tmp_path / "in" / "plate.stl")
    out = tmp_path / "out"
    fast = _coarse().override(orient_directions=20, orient_pixel_mm=0.8)
    keep = run_batch(tmp_path / "in", out, fast, workers=1, progress=False)
    assert keep.results[0].status == "ok"
    manifest = json.loads((out / "plate.batch.json").read_text())
    # The given orientation keeps the key it had before the choice existed (hashlib over the same text).
    old = hashlib.sha256(f"{fast.to_toml()}\nstrategy = {'tree'!r}\n".encode()).hexdigest()
    assert manifest["settings_sha256"] == old == settings_hash(fast, "tree") and manifest["orient"] == "keep"
    auto = run_batch(tmp_path / "in", out, fast, workers=1, resume=True, progress=False, orient="auto")
    assert (auto.results[0].status, auto.results[0].reused) == ("ok", False)  # the choice is part of the key
    report = json.loads((out / "plate.report.json").read_text())
    assert report["orientation"]["chosen_by"] == "auto"
    again = run_batch(tmp_path / "in", out, fast, workers=1, resume=True, progress=False, orient="auto")
    assert (again.results[0].status, again.results[0].reused) == ("ok", True)
    # The command line: --rotate turns every part.
    code = main(
        [
            "batch",
            str(tmp_path / "in"),
            "-o",
            str(out),
            "--workers",
            "1",
            "--resume",
            "--quiet",
            "--rotate",
            "90",
            "0",
            "0",
        ]
        + [
            f"--set={k}={v}"
            for k, v in (("pixel_mm", 0.2), ("layer_mm", 0.2), ("tip_min_mm", 0.4), ("tip_max_mm", 1.0))
        ]
    )
    assert code == 0
    report = json.loads((out / "plate.report.json").read_text())
    assert report["orientation"]["chosen_by"] == "rotate"
    assert np.allclose(report["orientation"]["rotation"], rotation_from_angles(90, 0, 0))
    # Exact geometry: turned 90 degrees about x, the plate's 12 mm side stands up, so the print is
    # that tall above the part's elevation (trimesh's bounds of the saved supported solid).
    top = trimesh.load(out / "plate.supported.stl", force="mesh").bounds[1, 2]
    assert abs(top - (12.0 + Settings().rules.elevation_mm)) < 0.2 + 1e-3  # 0.2: one layer of the grid
    assert json.loads((out / "plate.batch.json").read_text())["rotate"] == [90.0, 0.0, 0.0]
