"""Never lose or mix up a user's files: each case of the issue reproduced with a real fault where the
machine allows it (a real SIGTERM, a real full file system), else an injected one.

The expectations rest on:
- POSIX ``rename(2)``: "If newpath already exists, it will be atomically replaced, so that there is no
  point at which another process attempting to access newpath will find it missing" -- so a set whose
  files are all staged before the first rename replaces the old set whole, or leaves it as it was;
- POSIX ``sigprocmask``/``pthread_sigmask``: a blocked signal stays pending until unblocked;
- the ZIP format (PKWARE APPNOTE 6.3.9, 4.4.9: the central directory records each member's
  uncompressed size) and the 3MF Core Specification 1.2.3 (sections 4.1-4.2: components; 5: build items);
- the STL format (3D Systems, 1989: ASCII files start with ``solid``, binary ones are 84 + 50 n bytes).
"""

from __future__ import annotations

import dataclasses
import errno
import io
import json
import os
import signal
import subprocess
import sys
import time
import tracemalloc
import zipfile
from pathlib import Path

import pytest
import trimesh

import supportgen
import supportgen.io.outputs
import supportgen.pipeline
from supportgen.cli.main import main
from supportgen.errors import MeshError, OutputError
from supportgen.io.lock import LOCK_NAME, FolderLock
from supportgen.io.meshio import load_mesh
from supportgen.io.outputs import TEMP_PREFIX, assign_names, commit_set, remove_temps

COARSE = ("--set", "pixel_mm=0.2", "--set", "layer_mm=0.2", "--set", "tip_min_mm=0.4", "--set", "tip_max_mm=1.0")


def _coarse():
    return supportgen.Settings().override(pixel_mm=0.2, layer_mm=0.2, tip_min_mm=0.4, tip_max_mm=1.0)


def _box(size=(8.0, 8.0, 3.0)):
    b = trimesh.creation.box(size)
    b.apply_translation((0.0, 0.0, 5.0 - b.bounds[0, 2]))
    return b


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()}


def _temps(folder: Path) -> list[str]:
    return [p.name for p in folder.rglob("*") if p.name.startswith(TEMP_PREFIX)]


def _reuse_plots(monkeypatch, drawn: dict) -> None:
    """Make the pipeline's plot functions return the bytes already drawn (saves seconds per save)."""
    for fn, role in (("plot_layers", "layers_plot"), ("plot_tips", "tips_plot"), ("plot_preview", "preview")):
        data = drawn[role].read_bytes()
        monkeypatch.setattr(supportgen.pipeline, fn, lambda *a, data=data: data)


@pytest.fixture(scope="module")
def two_results():
    """Two different supported parts saved under one name (an old and a new set)."""
    s = _coarse()
    return supportgen.generate(_box(), s, name="part"), supportgen.generate(_box((9.0, 7.0, 3.0)), s, name="part")


# --------------------------------------------------------------------------- 1. sets committed whole


def test_resave_failing_at_every_file_leaves_the_old_set_byte_identical(two_results, tmp_path, monkeypatch):
    old, new = two_results
    old.save(tmp_path)
    before = _snapshot(tmp_path)
    # The plots are drawn once; the saves below write those bytes (the writer path is the real one).
    drawn = new.save(tmp_path / "drawn")
    _reuse_plots(monkeypatch, drawn)
    n_files = len(before)
    real_fsync = os.fsync
    for k in range(n_files):  # the disk fills up while file k of the new set is written
        calls = []

        def fsync(fd, k=k, calls=calls):
            calls.append(fd)
            if len(calls) == k + 1:
                raise OSError(errno.ENOSPC, "No space left on device")
            return real_fsync(fd)

        monkeypatch.setattr(os, "fsync", fsync)
        with pytest.raises(OutputError, match="No space left on device") as info:
            new.save(tmp_path)
        assert "\n" not in str(info.value) and "free some disk space" in str(info.value)
        # POSIX rename atomicity: nothing was renamed yet, so the old set is exactly as it was.
        assert _snapshot(tmp_path) == before, k
        assert _temps(tmp_path) == []
    monkeypatch.setattr(os, "fsync", real_fsync)
    paths = new.save(tmp_path)
    report = json.loads(paths["report"].read_text())
    # The report names the files of its own set with sizes and SHA-256 (hashlib, recomputed here).
    import hashlib

    for entry in report["outputs"]["files"]:
        data = (tmp_path / entry["file"]).read_bytes()
        assert entry["bytes"] == len(data) and entry["sha256"] == hashlib.sha256(data).hexdigest()
    assert report["outputs"]["combined"].endswith("part.supported.stl")  # README contract keys kept
    assert {e["role"] for e in report["outputs"]["files"]} == set(paths) - {"report"}


def test_a_producer_that_fails_discards_the_whole_set(tmp_path):
    (tmp_path / "a.txt").write_bytes(b"old a")
    (tmp_path / "b.txt").write_bytes(b"old b")

    def boom(staged):
        raise RuntimeError("plot failed")

    with pytest.raises(RuntimeError):
        commit_set(tmp_path, {"a": ("a.txt", b"new a"), "b": ("b.txt", boom)})
    assert _snapshot(tmp_path) == {"a.txt": b"old a", "b.txt": b"old b"} and _temps(tmp_path) == []


SAVE_CHILD = """
import sys, time, os, pickle
import supportgen
import supportgen.io.outputs as outputs
with open(sys.argv[4], "rb") as fh:
    result = pickle.load(fh)
supportgen.generate = lambda *a, **k: result      # the computation was done by the test; the save is real
stage = sys.argv[3]
if stage == "staged":           # pause after every file is staged, before the first rename
    real = outputs._fsync_folder
    def slow(folder):
        print("staged", flush=True); time.sleep(60); real(folder)
    outputs._fsync_folder = slow
else:                           # pause between two renames (signals are held back there)
    real_replace = os.replace
    n = []
    def slow_replace(a, b):
        real_replace(a, b); n.append(b)
        if len(n) == 1:
            print("renaming", flush=True); time.sleep(1.5)
    outputs.os.replace = slow_replace
from supportgen.cli.main import main
sys.exit(main(["generate", sys.argv[1], "-o", sys.argv[2], "--quiet"]))
"""


@pytest.mark.parametrize("stage", ["staged", "renaming"])
def test_real_sigterm_during_a_resave(two_results, tmp_path, stage):
    import pickle

    old, new = two_results
    out = tmp_path / "out"
    old.save(out)
    before = _snapshot(out)
    src = tmp_path / "part.stl"
    _box((9.0, 7.0, 3.0)).export(src)
    script = tmp_path / "child.py"
    script.write_text(SAVE_CHILD)
    (tmp_path / "new.pickle").write_bytes(pickle.dumps(new))
    child = subprocess.Popen(
        [sys.executable, str(script), str(src), str(out), stage, str(tmp_path / "new.pickle")],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    line = child.stdout.readline()
    assert line.strip() == stage, child.stderr.read()
    child.send_signal(signal.SIGTERM)  # what a job scheduler sends
    _, err = child.communicate(timeout=60)
    assert child.returncode == 130 and "Traceback" not in err, err
    assert _temps(out) == [] and not (out / LOCK_NAME).exists()
    after = _snapshot(out)
    assert set(after) == set(before)
    if stage == "staged":
        assert after == before  # the signal came before any rename: old set untouched
    else:
        # The signal was held back until the last rename (pthread_sigmask): the new set is whole, and
        # every file matches the hashes its own report lists.
        import hashlib

        files = json.loads(after["part.report.json"])["outputs"]["files"]
        assert all(hashlib.sha256(after[e["file"]]).hexdigest() == e["sha256"] for e in files)
        assert after["part.supported.stl"] != before["part.supported.stl"]


# --------------------------------------------------------------------------- 2. one run per folder


LOCK_CHILD = """
import sys, time, os
from supportgen.io.lock import FolderLock
lock = FolderLock(sys.argv[1]).acquire()
print("held", flush=True)
if sys.argv[2] == "die":
    os._exit(9)                 # killed without releasing: a stale lock file
time.sleep(float(sys.argv[2]))
lock.release()
"""


def _hold(tmp_path, folder, how):
    script = tmp_path / "lock_child.py"
    script.write_text(LOCK_CHILD)
    child = subprocess.Popen([sys.executable, str(script), str(folder), how], stdout=subprocess.PIPE, text=True)
    line = child.stdout.readline()
    child.stdout.close()
    assert line.strip() == "held"
    return child


def test_second_run_on_a_folder_refuses_or_waits(tmp_path, capsys, monkeypatch, two_results):
    monkeypatch.setattr(supportgen, "generate", lambda *a, **k: two_results[0])  # the run itself is not the point
    out = tmp_path / "out"
    out.mkdir()
    src = tmp_path / "part.stl"
    _box().export(src)
    child = _hold(tmp_path, out, "2")
    # Refuses at once, one line naming the holder, before any work (nothing written).
    assert main(["generate", str(src), "-o", str(out), "--quiet", *COARSE]) == 1
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "in use by supportgen pid" in err and str(child.pid) in err
    assert sorted(p.name for p in out.iterdir()) == [LOCK_NAME]
    # With --wait it runs once the other run has let go.
    assert main(["generate", str(src), "-o", str(out), "--quiet", "--wait", "60", *COARSE]) == 0
    child.wait(timeout=30)
    assert (out / "part.supported.stl").is_file() and not (out / LOCK_NAME).exists()


def test_stale_lock_of_a_dead_process_is_taken_over_with_a_warning(tmp_path):
    child = _hold(tmp_path, tmp_path, "die")
    child.wait(timeout=30)
    assert json.loads((tmp_path / LOCK_NAME).read_text())["pid"] == child.pid
    (tmp_path / f"{TEMP_PREFIX}x.stl.abc.tmp").write_bytes(b"left by the dead run")
    warnings = []
    with FolderLock(tmp_path, warn=warnings.append):
        assert json.loads((tmp_path / LOCK_NAME).read_text())["pid"] == os.getpid()
    assert len(warnings) == 1 and str(child.pid) in warnings[0] and "no longer running" in warnings[0]


def test_two_batches_on_one_folder_one_refuses(tmp_path):
    from supportgen.runs.batch import run_batch

    (tmp_path / "in").mkdir()
    _box().export(tmp_path / "in" / "part.stl")
    out = tmp_path / "out"
    out.mkdir()
    with FolderLock(out):  # another run holds it
        with pytest.raises(OutputError, match="in use by"):
            run_batch(tmp_path / "in", out, _coarse(), workers=1, progress=False)
    assert sorted(p.name for p in out.iterdir()) == []


# --------------------------------------------------------------------------- 3. names and folders


def test_output_that_would_replace_an_input_is_refused_before_work(tmp_path, capsys, monkeypatch):
    out = tmp_path / "out"
    out.mkdir()
    _box().export(out / "cube.supported.stl")
    _box().export(tmp_path / "cube.stl")
    before = _snapshot(out)
    monkeypatch.setattr(supportgen, "generate", lambda *a, **k: pytest.fail("work started"))
    code = main(["generate", str(out / "cube.supported.stl"), str(tmp_path / "cube.stl"), "-o", str(out), "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 1 and len(err.splitlines()) == 1 and "would replace the input" in err
    assert _snapshot(out) == before


def test_colliding_names_get_distinct_outputs_or_a_refusal(tmp_path, capsys, monkeypatch):
    for d, name in (("a", "part.stl"), ("b", "PART.stl")):
        (tmp_path / d).mkdir()
        _box().export(tmp_path / d / name)
    out = tmp_path / "out"
    args = [str(tmp_path / "a" / "part.stl"), str(tmp_path / "b" / "PART.stl")]
    assert assign_names(["part", "PART"]) == ["part", "PART-2"]  # case-folded: one file on macOS/Windows
    saved = []
    monkeypatch.setattr(supportgen.pipeline.Result, "save", lambda self, d: saved.append(self.name))
    assert main(["generate", *args, "-o", str(out), "--quiet", *COARSE]) == 0
    assert saved == ["part", "PART-2"] and "outputs named PART-2" in capsys.readouterr().err
    saved.clear()
    assert main(["generate", *args, "-o", str(out), "--quiet", "--name-clash", "refuse", *COARSE]) == 1
    assert saved == [] and "would overwrite those of" in capsys.readouterr().err


def test_output_folder_problems_are_found_before_any_work(tmp_path, capsys, monkeypatch):
    src = tmp_path / "part.stl"
    _box().export(src)
    (tmp_path / "afile").write_text("x")
    monkeypatch.setattr(supportgen, "generate", lambda *a, **k: pytest.fail("work started"))
    assert main(["generate", str(src), "-o", str(tmp_path / "afile"), "--quiet"]) == 1
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "output folder is a file" in err


def test_unreadable_profile_is_a_usage_error(tmp_path, capsys, monkeypatch):
    profile = tmp_path / "p.toml"
    profile.write_text("[printer]\n")
    real = Path.read_text

    def deny(self, *a, **k):
        if self == profile:
            raise PermissionError(errno.EACCES, "Permission denied", str(self))
        return real(self, *a, **k)

    monkeypatch.setattr(Path, "read_text", deny)  # root reads any file: inject the EACCES
    assert main(["generate", str(profile), "--profile", str(profile), "--quiet"]) == 2
    assert "cannot read the profile (Permission denied)" in capsys.readouterr().err


def test_cleanup_never_builds_a_glob_from_a_part_name(tmp_path):
    names = ["*.supported.stl", "x[1].supported.stl", "x1.supported.stl"]
    for n in names:
        (tmp_path / f"{TEMP_PREFIX}{n}.abc.tmp").write_bytes(b"")
        (tmp_path / n).write_bytes(b"keep")
    remove_temps(tmp_path, ["*.supported.stl", "x[1].supported.stl"])
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(names + [f"{TEMP_PREFIX}x1.supported.stl.abc.tmp"])


# --------------------------------------------------------------------------- 4, 5. signals, resume (batch)


BATCH_CHILD = """
import sys
from supportgen.cli.main import main
if __name__ == "__main__":      # worker processes import this module again
    sys.exit(main(["batch", sys.argv[1], "-o", sys.argv[2], "--workers", "2", "--quiet",
                   "--set", "pixel_mm=0.2", "--set", "layer_mm=0.2", "--set", "tip_min_mm=0.4",
                   "--set", "tip_max_mm=1.0"]))
"""


def test_sigterm_to_a_batch_stops_workers_and_writes_the_summary(tmp_path):
    src = tmp_path / "in"
    src.mkdir()
    _box().export(src / "a_small.stl")
    for name in ("b_big.stl", "c_big.stl"):  # seconds each: the signal lands while they run
        big = trimesh.creation.icosphere(subdivisions=5, radius=20.0)
        big.apply_translation((0.0, 0.0, 25.0))
        big.export(src / name)
    out = tmp_path / "out"
    script = tmp_path / "child.py"
    script.write_text(BATCH_CHILD)
    child = subprocess.Popen(
        [sys.executable, str(script), str(src), str(out)],
        start_new_session=True,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    deadline = time.monotonic() + 120
    while not (out / "a_small.batch.json").exists() and child.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    os.killpg(child.pid, signal.SIGTERM)  # a scheduler signals the whole job
    _, err = child.communicate(timeout=60)
    assert child.returncode == 130 and "Traceback" not in err and "BrokenPipe" not in err, err
    gone = time.monotonic() + 10  # no worker of the batch is left running
    while time.monotonic() < gone:
        try:
            os.killpg(child.pid, 0)
        except ProcessLookupError:
            break
        time.sleep(0.1)
    with pytest.raises(ProcessLookupError):
        os.killpg(child.pid, 0)
    doc = json.loads((out / "batch-summary.json").read_text())
    assert doc["interrupted"] is True and doc["exit_code"] == 130
    assert {f["file"]: f["status"] for f in doc["files"]}["a_small.stl"] == "ok"
    assert _temps(out) == [] and not (out / LOCK_NAME).exists()


def test_resume_checks_recorded_size_and_hash(tmp_path):
    from supportgen.runs.batch import run_batch

    src = tmp_path / "in"
    src.mkdir()
    _box().export(src / "p.stl")
    _box((6.0, 6.0, 3.0)).export(src / "q.stl")
    out = tmp_path / "out"
    run_batch(src, out, _coarse(), workers=1, progress=False)
    (out / "p.supports.stl").write_bytes(b"")  # truncated to 0 bytes
    data = bytearray((out / "q.report.md").read_bytes())
    data[-2] ^= 1  # same size, one bit changed
    (out / "q.report.md").write_bytes(bytes(data))
    again = run_batch(src, out, _coarse(), workers=1, resume=True, progress=False)
    assert {r.file: r.status for r in again.results} == {"p.stl": "ok", "q.stl": "ok"}  # both redone
    assert (out / "p.supports.stl").stat().st_size > 0


# --------------------------------------------------------------------------- 6. hostile and huge input


def _bomb(path: Path, megabytes: int) -> None:
    """A 3MF whose model member inflates to ``megabytes`` MiB (spaces deflate over 200:1)."""
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED, compresslevel=1) as z:
        with z.open("3D/3dmodel.model", "w", force_zip64=True) as member:
            chunk = b" " * (1 << 20)
            for _ in range(megabytes):
                member.write(chunk)


def test_a_3mf_bomb_is_refused_before_it_is_unpacked(tmp_path):
    bomb = tmp_path / "bomb.3mf"
    _bomb(bomb, 600)
    assert bomb.stat().st_size < 4 * 2**20
    tracemalloc.start()
    try:
        with pytest.raises(MeshError, match=r"unpack to 600 MB, over the limit of 512 MB.*max_unpacked_mb") as e:
            load_mesh(bomb)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 300 * 2**20 and "\n" not in str(e.value)  # the bound: under 300 MB


def _instanced_3mf(path: Path, copies: int, components: bool) -> int:
    mesh = trimesh.creation.icosphere(subdivisions=2, radius=1.0)
    verts = "".join(f'<vertex x="{x}" y="{y}" z="{z}"/>' for x, y, z in mesh.vertices.tolist())
    tris = "".join(f'<triangle v1="{a}" v2="{b}" v3="{c}"/>' for a, b, c in mesh.faces.tolist())
    obj = f'<object id="1" type="model"><mesh><vertices>{verts}</vertices><triangles>{tris}</triangles></mesh></object>'
    place = [f'transform="1 0 0 0 1 0 0 0 1 {3 * (i % 100)} {3 * (i // 100)} 5"' for i in range(copies)]
    if components:
        comps = "".join(f'<component objectid="1" {t}/>' for t in place)
        resources = obj + f'<object id="2" type="model"><components>{comps}</components></object>'
        build = '<item objectid="2"/>'
    else:
        resources, build = obj, "".join(f'<item objectid="1" {t}/>' for t in place)
    model = (
        '<?xml version="1.0" encoding="UTF-8"?><model unit="millimeter" '
        'xmlns="http://schemas.microsoft.com/3dmanufacturing/core/2015/02">'
        f"<resources>{resources}</resources><build>{build}</build></model>"
    )
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as z:
        z.writestr("3D/3dmodel.model", model)
    return len(mesh.faces) * copies


@pytest.mark.parametrize("components", [False, True])
def test_instancing_bomb_is_refused_before_parsing(tmp_path, monkeypatch, components):
    path = tmp_path / "many.3mf"
    faces = _instanced_3mf(path, 20_000, components)
    assert path.stat().st_size < 200_000 and faces == 6_400_000
    monkeypatch.setattr(trimesh, "load_mesh", lambda *a, **k: pytest.fail("parsed"))
    with pytest.raises(MeshError, match=r"6,400,000 triangles .* over the limit of 3,000,000.*max_faces"):
        load_mesh(path)


def test_generate_refuses_a_job_that_would_not_fit_in_memory(tmp_path, monkeypatch):
    import supportgen.io.budget as budget

    monkeypatch.setattr(budget, "available_memory_mb", lambda: 400.0)  # a small machine
    plate = trimesh.creation.box((120.0, 70.0, 1.0))
    plate.apply_translation((0.0, 0.0, 5.0))
    path = tmp_path / "plate.stl"
    plate.export(path)
    # estimate_peak_mb: 250 MB + 700 B x (120/0.005 x 70/0.005 px) -> far over 400 MB, refused before the layers.
    with pytest.raises(supportgen.SupportGenError, match=r"needs about .* MB .* over the 400 MB"):
        supportgen.generate(path, supportgen.Settings().override(pixel_mm=0.005, tip_min_mm=0.05))


def test_nested_tubes_load_with_inverted_ones_flipped():
    # Concentric tubes (trimesh.creation.annulus), every third one inside out.  400 here to keep the
    # suite short; the 800 are timed in benchmarks/bench_files.py.
    tubes = []
    for i in range(400):
        t = trimesh.creation.annulus(r_min=1.0 + 0.2 * i, r_max=1.1 + 0.2 * i, height=10.0, sections=8)
        if i % 3 == 0:
            t.invert()
        tubes.append(t)
    mesh = trimesh.util.concatenate(tubes)
    buf = io.BytesIO()
    mesh.export(buf, file_type="stl")
    path = Path(os.environ.get("TMPDIR", "/tmp")) / f"tubes-{os.getpid()}.stl"
    path.write_bytes(buf.getvalue())
    try:
        part = load_mesh(path)
    finally:
        path.unlink()
    # Exact geometry: each tube's volume is that of trimesh's own (correctly wound) annulus.
    expected = sum(abs(t.volume) for t in tubes)
    assert part.mesh.volume == pytest.approx(expected, rel=1e-6)
    assert part.repairs == (f"flipped {len(range(0, 400, 3))} inside-out shells",)


# --------------------------------------------------------------------------- 7. readers


def _ascii_stl(name: bytes, bom: bool = False) -> bytes:
    text = trimesh.exchange.stl.export_stl_ascii(_box()).encode("ascii")
    body = text.replace(b"solid ", b"solid " + name + b" ", 1)
    return (b"\xef\xbb\xbf" if bom else b"") + body


@pytest.mark.parametrize(
    "name,bom", [("Teil-Würfel".encode(), False), ("pièce".encode("latin-1"), False), (b"plain", True)]
)
def test_ascii_stl_with_non_ascii_name_or_bom_loads(tmp_path, name, bom):
    path = tmp_path / "part.stl"
    path.write_bytes(_ascii_stl(name, bom))
    part = load_mesh(path)
    assert part.mesh.volume == pytest.approx(8 * 8 * 3, rel=1e-6)  # exact geometry


def test_obj_with_latin1_comment_loads_without_optional_packages(tmp_path, monkeypatch):
    text = trimesh.exchange.obj.export_obj(_box())
    path = tmp_path / "part.obj"
    path.write_bytes("# pièce d'essai\n".encode("latin-1") + text.encode("ascii"))
    for optional in ("charset_normalizer", "chardet"):
        monkeypatch.setitem(sys.modules, optional, None)  # importing it now fails
    assert load_mesh(path).mesh.volume == pytest.approx(8 * 8 * 3, rel=1e-6)


def test_binary_stl_whose_header_starts_with_solid_is_binary(tmp_path):
    data = bytearray(trimesh.exchange.stl.export_stl(_box()))
    data[:80] = b"solid but binary".ljust(80, b" ")
    path = tmp_path / "part.stl"
    path.write_bytes(bytes(data))
    assert load_mesh(path).mesh.volume == pytest.approx(8 * 8 * 3, rel=1e-6)


# --------------------------------------------------------------------------- 8. OS errors


def _small_fs(folder: Path, size_kb: int):
    """Mount a tmpfs of ``size_kb`` on ``folder`` (root only); return an unmount function or None."""
    if os.geteuid() != 0:
        return None
    folder.mkdir(parents=True, exist_ok=True)
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_kb}k", "tmpfs", str(folder)], capture_output=True)
    if r.returncode != 0:
        return None
    return lambda: subprocess.run(["umount", str(folder)], capture_output=True)


def test_full_disk_gives_one_line_and_the_next_input_goes_on(tmp_path, capsys, monkeypatch, two_results):
    import dataclasses

    small, _ = two_results
    # 81,920 faces: a 4 MB STL, well over the small part's set with its 1 MB report page
    sphere = trimesh.creation.icosphere(subdivisions=6, radius=5.0)
    big = dataclasses.replace(small, name="big", combined=sphere)
    drawn = small.save(tmp_path / "drawn")
    _reuse_plots(monkeypatch, drawn)
    sizes = {}
    for r in (big, small):
        paths = r.save(tmp_path / "measure")
        sizes[r.name] = sum(p.stat().st_size for p in paths.values())
    assert sizes["big"] > 1.5 * sizes["part"]
    results = {"big.stl": big, "part.stl": small}
    monkeypatch.setattr(supportgen, "generate", lambda path, *a, **k: results[Path(path).name])
    for name in results:
        (tmp_path / name).write_bytes(b"solid x\nendsolid x\n")
    out = tmp_path / "small-disk"
    unmount = _small_fs(out, int(1.3 * sizes["part"] / 1024) + 64)
    real_stage = supportgen.io.outputs.stage_file
    if unmount is None:  # no small file system here: inject ENOSPC for the big part's files

        def stage(target, data):
            if target.name.startswith("big."):
                raise OSError(errno.ENOSPC, "No space left on device", str(target))
            return real_stage(target, data)

        monkeypatch.setattr(supportgen.io.outputs, "stage_file", stage)
    try:
        code = main(["generate", str(tmp_path / "big.stl"), str(tmp_path / "part.stl"), "-o", str(out), "--quiet"])
        err = capsys.readouterr().err.strip().splitlines()
        left = sorted(p.name for p in out.iterdir())
    finally:
        if unmount is not None:
            unmount()
    assert code == 1 and len(err) == 1 and "No space left on device" in err[0] and "big." in err[0]
    assert left == sorted(f"part{s}" for s in supportgen.pipeline.OUTPUTS.values())  # the next input is whole


# --------------------------------------------------------------------------- 9. Dask time limits


def test_a_late_task_saves_nothing(tmp_path):
    from supportgen.runs.batch import Job, run_job

    src = tmp_path / "p.stl"
    _box().export(src)
    out = tmp_path / "out"
    out.mkdir()
    job = Job(str(src), "p.stl", str(out), "p", _coarse(), "straight", timeout_s=1e-6)  # counted from its start
    row = run_job(job)
    assert row.status == "timeout" and "nothing saved" in row.reason
    assert list(out.iterdir()) == []  # the whole set discarded, no temp file


@dataclasses.dataclass(frozen=True)
class _SleepJob:
    rel: str
    seconds: float
    timeout_s: float | None = None


def _sleep_run(job):
    started = time.monotonic()
    time.sleep(job.seconds)
    late = job.timeout_s is not None and time.monotonic() - started > job.timeout_s
    return (job.rel, "timeout" if late else "ok")


def test_dask_limit_starts_when_the_task_starts(monkeypatch):
    distributed = pytest.importorskip("distributed", reason="Dask distributed not installed (extra 'cluster')")
    import supportgen.runs.workers as workers

    monkeypatch.setattr(workers, "DASK_GRACE_S", 0.2)
    rows = []
    with (
        distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as c,
        distributed.Client(c, set_as_default=False) as client,
    ):
        # One thread: the slow task overruns and keeps the thread; the quick one must not inherit its clock.
        jobs = [_SleepJob("slow", 3.0, 1.0), _SleepJob("quick", 0.5, 1.0)]
        workers.run_dask(
            jobs,
            client,
            1.0,
            rows.append,
            run=_sleep_run,
            discard=lambda job: None,
            lost=lambda job, status, reason, s: (job.rel, status),
        )
    assert dict(rows) == {"slow": "timeout", "quick": "ok"}
