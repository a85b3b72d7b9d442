"""Docstring examples and the Markdown docs run as tests (so documentation cannot drift from the code)."""

from __future__ import annotations

import doctest
import importlib
import pkgutil
from pathlib import Path

import numpy as np
import pytest

import gradcheck

ROOT = Path(__file__).resolve().parents[1]
MODULES = sorted(m.name for m in pkgutil.walk_packages(gradcheck.__path__, "gradcheck.")
                 if m.name != "gradcheck._tools.pytest_plugin")
DOCS = sorted([ROOT / "README.md", *ROOT.glob("docs/*.md")])


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, extraglobs={"np": np}, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0


@pytest.mark.parametrize("path", DOCS, ids=lambda p: p.name)
def test_markdown_examples(path):
    result = doctest.testfile(str(path), module_relative=False, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0
