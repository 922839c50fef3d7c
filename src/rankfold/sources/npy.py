"""``.npy`` files read through short-lived memory maps.

Each read maps only the byte range it needs and drops the map before
returning.  A map kept open for the whole pass would leave every page it ever
touched counted in the process's resident memory, which would make the memory
ceiling look broken even though the kernel could reclaim those pages.
"""

from __future__ import annotations

import numpy as np

from rankfold.errors import SourceError
from rankfold.sources.base import FLOAT_BYTES_IN_FLIGHT, is_real_dtype
from rankfold.sources.matrix import StoredMatrixSource


class NpySource(StoredMatrixSource):
    """A 2-D ``.npy`` file (C order) as samples x features or features x samples."""

    def __init__(self, path: str, *, samples_as: str = "rows", missing_code: float | None = None,
                 feature_names: list[str] | None = None):
        try:
            with open(path, "rb") as fh:
                version = np.lib.format.read_magic(fh)
                read_header = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                               else np.lib.format.read_array_header_2_0)
                shape, fortran, dtype = read_header(fh)
                self._offset = fh.tell()
        except (OSError, ValueError) as exc:
            raise SourceError(f"{path}: not a readable .npy file ({exc})") from None
        if len(shape) != 2:
            raise SourceError(f"{path}: expected a 2-D array, found {len(shape)}-D with shape {shape}")
        if fortran:
            raise SourceError(f"{path}: Fortran-ordered .npy is not supported; save it with "
                              "numpy.save(path, numpy.ascontiguousarray(a))")
        if not is_real_dtype(dtype):
            raise SourceError(f"{path}: dtype {dtype} is not a real number type (integer, float or "
                              "boolean); convert the array before decomposing")
        super().__init__(path, "npy", shape, dtype, samples_as, missing_code)
        n = self.n_features
        self.feature_names = tuple(feature_names) if feature_names else _default_names(n)

    def bytes_per_unit(self, axis: str) -> int:
        # The stored bytes of the block are mapped only while it is copied.
        return self.other_length(axis) * (FLOAT_BYTES_IN_FLIGHT + self.storage_dtype.itemsize)

    def _row_step(self) -> int:
        # About 8 MB of stored rows per step when slicing columns.
        return max(1, (8 << 20) // max(1, self.stored_shape[1] * self.storage_dtype.itemsize))

    def _map(self, start: int, stop: int) -> np.memmap:
        row_bytes = self.stored_shape[1] * self.storage_dtype.itemsize
        return np.memmap(self.path, dtype=self.storage_dtype, mode="r",
                         offset=self._offset + start * row_bytes, shape=(stop - start, self.stored_shape[1]))

    # Each map lives only for one call: dropping it unmaps the pages, so they
    # leave this process's resident set (the page cache keeps them).
    def _rows(self, start: int, stop: int, cols: slice) -> np.ndarray:
        if stop <= start:
            return np.empty((0, cols.stop - cols.start), self.storage_dtype)
        mm = self._map(start, stop)
        part = np.array(mm[:, cols])
        del mm
        return part

    def _fill_rows(self, start: int, stop: int, out: np.ndarray) -> None:
        if stop > start:
            mm = self._map(start, stop)
            np.copyto(out, mm)
            del mm


def _default_names(n: int) -> tuple[str, ...]:
    width = len(str(max(0, n - 1)))
    return tuple(f"f{i:0{width}d}" for i in range(n))
