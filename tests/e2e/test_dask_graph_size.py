"""The dask engine sends no large task graphs: big arguments are scattered, not embedded.

A 601-frame log in one chunk makes a filtered segment of about 12 MiB that the smoother task
receives; embedded in the task it made dask warn "Sending large graph". Oracle for the numbers:
the local engine (the same algebra, so the same tables to rounding).
"""

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from invert.batch.runner import run_batch

ROOT = Path(__file__).resolve().parents[2]
LOG, LAYOUT = ROOT / "datasets" / "demo_log.csv", ROOT / "datasets" / "demo_layout.csv"


def test_assimilation_on_dask_sends_no_large_graph(tmp_path):
    pytest.importorskip("dask.distributed")
    kw = dict(radius=0.25, lam=0.02, noise_sd=0.05, assimilate=True, time_scale=1500.0,
              say=lambda *_: None)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        run_batch(LOG, LAYOUT, out=tmp_path / "dask", engine="dask", **kw)
    large = [str(w.message) for w in caught if "large graph" in str(w.message)]
    assert large == []
    run_batch(LOG, LAYOUT, out=tmp_path / "local", **kw)
    qd = pd.read_parquet(tmp_path / "dask" / "query.parquet")
    ql = pd.read_parquet(tmp_path / "local" / "query.parquet")
    # same filter and smoother on both engines: equal up to rounding (1e-8, as in
    # test_dask_engine.py)
    for col in ("mean", "sd"):
        np.testing.assert_allclose(qd[col], ql[col], rtol=0, atol=1e-8)
