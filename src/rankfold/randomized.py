"""Small dense steps of the randomized route, on in-memory thin matrices.

References
----------
Halko, Martinsson and Tropp (2011), "Finding structure with randomness:
probabilistic algorithms for constructing approximate matrix decompositions",
SIAM Review 53(2): subspace iteration (Algorithm 4.4), the a posteriori error
estimate (section 4.3, equation 4.3), expected-error bounds (section 10).
Musco and Musco (2015), "Randomized block Krylov methods for stronger and
faster approximate singular value decomposition", NeurIPS.
Tropp, Yurtsever, Udell and Cevher (2017), "Fixed-rank approximation of a
positive-semidefinite matrix from streaming data", NeurIPS (Algorithm 3).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.linalg

# Extra random vectors for the a posteriori estimate: the bound holds with
# probability at least 1 - 10**-TEST_VECTORS (Halko et al. 2011, eq. 4.3).
TEST_VECTORS = 10
BOUND_FACTOR = 10.0 * math.sqrt(2.0 / math.pi)


def random_test_matrix(seed: int, size: int, width: int, extra: int = TEST_VECTORS) -> tuple[np.ndarray, np.ndarray]:
    """Gaussian test matrix ``(size, width)`` and ``extra`` estimation vectors, from ``seed`` alone.

    Drawn once from one generator, so they depend on the seed and the
    dimension only, never on block size or on how blocks are assigned.
    """
    rng = np.random.default_rng(seed)
    both = rng.standard_normal((size, width + extra))
    return both[:, :width].copy(), both[:, width:].copy()


def orthonormalize(z: np.ndarray, against: np.ndarray | None = None) -> np.ndarray:
    """Orthonormal basis of ``z``'s columns, optionally after removing ``against``.

    Re-normalizing between power iterations keeps the small components from
    drowning in round-off (Halko et al. 2011, Remark 4.3).  Removing a
    previous basis twice ("twice is enough") keeps a block Krylov basis
    orthogonal to working precision; directions that are already spanned
    (the Krylov space has stopped growing, or is as wide as the operator)
    are dropped, so the result may have fewer columns than ``z``.
    """
    if against is None or not against.shape[1]:
        q, _ = np.linalg.qr(z)  # subspace iteration keeps its width whatever the data
        return q
    scale = np.linalg.norm(z, axis=0).max(initial=0.0)
    for _ in range(2):
        z = z - against @ (against.T @ z)
    q, r, _ = scipy.linalg.qr(z, mode="economic", pivoting=True)
    diag = np.abs(np.diag(r))
    keep = int(np.count_nonzero(diag > max(z.shape) * np.finfo(float).eps * max(scale, diag.max(initial=0.0))))
    q = q[:, :keep]
    if keep:
        q = q - against @ (against.T @ q)  # a last sweep: QR of a tiny remainder can reintroduce overlap
        q, _ = np.linalg.qr(q)
    return q


def rayleigh_ritz(basis: np.ndarray, product: np.ndarray, rank: int, coefficients: bool = False) -> tuple:
    """Top ``rank`` Ritz pairs of an operator ``A`` from ``basis`` and ``product = A @ basis``.

    Returns descending Ritz values and the Ritz vectors ``basis @ w``, and the
    coefficients ``w`` (width x rank) as well when ``coefficients`` is true.
    """
    t = basis.T @ product
    t = (t + t.T) / 2  # symmetric in exact arithmetic
    values, vectors = scipy.linalg.eigh(t)
    order = np.argsort(values)[::-1][:rank]
    w = vectors[:, order]
    return (values[order], basis @ w, w) if coefficients else (values[order], basis @ w)


def nystrom(test: np.ndarray, sketch: np.ndarray, rank: int) -> tuple[np.ndarray, np.ndarray]:
    """Fixed-rank PSD approximation from ``sketch = A @ test`` (Tropp et al. 2017, Algorithm 3).

    A small shift ``nu`` makes the core matrix safely positive definite; it is
    subtracted again from the eigenvalues.
    """
    nu = np.sqrt(test.shape[0]) * np.finfo(float).eps * np.linalg.norm(sketch, 2)
    shifted = sketch + nu * test
    core = test.T @ shifted
    core = (core + core.T) / 2
    # factor = shifted @ core^(-1/2) in any square-root sense, so factor factor^T
    # = shifted core^-1 shifted^T, the Nystrom approximation of A + nu I.
    try:
        lower = np.linalg.cholesky(core)  # core = L L^T
        factor = scipy.linalg.solve_triangular(lower, shifted.T, lower=True).T
    except np.linalg.LinAlgError:
        w, v = np.linalg.eigh(core)  # round-off broke definiteness: clip and use V W^-1/2
        factor = shifted @ (v / np.sqrt(np.maximum(w, nu)))
    u, sigma, _ = np.linalg.svd(factor, full_matrices=False)
    values = np.maximum(sigma[:rank] ** 2 - nu, 0.0)
    return values, u[:, :rank]


def residual_bound(residual: np.ndarray) -> float:
    """``10 sqrt(2/pi) max_i ||residual_i||``: Halko et al. (2011) eq. 4.3.

    ``residual`` holds ``(A - A_hat) omega_i`` for independent Gaussian
    ``omega_i``; the spectral norm ``||A - A_hat||`` is at most this value with
    probability at least ``1 - 10**-r`` for ``r`` columns.
    """
    return BOUND_FACTOR * float(np.max(np.linalg.norm(residual, axis=0)))
