"""supportgen: support structures for bottom-up resin printing, sized from the
separation force of every layer.

The Python API::

    import supportgen
    settings = supportgen.load_settings("my-printer.toml")   # or supportgen.Settings()
    result = supportgen.generate("part.stl", settings, strategy="tree")
    result.combined, result.supports     # trimesh solids
    result.contacts                      # positions, normals, diameters, loads
    result.report                        # the same dict as NAME.report.json
    result.save("outdir/")
    supportgen.check(mesh, settings)     # verify any supported mesh
    supportgen.orient(mesh, settings)    # score up-directions, choose how the part stands
"""

from .errors import GeometryError, MeshError, OutputError, PlacementError, SettingsError, SupportGenError
from .settings import PROFILES, Settings, load_settings
from .supports.plan import Contacts, SupportPlan
from .supports.strategies import STRATEGIES

__version__ = "0.1.0"


def __getattr__(name):
    # The pipeline pulls in every stage; load it on first use so that
    # ``import supportgen`` stays quick for scripts that only read settings.
    if name in ("generate", "check", "Result"):
        from . import pipeline

        return getattr(pipeline, name)
    if name == "orient":
        from .physics.orientation import orient

        return orient
    raise AttributeError(f"module 'supportgen' has no attribute {name!r}")


__all__ = [
    "generate",
    "check",
    "orient",
    "Result",
    "Settings",
    "load_settings",
    "PROFILES",
    "STRATEGIES",
    "Contacts",
    "SupportPlan",
    "SupportGenError",
    "SettingsError",
    "MeshError",
    "PlacementError",
    "GeometryError",
    "OutputError",
]
