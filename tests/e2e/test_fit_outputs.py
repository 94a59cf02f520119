"""fit/demo/advise outputs: the whole set replaced at once, one run per folder, no stale staging.

Oracle: the contract in the README (an output folder holds the complete set of one run; bad
input or a failure leaves it as it was) checked on the file system itself.
"""

import os
from pathlib import Path

from invert.cli import main
from invert.io.publish import OutputLock

DATA = Path(__file__).resolve().parents[2] / "invert" / "data"
READINGS = str(DATA / "demo_readings.csv")


def _fit(out, *extra):
    return main(["fit", READINGS, "--radius", "0.25", "--out", str(out), "--grid", "21", *extra])


def test_earlier_run_files_do_not_survive_a_new_fit(tmp_path):
    out = tmp_path / "o"
    assert _fit(out) == 0
    # what an MCMC run leaves and a Tikhonov fit does not write
    for name in ("posterior.nc", "sensors.csv", "traces.png"):
        (out / name).write_text("old")
    assert _fit(out) == 0
    names = {p.name for p in out.iterdir()}
    assert not names & {"posterior.nc", "sensors.csv", "traces.png"}
    assert {"summary.json", "boundary.csv", "report.html"} <= names


def test_folder_with_foreign_files_is_refused_and_untouched(tmp_path, capsys):
    out = tmp_path / "o"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    assert _fit(out) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "notes.txt" in err[0] and str(out) in err[0]
    assert [p.name for p in out.iterdir()] == ["notes.txt"]


def test_failure_while_writing_keeps_the_old_set(tmp_path, monkeypatch, capsys):
    out = tmp_path / "o"
    assert _fit(out) == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    import invert.report.html as report_html

    def broken(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(report_html, "write_report", broken)
    assert _fit(out, "--rule", "gcv") == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "simulated" in err[0]
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    assert not [p for p in tmp_path.iterdir() if "staging" in p.name]


def test_stale_staging_of_killed_runs_is_cleaned(tmp_path):
    out = tmp_path / "o"
    for name in (".o.fit-staging-99999-abc", ".o.staging-xyz"):  # new and earlier naming
        (tmp_path / name).mkdir()
        (tmp_path / name / "summary.json").write_text("{}")  # looks complete
    keep = tmp_path / ".other.fit-staging-1-a"   # another folder's: not ours to remove
    keep.mkdir()
    assert _fit(out) == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == [".other.fit-staging-1-a", "o"]


def test_second_run_on_a_locked_folder_is_refused(tmp_path, capsys):
    out = tmp_path / "o"
    with OutputLock(out):  # this process plays the run that holds the folder
        assert _fit(out) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"pid {os.getpid()}" in err[0]
    assert _fit(out) == 0  # released: the next run proceeds


def test_out_under_a_file_is_one_line(tmp_path, capsys):
    f = tmp_path / "afile"
    f.write_text("x")
    assert _fit(f / "o") == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot be created" in err[0]
    assert _fit(f) == 2
    assert "is a file" in capsys.readouterr().err
