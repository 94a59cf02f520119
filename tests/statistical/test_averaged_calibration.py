"""Seeded calibration of the default fit (hyperparameter-averaged posterior with suspects mixed
in) over the families of truths of bench/bench_calibration.py, and its accuracy on clean rings.

The families (prior draws, a rim step along an arc, a line source just outside the rim, that
source plus a trend; each clean and with one faulty rim sensor; interior probes only; one -9999
sentinel) and their scoring are those of the bench, imported from it so that the test and the
README figures come from one computation.
"""

import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from scenarios import noisy_problem, prior_coefficients, ring_angles

from invert.stages.registry import DEFAULT_METHOD
from invert.stages.suspects import NAME_PROBABILITY
from invert.workflow import make_domain, robust_stage, run_stage

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "bench"))
import bench_calibration as bench  # noqa: E402  (the scenario families)

pytestmark = pytest.mark.slow

N_TRIALS = 40

# (family, fault, interior probes only, check the gap coverage too). The gap coverage of the
# source families and of trend + faulty, and the interior coverage of trend + faulty, are
# below 0.85 in the bench (0.75-0.84 over 40 trials; README "Calibration") and are not asserted
# here: the figure is not reached for them.
CASES = [("prior", None, False, True), ("step", None, False, True),
         ("source", None, False, False), ("trend", None, False, True),
         ("prior", "faulty", False, True), ("step", "faulty", False, False),
         ("source", "faulty", False, False), ("prior", None, True, False),
         ("prior", "sentinel", False, True)]


@pytest.mark.parametrize("kind,fault,inner_only,gap", CASES)
def test_default_fit_covers_at_the_nominal_rate(kind, fault, inner_only, gap):
    # 90 % intervals at 12 interior (and 7 gap) points per trial, 40 trials: the binomial sd of
    # the coverage is sqrt(0.09 / 480) = 0.014, about twice that with the correlation of
    # points of one field (measured spread of the bench's figures between seeds), so the band
    # 0.85-0.95 is widened by 0.03 on each side.
    bench.METHOD = DEFAULT_METHOD
    d = make_domain(1.0)
    i = bench.FAMILIES.index(kind) + (4 if fault == "faulty" else 0)
    i = 8 if inner_only else 9 if fault == "sentinel" else i
    rng = np.random.default_rng(1000 + i)  # the bench's seeds
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = [bench.trial(rng, d, kind, fault, inner_only) for _ in range(N_TRIALS)]
    interior = np.mean([r[0]["interior"][0] for r in res])
    assert 0.82 <= interior <= 0.98, interior
    if gap:
        g = np.mean([r[0]["gap"][0] for r in res])
        assert 0.82 <= g <= 0.98, g
    if fault == "sentinel":
        assert all(r[1] >= 1 for r in res)  # the sentinel is named in every run


@pytest.mark.parametrize("known", [True, False])
def test_clean_rings_no_false_alarms_and_near_bayes_optimal(known):
    # The figures: at most 5 % of clean fits name a sensor (3 of 60), and the interior
    # RMSE within 1.10x that of the posterior mean that knows s = 2, tau = 1 (and the noise:
    # the Bayes-optimal estimate for truths from this prior, Bishop 2006 §3.3). 60 trials of
    # 24 interior points give the RMSE ratio to a few per cent.
    rng = np.random.default_rng(20261203)
    d = make_domain(1.0)
    pts = np.vstack([d.from_polar(1.0, ring_angles(24)), d.from_polar(0.5, ring_angles(4))])
    test = d.from_polar(np.repeat([0.2, 0.5, 0.8], 8), np.tile(ring_angles(8), 3))
    named, err, err_best = 0, [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _ in range(60):
            c = prior_coefficients(rng, d)
            pb = noisy_problem(rng, d, pts, c, 0.05, known=known)
            est, _ = robust_stage(pb, DEFAULT_METHOD)
            sus = est.info.get("suspects", {}).get("probability", {})
            named += "robust" in est.info or any(p >= NAME_PROBABILITY for p in sus.values())
            best = run_stage(noisy_like(pb, 0.05), "gaussian", s=2.0, fix_s=True, tau=1.0)
            truth = d.design(test) @ c
            err.append(np.mean((est.values(test) - truth) ** 2))
            err_best.append(np.mean((best.values(test) - truth) ** 2))
    assert named <= 3
    assert np.sqrt(np.mean(err)) <= 1.10 * np.sqrt(np.mean(err_best))


def noisy_like(problem, sigma):
    """The same readings with their noise sd given (the oracle knows it)."""
    import dataclasses

    return dataclasses.replace(problem, sigma=np.full(problem.n_readings, sigma))
