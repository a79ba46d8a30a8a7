"""Forked helper: one function run in a second process while this one goes on.

The layer walks use it to put the second CPU to work (:mod:`supportgen.analysis.layers`,
:mod:`supportgen.pipeline`).  The helper is a ``fork`` of this process, so it starts
in milliseconds and sees every array this process holds without copying or pickling
them; only its answer is pickled back.  The caller always has a way to do the work
itself: :meth:`Helper.result` returns None when the helper failed or died, and the
caller computes the answer in its own process, so a helper can make a run faster
but never change what it gives.

The helper ignores Ctrl-C (this process answers it and stops the helper) and takes
the default action on SIGTERM, so no signal handler of the caller's run (those that
keep a user's outputs whole, :mod:`supportgen.io.outputs`) ever runs in it; it is a
daemon process, so it never outlives this one.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import signal
from collections.abc import Callable

__all__ = ["may_fork", "Helper"]


def may_fork() -> bool:
    """Whether this process may start a helper: a POSIX fork, two or more CPUs for us, and
    not itself a daemon (a batch worker, whose siblings already use the other CPUs and
    which may have no children)."""
    try:
        cpus = len(os.sched_getaffinity(0))
    except AttributeError:  # not Linux
        cpus = os.cpu_count() or 1
    return cpus >= 2 and "fork" in mp.get_all_start_methods() and not mp.current_process().daemon


def _main(conn, fn, args) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent answers Ctrl-C and stops the helper
    signal.signal(signal.SIGTERM, signal.SIG_DFL)  # none of the parent's run handlers here
    try:
        conn.send(("ok", fn(*args)))
    except BaseException as exc:  # reported: the parent does the work itself
        conn.send(("error", f"{type(exc).__name__}: {exc}"))
    finally:
        conn.close()


class Helper:
    """``fn(*args)`` started in a forked process; use as a context manager.

    Raises
    ------
    OSError
        No process could be started (the caller does the work itself).

    Examples
    --------
    >>> with Helper(sum, [1, 2, 3]) as h:
    ...     h.result()
    6
    """

    def __init__(self, fn: Callable, *args, name: str = "supportgen-helper"):
        ctx = mp.get_context("fork")
        self._recv, send = ctx.Pipe(duplex=False)
        self._proc = ctx.Process(target=_main, args=(send, fn, args), name=name, daemon=True)
        try:
            self._proc.start()
        finally:
            send.close()
        self.error: str | None = None

    def result(self):
        """The function's value, waiting for it; None if it raised (``error`` says what) or the helper died."""
        try:
            status, value = self._recv.recv()
        except (EOFError, OSError):
            self.error = "the helper process ended without an answer"
            return None
        if status != "ok":
            self.error = value
            return None
        return value

    def close(self) -> None:
        """Stop the helper if it still runs, and reap it."""
        self._recv.close()
        if self._proc.is_alive():
            self._proc.terminate()
        self._proc.join()

    def __enter__(self) -> Helper:
        return self

    def __exit__(self, *exc) -> None:
        self.close()
