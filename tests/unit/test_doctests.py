"""The Examples sections of the core modules run as doctests."""

import doctest

import pytest

import invert.geometry.disk
import invert.stages.gaussian
import invert.stages.mcmc.sampler
import invert.workflow


@pytest.mark.parametrize("module", [invert.geometry.disk, invert.workflow, invert.stages.gaussian,
                                    invert.stages.mcmc.sampler])
def test_examples_run(module):
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0
