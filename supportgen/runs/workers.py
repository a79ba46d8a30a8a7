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
    The row of a job that never returned (``timeout`` or ``crashed``).

Local
    :func:`run_local` keeps ``workers`` long-lived processes (``forkserver``,
    which imports the pipeline once; ``spawn`` where that is missing), one
    pipe each, one file at a time per process.  A process past its file's
    deadline is killed (``timeout``), one that dies is recorded (``crashed``),
    and a fresh process takes its place.  (A ``ProcessPoolExecutor`` cannot
    kill one worker, and one dead worker breaks the whole pool, so the pool
    here is a plain one.)  The worker entry point :func:`_worker_main` stays
    at module level: ``forkserver`` and ``spawn`` import it by name.
Dask
    :func:`run_dask` submits ``run`` to a Dask distributed client (see
    :func:`dask_client`), no more tasks at a time than the cluster has threads,
    because deadlines start at submission.  Dask cannot stop a running
    function: a task past its deadline is cancelled and recorded as
    ``timeout``, and the job's ``deadline`` field (wall-clock) tells ``run``
    to save nothing if it ever finishes.
"""

from __future__ import annotations

import dataclasses
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
    """Worker loop: warm the imports, say ready, then run jobs until told to stop."""
    import importlib
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)     # Ctrl-C is the parent's to handle
    try:
        importlib.import_module(f"{__package__}.pipeline")    # import once, before the first deadline starts
    except Exception:  # noqa: BLE001 - run reports the same import error for each file
        pass
    conn.send(("ready", None))
    while True:
        try:
            job = conn.recv()
        except EOFError:
            return
        if job is None:
            return
        conn.send(("done", run(job)))


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


def _stop(slot: _Slot, kill: bool) -> None:
    if not slot.dead:
        try:
            if kill:
                slot.proc.kill()
            else:
                slot.conn.send(None)
        except OSError:
            pass
        slot.proc.join(2)
        if slot.proc.is_alive():
            slot.proc.kill()
            slot.proc.join()
        slot.conn.close()
    slot.dead = True


#: After Ctrl-C, how long a busy worker may take to hand over a result it is sending (s).
_GRACE_S = 0.5


def run_local(jobs: list, workers: int, timeout_s: float | None, record: Callable, *,
              run: Callable, discard: Callable, lost: Callable) -> None:
    """Run ``jobs`` in ``workers`` local processes, killing any past ``timeout_s``.

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
        Propagated after every running worker is killed and its job discarded.

    Notes
    -----
    Wall time ~ sum of the job times / workers; this process waits on the pipes
    and process sentinels, O(workers) per event.
    """
    import multiprocessing
    from collections import deque
    from multiprocessing.connection import wait

    if "forkserver" in multiprocessing.get_all_start_methods():
        # Workers fork from one server that has imported the pipeline once (no per-worker import).
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload([run.__module__, "supportgen.pipeline"])
    else:
        ctx = multiprocessing.get_context("spawn")
    pending, slots, start_failures = deque(jobs), [], 0

    def start() -> _Slot:
        parent, child = ctx.Pipe()
        proc = ctx.Process(target=_worker_main, args=(child, run), name="supportgen-batch-worker", daemon=True)
        proc.start()
        child.close()
        return _Slot(proc, parent)

    graceful = False
    try:
        while pending or any(s.job for s in slots):
            slots = [s for s in slots if not s.dead]
            for _ in range(min(workers, len(pending) + sum(s.job is not None for s in slots)) - len(slots)):
                slots.append(start())
            for s in slots:
                if s.ready and s.job is None and pending:
                    s.job, s.started = pending.popleft(), time.monotonic()
                    s.conn.send(s.job)
            ends = [s.started + timeout_s for s in slots if s.job is not None] if timeout_s else []
            wait([s.conn for s in slots] + [s.proc.sentinel for s in slots],
                 max(0.0, min(ends) - time.monotonic()) if ends else None)
            for s in slots:
                gone = None
                try:
                    while s.conn.poll():
                        kind, payload = s.conn.recv()
                        if kind == "ready":
                            s.ready = True
                        else:
                            s.job = None
                            record(payload)
                except (EOFError, OSError):
                    gone = "crashed"
                if gone is None and not s.proc.is_alive():
                    gone = "crashed"
                if gone is None and s.job is not None and timeout_s and time.monotonic() > s.started + timeout_s:
                    gone = "timeout"
                if gone is None:
                    continue
                job, s.job, was_ready = s.job, None, s.ready
                _stop(s, kill=True)
                if job is not None:
                    discard(job)
                    reason = (f"took longer than {timeout_s:g} s; its worker was stopped (raise --timeout or use "
                              "coarser settings)") if gone == "timeout" else _died(s.proc.exitcode)
                    record(lost(job, gone, reason, round(time.monotonic() - s.started, 3)))
                elif not was_ready:
                    start_failures += 1
                    if start_failures >= 3:
                        raise SupportGenError(f"batch: worker processes fail to start ({_died(s.proc.exitcode)}); "
                                              "check that `python -c 'import supportgen.pipeline'` works")
        graceful = True
    finally:
        for s in slots:
            if s.job is not None and not graceful:
                # Keep a result already on its way (a worker finishing its save as Ctrl-C
                # came): its outputs are complete, so it counts as done, not discarded.
                try:
                    if s.conn.poll(_GRACE_S):
                        kind, payload = s.conn.recv()
                        if kind != "ready":
                            s.job = None
                            record(payload)
                except (EOFError, OSError):
                    pass
            if s.job is not None:
                discard(s.job)
            _stop(s, kill=not graceful or s.job is not None)


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
        raise SupportGenError("batch: --cluster needs Dask distributed, which is not installed; install it with "
                              "pip install 'supportgen[cluster]'") from None
    address = getattr(cluster, "scheduler_address", cluster)
    try:
        return Client(address, timeout="10s", set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise SupportGenError(f"batch: cannot reach the Dask scheduler at {address} ({exc}); start one with "
                              "`dask scheduler` or fix the address") from None


def run_dask(jobs: list, client, timeout_s: float | None, record: Callable, *,
             run: Callable, discard: Callable, lost: Callable) -> None:
    """Run ``jobs`` as tasks of a Dask client, cancelling any past ``timeout_s``.

    Parameters
    ----------
    jobs : list
        Picklable dataclass instances with a ``deadline`` field, set here to the
        wall-clock time after which ``run`` must save nothing.
    client : distributed.Client
        From :func:`dask_client`.
    timeout_s : float, optional
        Per-job limit, s, counted from submission; None for none.
    record, run, discard, lost : callable
        As in the module notes.

    Notes
    -----
    At most as many tasks are submitted as the cluster has threads; this process
    polls the running futures, O(threads) per event.
    """
    from collections import deque

    from distributed import wait

    width = max(1, sum(client.nthreads().values()))   # submit no more than can run: deadlines start at submit
    pending, running = deque(jobs), {}
    try:
        while pending or running:
            while pending and len(running) < width:
                job = pending.popleft()
                if timeout_s:
                    job = dataclasses.replace(job, deadline=time.time() + timeout_s)
                running[client.submit(run, job, pure=False)] = (job, time.monotonic())
            ends = [t0 + timeout_s for _, t0 in running.values()] if timeout_s else []
            try:
                with client.as_current():
                    wait(list(running), timeout=max(0.05, min(ends) - time.monotonic()) if ends else None,
                         return_when="FIRST_COMPLETED")
            except TimeoutError:
                pass
            for fut in list(running):
                job, t0 = running[fut]
                if fut.done():
                    del running[fut]
                    if fut.status == "finished":
                        record(fut.result())
                        continue
                    discard(job)
                    exc = fut.exception() if fut.status == "error" else fut.status
                    record(lost(job, "crashed", f"Dask task {fut.status}: {type(exc).__name__}: {exc}",
                                round(time.monotonic() - t0, 3)))
                elif timeout_s and time.monotonic() > t0 + timeout_s:
                    del running[fut]
                    fut.cancel()
                    discard(job)
                    record(lost(job, "timeout", f"took longer than {timeout_s:g} s; Dask task cancelled "
                                "(a running task cannot be stopped; it will save nothing)",
                                round(time.monotonic() - t0, 3)))
    finally:
        for fut, (job, _) in running.items():
            fut.cancel()
            discard(job)
