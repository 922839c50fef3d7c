"""What every route shares: its inputs, its output, block preparation, pass running."""

from __future__ import annotations

import dataclasses
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from rankfold import stopping
from rankfold.checkpoint import Checkpointer
from rankfold.errors import DataError, Interrupted
from rankfold.linalg import sign_flips
from rankfold.memory import trim_heap
from rankfold.sample_outputs import SampleParts, stage_bytes
from rankfold.sources.base import Partition, Source
from rankfold.sources.readahead import iter_blocks

ProgressCallback = Callable[[dict], None]


@dataclass(frozen=True)
class RouteInput:
    """Validated parameters a route needs (checked once in :func:`rankfold.decompose`)."""

    source: Source
    rank: int
    standardize: bool
    missing: str
    memory_limit: int
    progress: ProgressCallback | None = None
    oversample: int = 10
    power_iterations: int = 2
    sketch: str = "subspace"
    seed: int = 0
    scores: bool = True  # whether per-sample outputs will be written (routes keep what they need)
    scratch: str | None = None  # folder for a tall intermediate that exceeds memory (created on demand)
    outputs_held: bool = False  # per-sample outputs returned in memory (no result store): counted too
    checkpoint: Checkpointer | None = None  # saves and restores pass states (rankfold.checkpoint)
    cluster: object | None = None  # a rankfold.cluster.ClusterSession: passes run as cluster tasks

    def __getstate__(self) -> dict:
        # Pickled into cluster tasks (inside prepare closures): workers get the parameters
        # only; the progress callback and the cluster handle belong to the client.
        return {**self.__dict__, "progress": None, "cluster": None, "checkpoint": None}


@dataclass
class PassRecord:
    """What one pass over the data cost."""

    name: str
    axis: str
    blocks: int
    largest_block: int
    bytes_read: int
    seconds: float

    def as_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass
class Decomposition:
    """A route's output, before it is written to a result store.

    Shapes: ``loadings`` (m, k); ``variance`` (k,); ``center``, ``scale`` (m,).
    ``parts`` holds what the route produced towards the scores
    (:class:`rankfold.sample_outputs.SampleParts`; empty when a scores pass is needed).
    """

    route: str
    loadings: np.ndarray
    variance: np.ndarray
    total_variance: float
    center: np.ndarray
    scale: np.ndarray
    n_samples: int
    parts: SampleParts = field(default_factory=SampleParts)
    passes: list[PassRecord] = field(default_factory=list)
    extra: dict = field(default_factory=dict)  # route-specific attributes for the store

    def with_sign_rule(self) -> "Decomposition":
        """Apply the documented sign rule (:mod:`rankfold.linalg`) in place."""
        flips = sign_flips(self.loadings)
        self.loadings *= flips
        self.parts.flip(flips)
        return self


def run_pass(name: str, inp: RouteInput, partition: Partition, state,
             prepare: Callable[[np.ndarray, int], np.ndarray]) -> tuple[object, PassRecord]:
    """Fold every block of ``partition`` into ``state`` after ``prepare``; time it.

    With a checkpoint (``inp.checkpoint``) a pass it holds as complete returns
    the saved state and record without reading; a pass it holds in part
    restores the state and starts at the first block not yet folded (earlier
    blocks are never read).  The state is saved every ``checkpoint.every``
    seconds and when the pass ends.  After each block a stop requested by
    SIGINT or SIGTERM (:mod:`rankfold.stopping`) saves the state and raises
    :class:`~rankfold.errors.Interrupted`.
    """
    source = inp.source
    source.check_unchanged(name)  # a table rewritten between passes would mix two tables
    total = len(partition)
    cursor = None
    if inp.checkpoint is not None:
        cursor = inp.checkpoint.begin_pass(name, partition, getattr(state, "resumable", True))
    first, read, before = 0, 0, 0.0
    if cursor is not None and cursor.complete:
        return cursor.restore(state), PassRecord(**cursor.record)
    if inp.checkpoint is not None and inp.progress is not None:
        # A resumed run skips the passes it restores: number the events by the route's
        # own count, so that progress shows "pass 3 of 4", not "pass 1".
        inp = dataclasses.replace(inp, progress=_numbered(inp.progress, inp.checkpoint.ordinal))
    if inp.cluster is not None:
        from rankfold.cluster.passes import cluster_pass, runs_on_client

        if not runs_on_client(state):
            # The workers fold block ranges of their own, so the pass is saved whole when it
            # ends (and a pass begun serially is folded again from its start).
            state, record = cluster_pass(name, inp, partition, state, prepare)
            if cursor is not None:
                cursor.finish(state, record.as_dict())
            if stopping.requested():
                raise Interrupted(_stopped_message(stopping.requested(), inp, name, cursor))
            return state, record
    if cursor is not None:
        if cursor.blocks_done:
            state = cursor.restore(state)
            first, read, before = cursor.blocks_done, cursor.bytes_read, cursor.seconds
    t0 = time.perf_counter()
    for index, start, block in iter_blocks(source, partition, first=first):
        read += block.size * source.storage_dtype.itemsize
        state.update(prepare(block, start), start)
        del block
        signal_name = stopping.requested()
        if cursor is not None and (signal_name or cursor.due()) and index + 1 < total:
            cursor.save(state, index + 1, read, before + time.perf_counter() - t0)
        if inp.progress is not None:
            inp.progress({"pass": name, "block": index + 1, "blocks": total, "bytes": read,
                          "seconds": before + time.perf_counter() - t0})
        if signal_name and index + 1 < total:
            raise Interrupted(_stopped_message(signal_name, inp, name, cursor))
    record = PassRecord(name, partition.axis, total, partition.largest, read, before + time.perf_counter() - t0)
    trim_heap()
    if cursor is not None:
        cursor.finish(state, record.as_dict())
    if stopping.requested():  # the pass is saved whole; stop before the next one starts
        raise Interrupted(_stopped_message(stopping.requested(), inp, name, cursor))
    return state, record


def _numbered(progress: ProgressCallback, index: int) -> ProgressCallback:
    def tell(event: dict) -> None:
        progress({**event, "pass_index": index})

    return tell


def output_bytes(inp: RouteInput) -> int:
    """Memory the per-sample stage holds beside a route's state (0 without scores)."""
    if not inp.scores:
        return 0
    return stage_bytes(inp.source.n_samples, inp.rank, inp.outputs_held)


def scratch_folder(inp: RouteInput) -> str:
    """A fresh folder for a scratch Zarr store: under ``inp.scratch`` or the system's temporary folder."""
    import tempfile

    if inp.scratch is None:
        return tempfile.mkdtemp(prefix="rankfold-scratch-")
    os.makedirs(inp.scratch, exist_ok=True)
    return tempfile.mkdtemp(prefix="tall-", dir=inp.scratch)


def _stopped_message(signal_name: str, inp: RouteInput, name: str, cursor) -> str:
    if cursor is None and inp.checkpoint is not None:
        return inp.checkpoint.stopped_unsaved(signal_name, name)
    if cursor is None:
        return (f"stopped by {signal_name}; nothing was saved (checkpoints are kept only when a "
                "result path is given); run the command again to start over")
    return cursor.stopped_message(signal_name)


def stop_point(inp: RouteInput) -> None:
    """Raise :class:`~rankfold.errors.Interrupted` if a stop was requested (routes without passes)."""
    signal_name = stopping.requested()
    if signal_name:
        if inp.checkpoint is None:
            raise Interrupted(_stopped_message(signal_name, inp, "", None))
        raise Interrupted(f"stopped by {signal_name}; this route reads the table in one go, so nothing "
                          "was saved; run the same command again to start over")


def check_numerical_rank(values: np.ndarray, size: int, inp: RouteInput) -> np.ndarray:
    """Refuse components whose variance is at round-off level; return ``values`` clipped at 0.

    The threshold is the usual numerical-rank tolerance, ``size * eps * largest``
    (as in numpy.linalg.matrix_rank).  Below it a component is noise: a table whose
    centered rank is lower than the requested rank (too few samples, duplicated or
    constant columns) gets a clear message instead of arbitrary directions and
    variance fractions of 0/0.
    """
    if not np.all(np.isfinite(values)):
        # Each block passed check_values, so only sums across many blocks of huge values get here.
        raise DataError(f"{inp.source.path}: the sums of squares overflowed double precision; the table's "
                        "values are too large in magnitude: rescale the columns (for example divide them "
                        "by a power of ten) and rerun")
    values = np.maximum(values, 0.0)  # round-off can leave tiny negatives in a PSD matrix
    tol = size * np.finfo(float).eps * values[0]
    if values[-1] <= tol:
        kept = int(np.count_nonzero(values > tol))
        raise DataError(f"{inp.source.path}: the centered table has numerical rank {kept}, below the "
                        f"requested {inp.rank} (too few samples, or constant or duplicated columns); "
                        f"ask for at most {kept} component(s)" if kept else
                        f"{inp.source.path}: every column is constant, so there is no variance to decompose")
    return values


def check_values(block: np.ndarray, start: int, axis: str, inp: RouteInput,
                 allow_missing: bool) -> None:
    """Refuse infinities and values whose squares overflow always, missing values unless filled.

    Messages give the count in the block and the first position by sample
    number and feature name, so the user can find the bad value.
    """
    # The sum of squares (one BLAS dot, no block-sized temporary) is finite exactly
    # when every value is finite and no square overflows; anything else goes to the
    # precise checks below.
    flat = np.ravel(block)
    with np.errstate(over="ignore", invalid="ignore"):
        if np.isfinite(np.dot(flat, flat)):
            return
    source = inp.source
    inf = np.isinf(block)

    def where(mask: np.ndarray) -> str:
        r, c = np.unravel_index(int(np.argmax(mask)), mask.shape)
        sample, feature = (start + r, c) if axis == "samples" else (c, start + r)
        return f"sample {sample:,} (counting from 0), feature {source.feature_names[feature]!r}"

    span = f"{axis} {start:,}-{start + block.shape[0] - 1:,}"
    if inf.any():
        raise DataError(
            f"{source.path}: {int(inf.sum()):,} infinite value(s) in {span}; first at {where(inf)}. "
            "Infinities have no mean or variance: replace or remove them before decomposing.")
    del inf
    if not allow_missing:
        nan = np.isnan(block)
        if nan.any():
            raise DataError(
                f"{source.path}: {int(nan.sum()):,} missing value(s) in {span} (the first block holding any; "
                f"later blocks were not counted); first at {where(nan)}. Fill them with the column mean "
                "with --missing fill-mean (missing='fill-mean'), or clean the data.")
        del nan
    # Finite values whose squares overflow: sums of squares and Gram products would
    # turn into inf and NaN loadings.  Below this magnitude the block's sum of
    # squares stays within float64 whatever the values are.  fmax/fmin skip NaN and
    # need no block-sized temporary (the memory ceiling counts none).
    limit = np.sqrt(np.finfo(np.float64).max / max(1, block.size))
    if block.size and max(np.fmax.reduce(block, axis=None), -np.fmin.reduce(block, axis=None)) > limit:
        huge = np.abs(block) > limit
        first = np.unravel_index(int(np.argmax(huge)), huge.shape)
        raise DataError(
            f"{source.path}: {int(huge.sum()):,} value(s) in {span} are too large for a sum of squares in "
            f"double precision (magnitude above {limit:.3g}); first at {where(huge)}, value {block[first]:.6g}. "
            "Rescale those columns (for example divide them by a power of ten) or clean the data.")


def feature_block_check(inp: RouteInput) -> Callable[[np.ndarray, int], np.ndarray]:
    """The ``prepare`` step of passes over blocks of whole features.

    Refuses infinities (and missing values unless filled); under ``fill-mean``
    refuses a feature with no value at all, which has no mean to fill with.
    """
    source = inp.source
    fill = inp.missing == "fill-mean"

    def prepare(block: np.ndarray, start: int) -> np.ndarray:
        check_values(block, start, "features", inp, allow_missing=fill)
        if fill:
            empty = np.flatnonzero(np.isnan(block).all(axis=1))
            if empty.size:
                raise DataError(f"{source.path}: feature {source.feature_names[start + empty[0]]!r} holds "
                                "no values at all, so there is no mean to fill with; leave it out")
        return block

    return prepare
