"""rim-invert batch on an annulus: static frames equal ``fit`` per frame; assimilation is sane.

The log (synthetic, invented here): a pipe wall, bore 50 mm, outside 80 mm, 16 thermocouples on
the outer surface, 6 in the bore and 2 drilled into the wall, given as r,theta_deg in the
layout; the outer level swings slowly, the bore cools linearly, a cos(theta) pattern on the
outer rim fades in and out; 5 % random drop-outs and a 30-frame outage of four outer sensors.
Oracles: ``rim-invert fit --domain annulus --lam --noise-sd`` on each frame (itself checked
against closed forms in tests/reference/test_annulus.py), and the known true field for the
coverage of the smoothed intervals.
"""

import numpy as np
import pandas as pd
import pytest

import invert
from invert.cli import main, run_fit
from invert.geometry import Annulus

A, B = 0.05, 0.08
N_FRAMES = 200


def _truth(t):
    # rim-function coefficients (o_a0, i_a0, o_a1) of frame time t
    return 60 + 2 * np.sin(t / 30), 180 - 0.05 * t, 4 * np.cos(t / 50)


@pytest.fixture(scope="module")
def wall_log(tmp_path_factory):
    rng = np.random.default_rng(3)
    d = Annulus(B, A, n_modes=4)
    rho = np.r_[np.ones(16), np.full(6, A / B), [0.8, 0.8]]
    th = np.r_[2 * np.pi * np.arange(16) / 16, 2 * np.pi * (np.arange(6) + 0.5) / 6, [0.5, 3.5]]
    pts = d.from_polar(rho, th)
    sensors = [f"o{k}" for k in range(16)] + [f"i{k}" for k in range(6)] + ["w0", "w1"]
    t = np.arange(N_FRAMES, dtype=float)
    Y = np.empty((N_FRAMES, len(pts)))
    for k in range(N_FRAMES):
        c = np.zeros(d.n_coef)
        c[:3] = _truth(t[k])
        Y[k] = d.field(c, pts) + 0.1 * rng.standard_normal(len(pts))
    Y[rng.random(Y.shape) < 0.05] = np.nan
    Y[50:80, 3:7] = np.nan
    folder = tmp_path_factory.mktemp("wall_log")
    pd.DataFrame({"sensor": sensors, "r": rho * B, "theta_deg": np.rad2deg(th)}).to_csv(
        folder / "layout.csv", index=False)
    log = pd.DataFrame(Y, columns=sensors)
    log.insert(0, "time", t)
    log.to_csv(folder / "log.csv", index=False)
    return folder, pts, sensors, log


def _batch(folder, out, *extra):
    return main(["batch", str(folder / "log.csv"), "--layout", str(folder / "layout.csv"),
                 "--domain", "annulus", "--radius", str(B), "--inner-radius", str(A),
                 "--out", str(out), "--format", "csv", "--chunk-rows", "64", *extra])


def test_static_annulus_batch_equals_fit_per_frame(wall_log, tmp_path):
    # Same fixed parameters in both: batch frames must equal `rim-invert fit --domain annulus
    # --lam --noise-sd` on the frame's readings to 1e-10 (algebra: the same factorisation,
    # written as a matrix on y).
    folder, pts, sensors, log = wall_log
    lam, noise_sd = 0.01, 0.1
    out = tmp_path / "b"
    assert _batch(folder, out, "--lam", str(lam), "--noise-sd", str(noise_sd)) == 0
    q = pd.read_csv(out / "query.csv")
    frames = pd.read_csv(out / "frames.csv")
    assert len(frames) == N_FRAMES and (frames["status"] == "ok").all()
    # default query points: the annulus's reference points (mid-wall at 0 and 180 degrees)
    assert list(q["label"][:2]) == ["mid-wall, θ = 0°", "mid-wall, θ = 180°"]
    for k in (0, 60, 150):  # a full-ish frame, one inside the outage, a late one
        row = log.iloc[k]
        rd = tmp_path / f"r{k}.csv"
        pd.DataFrame({"sensor": sensors, "x": pts[:, 0], "y": pts[:, 1],
                      "value": [row[s] for s in sensors]}).to_csv(rd, index=False)
        fit_out = tmp_path / f"f{k}"
        run_fit(rd, radius=B, out=fit_out, figures=False, domain="annulus", inner_radius=A,
                stage_options={"rule": "fixed", "lam": lam, "noise_sd": noise_sd},
                say=lambda *_: None)
        ref = pd.read_csv(fit_out / "boundary.csv")
        got = q[q["time"] == float(row["time"])].reset_index(drop=True)
        # the same fit through the library, at full precision (CSV cells keep 10 digits)
        est = invert.fit(pd.read_csv(rd), radius=B, kind="annulus", inner_radius=A,
                         rule="fixed", lam=lam, noise_sd=noise_sd)
        refp = np.array([p for _, p in est.domain.reference_points()])
        refq = est.at(refp, 0.9)
        for col in ("mean", "sd", "lower", "upper"):
            np.testing.assert_allclose(got[col], getattr(refq, col), rtol=1e-10, atol=1e-10)
        # frames' first mean column is coefficient 0, the outer rim's mean level: the mean of
        # fit's outer boundary profile over its 360 equally spaced angles (exact for a
        # trigonometric polynomial of degree < 360); rel 1e-9 for the CSV's 10 digits
        fr = frames[frames["frame"] == k].iloc[0]
        outer = ref[ref["rim"] == "outer"]["mean"].mean()
        assert fr["centre_mean"] == pytest.approx(outer, rel=1e-9)
        assert fr["centre_mean"] == pytest.approx(est.mean[0], rel=1e-10)
        assert fr["n_used"] == int(np.isfinite(row[sensors].astype(float)).sum())


def test_assimilated_annulus_batch_covers_the_drifting_truth(wall_log, tmp_path):
    folder, _, _, _ = wall_log
    out_s, out_a = tmp_path / "s", tmp_path / "a"
    assert _batch(folder, out_s) == 0
    assert _batch(folder, out_a, "--assimilate") == 0
    qa, qs = pd.read_csv(out_a / "query.csv"), pd.read_csv(out_s / "query.csv")
    frames = pd.read_csv(out_a / "frames.csv")
    assert len(frames) == N_FRAMES and (frames["status"] == "ok").all()
    d = Annulus(B, A, n_modes=2)
    ref = np.array([p for _, p in d.reference_points()])
    truth = []
    for t in qa["time"].unique():
        c = np.zeros(d.n_coef)
        c[:3] = _truth(t)
        truth.append(d.field(c, ref))
    truth = np.ravel(truth)
    inside = (qa["lower"] <= truth) & (truth <= qa["upper"])
    # 400 correlated (frame, point) pairs of a smooth truth; the 90 % intervals should cover
    # at least 85 % (a loose floor: smoothed errors are correlated over the time scale, so the
    # binomial sd of 1.5 % understates the spread), and the smoother, which pools frames, gives
    # narrower intervals than the per-frame fits on average.
    assert inside.mean() >= 0.85
    assert qa["sd"].mean() < qs["sd"].mean()
    assert np.abs(qa["mean"] - truth).mean() < 2 * qa["sd"].mean()


def test_annulus_batch_bad_input_is_one_line(wall_log, tmp_path, capsys):
    folder, _, _, _ = wall_log
    out = tmp_path / "x"
    code = main(["batch", str(folder / "log.csv"), "--layout", str(folder / "layout.csv"),
                 "--domain", "annulus", "--radius", str(B), "--out", str(out)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and err == "rim-invert: error: --domain annulus needs --inner-radius"
    lay = pd.read_csv(folder / "layout.csv")
    lay.loc[7, "r"] = 0.5 * A  # a sensor in the bore: row 9 of the file (header is row 1)
    bad = tmp_path / "layout.csv"
    lay.to_csv(bad, index=False)
    code = main(["batch", str(folder / "log.csv"), "--layout", str(bad), "--domain", "annulus",
                 "--radius", str(B), "--inner-radius", str(A), "--out", str(out)])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "layout.csv" in err[0] and "row 9" in err[0] \
        and "inside the bore" in err[0]
    assert not out.exists()
