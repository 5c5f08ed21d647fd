"""The three layers: hedge_env (the problem) <- agents (who decides) <- rehedge (the desk's
application). Every import, at module level or inside a function, points down only."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
LAYERS = ("hedge_env", "agents", "rehedge")  # bottom to top


def imported_packages(path: Path) -> set[str]:
    """The top-level package of every import in a module (relative imports count as its own)."""
    own = path.relative_to(ROOT).parts[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            found.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            found.add(own if node.level else (node.module or "").split(".")[0])
    return found


@pytest.mark.parametrize("layer", LAYERS)
def test_every_module_imports_only_its_own_layer_and_those_below(layer):
    above = set(LAYERS[LAYERS.index(layer) + 1:])
    modules = sorted((ROOT / layer).rglob("*.py"))
    assert modules
    wrong = {str(path.relative_to(ROOT)): sorted(imported_packages(path) & above) for path in modules}
    assert {module: packages for module, packages in wrong.items() if packages} == {}


def test_the_check_sees_an_upward_import(tmp_path, monkeypatch):
    # The test above must be able to fail: a module of agents that imports rehedge is caught.
    package = tmp_path / "agents"
    package.mkdir()
    (package / "bad.py").write_text("def f():\n    from rehedge.config import load_config\n")
    monkeypatch.setattr(__import__(__name__, fromlist=["ROOT"]), "ROOT", tmp_path)
    assert imported_packages(package / "bad.py") & {"rehedge"} == {"rehedge"}
