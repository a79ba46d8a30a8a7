"""Execution engines of a batch: killable local worker processes, or a Dask cluster.

Both engines take the same arguments: the jobs, a per-file time limit, a
``record`` callback called in this process with each finished row, and three
functions of the batch (:mod:`supportgen.runs.batch`) that they only call:

``run(job) -> row``
    Supports one file and saves its outputs; runs in a worker.  It must be a
    module-level function, so that it pickles by reference.
``discard(job)``
    Removes whatever a stopped or failed job may have left.
``lost(job, status, reason, seconds) -> row``
    The row of a job that never returned (``timeout``, or ``error`` when its worker died).

Local
    :func:`run_local` keeps ``workers`` long-lived processes (``forkserver``,
    which imports the pipeline once; ``spawn`` where that is missing), one
    pipe each, one file at a time per process.  A process past its file's
    deadline is stopped (``timeout``: SIGTERM, then SIGKILL), one that dies is
    recorded (``error``), and a fresh process takes its place.  (A ``ProcessPoolExecutor`` cannot
    kill one worker, and one dead worker breaks the whole pool, so the pool
    here is a plain one.)  The worker entry point :func:`_worker_main` stays
    at module level: ``forkserver`` and ``spawn`` import it by name.
Dask
    :func:`run_dask` submits ``run`` to a Dask distributed client (see
    :func:`dask_client`), no more tasks at a time than the cluster has threads.
    Each task counts its time limit from its own start and commits nothing
    past it; a task that does not return is recorded as ``timeout`` and keeps
    its thread until it does (see :func:`run_dask`).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

from ..errors import SupportGenError

__all__ = ["run_local", "run_dask", "dask_client"]


# -- local engine: one process per slot, killed on timeout, replaced when it dies ------------------


@dataclass
class _Slot:
    """A worker process, its pipe and the job it is running (bookkeeping of one run_local call)."""

    proc: object
    conn: object
    job: object | None = None
    started: float = 0.0
    ready: bool = False
    dead: bool = False


def _worker_main(conn, run: Callable) -> None:
    """Worker loop: warm the imports, say ready, then run jobs until told to stop.

    SIGINT is the parent's to handle (it stops the workers itself); SIGTERM keeps its
    default action (the process ends at once, without a traceback) except while a set
    is being renamed into place, when :func:`supportgen.io.outputs.commit_set` holds it
    back.  A parent that has gone away ends the loop quietly.
    """
    import importlib
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    try:
        importlib.import_module(f"{__package__}.pipeline")  # import once, before the first deadline starts
    except Exception:  # noqa: BLE001 - run reports the same import error for each file
        pass
    try:
        conn.send(("ready", None))
        while True:
            job = conn.recv()
            if job is None:
                return
            conn.send(("done", run(job)))
    except (EOFError, OSError):  # the parent is gone (BrokenPipeError is an OSError): stop, no traceback
        return


def _died(code) -> str:
    import signal

    if code is not None and code < 0:
        try:
            what = f"signal {-code} ({signal.Signals(-code).name})"
        except ValueError:
            what = f"signal {-code}"
    else:
        what = f"exit code {code}"
    return f"worker process died ({what}) while supporting it; try it alone with `supportgen generate --debug`"


#: How long a worker asked to stop (SIGTERM) may take to finish renaming a set into place, s.
_TERM_GRACE_S = 2.0


def _stop(slot: _Slot, kill: bool) -> None:
    """Stop a worker: ask an idle one to leave; end a busy one with SIGTERM (a set being renamed
    into place is finished first), then SIGKILL if it is still there."""
    if not slot.dead:
        try:
            if kill:
                slot.proc.terminate()
            else:
                slot.conn.send(None)
        except OSError:
            pass
        slot.proc.join(_TERM_GRACE_S)
        if slot.proc.is_alive():
            slot.proc.kill()
            slot.proc.join()
        slot.conn.close()
    slot.dead = True


#: After Ctrl-C, how long a busy worker may take to hand over a result it is sending (s).
_GRACE_S = 0.5


class _LocalPool:
    """The bookkeeping of one :func:`run_local` call: slots, pending jobs, deadlines."""

    def __init__(self, jobs, workers, timeout_s, record, run, discard, lost):
        import multiprocessing
        from collections import deque

        if "forkserver" in multiprocessing.get_all_start_methods():
            # Workers fork from one server that has imported the pipeline once (no per-worker import).
            self.ctx = multiprocessing.get_context("forkserver")
            self.ctx.set_forkserver_preload([run.__module__, "supportgen.pipeline"])
        else:
            self.ctx = multiprocessing.get_context("spawn")
        self.pending, self.slots, self.start_failures = deque(jobs), [], 0
        self.workers, self.timeout_s = workers, timeout_s
        self.record, self.run, self.discard, self.lost = record, run, discard, lost

    def start(self) -> _Slot:
        parent, child = self.ctx.Pipe()
        proc = self.ctx.Process(
            target=_worker_main, args=(child, self.run), name="supportgen-batch-worker", daemon=True
        )
        proc.start()
        child.close()
        return _Slot(proc, parent)

    def busy(self) -> bool:
        return bool(self.pending) or any(s.job is not None for s in self.slots)

    def fill(self) -> None:
        """Replace dead workers (no more than there is work for) and hand jobs to idle ready ones."""
        self.slots = [s for s in self.slots if not s.dead]
        wanted = min(self.workers, len(self.pending) + sum(s.job is not None for s in self.slots))
        for _ in range(wanted - len(self.slots)):
            self.slots.append(self.start())
        for s in self.slots:
            if s.ready and s.job is None and self.pending:
                s.job, s.started = self.pending.popleft(), time.monotonic()
                s.conn.send(s.job)

    def wait(self) -> None:
        """Block until a pipe or process has news, or the nearest deadline."""
        from multiprocessing.connection import wait

        ends = [s.started + self.timeout_s for s in self.slots if s.job is not None] if self.timeout_s else []
        wait(
            [s.conn for s in self.slots] + [s.proc.sentinel for s in self.slots],
            max(0.0, min(ends) - time.monotonic()) if ends else None,
        )

    def collect(self, s: _Slot) -> str | None:
        """Read what ``s`` sent; return why it must be retired (``error``: it died; ``timeout``) or None."""
        try:
            while s.conn.poll():
                kind, payload = s.conn.recv()
                if kind == "ready":
                    s.ready = True
                else:
                    s.job = None
                    self.record(payload)
        except (EOFError, OSError):
            return "error"
        if not s.proc.is_alive():
            return "error"
        if s.job is not None and self.timeout_s and time.monotonic() > s.started + self.timeout_s:
            return "timeout"
        return None

    def retire(self, s: _Slot, gone: str) -> None:
        """Stop a dead or late worker; record its job as lost and discard its unfinished set."""
        job, s.job, was_ready = s.job, None, s.ready
        _stop(s, kill=True)
        if job is not None:
            self.discard(job)
            reason = (
                (
                    f"took longer than {self.timeout_s:g} s; its worker was stopped (raise --timeout or use "
                    "coarser settings)"
                )
                if gone == "timeout"
                else _died(s.proc.exitcode)
            )
            self.record(self.lost(job, gone, reason, round(time.monotonic() - s.started, 3)))
        elif not was_ready:
            self.start_failures += 1
            if self.start_failures >= 3:
                raise SupportGenError(
                    f"batch: worker processes fail to start ({_died(s.proc.exitcode)}); "
                    "check that `python -c 'import supportgen.pipeline'` works"
                )

    def shutdown(self, graceful: bool) -> None:
        """Stop every worker.  After an interruption, keep a result already on its way (its set is
        complete), then stop busy workers and discard their unfinished sets."""
        for s in self.slots:
            if s.job is not None and not graceful:
                try:
                    if s.conn.poll(_GRACE_S):
                        kind, payload = s.conn.recv()
                        if kind != "ready":
                            s.job = None
                            self.record(payload)
                except (EOFError, OSError):
                    pass
            busy = s.job is not None
            _stop(s, kill=not graceful or busy)
            if busy:
                self.discard(s.job)


def run_local(
    jobs: list,
    workers: int,
    timeout_s: float | None,
    record: Callable,
    *,
    run: Callable,
    discard: Callable,
    lost: Callable,
) -> None:
    """Run ``jobs`` in ``workers`` local processes, stopping any past ``timeout_s``.

    Parameters
    ----------
    jobs : list
        Picklable jobs, run in order.
    workers : int
        Processes at a time (no more than there are jobs).
    timeout_s : float, optional
        Per-job wall-clock limit, s; None for none.
    record : callable
        ``record(row)``, called in this process as each row arrives.
    run, discard, lost : callable
        As in the module notes; ``run`` must be importable by name.

    Raises
    ------
    SupportGenError
        Three worker processes in a row die before they are ready.
    KeyboardInterrupt
        Propagated after every running worker is stopped and its unfinished set discarded.

    Notes
    -----
    Wall time ~ sum of the job times / workers; this process waits on the pipes
    and process sentinels, O(workers) per event.
    """
    pool = _LocalPool(jobs, workers, timeout_s, record, run, discard, lost)
    graceful = False
    try:
        while pool.busy():
            pool.fill()
            pool.wait()
            for s in pool.slots:
                gone = pool.collect(s)
                if gone is not None:
                    pool.retire(s, gone)
        graceful = True
    finally:
        pool.shutdown(graceful)


# -- Dask engine ----------------------------------------------------------------------------------------


def dask_client(cluster):
    """A Dask distributed client of ``cluster`` (an address, or an object with ``scheduler_address``).

    Raises
    ------
    SupportGenError
        Dask distributed is not installed, or the scheduler cannot be reached in 10 s.
    """
    try:
        from distributed import Client
    except ImportError:
        raise SupportGenError(
            "batch: --cluster needs Dask distributed, which is not installed; install it with "
            "pip install 'supportgen[cluster]'"
        ) from None
    address = getattr(cluster, "scheduler_address", cluster)
    try:
        return Client(address, timeout="10s", set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise SupportGenError(
            f"batch: cannot reach the Dask scheduler at {address} ({exc}); start one with "
            "`dask scheduler` or fix the address"
        ) from None


#: A Dask task is recorded as ``timeout`` this long after its own limit if it has not returned by then
#: (it checks its limit itself and saves nothing past it; this only bounds the wait for a hung task), s.
DASK_GRACE_S = 5.0


def run_dask(
    jobs: list, client, timeout_s: float | None, record: Callable, *, run: Callable, discard: Callable, lost: Callable
) -> None:
    """Run ``jobs`` as tasks of a Dask client, with a per-task time limit.

    Parameters
    ----------
    jobs : list
        Picklable jobs; with ``timeout_s`` each carries it (``timeout_s`` field) so that
        ``run`` counts it from the task's own start and commits nothing past it.
    client : distributed.Client
        From :func:`dask_client`.
    timeout_s : float, optional
        Per-job limit, s; None for none.
    record, run, discard, lost : callable
        As in the module notes.

    Notes
    -----
    At most as many tasks run as the cluster has threads, so a task starts when it is
    submitted.  Dask cannot stop a running function: a task that has not returned
    ``DASK_GRACE_S`` after its limit is recorded as ``timeout`` and kept as a *zombie*
    that still holds its thread (no task is submitted into that thread until it
    returns, so the next file's limit is not eaten by it); whatever it returns later is
    ignored, and it has saved nothing, having checked its own limit before committing.
    This process polls the running futures, O(threads) per event.
    """
    from collections import deque

    from distributed import wait

    width = max(1, sum(client.nthreads().values()))
    pending, running, zombies = deque(jobs), {}, set()
    try:
        while pending or running:
            zombies = {z for z in zombies if not z.done()}
            while pending and len(running) + len(zombies) < width:
                job = pending.popleft()
                running[client.submit(run, job, pure=False)] = (job, time.monotonic())
            if not running:
                if not zombies:
                    continue
                with client.as_current():
                    wait(list(zombies), return_when="FIRST_COMPLETED")
                continue
            ends = [t0 + timeout_s + DASK_GRACE_S for _, t0 in running.values()] if timeout_s else []
            try:
                with client.as_current():
                    wait(
                        list(running) + list(zombies),
                        timeout=max(0.05, min(ends) - time.monotonic()) if ends else None,
                        return_when="FIRST_COMPLETED",
                    )
            except TimeoutError:
                pass
            _dask_collect(running, zombies, timeout_s, record, discard, lost)
    finally:
        for fut, (job, _) in running.items():
            fut.cancel()
            discard(job)


def _dask_collect(running: dict, zombies: set, timeout_s, record, discard, lost) -> None:
    """Record finished futures; turn those past their limit and grace into zombies."""
    for fut in list(running):
        job, t0 = running[fut]
        if fut.done():
            del running[fut]
            if fut.status == "finished":
                record(fut.result())
                continue
            discard(job)
            exc = fut.exception() if fut.status == "error" else fut.status
            record(
                lost(
                    job,
                    "error",
                    f"Dask task {fut.status}: {type(exc).__name__}: {exc}",
                    round(time.monotonic() - t0, 3),
                )
            )
        elif timeout_s and time.monotonic() > t0 + timeout_s + DASK_GRACE_S:
            del running[fut]
            zombies.add(fut)
            record(
                lost(
                    job,
                    "timeout",
                    f"took longer than {timeout_s:g} s; the Dask task cannot be stopped, it will save nothing",
                    round(time.monotonic() - t0, 3),
                )
            )
