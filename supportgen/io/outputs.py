"""A part's outputs, committed as one set; output names; output folder checks.

:func:`commit_set` writes every file of a set to a temporary name in the output
folder (``.supportgen-<file>.<random>.tmp``), flushes each to disk (``fsync``),
and only then renames them into place, with SIGINT and SIGTERM held back for the
few renames.  Each rename replaces its target in one step (POSIX ``rename(2)``:
"If newpath already exists, it will be atomically replaced"), so a failure or a
signal before the renames leaves the previous set byte for byte as it was and no
temporary file; a signal during them is delivered after the last one.  Only a
power cut or SIGKILL in the middle of the renames can leave a mixed set, and the
hashes recorded in the set (the report's ``outputs.files``, a batch manifest)
then tell which files belong to it.

Temporary files of this tool left by a killed run are removed by
:func:`clean_temps` when the next run takes the folder's lock
(:mod:`supportgen.io.lock`).
"""

from __future__ import annotations

import hashlib
import os
import signal
import tempfile
import threading
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from supportgen.errors import OutputError

__all__ = [
    "TEMP_PREFIX",
    "stage_file",
    "TEMP_SUFFIX",
    "CLASH_MODES",
    "OutputFile",
    "commit_set",
    "write_file",
    "clean_temps",
    "remove_temps",
    "assign_names",
    "refuse_overwrites",
    "prepare_folder",
    "sha256_of",
    "os_error_line",
]

#: Temporary files of this tool start and end so; nothing else in a folder is ever removed by pattern.
TEMP_PREFIX = ".supportgen-"
TEMP_SUFFIX = ".tmp"
#: What to do when two inputs would get the same output name.
CLASH_MODES = ("rename", "refuse")

#: A file's content: bytes, or a function of the files of the set staged so far (role -> OutputFile)
#: returning bytes (a report that lists the hashes of the files before it).
Producer = bytes | Callable[[Mapping[str, "OutputFile"]], bytes]


@dataclass(frozen=True)
class OutputFile:
    """One file of a committed set: its role, path, size in bytes and SHA-256 (hex)."""

    role: str
    path: Path
    bytes: int
    sha256: str

    def to_dict(self) -> dict:
        """``{"role", "file" (the file name), "bytes", "sha256"}``."""
        return {"role": self.role, "file": self.path.name, "bytes": self.bytes, "sha256": self.sha256}


def sha256_of(path: str | Path) -> str:
    """SHA-256 (hex) of a file's bytes, read in 1 MiB blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def os_error_line(path, exc: OSError, doing: str = "write") -> str:
    """One line naming the file, the cause and what to do, for an :class:`OSError`.

    >>> import errno
    >>> os_error_line("out/a.stl", OSError(errno.ENOSPC, "No space left on device"))
    'out/a.stl: cannot write (No space left on device); free some disk space and run again'
    """
    cause = exc.strerror or str(exc) or type(exc).__name__
    if exc.errno in (28, 122):  # ENOSPC, EDQUOT
        todo = "free some disk space and run again"
    elif exc.errno in (1, 13, 30):  # EPERM, EACCES, EROFS
        todo = "check the folder's permissions or choose another output folder"
    else:
        todo = "check the output folder and run again"
    return f"{exc.filename or path}: cannot {doing} ({cause}); {todo}"


class _SignalsHeld:
    """Hold SIGINT and SIGTERM back while a set is renamed into place; a signal that arrives
    meanwhile is raised again, to the handler it would have reached, when the block ends.

    In the main thread the handlers are swapped for a recorder (a per-thread signal mask is not
    enough: the kernel hands a process-directed signal to any thread that does not block it);
    elsewhere the thread's signal mask is used.  A signal ignored on entry stays ignored.
    """

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __enter__(self):
        self.caught: list[int] = []
        self.saved: dict = {}
        self.mask = None
        if threading.current_thread() is threading.main_thread():
            for s in self.SIGNALS:
                handler = signal.getsignal(s)
                if handler in (signal.SIG_IGN, None):
                    continue
                self.saved[s] = handler
                signal.signal(s, lambda signum, frame: self.caught.append(signum))
        elif hasattr(signal, "pthread_sigmask"):
            self.mask = signal.pthread_sigmask(signal.SIG_BLOCK, self.SIGNALS)
        return self

    def __exit__(self, *exc):
        for s, handler in self.saved.items():
            signal.signal(s, handler)
        if self.mask is not None:
            signal.pthread_sigmask(signal.SIG_SETMASK, self.mask)
        for s in dict.fromkeys(self.caught):
            signal.raise_signal(s)  # now, to its own handler (or its default action)
        return False


def _fsync_folder(folder: Path) -> None:
    """Make renames in ``folder`` durable (POSIX: a rename is on disk once its directory is synced)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return  # platforms that cannot open a folder (Windows) have no directory fsync
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems refuse fsync on a directory; the rename itself stands
    finally:
        os.close(fd)


def stage_file(target: Path, data: bytes) -> Path:
    """``data`` in a new temporary file beside ``target``, flushed to disk; its path."""
    fd, tmp = tempfile.mkstemp(prefix=f"{TEMP_PREFIX}{target.name}.", suffix=TEMP_SUFFIX, dir=target.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, target.stat().st_mode & 0o7777 if target.exists() else 0o644)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return Path(tmp)


def commit_set(
    folder: str | Path, files: Mapping[str, tuple[str, Producer]], *, before_commit: Callable[[], None] | None = None
) -> dict[str, OutputFile]:
    """Write a set of files into ``folder`` so that it replaces the previous set whole or not at all.

    Parameters
    ----------
    folder : str or Path
        An existing folder.
    files : mapping
        ``role -> (file name, producer)``, in the order they are made and renamed (put the files
        that describe the others last).  A producer is bytes, or a function of the files staged
        so far (``role -> OutputFile``) returning bytes.  Adding a file to a set is one entry.
    before_commit : callable, optional
        Called after every file is staged and before any rename; raising there (a deadline
        passed) discards the whole set.

    Returns
    -------
    dict
        ``role -> OutputFile`` of the committed set.

    Raises
    ------
    OutputError
        A file cannot be written (disk full, permissions): one line naming it and the cause.
        The previous set is untouched and no temporary file is left.
    Exception
        Whatever a producer or ``before_commit`` raises, with the same guarantee.

    Notes
    -----
    Cost: the bytes written plus one SHA-256 pass over them.  See the module notes for what
    the renames guarantee.
    """
    folder = Path(folder)
    staged: dict[str, OutputFile] = {}
    temps: dict[str, Path] = {}
    committed = False
    target = folder
    try:
        for role, (name, producer) in files.items():
            target = folder / name
            data = producer(dict(staged)) if callable(producer) else producer
            temps[role] = stage_file(target, data)
            staged[role] = OutputFile(role, target, len(data), hashlib.sha256(data).hexdigest())
        if before_commit is not None:
            before_commit()
        _fsync_folder(folder)
        with _SignalsHeld():
            for role, tmp in list(temps.items()):
                target = staged[role].path
                os.replace(tmp, target)
                del temps[role]
            committed = True
        _fsync_folder(folder)
    except OSError as exc:
        raise OutputError(os_error_line(target, exc)) from exc
    finally:
        if not committed:
            for tmp in temps.values():
                tmp.unlink(missing_ok=True)
    return staged


def write_file(path: str | Path, data: bytes) -> OutputFile:
    """One file written as a set of one (temporary name, fsync, rename); see :func:`commit_set`."""
    path = Path(path)
    return commit_set(path.parent, {"file": (path.name, data)})["file"]


def _is_temp(name: str) -> bool:
    return name.startswith(TEMP_PREFIX) and name.endswith(TEMP_SUFFIX)


def clean_temps(root: str | Path, recursive: bool = False) -> int:
    """Remove this tool's temporary files under ``root`` left by a run that was killed; return how many.

    Call it only while holding the folder's lock: then no other run is writing there.  Names are
    compared as strings (no glob built from part names).
    """
    root = Path(root)
    if not root.is_dir():
        return 0
    walk = os.walk(root) if recursive else [(str(root), [], os.listdir(root))]
    n = 0
    for where, _, names in walk:
        for name in names:
            if _is_temp(name):
                try:
                    (Path(where) / name).unlink()
                    n += 1
                except OSError:
                    pass  # gone already, or not ours to remove: leave it
    return n


def remove_temps(folder: str | Path, file_names: Iterable[str]) -> None:
    """Remove the temporary files of the given output file names in ``folder`` (a stopped job's)."""
    folder = Path(folder)
    prefixes = tuple(f"{TEMP_PREFIX}{n}." for n in file_names)
    try:
        names = os.listdir(folder)
    except OSError:
        return
    for name in names:
        if _is_temp(name) and name.startswith(prefixes):
            (folder / name).unlink(missing_ok=True)


def assign_names(stems: Sequence[str], clash: str = "rename", labels: Sequence[str] | None = None) -> list[str]:
    """Distinct output names for inputs whose names (``io.meshio.part_name``) may collide.

    Names are compared case-folded (two names differing only in case are one file on
    case-insensitive file systems).  The first input keeps its name; with ``clash="rename"``
    each later one gets ``NAME-2``, ``NAME-3`` ... (the first number free); with
    ``clash="refuse"`` a collision raises.

    >>> assign_names(["part", "Part", "lid", "part"])
    ['part', 'Part-2', 'lid', 'part-3']

    Raises
    ------
    OutputError
        ``clash="refuse"`` and two names collide: one line naming both inputs.
    """
    if clash not in CLASH_MODES:
        raise OutputError(f"name clash mode {clash!r}; use one of {', '.join(CLASH_MODES)}")
    labels = list(labels) if labels is not None else list(stems)
    taken: dict[str, int] = {}
    out = []
    for i, stem in enumerate(stems):
        name = stem
        if name.casefold() in taken:
            if clash == "refuse":
                raise OutputError(
                    f"{labels[i]}: its outputs ({stem}.*) would overwrite those of "
                    f"{labels[taken[stem.casefold()]]}; rename one of them, or let supportgen "
                    "rename the outputs (--name-clash rename)"
                )
            k = 2
            while f"{stem}-{k}".casefold() in taken or f"{stem}-{k}".casefold() in {s.casefold() for s in stems}:
                k += 1
            name = f"{stem}-{k}"
        taken[name.casefold()] = i
        out.append(name)
    return out


def _same(a: Path, b: Path) -> bool:
    if os.path.normcase(str(a.resolve())) == os.path.normcase(str(b.resolve())):
        return True
    try:
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def refuse_overwrites(outputs: Iterable[Path], inputs: Iterable[Path]) -> None:
    """Raise before any work when an output path is an input (same path, or the same file by link).

    Raises
    ------
    OutputError
        One line naming the output and the input it would replace.
    """
    ins = [Path(p) for p in inputs]
    by_name: dict[str, list[Path]] = {}
    for p in ins:
        by_name.setdefault(p.name.casefold(), []).append(p)
    for out in outputs:
        for p in by_name.get(Path(out).name.casefold(), ()):
            if _same(Path(out), p):
                raise OutputError(
                    f"{out}: this output would replace the input {p}; choose another output "
                    "folder (-o) or move the input"
                )


def prepare_folder(folder: str | Path) -> Path:
    """Create ``folder`` if needed and check that outputs can be written there, before any work.

    Raises
    ------
    OutputError
        It is a file, cannot be created, or is not writable: one line saying what to do.
    """
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise OutputError(f"{folder}: the output folder is a file; give a folder with -o")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(os_error_line(folder, exc, "create the output folder")) from exc
    if not os.access(folder, os.W_OK | os.X_OK):
        raise OutputError(f"{folder}: the output folder is not writable; check its permissions or give another -o")
    return folder
