"""Read the next block on a background thread while the current one is folded.

Two block buffers are allocated once and used in turn: the reader fills one
while the consumer folds the other, so reading overlaps arithmetic with only
two blocks in memory, which is what the memory budget counts
(:data:`rankfold.sources.base.FLOAT_BYTES_IN_FLIGHT`).  Reusing the buffers
also avoids faulting fresh pages in for every block.  Parallel decoding
happens inside each source's ``read`` (zarr chunk threads, pyarrow column
threads).

A buffer goes back to the reader when the consumer asks for the next block,
so the consumer must not keep a block after that.
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Iterator

import numpy as np

from rankfold.sources.base import Partition, Source

BUFFERS = 2
_DONE = object()


def iter_blocks(source: Source, partition: Partition, first: int = 0, stop: int | None = None,
                background: bool = True) -> Iterator[tuple[int, int, np.ndarray]]:
    """Yield ``(index, start, block)`` for blocks ``first..stop-1`` of ``partition``.

    With ``background`` (the default) the next block is read on a thread while
    the current one is in use.  Exceptions raised while reading are re-raised
    in the consuming thread; leaving the loop early stops the reader.
    """
    stop = len(partition) if stop is None else stop
    axis = partition.axis
    ring: list[np.ndarray | None] = [None] * BUFFERS

    def read(i: int) -> tuple[int, int, np.ndarray]:
        a, b = partition.bounds[i]
        slot = i % BUFFERS
        if ring[slot] is None:
            ring[slot] = np.empty((partition.largest, source.other_length(axis)))
        return i, a, source.read(axis, a, b, out=ring[slot][: b - a])

    if not background:
        for i in range(first, stop):
            yield read(i)
        return

    ready: queue.Queue = queue.Queue()
    free = threading.Semaphore(BUFFERS)
    cancelled = threading.Event()

    def reader() -> None:
        try:
            for i in range(first, stop):
                while not free.acquire(timeout=0.1):
                    if cancelled.is_set():
                        return
                if cancelled.is_set():
                    return
                ready.put(read(i))
            ready.put(_DONE)
        except BaseException as exc:  # handed to the consumer, who raises it
            ready.put(exc)

    thread = threading.Thread(target=reader, name="rankfold-readahead", daemon=True)
    thread.start()
    try:
        while True:
            item = ready.get()
            if item is _DONE:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
            del item
            free.release()  # the consumer is done with this block's buffer
    finally:
        cancelled.set()
        thread.join()
