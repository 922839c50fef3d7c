"""The per-sample stage after every route: scores, residuals and the outlier flag.

Uses what the route left in :class:`~rankfold.sample_outputs.SampleParts`
(scores in memory, or the captured tall product) and reads the data once more
only when the route produced neither (the feature-Gram route, the one-pass
sketch on samples stored as rows): see :func:`needs_pass`.
"""

from __future__ import annotations

import numpy as np

from rankfold.folds import ColumnScores, RowScores
from rankfold.memory import block_budget
from rankfold.routes.common import Decomposition, RouteInput, run_pass
from rankfold.sample_outputs import ScoreWriter, chunk_rows, stage_bytes

NAME = "scores"


def needs_pass(route: str, native_axis: str, sketch: str) -> bool:
    """Whether ``route`` needs one more read of the data to write scores."""
    if route == "features":
        return True
    return route == "sketch" and sketch == "one-pass" and native_axis == "samples"


def write(dec: Decomposition, inp: RouteInput, sink: ScoreWriter) -> np.ndarray:
    """Write every sample's scores, residual and residual fraction through ``sink``; return every residual.

    ``sink`` (:func:`rankfold.sample_outputs.score_sink`) holds the arrays of
    length n, chunked along samples.  When they are in a store cluster workers
    can open, the workers write the rows they compute (:mod:`rankfold.cluster.rows`).
    The residuals (n,) are returned for the outlier rule, which needs all of them.
    """
    n, k = dec.n_samples, dec.loadings.shape[1]
    parts = dec.parts
    try:
        if parts.scores is not None:
            # Scores that came out of the route are in this process already: written from here.
            step = chunk_rows(n, k)
            for a in range(0, n, step):
                sink(a, parts.scores[a:a + step], parts.sumsq[a:a + step])
        elif parts.tall is not None:
            try:
                if not _tall_on_cluster(inp, parts, sink):
                    for a, y, sumsq in parts.tall.chunks():
                        sink(a, y @ parts.coefficients, sumsq)
            finally:
                parts.tall.remove()
        else:
            # Along samples, like the route before it: whole samples need no n x k sum in memory.
            project(inp, dec.loadings, dec.center, dec.scale, sink, dec.passes, NAME, axis="samples")
        sink.close()
    except BaseException:
        sink.abort()  # before the caller removes the store the writes go to
        raise
    return sink.residual


def _tall_on_cluster(inp: RouteInput, parts, sink: ScoreWriter) -> bool:
    if inp.cluster is None:
        return False
    from rankfold.cluster.rows import scores_from_tall

    return scores_from_tall(inp.cluster, parts.tall, parts.coefficients, sink)


def project(inp: RouteInput, loadings, center, scale, sink, passes: list, label: str,
            prepare=None, positions=None, axis: str | None = None) -> None:
    """One pass placing every sample of ``inp.source`` with the given transformation.

    Blocks of whole samples go straight to ``sink`` in row order; a source
    stored feature-major is folded into an ``n x k`` sum first (held in
    memory) and then handed over in chunks.  ``positions`` (m,) gives each
    loading row's feature position in the source when they differ.  ``axis``
    chooses the reading direction (default: the source's stored rows).
    """
    source = inp.source
    n, k = source.n_samples, loadings.shape[1]
    if prepare is None:
        def prepare(block, start):
            return block
    # The arrays the sink fills (in memory, or the writer's buffers) and every residual.
    outputs = stage_bytes(n, k, inp.outputs_held) + loadings.nbytes
    if (axis or source.native_axis) == "samples":
        fixed = outputs + source.fixed_read_bytes("samples")
        budget = block_budget(inp.memory_limit, fixed, source.min_block_bytes("samples"), "the scores pass")
        # Missing values can only be present under fill-mean: the route (or prepare) refused them otherwise.
        state = RowScores(loadings, center, scale, sink, positions, missing=inp.missing == "fill-mean")
        _, record = run_pass(label, inp, source.partition("samples", budget), state, prepare)
        passes.append(record)
        return
    fixed = n * (k + 3) * 8 + outputs + source.fixed_read_bytes("features")
    budget = block_budget(inp.memory_limit, fixed, source.min_block_bytes("features"), "the scores pass")
    state = ColumnScores(loadings, center, scale, n, positions)
    state, record = run_pass(label, inp, source.partition("features", budget), state, prepare)
    passes.append(record)
    step = chunk_rows(n, k)
    for a in range(0, n, step):
        sink(a, state.scores[a:a + step], state.sumsq[a:a + step])
