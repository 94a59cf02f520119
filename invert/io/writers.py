"""Atomic writers of batch outputs: tables (CSV, Parquet, Arrow IPC parts), merged parts, JSON.

Every file is written to a temporary name in its folder and moved into place with
``os.replace``, so a reader never sees a half-written file under its final name.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

__all__ = ["write_table", "merge_parts", "read_part", "write_json"]

#: Parquet compression of the outputs: float columns of estimates hardly compress, and
#: encoding time matters at millions of frames.
_COMPRESSION = "none"


def write_table(table, path, fmt):
    """Write a pyarrow table to ``path`` atomically (temporary file, then ``os.replace``).

    A path ending in ``.arrow`` gets the Arrow IPC file format whatever ``fmt`` says (the part
    files of a Parquet output: written and read back without encoding, see ``merge_parts``).
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    _write(table, tmp, "arrow" if path.suffix == ".arrow" else fmt)
    os.replace(tmp, path)


def _write(table, path, fmt):
    if fmt == "arrow":
        import pyarrow as pa
        import pyarrow.ipc

        with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
            w.write_table(table)
    elif fmt == "parquet":
        import pyarrow.parquet as pq

        pq.write_table(table, path, compression=_COMPRESSION, use_dictionary=_dict_cols(table))
    else:
        import pyarrow.csv as pcsv

        pcsv.write_csv(_plain(table), path)


def _dict_cols(table):
    """Dictionary-encode only the label/status columns (trying it on floats is slow)."""
    import pyarrow as pa

    return [f.name for f in table.schema if pa.types.is_dictionary(f.type)]


def _plain(table):
    """Cast dictionary columns to plain strings (the CSV writer wants plain types)."""
    import pyarrow as pa

    cols = [c.cast(c.type.value_type) if pa.types.is_dictionary(c.type) else c
            for c in table.columns]
    return pa.table(cols, names=table.column_names)


def merge_parts(parts, path, fmt):
    """Concatenate part files (in order) into ``path``, atomically."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    if fmt == "parquet":
        import pyarrow.parquet as pq

        writer = None
        try:
            for p in parts:
                t = read_part(p)
                if writer is None:
                    writer = pq.ParquetWriter(tmp, t.schema, compression=_COMPRESSION,
                                              use_dictionary=_dict_cols(t))
                writer.write_table(t)
        finally:
            if writer is not None:
                writer.close()
    else:
        with open(tmp, "wb") as out:
            for i, p in enumerate(parts):
                with open(p, "rb") as fh:
                    if i:
                        fh.readline()  # header once
                    shutil.copyfileobj(fh, out, 1 << 22)
    os.replace(tmp, path)


def read_part(path):
    """Read a part file as a table: Arrow IPC memory-mapped (no copy), else Parquet."""
    import pyarrow as pa
    import pyarrow.ipc
    import pyarrow.parquet as pq

    if Path(path).suffix == ".arrow":
        with pa.memory_map(str(path)) as src:
            return pa.ipc.open_file(src).read_all()
    return pq.read_table(path)


def write_json(obj, path):
    """Write JSON atomically."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "w") as fh:
        json.dump(obj, fh, indent=2)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
