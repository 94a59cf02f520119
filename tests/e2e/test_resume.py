"""--resume: a batch killed with SIGKILL part-way continues and ends with the same result.

Oracle: an uninterrupted run of the same job (value for value), and the input's record count.
The run to be killed is a small Python script calling ``run_batch`` with an ``on_chunk``
callback that sleeps after each committed chunk, so that the kill lands part-way.
"""

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from invert.batch.runner import run_batch

ROOT = Path(__file__).resolve().parents[2]
LOG, LAYOUT = ROOT / "datasets" / "demo_log.csv", ROOT / "datasets" / "demo_layout.csv"


def _cmd(out, *extra):
    return [sys.executable, "-m", "invert.cli", "batch", str(LOG), "--layout", str(LAYOUT),
            "--radius", "0.25", "--out", str(out), "--format", "parquet", "--chunk-rows", "40",
            "--resume", *extra]


#: The run to be killed: run_batch with a callback that sleeps 0.15 s after each chunk.
_SLOW = """
import json, sys, time
from invert.batch.runner import run_batch
kw = json.loads(sys.argv[1])
run_batch(kw.pop("log"), kw.pop("layout"), on_chunk=lambda i: time.sleep(0.15), **kw)
"""


def _slow_cmd(out, **extra):
    kw = dict(log=str(LOG), layout=str(LAYOUT), radius=0.25, out=str(out), fmt="parquet",
              chunk_rows=40, resume=True, **extra)
    return [sys.executable, "-c", _SLOW, json.dumps(kw)]


def _run_until(cmd, out, key, at_least, timeout=120):
    """Start the batch and SIGKILL it once the manifest shows ``key >= at_least``."""
    proc = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    man = Path(out) / ".batch-work" / "manifest.json"
    t0 = time.monotonic()
    try:
        while time.monotonic() - t0 < timeout:
            if proc.poll() is not None:
                raise AssertionError(f"batch ended before it was killed: "
                                     f"{proc.stderr.read().decode()[-500:]}")
            try:
                done = json.loads(man.read_text())["done"]
            except (FileNotFoundError, json.JSONDecodeError, KeyError):
                done = {}
            if done.get(key, 0) >= at_least:
                break
            time.sleep(0.02)
        else:
            raise AssertionError("timed out waiting for the batch")
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
        proc.wait()
    assert proc.returncode == -signal.SIGKILL
    assert not (Path(out) / "frames.parquet").exists()  # nothing looks finished


def _same(a, b):
    for name in ("frames", "query"):
        x = pd.read_parquet(Path(a) / f"{name}.parquet")
        y = pd.read_parquet(Path(b) / f"{name}.parquet")
        pd.testing.assert_frame_equal(x, y, check_exact=True)


def _n_records():
    return sum(1 for ln in open(LOG) if not ln.startswith("#")) - 1


def test_static_resume_after_sigkill(tmp_path):
    ref = tmp_path / "ref"
    run_batch(LOG, LAYOUT, radius=0.25, out=ref, chunk_rows=40, say=lambda *_: None)
    out = tmp_path / "killed"
    _run_until(_slow_cmd(out), out, "static", 4)
    r = subprocess.run(_cmd(out), cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    _same(ref, out)
    fr = pd.read_parquet(out / "frames.parquet")
    assert len(fr) == _n_records() and fr["frame"].is_unique


@pytest.mark.slow
def test_assimilation_resume_after_two_kills(tmp_path):
    extra = ("--assimilate", "--lam", "0.02", "--noise-sd", "0.05")
    slow = dict(assimilate=True, lam=0.02, noise_sd=0.05)
    ref = tmp_path / "ref"
    run_batch(LOG, LAYOUT, radius=0.25, out=ref, chunk_rows=40, assimilate=True, lam=0.02,
              noise_sd=0.05, say=lambda *_: None)
    out = tmp_path / "killed"
    _run_until(_slow_cmd(out, **slow), out, "forward", 5)    # during the forward pass
    _run_until(_slow_cmd(out, **slow), out, "backward", 4)   # during the backward pass
    r = subprocess.run(_cmd(out, *extra), cwd=ROOT, capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stderr
    _same(ref, out)
    assert len(pd.read_parquet(out / "frames.parquet")) == _n_records()
