"""The command line end to end: outputs, and one-line errors with exit code 2 on bad input."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from invert.cli import main

DATA = Path(__file__).resolve().parents[2] / "invert" / "data"


def run(args, capsys):
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_demo_writes_everything(tmp_path, capsys):
    code, out, err = run(["demo", "--out", tmp_path / "d"], capsys)
    assert code == 0, err
    d = tmp_path / "d"
    for name in ["summary.json", "boundary.csv", "query.csv", "field.csv", "rim_profile.png",
                 "field_maps.png"]:
        assert (d / name).exists(), name
    assert str(d) in out
    b = pd.read_csv(d / "boundary.csv")
    assert list(b.columns) == ["theta_deg", "mean", "sd", "lower", "upper"] and len(b) >= 360
    assert np.all(b["lower"] < b["mean"]) and np.all(b["mean"] < b["upper"])
    q = pd.read_csv(d / "query.csv")
    assert list(q.columns) == ["label", "x", "y", "mean", "sd", "lower", "upper"]
    s = json.loads((d / "summary.json").read_text())
    assert s["method"] == "averaged" and s["readings"]["n_gaps"] == 8
    assert any("harmonic" in c for c in s["cautions"])


def test_demo_estimates_cover_the_synthetic_truth(tmp_path, capsys):
    # The demo's true field is known (datasets/make_demo.py); the 90 % intervals at the five
    # query points should mostly contain it (>= 4 of 5: a 90 % interval misses 1 in 10).
    run(["demo", "--out", tmp_path / "d"], capsys)
    q = pd.read_csv(tmp_path / "d" / "query.csv")
    truth = pd.read_csv(DATA.parents[1] / "datasets" / "demo_truth_query.csv", comment="#")
    inside = (q["lower"] <= truth["true_value"]) & (truth["true_value"] <= q["upper"])
    assert inside.sum() >= 4
    assert np.max(np.abs(q["mean"] - truth["true_value"])) < 1.5  # degC, vs 24 degC contrast


def test_fit_with_query_center_and_r_theta(tmp_path, capsys):
    th = np.arange(0, 360, 20.0)
    df = pd.DataFrame({"r": 2.0, "theta_deg": th, "value": 5 + np.cos(np.deg2rad(th))})
    df.loc[3, "value"] = np.nan
    df.to_csv(tmp_path / "r.csv", index=False)
    pd.DataFrame({"x": [10.0, 11.0], "y": [-3.0, -3.0], "label": ["c", "e"]}).to_csv(
        tmp_path / "q.csv", index=False)
    # r,theta are relative to the centre; x,y of the query are in the frame of --center.
    code, out, err = run(["fit", tmp_path / "r.csv", "--radius", 2, "--out", tmp_path / "o",
                          "--rule", "gcv", "--center", 10, -3, "--query", tmp_path / "q.csv"],
                         capsys)
    assert code == 0, err
    s = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert s["rule"] == "gcv" and s["readings"]["n_gaps"] == 1
    q = pd.read_csv(tmp_path / "o" / "query.csv")
    # rim data 5 + cos(theta) gives 5 + (r/R) cos(theta) inside (closed form): 5 at the centre,
    # 5.5 at (11, -3), i.e. r/R = 1/2 on the +x axis. Tolerance: 3 posterior sds.
    assert abs(q["mean"][0] - 5.0) < 3 * q["sd"][0] + 1e-6
    assert abs(q["mean"][1] - 5.5) < 3 * q["sd"][1] + 1e-6


def test_same_seed_same_output(tmp_path, capsys):
    for k in (1, 2):
        run(["fit", DATA / "demo_readings.csv", "--radius", 0.25, "--out", tmp_path / f"o{k}",
             "--seed", 3], capsys)
    assert (tmp_path / "o1" / "boundary.csv").read_bytes() == \
        (tmp_path / "o2" / "boundary.csv").read_bytes()


BAD = [
    ("empty.csv", "", "the file is empty"),
    ("nocol.csv", "x,y\n0,0\n", "missing required column 'value'"),
    ("noy.csv", "x,value\n0,1\n", "missing required column(s) y"),
    ("text.csv", "x,y,value\n0,0,1\n0.5,abc,2\n", "row 3, column 'y': is not a number"),
    ("nan.csv", "x,y,value\n0,0,1\n0.5,0,inf\n", "row 3, column 'value': must be finite"),
    ("sig.csv", "x,y,value,sigma\n0,0,1,0.1\n0.5,0,2,-0.2\n", "row 3, column 'sigma': must be > 0"),
    ("dup.csv", "sensor,x,y,value\nA,0,0,1\nA,0.5,0,2\n", "row 3, column 'sensor': sensor 'A'"),
    ("out.csv", "x,y,value\n0,0,1\n1.5,0,2\n", "row 3: point (1.5, 0) lies outside the disk"),
    ("gaps.csv", "x,y,value\n0,0,\n0.5,0,\n", "no usable reading"),
    ("header.csv", "x,y,value\n", "has a header but no rows"),
    ("single.csv", "x,y,value\n1,0,5\n0,1,\n", "At least 2 readings are needed; got 1"),
]


@pytest.mark.parametrize("name,content,message", BAD, ids=[b[0] for b in BAD])
def test_bad_input_one_line_exit_2_nothing_written(tmp_path, capsys, name, content, message):
    f = tmp_path / name
    f.write_text(content)
    code, out, err = run(["fit", f, "--radius", 1, "--out", tmp_path / "o"], capsys)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"rim-invert: error: {name}")
    assert message in lines[0], lines[0]
    assert not (tmp_path / "o").exists()
    assert not any(p.name.startswith(".o.staging") for p in tmp_path.iterdir())


def test_two_readings_fit_with_model_check_skipped(tmp_path, capsys):
    # Two readings are enough for a (prior-dominated) fit; the model check needs three and
    # says it was skipped instead of stopping the fit.
    f = tmp_path / "two.csv"
    f.write_text("x,y,value\n1,0,5\n0,1,6\n")
    code, out, err = run(["fit", f, "--radius", 1, "--out", tmp_path / "o"], capsys)
    assert code == 0, err
    s = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert any("model check skipped" in w for w in s["warnings"])


def test_bad_arguments_exit_2(tmp_path, capsys):
    code, _, err = run(["fit", DATA / "demo_readings.csv", "--radius", 0.25, "--out",
                        tmp_path / "o", "--level", "1.5"], capsys)
    assert code == 2 and "'level'" in err and "Got 1.5" in err
    with pytest.raises(SystemExit) as e:
        main(["fit", str(DATA / "demo_readings.csv"), "--radius", "-1", "--out", "x"])
    assert e.value.code == 2
    code, _, err = run(["fit", tmp_path / "missing.csv", "--radius", 1, "--out", tmp_path / "o"],
                       capsys)
    assert code == 2 and "missing.csv: file not found" in err
    bad_q = tmp_path / "q.csv"
    bad_q.write_text("x,y\n0,0\n9,9\n")
    code, _, err = run(["fit", DATA / "demo_readings.csv", "--radius", 0.25, "--out",
                        tmp_path / "o", "--query", bad_q], capsys)
    assert code == 2 and "q.csv, row 3" in err and not (tmp_path / "o").exists()


def test_console_script_runs():
    # The installed entry point exits 2 on a usage error (argparse) without a traceback.
    exe = Path(sys.executable).with_name("rim-invert")
    r = subprocess.run([str(exe), "fit"], capture_output=True, text=True)
    assert r.returncode == 2 and "Traceback" not in r.stderr
