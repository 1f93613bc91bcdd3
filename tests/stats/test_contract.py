"""Contract of the stats modules: every method module has evaluate and SOURCE; __all__ holds."""

from __future__ import annotations

import importlib
import pkgutil

import pytest

import planner.stats

MODULES = sorted(m.name for m in pkgutil.iter_modules(planner.stats.__path__))
METHODS = [m for m in MODULES if not m.startswith("_")]


def test_the_expected_method_modules_exist():
    assert set(METHODS) >= {"anova", "gauge_rr", "iso5725_2", "iso13528"}


@pytest.mark.parametrize("name", METHODS)
def test_method_module_has_evaluate_and_source(name):
    module = importlib.import_module(f"planner.stats.{name}")
    assert callable(module.evaluate)
    assert isinstance(module.SOURCE, str) and len(module.SOURCE) > 20
    assert "evaluate" in module.__all__ and "SOURCE" in module.__all__


@pytest.mark.parametrize("name", [""] + MODULES)
def test_every_name_in_all_exists(name):
    module = importlib.import_module("planner.stats" + (f".{name}" if name else ""))
    assert module.__all__, name
    missing = [n for n in module.__all__ if not hasattr(module, n)]
    assert missing == []
