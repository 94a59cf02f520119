"""Progress off a terminal: periodic plain lines, none for a short run (common practice for
batch jobs whose stderr goes to a log file)."""

import io

from invert.progress import LogLines, progress


def test_lines_every_interval_and_none_before(monkeypatch):
    clock = [100.0]
    monkeypatch.setattr("invert.progress.time.monotonic", lambda: clock[0])
    buf = io.StringIO()
    bar = LogLines("batch", "frame", every=30.0, stream=buf)
    bar.update(1000)
    clock[0] += 10
    bar.update(1000)
    assert buf.getvalue() == ""
    clock[0] += 25  # 35 s after the start: one line, 3,000 frames at about 85.7/s
    bar.update(1000)
    assert buf.getvalue() == "batch: 3,000 frames (86/s)\n"
    bar.close()


def test_no_bar_when_stderr_is_not_a_terminal(monkeypatch):
    monkeypatch.setattr("sys.stderr", io.StringIO())
    assert isinstance(progress(desc="batch", unit="frame"), LogLines)


def test_batch_summary_shows_as_html_and_stays_a_dict():
    # IPython's display protocol: an object's _repr_html_ string is shown in notebooks
    from invert.batch.result import BatchSummary

    s = BatchSummary({"frames": {"total": 3, "ok": 2}, "method": "kalman-smoother",
                      "warnings": ["<b>x</b> & y"], "lam": 0.1})
    page = s._repr_html_()
    assert "3 total, 2 ok" in page and "kalman-smoother" in page
    assert "&lt;b&gt;x&lt;/b&gt; &amp; y" in page and "<b>x</b>" not in page
    assert isinstance(s, dict) and dict(s) == {"frames": {"total": 3, "ok": 2},
                                               "method": "kalman-smoother",
                                               "warnings": ["<b>x</b> & y"], "lam": 0.1}


def test_estimate_shows_as_html_with_its_numbers_and_warnings():
    # IPython display protocol; the centre value equals Estimate.at (the same computation)
    import numpy as np
    import pandas as pd

    import invert
    from invert.report.notebook import estimate_html

    df = pd.read_csv(invert.__path__[0] + "/data/demo_readings.csv", comment="#")
    est = invert.fit(df, radius=0.25)
    page = est._repr_html_()
    c = est.at(np.zeros((1, 2)))
    assert f"{c.mean[0]:.6g}" in page and "averaged" in page
    odd = est.__class__(mean=est.mean, cov=est.cov, domain=est.domain, method="<x>",
                        warnings=("a & b",))
    assert "&lt;x&gt;" in estimate_html(odd) and "a &amp; b" in estimate_html(odd)


def test_lines_work_as_a_context_manager(monkeypatch):
    # the MCMC stages use their counter in a with-block
    buf = io.StringIO()
    with LogLines("mcmc", "step", every=0.0, stream=buf) as bar:
        bar.update(5)
    assert buf.getvalue().startswith("mcmc: 5 steps")
