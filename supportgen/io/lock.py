"""An advisory lock on an output folder, held for the duration of a run.

The lock is the file ``.supportgen.lock`` in the folder, holding the holder's pid,
host name and start time as JSON.  Where the platform has ``flock(2)``, the file
is also locked with it: the kernel releases that lock when its holder dies, so a
lock file left by a killed run is recognised as stale exactly, and taken over with
a warning.  Where ``flock`` is missing or refused (some network file systems), a
lock file naming a process of this host that no longer exists is stale; one of
another host is treated as held.

Two runs on one folder therefore never interleave: the second waits for the
first (``wait_s``) or refuses with one line.
"""

from __future__ import annotations

import json
import os
import socket
import sys
import time
from collections.abc import Callable
from pathlib import Path

from supportgen.errors import OutputError

try:
    import fcntl
except ImportError:  # Windows: pid-and-host check only
    fcntl = None

__all__ = ["LOCK_NAME", "FolderLock"]

LOCK_NAME = ".supportgen.lock"
#: How often a waiting run looks at the lock again, s.
POLL_S = 0.2


def _stderr(message: str) -> None:
    print(f"supportgen: warning: {message}", file=sys.stderr)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # exists, belongs to someone else
    except OSError:
        return True
    return True


def _holder(text: str) -> dict:
    try:
        doc = json.loads(text)
        return doc if isinstance(doc, dict) else {}
    except ValueError:
        return {}


def _describe(h: dict) -> str:
    if not h:
        return "another supportgen run"
    return f"supportgen pid {h.get('pid')} on {h.get('host')} since {h.get('started')}"


class FolderLock:
    """Hold ``folder/.supportgen.lock`` while a run writes into ``folder``.

    Parameters
    ----------
    folder : str or Path
        An existing output folder.
    wait_s : float, optional
        How long to wait for another run to finish: 0 (the default) refuses at once,
        None waits without limit.
    warn : callable, optional
        Called with one line when a stale lock is taken over (default: stderr).

    Raises
    ------
    OutputError
        (on entering) another live run holds the folder and ``wait_s`` ran out, or the
        lock file cannot be created (the folder is not writable).

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     with FolderLock(d):
    ...         held = (Path(d) / LOCK_NAME).exists()
    ...     held, (Path(d) / LOCK_NAME).exists()
    (True, False)
    """

    def __init__(self, folder: str | Path, *, wait_s: float | None = 0.0, warn: Callable[[str], None] | None = None):
        self.folder = Path(folder)
        self.path = self.folder / LOCK_NAME
        self.wait_s = wait_s
        self.warn = warn or _stderr
        self.fd: int | None = None

    # -- one attempt -----------------------------------------------------------------------------
    def _try_flock(self) -> tuple[bool, dict]:
        """(acquired, previous holder) using flock; raises OSError when flock is unsupported."""
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            return False, _holder(self.path.read_text(encoding="utf-8", errors="replace"))
        except OSError:
            os.close(fd)
            raise
        try:
            same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
        except FileNotFoundError:
            same = False
        if not same:  # the holder removed the file as we opened it: try again
            os.close(fd)
            return False, {"retry": True}
        previous = _holder(os.pread(fd, 4096, 0).decode("utf-8", "replace"))
        self.fd = fd
        return True, previous

    def _try_exclusive(self) -> tuple[bool, dict]:
        """(acquired, previous holder) with O_EXCL and the pid-and-host check (no flock)."""
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o644)
        except FileExistsError:
            h = _holder(self.path.read_text(encoding="utf-8", errors="replace"))
            if h.get("host") == socket.gethostname() and isinstance(h.get("pid"), int) and not _alive(h["pid"]):
                self.path.unlink(missing_ok=True)
                ok, _ = self._try_exclusive()
                return ok, h if ok else {}
            return False, h
        self.fd = fd
        return True, {}

    def _write_holder(self) -> None:
        doc = {
            "pid": os.getpid(),
            "host": socket.gethostname(),
            "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
            "tool": "supportgen",
        }
        data = (json.dumps(doc) + "\n").encode()
        os.ftruncate(self.fd, 0)
        os.pwrite(self.fd, data, 0)
        os.fsync(self.fd)

    # -- public ----------------------------------------------------------------------------------
    def acquire(self) -> FolderLock:
        """Take the lock (waiting as set); see the class notes."""
        start = time.monotonic()
        use_flock = fcntl is not None
        while True:
            try:
                if use_flock:
                    try:
                        ok, previous = self._try_flock()
                    except OSError as exc:
                        if isinstance(exc, (PermissionError, FileNotFoundError, IsADirectoryError)):
                            raise
                        use_flock = False  # e.g. ENOLCK on a network file system
                        continue
                else:
                    ok, previous = self._try_exclusive()
            except OSError as exc:
                raise OutputError(
                    f"{self.path}: cannot create the folder's lock file ({exc.strerror or exc}); "
                    "check the output folder's permissions"
                ) from exc
            if ok:
                if previous.get("pid") not in (None, os.getpid()):
                    self.warn(
                        f"{self.folder}: took over the lock left by {_describe(previous)}, which is no "
                        "longer running; its unfinished temporary files are removed"
                    )
                self._write_holder()
                return self
            if previous.get("retry"):
                continue
            waited = time.monotonic() - start
            if self.wait_s is not None and waited >= self.wait_s:
                raise OutputError(
                    f"{self.folder}: output folder in use by {_describe(previous)}; wait for it to "
                    "finish, give another -o folder, or pass --wait SECONDS"
                )
            time.sleep(POLL_S if self.wait_s is None else min(POLL_S, max(0.0, self.wait_s - waited)))

    def release(self) -> None:
        """Remove the lock file and let go; safe to call twice."""
        if self.fd is None:
            return
        try:
            self.path.unlink(missing_ok=True)
        finally:
            os.close(self.fd)
            self.fd = None

    def __enter__(self) -> FolderLock:
        return self.acquire()

    def __exit__(self, *exc) -> bool:
        self.release()
        return False
