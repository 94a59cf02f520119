"""--engine dask: the same job on a dask.distributed LocalCluster (loopback, in-process workers).

Oracle: the local engine. Static frames must agree exactly (the same per-pattern algebra); the
distributed smoother must equal the sequential one to 1e-8 (chunk states passed between
neighbours; the only differences can come from rounding).
"""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from invert.batch.runner import run_batch

ROOT = Path(__file__).resolve().parents[2]
LOG, LAYOUT = ROOT / "datasets" / "demo_log.csv", ROOT / "datasets" / "demo_layout.csv"


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("dask.distributed")
    cl = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  host="127.0.0.1", protocol="tcp://",
                                  dashboard_address="127.0.0.1:0",
                                  scheduler_kwargs={"dashboard": False})
    try:
        yield cl
    finally:
        cl.close()


def _read(out):
    return (pd.read_parquet(Path(out) / "frames.parquet"),
            pd.read_parquet(Path(out) / "query.parquet"))


def test_static_dask_equals_local(tmp_path, cluster):
    assert cluster.scheduler_address.startswith("tcp://127.0.0.1")
    kw = dict(radius=0.25, lam=0.02, noise_sd=0.05, chunk_rows=64, say=lambda *_: None)
    run_batch(LOG, LAYOUT, out=tmp_path / "local", **kw)
    s = run_batch(LOG, LAYOUT, out=tmp_path / "dask", engine="dask",
                  scheduler=cluster.scheduler_address, **kw)
    assert s["engine"] == "dask"
    fl, ql = _read(tmp_path / "local")
    fd, qd = _read(tmp_path / "dask")
    pd.testing.assert_frame_equal(fl, fd, check_exact=True)
    pd.testing.assert_frame_equal(ql, qd, check_exact=True)


def test_assimilation_dask_equals_local(tmp_path, cluster):
    kw = dict(radius=0.25, lam=0.02, noise_sd=0.05, chunk_rows=64, assimilate=True,
              time_scale=1500.0, say=lambda *_: None)
    run_batch(LOG, LAYOUT, out=tmp_path / "local", **kw)
    run_batch(LOG, LAYOUT, out=tmp_path / "dask", engine="dask",
              scheduler=cluster.scheduler_address, **kw)
    fl, ql = _read(tmp_path / "local")
    fd, qd = _read(tmp_path / "dask")
    pd.testing.assert_frame_equal(fl[["time", "frame", "status", "reason", "n_used"]],
                                  fd[["time", "frame", "status", "reason", "n_used"]])
    for col in ("mean", "sd", "lower", "upper"):
        np.testing.assert_allclose(qd[col], ql[col], rtol=0, atol=1e-8)
    np.testing.assert_allclose(fd["centre_mean"], fl["centre_mean"], rtol=0, atol=1e-8)


def test_parallel_in_time_smoother_on_dask_equals_local(tmp_path, cluster):
    # exact mode (no max_transient): chunk summaries combined by the associative scan of
    # Särkkä & García-Fernández (2021) on the cluster, each chunk filtered and smoothed in
    # parallel; equals the sequential smoother to 1e-8 (rounding, and the steady-state
    # shortcut restarting at chunk starts, relative 1e-10 of readings ~80)
    kw = dict(radius=0.25, lam=0.02, noise_sd=0.05, chunk_rows=64, assimilate=True,
              time_scale=1500.0, max_transient=None, say=lambda *_: None)
    run_batch(LOG, LAYOUT, out=tmp_path / "local", **kw)
    s = run_batch(LOG, LAYOUT, out=tmp_path / "dask", engine="dask",
                  scheduler=cluster.scheduler_address, parallel_in_time=True, **kw)
    assert "associative" in s["parallel"]
    fl, ql = _read(tmp_path / "local")
    fd, qd = _read(tmp_path / "dask")
    assert len(fd) == len(fl)
    pd.testing.assert_frame_equal(fl[["time", "frame", "status", "reason", "n_used"]],
                                  fd[["time", "frame", "status", "reason", "n_used"]])
    for col in ("mean", "sd", "lower", "upper"):
        np.testing.assert_allclose(qd[col], ql[col], rtol=0, atol=1e-8)
    np.testing.assert_allclose(fd["centre_sd"], fl["centre_sd"], rtol=0, atol=1e-8)


def test_command_starts_its_own_loopback_cluster(tmp_path):
    # `rim-invert batch --engine dask` without --scheduler starts (and closes) a LocalCluster
    from invert.cli import main

    out = tmp_path / "o"
    assert main(["batch", str(LOG), "--layout", str(LAYOUT), "--radius", "0.25", "--out",
                 str(out), "--engine", "dask", "--lam", "0.02", "--noise-sd", "0.05",
                 "--chunk-rows", "200"]) == 0
    ref = tmp_path / "r"
    run_batch(LOG, LAYOUT, radius=0.25, out=ref, lam=0.02, noise_sd=0.05, chunk_rows=200,
              say=lambda *_: None)
    pd.testing.assert_frame_equal(_read(out)[1], _read(ref)[1], check_exact=True)
