"""The batch job as a generator over chunks, and the wide log as a LogSource.

Oracles: an uninterrupted run of the same job (value for value) for a run stopped by its
caller and resumed; pandas' own CSV reader for the frames a LogSource yields; the file system
(size, modification time) for the resume signature.
"""

import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from invert.batch import BatchJob, LocalEngine, job_chunks
from invert.batch.checkpoint import WorkFolder
from invert.batch.runner import job_from_files, run_batch
from invert.io.logs import open_log
from invert.io.sources import LogSource

ROOT = Path(__file__).resolve().parents[2]
LOG, LAYOUT = ROOT / "datasets" / "demo_log.csv", ROOT / "datasets" / "demo_layout.csv"
KW = dict(radius=0.25, lam=0.02, noise_sd=0.05, chunk_rows=50)


def test_wide_log_is_a_log_source_and_iterates_again(tmp_path):
    job = job_from_files(LAYOUT, radius=0.25, out=tmp_path)
    src = open_log(LOG, job.sensors, chunk_rows=64)
    assert isinstance(src, LogSource)
    assert [j for _, j in src.columns] == sorted(j for _, j in src.columns)
    first = list(src)
    again = list(src)
    assert len(first) == len(again) and src.time_kind == "number"
    for a, b in zip(first, again, strict=True):
        np.testing.assert_array_equal(a.Y, b.Y)
    # pandas' reader: every record once, readings in layout order
    ref = pd.read_csv(LOG, comment="#", dtype=str)
    frames = np.concatenate([c.frame for c in first])
    np.testing.assert_array_equal(frames, np.arange(len(ref)))
    Y = np.vstack([c.Y for c in first])
    good = pd.to_numeric(ref["tc03"], errors="coerce").to_numpy(float)
    j = list(job.sensors).index("tc03")
    np.testing.assert_array_equal(Y[np.isfinite(good), j], good[np.isfinite(good)])


def test_signature_follows_the_file(tmp_path):
    log = tmp_path / "log.csv"
    log.write_text(LOG.read_text())
    src = open_log(log, ["tc00"] + [f"tc{i:02d}" for i in range(1, 16)] + ["probe1", "probe2"])
    st = os.stat(log)
    assert src.signature()["size"] == st.st_size
    assert src.signature()["mtime_ns"] == st.st_mtime_ns
    with open(log, "a") as fh:
        fh.write("99999,1\n")
    assert src.signature() != {"path": str(log.resolve()), "size": st.st_size,
                               "mtime_ns": st.st_mtime_ns}


def test_caller_stops_the_generator_and_a_resume_finishes_identically(tmp_path):
    ref = tmp_path / "ref"
    run_batch(LOG, LAYOUT, out=ref, fmt="parquet", **KW)
    out = tmp_path / "stopped"
    job = job_from_files(LAYOUT, radius=0.25, lam=0.02, noise_sd=0.05, chunk_rows=50, out=out)
    src = open_log(LOG, job.sensors, chunk_rows=job.chunk_rows)
    work = WorkFolder(out, {"log": src.signature(), "options": job.options()}, False)
    steps = job_chunks(job, src, LocalEngine(), work)
    seen = [next(steps).index for _ in range(3)]
    steps.close()  # the caller stops after three chunks
    assert seen == [0, 1, 2] and work.manifest["done"]["static"] == 3
    assert not (out / "frames.parquet").exists()
    calls = []
    run_batch(LOG, LAYOUT, out=out, fmt="parquet", resume=True, on_chunk=calls.append, **KW)
    assert calls[0] == 3  # resumed after the committed chunks
    for name in ("frames", "query"):
        pd.testing.assert_frame_equal(pd.read_parquet(out / f"{name}.parquet"),
                                      pd.read_parquet(ref / f"{name}.parquet"),
                                      check_exact=True)


def test_parallel_in_time_is_an_exact_mode_option(tmp_path):
    job = job_from_files(LAYOUT, radius=0.25, out=tmp_path)
    kw = dict(domain=job.domain, sensors=job.sensors, points=job.points, sigma=None,
              query_points=job.query_points, query_labels=job.query_labels, out=tmp_path,
              assimilate=True)
    assert BatchJob(**kw, max_transient=None, parallel_in_time=True).parallel_in_time
    with pytest.raises(ValueError, match="max_transient"):
        BatchJob(**kw, max_transient=50, parallel_in_time=True)
    with pytest.raises(ValueError, match="format"):
        BatchJob(**kw, fmt="xlsx")


def test_spilled_state_round_trips_exactly_and_builds_only_named_classes(tmp_path):
    # oracle: numpy's own equality and dtypes/memory order of the originals
    from invert.batch.spill import load_state, save_state
    from invert.stages.assimilate import FilterState

    F = np.asfortranarray(np.arange(6.0).reshape(2, 3))
    state = FilterState(np.zeros(3), np.eye(3), key=(0.5, b"\x01"),
                        fixed={(0.5, b"\x01"): np.ones((3, 3))})
    obj = {"F": F, "same": [np.eye(3), 2 * np.eye(3)], "n": (np.float64(1.5), np.int64(3), 2.5),
           "text": np.array(["ok", None], dtype=object), "state": state}
    path = tmp_path / "s.npz"
    save_state(obj, path, (FilterState,))
    back = load_state(path, (FilterState,))
    assert back["F"].flags.f_contiguous and np.array_equal(back["F"], F)
    assert not np.shares_memory(back["same"][0], back["same"][1])
    assert [type(x) for x in back["n"]] == [np.float64, np.int64, float]
    assert list(back["text"]) == ["ok", None]
    assert back["state"].key == (0.5, b"\x01") and list(back["state"].fixed) == [(0.5, b"\x01")]
    with pytest.raises(KeyError):
        load_state(path)  # FilterState not named by the caller: not built
