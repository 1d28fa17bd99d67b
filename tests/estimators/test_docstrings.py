"""The Examples sections of the estimator docstrings run as doctests."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import counterbid.estimators as package

MODULES = sorted(m.name for m in pkgutil.iter_modules(package.__path__, package.__name__ + "."))


@pytest.mark.parametrize("name", MODULES)
def test_examples_run(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE, verbose=False)
    assert result.failed == 0, f"{result.failed} doctest example(s) failed in {name}"
