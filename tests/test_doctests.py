"""The examples in the docstrings of the maths modules run and give what they show."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = [
    "audit.designs._binary",
    "audit.designs._margin",
    "audit.designs._power",
    "audit.designs.cluster",
    "audit.designs.correlation",
    "audit.designs.proportions",
    "audit.designs.survival",
    "audit.designs.variance",
    "audit.hypotheses",
    "audit.numbers",
    "audit.pipeline",
    "audit.portfolio",
]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    result = doctest.testmod(importlib.import_module(name), optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0 and result.failed == 0
