"""batch writes report.html: self-contained, cautions first, figures that render.

Checks: headless Chromium renders the page without console messages and decodes every image
(the probe of tests/browser.py, with its negative control in test_report.py); the page holds
no script or external reference; the thinned series keeps extremes: a spike planted in one
frame of a long log reaches the plotted envelope (the figure's data are checked, not pixels).
"""

from pathlib import Path

import numpy as np
import pytest
from browser import chromium_path, render_in_chromium

from invert.batch.runner import run_batch
from invert.report import batch_report

DATA = Path(__file__).resolve().parents[2] / "datasets"


@pytest.fixture(scope="module")
def demo_batch(tmp_path_factory):
    out = tmp_path_factory.mktemp("b") / "o"
    run_batch(DATA / "demo_log.csv", DATA / "demo_layout.csv", radius=0.25, out=out,
              lam=0.02, noise_sd=0.05, assimilate=True, time_scale=1500.0, fmt="csv",
              say=lambda *_: None)
    return out


def test_report_is_self_contained_with_cautions_first(demo_batch):
    doc = (demo_batch / "report.html").read_text(encoding="utf-8")
    assert "<script" not in doc and "http://" not in doc and "https://" not in doc
    assert doc.index("Cautions") < doc.index("<h2>Run</h2>") < doc.index("<img")
    assert doc.count("data:image/png;base64,") == 3
    assert "rejected" in doc and "time scale" in doc
    assert not list(demo_batch.glob("*.png"))  # figures live inside the page only


@pytest.mark.slow
def test_report_renders_in_chromium(demo_batch):
    if not chromium_path():
        pytest.skip("chromium is not installed")
    console, dom = render_in_chromium(demo_batch / "report.html")
    assert console == []
    assert 'data-loaded="3"' in dom


def test_envelopes_keep_a_one_frame_extreme(tmp_path):
    # 50,000 frames in 1,000 columns: a single-frame spike must set its column's maximum
    import pyarrow as pa
    import pyarrow.parquet as pq

    n = 50_000
    t = np.arange(n, dtype=float)
    m = np.sin(t / 5000.0)
    m[31_234] = 9.0
    q = pa.table({"time": t, "label": ["c"] * n, "mean": m, "lower": m - 0.1,
                  "upper": m + 0.1})
    pq.write_table(q, tmp_path / "query.parquet")
    edges, lo, hi, mlo, mhi, _ = batch_report.envelopes(tmp_path / "query.parquet", ["c"],
                                                         (0.0, n - 1.0))
    assert np.isclose(hi.max(), 9.1) and np.isclose(mhi.max(), 9.0)
    col = np.searchsorted(edges, 31_234.0, side="right") - 1
    assert np.isclose(hi[0, col], 9.1)
    assert np.isclose(lo.min(), -1.1, atol=1e-6)
