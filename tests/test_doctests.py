"""The docstring examples of the public modules run (river-style runnable examples)."""

import doctest
import importlib

import pytest

MODULES = ["normaliser", "subspace", "lasso", "decision", "detector", "dictionary"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(f"shiftsieve.models.{name}")
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0
