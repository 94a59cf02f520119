"""Integrity of batch outputs and of what batch trusts (issue 17).

Oracles, from outside the code under test: an uninterrupted run of the same job (value for
value); the same data written with a single header; the bytes of an earlier complete output
set; the operating system (process table, listening sockets via psutil, file system).
Runs that must be caught part-way are small Python scripts calling ``run_batch`` with an
``on_chunk`` callback that sleeps, as in test_resume.py.
"""

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scenarios import write_ring_layout

from invert.batch import LocalEngine, job_chunks
from invert.batch.checkpoint import WorkFolder
from invert.batch.runner import job_from_files, run_batch
from invert.cli import main
from invert.io.logs import open_log
from invert.io.publish import LOCK_NAME

ROOT = Path(__file__).resolve().parents[2]
LOG, LAYOUT = ROOT / "datasets" / "demo_log.csv", ROOT / "datasets" / "demo_layout.csv"
FIXED = dict(radius=0.25, lam=0.02, noise_sd=0.05)

#: run_batch with a callback sleeping after each chunk; with "addr" set, the callback writes
#: the dask scheduler's address to that file (the default client is the engine's).
_SLOW = """
import json, sys, time
from pathlib import Path
from invert.batch.runner import run_batch
kw = json.loads(sys.argv[1])
addr = kw.pop("addr", None)
def on_chunk(i):
    if addr and i == 0:
        from distributed import default_client
        Path(addr).write_text(default_client().scheduler.address)
    time.sleep(0.15)
run_batch(kw.pop("log"), kw.pop("layout"), on_chunk=on_chunk, **kw)
"""


def _start_slow(out, **kw):
    args = dict(log=str(LOG), layout=str(LAYOUT), out=str(out), chunk_rows=40, **FIXED, **kw)
    return subprocess.Popen([sys.executable, "-c", _SLOW, json.dumps(args)], cwd=ROOT,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


def _wait_for(cond, proc, timeout=120):
    t0 = time.monotonic()
    while not cond():
        if proc.poll() is not None:
            raise AssertionError(f"run ended early: {proc.stderr.read()[-500:]}")
        if time.monotonic() - t0 > timeout:
            raise AssertionError("timed out")
        time.sleep(0.02)


def _done(out, key="static"):
    try:
        return json.loads((Path(out) / ".batch-work" / "manifest.json").read_text())[
            "done"].get(key, 0)
    except (FileNotFoundError, json.JSONDecodeError, KeyError):
        return 0


def _same(a, b, fmt="parquet"):
    read = pd.read_parquet if fmt == "parquet" else pd.read_csv
    for name in ("frames", "query"):
        pd.testing.assert_frame_equal(read(Path(a) / f"{name}.{fmt}"),
                                      read(Path(b) / f"{name}.{fmt}"), check_exact=True)


def _cli(log, out, *extra):
    return subprocess.run([sys.executable, "-m", "invert.cli", "batch", str(log), "--layout",
                           str(LAYOUT), "--radius", "0.25", "--out", str(out), "--lam", "0.02",
                           "--noise-sd", "0.05", *extra], cwd=ROOT, capture_output=True,
                          text=True, timeout=300)


# --- 1. one run at a time per output folder ----------------------------------------------------
def test_second_run_on_the_same_out_is_refused_and_the_first_completes(tmp_path):
    ref = tmp_path / "ref"
    run_batch(LOG, LAYOUT, out=ref, chunk_rows=40, **FIXED)
    out = tmp_path / "o"
    first = _start_slow(out)
    try:
        _wait_for(lambda: _done(out) >= 2, first)
        lock = (out / LOCK_NAME).read_text().split()
        assert int(lock[0]) == first.pid and lock[1] == socket.gethostname()
        second = _cli(LOG, out, "--chunk-rows", "40")
        assert second.returncode == 2
        lines = second.stderr.strip().splitlines()
        assert len(lines) == 1 and str(out) in lines[0] and f"pid {first.pid}" in lines[0]
        assert first.wait(timeout=300) == 0, first.stderr.read()[-500:]
    finally:
        if first.poll() is None:
            first.kill()
            first.wait()
    _same(ref, out)
    assert not (out / LOCK_NAME).exists()  # released


def test_stale_lock_of_a_dead_run_is_taken_over_with_a_note(tmp_path):
    out = tmp_path / "o"
    out.mkdir()
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()  # its pid is no longer alive (the OS reuses pids only much later)
    (out / LOCK_NAME).write_text(f"{dead.pid} {socket.gethostname()}\n")
    s = run_batch(LOG, LAYOUT, out=out, chunk_rows=100, **FIXED)
    assert any(f"pid {dead.pid}" in w and "no longer running" in w for w in s["warnings"])
    assert not (out / LOCK_NAME).exists()


def test_lock_released_on_keyboard_interrupt_and_on_error(tmp_path):
    out = tmp_path / "o"

    def stop(i):
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_batch(LOG, LAYOUT, out=out, chunk_rows=100, on_chunk=stop, **FIXED)
    assert not (out / LOCK_NAME).exists()
    bad = tmp_path / "bad.csv"
    bad.write_text("time,tc00,zz9\n0,1,2\n")
    assert main(["batch", str(bad), "--layout", str(LAYOUT), "--radius", "0.25", "--out",
                 str(out)]) == 2
    assert not (out / LOCK_NAME).exists()
    run_batch(LOG, LAYOUT, out=out, chunk_rows=100, **FIXED)  # the folder is free again
    assert (out / "frames.parquet").exists()


# --- 2. a header line repeated mid-file ---------------------------------------------------------
N_SENSORS = 6


@pytest.fixture
def ring(tmp_path):
    return write_ring_layout(tmp_path / "layout.csv", N_SENSORS)


def _frames(n, rng):
    # every column its own level (10 + 3 j): a wrong column mapping moves the estimates a lot
    th = np.linspace(0, 2 * np.pi, N_SENSORS, endpoint=False)
    Y = 10 + 3 * np.arange(N_SENSORS)[None, :] + np.cos(th[None, :] - 0.02 * np.arange(n)[:, None])
    Y += 0.01 * rng.standard_normal(Y.shape)
    Y[rng.random(Y.shape) < 0.05] = np.nan
    return Y


def _header(order, time_at=0):
    cells = [f"s{j}" for j in order]
    cells.insert(time_at, "time")
    return ",".join(cells)


def _row(t, Y, order, time_at=0):
    cells = ["" if np.isnan(Y[j]) else f"{Y[j]:.6f}" for j in order]
    cells.insert(time_at, f"{t:g}")
    return ",".join(cells)


def _run_ring(log, layout, out, chunk_rows=16):
    s = run_batch(log, layout, radius=1.0, out=out, lam=0.05, noise_sd=0.05, fmt="csv",
                  chunk_rows=chunk_rows)
    return s, pd.read_csv(out / "frames.csv"), pd.read_csv(out / "query.csv")


@pytest.mark.parametrize("cut", [37, 48])
def test_repeated_header_in_a_new_order_is_re_mapped(tmp_path, ring, cut):
    rng = np.random.default_rng(3)
    n = 120
    Y = _frames(n, rng)
    first, second = list(range(N_SENSORS)), [4, 1, 5, 0, 3, 2]
    single = [_header(first)] + [_row(k, Y[k], first) for k in range(n)]
    restarted = ([_header(first)] + [_row(k, Y[k], first) for k in range(cut)]
                 + [_header(second, time_at=2)]
                 + [_row(k, Y[k], second, time_at=2) for k in range(cut, n)])
    a, b = tmp_path / "single.csv", tmp_path / "restarted.csv"
    a.write_text("\n".join(single) + "\n")
    b.write_text("\n".join(restarted) + "\n")
    sa, fa, qa = _run_ring(a, ring, tmp_path / "a")
    sb, fb, qb = _run_ring(b, ring, tmp_path / "b")
    # the same frames: the repeated header is not a frame, the frames after it are read with
    # its order (values to 1e-12: the same numbers through the same algebra)
    assert len(fb) == n and (fb["status"] == fa["status"]).all()
    pd.testing.assert_frame_equal(fa[["time", "frame", "status", "n_used"]],
                                  fb[["time", "frame", "status", "n_used"]])
    for col in ("centre_mean", "centre_sd", "chi2"):
        np.testing.assert_allclose(fb[col], fa[col], rtol=1e-12, atol=1e-12)
    for col in ("mean", "sd", "lower", "upper"):
        np.testing.assert_allclose(qb[col], qa[col], rtol=1e-12, atol=1e-12)
    line = cut + 2  # header = line 1, frames 0..cut-1 on lines 2..cut+1
    msg = [w for w in sb["warnings"] if "header line repeats" in w]
    assert len(msg) == 1 and f"line {line}" in msg[0] and "re-mapped" in msg[0]
    assert not any("header" in w for w in sa["warnings"])


@pytest.mark.parametrize("cells, what", [("s0,s1,s2,s3,s4,s5", "'time'"),
                                         ("time,s0,s1,s2,s3,zz,s5", "'zz' is not in the layout")])
def test_repeated_header_that_cannot_be_mapped_is_exit_2(tmp_path, ring, capsys, cells, what):
    rng = np.random.default_rng(4)
    Y = _frames(40, rng)
    order = list(range(N_SENSORS))
    lines = ([_header(order)] + [_row(k, Y[k], order) for k in range(20)] + [cells]
             + [_row(k, Y[k], order) for k in range(20, 40)])
    log = tmp_path / "log.csv"
    log.write_text("\n".join(lines) + "\n")
    code = main(["batch", str(log), "--layout", str(ring), "--radius", "1", "--out",
                 str(tmp_path / "o"), "--lam", "0.05", "--noise-sd", "0.05"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert "log.csv" in err[0] and "row 22" in err[0] and what in err[0]
    assert not (tmp_path / "o" / "frames.parquet").exists()


# --- 3. resume: data formats only, and the content of every chunk checked -------------------------
def _stopped(out, log=LOG, n=3, **kw):
    """Run the job in-process for ``n`` chunks, then stop it (the caller stops the generator)."""
    job = job_from_files(LAYOUT, **FIXED, chunk_rows=50, out=out, **kw)
    src = open_log(log, job.sensors, chunk_rows=job.chunk_rows)
    work = WorkFolder(out, {"log": src.signature(), "options": job.options()}, False)
    steps = job_chunks(job, src, LocalEngine(), work)
    for _ in range(n):
        next(steps)
    steps.close()
    return work


def test_working_folder_holds_no_pickle_and_refuses_one(tmp_path):
    kw = dict(assimilate=True, time_scale=1500.0)
    ref = tmp_path / "ref"
    run_batch(LOG, LAYOUT, out=ref, chunk_rows=50, **FIXED, **kw)
    out = tmp_path / "o"
    work = _stopped(out, **kw)
    files = sorted(p.name for p in work.dir.iterdir())
    # the exact kernel's spilled parts and carries (the shortcut mode's: spart-/sfcarry-)
    states = [f for f in files if f.startswith(("kpart-", "kfcarry-", "spart-", "sfcarry-"))]
    assert states and all(f.endswith(".npz") for f in states)
    for f in states:  # numpy reads every state without pickle
        with np.load(work.dir / f, allow_pickle=False) as z:
            assert all(z[k].dtype != object for k in z.files)
    # resumed: identical to the uninterrupted run
    run_batch(LOG, LAYOUT, out=out, chunk_rows=50, resume=True, **FIXED, **kw)
    _same(ref, out)
    # a crafted state (a pickled object array that would write a file when unpickled)
    out2 = tmp_path / "o2"
    work = _stopped(out2, **kw)
    marker = tmp_path / "ran"
    crafted = np.array([_Marker(str(marker))], dtype=object)
    name = sorted(p for p in work.dir.iterdir() if p.name.startswith(("kfcarry-", "sfcarry-")))[-1]
    with open(name, "wb") as fh:
        np.savez(fh, __tree__=crafted)
    with pytest.raises(ValueError, match="allow_pickle"):
        run_batch(LOG, LAYOUT, out=out2, chunk_rows=50, resume=True, **FIXED, **kw)
    assert not marker.exists()


class _Marker:
    def __init__(self, path):
        self.path = path

    def __reduce__(self):
        return (Path(self.path).write_text, ("code ran",))


def test_log_rewritten_with_same_size_and_mtime_is_refused_on_resume(tmp_path):
    log = tmp_path / "log.csv"
    text = LOG.read_text()
    log.write_text(text)
    out = tmp_path / "o"
    _stopped(out, log=log, n=3)
    st = os.stat(log)
    # change one digit of a record in the middle of chunk 1 (same size), mtime restored
    chunks = list(open_log(log, job_from_files(LAYOUT, radius=0.25, out=out).sensors,
                           chunk_rows=50))
    rec = int(np.median(chunks[1].frame))
    lines = text.splitlines(keepends=True)
    k = 2 + rec  # after the comment line and the header
    head, sep, rest = lines[k].partition(",")
    j = next(i for i, c in enumerate(rest) if c.isdigit() and c != "9")
    lines[k] = head + sep + rest[:j] + str(int(rest[j]) + 1) + rest[j + 1:]
    log.write_text("".join(lines))
    os.utime(log, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert os.stat(log).st_size == st.st_size and os.stat(log).st_mtime_ns == st.st_mtime_ns
    r = _cli(log, out, "--chunk-rows", "50", "--resume")
    err = r.stderr.strip().splitlines()
    assert r.returncode == 2 and len(err) == 1, r.stderr
    assert "log.csv" in err[0] and "chunk 1" in err[0]
    assert not (out / "frames.parquet").exists()


# --- 4. the command's own dask cluster is unreachable from other processes ------------------------
def test_own_dask_cluster_has_no_listener_and_refuses_other_clients(tmp_path):
    psutil = pytest.importorskip("psutil")
    distributed = pytest.importorskip("distributed")
    ref = tmp_path / "ref"
    run_batch(LOG, LAYOUT, out=ref, chunk_rows=40, **FIXED)
    out, addr = tmp_path / "o", tmp_path / "addr"
    proc = _start_slow(out, engine="dask", addr=str(addr))
    try:
        _wait_for(lambda: addr.exists() and addr.read_text(), proc)
        address = addr.read_text()
        assert address.startswith("inproc://")
        # no TCP (or any inet) socket listening in the run's process
        listening = [c for c in psutil.Process(proc.pid).net_connections(kind="inet")
                     if c.status == psutil.CONN_LISTEN]
        assert listening == []
        with pytest.raises((OSError, ValueError)):
            distributed.Client(address, timeout=3)
        assert proc.wait(timeout=300) == 0, proc.stderr.read()[-500:]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    summary = json.loads((out / "summary.json").read_text())
    assert summary["engine"] == "dask" and summary["scheduler"].startswith("inproc://")
    _same(ref, out)


# --- 5. a log without a time column ------------------------------------------------------------
def test_log_without_time_column_is_exit_2(tmp_path, capsys):
    df = pd.read_csv(LOG, comment="#", dtype=str)
    log = tmp_path / "notime.csv"
    df.drop(columns="time").to_csv(log, index=False)
    code = main(["batch", str(log), "--layout", str(LAYOUT), "--radius", "0.25", "--out",
                 str(tmp_path / "o"), "--lam", "0.02", "--noise-sd", "0.05"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert "notime.csv" in err[0] and "'time'" in err[0] and "'tc00'" in err[0]
    assert not (tmp_path / "o" / "frames.parquet").exists()


# --- 6. the output set is published at once ----------------------------------------------------
def _snapshot(out):
    return {p.name: p.read_bytes() for p in Path(out).iterdir() if p.is_file()}


def test_failure_while_writing_the_final_set_keeps_the_old_set(tmp_path, monkeypatch):
    out = tmp_path / "o"
    run_batch(LOG, LAYOUT, out=out, chunk_rows=100, fmt="csv", **FIXED)
    old = _snapshot(out)
    assert set(old) == {"frames.csv", "query.csv", "summary.json", "report.html"}
    import invert.batch.checkpoint as checkpoint

    real = checkpoint.merge_parts
    calls = []

    def crash_after_frames(parts, path, fmt):
        calls.append(path)
        if len(calls) == 2:  # frames written, query not yet
            raise OSError("disk full (injected)")
        return real(parts, path, fmt)

    monkeypatch.setattr(checkpoint, "merge_parts", crash_after_frames)
    with pytest.raises(OSError, match="injected"):
        run_batch(LOG, LAYOUT, out=out, chunk_rows=100, fmt="csv", radius=0.25, lam=0.5,
                  noise_sd=0.05)
    assert _snapshot(out) == old  # the complete old set, byte for byte
    monkeypatch.undo()
    s = run_batch(LOG, LAYOUT, out=out, chunk_rows=100, fmt="csv", radius=0.25, lam=0.5,
                  noise_sd=0.05)
    assert s["lam"] == 0.5 and _snapshot(out) != old
    assert json.loads((out / "summary.json").read_text())["lam"] == 0.5


_KILLED_AT_PUBLISH = """
import json, os, sys
import invert.batch.runner as runner
kw = json.loads(sys.argv[1])
runner.publish = lambda *a, **k: os._exit(9)   # killed with the new set staged, not swapped
runner.run_batch(kw.pop("log"), kw.pop("layout"), **kw)
"""


def test_kill_before_the_swap_leaves_the_old_set_and_the_rerun_cleans_up(tmp_path):
    out = tmp_path / "o"
    run_batch(LOG, LAYOUT, out=out, chunk_rows=100, **FIXED)
    old = _snapshot(out)
    kw = dict(log=str(LOG), layout=str(LAYOUT), out=str(out), chunk_rows=100, radius=0.25,
              lam=0.5, noise_sd=0.05)
    r = subprocess.run([sys.executable, "-c", _KILLED_AT_PUBLISH, json.dumps(kw)], cwd=ROOT,
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 9, r.stderr
    assert {k: v for k, v in _snapshot(out).items() if k != LOCK_NAME} == old
    stale = [p for p in tmp_path.iterdir() if p.name.startswith(".o.batch-staging-")]
    assert len(stale) == 1 and {"frames.parquet", "query.parquet", "summary.json"} <= \
        {p.name for p in stale[0].iterdir()}
    other = tmp_path / ".o.staging-keep"  # another tool's folder: not ours to remove
    other.mkdir()
    s = run_batch(LOG, LAYOUT, out=out, chunk_rows=100, radius=0.25, lam=0.5, noise_sd=0.05)
    assert s["lam"] == 0.5 and any("took over" in w for w in s["warnings"])
    assert not any(p.name.startswith(".o.batch-staging-") for p in tmp_path.iterdir())
    assert other.exists()
    assert sorted(p.name for p in out.iterdir()) == ["frames.parquet", "query.parquet",
                                                      "report.html", "summary.json"]


def test_folder_with_foreign_files_is_refused(tmp_path, capsys):
    out = tmp_path / "o"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    code = main(["batch", str(LOG), "--layout", str(LAYOUT), "--radius", "0.25", "--out",
                 str(out), "--lam", "0.02", "--noise-sd", "0.05"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "notes.txt" in err[0]
    assert (out / "notes.txt").read_text() == "mine" and not (out / LOCK_NAME).exists()


def test_killed_run_leaves_nothing_that_looks_finished(tmp_path):
    # SIGKILL mid-run on a fresh folder: no final file appears, the lock is stale, and a
    # resume takes it over and finishes identically
    ref = tmp_path / "ref"
    run_batch(LOG, LAYOUT, out=ref, chunk_rows=40, **FIXED)
    out = tmp_path / "o"
    proc = _start_slow(out, resume=True)
    try:
        _wait_for(lambda: _done(out) >= 3, proc)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    assert not (out / "frames.parquet").exists() and (out / LOCK_NAME).exists()
    r = _cli(LOG, out, "--chunk-rows", "40", "--resume", "--format", "parquet")
    assert r.returncode == 0, r.stderr
    assert "took over the lock" in r.stderr and f"pid {proc.pid}" in r.stderr
    _same(ref, out)
