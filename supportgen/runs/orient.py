"""Orient parts: load, score the up-directions, write the turned part and what was found.

For a part NAME, :func:`orient_file` writes ``NAME.oriented.stl`` (the part
turned to the chosen up-direction and placed on the plate as ``generate``
places parts), ``NAME.orient.json`` (every scored candidate), ``NAME.orient.md``
and ``NAME.orient.png`` (the sphere map and the part as chosen).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import trimesh

from ..analysis.placement import place
from ..io.meshio import atomic_write, atomic_write_text, load_mesh, part_name, prepare_mesh, write_mesh
from ..io.units import scale_loaded, unit_factor
from ..physics.orientation import Orientation, orient, turn
from ..report.orientation import orientation_json, orientation_markdown, plot_orientation
from ..settings import Settings
from ..supports.protect import protected_faces

__all__ = ["ORIENT_OUTPUTS", "Oriented", "orient_part", "orient_file"]

#: What :func:`orient_file` writes for a part NAME: role -> file name suffix.
ORIENT_OUTPUTS = {"mesh": ".oriented.stl", "json": ".orient.json", "summary": ".orient.md", "map": ".orient.png"}


@dataclass(frozen=True)
class Oriented:
    """A part's orientation search and the part turned and placed as chosen."""

    name: str
    orientation: Orientation
    part: trimesh.Trimesh
    warnings: tuple[str, ...] = ()


def orient_part(
    source,
    settings: Settings | None = None,
    *,
    name: str | None = None,
    units: str = "mm",
    scale: float = 1.0,
    n_directions: int | None = None,
    longest_mm: float | None = None,
    protect=None,
) -> Oriented:
    """Load (or take) a mesh, search its orientations and place it turned as chosen.

    ``units`` and ``scale`` as in :func:`supportgen.generate`; ``longest_mm``, when
    given, scales the part so its longest side is that many mm (for unitless meshes);
    ``protect`` as in :func:`supportgen.generate` (a part file's side-car file is added):
    its faces are scored by the ``protected_mm2`` term.
    """
    settings = Settings() if settings is None else settings
    if isinstance(source, trimesh.Trimesh):
        name = name or "part"
        loaded = prepare_mesh(source, name)
    else:
        name = name or part_name(source)
        loaded = load_mesh(source)
    loaded = scale_loaded(loaded, unit_factor(units, scale))
    if longest_mm is not None:
        loaded = scale_loaded(loaded, float(longest_mm) / float(loaded.mesh.extents.max()))
    faces = protected_faces(loaded.mesh, protect, None if isinstance(source, trimesh.Trimesh) else source, name).faces
    o = orient(loaded.mesh, settings, n_directions=n_directions, protect=faces if faces.any() else None)
    placed = place(turn(loaded.mesh, o.rotation), settings, position="centre", name=name)
    return Oriented(name, o, placed.mesh, tuple(loaded.repairs) + tuple(placed.warnings))


def orient_file(source, outdir, settings: Settings | None = None, **kwargs) -> tuple[Oriented, dict[str, Path]]:
    """:func:`orient_part`, then write its four outputs into ``outdir``; the result and the paths by role.

    Files are written atomically; if one fails, those already written are removed.
    """
    res = orient_part(source, settings, **kwargs)
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    paths = {role: outdir / f"{res.name}{suffix}" for role, suffix in ORIENT_OUTPUTS.items()}
    written: list[Path] = []
    try:
        write_mesh(res.part, paths["mesh"])
        written.append(paths["mesh"])
        atomic_write(paths["map"], plot_orientation(res.orientation, res.part, f"{res.name}: orientations by score"))
        written.append(paths["map"])
        atomic_write_text(paths["summary"], orientation_markdown(res.orientation, res.name, paths["map"].name))
        written.append(paths["summary"])
        atomic_write_text(
            paths["json"],
            orientation_json(
                res.orientation,
                res.name,
                {"warnings": list(res.warnings), "outputs": {k: str(p) for k, p in paths.items()}},
            ),
        )
        written.append(paths["json"])
    except BaseException:
        for p in written:
            p.unlink(missing_ok=True)
        raise
    return res, paths
