"""batch --assimilate --sensor-health: options, outputs, resume, the dask engine, the report.

Oracles: the seeded faults of tests/scenarios.health_log (which sensor, when); an
uninterrupted run (value for value) for resume; the local engine for dask; the per-frame
smoothed offsets of the compiled kernel run directly (invert.stages.assimilate.kernel, on
the same augmented model) for the block sums of sensors.csv; numpy's mean and root mean
square over the block's frames.
"""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scenarios

from invert.batch.runner import run_batch
from invert.cli import main
from invert.stages.assimilate import health, kernel

SENSOR_COLUMNS = ["sensor", "time_start", "time_end", "n_frames", "offset_mean", "offset_sd",
                  "offset_lower", "offset_upper", "spikes", "flag"]
KW = dict(radius=1.0, assimilate=True, lam=1.0, noise_sd=0.05, time_scale=200.0,
          say=lambda *_: None, sensor_health=True, health_block="100")


@pytest.fixture(scope="module")
def seeded(tmp_path_factory):
    folder = tmp_path_factory.mktemp("health")
    log = scenarios.health_log(np.random.default_rng(7), n_frames=900)
    lp, lay = scenarios.write_health_log(folder, log, trusted=True)
    return log, lp, lay


def _cli(lp, lay, out, *extra):
    return main(["batch", str(lp), "--layout", str(lay), "--radius", "1", "--out", str(out),
                 "--lam", "1", "--noise-sd", "0.05", "--time-scale", "200", *extra])


@pytest.mark.parametrize("extra, message", [
    (("--assimilate", "--offset-sd", "1"), "--offset-sd belong(s) to --sensor-health"),
    (("--assimilate", "--health-block", "5"), "--health-block belong(s) to --sensor-health"),
    (("--sensor-health",), "--sensor-health needs --assimilate"),
    (("--assimilate", "--sensor-health", "--max-transient", "5"), "needs --assimilate"),
    (("--assimilate", "--sensor-health", "--health-block", "10 parsecs"),
     "--health-block must be a frame count >= 1 (e.g. 1000) or a duration"),
    (("--assimilate", "--sensor-health", "--health-block", "0"), "--health-block must be"),
])
def test_bad_options_exit_2_with_one_line(seeded, tmp_path, capsys, extra, message):
    _, lp, lay = seeded
    out = tmp_path / "out"
    assert _cli(lp, lay, out, *extra) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("rim-invert: error: ") and message in err[0]
    assert not out.exists()  # nothing half-written


@pytest.mark.parametrize("cell, message", [
    ("maybe", "layout.csv, row 2, column 'trusted': must be 1/0, true/false or yes/no"),
    (None, "layout.csv, column 'trusted': every sensor is marked trusted"),
])
def test_bad_trusted_column_exit_2(seeded, tmp_path, capsys, cell, message):
    _, lp, lay = seeded
    frame = pd.read_csv(lay)
    if cell is None:
        frame["trusted"] = 1
    else:
        frame["trusted"] = frame["trusted"].astype(object)
        frame.loc[0, "trusted"] = cell
    bad = tmp_path / "layout.csv"
    frame.to_csv(bad, index=False)
    out = tmp_path / "out"
    assert _cli(lp, bad, out, "--assimilate", "--sensor-health") == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0], err
    assert not out.exists()


def test_outputs_flags_and_block_sums(seeded, tmp_path):
    log, lp, lay = seeded
    out = tmp_path / "out"
    s = run_batch(lp, lay, out=out, fmt="csv", chunk_rows=150, **KW)
    sens = pd.read_csv(out / "sensors.csv")
    spk = pd.read_csv(out / "spikes.csv")
    assert list(sens.columns) == SENSOR_COLUMNS
    assert list(spk.columns) == ["time", "sensor", "probability"]
    assert (spk["probability"] > 0.5).all()
    # 9 blocks of 100 records per sensor (chunks of 150 records: blocks straddle chunks)
    assert len(sens) == 9 * len(log["ids"]) and (sens["n_frames"] == 100).all()
    hs = s["sensor_health"]
    assert hs["reference"].startswith("anchored: the 5 sensor(s) marked trusted")
    assert {f["sensor"] for f in hs["flagged"]} == {"s03", "s10"}
    step = {f["sensor"]: f["since"] for f in hs["flagged"]}["s03"]
    # the step is at record 450: its block [400, 500) averages half the step (2.5 sd of the
    # noise, many offset sds) and is the first one flagged
    assert step == 400.0
    assert any("sensor s03: offset of" in w and "flagged from 400" in w for w in s["warnings"])
    assert not sens.loc[sens["sensor"].isin(scenarios.HEALTH_TRUSTED), "flag"].any()
    # block sums against the kernel run directly on the same augmented model: mean of the
    # frames' smoothed offsets and root mean square of their sds (numpy); 1e-9: the kernel
    # over one chunk vs chained over six, rounding of the carried adjoint
    trusted = np.isin(log["ids"], scenarios.HEALTH_TRUSTED)
    model = log["model"].with_time_scale(200.0)
    km = health.augment(model, health.HealthSettings(), trusted)
    rows = health.offset_rows(model.n_coef, len(log["ids"]), trusted)
    direct = kernel.smooth_model(km, log["t"], log["Y"], rows)
    s03 = sens[sens["sensor"] == "s03"]
    om, osd = direct.query_mean[:, 3], direct.query_sd[:, 3]
    np.testing.assert_allclose(s03["offset_mean"], om.reshape(9, 100).mean(axis=1), atol=1e-9)
    np.testing.assert_allclose(s03["offset_sd"], np.sqrt((osd**2).reshape(9, 100).mean(axis=1)),
                               rtol=1e-9)


def test_resume_gives_the_same_outputs(seeded, tmp_path):
    _, lp, lay = seeded
    ref = tmp_path / "ref"
    run_batch(lp, lay, out=ref, chunk_rows=150, **KW)

    class Stop(RuntimeError):
        pass

    calls = []

    def stop_after(i):
        calls.append(i)
        if len(calls) == 8:  # 6 forward chunks, then 2 backward chunks
            raise Stop

    out = tmp_path / "killed"
    with pytest.raises(Stop):
        run_batch(lp, lay, out=out, chunk_rows=150, on_chunk=stop_after, **KW)
    run_batch(lp, lay, out=out, chunk_rows=150, resume=True, **KW)
    for name in ("frames", "query", "sensors", "spikes"):
        pd.testing.assert_frame_equal(pd.read_parquet(ref / f"{name}.parquet"),
                                      pd.read_parquet(out / f"{name}.parquet"), check_exact=True)


def test_dask_engine_runs_the_same_tasks(seeded, tmp_path):
    pytest.importorskip("dask.distributed")
    _, lp, lay = seeded
    run_batch(lp, lay, out=tmp_path / "local", chunk_rows=300, **KW)
    s = run_batch(lp, lay, out=tmp_path / "dask", chunk_rows=300, engine="dask", n_workers=1,
                  **KW)
    assert s["engine"] == "dask"
    for name in ("sensors", "spikes", "query"):
        a = pd.read_parquet(tmp_path / "local" / f"{name}.parquet")
        b = pd.read_parquet(tmp_path / "dask" / f"{name}.parquet")
        # same tasks on another engine: equal to rounding (1e-10 absolute, readings ~20)
        pd.testing.assert_frame_equal(a, b, check_exact=False, rtol=0, atol=1e-10)


def test_report_shows_flagged_offsets(seeded, tmp_path):
    _, lp, lay = seeded
    out = tmp_path / "out"
    run_batch(lp, lay, out=out, chunk_rows=300, **KW)
    html = (out / "report.html").read_text()
    assert "alt='sensor_offsets'" in html and "s03" in html  # the figure, embedded
    assert "marked trusted" in html
    summary = json.loads((out / "summary.json").read_text())
    assert summary["sensor_health"]["offset_sd"] == pytest.approx(0.5)  # 10 noise sds


def test_without_the_option_no_health_outputs(seeded, tmp_path):
    _, lp, lay = seeded
    kw = {k: v for k, v in KW.items() if k not in ("sensor_health", "health_block")}
    s = run_batch(lp, lay, out=tmp_path / "out", chunk_rows=300, **kw)
    assert "sensor_health" not in s
    assert not (Path(tmp_path / "out") / "sensors.parquet").exists()


def test_zero_sum_reference_warns_of_the_mean_level_bias(seeded, tmp_path):
    # No sensor marked trusted: offsets sum to zero, so the field's mean level takes 1/n of
    # each flagged offset (health module Notes); the warnings must say so.
    log, _, _ = seeded
    lp, lay = scenarios.write_health_log(tmp_path, log, trusted=False)
    s = run_batch(lp, lay, out=tmp_path / "out", fmt="csv", **KW)
    assert s["sensor_health"]["reference"].startswith("zero sum")
    assert s["sensor_health"]["flagged"]
    assert any("no sensor is marked trusted" in w and "absorbs 1/26" in w
               for w in s["warnings"])
