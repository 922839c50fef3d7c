"""Small helpers that write real tables to disk for the source, CLI and bad-input tests.

Every writer takes the in-memory array it writes, so a test can compare what a
source reads back against numpy slicing of that same array (the reference).
"""

from __future__ import annotations

import os

import numpy as np


def write_parquet(path, columns: dict, row_group_size: int | None = None) -> str:
    """Write ``columns`` (name -> numpy array or pyarrow array) as one Parquet file."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.table({name: (col if isinstance(col, (pa.Array, pa.ChunkedArray)) else pa.array(col))
                      for name, col in columns.items()})
    os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
    pq.write_table(table, os.fspath(path), row_group_size=row_group_size)
    return os.fspath(path)


def write_parquet_matrix(path, matrix: np.ndarray, names=None, row_group_size: int | None = None) -> str:
    """Write a samples x features matrix as a Parquet file with one column per feature."""
    names = names or [f"c{j}" for j in range(matrix.shape[1])]
    return write_parquet(path, {n: matrix[:, j] for j, n in enumerate(names)}, row_group_size)


def write_zarr(path, stored: np.ndarray, chunks, zarr_format: int = 3, dimension_names=None,
               compress: bool = True) -> str:
    """Write ``stored`` as a Zarr array (zstd-compressed in format 3)."""
    import zarr

    kwargs = {}
    if zarr_format == 3:
        if compress:
            kwargs["compressors"] = zarr.codecs.ZstdCodec(level=1)
        if dimension_names is not None:
            kwargs["dimension_names"] = dimension_names
    arr = zarr.create_array(os.fspath(path), shape=stored.shape, dtype=stored.dtype, chunks=chunks,
                            zarr_format=zarr_format, **kwargs)
    arr[...] = stored
    return os.fspath(path)


def write_npy(path, stored: np.ndarray) -> str:
    np.save(os.fspath(path), np.ascontiguousarray(stored))
    return os.fspath(path)


def reference_block(reference: np.ndarray, axis: str, start: int, stop: int) -> np.ndarray:
    """What ``Source.read(axis, start, stop)`` must return, by numpy slicing of the
    samples x features reference (blocking axis first)."""
    if axis == "samples":
        return reference[start:stop, :]
    return reference[:, start:stop].T


def result_left_behind(out) -> list[str]:
    """The result path itself and any hidden partial/replaced stores beside it."""
    out = os.path.abspath(os.fspath(out))
    parent, name = os.path.split(out)
    found = [out] if os.path.exists(out) else []
    found += [os.path.join(parent, f) for f in os.listdir(parent)
              if f.startswith(tuple(f".{name}.{kind}-" for kind in ("partial", "replaced", "scratch", "staging")))]
    return found


def check_refusal(rc: int, stdout: str, err: str, code: int, out, needles=(),
                  prefix: str = "rankfold: error:") -> str:
    """A refused run: exit ``code``, a one-line error naming ``needles`` (strings or compiled
    patterns), no traceback or internal error, and no result store (nor a partial one) at ``out``.
    ``prefix`` starts the message ("error:" also admits argparse's usage errors).
    Returns the message from ``prefix`` on."""
    assert rc == code, f"exit {rc}, expected {code}; stderr:\n{err}"
    assert "Traceback" not in err and "Traceback" not in stdout
    assert "internal error" not in err, err
    assert prefix in err, err
    message = err[err.index(prefix):]
    for needle in needles:
        if hasattr(needle, "search"):
            assert needle.search(message), f"{needle.pattern!r} not in message:\n{message}"
        else:
            assert needle in message, f"{needle!r} not in message:\n{message}"
    assert result_left_behind(out) == [], f"left behind: {result_left_behind(out)}"
    return message
