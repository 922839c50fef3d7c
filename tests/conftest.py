"""Shared fixtures: small real tables written to ``tmp_path`` in every supported layout.

Writers (each a fixture returning a function, so a test can write its own data):

* ``write_npy(x, samples_as="rows")``            -> path of a ``.npy`` file
* ``write_zarr(x, samples_as="rows", ...)``      -> path of a Zarr v3 array (or a group with
  coordinate arrays when ``feature_names`` / ``sample_ids`` are given)
* ``write_parquet(x, row_group_size=..., ...)``  -> path of one Parquet file with several row groups
* ``write_parquet_folder(x, files=3, ...)``      -> path of a folder of Parquet files
* ``write_table(x, fmt)``                        -> ``(path, samples_as)`` for one of ``TABLE_FORMATS``

``x`` is always given as samples x features; the writers transpose for ``samples_as="columns"``.

Data:

* ``planted_table(n, m, spectrum, ...)`` (plain function, also the ``make_planted`` fixture):
  a table whose sample covariance has exactly the given eigenvalues (up to rounding).
* ``planted`` fixture: the standard 300 x 24 table with well separated eigenvalues.

Memory limits:

* ``limit_for_blocks(path, route, blocks, rank=..., **open_kw)`` -> a byte count that makes
  ``route`` read ``path`` in about ``blocks`` blocks (computed from the routes' own
  ``fixed_bytes`` and the source's ``bytes_per_unit``; tests assert the block count recorded
  in the result's ``passes`` attribute, so a wrong estimate cannot pass silently).

Other:

* ``one_blas_thread`` fixture: run a test with one BLAS thread (small products; see its docstring).
* ``RANKFOLD_CACHE_DIR`` is set (if unset) to a temporary folder made once per session, so the
  machine probe (``rankfold.machine``) never writes into the home folder.
"""

from __future__ import annotations

import atexit
import math
import os
import shutil
import tempfile

import numpy as np
import pytest

# The machine probe (rankfold.machine) caches its figures in $RANKFOLD_CACHE_DIR, by default
# ~/.cache/rankfold: point it at one temporary folder made once per test session, so tests never
# write into the home folder.  rankfold reads it at each call; child processes inherit it.
_CACHE_DIR = tempfile.mkdtemp(prefix="rankfold-test-cache-")
atexit.register(shutil.rmtree, _CACHE_DIR, ignore_errors=True)
os.environ.setdefault("RANKFOLD_CACHE_DIR", _CACHE_DIR)

TABLE_FORMATS = ("npy-rows", "npy-columns", "zarr-rows", "zarr-columns", "parquet-file", "parquet-folder")
STREAMING_ROUTES = ("features", "samples")
ROUTES = ("memory", "features", "samples")


# ---------------------------------------------------------------- data


def planted_table(n: int, m: int, spectrum=None, *, seed: int = 0, offset_scale: float = 5.0,
                  dtype=np.float64) -> np.ndarray:
    """An ``(n, m)`` table whose ddof=1 sample covariance is ``Q diag(spectrum) Q^T``.

    The Gaussian scores are centered and orthonormalized, so the sample eigenvalues equal
    ``spectrum`` up to rounding and the gaps between components are exactly as planted.
    The default spectrum ``100 * 0.75**j`` separates every pair of neighbours by a factor 4/3.
    """
    rng = np.random.default_rng(seed)
    if spectrum is None:
        spectrum = 100.0 * 0.75 ** np.arange(m)
    spectrum = np.asarray(spectrum, dtype=np.float64)
    assert spectrum.shape == (m,) and n > m
    z = rng.standard_normal((n, m))
    z -= z.mean(axis=0)
    u, _s, _vt = np.linalg.svd(z, full_matrices=False)
    z = u * math.sqrt(n - 1)  # centered, z^T z / (n - 1) = I exactly up to rounding
    q, _r = np.linalg.qr(rng.standard_normal((m, m)))
    x = (z * np.sqrt(spectrum)) @ q.T + rng.normal(0.0, offset_scale, m)
    return x.astype(dtype)


@pytest.fixture(scope="module")
def client():
    """A real dask.distributed LocalCluster: two worker processes on loopback, one thread each.

    One per test module that asks for it (a module may kill or patch its workers).
    distributed is imported here only, so test modules without a cluster never load it.
    """
    import logging

    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                           dashboard_address=None, silence_logs=logging.ERROR)
    c = Client(cluster, set_as_default=False)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


@pytest.fixture
def make_planted():
    return planted_table


@pytest.fixture(scope="session")
def planted():
    """The standard table: 300 samples x 24 features, eigenvalues 100 * 0.75**j."""
    x = planted_table(300, 24, seed=20240611)
    x.setflags(write=False)
    return x


# ---------------------------------------------------------------- writers


def _stored(x: np.ndarray, samples_as: str) -> np.ndarray:
    assert samples_as in ("rows", "columns")
    return np.ascontiguousarray(x if samples_as == "rows" else x.T)


def _fresh(tmp_path, stem: str, suffix: str) -> str:
    i = 0
    while os.path.exists(os.path.join(tmp_path, f"{stem}{i}{suffix}")):
        i += 1
    return os.path.join(tmp_path, f"{stem}{i}{suffix}")


@pytest.fixture
def write_npy(tmp_path):
    def write(x, samples_as: str = "rows", dtype=None) -> str:
        path = _fresh(tmp_path, "table", ".npy")
        data = _stored(np.asarray(x), samples_as)
        np.save(path, data.astype(dtype) if dtype is not None else data)
        return path

    return write


@pytest.fixture
def write_zarr(tmp_path):
    def write(x, samples_as: str = "rows", *, chunks=None, dtype=None, feature_names=None,
              sample_ids=None, fill_value=None) -> str:
        """A Zarr v3 store of ``x``; chunked so that a table of a few hundred rows spans many chunks.

        Without names or ids the path is a bare array; with them it is a group holding
        ``data`` (dimension_names sample/feature in stored order) and 1-D coordinate arrays
        ``feature`` and ``sample``, as xarray writes them.
        """
        import zarr

        data = _stored(np.asarray(x), samples_as)
        if dtype is not None:
            data = data.astype(dtype)
        if chunks is None:
            chunks = (32, 16) if samples_as == "rows" else (8, 64)
        dims = ("sample", "feature") if samples_as == "rows" else ("feature", "sample")
        path = _fresh(tmp_path, "table", ".zarr")
        kw = {} if fill_value is None else {"fill_value": fill_value}
        if feature_names is None and sample_ids is None:
            arr = zarr.create_array(path, shape=data.shape, chunks=chunks, dtype=data.dtype,
                                    dimension_names=dims, zarr_format=3, **kw)
            arr[...] = data
            return path
        group = zarr.open_group(path, mode="w", zarr_format=3)
        arr = group.create_array("data", shape=data.shape, chunks=chunks, dtype=data.dtype,
                                 dimension_names=dims, **kw)
        arr[...] = data
        if feature_names is not None:
            names = np.asarray(feature_names, dtype=str)
            coord = group.create_array("feature", shape=names.shape, dtype=str, dimension_names=("feature",))
            coord[...] = names
        if sample_ids is not None:
            ids = np.asarray(sample_ids)
            coord = group.create_array("sample", shape=ids.shape, dtype=str if ids.dtype.kind in "OUS" else ids.dtype,
                                       dimension_names=("sample",))
            coord[...] = ids
        return path

    return write


def _arrow_table(x, names=None, ids=None, id_column="id"):
    import pyarrow as pa

    x = np.asarray(x)
    names = list(names) if names is not None else [f"x{j:02d}" for j in range(x.shape[1])]
    cols = {}
    if ids is not None:
        cols[id_column] = pa.array(np.asarray(ids))
    for j, name in enumerate(names):
        col = x[:, j]
        if col.dtype.kind == "f":
            nan = np.isnan(col)
            cols[name] = pa.array(col, mask=nan if nan.any() else None)
        else:
            cols[name] = pa.array(col)
    return pa.table(cols)


@pytest.fixture
def write_parquet(tmp_path):
    def write(x, *, row_group_size: int = 50, names=None, ids=None, id_column: str = "id") -> str:
        """One Parquet file; NaN in ``x`` becomes a null; several row groups of ``row_group_size``."""
        import pyarrow.parquet as pq

        path = _fresh(tmp_path, "table", ".parquet")
        pq.write_table(_arrow_table(x, names, ids, id_column), path, row_group_size=row_group_size)
        assert pq.ParquetFile(path).num_row_groups == math.ceil(len(x) / row_group_size)
        return path

    return write


@pytest.fixture
def write_parquet_folder(tmp_path):
    def write(x, *, files: int = 3, row_group_size: int = 40, names=None, ids=None,
              id_column: str = "id") -> str:
        """A folder of ``files`` Parquet files (part-0, part-1, ...) splitting the rows in order."""
        import pyarrow.parquet as pq

        folder = _fresh(tmp_path, "folder", "")
        os.makedirs(folder)
        x = np.asarray(x)
        cuts = np.linspace(0, len(x), files + 1).astype(int)
        for i in range(files):
            sl = slice(cuts[i], cuts[i + 1])
            part_ids = None if ids is None else np.asarray(ids)[sl]
            pq.write_table(_arrow_table(x[sl], names, part_ids, id_column),
                           os.path.join(folder, f"part-{i}.parquet"), row_group_size=row_group_size)
        return folder

    return write


@pytest.fixture
def write_table(write_npy, write_zarr, write_parquet, write_parquet_folder):
    def write(x, fmt: str, **kw) -> tuple[str, str]:
        """Write samples x features ``x`` in layout ``fmt`` (one of TABLE_FORMATS); return (path, samples_as)."""
        kind, _, layout = fmt.partition("-")
        if kind == "npy":
            return write_npy(x, layout, **kw), layout
        if kind == "zarr":
            return write_zarr(x, layout, **kw), layout
        if fmt == "parquet-file":
            return write_parquet(x, **kw), "rows"
        if fmt == "parquet-folder":
            return write_parquet_folder(x, **kw), "rows"
        raise ValueError(fmt)

    return write


# ---------------------------------------------------------------- memory limits


def limit_for_blocks(path: str, route: str, blocks: int, *, rank: int = 1, stored: bool = False,
                     **open_kw) -> int:
    """A memory limit under which ``route`` reads ``path`` in about ``blocks`` blocks.

    ``stored``: the run writes a result store (per-sample outputs go through the writer's
    buffers) rather than returning them in memory.
    """
    from rankfold.routes import ROUTES as ROUTE_MODULES
    from rankfold.sample_outputs import stage_bytes
    from rankfold.sources import open_source

    src = open_source(path, **open_kw)
    try:
        n, m = src.shape
        if route == "memory":
            return ROUTE_MODULES["memory"].fixed_bytes(n, m, rank) + stage_bytes(n, rank, held=not stored) + 1
        axis = "samples" if route == "features" else "features"
        units = max(1, math.ceil(src.length(axis) / blocks))
        fixed = ROUTE_MODULES[route].fixed_bytes(n, m, rank) + src.fixed_read_bytes(axis)
        # the per-sample stage (scores) holds this beside the state, and a result returned
        # without a store keeps its per-sample arrays in memory (counted against the ceiling too)
        fixed += stage_bytes(n, rank, held=not stored)
        unit = src.bytes_per_unit(axis)
        if axis == "samples" and hasattr(src, "split_group_reserve"):
            # Parquet: blocks smaller than a row group stream it, which needs a reserve
            # (see ParquetSource.partition); whole groups do not.
            if units < src.largest_group_rows:
                fixed += src.split_group_reserve()
        return fixed + units * unit
    finally:
        src.close()


@pytest.fixture(name="limit_for_blocks")
def limit_for_blocks_fixture():
    return limit_for_blocks


def blocks_read(result) -> list[int]:
    """Blocks per pass of the route, from the result's ``passes`` attribute.

    The scores pass is left out: it holds no route state, so under the same
    ceiling it reads larger blocks than the route it follows.
    """
    return [int(p["blocks"]) for p in result.attrs["passes"] if p["name"] != "scores"]


@pytest.fixture(name="blocks_read")
def blocks_read_fixture():
    return blocks_read


# ---------------------------------------------------------------- independent references


def reference_sign_rule(vectors: np.ndarray) -> np.ndarray:
    """The documented sign rule, written here independently of rankfold.linalg:
    in each column, the entry of largest magnitude (lowest index on ties) is made positive."""
    v = np.array(vectors, dtype=np.float64, copy=True)
    for j in range(v.shape[1]):
        i = int(np.argmax(np.abs(v[:, j])))
        if v[i, j] < 0:
            v[:, j] = -v[:, j]
    return v


def reference_pca(x: np.ndarray, rank: int, *, standardize: bool = False, fill_mean: bool = False):
    """Eigenvalues, signed eigenvectors and total variance by LAPACK on the in-memory table.

    reference: LAPACK syevd via scipy.linalg.eigh on numpy.cov / numpy.corrcoef of the table
    (missing values filled with numpy.nanmean per column first when ``fill_mean``).
    """
    import scipy.linalg

    x = np.array(x, dtype=np.float64, copy=True)
    if fill_mean:
        means = np.nanmean(x, axis=0)
        rows, cols = np.nonzero(np.isnan(x))
        x[rows, cols] = means[cols]
    c = np.corrcoef(x, rowvar=False) if standardize else np.cov(x, rowvar=False)
    w, v = scipy.linalg.eigh(c)
    w, v = w[::-1], v[:, ::-1]
    return w[:rank].copy(), reference_sign_rule(v[:, :rank]), float(np.trace(c)), x


@pytest.fixture(name="reference_pca")
def reference_pca_fixture():
    return reference_pca


# ---------------------------------------------------------------- BLAS threads


@pytest.fixture
def one_blas_thread():
    """Run the test with one BLAS thread.

    On the 2-core test machine OpenBLAS's thread hand-off costs 20-30x the arithmetic for the
    small products of the randomized-route tests (a 600 x 150 by 150 x 15 product: 16 ms with
    two threads, 0.5 ms with one); results are the same algorithm either way.
    """
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield


# ---------------------------------------------------------------- data sets shipped with scikit-learn


@pytest.fixture(scope="session")
def iris():
    """The iris measurements bundled with scikit-learn (150 x 4), as float64."""
    from sklearn.datasets import load_iris

    return load_iris().data.astype(np.float64)


@pytest.fixture(scope="session")
def digits():
    """The 8 x 8 digit images bundled with scikit-learn (1,797 x 64), as float64."""
    from sklearn.datasets import load_digits

    return load_digits().data.astype(np.float64)
