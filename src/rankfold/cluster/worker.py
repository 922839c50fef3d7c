"""Functions that run on cluster workers (imported there by reference).

Each is small and takes only picklable arguments: a source recipe, block
bounds, a compressed empty state, the route's ``prepare`` step.  They never
return data blocks: a fold task returns the state's bytes and its read count.
"""

from __future__ import annotations

import os
import socket
import zlib

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
               names: dict) -> tuple[bytes, int, int]:
    """Fold blocks ``bounds`` of the source into a fresh state; return (state bytes, blocks, bytes read).

    ``names`` restores what ``to_bytes`` does not carry: the message-only
    attributes of feature-block states (``feature_names``, ``source_path``)
    and, under ``"extras"``, other plain attributes (lookup tables, widths).
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
    itemsize = source.storage_dtype.itemsize
    read = 0
    with threadpool_limits(limits=blas_limit(limits), user_api="blas"):
        for _index, start, block in iter_blocks(source, Partition(axis, tuple(bounds))):
            read += block.size * itemsize
            state.update(prepare(block, start), start)
            del block
    return state.to_bytes(), len(bounds), read


def merge_pair(cls, a: tuple, b: tuple) -> tuple[bytes, int, int]:
    """Merge two fold results (states over disjoint block ranges) into one."""
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
