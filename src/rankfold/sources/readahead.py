"""Read the next block on a background thread while the current one is folded.

One reader thread and a queue of ``depth`` blocks: at most ``depth + 2``
blocks exist at once (being read, waiting, being folded), which is what the
memory budget in :mod:`rankfold.memory` counts.  Parallel decoding happens
inside each source's ``read`` (zarr chunk threads, pyarrow column threads).

The ``depth + 2`` block buffers are allocated once and reused in turn.  This
is safe because the reader starts block ``i`` only after block ``i - 1`` entered
the queue, and the queue holds at most ``depth`` blocks, so the consumer has
already asked for block ``i - depth - 1`` and is done with block
``i - depth - 2``, the previous user of the same buffer.  The consumer must
therefore not keep a block after asking for the next one.
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
    axis = partition.axis
    ring = [None] * (depth + 2)

    def read(i: int) -> tuple[int, int, np.ndarray]:
        a, b = partition.bounds[i]
        slot = i % len(ring)
        if ring[slot] is None:
            ring[slot] = np.empty((partition.largest, source.other_length(axis)))
        return i, a, source.read(axis, a, b, out=ring[slot][: b - a])

    if depth <= 0:
        for i in range(first, stop):
            yield read(i)
        return
    slots: queue.Queue = queue.Queue(maxsize=depth)
    cancelled = threading.Event()

    def reader() -> None:
        try:
            for i in range(first, stop):
                if cancelled.is_set():
                    return
                item = read(i)
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
