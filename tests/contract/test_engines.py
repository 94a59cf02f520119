"""One contract suite run over every batch engine (local; dask on a 2-worker loopback cluster).

Each engine class below only says how to build its engine (the ``build`` hook, as SciPy's
``_TestRBFInterpolator`` is subclassed per kernel); the tests are shared. Oracles:
- the protocol: results of ``submit``/``gather`` equal calling the function here;
- static frames: the ridge solution of each frame from numpy's least squares on the stacked
  system [W G; sqrt(lam) D^-1] c = [W y; 0] (Tikhonov 1963; Golub & Van Loan, Matrix
  Computations, §6.1), to 1e-9 (rounding of two different factorisations of a problem whose
  condition number is about 1e4); and every engine's tables identical to the local engine's;
- assimilation: every engine equals the local engine to 1e-8 (rounding only: the same
  sequential recursions, or the same scan); the parallel-in-time smoother, an explicit job
  option, equals the sequential exact one to 1e-8 (Särkkä & García-Fernández 2021, and the
  steady-state shortcut restarting at chunk starts, relative 1e-10 of readings ~80).
"""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from invert.batch import DaskEngine, Engine, LocalEngine
from invert.batch.runner import job_from_files, run_job
from invert.io.logs import open_log
from invert.io.sources import LogSource
from invert.prior import SmoothnessPrior

ROOT = Path(__file__).resolve().parents[2]
LOG, LAYOUT = ROOT / "datasets" / "demo_log.csv", ROOT / "datasets" / "demo_layout.csv"
LAM, NOISE_SD = 0.02, 0.05
COMMON = dict(radius=0.25, lam=LAM, noise_sd=NOISE_SD, chunk_rows=64)
ASSIM = dict(assimilate=True, time_scale=1500.0)


def _square(x):
    return x * x


def _run(engine, out, **kw):
    job = job_from_files(LAYOUT, **{**COMMON, **kw}, out=out)
    source = open_log(LOG, job.sensors, chunk_rows=job.chunk_rows)
    assert isinstance(source, LogSource)
    summary = run_job(job, source, engine)
    fmt = job.fmt
    return (summary, pd.read_parquet(out / f"frames.{fmt}"),
            pd.read_parquet(out / f"query.{fmt}"))


@pytest.fixture(scope="module")
def local_static(tmp_path_factory):
    return _run(LocalEngine(), tmp_path_factory.mktemp("ref") / "static")


@pytest.fixture(scope="module")
def local_assim(tmp_path_factory):
    return _run(LocalEngine(), tmp_path_factory.mktemp("ref") / "assim", **ASSIM)


@pytest.fixture(scope="module")
def local_exact(tmp_path_factory):
    return _run(LocalEngine(), tmp_path_factory.mktemp("ref") / "exact", **ASSIM,
                max_transient=None)


class _EngineContract:
    """The shared tests; subclasses define ``build()``."""

    @classmethod
    def build(cls):
        raise NotImplementedError

    @pytest.fixture(scope="class")
    @classmethod
    def engine(cls):
        eng = cls.build()
        try:
            yield eng
        finally:
            eng.close()

    def test_protocol(self, engine):
        assert isinstance(engine, Engine)
        assert isinstance(engine.name, str) and engine.in_flight >= 0
        futs = [engine.submit(_square, k) for k in range(7)]
        assert engine.gather(futs) == [k * k for k in range(7)]
        assert engine.submit(_square, 3.0).result() == 9.0

    def test_static_equals_local_and_least_squares(self, engine, local_static, tmp_path):
        summary, frames, query = _run(engine, tmp_path / "o")
        _, lf, lq = local_static
        assert summary["engine"] == engine.name
        pd.testing.assert_frame_equal(frames, lf, check_exact=True)
        pd.testing.assert_frame_equal(query, lq, check_exact=True)
        # independent oracle on a few frames: the ridge problem by numpy's least squares
        job = job_from_files(LAYOUT, **COMMON, out=tmp_path / "unused")
        dom = job.domain
        d = np.sqrt(SmoothnessPrior(s=2.0).shape(dom.eigenvalues, dom.degrees))
        log = pd.read_csv(LOG, comment="#")
        ok = frames[frames["status"] == "ok"].set_index("frame")
        for k in ok.index[[0, len(ok) // 3, len(ok) // 2, -1]]:
            y = log.loc[k, list(job.sensors)].to_numpy(float)
            o = np.isfinite(y)
            G = dom.design(job.points[o])
            A = np.vstack([G / NOISE_SD, np.sqrt(LAM) / NOISE_SD * np.diag(1 / d)])
            b = np.concatenate([y[o] / NOISE_SD, np.zeros(len(d))])
            c = np.linalg.lstsq(A, b, rcond=None)[0]
            assert ok.loc[k, "centre_mean"] == pytest.approx(c[0], rel=1e-9)

    def test_assimilation_equals_local(self, engine, local_assim, tmp_path):
        _, frames, query = _run(engine, tmp_path / "o", **ASSIM)
        _, lf, lq = local_assim
        cols = ["time", "frame", "status", "reason", "n_used"]
        pd.testing.assert_frame_equal(frames[cols], lf[cols])
        for col in ("mean", "sd", "lower", "upper"):
            np.testing.assert_allclose(query[col], lq[col], rtol=0, atol=1e-8)
        for col in ("centre_mean", "centre_sd"):
            np.testing.assert_allclose(frames[col], lf[col], rtol=0, atol=1e-8)

    def test_parallel_in_time_equals_sequential_exact(self, engine, local_exact, tmp_path):
        summary, frames, query = _run(engine, tmp_path / "o", **ASSIM, max_transient=None,
                                      parallel_in_time=True)
        assert "associative" in summary["parallel"]
        _, lf, lq = local_exact
        assert len(frames) == len(lf)
        for col in ("mean", "sd", "lower", "upper"):
            np.testing.assert_allclose(query[col], lq[col], rtol=0, atol=1e-8)
        np.testing.assert_allclose(frames["centre_sd"], lf["centre_sd"], rtol=0, atol=1e-8)


class TestLocalEngine(_EngineContract):
    @classmethod
    def build(cls):
        return LocalEngine()


class TestDaskEngine(_EngineContract):
    @classmethod
    def build(cls):
        pytest.importorskip("dask.distributed")
        return DaskEngine(n_workers=2)
