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


def outside_norm(y: np.ndarray, loadings: np.ndarray) -> float:
    """Spectral norm of ``(I - L L^T) C`` with ``C = Y^T Y / (n - 1)``: the covariance left outside ``L``.

    This is the quantity the randomized route's a posteriori estimate bounds
    (Halko, Martinsson and Tropp 2011, sec. 4.3), in variance units.  It is at
    least the (k+1)-th eigenvalue of ``C``, with equality when ``L`` spans the
    exact leading components.

    Parameters
    ----------
    y : ndarray, shape (n, m)
        The centered (and scaled) table.
    loadings : ndarray, shape (m, k), orthonormal columns

    Notes
    -----
    With ``m <= n`` the ``m x m`` matrix is formed.  Otherwise the work stays in
    sample space: with ``G = Y Y^T`` and ``Z = Y L``, the squared norm is the
    largest eigenvalue of ``C (I - P) C``, whose nonzero eigenvalues are those
    of ``(G - Z Z^T) G`` (``eig(AB) = eig(BA)``), computed as the symmetric
    ``G^(1/2) (G - Z Z^T) G^(1/2)``.  Cost ``O(n m min(n, m))``.
    """
    n, m = y.shape
    if m <= n:
        c = y.T @ y
        return float(np.linalg.norm(c - loadings @ (loadings.T @ c), 2)) / (n - 1)
    g = y @ y.T
    z = y @ loadings
    w, v = np.linalg.eigh(g)
    half = (v * np.sqrt(np.clip(w, 0, None))) @ v.T
    top = np.linalg.eigvalsh(half @ (g - z @ z.T) @ half)[-1]
    return float(np.sqrt(max(top, 0.0))) / (n - 1)


def outside_norm_streamed(apply_covariance, loadings: np.ndarray, n_features: int) -> float:
    """:func:`outside_norm` for a table that is not in memory, from products ``V -> C V``.

    The largest eigenvalue of ``A^T A``, ``A = (I - L L^T) C``, by
    ``scipy.sparse.linalg.eigsh`` on a linear operator: each product applies
    ``C`` twice (two reads of the table), a few dozen products in all.
    """
    from scipy.sparse.linalg import LinearOperator, eigsh

    m = n_features

    def outside(v):
        return v - loadings @ (loadings.T @ v)

    def gram(v):
        v = v.reshape(m, -1)
        out = apply_covariance(outside(outside(apply_covariance(v))))
        return out.ravel() if out.shape[1] == 1 else out

    op = LinearOperator((m, m), matvec=gram, matmat=gram, dtype=np.float64)
    top = eigsh(op, k=1, which="LA", return_eigenvectors=False, tol=1e-8)
    return float(np.sqrt(max(top[0], 0.0)))
