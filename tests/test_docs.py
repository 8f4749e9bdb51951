"""Docs that run: the docstring examples of the pure layers are executed."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import quietwell.analysis
import quietwell.physics


def _modules():
    for pkg in (quietwell.physics, quietwell.analysis):
        for info in pkgutil.iter_modules(pkg.__path__, pkg.__name__ + "."):
            yield info.name


@pytest.mark.parametrize("name", sorted(_modules()))
def test_docstring_examples_run(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0, f"{result.failed} docstring example(s) of {name} failed"
