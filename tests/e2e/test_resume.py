"""--resume: a batch killed with SIGKILL part-way continues and ends with the same result.

Oracle: an uninterrupted run of the same job (value for value), and the input's record count.
The slow-down variable RIM_INVERT_TEST_CHUNK_DELAY is test-only (seconds slept per chunk).
"""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from invert.batch.runner import run_batch

ROOT = Path(__file__).resolve().parents[2]
LOG, LAYOUT = ROOT / "datasets" / "demo_log.csv", ROOT / "datasets" / "demo_layout.csv"


def _cmd(out, *extra):
    return [sys.executable, "-m", "invert.cli", "batch", str(LOG), "--layout", str(LAYOUT),
            "--radius", "0.25", "--out", str(out), "--format", "parquet", "--chunk-rows", "40",
            "--resume", *extra]


def _run_until(cmd, out, key, at_least, timeout=120):
    """Start the batch and SIGKILL it once the manifest shows ``key >= at_least``."""
    env = dict(os.environ, RIM_INVERT_TEST_CHUNK_DELAY="0.15")
    proc = subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
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
    _run_until(_cmd(out), out, "static", 4)
    r = subprocess.run(_cmd(out), cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    _same(ref, out)
    fr = pd.read_parquet(out / "frames.parquet")
    assert len(fr) == _n_records() and fr["frame"].is_unique


@pytest.mark.slow
def test_assimilation_resume_after_two_kills(tmp_path):
    extra = ("--assimilate", "--lam", "0.02", "--noise-sd", "0.05")
    ref = tmp_path / "ref"
    run_batch(LOG, LAYOUT, radius=0.25, out=ref, chunk_rows=40, assimilate=True, lam=0.02,
              noise_sd=0.05, say=lambda *_: None)
    out = tmp_path / "killed"
    _run_until(_cmd(out, *extra), out, "forward", 5)      # during the forward pass
    _run_until(_cmd(out, *extra), out, "backward", 4)     # during the backward pass
    r = subprocess.run(_cmd(out, *extra), cwd=ROOT, capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stderr
    _same(ref, out)
    assert len(pd.read_parquet(out / "frames.parquet")) == _n_records()
