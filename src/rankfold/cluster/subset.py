"""Reading a comparison's subset on cluster workers (client side and task bodies).

The serial read (:func:`rankfold.compare.subset.materialize`) walks a list
of sample spans (or, for samples stored as columns that no single read
holds, blocks of whole features).  Here that list is cut into contiguous
groups, ``TASKS_PER_THREAD`` per worker thread (more when one group's rows
would exceed an eighth of the ceiling), and each group is one task: the
worker reopens the source from its recipe, reads the group's spans exactly as
the serial code would (:func:`~rankfold.compare.subset.pick_rows`, the same
pieces), and returns only the drawn rows.  The client places them into the
subset (an array in memory or the scratch ``.npy``), so the table equals the
serial one bit for bit.  What travels: the recipe, the drawn indices of the
group and the subset's own rows -- the subset is the product, at most
``fraction`` of the table -- never whole data blocks.

The worker functions (``read_rows``, ``read_columns``) are imported on the
workers by reference; this module imports dask and distributed only inside
the client-side functions.
"""

from __future__ import annotations

import math
import uuid

import cloudpickle
import numpy as np

from rankfold.cluster.passes import block_ranges, raise_as_cluster_error
from rankfold.cluster.worker import blas_limit
from rankfold.sources.spec import reopen

# Bytes added per returned array for its pickled header (dtype, shape, frames): a generous
# bound, so that ``bytes_moved`` stays an upper bound of the traffic.
RESULT_HEADER = 1024
PASS_NAME = "subset read"


def group_count(session, n_items: int, subset_bytes: int, memory_limit: int) -> int:
    """Tasks for ``n_items`` spans or blocks: three per worker thread, more when a group's rows would pass limit/8.

    A worker holds its group's drawn rows until the client fetches them, so a
    group larger than an eighth of the ceiling (possible when the subset itself
    is held on disk) is cut further.
    """
    by_size = math.ceil(subset_bytes / max(1, memory_limit // 8))
    return max(1, min(n_items, max(session.tasks_per_pass, by_size)))


def fill_from_samples(session, source, draw, data: np.ndarray, spans: list, piece_rows: int,
                      memory_limit: int) -> int:
    """Read ``spans`` on the cluster and place the drawn rows into ``data``, in order; return rows placed.

    Parameters
    ----------
    session : ClusterSession
    source : Source
        Opened in this process; workers reopen it from ``source.spec()``.
    draw : SubsetDraw
    data : ndarray or memmap, shape (draw.rows.size, draw.features.size)
    spans : list of (int, int)
        From :func:`rankfold.compare.subset._read_spans`.
    piece_rows : int
        Samples per read, as in the serial code (from the ceiling, per process).
    memory_limit : int
        The ceiling, which applies to each process (sizes the groups).
    """
    spec = source.spec()
    features = None if draw.features.size == source.n_features else draw.features
    groups = block_ranges(len(spans), group_count(session, len(spans), data.nbytes, memory_limit))
    tasks, places = [], []
    for g0, g1 in groups:
        lo, hi = (int(i) for i in np.searchsorted(draw.rows, [spans[g0][0], spans[g1 - 1][1]]))
        args = (spec, tuple(spans[g0:g1]), draw.rows[lo:hi], features, int(piece_rows), session.blas_limits)
        tasks.append(args)
        places.append((lo, hi))

    def place(i, rows):
        lo, hi = places[i]
        if rows.shape != (hi - lo, data.shape[1]):  # pragma: no cover - guards the bookkeeping
            raise ValueError(f"group {i} returned {rows.shape} rows, expected {(hi - lo, data.shape[1])}")
        data[lo:hi] = rows
        return hi - lo

    return _run(session, read_rows, tasks, place)


def fill_from_features(session, source, draw, data: np.ndarray, blocks: list, memory_limit: int) -> int:
    """Read feature ``blocks`` on the cluster and place the subset's columns into ``data``; return its rows.

    ``blocks`` come from :func:`rankfold.compare.subset.feature_blocks`; the
    other parameters are those of :func:`fill_from_samples`.  Every task gets
    all drawn sample indices (``8 x rows`` bytes) and returns its features'
    columns of the subset.
    """
    spec = source.spec()
    groups = block_ranges(len(blocks), group_count(session, len(blocks), data.nbytes, memory_limit))
    tasks, places = [], []
    for g0, g1 in groups:
        f0, f1 = (int(i) for i in np.searchsorted(draw.features, [blocks[g0][0], blocks[g1 - 1][1]]))
        tasks.append((spec, tuple(blocks[g0:g1]), draw.rows, draw.features[f0:f1], session.blas_limits))
        places.append((f0, f1))

    def place(i, columns):
        f0, f1 = places[i]
        if columns.shape != (data.shape[0], f1 - f0):  # pragma: no cover - guards the bookkeeping
            raise ValueError(f"group {i} returned {columns.shape} columns, expected {(data.shape[0], f1 - f0)}")
        data[:, f0:f1] = columns
        return 0

    _run(session, read_columns, tasks, place)
    return int(draw.rows.size)


def _run(session, fn, tasks: list, place) -> int:
    """Submit one task per argument tuple; place each result as it arrives; return the sum of ``place``'s counts."""
    from distributed import as_completed

    client = session.client
    key = f"rankfold-subset-{uuid.uuid4().hex[:8]}"
    futures = [client.submit(fn, *args, key=f"{key}-{i}", pure=False) for i, args in enumerate(tasks)]
    position = {f.key: i for i, f in enumerate(futures)}
    session.tasks += len(futures)
    session.bytes_moved += sum(len(cloudpickle.dumps(args)) for args in tasks)
    total = 0
    try:
        with client.as_current():
            for future in as_completed(futures):
                result = future.result()  # raises the worker's exception here
                session.bytes_moved += result.nbytes + RESULT_HEADER
                total += place(position[future.key], result)
                del result
                future.release()  # the worker may drop its copy now
    except Exception as exc:
        pending = [f for f in futures if not f.done()]
        if pending:
            client.cancel(pending)
        raise_as_cluster_error(exc, PASS_NAME)
    return total


# ---------------------------------------------------------------- task bodies (run on workers)


def read_rows(spec, spans: tuple, rows: np.ndarray, features, piece_rows: int, limits: dict) -> np.ndarray:
    """The drawn rows (of the kept features) of ``spans``, read as the serial code reads them.

    Returns
    -------
    ndarray, shape (rows inside spans, kept features)
    """
    from threadpoolctl import threadpool_limits

    from rankfold.compare.subset import pick_rows

    source = reopen(spec)
    if features is None:
        features = np.arange(source.n_features, dtype=np.int64)
    lo, hi = np.searchsorted(rows, [spans[0][0], spans[-1][1]])
    out = np.empty((int(hi - lo), features.size), dtype=np.float64)
    filled = 0
    with threadpool_limits(limits=blas_limit(limits), user_api="blas"):
        for picked in pick_rows(source, spans, rows, features, piece_rows):
            out[filled:filled + picked.shape[0]] = picked
            filled += picked.shape[0]
    return out[:filled]


def read_columns(spec, blocks: tuple, rows: np.ndarray, features: np.ndarray, limits: dict) -> np.ndarray:
    """The drawn samples of ``features`` (all inside ``blocks``), read one feature block at a time.

    Returns
    -------
    ndarray, shape (rows.size, features.size)
    """
    from threadpoolctl import threadpool_limits

    from rankfold.compare.subset import pick_columns

    source = reopen(spec)
    out = np.empty((rows.size, features.size), dtype=np.float64)
    offset = int(np.searchsorted(features, blocks[0][0]))  # 0: features start inside the first block
    with threadpool_limits(limits=blas_limit(limits), user_api="blas"):
        for f0, f1, picked in pick_columns(source, blocks, rows, features):
            out[:, f0 - offset:f1 - offset] = picked
    return out
