"""One pass over the data as cluster tasks (the client side of :mod:`rankfold.cluster`).

The partition's blocks are cut into contiguous ranges, ``TASKS_PER_THREAD``
per worker thread (enough to even out a slow worker, few enough that states
stay a small part of the traffic).  Each range is a task that folds its
blocks into a fresh copy of the empty state; results merge pairwise in a
balanced tree of tasks on the workers (so large states such as an n x n Gram
matrix are added where they are, and only the final state comes back to the
client).  Merging is exact for every state (:mod:`rankfold.folds`), so the
answer equals a serial pass to rounding (about 1e-15 relative, merge order).
"""

from __future__ import annotations

import dataclasses
import time
import uuid

import cloudpickle

from rankfold.cluster.worker import fold_range, merge_pair, pack_state
from rankfold.errors import ClusterError
from rankfold.routes.common import PassRecord
from rankfold.sources.base import Partition

# Attributes of feature-block states used in messages only: not shipped (a worker takes
# the names from its own source), restored on the merged state.
MESSAGE_ONLY = ("feature_names", "source_path")
TASKS_PER_THREAD = 3  # block ranges per worker thread: evens out a slow worker, keeps states few


def block_ranges(n_blocks: int, n_tasks: int) -> list[tuple[int, int]]:
    """Cut ``n_blocks`` into ``n_tasks`` (or fewer) contiguous ranges of near-equal length."""
    n_tasks = max(1, min(n_blocks, n_tasks))
    edges = [round(i * n_blocks / n_tasks) for i in range(n_tasks + 1)]
    return [(a, b) for a, b in zip(edges[:-1], edges[1:]) if b > a]


def _extras(state) -> dict:
    """Attributes of ``state`` that ``to_bytes`` does not carry (lookup tables, widths, callbacks)."""
    return {k: v for k, v in vars(state).items() if k not in type(state)._fields and k not in MESSAGE_ONLY}


def row_hook(state) -> tuple[str, object] | None:
    """The attribute of ``state`` that receives rows while it folds, and its value (None if none)."""
    for attr, value in _extras(state).items():
        if callable(value):
            return attr, value
    return None


def runs_on_client(state) -> bool:
    """Whether ``state``'s pass must run in this process: it hands rows to a sink that only lives here.

    A sink with a ``worker_plan`` (a store other processes can open) is
    rebuilt on each worker for a range of rows instead (:mod:`rankfold.cluster.rows`).
    """
    hook = row_hook(state)
    return hook is not None and getattr(hook[1], "worker_plan", lambda: None)() is None


def cluster_pass(name: str, inp, partition: Partition, state, prepare) -> tuple[object, PassRecord]:
    """Run one pass of ``partition`` on ``inp.cluster``; same contract as ``run_pass``.

    ``state`` is the empty template; its class, its bytes, its attributes that
    are not serialized (lookup tables, widths) and ``prepare`` are shipped with
    each task.  A state that hands rows to a sink (scores written while they
    are computed, the randomized route's captured thin product) has each task
    write a range of whole chunks itself when the sink's store is one the
    workers can open; otherwise the pass runs here, serially.  Returns the
    merged state and the pass record.
    """
    if runs_on_client(state):
        from rankfold.routes.common import run_pass

        return run_pass(name, dataclasses.replace(inp, cluster=None), partition, state, prepare)
    from distributed import as_completed

    from rankfold.cluster import rows as row_tasks
    from rankfold.cluster.worker import extra_of

    session = inp.cluster
    client = session.client
    source = inp.source
    spec = source.spec()
    t0 = time.perf_counter()
    cls = type(state)
    hook = row_hook(state)
    extras = {k: v for k, v in _extras(state).items() if hook is None or k != hook[0]}
    template = pack_state(state)
    names = {"feature_names": getattr(state, "feature_names", None) is not None,
             "source_path": getattr(state, "source_path", None), "extras": extras}
    shipped = len(template) + len(cloudpickle.dumps(prepare)) + len(cloudpickle.dumps(spec))
    key = f"rankfold-{name.replace(' ', '-')}-{uuid.uuid4().hex[:8]}"
    n_tasks = session.tasks_per_pass
    if hook is None:
        pieces = [{"bounds": partition.bounds[a:b], "blocks": b - a, "rows": None}
                  for a, b in block_ranges(len(partition), n_tasks)]
    else:
        # Each task writes rows lo:hi of the sink's arrays, whole chunks only.
        plan = hook[1].worker_plan()
        session.check_output(plan)
        pieces = row_tasks.row_pieces(partition, plan.chunk, n_tasks)
        for piece in pieces:
            piece["rows"] = {"hook": hook[0], "plan": plan, "lo": piece["lo"], "hi": piece["hi"],
                             "stop": row_tasks.stop_name(key)}
    folds = [client.submit(fold_range, spec, partition.axis, piece["bounds"], cls, template, prepare,
                           session.blas_limits, names, piece["rows"], key=f"{key}-fold-{i}", pure=False)
             for i, piece in enumerate(pieces)]
    level, depth, merges = folds, 0, []
    while len(level) > 1:
        depth += 1
        nxt = [client.submit(merge_pair, cls, level[i], level[i + 1], key=f"{key}-merge-{depth}-{i // 2}",
                             pure=False) for i in range(0, len(level) - 1, 2)]
        merges.extend(nxt)
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    root = level[0]
    session.tasks += len(folds) + len(merges)
    position = {f.key: i for i, f in enumerate(folds)}
    unit_bytes = source.other_length(partition.axis) * source.storage_dtype.itemsize
    done_blocks = read = 0
    try:
        # Progress comes from completion notices only: fold states stay on the workers
        # for their merges, and only the root's state is fetched.
        with client.as_current():  # as_completed looks for the current client; ours need not be the default
            for future in as_completed(folds):
                if future.status == "error":
                    future.result()  # raises the worker's exception here
                piece = pieces[position[future.key]]
                done_blocks += piece["blocks"]
                read += sum(hi - lo for lo, hi in piece["bounds"]) * unit_bytes
                if inp.progress is not None:
                    inp.progress({"pass": name, "block": done_blocks, "blocks": len(partition), "bytes": read,
                                  "seconds": time.perf_counter() - t0})
        payload, _blocks, read = root.result()[:3]
        if hook is not None:
            # The rows went to the store; what comes back is small (a scores pass: each row's residual).
            for piece, value in zip(pieces, client.gather([client.submit(extra_of, f, pure=False) for f in folds])):
                hook[1].receive(piece["lo"], value)
                # Twice: inside the fold's result on its way to a merge, and to us.
                session.bytes_moved += 2 * getattr(value, "nbytes", 0)
    except Exception as exc:
        if hook is not None:
            row_tasks.settle(client, folds, key)  # nobody may still write when the store is removed
        # Stop what is still queued; finished futures are released with their references
        # (cancelling a finished future that a merge still needs upsets the scheduler).
        pending = [f for f in [*folds, *merges] if not f.done()]
        if pending:
            client.cancel(pending)
        raise_as_cluster_error(exc, name)
    # Upper bound of the traffic: every task's arguments once, and every fold or merge
    # result once to its merge or to us (states have the same size whatever their range).
    session.bytes_moved += len(folds) * shipped + (len(folds) + len(merges)) * len(payload)
    merged = cls.from_bytes(payload)
    for attr in (*MESSAGE_ONLY, *_extras(state)):
        if getattr(state, attr, None) is not None:
            setattr(merged, attr, getattr(state, attr))
    record = PassRecord(name, partition.axis, len(partition), partition.largest, read, time.perf_counter() - t0)
    return merged, record


def raise_as_cluster_error(exc: Exception, name: str):
    """Our own errors pass through (a DataError found on a worker); cluster failures get a message."""
    from rankfold.errors import RankfoldError

    if isinstance(exc, RankfoldError):
        raise exc.with_traceback(None) from None
    from distributed.scheduler import KilledWorker

    if isinstance(exc, KilledWorker):
        raise ClusterError(f"the {name} pass failed: workers died repeatedly while running one of its tasks "
                           f"({exc}); check the workers' memory against the planner's peak estimate "
                           "(`rankfold plan`)") from None
    if isinstance(exc, TimeoutError) or type(exc).__name__ in ("CommClosedError", "CancelledError",
                                                               "FutureCancelledError"):
        raise ClusterError(f"the {name} pass lost its cluster ({type(exc).__name__}: {exc}); "
                           "no result was written") from None
    if isinstance(exc, OSError):  # raised inside a task: the worker's storage (a full disk, a lost mount)
        raise ClusterError(f"the {name} pass failed on a worker ({type(exc).__name__}: {exc}); check the "
                           "workers' storage for the data and the output; no result was written") from None
    raise exc
