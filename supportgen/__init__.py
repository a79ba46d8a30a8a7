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

__version__ = "0.1.0"


#: Names loaded on first use (the pipeline pulls in every stage, so ``import
#: supportgen`` stays quick for scripts and commands that only read settings): name -> module.
#: Declared once here; ``__init__.pyi`` states their types for IDEs and checkers.
_LAZY = {
    "generate": "pipeline",
    "check": "analysis.verify",
    "Result": "pipeline",
    "orient": "physics.orientation",
    "Contacts": "supports.plan",
    "SupportPlan": "supports.plan",
    "STRATEGIES": "supports.strategies",
}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
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
