"""Run-length tools: a layer as row runs of cured pixels, and what is built from them.

A bool image is held as its row runs ``(rows, starts, ends)`` (int64, sorted by
row then start, ``ends`` exclusive).  Layers, the load path and the pressure
solver all read layers this way; this module is the one implementation of each
run operation they share.

Examples
--------
>>> import numpy as np
>>> m = np.array([[0, 1, 1, 0, 1],
...               [0, 0, 0, 0, 1]], bool)
>>> [a.tolist() for a in mask_runs(m)]
[[0, 0, 1], [1, 4, 4], [3, 5, 5]]
>>> paint_runs(*mask_runs(m), np.array([1, 2, 2]), m.shape).tolist()
[[0, 1, 1, 0, 2], [0, 0, 0, 0, 2]]
>>> edge_components(3, [0], [2])
(2, array([0, 1, 0], dtype=int32))
"""

from __future__ import annotations

import numpy as np

__all__ = ["mask_runs", "box_runs", "run_overlaps", "paint_runs", "edge_components", "ranks"]


def ranks(counts: np.ndarray) -> np.ndarray:
    """Each element's place in its group, for groups of ``counts`` laid end to end.

    >>> ranks(np.array([2, 0, 3])).tolist()
    [0, 1, 0, 1, 2]
    """
    counts = np.asarray(counts)
    return np.arange(int(counts.sum())) - np.repeat(np.cumsum(counts) - counts, counts)


def mask_runs(mask: np.ndarray, r0: int = 0, c0: int = 0):
    """Row runs of a bool image: ``(rows, starts, ends)``, offset by ``(r0, c0)``.

    Parameters
    ----------
    mask : (ny, nx) bool ndarray
    r0, c0 : int
        Added to the rows and columns (the image's place in a larger one).

    Notes
    -----
    One pass over a copy padded by a column on each side: O(pixels).
    """
    ny, nx = mask.shape
    p = np.zeros((ny, nx + 2), bool)
    p[:, 1:-1] = mask
    t = np.flatnonzero(p.ravel()[1:] != p.ravel()[:-1]) + 1
    st, en = t[0::2], t[1::2]
    return st // (nx + 2) + r0, st % (nx + 2) - 1 + c0, en % (nx + 2) - 1 + c0


def box_runs(mask: np.ndarray):
    """:func:`mask_runs` of a whole layer, found inside its bounding box (O(box pixels))."""
    rr = np.flatnonzero(mask.any(axis=1))
    if rr.size == 0:
        return (np.zeros(0, np.int64),) * 3
    r0, r1 = int(rr[0]), int(rr[-1]) + 1
    cc = np.flatnonzero(mask[r0:r1].any(axis=0))
    return mask_runs(mask[r0:r1, int(cc[0]) : int(cc[-1]) + 1], r0, int(cc[0]))


def run_overlaps(a, b, shift: int = 0):
    """Pairs of runs of ``a`` and ``b`` on the same row whose columns overlap.

    Parameters
    ----------
    a, b : tuples whose first three items are (rows, starts, ends), each sorted
    shift : int
        Widen every run of ``a`` by ``shift`` columns on each side first (1 finds
        the runs that touch diagonally too, as 8-connectivity needs).

    Returns
    -------
    ia, ib : int ndarrays
        Indices of the overlapping pairs.
    length : int ndarray
        Columns shared by each pair (> 0 for ``shift = 0``).

    Notes
    -----
    O((|a| + |b|) log |b| + pairs) by two binary searches over row-major keys.
    """
    ra, sa, ea = a[:3]
    rb, sb, eb = b[:3]
    sa, ea = sa - shift, ea + shift
    width = int(max(ea.max(initial=0), eb.max(initial=0))) + 2
    lo = np.searchsorted(rb * width + eb, ra * width + sa, "right")  # first b ending after a starts
    hi = np.searchsorted(rb * width + sb, ra * width + ea, "left")  # b starting before a ends
    cnt = np.maximum(hi - lo, 0)
    ia = np.repeat(np.arange(ra.size), cnt)
    ib = np.repeat(lo, cnt) + ranks(cnt)
    return ia, ib, np.minimum(ea[ia], eb[ib]) - np.maximum(sa[ia], sb[ib])


def paint_runs(rows, starts, ends, values, shape) -> np.ndarray:
    """(ny, nx) int32 image holding ``values[i]`` on run ``i`` and 0 elsewhere.

    Runs may touch end to start (a run ending where the next begins): the
    differences are summed, not assigned.  O(pixels).
    """
    base, n = rows * shape[1], shape[0] * shape[1]
    values = np.asarray(values, np.int64)
    d = np.bincount(base + starts, values, n + 1) - np.bincount(base + ends, values, n + 1)
    return np.rint(np.cumsum(d[:-1])).astype(np.int32).reshape(shape)


def edge_components(n: int, ia, ib) -> tuple[int, np.ndarray]:
    """Connected components of ``n`` nodes joined by the edges ``(ia[k], ib[k])``.

    Returns the count and each node's component (int32), numbered in the order
    of each component's smallest node, as ``scipy.sparse.csgraph.connected_components``
    numbers them (the tests check the two agree).

    Notes
    -----
    Union-find in whole-array steps: every edge whose ends lie in two trees hooks the
    larger root under the smaller (``np.minimum.at``), then pointer jumping flattens
    every tree, until no edge joins two trees.  The roots are each component's smallest
    node.  A layer's runs make graphs of a few hundred nodes, where building a sparse
    matrix for scipy costs more than the search (about 3x at 50 nodes, measured).
    """
    ia, ib = np.asarray(ia, np.int64).ravel(), np.asarray(ib, np.int64).ravel()
    parent = np.arange(n)
    while ia.size:
        pa, pb = parent[ia], parent[ib]
        apart = pa != pb
        if not apart.any():
            break
        ia, ib, pa, pb = ia[apart], ib[apart], pa[apart], pb[apart]
        np.minimum.at(parent, np.maximum(pa, pb), np.minimum(pa, pb))
        while True:  # every node to its root: depth halves each step
            up = parent[parent]
            if np.array_equal(up, parent):
                break
            parent = up
    rank = np.cumsum(parent == np.arange(n), dtype=np.int32) - 1
    return (int(rank[-1]) + 1 if n else 0), rank[parent]
