"""The docstring examples of every module in ``models`` run and pass (also covered by
``python -m pytest --doctest-modules models``; this keeps them in the default test run)."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import models

MODULES = sorted(["models"] + [f"models.{m.name}" for m in pkgutil.iter_modules(models.__path__)])


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name: str) -> None:
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert result.failed == 0
    assert result.attempted > 0, f"{name} has no runnable example"
