"""Per-sample outputs written by cluster workers: one writer per chunk, the serial answer.

A real LocalCluster of two worker processes on loopback, started once for the module.
Chunks of the per-sample arrays are made small (``MAX_CHUNK_ROWS``) so that a few
thousand samples span many chunks and many tasks.  References: the serial run of the
same command (rankfold's own, checked against LAPACK and numpy in test_scores.py), and
numpy's ``xc @ L`` for the projection.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import rankfold
from rankfold import sample_outputs
from rankfold.errors import ClusterError
from rankfold.sources.base import Partition

CHUNK = 256  # rows per chunk of the per-sample arrays in these tests


@pytest.fixture(autouse=True)
def small_chunks(monkeypatch):
    # Chunk sizes are decided in this process and travel in the workers' recipes.
    monkeypatch.setattr(sample_outputs, "MAX_CHUNK_ROWS", CHUNK)


def _forbid_blocks_here(monkeypatch) -> None:
    """Fail if this (client) process folds a data block from now on: passes must run on the workers."""
    import rankfold.routes.common as common

    def refuse(*args, **kwargs):
        raise AssertionError("a pass read data blocks in the client process")

    monkeypatch.setattr(common, "iter_blocks", refuse)


def _same_outputs(a, b, scores_tol=1e-6):
    # Rounding differs only where a source block is split between two tasks (BLAS on fewer
    # rows); float32 scores are compared at float32 precision.
    assert np.max(np.abs(a.scores[:] - b.scores[:])) <= scores_tol * np.max(np.abs(b.scores[:]))
    for name in ("residual", "residual_fraction"):
        x, y = np.asarray(getattr(a, name)[:]), np.asarray(getattr(b, name)[:])
        assert np.max(np.abs(x - y)) <= 1e-12 * max(1.0, float(np.max(np.abs(y)))), name
    assert np.array_equal(a.flagged[:], b.flagged[:])


def _leftovers(folder) -> list[str]:
    return sorted(n for n in os.listdir(folder) if n.startswith("."))


# ---------------------------------------------------------------- how rows are cut


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 5000), st.integers(1, 700), st.integers(1, 900), st.integers(1, 12))
def test_row_pieces_start_on_chunk_boundaries_and_cover_the_table_once(n, block, chunk, tasks):
    from rankfold.cluster.rows import row_pieces

    partition = Partition.regular("samples", n, block)
    pieces = row_pieces(partition, chunk, tasks)
    assert pieces[0]["lo"] == 0 and pieces[-1]["hi"] == n
    for left, right in zip(pieces[:-1], pieces[1:]):
        assert left["hi"] == right["lo"]  # contiguous, disjoint
    for p in pieces:
        assert p["lo"] % chunk == 0 and (p["hi"] % chunk == 0 or p["hi"] == n)  # whole chunks only
        covered = [r for lo, hi in p["bounds"] for r in (lo, hi)]
        assert covered[0] == p["lo"] and covered[-1] == p["hi"]
        assert all(covered[i] == covered[i + 1] for i in range(1, len(covered) - 1, 2))  # no gap
    assert sum(p["blocks"] for p in pieces) == len(partition)
    assert len(pieces) <= tasks


def test_a_row_range_off_a_chunk_boundary_is_refused(tmp_path):
    plan = sample_outputs.StoredRows(str(tmp_path / "g.zarr"), 100, "scores")
    with pytest.raises(ValueError, match="chunk boundary"):
        plan.start(150, 300)


# ---------------------------------------------------------------- same outputs as serial


CASES = [
    ("zarr", dict(route="features")),
    ("parquet", dict(route="features", missing="fill-mean", standardize=True)),
    ("zarr", dict(route="sketch", sketch="subspace")),  # the thin product goes to scratch, filled by workers
    ("parquet", dict(route="sketch", sketch="krylov", power_iterations=1, standardize=True)),
    ("zarr", dict(route="sketch", sketch="one-pass")),  # a scores pass after the sketch
]


@pytest.mark.parametrize("fmt,kw", CASES, ids=[f"{f}-{'-'.join(map(str, k.values()))}" for f, k in CASES])
def test_workers_write_the_per_sample_outputs_and_they_equal_serial(client, fmt, kw, make_planted, write_zarr,
                                                                      write_parquet, tmp_path, monkeypatch):
    x = make_planted(3000, 24, seed=4)
    if kw.get("missing") == "fill-mean":
        x[7, 2] = x[1500, 5] = np.nan
    path = write_parquet(x, row_group_size=300) if fmt == "parquet" else write_zarr(x, chunks=(300, 24))
    kw = dict(kw, memory_limit="64MB", seed=2)
    serial_out, cluster_out = tmp_path / "serial.zarr", tmp_path / "cluster.zarr"
    serial = rankfold.decompose(path, 3, out=serial_out, **kw)
    _forbid_blocks_here(monkeypatch)
    clustered = rankfold.decompose(path, 3, out=cluster_out, cluster=client, **kw)
    assert clustered.scores.chunks == (CHUNK, 3) and clustered.scores.shape == (3000, 3)
    _same_outputs(clustered, serial)
    assert np.max(np.abs(clustered.loadings - serial.loadings)) < 1e-10
    assert clustered.attrs["residual_flag"]["cutoff"] == pytest.approx(serial.attrs["residual_flag"]["cutoff"],
                                                                       rel=1e-12)
    info = clustered.attrs["cluster"]
    assert info["tasks"] > 0 and info["bytes_moved"] < x.nbytes  # residuals and states, not the table
    assert _leftovers(tmp_path) == []  # no partial store, scratch folder or checkpoint left


def test_projection_on_the_cluster_writes_parquet_and_zarr_like_serial(client, make_planted, write_zarr,
                                                                        write_parquet, tmp_path, monkeypatch):
    x = make_planted(2000, 16, seed=8)
    train = write_parquet(x, row_group_size=250)
    result = rankfold.decompose(train, 3, route="features", out=tmp_path / "pca.zarr")
    fresh = make_planted(2600, 16, seed=9)
    path = write_parquet(fresh, row_group_size=200)
    serial = rankfold.project(result, path, out=tmp_path / "serial.zarr", memory_limit="32MB")
    _forbid_blocks_here(monkeypatch)
    clustered = rankfold.project(result, path, out=tmp_path / "cluster.zarr", memory_limit="32MB", cluster=client)
    _same_outputs(clustered, serial)
    # reference: numpy, the stored transformation applied to the whole table at once
    xc = (fresh - np.asarray(result.center)) / np.asarray(result.scale)
    z = xc @ np.asarray(result.loadings)
    assert np.max(np.abs(clustered.scores[:] - z)) <= 1e-5 * np.max(np.abs(z))
    assert clustered.attrs["cluster"]["workers"] == 2
    as_parquet = rankfold.project(result, path, out=tmp_path / "cluster.parquet", format="parquet",
                                  memory_limit="32MB", cluster=client)
    assert np.allclose(as_parquet.scores[:], serial.scores[:], rtol=1e-6, atol=1e-6)
    assert _leftovers(tmp_path) == []


# ---------------------------------------------------------------- failures


def test_an_output_the_workers_cannot_see_is_named(client, make_planted, write_zarr):
    """memory:// lives inside one process: the workers cannot write the client's store."""
    path = write_zarr(make_planted(1000, 12, seed=1), chunks=(100, 12))
    url = f"memory://rankfold-rows-{os.getpid()}/r.zarr"
    with pytest.raises(ClusterError) as err:
        rankfold.decompose(path, 2, route="features", out=url, cluster=client)
    message = str(err.value)
    assert "worker tcp://127.0.0.1:" in message and "cannot write to" in message and "r.zarr" in message
    assert "storage every worker sees" in message and err.value.exit_code == 7
    from rankfold.sources.location import exists

    assert not exists(url)


def _break_residuals_on_workers(after_calls: int):
    """Installed on every worker: the sink's residual step fails after a number of calls."""
    import rankfold.sample_outputs as so

    original = so.residuals
    calls = {"n": 0}

    def failing(z, sumsq):
        calls["n"] += 1
        if calls["n"] > after_calls:
            raise OSError(28, "No space left on device (simulated)")
        return original(z, sumsq)

    so._original_residuals = original
    so.residuals = failing


def _restore_residuals_on_workers():
    import rankfold.sample_outputs as so

    so.residuals = getattr(so, "_original_residuals", so.residuals)


def test_a_failed_task_stops_the_others_and_leaves_nothing(client, make_planted, write_zarr, tmp_path):
    path = write_zarr(make_planted(6000, 12, seed=2), chunks=(200, 12))
    out = tmp_path / "r.zarr"
    client.run(_break_residuals_on_workers, 1)  # 6 tasks on 2 workers: one worker makes at least 3 calls
    try:
        with pytest.raises(Exception) as err:
            rankfold.decompose(path, 2, route="features", out=out, cluster=client, memory_limit="64MB")
    finally:
        client.run(_restore_residuals_on_workers)
    assert isinstance(err.value, ClusterError) and err.value.exit_code == 7
    assert "scores pass failed on a worker" in str(err.value) and "No space left" in str(err.value)
    time.sleep(1.0)  # a worker still writing would recreate the partial store by now
    # Only the checkpoint is kept (the feature Gram pass, to resume from); no partial store.
    assert not out.exists() and _leftovers(tmp_path) == [".r.zarr.checkpoint"]


@pytest.mark.slow
def test_worker_killed_in_the_scores_pass(client, make_planted, write_zarr, tmp_path):
    """SIGKILL one worker as the scores pass reports its first task; the scheduler reruns
    the task, which writes its chunks again from their start: the outputs are still serial."""
    x = make_planted(20_000, 24, seed=6)
    path = write_zarr(x, chunks=(500, 24))
    serial = rankfold.decompose(path, 3, route="features", out=tmp_path / "serial.zarr", memory_limit="64MB")
    victim = sorted(client.run(os.getpid).values())[0]
    killed = threading.Event()

    def progress(event):
        if event["pass"] == "scores" and not killed.is_set():
            killed.set()
            os.kill(victim, signal.SIGKILL)

    clustered = rankfold.decompose(path, 3, route="features", out=tmp_path / "cluster.zarr", memory_limit="64MB",
                                   cluster=client, progress=progress)
    assert killed.is_set()
    _same_outputs(clustered, serial)
    client.wait_for_workers(2, timeout=60)


# ---------------------------------------------------------------- command line


@pytest.mark.slow
def test_cli_project_on_local_2(make_planted, write_zarr, write_parquet, tmp_path):
    x = make_planted(1500, 10, seed=3)
    result = rankfold.decompose(write_parquet(x, row_group_size=150), 2, route="features", out=tmp_path / "pca.zarr")
    path = write_parquet(make_planted(1800, 10, seed=4), row_group_size=300)
    src = os.path.dirname(os.path.dirname(os.path.abspath(rankfold.__file__)))
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in [os.environ.get("PYTHONPATH"), src] if p))
    outs = {}
    for label, extra in (("serial", []), ("cluster", ["--cluster", "local:2"])):
        outs[label] = tmp_path / f"{label}.zarr"
        done = subprocess.run([sys.executable, "-m", "rankfold", "project", str(tmp_path / "pca.zarr"), path,
                               "--out", str(outs[label]), "-q", *extra], env=env, capture_output=True, text=True,
                              timeout=180)
        assert done.returncode == 0, done.stderr
    from rankfold.projection import open_projection

    a, b = open_projection(str(outs["cluster"])), open_projection(str(outs["serial"]))
    _same_outputs(a, b)
    assert a.attrs["cluster"]["kind"] == "local:2"
    assert result.rank == 2
