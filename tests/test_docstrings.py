"""Every example in the library's docstrings runs and prints what it says (doctest)."""

from __future__ import annotations

import doctest
import importlib
import pkgutil
import warnings

import numpy as np
import pytest

import fieldfix


def _modules():
    for info in pkgutil.walk_packages(fieldfix.__path__, "fieldfix."):
        yield info.name


@pytest.mark.parametrize("name", sorted(_modules()))
def test_docstring_examples(name):
    module = importlib.import_module(name)
    finder = doctest.DocTestFinder(exclude_empty=True)
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)  # an example must not overflow or divide by zero
        for test in finder.find(module, name, globs={"np": np, **vars(module)}):
            runner.run(test)
    results = runner.summarize(verbose=False)
    assert results.failed == 0, f"{results.failed} of {results.attempted} examples in {name} failed (see above)"
