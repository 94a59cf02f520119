"""numpy <-> Arrow columns through the Arrow buffers, without pyarrow's own conversions.

``pyarrow.array(...)`` and ``Array.to_numpy(...)`` import pandas on their first call (about a
quarter of a second); the static batch job on a numeric log needs neither, so its columns go
through the Arrow buffers directly: numbers as (validity bitmap, values), strings as
(validity, offsets, bytes), the layouts of the Arrow columnar format
(https://arrow.apache.org/docs/format/Columnar.html).
"""

from __future__ import annotations

import numpy as np

__all__ = ["float_values", "arrow_numbers", "arrow_strings", "string_codes"]


def float_values(col):
    """Return a float64 Arrow column (Array or ChunkedArray) as an ndarray, nulls as NaN."""
    import pyarrow as pa

    if isinstance(col, pa.ChunkedArray):
        out = np.empty(len(col))
        a = 0
        for c in col.chunks:
            out[a:a + len(c)] = float_values(c)
            a += len(c)
        return out
    n = len(col)
    validity, data = col.buffers()[:2]
    if data is None:  # an all-null column may carry no values
        return np.full(n, np.nan)
    vals = np.frombuffer(data, np.float64, count=n, offset=col.offset * 8)
    if col.null_count:
        bits = np.unpackbits(np.frombuffer(validity, np.uint8), bitorder="little")
        vals = np.where(bits[col.offset:col.offset + n].astype(bool), vals, np.nan)
    return vals


def arrow_numbers(values, type, mask=None):
    """Build a fixed-width Arrow array of ``type`` over ``values`` (nulls where ``mask``)."""
    import pyarrow as pa

    # timestamps are stored as int64 counts of their unit
    dtype = np.int64 if pa.types.is_timestamp(type) else np.dtype(type.to_pandas_dtype())
    vals = np.ascontiguousarray(values, dtype=dtype)
    n = len(vals)
    nulls = 0 if mask is None else int(np.count_nonzero(mask))
    validity = None if not nulls else pa.py_buffer(np.packbits(~np.asarray(mask, bool),
                                                               bitorder="little"))
    return pa.Array.from_buffers(type, n, [validity, pa.py_buffer(vals)], null_count=nulls)


def arrow_strings(items):
    """Build an Arrow string array from a sequence of str or None."""
    import pyarrow as pa

    n = len(items)
    enc = [b"" if x is None else str(x).encode() for x in items]
    valid = np.fromiter((x is not None for x in items), bool, n)
    offsets = np.zeros(n + 1, np.int64)
    np.cumsum(np.fromiter(map(len, enc), np.int64, n), out=offsets[1:])
    if offsets[-1] >= 2**31 - 1:  # beyond 32-bit offsets: pyarrow's own conversion
        return pa.array(list(items), type=pa.string())
    nulls = n - int(valid.sum())
    validity = None if not nulls else pa.py_buffer(np.packbits(valid, bitorder="little"))
    return pa.Array.from_buffers(pa.string(), n, [validity, pa.py_buffer(offsets.astype(np.int32)),
                                                  pa.py_buffer(b"".join(enc))], null_count=nulls)


def string_codes(col, names, missing=-1):
    """Return the index of each cell of a string (or dictionary) column in ``names``.

    Vectorised (``pyarrow.compute.index_in``); cells not in ``names``, and nulls, get
    ``missing``. Replaces a Python loop over the rows of long tables.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks()
    if pa.types.is_dictionary(col.type):
        col = col.cast(col.type.value_type)
    idx = pc.index_in(col.cast(pa.string()), value_set=pa.array([str(n) for n in names],
                                                                pa.string()))
    return np.asarray(idx.fill_null(missing).to_numpy(zero_copy_only=False), np.int64)

