"""The registry of inference stages: the one map from method names to stage classes.

The assembly layer (:mod:`invert.workflow`) and the command line's ``--method`` choices read
it. A stage class registered here provides

``from_settings(*, s, seed, **options)``
    a classmethod building the stage from the workflow's common settings (the smoothness
    order ``s`` given on the command line, the random ``seed``) and its own options;
``lowest_s()``
    the roughest smoothness order the stage will try, for which the assembly layer sizes the
    truncation degree (None: the stage works with the truncation it is given);
``fit(problem)``
    returning an :class:`~invert.problem.Estimate`.

A new stage is one new module and one entry in :data:`STAGES`.
"""

from __future__ import annotations

from types import MappingProxyType

from .averaged import AveragedPosterior
from .gaussian import GaussianPosterior
from .mcmc import MCMCSampler
from .tikhonov import Tikhonov

__all__ = ["STAGES", "stage_names", "DEFAULT_METHOD", "method_for"]

#: Method name -> stage class, in the order the command line lists them.
STAGES = MappingProxyType({
    "tikhonov": Tikhonov,
    "gaussian": GaussianPosterior,
    "averaged": AveragedPosterior,
    "mcmc": MCMCSampler,
})


#: The stage of ``fit``, ``demo`` and ``advise`` when no method is named: the posterior averaged
#: over the hyperparameters, with gross errors left out and doubtful readings mixed in
#: (chosen by measurement, ``bench/bench_calibration.py``; README "Calibration").
DEFAULT_METHOD = "averaged"


#: Options that belong to the Tikhonov stage: naming one without a method names that stage.
TIKHONOV_OPTIONS = ("rule", "lam", "noise_sd")


def method_for(method, options):
    """Return ``method``, or when None the stage the ``options`` imply.

    ``tikhonov`` when one of :data:`TIKHONOV_OPTIONS` is set (not None) in ``options``, else
    :data:`DEFAULT_METHOD`. The command line, ``run_fit`` and ``invert.fit`` all decide here.
    """
    if method is not None:
        return method
    given = {k for k, v in dict(options).items() if v is not None}
    return "tikhonov" if given & set(TIKHONOV_OPTIONS) else DEFAULT_METHOD


def stage_names() -> tuple:
    """Return the registered method names, in registry order."""
    return tuple(STAGES)
