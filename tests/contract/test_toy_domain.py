"""A domain defined only here runs through fit, diagnostics, report and advice.

``FlippedDisk`` is a disk whose sine columns are multiplied by the fixed constant -1: its basis
is ``1, rho^n cos n theta, -rho^n sin n theta``. Degrees and eigenvalues are unchanged, and the
prior sd of a column scaled by c must be scaled by 1/c to give the same model; with c = +-1
the smoothness prior is already that prior (it depends on c_j only through c_j^2), so the toy
is exactly the disk's model in other coordinates, c_toy = S c_disk with S = diag(+-1). Its
fitted field at any point must therefore equal the plain disk's, to rounding.

The toy is registered with ``monkeypatch`` (invert.geometry.DOMAINS) and gets the disk's
figures through the report's class-keyed registry (it is a Disk subclass); no other module
changes.
"""

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest
from test_domains import check_all

import invert
from invert.diagnostics import advise, diagnose
from invert.geometry import DOMAINS, Disk
from invert.io.readings import Readings
from invert.problem import LinearProblem
from invert.report.html import write_report
from invert.workflow import make_domain, run_stage


@dataclass(frozen=True)
class FlippedDisk(Disk):
    """A disk whose ``b_n`` (sine) columns carry the constant factor -1."""

    kind = "flipped"

    @property
    def signs(self):
        s = np.ones(self.n_coef)
        s[2::2] = -1.0
        return s

    @property
    def coefficient_names(self):
        return ("a0",) + tuple(f"{ab}{n}" for n in range(1, self.n_modes + 1) for ab in ("a", "mb"))

    def design(self, points):
        return super().design(points) * self.signs

    def design_gradient(self, points):
        return super().design_gradient(points) * self.signs

    def design_normal_derivative(self, points):
        return super().design_normal_derivative(points) * self.signs

    def analytic(self, coef, points):  # field and conjugate go through it
        return super().analytic(np.asarray(coef, float) * self.signs, points)

    def gradient(self, coef, points):
        return super().gradient(np.asarray(coef, float) * self.signs, points)

    def rim_coefficients(self, values):
        return super().rim_coefficients(values) * self.signs


RADIUS = 1.3


def _readings(rng):
    # 24 rim sensors (four failed: blank values) and three interior probes; truth from a
    # smooth field, noise sd 0.05.
    th = 2 * np.pi * np.arange(24) / 24
    d = Disk(RADIUS, (0.0, 0.0), 5)
    pts = np.vstack([d.from_polar(1.0, th), d.from_polar([0.3, 0.5, 0.7], [0.4, 2.5, 4.4])])
    c = np.r_[20.0, 0.8 * rng.standard_normal(d.n_coef - 1) / (1 + d.degrees[1:]) ** 2]
    v = d.field(c, pts) + 0.05 * rng.standard_normal(len(pts))
    v[[5, 6, 7, 15]] = np.nan
    return pd.DataFrame({"x": pts[:, 0], "y": pts[:, 1], "value": v, "sigma": 0.05,
                         "sensor": [f"s{k}" for k in range(len(pts))]})


@pytest.fixture
def toy(monkeypatch):
    monkeypatch.setitem(DOMAINS, "flipped", FlippedDisk)
    return "flipped"


def test_toy_domain_meets_the_contract(toy, rng):
    check_all(make_domain(1.7, (0.2, -0.1), kind=toy, s=2.5, n_modes=6), toy, rng)


def test_toy_domain_gaussian_stage_extends_the_toy(toy, rng):
    # The Gaussian stage raises the truncation through domain.with_modes: the extended domain
    # stays a FlippedDisk and the fit still equals the disk's (exact sign flips: rounding,
    # 1e-10 of values ~20).
    df = _readings(rng)
    q = np.array([[0.0, 0.0], [0.4, -0.2], [-0.9, 0.5], [RADIUS, 0.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # FitWarning notes (e.g. truncation raised)
        est_t = invert.fit(df, radius=RADIUS, kind=toy, method="gaussian")
        est_d = invert.fit(df, radius=RADIUS, kind="disk", method="gaussian")
    assert type(est_t.domain) is FlippedDisk
    st, sd_ = est_t.at(q), est_d.at(q)
    np.testing.assert_allclose(st.mean, sd_.mean, rtol=0, atol=1e-10)
    np.testing.assert_allclose(st.sd, sd_.sd, rtol=0, atol=1e-10)


def test_toy_domain_fit_diagnostics_report_advice(toy, rng, tmp_path):
    df = _readings(rng)
    q = np.array([[0.0, 0.0], [0.4, -0.2], [-0.9, 0.5], [RADIUS, 0.0]])
    est_t = invert.fit(df, radius=RADIUS, kind=toy)
    est_d = invert.fit(df, radius=RADIUS, kind="disk")
    assert type(est_t.domain) is FlippedDisk
    # Same model in other coordinates: same field and sd at every point. The two fits differ
    # only by exact sign flips of columns, so they agree to rounding; 1e-10 (of values ~20).
    st, sd_ = est_t.at(q), est_d.at(q)
    np.testing.assert_allclose(st.mean, sd_.mean, rtol=0, atol=1e-10)
    np.testing.assert_allclose(st.sd, sd_.sd, rtol=0, atol=1e-10)
    np.testing.assert_allclose(est_t.mean, est_d.mean * est_t.domain.signs, atol=1e-10)

    r = Readings.from_frame(df)
    out = {}
    for kind in (toy, "disk"):
        pb = LinearProblem.from_readings(r, make_domain(RADIUS, kind=kind))
        est = run_stage(pb, "tikhonov", rule="evidence")
        with warnings.catch_warnings():
            # diagnose may warn (ModelCheckWarning); these checks do not depend on it.
            warnings.simplefilter("ignore")
            diag = diagnose(est, pb, threshold=20.5, rng=0)
        out[kind] = (pb, est, diag, advise(est, pb, count=3))
    (pb, est, diag, adv), (_, _, ddiag, dadv) = out[toy], out["disk"]
    # Diagnostics computed through the toy equal the disk's (the same model, to rounding).
    assert diag.check.chi2 == pytest.approx(ddiag.check.chi2, rel=1e-10)
    assert diag.check.source_stat == pytest.approx(ddiag.check.source_stat, rel=1e-8)
    np.testing.assert_allclose(diag.gaps.share, ddiag.gaps.share, atol=1e-12)
    np.testing.assert_allclose(diag.resolution.variance_ratio,
                               ddiag.resolution.variance_ratio, atol=1e-10)
    # The maximum over the rim from 4000 draws: different draws (the covariance root differs by
    # signs), so the probabilities agree within Monte-Carlo error (4 binomial sd of each).
    mx, dmx = diag.max_exceed, ddiag.max_exceed
    assert abs(mx.probability - dmx.probability) <= 4 * np.hypot(mx.mc_se, dmx.mc_se) + 1e-12
    # Advice: the same gains (they depend on the model only), 1e-10 relative.
    assert adv.target_before == pytest.approx(dadv.target_before, rel=1e-10)
    np.testing.assert_allclose(adv.reduction, dadv.reduction, rtol=1e-8)
    np.testing.assert_allclose(adv.points, dadv.points, atol=1e-12)
    # The report: the disk's figures through the class-keyed registry (MRO lookup).
    path = write_report(tmp_path, est, pb, r, threshold=20.5, diagnostics=diag)
    assert path.exists() and (tmp_path / "rim_profile.png").exists()
    assert "Model check" in path.read_text(encoding="utf-8")

