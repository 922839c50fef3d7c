"""Per-component agreement between a reference decomposition and another one.

All functions take loadings as ``(m, k)`` arrays with orthonormal columns and
compare component ``i`` with component ``i``.
"""

from __future__ import annotations

import numpy as np


def component_angles(reference: np.ndarray, other: np.ndarray) -> np.ndarray:
    """Angle in degrees between reference component i and other component i, shape (k,).

    ``arccos(|a_i . b_i|)``: a component is an axis, so its sign does not
    count; the cosine is clipped to [0, 1] against rounding.  For one
    dimensional subspaces this is the principal angle of
    ``scipy.linalg.subspace_angles`` (checked in the tests).
    """
    cosines = np.abs(np.einsum("ij,ij->j", reference, other))
    return np.degrees(np.arccos(np.clip(cosines, 0.0, 1.0)))


def eigenvalue_relative_error(reference: np.ndarray, other: np.ndarray) -> np.ndarray:
    """``|other_i - reference_i| / reference_i``, shape (k,) (inf where the reference is 0)."""
    reference = np.asarray(reference, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        err = np.abs(np.asarray(other, dtype=np.float64) - reference) / reference
    return np.where(reference > 0, err, np.inf)


def score_correlation(reference_scores: np.ndarray, other_scores: np.ndarray,
                      reference_loadings: np.ndarray, other_loadings: np.ndarray) -> np.ndarray:
    """Pearson correlation of the scores of component i in both, shape (k,).

    Signs are aligned first by the sign of ``a_i . b_i`` (the sign rule can
    flip a component whose two largest loadings are nearly equal), so a value
    near 1 means the samples sit in the same places along the component.
    """
    flips = np.sign(np.einsum("ij,ij->j", reference_loadings, other_loadings))
    flips[flips == 0] = 1.0
    a = reference_scores - reference_scores.mean(axis=0)
    b = (other_scores - other_scores.mean(axis=0)) * flips
    denom = np.sqrt((a * a).sum(axis=0) * (b * b).sum(axis=0))
    with np.errstate(divide="ignore", invalid="ignore"):
        r = (a * b).sum(axis=0) / denom
    return np.where(denom > 0, r, np.nan)


def outside_norm(apply_covariance, loadings: np.ndarray, n_features: int) -> float:
    """Spectral norm of ``(I - L L^T) C``: the covariance left outside the components ``L``.

    This is the quantity the randomized route's a posteriori estimate bounds
    (Halko, Martinsson and Tropp 2011, sec. 4.3), in variance units.  It is at
    least the (k+1)-th eigenvalue of ``C``, with equality when ``L`` spans the
    exact leading components.

    Parameters
    ----------
    apply_covariance : callable
        ``V (m, j) -> C V (m, j)``; ``C`` symmetric.
    loadings : ndarray, shape (m, k)
    n_features : int

    Notes
    -----
    Computed as the square root of the largest eigenvalue of
    ``A^T A`` with ``A = (I - L L^T) C``, by ``scipy.sparse.linalg.eigsh`` on a
    linear operator (each product applies ``C`` twice), or densely when
    ``m <= 600``.
    """
    m = n_features

    def outside(v):
        return v - loadings @ (loadings.T @ v)

    if m <= 600:
        c = apply_covariance(np.eye(m))
        return float(np.linalg.norm(outside(c), 2))
    from scipy.sparse.linalg import LinearOperator, eigsh

    def gram(v):
        v = v.reshape(m, -1)
        a = outside(apply_covariance(v))
        return apply_covariance(outside(a)).ravel() if v.shape[1] == 1 else apply_covariance(outside(a))

    op = LinearOperator((m, m), matvec=gram, matmat=gram, dtype=np.float64)
    top = eigsh(op, k=1, which="LA", return_eigenvectors=False, tol=1e-8)
    return float(np.sqrt(max(top[0], 0.0)))
