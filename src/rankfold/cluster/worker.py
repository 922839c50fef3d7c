"""Functions that run on cluster workers (imported there by reference).

Each is small and takes only picklable arguments: a source recipe, block
bounds, a compressed empty state, the route's ``prepare`` step.  They never
return data blocks: a fold task returns the state's bytes and its read count.
"""

from __future__ import annotations

import os
import socket
import zlib

import numpy as np

from rankfold.sources.base import Partition
from rankfold.sources.readahead import iter_blocks
from rankfold.sources.spec import reopen


def pack_state(state) -> bytes:
    """An (empty) state as compressed bytes: zero matrices shrink to almost nothing."""
    return zlib.compress(state.to_bytes(), 1)


def unpack_state(cls, payload: bytes):
    return cls.from_bytes(zlib.decompress(payload))


def blas_limit(limits: dict) -> int:
    """BLAS threads for this worker: its host's cores shared among the host's worker threads."""
    try:
        from distributed import get_worker

        host = get_worker().address.rsplit(":", 1)[0]
    except Exception:  # not inside a worker (direct call in tests)
        host = None
    return int(limits.get(host, limits.get(None, 1)))


def fold_range(spec, axis: str, bounds: tuple, cls, template: bytes, prepare, limits: dict,
               names: dict, rows: dict | None = None) -> tuple:
    """Fold blocks ``bounds`` of the source into a fresh state; return (state bytes, blocks, bytes read, extra).

    ``names`` restores what ``to_bytes`` does not carry: the message-only
    attributes of feature-block states (``feature_names``, ``source_path``)
    and, under ``"extras"``, other plain attributes (lookup tables, widths).

    ``rows``, for a state that hands rows to a sink as it folds, says how this
    worker writes them itself: ``{"hook": attribute name, "plan": StoredRows,
    "lo": first row, "hi": end, "stop": name of a distributed Event}``.  The
    range ``lo:hi`` starts and ends on chunk boundaries, so no other writer
    touches its chunks; ``extra`` is the sink's ``result()`` (the residuals of
    a scores pass).  When the event is set (another task failed) the task
    stops between blocks, after its writes in flight have landed.
    """
    from threadpoolctl import threadpool_limits

    source = reopen(spec)
    state = unpack_state(cls, template)
    if names.get("feature_names"):
        state.feature_names = source.feature_names
    if names.get("source_path"):
        state.source_path = names["source_path"]
    for attr, value in names.get("extras", {}).items():
        setattr(state, attr, value)
    sink = stop = None
    if rows is not None:
        sink = rows["plan"].start(rows["lo"], rows["hi"])
        setattr(state, rows["hook"], sink)
        stop = _event(rows["stop"])
    itemsize = source.storage_dtype.itemsize
    read = 0
    try:
        with threadpool_limits(limits=blas_limit(limits), user_api="blas"):
            for _index, start, block in iter_blocks(source, Partition(axis, tuple(bounds))):
                if stop is not None and stop.is_set():
                    raise RuntimeError("stopped: another task of this pass failed")
                read += block.size * itemsize
                state.update(prepare(block, start), start)
                del block
        if sink is not None:
            sink.close()
    except BaseException:
        if sink is not None:
            sink.abort()  # no write may land after the client removes the store
        raise
    if sink is not None:
        setattr(state, rows["hook"], None)
    return state.to_bytes(), len(bounds), read, (sink.result() if sink is not None else None)


def tall_scores(tall, coefficients, plan, lo: int, hi: int, limits: dict, stop_name: str):
    """Scores of rows ``lo:hi`` from a stored tall product: ``z = Y S``; written by ``plan``; return residuals."""
    from threadpoolctl import threadpool_limits

    source = tall.open()
    sink = plan.start(lo, hi)
    stop = _event(stop_name)
    try:
        with threadpool_limits(limits=blas_limit(limits), user_api="blas"):
            for a in range(lo, hi, plan.chunk):
                if stop.is_set():
                    raise RuntimeError("stopped: another task of this step failed")
                b = min(hi, a + plan.chunk)
                sink(a, np.asarray(source["y"][a:b]) @ coefficients, np.asarray(source["sumsq"][a:b]))
        sink.close()
    except BaseException:
        sink.abort()
        raise
    return sink.result()


def extra_of(result: tuple):
    """The per-row values a fold task sends back, without its state."""
    return result[3]


def _event(name: str):
    from distributed import Event

    return Event(name)


def probe_group(group: str, names: tuple) -> str | None:
    """None when this worker opens the Zarr group being written and sees ``names`` in it; else why not."""
    try:
        import zarr

        opened = zarr.open_group(group, mode="r+")
        missing = [n for n in names if n not in opened]
        if missing:
            return f"arrays {', '.join(missing)} are not there (another storage at the same path?)"
    except Exception as exc:  # any failure is reported with the worker's address
        return f"{type(exc).__name__}: {exc}"
    return None


def merge_pair(cls, a: tuple, b: tuple) -> tuple[bytes, int, int]:
    """Merge two fold results (states over disjoint block ranges) into one (their extras stay behind)."""
    left = cls.from_bytes(a[0])
    left = left.merge(cls.from_bytes(b[0]))
    return left.to_bytes(), a[1] + b[1], a[2] + b[2]


def probe(spec) -> str | None:
    """None when this worker opens the source as the client saw it; else why not."""
    try:
        reopen(spec)
    except Exception as exc:  # any failure is reported with the worker's address
        return f"{type(exc).__name__}: {exc}"
    return None


def host_cores() -> tuple[str, int]:
    """This machine's name and usable cores (the affinity mask when the OS has one)."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    return socket.gethostname(), cores


def versions() -> dict:
    """Versions of the packages whose differences would change results or break pickling."""
    import importlib.metadata
    import platform

    out = {"python": platform.python_version()}
    for name in ("rankfold", "numpy", "scipy", "zarr", "pyarrow", "dask", "distributed", "cloudpickle"):
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = None
    import rankfold

    out["rankfold"] = rankfold.__version__
    return out
