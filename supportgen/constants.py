"""Numeric tolerances, each in one place with its reason.

Lengths are in millimetres.  Parts are 1-300 mm and files keep single-precision
positions (float32: about 1e-5 mm at 100 mm), pixels and layers are 5-500 um.

Examples
--------
>>> 1e-5 < OFFSET_MM < 0.005    # above float32 resolution at 100 mm, below the finest pixel
True
"""

from __future__ import annotations

__all__ = [
    "OFFSET_MM",
    "EPS_REL",
    "EPS_ZERO",
    "EPS_SMALL",
    "EPS_FLOOR",
    "MERGE_FRACTION",
    "EXACT_FRACTION",
    "STATICS_RCOND",
]

#: Step taken off a surface so that a query starts clearly on one side of it
#: (a ray below a contact, a node above the base): one micron, far below the
#: finest pixel (5 um) and far above float32 resolution of stored positions.
OFFSET_MM = 1e-3

#: Relative slack for comparing a computed quantity with a limit it was sized
#: to meet exactly (a few ulps of round-off in a product or a square root).
EPS_REL = 1e-9

#: An absolute length (mm), determinant or cosine this close to zero is zero:
#: guards divisions by a norm and decides degenerate directions.
EPS_ZERO = 1e-12

#: A segment or tangent shorter than this (mm, or unitless for tangents) is
#: treated as absent: far below any printable feature.
EPS_SMALL = 1e-6

#: Positive floor for dividing non-negative sums that may be exactly zero.
EPS_FLOOR = 1e-300

#: Vertices closer than this fraction of the bounding-box diagonal are one vertex:
#: above float32 rounding (6e-8) and the noise exporters leave on shared corners,
#: far below any printable feature (0.7 um on a 70 mm diagonal, a seventieth of a
#: 50 um pixel).
MERGE_FRACTION = 1e-5

#: Vertices closer than this fraction of the diagonal are the same point written
#: twice (below float32 resolution): always merged.  The wider
#: :data:`MERGE_FRACTION` applies only where it closes a surface that this leaves open.
EXACT_FRACTION = 1e-9

#: A face of a solid rebuilt from the winding number (:mod:`supportgen.io.winding`) takes
#: the marks (protection, colour) of the nearest input face when that face lies within
#: this many grid cells of it.  Marching cubes on the winding number, a step from 1 to 0
#: across the surface, puts the rebuilt surface up to half a cell from the input (the
#: level 1/2 interpolated between a node inside and one outside), and the simplification
#: moves it less than an eighth of a cell more; one cell covers both, and a face farther
#: than that has no input face it stands for (an inner wall, a sheet the rebuild dropped).
REBUILD_CARRY_CELLS = 1.0

#: Relative singular value below which a rigid part's rotation on its supports is
#: taken as unresisted.  Coordinates are scaled by the larger of the supports' RMS
#: spread and the loaded region's RMS radius, and the moment matrix goes as spread
#: squared, so 1e-2 treats contacts whose spread in a direction is under about a
#: tenth of that scale as a line (or a point): otherwise close or nearly collinear
#: contacts resist a far moment with reactions hundreds of times the load (a
#: corpus part reached 1e5 N).
STATICS_RCOND = 1e-2
