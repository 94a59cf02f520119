"""Log times in a named form (--time-format): epoch numbers and strptime patterns.

Oracles: pandas.Timestamp for the expected instants (ISO 8601 text, UTC), Python's
datetime.strptime semantics for the day-first pattern, and the Unix epoch definition
(POSIX: seconds since 1970-01-01T00:00:00Z).
"""

import numpy as np
import pandas as pd
import pytest

from invert.cli import main
from invert.errors import InputError
from invert.io.sources import NO_TIME
from invert.io.times import check_time_format, parse_times

WANT = ["2024-03-01T00:00:01.010Z", "2024-03-01T00:00:02.003Z", "2024-03-01T00:00:02.998Z"]


def _ns(iso):
    return np.array([pd.Timestamp(x).value for x in iso], np.int64)


def test_epoch_seconds_and_milliseconds_to_the_microsecond():
    want = _ns(WANT)
    sec = [f"{v // 1000}.{v % 1000:03d}" for v in want // 10**6]
    t, bad = parse_times(sec, "epoch-s")
    np.testing.assert_array_equal(t, want)  # exact: float64 then rounded to the microsecond
    t, _ = parse_times([str(v) for v in want // 10**6], "epoch-ms")
    np.testing.assert_array_equal(t, want)
    t, _ = parse_times([float(v) for v in want // 10**6], "epoch-ms")  # numbers, not text
    np.testing.assert_array_equal(t, want)
    t, bad = parse_times(["", None, "soon", "0"], "epoch-s")
    assert bad.tolist() == [2, 2, 1, 0] and t[3] == 0 and (t[:3] == NO_TIME).all()


def test_day_first_pattern():
    t, bad = parse_times(["01/03/2024 00:00:01", "13/03/2024 12:30:00", "2024-03-01"],
                         "%d/%m/%Y %H:%M:%S")
    assert t[0] == pd.Timestamp("2024-03-01T00:00:01Z").value
    assert t[1] == pd.Timestamp("2024-03-13T12:30:00Z").value
    assert bad.tolist() == [0, 0, 1]


def test_a_format_that_is_neither_is_refused():
    with pytest.raises(InputError, match="neither an epoch unit"):
        check_time_format("dd/mm/yyyy")


@pytest.mark.parametrize("fmt, cells", [
    ("epoch-s", ["1709251201.01", "1709251202.003", "1709251202.998"]),
    ("%d/%m/%Y %H:%M:%S.%f", ["01/03/2024 00:00:01.010", "01/03/2024 00:00:02.003",
                              "01/03/2024 00:00:02.998"]),
])
def test_batch_writes_the_named_times_as_date_times(tmp_path, fmt, cells):
    log = tmp_path / "log.csv"
    log.write_text("time,s0,s1,s2\n" + "".join(f"{c},1.0,2.0,3.0\n" for c in cells))
    layout = tmp_path / "layout.csv"
    layout.write_text("sensor,x,y\ns0,1,0\ns1,-0.5,0.866\ns2,-0.5,-0.866\n")
    out = tmp_path / "o"
    assert main(["batch", str(log), "--layout", str(layout), "--radius", "1", "--out", str(out),
                 "--format", "parquet", "--lam", "0.1", "--noise-sd", "0.1",
                 "--time-format", fmt]) == 0
    fr = pd.read_parquet(out / "frames.parquet")
    assert (pd.DatetimeIndex(fr["time"]) == pd.DatetimeIndex(pd.to_datetime(WANT))).all()
    assert main(["batch", str(log), "--layout", str(layout), "--radius", "1", "--out",
                 str(tmp_path / "o2"), "--lam", "0.1", "--noise-sd", "0.1",
                 "--time-format", "dd/mm"]) == 2
    assert not (tmp_path / "o2").exists()
