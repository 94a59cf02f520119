"""Gross errors through the command line: a -9999 sentinel in `fit` and in `batch`."""

import json
from pathlib import Path

import numpy as np
import pandas as pd

from invert.cli import main, run_fit

DATA = Path(__file__).resolve().parents[2] / "datasets"
READINGS = Path(__file__).resolve().parents[2] / "invert" / "data" / "demo_readings.csv"
LOG, LAYOUT = DATA / "demo_log.csv", DATA / "demo_layout.csv"


def _with_sentinel(src, dst, row, col):
    """Copy ``src`` with the cell (data row ``row``, column ``col``) replaced by -9999."""
    lines = src.read_text().splitlines(keepends=True)
    data = [i for i, ln in enumerate(lines) if not ln.startswith("#")][1:]  # after the header
    cells = lines[data[row]].rstrip("\n").split(",")
    cells[col] = "-9999"
    lines[data[row]] = ",".join(cells) + "\n"
    dst.write_text("".join(lines))
    return dst


def test_fit_names_the_sentinel_and_keeps_the_rim_sane(tmp_path):
    # The demo readings with T03 written as -9999. Exit 0; the warning and the model check
    # name it; the rim estimate stays within 4 sd of the clean fit everywhere (the clean fit's
    # sd is the scale of the information lost with one sensor; without the robust step the
    # rim swung by thousands of degrees).
    bad = _with_sentinel(READINGS, tmp_path / "r.csv", 2, 3)
    assert main(["fit", str(bad), "--radius", "0.25", "--out", str(tmp_path / "b")]) == 0
    run_fit(READINGS, radius=0.25, out=tmp_path / "c", figures=False, say=lambda *_: None)
    s = json.loads((tmp_path / "b" / "summary.json").read_text())
    assert any("sensor T03 (-9999)" in w and "gross error" in w for w in s["warnings"])
    assert s["robust"]["gross_errors"].keys() == {"T03"}
    assert "Excluded before the check (gross errors): T03." in \
        s["diagnostics"]["model_check"]["verdict"]
    assert s["residual_dof"] > 3  # not an interpolating fit
    b = pd.read_csv(tmp_path / "b" / "boundary.csv")
    c = pd.read_csv(tmp_path / "c" / "boundary.csv")
    assert np.all(np.abs(b["mean"] - c["mean"]) < 4 * c["sd"])
    clean = json.loads((tmp_path / "c" / "summary.json").read_text())
    assert "robust" not in clean  # nothing flagged on the bundled demo readings


def test_batch_pooled_noise_and_the_frame_say_so(tmp_path):
    # One -9999 cell among the 10,800 of the demo log (frame 50, tc04). The pooled noise sd
    # must stay within 1 % of the clean run's (it was inflated 2000x; leaving one frame of
    # ~460 out moves it by ~0.1 %); the frame stays ok, names the cell and is within 3 sd of
    # the clean run's centre value; no other frame names a cell.
    bad = _with_sentinel(LOG, tmp_path / "log.csv", 50, 5)
    for log, out in ((bad, "b"), (LOG, "c")):
        assert main(["batch", str(log), "--layout", str(LAYOUT), "--radius", "0.25", "--out",
                     str(tmp_path / out), "--format", "csv"]) == 0
    sb = json.loads((tmp_path / "b" / "summary.json").read_text())
    sc = json.loads((tmp_path / "c" / "summary.json").read_text())
    assert abs(sb["noise_sd"] / sc["noise_sd"] - 1) < 0.01
    assert "1 frame(s) the model rejects" in sb["hyperparameters"]
    fb = pd.read_csv(tmp_path / "b" / "frames.csv").set_index("frame")
    fc = pd.read_csv(tmp_path / "c" / "frames.csv").set_index("frame")
    assert fb.loc[50, "status"] == "ok" and fb.loc[50, "n_used"] == fc.loc[50, "n_used"] - 1
    assert fb.loc[50, "reason"].startswith("tc04 excluded as a gross error (-9999,")
    assert abs(fb.loc[50, "centre_mean"] - fc.loc[50, "centre_mean"]) < 3 * fb.loc[50, "centre_sd"]
    named = fb["reason"].astype(str).str.contains("gross error")
    assert named.sum() == 1
    assert not fc["reason"].astype(str).str.contains("gross error").any()
