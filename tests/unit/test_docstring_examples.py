"""The examples in the detectors' docstrings run and print what they say."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import detectors

MODULES = sorted(
    info.name for info in pkgutil.walk_packages(detectors.__path__, prefix="detectors.")
)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name: str) -> None:
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0, f"{result.failed} of {result.attempted} examples failed in {name}"
