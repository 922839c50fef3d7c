"""The result store: a Zarr v3 group other tools open, written atomically, independent of blocking.

The layout checked here is the one documented in ``rankfold/result.py`` and docs/result-format.md.
Outside readers used: zarr-python (``zarr.open_group``) and xarray (``xarray.open_zarr``).
"""

from __future__ import annotations

import json
import os
import warnings

import numpy as np
import pytest

import rankfold
from conftest import ROUTES, blocks_read, limit_for_blocks, reference_pca

ARRAY_DIMS = {
    "loadings": ("feature", "component"),
    "variance": ("component",),
    "variance_fraction": ("component",),
    "center": ("feature",),
    "scale": ("feature",),
    "feature_names": ("feature",),
    "component": ("component",),
}
ATTRIBUTES = {"rankfold_format", "route", "route_reasons", "rank", "n_samples", "n_features",
              "total_variance", "parameters", "source", "passes", "seconds", "created", "versions",
              "sign_rule"}
RANK = 4


def _open_xarray(path):
    import xarray as xr

    with warnings.catch_warnings():
        # no consolidated metadata in the store: xarray says so and reads the group directly
        warnings.simplefilter("ignore", RuntimeWarning)
        return xr.open_zarr(path)


def _leftovers(folder):
    return [name for name in os.listdir(folder) if ".partial" in name or ".replaced" in name]


@pytest.mark.parametrize("route", ROUTES)
def test_store_is_a_zarr_v3_group_with_the_documented_layout(planted, write_npy, tmp_path, route):
    import zarr

    path = write_npy(planted)
    out = str(tmp_path / "result.zarr")
    limit = limit_for_blocks(path, route, 4, rank=RANK, stored=True)
    res = rankfold.decompose(path, RANK, route=route, out=out, memory_limit=limit)
    n, m = planted.shape

    with open(os.path.join(out, "zarr.json")) as fh:
        meta = json.load(fh)
    assert meta["zarr_format"] == 3 and meta["node_type"] == "group"

    group = zarr.open_group(out, mode="r")
    expected = dict(ARRAY_DIMS)
    expected.update(scores=("sample", "component"), residual=("sample",), residual_fraction=("sample",),
                    flagged=("sample",))
    assert sorted(name for name, _ in group.arrays()) == sorted(expected)
    for name, dims in expected.items():
        arr = group[name]
        assert arr.metadata.zarr_format == 3
        assert tuple(arr.metadata.dimension_names) == dims, name
    shapes = {"feature": m, "component": RANK, "sample": n}
    for name, dims in expected.items():
        assert group[name].shape == tuple(shapes[d] for d in dims), name
    assert group["loadings"].dtype == np.float64 and group["variance"].dtype == np.float64
    assert group["component"].dtype == np.int32
    np.testing.assert_array_equal(group["component"][:], np.arange(1, RANK + 1))
    assert list(group["feature_names"][:]) == [f"f{j:02d}" for j in range(m)]
    assert group["scores"].dtype == np.float32 and group["residual"].dtype == np.float64
    assert group["flagged"].dtype == np.bool_
    # per-sample arrays are chunked along samples only, whole components per chunk
    assert group["scores"].chunks[1] == RANK and group["residual"].chunks[0] == group["scores"].chunks[0]

    attrs = dict(group.attrs)
    assert ATTRIBUTES <= set(attrs)
    assert attrs["rankfold_format"] == 1
    assert attrs["route"] == route and attrs["rank"] == RANK
    assert attrs["n_samples"] == n and attrs["n_features"] == m
    assert attrs["parameters"]["memory_limit"] == limit and attrs["parameters"]["rank"] == RANK
    assert attrs["source"]["path"] == os.path.abspath(path)
    assert all({"name", "blocks", "seconds", "bytes_read"} <= set(p) for p in attrs["passes"])

    # the stored numbers are the LAPACK ones (reference: scipy.linalg.eigh on numpy.cov)
    values, vectors, total, _ = reference_pca(planted, RANK)
    np.testing.assert_allclose(group["variance"][:], values, rtol=1e-10)
    np.testing.assert_allclose(group["loadings"][:], vectors, atol=1e-8)
    np.testing.assert_allclose(attrs["total_variance"], total, rtol=1e-10)
    np.testing.assert_allclose(group["variance_fraction"][:], values / total, rtol=1e-10)
    assert res.path == out


@pytest.mark.parametrize("route", ROUTES)
def test_xarray_opens_the_store(planted, write_npy, tmp_path, route):
    path = write_npy(planted)
    out = str(tmp_path / "result.zarr")
    res = rankfold.decompose(path, RANK, route=route, out=out, memory_limit="64MB")
    ds = _open_xarray(out)
    try:
        assert ds["loadings"].dims == ("feature", "component")
        assert ds["variance"].dims == ("component",)
        assert ds.sizes["feature"] == planted.shape[1] and ds.sizes["component"] == RANK
        np.testing.assert_array_equal(ds["loadings"].values, res.loadings)
        np.testing.assert_array_equal(ds["component"].values, np.arange(1, RANK + 1))
        assert [str(v) for v in ds["feature_names"].values] == list(res.feature_names)
        assert ds["scores"].dims == ("sample", "component")
        assert ds["residual"].dims == ds["flagged"].dims == ("sample",)
        assert ds.sizes["sample"] == planted.shape[0]
        assert ds.attrs["route"] == route
    finally:
        ds.close()


@pytest.mark.parametrize("route", ROUTES)
def test_sample_ids_from_parquet_id_column(planted, write_parquet_folder, tmp_path, route):
    """Ids are stored beside the scores (api.py: read only when scores are stored, so a
    route without scores does not read an id column of every sample for nothing)."""
    ids = np.array([f"s{i:04d}" for i in range(planted.shape[0])])
    path = write_parquet_folder(planted, ids=ids, id_column="record_id")
    out = str(tmp_path / "result.zarr")
    res = rankfold.decompose(path, RANK, route=route, out=out, id_column="record_id",
                             memory_limit=limit_for_blocks(path, route, 4, rank=RANK, id_column="record_id",
                                                                   stored=True))
    if route != "memory":
        assert min(blocks_read(res)) >= 3
    assert list(res.feature_names) == [f"x{j:02d}" for j in range(planted.shape[1])]
    # reference: LAPACK via scipy.linalg.eigh; the id column is not a feature
    values, _, _, _ = reference_pca(planted, RANK)
    np.testing.assert_allclose(res.variance, values, rtol=1e-10)
    ds = _open_xarray(out)
    try:
        assert list(res.sample_ids[:]) == list(ids)
        assert ds["sample_ids"].dims == ("sample",)
        assert [str(v) for v in ds["sample_ids"].values] == list(ids)
    finally:
        ds.close()


def test_zarr_coordinates_become_names_and_ids(planted, write_zarr, tmp_path):
    names = [f"gene_{j}" for j in range(planted.shape[1])]
    ids = np.arange(1000, 1000 + planted.shape[0], dtype=np.int64)
    path = write_zarr(planted, "columns", feature_names=names, sample_ids=ids)
    out = str(tmp_path / "result.zarr")
    res = rankfold.decompose(path, RANK, samples_as="columns", route="samples", out=out,
                             memory_limit=limit_for_blocks(path, "samples", 4, rank=RANK, samples_as="columns",
                                                                   stored=True))
    assert list(res.feature_names) == names
    np.testing.assert_array_equal(res.sample_ids[:], ids)
    assert res.scores.shape == (planted.shape[0], RANK)


@pytest.mark.parametrize("route", ROUTES)
def test_open_result_round_trip(planted, write_parquet, tmp_path, route):
    path = write_parquet(planted)
    # one ceiling for both runs: room for in-memory outputs and for the store's buffers
    limit = max(limit_for_blocks(path, route, 4, rank=RANK, stored=s) for s in (False, True))
    kw = dict(route=route, memory_limit=limit, standardize=True)
    mem = rankfold.decompose(path, RANK, **kw)
    assert mem.path is None
    out = str(tmp_path / "r.zarr")
    written = rankfold.decompose(path, RANK, out=out, **kw)
    back = rankfold.open_result(out)
    for r in (written, back):
        assert r.path == out and r.route == route and r.rank == RANK
        np.testing.assert_allclose(r.loadings, mem.loadings, rtol=0, atol=1e-14)
        np.testing.assert_allclose(r.variance, mem.variance, rtol=1e-14)
        np.testing.assert_allclose(r.variance_fraction, mem.variance_fraction, rtol=1e-14)
        np.testing.assert_allclose(r.center, mem.center, rtol=1e-14)
        np.testing.assert_allclose(r.scale, mem.scale, rtol=1e-14)
        assert list(r.feature_names) == list(mem.feature_names)
        assert r.n_samples == planted.shape[0] and r.n_features == planted.shape[1]
        np.testing.assert_allclose(r.total_variance, mem.total_variance, rtol=1e-14)
        # scores stored as float32 (in memory float64); residuals float64
        np.testing.assert_allclose(r.scores[:], mem.scores, rtol=1e-6, atol=1e-6 * np.abs(mem.scores).max())
        np.testing.assert_allclose(r.residual[:], mem.residual, rtol=1e-12, atol=1e-12 * mem.residual.max())
        np.testing.assert_array_equal(r.flagged[:], mem.flagged)
    # reference: numpy.corrcoef trace = number of features for correlation PCA
    np.testing.assert_allclose(back.total_variance, np.trace(np.corrcoef(planted, rowvar=False)), rtol=1e-12)


def test_no_partial_folder_left_and_existing_out_refused(planted, write_npy, tmp_path):
    path = write_npy(planted)
    results = tmp_path / "results"
    results.mkdir()
    out = str(results / "pca.zarr")
    first = rankfold.decompose(path, 2, out=out, route="features", memory_limit="64MB")
    assert sorted(os.listdir(results)) == ["pca.zarr"]
    assert _leftovers(results) == []

    with pytest.raises(rankfold.OutputError, match="exists"):
        rankfold.decompose(path, 3, out=out, route="features", memory_limit="64MB")
    assert rankfold.open_result(out).rank == 2  # untouched
    np.testing.assert_array_equal(rankfold.open_result(out).loadings, first.loadings)

    replaced = rankfold.decompose(path, 3, out=out, route="samples", memory_limit="64MB", overwrite=True)
    assert replaced.rank == 3 and rankfold.open_result(out).route == "samples"
    assert sorted(os.listdir(results)) == ["pca.zarr"]
    assert _leftovers(results) == []


def test_open_result_refuses_a_folder_that_is_not_a_result(tmp_path, write_zarr, planted):
    with pytest.raises(rankfold.OutputError):
        rankfold.open_result(str(tmp_path / "nothing-here.zarr"))
    with pytest.raises(rankfold.OutputError, match="not a rankfold result"):
        rankfold.open_result(write_zarr(planted, feature_names=[f"a{j}" for j in range(planted.shape[1])]))


# ------------------------------------------------------------------ independence of block size


@pytest.mark.parametrize("route", ["features", "samples"])
@pytest.mark.parametrize("fmt", ["npy-columns", "zarr-rows", "parquet-file", "parquet-folder"])
@pytest.mark.parametrize("standardize", [False, True], ids=["cov", "corr"])
def test_one_block_and_many_blocks_agree(planted, write_table, tmp_path, fmt, route, standardize):
    path, samples_as = write_table(planted, fmt)
    many = limit_for_blocks(path, route, 12, rank=RANK, samples_as=samples_as, stored=True)
    one = rankfold.decompose(path, RANK, route=route, samples_as=samples_as, memory_limit="256MB",
                             standardize=standardize, out=str(tmp_path / "one.zarr"))
    split = rankfold.decompose(path, RANK, route=route, samples_as=samples_as, memory_limit=many,
                               standardize=standardize, out=str(tmp_path / "many.zarr"))
    assert blocks_read(one) == [1] * len(blocks_read(one))
    assert min(blocks_read(split)) >= 5, blocks_read(split)
    np.testing.assert_allclose(split.variance, one.variance, rtol=1e-12)
    np.testing.assert_allclose(split.loadings, one.loadings, rtol=0, atol=1e-12)
    np.testing.assert_allclose(split.center, one.center, rtol=1e-12)
    np.testing.assert_allclose(split.scale, one.scale, rtol=1e-12)
    np.testing.assert_allclose(split.total_variance, one.total_variance, rtol=1e-12)
    # and both are LAPACK's answer (reference: scipy.linalg.eigh on numpy.cov / numpy.corrcoef)
    values, vectors, _, _ = reference_pca(planted, RANK, standardize=standardize)
    np.testing.assert_allclose(one.variance, values, rtol=1e-10)
    np.testing.assert_allclose(one.loadings, vectors, atol=1e-8)
