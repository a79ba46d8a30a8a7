"""SIGINT and SIGTERM handled alike: both stop a run the way Ctrl-C does.

A terminal sends SIGINT on Ctrl-C; a job scheduler, a container runtime or
``kill`` send SIGTERM.  Inside :func:`stop_on_signals` the first of either raises
:class:`KeyboardInterrupt` in the main thread, so ``generate`` and ``batch`` stop
their workers, write what finished (the batch summary with ``interrupted: true``)
and leave no partial file, then exit 130 without a traceback.  Further signals
during that clean-up are ignored, so a second Ctrl-C cannot cut it short.
"""

from __future__ import annotations

import contextlib
import signal
import threading

__all__ = ["stop_on_signals", "STOP_SIGNALS"]

STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)


@contextlib.contextmanager
def stop_on_signals():
    """Within the block, SIGINT or SIGTERM raise KeyboardInterrupt once; previous handlers come back after.

    A signal whose handler is ``SIG_IGN`` on entry stays ignored.

    A no-op outside the main thread (Python delivers signals to the main thread only).
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {s: signal.getsignal(s) for s in STOP_SIGNALS}

    def handler(signum, frame):
        for s in STOP_SIGNALS:
            signal.signal(s, signal.SIG_IGN)  # one stop is enough: let the clean-up finish
        raise KeyboardInterrupt(signal.Signals(signum).name)

    for s in STOP_SIGNALS:
        if previous[s] is not signal.SIG_IGN:  # a signal ignored on purpose (nohup, a background job) stays so
            signal.signal(s, handler)
    try:
        yield
    finally:
        for s, h in previous.items():
            signal.signal(s, h if h is not None else signal.SIG_DFL)
