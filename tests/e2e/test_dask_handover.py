"""Exact assimilation on dask with overlapped chunks (warm-up starts, checked hand-overs).

Oracle: the local engine's strictly sequential exact run of the same job (the compiled kernel
chunk after chunk). The overlapped run keeps a chunk's result only when its warm-up state
matches the true neighbour state within 1e-10 sd (invert.stages.assimilate.handover: the
mismatch never grows, so a frame's error is at most the sum of the accepted mismatches), so
means and sds must agree to 1e-8; the tolerance leaves a factor 100 for the sum over the
hand-overs and for rounding (readings ~60, float64 ~1e-14 relative).
"""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from invert.batch.runner import run_batch

pytest.importorskip("dask.distributed")

RADIUS = 0.25


def _write_log(folder, n=9000, seed=11):
    """SYNTHETIC 1 Hz log: jittered steps, random single-cell drop-outs, long outages, a gap."""
    rng = np.random.default_rng(seed)
    th = np.linspace(0, 2 * np.pi, 24, endpoint=False)
    pts = np.vstack([RADIUS * np.c_[np.cos(th), np.sin(th)], [[0.05, 0.0], [-0.08, 0.06]]])
    names = [f"r{i:02d}" for i in range(24)] + ["p1", "p2"]
    t = np.cumsum(1.0 + rng.uniform(-0.03, 0.03, n))
    t[n // 2:] += 300.0                                    # a 5-minute logger gap
    ang = np.arctan2(pts[:, 1], pts[:, 0])
    rho = np.hypot(*pts.T) / RADIUS
    Y = 60.0 + 0.5 * np.sin(2 * np.pi * t / 900.0)[:, None] * (rho * np.cos(ang))[None, :]
    Y = Y + 0.3 * np.sin(2 * np.pi * t / 400.0)[:, None] + 0.05 * rng.standard_normal(Y.shape)
    Y[rng.random(Y.shape) < 0.02] = np.nan                 # single-cell drop-outs
    Y[int(0.3 * n):int(0.45 * n), 5] = np.nan              # one sensor out for long
    Y[int(0.7 * n):int(0.7 * n) + 200, :24] = np.nan       # whole-ring outage
    layout = Path(folder) / "layout.csv"
    layout.write_text("sensor,x,y\n" + "".join(f"{s},{x:.9f},{y:.9f}\n"
                                               for s, (x, y) in zip(names, pts, strict=True)))
    log = Path(folder) / "log.csv"
    rows = [",".join(["time", *names])]
    for k in range(n):
        rows.append(",".join([f"{t[k]:.3f}", *("" if np.isnan(v) else f"{v:.4f}"
                                                for v in Y[k])]))
    log.write_text("\n".join(rows) + "\n")
    return log, layout


@pytest.fixture(scope="module")
def realistic(tmp_path_factory):
    folder = tmp_path_factory.mktemp("handover")
    log, layout = _write_log(folder)
    run_batch(log, layout, out=folder / "local", **_KW)
    return folder, log, layout


_KW = dict(radius=RADIUS, lam=1.0, noise_sd=0.05, chunk_rows=1500, assimilate=True,
           time_scale=20.0, say=lambda *_: None)


def _largest_difference(a, b):
    worst = 0.0
    for name in ("frames", "query"):
        x = pd.read_parquet(Path(a) / f"{name}.parquet")
        y = pd.read_parquet(Path(b) / f"{name}.parquet")
        assert len(x) == len(y)
        pd.testing.assert_series_equal(x["time"], y["time"])
        cols = ["centre_mean", "centre_sd", "chi2"] if name == "frames" else \
            ["mean", "sd", "lower", "upper"]
        for c in cols:
            d = np.abs(x[c].to_numpy() - y[c].to_numpy())
            assert np.array_equal(np.isnan(x[c].to_numpy()), np.isnan(y[c].to_numpy()))
            worst = max(worst, float(np.nanmax(d)))
    return worst


def test_overlapped_dask_equals_local_exact(realistic, tmp_path):
    folder, log, layout = realistic
    s = run_batch(log, layout, out=tmp_path / "dask", engine="dask", n_workers=2, **_KW)
    ho = s["handover"]
    # warm-up T ln(1/tol) = 20 * 23 = 461 frames at 1 Hz, well under half a chunk
    assert ho["tolerance"] == 1e-10
    assert ho["forward"]["accepted"] + ho["backward"]["accepted"] >= 1
    assert ho["forward"]["largest"] <= 1e-10 and ho["backward"]["largest"] <= 1e-10
    assert _largest_difference(folder / "local", tmp_path / "dask") <= 1e-8


def test_failed_handover_reruns_the_chunk(realistic, tmp_path):
    # a 3-frame warm-up cannot match the true state (mismatch of order 1 sd): every early
    # chunk is checked, refused and run again from the true state, and the result is exact
    folder, log, layout = realistic
    s = run_batch(log, layout, out=tmp_path / "dask", engine="dask", n_workers=2, warmup=3,
                  **_KW)
    ho = s["handover"]
    assert ho["forward"]["rerun"] >= 1 and ho["backward"]["rerun"] >= 1
    reruns = [c for c in ho["chunks"]["forward"] if c[1] == "rerun"]
    assert all(c[2] > 1e-10 for c in reruns)
    assert ho["warmup_frames"] > 3  # grown after the failed checks
    assert _largest_difference(folder / "local", tmp_path / "dask") <= 1e-8


class _Stop(Exception):
    pass


@pytest.mark.parametrize("phase_calls", [2, 8])
def test_resume_in_the_middle_of_overlapped_passes(realistic, tmp_path, phase_calls):
    # 6 chunks: stop after 2 committed chunks (forward pass, tasks still in flight) or after
    # 8 (backward pass); the resumed run must end as the sequential local run does
    folder, log, layout = realistic
    out = tmp_path / "dask"
    calls = []

    def stop(i):
        calls.append(i)
        if len(calls) == phase_calls:
            raise _Stop

    with pytest.raises(_Stop):
        run_batch(log, layout, out=out, engine="dask", n_workers=2, on_chunk=stop, **_KW)
    assert (out / ".batch-work" / "manifest.json").exists()
    assert not (out / "frames.parquet").exists()
    s = run_batch(log, layout, out=out, engine="dask", n_workers=2, resume=True, **_KW)
    assert s["handover"]["forward"]["accepted"] + s["handover"]["backward"]["accepted"] >= 1
    assert _largest_difference(folder / "local", out) <= 1e-8
    assert not (out / ".batch-work").exists()
