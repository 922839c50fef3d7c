"""Pick an exact route from the table's shape, its layout and the memory ceiling.

A pure function of sizes, so it can be tested with no data.  The reasons are
returned in plain words so that the command line can say why before it starts.
"""

from __future__ import annotations

from dataclasses import dataclass

from rankfold.errors import MemoryLimitError
from rankfold.memory import format_bytes
from rankfold.routes import features, memory, samples

# Above this many values an SVD of the whole table costs more time than one
# streamed Gram pass saves (gesdd ~ 4 n m^2 flops against 2 n m^2).
IN_MEMORY_MAX_VALUES = 20_000_000


@dataclass(frozen=True)
class RouteChoice:
    """The chosen route and why."""

    route: str
    reasons: tuple[str, ...]


def choose_route(n_samples: int, n_features: int, rank: int, memory_limit: int,
                 native_axis: str = "samples") -> RouteChoice:
    """Choose among ``memory``, ``features`` and ``samples``.

    Rules, in order: a small table that fits four times over in float64 is
    decomposed in memory; otherwise the Gram matrix of the smaller side is
    folded (samples x samples when samples are stored as columns or features
    outnumber samples), falling back to the other side when it does not fit.
    """
    n, m = n_samples, n_features
    table = n * m * 8
    if n * m <= IN_MEMORY_MAX_VALUES and memory.fixed_bytes(n, m, rank) <= memory_limit:
        return RouteChoice("memory", (f"the table ({format_bytes(table)} as float64) fits in memory "
                                      f"four times over, so LAPACK takes its SVD directly",))
    prefer_samples = native_axis == "features" or m > n
    order = [samples, features] if prefer_samples else [features, samples]
    why = ("samples are stored as columns" if native_axis == "features" else
           "features outnumber samples" if m > n else "samples outnumber features")
    for route in order:
        need = route.fixed_bytes(n, m, rank)
        if need < memory_limit * 0.8:
            side = f"{n:,} x {n:,}" if route is samples else f"{m:,} x {m:,}"
            reasons = [f"{why}; the {side} Gram matrix needs {format_bytes(need)} "
                       f"of the {format_bytes(memory_limit)} limit"]
            if route is not order[0]:
                reasons.append(f"the preferred {order[0].NAME} route did not fit the limit")
            return RouteChoice(route.NAME, tuple(reasons))
    need = min(features.fixed_bytes(n, m, rank), samples.fixed_bytes(n, m, rank))
    raise MemoryLimitError(
        f"no exact route fits the memory limit of {format_bytes(memory_limit)}: the feature Gram "
        f"needs {format_bytes(features.fixed_bytes(n, m, rank))} and the sample Gram "
        f"{format_bytes(samples.fixed_bytes(n, m, rank))}; give at least "
        f"--memory-limit {format_bytes(need / 0.8 * 1.05)}")
