"""The resumable working folder of a batch run: part files, spilled state and the manifest.

Chunk outputs are written as part files under ``OUT/.batch-work`` (temporary file, then
``os.replace``; Arrow IPC parts for a Parquet output, merged into the final file at the end)
and the manifest (a JSON file with the job's signature, the chunks done, the counts and the
estimated hyperparameters) is replaced the same way after each chunk. A rerun with
``resume=True`` and the same signature continues after the last completed chunk.
"""

from __future__ import annotations

import json
import os
import pickle
import shutil
from dataclasses import dataclass
from pathlib import Path

from ..io.writers import merge_parts, write_json, write_table
from ..report.files import to_jsonable
from .tables import empty_frames, empty_query

__all__ = ["WORK_DIR", "ChunkDone", "WorkFolder", "merge_outputs"]

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
        by :meth:`save`.

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
        if resume and man.exists():
            with open(man) as fh:
                m = json.load(fh)
            if m.get("signature") != signature:
                raise ValueError(f"{self.dir}: the interrupted run used another log or other "
                                 f"options; rerun without --resume to start afresh")
            self.manifest = m
        else:
            shutil.rmtree(self.dir, ignore_errors=True)
        self.dir.mkdir(parents=True, exist_ok=True)
        if self.manifest is None:
            self.manifest = {"signature": signature, "done": {}, "hyper": None}
            self.save()

    def save(self):
        """Write the manifest atomically."""
        write_json(to_jsonable(self.manifest), self.dir / "manifest.json")

    def part(self, name, i, fmt):
        """Return the path of part ``i`` of output ``name``."""
        # Parquet outputs are merged from Arrow IPC parts (cheap to write, memory-mapped when
        # merged); CSV parts are concatenated as text
        return self.dir / f"{name}-{i:06d}.{'arrow' if fmt == 'parquet' else fmt}"

    def write_parts(self, i, fmt, frames, query):
        """Write chunk ``i``'s two tables as part files."""
        write_table(frames, self.part("frames", i, fmt), fmt)
        write_table(query, self.part("query", i, fmt), fmt)

    def dump(self, obj, name):
        """Pickle ``obj`` to ``name`` in the folder, atomically."""
        path = self.dir / name
        tmp = path.with_name(f".{path.name}.tmp")
        with open(tmp, "wb") as fh:
            pickle.dump(obj, fh, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(tmp, path)

    def load(self, name):
        """Unpickle ``name`` from the folder."""
        with open(self.dir / name, "rb") as fh:
            return pickle.load(fh)

    def remove(self, *names):
        """Delete files of the folder that exist."""
        for name in names:
            if (self.dir / name).exists():
                os.remove(self.dir / name)

    def close(self):
        """Delete the working folder (after the outputs are in place)."""
        shutil.rmtree(self.dir, ignore_errors=True)


def merge_outputs(work, n_chunks, out, fmt, kind):
    """Merge the part files of ``n_chunks`` chunks into ``out/frames.<fmt>`` and ``query``.

    Parameters
    ----------
    work : WorkFolder
    n_chunks : int
    out : Path
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
