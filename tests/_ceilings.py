"""A memory ceiling that cuts a table into blocks of a chosen size, for tests that need many blocks.

The fixed part of a route's memory (its state, the read buffers, the
per-sample writer) changes as the code grows; asking the planner for the
smallest ceiling it accepts and adding room for blocks of ``units`` samples
(or features) keeps the number of blocks near ``length / units`` whatever
that fixed part is.  For runs that write a result store (``out``): without one
the per-sample outputs are held in memory and need a larger ceiling.
"""

from __future__ import annotations

import rankfold
from rankfold.errors import MemoryLimitError


def ceiling_for(path: str, units: int, rank: int = 3, **options) -> int:
    """Bytes of ``--memory-limit`` leaving room for blocks of about ``units`` along the read axis."""
    lo, hi = 1_000, 1 << 34
    while hi - lo > 256:
        mid = (lo + hi) // 2
        try:
            rankfold.plan(path, rank, memory_limit=mid, **options)
            hi = mid
        except MemoryLimitError:
            lo = mid
    axis = "features" if options.get("samples_as") == "columns" else "samples"
    src = rankfold.open_source(path, samples_as=options.get("samples_as", "rows"))
    try:
        return int(hi * 1.02) + units * src.bytes_per_unit(axis)
    finally:
        src.close()
