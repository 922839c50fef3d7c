"""Pass states that place samples in component space (scores and squared norms).

Both apply the stored transformation ``xc = (x - center) / scale`` (a missing
value, filled with the mean, is 0 once centered) and the loadings ``L``
(m x k).  :class:`RowScores` takes blocks of whole samples and hands each
block's scores to a writer as it goes, so nothing of size ``n`` is held;
:class:`ColumnScores` takes blocks of whole features and sums their
contributions ``Bc^T L_b`` into an ``n x k`` array, mergeable by addition.
"""

from __future__ import annotations

import numpy as np

from rankfold.folds.base import FoldState

SLAB = 4096  # rows per product: bounds the temporaries whatever the block size


class RowScores(FoldState):
    """Scores and squared norms of blocks of whole samples, passed to ``sink(start, z, sumsq)``.

    Parameters
    ----------
    loadings : ndarray, shape (m, k)
    center, scale : ndarray, shape (m,)
    sink : callable
        Receives ``(start, scores (rows, k), sumsq (rows,))`` in row order.
    columns : ndarray of int, shape (m,), optional
        Positions of the loadings' features within a block, when the source
        stores them in another order or holds extra columns.

    Notes
    -----
    ``update`` costs ``2 * rows * m * k`` flops for a block of ``rows`` samples.
    """

    _fields = ("loadings", "center", "scale")
    resumable = False  # rows go to the sink as they are folded (see FoldState.resumable)
    sink = None  # not serialized (nor the column map): set them again after from_bytes
    columns = None

    def __init__(self, loadings, center, scale, sink, columns=None, missing: bool = True):
        self.loadings, self.center, self.scale = loadings, center, scale
        self.sink = sink
        self.columns = columns
        # Each elementwise sweep over a block costs about as much as the product itself
        # (k is small): skip the NaN scan when none can be present and unit scales.
        self.missing = missing
        self.unit = bool(np.all(scale == 1.0))

    missing, unit = True, False  # for states rebuilt by from_bytes: every step, as before

    def update(self, block: np.ndarray, start: int = 0) -> "RowScores":
        if self.columns is not None:
            block = block[:, self.columns]
        for a in range(0, block.shape[0], SLAB):
            slab = block[a:a + SLAB]
            slab -= self.center
            if self.missing:
                slab[np.isnan(slab)] = 0.0
            if not self.unit:
                slab /= self.scale
            self.sink(start + a, slab @ self.loadings, np.einsum("ij,ij->i", slab, slab))
        return self

    def merge(self, other: "RowScores") -> "RowScores":
        return self  # the rows went to the sink; nothing is left to combine


class ColumnScores(FoldState):
    """``Xc^T L`` and each sample's squared norm, summed over blocks of whole features.

    Parameters
    ----------
    loadings : ndarray, shape (m, k)
    center, scale : ndarray, shape (m,)
    n_samples : int
    rows : ndarray of int, shape (m,), optional
        For each loading row, its feature's position in the source (when the
        source orders features differently or holds extra ones); -1 never occurs.

    Notes
    -----
    ``update`` costs ``2 * f * n * k`` flops for a block of ``f`` features;
    the state holds ``n * (k + 1)`` float64 values.
    """

    _fields = ("loadings", "center", "scale", "scores", "sumsq")
    lookup = None  # not serialized: a state rebuilt by from_bytes reads features in loading order

    def __init__(self, loadings, center, scale, n_samples: int, rows=None):
        self.loadings, self.center, self.scale = loadings, center, scale
        self.scores = np.zeros((n_samples, loadings.shape[1]))
        self.sumsq = np.zeros(n_samples)
        # position in source -> loading row (or -1 for a feature the result does not use)
        self.lookup = None
        if rows is not None:
            self.lookup = np.full(int(np.max(rows)) + 1, -1)
            self.lookup[rows] = np.arange(len(rows))

    def update(self, block: np.ndarray, start: int = 0) -> "ColumnScores":
        stop = start + block.shape[0]
        if self.lookup is None:
            which = np.arange(start, stop)
        else:
            local = self.lookup[start:min(stop, len(self.lookup))]
            keep = np.flatnonzero(local >= 0)
            block, which = block[keep], local[keep]
            if not which.size:
                return self
        block -= self.center[which, None]
        block[np.isnan(block)] = 0.0
        block /= self.scale[which, None]
        self.scores += block.T @ self.loadings[which]
        self.sumsq += np.einsum("ij,ij->j", block, block)
        return self

    def merge(self, other: "ColumnScores") -> "ColumnScores":
        self.scores += other.scores  # disjoint features: contributions add
        self.sumsq += other.sumsq
        return self
