"""Every docstring example in Seawall runs, and each module this finds has examples that ran.

The modules are found by their source (a line with ``>>>``), so a new example
is checked without anyone listing it here; a module whose examples stopped
being collected fails instead of passing with none attempted.
"""
from __future__ import annotations

import doctest
import importlib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def _modules_with_examples() -> list[str]:
    found = []
    for package in ("model", "worker", "ops"):
        for path in sorted((ROOT / package).rglob("*.py")):
            if ">>> " in path.read_text(encoding="utf-8"):
                found.append(".".join(path.relative_to(ROOT).with_suffix("").parts))
    return found


MODULES = _modules_with_examples()


def test_the_search_finds_the_modules_known_to_have_examples():
    assert {"model.tokens", "model.normalization", "model.hashing", "worker.routing", "worker.verdicts"} <= set(MODULES)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    result = doctest.testmod(importlib.import_module(name), optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0, f"{name}: no example was collected"
    assert result.failed == 0
