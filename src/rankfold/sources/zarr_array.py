"""Zarr 2-D arrays (format 3, and format 2 where zarr-python reads it).

Reading along the stored rows is split into chunk-aligned pieces decoded by a
small thread pool: zarr's codecs release the GIL, and measured on the
development machine, plain slicing of a zstd store decoded at about a quarter
of the speed that two threads reached.  Pieces are converted to float64 into
the output block as they arrive, so at most ``threads`` raw pieces exist at
once.

Feature names and sample ids follow the xarray convention when present: a
1-D array in the same group named after the dimension (``dimension_names``
in format 3, the ``_ARRAY_DIMENSIONS`` attribute in format 2).
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from rankfold.errors import SourceError
from rankfold.sources import location
from rankfold.sources.base import FLOAT_BYTES_IN_FLIGHT, is_real_dtype
from rankfold.sources.matrix import StoredMatrixSource
from rankfold.sources.npy import _default_names

READ_THREADS = 2


def _open_node(path: str):
    import zarr

    try:
        return zarr.open(path, mode="r")
    except Exception as exc:  # zarr raises several types for "not a store"
        raise SourceError(f"{path}: not a readable Zarr array or group ({type(exc).__name__}: {exc})") from None


def _dimension_names(arr) -> tuple | None:
    names = getattr(arr.metadata, "dimension_names", None)
    if names is None:
        names = arr.attrs.get("_ARRAY_DIMENSIONS")
    return tuple(names) if names else None


class ZarrSource(StoredMatrixSource):
    """A 2-D Zarr array as samples x features (``samples_as="rows"``) or the transpose."""

    def __init__(self, path: str, *, samples_as: str = "rows", array: str | None = None,
                 missing_code: float | None = None):
        import zarr

        node = _open_node(path)
        group_path = None
        if isinstance(node, zarr.Group):
            group_path = path
            two_d = sorted(name for name, a in node.arrays() if a.ndim == 2)
            if array is None:
                if len(two_d) != 1:
                    raise SourceError(
                        f"{path}: a Zarr group holding {len(two_d)} 2-D arrays "
                        f"({', '.join(two_d) or 'none'}); name the array in the path "
                        f"(for example {path}/{two_d[0] if two_d else 'NAME'}) or with --array")
                array = two_d[0]
            if array not in node:
                raise SourceError(f"{path}: no array named {array!r}; 2-D arrays here: {', '.join(two_d) or 'none'}")
            arr = node[array]
            path = location.join(path, array)
        else:
            arr = node
            parent = location.parent(path)
            if any(location.exists(location.join(parent, f)) for f in ("zarr.json", ".zgroup")):
                group_path = parent
        if arr.ndim != 2:
            raise SourceError(f"{path}: expected a 2-D array, found {arr.ndim}-D with shape {arr.shape}")
        dtype = np.dtype(arr.dtype) if not hasattr(arr.dtype, "to_native_dtype") else arr.dtype.to_native_dtype()
        if not is_real_dtype(dtype):
            raise SourceError(f"{path}: dtype {dtype} is not a real number type (integer, float or "
                              "boolean); convert the array before decomposing")
        super().__init__(path, "zarr", arr.shape, dtype, samples_as, missing_code)
        self._arr = arr
        self._chunk_rows = int(arr.chunks[0])
        self._pool: ThreadPoolExecutor | None = None
        self.feature_names, self.sample_ids = self._coordinates(group_path)

    def _coordinates(self, group_path: str | None):
        """Feature names and sample ids from sibling coordinate arrays, if any."""
        names = _default_names(self.n_features)
        ids = None
        dims = _dimension_names(self._arr)
        if group_path is None or dims is None:
            return names, ids
        group = _open_node(group_path)
        feature_dim, sample_dim = (dims[1], dims[0]) if self.native_axis == "samples" else (dims[0], dims[1])
        for dim, n, which in ((feature_dim, self.n_features, "f"), (sample_dim, self.n_samples, "s")):
            if dim and dim in group:
                coord = group[dim]
                if coord.ndim == 1 and coord.shape[0] == n:
                    values = np.asarray(coord[:])
                    if which == "f":
                        names = tuple(str(v) for v in values)
                    else:
                        ids = values
        return names, ids

    def alignment(self, axis: str) -> int:
        return self._chunk_rows if axis == self.native_axis else 1

    def sample_chunk(self) -> int:
        # Samples stored as rows: a chunk spans several rows; as columns, several columns.
        return int(self._arr.chunks[0] if self.native_axis == "samples" else self._arr.chunks[1])

    def bytes_per_unit(self, axis: str) -> int:
        # Raw chunks are decoded a few at a time (fixed_read_bytes), not per block.
        return self.other_length(axis) * FLOAT_BYTES_IN_FLIGHT

    def _row_step(self) -> int:
        return self._chunk_rows

    def fixed_read_bytes(self, axis: str) -> int:
        # Per read thread: a chunk's compressed bytes, zarr's decoded chunk, and the
        # piece it copies out (measured: about three chunks per thread at the peak).
        chunk = int(np.prod(self._arr.chunks)) * self.storage_dtype.itemsize
        return 3 * READ_THREADS * chunk

    def _get(self, start: int, stop: int, cols=slice(None)) -> np.ndarray:
        """``arr[start:stop, cols]``, with a decoding failure named by chunk."""
        try:
            return np.asarray(self._arr[start:stop, cols])
        except Exception as exc:  # codecs raise many types for corrupt bytes
            first, last = start // self._chunk_rows, (stop - 1) // self._chunk_rows
            which = self._failing_chunk(first, last, cols) or (
                f"chunk row {first}" if first == last else f"chunk rows {first}-{last}")
            raise SourceError(f"{self.path}: cannot decode {which} (stored rows {start:,}-{stop - 1:,}): "
                              f"{type(exc).__name__}: {exc}; the store may be corrupt or truncated") from None

    def _failing_chunk(self, first: int, last: int, cols) -> str | None:
        """``"chunk c/3/1 (file ...)"`` for the first chunk in rows ``first..last`` that fails to decode.

        Runs only after a read failed, so decoding chunk by chunk costs nothing in a healthy run.
        """
        col_chunk = int(self._arr.chunks[1])
        c0 = (cols.start or 0) // col_chunk
        c1 = ((cols.stop if cols.stop is not None else self.stored_shape[1]) - 1) // col_chunk
        for r in range(first, last + 1):
            for c in range(c0, c1 + 1):
                try:
                    self._arr[r * self._chunk_rows:(r + 1) * self._chunk_rows, c * col_chunk:(c + 1) * col_chunk]
                except Exception:
                    try:
                        key = self._arr.metadata.encode_chunk_key((r, c))
                    except Exception:  # an unusual key encoding: the grid position still locates it
                        return f"chunk ({r}, {c})"
                    return f"chunk {key} (file {os.path.join(self.path, key)})"
        return None

    def _rows(self, start: int, stop: int, cols: slice) -> np.ndarray:
        return self._get(start, stop, cols)

    def _fill_rows(self, start: int, stop: int, out: np.ndarray) -> None:
        """Chunk-aligned pieces decoded on ``READ_THREADS`` threads, converted into ``out``."""
        step = self._chunk_rows
        first = start - start % step
        pieces = [(max(start, r), min(stop, r + step)) for r in range(first, stop, step)]

        def fill(piece):
            a, b = piece
            np.copyto(out[a - start:b - start], self._get(a, b))

        if len(pieces) == 1:
            fill(pieces[0])
            return
        if self._pool is None:
            self._pool = ThreadPoolExecutor(READ_THREADS, thread_name_prefix="rankfold-zarr")
        for f in [self._pool.submit(fill, p) for p in pieces]:
            f.result()

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True)
            self._pool = None
