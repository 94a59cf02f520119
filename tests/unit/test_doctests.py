"""The Examples sections of the core modules run as doctests."""

import doctest
import importlib

import pytest

MODULES = ["invert.geometry.disk", "invert.workflow", "invert.stages.gaussian",
           "invert.stages.mcmc.sampler"]


@pytest.mark.parametrize("name", MODULES)
def test_examples_run(name):
    # importlib: the attribute invert.stages.mcmc is the one-call function, not the package.
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0
