"""Sample-Gram route: fold blocks of whole features into the n x n Gram matrix.

For tables with few samples and many features, or samples stored as columns.
Pass 1 folds ``G = Xc Xc^T`` (each feature block centered, filled and scaled
on its own, so missing values never need a pass of their own); the top
eigenpairs ``G u = lambda u`` give scores ``u * sqrt(lambda)`` directly; pass 2
recovers the loadings ``Xc^T u / sqrt(lambda)``.  Cost about
``2 * m * n**2 + 2 * m * n * k`` flops; memory three n x n float64 matrices.
"""

from __future__ import annotations

import numpy as np

from rankfold.errors import DataError
from rankfold.folds import FeatureProjection, SampleGram
from rankfold.linalg import top_eigh
from rankfold.memory import block_budget
from rankfold.sample_outputs import SampleParts
from rankfold.routes.common import (Decomposition, RouteInput, check_numerical_rank, feature_block_check,
                                    output_bytes, run_pass)

NAME = "samples"


def fixed_bytes(n_samples: int, n_features: int, rank: int) -> int:
    """The Gram matrix, one block product, the eigenproblem; centers, scales and loadings."""
    return 3 * n_samples * n_samples * 8 + n_features * (3 + rank) * 8 + 2 * n_samples * rank * 8


def run(inp: RouteInput) -> Decomposition:
    source = inp.source
    n, m = source.shape
    if n < 2:
        raise DataError(f"{source.path}: {n} sample(s); a variance needs at least two")
    budget = block_budget(inp.memory_limit, fixed_bytes(n, m, inp.rank) + source.fixed_read_bytes("features") + output_bytes(inp),
                          source.min_block_bytes("features"), "the sample-Gram route")
    partition = source.partition("features", budget)
    prepare = feature_block_check(inp)

    state = SampleGram(n, m, inp.standardize)
    state.feature_names, state.source_path = source.feature_names, source.path
    state, gram_pass = run_pass("sample Gram", inp, partition, state, prepare)
    values, vectors = top_eigh(state.gram, inp.rank)
    del state.gram
    # Dividing by the square root of a round-off eigenvalue would make a loading of
    # noise, not a unit vector: refuse such ranks.
    values = check_numerical_rank(values, max(n, m), inp)
    sigma = np.sqrt(values)
    projection = FeatureProjection(vectors / sigma, state.center, state.scale)
    projection, load_pass = run_pass("loadings", inp, partition, projection, lambda b, s: b)
    parts = SampleParts(scores=vectors * sigma, sumsq=projection.sample_sumsq)
    result = Decomposition(NAME, projection.loadings, values / (n - 1), state.sumsq / (n - 1),
                           state.center, state.scale, n, parts=parts, passes=[gram_pass, load_pass])
    return result.with_sign_rule()
