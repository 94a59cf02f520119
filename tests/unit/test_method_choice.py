"""Which stage a fit uses when no method is named (one rule for the command line and Python)."""

from invert.stages.registry import DEFAULT_METHOD, method_for


def test_tikhonov_options_name_the_tikhonov_stage():
    assert method_for(None, {}) == DEFAULT_METHOD == "averaged"
    assert method_for(None, {"rule": None, "lam": None}) == "averaged"
    assert method_for(None, {"rule": "gcv"}) == "tikhonov"
    assert method_for(None, {"lam": 0.1, "noise_sd": 0.05}) == "tikhonov"
    assert method_for("gaussian", {"rule": "gcv"}) == "gaussian"  # the caller then refuses it
