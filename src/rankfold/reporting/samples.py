"""Per-sample data for a report, read without loading every sample.

A result may hold 10^8 samples in lazily read zarr arrays; a scatter needs a
few thousand.  :func:`sample_rows` draws a seeded random subset of row indices
(sorted, so reads walk the store forward), :func:`take_rows` reads only those
rows, :func:`label_values` reads the matching rows of one Parquet column, and
:func:`histogram` streams a 1-D array in blocks.
"""

from __future__ import annotations

import os

import numpy as np

from rankfold.errors import SourceError, UsageError

BLOCK_ROWS = 1 << 20  # rows per read when streaming a per-sample array (8 MB of float64)


def sample_rows(n: int, max_points: int, seed: int) -> np.ndarray:
    """Sorted row indices: all ``n`` rows, or ``max_points`` drawn without replacement.

    ``numpy.random.Generator.choice(replace=False)`` costs about ``max_points``
    work, not ``n``, when ``max_points`` is a small fraction of ``n``.
    """
    if n <= max_points:
        return np.arange(n, dtype=np.int64)
    rng = np.random.default_rng(seed)
    return np.sort(rng.choice(n, size=max_points, replace=False)).astype(np.int64)


def take_rows(array, rows: np.ndarray, columns: slice | None = None) -> np.ndarray:
    """``array[rows]`` (and ``[:, columns]``) for a numpy or a lazily read zarr array.

    zarr arrays are read with an orthogonal selection, which fetches only the
    chunks holding ``rows``.
    """
    if isinstance(array, np.ndarray):
        out = array[rows]
        return out if columns is None else out[:, columns]
    if hasattr(array, "get_orthogonal_selection"):
        sel = (rows,) if columns is None else (rows, columns)
        return np.asarray(array.get_orthogonal_selection(sel))
    out = np.asarray(array[rows])
    return out if columns is None else out[:, columns]


def histogram(array, bins: int = 60) -> tuple[np.ndarray, np.ndarray, bool, int]:
    """Histogram of a 1-D per-sample array, read in blocks (two passes: range, then counts).

    Geometric bins are used when every finite value is positive and they span
    more than two decades (residuals usually do: a few outliers sit orders of
    magnitude above the bulk).

    Returns
    -------
    edges : ndarray, shape (b + 1,)
    counts : ndarray of int64, shape (b,)
    log_x : bool
    n_finite : int
    """
    n = int(array.shape[0])
    lo, hi, lo_pos, n_finite = np.inf, -np.inf, np.inf, 0
    for start in range(0, n, BLOCK_ROWS):
        block = np.asarray(array[start:start + BLOCK_ROWS], dtype=np.float64)
        block = block[np.isfinite(block)]
        if block.size:
            n_finite += block.size
            lo, hi = min(lo, block.min()), max(hi, block.max())
            pos = block[block > 0]
            if pos.size:
                lo_pos = min(lo_pos, pos.min())
    if n_finite == 0:
        return np.array([0.0, 1.0]), np.zeros(1, dtype=np.int64), False, 0
    log_x = lo > 0 and hi / lo > 100.0
    if log_x:
        edges = np.geomspace(lo, hi, bins + 1)
    else:
        if hi <= lo:
            hi = lo + max(abs(lo), 1.0) * 1e-6
        edges = np.linspace(lo, hi, bins + 1)
    counts = np.zeros(bins, dtype=np.int64)
    for start in range(0, n, BLOCK_ROWS):
        block = np.asarray(array[start:start + BLOCK_ROWS], dtype=np.float64)
        counts += np.histogram(block[np.isfinite(block)], bins=edges)[0]
    return edges, counts, bool(log_x), n_finite


def check_labels(values: np.ndarray, what: str, max_distinct: int) -> np.ndarray:
    """Labels as text, refusing more distinct values than colours can tell apart."""
    text = np.array(["(missing)" if v is None else (v.decode() if isinstance(v, bytes) else str(v))
                     for v in np.asarray(values, dtype=object).tolist()], dtype=object)
    distinct = len(set(text.tolist()))
    if distinct > max_distinct:
        raise UsageError(f"{what} has {distinct:,} distinct values among the {text.size:,} plotted samples; "
                         f"at most {max_distinct} can be told apart by colour; choose a column with fewer "
                         "values (a group, batch or status column)")
    return text


def label_values(source: dict, column: str, rows: np.ndarray) -> np.ndarray:
    """Values of Parquet column ``column`` at global row positions ``rows`` (sorted).

    The result's source fingerprint gives the files in row order; only the row
    groups holding ``rows`` are read, and only that column.

    Raises
    ------
    UsageError
        If the source is not Parquet or has no such column (a few names are listed).
    SourceError
        If the source files are gone or no longer match the result's row count.
    """
    import pyarrow.parquet as pq

    kind, path = source.get("kind"), source.get("path")
    if kind != "parquet":
        raise UsageError(f"label column {column!r}: label columns are read from Parquet sources, and this "
                         f"result's source {path} is {kind or 'not Parquet'}; from Python, pass labels= instead")
    files = [f["path"] for f in source.get("files", [])] or [path]
    missing = [f for f in files if not os.path.isfile(f)]
    if missing:
        raise SourceError(f"label column {column!r}: the result's source file {missing[0]} no longer exists")
    try:
        handles = [pq.ParquetFile(f) for f in files]
    except Exception as exc:
        raise SourceError(f"label column {column!r}: cannot read the source {path} ({exc})") from None
    names = handles[0].schema_arrow.names
    if column not in names:
        shown = ", ".join(repr(n) for n in names[:8]) + (", ..." if len(names) > 8 else "")
        raise UsageError(f"label column {column!r} is not in {path}; its columns include {shown}")
    out = np.empty(rows.size, dtype=object)
    first = 0  # global index of the current row group's first row
    pos = 0  # next entry of rows to fill
    for f, handle in zip(files, handles):
        meta = handle.metadata
        if column not in handle.schema_arrow.names:
            raise SourceError(f"label column {column!r} is missing from {f}")
        for g in range(meta.num_row_groups):
            size = meta.row_group(g).num_rows
            end = int(np.searchsorted(rows, first + size, side="left"))
            if end > pos:
                local = rows[pos:end] - first
                col = handle.read_row_group(g, columns=[column]).column(0)
                out[pos:end] = col.take(local).to_pylist()
                pos = end
            first += size
    if pos != rows.size:
        raise SourceError(f"label column {column!r}: {path} now has {first:,} rows, fewer than the result's "
                          "samples; it has changed since the result was computed")
    return out
