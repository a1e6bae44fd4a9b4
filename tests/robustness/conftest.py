"""Fixtures of the robustness tests: the corpus of bad inputs.

``tests/robustness/make_corpus.py`` is loaded by its path (the suite runs
with ``--import-mode=importlib``, so test folders are not packages); other
test folders (the app's error-dialog tests) can use :func:`load_make_corpus`
the same way, or copy its three lines.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

_MODULE = "gyrometer_tests_make_corpus"


def load_make_corpus():
    """The ``make_corpus`` module (loaded once per process)."""
    if _MODULE not in sys.modules:
        spec = importlib.util.spec_from_file_location(
            _MODULE, Path(__file__).with_name("make_corpus.py"))
        module = importlib.util.module_from_spec(spec)
        sys.modules[_MODULE] = module  # dataclasses look the module up
        spec.loader.exec_module(module)
    return sys.modules[_MODULE]


@pytest.fixture(scope="session")
def make_corpus():
    """The corpus builder module."""
    return load_make_corpus()


@pytest.fixture(scope="session")
def corpus(tmp_path_factory, make_corpus):
    """Every corpus case by name, written once per test session."""
    folder = tmp_path_factory.mktemp("corpus")
    return {case.name: case for case in make_corpus.build_corpus(folder)}


@pytest.fixture(scope="session")
def tolerated(tmp_path_factory, make_corpus):
    """Odd-but-valid cubes: name -> (path, expected data)."""
    return make_corpus.build_tolerated(tmp_path_factory.mktemp("tolerated"))
