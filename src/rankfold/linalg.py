"""Small dense linear algebra on in-memory matrices: eigenpairs and the sign rule.

Sign rule
---------
An eigenvector is defined only up to sign.  rankfold makes, in every
component, the loading with the largest absolute value positive; when two
loadings tie in absolute value, the one of the lower feature index decides.
Scores and any other per-component arrays are flipped with their loadings,
so the decomposition itself is unchanged.  The rule depends only on the
loadings, so every route and every block size gives the same signs.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg


def top_eigh(matrix: np.ndarray, rank: int) -> tuple[np.ndarray, np.ndarray]:
    """The ``rank`` largest eigenpairs of a symmetric matrix, largest first.

    Parameters
    ----------
    matrix : ndarray, shape (p, p)
        Symmetric; only the lower triangle is read (LAPACK ``syevr``).
    rank : int
        ``1 <= rank <= p``.

    Returns
    -------
    values : ndarray, shape (rank,)
        Descending eigenvalues.
    vectors : ndarray, shape (p, rank)
        Orthonormal eigenvectors as columns.

    Notes
    -----
    Cost ``O(p**3)`` flops, with ``O(p**2 * rank)`` for the requested subset.
    """
    p = matrix.shape[0]
    values, vectors = scipy.linalg.eigh(matrix, subset_by_index=[p - rank, p - 1],
                                        driver="evr", check_finite=False)
    return values[::-1].copy(), vectors[:, ::-1].copy()


def sign_flips(loadings: np.ndarray) -> np.ndarray:
    """Per-component factors (+1 or -1) that make the largest-magnitude loading positive."""
    pivot = np.argmax(np.abs(loadings), axis=0)  # argmax takes the lowest index on ties
    signs = np.sign(loadings[pivot, np.arange(loadings.shape[1])])
    return np.where(signs == 0, 1.0, signs)
