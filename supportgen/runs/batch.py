"""Batch: every mesh in a folder tree, in parallel, resumable, locally or on Dask.

:func:`run_batch` finds the ``.stl``/``.obj``/``.ply``/``.3mf`` files under a
folder (case-insensitive, recursively, sorted), supports each one with
:func:`supportgen.generate` and saves the usual outputs into the same relative
folder under the output tree, then writes ``batch-summary.csv`` and
``batch-summary.json`` there.

Engines (:mod:`supportgen.runs.workers`)
    Local: ``workers`` long-lived processes, one file at a time each; a process
    past its file's deadline is killed (status ``timeout``), one that dies is
    recorded (``error``) and replaced.  Dask: ``cluster="tcp://host:port"``
    sends the same job function to a Dask distributed scheduler (``pip install
    'supportgen[cluster]'``); workers must have supportgen installed and see the
    input and output folders at the same paths (a shared file system).  A Dask
    task's time limit starts when the task starts; past it the task saves
    nothing (its set is discarded whole) and the next task is not affected.
Output sets and resume
    Each file's outputs and its manifest ``NAME.batch.json`` are committed as
    one set (:func:`supportgen.io.outputs.commit_set`): a file that fails,
    times out, crashes or is interrupted leaves its previous set as it was and
    no temporary file.  The manifest records the sha256 of the input bytes, of
    ``settings.to_toml()`` plus the strategy and the orientation choice (``orient``,
    ``rotate``), of the part's side-car files, and
    the size and sha256 of every output, and the file's row (status, reason,
    figures); with ``resume=True`` a file is not redone when all of them match
    what is on disk: its row is the manifest's (the status and reason of the run
    that made the outputs), marked ``reused``.
Side-car files
    ``NAME.protect.toml`` next to a part adds protected surfaces
    (:mod:`supportgen.supports.protect`) and ``NAME.contacts.csv`` next to it is
    read as its contacts (:mod:`supportgen.io.contactsfile`: rows kept are honoured,
    rows deleted are gone).  Their bytes are part of the resume key (:func:`sidecars_hash`),
    so editing one re-runs that part only.  Side-cars are looked up beside the input,
    never in the output tree (inputs under the output folder are not read).
One run per output folder
    The output folder is locked for the run (:class:`supportgen.io.lock.FolderLock`);
    a second batch or ``generate`` on it waits (``wait_s``) or refuses.
    SIGINT and SIGTERM both stop the batch like Ctrl-C: workers are stopped,
    the summary is written with ``interrupted: true``, exit status 130.
Names
    Outputs are named by :func:`supportgen.io.meshio.part_name`; inputs of one
    folder whose names collide get distinct names (``NAME-2`` ...) or, with
    ``name_clash="refuse"``, fail; an output that would replace an input is
    refused before any work.
Memory guard
    :func:`estimate_peak_mb` is a calibrated linear model of a worker's peak
    resident memory; with ``memory_limit_mb`` a file whose estimate exceeds it
    is ``refused`` before the pipeline starts.
Statuses (:data:`STATUSES`)
    ``ok`` supported and passes the print check; ``failed-check`` supported,
    outputs saved, but the check fails (the reason names why); ``refused`` the
    input was refused with a reason (unreadable or bad mesh, units, placement,
    settings, memory guard, an output-name clash); ``error`` anything else went
    wrong (a failure while building or saving, a bug, a worker that died);
    ``timeout`` past the per-file limit, nothing saved.
Totals (:func:`totals`)
    Parts, resin (sum of each report's ``estimates.resin_ml``) and print time
    (sum of each report's ``estimates.print_time_s``: parts printed one at a
    time, not sharing a plate), over the rows that have them, and the number of
    rows per status.

Results do not depend on the engine or the worker count: each file is
processed alone with the same settings, and the summary is sorted by path.
"""

from __future__ import annotations

import csv
import dataclasses
import fnmatch
import io
import json
import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import GeometryError, OutputError, SizingError, SupportGenError
from ..io.budget import MEMORY_BASE_MB, MEMORY_FACE_BYTES, MEMORY_MASK_FACTOR, estimate_peak_mb, mesh_footprint
from ..io.contactsfile import sidecar_for as contacts_sidecar
from ..io.lock import FolderLock
from ..io.meshio import READ_FORMATS, atomic_write_text, part_name
from ..io.outputs import (
    CLASH_MODES,
    assign_names,
    clean_temps,
    os_error_line,
    prepare_folder,
    refuse_overwrites,
    remove_temps,
    sha256_of,
)
from ..physics.orientation import check_orientation_choice
from ..pipeline import DEFAULT_STRATEGY, OUTPUTS
from ..report.web import batch_index
from ..settings import Settings
from ..supports.protect import sidecar_for as protect_sidecar
from .memory import peak_rss_mb
from .signals import stop_on_signals
from .workers import dask_client, run_dask, run_local

__all__ = [
    "SUFFIXES",
    "STATUSES",
    "BAD_STATUSES",
    "SUMMARY_FIELDS",
    "MANIFEST_FIELDS",
    "PRINT_TIME_NOTE",
    "TOTAL_ROW",
    "OUTPUT_SUFFIXES",
    "MANIFEST_SUFFIX",
    "MEMORY_BASE_MB",
    "MEMORY_MASK_FACTOR",
    "MEMORY_FACE_BYTES",
    "FileResult",
    "BatchSummary",
    "Job",
    "discover",
    "settings_hash",
    "file_hash",
    "sidecars",
    "sidecars_hash",
    "mesh_footprint",
    "estimate_peak_mb",
    "discard_outputs",
    "totals",
    "count_line",
    "run_job",
    "write_summary",
    "run_batch",
]

SUFFIXES = READ_FORMATS
STATUSES = ("ok", "failed-check", "refused", "error", "timeout")
BAD_STATUSES = frozenset(STATUSES) - {"ok"}
#: Errors that are a failure of the run, not a refusal of the input: the row says ``error``.
#: Any other SupportGenError (bad mesh, units, placement, settings, memory budget) says ``refused``.
ERROR_CLASSES = (GeometryError, SizingError, OutputError)
PRINT_TIME_NOTE = "sum of the per-part print times (parts printed one at a time, not sharing a plate)"
SUMMARY_FIELDS = (
    "file",
    "status",
    "reason",
    "contacts",
    "support_volume_mm3",
    "passed",
    "seconds",
    "peak_mb",
    "peak_force_n",
    "resin_ml",
    "print_time_s",
    "reused",
)
#: What a manifest keeps of its file's row, so that a resumed run can show it as it was: all
#: but the file (the manifest's own ``input``), the worker's memory and the reuse flag.
MANIFEST_FIELDS = tuple(f for f in SUMMARY_FIELDS if f not in ("file", "peak_mb", "reused"))
#: What Result.save writes for one part (supportgen.pipeline.OUTPUTS), plus the manifest in the same set.
OUTPUT_SUFFIXES = tuple(OUTPUTS.values())
MANIFEST_SUFFIX = ".batch.json"
file_hash = sha256_of  # sha256 (hex) of a file's bytes


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
    peak_mb: float | None = None  # the worker process's peak resident memory so far (an upper bound)
    peak_force_n: float | None = None
    resin_ml: float | None = None  # the report's estimates.resin_ml (part, supports and base)
    print_time_s: float | None = None  # the report's estimates.print_time_s
    reused: bool = False  # the row is an earlier run's (resume): its outputs were up to date

    @property
    def bad(self) -> bool:
        """True when the status is not ``ok`` (not supported, or supported but fails the print check)."""
        return self.status != "ok"

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
    def totals(self) -> dict:
        """See :func:`totals`."""
        return totals(self.results)

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

    source: str  # input path
    rel: str  # input path relative to the input folder (posix)
    outdir: str  # output folder of this file
    name: str  # output name (NAME.supported.stl ...)
    settings: Settings
    strategy: str
    memory_limit_mb: float | None = None
    timeout_s: float | None = None  # counted from the job's own start, in the worker (Dask): past it nothing is saved
    note: str = ""  # said in the row (a renamed output)
    protect: tuple = ()  # protect selectors for every file (side-car files add their own)
    orient: str = "keep"  # generate(orient=...): the given orientation, or one chosen from the physics
    rotate: tuple | None = None  # generate(rotate=...): degrees about x, y, z, before any search

    @property
    def files(self) -> list[str]:
        """Names of the files of this job's output set, the manifest last."""
        return [f"{self.name}{s}" for s in (*OUTPUT_SUFFIXES, MANIFEST_SUFFIX)]

    @property
    def manifest(self) -> Path:
        return Path(self.outdir) / f"{self.name}{MANIFEST_SUFFIX}"


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


def settings_hash(settings: Settings, strategy: str, orient: str = "keep", rotate=None) -> str:
    """sha256 (hex) of ``settings.to_toml()`` followed by the strategy name and the orientation choice.

    The given orientation with no rotation hashes as before the choice existed, so outputs
    made then stay up to date; ``auto`` or a rotation is a different key.
    """
    import hashlib

    text = f"{settings.to_toml()}\nstrategy = {strategy!r}\n"
    if orient != "keep" or rotate is not None:
        angles = None if rotate is None else [float(a) for a in rotate]
        text += f"orient = {orient!r}\nrotate = {angles!r}\n"
    return hashlib.sha256(text.encode()).hexdigest()


def sidecars(source: str | Path) -> list[Path]:
    """The side-car files of a part that exist: ``NAME.protect.toml`` and ``NAME.contacts.csv``."""
    return [p for p in (protect_sidecar(source), contacts_sidecar(source)) if p is not None]


def sidecars_hash(source: str | Path) -> str | None:
    """sha256 (hex) of the names and bytes of a part's side-car files; None when it has none."""
    import hashlib

    found = sidecars(source)
    if not found:
        return None
    h = hashlib.sha256()
    for p in found:
        h.update(f"{p.name}\n{file_hash(p)}\n".encode())
    return h.hexdigest()


def discard_outputs(job: Job) -> None:
    """Remove what a stopped or failed job left unfinished: the temporary files of its set.

    Its previous committed set, if any, is left as it was (it is whole: see the module notes).
    Names are compared as strings, never turned into a glob.
    """
    remove_temps(job.outdir, job.files)


def totals(rows) -> dict:
    """The batch's totals: ``parts`` (rows), ``supported`` (rows with outputs), ``resin_ml`` and
    ``print_time_s`` (sums over the rows that have them; the time is :data:`PRINT_TIME_NOTE`),
    ``print_time_note``, and ``counts`` (rows per status, every status present)."""
    rows = list(rows)
    resin = [r.resin_ml for r in rows if r.resin_ml is not None]
    time_s = [r.print_time_s for r in rows if r.print_time_s is not None]
    return {
        "parts": len(rows),
        "supported": sum(r.contacts is not None for r in rows),
        "reused": sum(bool(r.reused) for r in rows),
        "resin_ml": round(float(sum(resin)), 4),
        "print_time_s": round(float(sum(time_s)), 2),
        "print_time_note": PRINT_TIME_NOTE,
        "counts": {s: sum(r.status == s for r in rows) for s in STATUSES},
    }


def count_line(rows) -> str:
    """One line of the totals, the same on the progress bar and after the batch:
    ``5 part(s): 3 ok, 1 failed-check, 1 refused (2 reused); resin 4.2 ml; print time 1.25 h (sum)``."""
    t = totals(rows)
    counts = ", ".join(f"{n} {s}" for s, n in t["counts"].items() if n) or "none"
    reused = f" ({t['reused']} reused from an earlier run)" if t["reused"] else ""
    return (
        f"{t['parts']} part(s): {counts}{reused}; resin {t['resin_ml']:.1f} ml; "
        f"print time {t['print_time_s'] / 3600:.2f} h (sum of per-part times)"
    )


def _row(job: Job, report: dict, seconds: float) -> FileResult:
    ver = report["verification"]
    reason = "" if ver["passed"] else "check failed: " + "; ".join(ver.get("failures", [])[:3])
    est = report.get("estimates", {})
    return FileResult(
        job.rel,
        "ok" if ver["passed"] else "failed-check",
        "; ".join(x for x in (reason, job.note) if x),
        int(report["supports"]["contacts"]),
        round(float(report["supports"]["volume_mm3"]), 3),
        bool(ver["passed"]),
        round(seconds, 3),
        peak_force_n=round(float(report["forces"]["peak_layer_force_n"]), 4),
        resin_ml=None if est.get("resin_ml") is None else round(float(est["resin_ml"]), 4),
        print_time_s=None if est.get("print_time_s") is None else round(float(est["print_time_s"]), 2),
    )


class _Late(Exception):
    """A job finished after its time limit: its set is not committed."""


def _refusal(job: Job, t0: float) -> FileResult | None:
    """The ``refused`` row when the memory estimate is over the job's limit, else None."""
    if job.memory_limit_mb is None:
        return None
    faces, bounds = mesh_footprint(job.source, job.settings)
    need = estimate_peak_mb(faces, bounds, job.settings)
    if need <= job.memory_limit_mb:
        return None
    return FileResult(
        job.rel,
        "refused",
        f"{job.rel}: needs about {need:.0f} MB ({faces} faces, "
        f"{np.ptp(bounds[:, 0]):.1f} x {np.ptp(bounds[:, 1]):.1f} mm at "
        f"{job.settings.printer.pixel_mm} mm pixels), over the {job.memory_limit_mb:g} MB "
        "limit; raise --memory-limit or use coarser pixels",
        seconds=round(time.perf_counter() - t0, 3),
    )


def _manifest(job: Job, input_sha: str, row: FileResult, sidecar_sha: str | None = None):
    """The manifest's producer: a function of the staged files of the set (see ``commit_set``)."""

    def make(staged) -> bytes:
        doc = {
            "input": job.rel,
            "input_sha256": input_sha,
            "settings_sha256": settings_hash(job.settings, job.strategy, job.orient, job.rotate),
            "sidecars_sha256": sidecar_sha,
            "strategy": job.strategy,
            "orient": job.orient,
            "rotate": None if job.rotate is None else list(job.rotate),
            "outputs": [o.to_dict() for o in staged.values()],
            **{k: row.to_dict()[k] for k in MANIFEST_FIELDS},
        }
        return (json.dumps(doc, indent=1, sort_keys=True) + "\n").encode("utf-8")

    return make


def run_job(job: Job) -> FileResult:
    """Support one file and commit its outputs and manifest as one set (runs in a worker).

    Returns
    -------
    FileResult
        ``ok`` or ``failed-check`` (outputs saved), ``refused`` (the input's one-line
        :class:`SupportGenError` message, or the memory guard), ``error`` (:data:`ERROR_CLASSES`,
        an OS error, or ``internal error: ...``) or ``timeout`` (finished past ``job.timeout_s``
        counted from this call: nothing saved).

    Notes
    -----
    Errors are returned, not raised, so that one file cannot stop a batch.
    """
    t0 = time.perf_counter()
    deadline = time.monotonic() + job.timeout_s if job.timeout_s else None

    def in_time() -> None:
        if deadline is not None and time.monotonic() > deadline:
            raise _Late

    try:
        from .. import pipeline

        input_sha = file_hash(job.source)
        sidecar_sha = sidecars_hash(job.source)  # before the run: the bytes it reads
        refused = _refusal(job, t0)
        if refused is not None:
            return refused
        result = pipeline.generate(
            job.source,
            job.settings,
            strategy=job.strategy,
            name=job.name,
            progress=False,
            protect=list(job.protect) or None,
            contacts=contacts_sidecar(job.source),
            orient=job.orient,
            rotate=job.rotate,
        )
        in_time()
        row = _row(job, result.report, time.perf_counter() - t0)
        result.save(
            job.outdir,
            extra={"manifest": (job.manifest.name, _manifest(job, input_sha, row, sidecar_sha))},
            before_commit=in_time,
        )
        return dataclasses.replace(row, peak_mb=peak_rss_mb())
    except _Late:
        return FileResult(
            job.rel,
            "timeout",
            f"took longer than {job.timeout_s:g} s; finished late, nothing saved",
            seconds=round(time.perf_counter() - t0, 3),
        )
    except ERROR_CLASSES as exc:
        status, reason = "error", str(exc)
    except SupportGenError as exc:
        status, reason = "refused", str(exc)
    except OSError as exc:
        status, reason = "error", os_error_line(job.source, exc, "read or write")
    except Exception as exc:  # noqa: BLE001 - a bug in one stage must not stop the batch; recorded per file
        status = "error"
        reason = f"internal error: {type(exc).__name__}: {exc} (run `supportgen generate` on it with --debug)"
    discard_outputs(job)
    return FileResult(job.rel, status, reason, seconds=round(time.perf_counter() - t0, 3), peak_mb=peak_rss_mb())


def _lost(job: Job, status: str, reason: str, seconds: float) -> FileResult:
    """The row of a file whose worker never returned (``timeout``, or ``error`` for a dead worker)."""
    return FileResult(job.rel, status, reason, seconds=seconds)


def _up_to_date(job: Job, settings_sha: str) -> dict | None:
    """The manifest when it matches the input and settings and every output of the set is on disk with
    its recorded size and sha256; else None."""
    try:
        m = json.loads(job.manifest.read_text(encoding="utf-8"))
        listed = {o["file"]: o for o in m["outputs"]}
    except (OSError, ValueError, KeyError, TypeError):
        return None
    if m.get("settings_sha256") != settings_sha or not set(job.files[:-1]) <= set(listed):
        return None
    if m.get("sidecars_sha256") != sidecars_hash(job.source):  # a side-car was edited, added or removed
        return None
    folder = Path(job.outdir)
    for name, o in listed.items():
        path = folder / Path(name).name
        try:
            if path.stat().st_size != o["bytes"] or file_hash(path) != o["sha256"]:
                return None
        except (OSError, KeyError, TypeError):
            return None
    return m if m.get("input_sha256") == file_hash(job.source) else None


def _from_manifest(job: Job, m: dict, reused: bool = True) -> FileResult:
    """The row a manifest records: the status and reason of the run that made the outputs.

    A manifest written before statuses were recorded gives ``ok`` or ``failed-check`` from ``passed``.
    """
    status = m.get("status")
    if status not in ("ok", "failed-check"):  # only supported files have a manifest
        status = "failed-check" if m.get("passed") is False else "ok"
    return FileResult(
        job.rel,
        status,
        str(m.get("reason") or ""),
        m.get("contacts"),
        m.get("support_volume_mm3"),
        m.get("passed"),
        float(m.get("seconds") or 0.0),
        peak_force_n=m.get("peak_force_n"),
        resin_ml=m.get("resin_ml"),
        print_time_s=m.get("print_time_s"),
        reused=reused,
    )


def _plan_jobs(root: Path, out: Path, rels: list[Path], settings, strategy, memory_limit_mb, clash="rename"):
    """Jobs in path order with distinct output names per folder, plus ``refused`` rows for name clashes
    when ``clash="refuse"``."""
    jobs, clashes, folders = [], [], {}
    for rel in rels:
        folders.setdefault(rel.parent.as_posix(), []).append(rel)
    for group in folders.values():
        stems = [part_name(r) for r in group]
        names = assign_names(stems, "rename")
        for rel, stem, name in zip(group, stems, names):
            if name != stem and clash == "refuse":
                first = group[[s.casefold() for s in stems].index(stem.casefold())].as_posix()
                clashes.append(
                    FileResult(
                        rel.as_posix(),
                        "refused",
                        f"{rel.as_posix()}: its outputs ({stem}.*) would "
                        f"overwrite those of {first}; rename one of them or use --name-clash rename",
                    )
                )
                continue
            note = f"outputs named {name}.* ({stem}.* is another input's)" if name != stem else ""
            jobs.append(
                Job(
                    str(root / rel),
                    rel.as_posix(),
                    str(out / rel.parent),
                    name,
                    settings,
                    strategy,
                    memory_limit_mb,
                    note=note,
                )
            )
    return sorted(jobs, key=lambda j: j.rel), clashes


#: The ``file`` cell of the CSV summary's last row, which carries the totals.
TOTAL_ROW = "(total)"


def _total_row(summary: BatchSummary) -> dict:
    """The CSV's last row: sums of the per-file figures, the counts line as its reason."""
    t = summary.totals

    def add(key):
        vals = [getattr(r, key) for r in summary.results if getattr(r, key) is not None]
        return round(sum(vals), 4) if vals else ""

    return {
        "file": TOTAL_ROW,
        "status": "ok" if not any(r.bad for r in summary.results) else "not ok",
        "reason": f"{count_line(summary.results)}; print time is the {PRINT_TIME_NOTE}",
        "contacts": add("contacts"),
        "support_volume_mm3": add("support_volume_mm3"),
        "seconds": add("seconds"),
        "resin_ml": t["resin_ml"],
        "print_time_s": t["print_time_s"],
        "reused": t["reused"],
    }


def write_summary(summary: BatchSummary, meta: dict) -> None:
    """Write ``batch-summary.csv`` (one row per file, then the :data:`TOTAL_ROW` row) and
    ``batch-summary.json`` (``files`` and ``totals``) atomically."""
    rows = [r.to_dict() for r in summary.results]
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=SUMMARY_FIELDS, lineterminator="\n", restval="")
    writer.writeheader()
    writer.writerows({k: ("" if v is None else v) for k, v in row.items()} for row in rows)
    writer.writerow(_total_row(summary))
    atomic_write_text(summary.csv_path, buf.getvalue())
    doc = {
        **meta,
        "interrupted": summary.interrupted,
        "pending": summary.pending,
        "counts": summary.counts,
        "totals": summary.totals,
        "exit_code": summary.exit_code,
        "files": rows,
    }
    atomic_write_text(summary.json_path, json.dumps(doc, indent=1) + "\n")
    atomic_write_text(
        summary.output_dir / "index.html",
        batch_index(
            [
                {
                    "name": r["file"],
                    "page": (Path(r["file"]).parent / f"{part_name(r['file'])}.report.html").as_posix()
                    if r["contacts"] is not None
                    else None,
                    "status": r["status"],
                    "reason": f"{r['reason']} (reused from an earlier run)".lstrip() if r["reused"] else r["reason"],
                    "peak_force_n": r["peak_force_n"],
                    "contacts": r["contacts"],
                    "volume_mm3": r["support_volume_mm3"],
                    "time_s": r["seconds"],
                }
                for r in rows
            ],
            title=f"Batch: {summary.output_dir.name}",
            totals_line=count_line(summary.results),
        ),
    )


def _check_folders(root: Path, out: Path, workers, clash) -> bool:
    """Usage checks before any work; True when the output folder lies inside the input folder."""
    if workers is not None and workers < 1:
        raise SupportGenError(f"batch: workers={workers}; give 1 or more worker processes")
    if clash not in CLASH_MODES:
        raise SupportGenError(f"batch: name_clash={clash!r}; give one of {', '.join(CLASH_MODES)}")
    if root.resolve() == out.resolve():
        raise SupportGenError(
            f"batch: output folder {out} is the input folder; outputs would be read back as "
            "inputs next time: give another -o folder"
        )
    return out.resolve().is_relative_to(root.resolve())


def _execute(todo: list[Job], client, workers, timeout_s, record) -> tuple[bool, BaseException | None]:
    """Run the jobs on the chosen engine; (interrupted, exception to re-raise after the summary)."""
    try:
        if client is not None:
            run_dask(todo, client, timeout_s, record, run=run_job, discard=discard_outputs, lost=_lost)
        else:
            run_local(
                todo,
                workers or os.cpu_count() or 1,
                timeout_s,
                record,
                run=run_job,
                discard=discard_outputs,
                lost=_lost,
            )
    except KeyboardInterrupt:
        return True, None
    except Exception as exc:  # noqa: BLE001 - write the summary of what finished, then re-raise
        return True, exc
    return False, None


def _progress(total: int, done: list, enabled: bool, on_result):
    """A tqdm bar and the ``record`` callback that appends a row, moves the bar and calls ``on_result``."""
    from tqdm import tqdm

    bar = tqdm(total=total, desc="supportgen batch", unit="part", disable=not enabled, dynamic_ncols=True)
    bar.update(len(done))
    if done:
        bar.set_postfix_str(count_line(done))

    def record(row: FileResult) -> None:
        done.append(row)
        bar.update(1)
        bar.set_postfix_str(count_line(done))  # the same words as the final line (count_line)
        if on_result is not None:
            on_result(row)

    return bar, record


def run_batch(
    input_dir: str | Path,
    output_dir: str | Path,
    settings: Settings | None = None,
    *,
    strategy: str = DEFAULT_STRATEGY,
    workers: int | None = None,
    cluster=None,
    resume: bool = False,
    pattern: str | None = None,
    timeout_s: float | None = None,
    memory_limit_mb: float | None = None,
    progress: bool = True,
    on_result: Callable[[FileResult], None] | None = None,
    name_clash: str = "rename",
    wait_s: float | None = 0.0,
    protect=(),
    orient: str = "keep",
    rotate=None,
) -> BatchSummary:
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
        Skip files whose manifest and outputs match (see the module notes).
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
        side-car ``NAME.protect.toml`` adds its own (side-cars are part of the resume key,
        this argument is not).
    orient : {"keep", "auto"}
        Every part's given orientation, or the one :func:`supportgen.physics.orientation.orient`
        chooses (``generate(orient=...)``); part of the resume key.
    rotate : (3,) degrees, optional
        Turn every part about x, then y, then z first (``generate(rotate=...)``); part of the resume key.
    on_result : callable, optional
        Called in this process with each :class:`FileResult` as it arrives; an
        exception it raises stops the batch like Ctrl-C (KeyboardInterrupt) or
        propagates after the summary is written.
    name_clash : {"rename", "refuse"}
        Inputs of one folder whose output names collide: distinct names, or ``refused``.
    wait_s : float, optional
        Another run holds the output folder: wait this long (None: without limit), then refuse.

    Returns
    -------
    BatchSummary
        Also written to ``batch-summary.csv`` and ``.json`` in ``output_dir``.
        On SIGINT or SIGTERM (in the main thread) the running files are stopped
        and their unfinished sets discarded, the summary of what finished is
        written and ``interrupted`` is True (exit code 130).

    Raises
    ------
    SupportGenError
        Missing input folder, unknown strategy, bad worker count, Dask missing
        or unreachable, worker processes that cannot start; an output folder that
        is a file, not writable, or in use by another run; an output that would
        replace an input.

    Notes
    -----
    Wall time ~ sum of the per-file times / workers; parent memory O(files).
    """
    from ..supports.strategies import get_strategy

    settings = settings if settings is not None else Settings()
    get_strategy(strategy)
    root, out = Path(input_dir), Path(output_dir)
    inside = _check_folders(root, out, workers, name_clash)
    rels = discover(root, pattern, exclude=out if inside else None)
    jobs, results = _plan_jobs(root, out, rels, settings, strategy, memory_limit_mb, name_clash)
    inputs = [root / r for r in rels]
    refuse_overwrites(
        [Path(j.outdir) / n for j in jobs for n in j.files], inputs + [s for p in inputs for s in sidecars(p)]
    )
    prepare_folder(out)
    client = dask_client(cluster) if cluster is not None else None
    jobs = [dataclasses.replace(j, protect=tuple(protect)) for j in jobs] if protect else jobs
    if orient != "keep" or rotate is not None:
        rotate = check_orientation_choice(orient, rotate)  # refused before any work
        rotate = None if rotate is None else tuple(rotate)
        jobs = [dataclasses.replace(j, orient=orient, rotate=rotate) for j in jobs]
    sha = settings_hash(settings, strategy, orient, rotate)
    try:
        with FolderLock(out, wait_s=wait_s), stop_on_signals():
            clean_temps(out, recursive=True)  # left by a killed run; the lock says none is running
            summary, raised = _run_locked(
                jobs, results, client, sha, out, root, strategy, workers, resume, timeout_s, progress, on_result
            )
    finally:
        if client is not None:
            client.close()
    if raised is not None:
        raise raised
    return summary


def _run_locked(jobs, results, client, sha, out, root, strategy, workers, resume, timeout_s, progress, on_result):
    """The batch proper, with the output folder locked: resume, run, write the summary."""
    total, todo = len(jobs) + len(results), []
    for job in jobs:
        m = _up_to_date(job, sha) if resume else None
        (results.append(_from_manifest(job, m)) if m else todo.append(job))
    if client is not None and timeout_s:
        todo = [dataclasses.replace(j, timeout_s=timeout_s) for j in todo]
    bar, record = _progress(total, results, progress, on_result)
    try:
        interrupted, raised = _execute(todo, client, workers, timeout_s, record)
        done = {r.file for r in results}
        if interrupted:
            # A set committed just as the batch stopped is complete (its manifest and hashes say so): its
            # row is the manifest's, made by this run.
            for job in todo:
                m = None if job.rel in done else _up_to_date(job, sha)
                if m:
                    results.append(_from_manifest(job, m, reused=False))
            done = {r.file for r in results}
        bar.set_postfix_str(count_line(results))  # the bar ends on the final line's counts
    finally:
        bar.close()
    summary = BatchSummary(
        tuple(sorted(results, key=lambda r: r.file)), out, interrupted, sum(j.rel not in done for j in todo)
    )
    write_summary(
        summary,
        {
            "input_dir": str(root),
            "output_dir": str(out),
            "strategy": strategy,
            "orient": jobs[0].orient if jobs else None,
            "rotate": list(jobs[0].rotate) if jobs and jobs[0].rotate is not None else None,
            "settings_sha256": sha,
            "engine": "dask" if client is not None else "local",
            "workers": None if client is not None else (workers or os.cpu_count()),
        },
    )
    return summary, raised
