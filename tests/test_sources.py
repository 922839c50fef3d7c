"""Sources read real files on disk exactly as numpy slicing of the array that was written.

Reference for every value check: numpy basic slicing of the in-memory array the
test wrote (``_table_files.reference_block``), converted to float64 with NaN
where a value is missing.
"""

from __future__ import annotations

import os
import random
import threading
import time
import zlib

import numpy as np
import pyarrow as pa
import pytest
import zarr

from _table_files import (reference_block, write_npy, write_parquet, write_parquet_matrix,
                          write_zarr)
from rankfold.errors import MemoryLimitError, SourceError, UsageError
from rankfold.sources import NpySource, ParquetSource, ZarrSource, open_source
from rankfold.sources.base import Partition, Source
from rankfold.sources.readahead import iter_blocks

AXES = ("samples", "features")


# --------------------------------------------------------------------------- cases
def _matrix(rng, n, m, dtype=np.float64):
    if np.issubdtype(dtype, np.integer):
        return rng.integers(-50, 50, size=(n, m)).astype(dtype)
    return (rng.standard_normal((n, m)) * 10).astype(dtype)


def _parquet_file(tmp_path, rng):
    ref = _matrix(rng, 37, 6)
    names = [f"x{j}" for j in range(6)]
    path = write_parquet_matrix(tmp_path / "t.parquet", ref, names, row_group_size=8)
    return open_source(path), ref, names, np.dtype(np.float64), ParquetSource


def _parquet_folder(tmp_path, rng):
    # Three files (one in a subfolder), each with several row groups of
    # different sizes; the columns mix int32, float32, float64 and bool.
    sizes = [(13, 4), (9, 9), (17, 5)]
    names = ["a_int", "b_f32", "c_f64", "d_bool", "e_int"]
    parts = []
    for i, (rows, rg) in enumerate(sizes):
        cols = {
            "a_int": rng.integers(-1000, 1000, rows).astype(np.int32),
            "b_f32": rng.standard_normal(rows).astype(np.float32),
            "c_f64": rng.standard_normal(rows) * 1e6,
            "d_bool": rng.random(rows) < 0.5,
            "e_int": rng.integers(0, 3, rows).astype(np.int64),
        }
        sub = tmp_path / "folder" / ("sub" if i == 1 else "") / f"part{i}.parquet"
        write_parquet(sub, cols, row_group_size=rg)
        parts.append(np.column_stack([cols[n].astype(np.float64) for n in names]))
    # Files are read sorted by path: folder/part0, folder/part2, folder/sub/part1.
    ref = np.concatenate([parts[0], parts[2], parts[1]])
    return open_source(str(tmp_path / "folder")), ref, names, np.dtype(np.float64), ParquetSource


def _zarr3_rows(tmp_path, rng):
    ref = _matrix(rng, 27, 7, np.float32)
    path = write_zarr(tmp_path / "rows.zarr", ref, chunks=(6, 3))
    return open_source(path), ref.astype(np.float64), None, np.dtype(np.float32), ZarrSource


def _zarr3_columns(tmp_path, rng):
    ref = _matrix(rng, 26, 7, np.int16)  # samples x features
    path = write_zarr(tmp_path / "cols.zarr", np.ascontiguousarray(ref.T), chunks=(3, 10))
    return (open_source(path, samples_as="columns"), ref.astype(np.float64), None, np.dtype(np.int16),
            ZarrSource)


def _zarr2_rows(tmp_path, rng):
    ref = _matrix(rng, 23, 5, np.float64)
    path = write_zarr(tmp_path / "v2.zarr", ref, chunks=(4, 2), zarr_format=2)
    return open_source(path), ref, None, np.dtype(np.float64), ZarrSource


def _npy_rows(tmp_path, rng):
    ref = _matrix(rng, 33, 8, np.float32)
    path = write_npy(tmp_path / "rows.npy", ref)
    return open_source(path), ref.astype(np.float64), None, np.dtype(np.float32), NpySource


def _npy_columns(tmp_path, rng):
    ref = _matrix(rng, 33, 8, np.int32)  # samples x features
    path = write_npy(tmp_path / "cols.npy", ref.T)
    return open_source(path, samples_as="columns"), ref.astype(np.float64), None, np.dtype(np.int32), NpySource


CASES = {
    "parquet-file": _parquet_file,
    "parquet-folder": _parquet_folder,
    "zarr3-rows": _zarr3_rows,
    "zarr3-columns": _zarr3_columns,
    "zarr2-rows": _zarr2_rows,
    "npy-rows": _npy_rows,
    "npy-columns": _npy_columns,
}


@pytest.fixture(params=list(CASES))
def case(request, tmp_path):
    rng = np.random.default_rng(zlib.crc32(request.param.encode()))
    source, ref, names, dtype, cls = CASES[request.param](tmp_path, rng)
    yield request.param, source, ref, names, dtype, cls
    source.close()


def _default_names(m):
    width = len(str(m - 1))
    return [f"f{i:0{width}d}" for i in range(m)]


# --------------------------------------------------------------------------- metadata
def test_shape_names_dtype(case):
    label, source, ref, names, dtype, cls = case
    assert isinstance(source, cls)
    assert source.shape == ref.shape
    assert (source.n_samples, source.n_features) == ref.shape
    assert source.length("samples") == ref.shape[0]
    assert source.length("features") == ref.shape[1]
    expected_names = names if names is not None else _default_names(ref.shape[1])
    assert list(source.feature_names) == expected_names
    assert source.storage_dtype == dtype
    assert str(ref.shape[0]) in source.describe().replace(",", "")


# --------------------------------------------------------------------------- exact reads
@pytest.mark.parametrize("axis", AXES)
def test_every_range_equals_numpy_slice(case, axis):
    """All ranges [a, b), 0 <= a <= b <= length, including empty ones."""
    label, source, ref, *_ = case
    n = source.length(axis)
    for a in range(n + 1):
        for b in range(a, n + 1):
            got = source.read(axis, a, b)
            want = reference_block(ref, axis, a, b)
            assert got.dtype == np.float64, (label, axis, a, b)
            assert got.shape == want.shape, (label, axis, a, b)
            np.testing.assert_array_equal(got, want, err_msg=f"{label} {axis} [{a}, {b})")


@pytest.mark.parametrize("axis", AXES)
def test_random_order_and_rereads_agree(case, axis):
    label, source, ref, *_ = case
    n = source.length(axis)
    rng = random.Random(7)
    cuts = sorted(rng.sample(range(1, n), min(5, n - 1)))
    ranges = list(zip([0] + cuts, cuts + [n]))
    order = ranges * 2  # each range read twice
    rng.shuffle(order)
    for a, b in order:
        np.testing.assert_array_equal(source.read(axis, a, b), reference_block(ref, axis, a, b),
                                      err_msg=f"{label} {axis} [{a}, {b})")
    # A block read back after other reads is a fresh array equal to the first read.
    first = source.read(axis, *ranges[0])
    first[...] = -999.0  # writing into a returned block must not change later reads
    np.testing.assert_array_equal(source.read(axis, *ranges[0]), reference_block(ref, axis, *ranges[0]))


@pytest.mark.parametrize("axis", AXES)
def test_read_into_given_buffer(case, axis):
    label, source, ref, *_ = case
    n, other = source.length(axis), source.other_length(axis)
    for a, b in [(0, n), (1, n - 1), (n // 2, n), (2, 3), (4, 4)]:
        ring = np.full((n, other), -12345.0)  # a reused buffer, as read-ahead passes it
        buf = ring[: b - a]
        got = source.read(axis, a, b, out=buf)
        assert got.shape == (b - a, other)
        assert got.size == 0 or np.shares_memory(got, buf), "the block is written into out"
        np.testing.assert_array_equal(buf, reference_block(ref, axis, a, b), err_msg=f"{label} [{a}, {b})")
        assert (ring[b - a:] == -12345.0).all(), "rows of the buffer past the block are untouched"
    for bad in (np.empty((3, other)), np.empty((n, other), dtype=np.float32), np.empty((other, n)).T):
        with pytest.raises(UsageError, match="out must be"):
            source.read(axis, 0, n, out=bad)


@pytest.mark.parametrize("axis", AXES)
def test_out_of_range_reads_are_refused(case, axis):
    label, source, ref, *_ = case
    n = source.length(axis)
    for a, b in [(-1, 2), (0, n + 1), (3, 2)]:
        with pytest.raises(UsageError, match="outside"):
            source.read(axis, a, b)
    with pytest.raises(UsageError, match="axis"):
        source.read("rows", 0, 1)


# --------------------------------------------------------------------------- partitions
def _split_reserve(source, axis: str) -> int:
    """Bytes a Parquet source sets aside before splitting row groups (0 elsewhere)."""
    return source.split_group_reserve() if isinstance(source, ParquetSource) and axis == "samples" else 0


def _check_partition(source, part: Partition, axis: str, budget: int):
    n = source.length(axis)
    assert part.axis == axis
    bounds = list(part.bounds)
    assert bounds, "a partition of a non-empty axis has blocks"
    assert bounds[0][0] == 0 and bounds[-1][1] == n
    for (a0, b0), (a1, b1) in zip(bounds, bounds[1:]):
        assert b0 == a1, f"gap or overlap between {(a0, b0)} and {(a1, b1)}"
    assert all(b > a for a, b in bounds), "no empty blocks"
    unit = source.bytes_per_unit(axis)
    for a, b in bounds:
        # Each block fits the budget; a single unit is the least a block can hold.
        assert (b - a) * unit <= max(budget, unit), (a, b, unit, budget)
    assert part.largest == max(b - a for a, b in bounds)
    assert len(part) == len(bounds)


@pytest.mark.parametrize("axis", AXES)
def test_partition_covers_axis_within_budget(case, axis):
    label, source, ref, *_ = case
    unit = source.bytes_per_unit(axis)
    n = source.length(axis)
    for units in (0, 1, 2, 3, 5, 8, n - 1, n, 10 * n):
        budget = max(1, units * unit + unit // 2) + _split_reserve(source, axis)
        try:
            part = source.partition(axis, budget)
        except MemoryLimitError as exc:
            # Only a Parquet source whose row groups must be split may refuse a budget
            # below one sample beside its streaming reserve.
            assert units == 0 and _split_reserve(source, axis) and "row groups" in str(exc)
            continue
        _check_partition(source, part, axis, budget)
        # Reading the partition block by block reproduces the table.
        blocks = [source.read(axis, a, b) for a, b in part.bounds]
        whole = np.concatenate(blocks, axis=0)
        np.testing.assert_array_equal(whole, reference_block(ref, axis, 0, n))
    # A generous budget gives one block.
    assert len(source.partition(axis, 10 * n * unit)) == 1


def test_partition_regular_alignment():
    part = Partition.regular("samples", 100, 37, align=10)
    assert part.bounds == ((0, 30), (30, 60), (60, 90), (90, 100))
    part = Partition.regular("features", 5, 0)
    assert part.bounds == tuple((i, i + 1) for i in range(5))
    assert Partition.regular("samples", 7, 100).bounds == ((0, 7),)


def test_zarr_partition_aligns_to_chunk_rows(tmp_path):
    ref = np.arange(200 * 3, dtype=np.float32).reshape(200, 3)
    source = open_source(write_zarr(tmp_path / "a.zarr", ref, chunks=(16, 3)))
    unit = source.bytes_per_unit("samples")
    part = source.partition("samples", 50 * unit)
    _check_partition(source, part, "samples", 50 * unit)
    assert all(a % 16 == 0 for a, _ in part.bounds)
    assert part.largest == 48


def test_parquet_partition_keeps_fitting_row_groups_whole(tmp_path):
    rng = np.random.default_rng(3)
    ref = rng.standard_normal((100, 4))
    source = open_source(write_parquet_matrix(tmp_path / "t.parquet", ref, row_group_size=10))
    unit = source.bytes_per_unit("samples")
    for units in (10, 25, 40, 99):
        part = source.partition("samples", units * unit)
        _check_partition(source, part, "samples", units * unit)
        assert all(a % 10 == 0 for a, _ in part.bounds), part.bounds
        assert part.largest == 10 * (units // 10)


# --------------------------------------------------------------------------- Parquet specifics
@pytest.fixture
def mixed_parquet(tmp_path):
    rng = np.random.default_rng(11)
    n = 23
    cols = {
        "id": np.array([f"s{i:03d}" for i in range(n)]),
        "temp_1": rng.standard_normal(n),
        "temp_2": rng.standard_normal(n).astype(np.float32),
        "temp_10": rng.integers(-5, 5, n).astype(np.int8),
        "pressure": rng.integers(0, 10**9, n).astype(np.int64),
        "flag": rng.random(n) < 0.3,
        "count": rng.integers(0, 100, n).astype(np.uint16),
    }
    path = write_parquet(tmp_path / "mixed.parquet", cols, row_group_size=5)
    return path, cols


def test_parquet_column_selection_by_name_and_pattern(mixed_parquet):
    path, cols = mixed_parquet
    src = open_source(path, columns=["pressure", "temp_?"])
    # Table order, not the order of the patterns.
    assert src.feature_names == ("temp_1", "temp_2", "pressure")
    want = np.column_stack([cols[c].astype(np.float64) for c in src.feature_names])
    np.testing.assert_array_equal(src.read("samples", 0, src.n_samples), want)
    np.testing.assert_array_equal(src.read("features", 1, 3), want[:, 1:3].T)

    src = open_source(path, columns=["temp_*"], exclude=["temp_1*"])
    assert src.feature_names == ("temp_2",)

    src = open_source(path, exclude=["id", "temp_*"])
    assert src.feature_names == ("pressure", "flag", "count")
    want = np.column_stack([cols[c].astype(np.float64) for c in src.feature_names])
    np.testing.assert_array_equal(src.read("samples", 3, 19), want[3:19])


def test_parquet_pattern_matching_nothing_is_an_error(mixed_parquet):
    path, _ = mixed_parquet
    with pytest.raises(SourceError, match=r"'humid_\*'"):
        open_source(path, columns=["temp_1", "humid_*"])
    with pytest.raises(SourceError, match="nope"):
        open_source(path, exclude=["id", "nope"])


def test_parquet_id_column_carried(mixed_parquet, tmp_path):
    path, cols = mixed_parquet
    src = open_source(path, id_column="id")
    assert "id" not in src.feature_names
    assert src.feature_names == ("temp_1", "temp_2", "temp_10", "pressure", "flag", "count")
    np.testing.assert_array_equal(src.read_sample_ids().astype(str), cols["id"])
    assert open_source(path, exclude=["id"]).read_sample_ids() is None
    # Across the files of a folder, in the same order as the rows.
    for i, lo in enumerate((0, 7)):
        write_parquet(tmp_path / "ids" / f"p{i}.parquet",
                      {"rid": np.arange(lo, lo + 7) * 10, "v": np.arange(7.0) + lo}, row_group_size=3)
    src = open_source(str(tmp_path / "ids"), id_column="rid")
    assert src.feature_names == ("v",)
    np.testing.assert_array_equal(src.read_sample_ids(), np.arange(14) * 10)
    with pytest.raises(SourceError, match="'nope'"):
        open_source(path, id_column="nope")


def test_parquet_integer_bool_float_values(mixed_parquet):
    path, cols = mixed_parquet
    src = open_source(path, exclude=["id"])
    assert src.storage_dtype == np.float64
    want = np.column_stack([cols[c].astype(np.float64) for c in src.feature_names])
    assert set(np.unique(want[:, src.feature_names.index("flag")])) <= {0.0, 1.0}
    np.testing.assert_array_equal(src.read("samples", 0, 23), want)
    np.testing.assert_array_equal(src.read("features", 0, src.n_features), want.T)
    only_ints = open_source(path, columns=["temp_10", "count"])
    assert only_ints.storage_dtype == np.result_type(np.int8, np.uint16)
    only_bool = open_source(path, columns=["flag"])
    assert only_bool.storage_dtype == np.bool_
    np.testing.assert_array_equal(only_bool.read("samples", 0, 23)[:, 0], cols["flag"].astype(float))


def test_parquet_nulls_become_nan(tmp_path):
    ints = pa.array([1, None, 3, 4, None, 6, 7], type=pa.int32())
    floats = pa.array([0.5, 1.5, None, np.nan, 4.5, None, 6.5], type=pa.float32())
    bools = pa.array([True, False, None, True, None, False, True])
    path = write_parquet(tmp_path / "nulls.parquet", {"i": ints, "f": floats, "b": bools}, row_group_size=3)
    src = open_source(path)
    nan = np.nan
    want = np.array([[1, 0.5, 1], [nan, 1.5, 0], [3, nan, nan], [4, nan, 1], [nan, 4.5, nan],
                     [6, nan, 0], [7, 6.5, 1]])
    for a, b in [(0, 7), (1, 5), (2, 3), (4, 7)]:
        np.testing.assert_array_equal(src.read("samples", a, b), want[a:b])
    np.testing.assert_array_equal(src.read("features", 0, 3), want.T)


@pytest.mark.parametrize("axis", AXES)
@pytest.mark.parametrize("dtype", [np.int64, np.uint64])
def test_parquet_large_integers_read_as_float64(tmp_path, dtype, axis):
    """int64/uint64 values beyond 2**53 are numeric: they read rounded to the nearest float64,
    as numpy's ``astype(np.float64)`` rounds them (the reference), on both axes."""
    big = np.array([2**53 + 1, 5, 2**62 + 3, 7, 2**63 - 1 if dtype == np.int64 else 2**64 - 1], dtype=dtype)
    path = write_parquet(tmp_path / "big.parquet", {"key": big, "v": np.arange(5.0)})
    src = open_source(path)
    want = np.column_stack([big.astype(np.float64), np.arange(5.0)])
    got = src.read(axis, 0, src.length(axis))  # features axis: raised a bare ArrowInvalid
    np.testing.assert_array_equal(got, reference_block(want, axis, 0, src.length(axis)))


def _oversized(tmp_path, rows_per_group=5000, groups=3):
    rng = np.random.default_rng(5)
    ref = rng.standard_normal((rows_per_group * groups + 123, 3))
    path = write_parquet_matrix(tmp_path / "big_groups.parquet", ref, row_group_size=rows_per_group)
    return open_source(path), ref


def test_parquet_oversized_row_groups_sequential(tmp_path):
    src, ref = _oversized(tmp_path)
    unit = src.bytes_per_unit("samples")
    for units in (70, 1000, 1500, 4999, 5001):
        budget = units * unit + _split_reserve(src, "samples")
        part = src.partition("samples", budget)
        _check_partition(src, part, "samples", budget)
        # Row groups are split only when a whole one (5,000 rows) does not fit the budget.
        assert (len(part) > 4) if budget // unit < 5000 else (len(part) == 3), (units, part.bounds[:5])
        # Blocks are reused buffers: a consumer copies what it keeps past the next block.
        got = [(start, block.copy()) for _i, start, block in iter_blocks(src, part)]
        assert [s for s, _ in got] == [a for a, _ in part.bounds]
        np.testing.assert_array_equal(np.concatenate([b for _, b in got]), ref, err_msg=f"units={units}")


def test_parquet_oversized_row_groups_out_of_order(tmp_path):
    src, ref = _oversized(tmp_path)
    unit = src.bytes_per_unit("samples")
    part = src.partition("samples", 700 * unit + _split_reserve(src, "samples"))
    bounds = list(part.bounds)
    rng = random.Random(1)
    for trial in range(3):
        order = bounds[:]
        rng.shuffle(order)
        for a, b in order:
            np.testing.assert_array_equal(src.read("samples", a, b), ref[a:b], err_msg=f"[{a}, {b})")
    # Sequential, then restart from the beginning, then re-read a middle block twice.
    for a, b in bounds[:5] + bounds[:3] + [bounds[4], bounds[4], bounds[2]]:
        np.testing.assert_array_equal(src.read("samples", a, b), ref[a:b], err_msg=f"[{a}, {b})")
    # Arbitrary ranges crossing group and batch boundaries.
    for a, b in [(1023, 1025), (4990, 5010), (0, 15123), (9999, 15001), (5000, 10000), (12345, 12346)]:
        np.testing.assert_array_equal(src.read("samples", a, b), ref[a:b], err_msg=f"[{a}, {b})")


# --------------------------------------------------------------------------- Zarr specifics
@pytest.mark.parametrize("samples_as", ["rows", "columns"])
def test_zarr_group_coordinates_give_names_and_ids(tmp_path, samples_as):
    ref = np.arange(6 * 4, dtype=np.float32).reshape(6, 4)  # samples x features
    genes = np.array(["alpha", "beta", "gamma", "delta"])
    ids = np.arange(100, 106, dtype=np.int64)
    group = zarr.open_group(str(tmp_path / "g.zarr"), mode="w", zarr_format=3)
    stored, dims = (ref, ("cell", "gene")) if samples_as == "rows" else (ref.T.copy(), ("gene", "cell"))
    x = group.create_array("counts", shape=stored.shape, dtype=stored.dtype, chunks=(2, 2),
                           dimension_names=dims)
    x[...] = stored
    g = group.create_array("gene", shape=(4,), dtype=str, dimension_names=("gene",))
    g[...] = genes
    c = group.create_array("cell", shape=(6,), dtype="int64", dimension_names=("cell",))
    c[...] = ids
    for path in (str(tmp_path / "g.zarr"), str(tmp_path / "g.zarr" / "counts")):
        src = open_source(path, samples_as=samples_as)
        assert src.shape == (6, 4)
        assert src.feature_names == tuple(genes)
        np.testing.assert_array_equal(src.sample_ids, ids)
        np.testing.assert_array_equal(src.read("samples", 1, 5), ref[1:5])
        np.testing.assert_array_equal(src.read("features", 1, 3), ref[:, 1:3].T)


def test_zarr_group_with_several_arrays_needs_a_name(tmp_path):
    group = zarr.open_group(str(tmp_path / "g.zarr"), mode="w", zarr_format=3)
    a = group.create_array("a", shape=(3, 2), dtype="f8")
    a[...] = 1.0
    b = group.create_array("b", shape=(4, 5), dtype="f8")
    b[...] = np.arange(20.0).reshape(4, 5)
    with pytest.raises(SourceError, match="2 2-D arrays"):
        open_source(str(tmp_path / "g.zarr"))
    src = open_source(str(tmp_path / "g.zarr"), array="b")
    assert src.shape == (4, 5)
    np.testing.assert_array_equal(src.read("samples", 0, 4), np.arange(20.0).reshape(4, 5))
    with pytest.raises(SourceError, match="'c'"):
        open_source(str(tmp_path / "g.zarr"), array="c")


# --------------------------------------------------------------------------- missing code
def test_missing_code_marks_nan(tmp_path):
    stored = np.array([[0, 1, -1, 2], [2, -1, 1, 0], [1, 1, 1, -1]], dtype=np.int8)  # samples x features
    want = np.where(stored == -1, np.nan, stored).astype(np.float64)
    sources = {
        "npy": open_source(write_npy(tmp_path / "g.npy", stored), missing_code=-1),
        "npy-columns": open_source(write_npy(tmp_path / "gt.npy", stored.T), samples_as="columns",
                                   missing_code=-1),
        "zarr": open_source(write_zarr(tmp_path / "g.zarr", stored, chunks=(2, 2)), missing_code=-1),
        "parquet": open_source(write_parquet_matrix(tmp_path / "g.parquet", stored, row_group_size=2),
                               missing_code=-1),
    }
    for label, src in sources.items():
        np.testing.assert_array_equal(src.read("samples", 0, 3), want, err_msg=label)
        np.testing.assert_array_equal(src.read("features", 1, 4), want[:, 1:4].T, err_msg=label)
        np.testing.assert_array_equal(src.read("samples", 1, 2), want[1:2], err_msg=label)
    # Without the code, -1 is an ordinary value.
    plain = open_source(str(tmp_path / "g.npy"))
    np.testing.assert_array_equal(plain.read("samples", 0, 3), stored.astype(np.float64))


# --------------------------------------------------------------------------- read-ahead
class _CountingSource(Source):
    """A source over an in-memory array that can fail on one block (to test iter_blocks)."""

    kind = "test"
    native_axis = "samples"

    def __init__(self, data, fail_at=None, delay=0.0):
        self.path = "memory"
        self.delay = delay
        self.data = data
        self.n_samples, self.n_features = data.shape
        self.feature_names = tuple(f"f{j}" for j in range(self.n_features))
        self.storage_dtype = data.dtype
        self.fail_at = fail_at
        self.reads = []

    def read(self, axis, start, stop, out=None):
        self.reads.append((axis, start, stop))
        if self.fail_at is not None and start == self.fail_at:
            raise SourceError(f"memory: disk fell off at {start}")
        if self.delay:
            time.sleep(self.delay)
        block = reference_block(self.data, axis, start, stop)
        if out is None:
            return block.copy()
        out[...] = block
        return out

    def fingerprint(self):
        return {}


@pytest.mark.parametrize("background", [False, True])
def test_iter_blocks_yields_all_blocks_in_order(background):
    data = np.arange(50.0 * 3).reshape(50, 3)
    src = _CountingSource(data)
    part = Partition.regular("samples", 50, 7)
    # Blocks are reused buffers: copy what is kept past the next block.
    got = [(i, s, b.copy()) for i, s, b in iter_blocks(src, part, background=background)]
    assert [i for i, _, _ in got] == list(range(len(part)))
    assert [s for _, s, _ in got] == [a for a, _ in part.bounds]
    np.testing.assert_array_equal(np.concatenate([b for _, _, b in got]), data)
    # A sub-range of blocks.
    got = [(i, s, b.copy()) for i, s, b in iter_blocks(src, part, first=2, stop=5, background=background)]
    assert [i for i, _, _ in got] == [2, 3, 4]
    np.testing.assert_array_equal(np.concatenate([b for _, _, b in got]), data[14:35])
    # Along features.
    fpart = Partition.regular("features", 3, 2)
    got = [(i, s, b.copy()) for i, s, b in iter_blocks(src, fpart, background=background)]
    np.testing.assert_array_equal(np.concatenate([b for _, _, b in got]), data.T)


@pytest.mark.parametrize("background", [False, True])
@pytest.mark.parametrize("slow", ["reader", "consumer"])
def test_iter_blocks_block_intact_until_next_is_asked(background, slow):
    """A yielded block keeps its values while the consumer works on it, however far the
    reader runs ahead into the reused buffers (both a slow reader and a slow consumer)."""
    data = np.random.default_rng(0).standard_normal((90, 4))
    src = _CountingSource(data, delay=0.01 if slow == "reader" else 0.0)
    part = Partition.regular("samples", 90, 7)
    seen = 0
    for i, start, block in iter_blocks(src, part, background=background):
        first_look = block.copy()
        if slow == "consumer":
            time.sleep(0.02)  # the reader fills the other buffers meanwhile
        a, b = part.bounds[i]
        np.testing.assert_array_equal(first_look, data[a:b])
        np.testing.assert_array_equal(block, data[a:b], err_msg=f"block {i} changed under the consumer")
        seen += 1
    assert seen == len(part)


@pytest.mark.parametrize("background", [False, True])
def test_iter_blocks_real_source_matches_reference(tmp_path, background):
    ref = np.random.default_rng(4).standard_normal((500, 6)).astype(np.float32)
    for src in (open_source(write_zarr(tmp_path / f"z{background}.zarr", ref, chunks=(32, 6))),
                open_source(write_npy(tmp_path / f"n{background}.npy", ref)),
                open_source(write_parquet_matrix(tmp_path / f"p{background}.parquet", ref, row_group_size=45))):
        for axis in AXES:
            part = src.partition(axis, 37 * src.bytes_per_unit(axis))
            for i, start, block in iter_blocks(src, part, background=background):
                a, b = part.bounds[i]
                assert start == a
                np.testing.assert_array_equal(block, reference_block(ref.astype(np.float64), axis, a, b),
                                              err_msg=f"{src.kind} {axis} block {i}")


@pytest.mark.parametrize("background", [False, True])
def test_iter_blocks_propagates_reader_exception(background):
    data = np.arange(40.0).reshape(20, 2)
    src = _CountingSource(data, fail_at=10)
    part = Partition.regular("samples", 20, 5)
    seen = []
    with pytest.raises(SourceError, match="disk fell off at 10"):
        for i, start, block in iter_blocks(src, part, background=background):
            seen.append(i)
            np.testing.assert_array_equal(block, data[start:start + 5])
    assert seen == [0, 1]
    assert ("samples", 15, 20) not in src.reads  # the reader stopped at the failure
    assert not any(t.name == "rankfold-readahead" and t.is_alive() for t in threading.enumerate())


def test_iter_blocks_early_exit_stops_reader():
    data = np.arange(2000.0).reshape(1000, 2)
    src = _CountingSource(data)
    part = Partition.regular("samples", 1000, 10)
    gen = iter_blocks(src, part, background=True)
    for i, _start, _block in gen:
        if i == 2:
            break
    gen.close()
    assert not any(t.name == "rankfold-readahead" and t.is_alive() for t in threading.enumerate())
    assert len(src.reads) <= 6  # at most a couple of blocks read ahead, not the whole table


# --------------------------------------------------------------------------- format detection
def test_open_source_detects_format_without_extension(tmp_path):
    ref = np.arange(12.0).reshape(4, 3)
    pq_path = write_parquet_matrix(tmp_path / "t.parquet", ref)
    os.rename(pq_path, tmp_path / "table_pq")
    npy_path = write_npy(tmp_path / "a.npy", ref)
    os.rename(npy_path, tmp_path / "array_bin")
    assert isinstance(open_source(str(tmp_path / "table_pq")), ParquetSource)
    src = open_source(str(tmp_path / "array_bin"))
    assert isinstance(src, NpySource)
    np.testing.assert_array_equal(src.read("samples", 0, 4), ref)


def test_column_options_refused_for_arrays(tmp_path):
    path = write_npy(tmp_path / "a.npy", np.zeros((3, 2)))
    with pytest.raises(UsageError, match="Parquet"):
        open_source(path, columns=["f0"])
    with pytest.raises(UsageError, match="samples_as"):
        open_source(path, samples_as="diagonal")
