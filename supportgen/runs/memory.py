"""Peak memory: of this process so far, and of one call.  Shared by ``batch`` (each row's
``peak_mb``) and ``bench`` (each table row's peak).

Method ``"rss"`` of :func:`measure_peak`: the growth of the resident set during the call,
``VmHWM`` after minus ``VmRSS`` before, with free heap pages handed back (glibc
``malloc_trim``) and the high-water mark reset through ``/proc/self/clear_refs`` first
(Linux >= 4.0, proc(5)); where that reset is not possible the growth of ``ru_maxrss``
is used, which reads 0 for a call that stays under an earlier peak.  Method
``"tracemalloc"``: the peak of Python's traced allocations (numpy buffers included);
exact, but it slows the call about twofold.
"""

from __future__ import annotations

import ctypes
import sys
import tracemalloc
from collections.abc import Callable

from ..errors import SettingsError

try:
    import resource
except ImportError:  # Windows
    resource = None

__all__ = ["MEMORY_METHODS", "peak_rss_mb", "measure_peak"]

MEMORY_METHODS = ("rss", "tracemalloc")


def _maxrss_bytes() -> int | None:
    if resource is None:
        return None
    # ru_maxrss is in KiB on Linux, bytes on macOS (getrusage(2)).
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * (1 if sys.platform == "darwin" else 1024)


def peak_rss_mb() -> float | None:
    """Peak resident memory of this process so far, MB (2**20 bytes); None where unknown."""
    b = _maxrss_bytes()
    return None if b is None else round(b / 2**20, 1)


def _rss_kb(field: str) -> int | None:
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith(field + ":"):
                    return int(line.split()[1])
    except OSError:
        return None
    return None


def _trim_heap() -> None:
    """Hand free heap pages back to the system (glibc ``malloc_trim``), so that a run reusing
    memory freed by an earlier one still shows as resident-set growth; a no-op elsewhere."""
    try:
        ctypes.CDLL(None).malloc_trim(0)
    except (OSError, AttributeError):
        pass


def measure_peak(fn: Callable[[], object], method: str = "rss") -> tuple[object, float, str]:
    """Call ``fn()`` and measure its peak memory.

    Parameters
    ----------
    fn : callable
        Called once, without arguments.
    method : {"rss", "tracemalloc"}
        See the module notes.

    Returns
    -------
    value : object
        What ``fn`` returned.
    peak_mb : float
        Peak memory in MB (10^6 bytes).
    used : str
        The method actually used: ``"tracemalloc"``, ``"rss-hwm"`` or, where the
        high-water mark cannot be reset, ``"ru_maxrss-delta"``.

    Raises
    ------
    SettingsError
        Unknown ``method``; the message lists the valid ones.
    """
    if method not in MEMORY_METHODS:
        raise SettingsError(f"unknown memory method '{method}'; valid methods: {', '.join(MEMORY_METHODS)}")
    if method == "tracemalloc":
        tracemalloc.start()
        try:
            value = fn()
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
        return value, peak / 1e6, "tracemalloc"
    _trim_heap()
    before = _rss_kb("VmRSS")
    try:
        with open("/proc/self/clear_refs", "w", encoding="ascii") as fh:
            fh.write("5")  # resets VmHWM to the current RSS (proc(5))
        reset = before is not None
    except OSError:
        reset = False
    if reset:
        value = fn()
        return value, max(0, (_rss_kb("VmHWM") or 0) - before) * 1024 / 1e6, "rss-hwm"
    start = _maxrss_bytes() or 0
    value = fn()
    return value, ((_maxrss_bytes() or 0) - start) / 1e6, "ru_maxrss-delta"
