"""Cluster execution: the same answer on a real dask.distributed LocalCluster as serially.

The cluster is two worker processes on loopback, one thread each, started once for the
module.  Tables are real Parquet and Zarr files in ``tmp_path``.  References: the serial
run of the same route (rankfold's own, checked elsewhere against LAPACK) and, for one case
per orientation, LAPACK through ``reference_pca`` (scipy.linalg.eigh on numpy.cov).
"""

from __future__ import annotations

import os
import pickle
import signal
import subprocess
import sys
import threading

import numpy as np
import pytest

import rankfold
from rankfold.errors import ClusterError, DataError, UsageError
from rankfold.folds import (ColumnMoments, ColumnScores, CovarianceProduct, FeatureGram, FeatureProjection,
                            GramProduct, SampleGram, StreamingSketch, tree_merge)

EXACT = 1e-12


def _rel(a, b) -> float:
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-300))


def _assert_same(cluster_result, serial, tol):
    for field in ("loadings", "variance", "center", "scale"):
        assert _rel(getattr(cluster_result, field), getattr(serial, field)) <= tol, field
    assert abs(cluster_result.attrs["total_variance"] / serial.attrs["total_variance"] - 1) <= tol
    if serial.scores is not None:
        assert _rel(cluster_result.scores[:], serial.scores[:]) <= max(tol, 1e-6)  # float32 when stored


# ---------------------------------------------------------------- fold states, no cluster


def _blocks_at(x: np.ndarray, cuts) -> list[tuple[int, np.ndarray]]:
    edges = [0, *cuts, x.shape[0]]
    return [(a, x[a:b].copy()) for a, b in zip(edges[:-1], edges[1:]) if b > a]


STATE_CASES = {
    # name: (empty-state factory given (table along the blocking axis), reference of the folded field)
    "FeatureGram": lambda t: FeatureGram(t.shape[1]),
    "ColumnMoments": lambda t: ColumnMoments(t.shape[1]),
    "StreamingSketch": lambda t: StreamingSketch(np.random.default_rng(1).standard_normal((t.shape[1], 4))),
    "CovarianceProduct": lambda t: CovarianceProduct(np.random.default_rng(2).standard_normal((t.shape[1], 4)),
                                                     t.mean(axis=0), t.std(axis=0, ddof=1)),
    "SampleGram": lambda t: SampleGram(t.shape[1], t.shape[0], standardize=True),
    "GramProduct": lambda t: GramProduct(np.random.default_rng(3).standard_normal((t.shape[1], 4)),
                                         t.shape[0], True),
    "FeatureProjection": lambda t: FeatureProjection(np.random.default_rng(4).standard_normal((t.shape[1], 3)),
                                                     t.mean(axis=1), t.std(axis=1, ddof=1), scores=True),
    "ColumnScores": lambda t: ColumnScores(np.random.default_rng(5).standard_normal((t.shape[0], 3)),
                                           t.mean(axis=1), t.std(axis=1, ddof=1), t.shape[1]),
}


def _reference(name: str, t: np.ndarray, empty) -> dict:
    """What each state must hold after folding all of ``t``, by plain numpy on the whole table."""
    if name in ("FeatureGram", "ColumnMoments", "StreamingSketch", "CovarianceProduct"):
        xc = t - t.mean(axis=0)  # blocks of samples
        if name == "FeatureGram":
            return {"comoment": xc.T @ xc, "mean": t.mean(axis=0)}
        if name == "ColumnMoments":
            return {"m2": np.einsum("ij,ij->j", xc, xc), "mean": t.mean(axis=0)}
        if name == "StreamingSketch":
            return {"product": xc.T @ (xc @ empty.test), "mean": t.mean(axis=0)}
        z = (t - empty.center) / empty.scale
        return {"product": z.T @ (z @ empty.basis)}
    xc = t - t.mean(axis=1, keepdims=True)  # blocks of features: rows are features
    if name in ("SampleGram", "GramProduct"):
        z = xc / xc.std(axis=1, ddof=1, keepdims=True)
        ref = {"center": t.mean(axis=1), "scale": xc.std(axis=1, ddof=1), "sumsq": float(np.sum(z * z))}
        ref.update({"gram": z.T @ z} if name == "SampleGram" else {"product": z.T @ (z @ empty.basis)})
        return ref
    z = (t - empty.center[:, None]) / empty.scale[:, None]
    if name == "ColumnScores":
        return {"scores": z.T @ empty.loadings, "sumsq": np.einsum("ij,ij->j", z, z)}
    loadings = z @ empty.weights
    return {"loadings": loadings, "sample_sumsq": np.einsum("ij,ij->j", z, z), "sample_product": z.T @ loadings}


@pytest.mark.parametrize("name", sorted(STATE_CASES))
@pytest.mark.parametrize("cuts", [(1,), (7, 8, 30), (3, 11, 19, 20, 33)])
def test_fold_states_round_trip_and_merge_from_arbitrary_block_boundaries(name, cuts):
    """Partial states over ranges starting anywhere, each shipped as bytes, merge to the whole.

    This is exactly what a cluster pass does: an empty template travels as bytes, each task
    folds a range starting at an arbitrary block boundary (feature-block states write rows at
    their offset), states travel back as bytes and merge in a balanced tree.
    Reference: numpy on the whole in-memory table (see ``_reference``).
    """
    rng = np.random.default_rng(sum(cuts))
    table = rng.standard_normal((40, 6)) * rng.uniform(0.5, 3, 6) + 100.0  # large means: Chan et al.
    empty = STATE_CASES[name](table)
    payload = empty.to_bytes()
    partials = []
    for start, block in _blocks_at(table, cuts):
        state = type(empty).from_bytes(payload)
        state.update(block, start)
        partials.append(type(empty).from_bytes(state.to_bytes()))
    merged = type(empty).from_bytes(tree_merge(partials).to_bytes())
    for field, expected in _reference(name, table, empty).items():
        assert _rel(getattr(merged, field), expected) <= 1e-12, field
    # Round trip of a non-empty state: every field identical, types kept.
    again = type(empty).from_bytes(merged.to_bytes())
    for field in type(empty)._fields:
        assert np.array_equal(np.asarray(getattr(again, field)), np.asarray(getattr(merged, field))), field


# ---------------------------------------------------------------- prepare steps pickle without the source


def test_every_route_prepare_pickles_as_a_recipe_not_the_source(monkeypatch, write_zarr, write_parquet, planted):
    """Each pass's prepare (a closure over the route input) pickles small and reopens its own source."""
    import cloudpickle

    from rankfold.routes import features, samples, sketch

    seen = []

    def recording(original):
        def run_pass(name, inp, partition, state, prepare):
            payload = cloudpickle.dumps(prepare)
            seen.append((name, len(payload), payload, inp.source))
            return original(name, inp, partition, state, prepare)
        return run_pass

    for module in (features, samples, sketch):
        monkeypatch.setattr(module, "run_pass", recording(module.run_pass))
    x = planted.copy()
    x[3, 2] = np.nan
    rows = write_parquet(x)
    cols = write_zarr(x, samples_as="columns")
    kw = dict(missing="fill-mean", memory_limit="64MB")
    rankfold.decompose(rows, 2, route="features", **kw)
    rankfold.decompose(rows, 2, route="sketch", **kw)
    rankfold.decompose(cols, 2, route="samples", samples_as="columns", **kw)
    rankfold.decompose(cols, 2, route="sketch", samples_as="columns", **kw)
    names = {name for name, *_ in seen}
    assert {"column means", "feature Gram", "column moments", "power iteration", "Rayleigh-Ritz",
            "sample Gram", "loadings"} <= names
    from rankfold.sources import Source

    for name, size, payload, client_source in seen:
        assert size < 16_000, name  # a recipe and a few vectors, never a block (300 x 24 x 8 = 57,600 bytes)
        restored = pickle.loads(payload)
        cells = [c.cell_contents for c in (restored.__closure__ or ())]
        for value in cells:
            if isinstance(value, Source):
                assert value is not client_source and value.shape == client_source.shape
            inp = value if hasattr(value, "source") and hasattr(value, "rank") else None
            if inp is not None:
                assert inp.progress is None and inp.cluster is None
                assert inp.source is not client_source  # a source reopened from its recipe
                assert inp.source.shape == client_source.shape


def test_block_ranges_cover_the_partition_contiguously():
    from rankfold.cluster.passes import block_ranges

    for n_blocks, n_tasks in ((1, 6), (5, 6), (6, 6), (61, 6), (100, 12)):
        ranges = block_ranges(n_blocks, n_tasks)
        assert ranges[0][0] == 0 and ranges[-1][1] == n_blocks
        assert all(a < b for a, b in ranges) and all(r[1] == s[0] for r, s in zip(ranges, ranges[1:]))
        assert len(ranges) == min(n_blocks, n_tasks)
        sizes = [b - a for a, b in ranges]
        assert max(sizes) - min(sizes) <= 1


# ---------------------------------------------------------------- same answer as serial


ROWS_CASES = [
    ("parquet", "features", {}),
    ("zarr", "features", {"missing": "fill-mean", "standardize": True}),
    ("parquet", "sketch", {"sketch": "subspace", "standardize": True}),
    ("zarr", "sketch", {"sketch": "krylov", "power_iterations": 1}),
    ("zarr", "sketch", {"sketch": "one-pass"}),
    ("zarr", "memory", {}),
]
COLUMNS_CASES = [
    ("samples", {}),
    ("samples", {"standardize": True, "missing": "fill-mean"}),
    ("sketch", {"sketch": "subspace"}),
    ("sketch", {"sketch": "one-pass"}),
]


def _with_holes(x, holes: bool):
    x = np.array(x, dtype=np.float64, copy=True)
    if holes:
        x[5, 1] = x[37, 3] = x[51, 0] = np.nan
    return x


@pytest.mark.parametrize("fmt,route,kw", ROWS_CASES, ids=[f"{f}-{r}-{'-'.join(map(str, k.values())) or 'plain'}"
                                                          for f, r, k in ROWS_CASES])
def test_samples_as_rows_cluster_equals_serial(client, fmt, route, kw, make_planted, write_parquet, write_zarr,
                                               limit_for_blocks, reference_pca):
    x = _with_holes(make_planted(600, 12, seed=7), kw.get("missing") == "fill-mean")
    path = write_parquet(x, row_group_size=40) if fmt == "parquet" else write_zarr(x, chunks=(40, 12))
    limit = limit_for_blocks(path, "features" if route != "memory" else "memory", 10, rank=3)
    serial = rankfold.decompose(path, 3, route=route, memory_limit=limit, seed=5, **kw)
    events = []
    clustered = rankfold.decompose(path, 3, route=route, memory_limit=limit, seed=5, cluster=client,
                                   progress=events.append, **kw)
    _assert_same(clustered, serial, EXACT if route != "sketch" else 1e-10)
    assert clustered.attrs["passes"] == [dict(p, seconds=q["seconds"]) for p, q in
                                         zip(serial.attrs["passes"], clustered.attrs["passes"])]
    info = clustered.attrs["cluster"]
    assert info["workers"] == 2
    if route == "memory":  # one read and one LAPACK call in this process: no task, one progress event
        assert info["tasks"] == 0 and [e["pass"] for e in events] == ["load"]
    else:
        blocks = clustered.attrs["passes"][0]["blocks"]
        assert blocks >= 4 and info["tasks"] > len(clustered.attrs["passes"])  # really split
        assert events[-1]["block"] == events[-1]["blocks"] == clustered.attrs["passes"][-1]["blocks"]
    if route in ("features", "memory"):
        # reference: LAPACK (scipy.linalg.eigh on numpy.cov/corrcoef) of the in-memory table
        values, vectors, _total, _ = reference_pca(x, 3, standardize=kw.get("standardize", False),
                                                   fill_mean=kw.get("missing") == "fill-mean")
        assert _rel(clustered.variance, values) < 1e-9
        assert _rel(clustered.loadings, vectors) < 1e-8


@pytest.mark.parametrize("route,kw", COLUMNS_CASES, ids=[f"{r}-{'-'.join(map(str, k.values())) or 'plain'}"
                                                         for r, k in COLUMNS_CASES])
def test_samples_as_columns_cluster_equals_serial(client, route, kw, make_planted, write_zarr, limit_for_blocks,
                                                  reference_pca):
    x = _with_holes(make_planted(60, 40, seed=11), kw.get("missing") == "fill-mean")
    x = np.hstack([x, make_planted(60, 40, seed=12)])  # 60 samples x 80 features
    path = write_zarr(x, samples_as="columns", chunks=(5, 60))
    limit = limit_for_blocks(path, route, 12, rank=3, samples_as="columns")
    serial = rankfold.decompose(path, 3, route=route, memory_limit=limit, samples_as="columns", seed=9, **kw)
    clustered = rankfold.decompose(path, 3, route=route, memory_limit=limit, samples_as="columns", seed=9,
                                   cluster=client, **kw)
    _assert_same(clustered, serial, EXACT if route != "sketch" else 1e-10)
    assert clustered.attrs["passes"][0]["blocks"] >= 4 and clustered.attrs["cluster"]["tasks"] > 2
    if route == "samples":
        # reference: LAPACK (scipy.linalg.eigh on numpy.cov/corrcoef) of the in-memory table
        values, _vectors, _total, _ = reference_pca(x, 3, standardize=kw.get("standardize", False),
                                                    fill_mean=kw.get("missing") == "fill-mean")
        assert _rel(clustered.variance, values) < 1e-9


def test_data_error_found_on_a_worker_is_the_serial_error(client, planted, write_zarr, tmp_path, limit_for_blocks):
    x = planted.copy()
    x[250, 4] = np.inf
    path = write_zarr(x, chunks=(30, 24))
    limit = limit_for_blocks(path, "features", 8, rank=2) * 2
    with pytest.raises(DataError) as serial:  # with an output too: the same blocks as the cluster run
        rankfold.decompose(path, 2, route="features", memory_limit=limit, out=tmp_path / "serial.zarr")
    out = tmp_path / "result.zarr"
    with pytest.raises(DataError) as clustered:
        rankfold.decompose(path, 2, route="features", memory_limit=limit, cluster=client, out=out)
    assert "sample 250" in str(clustered.value) and "infinite" in str(clustered.value)
    assert str(serial.value).split(": ", 1)[1] == str(clustered.value).split(": ", 1)[1]  # path may be absolute
    assert not [p for p in os.listdir(tmp_path) if "result" in p or "serial" in p]  # nothing half-written


# ---------------------------------------------------------------- a worker dies mid-pass


@pytest.mark.slow
def test_worker_killed_in_the_middle_of_a_pass(client, make_planted, write_zarr, limit_for_blocks):
    """SIGKILL one worker process as the first task finishes; the nanny restarts it, the
    scheduler reruns what it held or was running, and the answer is still the serial one."""
    x = make_planted(40_000, 48, seed=3)
    path = write_zarr(x, chunks=(500, 48))
    limit = limit_for_blocks(path, "features", 60, rank=4) * 2
    serial = rankfold.decompose(path, 4, route="features", memory_limit=limit)
    before = client.run(os.getpid)
    victim = sorted(before.values())[0]
    killed = threading.Event()

    def progress(event):
        if not killed.is_set():
            killed.set()
            os.kill(victim, signal.SIGKILL)

    clustered = rankfold.decompose(path, 4, route="features", memory_limit=limit, cluster=client,
                                   progress=progress)
    assert killed.is_set()
    _assert_same(clustered, serial, EXACT)
    client.wait_for_workers(2, timeout=60)
    assert victim not in client.run(os.getpid).values()  # the killed process is gone, replaced


def test_serial_runs_never_import_dask(planted, write_zarr, tmp_path):
    """dask and distributed are imported only when a cluster is used (a fresh interpreter)."""
    path = write_zarr(planted)
    code = ("import sys, rankfold; rankfold.decompose(sys.argv[1], 2, route='features'); "
            "r = rankfold.decompose(sys.argv[1], 2, route='sketch', out=sys.argv[2]); "
            "rankfold.project(r, sys.argv[1], out=sys.argv[3]); "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in [_src_dir(), os.environ.get("PYTHONPATH")] if p))
    done = subprocess.run([sys.executable, "-c", code, path, str(tmp_path / "r.zarr"), str(tmp_path / "p.zarr")],
                          env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"


# ---------------------------------------------------------------- bad input


@pytest.mark.parametrize("bad", ["local:0", "local:x", "local:", "tcp://host name", 42])
def test_malformed_cluster_argument_is_a_usage_error(planted, write_zarr, bad):
    with pytest.raises(UsageError, match="cluster must be"):
        rankfold.decompose(write_zarr(planted), 2, cluster=bad)


def test_unreachable_scheduler_is_named_within_the_timeout(monkeypatch, planted, write_zarr, tmp_path):
    from rankfold.cluster import session

    monkeypatch.setattr(session, "CONNECT_TIMEOUT", 2.0)
    out = tmp_path / "r.zarr"
    address = "tcp://127.0.0.1:9"  # the discard port: nothing listens there
    with pytest.raises(ClusterError) as err:
        rankfold.decompose(write_zarr(planted), 2, cluster=address, out=out)
    assert address in str(err.value) and "2 s" in str(err.value)
    assert err.value.exit_code == 7 and not out.exists()


def test_version_mismatch_names_worker_and_package(client, monkeypatch, planted, write_zarr, tmp_path):
    from rankfold.cluster import session

    real = session.client_versions

    def other_numpy():
        return dict(real(), numpy="0.0.1")

    monkeypatch.setattr(session, "client_versions", other_numpy)
    out = tmp_path / "r.zarr"
    with pytest.raises(ClusterError) as err:
        rankfold.decompose(write_zarr(planted), 2, route="features", cluster=client, out=out)
    message = str(err.value)
    assert "numpy" in message and "(here 0.0.1)" in message and "tcp://127.0.0.1:" in message
    assert not out.exists()


def test_workers_that_cannot_see_the_data_are_named(client, planted, tmp_path):
    """memory:// lives inside one process: the client sees the table, the workers cannot."""
    import zarr

    url = f"memory://rankfold-cluster-{os.getpid()}/table.zarr"
    zarr.create_array(url, shape=planted.shape, chunks=(50, 24), dtype=planted.dtype)[...] = planted
    out = tmp_path / "r.zarr"
    with pytest.raises(ClusterError) as err:
        rankfold.decompose(url, 2, route="features", cluster=client, out=out)
    message = str(err.value)
    assert url in message and "worker tcp://127.0.0.1:" in message and "no such file" in message
    assert err.value.exit_code == 7 and not out.exists()


def test_file_url_source_on_the_cluster_equals_serial(client, planted, write_parquet, limit_for_blocks):
    path = write_parquet(planted, row_group_size=30)
    limit = limit_for_blocks(path, "features", 6, rank=3)
    serial = rankfold.decompose(path, 3, route="features", memory_limit=limit)
    clustered = rankfold.decompose("file://" + path, 3, route="features", memory_limit=limit, cluster=client)
    _assert_same(clustered, serial, EXACT)


@pytest.mark.slow
def test_cli_cluster_local_2_and_unreachable_scheduler(planted, write_parquet, tmp_path):
    """The command line end to end in real subprocesses: local:2 gives the serial answer;
    an unreachable scheduler exits with code 6 and a message naming it, without a traceback."""
    path = write_parquet(planted)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in [os.environ.get("PYTHONPATH"),
                                                                  _src_dir()] if p))
    serial_out, cluster_out = tmp_path / "serial.zarr", tmp_path / "cluster.zarr"
    for out, extra in ((serial_out, []), (cluster_out, ["--cluster", "local:2"])):
        done = subprocess.run([sys.executable, "-m", "rankfold", "decompose", path, "--rank", "3", "--out",
                               str(out), "--route", "features", "--memory-limit", "2MB", "-q", *extra],
                              env=env, capture_output=True, text=True, timeout=180)
        assert done.returncode == 0, done.stderr
    _assert_same(rankfold.open_result(cluster_out), rankfold.open_result(serial_out), EXACT)
    assert rankfold.open_result(cluster_out).attrs["cluster"]["kind"] == "local:2"
    bad_out = tmp_path / "bad.zarr"
    done = subprocess.run([sys.executable, "-m", "rankfold", "decompose", path, "--rank", "3", "--out",
                           str(bad_out), "--cluster", "tcp://127.0.0.1:9", "-q"],
                          env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 7
    assert "tcp://127.0.0.1:9" in done.stderr and "Traceback" not in done.stderr
    assert not bad_out.exists()


def _src_dir() -> str:
    return os.path.dirname(os.path.dirname(os.path.abspath(rankfold.__file__)))


class _Crash(Exception):
    """Stands in for the client process dying."""


def test_a_cluster_run_stopped_after_a_pass_resumes_serially(client, make_planted, write_zarr, limit_for_blocks,
                                                           tmp_path):
    # A cluster pass is saved whole when it ends (routes/common.run_pass); a run that dies in
    # the next pass resumes from the checkpoint -- here serially -- without reading the first
    # pass again, and gives the serial answer (reference: an uninterrupted serial run, 1e-12).
    import json

    from rankfold.checkpoint import checkpoint_folder

    x = make_planted(600, 24, seed=5)
    path = write_zarr(x, chunks=(40, 24))
    kw = dict(route="sketch", power_iterations=1, memory_limit="64MB", seed=3)
    serial = rankfold.decompose(path, 3, **kw)
    out = tmp_path / "r.zarr"

    def die_in_second_pass(event):
        if event["pass"] == "Rayleigh-Ritz":
            raise _Crash()

    with pytest.raises(_Crash):
        rankfold.decompose(path, 3, out=out, cluster=client, checkpoint_every=0, progress=die_in_second_pass, **kw)
    with open(os.path.join(checkpoint_folder(out), "manifest.json")) as fh:
        saved = json.load(fh)["passes"]
    assert saved[0]["name"] == "moments and power iteration" and saved[0]["complete"]
    messages = []
    resumed = rankfold.decompose(path, 3, out=out, on_resume=messages.append, **kw)
    assert messages and "pass 2 of" in messages[0]
    _assert_same(resumed, serial, EXACT)
    assert not os.path.exists(checkpoint_folder(out))
