"""The samples x samples Gram matrix, folded over blocks of whole features.

When samples are few and features many (or samples are stored as columns, as
genomic stores do), ``G = Xc Xc^T`` (n x n) is small while ``Xc^T Xc`` is
not.  A block holding whole features knows each feature's mean and spread
exactly, so every block is centered (and scaled) on its own and the blocks'
contributions simply add: no merge correction is needed along this axis.

The loadings are recovered afterwards by one more pass,
``V = Xc^T U diag(1 / sqrt(lambda))`` (:class:`FeatureProjection`).
"""

from __future__ import annotations

import numpy as np

from rankfold.errors import DataError
from rankfold.folds.base import FoldState


def center_features(block: np.ndarray, standardize: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Center (and scale) each row of a ``(features, samples)`` block in place.

    Missing entries (NaN) are left for the caller's policy to have handled:
    under ``fill-mean`` they take the feature's mean, i.e. become 0 here.

    Returns
    -------
    block : ndarray, shape (f, n)
        The centered (scaled) block; the same memory as the input.
    center : ndarray, shape (f,)
        Mean of each feature over present values.
    scale : ndarray, shape (f,)
        Standard deviation (ddof=1) of the filled feature, or ones.
    """
    # In place, with one boolean mask at most: a block-sized float temporary
    # would double this pass's memory.
    missing = np.isnan(block)
    if missing.any():
        block[missing] = 0.0
        count = block.shape[1] - missing.sum(axis=1)
        center = block.sum(axis=1) / np.maximum(count, 1)
        block -= center[:, None]
        block[missing] = 0.0  # a filled value equals the mean: zero once centered
    else:
        center = block.mean(axis=1)
        block -= center[:, None]
    del missing
    n = block.shape[1]
    if standardize:
        scale = np.sqrt(np.einsum("ij,ij->i", block, block) / max(n - 1, 1))
        block /= np.where(scale > 0, scale, 1.0)[:, None]
    else:
        scale = np.ones(block.shape[0])
    return block, center, scale


class FeatureBlockState(FoldState):
    """Shared bookkeeping of states folded over blocks of whole features.

    Each block is centered (and scaled) on its own; the state records every
    feature's center and scale and the total sum of squares, and refuses a
    constant feature in correlation mode.
    """

    feature_names: tuple[str, ...] | None = None  # for messages only; not serialized
    source_path: str | None = None  # for messages only; not serialized

    def _init_features(self, n_features: int, standardize: bool) -> None:
        self.center = np.zeros(n_features)
        self.scale = np.ones(n_features)
        self.seen = np.zeros(n_features, dtype=bool)
        self.sumsq = 0.0
        self.standardize = bool(standardize)

    def _center_block(self, block: np.ndarray, start: int) -> np.ndarray:
        """Center (and scale) a ``(features, n_samples)`` block in place and record it."""
        stop = start + block.shape[0]
        block, center, scale = center_features(block, self.standardize)
        if self.standardize and np.any(scale == 0):
            j = start + int(np.flatnonzero(scale == 0)[0])
            name = repr(self.feature_names[j]) if self.feature_names else f"number {j}"
            raise DataError(
                f"{self.source_path or 'the table'}: feature {name} is constant, so it has no correlation "
                "to scale; leave it out, or drop --standardize to analyse covariances")
        self.center[start:stop] = center
        self.scale[start:stop] = scale
        self.seen[start:stop] = True
        self.sumsq += float(np.einsum("ij,ij->", block, block))
        return block

    def _merge_features(self, other: "FeatureBlockState") -> None:
        self.center = np.where(other.seen, other.center, self.center)
        self.scale = np.where(other.seen, other.scale, self.scale)
        self.seen = self.seen | other.seen
        self.sumsq += other.sumsq


class SampleGram(FeatureBlockState):
    """Running ``Xc Xc^T`` over feature blocks, with each feature's center and scale.

    Parameters
    ----------
    n_samples, n_features : int
        Shape of the table; the state holds ``n*n + 2*m`` float64 values.
    standardize : bool
        Scale each feature to unit variance (correlation PCA).

    Notes
    -----
    ``update`` costs ``2 * f * n**2`` flops for a block of ``f`` features.
    """

    _fields = ("gram", "center", "scale", "seen", "sumsq", "standardize")

    def __init__(self, n_samples: int, n_features: int, standardize: bool = False):
        self.gram = np.zeros((n_samples, n_samples))
        self._init_features(n_features, standardize)

    def update(self, block: np.ndarray, start: int = 0) -> "SampleGram":
        """Fold a ``(features, n_samples)`` float64 block starting at feature ``start``."""
        block = self._center_block(block, start)
        self.gram += block.T @ block
        return self

    def merge(self, other: "SampleGram") -> "SampleGram":
        """Combine with a state over a disjoint set of features."""
        self.gram += other.gram
        self._merge_features(other)
        return self


class FeatureProjection(FoldState):
    """Second pass of the sample-Gram route: loadings ``Xc^T W`` block by block.

    Parameters
    ----------
    weights : ndarray, shape (n_samples, k)
        ``U / sqrt(lambda)``, the left singular vectors over singular values.
    center, scale : ndarray, shape (m,)
        From the first pass, so that every block is centered identically.
    scores : bool
        Also fold ``Xc^T (Xc W)`` (n x k), the scores of the unnormalized
        loadings, for routes that re-orthonormalize the loadings afterwards.
    """

    _fields = ("weights", "center", "scale", "loadings", "sample_sumsq", "sample_product")

    def __init__(self, weights: np.ndarray, center: np.ndarray, scale: np.ndarray, scores: bool = False):
        self.weights = weights
        self.center = center
        self.scale = scale
        self.loadings = np.zeros((center.shape[0], weights.shape[1]))
        self.sample_sumsq = np.zeros(weights.shape[0])  # each sample's centered squared norm, for residuals
        self.sample_product = np.zeros(weights.shape) if scores else np.zeros((0, weights.shape[1]))

    def update(self, block: np.ndarray, start: int = 0) -> "FeatureProjection":
        stop = start + block.shape[0]
        block -= self.center[start:stop, None]
        block[np.isnan(block)] = 0.0
        block /= self.scale[start:stop, None]
        self.loadings[start:stop] = block @ self.weights
        self.sample_sumsq += np.einsum("ij,ij->j", block, block)
        if self.sample_product.shape[0]:
            self.sample_product += block.T @ self.loadings[start:stop]
        return self

    def merge(self, other: "FeatureProjection") -> "FeatureProjection":
        self.loadings += other.loadings  # disjoint feature ranges: the rest are zeros
        self.sample_sumsq += other.sample_sumsq
        self.sample_product += other.sample_product
        return self
