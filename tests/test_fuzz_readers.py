"""Readers fuzzed through the command line with hypothesis-generated tables.

Small tables with NaN, infinities, extremes of float64 (1e308, -1e308, the smallest subnormal
5e-324), integer extremes, several dtypes, empty and single-row Parquet row groups and ragged
Zarr chunks are written to real files; ``rankfold decompose`` (in-process ``cli.main``, both
missing-value policies, every route) must either succeed with finite loadings, variances and
fractions, or refuse with one ``rankfold: error:`` line and exit 2, 3 or 4: never an internal
error (exit 70), never a traceback, never a result holding inf or NaN.

The float64 limits are IEEE 754 facts (largest finite about 1.8e308, smallest subnormal
about 4.9e-324, printed 5e-324).
"""

from __future__ import annotations

import os
import tempfile

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from _table_files import result_left_behind, write_zarr
from rankfold.cli import main
from rankfold.result import open_result

FUZZ = settings(max_examples=40, deadline=None, derandomize=True,
                # capsys is read after every call, so sharing it across examples is safe.
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                       HealthCheck.function_scoped_fixture])

SPECIAL = [np.nan, np.inf, -np.inf, 1e308, -1e308, 5e-324, -5e-324, 0.0, 1e150, -1e-300]
DTYPES = ["float64", "float32", "int64", "int32", "int8", "uint16"]


@st.composite
def tables(draw):
    """A samples x features table: (values as float64 with NaN for missing, storage dtype)."""
    n = draw(st.integers(1, 12))
    m = draw(st.integers(1, 5))
    dtype = np.dtype(draw(st.sampled_from(DTYPES)))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    if dtype.kind == "f":
        x = rng.standard_normal((n, m)) * draw(st.sampled_from([1.0, 1e-3, 1e6]))
        for _ in range(draw(st.integers(0, 4))):  # sprinkle special values
            x[draw(st.integers(0, n - 1)), draw(st.integers(0, m - 1))] = draw(st.sampled_from(SPECIAL))
        with np.errstate(over="ignore"):
            x = x.astype(dtype).astype(np.float64)  # what the file will hold (1e308 -> inf in float32)
    else:
        info = np.iinfo(dtype)
        x = rng.integers(max(info.min, -50), min(info.max, 50), size=(n, m), endpoint=True).astype(np.float64)
        for _ in range(draw(st.integers(0, 3))):
            x[draw(st.integers(0, n - 1)), draw(st.integers(0, m - 1))] = draw(
                st.sampled_from([info.min, info.max, 0]))
        if draw(st.booleans()):  # a constant column
            x[:, draw(st.integers(0, m - 1))] = draw(st.sampled_from([info.min, info.max, 7]))
    return x, dtype


def _arrow_column(values: np.ndarray, dtype: np.dtype):
    """Values in the storage dtype; NaN in an integer column becomes a Parquet null."""
    if dtype.kind == "f":
        return pa.array(values.astype(dtype))
    mask = np.isnan(values)
    with np.errstate(invalid="ignore"):  # int64's maximum rounds up in float64 and wraps: still an extreme
        return pa.array(np.where(mask, 0, values).astype(dtype), mask=mask)


def write_parquet_groups(path: str, x: np.ndarray, dtype: np.dtype, groups: list[int]) -> None:
    """Write rows of ``x`` in row groups of the given sizes (0 makes an empty row group)."""
    names = [f"v{j}" for j in range(x.shape[1])]
    table = pa.table({n: _arrow_column(x[:, j], dtype) for j, n in enumerate(names)})
    with pq.ParquetWriter(path, table.schema) as writer:
        row = 0
        for size in groups:
            part = table.slice(row, size)
            writer.write_table(part, row_group_size=max(1, size))
            row += size
        if row < table.num_rows:
            writer.write_table(table.slice(row), row_group_size=1)


def _check_outcome(rc: int, err: str, out: str) -> None:
    event(f"exit {rc}")  # shown by --hypothesis-show-statistics: both outcomes must occur
    assert rc != 70, err
    assert "Traceback" not in err and "internal error" not in err, err
    if rc == 0:
        result = open_result(out)
        for name in ("loadings", "variance", "variance_fraction", "center", "scale"):
            values = np.asarray(getattr(result, name))
            assert np.all(np.isfinite(values)), (name, values)
        assert np.all(result.variance >= 0)
        if result.scores is not None:
            assert np.all(np.isfinite(result.scores[:]))
    else:
        assert rc in (2, 3, 4), err
        lines = err.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("rankfold: error: "), err
        assert result_left_behind(out) == []


def _run(capsys, path: str, out: str, rank: int, route: str, missing: str, *extra) -> tuple[int, str]:
    rc = main(["decompose", path, "--rank", str(rank), "--out", out, "-q", "--route", route,
               "--missing", missing, *extra])
    return rc, capsys.readouterr().err


@FUZZ
@given(table=tables(), data=st.data(), route=st.sampled_from(["auto", "memory", "features", "samples", "sketch"]),
       missing=st.sampled_from(["refuse", "fill-mean"]))
def test_parquet_reader_never_ends_in_a_traceback(capsys, table, data, route, missing):
    x, dtype = table
    n, m = x.shape
    groups = data.draw(st.lists(st.integers(0, 4), max_size=5), label="row groups")
    rank = data.draw(st.integers(1, min(n, m) + 1), label="rank")
    with tempfile.TemporaryDirectory(prefix="rankfold-fuzz-") as folder:
        path = os.path.join(folder, "t.parquet")
        write_parquet_groups(path, x, dtype, groups)
        out = os.path.join(folder, "r.zarr")
        rc, err = _run(capsys, path, out, rank, route, missing)
        _check_outcome(rc, err, out)
        if rc == 0:
            assert open_result(out).loadings.shape == (m, rank)


@FUZZ
@given(table=tables(), data=st.data(), route=st.sampled_from(["auto", "memory", "features", "samples", "sketch"]),
       missing=st.sampled_from(["refuse", "fill-mean"]), samples_as=st.sampled_from(["rows", "columns"]))
def test_zarr_reader_never_ends_in_a_traceback(capsys, table, data, route, missing, samples_as):
    x, dtype = table
    n, m = x.shape
    if dtype.kind != "f":
        x = np.nan_to_num(x)  # Zarr integer arrays have no missing values (a --missing-code would mark them)
    with np.errstate(invalid="ignore"):  # as in _arrow_column
        stored = (x if samples_as == "rows" else x.T).astype(dtype)
    chunks = (data.draw(st.integers(1, stored.shape[0]), label="chunk rows"),
              data.draw(st.integers(1, stored.shape[1]), label="chunk cols"))
    rank = data.draw(st.integers(1, min(n, m) + 1), label="rank")
    extra = ["--samples-as", samples_as]
    if dtype.kind != "f" and data.draw(st.booleans(), label="missing code"):
        extra += ["--missing-code", "0"]
    with tempfile.TemporaryDirectory(prefix="rankfold-fuzz-") as folder:
        path = write_zarr(os.path.join(folder, "t.zarr"), stored, chunks=chunks)
        out = os.path.join(folder, "r.zarr")
        rc, err = _run(capsys, path, out, rank, route, missing, *extra)
        _check_outcome(rc, err, out)


@pytest.mark.parametrize("route", ["memory", "features", "samples", "sketch"])
def test_huge_but_safe_values_give_finite_components(capsys, tmp_path, route):
    """Values near 1e150 square to about 1e300, inside float64: they must decompose, not be refused,
    and match LAPACK on the same table scaled down (scaling a table scales its components' variance
    by the square of the factor and leaves the loadings alone)."""
    rng = np.random.default_rng(3)
    x = rng.standard_normal((30, 4)) * [3.0, 2.0, 1.0, 0.5] * 1e150
    path = os.path.join(tmp_path, "big.parquet")
    write_parquet_groups(path, x, np.dtype("float64"), [10, 10, 10])
    out = str(tmp_path / "r.zarr")
    rc, err = _run(capsys, path, out, 2, route, "refuse")
    assert rc == 0, err
    result = open_result(out)
    # reference: numpy.linalg.eigvalsh (LAPACK syevd) on numpy.cov of the table divided by 1e150
    expected = np.linalg.eigvalsh(np.cov(x / 1e150, rowvar=False))[::-1][:2] * 1e300
    np.testing.assert_allclose(result.variance, expected, rtol=1e-6 if route == "sketch" else 1e-9)
    assert np.all(np.isfinite(result.loadings))
    if result.scores is not None:  # beyond float32's range: stored as float64 rather than as inf
        assert np.all(np.isfinite(result.scores[:]))
