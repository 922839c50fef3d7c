"""Pass states of the randomized route: products of the covariance with a basis.

Each pass of randomized subspace iteration applies the covariance operator to
a thin basis.  Streaming blocks ``B_i`` of the centered (and scaled) table,

    C Q = Xc^T Xc Q = sum_i B_i^T (B_i Q)

so one read of the data applies ``Xc^T Xc`` once, and only the thin
``(other, width)`` products are held, never the ``n x width`` sketch
``Xc Q``.  Blocks of whole samples are centered with the global column means
from a first pass (exactly, never by a rank-one correction of raw products,
which cancels catastrophically when means are large); blocks of whole
features are centered on their own, and the same sum then applies
``Xc Xc^T`` in sample space.

:class:`StreamingSketch` is the one-pass variant: it folds ``C Omega`` with
the pairwise update of Chan, Golub and LeVeque, so the means need not be
known in advance.
"""

from __future__ import annotations

import numpy as np

from rankfold.folds.base import FoldState
from rankfold.folds.sample_gram import FeatureBlockState

SLAB = 4096  # rows per thin product; large enough for GEMM efficiency


class CovarianceProduct(FoldState):
    """``sum_i B_i^T (B_i Q)`` over blocks of whole samples, centered and scaled globally.

    Parameters
    ----------
    basis : ndarray, shape (m, w)
    center, scale : ndarray, shape (m,)
        Column means and divisors from the moments pass.
    capture : callable, optional
        Receives ``(start, Y, sumsq)`` for every slab: the thin product
        ``Y = B Q`` restricted to its first ``capture_width`` columns and each
        row's squared norm.  The randomized route keeps them from its last
        pass to form the scores without reading the data again.
    capture_width : int

    Notes
    -----
    ``update`` costs ``4 * rows * m * w`` flops for a block of ``rows`` samples.
    """

    _fields = ("basis", "center", "scale", "product")
    capture, capture_width = None, 0  # not serialized: a state rebuilt by from_bytes captures nothing

    def __init__(self, basis: np.ndarray, center: np.ndarray, scale: np.ndarray, capture=None,
                 capture_width: int = 0, missing: bool = True):
        self.basis = basis
        self.center = center
        self.scale = scale
        self.product = np.zeros_like(basis)
        self.capture, self.capture_width = capture, capture_width
        # Skip the NaN scan when no value can be missing, and the division by unit scales:
        # each is a sweep over the block (measured about 6 s of 50 on the wide benchmark).
        self.missing = missing
        self.unit = bool(np.all(scale == 1.0))
        self.resumable = capture is None  # a captured product lives outside the state

    missing, unit = True, False  # for states rebuilt by from_bytes: every step, as before

    def update(self, block: np.ndarray, start: int = 0) -> "CovarianceProduct":
        # Slabs of SLAB rows bound the temporaries (the thin product B Q and the
        # missing-value mask) to a few MB whatever the block size.
        for a in range(0, block.shape[0], SLAB):
            slab = block[a:a + SLAB]
            slab -= self.center
            if self.missing:
                slab[np.isnan(slab)] = 0.0  # a filled value equals the mean: zero once centered
            if not self.unit:
                slab /= self.scale
            thin = slab @ self.basis
            self.product += slab.T @ thin
            if self.capture is not None:
                self.capture(start + a, thin[:, :self.capture_width], np.einsum("ij,ij->i", slab, slab))
        return self

    def merge(self, other: "CovarianceProduct") -> "CovarianceProduct":
        self.product += other.product
        return self


class GramProduct(FeatureBlockState):
    """``sum_b F_b^T (F_b P)`` over blocks of whole features, each centered on its own.

    Applies ``Xc Xc^T`` (samples x samples) to ``P`` without forming it, and
    records each feature's center and scale and the total sum of squares on
    the way (the same in every pass).

    Parameters
    ----------
    basis : ndarray, shape (n, w)
    n_features : int
    standardize : bool

    Notes
    -----
    ``update`` costs ``4 * f * n * w`` flops for a block of ``f`` features.
    """

    _fields = ("basis", "product", "center", "scale", "seen", "sumsq", "standardize")

    def __init__(self, basis: np.ndarray, n_features: int, standardize: bool):
        self.basis = basis
        self.product = np.zeros_like(basis)
        self._init_features(n_features, standardize)

    def update(self, block: np.ndarray, start: int = 0) -> "GramProduct":
        block = self._center_block(block, start)
        self.product += block.T @ (block @ self.basis)  # (n, f) @ (f, w)
        return self

    def merge(self, other: "GramProduct") -> "GramProduct":
        self.product += other.product
        self._merge_features(other)
        return self


class StreamingSketch(FoldState):
    """One pass: ``C Omega`` for the centered covariance, merged exactly (Chan et al.).

    For a state ``(n, mean, Z = Mc Omega)`` where ``Mc`` is the co-moment of
    the state's samples about their own mean, two states over disjoint samples
    combine as ``Z = Z_a + Z_b + (n_a n_b / n) d (d^T Omega)`` with
    ``d = mean_b - mean_a``: the co-moment update of Chan, Golub and LeVeque
    applied to a thin product, so no large-mean cancellation occurs.

    Parameters
    ----------
    test : ndarray, shape (m, w)
        The random test matrix ``Omega`` (and any extra test vectors).
    """

    _fields = ("test", "count", "mean", "m2", "product")

    def __init__(self, test: np.ndarray):
        self.test = test
        self.count = 0
        self.mean = np.zeros(test.shape[0])
        self.m2 = np.zeros(test.shape[0])  # diagonal of the co-moment: the total variance
        self.product = np.zeros_like(test)

    def update(self, block: np.ndarray, start: int = 0) -> "StreamingSketch":
        rows = block.shape[0]
        if rows == 0:
            return self
        mean_b = block.mean(axis=0)
        block -= mean_b
        product = np.zeros_like(self.product)
        for a in range(0, rows, SLAB):  # bounded temporaries, as in CovarianceProduct
            slab = block[a:a + SLAB]
            product += slab.T @ (slab @ self.test)
        self._combine(rows, mean_b, np.einsum("ij,ij->j", block, block), product)
        return self

    def merge(self, other: "StreamingSketch") -> "StreamingSketch":
        if other.count:
            self._combine(other.count, other.mean, other.m2, other.product)
        return self

    def _combine(self, n_b: int, mean_b: np.ndarray, m2_b: np.ndarray, product_b: np.ndarray) -> None:
        n_a = self.count
        if n_a == 0:
            self.count, self.mean, self.m2, self.product = n_b, mean_b.copy(), m2_b.copy(), product_b.copy()
            return
        n = n_a + n_b
        delta = mean_b - self.mean
        weight = n_a * n_b / n
        self.mean = self.mean + delta * (n_b / n)
        self.m2 = self.m2 + m2_b + delta * delta * weight
        self.product += product_b
        self.product += np.outer(delta * weight, delta @ self.test)
        self.count = n
