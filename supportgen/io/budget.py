"""What a part will cost before it is computed: its footprint and an estimate of peak memory.

Used by ``generate`` (refusing a part that would not fit the machine, before its
layers are allocated) and by ``batch`` (the per-worker memory limit).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from supportgen.errors import SupportGenError
from supportgen.settings import Settings

__all__ = [
    "MEMORY_BASE_MB",
    "MEMORY_MASK_FACTOR",
    "MEMORY_FACE_BYTES",
    "estimate_peak_mb",
    "mesh_footprint",
    "available_memory_mb",
    "check_memory",
]

# Peak resident memory of one worker (MB) ~ BASE + FACTOR * mask bytes / 2**20 + FACE_BYTES * faces / 2**20,
# mask = one uint8 layer mask over the part's x/y bounds.  Measured with resource.getrusage(RUSAGE_SELF).ru_maxrss
# of fresh processes (benchmarks/bench_batch.py --calibrate-memory, 2 cores, Linux, 2026-12-01): flat plates
# 10-70 mm (0.04-1.2 Mpx), spheres of 1,280-81,920 faces and the three demo parts; least squares gave
# 240 MB + 331 B/px + 1,400 B/face.  The constants below are raised so that no measured run exceeds its
# estimate (estimate / measured from 1.10 for the lattice trivet to 1.93 for the largest flat plate).
# The stages are still changing: rerun the calibration when they settle.
MEMORY_BASE_MB = 250.0  # the imported libraries plus a small part
MEMORY_MASK_FACTOR = 700.0  # bytes per pixel of the layer grid (masks, crossings, pressure solve)
MEMORY_FACE_BYTES = 2500.0  # per input face


def estimate_peak_mb(faces: int, bounds, settings: Settings) -> float:
    """Estimated peak resident memory (MB) of one process supporting a part.

    Parameters
    ----------
    faces : int
        Number of triangles of the input.
    bounds : (2, 3) array_like or None
        Its axis-aligned bounds, mm; None when not known yet (the layer grid then counts 0).
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
    mask = 0.0
    if bounds is not None:
        ext = np.ptp(np.asarray(bounds, float)[:, :2], axis=0)
        mask = float(np.prod(ext / settings.printer.pixel_mm))
    return MEMORY_BASE_MB + (MEMORY_MASK_FACTOR * mask + MEMORY_FACE_BYTES * faces) / 2**20


def mesh_footprint(path: str | Path, settings: Settings | None = None) -> tuple[int, np.ndarray]:
    """Face count and (2, 3) bounds of a mesh file, without repairing it.

    A binary STL is read with one ``numpy.frombuffer`` (O(faces), 50 bytes a
    face); other formats go through :func:`supportgen.io.meshio.load_mesh`
    (with the caps of ``settings``, so a hostile file is refused before parsing).

    Raises
    ------
    supportgen.errors.MeshError
        The file cannot be read as a mesh, or is over a cap.
    """
    from supportgen.io.meshio import load_mesh

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
    lim = (settings or Settings()).limits
    mesh = load_mesh(path, max_faces=lim.max_faces, max_unpacked_mb=lim.max_unpacked_mb).mesh
    return len(mesh.faces), np.asarray(mesh.bounds, float)


def available_memory_mb() -> float | None:
    """Memory the machine can give a new job now, MB: ``MemAvailable`` of ``/proc/meminfo``
    (Linux, proc(5)), else free physical pages (``sysconf``); None where neither is known."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) / 1024
    except (OSError, ValueError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE") / 2**20
    except (ValueError, OSError, AttributeError):
        return None


def check_memory(faces: int, bounds, settings: Settings, label: str) -> None:
    """Refuse, before allocating, a part whose :func:`estimate_peak_mb` exceeds the memory it may use.

    The budget is ``settings.limits.memory_mb``, or where that is 0 the machine's available memory.

    Raises
    ------
    SupportGenError
        One line with the estimate, the budget and what to change.
    """
    budget = settings.limits.memory_mb or available_memory_mb()
    if not budget:
        return
    need = estimate_peak_mb(faces, bounds, settings)
    if need <= budget:
        return
    what = f"{faces:,} faces"
    if bounds is not None:
        b = np.asarray(bounds, float)
        what += f", {np.ptp(b[:, 0]):.1f} x {np.ptp(b[:, 1]):.1f} mm at {settings.printer.pixel_mm} mm pixels"
    source = "the memory_mb limit" if settings.limits.memory_mb else "this machine's available memory"
    raise SupportGenError(
        f"{label}: needs about {need:,.0f} MB ({what}), over the {budget:,.0f} MB of {source}; "
        "use coarser pixels (--set pixel_mm=...), a smaller part, or a machine with more memory"
    )
