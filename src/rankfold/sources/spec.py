"""A small picklable recipe for reopening a source in another process.

Cluster workers never receive data blocks nor a client's open file handles:
they receive a :class:`SourceSpec` (the path and the keyword arguments of
:func:`rankfold.sources.open_source`) and open the table themselves.  Pickling
a :class:`~rankfold.sources.base.Source` produces exactly that recipe, so
functions that mention a source (the ``prepare`` closures of the routes) arrive
on a worker bound to the worker's own reopened source.

Reopened sources are cached per thread (Parquet readers keep per-reader
streams that must not be shared between threads) and per ``token``: every
client-side :func:`open_source` call draws a new token, so a table rewritten
between two runs is never read through stale metadata.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import dataclass

from rankfold.errors import SourceError

CACHE_PER_THREAD = 4
_local = threading.local()


@dataclass(frozen=True)
class SourceSpec:
    """What a worker needs to open the same table.

    Parameters
    ----------
    path : str
        Absolute local path or fsspec URL, exactly as the workers must see it.
    options : tuple of (str, object)
        Keyword arguments of :func:`~rankfold.sources.open_source` (lists as tuples).
    token : str
        Identity of the client-side opening (cache key).
    shape : (int, int)
        ``(n_samples, n_features)`` the client saw; a worker seeing another shape refuses.
    dtype : str
        Storage dtype the client saw.
    """

    path: str
    options: tuple
    token: str
    shape: tuple
    dtype: str

    def open(self):
        """Open the table afresh and check it is the one the client saw."""
        from rankfold.sources import open_source

        src = open_source(self.path, **{k: (list(v) if isinstance(v, tuple) else v) for k, v in self.options})
        if tuple(src.shape) != tuple(self.shape) or str(src.storage_dtype) != self.dtype:
            seen = f"{src.n_samples:,} x {src.n_features:,} {src.storage_dtype}"
            src.close()
            raise SourceError(
                f"{self.path}: this process sees a different table ({seen}) from the one the client "
                f"opened ({self.shape[0]:,} x {self.shape[1]:,} {self.dtype}); every worker must read "
                "the same data (a shared or remote store, not per-machine copies)")
        return src


def reopen(spec: SourceSpec):
    """The calling thread's source for ``spec``, opened on first use (small LRU cache)."""
    cache = getattr(_local, "sources", None)
    if cache is None:
        cache = _local.sources = OrderedDict()
    src = cache.get(spec)
    if src is None:
        src = spec.open()
        cache[spec] = src
        while len(cache) > CACHE_PER_THREAD:
            _old_spec, old = cache.popitem(last=False)
            old.close()
    cache.move_to_end(spec)
    src._spec = spec  # pickling it again (a task's result, a nested closure) reuses the recipe
    return src
