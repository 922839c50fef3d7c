"""Shared reading logic for sources stored as one 2-D array (Zarr, .npy).

The stored array ``S`` has shape ``(stored_rows, stored_cols)`` and is read
fastest along its rows.  With samples stored as rows, ``S`` is samples x
features; with samples stored as columns (common for genomic stores), ``S`` is
features x samples.  Reading along the stored rows is a plain slice; reading
along the stored columns walks the rows in chunks and copies a column slab, so
that memory stays bounded by the block, not by the table.
"""

from __future__ import annotations

import os

import numpy as np

from rankfold.sources.base import Source, block_buffer


class StoredMatrixSource(Source):
    """A :class:`Source` over a 2-D array; subclasses implement :meth:`_rows`."""

    def __init__(self, path: str, kind: str, stored_shape: tuple[int, int], dtype,
                 samples_as: str, missing_code: float | None):
        self.path = path
        self.kind = kind
        self.stored_shape = (int(stored_shape[0]), int(stored_shape[1]))
        self.storage_dtype = np.dtype(dtype)
        self.native_axis = "samples" if samples_as == "rows" else "features"
        rows, cols = self.stored_shape
        self.n_samples, self.n_features = (rows, cols) if samples_as == "rows" else (cols, rows)
        self.missing_code = missing_code

    # -- subclass hooks ------------------------------------------------
    def _rows(self, start: int, stop: int, cols: slice) -> np.ndarray:
        """Stored rows ``[start, stop)``, columns ``cols``, in the storage dtype."""
        raise NotImplementedError

    def _fill_rows(self, start: int, stop: int, out: np.ndarray) -> None:
        """Whole stored rows ``[start, stop)`` converted into the float64 ``out``."""
        raise NotImplementedError

    def _row_step(self) -> int:
        """Stored rows to read at a time when slicing columns (a storage chunk)."""
        return 1024

    # -- Source --------------------------------------------------------
    def alignment(self, axis: str) -> int:
        return self._row_step() if axis == self.native_axis else 1

    def read(self, axis: str, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        out = block_buffer(self, axis, start, stop, out)
        if axis == self.native_axis:
            self._fill_rows(start, stop, out)
        else:
            rows = self.stored_shape[0]
            step = self._row_step()
            for r0 in range(0, rows, step):
                r1 = min(rows, r0 + step)
                out[:, r0:r1] = self._rows(r0, r1, slice(start, stop)).T
        return self._apply_missing_code(out)

    def fingerprint(self) -> dict:
        return {
            "kind": self.kind,
            "path": os.path.abspath(self.path),
            "files": _tree_stat(self.path),
            "stored_shape": list(self.stored_shape),
            "dtype": str(self.storage_dtype),
            "native_axis": self.native_axis,
        }

    def file_stats(self) -> dict[str, dict]:
        tree = _tree_stat(self.path)
        return {os.path.abspath(self.path): {"files": tree["count"], "bytes": tree["bytes"],
                                             "mtime_ns": tree["latest_mtime_ns"]}}


def _tree_stat(path: str) -> dict:
    """Count, total size and latest modification time of the files under ``path``.

    A summary rather than a listing: a Zarr store may hold a million chunk
    files, and any rewrite changes the size or the latest time.
    """
    if os.path.isfile(path):
        st = os.stat(path)
        return {"count": 1, "bytes": st.st_size, "latest_mtime_ns": st.st_mtime_ns}
    count = size = latest = 0
    for root, _dirs, files in os.walk(path):
        for name in files:
            st = os.stat(os.path.join(root, name))
            count += 1
            size += st.st_size
            latest = max(latest, st.st_mtime_ns)
    return {"count": count, "bytes": size, "latest_mtime_ns": latest}
