"""Randomized route: streamed subspace iteration, block Krylov, or a one-pass sketch.

The operator is the covariance: ``C = Xc^T Xc`` in feature space when samples
are stored as rows (blocks of whole samples, centered and scaled exactly with
the global column moments, learnt during the first power iteration or, when the
spreads or fill values are needed first, in a pass of their own), or ``G = Xc Xc^T`` in sample space when
samples are stored as columns (blocks of whole features, each centered on its
own; the loadings then take one more pass).  Each application of the operator
to a thin basis of width ``w = rank + oversample`` is one pass
(:mod:`rankfold.folds.sketch`).

Kinds (``sketch=``):

subspace
    Halko, Martinsson and Tropp (2011), Algorithm 4.4: ``Q = orth(Omega)``,
    then ``power_iterations`` times ``Q = orth(C Q)`` (one pass each, QR
    re-normalization in between), then a Rayleigh-Ritz pass.  Passes:
    ``power_iterations + 1`` (rows; one more for the moments when
    :func:`fuses_moments` says no) or ``power_iterations + 1 + 1`` (columns;
    the last recovers loadings).
block Krylov
    Musco and Musco (2015): the Rayleigh-Ritz step uses the whole Krylov
    space ``[Q0, C Q0, ..., C^q Q0]`` (width ``w (q + 1)``): more accurate for
    slowly decaying spectra at the same number of passes, more memory.
one-pass
    Tropp, Yurtsever, Udell and Cevher (2017), Algorithm 3: the Nystrom
    approximation from ``C Omega`` alone, folded in a single read with the
    pairwise update of Chan et al.  No power iteration, so accuracy depends on
    the spectrum's decay; only covariance PCA without missing values (the
    spreads and means would need a pass first).

Every run reports the a posteriori bound of Halko et al. (2011, sec. 4.3),
computed from ``TEST_VECTORS`` extra random vectors carried in the last pass.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

from rankfold.errors import DataError
from rankfold.folds import ColumnMoments, CovarianceProduct, FeatureProjection, GramProduct, StreamingSketch
from rankfold.memory import block_budget
from rankfold.randomized import (TEST_VECTORS, nystrom, orthonormalize, random_test_matrix, rayleigh_ritz,
                                 residual_bound)
from rankfold.sample_outputs import SampleParts, TallProduct, scratch_chunk_bytes, writer_bytes
from rankfold.routes.common import (Decomposition, RouteInput, check_numerical_rank, check_values, feature_block_check,
                                    output_bytes, run_pass, scratch_folder)

NAME = "sketch"
KINDS = ("subspace", "krylov", "one-pass")


def basis_width(rank: int, oversample: int, power_iterations: int, kind: str) -> int:
    """Columns of the largest thin basis the route holds."""
    width = rank + oversample
    return width * (power_iterations + 1) if kind == "krylov" else width


def passes(power_iterations: int, kind: str) -> int:
    """Reads of the data at most: moments or loadings, the iterations, the final product.

    The planner subtracts the moments pass where :func:`fuses_moments` applies.
    """
    return 1 if kind == "one-pass" else power_iterations + 2


def fuses_moments(standardize: bool, missing: str, power_iterations: int, kind: str) -> bool:
    """Whether the rows orientation folds the column moments into the first power iteration.

    :class:`~rankfold.folds.StreamingSketch` folds ``Xc^T Xc Q0`` exactly
    (Chan et al.'s update) while it learns the means, so the separate moments
    pass is saved -- unless the spreads are needed before the first product
    (``standardize``) or missing values must be filled with means not yet
    known (``fill-mean``), or there is no power iteration to fuse with.
    """
    return not standardize and missing != "fill-mean" and power_iterations >= 1 and kind != "one-pass"


def fixed_bytes(operator_size: int, n_features: int, rank: int, oversample: int = 10,
                power_iterations: int = 2, kind: str = "subspace") -> int:
    """Thin bases, products, test vectors and QR workspace in the operator's space."""
    width = basis_width(rank, oversample, power_iterations, kind) + TEST_VECTORS
    return 5 * operator_size * width * 8 + 6 * n_features * 8


def run(inp: RouteInput) -> Decomposition:
    source = inp.source
    n, m = source.shape
    if n < 2:
        raise DataError(f"{source.path}: {n} sample(s); a variance needs at least two")
    axis = source.native_axis  # read along the stored rows
    size = m if axis == "samples" else n
    fixed = (fixed_bytes(size, m, inp.rank, inp.oversample, inp.power_iterations, inp.sketch)
             + source.fixed_read_bytes(axis) + output_bytes(inp))
    tall_in_memory = None
    if captures_scores(inp):
        width = basis_width(inp.rank, inp.oversample, inp.power_iterations, inp.sketch)
        # On a cluster writing a result store, the workers fill the tall product in a scratch
        # folder beside the output (they cannot reach this process's memory).
        tall_in_memory = (tall_fits_in_memory(n, width, inp.memory_limit)
                          and (inp.cluster is None or inp.scratch is None))
        fixed += (TallProduct.bytes_needed(n, width) if tall_in_memory
                  else writer_bytes(n, width + 1, scratch_chunk_bytes(inp.memory_limit)))
    budget = block_budget(inp.memory_limit, fixed, source.min_block_bytes(axis), "the randomized route")
    partition = source.partition(axis, budget)
    width = inp.rank + inp.oversample
    omega, tests = random_test_matrix(inp.seed, size, width)
    if axis == "samples":
        return _run_rows(inp, partition, omega, tests, tall_in_memory)
    return _run_columns(inp, partition, omega, tests)


def captures_scores(inp: RouteInput) -> bool:
    """Whether the last pass keeps ``Xc Q`` for the scores (rows orientation, iterative kinds)."""
    return inp.scores and inp.source.native_axis == "samples" and inp.sketch != "one-pass"


def tall_fits_in_memory(n: int, width: int, memory_limit: int) -> bool:
    """Keep ``Xc Q`` (n x width) in memory when it takes at most a quarter of the ceiling.

    Otherwise it goes to a scratch Zarr array beside the output and is read
    back once; the rest of the ceiling stays with the blocks.
    """
    return TallProduct.bytes_needed(n, width) <= memory_limit // 4


def _iterate(inp: RouteInput, omega: np.ndarray, tests: np.ndarray, apply, first=None) -> tuple:
    """Subspace or block Krylov iteration; returns (basis, product of basis, product of tests).

    ``apply(q, label, last)`` applies the operator in one pass; ``last`` marks
    the Rayleigh-Ritz pass, whose thin product the rows orientation keeps.
    ``first``, when given, is the operator applied to ``orthonormalize(omega)``
    already (folded together with the moments).
    """
    q = orthonormalize(omega)
    krylov = [q]
    for i in range(inp.power_iterations):
        z = first if i == 0 and first is not None else apply(q, "power iteration", False)
        q = orthonormalize(z, np.hstack(krylov) if inp.sketch == "krylov" else None)
        if q.shape[1] == 0:
            break  # the Krylov space spans everything reachable: more passes add nothing
        krylov.append(q)
    basis = np.hstack(krylov) if inp.sketch == "krylov" else q
    both = apply(np.hstack([basis, tests]), "Rayleigh-Ritz", True)
    return basis, both[:, :basis.shape[1]], both[:, basis.shape[1]:]


def _error_attrs(components: np.ndarray, basis: np.ndarray | None, n: int, top_value: float,
                 kind: str, width: int) -> dict:
    """The a posteriori bounds, in variance units (operator norm / (n - 1)).

    ``components`` and ``basis`` hold ``(I - P) C w_i`` for the test vectors
    ``w_i``, with ``P`` the projector on the returned components or on the
    whole sketch basis.
    """
    bound = residual_bound(components)
    attrs = {
        "spectral_norm": bound / (n - 1),
        "relative_to_first": bound / top_value if top_value > 0 else float("inf"),
        "probability": 1 - 10.0 ** -TEST_VECTORS,
        "test_vectors": TEST_VECTORS,
        "meaning": ("upper bound on the spectral norm of the covariance left outside the returned "
                    "components (at least the first variance not returned)" if kind != "one-pass" else
                    "upper bound on the spectral norm of the error of the one-pass covariance approximation"),
        "source": "Halko, Martinsson and Tropp (2011), section 4.3",
    }
    if basis is not None:
        attrs["basis_spectral_norm"] = residual_bound(basis) / (n - 1)
        attrs["basis_width"] = int(width)
    return {"error_bound": attrs, "sketch": {"kind": kind}}


def _run_rows(inp: RouteInput, partition, omega, tests, tall_in_memory) -> Decomposition:
    source = inp.source
    n, m = source.shape
    passes_done = []
    parts = SampleParts()
    fill = inp.missing == "fill-mean"

    def check(block, start):
        check_values(block, start, "samples", inp, allow_missing=fill)
        return block

    if inp.sketch == "one-pass":
        state, record = run_pass("one-pass sketch", inp, partition,
                                 StreamingSketch(np.hstack([omega, tests])), check)
        passes_done.append(record)
        width = omega.shape[1]
        y, y_tests = state.product[:, :width], state.product[:, width:]
        values, vectors = nystrom(omega, y, inp.rank)
        residual = y_tests - vectors @ (values[:, None] * (vectors.T @ tests))
        basis_residual, basis = None, omega
        center, scale, total = state.mean, np.ones(m), float(state.m2.sum()) / (n - 1)
    elif fuses_moments(inp.standardize, inp.missing, inp.power_iterations, inp.sketch):
        # One pass learns the means and applies the centered covariance to Q0 = orth(Omega).
        state, record = run_pass("moments and power iteration", inp, partition,
                                 StreamingSketch(orthonormalize(omega)), check)
        passes_done.append(record)
        center, scale, total = state.mean, np.ones(m), float(state.m2.sum()) / (n - 1)
        first = state.product
    else:
        moments, record = run_pass("column moments", inp, partition, ColumnMoments(m), check)
        passes_done.append(record)
        empty = np.flatnonzero(moments.count == 0)
        if empty.size:
            names = ", ".join(repr(source.feature_names[j]) for j in empty[:5])
            raise DataError(f"{source.path}: column(s) {names} hold no values at all; leave them out")
        variance = moments.m2 / (n - 1)  # filled values sit at the mean and add nothing
        center, scale, total = moments.mean, np.ones(m), float(variance.sum())
        if inp.standardize:
            scale = np.sqrt(variance)
            constant = np.flatnonzero(scale == 0)
            if constant.size:
                names = ", ".join(repr(source.feature_names[j]) for j in constant[:5])
                raise DataError(f"{source.path}: column(s) {names} are constant, so they have no correlation "
                                "to scale; leave them out, or drop --standardize to analyse covariances")
            total = float(m)
        first = None

    if inp.sketch != "one-pass":
        def apply(basis, label, last):
            state = CovarianceProduct(basis, center, scale, missing=fill)
            if last and tall_in_memory is not None:
                width = basis.shape[1] - tests.shape[1]
                # A scratch folder beside the output is one cluster workers can fill themselves,
                # each a range of whole chunks: chunks small enough for several ranges per thread
                # (otherwise a table of a few chunks leaves workers idle in the last pass).
                chunk_bytes = scratch_chunk_bytes(inp.memory_limit)
                if inp.cluster is not None:
                    chunk_bytes = min(chunk_bytes, TallProduct.bytes_needed(n, width)
                                      // (2 * inp.cluster.tasks_per_pass))
                parts.tall = TallProduct(n, width, None if tall_in_memory else scratch_folder(inp),
                                         chunk_bytes, shared=inp.scratch is not None)
                state = CovarianceProduct(basis, center, scale, parts.tall, width, missing=fill)
            try:
                state, rec = run_pass(label, inp, partition, state, check)
            except BaseException:
                if parts.tall is not None:
                    parts.tall.remove()  # stops its writer before the scratch folder goes
                raise
            passes_done.append(rec)
            return state.product

        basis, product, product_tests = _iterate(inp, omega, tests, apply, first)
        values, vectors, parts.coefficients = rayleigh_ritz(basis, product, inp.rank, coefficients=True)
        if parts.tall is None:
            parts.coefficients = None
        residual = product_tests - vectors @ (vectors.T @ product_tests)
        basis_residual = product_tests - basis @ (basis.T @ product_tests)
    values = check_numerical_rank(values, max(n, m), inp)
    extra = _error_attrs(residual, basis_residual, n, values[0], inp.sketch, basis.shape[1])
    return Decomposition(NAME, vectors, values / (n - 1), total, center, scale, n, passes=passes_done,
                         parts=parts, extra=extra).with_sign_rule()


def _run_columns(inp: RouteInput, partition, omega, tests) -> Decomposition:
    source = inp.source
    n, m = source.shape
    passes_done = []
    seen = {}
    check = feature_block_check(inp)

    def apply(basis, label, last=False):
        state = GramProduct(basis, m, inp.standardize)
        state.feature_names, state.source_path = source.feature_names, source.path
        state, rec = run_pass(label, inp, partition, state, check)
        passes_done.append(rec)
        seen.update(center=state.center, scale=state.scale, total=state.sumsq / (n - 1))
        return state.product

    if inp.sketch == "one-pass":
        both = apply(np.hstack([omega, tests]), "one-pass sketch")
        width = omega.shape[1]
        y, y_tests = both[:, :width], both[:, width:]
        values, vectors = nystrom(omega, y, inp.rank)
        residual = y_tests - vectors @ (values[:, None] * (vectors.T @ tests))
        basis_residual, basis = None, omega
    else:
        basis, product, product_tests = _iterate(inp, omega, tests, apply)
        values, vectors = rayleigh_ritz(basis, product, inp.rank)
        residual = product_tests - vectors @ (vectors.T @ product_tests)
        basis_residual = product_tests - basis @ (basis.T @ product_tests)
    values = check_numerical_rank(values, max(n, m), inp)
    sigma = np.sqrt(values)
    projection = FeatureProjection(vectors / sigma, seen["center"], seen["scale"], scores=inp.scores)
    projection, record = run_pass("loadings", inp, partition, projection, lambda b, s: b)
    passes_done.append(record)
    # Loadings from Ritz vectors are orthonormal only as far as the Ritz vectors are
    # eigenvectors; re-orthonormalize so the stored axes are exactly orthonormal:
    # L = L_raw R^-1 D (D the signs).  The scores must be Xc L for these very axes,
    # so they are Xc L_raw R^-1 D, with Xc L_raw folded in the same pass.
    loadings, r = np.linalg.qr(projection.loadings)
    signs = np.sign(np.einsum("ij,ij->j", loadings, projection.loadings))
    loadings *= signs
    parts = SampleParts()
    if inp.scores:
        scores = scipy.linalg.solve_triangular(r, projection.sample_product.T, trans="T", lower=False).T
        parts = SampleParts(scores=scores * signs, sumsq=projection.sample_sumsq)
    extra = _error_attrs(residual, basis_residual, n, values[0], inp.sketch, basis.shape[1])
    return Decomposition(NAME, loadings, values / (n - 1), seen["total"], seen["center"], seen["scale"], n,
                         parts=parts, passes=passes_done, extra=extra).with_sign_rule()
