"""The bad-input matrix: the cases tests/test_bad_input.py does not already hold, and a set run
through real ``python -m rankfold`` processes.

Every case runs the real command line and asserts, through ``_table_files.check_refusal``: the
documented exit code (rankfold/errors.py), a one-line ``rankfold: error:`` message naming the file,
column, chunk, block or value, no traceback and no internal error, and no result store (nor a
hidden partial one) at ``--out``.  When a run fails after its plan, the run log beside ``--out``
must end with the same error (``check_log``), so nothing left behind looks like a finished run.

Where each required case lives (this file unless marked [bad_input] for tests/test_bad_input.py
or [sketch] for tests/test_sketch_bad_input.py):

=========================================  ==============================================
corrupt Parquet footer                     [bad_input] test_corrupt_parquet_truncated_footer;
                                           here as a subprocess
corrupt Parquet data page                  [bad_input] test_corrupt_parquet_data_page
truncated / corrupt Zarr chunk             test_zarr_chunk_damaged (names the chunk file)
Parquet folder, schemas differ             [bad_input] test_parquet_folder_schemas_differ
duplicate column names                     test_duplicate_column_names
infinities                                 [bad_input] test_infinities
NaN under the default policy               [bad_input] test_missing_values_refused_by_default;
                                           here as a subprocess
all-missing column with fill-mean          [bad_input] test_all_missing_column_with_fill_mean
string and date columns                    [bad_input] test_string_column_not_excluded,
                                           test_timestamp_column
1-D and 3-D Zarr arrays                    [bad_input] test_zarr_not_two_dimensional
one sample                                 test_one_sample
zero features after selection              test_zero_features_after_selection
rank 0 and above the limit                 [bad_input] test_rank_out_of_range; here as a subprocess
unreadable file (permissions)              test_unreadable_file (a real process as an
                                           unprivileged user, also when the suite runs as root)
source changing between passes             test_source_changes_between_passes
newer result format (show)                 test_show_newer_or_unknown_format; subprocess too
unparseable memory size                    [bad_input] test_unparseable_memory_size; subprocess
ceiling below one block                    [bad_input] test_memory_limit_below_one_block,
                                           [sketch] test_ceiling_too_small_for_one_block
values whose squares overflow              test_values_too_large_for_double_precision
=========================================  ==============================================
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import zarr

import rankfold
from _table_files import check_refusal, result_left_behind, write_npy, write_parquet, write_parquet_matrix, write_zarr
from rankfold.cli import main
from rankfold.progress import run_log_path

USAGE, INPUT, RESOURCES, OUTPUT = 2, 3, 4, 5
ALL_ROUTES = ["auto", "memory", "features", "samples", "sketch"]


def run(capsys, *argv):
    rc = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return rc, captured.out, captured.err


def check_log(out, message: str) -> None:
    """A run log, when the run got as far as writing one, ends with the error the user saw."""
    log = run_log_path(out)
    if os.path.exists(log):
        last = open(log).read().rstrip().splitlines()[-1]
        assert "run stopped after" in last, last
        assert message.strip().removeprefix("rankfold: ") in last, (last, message)


def refused(capsys, out, code, *argv, needles=()):
    rc, stdout, err = run(capsys, *argv)
    message = check_refusal(rc, stdout, err, code, out, needles)
    check_log(out, message)
    return message


@pytest.fixture
def out(tmp_path):
    return tmp_path / "result.zarr"


# --------------------------------------------------------------------------- Zarr chunks
@pytest.mark.parametrize("damage", ["truncated", "overwritten"])
@pytest.mark.parametrize("samples_as", ["rows", "columns"])
def test_zarr_chunk_damaged(capsys, tmp_path, out, damage, samples_as):
    x = np.random.default_rng(1).standard_normal((40, 6))
    stored = x if samples_as == "rows" else x.T.copy()
    path = write_zarr(tmp_path / "z.zarr", stored, chunks=(10, 3) if samples_as == "rows" else (2, 20))
    key = "c/1/1"
    chunk = os.path.join(path, *key.split("/"))
    raw = bytearray(open(chunk, "rb").read())
    if damage == "truncated":
        raw = raw[:len(raw) // 2]
    else:
        raw[4:len(raw) - 4] = b"\x5a" * (len(raw) - 8)
    open(chunk, "wb").write(bytes(raw))
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--samples-as", samples_as,
            needles=[f"chunk {key}", chunk, "corrupt or truncated"])


# --------------------------------------------------------------------------- columns
def test_duplicate_column_names(capsys, tmp_path, out):
    x = np.random.default_rng(2).standard_normal((20, 3))
    table = pa.Table.from_arrays([pa.array(x[:, j]) for j in range(3)], names=["temp", "load", "temp"])
    path = str(tmp_path / "dup.parquet")
    pq.write_table(table, path)
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out,
            needles=[path, "duplicate column name(s) 'temp'", "rename"])


@pytest.mark.parametrize("selection", [["--exclude", "*"], ["--exclude", "a", "b", "c"],
                                       ["--columns", "a", "b", "--exclude", "?"]])
def test_zero_features_after_selection(capsys, tmp_path, out, selection):
    path = write_parquet_matrix(tmp_path / "t.parquet", np.random.default_rng(3).standard_normal((20, 3)),
                                ["a", "b", "c"])
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, *selection,
            needles=[path, "no feature columns left after selection"])


# --------------------------------------------------------------------------- shapes
@pytest.mark.parametrize("route", ALL_ROUTES)
@pytest.mark.parametrize("fmt", ["parquet", "npy", "zarr"])
def test_one_sample(capsys, tmp_path, out, route, fmt):
    x = np.random.default_rng(4).standard_normal((1, 5))
    path = {"parquet": lambda: write_parquet_matrix(tmp_path / "one.parquet", x),
            "npy": lambda: write_npy(tmp_path / "one.npy", x),
            "zarr": lambda: write_zarr(tmp_path / "one.zarr", x, chunks=(1, 5))}[fmt]()
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", route,
            needles=[path, "1 sample(s)", "at least two"])


# --------------------------------------------------------------------------- values
@pytest.mark.parametrize("route", ALL_ROUTES)
@pytest.mark.parametrize("value", [1e308, -1e308, 1e200])
def test_values_too_large_for_double_precision(capsys, tmp_path, out, route, value):
    # 1e200 is finite but its square (1e400) is not: float64 ends near 1.8e308 (IEEE 754).
    x = np.random.default_rng(5).standard_normal((40, 12))
    x[17, 3] = value
    path = write_parquet_matrix(tmp_path / "big.parquet", x, [f"s{j}" for j in range(12)])
    refused(capsys, out, INPUT, "decompose", path, "--rank", 1, "--out", out, "--route", route,
            needles=[path, "too large", "sample 17", "'s3'", f"{value:.6g}", "Rescale"])


# --------------------------------------------------------------------------- permissions
# Root reads files whatever their permission bits, so a chmod 000 file proves nothing to a root
# process.  As root, the child interpreter first decomposes a readable warm-up table, which
# imports every module the real run needs (the interpreter may live under /root, out of an
# unprivileged user's reach), then drops to the 'nobody' user and runs the command line, so the
# refusal is exercised for real either way.
_DROP_AND_RUN = """
import io, os, sys, contextlib
import rankfold.cli
warm_table, warm_out = sys.argv[1:3]
if os.geteuid() == 0:
    with contextlib.redirect_stdout(io.StringIO()):
        assert rankfold.cli.main(["decompose", warm_table, "--rank", "1", "--out", warm_out, "-q"]) == 0
    import pwd
    nobody = pwd.getpwnam("nobody")
    os.setgid(nobody.pw_gid)
    os.setuid(nobody.pw_uid)
sys.exit(rankfold.cli.main(sys.argv[3:]))
"""


@pytest.mark.parametrize("where", ["file", "file-in-folder"])
def test_unreadable_file(where):
    if os.geteuid() == 0:
        import pwd

        try:
            pwd.getpwnam("nobody")
        except KeyError:
            pytest.skip("running as root with no 'nobody' user to drop to; root ignores permission bits")
    # Outside pytest's tmp_path, whose parent is private to its owner: the child may be another user.
    base = tempfile.mkdtemp(prefix="rankfold-perm-")
    try:
        os.chmod(base, 0o777)
        x = np.random.default_rng(6).standard_normal((20, 3))
        if where == "file":
            path = write_parquet_matrix(os.path.join(base, "locked.parquet"), x)
            locked = path
        else:
            path = os.path.join(base, "parts")
            write_parquet_matrix(os.path.join(path, "p0.parquet"), x)
            locked = write_parquet_matrix(os.path.join(path, "p1.parquet"), x)
            os.chmod(path, 0o755)
            os.chmod(os.path.join(path, "p0.parquet"), 0o644)
        os.chmod(locked, 0o000)
        out = os.path.join(base, "r.zarr")
        env = dict(os.environ, RANKFOLD_CACHE_DIR=os.path.join(base, "cache"), HOME=base)
        warm = write_parquet_matrix(os.path.join(base, "warm.parquet"), x)
        proc = subprocess.run([sys.executable, "-c", _DROP_AND_RUN, warm, os.path.join(base, "warm.zarr"),
                               "decompose", path, "--rank", "1", "--out", out],
                              capture_output=True, text=True, env=env, timeout=300)
        message = check_refusal(proc.returncode, proc.stdout, proc.stderr, INPUT, out,
                                needles=[f"{locked}: permission denied", "readable by this user"])
        check_log(out, message)
    finally:
        os.chmod(base, 0o700)
        for root, dirs, files in os.walk(base):
            for name in dirs + files:
                os.chmod(os.path.join(root, name), 0o700)
        shutil.rmtree(base, ignore_errors=True)


# --------------------------------------------------------------------------- a table that changes
def _rewrite_after_first_pass(monkeypatch, change):
    """Make the command line's progress monitor call ``change()`` when pass 1 ends."""
    import rankfold.progress as progress

    real = progress.command_monitor

    class Rewriter(progress.View):
        def pass_finished(self, run, p):
            if p.index == 1:
                change()

    def monitor(*args, **kwargs):
        m = real(*args, **kwargs)
        m.views.append(Rewriter())
        return m

    monkeypatch.setattr(progress, "command_monitor", monitor)


@pytest.mark.parametrize("how", ["size", "time"])
@pytest.mark.parametrize("route, extra", [("samples", []), ("features", ["--missing", "fill-mean"]),
                                          ("sketch", [])])
def test_source_changes_between_passes(capsys, monkeypatch, tmp_path, out, how, route, extra):
    x = np.random.default_rng(7).standard_normal((300, 14))
    path = write_parquet_matrix(tmp_path / "live.parquet", x, row_group_size=100)
    before = os.stat(path)

    def change():
        if how == "size":  # another writer appends rows
            write_parquet_matrix(path, np.vstack([x, x[:50]]), row_group_size=100)
        else:  # rewritten in place with the same bytes: only the modification time tells
            os.utime(path, ns=(before.st_atime_ns, before.st_mtime_ns + 2_000_000_000))

    _rewrite_after_first_pass(monkeypatch, change)
    what = (f"size changed from {before.st_size:,} to " if how == "size" else "modification time changed from")
    refused(capsys, out, INPUT, "decompose", path, "--rank", 2, "--out", out, "--route", route, *extra,
            needles=[os.path.abspath(path), what, "between pass 1 and pass 2",
                     "modified while being read", "rerun when it is stable"])


def test_zarr_store_changing_between_passes(capsys, monkeypatch, tmp_path, out):
    x = np.random.default_rng(8).standard_normal((200, 16))
    path = write_zarr(tmp_path / "live.zarr", x, chunks=(50, 16))

    def change():
        arr = zarr.open_array(path, mode="r+")
        arr[60:70] = 99.0  # one chunk rewritten by another program

    _rewrite_after_first_pass(monkeypatch, change)
    refused(capsys, out, INPUT, "decompose", path, "--rank", 2, "--out", out, "--route", "sketch",
            needles=[os.path.abspath(path), "between pass 1 and pass 2", "modified while being read"])


def test_library_refuses_a_table_changed_between_passes(tmp_path):
    """The same check through the Python API, with the progress callback as the other writer."""
    x = np.random.default_rng(9).standard_normal((120, 6))
    path = write_parquet_matrix(tmp_path / "live.parquet", x, row_group_size=40)
    out = tmp_path / "r.zarr"

    def progress(event):
        if event["block"] == event["blocks"] and event["pass"] == "sample Gram":
            write_parquet_matrix(path, x[:100], row_group_size=40)

    with pytest.raises(rankfold.SourceError, match="between pass 1 and pass 2 \\(loadings\\)"):
        rankfold.decompose(path, 2, route="samples", out=out, progress=progress)
    assert result_left_behind(out) == []


@pytest.mark.parametrize("route", ["memory", "features"])
def test_table_changed_during_the_only_pass(capsys, monkeypatch, tmp_path, out, route):
    # One-pass routes have no later pass to catch it: the check after the last pass does.
    x = np.random.default_rng(13).standard_normal((300, 14))
    path = write_parquet_matrix(tmp_path / "live.parquet", x, row_group_size=100)
    _rewrite_after_first_pass(monkeypatch, lambda: write_parquet_matrix(path, x[:200], row_group_size=100))
    when = "while pass 1 was being read" if route == "features" else "while it was being read"
    refused(capsys, out, INPUT, "decompose", path, "--rank", 2, "--out", out, "--route", route, "--no-scores",
            needles=[os.path.abspath(path), "size changed from", when, "modified while being read"])


def test_unchanged_table_passes_the_check(tmp_path):
    x = np.random.default_rng(10).standard_normal((120, 6))
    path = write_parquet_matrix(tmp_path / "still.parquet", x, row_group_size=40)
    result = rankfold.decompose(path, 2, route="sketch", oversample=2)
    # Every pass checked the files and went on: as many passes as the plan promised, more than one.
    assert len(result.attrs["passes"]) == result.attrs["plan"]["passes"] > 1


# --------------------------------------------------------------------------- show
@pytest.fixture
def finished_result(tmp_path):
    path = write_parquet_matrix(tmp_path / "t.parquet", np.random.default_rng(11).standard_normal((20, 3)))
    res = tmp_path / "res.zarr"
    assert main(["decompose", path, "--rank", "1", "--out", str(res), "-q"]) == 0
    return res


@pytest.mark.parametrize("version, needle", [(2, "newer than the 1"), (99, "upgrade rankfold"),
                                             ("banana", "not a format number")])
def test_show_newer_or_unknown_format(capsys, finished_result, version, needle):
    group = zarr.open_group(str(finished_result), mode="r+")
    group.attrs["rankfold_format"] = version
    rc, stdout, err = run(capsys, "show", finished_result)
    assert rc == OUTPUT and stdout == ""
    assert "Traceback" not in err and "internal error" not in err
    assert str(finished_result) in err and needle in err


# --------------------------------------------------------------------------- real processes
def _subprocess_cases(tmp_path):
    rng = np.random.default_rng(12)
    x = rng.standard_normal((30, 4))
    good = write_parquet_matrix(tmp_path / "good.parquet", x, ["a", "b", "c", "d"], row_group_size=10)
    broken = tmp_path / "footer.parquet"
    broken.write_bytes(open(good, "rb").read()[:-12])
    gaps = x.copy()
    gaps[4, 2] = np.nan
    gaps[9, 0] = np.nan
    holes = write_parquet_matrix(tmp_path / "gaps.parquet", gaps, ["a", "b", "c", "d"])
    z = write_zarr(tmp_path / "z.zarr", x, chunks=(10, 4))
    chunk = os.path.join(z, "c", "2", "0")
    open(chunk, "wb").write(open(chunk, "rb").read()[:7])
    return {
        "corrupt footer": (["decompose", str(broken), "--rank", "1"], INPUT,
                           [str(broken), "not a readable Parquet file"]),
        "truncated zarr chunk": (["decompose", z, "--rank", "1"], INPUT, ["chunk c/2/0", chunk]),
        "NaN by default": (["decompose", holes, "--rank", "1"], INPUT,
                           [holes, "2 missing value(s)", "sample 4", "'c'", "--missing fill-mean"]),
        "rank 0": (["decompose", good, "--rank", "0"], USAGE, [good, "got 0"]),
        "rank above the limit": (["decompose", good, "--rank", "5"], USAGE, [good, "= 4", "got 5"]),
        "memory size": (["decompose", good, "--rank", "1", "--memory-limit", "4 gigs"], USAGE, ["'4 gigs'"]),
        "ceiling below one block": (["decompose", good, "--rank", "1", "--route", "features",
                                     "--memory-limit", "200B"], RESOURCES, ["too small", "--memory-limit"]),
    }


SUBPROCESS_CASES = ["corrupt footer", "truncated zarr chunk", "NaN by default", "rank 0", "rank above the limit",
                    "memory size", "ceiling below one block"]


@pytest.mark.slow
@pytest.mark.parametrize("case", SUBPROCESS_CASES)
def test_refusals_in_a_real_process(tmp_path, case):
    argv, code, needles = _subprocess_cases(tmp_path)[case]
    out = tmp_path / "r.zarr"
    proc = subprocess.run([sys.executable, "-m", "rankfold", *argv, "--out", str(out)], capture_output=True,
                          text=True, timeout=300)
    message = check_refusal(proc.returncode, proc.stdout, proc.stderr, code, out, needles)
    assert message.count("\n") == 1  # one line
    check_log(out, message)


@pytest.mark.slow
def test_show_newer_format_in_a_real_process(finished_result):
    zarr.open_group(str(finished_result), mode="r+").attrs["rankfold_format"] = 7
    proc = subprocess.run([sys.executable, "-m", "rankfold", "show", str(finished_result)], capture_output=True,
                          text=True, timeout=300)
    assert proc.returncode == OUTPUT and proc.stdout == ""
    assert "Traceback" not in proc.stderr
    assert proc.stderr.startswith(f"rankfold: error: {finished_result}: written in result format 7")
