"""rim-invert batch: static per-frame inversion, statuses of bad rows, inputs and errors.

Oracle for the numbers: ``rim-invert fit`` on each frame with the same fixed parameters
(``--lam``/``--noise-sd``), itself checked against closed forms in the core tests; the pooled
evidence against the per-frame evidence rule on one frame.
"""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from invert.batch.runner import StaticInverter, pooled_evidence_fit, run_batch
from invert.cli import main, run_fit
from invert.prior import SmoothnessPrior
from invert.stages import Tikhonov
from invert.workflow import make_domain

DATA = Path(__file__).resolve().parents[2] / "datasets"
LOG, LAYOUT = DATA / "demo_log.csv", DATA / "demo_layout.csv"


@pytest.fixture
def query(tmp_path):
    q = tmp_path / "points.csv"
    q.write_text("label,x,y\ncentre,0,0\nnear_rim,0.2,0.05\nprobe,-0.08,0.06\n")
    return q


def _layout():
    df = pd.read_csv(LAYOUT, comment="#")
    return df


def test_static_batch_equals_fit_per_frame(tmp_path, query):
    # Same fixed parameters in both: batch frames must equal `rim-invert fit --lam --noise-sd`
    # on the frame's readings to 1e-10 (algebra: the same SVD, written as a matrix on y).
    lam, noise_sd = 0.02, 0.05
    out = tmp_path / "b"
    assert main(["batch", str(LOG), "--layout", str(LAYOUT), "--radius", "0.25", "--out",
                 str(out), "--query", str(query), "--lam", str(lam), "--noise-sd",
                 str(noise_sd), "--format", "csv", "--chunk-rows", "128"]) == 0
    q = pd.read_csv(out / "query.csv")
    frames = pd.read_csv(out / "frames.csv")
    lay = _layout()
    log = pd.read_csv(LOG, comment="#", dtype=str)
    # a full frame, frames inside drop-out episodes, the frame after the time gap
    okf = frames[frames["status"] == "ok"].set_index("frame")["n_used"]
    picks = [0, int(okf[okf < 18].index[0]), int(okf[okf < 18].index[-1]), 301]
    for k in picks:
        row = log.iloc[k]
        rd = tmp_path / f"r{k}.csv"
        vals = ["" if pd.isna(row[s]) else row[s] for s in lay["sensor"]]
        pd.DataFrame({"sensor": lay["sensor"], "x": lay["x"], "y": lay["y"],
                      "value": vals}).to_csv(rd, index=False)
        fit_out = tmp_path / f"f{k}"
        run_fit(rd, radius=0.25, out=fit_out, query=query, figures=False,
                stage_options={"rule": "fixed", "lam": lam, "noise_sd": noise_sd},
                say=lambda *_: None)
        ref = pd.read_csv(fit_out / "query.csv")
        t = float(row["time"])
        got = q[q["time"] == t].reset_index(drop=True)
        assert list(got["label"]) == list(ref["label"])
        for col in ("mean", "sd", "lower", "upper"):
            np.testing.assert_allclose(got[col], ref[col], rtol=1e-10, atol=1e-10)
        # the centre value is the mean level a0 (mean-value property, Evans PDE §2.2)
        fr = frames[frames["frame"] == k].iloc[0]
        assert fr["centre_mean"] == pytest.approx(ref["mean"][0], rel=1e-10)
        assert fr["n_used"] == sum(v != "" for v in vals)


def test_bad_rows_get_statuses_and_the_rest_is_unchanged(tmp_path):
    # datasets/demo_log.csv carries a text cell (record 100), a record with no readings (200),
    # an unparseable time (300) and a duplicated record (401). Each gets a status; the other
    # frames equal a run on a log holding only them (frames are independent in static mode).
    out = tmp_path / "b"
    run_batch(LOG, LAYOUT, radius=0.25, out=out, lam=0.02, noise_sd=0.05, fmt="csv",
              chunk_rows=100, say=lambda *_: None)
    fr = pd.read_csv(out / "frames.csv")
    lines = [ln for ln in LOG.read_text().splitlines(keepends=True) if not ln.startswith("#")]
    n_records = len(lines) - 1
    assert len(fr) == n_records and fr["frame"].is_unique
    st = fr.set_index("frame")
    assert st.loc[100, "status"] == "rejected" and "non-numeric" in st.loc[100, "reason"]
    assert "'open'" in st.loc[100, "reason"]
    assert st.loc[200, "status"] == "no-data"
    # the reason keeps the cell's text, so the user can find and mend it
    assert st.loc[300, "status"] == "rejected"
    assert st.loc[300, "reason"] == "unparseable time '12:00?'"
    assert st.loc[401, "status"] == "rejected" and st.loc[401, "reason"] == "duplicate time"
    assert (fr["status"] == "ok").sum() == n_records - 4
    # clean log with only the good records
    keep = [lines[0]] + [lines[i + 1] for i in st.index[st["status"] == "ok"]]
    clean = tmp_path / "clean.csv"
    clean.write_text("".join(keep))
    out2 = tmp_path / "c"
    run_batch(clean, LAYOUT, radius=0.25, out=out2, lam=0.02, noise_sd=0.05, fmt="csv",
              say=lambda *_: None)
    a = pd.read_csv(out / "query.csv")
    b = pd.read_csv(out2 / "query.csv")
    np.testing.assert_array_equal(a["time"], b["time"])
    np.testing.assert_allclose(a["mean"], b["mean"], rtol=1e-12)
    np.testing.assert_allclose(a["sd"], b["sd"], rtol=1e-12)


def test_parquet_log_and_output_equal_csv(tmp_path):
    # the same frames from a Parquet log (typed columns) give the same numbers
    df = pd.read_csv(LOG, comment="#", dtype=str)
    ok = df.drop(index=[100, 300]).drop_duplicates("time")
    num = ok.astype(float)
    pq_log = tmp_path / "log.parquet"
    num.to_parquet(pq_log, index=False)
    csv_log = tmp_path / "log.csv"
    num.to_csv(csv_log, index=False)
    kw = dict(radius=0.25, lam=0.02, noise_sd=0.05, say=lambda *_: None)
    run_batch(pq_log, LAYOUT, out=tmp_path / "p", fmt="parquet", **kw)
    run_batch(csv_log, LAYOUT, out=tmp_path / "c", fmt="csv", **kw)
    a = pd.read_parquet(tmp_path / "p" / "query.parquet")
    b = pd.read_csv(tmp_path / "c" / "query.csv")
    np.testing.assert_allclose(a["mean"].to_numpy(), b["mean"].to_numpy(), rtol=1e-12)
    fa = pd.read_parquet(tmp_path / "p" / "frames.parquet")
    assert list(fa.columns) == ["time", "frame", "status", "reason", "n_used", "centre_mean",
                                "centre_sd", "chi2"]
    assert len(fa) == len(num)


def test_pooled_evidence_on_one_frame_equals_evidence_rule():
    # With a single frame the pooled evidence is the evidence rule of Tikhonov (Bishop 2006
    # §3.5, profiled noise); both optimisers stop at xatol 1e-6 in log lam -> rel 1e-4.
    rng = np.random.default_rng(5)
    dom = make_domain(1.0)
    th = np.sort(rng.uniform(0, 2 * np.pi, 30))
    pts = np.c_[np.cos(th), np.sin(th)]
    G = dom.design(pts)
    d = np.sqrt(SmoothnessPrior(s=2.0).shape(dom.eigenvalues, dom.degrees))
    c = d * rng.standard_normal(dom.n_coef)
    c[0] = 5.0
    y = G @ c + 0.1 * rng.standard_normal(30)
    lam, nsd = pooled_evidence_fit(G, y[None, :], None, d)
    from invert.problem import LinearProblem

    problem = LinearProblem(G, y, None, dom.degrees, dom.eigenvalues, dom)
    est = Tikhonov("evidence").fit(problem)
    assert lam == pytest.approx(est.info["lam"], rel=1e-4)
    # profiled noise variance y~' C^-1 y~ / m at the chosen lam (Spectrum.ml_noise_var)
    from invert.stages._spectrum import Spectrum

    assert nsd**2 == pytest.approx(Spectrum(problem, d).ml_noise_var(lam)[0], rel=1e-10)
    assert 0.05 < nsd < 0.2  # true noise sd 0.1


def test_static_inverter_shares_factorisations():
    # frames with the same drop-out pattern reuse one factorisation
    dom = make_domain(1.0)
    th = np.linspace(0, 2 * np.pi, 12, endpoint=False)
    inv = StaticInverter(dom, np.c_[np.cos(th), np.sin(th)], None, 0.1, 0.1, [[0.0, 0.0]])
    Y = np.ones((50, 12))
    Y[::2, 3] = np.nan
    inv.solve(Y)
    assert inv.n_factorised == 2


def test_unknown_sensor_column_is_exit_2(tmp_path, capsys):
    log = tmp_path / "log.csv"
    log.write_text("time,tc00,zz9\n0,1,2\n")
    code = main(["batch", str(log), "--layout", str(LAYOUT), "--radius", "0.25", "--out",
                 str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 2
    assert "log.csv" in err and "zz9" in err and "not in the layout" in err
    assert not (tmp_path / "o" / "frames.parquet").exists()


def test_lam_without_noise_sd_is_exit_2(tmp_path, capsys):
    code = main(["batch", str(LOG), "--layout", str(LAYOUT), "--radius", "0.25", "--out",
                 str(tmp_path / "o"), "--lam", "0.1"])
    assert code == 2
    assert "--noise-sd" in capsys.readouterr().err
