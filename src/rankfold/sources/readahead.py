"""Read the next block on a background thread while the current one is folded.

One reader thread and a queue of ``depth`` blocks: at most ``depth + 2``
blocks exist at once (being read, waiting, being folded), which is what the
memory budget in :mod:`rankfold.memory` counts.  Parallel decoding happens
inside each source's ``read`` (zarr chunk threads, pyarrow column threads).
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Iterator

import numpy as np

from rankfold.sources.base import Partition, Source

_DONE = object()


def iter_blocks(source: Source, partition: Partition, first: int = 0, stop: int | None = None,
                depth: int = 1) -> Iterator[tuple[int, int, np.ndarray]]:
    """Yield ``(index, start, block)`` for blocks ``first..stop-1`` of ``partition``.

    Exceptions raised while reading are re-raised in the consuming thread.
    Leaving the loop early stops the reader after its current block.
    """
    stop = len(partition) if stop is None else stop
    if depth <= 0:
        for i in range(first, stop):
            a, b = partition.bounds[i]
            yield i, a, source.read(partition.axis, a, b)
        return
    slots: queue.Queue = queue.Queue(maxsize=depth)
    cancelled = threading.Event()

    def reader() -> None:
        try:
            for i in range(first, stop):
                if cancelled.is_set():
                    return
                a, b = partition.bounds[i]
                item = (i, a, source.read(partition.axis, a, b))
                while not cancelled.is_set():
                    try:
                        slots.put(item, timeout=0.1)
                        break
                    except queue.Full:
                        continue
                del item
            slots.put(_DONE)
        except BaseException as exc:  # handed to the consumer, who raises it
            slots.put(exc)

    thread = threading.Thread(target=reader, name="rankfold-readahead", daemon=True)
    thread.start()
    try:
        while True:
            item = slots.get()
            if item is _DONE:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
            del item
    finally:
        cancelled.set()
        while thread.is_alive():
            try:
                slots.get(timeout=0.05)
            except queue.Empty:
                pass
        thread.join()
