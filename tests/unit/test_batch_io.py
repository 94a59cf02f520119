"""Reading CSV logs in pieces: line numbers of malformed rows, numeric and date-time times,
bad cells in later pieces, a last line without a line end.

Oracles: the file as written, read back line by line with Python's csv module (cell counts,
line numbers), Python's float() for numeric times and pandas.to_datetime for ISO 8601 times.
Small ``chunk_rows`` cut each log into many pieces.
"""

import csv

import numpy as np
import pandas as pd
import pytest
from scenarios import write_ring_layout

from invert.batch.runner import run_batch

N_SENSORS = 6


@pytest.fixture
def layout(tmp_path):
    return write_ring_layout(tmp_path / "layout.csv", N_SENSORS)


def _rows(n, rng):
    th = np.linspace(0, 2 * np.pi, N_SENSORS, endpoint=False)
    Y = 10 + np.cos(th[None, :] - 0.01 * np.arange(n)[:, None]) \
        + 0.01 * rng.standard_normal((n, N_SENSORS))
    Y[rng.random(Y.shape) < 0.05] = np.nan
    return [["" if np.isnan(v) else f"{v:.6f}" for v in row] for row in Y]


def _write(path, times, rows, *, comment=True, final_newline=True):
    lines = (["# SYNTHETIC test log"] if comment else []) + \
        ["time," + ",".join(f"s{i}" for i in range(N_SENSORS))] + \
        [",".join([t, *r]) for t, r in zip(times, rows, strict=True)]
    path.write_text("\n".join(lines) + ("\n" if final_newline else ""))


def _run(log, layout, out, chunk_rows=64):
    run_batch(log, layout, radius=1.0, out=out, lam=0.05, noise_sd=0.05, fmt="csv",
              chunk_rows=chunk_rows, say=lambda *_: None)
    return pd.read_csv(out / "frames.csv")


def test_malformed_rows_named_by_their_line_in_the_file(tmp_path, layout):
    rng = np.random.default_rng(1)
    rows = _rows(1500, rng)
    for k in (10, 700, 1401):
        rows[k] = rows[k] + ["9.9"]                 # one cell too many
    rows[1402] = rows[1402][:3]                     # too few
    log = tmp_path / "log.csv"
    _write(log, [str(float(k)) for k in range(1500)], rows)
    # expected: every line whose cell count differs from the header's (1-based line numbers)
    with open(log, newline="") as fh:
        lines = list(csv.reader(fh))
    width = len(lines[1])
    expected = {i + 1 for i, cells in enumerate(lines[2:], start=2) if len(cells) != width}
    assert len(expected) == 4
    fr = _run(log, layout, tmp_path / "o")
    assert len(fr) == 1500
    # every record once, in log order, numbered by its place among the records
    np.testing.assert_array_equal(fr["frame"].to_numpy(), np.arange(1500))
    np.testing.assert_array_equal(fr["time"].to_numpy(), [float(c[0]) for c in lines[2:]])
    bad = fr[fr["reason"].fillna("").str.startswith("malformed row")]
    assert (bad["status"] == "rejected").all()
    # each named by its own line in the file
    named = [int(r.rsplit(" ", 1)[1]) for r in bad["reason"]]
    assert named == sorted(expected)
    assert set(bad["frame"]) == {i - 3 for i in expected}  # line 3 holds record 0


def test_malformed_rows_around_blank_lines_and_a_missing_last_line_end(tmp_path, layout):
    # Blank lines are not records (pyarrow skips them); the line numbers still count them.
    rng = np.random.default_rng(4)
    rows = _rows(40, rng)
    text = "time," + ",".join(f"s{i}" for i in range(N_SENSORS)) + "\n"
    body = [f"{k}.0," + ",".join(r) for k, r in enumerate(rows)]
    body[5] += ",1.0"
    body.insert(7, "")
    body[20] = "19.0,1,2"
    log = tmp_path / "log.csv"
    log.write_text(text + "\n".join(body))  # no line end after the last line
    with open(log, newline="") as fh:
        lines = list(csv.reader(fh))
    expected = [i + 1 for i, cells in enumerate(lines) if cells and len(cells) != len(lines[0])]
    fr = _run(log, layout, tmp_path / "o", chunk_rows=8)
    assert len(fr) == 40
    np.testing.assert_array_equal(fr["frame"].to_numpy(), np.arange(40))
    np.testing.assert_array_equal(fr["time"].to_numpy(), np.arange(40.0))
    bad = fr[fr["reason"].fillna("").str.startswith("malformed row")]
    assert [int(r.rsplit(" ", 1)[1]) for r in bad["reason"]] == expected
    assert (fr.loc[~fr.index.isin(bad.index), "status"] == "ok").all()


def test_stray_quote_does_not_swallow_the_following_rows(tmp_path, layout):
    # A lone quote would make a CSV parser read on over the following lines (RFC 4180 quoting);
    # every record must still come back once, in order, the one with the quote rejected for
    # its cell, the rest read as written (Python's float of the cells as the oracle).
    rng = np.random.default_rng(6)
    rows = _rows(300, rng)
    rows[130][2] = '"' + (rows[130][2] or "10.0")
    rows[40][1] = '"' + (rows[40][1] or "10.0") + '"'   # a properly quoted number elsewhere
    log = tmp_path / "log.csv"
    _write(log, [str(float(k)) for k in range(300)], rows)
    fr = _run(log, layout, tmp_path / "o")
    assert len(fr) == 300
    np.testing.assert_array_equal(fr["frame"].to_numpy(), np.arange(300))
    np.testing.assert_array_equal(fr["time"].to_numpy(), np.arange(300.0))
    assert fr.loc[130, "status"] == "rejected"
    assert fr.loc[130, "reason"].startswith("non-numeric cell in column 's2'")
    others = fr.drop(index=130)
    assert set(others["status"]) <= {"ok", "no-data"}
    want = [sum(c != "" for c in r) for i, r in enumerate(rows) if i != 130]
    np.testing.assert_array_equal(others["n_used"].to_numpy(), want)


def test_iso_times_over_many_pieces(tmp_path, layout):
    rng = np.random.default_rng(2)
    start = pd.Timestamp("2024-03-01T00:00:00Z")
    times = [(start + pd.Timedelta(seconds=1.5 * k)).strftime("%Y-%m-%dT%H:%M:%S.%fZ")
             for k in range(700)]
    times[300] = "not-a-time"
    log = tmp_path / "log.csv"
    _write(log, times, _rows(700, rng))
    fr = _run(log, layout, tmp_path / "o").set_index("frame")
    assert fr.loc[300, "status"] == "rejected"
    assert fr.loc[300, "reason"] == "unparseable time 'not-a-time'"
    ok = fr.drop(index=300)
    assert set(ok["status"]) <= {"ok", "no-data"}
    ref = pd.to_datetime(pd.Series(times).drop(index=300), utc=True, format="ISO8601")
    np.testing.assert_array_equal(pd.to_datetime(ok["time"], utc=True).to_numpy(),
                                  ref.to_numpy())


def test_numeric_log_with_bad_cells_in_later_pieces(tmp_path, layout):
    rng = np.random.default_rng(3)
    rows = _rows(1000, rng)
    times = [f"{0.25 * k:.2f}" for k in range(1000)]
    times[500], times[501] = "x12", ""
    rows[502][2] = "inf"
    rows[900][4] = "open"
    log = tmp_path / "log.csv"
    _write(log, times, rows, comment=False, final_newline=False)
    fr = _run(log, layout, tmp_path / "o").set_index("frame")
    assert len(fr) == 1000                          # the last line has no line end
    assert fr.loc[500, "reason"] == "unparseable time 'x12'"  # the cell's text kept
    assert fr.loc[501, "reason"] == "missing time"
    assert fr.loc[502, "reason"].startswith("non-finite cell in column 's2'")
    assert fr.loc[900, "reason"] == "non-numeric cell in column 's4': 'open'"
    good = fr.drop(index=[500, 501, 502, 900])
    assert (good["status"] == "ok").all()
    np.testing.assert_array_equal(good["time"].to_numpy(),
                                  [float(times[k]) for k in good.index])
    # the same good frames in one piece give the same estimates (frames are independent)
    clean = tmp_path / "clean.csv"
    _write(clean, [times[k] for k in good.index], [rows[k] for k in good.index])
    one = _run(clean, layout, tmp_path / "c", chunk_rows=65536)
    np.testing.assert_allclose(one["centre_mean"].to_numpy(),
                               good["centre_mean"].to_numpy(), rtol=1e-12)


def test_arrow_buffers_round_trip_equals_pyarrow_conversions():
    # the buffer-level conversions used by the static job against pyarrow's own pa.array /
    # to_numpy (the reference), on awkward shapes: offsets from slicing, several chunks,
    # lengths that are not multiples of 8, all-null and empty arrays, non-ASCII text
    import pyarrow as pa

    from invert.io.arrow import arrow_numbers, arrow_strings, float_values

    rng = np.random.default_rng(4)
    for n in (0, 1, 7, 13, 64, 1001):
        v = rng.standard_normal(n)
        mask = rng.random(n) < 0.3
        ref = pa.array(v, type=pa.float64(), mask=mask)
        got = arrow_numbers(v, pa.float64(), mask=mask)
        assert got.equals(ref) and got.null_count == ref.null_count
        assert arrow_numbers(v, pa.float64()).equals(pa.array(v, type=pa.float64()))
        k = rng.integers(-5, 5, n)
        assert arrow_numbers(k, pa.int64()).equals(pa.array(k, type=pa.int64()))
        assert arrow_numbers(k, pa.int8()).equals(pa.array(k.astype(np.int8)))
        ns = rng.integers(0, 2**60, n)
        assert arrow_numbers(ns, pa.timestamp("ns", "UTC"), mask=mask).equals(
            pa.array(ns, type=pa.int64(), mask=mask).cast(pa.timestamp("ns", "UTC")))
        for a in (ref, ref.slice(min(3, n)), pa.chunked_array([ref, ref.slice(n // 2)],
                                                              type=pa.float64())):
            np.testing.assert_array_equal(float_values(a), a.to_numpy(zero_copy_only=False))
        items = [None if m else f"r{i}-é{'x' * (i % 5)}" for i, m in enumerate(mask)]
        assert arrow_strings(items).equals(pa.array(items, type=pa.string()))
    allnull = pa.nulls(9, type=pa.float64())
    np.testing.assert_array_equal(float_values(allnull), np.full(9, np.nan))
    assert arrow_strings([None, None]).equals(pa.array([None, None], type=pa.string()))


@pytest.mark.parametrize("assimilate", [False, True])
@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_millisecond_times_come_back_exactly(tmp_path, layout, fmt, assimilate):
    # Times are carried as integer nanoseconds end to end: every time written to the frames
    # and query outputs is the log's own, so outputs join to inputs by time. Oracle: the log's
    # times as pandas parses them (ISO 8601 with milliseconds; the Parquet log holds the same
    # times as a timestamp[ms] column written by pyarrow).
    rng = np.random.default_rng(4)
    n = 300
    base = pd.Timestamp("2024-03-01T00:00:00")
    # jittered steps in whole milliseconds: 1.010 s, 2.003 s, 2.998 s ...
    steps = 1000 + rng.integers(-30, 31, n)
    times = [base + pd.Timedelta(milliseconds=int(ms)) for ms in np.cumsum(steps)]
    text = [t.strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] for t in times]
    rows = _rows(n, rng)
    if fmt == "csv":
        log = tmp_path / "log.csv"
        _write(log, text, rows)
    else:
        import pyarrow as pa
        import pyarrow.parquet as pq

        cols = {"time": pa.array(pd.to_datetime(text).as_unit("ms"), pa.timestamp("ms"))}
        for i in range(N_SENSORS):
            cols[f"s{i}"] = pa.array([None if r[i] == "" else float(r[i]) for r in rows])
        log = tmp_path / "log.parquet"
        pq.write_table(pa.table(cols), log)
    out = tmp_path / "o"
    run_batch(log, layout, radius=1.0, out=out, lam=0.05, noise_sd=0.05, fmt="parquet",
              chunk_rows=64, assimilate=assimilate, time_scale=50.0, say=lambda *_: None)
    fr = pd.read_parquet(out / "frames.parquet")
    q = pd.read_parquet(out / "query.parquet")
    want = pd.to_datetime(text).tz_localize("UTC").as_unit("ns")
    got = pd.DatetimeIndex(fr["time"]).as_unit("ns")
    assert (got == want).all()
    assert set(pd.DatetimeIndex(q["time"]).as_unit("ns")) <= set(want)


def test_times_without_a_zone_are_said_to_be_read_as_utc(tmp_path, layout):
    # ISO 8601 (common practice of loggers): a time without 'Z' or an offset has no zone; the
    # tool reads it as UTC and says so once, and is silent when every time has a zone.
    rng = np.random.default_rng(5)
    rows = _rows(4, rng)
    naive = [f"2024-03-01T00:00:0{k}.010" for k in range(4)]
    for times, said in ((naive, True), ([t + "Z" for t in naive], False),
                        ([t + "+00:00" for t in naive], False)):
        log = tmp_path / "log.csv"
        _write(log, times, rows)
        out = tmp_path / f"o{len(times[0])}"
        s = run_batch(log, layout, radius=1.0, out=out, lam=0.05, noise_sd=0.05, fmt="csv",
                      say=lambda *_: None)
        assert any("without a time zone were read as UTC" in w for w in s["warnings"]) == said
