"""Layers: the part as the printer sees it (pixel masks, islands, reach).

(Helper-owned module: the rasteriser, islands and reach are being written.
 The two records below are the contract other stages build on.)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Grid", "Layer"]


@dataclass(frozen=True)
class Grid:
    """The printer's pixel grid over a region of the plate.

    Pixel ``(row, col)`` has its centre at
    ``(x0 + col * pixel_mm, y0 + row * pixel_mm)``; masks are indexed ``[row, col]``
    i.e. ``[y, x]`` with shape ``(ny, nx)``.
    """

    x0: float
    y0: float
    pixel_mm: float
    ny: int
    nx: int

    @property
    def shape(self) -> tuple[int, int]:
        return (self.ny, self.nx)

    @classmethod
    def covering(cls, bounds, pixel_mm: float, pad: int = 2) -> "Grid":
        """A grid over the x/y extent of ``bounds`` ((2, 3) array), ``pad`` pixels wider each side."""
        lo = np.floor(np.asarray(bounds)[0, :2] / pixel_mm) - pad
        hi = np.ceil(np.asarray(bounds)[1, :2] / pixel_mm) + pad
        n = (hi - lo + 1).astype(int)
        return cls(float(lo[0] * pixel_mm), float(lo[1] * pixel_mm), float(pixel_mm), int(n[1]), int(n[0]))

    def xy(self, rows, cols) -> np.ndarray:
        """Pixel centres (k, 2) of the given row and column indices."""
        return np.column_stack([self.x0 + np.asarray(cols) * self.pixel_mm,
                                self.y0 + np.asarray(rows) * self.pixel_mm])

    def index(self, xy) -> tuple[np.ndarray, np.ndarray]:
        """Nearest (rows, cols) of points (k, 2); may fall outside the grid."""
        xy = np.atleast_2d(np.asarray(xy, float))
        cols = np.rint((xy[:, 0] - self.x0) / self.pixel_mm).astype(int)
        rows = np.rint((xy[:, 1] - self.y0) / self.pixel_mm).astype(int)
        return rows, cols


@dataclass(frozen=True)
class Layer:
    """One printed layer: index ``k`` cured between ``k*h`` and ``(k+1)*h``,
    sampled at its mid-height ``z_mm``; ``mask[row, col]`` is True where cured."""

    index: int
    z_mm: float
    mask: np.ndarray
