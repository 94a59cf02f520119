"""Inputs as spreadsheets and loggers write them, and options a user may get wrong: each gives a
right result with the assumption stated, or exit code 2 and one line, and nothing in --out."""

import json
import socket
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from invert.cli import main
from invert.cli_checks import one_line

ROOT = Path(__file__).resolve().parents[2]
DATA = ROOT / "invert" / "data"
LOG, LAYOUT = ROOT / "datasets" / "demo_log.csv", ROOT / "datasets" / "demo_layout.csv"


def run(args, capsys):
    try:
        code = main([str(a) for a in args])
    except SystemExit as e:  # argparse refusals exit from inside parse_args
        code = e.code
    out = capsys.readouterr()
    return code, out.out, out.err


def one_error(err):
    lines = err.strip().splitlines()
    lines = [ln for ln in lines if not ln.startswith("usage:") and not ln.startswith("  ")]
    assert len(lines) == 1 and lines[0].startswith("rim-invert: error: ") and \
        len(lines[0]) > len("rim-invert: error: ") + 5, err
    return lines[0]


def readings(tmp_path, name="r.csv", n=16, extra=None, z=False):
    """A small SYNTHETIC snapshot: n rim sensors of 20 + cos(theta), sigma 0.05."""
    th = np.linspace(0, 2 * np.pi, n, endpoint=False)
    df = pd.DataFrame({"sensor": [f"T{i:02d}" for i in range(n)], "x": np.cos(th),
                       "y": np.sin(th), "value": np.round(20 + np.cos(th), 4), "sigma": 0.05})
    if z:
        df.insert(3, "z", 0.0)
    if extra is not None:
        df = extra(df)
    f = tmp_path / name
    df.to_csv(f, index=False)
    return f


def european(src, dst):
    """The same file as a European spreadsheet exports it: ';' between cells, decimal commas."""
    text = Path(src).read_text()
    out = []
    for ln in text.splitlines():
        if ln.startswith("#"):
            out.append(ln)
            continue
        out.append(";".join(c.replace(".", ",") for c in ln.split(",")))
    Path(dst).write_text("\n".join(out) + "\n")
    return dst


# --- delimiters, decimal marks, encodings ----------------------------------------------------
def test_european_and_tab_files_give_the_same_fit_with_the_assumption_stated(tmp_path, capsys):
    plain = readings(tmp_path)
    euro = european(plain, tmp_path / "euro.csv")
    tab = tmp_path / "tab.csv"
    tab.write_text(plain.read_text().replace(",", "\t"))
    outs = {}
    for f in (plain, euro, tab):
        o = tmp_path / f"o_{f.stem}"
        code, out, err = run(["fit", f, "--radius", 1, "--out", o], capsys)
        assert code == 0, err
        outs[f.stem] = (o, out)
    ref = pd.read_csv(outs["r"][0] / "boundary.csv")
    for k in ("euro", "tab"):
        # same decimal strings, so the same floats: the outputs agree exactly
        pd.testing.assert_frame_equal(pd.read_csv(outs[k][0] / "boundary.csv"), ref)
    warn = json.loads((outs["euro"][0] / "summary.json").read_text())["warnings"]
    assert any("euro.csv: read as semicolon-separated" in w for w in warn)
    assert any("euro.csv: numbers read with a decimal comma" in w for w in warn)
    assert "tab.csv: read as tab-separated" in outs["tab"][1]


def test_sep_and_decimal_options(tmp_path, capsys):
    euro = european(readings(tmp_path), tmp_path / "euro.csv")
    code, _, err = run(["fit", euro, "--radius", 1, "--out", tmp_path / "o", "--sep", ";",
                        "--decimal", ","], capsys)
    assert code == 0, err
    warn = json.loads((tmp_path / "o" / "summary.json").read_text())["warnings"]
    assert not any("detected" in w for w in warn)  # given, not assumed
    code, _, err = run(["fit", euro, "--radius", 1, "--out", tmp_path / "o2", "--sep", ","],
                       capsys)
    assert code == 2 and "has 5 cells but the header has 1 (is the delimiter another one? " \
        "give --sep)" in one_error(err) and not (tmp_path / "o2").exists()
    code, _, err = run(["fit", euro, "--radius", 1, "--out", tmp_path / "o3", "--sep", "|"],
                       capsys)
    assert code == 2 and "--sep must be one of" in one_error(err)


def test_latin1_degree_sign_in_a_comment(tmp_path, capsys):
    f = readings(tmp_path)
    f.write_bytes(b"# SYNTHETIC, values in \xb0C\n" + f.read_bytes())
    code, out, err = run(["fit", f, "--radius", 1, "--out", tmp_path / "o"], capsys)
    assert code == 0, err
    assert "r.csv: not valid UTF-8 (first at line 1, byte 0xb0); read as Latin-1" in out


def small_log(tmp_path, n_lines=120):
    lines = LOG.read_text().splitlines()[:n_lines]
    f = tmp_path / "log.csv"
    f.write_text("\n".join(lines) + "\n")
    return f


def test_batch_on_a_european_log_equals_the_comma_log(tmp_path, capsys):
    plain = small_log(tmp_path)
    euro = european(plain, tmp_path / "euro_log.csv")
    for f, o, extra in ((plain, "a", []), (euro, "b", []), (euro, "c", ["--sep", ";",
                                                                      "--decimal", ","])):
        code, _, err = run(["batch", f, "--layout", LAYOUT, "--radius", 0.25, "--out",
                            tmp_path / o, "--format", "csv", *extra], capsys)
        assert code == 0, err
    for o in ("b", "c"):
        for name in ("frames.csv", "query.csv"):
            assert (tmp_path / o / name).read_bytes() == (tmp_path / "a" / name).read_bytes()
    warn = json.loads((tmp_path / "b" / "summary.json").read_text())["warnings"]
    assert any("read as semicolon-separated" in w for w in warn)


# --- silently ignored or changed inputs -------------------------------------------------------
@pytest.mark.parametrize("opts,message", [
    (["--faulty"], "--faulty, --angle-sd and --max-steps belong to --method mcmc; the "
                   "averaged fit would ignore them"),
    (["--angle-sd", "2", "--method", "gaussian"], "the gaussian fit would ignore them"),
    (["--max-steps", "100"], "--max-steps belong to --method mcmc"),
    (["--rule", "gcv", "--method", "gaussian"], "--rule belong to --method tikhonov"),
    (["--rule", "gcv", "--lam", "0.1", "--noise-sd", "0.1"], "--rule and --lam exclude"),
])
def test_options_the_method_would_ignore(tmp_path, capsys, opts, message):
    code, _, err = run(["fit", readings(tmp_path), "--radius", 1, "--out", tmp_path / "o",
                        *opts], capsys)
    assert code == 2 and message in one_error(err)
    assert not (tmp_path / "o").exists()


def test_z_column_needs_the_ball(tmp_path, capsys):
    f = readings(tmp_path, z=True)
    for cmd in ("fit", "advise"):
        code, _, err = run([cmd, f, "--radius", 1, "--out", tmp_path / "o"], capsys)
        assert code == 2 and "r.csv, column 'z': readings with a 'z' column are in a ball" \
            in one_error(err) and not (tmp_path / "o").exists()
    code, _, err = run(["advise", f, "--radius", 1, "--out", tmp_path / "o", "--domain",
                        "ball"], capsys)
    assert code == 2 and "advise needs a region with a rim circle" in one_error(err)
    assert not (tmp_path / "o").exists()


def with_polar(shift_deg=0.0):
    def f(df):
        df = df.copy()
        df["r"] = np.hypot(df.x, df.y)
        df["theta_deg"] = np.rad2deg(np.arctan2(df.y, df.x))
        df.loc[3, "theta_deg"] += shift_deg
        return df
    return f


def test_xy_and_polar_together(tmp_path, capsys):
    ok = readings(tmp_path, "ok.csv", extra=with_polar())
    code, out, err = run(["fit", ok, "--radius", 1, "--out", tmp_path / "o"], capsys)
    assert code == 0 and "positions given both as x,y and as r,theta_deg; they agree" in out
    bad = readings(tmp_path, "bad.csv", extra=with_polar(10.0))
    code, _, err = run(["fit", bad, "--radius", 1, "--out", tmp_path / "o2"], capsys)
    assert code == 2 and "bad.csv, row 5: x,y = (" in one_error(err) and "disagree" in err
    assert not (tmp_path / "o2").exists()


def test_negative_min_spacing(tmp_path, capsys):
    code, _, err = run(["advise", readings(tmp_path), "--radius", 1, "--out", tmp_path / "a",
                        "--min-spacing", "-5"], capsys)
    assert code == 2 and "--min-spacing must be >= 0, got '-5'" in one_error(err)
    assert not (tmp_path / "a").exists()


def test_count_larger_than_the_candidates_is_said(tmp_path, capsys):
    code, out, err = run(["advise", readings(tmp_path), "--radius", 1, "--out", tmp_path / "a",
                          "--count", 1000], capsys)
    assert code == 0, err
    adv = json.loads((tmp_path / "a" / "advice.json").read_text())
    n = len(pd.read_csv(tmp_path / "a" / "candidates.csv"))
    assert n < 1000 and adv["n_chosen"] == n
    assert f"--count 1000: only {n} new sensor(s) could be placed" in adv["warnings"][0]
    assert adv["warnings"][0] in out


def test_repeated_sensor_ids(tmp_path, capsys):
    def dup(df):
        df = df.copy()
        df.loc[5, "sensor"] = "T01"
        df.loc[9, "sensor"] = "T02"
        return df
    code, _, err = run(["fit", readings(tmp_path, extra=dup), "--radius", 1, "--out",
                        tmp_path / "o"], capsys)
    line = one_error(err)
    assert code == 2 and "r.csv, row 7, column 'sensor': sensor 'T01' is given again (first " \
        "at row 3)" in line and "also repeated: 'T02' (rows 4, 11)" in line
    assert not (tmp_path / "o").exists()


def test_readings_at_one_position(tmp_path, capsys):
    def twins(df):
        extra = df.iloc[[1, 2]].copy()
        extra["sensor"] = ["X01", "X02"]
        extra.iloc[1, extra.columns.get_loc("value")] += 3.0
        return pd.concat([df, extra], ignore_index=True)
    code, _, err = run(["fit", readings(tmp_path, extra=twins), "--radius", 1, "--out",
                        tmp_path / "o"], capsys)
    assert code == 0, err
    warn = json.loads((tmp_path / "o" / "summary.json").read_text())["warnings"]
    assert any("'T02' (row 4, 20.7071), 'X02' (row 19, 23.7071) are at one position but "
               "disagree" in w for w in warn)
    assert any("'T01' (row 3, 20.9239), 'X01' (row 18, 20.9239) are at one position with the "
               "same value" in w for w in warn)


@pytest.mark.parametrize("opts,message", [
    (["--threshold", "nan"], "--threshold must be a finite number, got 'nan'"),
    (["--grid", "2"], "--grid must be >= 3, got '2'"),
    (["--grid", "0"], "--grid must be >= 3, got '0'"),
    (["--n-modes", "0"], "--n-modes must be >= 1, got '0'"),
    (["--seed", "-1"], "--seed must be >= 0, got '-1'"),
    (["--seed", "-1", "--method", "mcmc"], "--seed must be >= 0, got '-1'"),
    (["--center", "nan", "0"], "--center must be a finite number, got 'nan'"),
])
def test_option_values_refused(tmp_path, capsys, opts, message):
    code, _, err = run(["fit", readings(tmp_path), "--radius", 1, "--out", tmp_path / "o",
                        *opts], capsys)
    assert code == 2 and message in one_error(err) and not (tmp_path / "o").exists()


# --- unclear messages made clear --------------------------------------------------------------
def set_cell(row, column, text):
    def f(df):
        df = df.copy().astype({column: object})
        df.loc[row, column] = text
        return df
    return f


@pytest.mark.parametrize("row,column,text,message", [
    (3, "value", "1e308", "r.csv, row 5, column 'value': 1e+308 is too large to compute with"),
    (3, "sigma", "1e-300", "r.csv, row 5, column 'sigma': 1e-300 is below 1e-100"),
    (3, "sensor", "T\n03", "r.csv, row 5, column 'sensor': sensor id 'T\\n03' holds a line "
                           "break"),
    (3, "sensor", "x" * 200_000, "r.csv, row 5: a cell is longer than 131072 characters"),
])
def test_clear_lines_for_extreme_cells(tmp_path, capsys, row, column, text, message):
    f = readings(tmp_path, extra=set_cell(row, column, text))
    code, _, err = run(["fit", f, "--radius", 1, "--out", tmp_path / "o"], capsys)
    assert code == 2 and message in one_error(err) and not (tmp_path / "o").exists()


def test_error_lines_are_never_empty():
    assert one_line(ValueError("")) == "ValueError (no message)"
    assert one_line(ValueError("\n^\n ^\nParseException: bad")) == "ParseException: bad"


# --- outputs and paths ------------------------------------------------------------------------
def test_out_under_a_file_is_refused_before_computing(tmp_path, capsys):
    f = readings(tmp_path)
    for cmd in (["fit", f, "--radius", 1], ["advise", f, "--radius", 1], ["demo"],
                ["batch", LOG, "--layout", LAYOUT, "--radius", 0.25]):
        code, _, err = run([*cmd, "--out", f / "sub"], capsys)
        assert code == 2 and "is a file, not a folder" in one_error(err)


def test_batch_on_a_folder(tmp_path, capsys):
    code, _, err = run(["batch", tmp_path, "--layout", LAYOUT, "--radius", 0.25, "--out",
                        tmp_path / "o"], capsys)
    assert code == 2 and "is a folder, not a log file" in one_error(err)
    assert not (tmp_path / "o").exists()


def test_batch_with_no_layout_sensor_in_the_log(tmp_path, capsys):
    f = tmp_path / "log.csv"
    f.write_text("time\n1\n2\n")
    code, _, err = run(["batch", f, "--layout", LAYOUT, "--radius", 0.25, "--out",
                        tmp_path / "o"], capsys)
    assert code == 2 and "log.csv, row 1: no column of the log is a sensor of the layout" in \
        one_error(err) and not (tmp_path / "o").exists()


def bad_times(tmp_path):
    lines = small_log(tmp_path).read_text().splitlines()
    out = [ln if i < 2 else "t" + ln.split(",", 1)[0] + "," + ln.split(",", 1)[1]
           for i, ln in enumerate(lines)]
    f = tmp_path / "bad_times.csv"
    f.write_text("\n".join(out) + "\n")
    return f


def test_failed_batch_leaves_no_work_folder(tmp_path, capsys):
    code, _, err = run(["batch", bad_times(tmp_path), "--layout", LAYOUT, "--radius", 0.25,
                        "--out", tmp_path / "o"], capsys)
    assert code == 2 and "bad_times.csv" in one_error(err)
    assert not (tmp_path / "o").exists()  # no .batch-work, no empty folder


def test_all_frames_rejected_is_exit_2(tmp_path, capsys):
    code, out, err = run(["batch", bad_times(tmp_path), "--layout", LAYOUT, "--radius", 0.25,
                          "--out", tmp_path / "o", "--lam", 1, "--noise-sd", 0.1, "--format",
                          "csv"], capsys)
    line = one_error(err)
    assert code == 2 and "all 118 frames were rejected (most often: unparseable time)" in line
    # the outputs are the complete set, each frame with its reason; no working folder
    frames = pd.read_csv(tmp_path / "o" / "frames.csv")
    assert len(frames) == 118 and set(frames["status"]) == {"rejected"}
    assert sorted(p.name for p in (tmp_path / "o").iterdir()) == \
        ["frames.csv", "query.csv", "report.html", "summary.json"]


@pytest.mark.parametrize("opts,message", [
    (["--chunk-rows", "-5"], "--chunk-rows must be >= 1, got '-5'"),
    (["--chunk-rows", "0"], "--chunk-rows must be >= 1, got '0'"),
    (["--max-transient", "-1"], "--max-transient must be >= 0, got '-1'"),
    (["--n-modes", "0"], "--n-modes must be >= 1, got '0'"),
    (["--level", "1.5"], "'level' parameter of batch must be a float in the range (0, 1)"),
])
def test_batch_option_values_refused(tmp_path, capsys, opts, message):
    code, _, err = run(["batch", LOG, "--layout", LAYOUT, "--radius", 0.25, "--out",
                        tmp_path / "o", *opts], capsys)
    assert code == 2 and message in one_error(err) and not (tmp_path / "o").exists()


def closed_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


@pytest.mark.timeout(60)
@pytest.mark.parametrize("address,engine,message", [
    ("tcp://127.0.0.1:{port}", "dask", "no scheduler answers there within 5 s"),
    ("tls://127.0.0.1:{port}", "dask", "needs TLS certificates, and none are set"),
    ("garbage", "dask", "is not an address like tcp://HOST:PORT"),
    ("foo://127.0.0.1:8786", "dask", "unknown scheme 'foo'"),
    ("tcp://127.0.0.1:{port}", "local", "belongs to --engine dask"),
])
def test_scheduler_checked_before_the_run(tmp_path, capsys, address, engine, message):
    address = address.format(port=closed_port())
    t0 = time.monotonic()
    code, _, err = run(["batch", LOG, "--layout", LAYOUT, "--radius", 0.25, "--out",
                        tmp_path / "o", "--engine", engine, "--scheduler", address], capsys)
    line = one_error(err)
    assert code == 2 and address in line and message in line
    assert not (tmp_path / "o").exists()
    # a refused address costs at most the connect timeout, not dask's 30 s (generous bound:
    # the machine is shared)
    assert time.monotonic() - t0 < 25


@pytest.mark.timeout(60)
def test_scheduler_that_listens_but_never_answers(tmp_path, capsys):
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    s.listen(4)  # connections are accepted by the kernel, nothing ever answers
    address = f"tcp://127.0.0.1:{s.getsockname()[1]}"
    try:
        t0 = time.monotonic()
        code, _, err = run(["batch", LOG, "--layout", LAYOUT, "--radius", 0.25, "--out",
                            tmp_path / "o", "--engine", "dask", "--scheduler", address], capsys)
        line = one_error(err)
        assert code == 2 and f"--scheduler '{address}': no dask scheduler answered there " \
            "within 5 s" in line
        assert time.monotonic() - t0 < 25  # bounded by the 5 s check (generous: shared host)
        assert not (tmp_path / "o").exists()
    finally:
        s.close()


def test_formula_cells_quoted_in_batch_and_advise_csv(tmp_path, capsys):
    q = tmp_path / "q.csv"
    q.write_text('label,x,y\n"=HYPERLINK(""http://x"")",0,0\n-3.2,0.1,0\n@SUM(1),0,0.1\n')
    code, _, err = run(["batch", small_log(tmp_path), "--layout", LAYOUT, "--radius", 0.25,
                        "--out", tmp_path / "b", "--format", "csv", "--query", q], capsys)
    assert code == 0, err
    labels = pd.read_csv(tmp_path / "b" / "query.csv", dtype={"label": str})["label"]
    assert set(labels) == {"'=HYPERLINK(\"http://x\")", "-3.2", "'@SUM(1)"}

    def gap(df):
        df = df.copy().astype({"value": object})
        df.loc[4, "sensor"], df.loc[4, "value"] = "=cmd()", ""
        return df
    code, _, err = run(["advise", readings(tmp_path, extra=gap), "--radius", 1, "--out",
                        tmp_path / "a"], capsys)
    assert code == 0, err
    assert pd.read_csv(tmp_path / "a" / "repair.csv")["sensor"][0] == "'=cmd()"


def test_latin1_log_and_layout(tmp_path, capsys):
    lines = LOG.read_text().splitlines()[:60]
    lines[0] = "# SYNTHETIC log, values in \u00b0C"
    lines[1] = lines[1].replace("tc00", "tc\u00e900")
    log = tmp_path / "log.csv"
    log.write_bytes(("\n".join(lines) + "\n").encode("latin-1"))
    layout = tmp_path / "layout.csv"
    layout.write_bytes(LAYOUT.read_text().replace("tc00", "tc\u00e900").encode("latin-1"))
    code, _, err = run(["batch", log, "--layout", layout, "--radius", 0.25, "--out",
                        tmp_path / "o", "--format", "csv"], capsys)
    assert code == 0, err
    assert "log.csv: not valid UTF-8 (first at line 1, byte 0xb0); read as Latin-1" in err
    frames = pd.read_csv(tmp_path / "o" / "frames.csv")
    assert len(frames) == 58 and set(frames["status"]) == {"ok"}


def test_out_as_a_mount_point_is_refused_before_computing(tmp_path, capsys):
    import subprocess

    mnt = tmp_path / "mnt"
    mnt.mkdir()
    if subprocess.run(["mount", "-t", "tmpfs", "tmpfs", str(mnt)],
                      capture_output=True).returncode != 0:
        pytest.skip("cannot mount a tmpfs here")
    try:
        code, _, err = run(["fit", readings(tmp_path), "--radius", 1, "--out", mnt], capsys)
        assert code == 2 and "is a mount point (another file system than its parent)" in \
            one_error(err)
        assert not any(mnt.iterdir()) and not any(p.name.startswith(".mnt.") for p in
                                                  tmp_path.iterdir())
    finally:
        subprocess.run(["umount", str(mnt)], capture_output=True)


def test_fit_query_labels_are_spreadsheet_safe(tmp_path):
    # OWASP "CSV Injection": a text cell starting with = + - @ is written with a leading quote
    q = tmp_path / "q.csv"
    q.write_text('label,x,y\n"=HYPERLINK(""x"")",0.0,0.0\n-3.2,0.1,0.0\n')
    out = tmp_path / "o"
    assert main(["fit", str(DATA / "demo_readings.csv"), "--radius", "0.25", "--out", str(out),
                 "--query", str(q)]) == 0
    text = (out / "query.csv").read_text()
    assert "'=HYPERLINK" in text and "\n=HYPERLINK" not in text
