"""Passes whose workers write per-sample rows themselves (the client side).

A scores pass, and the randomized route's last pass on samples stored as
rows, hand rows to a sink while they fold (:class:`~rankfold.sample_outputs.ScoreWriter`,
:class:`~rankfold.sample_outputs.TallProduct`).  On a cluster each task gets a
range of rows that starts and ends on a chunk boundary of the output arrays
and writes those rows itself, through the same buffered
:class:`~rankfold.sample_outputs.RowWriter` as a serial run; ranges are
disjoint, so every chunk has exactly one writer and every write covers whole
chunks.  Only each row's residual comes back (8 bytes a sample: the flag rule
needs the median of all of them).

A task's range follows the output's chunks, not the source's blocks: a source
block straddling two ranges is read in two parts, one by each task (at most
one extra partial block per task boundary).

When one task fails, the others stop between blocks (a ``distributed.Event``)
and the client waits for them before raising, so that no worker writes into
a store the client is about to remove.
"""

from __future__ import annotations

import math
import uuid

import numpy as np

from rankfold.cluster.passes import block_ranges, raise_as_cluster_error
from rankfold.sources.base import Partition

SETTLE_TIMEOUT = 120.0  # seconds to wait for stopped tasks before giving up on them


def row_pieces(partition: Partition, chunk: int, n_tasks: int) -> list[dict]:
    """Cut ``partition`` (blocks of samples) into ranges of whole output chunks.

    Returns one dict per task: ``lo``, ``hi`` (rows; ``lo`` a multiple of
    ``chunk``), ``bounds`` (the partition's blocks clipped to ``lo:hi``) and
    ``blocks`` (how many of the partition's blocks end inside the range, so
    that the counts add up to ``len(partition)`` for progress).
    """
    n = partition.bounds[-1][1] if partition.bounds else 0
    pieces = []
    for a, b in block_ranges(math.ceil(n / chunk), n_tasks):
        lo, hi = a * chunk, min(n, b * chunk)
        bounds = tuple((max(s, lo), min(e, hi)) for s, e in partition.bounds if s < hi and e > lo)
        ends = sum(1 for _s, e in partition.bounds if lo < e <= hi)
        pieces.append({"lo": lo, "hi": hi, "bounds": bounds, "blocks": ends})
    return pieces


def stop_name(key: str) -> str:
    return f"{key}-stop"


def settle(client, futures: list, key: str) -> None:
    """After a failure: tell the pass's tasks to stop, and wait until none is still writing."""
    from distributed import Event, wait

    try:
        Event(stop_name(key), client=client).set()
        wait(futures, timeout=SETTLE_TIMEOUT)
    except Exception:  # the cluster itself is gone: nothing is left running to wait for
        pass


def scores_from_tall(session, tall, coefficients: np.ndarray, writer) -> bool:
    """Write scores ``Y S`` from a stored tall product on the workers; False when it cannot run there.

    ``tall`` is a :class:`~rankfold.sample_outputs.TallProduct` in a scratch
    folder the workers see, ``writer`` the :class:`~rankfold.sample_outputs.ScoreWriter`
    of the result store; its residuals are filled from the workers' answers.
    """
    from distributed import as_completed

    from rankfold.cluster.worker import tall_scores

    plan, source = writer.worker_plan(), tall.worker_plan()
    if plan is None or source is None:
        return False
    session.check_output(plan)
    client = session.client
    tall.writer.close()  # nothing is buffered here (the workers wrote Y), but close the thread cleanly
    key = f"rankfold-scores-from-tall-{uuid.uuid4().hex[:8]}"
    n = writer.stop
    ranges = [(a * plan.chunk, min(n, b * plan.chunk))
              for a, b in block_ranges(math.ceil(n / plan.chunk), session.tasks_per_pass)]
    futures = [client.submit(tall_scores, source, coefficients, plan, lo, hi, session.blas_limits, stop_name(key),
                             key=f"{key}-{i}", pure=False) for i, (lo, hi) in enumerate(ranges)]
    session.tasks += len(futures)
    where = {f.key: lo for f, (lo, _hi) in zip(futures, ranges)}
    try:
        with client.as_current():
            for future in as_completed(futures):
                residual = future.result()
                writer.receive(where[future.key], residual)
                session.bytes_moved += residual.nbytes
    except Exception as exc:
        settle(client, futures, key)
        raise_as_cluster_error(exc, "scores")
    session.bytes_moved += len(futures) * (coefficients.nbytes + 1024)  # arguments: coefficients and recipes
    return True
