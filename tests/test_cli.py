"""The command line end to end on small real files: decompose, show, --help, exit codes.

Reference for the variances: LAPACK's symmetric eigensolver through
``numpy.linalg.eigvalsh`` on ``numpy.cov`` of the same in-memory table.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys

import numpy as np
import pytest
import zarr

from _table_files import result_left_behind, write_npy, write_parquet
from rankfold.cli import main
from rankfold.result import open_result

ROW = re.compile(r"^\s*(\d+)\s+(\S+)\s+(-?[\d.]+)%\s+(-?[\d.]+)%\s*$")
HEADER = re.compile(r"^\s*component\s+variance\s+fraction\s+cumulative\s*$")


def component_rows(text: str) -> list[tuple[int, float, float, float]]:
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if HEADER.match(line))
    rows = []
    for line in lines[start + 1:]:
        m = ROW.match(line)
        if not m:
            break
        rows.append((int(m.group(1)), float(m.group(2)), float(m.group(3)), float(m.group(4))))
    return rows


@pytest.fixture
def table(tmp_path):
    rng = np.random.default_rng(42)
    n = 60
    # Planted structure: two strong directions plus noise, so components are well separated.
    z = rng.standard_normal((n, 2)) * [5.0, 2.0]
    x = z @ rng.standard_normal((2, 4)) + 0.3 * rng.standard_normal((n, 4)) + [10, -3, 0, 1e3]
    names = ["alpha", "beta", "gamma", "delta"]
    cols = {"rid": np.arange(n) * 7 + 1000}
    cols.update({name: x[:, j] for j, name in enumerate(names)})
    path = write_parquet(tmp_path / "small.parquet", cols, row_group_size=16)
    return path, x, names, cols["rid"]


def run(capsys, *argv):
    rc = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return rc, captured.out, captured.err


@pytest.mark.parametrize("route", ["auto", "memory", "features", "samples"])
def test_decompose_prints_table_and_writes_store(capsys, tmp_path, table, route):
    path, x, names, ids = table
    out = tmp_path / "pca.zarr"
    rc, stdout, stderr = run(capsys, "decompose", path, "--rank", 3, "--out", out, "--id-column", "rid",
                             "--route", route, "--memory-limit", "64MB")
    assert rc == 0, stderr
    assert "Traceback" not in stderr
    assert f"decomposing {path} into 3 component(s)" in stderr

    # The store exists, complete, and nothing hidden is left beside it.
    assert result_left_behind(out) == [str(out)]
    res = open_result(str(out))
    assert res.loadings.shape == (4, 3)
    assert list(res.feature_names) == names
    if res.scores is not None:  # ids are stored with the scores they label
        assert res.scores.shape == (60, 3)
        np.testing.assert_array_equal(res.sample_ids, ids)
    else:
        assert res.sample_ids is None
    if route != "auto":
        assert res.route == route
    want = np.linalg.eigvalsh(np.cov(x, rowvar=False))[::-1][:3]  # reference: LAPACK via numpy
    np.testing.assert_allclose(res.variance, want, rtol=1e-9)
    np.testing.assert_allclose(res.variance_fraction, want / np.trace(np.cov(x, rowvar=False)), rtol=1e-9)

    # The printed component table matches the store.
    rows = component_rows(stdout)
    assert [r[0] for r in rows] == [1, 2, 3]
    for (k, var, frac, cum), v, f, c in zip(rows, res.variance, res.variance_fraction,
                                            np.cumsum(res.variance_fraction)):
        assert var == pytest.approx(v, rel=1e-5)
        assert frac == pytest.approx(100 * f, abs=0.006)
        assert cum == pytest.approx(100 * c, abs=0.006)
    assert f"result   {out}" in stdout
    assert "4 features" in stdout and "60 samples" in stdout
    assert f"route    {res.route}" in stdout


def test_show_prints_components(capsys, tmp_path, table):
    path, x, names, _ = table
    out = tmp_path / "pca.zarr"
    assert run(capsys, "decompose", path, "-k", 4, "-o", out, "--exclude", "rid", "-q")[0] == 0
    rc, stdout, stderr = run(capsys, "show", out)
    assert rc == 0 and stderr == ""
    rows = component_rows(stdout)
    assert [r[0] for r in rows] == [1, 2, 3, 4]
    variances = [r[1] for r in rows]
    assert variances == sorted(variances, reverse=True)
    cumulative = [r[3] for r in rows]
    assert cumulative == sorted(cumulative)
    assert cumulative[-1] == pytest.approx(100.0, abs=0.01)  # all components: the whole variance
    assert sum(r[2] for r in rows) == pytest.approx(100.0, abs=0.03)
    explained = re.search(r"component\(s\) kept explain ([\d.]+)%", stdout)
    assert explained and float(explained.group(1)) == pytest.approx(cumulative[-1], abs=0.01)
    assert "passes over the data:" in stdout

    rc, stdout, _ = run(capsys, "show", out, "--top", 2)
    assert rc == 0
    assert [r[0] for r in component_rows(stdout)] == [1, 2]


def test_quiet_prints_nothing(capsys, tmp_path, table):
    path, *_ = table
    out = tmp_path / "q.zarr"
    rc, stdout, stderr = run(capsys, "decompose", path, "-k", 1, "-o", out, "--exclude", "rid", "-q")
    assert (rc, stdout, stderr) == (0, "", "")
    assert open_result(str(out)).rank == 1


def test_progress_lines_on_stderr(capsys, tmp_path, table):
    path, *_ = table
    out = tmp_path / "p.zarr"
    rc, stdout, stderr = run(capsys, "decompose", path, "-k", 2, "-o", out, "--exclude", "rid",
                             "--route", "samples")
    assert rc == 0
    assert re.search(r"pass 1/2 sample Gram: \d+ blocks?", stderr), stderr
    assert re.search(r"pass 2/2 loadings: \d+ blocks?", stderr), stderr
    assert "sample Gram" not in stdout.split("passes over the data:")[0]


def test_zarr_samples_as_columns_with_coordinates(capsys, tmp_path):
    rng = np.random.default_rng(3)
    x = rng.standard_normal((12, 5))  # samples x features
    group = zarr.open_group(str(tmp_path / "panel.zarr"), mode="w", zarr_format=3)
    arr = group.create_array("dosage", shape=(5, 12), dtype="f4", chunks=(2, 12),
                             dimension_names=("marker", "plant"))
    arr[...] = x.T.astype(np.float32)
    markers = group.create_array("marker", shape=(5,), dtype=str, dimension_names=("marker",))
    markers[...] = np.array([f"m{i}" for i in range(5)])
    plants = group.create_array("plant", shape=(12,), dtype="int64", dimension_names=("plant",))
    plants[...] = np.arange(12) + 500
    out = tmp_path / "panel-pca.zarr"
    rc, stdout, stderr = run(capsys, "decompose", tmp_path / "panel.zarr", "-k", 2, "-o", out,
                             "--samples-as", "columns")
    assert rc == 0, stderr
    res = open_result(str(out))
    assert list(res.feature_names) == [f"m{i}" for i in range(5)]
    np.testing.assert_array_equal(res.sample_ids, np.arange(12) + 500)
    want = np.linalg.eigvalsh(np.cov(x.astype(np.float32).astype(np.float64), rowvar=False))[::-1][:2]
    np.testing.assert_allclose(res.variance, want, rtol=1e-9)


def test_no_command_is_a_usage_error(capsys):
    rc, stdout, stderr = run(capsys)
    assert rc == 2
    assert "usage: rankfold" in stderr


def test_python_m_rankfold_help():
    proc = subprocess.run([sys.executable, "-m", "rankfold", "--help"], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0, proc.stderr
    for word in ("usage: rankfold", "decompose", "show", "demo"):
        assert word in proc.stdout
    proc = subprocess.run([sys.executable, "-m", "rankfold", "decompose", "--help"], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    for option in ("--rank", "--out", "--memory-limit", "--samples-as", "--missing", "--overwrite"):
        assert option in proc.stdout


def test_console_script_end_to_end(tmp_path):
    """The installed ``rankfold`` command, in its own process, on a .npy table."""
    script = os.path.join(os.path.dirname(sys.executable), "rankfold")
    assert os.path.exists(script), "the console script is installed beside the interpreter"
    x = np.random.default_rng(9).standard_normal((50, 6)).astype(np.float32)
    path = write_npy(tmp_path / "t.npy", x)
    out = tmp_path / "t-pca.zarr"
    proc = subprocess.run([script, "decompose", path, "--rank", "2", "--out", str(out),
                           "--memory-limit", "32MB"], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert [r[0] for r in component_rows(proc.stdout)] == [1, 2]
    proc = subprocess.run([script, "show", str(out)], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    rows = component_rows(proc.stdout)
    want = np.linalg.eigvalsh(np.cov(x.astype(np.float64), rowvar=False))[::-1][:2]
    np.testing.assert_allclose([r[1] for r in rows], want, rtol=1e-5)
    # A failing run in its own process: exit code 3, one line, no traceback.
    proc = subprocess.run([script, "decompose", str(tmp_path / "missing.npy"), "-k", "1", "-o",
                           str(tmp_path / "m.zarr")], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 3
    assert "missing.npy" in proc.stderr and "Traceback" not in proc.stderr
