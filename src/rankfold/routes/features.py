"""Feature-Gram route: fold blocks of whole samples into the m x m co-moment matrix.

Passes: one when nothing is missing; two with ``missing="fill-mean"`` (the
column means must be known before filled blocks can be folded).  Cost about
``2 * n * m**2`` flops for the Gram products and ``O(m**3)`` for the
eigenproblem.  Memory: three m x m float64 matrices plus the blocks in flight.
"""

from __future__ import annotations

import numpy as np

from rankfold.errors import DataError
from rankfold.folds import ColumnMoments, FeatureGram
from rankfold.linalg import top_eigh
from rankfold.memory import block_budget
from rankfold.routes.common import (Decomposition, RouteInput, check_numerical_rank, check_values,
                                    output_bytes, run_pass)

NAME = "features"


def fixed_bytes(n_samples: int, n_features: int, rank: int) -> int:
    """State and eigenproblem bytes: the co-moment, one block product, one outer-product term."""
    return 3 * n_features * n_features * 8 + 16 * n_features * 8


def run(inp: RouteInput) -> Decomposition:
    source = inp.source
    m = source.n_features
    budget = block_budget(inp.memory_limit, fixed_bytes(source.n_samples, m, inp.rank)
                          + source.fixed_read_bytes("samples") + output_bytes(inp), source.min_block_bytes("samples"),
                          "the feature-Gram route")
    partition = source.partition("samples", budget)
    passes = []
    fill = None
    if inp.missing == "fill-mean":
        def check_only(block, start):
            check_values(block, start, "samples", inp, allow_missing=True)
            return block

        means, record = run_pass("column means", inp, partition, ColumnMoments(m), check_only)
        passes.append(record)
        empty = np.flatnonzero(means.count == 0)
        if empty.size:
            names = ", ".join(repr(source.feature_names[j]) for j in empty[:5])
            raise DataError(f"{source.path}: column(s) {names} hold no values at all, so there is "
                            "no mean to fill with; leave them out of the selection")
        fill = means.mean

    def prepare(block, start):
        check_values(block, start, "samples", inp, allow_missing=fill is not None)
        if fill is not None:
            rows, cols = np.nonzero(np.isnan(block))
            block[rows, cols] = fill[cols]
        return block

    gram, record = run_pass("feature Gram", inp, partition, FeatureGram(m), prepare)
    passes.append(record)
    return finish(gram, inp, passes)


def finish(gram: FeatureGram, inp: RouteInput, passes: list) -> Decomposition:
    """Covariance (or correlation) from the folded state, then its top eigenpairs."""
    source = inp.source
    if gram.count < 2:
        raise DataError(f"{source.path}: {gram.count} sample(s); a variance needs at least two")
    cov = gram.comoment
    cov /= gram.count - 1  # in place: the state is finished with
    scale = np.ones(source.n_features)
    if inp.standardize:
        scale = np.sqrt(np.diag(cov)).copy()
        constant = np.flatnonzero(scale == 0)
        if constant.size:
            names = ", ".join(repr(source.feature_names[j]) for j in constant[:5])
            more = f" and {constant.size - 5} more" if constant.size > 5 else ""
            raise DataError(
                f"{source.path}: column(s) {names}{more} are constant, so they have no correlation "
                "to scale; leave them out, or drop --standardize to analyse covariances")
        cov /= scale[:, None]
        cov /= scale[None, :]
    total = float(np.trace(cov))
    values, vectors = top_eigh(cov, inp.rank)
    values = check_numerical_rank(values, max(gram.count, source.n_features), inp)
    return Decomposition(NAME, vectors, values, total, gram.mean, scale, gram.count,
                         passes=passes).with_sign_rule()
