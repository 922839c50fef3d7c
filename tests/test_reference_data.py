"""Published reference data: Fisher's iris and the UCI handwritten digits bundled with scikit-learn.

Two outside references: the widely published iris PCA figures (values from memory, compared
at the rounding they are published with) and scikit-learn's PCA with the full LAPACK SVD.
Both data sets ship inside scikit-learn (``load_iris``, ``load_digits``): no download.
"""

from __future__ import annotations

import numpy as np
import pytest

import rankfold
from conftest import ROUTES, blocks_read, limit_for_blocks

IRIS_COLUMNS = ["sepal_length", "sepal_width", "petal_length", "petal_width"]


def _digits_names():
    return [f"pixel_{i // 8}_{i % 8}" for i in range(64)]


def _run(path, route, rank, blocks=4, **kw):
    limit = limit_for_blocks(path, route, blocks, rank=rank)
    res = rankfold.decompose(path, rank, route=route, memory_limit=limit, **kw)
    assert res.route == route
    if route != "memory":
        assert min(blocks_read(res)) >= 2, blocks_read(res)
    return res


def _match_up_to_sign(ours, theirs, atol):
    """Columns of ``ours`` equal the rows of sklearn's ``components_`` up to one sign per component."""
    for j in range(ours.shape[1]):
        sign = np.sign(ours[:, j] @ theirs[j])
        np.testing.assert_allclose(ours[:, j], sign * theirs[j], atol=atol, rtol=0,
                                   err_msg=f"component {j + 1}")


# ------------------------------------------------------------------ iris: published figures


@pytest.mark.parametrize("route", ROUTES)
def test_iris_covariance_eigenvalues_published(iris, write_parquet, route):
    path = write_parquet(iris, row_group_size=40, names=IRIS_COLUMNS)
    res = _run(path, route, 4)
    # reference: iris covariance-matrix eigenvalues 4.228, 0.243, 0.078, 0.024, widely published
    # in PCA tutorials and textbooks (from memory), compared at their 3-decimal rounding
    published = np.array([4.228, 0.243, 0.078, 0.024])
    np.testing.assert_allclose(res.variance, published, atol=0.0005 + 1e-12, rtol=0)
    assert list(res.feature_names) == IRIS_COLUMNS
    # reference: iris "total variance" 4.573 (sum of the four sample variances; from memory)
    np.testing.assert_allclose(res.total_variance, 4.573, atol=0.0005)
    # reference: the first axis is dominated by petal length, loading about 0.857 (from memory)
    assert abs(res.loadings[2, 0] - 0.857) < 0.0005


@pytest.mark.parametrize("route", ROUTES)
def test_iris_correlation_variance_fractions_published(iris, write_parquet, route):
    path = write_parquet(iris, row_group_size=40, names=IRIS_COLUMNS)
    res = _run(path, route, 4, standardize=True)
    # reference: correlation-PCA explained variance of iris 72.96%, 22.85%, 3.67%, 0.52%,
    # widely published (from memory), compared at their 2-decimal rounding
    published = np.array([72.96, 22.85, 3.67, 0.52])
    np.testing.assert_allclose(100 * res.variance_fraction, published, atol=0.005 + 1e-10, rtol=0)
    np.testing.assert_allclose(res.total_variance, 4.0, rtol=1e-12)


# ------------------------------------------------------------------ iris: scikit-learn


@pytest.mark.parametrize("route", ROUTES)
def test_iris_against_sklearn_pca(iris, write_parquet_folder, route):
    from sklearn.decomposition import PCA
    from sklearn.preprocessing import StandardScaler

    path = write_parquet_folder(iris, files=3, row_group_size=20, names=IRIS_COLUMNS)
    res = _run(path, route, 4)
    # reference: scikit-learn PCA(svd_solver="full") (LAPACK gesdd), explained_variance_ (ddof=1)
    pca = PCA(svd_solver="full").fit(iris)
    np.testing.assert_allclose(res.variance, pca.explained_variance_, rtol=1e-10)
    np.testing.assert_allclose(res.variance_fraction, pca.explained_variance_ratio_, rtol=1e-10)
    _match_up_to_sign(res.loadings, pca.components_, atol=1e-9)
    np.testing.assert_allclose(res.center, pca.mean_, rtol=1e-13)
    if res.scores is not None:
        # reference: sklearn's transform, up to the same per-component signs
        signs = np.sign(np.sum(res.loadings * pca.components_.T, axis=0))
        np.testing.assert_allclose(res.scores, pca.transform(iris) * signs, atol=1e-9)

    std = _run(path, route, 4, standardize=True)
    # reference: scikit-learn StandardScaler + PCA; the ratios do not depend on ddof
    pca_c = PCA(svd_solver="full").fit(StandardScaler().fit_transform(iris))
    np.testing.assert_allclose(std.variance_fraction, pca_c.explained_variance_ratio_, rtol=1e-10)
    _match_up_to_sign(std.loadings, pca_c.components_, atol=1e-9)


# ------------------------------------------------------------------ digits: scikit-learn, constant pixels


@pytest.fixture(scope="module")
def digits_sklearn(digits):
    from sklearn.decomposition import PCA

    return PCA(n_components=10, svd_solver="full").fit(digits)


@pytest.mark.parametrize("route", ["memory", "features"])
def test_digits_covariance_against_sklearn(digits, digits_sklearn, write_parquet, route):
    assert np.flatnonzero(digits.std(axis=0) == 0).tolist() == [0, 32, 39]  # constant pixels
    path = write_parquet(digits, row_group_size=300, names=_digits_names())
    res = _run(path, route, 10, blocks=6)
    pca = digits_sklearn
    # reference: scikit-learn PCA(svd_solver="full") on the in-memory digits
    np.testing.assert_allclose(res.variance, pca.explained_variance_, rtol=1e-10)
    np.testing.assert_allclose(res.variance_fraction, pca.explained_variance_ratio_, rtol=1e-10)
    _match_up_to_sign(res.loadings, pca.components_, atol=1e-8)
    # constant pixels get zero loading on every component and keep scale 1
    np.testing.assert_allclose(res.loadings[[0, 32, 39]], 0.0, atol=1e-12)
    np.testing.assert_array_equal(res.scale, np.ones(64))


def test_digits_samples_route_against_sklearn(digits, write_npy):
    from sklearn.decomposition import PCA

    x = digits[:400]
    path = write_npy(x)
    res = _run(path, "samples", 8, blocks=5)
    # reference: scikit-learn PCA(svd_solver="full") on the same 400 digits
    pca = PCA(n_components=8, svd_solver="full").fit(x)
    np.testing.assert_allclose(res.variance, pca.explained_variance_, rtol=1e-10)
    _match_up_to_sign(res.loadings, pca.components_, atol=1e-8)


@pytest.mark.parametrize("route", ROUTES)
def test_digits_standardize_refuses_constant_pixels(digits, write_parquet, route):
    path = write_parquet(digits, row_group_size=300, names=_digits_names())
    with pytest.raises(rankfold.DataError) as info:
        rankfold.decompose(path, 5, route=route, standardize=True, memory_limit="200MB")
    message = str(info.value)
    assert "constant" in message
    assert "pixel_0_0" in message  # the first constant column is named
