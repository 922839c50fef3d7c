"""In-memory route: load the whole table and let LAPACK take its SVD.

For tables that fit comfortably in the memory ceiling.  The thin SVD of the
centered table (``scipy.linalg.svd``, LAPACK ``gesdd``) is more accurate than
an eigendecomposition of its Gram matrix, since squaring the table squares its
condition number.  One read; memory about four copies of the table in float64.
"""

from __future__ import annotations

import time

import numpy as np
import scipy.linalg

from rankfold.errors import DataError
from rankfold.memory import block_budget
from rankfold.sample_outputs import SampleParts
from rankfold.routes.common import (Decomposition, PassRecord, RouteInput, check_numerical_rank, check_values,
                                    output_bytes)

NAME = "memory"


def fixed_bytes(n_samples: int, n_features: int, rank: int) -> int:
    """The table, its centered copy and the SVD factors and workspace, in float64."""
    return 4 * n_samples * n_features * 8


def run(inp: RouteInput) -> Decomposition:
    source = inp.source
    n, m = source.shape
    block_budget(inp.memory_limit, fixed_bytes(n, m, inp.rank) + output_bytes(inp), 0, "the in-memory route")
    if n < 2:
        raise DataError(f"{source.path}: {n} sample(s); a variance needs at least two")
    t0 = time.perf_counter()
    x = source.read("samples", 0, n)
    check_values(x, 0, "samples", inp, allow_missing=inp.missing == "fill-mean")
    record = PassRecord("load", "samples", 1, n, x.size * source.storage_dtype.itemsize,
                        time.perf_counter() - t0)
    if inp.progress is not None:  # one read, one block: the same event a streamed pass gives
        inp.progress({"pass": record.name, "block": 1, "blocks": 1, "bytes": record.bytes_read,
                      "seconds": record.seconds})
    missing = np.isnan(x)
    if missing.any():
        present = (~missing).sum(axis=0)
        if np.any(present == 0):
            j = int(np.flatnonzero(present == 0)[0])
            raise DataError(f"{source.path}: column {source.feature_names[j]!r} holds no values at all, "
                            "so there is no mean to fill with; leave it out of the selection")
        x[missing] = np.take(np.nanmean(x, axis=0), np.nonzero(missing)[1])
    center = x.mean(axis=0)
    x -= center
    scale = np.ones(m)
    if inp.standardize:
        scale = np.sqrt(np.einsum("ij,ij->j", x, x) / (n - 1))
        constant = np.flatnonzero(scale == 0)
        if constant.size:
            names = ", ".join(repr(source.feature_names[j]) for j in constant[:5])
            raise DataError(f"{source.path}: column(s) {names} are constant, so they have no correlation "
                            "to scale; leave them out, or drop --standardize to analyse covariances")
        x /= scale
    sumsq = np.einsum("ij,ij->i", x, x)  # before the SVD overwrites x
    total = float(sumsq.sum()) / (n - 1)
    u, s, vt = scipy.linalg.svd(x, full_matrices=False, overwrite_a=True, check_finite=False)
    k = inp.rank
    variance = check_numerical_rank(s[:k] ** 2 / (n - 1), max(n, m), inp)
    parts = SampleParts(scores=u[:, :k] * s[:k], sumsq=sumsq)
    return Decomposition(NAME, vt[:k].T.copy(), variance, total, center, scale, n,
                         parts=parts, passes=[record]).with_sign_rule()
