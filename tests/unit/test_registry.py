"""The stage registry drives the workflow, the command line and the documentation of fit."""

import inspect

import pytest

from invert import workflow
from invert.cli import build_parser
from invert.stages.registry import STAGES, stage_names


def _method_choices(parser, command):
    sub = next(a for a in parser._actions if a.dest == "command")
    return next(a.choices for a in sub.choices[command]._actions if a.dest == "method")


def test_cli_choices_and_workflow_methods_come_from_the_registry():
    # argparse is the outside reference: what the parser accepts is what the registry lists.
    parser = build_parser()
    for command in ("fit", "demo", "advise"):
        assert list(_method_choices(parser, command)) == list(stage_names())
    assert workflow.METHODS == stage_names()


def test_fit_documents_every_method():
    doc = inspect.getdoc(workflow.fit)
    for name in stage_names():
        assert f'"{name}"' in doc


@pytest.mark.parametrize("name", list(STAGES))
def test_each_stage_declares_what_the_assembly_layer_needs(name):
    cls = STAGES[name]
    stage = cls.from_settings(s=2.5, seed=1)
    assert callable(stage.fit)
    low = stage.lowest_s()
    # A stage either uses the truncation it is given (None) or names its roughest s.
    assert low is None or low > 0.5


def test_unknown_method_is_refused():
    with pytest.raises(ValueError, match="'method' parameter"):
        workflow.make_stage("nope")
