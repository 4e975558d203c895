"""Layering: every import (top-level or inside a function) points down the floors.

Floors, from the ground up (DEVELOPERS.md, "Layers"): a module may import only modules of
its own floor or of floors below. The app (``ui``) and the command line are front ends:
the library never imports ``ui``, and ``ui`` never imports ``caredecide.cli``. The rule is
common practice for layered software; the floors themselves are this project's own.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

# Longest prefix wins. Floor 1: contract and maths; 2: model file and compiler; 3: solvers,
# evaluation and the chunk driver; 4: analysis modules; 5: analysis entry points (result
# objects); 6: front ends.
FLOORS: dict[str, int] = {
    "caredecide": 1,  # the package's own __init__ re-exports; checked as floor 1 below
    "caredecide.errors": 1,
    "caredecide.cautions": 1,
    "caredecide.limits": 1,
    "caredecide.options": 1,
    "caredecide.per_object": 1,
    "caredecide.palettes": 1,
    "caredecide.charts": 1,
    "caredecide.sweep_charts": 1,
    "caredecide.decision_charts": 1,
    "caredecide.compiled": 1,
    "caredecide.conversions": 1,
    "caredecide.distributions": 1,
    "caredecide.mortality": 1,
    "caredecide.expressions": 1,
    "caredecide.model": 1,
    "caredecide.objective": 1,
    "caredecide.guarded": 1,
    "caredecide.outputs": 1,
    "caredecide.jit": 1,
    "caredecide._exponential_loops": 1,
    # The format-upgrade table is plain text rewriting on floor 1: the expression language
    # reads it to say which new name an old function has.
    "caredecide.upgrade": 1,
    "caredecide.modelfile": 2,
    "caredecide.expand": 2,
    "caredecide.compile": 2,
    "caredecide.rate_rows": 2,
    "caredecide.sparse_compile": 2,
    "caredecide.derived": 2,
    "caredecide.memory": 2,
    "caredecide.grouping": 2,
    "caredecide.diagram": 2,
    "caredecide.diagram_layout": 2,
    "caredecide.diagram_charts": 1,
    "caredecide.solvers": 3,
    "caredecide.evaluate": 3,
    "caredecide.stationary_totals": 3,
    "caredecide.structure": 3,
    "caredecide.chunks": 3,
    "caredecide.batch": 3,
    "caredecide.strategies": 4,
    "caredecide.incremental": 4,
    "caredecide.frontier": 4,
    "caredecide.frontier_view": 4,
    "caredecide.compare": 4,
    "caredecide.sensitivity": 4,
    "caredecide.uncertainty": 4,
    "caredecide.estimation": 4,
    "caredecide.verify": 4,
    "caredecide.scenarios": 4,
    "caredecide.convergence": 4,
    "caredecide.exports": 4,
    "caredecide.runrecord": 4,
    "caredecide.analysis": 5,
    "caredecide.cli": 6,
    "caredecide.report": 6,
    "ui": 6,
}


def floor_of(module: str) -> int | None:
    """The floor of the longest prefix listed in FLOORS (the bare package only exactly)."""
    parts = module.split(".")
    for n in range(len(parts), 0, -1):
        prefix = ".".join(parts[:n])
        if prefix == "caredecide" and module != "caredecide":
            continue  # a module of the package needs its own line
        if prefix in FLOORS:
            return FLOORS[prefix]
    return None


def _module_name(path: Path, root: Path = ROOT) -> str:
    parts = list(path.relative_to(root).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def imports_of(path: Path, root: Path = ROOT) -> list[tuple[int, str]]:
    """(line, imported module) for every import statement in the file, nested ones too."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    module = _module_name(path, root)
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                target = ".".join([*base, node.module] if node.module else base)
            else:
                target = node.module or ""
            found.append((node.lineno, target))
            # "from caredecide import charts" imports the module caredecide.charts.
            found += [(node.lineno, f"{target}.{alias.name}") for alias in node.names]
    return found


def _sources(root: Path = ROOT) -> list[Path]:
    return sorted((root / "caredecide").rglob("*.py")) + sorted((root / "ui").rglob("*.py"))


def violations(root: Path = ROOT) -> list[str]:
    """One line per import that points up the floors, naming the file and line."""
    found = []
    for path in _sources(root):
        module = _module_name(path, root)
        own = floor_of(module)
        for line, target in imports_of(path, root):
            if not target.startswith(("caredecide", "ui")) or target.split(".")[0] not in (
                "caredecide",
                "ui",
            ):
                continue
            where = f"{path.relative_to(root)}:{line} imports {target}"
            if module.startswith("caredecide") and target.split(".")[0] == "ui":
                found.append(f"{where} (the library never imports the app)")
            elif module.startswith("ui") and target.startswith("caredecide.cli"):
                found.append(f"{where} (the app never imports the command line)")
            elif target == "caredecide" or module == "caredecide":
                continue  # the package itself: its __init__ is checked by the floors below
            else:
                theirs = floor_of(target)
                if theirs is not None and own is not None and theirs > own:
                    found.append(f"{where} (floor {own} -> floor {theirs}: points up)")
    return found


def test_every_module_has_a_floor():
    missing = [_module_name(p) for p in _sources() if floor_of(_module_name(p)) is None]
    assert missing == [], f"give these modules a floor in FLOORS: {missing}"


def test_no_import_points_up_the_floors():
    assert violations() == []


@pytest.mark.parametrize(
    ("source", "module", "expected"),
    [
        ("from ui import charts\n", "caredecide/fake.py", "never imports the app"),
        ("def f():\n    from caredecide.cli.app import MODEL_ENV\n", "ui/fake.py", "command line"),
        ("from caredecide.solvers import solve\n", "caredecide/compiled.py", "floor 1 -> floor 3"),
        ("from ..solvers import solve\n", "caredecide/modelfile/fake.py", "floor 2 -> floor 3"),
        ("from caredecide import analysis\n", "caredecide/sensitivity/x.py", "floor 4 -> floor 5"),
    ],
)
def test_the_walker_sees_an_upward_import(tmp_path, source, module, expected):
    # A tree of one file: the walker must find what it guards against, nested and relative
    # imports included.
    fake = tmp_path / module
    fake.parent.mkdir(parents=True)
    (tmp_path / "ui").mkdir(exist_ok=True)
    fake.write_text(source, encoding="utf-8")
    found = violations(tmp_path)
    assert found and all(expected in v for v in found), found


def test_a_downward_import_is_allowed(tmp_path):
    fake = tmp_path / "caredecide" / "solvers" / "x.py"
    fake.parent.mkdir(parents=True)
    (tmp_path / "ui").mkdir()
    fake.write_text("from caredecide.compiled import CompiledModel\nfrom ..model import Model\n")
    assert violations(tmp_path) == []
