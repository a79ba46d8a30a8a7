"""The package layout is the pipeline, and imports point one way down it.

Checked from the source with :mod:`ast` (no import is executed), so a new
module is covered the day it is added:

- a module may import only from its own stage or from earlier stages
  (foundation -> io -> analysis -> physics -> supports -> report -> pipeline
  -> runs -> cli), lazily or not;
- no module imports a private (underscore) name of another module;
- the module import graph has no cycle (networkx ``simple_cycles``).
"""

from __future__ import annotations

import ast
from pathlib import Path

import networkx as nx
import pytest

import supportgen

PACKAGE = Path(supportgen.__file__).parent

#: Stage order; a module may import from its own rank or a lower one.
RANKS = {
    "errors": 0,
    "constants": 0,
    "settings": 0,
    "io": 1,
    "analysis": 2,
    "physics": 3,
    "supports": 4,
    "report": 5,
    "pipeline": 6,
    "runs": 7,
    "cli": 8,
    "__main__": 9,
    "__init__": 9,
}


def _module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _stage(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def _is_module(dotted: str) -> bool:
    where = PACKAGE.parent.joinpath(*dotted.split("."))
    return where.with_suffix(".py").exists() or where.is_dir()


def _imports(path: Path, module: str):
    """(imported module, names, line) for every supportgen import in ``path``.

    A private attribute read through an imported module (``forces._solve``)
    counts as importing that name.
    """
    tree = ast.parse(path.read_text(), filename=str(path))
    is_pkg = path.name == "__init__.py"
    base = module.split(".") if is_pkg else module.split(".")[:-1]
    aliases: dict[str, str] = {}
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            anchor = base[: len(base) - (node.level - 1)] if node.level else []
            target = ".".join(anchor + ([node.module] if node.module else []))
            for a in node.names:
                if _is_module(f"{target}.{a.name}"):
                    aliases[a.asname or a.name] = f"{target}.{a.name}"
    for node in ast.walk(tree):
        if (
            isinstance(node, ast.Attribute)
            and isinstance(node.value, ast.Name)
            and node.value.id in aliases
            and node.attr.startswith("_")
            and not node.attr.startswith("__")
        ):
            yield aliases[node.value.id], [node.attr], node.lineno
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                anchor = base[: len(base) - (node.level - 1)]
                target = ".".join(anchor + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target.split(".")[0] != "supportgen":
                continue
            names = [a.name for a in node.names]
            # ``from pkg import module`` imports a module, not a name of pkg.
            subs = [n for n in names if _is_module(f"{target}.{n}")]
            for n in subs:
                yield f"{target}.{n}", [], node.lineno
            rest = [n for n in names if n not in subs]
            if rest:
                yield target, rest, node.lineno
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name.split(".")[0] == "supportgen":
                    yield a.name, [], node.lineno


def _graph():
    g = nx.DiGraph()
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        module = _module_name(path)
        g.add_node(module)
        for target, names, line in _imports(path, module):
            found.append((module, target, names, f"{path.relative_to(PACKAGE.parent)}:{line}"))
            if target != module and target != "supportgen":
                g.add_edge(module, target)
    return g, found


def test_every_module_has_a_stage():
    g, _ = _graph()
    unknown = sorted(m for m in g if _stage(m) not in RANKS)
    assert not unknown, f"modules outside the stage map {sorted(RANKS)}: {unknown}"


def test_imports_point_one_way():
    _, found = _graph()
    bad = [
        f"{where}: {module} (stage {_stage(module)}) imports {target} (stage {_stage(target)})"
        for module, target, _, where in found
        if target != "supportgen" and RANKS[_stage(target)] > RANKS[_stage(module)]
    ]
    assert not bad, "imports against the pipeline's direction:\n" + "\n".join(bad)


def test_no_private_names_across_modules():
    _, found = _graph()
    bad = [
        f"{where}: {module} imports {n} from {target}"
        for module, target, names, where in found
        for n in names
        if n.startswith("_") and not n.startswith("__") and target != module
    ]
    assert not bad, "private names imported across modules:\n" + "\n".join(bad)


def test_no_import_cycles():
    g, _ = _graph()
    # Package __init__ modules re-export their children by design; leave them out.
    core = g.subgraph(m for m in g if not PACKAGE.parent.joinpath(*m.split(".")).is_dir())
    cycles = list(nx.simple_cycles(core))
    assert not cycles, f"import cycles: {cycles}"


@pytest.mark.parametrize("stage", sorted(s for s in RANKS if (PACKAGE / s).is_dir()))
def test_stage_packages_declare_their_api(stage):
    """Each stage package lists what it offers in ``__all__`` (the names an IDE sees)."""
    init = PACKAGE / stage / "__init__.py"
    tree = ast.parse(init.read_text())
    assert ast.get_docstring(tree), f"{init} has no docstring saying which stage it is"
