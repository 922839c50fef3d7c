"""The one interface every table format implements.

A :class:`Source` is a 2-D numeric table seen as samples x features, whatever
its layout on disk.  It knows its shape, feature names and storage dtype
without reading data, and it reads any contiguous range of samples or of
features on its own, so that a pass can be cut into independent block ranges
(for read-ahead now, for checkpoints and cluster workers later).

Blocks always come back as float64 with NaN for missing values, oriented with
the blocking axis first:

* ``read("samples", a, b)`` -> array of shape ``(b - a, n_features)``
* ``read("features", a, b)`` -> array of shape ``(b - a, n_samples)``

Converting in the reader (which runs ahead on its own thread) keeps the
arithmetic side free of dtype cases and lets decoding overlap the GEMM.
"""

from __future__ import annotations

import datetime
import fnmatch
import os
from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import Literal

import numpy as np

from rankfold.errors import SourceError, UsageError

Axis = Literal["samples", "features"]
AXES: tuple[str, str] = ("samples", "features")

# Bytes held per element of one block while it is in flight: the float64 block
# the fold works on and the one the reader is filling (see readahead.py), plus
# the raw decoded bytes (added per source).
FLOAT_BYTES_IN_FLIGHT = 2 * 8


@dataclass(frozen=True)
class Partition:
    """Half-open ranges cutting one axis of a source into blocks.

    Parameters
    ----------
    axis : {"samples", "features"}
        The axis being cut; every block holds whole units of this axis.
    bounds : tuple of (int, int)
        Consecutive ``(start, stop)`` ranges covering ``[0, length)``.
    """

    axis: str
    bounds: tuple[tuple[int, int], ...]

    @classmethod
    def regular(cls, axis: str, length: int, size: int, align: int = 1) -> "Partition":
        """Cut ``length`` units into blocks of ``size`` rounded down to ``align``."""
        size = max(1, int(size))
        if align > 1 and size >= align:
            size -= size % align
        edges = list(range(0, length, size)) + [length]
        return cls(axis, tuple(zip(edges[:-1], edges[1:])))

    def __len__(self) -> int:
        return len(self.bounds)

    @property
    def largest(self) -> int:
        """Number of units in the largest block."""
        return max((b - a for a, b in self.bounds), default=0)


class Source(ABC):
    """A numeric table readable in blocks of samples or of features.

    Subclasses set ``path``, ``kind``, ``n_samples``, ``n_features``,
    ``feature_names``, ``storage_dtype``, ``native_axis`` and ``sample_ids``
    in their constructor and implement :meth:`read` and
    :meth:`fingerprint`.
    """

    path: str
    kind: str
    n_samples: int
    n_features: int
    feature_names: tuple[str, ...]
    storage_dtype: np.dtype
    native_axis: str
    sample_ids: np.ndarray | None = None
    missing_code: float | None = None
    _opened_stats: dict | None = None  # file_stats() when opened (record_file_stats)
    _passes_checked: int = 0

    _spec = None  # set by open_source: how another process reopens this table (sources/spec.py)

    def spec(self):
        """The :class:`~rankfold.sources.spec.SourceSpec` another process reopens this table from.

        Raises
        ------
        UsageError
            The source was built directly rather than by :func:`~rankfold.sources.open_source`.
        """
        if self._spec is None:
            raise UsageError(f"{getattr(self, 'path', 'this source')}: only sources opened with "
                             "rankfold.open_source (or given as a path) can be reopened by cluster workers")
        return self._spec

    def __reduce__(self):
        # Another process gets the recipe, never open handles or cached data:
        # unpickling reopens the table there (once per thread, see sources/spec.py).
        from rankfold.sources.spec import reopen

        return (reopen, (self.spec(),))

    @property
    def shape(self) -> tuple[int, int]:
        """``(n_samples, n_features)``."""
        return (self.n_samples, self.n_features)

    def length(self, axis: str) -> int:
        """Number of units along ``axis``."""
        return self.n_samples if axis == "samples" else self.n_features

    def other_length(self, axis: str) -> int:
        """Number of values in one unit of ``axis`` (a sample's features or a feature's samples)."""
        return self.n_features if axis == "samples" else self.n_samples

    def bytes_per_unit(self, axis: str) -> int:
        """Peak bytes one unit of ``axis`` costs while a block is in flight."""
        return self.other_length(axis) * (FLOAT_BYTES_IN_FLIGHT + 2 * self.storage_dtype.itemsize)

    def alignment(self, axis: str) -> int:
        """Preferred block-size multiple along ``axis`` (a storage chunk), 1 if none."""
        return 1

    def sample_chunk(self) -> int:
        """Samples per storage chunk, where reading part of a chunk decodes all of it; 1 if reads are exact."""
        return 1

    def group_starts(self) -> list[int] | None:
        """First sample of each storage group a read decodes from its start (Parquet row groups), or None."""
        return None

    def min_block_bytes(self, axis: str) -> int:
        """The least block memory a pass along ``axis`` can run with (one unit here)."""
        return self.bytes_per_unit(axis)

    def fixed_read_bytes(self, axis: str) -> int:
        """Bytes a read needs regardless of block size (decoder buffers)."""
        return 0

    def partition(self, axis: str, max_block_bytes: int) -> Partition:
        """Cut ``axis`` into blocks that each cost at most ``max_block_bytes`` in flight."""
        _check_axis(axis)
        units = max_block_bytes // max(1, self.bytes_per_unit(axis))
        return Partition.regular(axis, self.length(axis), max(1, units), self.alignment(axis))

    @abstractmethod
    def read(self, axis: str, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        """Read units ``[start, stop)`` of ``axis`` as float64, NaN for missing.

        ``out``, when given, is a float64 C-contiguous array of shape
        ``(stop - start, other_length(axis))`` that receives the block; reusing
        buffers this way avoids faulting fresh pages in for every block, which
        cost more than the float conversion itself on the development machine.
        """

    @abstractmethod
    def fingerprint(self) -> dict:
        """Identity of the data on disk: paths, sizes, modification times, shape."""

    def file_stats(self) -> dict[str, dict]:
        """What :meth:`check_unchanged` compares: path -> ``{"bytes", "mtime_ns"}``.

        Sources backed by files override this (one entry per Parquet file; a
        Zarr store is summarised by its file count, total size and latest
        modification time).  The default watches nothing.
        """
        return {}

    def record_file_stats(self) -> None:
        """Note :meth:`file_stats` now, as the state later passes must find unchanged."""
        self._opened_stats = self.file_stats()
        self._passes_checked = 0

    def check_unchanged(self, pass_name: str | None = None, *, after_last: bool = False) -> None:
        """Refuse to start a pass when the files changed since the source was opened.

        Called at the start of every pass (:func:`rankfold.routes.common.run_pass`),
        and with ``after_last`` once the route has read everything
        (:func:`rankfold.decompose`), before a result is written.  A table
        rewritten between passes would mix two tables in one result, for example
        a Gram matrix of the old rows with loadings of the new ones.  Costs one
        ``stat`` per file (a directory walk for Zarr stores).

        Raises
        ------
        SourceError
            Naming the file, what changed (size, modification time, file count,
            or removal) and between which passes.
        """
        if getattr(self, "_opened_stats", None) is None:
            self.record_file_stats()
        if not after_last:
            self._passes_checked += 1
        count = self._passes_checked
        now = self.file_stats()
        for path, before in self._opened_stats.items():
            after = now.get(path)
            if after == before:
                continue
            if after_last:
                when = f"while pass {count} was being read" if count else "while it was being read"
            else:
                when = (f"between pass {count - 1} and pass {count}" if count > 1
                        else "after it was opened and before pass 1")
            if pass_name:
                when += f" ({pass_name})"
            raise SourceError(f"{path}: {_describe_change(before, after)} {when}; the table was modified "
                              "while being read; rerun when it is stable")

    def read_sample_ids(self) -> np.ndarray | None:
        """Every sample's id in order, or None when the source has none."""
        return self.sample_ids

    def close(self) -> None:
        """Release open files and threads (idempotent)."""

    def describe(self) -> str:
        """One line naming the source, its shape and layout."""
        return (f"{self.kind} {self.path}: {self.n_samples:,} samples x "
                f"{self.n_features:,} features, {self.storage_dtype}, "
                f"samples stored as {'rows' if self.native_axis == 'samples' else 'columns'}")

    def _apply_missing_code(self, block: np.ndarray) -> np.ndarray:
        if self.missing_code is not None:
            block[block == self.missing_code] = np.nan
        return block


def stat_entry(path: str) -> dict | None:
    """``{"bytes", "mtime_ns"}`` of one file, or None when it is gone or unreadable."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return {"bytes": st.st_size, "mtime_ns": st.st_mtime_ns}


def _describe_change(before: dict, after: dict | None) -> str:
    """Plain words for the first difference between two :meth:`Source.file_stats` entries."""
    if after is None:
        return "was removed or became unreadable"
    if before.get("files") != after.get("files"):
        return f"number of files changed from {before.get('files'):,} to {after.get('files'):,}"
    if before["bytes"] != after["bytes"]:
        return f"size changed from {before['bytes']:,} to {after['bytes']:,} bytes"

    def stamp(ns: int) -> str:
        return datetime.datetime.fromtimestamp(ns / 1e9).isoformat(sep=" ", timespec="milliseconds")

    return f"modification time changed from {stamp(before['mtime_ns'])} to {stamp(after['mtime_ns'])}"


def is_real_dtype(dtype) -> bool:
    """Integer, floating or boolean: the dtypes a covariance makes sense of (not complex)."""
    dtype = np.dtype(dtype)
    return dtype.kind in "iufb"


def _check_axis(axis: str) -> None:
    if axis not in AXES:
        raise UsageError(f"axis must be 'samples' or 'features', got {axis!r}")


def block_buffer(source: Source, axis: str, start: int, stop: int, out: np.ndarray | None) -> np.ndarray:
    """Validate a block range once, at the boundary of :meth:`Source.read`, and return its buffer."""
    _check_axis(axis)
    n = source.length(axis)
    if not (0 <= start <= stop <= n):
        raise UsageError(f"block range [{start}, {stop}) is outside 0..{n} along {axis}")
    shape = (stop - start, source.other_length(axis))
    if out is None:
        return np.empty(shape, dtype=np.float64)
    if out.shape != shape or out.dtype != np.float64 or not out.flags.c_contiguous:
        raise UsageError(f"out must be a C-contiguous float64 array of shape {shape}, "
                         f"got {out.dtype} {out.shape}")
    return out


def select_names(available: list[str], columns: list[str] | None, where: str) -> list[int]:
    """Indices of ``available`` picked by names or fnmatch patterns, in table order.

    A pattern that matches nothing is an error: a typo must not silently drop
    features from the decomposition.
    """
    if not columns:
        return list(range(len(available)))
    picked: set[int] = set()
    for pattern in columns:
        if any(ch in pattern for ch in "*?["):
            hits = [i for i, name in enumerate(available) if fnmatch.fnmatchcase(name, pattern)]
        else:
            hits = [i for i, name in enumerate(available) if name == pattern]
        if not hits:
            shown = ", ".join(available[:8]) + (", ..." if len(available) > 8 else "")
            raise SourceError(
                f"{where}: no column matches {pattern!r}; available columns: {shown}. "
                "Check the spelling or the pattern given to --columns.")
        picked.update(hits)
    return sorted(picked)
