"""Parquet tables: one file or a folder of files sharing a schema.

Rows are samples.  Blocks of samples are packed from whole row groups where a
row group fits the block budget, so each row group is decoded once; pyarrow
decodes the selected columns of a row group in parallel.  A row group larger
than the budget is streamed in record batches, and a reader kept per row group
continues where the previous block stopped, so a sequential pass still decodes
every row once.

Integer, floating and boolean columns are read as float64 with nulls as NaN.
"""

from __future__ import annotations

import bisect
import os
import posixpath

import numpy as np

from rankfold.errors import MemoryLimitError, SourceError
from rankfold.memory import format_bytes
from rankfold.sources.base import Partition, Source, block_buffer, select_names, stat_entry
from rankfold.sources.location import arrow_filesystem, is_url, stat, url_fs


def _is_numeric(pa_type) -> bool:
    import pyarrow.types as pt

    return pt.is_integer(pa_type) or pt.is_floating(pa_type) or pt.is_boolean(pa_type)


def _list_files(path: str) -> list[str]:
    if is_url(path):
        fs, p = url_fs(path)
        if not fs.isdir(p):
            return [path]
        scheme = path.split("://", 1)[0]
        files = sorted(f"{scheme}://{f}" for f in fs.find(p)
                       if f.endswith((".parquet", ".parq", ".pq")) and not posixpath.basename(f).startswith((".", "_")))
        if not files:
            raise SourceError(f"{path}: folder holds no .parquet files")
        return files
    if os.path.isdir(path):
        files = sorted(
            os.path.join(root, f)
            for root, _d, names in os.walk(path)
            for f in names
            if f.endswith((".parquet", ".parq", ".pq")) and not f.startswith((".", "_"))
        )
        if not files:
            raise SourceError(f"{path}: folder holds no .parquet files")
        return files
    return [path]


def _arrow_where(f: str) -> tuple:
    """``(path, filesystem)`` arguments for pyarrow: a local path as is, a URL through fsspec."""
    if is_url(f):
        filesystem, p = arrow_filesystem(f)
        return p, filesystem
    return f, None


def _read_metadata(f: str):
    import pyarrow.parquet as pq

    where, filesystem = _arrow_where(f)
    return pq.read_metadata(where, filesystem=filesystem)


class ParquetSource(Source):
    """A Parquet file or folder of files; samples are rows, features are columns.

    Parameters
    ----------
    path : str
        A ``.parquet`` file or a folder searched recursively for them (sorted by path).
    columns : list of str, optional
        Names or fnmatch patterns (``"sensor_*"``) of the feature columns.
        Default: every column except ``id_column`` and ``exclude``.
    exclude : list of str, optional
        Names or patterns of columns to leave out.
    id_column : str, optional
        Column carried along as sample ids (never a feature).
    """

    kind = "parquet"
    native_axis = "samples"

    def __init__(self, path: str, *, columns=None, exclude=None, id_column=None,
                 missing_code: float | None = None):
        self.path = path
        self.missing_code = missing_code
        self.files = _list_files(path)
        self._handles: dict[int, object] = {}
        schemas = []
        self._rg_rows: list[list[int]] = []
        for f in self.files:
            try:
                meta = _read_metadata(f)
            except PermissionError:
                raise SourceError(f"{f}: permission denied; every file of the table must be readable "
                                  "by this user") from None
            except Exception as exc:
                raise SourceError(f"{f}: not a readable Parquet file ({type(exc).__name__}: {exc})") from None
            schemas.append(meta.schema.to_arrow_schema())
            self._rg_rows.append([meta.row_group(i).num_rows for i in range(meta.num_row_groups)])
        first = schemas[0]
        for f, schema in zip(self.files[1:], schemas[1:]):
            _check_same_schema(self.files[0], first, f, schema)

        names = list(first.names)
        if len(set(names)) != len(names):
            dup = sorted({n for n in names if names.count(n) > 1})
            raise SourceError(f"{self.files[0]}: duplicate column name(s) {', '.join(map(repr, dup))}; a "
                              "column must be named once to be told apart: rename the copies when writing the file")
        if id_column is not None and id_column not in names:
            raise SourceError(f"{path}: id column {id_column!r} not found; columns: {', '.join(names[:8])}")
        candidates = [n for n in names if n != id_column]
        if exclude:
            dropped = {candidates[i] for i in select_names(candidates, list(exclude), f"{path} (--exclude)")}
            candidates = [n for n in candidates if n not in dropped]
            if not candidates:
                raise SourceError(f"{path}: no feature columns left after selection: --exclude "
                                  f"{' '.join(exclude)} leaves out every column")
        picked = [candidates[i] for i in select_names(candidates, columns, path)]
        bad = [f"{n} ({first.field(n).type})" for n in picked if not _is_numeric(first.field(n).type)]
        if bad:
            raise SourceError(
                f"{path}: non-numeric column(s) {', '.join(bad)}; select numeric columns with "
                "--columns or leave these out with --exclude")
        if not picked:
            raise SourceError(f"{path}: no feature columns left after selection")
        self.feature_names = tuple(picked)
        self.id_column = id_column
        self.storage_dtype = np.result_type(*(np.dtype(first.field(n).type.to_pandas_dtype()) for n in picked))
        self.n_features = len(picked)
        # Global row offsets of every (file, row group), for locating blocks.
        self._groups: list[tuple[int, int, int]] = []  # (file index, row group, first global row)
        row = 0
        for fi, sizes in enumerate(self._rg_rows):
            for rg, n in enumerate(sizes):
                if n:
                    self._groups.append((fi, rg, row))
                    row += n
        self._group_starts = [g[2] for g in self._groups]
        self.n_samples = row
        self._streams: dict[tuple[int, int], list] = {}
        self._largest_group_bytes: int | None = None

    # -- helpers ---------------------------------------------------------
    def _file(self, fi: int):
        import pyarrow.parquet as pq

        if fi not in self._handles:
            try:
                # pre_buffer=False: pre-buffering would hold a row group's compressed
                # column chunks beside the decoded ones (measured 15 MB against 6 MB
                # for a 6 MB row group); local and page-cached reads do not need it.
                where, filesystem = _arrow_where(self.files[fi])
                self._handles[fi] = pq.ParquetFile(where, pre_buffer=False, filesystem=filesystem)
            except Exception as exc:
                raise SourceError(f"{self.files[fi]}: cannot open ({type(exc).__name__}: {exc})") from None
        return self._handles[fi]

    def _group_rows(self, gi: int) -> int:
        fi, rg, _ = self._groups[gi]
        return self._rg_rows[fi][rg]

    def _to_float(self, table, out: np.ndarray, row0: int, names) -> None:
        """Write the columns of an Arrow table into ``out[row0:, j]`` as float64 with NaN."""
        import pyarrow as pa

        n = table.num_rows
        columns = []
        for name in names:
            col = table.column(name)
            if col.null_count or not pa.types.is_floating(col.type):
                # safe=False: integers beyond 2**53 round to the nearest float64, as
                # numpy's astype does; Arrow's checked cast would refuse them.
                col = col.cast(pa.float64(), safe=False)
                if col.null_count:
                    col = col.fill_null(np.nan)
            columns.append(col.to_numpy())
        # Columns arrive one by one but the block is row-major: writing a whole
        # column at a time strides across every row (measured 0.14 GB/s).  A
        # blocked transpose through a slab that fits in cache is several times faster.
        slab = max(1, min(n, (256 * 1024) // max(1, len(columns))))
        buffer = np.empty((len(columns), slab))
        for a in range(0, n, slab):
            b = min(n, a + slab)
            for j, values in enumerate(columns):
                buffer[j, :b - a] = values[a:b]
            out[row0 + a:row0 + b] = buffer[:, :b - a].T

    def _read_group_part(self, gi: int, lo: int, hi: int, out: np.ndarray, row0: int) -> None:
        """Rows ``[lo, hi)`` of row group ``gi`` into ``out`` starting at ``row0``."""
        fi, rg, _ = self._groups[gi]
        pf = self._file(fi)
        names = list(self.feature_names)
        try:
            if lo == 0 and hi == self._group_rows(gi):
                self._to_float(pf.read_row_group(rg, columns=names, use_threads=True), out, row0, names)
                return
            # Part of an oversized row group: continue a batch stream when the
            # previous block ended exactly here, otherwise start one and skip.
            stream = self._streams.pop((gi, lo), None)
            if stream is None:
                batches = pf.iter_batches(batch_size=max(1024, min(hi - lo, 65536)), row_groups=[rg],
                                          columns=names, use_threads=True)
                stream = [batches, 0, None]  # iterator, row of the held batch, held batch
            batches, at, held = stream
            pos = lo
            while pos < hi:
                if held is None or at + held.num_rows <= pos:
                    if held is not None:
                        at += held.num_rows
                    held = next(batches)
                    continue
                a, b = pos - at, min(hi, at + held.num_rows) - at
                self._to_float(held.slice(a, b - a), out, row0 + pos - lo, names)
                pos = at + b
            if hi < self._group_rows(gi):  # a finished group's stream would pin its pages
                self._streams[(gi, hi)] = [batches, at, held]
        except SourceError:
            raise
        except Exception as exc:
            raise SourceError(f"{self.files[fi]}: cannot read row group {rg} "
                              f"({type(exc).__name__}: {exc})") from None

    # -- Source ------------------------------------------------------------
    def alignment(self, axis: str) -> int:
        return 1

    def group_starts(self) -> list[int]:
        return list(self._group_starts)

    def _group_sizes(self) -> tuple[int, int]:
        """Largest compressed and largest decoded size of a row group's selected columns."""
        if self._largest_group_bytes is None:
            wanted = set(self.feature_names)
            packed = decoded = 0
            for f in self.files:
                meta = _read_metadata(f)
                for g in range(meta.num_row_groups):
                    rg = meta.row_group(g)
                    cols = [rg.column(c) for c in range(rg.num_columns) if rg.column(c).path_in_schema in wanted]
                    packed = max(packed, sum(c.total_compressed_size for c in cols))
                    decoded = max(decoded, sum(c.total_uncompressed_size for c in cols))
            self._largest_group_bytes = (packed, decoded)
        return self._largest_group_bytes

    def fixed_read_bytes(self, axis: str) -> int:
        """A row group's compressed column chunks, held while they are decoded.

        The decoded values are part of the per-sample cost; a row group too
        large for one block costs more, which :meth:`partition` reserves.
        """
        return self._group_sizes()[0]

    @property
    def largest_group_rows(self) -> int:
        """Rows in the largest row group."""
        return max((self._group_rows(g) for g in range(len(self._groups))), default=0)

    def min_block_bytes(self, axis: str) -> int:
        """One whole row group, or the streaming reserve plus one sample if that is less."""
        unit = self.bytes_per_unit(axis)
        if axis == "features":
            return unit
        return min(max(1, self.largest_group_rows) * unit, self.split_group_reserve() + unit)

    def split_group_reserve(self) -> int:
        """Bytes set aside when a row group must be split across blocks (streamed)."""
        return sum(self._group_sizes())

    def partition(self, axis: str, max_block_bytes: int) -> Partition:
        """Pack whole row groups into sample blocks; split only oversized groups.

        Whole row groups are read with one call and freed at once (measured on a
        12,500 x 128 float32 row group: 9.6 MB of Arrow memory at most).
        Splitting a group streams it in record batches, and pyarrow then holds
        the group's whole column chunks, dictionaries included (33 MB for the
        same group), so that case reserves a row group before sizing blocks.
        """
        if axis == "features":
            return super().partition(axis, max_block_bytes)
        unit = self.bytes_per_unit("samples")
        units = max_block_bytes // unit
        largest_rows = self.largest_group_rows
        if largest_rows > units:
            reserve = self.split_group_reserve()
            units = (max_block_bytes - reserve) // unit
            if units < 1:
                raise MemoryLimitError(
                    f"{self.path}: row groups of up to {largest_rows:,} rows do not fit one block, and "
                    f"streaming them needs {format_bytes(reserve)} plus at least one sample "
                    f"({format_bytes(unit)}), more than the {format_bytes(max_block_bytes)} left for blocks; raise "
                    f"--memory-limit by at least {format_bytes(reserve + 64 * unit - max_block_bytes)} "
                    "or rewrite the file with smaller row groups")
        return self._pack_groups(max(1, units))

    def _pack_groups(self, units: int) -> Partition:
        """Greedy blocks of at most ``units`` rows that cut row groups only when they must."""
        bounds: list[tuple[int, int]] = []
        start = 0
        for gi in range(len(self._groups)):
            g0 = self._groups[gi][2]
            g1 = g0 + self._group_rows(gi)
            if g1 - start <= units:
                continue
            if g0 > start:
                bounds.append((start, g0))
                start = g0
            while g1 - start > units:
                bounds.append((start, start + units))
                start += units
        if start < self.n_samples:
            bounds.append((start, self.n_samples))
        return Partition("samples", tuple(bounds))

    def read(self, axis: str, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        out = block_buffer(self, axis, start, stop, out)
        try:
            if axis == "features":
                return self._read_features(start, stop, out)
            return self._read_samples(start, stop, out)
        finally:
            # Arrow's allocator keeps freed pages for reuse; hand them back so the
            # resident set follows the memory ceiling rather than the largest read so far.
            import pyarrow as pa

            pa.default_memory_pool().release_unused()

    def _read_samples(self, start: int, stop: int, out: np.ndarray) -> np.ndarray:
        gi = max(0, bisect.bisect_right(self._group_starts, start) - 1)
        row = start
        while row < stop:
            g0 = self._groups[gi][2]
            g1 = g0 + self._group_rows(gi)
            hi = min(stop, g1)
            self._read_group_part(gi, row - g0, hi - g0, out, row - start)
            row = hi
            gi += 1
        return self._apply_missing_code(out)

    def _read_features(self, start: int, stop: int, out: np.ndarray) -> np.ndarray:
        """Columns ``[start, stop)`` for every row, as a (features, samples) block."""
        names = list(self.feature_names[start:stop])
        for fi, rg, g0 in self._groups:
            try:
                table = self._file(fi).read_row_group(rg, columns=names, use_threads=True)
            except Exception as exc:
                raise SourceError(f"{self.files[fi]}: cannot read row group {rg} "
                                  f"({type(exc).__name__}: {exc})") from None
            self._to_float(table, out.T, g0, names)  # out.T is samples x features
        return self._apply_missing_code(out)

    def read_sample_ids(self) -> np.ndarray | None:
        """The id column for every sample, in order, or None without one."""
        if self.id_column is None:
            return None
        parts = [self._file(fi).read_row_group(rg, columns=[self.id_column]).column(0).to_numpy(zero_copy_only=False)
                 for fi, rg, _ in self._groups]
        return np.concatenate(parts) if parts else np.array([])

    def fingerprint(self) -> dict:
        files = []
        for f in self.files:
            files.append({"path": f if is_url(f) else os.path.abspath(f), **stat(f)})
        return {"kind": "parquet", "path": self.path if is_url(self.path) else os.path.abspath(self.path),
                "files": files,
                "shape": [self.n_samples, self.n_features], "columns": list(self.feature_names)}

    def file_stats(self) -> dict[str, dict]:
        return {os.path.abspath(f): stat_entry(f) for f in self.files}

    def close(self) -> None:
        self._handles.clear()
        self._streams.clear()


def _check_same_schema(ref_file, ref, other_file, other) -> None:
    ref_types = {f.name: f.type for f in ref}
    for field in other:
        if field.name not in ref_types:
            raise SourceError(f"{other_file}: column {field.name!r} is not in {ref_file}; "
                              "all files of a folder must share one schema")
        if ref_types[field.name] != field.type:
            raise SourceError(f"{other_file}: column {field.name!r} is {field.type} here but "
                              f"{ref_types[field.name]} in {ref_file}; all files of a folder must share one schema")
    missing = [n for n in ref_types if n not in set(other.names)]
    if missing:
        raise SourceError(f"{other_file}: column {missing[0]!r} of {ref_file} is missing; "
                          "all files of a folder must share one schema")
