"""Atomic writers of batch outputs: tables (CSV, Parquet, Arrow IPC parts), merged parts, JSON.

Every file is written to a temporary name in its folder and moved into place with
``os.replace``, so a reader never sees a half-written file under its final name.

Text cells of written CSV files that begin with ``=``, ``+``, ``-``, ``@``, a tab or a carriage
return (a label ``=HYPERLINK(...)``, a sensor id ``-T1``) get a leading single quote, so that a
spreadsheet shows them as text instead of running them as formulas (the usual defence against
CSV injection, OWASP "CSV Injection"); text that reads as a number (``-3.2``) and numeric
columns are written as they are (:func:`spreadsheet_safe`, :func:`write_csv_frame`). Parquet
and Arrow files keep every string as given.
"""

from __future__ import annotations

import json
import os
import re
import shutil
from pathlib import Path

__all__ = ["write_table", "merge_parts", "read_part", "write_json", "spreadsheet_safe",
           "write_csv_frame", "FORMULA_START"]

#: Cells starting with one of these run as formulas in spreadsheets (OWASP, CSV Injection).
FORMULA_START = r"^[=+\-@\t\r]"
#: Text that reads as a number (kept as it is: a spreadsheet reads it as that number).
_NUMBER = r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$"
_FORMULA_RE, _NUMBER_RE = re.compile(FORMULA_START), re.compile(_NUMBER)

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

        pcsv.write_csv(_quote_formulas(_plain(table)), path)


def _quote_formulas(table):
    """Prefix ``'`` to string cells that a spreadsheet would run as formulas (Arrow table)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    cols = []
    for c in table.columns:
        if pa.types.is_string(c.type) or pa.types.is_large_string(c.type):
            risky = pc.and_(pc.match_substring_regex(c, FORMULA_START),
                            pc.invert(pc.match_substring_regex(c, _NUMBER)))
            if pc.any(risky).as_py():
                c = pc.if_else(risky, pc.binary_join_element_wise("'", c, ""), c)
        cols.append(c)
    return pa.table(cols, names=table.column_names)


def spreadsheet_safe(frame):
    """Return ``frame`` with formula-like text cells prefixed by ``'`` (a copy when changed).

    Parameters
    ----------
    frame : pandas.DataFrame

    Returns
    -------
    pandas.DataFrame
        Text (object or string) cells that start with ``=``, ``+``, ``-``, ``@``, a tab or a
        carriage return and do not read as a number get a leading ``'``; numeric columns and
        numeric-looking text (``-3.2``) are unchanged.
    """
    from pandas.api.types import is_object_dtype, is_string_dtype

    out = frame
    for name in frame.columns:
        col = frame[name]
        if not (is_object_dtype(col.dtype) or is_string_dtype(col.dtype)):
            continue
        risky = col.map(lambda v: isinstance(v, str) and bool(_FORMULA_RE.match(v))
                        and not _NUMBER_RE.match(v))
        if risky.any():
            if out is frame:
                out = frame.copy()
            out[name] = col.where(~risky, "'" + col.astype(str))
    return out


def write_csv_frame(frame, path, float_format="%.10g"):
    """Write a pandas DataFrame as CSV (no index) with :func:`spreadsheet_safe` text cells."""
    spreadsheet_safe(frame).to_csv(path, index=False, float_format=float_format)


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
