"""State spilled to the working folder, in a data format only (never pickle).

A state is a tree of dicts, lists, tuples, numbers, strings, bytes, None, NumPy arrays and
instances of a few named dataclasses (the filter and smoother states). :func:`save_state`
writes it as one ``.npz`` file: the arrays, stacked by dtype and shape, and the tree itself
as JSON (arrays replaced by their places in the stacks) in the entry ``__tree__``.
:func:`load_state` reads it back with ``numpy.load(allow_pickle=False)``, so a crafted file
can hold only data: no object array is read, and only the dataclasses the caller names are
built (from their fields). Arrays come back as copies in their own memory order. Types
survive the round trip exactly (array dtypes, NumPy scalars, tuple vs list, the order of dict
keys, floats through their shortest ``repr``), so a resumed run computes the same numbers as
an uninterrupted one.
"""

from __future__ import annotations

import dataclasses
import json
import os
from pathlib import Path

import numpy as np

__all__ = ["save_state", "load_state"]


def _encode(obj, arrays, classes):
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (int, float)) and not isinstance(obj, np.generic):
        return {"f": obj} if isinstance(obj, float) else obj
    if isinstance(obj, np.generic):
        arrays.append(np.asarray(obj))
        return {"s": len(arrays) - 1}
    if isinstance(obj, np.ndarray):
        if obj.dtype == object:
            items = obj.ravel().tolist()
            if not all(x is None or isinstance(x, str) for x in items):
                raise TypeError("only object arrays of str/None can be spilled")
            return {"o": items, "shape": list(obj.shape)}
        arrays.append(obj)
        return {"a": len(arrays) - 1}
    if isinstance(obj, bytes):
        return {"b": obj.hex()}
    if isinstance(obj, tuple):
        return {"t": [_encode(x, arrays, classes) for x in obj]}
    if isinstance(obj, list):
        return {"l": [_encode(x, arrays, classes) for x in obj]}
    if isinstance(obj, dict):
        return {"d": [[_encode(k, arrays, classes), _encode(v, arrays, classes)]
                      for k, v in obj.items()]}
    name = type(obj).__name__
    if dataclasses.is_dataclass(obj) and classes.get(name) is type(obj):
        return {"c": name, "v": {k: _encode(v, arrays, classes) for k, v in vars(obj).items()}}
    raise TypeError(f"cannot spill an object of type {type(obj).__name__}")


def _decode(node, arrays, classes):
    if node is None or isinstance(node, (bool, str, int)):
        return node
    if isinstance(node, dict):
        if "f" in node:
            return float(node["f"])
        if "s" in node:
            return arrays[node["s"]][()]
        if "a" in node:
            return arrays[node["a"]]
        if "o" in node:
            return np.array(node["o"], dtype=object).reshape(node["shape"])
        if "b" in node:
            return bytes.fromhex(node["b"])
        if "t" in node:
            return tuple(_decode(x, arrays, classes) for x in node["t"])
        if "l" in node:
            return [_decode(x, arrays, classes) for x in node["l"]]
        if "d" in node:
            return {_decode(k, arrays, classes): _decode(v, arrays, classes)
                    for k, v in node["d"]}
        if "c" in node:
            cls = classes[node["c"]]  # KeyError for any class not named by the caller
            values = {k: _decode(v, arrays, classes) for k, v in node["v"].items()}
            names = {f.name for f in dataclasses.fields(cls) if f.init}
            obj = cls(**{k: v for k, v in values.items() if k in names})
            for k, v in values.items():
                if k not in names:
                    setattr(obj, k, v)
            return obj
    raise ValueError(f"not a spilled state: {node!r:.60}")


def save_state(obj, path, classes=()):
    """Write ``obj`` to ``path`` (``.npz``) atomically: temporary file, then ``os.replace``.

    Parameters
    ----------
    obj : tree of dict, list, tuple, numbers, str, bytes, None, ndarray, dataclass instances
    path : str or Path
    classes : sequence of type, default=()
        The dataclasses ``obj`` may contain.
    """
    path = Path(path)
    arrays = []
    tree = _encode(obj, arrays, {c.__name__: c for c in classes})
    payload, where = _pack(arrays)
    payload["__tree__"] = np.frombuffer(json.dumps({"tree": tree, "where": where}).encode(),
                                        np.uint8)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "wb") as fh:
        np.savez(fh, **payload)
    os.replace(tmp, path)


def _pack(arrays):
    """Stack the C-ordered arrays of one dtype and shape into one entry each.

    A segment in exact mode holds one covariance per frame: thousands of small arrays become
    a few entries of the file. Other arrays are stored alone, in their own memory order.
    """
    groups = {}
    for i, a in enumerate(arrays):
        key = (a.dtype.str, a.shape) if a.flags.c_contiguous else ("single", i)
        groups.setdefault(key, []).append(i)
    payload, where = {}, [None] * len(arrays)
    for g, idx in enumerate(groups.values()):
        payload[f"g{g}"] = (np.stack([arrays[i] for i in idx]) if len(idx) > 1
                            else np.expand_dims(arrays[idx[0]], 0))
        for j, i in enumerate(idx):
            where[i] = [g, j]
    return payload, where


def load_state(path, classes=()):
    """Read a state written by :func:`save_state` (no pickle: data only).

    Parameters
    ----------
    path : str or Path
    classes : sequence of type, default=()
        The dataclasses that may be built; any other name in the file is an error.

    Returns
    -------
    object
    """
    with np.load(path, allow_pickle=False) as z:
        head = json.loads(z["__tree__"].tobytes().decode())
        stacks = {name: z[name] for name in z.files if name != "__tree__"}
    # each array its own copy, in its own memory order (F-ordered ones were stored alone)
    arrays = [np.array(stacks[f"g{g}"][j], order="K") for g, j in head["where"]]
    return _decode(head["tree"], arrays, {c.__name__: c for c in classes})
