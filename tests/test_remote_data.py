"""Sources and result stores given as fsspec URLs (file:// and memory://).

Reference: the same table read from its local path (itself checked against LAPACK in
the route tests), and numpy slicing of the array written.  memory:// is fsspec's
in-process file system: real reads through fsspec, zarr's FsspecStore and pyarrow's
FSSpecHandler, without a network.  No object-store emulator is used here.
"""

from __future__ import annotations

import os
import uuid

import numpy as np
import pytest

import rankfold
from rankfold.errors import OutputError, SourceError
from rankfold.sources import open_source


@pytest.fixture
def memory_root():
    """A fresh memory:// folder, removed afterwards (the file system lives as long as the process)."""
    import fsspec

    fs = fsspec.filesystem("memory")
    root = f"/rankfold-test-{uuid.uuid4().hex[:8]}"
    yield root
    if fs.exists(root):
        fs.rm(root, recursive=True)


def _memory_zarr(root: str, x: np.ndarray, chunks=(40, 12)) -> str:
    import zarr

    url = f"memory://{root}/table.zarr"
    arr = zarr.create_array(url, shape=x.shape, chunks=chunks, dtype=x.dtype, zarr_format=3)
    arr[...] = x
    return url


def _memory_parquet_folder(root: str, x: np.ndarray, files: int = 3) -> str:
    import fsspec
    import pyarrow as pa
    import pyarrow.parquet as pq

    fs = fsspec.filesystem("memory")
    for i, part in enumerate(np.array_split(x, files)):
        with fs.open(f"{root}/table/part-{i}.parquet", "wb") as fh:
            pq.write_table(pa.table({f"x{j:02d}": part[:, j] for j in range(x.shape[1])}), fh, row_group_size=40)
    return f"memory://{root}/table"


def _close(a: rankfold.Result, b: rankfold.Result, tol=1e-12):
    for field in ("loadings", "variance", "center", "scale"):
        got, ref = np.asarray(getattr(a, field)), np.asarray(getattr(b, field))
        assert np.max(np.abs(got - ref)) <= tol * max(np.max(np.abs(ref)), 1.0), field


def test_file_url_sources_read_like_local_paths(make_planted, write_zarr, write_parquet_folder, limit_for_blocks):
    x = make_planted(300, 12, seed=4)
    for local in (write_zarr(x, chunks=(40, 12)), write_parquet_folder(x)):
        url = "file://" + local
        src = open_source(url)
        try:
            # reference: numpy slicing of the written array
            np.testing.assert_array_equal(src.read("samples", 17, 123), x[17:123])
            np.testing.assert_array_equal(src.read("features", 2, 5), x[:, 2:5].T)
            assert src.fingerprint()["path"] == url
        finally:
            src.close()
        limit = limit_for_blocks(local, "features", 5, rank=3)
        by_url = rankfold.decompose(url, 3, route="features", memory_limit=limit)
        assert by_url.attrs["passes"][0]["blocks"] > 1
        _close(by_url, rankfold.decompose(local, 3, route="features", memory_limit=limit))


def test_memory_url_zarr_and_parquet_folder(make_planted, write_zarr, memory_root, limit_for_blocks):
    x = make_planted(300, 12, seed=5)
    local = rankfold.decompose(write_zarr(x, chunks=(40, 12)), 3, route="features")
    for url in (_memory_zarr(memory_root, x), _memory_parquet_folder(memory_root, x)):
        src = open_source(url)
        try:
            np.testing.assert_array_equal(src.read("samples", 0, 300), x)  # reference: the array written
        finally:
            src.close()
        limit = limit_for_blocks(url, "features", 5, rank=3)
        result = rankfold.decompose(url, 3, route="features", memory_limit=limit)
        assert result.attrs["passes"][0]["blocks"] > 1
        _close(result, local)
        assert result.attrs["source"]["path"] == url


def test_memory_url_zarr_samples_as_columns(make_planted, memory_root, limit_for_blocks):
    x = make_planted(50, 30, seed=6)
    url = _memory_zarr(memory_root, np.ascontiguousarray(x.T), chunks=(5, 50))
    result = rankfold.decompose(url, 2, samples_as="columns", route="samples",
                                memory_limit=limit_for_blocks(url, "samples", 4, rank=2, samples_as="columns"))
    assert result.attrs["passes"][0]["blocks"] > 1
    # reference: LAPACK (numpy.linalg.eigvalsh) on numpy.cov of the in-memory table
    expected = np.linalg.eigvalsh(np.cov(x, rowvar=False))[::-1][:2]
    assert np.allclose(result.variance, expected, rtol=1e-10)


def test_result_store_written_to_memory_and_file_urls(make_planted, write_zarr, memory_root, tmp_path):
    import fsspec

    x = make_planted(200, 10, seed=8)
    path = write_zarr(x, chunks=(40, 10))
    local = rankfold.decompose(path, 3, route="features", out=tmp_path / "local.zarr")
    for out in (f"memory://{memory_root}/result.zarr", f"file://{tmp_path}/url.zarr"):
        written = rankfold.decompose(path, 3, route="features", out=out)
        _close(rankfold.open_result(out), local, tol=0)
        assert written.attrs["rankfold_format"] == 1
        with pytest.raises(OutputError, match="already exists"):
            rankfold.decompose(path, 3, route="features", out=out)
        rankfold.decompose(path, 3, route="features", out=out, overwrite=True)  # replaced whole
        _close(rankfold.open_result(out), local, tol=0)
    leftovers = [p["name"] for p in fsspec.filesystem("memory").ls(memory_root)]
    assert leftovers == [f"{memory_root}/result.zarr"]  # no partial or replaced store left behind


def test_missing_url_and_npy_url_are_source_errors(memory_root, write_npy, make_planted):
    with pytest.raises(SourceError, match=f"memory://{memory_root}/absent.zarr: no such file"):
        rankfold.decompose(f"memory://{memory_root}/absent.zarr", 2)
    npy = write_npy(make_planted(50, 4))
    with pytest.raises(SourceError, match="copy it locally, or store the table as Zarr or Parquet"):
        rankfold.decompose("file://" + npy, 2)


def test_checkpoint_of_a_url_output_lives_in_the_local_cache(make_planted, write_zarr, memory_root, tmp_path,
                                                           monkeypatch):
    """Object stores (and memory://) have no lock files or atomic renames: the checkpoint of a
    URL output is kept on local disk under $RANKFOLD_CACHE_DIR/checkpoints, never in a folder
    named after the URL's scheme in the working directory."""
    from rankfold.checkpoint import checkpoint_folder

    monkeypatch.setenv("RANKFOLD_CACHE_DIR", str(tmp_path / "cache"))
    monkeypatch.chdir(tmp_path)
    path = write_zarr(make_planted(300, 10, seed=2), chunks=(30, 10))
    out = f"memory://{memory_root}/result.zarr"
    folder = checkpoint_folder(out)
    assert folder.startswith(str(tmp_path / "cache" / "checkpoints")) and "result.zarr" in folder
    assert checkpoint_folder(f"memory://{memory_root}/other/result.zarr") != folder  # named after the whole URL
    seen = []

    def progress(event):
        seen.append(os.path.isfile(os.path.join(folder, "manifest.json")))

    rankfold.decompose(path, 3, route="features", out=out, checkpoint_every=0, progress=progress)
    assert all(seen) and seen  # in use during the run
    assert not os.path.exists(folder)  # removed with the result complete
    assert not os.path.exists(tmp_path / "memory:")  # nothing named after the scheme
