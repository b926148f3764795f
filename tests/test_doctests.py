"""The docstring examples of the public modules run (river-style runnable examples)."""

import doctest
import importlib

import pytest

MODULES = ["normaliser", "subspace", "validation", "projection", "shrinkage", "lasso", "refit", "thresholds",
           "decision", "probation", "window", "detector", "dictionary", "mmv", "pcp", "baselines", "reference"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(f"shiftsieve.models.{name}")
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0   # every listed module has a runnable example
