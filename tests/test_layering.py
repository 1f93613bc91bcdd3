"""Imports point one way: nothing imports the CLI, and stats and render never import each other."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "planner"


def _imports(path: Path) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names |= {alias.name for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
            names |= {f"{node.module}.{alias.name}" for alias in node.names}
    return names


@pytest.mark.parametrize("sub,forbidden", [("stats", "planner.render"),
                                           ("render", "planner.stats")])
def test_stats_and_render_stay_apart(sub, forbidden):
    for path in (PACKAGE / sub).glob("*.py"):
        assert not any(n.startswith(forbidden) for n in _imports(path)), path.name


def test_nothing_imports_the_cli():
    for path in PACKAGE.rglob("*.py"):
        if path.name not in ("cli.py", "__main__.py"):
            assert "planner.cli" not in _imports(path), path


def test_render_does_not_import_evaluate():
    # The unblinded-results type lives in planner.results, below both: evaluate imports
    # render to write the report, and render never imports evaluate back.
    for path in (PACKAGE / "render").glob("*.py"):
        assert not any(n == "planner.evaluate" or n.startswith("planner.evaluate.")
                       for n in _imports(path)), path.name
