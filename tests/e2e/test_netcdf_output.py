"""batch --format netcdf: results.nc round-trips the query table and follows CF attributes.

Oracles: the query.parquet and frames.parquet written by the same run (values exactly), and
the CF Conventions 1.10 text for the attributes checked here: section 2.6.1 (Conventions),
4.4 (time units "<unit> since <reference>"), 3.5 (flag_values and flag_meanings: one blank-
separated word per value, values of the variable's type) and 5 (a coordinate variable is
strictly monotonic with no missing values).
"""

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from invert.cli import main

DATA = Path(__file__).resolve().parents[2] / "datasets"


@pytest.mark.parametrize("assimilate", [False, True])
def test_results_nc_round_trips_and_follows_cf(tmp_path, assimilate):
    out = tmp_path / "o"
    args = ["batch", str(DATA / "demo_log.csv"), "--layout", str(DATA / "demo_layout.csv"),
            "--radius", "0.25", "--out", str(out), "--format", "netcdf", "--unit", "degC",
            "--lam", "0.02", "--noise-sd", "0.05", "--chunk-rows", "128"]
    assert main(args + (["--assimilate", "--time-scale", "1500"] if assimilate else [])) == 0
    fr = pd.read_parquet(out / "frames.parquet")
    q = pd.read_parquet(out / "query.parquet")
    with xr.open_dataset(out / "results.nc") as ds:
        assert ds.attrs["Conventions"] == "CF-1.10"
        acc = fr[fr["status"] != "rejected"]
        assert ds.sizes["time"] == len(acc) and ds.attrs["rejected_frames"] == \
            int((fr["status"] == "rejected").sum()) > 0
        t = ds["time"].values
        assert np.all(np.diff(t.astype(float)) > 0) and np.isfinite(t.astype(float)).all()
        np.testing.assert_array_equal(t, acc["time"].to_numpy())
        labels = list(ds["label"].values)
        for k in ("mean", "sd", "lower", "upper"):
            assert ds[k].attrs["units"] == "degC"
            want = q.pivot(index="time", columns="label", values=k)[labels]
            got = ds[k].to_pandas()
            got = got.loc[want.index]
            np.testing.assert_array_equal(got.to_numpy(), want.to_numpy())
            # frames with no estimate are missing (static no-data frames), never zero
            rest = ds[k].to_pandas().drop(index=want.index)
            assert rest.isna().all().all()
        st = ds["status"]
        assert len(st.attrs["flag_meanings"].split()) == len(st.attrs["flag_values"])
        assert st.attrs["flag_values"].dtype == st.dtype
        codes = dict(zip(st.attrs["flag_meanings"].split(), st.attrs["flag_values"],
                         strict=True))
        np.testing.assert_array_equal(
            st.values, acc["status"].map({"ok": codes["ok"], "no-data": codes["no_data"]}))
    with xr.open_dataset(out / "results.nc", decode_times=False) as raw:
        assert "units" not in raw["time"].attrs  # numeric log: its own unit, not a date


def test_date_time_log_gets_cf_time_units(tmp_path):
    log = tmp_path / "log.csv"
    log.write_text("time,s0,s1,s2\n2024-03-01T00:00:01.010Z,1,2,3\n"
                   "2024-03-01T00:00:02.003Z,1,2,\n2024-03-01T00:00:02.998Z,1,2,3\n")
    layout = tmp_path / "layout.csv"
    layout.write_text("sensor,x,y\ns0,1,0\ns1,-0.5,0.866\ns2,-0.5,-0.866\n")
    out = tmp_path / "o"
    assert main(["batch", str(log), "--layout", str(layout), "--radius", "1", "--out",
                 str(out), "--format", "netcdf", "--lam", "0.1", "--noise-sd", "0.1"]) == 0
    with xr.open_dataset(out / "results.nc", decode_times=False) as raw:
        units = raw["time"].attrs["units"]
        assert re.fullmatch(r"\w+ since \d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", units), units
        assert raw["time"].attrs["standard_name"] == "time"
    with xr.open_dataset(out / "results.nc") as ds:
        assert str(ds["time"].values[0]) == "2024-03-01T00:00:01.010000000"
