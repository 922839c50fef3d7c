"""The randomized route (``route="sketch"``) against theory and against LAPACK.

Sections (issue text in brackets):

1. Expected-error bounds of Halko, Martinsson and Tropp (2011), "Finding structure with
   randomness", SIAM Review 53(2), on tables with planted singular values: Theorem 10.5
   (Frobenius norm, no power iteration) and Corollary 10.10 (spectral norm, q power
   iterations), averaged over 20 seeds.  Also: the route's basis *is* their Algorithm 4.4 run
   in memory on the same Gaussian test matrix.
2. Eigenvalues and principal angles against LAPACK (``scipy.linalg.eigh`` of ``numpy.cov``) for
   the subspace and block Krylov kinds, both storage orientations, npy / Zarr / Parquet, with
   ``standardize`` and with ``missing="fill-mean"``; the one-pass kind on a fast-decaying
   spectrum with a looser, stated tolerance.
3. The a posteriori estimate ``attrs["error_bound"]`` (Halko et al. 2011, sec. 4.3, eq. 4.3)
   against the true value it bounds, in 50 seeded trials.
4. Halko et al. (2011) Remark 4.3: un-normalized power iteration loses the small components in
   floating point; the route (which re-orthonormalizes every iteration) keeps them.
5. Reproducibility: same seed -> bitwise the same; block size does not matter beyond 1e-10;
   another seed -> a different but equally accurate result.

How the route's ``power_iterations`` q maps onto Halko's q
-----------------------------------------------------------
``routes/sketch.py::_iterate`` does ``Q = orth(Omega)``, then q times ``Q = orth(C Q)``, then one
Rayleigh-Ritz pass with ``C Q``.  Samples as rows: ``C = Xc^T Xc`` (feature space, ``Omega`` is
m x l), so ``range(Q) = range((Xc^T Xc)^q Omega)`` and therefore
``range(Xc Q) = range((Xc Xc^T)^q Xc Omega)``: exactly the range of Halko's Algorithm 4.4 with q
iterations applied to ``A = Xc`` (they form ``(A A^T)^q A Omega``).  Samples as columns:
``C = Xc Xc^T`` (sample space, ``Omega`` is n x l) and by the same argument the range of
``Xc^T Q`` -- which is what the loadings pass returns -- is Algorithm 4.4 with q iterations
applied to ``A = Xc^T``.  So the route's q is Halko's q; the bound is checked on
``||(I - P) A||`` with ``P`` the projector onto that range, computed in memory from the result.

Exposing the full basis
-----------------------
Halko's bounds are about the whole basis of width ``l = k + p``, while a run with
``rank=k, oversample=p`` returns only its top k Ritz vectors.  The test matrix is drawn as one
``(size, l + TEST_VECTORS)`` Gaussian block from the seed (``randomized.random_test_matrix``),
so a run with ``rank=l, oversample=0`` draws the *same* ``Omega`` and the same test vectors,
iterates the same basis, and returns all l Ritz vectors, which span it.
``test_full_width_run_is_the_oversampled_run`` checks that the two runs agree (top k components
to round-off, the error bound exactly), so the other tests may use the full-width run.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

import rankfold
from conftest import planted_table, reference_pca
from rankfold.machine import MachineSpeed
from rankfold.randomized import TEST_VECTORS
from rankfold.routes import sketch as sketch_route
from rankfold.sources import open_source

pytestmark = pytest.mark.usefixtures("one_blas_thread")

# Given machine speeds: the plan is only used to pick "sketch" here, so no probe is needed.
SPEED = MachineSpeed(3e8, 2e10, 2, "given")
ORIENTATIONS = ("rows", "columns")
EPS = np.finfo(float).eps


# ------------------------------------------------------------------ helpers


def planted_svd(n: int, m: int, singular, *, seed: int, offset_scale: float = 5.0):
    """``X = U diag(s) V^T + 1 c^T``: the centered table has singular values exactly ``s``.

    ``U`` (n x r) comes from the QR of centered Gaussians, so its columns are orthonormal *and*
    orthogonal to the ones vector; the column means of X are then exactly the offset ``c``, and
    centering X gives back ``U diag(s) V^T`` (up to rounding), whose covariance has eigenvalues
    ``s**2 / (n - 1)``.  Returns ``(x, xc)`` with ``xc`` centered numerically, as the route sees it.
    """
    rng = np.random.default_rng(seed)
    s = np.asarray(singular, dtype=float)
    r = len(s)
    g = rng.standard_normal((n, r))
    g -= g.mean(axis=0)
    u, _ = np.linalg.qr(g)
    v, _ = np.linalg.qr(rng.standard_normal((m, r)))
    x = (u * s) @ v.T + rng.normal(0.0, offset_scale, m)
    return x, x - x.mean(axis=0)


def run_sketch(path, rank, samples_as="rows", **kw):
    kw.setdefault("route", "sketch")
    result = rankfold.decompose(path, rank, samples_as=samples_as, speed=SPEED, **kw)
    assert result.route == "sketch"
    return result


def spectral_norm(a: np.ndarray) -> float:
    """Largest singular value (LAPACK gesdd via scipy.linalg.svdvals)."""
    return float(scipy.linalg.svdvals(a)[0])


def orth(a: np.ndarray) -> np.ndarray:
    return np.linalg.qr(a)[0]


def halko_residual(result, xc: np.ndarray, samples_as: str) -> np.ndarray:
    """``(I - P) A`` for Halko's ``A`` and the range ``P`` projects on (see the module docstring).

    Rows: ``A = Xc`` and ``P`` projects onto ``range(Xc V)``.  Columns: ``A = Xc^T`` and ``P``
    projects onto ``range(V)`` (the loadings), i.e. ``(I - P) A = (Xc - Xc V V^T)^T``.
    """
    v = result.loadings
    if samples_as == "rows":
        q = orth(xc @ v)
        return xc - q @ (q.T @ xc)
    return xc - (xc @ v) @ v.T


# Halko, Martinsson and Tropp (2011), Theorem 10.5 (q = 0, Frobenius norm):
#   E ||A - Q Q^T A||_F <= (1 + k / (p - 1))^(1/2) (sum_{j>k} sigma_j^2)^(1/2)
def halko_frobenius_bound(s, k, p):
    return math.sqrt(1 + k / (p - 1)) * math.sqrt(float(np.sum(s[k:] ** 2)))


# Halko, Martinsson and Tropp (2011), Corollary 10.10 (spectral norm, q power iterations):
#   E ||(I - Q Q^T) A|| <= [ (1 + sqrt(k/(p-1))) sigma_{k+1}^(2q+1)
#                            + e sqrt(k+p)/p (sum_{j>k} sigma_j^(2(2q+1)))^(1/2) ]^(1/(2q+1))
def halko_spectral_bound(s, k, p, q):
    e = 2 * q + 1
    inner = ((1 + math.sqrt(k / (p - 1))) * s[k] ** e
             + math.e * math.sqrt(k + p) / p * math.sqrt(float(np.sum(s[k:] ** (2 * e)))))
    return inner ** (1 / e)


# Two planted spectra of a 400 x 100 table: polynomial decay 1/j and the slower 1/sqrt(j).
HALKO_N, HALKO_M, HALKO_K, HALKO_P = 400, 100, 10, 5
HALKO_SPECTRA = {
    "1/j": 1.0 / np.arange(1, HALKO_M + 1),
    "1/sqrt(j)": 1.0 / np.sqrt(np.arange(1, HALKO_M + 1)),
}
HALKO_SEEDS = range(20)


@pytest.fixture(scope="module")
def halko_tables(tmp_path_factory):
    """The planted tables, written once as .npy in both orientations."""
    folder = tmp_path_factory.mktemp("halko")
    tables = {}
    for i, (name, s) in enumerate(HALKO_SPECTRA.items()):
        x, xc = planted_svd(HALKO_N, HALKO_M, s, seed=100 + i)
        paths = {}
        for samples_as in ORIENTATIONS:
            paths[samples_as] = str(folder / f"halko{i}-{samples_as}.npy")
            np.save(paths[samples_as], np.ascontiguousarray(x if samples_as == "rows" else x.T))
        tables[name] = (s, xc, paths)
    return tables


# ------------------------------------------------------------------ 1. Halko et al. (2011), section 10


def test_planted_singular_values_are_exact(halko_tables):
    # reference: LAPACK gesdd (scipy.linalg.svdvals) of the numerically centered table: the
    # planted spectrum survives the constant column offset, so the bounds below may use it.
    for s, xc, _paths in halko_tables.values():
        np.testing.assert_allclose(scipy.linalg.svdvals(xc), s, rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("samples_as", ORIENTATIONS)
@pytest.mark.parametrize("q", [0, 2])
def test_full_width_run_is_the_oversampled_run(halko_tables, samples_as, q):
    # reference: randomized.random_test_matrix draws Omega and the test vectors as one block
    # from the seed, so rank=l, oversample=0 iterates the very basis of rank=k, oversample=p.
    _s, _xc, paths = halko_tables["1/j"]
    k, p = HALKO_K, HALKO_P
    full = run_sketch(paths[samples_as], k + p, samples_as, oversample=0, power_iterations=q, seed=7)
    top = run_sketch(paths[samples_as], k, samples_as, oversample=p, power_iterations=q, seed=7)
    np.testing.assert_allclose(full.variance[:k], top.variance, rtol=1e-13)
    np.testing.assert_allclose(full.loadings[:, :k], top.loadings, atol=1e-12)
    # the full-width run returns the whole basis, so its bound on the returned components is the
    # oversampled run's bound on its basis
    np.testing.assert_allclose(full.attrs["error_bound"]["spectral_norm"],
                               top.attrs["error_bound"]["basis_spectral_norm"], rtol=1e-12)


@pytest.mark.parametrize("samples_as", ORIENTATIONS)
@pytest.mark.parametrize("q", [0, 1, 2])
def test_basis_is_halko_algorithm_4_4_in_memory(halko_tables, samples_as, q):
    # reference: Halko et al. (2011) Algorithm 4.4 (randomized subspace iteration) written here in
    # numpy on the in-memory centered table, with the Gaussian test matrix drawn as the route
    # documents it (numpy default_rng(seed), one (size, l + 10) block, first l columns).
    s, xc, paths = halko_tables["1/sqrt(j)"]
    n, m = xc.shape
    l, seed = HALKO_K + HALKO_P, 11
    result = run_sketch(paths[samples_as], l, samples_as, oversample=0, power_iterations=q, seed=seed)
    a = xc if samples_as == "rows" else xc.T
    omega = np.random.default_rng(seed).standard_normal((a.shape[1], l + TEST_VECTORS))[:, :l]
    y = a @ omega
    for _ in range(q):  # Algorithm 4.4, steps 3-6: re-orthonormalize on both sides
        w = orth(a.T @ orth(y))
        y = a @ w
    expected = orth(y)
    got = orth(xc @ result.loadings) if samples_as == "rows" else result.loadings
    assert np.max(scipy.linalg.subspace_angles(got, expected)) < 1e-9


@pytest.mark.parametrize("spectrum", list(HALKO_SPECTRA))
@pytest.mark.parametrize("samples_as", ORIENTATIONS)
def test_frobenius_error_within_halko_theorem_10_5(halko_tables, spectrum, samples_as):
    # reference: Halko, Martinsson and Tropp (2011), Theorem 10.5 (q = 0); lower bound by
    # Eckart-Young-Mirsky (no rank-l projection does better than the discarded tail).
    s, xc, paths = halko_tables[spectrum]
    k, p = HALKO_K, HALKO_P
    errors = []
    for seed in HALKO_SEEDS:
        result = run_sketch(paths[samples_as], k + p, samples_as, oversample=0, power_iterations=0, seed=seed)
        errors.append(np.linalg.norm(halko_residual(result, xc, samples_as)))
    optimal = math.sqrt(float(np.sum(s[k + p:] ** 2)))
    assert min(errors) >= optimal * (1 - 1e-10)
    # The theorem bounds the expectation; slack factor 1.0.  Over these 20 seeds the standard
    # error of the mean was 0.3-1.6% of the mean when this test was written, and the mean sat at
    # 0.61-0.68 of the bound, so a mean above the bound means a worse basis, not bad luck.
    bound = halko_frobenius_bound(s, k, p)
    assert np.mean(errors) <= 1.0 * bound, (np.mean(errors), bound)


@pytest.mark.parametrize("spectrum", list(HALKO_SPECTRA))
@pytest.mark.parametrize("samples_as", ORIENTATIONS)
@pytest.mark.parametrize("q", [0, 1, 2])
def test_spectral_error_within_halko_corollary_10_10(halko_tables, spectrum, samples_as, q):
    # reference: Halko, Martinsson and Tropp (2011), Corollary 10.10; lower bound sigma_{l+1}
    # by Eckart-Young-Mirsky.
    s, xc, paths = halko_tables[spectrum]
    k, p = HALKO_K, HALKO_P
    errors = []
    for seed in HALKO_SEEDS:
        result = run_sketch(paths[samples_as], k + p, samples_as, oversample=0, power_iterations=q, seed=seed)
        errors.append(spectral_norm(halko_residual(result, xc, samples_as)))
    assert min(errors) >= s[k + p] * (1 - 1e-10)
    # Slack factor 1.0 on a bound on the expectation, as above: over 20 seeds the standard error
    # was at most 5% of the mean and the mean at most 0.66 of the bound.  Without the power
    # iterations the q = 2 bound would fail (the q = 0 mean is 1.2-1.3x the q = 2 bound on 1/j).
    bound = halko_spectral_bound(s, k, p, q)
    assert np.mean(errors) <= 1.0 * bound, (np.mean(errors), bound)


def test_power_iterations_tighten_the_error(halko_tables):
    # reference: Halko et al. (2011) sec. 4.5 / Corollary 10.10: the bound falls with q, and on a
    # slowly decaying spectrum so does the mean error (same 20 seeds for every q).
    s, xc, paths = halko_tables["1/sqrt(j)"]
    l = HALKO_K + HALKO_P
    means = []
    for q in (0, 1, 2):
        errors = [spectral_norm(halko_residual(
            run_sketch(paths["rows"], l, oversample=0, power_iterations=q, seed=seed), xc, "rows"))
            for seed in range(8)]
        means.append(np.mean(errors))
    assert means[0] > means[1] > means[2] >= s[l]


# ------------------------------------------------------------------ 2. against LAPACK


LAPACK_FORMATS = ("npy-rows", "npy-columns", "zarr-rows", "zarr-columns", "parquet-file")
LAPACK_RANK = 4
# Planted spectrum 100 * 0.6**j on 400 x 60, k = 4, l = 14, q = 2.  Subspace iteration gains a
# factor lambda_{l+1} / lambda_k = 0.6**10 = 6e-3 per application of C (Golub and Van Loan,
# "Matrix Computations", 4th ed., sec. 8.2.4, orthogonal iteration; Halko et al. 2011 sec. 4.5),
# so after the q + 1 applications the errors are of order 1e-7 (angles) and below (eigenvalues,
# which converge at twice the rate), times constants that depend on Omega.  The results are
# deterministic for the default seed; the worst seen over all formats and options was 2.3e-7
# (variance) and 1.2e-4 rad for subspace, 1.3e-8 and 1.5e-5 rad for Krylov (the fill-mean and
# standardized tables have spectra near, not exactly, the planted one).  The tolerances sit
# 5-10x above those, far below the 1e-3 or more that a centering, scaling or (n - 1) mistake makes.
TOLERANCE = {"subspace": {"variance": 1e-6, "angle": 1e-3},
             "krylov": {"variance": 1e-7, "angle": 1e-4}}


@pytest.fixture(scope="module")
def lapack_table():
    x = planted_table(400, 60, 100.0 * 0.6 ** np.arange(60), seed=5)
    holes = x.copy()
    holes[np.random.default_rng(1).random(x.shape) < 0.02] = np.nan
    return x, holes


def _check_against_lapack(result, x, k, *, standardize, fill, variance_rtol, angle_tol):
    # reference: reference_pca = LAPACK syevd (scipy.linalg.eigh) of numpy.cov / numpy.corrcoef
    # of the in-memory table, missing values filled with numpy.nanmean first.
    values, vectors, total, filled = reference_pca(x, k, standardize=standardize, fill_mean=fill)
    np.testing.assert_allclose(result.variance, values, rtol=variance_rtol)
    assert np.max(scipy.linalg.subspace_angles(result.loadings, vectors)) < angle_tol
    np.testing.assert_allclose(result.loadings.T @ result.loadings, np.eye(k), atol=1e-12)
    # reference: numpy.mean / numpy.std(ddof=1) of the filled table.
    np.testing.assert_allclose(result.center, filled.mean(axis=0), rtol=1e-12, atol=1e-12)
    scale = filled.std(axis=0, ddof=1) if standardize else np.ones(x.shape[1])
    np.testing.assert_allclose(result.scale, scale, rtol=1e-12)
    assert result.total_variance == pytest.approx(total, rel=1e-12)
    np.testing.assert_allclose(result.variance_fraction, result.variance / total, rtol=1e-12)


@pytest.mark.parametrize("option", ["plain", "standardize", "fill-mean"])
@pytest.mark.parametrize("kind", ["subspace", "krylov"])
@pytest.mark.parametrize("fmt", LAPACK_FORMATS)
def test_matches_lapack(lapack_table, write_table, fmt, kind, option):
    x, holes = lapack_table
    data = holes if option == "fill-mean" else x
    path, samples_as = write_table(data, fmt)
    result = run_sketch(path, LAPACK_RANK, samples_as, sketch=kind, standardize=option == "standardize",
                        missing="fill-mean" if option == "fill-mean" else "refuse")
    assert result.attrs["sketch"] == {"kind": kind}
    _check_against_lapack(result, data, LAPACK_RANK, standardize=option == "standardize",
                          fill=option == "fill-mean", variance_rtol=TOLERANCE[kind]["variance"],
                          angle_tol=TOLERANCE[kind]["angle"])


# One-pass (Tropp, Yurtsever, Udell and Cevher 2017, Algorithm 3) has no power iteration, so its
# accuracy follows the spectrum's decay alone.  On a spectrum halving per component (400 x 60,
# k = 4, l = 14: lambda_15 / lambda_4 = 2**-11) the stated tolerance is 1% on the variances and
# 0.01 rad on the angles (observed: at most 0.12% and 1.1e-3 rad), against 1e-6 and 1e-3 for the
# iterative kinds.  A Nystrom approximation never exceeds the matrix in the psd order (its residual
# is a Schur complement; Tropp et al. 2017, sec. 2), so by Weyl's monotonicity the variances may not
# exceed LAPACK's.
# (Standardizing in one pass works only for samples stored as columns; on rows it is refused,
# see test_sketch_bad_input.py.)
@pytest.mark.parametrize("fmt,standardize", [(f, False) for f in LAPACK_FORMATS]
                         + [("npy-columns", True), ("zarr-columns", True)])
def test_one_pass_matches_lapack_on_fast_decay(write_table, fmt, standardize):
    x = planted_table(400, 60, 100.0 * 0.5 ** np.arange(60), seed=8)
    path, samples_as = write_table(x, fmt)
    result = run_sketch(path, LAPACK_RANK, samples_as, sketch="one-pass", standardize=standardize)
    _check_against_lapack(result, x, LAPACK_RANK, standardize=standardize, fill=False,
                          variance_rtol=1e-2, angle_tol=1e-2)
    values = reference_pca(x, LAPACK_RANK, standardize=standardize)[0]
    assert np.all(result.variance <= values * (1 + 1e-9))
    # rows: the one pass, then one for the scores (routes/scores.py); columns: the loadings pass
    expected_passes = ["one-pass sketch", "scores"] if samples_as == "rows" else ["one-pass sketch", "loadings"]
    assert [p["name"] for p in result.attrs["passes"]] == expected_passes


def test_krylov_is_more_accurate_than_subspace_at_equal_passes(lapack_table, write_npy):
    # reference: Musco and Musco (2015), "Randomized block Krylov methods ...", NeurIPS: the
    # Krylov space contains the subspace-iteration space, so its Rayleigh-Ritz values are at
    # least as good (Courant-Fischer); both use the same passes.
    x, _ = lapack_table
    path = write_npy(x)
    values = reference_pca(x, LAPACK_RANK)[0]
    sub = run_sketch(path, LAPACK_RANK, sketch="subspace")
    kry = run_sketch(path, LAPACK_RANK, sketch="krylov")
    # q + 1 passes: the moments ride along with the first power iteration (sketch.fuses_moments)
    assert len(sub.attrs["passes"]) == len(kry.attrs["passes"]) == 2 + 1
    assert np.all(kry.variance >= sub.variance * (1 - 1e-14))
    assert np.all(values - kry.variance <= values - sub.variance + 1e-12 * values)


def _fast_decay_table():
    """400 x 60: eight components with variances 1, 0.1, ..., 1e-7 over a floor of 1e-8."""
    n, m = 400, 60
    lam = np.r_[10.0 ** -np.arange(8), np.full(m - 8, 1e-8)]
    return planted_svd(n, m, np.sqrt(lam * (n - 1)), seed=3, offset_scale=1.0)[0]


@pytest.mark.parametrize("case,samples_as", [("24-features", "rows"), ("24-features", "columns"),
                                             ("fast-decay", "rows")])
def test_krylov_basis_wider_than_the_data(make_planted, write_npy, case, samples_as):
    # The block Krylov basis has (k + p)(q + 1) columns: 14 * 3 = 42 with k = 4 and the defaults.
    # "24-features": more than the 24 features of the standard table (and than the rank, 24, of its
    # centered sample Gram).  "fast-decay": fewer than the 60 features, but the spectrum spans
    # eight decades, so the later Krylov blocks are numerically inside the earlier ones.
    # reference: LAPACK (reference_pca).  Rayleigh-Ritz values on an orthonormal basis never
    # exceed the eigenvalues (Courant-Fischer / Cauchy interlacing), loadings are orthonormal by
    # the documented contract (result.py: "Orthonormal columns"), and a Krylov space that holds
    # the leading eigenvectors gives their eigenvalues to high accuracy.
    x = make_planted(300, 24, seed=20240611) if case == "24-features" else _fast_decay_table()
    path = write_npy(x, samples_as)
    result = run_sketch(path, LAPACK_RANK, samples_as, sketch="krylov")
    values, vectors, _total, _ = reference_pca(x, LAPACK_RANK)
    np.testing.assert_allclose(result.loadings.T @ result.loadings, np.eye(LAPACK_RANK), atol=1e-12)
    assert np.all(result.variance <= values * (1 + 1e-9)), (result.variance, values)
    np.testing.assert_allclose(result.variance, values, rtol=1e-7)
    assert np.max(scipy.linalg.subspace_angles(result.loadings, vectors)) < 1e-4


# ------------------------------------------------------------------ 3. the a posteriori estimate


BOUND_TRIALS = range(50)


def _operator_and_basis(result, xc, samples_as):
    """The covariance operator the route iterates on, in variance units, and the full basis.

    Rows: ``C = Xc^T Xc / (n - 1)`` (m x m) and the basis spanned by the l loadings of the
    full-width run.  Columns: ``G = Xc Xc^T / (n - 1)`` (n x n) and the basis spanned by the l
    scores (Ritz vectors times singular values).  Returned as a factor ``F`` with
    ``operator = F F^T`` so that norms are taken on n x m matrices, never n x n.
    """
    n = xc.shape[0]
    if samples_as == "rows":
        return xc.T / math.sqrt(n - 1), result.loadings
    return xc / math.sqrt(n - 1), orth(result.scores)


def _residual_norm(factor, basis):
    """``||(I - Q Q^T) F F^T||`` without forming ``F F^T``: with the thin QR ``F = W R``,
    ``(I - Q Q^T) F F^T = (I - Q Q^T) F R^T W^T`` and ``W`` has orthonormal columns."""
    _w, r = np.linalg.qr(factor)
    left = factor - basis @ (basis.T @ factor)
    return spectral_norm(left @ r.T)


@pytest.mark.parametrize("samples_as", ORIENTATIONS)
def test_error_bound_holds_for_the_subspace_basis(halko_tables, samples_as):
    # reference: Halko et al. (2011) sec. 4.3, eq. (4.3): with r = 10 Gaussian test vectors,
    # ||(I - Q Q^T) C|| <= 10 sqrt(2/pi) max_i ||(I - Q Q^T) C w_i|| with probability at least
    # 1 - 10**-10, so it must hold in every one of 50 trials.  The true left side is computed in
    # memory from the basis the full-width run exposes (see the module docstring).
    _s, xc, paths = halko_tables["1/j"]
    l = HALKO_K + HALKO_P
    ratios = []
    for seed in BOUND_TRIALS:
        result = run_sketch(paths[samples_as], l, samples_as, oversample=0, seed=seed)
        bound = result.attrs["error_bound"]
        assert bound["probability"] == 1 - 1e-10 and bound["test_vectors"] == TEST_VECTORS
        factor, basis = _operator_and_basis(result, xc, samples_as)
        ratios.append(bound["spectral_norm"] / _residual_norm(factor, basis))
    assert min(ratios) >= 1.0, min(ratios)


def _krylov_basis(operator_factor, omega, q):
    """Block Krylov space [Q0, C Q0, ..., C^q Q0] (Musco and Musco 2015), orthonormalized with
    two rounds of block Gram-Schmidt and QR, in memory."""
    c = operator_factor @ operator_factor.T
    blocks = [orth(omega)]
    for _ in range(q):
        z = c @ blocks[-1]
        done = np.hstack(blocks)
        for _ in range(2):
            z = z - done @ (done.T @ z)
        blocks.append(orth(z))
    return np.hstack(blocks)


@pytest.mark.parametrize("samples_as", ORIENTATIONS)
def test_error_bound_holds_for_the_krylov_basis(halko_tables, samples_as):
    # reference: Halko et al. (2011) eq. (4.3) as above.  The Krylov basis is (k+p)(q+1) wide and a
    # run returns at most k + p Ritz vectors from it, so the basis is rebuilt in memory from the
    # documented draw of Omega; the returned Ritz vectors must lie in it (checked, 1e-9), which
    # validates the rebuild.  Independent of the rebuild, the bound must also exceed
    # lambda_{d+1} (d = basis width), which no d-dimensional basis can beat (Eckart-Young-Mirsky):
    # a weaker, provable check.
    s, xc, paths = halko_tables["1/j"]
    n = xc.shape[0]
    l, q = HALKO_K + HALKO_P, 2
    ratios = []
    for seed in range(25):
        result = run_sketch(paths[samples_as], l, samples_as, oversample=0, sketch="krylov", seed=seed)
        bound = result.attrs["error_bound"]["spectral_norm"]
        factor, ritz = _operator_and_basis(result, xc, samples_as)
        size = factor.shape[0]
        omega = np.random.default_rng(seed).standard_normal((size, l + TEST_VECTORS))[:, :l]
        basis = _krylov_basis(factor, omega, q)
        if samples_as == "rows":
            assert np.linalg.norm(ritz - basis @ (basis.T @ ritz), 2) < 1e-9
        else:
            # The loadings are Xc^T U diag(1/sigma), re-orthonormalized, for Ritz vectors U in the
            # basis: they lie in the span of Xc^T basis (the scores are Xc times these loadings).
            image = orth(xc.T @ basis)
            assert np.linalg.norm(result.loadings - image @ (image.T @ result.loadings), 2) < 1e-9
        ratios.append(bound / _residual_norm(factor, basis))
        assert bound >= s[l * (q + 1)] ** 2 / (n - 1)
    assert min(ratios) >= 1.0, min(ratios)


@pytest.mark.parametrize("samples_as", ORIENTATIONS)
def test_error_bound_holds_for_one_pass(halko_tables, samples_as):
    # reference: Halko et al. (2011) eq. (4.3) applied to A - A_hat, A_hat the rank-k Nystrom
    # approximation (Tropp et al. 2017, Algorithm 3) that the route returns: in feature space
    # V diag(variance) V^T (rows), in sample space scores scores^T / (n - 1) (columns).
    _s, xc, paths = halko_tables["1/j"]
    n = xc.shape[0]
    k = HALKO_K
    ratios = []
    for seed in BOUND_TRIALS[:25]:
        result = run_sketch(paths[samples_as], k, samples_as, oversample=HALKO_P, sketch="one-pass", seed=seed)
        if samples_as == "rows":
            cov = xc.T @ xc / (n - 1)
            approx = (result.loadings * result.variance) @ result.loadings.T
            true = spectral_norm(cov - approx)
        else:
            # G - S S^T/(n-1) = [Xc, S] diag(1, -1) [Xc, S]^T / (n-1): its norm from an n x (m+k) QR.
            both = np.hstack([xc, result.scores]) / math.sqrt(n - 1)
            w, r = np.linalg.qr(both)
            signs = np.r_[np.ones(xc.shape[1]), -np.ones(k)]
            true = float(np.max(np.abs(np.linalg.eigvalsh((r * signs) @ r.T))))
        ratios.append(result.attrs["error_bound"]["spectral_norm"] / true)
    assert min(ratios) >= 1.0, min(ratios)


@pytest.mark.parametrize("kind", ["subspace", "krylov"])
def test_error_bound_covers_what_the_returned_components_leave_out(lapack_table, write_npy, kind):
    # The stored attribute says: "upper bound on the spectral norm of the covariance not captured by
    # the computed components".  The computed components are the k returned loadings V, and
    # ||(I - V V^T) C|| >= lambda_{k+1} (Eckart-Young-Mirsky; reference: LAPACK eigenvalues of
    # numpy.cov).  Default options, rank 4, the 400 x 60 table with eigenvalues 100 * 0.6**j.
    x, _ = lapack_table
    path = write_npy(x)
    k = LAPACK_RANK
    result = run_sketch(path, k, sketch=kind)
    cov = np.cov(x, rowvar=False)
    lam = scipy.linalg.eigh(cov, eigvals_only=True)[::-1]
    v = result.loadings
    left_out = spectral_norm(cov - v @ (v.T @ cov))
    assert left_out >= lam[k] * (1 - 1e-12)
    bound = result.attrs["error_bound"]
    assert bound["relative_to_first"] == pytest.approx(bound["spectral_norm"] / result.variance[0], rel=1e-12)
    assert bound["spectral_norm"] >= left_out, (
        f"error_bound {bound['spectral_norm']:.4g} is below the covariance the {k} components leave out "
        f"({left_out:.4g} >= lambda_{k + 1} = {lam[k]:.4g}); it bounds the residual of the whole "
        f"basis of width rank + oversample, not of the returned components")


# ------------------------------------------------------------------ 4. Halko et al. (2011), Remark 4.3


@pytest.mark.parametrize("samples_as", ORIENTATIONS)
def test_renormalized_power_iteration_keeps_small_components(write_npy, samples_as):
    # reference: Halko et al. (2011) Remark 4.3: computing the power scheme without
    # re-orthonormalizing loses, in floating point, every component below eps**(1/(2q+1)) of the
    # largest singular value; on the covariance C = A^T A, components with
    # lambda_j / lambda_1 < eps**(1/q) in C**q Omega.  Eight components spanning 1 .. 1e-7, then a
    # floor of 1e-13; q = 3, so eps**(1/3) = 6e-6 and components 7 and 8 (1e-6, 1e-7) are lost.
    n, m, k, p, q = 400, 60, 8, 6, 3
    lam = np.r_[10.0 ** -np.arange(k), np.full(m - k, 1e-13)]
    x, xc = planted_svd(n, m, np.sqrt(lam * (n - 1)), seed=3, offset_scale=1.0)
    cov = xc.T @ xc / (n - 1)

    # Plain numpy, no re-normalization: Q = orth(C^q Omega), then Rayleigh-Ritz.
    omega = np.random.default_rng(0).standard_normal((m, k + p))
    y = omega
    for _ in range(q):
        y = cov @ y
    basis = orth(y)
    plain = np.sort(np.linalg.eigvalsh(basis.T @ cov @ basis))[::-1][:k]
    plain_error = np.abs(plain / lam[:k] - 1)
    lost = lam[:k] / lam[0] < EPS ** (1 / q)
    assert lost.sum() == 2
    assert np.all(plain_error[lost] > 0.1), plain_error  # the small components are gone
    assert np.all(plain_error[:4] < 1e-12)  # the large ones are fine

    # The route re-orthonormalizes after every application of C (routes/sketch.py::_iterate).
    result = run_sketch(write_npy(x, samples_as), k, samples_as, oversample=p, power_iterations=q)
    np.testing.assert_allclose(result.variance, lam[:k], rtol=1e-9)


# ------------------------------------------------------------------ 5. reproducibility


def _sketch_limit(path, rank, blocks, samples_as="rows", kind="subspace", oversample=10, power_iterations=2):
    """A memory limit that makes the randomized route read ``path`` in about ``blocks`` blocks,
    from the route's own ``fixed_bytes`` and the source's per-unit cost (asserted by the caller)."""
    src = open_source(path, samples_as=samples_as)
    try:
        axis = src.native_axis
        size = src.n_features if axis == "samples" else src.n_samples
        fixed = sketch_route.fixed_bytes(size, src.n_features, rank, oversample, power_iterations, kind)
        units = max(1, math.ceil(src.length(axis) / blocks))
        return fixed + src.fixed_read_bytes(axis) + units * src.bytes_per_unit(axis)
    finally:
        src.close()


# These use the 400 x 60 table of section 2, whose Krylov basis (42 columns) fits inside the
# feature space; see test_krylov_basis_wider_than_the_table for what happens otherwise.


@pytest.mark.parametrize("samples_as", ORIENTATIONS)
@pytest.mark.parametrize("kind", sketch_route.KINDS)
def test_same_seed_same_bits(lapack_table, write_npy, samples_as, kind):
    # reference: the documented contract (randomized.random_test_matrix: "from seed alone").
    path = write_npy(lapack_table[0], samples_as)
    a = run_sketch(path, 3, samples_as, sketch=kind, seed=42)
    b = run_sketch(path, 3, samples_as, sketch=kind, seed=42)
    np.testing.assert_array_equal(a.loadings, b.loadings)
    np.testing.assert_array_equal(a.variance, b.variance)
    assert a.attrs["error_bound"] == b.attrs["error_bound"]
    assert a.attrs["parameters"]["seed"] == 42


@pytest.mark.parametrize("samples_as", ORIENTATIONS)
@pytest.mark.parametrize("kind", sketch_route.KINDS)
def test_block_size_does_not_matter(lapack_table, write_npy, samples_as, kind, blocks_read):
    # reference: the documented contract (random_test_matrix: "never on block size"); the sums
    # over blocks differ only in the order of additions, so 1e-10 relative.
    path = write_npy(lapack_table[0], samples_as)
    # Without scores, whose buffers the limit below does not count (test_scores.py checks them).
    one = run_sketch(path, 3, samples_as, sketch=kind, seed=5, scores=False,
                     memory_limit=_sketch_limit(path, 3, 1, samples_as, kind))
    many = run_sketch(path, 3, samples_as, sketch=kind, seed=5, scores=False,
                      memory_limit=_sketch_limit(path, 3, 7, samples_as, kind))
    assert set(blocks_read(one)) == {1}
    assert min(blocks_read(many)) >= 7
    np.testing.assert_allclose(many.variance, one.variance, rtol=1e-10)
    np.testing.assert_allclose(many.loadings, one.loadings, atol=1e-10)
    assert many.attrs["error_bound"]["spectral_norm"] == pytest.approx(
        one.attrs["error_bound"]["spectral_norm"], rel=1e-10)


@pytest.mark.parametrize("samples_as", ORIENTATIONS)
def test_another_seed_is_different_but_as_accurate(write_npy, samples_as):
    # reference: LAPACK (reference_pca).  A slower spectrum (100 * 0.8**j), where the default
    # q = 2 leaves an error that depends on Omega: two seeds differ beyond round-off (1e-9) but
    # both stay within one stated tolerance of LAPACK (0.5% and 0.1 rad; over seeds 1-10 the
    # worst seen was 0.1% and 0.023 rad).
    x = planted_table(400, 60, 100.0 * 0.8 ** np.arange(60), seed=9)
    path = write_npy(x, samples_as)
    values, vectors, _total, _ = reference_pca(x, 3)
    results = [run_sketch(path, 3, samples_as, seed=seed) for seed in (1, 2)]
    assert np.max(np.abs(results[0].variance - results[1].variance) / values) > 1e-9
    for r in results:
        np.testing.assert_allclose(r.variance, values, rtol=5e-3)
        assert np.max(scipy.linalg.subspace_angles(r.loadings, vectors)) < 0.1
        assert np.all(r.variance <= values * (1 + 1e-12))  # Rayleigh-Ritz never overshoots
