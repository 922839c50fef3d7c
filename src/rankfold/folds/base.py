"""The contract every pass state follows.

A fold state is built empty, takes blocks with ``update(block, start)``,
combines with another state over a disjoint range with ``merge(other)``, turns
into bytes and back (checkpoints, shipping between workers) and is read out
by route code once the pass is over.  States hold only float64 arrays and
integers, so serialization is a plain ``.npz`` payload.
"""

from __future__ import annotations

import io

import numpy as np


class FoldState:
    """Base class: subclasses list their array fields in ``_fields``."""

    _fields: tuple[str, ...] = ()
    # Whether the fields are all there is: a state whose update also sends data elsewhere
    # (rows to a writer, a captured product) cannot be restored part-way or skipped as
    # done, since a restored state would not replay what it sent; checkpoints re-run its pass.
    resumable: bool = True

    def to_bytes(self) -> bytes:
        """Compact serialization of the state (an uncompressed ``.npz`` payload)."""
        buf = io.BytesIO()
        self.write_to(buf)
        return buf.getvalue()

    def write_to(self, fileobj) -> None:
        """Write what :meth:`to_bytes` returns into an open binary file.

        numpy writes each array in chunks, so a checkpoint of a large state
        (a features x features co-moment) needs no second copy in memory, as
        ``to_bytes`` would (two, counting its buffer and the bytes).
        """
        np.savez(fileobj, **{name: np.asarray(getattr(self, name)) for name in self._fields})

    @classmethod
    def from_bytes(cls, payload: bytes):
        """Rebuild a state written by :meth:`to_bytes`."""
        state = cls.__new__(cls)
        with np.load(io.BytesIO(payload), allow_pickle=False) as data:
            for name in cls._fields:
                value = data[name]
                setattr(state, name, value.item() if value.ndim == 0 else value)
        return state


def tree_merge(states: list) -> object:
    """Merge states pairwise in a balanced tree (the order a cluster would use).

    Balanced merging keeps the rounding of each co-moment near O(log k) merges
    deep rather than O(k), the same reason pairwise summation beats a running sum.
    """
    if not states:
        raise ValueError("tree_merge needs at least one state")
    level = list(states)
    while len(level) > 1:
        nxt = [level[i].merge(level[i + 1]) for i in range(0, len(level) - 1, 2)]
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    return level[0]
