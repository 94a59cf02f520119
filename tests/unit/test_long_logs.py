"""Long logs (time, sensor, value[, flag]) give the frames of the same data written wide.

Oracle: the wide CSV reader on the same frames (itself checked against the file as written in
test_batch_io.py); values to 1e-12. Rows are shuffled within each time and the record batches
are small, so times straddle batch boundaries.
"""

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scenarios import write_ring_layout

from invert.batch.runner import run_batch
from invert.io.logs import open_log
from invert.io.long import LongLogReader

N_SENSORS, N_FRAMES = 6, 1500
SENSORS = [f"s{i}" for i in range(N_SENSORS)]


@pytest.fixture
def layout(tmp_path):
    return write_ring_layout(tmp_path / "layout.csv", N_SENSORS)


def _frames(rng):
    times = pd.Timestamp("2024-03-01T00:00:00Z") + pd.to_timedelta(
        np.cumsum(1000 + rng.integers(-30, 31, N_FRAMES)), unit="ms")
    th = np.linspace(0, 2 * np.pi, N_SENSORS, endpoint=False)
    Y = 10 + np.cos(th[None, :] - 0.01 * np.arange(N_FRAMES)[:, None]) \
        + 0.01 * rng.standard_normal((N_FRAMES, N_SENSORS))
    Y = np.round(Y, 6)
    Y[rng.random(Y.shape) < 0.05] = np.nan
    return times, Y


def _write_wide(path, times, Y):
    df = pd.DataFrame(Y, columns=SENSORS)
    df.insert(0, "time", times.strftime("%Y-%m-%dT%H:%M:%S.%f").str[:-3] + "Z")
    df.to_csv(path, index=False, float_format="%.6f")


def _long_table(times, Y, rng, flag=False):
    rows = []
    for k in range(N_FRAMES):
        order = rng.permutation(N_SENSORS)
        for j in order:
            if np.isfinite(Y[k, j]) or rng.random() < 0.5:  # blank values written or not
                rows.append((k, SENSORS[j], Y[k, j]))
    k, s, v = map(np.array, zip(*rows, strict=True))
    df = pd.DataFrame({"time": times[k].strftime("%Y-%m-%dT%H:%M:%S.%f").str[:-3] + "Z",
                       "sensor": s, "value": v})
    if flag:
        df["flag"] = "good"
    return df


def _run(log, layout, out):
    run_batch(log, layout, radius=1.0, out=out, lam=0.05, noise_sd=0.05, fmt="parquet",
              chunk_rows=50, say=lambda *_: None)
    return pd.read_parquet(out / "frames.parquet"), pd.read_parquet(out / "query.parquet")


def test_long_csv_and_parquet_equal_the_wide_log(tmp_path, layout):
    rng = np.random.default_rng(11)
    times, Y = _frames(rng)
    wide = tmp_path / "wide.csv"
    _write_wide(wide, times, Y)
    long_csv = tmp_path / "long.csv"
    _long_table(times, Y, rng).to_csv(long_csv, index=False, float_format="%.6f")
    long_pq = tmp_path / "long.parquet"
    t = _long_table(times, Y, rng, flag=True)
    pq.write_table(pa.Table.from_pandas(t, preserve_index=False), long_pq, row_group_size=700)
    assert isinstance(open_log(long_csv, SENSORS), LongLogReader)
    fw, qw = _run(wide, layout, tmp_path / "ow")
    for log in (long_csv, long_pq):
        fl, ql = _run(log, layout, tmp_path / f"o{log.suffix}")
        pd.testing.assert_frame_equal(fl[["time", "frame", "status", "n_used"]],
                                      fw[["time", "frame", "status", "n_used"]])
        for col in ("mean", "sd", "lower", "upper"):
            np.testing.assert_allclose(ql[col], qw[col], rtol=1e-12, atol=0)


def test_bad_long_rows_get_statuses_and_warnings(tmp_path, layout):
    rows = ["time,sensor,value,quality"]
    for k in range(6):
        for j in range(N_SENSORS):
            rows.append(f"{k}.0,s{j},{10 + j},")
    rows[1 + 1 * N_SENSORS + 2] = "1.0,s2,ten,"              # frame 1: non-numeric value
    rows[1 + 2 * N_SENSORS + 3] = "2.0,s1,11,"               # frame 2: s1 twice
    rows[1 + 3 * N_SENSORS + 4] = "3.0,s9,14,"               # unknown sensor: row left out
    rows[1 + 4 * N_SENSORS + 5] = "soon,s5,15,"              # its own rejected frame
    rows[1 + 5 * N_SENSORS + 0] = "5.0,s0,10,bad"            # flagged: missing
    log = tmp_path / "long.csv"
    log.write_text("\n".join(rows) + "\n")
    s = run_batch(log, layout, radius=1.0, out=tmp_path / "o", lam=0.05, noise_sd=0.05,
                  fmt="csv", say=lambda *_: None)
    fr = pd.read_csv(tmp_path / "o" / "frames.csv")
    reasons = dict(zip(fr["frame"], fr["reason"], strict=True))
    assert reasons[1] == "non-numeric value for sensor 's2': 'ten'"
    assert reasons[2] == "two values for sensor 's1' at this time"
    assert fr.loc[fr["frame"] == 3, "n_used"].item() == N_SENSORS - 1
    assert (fr["reason"] == "unparseable time 'soon'").sum() == 1
    assert fr.loc[fr["frame"] == fr["frame"].max(), "n_used"].item() == N_SENSORS - 1
    assert any("sensor 's9', which is not in the layout" in w for w in s["warnings"])
    assert any("1 reading(s) flagged as not good" in w for w in s["warnings"])
    assert len(fr) == 7  # 6 times, and the row with the unparseable time on its own
