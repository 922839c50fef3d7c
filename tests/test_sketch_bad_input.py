"""Bad input for the randomized route through the command line (``rankfold.cli.main``).

Each case checks the exit code documented in ``rankfold/errors.py`` (2 usage, 3 input,
4 resources, 5 output), a one-line message that names what was wrong, no traceback, and nothing
left at ``--out`` (neither the store nor a hidden partial one, ``_table_files.result_left_behind``).
"""

from __future__ import annotations

import re

import numpy as np
import pytest

from _table_files import check_refusal, write_npy, write_parquet_matrix
from rankfold.cli import main
from rankfold.memory import parse_memory
from rankfold.result import open_result

USAGE, INPUT, RESOURCES, OUTPUT, INTERNAL = 2, 3, 4, 5, 70


def run(capsys, *argv):
    rc = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return rc, captured.out, captured.err


def refused(capsys, out, code, *argv, needles=()):
    """``decompose ... --out out`` must exit with ``code``, say why, and leave nothing behind."""
    rc, stdout, err = run(capsys, "decompose", *argv, "--out", out)
    return check_refusal(rc, stdout, err, code, out, needles, prefix="error:")


@pytest.fixture
def out(tmp_path):
    return tmp_path / "result.zarr"


@pytest.fixture
def table(tmp_path):
    """200 samples x 30 features as a .npy file (samples as rows)."""
    x = np.random.default_rng(0).standard_normal((200, 30)) @ np.diag(np.linspace(3, 0.5, 30))
    return write_npy(tmp_path / "table.npy", x)


# --------------------------------------------------------------------------- sketch options
@pytest.mark.parametrize("value", [-1, -100, 1001, 100_000, 10**12])
def test_oversample_out_of_range(capsys, table, out, value):
    # api.MAX_OVERSAMPLE = 1000; a negative count of columns means nothing.
    refused(capsys, out, USAGE, table, "--rank", 3, "--route", "sketch", "--oversample", value,
            needles=["oversample", f"got {value}", "0 to 1000"])


@pytest.mark.parametrize("value", [-1, -7, 51, 1000, 10**9])
def test_power_iterations_out_of_range(capsys, table, out, value):
    # api.MAX_POWER_ITERATIONS = 50.
    refused(capsys, out, USAGE, table, "--rank", 3, "--route", "sketch", "--power-iterations", value,
            needles=[re.compile(r"power[-_]iterations"), f"got {value}", "0 to 50"])


@pytest.mark.parametrize("option,value", [("--oversample", "ten"), ("--oversample", "2.5"),
                                          ("--power-iterations", "two"), ("--power-iterations", "1e3")])
def test_sketch_counts_that_are_not_integers(capsys, table, out, option, value):
    # argparse (type=int) refuses them with exit 2 and names the option and the value.
    refused(capsys, out, USAGE, table, "--rank", 3, "--route", "sketch", option, value,
            needles=[option, repr(value)])


def test_unknown_sketch_kind(capsys, table, out):
    refused(capsys, out, USAGE, table, "--rank", 3, "--route", "sketch", "--sketch", "lanczos",
            needles=["--sketch", "'lanczos'", "one-pass"])


@pytest.mark.parametrize("seed", [-1, -2**31])
def test_negative_seed(capsys, table, out, seed):
    # The seed only feeds the randomized route's generator (numpy.random.default_rng, which takes
    # non-negative integers only).  A negative --seed is a usage error (exit 2) naming the option,
    # not an internal error.
    refused(capsys, out, USAGE, table, "--rank", 3, "--route", "sketch", "--seed", seed,
            needles=["seed", str(seed)])


# --------------------------------------------------------------------------- one-pass limits
@pytest.mark.parametrize("flag", [["--standardize"], ["--missing", "fill-mean"]])
@pytest.mark.parametrize("route", ["sketch", "auto"])
def test_one_pass_cannot_standardize_or_fill_on_rows(capsys, table, out, flag, route):
    # routes/sketch.py: one-pass is "only covariance PCA without missing values" for samples as
    # rows, since the spreads and means would need a pass first.
    refused(capsys, out, USAGE, table, "--rank", 3, "--route", route, "--sketch", "one-pass", *flag,
            needles=["one-pass", "standardize", "subspace"])


def test_one_pass_on_parquet_with_standardize(capsys, tmp_path, out):
    # Parquet rows are always samples, so the same refusal applies.
    x = np.random.default_rng(1).standard_normal((100, 6))
    path = write_parquet_matrix(tmp_path / "t.parquet", x, row_group_size=25)
    refused(capsys, out, USAGE, path, "--rank", 2, "--route", "sketch", "--sketch", "one-pass",
            "--standardize", needles=["one-pass", "standardize"])


# --------------------------------------------------------------------------- memory ceiling
@pytest.mark.parametrize("samples_as", ["rows", "columns"])
@pytest.mark.parametrize("kind", ["subspace", "krylov", "one-pass"])
def test_ceiling_too_small_for_one_block(capsys, tmp_path, out, samples_as, kind):
    x = np.random.default_rng(2).standard_normal((400, 60))
    path = write_npy(tmp_path / "t.npy", x if samples_as == "rows" else x.T)
    message = refused(capsys, out, RESOURCES, path, "--rank", 3, "--route", "sketch", "--sketch", kind,
                      "--samples-as", samples_as, "--memory-limit", "20KB",
                      needles=["20.0 KB", "sketch", "--memory-limit"])
    # The message says what would fit; that ceiling must indeed run the randomized route.
    advised = re.search(r"give at least --memory-limit ([0-9.]+ [KMGT]?B)", message)
    assert advised, message
    rc, _stdout, err = run(capsys, "decompose", path, "--rank", 3, "--route", "sketch", "--sketch", kind,
                           "--samples-as", samples_as, "--memory-limit", advised.group(1).replace(" ", ""),
                           "--out", out, "-q")
    assert rc == 0, err
    result = open_result(out)
    assert result.route == "sketch"
    assert result.attrs["parameters"]["memory_limit"] == parse_memory(advised.group(1).replace(" ", ""))


# --------------------------------------------------------------------------- not errors
def test_sketch_wider_than_the_table_falls_back(capsys, tmp_path, out):
    # rank 3 + oversample 10 > 8 features: the planner takes an exact route and says so
    # (planner.make_plan); the result records the route and the reason.
    x = np.random.default_rng(3).standard_normal((50, 8))
    path = write_npy(tmp_path / "narrow.npy", x)
    rc, _stdout, err = run(capsys, "decompose", path, "--rank", 3, "--route", "sketch", "--out", out)
    assert rc == 0, err
    result = open_result(out)
    assert result.route in ("memory", "features", "samples")
    assert any("falling back" in r for r in result.attrs["route_reasons"])
    assert "falling back" in err  # the printed plan
    assert "error_bound" not in result.attrs
