"""The Examples blocks of the docstrings run, and say what they show."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import tempofield

# The layers whose examples are plain computations (the faces and the plugin need a screen or files).
PACKAGES = ("tempofield.kernels", "tempofield.engine", "tempofield.io", "tempofield.outputs", "tempofield.scenes")


def _modules():
    names = ["tempofield"]
    for package in PACKAGES:
        names.append(package)
        pkg = importlib.import_module(package)
        names += [f"{package}.{m.name}" for m in pkgutil.iter_modules(pkg.__path__)]
    return names


@pytest.mark.parametrize("name", _modules())
def test_docstring_examples(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE | doctest.ELLIPSIS, verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} examples in {name} failed"


def test_the_examples_are_found():
    from tempofield.kernels import rhythm

    finder = doctest.DocTestFinder()
    assert sum(len(t.examples) for t in finder.find(rhythm)) >= 5
    assert tempofield.__version__
