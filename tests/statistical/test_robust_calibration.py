"""Seeded checks of the robust default fit: no false alarms, no lost accuracy, faults found.

Truths are drawn from the smoothness prior (tests/scenarios.py); the readings are a ring of 24
rim sensors and 4 interior probes. Tolerances come from the number of trials (binomial sd).
"""

import dataclasses
import warnings

import numpy as np
import pytest
from scenarios import noisy_problem, prior_coefficients, ring_angles

from invert.workflow import make_domain, robust_stage, run_stage

pytestmark = pytest.mark.slow

N_TRIALS = 60


def _ring(d):
    return np.vstack([d.from_polar(1.0, ring_angles(24)), d.from_polar(0.5, ring_angles(4))])


def _interior(d):
    return d.from_polar(np.repeat([0.2, 0.5, 0.8], 8), np.tile(ring_angles(8), 3))


@pytest.mark.parametrize("known", [True, False])
def test_clean_rings_raise_no_false_alarms_and_lose_no_accuracy(known):
    # The figures: at most 5 % of clean fits name a sensor, and the interior RMSE is
    # within 5 % of the ordinary fit's. Under the model the leave-one-out |z| exceeds the
    # naming level (|z| ~ 3.9, fault probability 0.9) for about 1e-4 of readings, i.e. about
    # 0.3 % of rings of 28. The limit allows 3 of 60 fits (5 %); the expected count is 0.2, so
    # P(more than 3) is below 1e-4 (Poisson).
    rng = np.random.default_rng(20261203)
    d = make_domain(1.0)
    pts, test = _ring(d), _interior(d)
    named, err_r, err_o = 0, [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _ in range(N_TRIALS):
            c = prior_coefficients(rng, d)
            pb = noisy_problem(rng, d, pts, c, 0.05, known=known)
            ordinary = run_stage(pb, "tikhonov", rule="evidence")
            est, _ = robust_stage(pb, "tikhonov", rule="evidence")
            named += "robust" in est.info
            truth = d.design(test) @ c
            err_r.append(np.mean((est.at(test).mean - truth) ** 2))
            err_o.append(np.mean((ordinary.at(test).mean - truth) ** 2))
    assert named <= 3
    assert np.sqrt(np.mean(err_r)) <= 1.05 * np.sqrt(np.mean(err_o))


def test_one_faulty_rim_sensor_is_found_and_accuracy_recovers():
    # One rim sensor offset by 15 noise sd: its leave-one-out |z| is about 15/sqrt(1 + v/s^2)
    # > 10, far past the naming level, so it should be named in (nearly) every trial; 57 of 60
    # allows a few rings where the prior draw makes the sensor hard to predict (binomial:
    # with a true rate of 0.99 more than 3 misses has probability 0.003). The robust interior
    # error must beat the ordinary fit's, which spreads the offset over the field.
    rng = np.random.default_rng(7)
    d = make_domain(1.0)
    pts, test = _ring(d), _interior(d)
    found, err_r, err_o = 0, [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for k in range(N_TRIALS):
            c = prior_coefficients(rng, d)
            pb = noisy_problem(rng, d, pts, c, 0.05)
            j = k % 24
            y = pb.y.copy()
            y[j] += 15 * 0.05 * (1 if k % 2 else -1)
            bad = dataclasses.replace(pb, y=y)
            ordinary = run_stage(bad, "tikhonov", rule="evidence")
            est, _ = robust_stage(bad, "tikhonov", rule="evidence")
            rob = est.info.get("robust", {})
            found += str(pb.sensor[j]) in {**rob.get("faulty", {}), **rob.get("gross_errors", {})}
            truth = d.design(test) @ c
            err_r.append(np.mean((est.at(test).mean - truth) ** 2))
            err_o.append(np.mean((ordinary.at(test).mean - truth) ** 2))
    assert found >= 57
    assert np.mean(err_r) < np.mean(err_o)
