"""Subset comparison with its subset read on a real dask.distributed LocalCluster.

One cluster of two worker processes on loopback (one thread each) serves the module; one
command-line test starts its own with ``--cluster local:2`` in a real subprocess.  Tables
are real Zarr and Parquet files in ``tmp_path``.  References: numpy fancy indexing of the
in-memory table for the subset (``x[rows][:, features]``), the serial read and the serial
comparison (rankfold's own, checked against LAPACK in tests/test_compare.py), and numpy's
LAPACK ``eigvalsh`` of the subset's covariance for the exact run.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest

import rankfold
from rankfold.cluster import connect
from rankfold.compare.engine import compare_paths
from rankfold.compare.subset import ArraySource, _read_spans, draw_subset, materialize
from rankfold.errors import ClusterError, UsageError
from rankfold.sources import open_source

EXACT = 1e-12
IN_MEMORY, ON_DISK = 10**8, 40_000  # ceilings: the subset in memory / in scratch, read in pieces of 20 samples


def _src_dir() -> str:
    return os.path.dirname(os.path.dirname(os.path.abspath(rankfold.__file__)))


def _env() -> dict:
    return dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in [_src_dir(), os.environ.get("PYTHONPATH")] if p))


def _whole(sub) -> np.ndarray:
    return sub.read("samples", 0, sub.n_samples)


# ---------------------------------------------------------------- the subset itself


SUBSET_CASES = {  # layout: writer options (storage chunks that give many units, row groups)
    "zarr-rows": {"chunks": (50, 30)},
    "zarr-columns": {"chunks": (10, 50)},
    "parquet-file": {"row_group_size": 100},
    "parquet-folder": {"row_group_size": 70},
}


@pytest.mark.parametrize("fmt", sorted(SUBSET_CASES))
def test_subset_read_on_the_cluster_is_the_serial_subset_bit_for_bit(client, write_table, fmt, tmp_path):
    """In memory and in scratch (pieces of 20 samples), both orientations, Zarr and Parquet
    (Parquet rows are always samples): the cluster's subset equals the serial one exactly,
    and both equal numpy's selection of the drawn rows and features."""
    x = np.random.default_rng(3).normal(size=(2000, 30)) * 1e3
    path, samples_as = write_table(x, fmt, **SUBSET_CASES[fmt])
    src = open_source(path, samples_as=samples_as)
    draw = draw_subset(src, 0.3, 0.4, seed=5)
    expected = x[draw.rows][:, draw.features]  # reference: numpy fancy indexing
    if fmt == "zarr-columns":
        # The small ceiling takes the other read of samples stored as columns: blocks of whole
        # features (stored rows), because a chosen unit (50 samples) exceeds one read (20).
        piece_rows = (ON_DISK // 8) // src.bytes_per_unit("samples")
        assert max(b - a for a, b in _read_spans(src, draw)) > piece_rows
    for limit in (IN_MEMORY, ON_DISK):
        serial = materialize(src, draw, limit, str(tmp_path / f"serial-{limit}"))
        with connect(client, src) as session:
            clustered = materialize(src, draw, limit, str(tmp_path / f"cluster-{limit}"), session=session)
            info = session.summary()
        assert type(clustered) is type(serial) and isinstance(serial, ArraySource) == (limit == IN_MEMORY)
        assert np.array_equal(_whole(clustered), _whole(serial))
        assert np.array_equal(_whole(clustered), expected)
        assert list(clustered.feature_names) == list(serial.feature_names)
        assert info["workers"] == 2 and info["tasks"] >= 4  # really cut into groups
        # What travels: the subset's own rows once, the drawn indices of each task and a few KB
        # of recipe per task -- never whole blocks (the table is x.nbytes = 480 KB).
        assert expected.nbytes <= info["bytes_moved"] <= expected.nbytes + info["tasks"] * (draw.rows.nbytes + 8192)
        assert info["bytes_moved"] < x.nbytes / 2
        clustered.close()
        serial.close()


# ---------------------------------------------------------------- the comparison


def _assert_same_numbers(clustered: dict, serial: dict):
    """Everything computed from the subset agrees; only the timings may differ."""
    assert clustered["subset"] == serial["subset"]
    np.testing.assert_allclose(clustered["reference"]["variance"], serial["reference"]["variance"], rtol=EXACT)
    assert [s["label"] for s in clustered["settings"]] == [s["label"] for s in serial["settings"]]
    for a, b in zip(clustered["settings"], serial["settings"]):
        for key in ("angle_degrees", "eigenvalue_relative_error", "variance", "score_correlation"):
            np.testing.assert_allclose(a[key], b[key], rtol=EXACT, atol=EXACT, err_msg=key)
        for key in ("true_error", "error_bound"):
            assert a[key] == pytest.approx(b[key], rel=EXACT), key
        assert (a["passes"], a["meets_target"]) == (b["passes"], b["meets_target"])
    assert clustered["recommended"] == serial["recommended"]


@pytest.mark.parametrize("fmt", ["zarr-columns", "parquet-file"])
def test_comparison_on_the_cluster_gives_the_serial_numbers(client, make_planted, write_table, fmt, tmp_path):
    x = make_planted(900, 24, seed=8)
    path, samples_as = write_table(x, fmt, **({"chunks": (6, 40)} if fmt.startswith("zarr") else
                                              {"row_group_size": 60}))
    kw = dict(subset=0.5, settings="subspace:p=4,q=1;krylov:p=4,q=1", seed=4, samples_as=samples_as)
    serial = rankfold.compare_subset(path, 3, **kw)
    out = tmp_path / "report"
    clustered = rankfold.compare_subset(path, 3, cluster=client, out=str(out), **kw)
    _assert_same_numbers(clustered, serial)
    assert "cluster" not in serial
    info = clustered["cluster"]
    assert info["kind"] == "client" and info["workers"] == 2 and info["tasks"] >= 4
    assert 0 < info["bytes_moved"] < x.nbytes
    saved = json.loads((out / "comparison.json").read_text())["comparison"]
    assert saved["cluster"] == info
    # Reference: numpy's LAPACK eigenvalues of the covariance of exactly the drawn rows.
    draw = draw_subset(open_source(path, samples_as=samples_as), 0.5, None, seed=4)
    w = np.linalg.eigvalsh(np.cov(x[draw.rows], rowvar=False))[::-1]
    np.testing.assert_allclose(clustered["reference"]["variance"], w[:3], rtol=1e-9)


def test_serial_comparison_never_imports_dask(make_planted, write_zarr, tmp_path):
    """dask and distributed are imported only when a cluster is used (a fresh interpreter)."""
    path = write_zarr(make_planted(400, 12, seed=2))
    code = ("import sys, rankfold; rankfold.compare_subset(sys.argv[1], 2, subset=0.5, settings='krylov:q=1', "
            "out=sys.argv[2]); print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))")
    done = subprocess.run([sys.executable, "-c", code, path, str(tmp_path / "r")], env=_env(), capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"
    assert (tmp_path / "r" / "comparison.json").exists()


# ---------------------------------------------------------------- bad input


def _nothing_left(tmp_path, keep):
    assert sorted(os.listdir(tmp_path)) == sorted(keep)  # no report folder, no hidden partial one


@pytest.mark.parametrize("bad", ["local:0", "local:x", "tcp://host name", 42])
def test_malformed_cluster_argument_is_a_usage_error(planted, write_zarr, tmp_path, bad):
    path = write_zarr(planted)
    with pytest.raises(UsageError, match="cluster must be") as err:
        rankfold.compare_subset(path, 2, cluster=bad, out=str(tmp_path / "r"))
    assert err.value.exit_code == 2
    assert (repr(bad) if isinstance(bad, str) else type(bad).__name__) in str(err.value)
    _nothing_left(tmp_path, [os.path.basename(path)])


def test_unreachable_scheduler_is_named_and_no_report_is_left(monkeypatch, planted, write_zarr, tmp_path):
    from rankfold.cluster import session

    monkeypatch.setattr(session, "CONNECT_TIMEOUT", 2.0)
    path = write_zarr(planted)
    address = "tcp://127.0.0.1:9"  # the discard port: nothing listens there
    with pytest.raises(ClusterError) as err:
        rankfold.compare_subset(path, 2, subset=0.5, cluster=address, out=str(tmp_path / "r"))
    assert address in str(err.value) and "2 s" in str(err.value) and err.value.exit_code == 7
    _nothing_left(tmp_path, [os.path.basename(path)])


def test_workers_that_cannot_see_the_data_are_named(client, planted, tmp_path):
    """memory:// lives inside one process: the client sees the table, the workers cannot."""
    import zarr

    url = f"memory://rankfold-compare-cluster-{os.getpid()}/table.zarr"
    zarr.create_array(url, shape=planted.shape, chunks=(50, 24), dtype=planted.dtype)[...] = planted
    with pytest.raises(ClusterError) as err:
        rankfold.compare_subset(url, 2, subset=0.5, cluster=client, out=str(tmp_path / "r"))
    message = str(err.value)
    assert url in message and "worker tcp://127.0.0.1:" in message and err.value.exit_code == 7
    _nothing_left(tmp_path, [])


def test_damaged_chunk_found_on_a_worker_is_the_serial_error(client, planted, write_zarr, tmp_path):
    """An error our reader raises on a worker reaches the caller as the same typed error
    (here a SourceError naming the chunk, exit code 3) and leaves no report folder."""
    from rankfold.errors import SourceError

    path = write_zarr(planted, chunks=(30, 24))
    chunk = os.path.join(path, "c", "4", "0")
    raw = bytearray(open(chunk, "rb").read())
    raw[4:len(raw) - 4] = b"\x5a" * (len(raw) - 8)
    open(chunk, "wb").write(bytes(raw))
    kw = dict(subset=1.0, settings="krylov:q=1")  # every unit is read
    with pytest.raises(SourceError) as serial:
        rankfold.compare_subset(path, 2, out=str(tmp_path / "serial"), **kw)
    with pytest.raises(SourceError) as clustered:
        rankfold.compare_subset(path, 2, cluster=client, out=str(tmp_path / "r"), **kw)
    assert "chunk c/4/0" in str(clustered.value) and clustered.value.exit_code == 3
    assert str(clustered.value) == str(serial.value)
    _nothing_left(tmp_path, [os.path.basename(path)])


def test_two_stored_results_refuse_a_cluster(planted, write_parquet, tmp_path):
    path = write_parquet(planted)
    a, b = (rankfold.decompose(path, 2, route="sketch", seed=s, out=str(tmp_path / f"s{s}.zarr")) for s in (1, 2))
    with pytest.raises(UsageError, match="comparing two stored results reads no table") as err:
        compare_paths([a.path, b.path], out=str(tmp_path / "r"), cluster="local:2")
    assert "--cluster applies to a subset comparison" in str(err.value)
    assert not (tmp_path / "r").exists()


# ---------------------------------------------------------------- the command line


@pytest.mark.slow
def test_cli_compare_cluster_local_2_and_refusals(make_planted, write_parquet, tmp_path):
    """Real subprocesses: ``--cluster local:2`` gives the serial numbers and records the cluster;
    a malformed value and ``--cluster`` with two stored results exit 2 with one message line,
    no traceback and no report folder."""
    x = make_planted(900, 16, seed=9)
    path = write_parquet(x, row_group_size=60)

    def cli(*args):
        return subprocess.run([sys.executable, "-m", "rankfold", "compare", *map(str, args)], env=_env(),
                              capture_output=True, text=True, timeout=300)

    out = tmp_path / "report"
    done = cli(path, "--rank", 3, "--subset", "40%", "--settings", "krylov:p=4,q=1", "--seed", 3,
               "--cluster", "local:2", "--out", out)
    assert done.returncode == 0, done.stderr
    saved = json.loads((out / "comparison.json").read_text())["comparison"]
    assert saved["cluster"]["kind"] == "local:2" and saved["cluster"]["workers"] == 2
    assert "subset read on local:2" in done.stdout
    serial = rankfold.compare_subset(path, 3, subset="40%", settings="krylov:p=4,q=1", seed=3)
    _assert_same_numbers(saved, json.loads(json.dumps(serial)))

    done = cli(path, "--rank", 3, "--cluster", "local:0", "--out", tmp_path / "bad")
    assert done.returncode == 2 and "cluster must be" in done.stderr and "'local:0'" in done.stderr
    assert "Traceback" not in done.stderr and not (tmp_path / "bad").exists()

    for seed in (1, 2):
        rankfold.decompose(path, 2, route="sketch", seed=seed, out=str(tmp_path / f"s{seed}.zarr"))
    done = cli(tmp_path / "s1.zarr", tmp_path / "s2.zarr", "--cluster", "local:2", "--out", tmp_path / "two")
    assert done.returncode == 2 and "--cluster applies to a subset comparison" in done.stderr
    assert "Traceback" not in done.stderr and not (tmp_path / "two").exists()
    assert not [p for p in os.listdir(tmp_path) if p.startswith((".bad", ".two", ".report"))]
