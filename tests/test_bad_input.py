"""Bad input through the command line: a clear message, the documented exit code, no traceback,
and no result store (nor a hidden partial one) left behind.

Exit codes are those documented in ``rankfold/errors.py``: 2 usage, 3 input, 4 resources,
5 output.
"""

from __future__ import annotations

import datetime
import os
import re

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import zarr

from _table_files import (check_refusal, result_left_behind, write_npy, write_parquet, write_parquet_matrix,
                          write_zarr)
from rankfold.cli import main
from rankfold.result import open_result

USAGE, INPUT, RESOURCES, OUTPUT = 2, 3, 4, 5
ROUTES = ["auto", "memory", "features", "samples"]


def run(capsys, *argv):
    rc = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return rc, captured.out, captured.err


def refused(capsys, out, code, *argv, needles=()):
    """Run ``decompose ... --out out``; check the code, the message, and that nothing is left."""
    rc, stdout, err = run(capsys, *argv)
    return check_refusal(rc, stdout, err, code, out, needles)


@pytest.fixture
def out(tmp_path):
    return tmp_path / "result.zarr"


@pytest.fixture
def good_parquet(tmp_path):
    rng = np.random.default_rng(0)
    n = 30
    return write_parquet(tmp_path / "good.parquet", {
        "id": np.array([f"s{i:02d}" for i in range(n)]),
        "a": rng.standard_normal(n), "b": rng.standard_normal(n), "c": rng.standard_normal(n)},
        row_group_size=10)


# --------------------------------------------------------------------------- the source
def test_missing_path(capsys, tmp_path, out):
    path = tmp_path / "nope.parquet"
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out,
            needles=[str(path), "no such file"])


@pytest.mark.parametrize("kind", ["csv", "random-bytes", "empty-folder"])
def test_unknown_format(capsys, tmp_path, out, kind):
    if kind == "csv":
        path = tmp_path / "table.csv"
        path.write_text("a,b\n1,2\n3,4\n")
    elif kind == "random-bytes":
        path = tmp_path / "blob"
        path.write_bytes(np.random.default_rng(1).bytes(500))
    else:
        path = tmp_path / "folder"
        path.mkdir()
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out,
            needles=[str(path), "unknown format"])


def test_unknown_column(capsys, good_parquet, out):
    msg = refused(capsys, out, INPUT, "decompose", good_parquet, "--rank", 1, "--out", out,
                  "--columns", "a", "nope", needles=[good_parquet, "'nope'"])
    assert "a, b, c" in msg  # lists what is available


def test_unknown_exclude_pattern(capsys, good_parquet, out):
    refused(capsys, out, INPUT, "decompose", good_parquet, "--rank", 1, "--out", out,
            "--exclude", "id", "zz_*", needles=[good_parquet, "'zz_*'"])


def test_string_column_not_excluded(capsys, good_parquet, out):
    refused(capsys, out, INPUT, "decompose", good_parquet, "--rank", 1, "--out", out,
            needles=[good_parquet, "id (string)", "--exclude"])


def test_timestamp_column(capsys, tmp_path, out):
    path = write_parquet(tmp_path / "ts.parquet", {
        "a": np.arange(5.0), "b": np.arange(5.0) ** 2,
        "when": pa.array([datetime.datetime(2020, 1, i + 1) for i in range(5)])})
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out,
            needles=[path, "when", "timestamp"])


def test_empty_table(capsys, tmp_path, out):
    # errors.py: 3 = "the data source is missing, unreadable or holds values we refuse";
    # an empty table is a fault of the data, not of an argument.
    path = write_parquet(tmp_path / "empty.parquet", {"a": np.zeros(0), "b": np.zeros(0)})
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out,
            needles=[path, "empty", "0 samples"])


def test_empty_npy(capsys, tmp_path, out):
    path = write_npy(tmp_path / "empty.npy", np.zeros((0, 4)))
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out,
            needles=[path, "empty"])


@pytest.mark.parametrize("ndim", [1, 3])
def test_zarr_not_two_dimensional(capsys, tmp_path, out, ndim):
    shape = (10,) if ndim == 1 else (3, 4, 5)
    path = write_zarr(tmp_path / f"a{ndim}.zarr", np.zeros(shape), chunks=shape)
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out,
            needles=[path, f"{ndim}-D", str(shape)])


def test_npy_not_two_dimensional(capsys, tmp_path, out):
    path = write_npy(tmp_path / "a.npy", np.zeros((2, 3, 4)))
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out,
            needles=[path, "3-D"])


def test_complex_npy_is_refused(capsys, tmp_path, out):
    # A complex array is not a real numeric table: casting drops the imaginary part silently.
    path = write_npy(tmp_path / "c.npy", (np.arange(12.0) + 1j * np.arange(12.0)[::-1]).reshape(4, 3))
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out,
            needles=[path, "complex"])


@pytest.mark.parametrize("variant", ["renamed", "retyped", "dropped"])
def test_parquet_folder_schemas_differ(capsys, tmp_path, out, variant):
    folder = tmp_path / "parts"
    write_parquet(folder / "p0.parquet", {"a": np.arange(4.0), "b": np.arange(4.0)})
    second = {"renamed": {"a": np.arange(4.0), "bee": np.arange(4.0)},
              "retyped": {"a": np.arange(4.0), "b": np.arange(4, dtype=np.int32)},
              "dropped": {"a": np.arange(4.0)}}[variant]
    other = write_parquet(folder / "p1.parquet", second)
    column = "'bee'" if variant == "renamed" else "'b'"
    refused(capsys, out, INPUT, "decompose", folder, "--rank", 1, "--out", out,
            needles=[other, column, "schema"])


def test_corrupt_parquet_truncated_footer(capsys, tmp_path, good_parquet, out):
    raw = open(good_parquet, "rb").read()
    path = tmp_path / "broken.parquet"
    path.write_bytes(raw[:-20])
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--exclude", "id",
            needles=[str(path), "not a readable Parquet file"])


@pytest.mark.parametrize("route", ROUTES)
def test_corrupt_parquet_data_page(capsys, tmp_path, out, route):
    rng = np.random.default_rng(2)
    path = write_parquet_matrix(tmp_path / "pages.parquet", rng.standard_normal((3000, 4)),
                                row_group_size=1000)
    col = pq.read_metadata(path).row_group(1).column(2)
    raw = bytearray(open(path, "rb").read())
    raw[col.data_page_offset + 20:col.data_page_offset + col.total_compressed_size - 10] = (
        b"\x55" * (col.total_compressed_size - 30))
    open(path, "wb").write(raw)
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", route,
            needles=[path, "row group 1"])


def test_samples_as_columns_with_parquet(capsys, good_parquet, out):
    refused(capsys, out, USAGE, "decompose", good_parquet, "--rank", 1, "--out", out, "--exclude", "id",
            "--samples-as", "columns", needles=[good_parquet, "Parquet", "columns"])


def test_column_options_with_npy(capsys, tmp_path, out):
    path = write_npy(tmp_path / "a.npy", np.random.default_rng(0).standard_normal((10, 3)))
    refused(capsys, out, USAGE, "decompose", path, "--rank", 1, "--out", out, "--columns", "f0",
            needles=[path, "Parquet"])


# --------------------------------------------------------------------------- the values
@pytest.mark.parametrize("route", ROUTES)
def test_missing_values_refused_by_default(capsys, tmp_path, out, route):
    x = np.random.default_rng(3).standard_normal((30, 3))
    x[3, 1] = np.nan
    x[20, 2] = np.nan
    path = write_parquet_matrix(tmp_path / "gaps.parquet", x, ["a", "b", "c"], row_group_size=100)
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", route,
            needles=[path, "2 missing value(s)", "sample 3", "'b'", "--missing fill-mean"])


@pytest.mark.parametrize("route", ROUTES)
def test_parquet_nulls_refused_by_default(capsys, tmp_path, out, route):
    path = write_parquet(tmp_path / "nulls.parquet", {
        "a": np.arange(8.0), "b": pa.array([1, 2, 3, None, 5, 6, 7, 9], type=pa.int64()),
        "c": np.arange(8.0) ** 2})
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", route,
            needles=[path, "1 missing value(s)", "sample 3", "'b'"])


@pytest.mark.parametrize("route", ROUTES)
@pytest.mark.parametrize("missing", ["refuse", "fill-mean"])
def test_infinities(capsys, tmp_path, out, route, missing):
    x = np.random.default_rng(4).standard_normal((30, 3))
    x[7, 2] = -np.inf
    path = write_parquet_matrix(tmp_path / "inf.parquet", x, ["a", "b", "c"])
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", route,
            "--missing", missing, needles=[path, "1 infinite value(s)", "sample 7", "'c'"])


@pytest.mark.parametrize("route", ROUTES)
def test_constant_column_with_standardize(capsys, tmp_path, out, route):
    x = np.random.default_rng(5).standard_normal((30, 3))
    x[:, 1] = 4.25
    path = write_parquet_matrix(tmp_path / "const.parquet", x, ["a", "wind", "c"])
    msg = refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", route,
                  "--standardize", needles=["constant", "--standardize"])
    assert re.search(r"\bwind\b", msg), msg


@pytest.mark.parametrize("route", ROUTES)
def test_all_constant_table_is_refused(capsys, tmp_path, out, route):
    # Zero total variance: a variance fraction would be 0/0. The samples route refuses this
    # (exit 3); every route must, rather than write NaN fractions.
    path = write_parquet(tmp_path / "flat.parquet", {"a": np.ones(10), "b": np.full(10, 2.0)})
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", route,
            needles=[path])


@pytest.mark.parametrize("route", ROUTES)
def test_all_missing_column_with_fill_mean(capsys, tmp_path, out, route):
    x = np.random.default_rng(6).standard_normal((30, 3))
    x[:, 1] = np.nan
    path = write_parquet_matrix(tmp_path / "hollow.parquet", x, ["a", "empty_col", "c"])
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", route,
            "--missing", "fill-mean", needles=[path, "'empty_col'", "no values"])


# --------------------------------------------------------------------------- the options
@pytest.mark.parametrize("rank", [0, 4, -1])
def test_rank_out_of_range(capsys, good_parquet, out, rank):
    refused(capsys, out, USAGE, "decompose", good_parquet, "--rank", rank, "--out", out,
            "--exclude", "id", needles=[good_parquet, f"got {rank}", "= 3"])


def test_rank_not_a_number(capsys, good_parquet, out):
    rc, _, err = run(capsys, "decompose", good_parquet, "--rank", "three", "--out", out)
    assert rc == USAGE
    assert "'three'" in err and "Traceback" not in err
    assert result_left_behind(out) == []


@pytest.mark.parametrize("size", ["12XB", "lots", "-5MB", "0", "1.2.3GB"])
def test_unparseable_memory_size(capsys, good_parquet, out, size):
    refused(capsys, out, USAGE, "decompose", good_parquet, "--rank", 1, "--out", out,
            "--exclude", "id", f"--memory-limit={size}", needles=[repr(size)])


def _wide(tmp_path, n=200, m=50):
    x = np.random.default_rng(7).standard_normal((n, m))
    return write_parquet_matrix(tmp_path / "wide.parquet", x, row_group_size=50)


@pytest.mark.parametrize("route", ["features", "samples"])
def test_memory_limit_below_one_block(capsys, tmp_path, out, route):
    from rankfold.routes import features, samples
    from rankfold.sources import open_source

    path = _wide(tmp_path)
    src = open_source(path)
    n, m = src.shape
    axis, mod = ("samples", features) if route == "features" else ("features", samples)
    need = mod.fixed_bytes(n, m, 2) + src.fixed_read_bytes(axis) + src.min_block_bytes(axis)
    limit = need - 1  # the state fits, one block does not
    msg = refused(capsys, out, RESOURCES, "decompose", path, "--rank", 2, "--out", out,
                  "--route", route, "--memory-limit", limit, needles=["memory limit", "too small"])
    suggested = re.search(r"give at least --memory-limit ([0-9.]+ ?[A-Za-z]+)", msg)
    assert suggested, msg
    # What the message says would fit does fit.
    rc, _, err = run(capsys, "decompose", path, "--rank", 2, "--out", out, "--route", route,
                     "--memory-limit", suggested.group(1).replace(" ", ""), "-q")
    assert rc == 0, err
    assert open_result(str(out)).rank == 2


def test_memory_limit_too_small_for_any_route(capsys, tmp_path, out):
    path = _wide(tmp_path)
    refused(capsys, out, RESOURCES, "decompose", path, "--rank", 2, "--out", out,
            "--memory-limit", "20KB", needles=["20.0 KB", "--memory-limit"])


# --------------------------------------------------------------------------- the output
def test_existing_output_refused_unless_overwrite(capsys, good_parquet, tmp_path):
    out = tmp_path / "res.zarr"
    rc, _, err = run(capsys, "decompose", good_parquet, "--rank", 1, "--out", out, "--exclude", "id", "-q")
    assert rc == 0, err
    before = open_result(str(out))
    rc, _, err = run(capsys, "decompose", good_parquet, "--rank", 2, "--out", out, "--exclude", "id")
    assert rc == OUTPUT
    assert str(out) in err and "already exists" in err and "--overwrite" in err
    assert "Traceback" not in err
    # Refused before any work: the store is untouched.
    after = open_result(str(out))
    assert after.rank == 1 and after.attrs["created"] == before.attrs["created"]
    np.testing.assert_array_equal(after.loadings, before.loadings)
    rc, _, err = run(capsys, "decompose", good_parquet, "--rank", 2, "--out", out, "--exclude", "id",
                     "--overwrite", "-q")
    assert rc == 0, err
    assert open_result(str(out)).rank == 2
    assert result_left_behind(out) == [str(out)]


def test_existing_output_that_is_not_a_result_is_never_replaced(capsys, good_parquet, tmp_path):
    # --overwrite replaces earlier results only: a mistyped --out must not delete data.
    out = tmp_path / "res.zarr"
    out.write_text("not a store")
    rc, _, err = run(capsys, "decompose", good_parquet, "--rank", 1, "--out", out, "--exclude", "id")
    assert rc == OUTPUT and "already exists" in err
    rc, _, err = run(capsys, "decompose", good_parquet, "--rank", 1, "--out", out, "--exclude", "id",
                     "--overwrite", "-q")
    assert rc == OUTPUT and "not a rankfold result" in err and str(out) in err
    assert out.read_text() == "not a store"
    folder = tmp_path / "data"
    folder.mkdir()
    (folder / "precious.txt").write_text("keep")
    rc, _, err = run(capsys, "decompose", good_parquet, "--rank", 1, "--out", folder, "--exclude", "id",
                     "--overwrite", "-q")
    assert rc == OUTPUT and (folder / "precious.txt").read_text() == "keep"


def test_existing_result_overwritten_cleanly(capsys, good_parquet, tmp_path):
    out = tmp_path / "res.zarr"
    assert run(capsys, "decompose", good_parquet, "--rank", 1, "--out", out, "--exclude", "id", "-q")[0] == 0
    rc, _, err = run(capsys, "decompose", good_parquet, "--rank", 2, "--out", out, "--exclude", "id",
                     "--overwrite", "-q")
    assert rc == 0, err
    assert open_result(str(out)).rank == 2
    assert result_left_behind(out) == [str(out)]  # no hidden ".res.zarr.replaced-*" remains


def test_output_parent_missing(capsys, good_parquet, tmp_path):
    out = tmp_path / "no" / "such" / "res.zarr"
    rc, _, err = run(capsys, "decompose", good_parquet, "--rank", 1, "--out", out, "--exclude", "id")
    assert rc == OUTPUT
    assert str(tmp_path / "no" / "such") in err and "Traceback" not in err
    assert not (tmp_path / "no").exists()


def test_failure_after_reading_leaves_nothing(capsys, tmp_path, out):
    # Missing values deep in the table are found by the second block of a pass; the result
    # store must not exist even partly.
    x = np.random.default_rng(8).standard_normal((4000, 3))
    x[3900, 0] = np.nan
    path = write_parquet_matrix(tmp_path / "late.parquet", x, ["a", "b", "c"], row_group_size=500)
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", "features",
            "--memory-limit", "60KB", "--no-scores", needles=[path, "sample 3,900", "'a'"])


# --------------------------------------------------------------------------- show
def test_show_on_a_plain_folder(capsys, tmp_path):
    folder = tmp_path / "notes"
    folder.mkdir()
    (folder / "x.txt").write_text("hello")
    rc, stdout, err = run(capsys, "show", folder)
    assert rc == OUTPUT
    assert str(folder) in err and "Traceback" not in err
    assert stdout == ""


def test_show_on_a_zarr_group_that_is_not_a_result(capsys, tmp_path):
    group = zarr.open_group(str(tmp_path / "other.zarr"), mode="w", zarr_format=3)
    group.attrs["hello"] = "world"
    rc, stdout, err = run(capsys, "show", tmp_path / "other.zarr")
    assert rc == OUTPUT
    assert str(tmp_path / "other.zarr") in err and "not a rankfold result" in err
    assert "Traceback" not in err


def test_show_on_a_missing_path(capsys, tmp_path):
    rc, stdout, err = run(capsys, "show", tmp_path / "gone.zarr")
    assert rc == OUTPUT
    assert str(tmp_path / "gone.zarr") in err and "Traceback" not in err


def test_show_on_a_data_table(capsys, good_parquet):
    rc, stdout, err = run(capsys, "show", good_parquet)
    assert rc == OUTPUT
    assert good_parquet in err and "Traceback" not in err


def test_no_leftover_files_anywhere(capsys, tmp_path):
    """Across a run of failures in one folder, nothing is created beside the inputs."""
    path = write_npy(tmp_path / "x.npy", np.random.default_rng(0).standard_normal((10, 3)))
    before = sorted(os.listdir(tmp_path))
    for argv in (["--rank", 9], ["--rank", 1, "--memory-limit", "12XB"], ["--rank", 1, "--route", "features",
                                                                       "--memory-limit", "100B"]):
        rc, _, _ = run(capsys, "decompose", path, "--out", tmp_path / "r.zarr", *argv)
        assert rc != 0
    assert sorted(os.listdir(tmp_path)) == before
