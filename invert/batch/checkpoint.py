"""The resumable working folder of a batch run: part files, spilled state and the manifest.

Chunk outputs are written as part files under ``OUT/.batch-work`` (temporary file, then
``os.replace``; Arrow IPC parts for a Parquet output, merged into the final file at the end)
and the manifest (a JSON file with the job's signature, the chunks done, the counts, the
estimated hyperparameters and a content hash of every chunk read) is replaced the same way
after each chunk. A rerun with ``resume=True`` and the same signature continues after the last
completed chunk. Everything in the folder is data (JSON, Arrow IPC or CSV parts, ``.npz``
states read with ``allow_pickle=False``, :mod:`invert.batch.spill`): nothing there is
unpickled, so a crafted file cannot run code.

Resume trusts no file metadata alone: :class:`CheckedLog` compares the hash of each chunk
(:attr:`~invert.io.sources.Chunk.digest`) with the one recorded when it was first read, so a
log rewritten with the same size and modification time is refused
(:class:`~invert.errors.InputError` naming the log and the first chunk that differs) instead
of mixing two logs.
"""

from __future__ import annotations

import json
import os
import shutil
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..io.writers import merge_parts, write_json, write_table
from ..report.files import to_jsonable
from .spill import load_state, save_state
from .tables import empty_frames, empty_query

__all__ = ["WORK_DIR", "ChunkDone", "WorkFolder", "CheckedLog", "merge_outputs"]

#: Name of the working folder inside the output folder.
WORK_DIR = ".batch-work"


@dataclass(frozen=True)
class ChunkDone:
    """A chunk whose work is committed to the working folder (what the job's generator yields).

    Attributes
    ----------
    phase : str
        ``"static"``, ``"forward"`` or ``"backward"`` (assimilation), ``"parallel"``.
    index : int
        0-based chunk number in the log.
    n_frames : int
        Frames of the chunk.
    """

    phase: str
    index: int
    n_frames: int


class WorkFolder:
    """The working folder of one run, opened fresh or (``resume=True``) continued.

    Parameters
    ----------
    out : str or Path
        Output folder of the run.
    signature : dict
        The log's signature and the job's options; a resumed run must match it.
    resume : bool
        Continue the run found in ``out`` (a fresh start when there is none).

    Attributes
    ----------
    dir : Path
    manifest : dict
        ``signature``, ``done`` (chunks done per phase), ``hyper``, ``counts``, ...; written
        by :meth:`save` together with the chunk hashes (``digests``, see
        :meth:`check_chunk`).

    Raises
    ------
    ValueError
        When resuming a run with another signature.
    """

    def __init__(self, out, signature, resume):
        self.out = Path(out)
        self.dir = self.out / WORK_DIR
        self.signature = signature
        man = self.dir / "manifest.json"
        self.manifest = None
        self._digests = []
        self._dlock = threading.Lock()
        if resume and man.exists():
            with open(man) as fh:
                m = json.load(fh)
            if m.get("signature") != signature:
                raise ValueError(f"{self.dir}: the interrupted run used another log or other "
                                 f"options; rerun without --resume to start afresh")
            self._digests = list(m.pop("digests", []))
            self.manifest = m
        else:
            shutil.rmtree(self.dir, ignore_errors=True)
        self.dir.mkdir(parents=True, exist_ok=True)
        if self.manifest is None:
            self.manifest = {"signature": signature, "done": {}, "hyper": None}
            self.save()

    def save(self):
        """Write the manifest (and the chunk hashes) atomically."""
        with self._dlock:
            digests = list(self._digests)
        write_json(to_jsonable({**self.manifest, "digests": digests}),
                   self.dir / "manifest.json")

    def check_chunk(self, i, chunk, source):
        """Record chunk ``i``'s content hash, or check it against the one recorded before.

        Thread-safe (the log is read in a background thread).

        Raises
        ------
        InputError
            When chunk ``i`` differs from what this run (or the interrupted one) read.
        """
        digest = getattr(chunk, "digest", None)
        if digest is None:
            return
        with self._dlock:
            if i < len(self._digests):
                if self._digests[i] != digest:
                    first = int(chunk.frame[0]) if len(chunk.frame) else 0
                    raise InputError(source, f"changed since it was first read: chunk {i} "
                                     f"(frames from record {first}) differs; rerun without "
                                     f"--resume to start afresh")
            elif i == len(self._digests):
                self._digests.append(digest)

    def note_missing(self, i, chunk, blocks=16):
        """Record chunk ``i``'s missing readings per sensor in ``blocks`` blocks of frames.

        Once per chunk (the first time it is read), for the report's missing-readings map.
        """
        with self._dlock:
            kept = self.manifest.setdefault("missing", [])
            if i != len(kept):
                return
            n = len(chunk)
            k = max(1, min(blocks, n))
            edges = np.linspace(0, n, k + 1).astype(int)
            miss = np.isnan(chunk.Y)
            counts = [miss[a:b].sum(axis=0).tolist() for a, b in zip(edges[:-1], edges[1:],
                                                                      strict=True)]
            kept.append({"frames": np.diff(edges).tolist(), "missing": counts})

    def missing_map(self):
        """Return ``(fraction, n_frames)``: missing fraction per sensor and block of frames."""
        kept = self.manifest.get("missing", [])
        frames = [f for c in kept for f in c["frames"]]
        if not frames:
            return np.zeros((0, 0)), 0
        counts = np.array([m for c in kept for m in c["missing"]], float)  # blocks x sensors
        return (counts / np.maximum(np.array(frames, float), 1)[:, None]).T, int(sum(frames))

    def check_length(self, n, source):
        """Refuse a log that ends before the chunks recorded (``n`` chunks read in full)."""
        with self._dlock:
            recorded = len(self._digests)
        if n < recorded:
            raise InputError(source, f"changed since it was first read: it ends after "
                             f"{n} chunk(s), {recorded} were read before; rerun without "
                             f"--resume to start afresh")

    def part(self, name, i, fmt):
        """Return the path of part ``i`` of output ``name``."""
        # Parquet outputs are merged from Arrow IPC parts (cheap to write, memory-mapped when
        # merged); CSV parts are concatenated as text
        return self.dir / f"{name}-{i:06d}.{'arrow' if fmt == 'parquet' else fmt}"

    def write_parts(self, i, fmt, frames, query):
        """Write chunk ``i``'s two tables as part files."""
        write_table(frames, self.part("frames", i, fmt), fmt)
        write_table(query, self.part("query", i, fmt), fmt)

    def dump(self, obj, name, classes=()):
        """Write state ``obj`` to ``name`` (``.npz``) atomically, as data only.

        ``classes``: the dataclasses ``obj`` may contain (:func:`~invert.batch.spill.
        save_state`).
        """
        save_state(obj, self.dir / name, classes)

    def load(self, name, classes=()):
        """Read state ``name`` back (``numpy.load`` with ``allow_pickle=False``)."""
        return load_state(self.dir / name, classes)

    def remove(self, *names):
        """Delete files of the folder that exist."""
        for name in names:
            if (self.dir / name).exists():
                os.remove(self.dir / name)

    def close(self):
        """Delete the working folder (after the outputs are in place)."""
        shutil.rmtree(self.dir, ignore_errors=True)


class CheckedLog:
    """A :class:`~invert.io.sources.LogSource` whose chunks are checked by content hash.

    Every chunk read goes through :meth:`WorkFolder.check_chunk` (recorded the first time,
    compared every later time, in this run or a resumed one); a full pass that ends early is
    refused by :meth:`WorkFolder.check_length`. Everything else is the wrapped source's.

    Parameters
    ----------
    source : LogSource
    work : WorkFolder
    """

    def __init__(self, source, work):
        self._source = source
        self._work = work

    def __getattr__(self, name):
        return getattr(self._source, name)

    def signature(self):
        """Return the wrapped source's signature."""
        return self._source.signature()

    def __iter__(self):
        n = 0
        for i, chunk in enumerate(self._source):
            self._work.check_chunk(i, chunk, self._source.source)
            self._work.note_missing(i, chunk)
            n = i + 1
            yield chunk
        self._work.check_length(n, self._source.source)


def merge_outputs(work, n_chunks, out, fmt, kind):
    """Merge the part files of ``n_chunks`` chunks into ``out/frames.<fmt>`` and ``query``.

    Parameters
    ----------
    work : WorkFolder
    n_chunks : int
    out : Path
        Where the merged files go (the run's staging folder, :mod:`invert.io.publish`).
    fmt : {"csv", "parquet"}
    kind : {"number", "datetime"}
        Time kind of the empty tables written when there is no chunk.
    """
    out.mkdir(parents=True, exist_ok=True)
    for name in ("frames", "query"):
        parts = [work.part(name, i, fmt) for i in range(n_chunks)]
        if parts:
            merge_parts(parts, out / f"{name}.{fmt}", fmt)
        else:
            empty = empty_query(kind) if name == "query" else empty_frames(kind)
            write_table(empty, out / f"{name}.{fmt}", fmt)
