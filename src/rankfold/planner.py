"""The planner: from sizes and machine speeds to a plan, before any data is read.

:func:`make_plan` is a pure function of a :class:`PlanRequest` (shape, dtype,
layout, rank, memory ceiling, options, and what the source says about its
block costs) and a :class:`~rankfold.machine.MachineSpeed`.  It estimates
every route (passes, bytes read, flops, peak memory, wall time), keeps those
that fit the ceiling and meet the requested accuracy, and picks the fastest,
saying why in plain words.

Time model: each pass costs ``max(read time, arithmetic time)`` because the
next block is read while the current one is folded; the final eigenproblem
adds ``~10 p**3`` flops for a ``p x p`` matrix.  Memory: the route's state plus
the source's decoder buffers plus the blocks in flight.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from rankfold.errors import MemoryLimitError
from rankfold.machine import MachineSpeed
from rankfold.memory import format_bytes
from rankfold.routes import features, memory, samples, sketch
from rankfold.sample_outputs import TallProduct, scratch_chunk_bytes, stage_bytes, writer_bytes

EXACT = ("memory", "features", "samples")
# Above this many values an SVD of the whole table costs more than it is worth
# next to one streamed Gram pass; below it, in-memory LAPACK is the most
# accurate answer and fast.
IN_MEMORY_MAX_VALUES = 20_000_000


@dataclass(frozen=True)
class PlanRequest:
    """Everything the planner needs; no data is read to build it.

    ``bytes_per_unit``, ``min_block_bytes`` and ``read_fixed_bytes`` map an axis
    (``"samples"``/``"features"``) to the source's block costs; ``table_bytes``
    is the table in its storage dtype (what one pass decodes).
    """

    n_samples: int
    n_features: int
    itemsize: int
    native_axis: str
    rank: int
    memory_limit: int
    bytes_per_unit: dict
    min_block_bytes: dict
    read_fixed_bytes: dict
    table_bytes: int
    alignment: dict = field(default_factory=lambda: {"samples": 1, "features": 1})
    cores: int = 2
    route: str = "auto"
    accuracy: str = "exact"
    oversample: int = 10
    power_iterations: int = 2
    sketch: str = "subspace"
    missing: str = "refuse"
    standardize: bool = False
    scores: bool = True
    scratch_free: int | None = None  # free bytes where scratch arrays would go (None: not checked)
    outputs_held: bool = False  # per-sample outputs returned in memory rather than written to a store
    clustered: bool = False  # passes run on a cluster (whose workers write stored per-sample rows)


@dataclass(frozen=True)
class RouteEstimate:
    """Costs of one route for one request."""

    route: str
    axis: str
    fits: bool
    passes: int
    bytes_read: int
    flops: float
    peak_memory: int
    block_units: int
    seconds: float
    scratch_bytes: int = 0
    note: str = ""


@dataclass(frozen=True)
class Plan:
    """The chosen route, its estimate, every candidate, and the reasons."""

    route: str
    estimate: RouteEstimate
    candidates: tuple[RouteEstimate, ...]
    reasons: tuple[str, ...]
    speed: MachineSpeed
    request: PlanRequest = field(repr=False)

    def lines(self) -> list[str]:
        """A readable account of the plan, for ``rankfold plan`` and ``decompose``."""
        e = self.estimate
        r = self.request
        lines = [
            f"plan     {self.route} route, reading blocks of {e.block_units:,} {e.axis}",
            f"passes   {_passes(e.passes)} over the data, {format_bytes(e.bytes_read)} read in all",
            f"work     {e.flops / 1e9:,.1f} GFLOP",
            f"memory   peak about {format_bytes(e.peak_memory)} of the {format_bytes(r.memory_limit)} limit"
            + (f"; {format_bytes(e.scratch_bytes)} of scratch disk beside the output" if e.scratch_bytes else ""),
            f"time     about {_duration(e.seconds)} on a warm page cache (read {format_bytes(self.speed.read_bytes_per_s)}/s, "
            f"GEMM {self.speed.gemm_flops_per_s / 1e9:.0f} GFLOP/s; {self.speed.measured})",
        ]
        lines += [f"why      {reason}" for reason in self.reasons]
        lines.append("other routes:")
        for c in self.candidates:
            if c.route == self.route:
                continue
            state = (f"{_passes(c.passes)}, about {_duration(c.seconds)}, peak {format_bytes(c.peak_memory)}"
                     if c.fits else f"does not fit: {c.note}")
            lines.append(f"  {c.route:<9} {state}")
        return lines


def _passes(count: int) -> str:
    return f"{count} pass" if count == 1 else f"{count} passes"


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s" if seconds >= 10 else f"{seconds:.1f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _estimate(route: str, req: PlanRequest, speed: MachineSpeed) -> RouteEstimate:
    n, m, k = req.n_samples, req.n_features, req.rank
    read_pass = req.table_bytes / speed.read_bytes_per_s
    scratch = 0
    gemm = speed.gemm_flops_per_s
    outputs = stage_bytes(n, k, req.outputs_held) if req.scores else 0
    if route == "memory":
        fixed = memory.fixed_bytes(n, m, k) + outputs
        flops = 4.0 * n * m * min(n, m) + 3.0 * n * m
        fits = fixed <= req.memory_limit
        return RouteEstimate("memory", "samples", fits, 1, req.table_bytes, flops, fixed, n,
                             read_pass + flops / gemm, note="" if fits else f"needs {format_bytes(fixed)}")
    if route == "features":
        axis, fixed = "samples", features.fixed_bytes(n, m, k)
        passes = 2 if req.missing == "fill-mean" else 1
        per_pass = [2.0 * n * m * m] + ([3.0 * n * m] if passes == 2 else [])
        if req.scores:
            per_pass.append(2.0 * n * m * k)  # the scores pass
        final = 10.0 * m ** 3
    elif route == "samples":
        axis, fixed = "features", samples.fixed_bytes(n, m, k)
        passes = 2
        per_pass = [2.0 * m * n * n, 2.0 * n * m * k]
        final = 10.0 * n ** 3
    else:
        axis = req.native_axis
        size = m if axis == "samples" else n
        width = sketch.basis_width(k, req.oversample, req.power_iterations, req.sketch)
        fixed = sketch.fixed_bytes(size, m, k, req.oversample, req.power_iterations, req.sketch)
        passes = sketch.passes(req.power_iterations, req.sketch)
        apply = 4.0 * n * m * (k + req.oversample)
        if req.sketch == "one-pass":
            per_pass = [apply] + ([2.0 * n * m * k] if axis == "features" or req.scores else [])
            passes = len(per_pass)
        else:
            per_pass = [3.0 * n * m] + [apply] * req.power_iterations
            per_pass.append(4.0 * n * m * (width + sketch.TEST_VECTORS))
            if axis == "samples" and sketch.fuses_moments(req.standardize, req.missing, req.power_iterations,
                                                          req.sketch):
                per_pass = per_pass[1:]  # the moments ride along with the first power iteration
                passes -= 1
            if axis == "features":
                per_pass[0] = apply  # no moments pass; the last pass recovers loadings instead
                per_pass.append(2.0 * n * m * k)
                per_pass = per_pass[:passes]
        final = 10.0 * width ** 3 + 4.0 * size * width ** 2 * (req.power_iterations + 1)
        if req.scores and axis == "samples" and req.sketch != "one-pass":
            # The last pass keeps Xc Q (n x width) for the scores: in memory, or on scratch disk
            # (always on disk when cluster workers fill it beside a stored result).
            if sketch.tall_fits_in_memory(n, width, req.memory_limit) and not (req.clustered
                                                                                and not req.outputs_held):
                fixed += TallProduct.bytes_needed(n, width)
            else:
                fixed += writer_bytes(n, width + 1, scratch_chunk_bytes(req.memory_limit))
                scratch = TallProduct.bytes_needed(n, width)
            final += 2.0 * n * width * k
    fixed += outputs + req.read_fixed_bytes[axis]
    need = fixed + req.min_block_bytes[axis]
    fits = need <= req.memory_limit
    unit = req.bytes_per_unit[axis]
    length = n if axis == "samples" else m
    units = max(1, min(length, (req.memory_limit - fixed) // unit)) if fits else 1
    align = req.alignment.get(axis, 1)
    if align > 1 and align <= units < length:
        units -= units % align  # sources cut blocks at whole storage chunks
    peak = fixed + min(units, length) * unit if fits else need
    # Scratch is written once during the last pass and read back once.
    seconds = sum(max(read_pass, f / gemm) for f in per_pass) + final / gemm + 2 * scratch / speed.read_bytes_per_s
    if fits and req.scratch_free is not None and scratch > req.scratch_free:
        fits = False
        need_note = (f"needs {format_bytes(scratch)} of scratch disk beside the output for the scores, "
                     f"and {format_bytes(req.scratch_free)} is free")
    else:
        need_note = "" if fits else f"needs at least {format_bytes(need)}"
    return RouteEstimate(route, axis, fits, len(per_pass), int(req.table_bytes * len(per_pass)),
                         sum(per_pass) + final, int(peak), int(units), seconds, scratch_bytes=int(scratch),
                         note=need_note)


def make_plan(req: PlanRequest, speed: MachineSpeed) -> Plan:
    """Choose the fastest route that fits the ceiling and meets the requested accuracy.

    Raises
    ------
    MemoryLimitError
        When the requested route, or every route, needs more than the ceiling.
    """
    n, m, k = req.n_samples, req.n_features, req.rank
    sketchable = k + req.oversample <= min(n, m)
    names = list(EXACT) + (["sketch"] if sketchable else [])
    candidates = tuple(_estimate(r, req, speed) for r in names)
    by_name = {c.route: c for c in candidates}
    fitting = [c for c in candidates if c.fits]

    if req.route != "auto":
        if req.route == "sketch" and not sketchable:
            exact = [c for c in fitting if c.route in EXACT]
            if not exact:
                raise MemoryLimitError(_nothing_fits(req, candidates))
            best = min(exact, key=lambda c: c.seconds)
            return Plan(best.route, best, candidates, (
                f"rank {k} plus oversampling {req.oversample} exceeds the smaller side "
                f"({min(n, m):,}), where a sketch saves nothing; falling back to the exact "
                f"{best.route} route",), speed, req)
        chosen = by_name[req.route]
        if not chosen.fits:
            others = ", ".join(f"{c.route} (peak {format_bytes(c.peak_memory)})" for c in fitting)
            raise MemoryLimitError(
                f"memory limit {format_bytes(req.memory_limit)} is too small for the {req.route} route: it "
                f"{chosen.note}; give at least --memory-limit {format_bytes(chosen.peak_memory * 1.1)}"
                + (f", or let the planner choose among the routes that fit: {others}" if others else ""))
        return Plan(chosen.route, chosen, candidates, (f"route {req.route} was asked for",), speed, req)

    if not fitting:
        raise MemoryLimitError(_nothing_fits(req, candidates))
    exact = [c for c in fitting if c.route in EXACT]
    reasons: list[str] = []
    if exact and by_name["memory"].fits and n * m <= IN_MEMORY_MAX_VALUES:
        best = by_name["memory"]
        reasons.append(f"the table ({n:,} x {m:,}) fits in memory four times over, so LAPACK takes its SVD "
                       "directly: the most accurate route, and quick at this size")
    elif req.accuracy == "exact" and exact:
        best = min(exact, key=lambda c: c.seconds)
        reasons.append(_why_exact(best, req))
        if sketchable and by_name["sketch"].fits and by_name["sketch"].seconds < best.seconds:
            reasons.append(f"the randomized route would take about {_duration(by_name['sketch'].seconds)}; "
                           "allow it with --accuracy approximate")
    else:
        best = min(fitting, key=lambda c: c.seconds)
        if best.route == "sketch" and not exact:
            reasons.append("no exact route fits the memory limit (neither Gram matrix, nor the table); "
                           f"the randomized route does, with {req.power_iterations} power iteration(s), and "
                           "reports an error bound with the result")
        elif best.route == "sketch":
            reasons.append(f"approximate results were allowed and the randomized route is the fastest "
                           f"({req.power_iterations} power iteration(s), oversampling {req.oversample}); "
                           "an error bound is reported with the result")
        else:
            reasons.append(_why_exact(best, req))
    if not sketchable and req.accuracy == "approximate":
        reasons.append(f"no randomized route: rank {k} plus oversampling {req.oversample} exceeds the smaller "
                       f"side ({min(n, m):,})")
    return Plan(best.route, best, candidates, tuple(reasons), speed, req)


def _why_exact(best: RouteEstimate, req: PlanRequest) -> str:
    n, m = req.n_samples, req.n_features
    if best.route == "features":
        return (f"the {m:,} x {m:,} feature Gram matrix fits, and folding it over blocks of samples is the "
                f"fastest exact route ({_passes(best.passes)})")
    if best.route == "samples":
        return (f"the {n:,} x {n:,} sample Gram matrix fits, and folding it over blocks of features is the "
                f"fastest exact route ({_passes(best.passes)})")
    return "the table fits in memory and LAPACK's SVD is the fastest exact route"


def _nothing_fits(req: PlanRequest, candidates) -> str:
    least = min(candidates, key=lambda c: c.peak_memory)
    parts = "; ".join(f"{c.route} {c.note}" for c in candidates)
    return (f"no route fits the memory limit of {format_bytes(req.memory_limit)} ({parts}); "
            f"give at least --memory-limit {format_bytes(least.peak_memory * 1.1)}")
