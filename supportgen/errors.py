"""The exceptions supportgen raises.

Every error is a :class:`SupportGenError`; each message names the input that
was wrong, what was wrong with it and what to do about it, on one line, so the
command line can print it as it is.
"""

from __future__ import annotations

__all__ = [
    "SupportGenError",
    "SettingsError",
    "MeshError",
    "PlacementError",
    "GeometryError",
    "SizingError",
    "OutputError",
]


class SupportGenError(Exception):
    """Base class of every error supportgen raises on purpose."""


class SettingsError(SupportGenError, ValueError):
    """A setting, profile file or option value is unknown or out of range."""


class MeshError(SupportGenError, ValueError):
    """A mesh file cannot be read, or is not a solid that can be printed."""


class PlacementError(SupportGenError, ValueError):
    """The part does not fit the printer's build volume."""


class GeometryError(SupportGenError, RuntimeError):
    """Building or joining the support solids failed."""


class SizingError(SupportGenError, ValueError):
    """Loads or a support plan cannot be sized (negative load, cycle, bad index)."""


class OutputError(SupportGenError):
    """An output folder or file cannot be used: it is a file, not writable, full, locked by
    another run, or an output would replace an input."""
