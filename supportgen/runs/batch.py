"""Batch: every mesh in a folder tree, in parallel, resumable, locally or on Dask.

:func:`run_batch` finds the ``.stl``/``.obj``/``.ply``/``.3mf`` files under a
folder (case-insensitive, recursively, sorted), supports each one with
:func:`supportgen.generate` and saves the usual outputs into the same relative
folder under the output tree, then writes ``batch-summary.csv`` and
``batch-summary.json`` there.

Engines (:mod:`supportgen.runs.workers`)
    Local: ``workers`` long-lived processes, one file at a time each; a process
    past its file's deadline is killed (status ``timeout``), one that dies is
    recorded (``crashed``) and replaced.  Dask: ``cluster="tcp://host:port"``
    sends the same job function to a Dask distributed scheduler (``pip install
    'supportgen[cluster]'``); workers must have supportgen installed and see the
    input and output folders at the same paths (a shared file system).  A Dask
    task past its deadline is recorded as ``timeout`` and cancelled, and if it
    ever finishes it writes nothing.
Resume
    After a successful save, ``NAME.batch.json`` beside the outputs records the
    sha256 of the input bytes and of ``settings.to_toml()`` plus the strategy.
    With ``resume=True`` a file whose manifest matches and whose outputs all
    exist is ``skipped``.  Every output is written atomically; the outputs of a
    file that fails, times out, crashes or is interrupted are removed, so an
    output set is either complete (with its manifest) or absent.
Memory guard
    :func:`estimate_peak_mb` is a calibrated linear model of a worker's peak
    resident memory; with ``memory_limit_mb`` a file whose estimate exceeds it
    is ``refused`` before the pipeline starts.

Results do not depend on the engine or the worker count: each file is
processed alone with the same settings, and the summary is sorted by path.
"""

from __future__ import annotations

import csv
import dataclasses
import fnmatch
import hashlib
import io
import json
import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import SupportGenError
from ..io.meshio import READ_FORMATS, part_name
from ..pipeline import DEFAULT_STRATEGY, OUTPUTS
from ..settings import Settings
from .workers import dask_client, run_dask, run_local

__all__ = ["SUFFIXES", "STATUSES", "BAD_STATUSES", "SUMMARY_FIELDS", "OUTPUT_SUFFIXES", "MANIFEST_SUFFIX",
           "MEMORY_BASE_MB", "MEMORY_MASK_FACTOR", "MEMORY_FACE_BYTES", "FileResult", "BatchSummary", "Job",
           "discover", "settings_hash", "file_hash", "mesh_footprint", "estimate_peak_mb", "discard_outputs",
           "run_job", "write_summary", "run_batch"]

SUFFIXES = READ_FORMATS
STATUSES = ("ok", "failed", "timeout", "crashed", "skipped", "refused")
BAD_STATUSES = frozenset({"failed", "timeout", "crashed", "refused"})
SUMMARY_FIELDS = ("file", "status", "reason", "contacts", "support_volume_mm3", "passed", "seconds", "peak_mb")
# What Result.save writes for one part (kept in step with supportgen.pipeline.Result.save; the tests check it).
OUTPUT_SUFFIXES = tuple(OUTPUTS.values())
MANIFEST_SUFFIX = ".batch.json"

# Peak resident memory of one worker (MB) ~ BASE + FACTOR * mask bytes / 2**20 + FACE_BYTES * faces / 2**20,
# mask = one uint8 layer mask over the part's x/y bounds.  Measured with resource.getrusage(RUSAGE_SELF).ru_maxrss
# of fresh processes (benchmarks/bench_batch.py --calibrate-memory, 2 cores, Linux, 2026-12-01): flat plates
# 10-70 mm (0.04-1.2 Mpx), spheres of 1,280-81,920 faces and the three demo parts; least squares gave
# 240 MB + 331 B/px + 1,400 B/face.  The constants below are raised so that no measured run exceeds its
# estimate (estimate / measured from 1.10 for the lattice trivet to 1.93 for the largest flat plate).
# The stages are still changing: rerun the calibration when they settle.
MEMORY_BASE_MB = 250.0        # the imported libraries plus a small part
MEMORY_MASK_FACTOR = 700.0    # bytes per pixel of the layer grid (masks, crossings, pressure solve)
MEMORY_FACE_BYTES = 2500.0    # per input face


@dataclass(frozen=True)
class FileResult:
    """One row of the batch summary (see :data:`SUMMARY_FIELDS`)."""

    file: str
    status: str
    reason: str = ""
    contacts: int | None = None
    support_volume_mm3: float | None = None
    passed: bool | None = None
    seconds: float = 0.0
    peak_mb: float | None = None      # the worker process's peak resident memory so far (an upper bound)

    @property
    def bad(self) -> bool:
        """True when the file was not supported, or was supported but fails the print check."""
        return self.status in BAD_STATUSES or self.passed is False

    def to_dict(self) -> dict:
        """The row as a plain dict."""
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class BatchSummary:
    """What a batch did: one :class:`FileResult` per finished file, sorted by path."""

    results: tuple[FileResult, ...]
    output_dir: Path
    interrupted: bool = False
    pending: int = 0

    @property
    def counts(self) -> dict[str, int]:
        """Number of files per status (every status present, zeros included)."""
        return {s: sum(r.status == s for r in self.results) for s in STATUSES}

    @property
    def exit_code(self) -> int:
        """130 when interrupted, 1 when any file is bad (:attr:`FileResult.bad`), else 0."""
        return 130 if self.interrupted else int(any(r.bad for r in self.results))

    @property
    def csv_path(self) -> Path:
        return self.output_dir / "batch-summary.csv"

    @property
    def json_path(self) -> Path:
        return self.output_dir / "batch-summary.json"


@dataclass(frozen=True)
class Job:
    """Everything a worker needs for one file; picklable."""

    source: str                 # input path
    rel: str                    # input path relative to the input folder (posix)
    outdir: str                 # output folder of this file
    name: str                   # output name (NAME.supported.stl ...)
    settings: Settings
    strategy: str
    memory_limit_mb: float | None = None
    deadline: float | None = None   # wall-clock time after which nothing is saved (Dask)
    protect: tuple = ()             # protect selectors for every file (side-car files add their own)


def discover(input_dir: str | Path, pattern: str | None = None, exclude: str | Path | None = None) -> list[Path]:
    """Mesh files under ``input_dir``, relative to it, sorted by their posix path.

    Parameters
    ----------
    input_dir : str or Path
        Folder searched recursively.
    pattern : str, optional
        A glob (``fnmatch``) matched against the relative posix path or the file name.
    exclude : str or Path, optional
        A folder to leave out (the output folder when it lies inside the input).

    Returns
    -------
    list of Path
        Relative paths of files whose suffix is in :data:`SUFFIXES`, any case;
        hidden files (name starting with ".") are left out.  ``*`` in a pattern
        also matches across folders.

    Raises
    ------
    SupportGenError
        ``input_dir`` is not a folder.

    Notes
    -----
    Cost O(entries in the tree).
    """
    root = Path(input_dir)
    if not root.is_dir():
        raise SupportGenError(f"batch: input folder {root} does not exist or is not a folder; give a folder of meshes")
    skip = Path(exclude).resolve() if exclude is not None else None
    found = []
    for path in root.rglob("*"):
        if path.suffix.lower() not in SUFFIXES or path.name.startswith(".") or not path.is_file():
            continue
        if skip is not None and path.resolve().is_relative_to(skip):
            continue
        rel = path.relative_to(root)
        if pattern and not (fnmatch.fnmatch(rel.as_posix(), pattern) or fnmatch.fnmatch(path.name, pattern)):
            continue
        found.append(rel)
    return sorted(found, key=lambda p: p.as_posix())


def settings_hash(settings: Settings, strategy: str) -> str:
    """sha256 (hex) of ``settings.to_toml()`` followed by the strategy name."""
    return hashlib.sha256(f"{settings.to_toml()}\nstrategy = {strategy!r}\n".encode()).hexdigest()


def file_hash(path: str | Path) -> str:
    """sha256 (hex) of a file's bytes, read in 1 MiB blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def mesh_footprint(path: str | Path) -> tuple[int, np.ndarray]:
    """Face count and (2, 3) bounds of a mesh file, without repairing it.

    A binary STL is read with one ``numpy.frombuffer`` (O(faces), 50 bytes a
    face); other formats go through :func:`supportgen.io.meshio.load_mesh`.

    Raises
    ------
    supportgen.errors.MeshError
        The file cannot be read as a mesh.
    """
    path = Path(path)
    size = path.stat().st_size
    if path.suffix.lower() == ".stl" and size >= 84:
        with open(path, "rb") as handle:
            head = handle.read(84)
            n = int(np.frombuffer(head, "<u4", 1, 80)[0])
            if n > 0 and size == 84 + 50 * n:
                rec = np.frombuffer(handle.read(), np.dtype([("n", "<f4", 3), ("v", "<f4", (3, 3)), ("a", "<u2")]))
                v = rec["v"].reshape(-1, 3).astype(float)
                return n, np.array([v.min(0), v.max(0)])
    from ..io.meshio import load_mesh

    mesh = load_mesh(path).mesh
    return len(mesh.faces), np.asarray(mesh.bounds, float)


def estimate_peak_mb(faces: int, bounds, settings: Settings) -> float:
    """Estimated peak resident memory (MB) of one worker supporting a part.

    Parameters
    ----------
    faces : int
        Number of triangles of the input.
    bounds : (2, 3) array_like
        Its axis-aligned bounds, mm.
    settings : Settings
        Gives the pixel pitch of the layer grid.

    Returns
    -------
    float
        ``MEMORY_BASE_MB + MEMORY_MASK_FACTOR * mask / 2**20 + MEMORY_FACE_BYTES * faces / 2**20``
        with ``mask = (extent_x / pixel) * (extent_y / pixel)`` bytes (one uint8 layer mask).

    Notes
    -----
    O(1).  The constants are fitted to measured peaks (see the module
    constants); the fit is rounded up so it errs on the safe side.

    Examples
    --------
    A 20 x 10 mm footprint at 0.05 mm pixels is a 400 x 200 pixel mask:

    >>> mb = estimate_peak_mb(1000, [[0, 0, 0], [20, 10, 5]], Settings())
    >>> bool(mb == MEMORY_BASE_MB + (MEMORY_MASK_FACTOR * 400 * 200 + MEMORY_FACE_BYTES * 1000) / 2**20)
    True
    """
    ext = np.ptp(np.asarray(bounds, float)[:, :2], axis=0)
    mask = float(np.prod(ext / settings.printer.pixel_mm))
    return MEMORY_BASE_MB + (MEMORY_MASK_FACTOR * mask + MEMORY_FACE_BYTES * faces) / 2**20


def _outputs(job: Job) -> list[Path]:
    return [Path(job.outdir) / f"{job.name}{s}" for s in (*OUTPUT_SUFFIXES, MANIFEST_SUFFIX)]


def discard_outputs(job: Job) -> None:
    """Remove a file's outputs (those its manifest lists too), manifest and any temporary file a killed write left."""
    paths = _outputs(job)
    try:
        listed = json.loads(paths[-1].read_text(encoding="utf-8")).get("outputs", [])
    except (OSError, ValueError, AttributeError):
        listed = []
    for p in [*paths, *(paths[-1].parent / Path(n).name for n in listed if n.startswith(f"{job.name}."))]:
        p.unlink(missing_ok=True)
        for tmp in p.parent.glob(f".{p.name}.*.tmp"):
            tmp.unlink(missing_ok=True)


def _row(job: Job, report: dict, status: str, seconds: float, reason: str = "") -> FileResult:
    ver = report["verification"]
    if not reason and not ver["passed"]:
        reason = "check failed: " + "; ".join(ver.get("failures", [])[:3])
    return FileResult(job.rel, status, reason, int(report["supports"]["contacts"]),
                      round(float(report["supports"]["volume_mm3"]), 3), bool(ver["passed"]), round(seconds, 3))


def _peak_mb() -> float | None:
    """Peak resident memory of this process so far, MB (None where ``resource`` is missing)."""
    try:
        import resource
    except ImportError:
        return None
    kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return round(kb / (1024**2 if sys.platform == "darwin" else 1024), 1)     # bytes on macOS, KiB elsewhere


def run_job(job: Job) -> FileResult:
    """Support one file and save its outputs and manifest (runs in a worker).

    Returns
    -------
    FileResult
        ``ok``, ``failed`` (the one-line :class:`SupportGenError` message, or
        ``internal error: ...``) or ``refused`` (memory guard).

    Notes
    -----
    Errors are returned, not raised, so that one file cannot stop a batch.
    """
    t0 = time.perf_counter()
    try:
        from .. import pipeline
        from ..io.meshio import atomic_write_text

        input_sha = file_hash(job.source)
        if job.memory_limit_mb is not None:
            faces, bounds = mesh_footprint(job.source)
            need = estimate_peak_mb(faces, bounds, job.settings)
            if need > job.memory_limit_mb:
                discard_outputs(job)
                return FileResult(job.rel, "refused", f"{job.rel}: needs about {need:.0f} MB ({faces} faces, "
                                  f"{np.ptp(bounds[:, 0]):.1f} x {np.ptp(bounds[:, 1]):.1f} mm at "
                                  f"{job.settings.printer.pixel_mm} mm pixels), over the {job.memory_limit_mb:g} MB "
                                  "limit; raise --memory-limit or use coarser pixels",
                                  seconds=round(time.perf_counter() - t0, 3))
        result = pipeline.generate(job.source, job.settings, strategy=job.strategy, name=job.name, progress=False,
                                   protect=list(job.protect) or None)
        if job.deadline is not None and time.time() > job.deadline:
            return FileResult(job.rel, "timeout", "finished after its deadline; nothing saved",
                              seconds=round(time.perf_counter() - t0, 3))
        saved = result.save(job.outdir)
        row = _row(job, result.report, "ok", time.perf_counter() - t0)
        manifest = {"input": job.rel, "input_sha256": input_sha,
                    "settings_sha256": settings_hash(job.settings, job.strategy), "strategy": job.strategy,
                    "outputs": sorted(p.name for p in saved.values()), **{k: row.to_dict()[k] for k in SUMMARY_FIELDS[3:7]}}
        atomic_write_text(_outputs(job)[-1], json.dumps(manifest, indent=1, sort_keys=True) + "\n")
        return dataclasses.replace(row, peak_mb=_peak_mb())
    except SupportGenError as exc:
        reason = str(exc)
    except Exception as exc:  # noqa: BLE001 - a bug in one stage must not stop the batch; recorded per file
        reason = f"internal error: {type(exc).__name__}: {exc} (run `supportgen generate` on it with --debug)"
    discard_outputs(job)
    return FileResult(job.rel, "failed", reason, seconds=round(time.perf_counter() - t0, 3), peak_mb=_peak_mb())


def _lost(job: Job, status: str, reason: str, seconds: float) -> FileResult:
    """The row of a file whose worker never returned (``timeout`` or ``crashed``)."""
    return FileResult(job.rel, status, reason, seconds=seconds)


def _up_to_date(job: Job, settings_sha: str) -> FileResult | None:
    """The skipped row when the manifest matches the input and settings and every output exists."""
    paths = _outputs(job)
    try:
        m = json.loads(paths[-1].read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    names = set(m.get("outputs", [])) | {p.name for p in paths[:-1]}
    if m.get("settings_sha256") != settings_sha or not all((paths[-1].parent / n).exists() for n in names):
        return None
    if m.get("input_sha256") != file_hash(job.source):
        return None
    return FileResult(job.rel, "skipped", "outputs up to date (same input and settings)", m.get("contacts"),
                      m.get("support_volume_mm3"), m.get("passed"), 0.0)


def _plan_jobs(root: Path, out: Path, rels: list[Path], settings, strategy, memory_limit_mb):
    """Jobs in path order, plus rows for files whose output name clashes with an earlier one."""
    jobs, clashes, seen = [], [], {}
    for rel in rels:
        name = part_name(rel)
        key = (rel.parent.as_posix(), name)
        if key in seen:
            clashes.append(FileResult(rel.as_posix(), "failed", f"{rel.as_posix()}: its outputs ({name}.*) would "
                                      f"overwrite those of {seen[key]}; rename one of them"))
            continue
        seen[key] = rel.as_posix()
        jobs.append(Job(str(root / rel), rel.as_posix(), str(out / rel.parent), name, settings, strategy,
                        memory_limit_mb))
    return jobs, clashes


def write_summary(summary: BatchSummary, meta: dict) -> None:
    """Write ``batch-summary.csv`` and ``batch-summary.json`` atomically."""
    from ..io.meshio import atomic_write_text

    rows = [r.to_dict() for r in summary.results]
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=SUMMARY_FIELDS, lineterminator="\n")
    writer.writeheader()
    writer.writerows({k: ("" if v is None else v) for k, v in row.items()} for row in rows)
    atomic_write_text(summary.csv_path, buf.getvalue())
    doc = {**meta, "interrupted": summary.interrupted, "pending": summary.pending, "counts": summary.counts,
           "exit_code": summary.exit_code, "files": rows}
    atomic_write_text(summary.json_path, json.dumps(doc, indent=1) + "\n")


def run_batch(input_dir: str | Path, output_dir: str | Path, settings: Settings | None = None, *,
              strategy: str = DEFAULT_STRATEGY, workers: int | None = None, cluster=None, resume: bool = False,
              pattern: str | None = None, timeout_s: float | None = None, memory_limit_mb: float | None = None,
              progress: bool = True, on_result: Callable[[FileResult], None] | None = None,
              protect=()) -> BatchSummary:
    """Support every mesh under ``input_dir`` into a mirrored tree under ``output_dir``.

    Parameters
    ----------
    input_dir, output_dir : str or Path
        The folder searched (recursively) and the output root.
    settings : Settings, optional
        Defaults if None.
    strategy : str
        A name from :data:`supportgen.supports.strategies.STRATEGIES`.
    workers : int, optional
        Local worker processes (default ``os.cpu_count()``); ignored with ``cluster``.
    cluster : str, optional
        A Dask scheduler address (``tcp://host:port``) or an object with a
        ``scheduler_address`` (e.g. ``distributed.LocalCluster``).
    resume : bool
        Skip files whose manifest matches (see the module notes).
    pattern : str, optional
        Glob on the relative path or the file name.
    timeout_s : float, optional
        Per-file time limit, s.
    memory_limit_mb : float, optional
        Refuse files whose :func:`estimate_peak_mb` exceeds this.
    progress : bool
        A tqdm bar on stderr (done, failed, ETA).
    protect : sequence of str, optional
        Protect selectors (:mod:`supportgen.supports.protect`) for every file; a file's
        side-car ``NAME.protect.toml`` adds its own.  Not part of the resume key.
    on_result : callable, optional
        Called in this process with each :class:`FileResult` as it arrives; an
        exception it raises stops the batch like Ctrl-C (KeyboardInterrupt) or
        propagates after the summary is written.

    Returns
    -------
    BatchSummary
        Also written to ``batch-summary.csv`` and ``.json`` in ``output_dir``.
        On Ctrl-C the running files are stopped and discarded, the summary of
        what finished is written and ``interrupted`` is True (exit code 130).

    Raises
    ------
    SupportGenError
        Missing input folder, unknown strategy, bad worker count, Dask missing
        or unreachable, or worker processes that cannot start.

    Notes
    -----
    Wall time ~ sum of the per-file times / workers; parent memory O(files).
    """
    from tqdm import tqdm

    from ..supports.strategies import get_strategy

    settings = settings if settings is not None else Settings()
    get_strategy(strategy)
    if workers is not None and workers < 1:
        raise SupportGenError(f"batch: workers={workers}; give 1 or more worker processes")
    root, out = Path(input_dir), Path(output_dir)
    if root.resolve() == out.resolve():
        raise SupportGenError(f"batch: output folder {out} is the input folder; outputs would be read back as "
                              "inputs next time: give another -o folder")
    inside = out.resolve().is_relative_to(root.resolve())
    rels = discover(root, pattern, exclude=out if inside else None)
    client = dask_client(cluster) if cluster is not None else None
    out.mkdir(parents=True, exist_ok=True)
    jobs, results = _plan_jobs(root, out, rels, settings, strategy, memory_limit_mb)
    jobs = [dataclasses.replace(j, protect=tuple(protect)) for j in jobs] if protect else jobs
    sha = settings_hash(settings, strategy)
    todo = []
    for job in jobs:
        row = _up_to_date(job, sha) if resume else None
        (results.append(row) if row else todo.append(job))
    bar = tqdm(total=len(rels), desc="supportgen batch", unit="part", disable=not progress, dynamic_ncols=True)
    bar.update(len(results))

    def record(row: FileResult) -> None:
        results.append(row)
        bar.update(1)
        bar.set_postfix(done=sum(not r.bad for r in results), failed=sum(r.bad for r in results))
        if on_result is not None:
            on_result(row)

    interrupted, raised = False, None
    try:
        if client is not None:
            run_dask(todo, client, timeout_s, record, run=run_job, discard=discard_outputs, lost=_lost)
        else:
            run_local(todo, workers or os.cpu_count() or 1, timeout_s, record, run=run_job,
                      discard=discard_outputs, lost=_lost)
    except KeyboardInterrupt:
        interrupted = True
    except Exception as exc:  # noqa: BLE001 - write the summary of what finished, then re-raise
        interrupted, raised = True, exc
    finally:
        bar.close()
        if client is not None:
            client.close()
    done = {r.file for r in results}
    summary = BatchSummary(tuple(sorted(results, key=lambda r: r.file)), out, interrupted,
                           sum(j.rel not in done for j in todo))
    write_summary(summary, {"input_dir": str(root), "output_dir": str(out), "strategy": strategy,
                            "settings_sha256": sha, "engine": "dask" if client is not None else "local",
                            "workers": None if client is not None else (workers or os.cpu_count())})
    if raised is not None:
        raise raised
    return summary
