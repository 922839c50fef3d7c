"""Every route, layout and format against LAPACK on the same table held in memory.

The table has a planted spectrum with a factor 4/3 between neighbouring eigenvalues, so each
eigenvector is well conditioned and can be compared one by one: eigenvalues to 1e-10 relative,
principal angles to 1e-8 radians, and signed loadings (after the documented sign rule) to 1e-8.
Streaming routes are forced to read several blocks; the test asserts the recorded block counts.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

import rankfold
from conftest import ROUTES, TABLE_FORMATS, blocks_read, limit_for_blocks, reference_pca

RANK = 5
EIG_RTOL = 1e-10
ANGLE_TOL = 1e-8


def _decompose_in_blocks(path, samples_as, route, rank, blocks=6, **kw):
    limit = limit_for_blocks(path, route, blocks, rank=rank, samples_as=samples_as)
    res = rankfold.decompose(path, rank, samples_as=samples_as, route=route, memory_limit=limit, **kw)
    assert res.route == route
    counts = blocks_read(res)  # the route's passes; the scores pass reads larger blocks
    if route != "memory":
        assert min(counts) >= 3, f"expected several blocks per pass, got {counts}"
    return res


def _assert_matches(res, ref_values, ref_vectors, ref_total, *, eig_rtol=EIG_RTOL, angle_tol=ANGLE_TOL,
                    table=None, standardize=False):
    k = ref_values.shape[0]
    if table is not None and res.scores is not None:
        # reference: scores are the centered (scaled) in-memory table times the loadings (numpy matmul)
        xs = (table - table.mean(axis=0)) / (table.std(axis=0, ddof=1) if standardize else 1.0)
        np.testing.assert_allclose(res.scores, xs @ res.loadings, atol=1e-9 * np.abs(res.scores).max(), rtol=0)
        # reference: residuals are numpy's squared norm of the table minus its rank-k reconstruction
        sumsq = np.einsum("ij,ij->i", xs, xs)
        expected = np.sum((xs - (xs @ res.loadings) @ res.loadings.T) ** 2, axis=1)
        np.testing.assert_allclose(res.residual, expected, atol=1e-10 * sumsq.max(), rtol=0)
        np.testing.assert_allclose(res.residual_fraction, expected / sumsq, atol=1e-10, rtol=0)
    assert res.loadings.shape == (ref_vectors.shape[0], k)
    # reference: LAPACK via scipy.linalg.eigh (eigenvalues of numpy.cov / numpy.corrcoef)
    np.testing.assert_allclose(res.variance, ref_values, rtol=eig_rtol, atol=0)
    np.testing.assert_allclose(res.total_variance, ref_total, rtol=eig_rtol)
    np.testing.assert_allclose(res.variance_fraction, ref_values / ref_total, rtol=eig_rtol)
    for j in range(k):
        # reference: principal angle between each component and LAPACK's, scipy.linalg.subspace_angles
        angle = scipy.linalg.subspace_angles(res.loadings[:, [j]], ref_vectors[:, [j]])[0]
        assert angle < angle_tol, f"component {j + 1}: angle {angle:.2e} to LAPACK's eigenvector"
    # the whole leading subspace as well
    assert scipy.linalg.subspace_angles(res.loadings, ref_vectors).max() < angle_tol
    # signed loadings: reference eigenvectors with the documented sign rule applied independently
    np.testing.assert_allclose(res.loadings, ref_vectors, atol=angle_tol, rtol=0)
    _assert_sign_rule(res.loadings)


def _assert_sign_rule(loadings):
    """Largest-magnitude loading of every component is positive (documented in rankfold.linalg)."""
    for j in range(loadings.shape[1]):
        col = loadings[:, j]
        assert col[np.argmax(np.abs(col))] > 0, f"component {j + 1} breaks the sign rule"


# ------------------------------------------------------------------ covariance, every layout


@pytest.mark.parametrize("route", ROUTES)
@pytest.mark.parametrize("fmt", TABLE_FORMATS)
def test_covariance_matches_lapack(planted, write_table, fmt, route):
    path, samples_as = write_table(planted, fmt)
    res = _decompose_in_blocks(path, samples_as, route, RANK)
    values, vectors, total, _ = reference_pca(planted, RANK)
    _assert_matches(res, values, vectors, total, table=planted)
    # the subtracted center is the column mean (reference: numpy.mean), scale is one
    np.testing.assert_allclose(res.center, planted.mean(axis=0), rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(res.scale, np.ones(planted.shape[1]))


@pytest.mark.parametrize("route", ROUTES)
@pytest.mark.parametrize("fmt", ["npy-rows", "zarr-columns", "parquet-file"])
def test_float32_storage_accumulates_in_float64(planted, write_table, fmt, route):
    x32 = planted.astype(np.float32)
    kw = {} if fmt.startswith("parquet") else {"dtype": np.float32}
    path, samples_as = write_table(x32, fmt, **kw)
    res = _decompose_in_blocks(path, samples_as, route, RANK)
    # reference: LAPACK (scipy.linalg.eigh) on the stored float32 values widened to float64
    x = x32.astype(np.float64)
    values, vectors, total, _ = reference_pca(x, RANK)
    _assert_matches(res, values, vectors, total, table=x)


def test_planted_spectrum_is_recovered(planted):
    """Sanity of the fixture itself: the table's covariance eigenvalues are the planted ones
    (reference: LAPACK via numpy.linalg.eigvalsh), so the gaps the other tests rely on are real."""
    w = np.linalg.eigvalsh(np.cov(planted, rowvar=False))[::-1]
    np.testing.assert_allclose(w, 100.0 * 0.75 ** np.arange(planted.shape[1]), rtol=1e-10)


# ------------------------------------------------------------------ correlation PCA


@pytest.mark.parametrize("route", ROUTES)
@pytest.mark.parametrize("fmt", ["npy-rows", "zarr-columns", "parquet-folder"])
def test_standardize_matches_corrcoef(make_planted, write_table, fmt, route):
    # unequal column spreads, so that correlation and covariance PCA really differ
    x = make_planted(300, 16, 10.0 * 0.7 ** np.arange(16), seed=7)
    x = x * np.geomspace(0.01, 100.0, 16)
    path, samples_as = write_table(x, fmt)
    res = _decompose_in_blocks(path, samples_as, route, RANK, standardize=True)
    # reference: LAPACK via scipy.linalg.eigh on numpy.corrcoef
    values, vectors, total, _ = reference_pca(x, RANK, standardize=True)
    assert np.min(values[:-1] / values[1:]) > 1.05, "the reference spectrum must have clear gaps"
    _assert_matches(res, values, vectors, total, angle_tol=1e-7, table=x, standardize=True)
    np.testing.assert_allclose(res.total_variance, x.shape[1], rtol=1e-12)  # trace of a correlation matrix
    # reference: numpy.std with ddof=1
    np.testing.assert_allclose(res.scale, x.std(axis=0, ddof=1), rtol=1e-10)


# ------------------------------------------------------------------ missing values filled with the mean


def _with_holes(x, fraction=0.05, seed=3):
    rng = np.random.default_rng(seed)
    x = np.array(x, dtype=np.float64, copy=True)
    holes = rng.random(x.shape) < fraction
    holes[0] = False  # every column keeps present values
    x[holes] = np.nan
    assert np.isnan(x).any(axis=0).all(), "every column should have a hole"
    return x


@pytest.mark.parametrize("route", ROUTES)
@pytest.mark.parametrize("fmt", ["npy-rows", "npy-columns", "zarr-columns", "parquet-file", "parquet-folder"])
@pytest.mark.parametrize("standardize", [False, True], ids=["cov", "corr"])
def test_fill_mean_matches_lapack(planted, write_table, fmt, route, standardize):
    x = _with_holes(planted)
    path, samples_as = write_table(x, fmt)
    res = _decompose_in_blocks(path, samples_as, route, RANK, missing="fill-mean", standardize=standardize)
    # reference: NaN filled with numpy.nanmean per column in memory, then LAPACK (scipy.linalg.eigh)
    values, vectors, total, filled = reference_pca(x, RANK, fill_mean=True, standardize=standardize)
    assert np.min(values[:-1] / values[1:]) > 1.05
    _assert_matches(res, values, vectors, total, angle_tol=1e-7, table=filled, standardize=standardize)
    np.testing.assert_allclose(res.center, np.nanmean(x, axis=0), rtol=1e-12, atol=1e-12)
    if route == "features":  # the column means need a pass of their own; the scores one more
        assert [p["name"] for p in res.attrs["passes"]] == ["column means", "feature Gram", "scores"]


def _genotypes(n_samples=300, n_markers=120, seed=11):
    """0/1/2 dosages of three populations of unequal size with their own allele frequencies."""
    rng = np.random.default_rng(seed)
    sizes = (150, 100, 50)
    base = rng.uniform(0.1, 0.9, n_markers)
    rows = []
    for i, size in enumerate(sizes):
        freq = np.clip(base + rng.normal(0, 0.15 * (i + 1), n_markers), 0.02, 0.98)
        rows.append(rng.binomial(2, freq, (size, n_markers)))
    g = np.concatenate(rows).astype(np.int8)
    assert g.shape == (n_samples, n_markers)
    return g


@pytest.mark.parametrize("route", ROUTES)
@pytest.mark.parametrize("samples_as", ["columns", "rows"])
def test_zarr_int8_missing_code(write_zarr, route, samples_as):
    g = _genotypes()
    rng = np.random.default_rng(5)
    coded = g.copy()
    coded[rng.random(g.shape) < 0.04] = -1
    path = write_zarr(coded, samples_as, dtype=np.int8, chunks=(16, 64) if samples_as == "columns" else (64, 16))
    rank = 2
    limit = limit_for_blocks(path, route, 5, rank=rank, samples_as=samples_as)
    res = rankfold.decompose(path, rank, samples_as=samples_as, route=route, memory_limit=limit,
                             missing="fill-mean", missing_code=-1)
    if route != "memory":
        assert min(blocks_read(res)) >= 3
    as_float = coded.astype(np.float64)
    as_float[coded == -1] = np.nan
    # reference: -1 -> NaN, NaN filled with numpy.nanmean per column, then LAPACK (scipy.linalg.eigh)
    values, vectors, total, _ = reference_pca(as_float, g.shape[1], fill_mean=True)
    assert values[0] / values[1] > 1.2 and values[1] / values[2] > 1.2, "population structure must stand out"
    _assert_matches(res, values[:rank], vectors[:, :rank], total, angle_tol=1e-7)


# ------------------------------------------------------------------ routes agree with each other


@pytest.mark.parametrize("fmt", ["npy-columns", "zarr-rows", "parquet-file"])
def test_routes_give_the_same_signed_loadings(planted, write_table, fmt):
    path, samples_as = write_table(planted, fmt)
    results = {route: _decompose_in_blocks(path, samples_as, route, RANK) for route in ROUTES}
    base = results["memory"]
    for route in ("features", "samples"):
        np.testing.assert_allclose(results[route].loadings, base.loadings, atol=1e-9, rtol=0)
        np.testing.assert_allclose(results[route].variance, base.variance, rtol=1e-11)
    for route in ("features", "samples"):
        np.testing.assert_allclose(results[route].scores, base.scores, atol=1e-8 * np.abs(base.scores).max())
        np.testing.assert_allclose(results[route].residual, base.residual, atol=1e-8 * base.residual.max())


# ------------------------------------------------------------------ facts of the trade


def _full_rank_checks(res, x, *, standardize=False):
    k = res.rank
    # common practice: loadings are orthonormal
    np.testing.assert_allclose(res.loadings.T @ res.loadings, np.eye(k), atol=1e-10)
    # common practice: variances sorted descending, non-negative
    assert np.all(np.diff(res.variance) <= 0) and res.variance[-1] >= -1e-12
    # common practice: with all components kept, fractions sum to 1 and variances to the total
    np.testing.assert_allclose(res.variance_fraction.sum(), 1.0, rtol=1e-10)
    np.testing.assert_allclose(res.variance.sum(), res.total_variance, rtol=1e-10)
    # reference: total variance is the trace of numpy.cov / numpy.corrcoef
    c = np.corrcoef(x, rowvar=False) if standardize else np.cov(x, rowvar=False)
    np.testing.assert_allclose(res.total_variance, np.trace(c), rtol=1e-10)
    if res.scores is not None:
        s = res.scores
        assert s.shape == (x.shape[0], k)
        # common practice: with every component kept the reconstruction is exact, so no residual is left
        xc0 = (x - x.mean(axis=0)) / (x.std(axis=0, ddof=1) if standardize else 1.0)
        assert np.all(res.residual <= 1e-10 * np.einsum("ij,ij->i", xc0, xc0).max())
        # common practice: scores are uncorrelated, with variances equal to the component variances
        cov_s = np.cov(s, rowvar=False)
        scale = res.variance[0]
        np.testing.assert_allclose(np.diag(cov_s), res.variance, atol=1e-9 * scale, rtol=1e-9)
        off = cov_s - np.diag(np.diag(cov_s))
        assert np.abs(off).max() < 1e-9 * scale
        # common practice: scores are the centered (scaled) table times the loadings (numpy matmul)
        xc = (x - x.mean(axis=0)) / (x.std(axis=0, ddof=1) if standardize else 1.0)
        np.testing.assert_allclose(s, xc @ res.loadings, atol=1e-9 * np.abs(s).max())


@pytest.mark.parametrize("route", ROUTES)
@pytest.mark.parametrize("standardize", [False, True], ids=["cov", "corr"])
def test_all_components_tall_table(planted, write_npy, route, standardize):
    path = write_npy(planted)
    m = planted.shape[1]
    res = _decompose_in_blocks(path, "rows", route, m, standardize=standardize)
    _full_rank_checks(res, planted, standardize=standardize)
    assert res.scores is not None  # every route writes scores unless asked not to
    # reference: LAPACK via scipy.linalg.eigh, every eigenvalue
    values, vectors, total, _ = reference_pca(planted, m, standardize=standardize)
    np.testing.assert_allclose(res.variance, values, rtol=1e-9)
    if not standardize:
        np.testing.assert_allclose(res.loadings, vectors, atol=1e-8)


@pytest.mark.parametrize("route", ROUTES)
def test_all_components_wide_table(write_zarr, route):
    """Fewer samples than features: rank n-1 is everything there is (the centered table has rank n-1)."""
    rng = np.random.default_rng(42)
    n, m = 40, 120
    x = rng.standard_normal((n, m)) * np.linspace(3.0, 0.5, m) + rng.normal(0, 2, m)
    path = write_zarr(x, "columns", chunks=(16, 40))
    res = _decompose_in_blocks(path, "columns", route, n - 1)
    _full_rank_checks(res, x)
    # reference: LAPACK gesdd via numpy.linalg.svd of the centered table
    s = np.linalg.svd(x - x.mean(axis=0), compute_uv=False)
    np.testing.assert_allclose(res.variance, s[: n - 1] ** 2 / (n - 1), rtol=1e-9)


def _rank_deficient_tables():
    """Tables whose centered rank is below the rank asked for (both cases the API accepts)."""
    from conftest import planted_table

    for seed in range(3, 7):  # wide: n <= m, so the centered table has rank n - 1 < n
        rng = np.random.default_rng(seed)
        n, m = 30, 80
        yield f"wide-{seed}", rng.standard_normal((n, m)) * rng.uniform(0.5, 3, m) + rng.normal(0, 50, m), n
    x = planted_table(300, 12, seed=1)
    yield "duplicated-column", np.column_stack([x, x[:, 0]]), 13  # a feature recorded twice


@pytest.mark.parametrize("route", ROUTES)
def test_rank_beyond_the_data_rank_keeps_loadings_orthonormal(write_npy, route):
    """Asking for more components than the centered table's rank (allowed: rank <= min(n, m)).

    Either the route refuses with a DataError, or every returned loading column must still be a
    unit vector orthogonal to the others, as the Result documents, with a variance of about zero.
    """
    for label, x, rank in _rank_deficient_tables():
        path = write_npy(x)
        try:
            res = rankfold.decompose(path, rank, route=route, memory_limit="64MB")
        except rankfold.DataError as exc:
            assert "rank" in str(exc)
            continue
        # common practice: loadings orthonormal whatever the spectrum
        gram = res.loadings.T @ res.loadings
        assert np.abs(gram - np.eye(rank)).max() < 1e-8, (
            f"{label}: loadings not orthonormal; column norms "
            f"{np.linalg.norm(res.loadings, axis=0)[-2:]}")
        # reference: LAPACK gesdd via numpy.linalg.svd - the last singular value is (about) zero
        s = np.linalg.svd(x - x.mean(axis=0), compute_uv=False)
        assert abs(res.variance[-1]) <= 1e-12 * res.variance[0] + s[rank - 1] ** 2 / (len(x) - 1)
