"""Per-sample outputs: scores, reconstruction residuals and the outlier flag.

Every route ends with the same step: each sample's scores ``z = L^T xc``
(``xc`` the centered, scaled sample; ``L`` the ``m x k`` loadings), its
squared residual ``||xc - L z||^2`` and that residual as a fraction of
``||xc||^2``.  Routes deliver the ingredients in one of three forms
(:class:`SampleParts`): scores already in memory (in-memory LAPACK, the
sample-Gram route, the randomized route on samples stored as columns); a tall
product ``Y = Xc Q`` captured during the randomized route's last pass, from
which ``z = Y S`` for the small Ritz coefficients ``S``; or nothing, in which
case one more pass over the data computes them (the feature-Gram route).

The residual is computed as ``||xc||^2 - ||z||^2`` (``L`` has orthonormal
columns), which needs no block-sized temporary.  Its absolute rounding error
is a few ``eps * ||xc||^2``, so ``residual_fraction`` is exact to about
``1e-13`` in absolute terms: below that a sample is explained completely for
every practical purpose.

Writes go through :class:`RowWriter`, which buffers rows until a whole chunk
of the output arrays is complete, so every Zarr write covers whole chunks.

Flag rule: the robust z-score of common practice (median and median absolute
deviation, MAD scaled by 1.4826 to estimate a standard deviation under
normality; Iglewicz and Hoaglin 1993 for the 3.5 default), applied to the
cube root of the squared residual.  A squared residual left by noise is close
to a scaled chi-square variable, which is strongly skewed: on the raw scale
the rule would flag 2-10% of perfectly ordinary samples.  Its cube root is
close to normal (Wilson and Hilferty 1931), so a threshold of 3.5 flags about
0.02% of samples when nothing is unusual, whatever the degrees of freedom
(checked by simulation in tests/test_scores.py).  A sample is flagged when
``cbrt(residual) > median + threshold * 1.4826 * MAD`` (both of the cube
roots); the cutoff is stored in residual units.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

# Rows per chunk of per-sample arrays: about 8 MB of scores per chunk, and
# never more than 32,768 rows (a fine grain for readers that take a few rows,
# and a small buffer beside the blocks).
CHUNK_BYTES = 1 << 23
MAX_CHUNK_ROWS = 32768
MAD_TO_SIGMA = 1.4826  # 1 / Phi^-1(3/4): the MAD of a normal sample estimates 0.6745 sigma
DEFAULT_FLAG_THRESHOLD = 3.5
SCORE_DTYPES = ("float32", "float64")


def chunk_rows(n_samples: int, width: int, itemsize: int = 8, chunk_bytes: int = CHUNK_BYTES) -> int:
    """Rows per chunk for a ``(n_samples, width)`` per-sample array of about ``chunk_bytes``."""
    rows = max(64, min(MAX_CHUNK_ROWS, chunk_bytes // max(1, width * itemsize)))
    return max(1, min(n_samples, rows))


def writer_bytes(n_samples: int, width: int, chunk_bytes: int = CHUNK_BYTES) -> int:
    """Memory a :class:`RowWriter` of ``width`` float64 columns holds: at most three chunks' rows."""
    return min(3 * chunk_rows(n_samples, width, chunk_bytes=chunk_bytes), 2 * n_samples) * width * 8


def buffer_bytes(n_samples: int, rank: int) -> int:
    """Memory of the per-sample stage while blocks are in flight.

    The writer's rows (at most two chunks of scores and residuals buffered,
    and one more being written by its thread) and every residual, kept for
    the flag.  The flag's own temporaries (a few
    vectors of ``n``) come after the last pass, once the blocks are freed.
    """
    rows = min(3 * chunk_rows(n_samples, rank), 2 * n_samples)  # a short table never fills three chunks
    return rows * (rank + 2) * 8 + n_samples * 8


def held_bytes(n_samples: int, rank: int) -> int:
    """Per-sample outputs kept in memory (a result without a store): float64 scores, residuals, flags."""
    return n_samples * (rank + 2) * 8 + n_samples


def stage_bytes(n_samples: int, rank: int, held: bool) -> int:
    """Memory of the per-sample stage: the arrays themselves when held in memory (their rows go
    straight in, with no chunk buffers), else the writer's buffers; and every residual, for the flag."""
    if held:
        return held_bytes(n_samples, rank) + n_samples * 8
    return buffer_bytes(n_samples, rank)


def scratch_chunk_bytes(memory_limit: int) -> int:
    """Chunk size of a scratch array: a small share of the ceiling, so its writer fits beside the blocks."""
    return max(1 << 16, min(CHUNK_BYTES, memory_limit // 16))


class RowWriter:
    """Write rows in order into arrays chunked along axis 0, one whole chunk at a time.

    Parameters
    ----------
    arrays : dict of str to array
        Zarr or numpy arrays of equal length, the first axis chunked by ``chunk`` rows.
    chunk : int
        Rows per chunk (ignored for numpy arrays, which take rows directly).
    start : int
        First row this writer is responsible for; must be a chunk boundary, so
        that writers of disjoint ranges never share a chunk.

    Notes
    -----
    Store writes (encoding and compressing a chunk) run on a background
    thread, one batch at a time, so that they overlap the next block's
    arithmetic; a failed write is raised by the next ``write`` or by
    ``close``.  Measured on bench/bench_scores.py's projection: the writes
    took 2.3 s of 9.1 s when made in line.
    """

    def __init__(self, arrays: dict, chunk: int, start: int = 0):
        self.arrays = arrays
        self.chunk = chunk
        self.position = start  # next row expected
        self.flushed = start  # rows before this are handed to the store
        self.pending: dict[str, list[np.ndarray]] = {name: [] for name in arrays}
        self.direct = all(isinstance(a, np.ndarray) for a in arrays.values())
        self._pool = None
        self._in_flight = None

    def write(self, start: int, **rows: np.ndarray) -> None:
        if start != self.position:
            raise ValueError(f"rows must arrive in order: expected row {self.position}, got {start}")
        count = len(next(iter(rows.values())))
        if self.direct:
            for name, value in rows.items():
                self.arrays[name][start:start + count] = value
            self.position = self.flushed = start + count
            return
        for name, value in rows.items():
            self.pending[name].append(np.asarray(value))
        self.position += count
        whole = self.flushed + (self.position - self.flushed) // self.chunk * self.chunk
        if whole > self.flushed:
            self._write_through(whole)

    def close(self) -> None:
        """Write the rows still buffered (the array's last, possibly short, chunk) and wait for the store."""
        try:
            if self.position > self.flushed:
                self._write_through(self.position)
            self._wait()
        finally:
            if self._pool is not None:
                self._pool.shutdown(wait=True)
                self._pool = None

    def _write_through(self, stop: int) -> None:
        keep = self.position - stop
        batch = []
        for name, parts in self.pending.items():
            joined = np.concatenate(parts) if len(parts) > 1 else parts[0]
            batch.append((self.arrays[name], joined[:len(joined) - keep]))
            self.pending[name] = [joined[len(joined) - keep:].copy()] if keep else []
        lo = self.flushed
        self.flushed = stop
        self._wait()  # one batch in flight at most: bounds the memory held
        if self._pool is None:
            from concurrent.futures import ThreadPoolExecutor

            self._pool = ThreadPoolExecutor(1, thread_name_prefix="rankfold-writer")
        self._in_flight = self._pool.submit(_store, batch, lo, stop)

    def abort(self) -> None:
        """On a failure elsewhere: let a write in flight finish (ignoring its outcome) and stop the thread.

        Called before the store is removed, so that no write lands in a folder
        being deleted (a chunk written there would recreate it).
        """
        if self._in_flight is not None:
            self._in_flight.exception()  # waits; the outcome no longer matters
            self._in_flight = None
        if self._pool is not None:
            self._pool.shutdown(wait=True)
            self._pool = None

    def _wait(self) -> None:
        if self._in_flight is not None:
            done, self._in_flight = self._in_flight, None
            done.result()  # raises the write's error, if any


def _store(batch, lo: int, hi: int) -> None:
    for array, rows in batch:
        array[lo:hi] = rows


SCORE_ARRAYS = ("scores", "residual", "residual_fraction")


class ScoreWriter:
    """The sink of a scores pass: takes ``(start, z, sumsq)`` in row order, writes the per-sample arrays.

    Parameters
    ----------
    arrays : dict
        ``scores`` (n, k), ``residual`` and ``residual_fraction`` (n,): Zarr
        arrays chunked by ``chunk`` rows, or numpy arrays.
    chunk : int
        Rows per chunk of the arrays.
    dtype : numpy dtype
        Of the stored scores.
    group : str, optional
        Path or URL of the Zarr group holding ``arrays`` when other processes
        can open it: cluster workers then write row ranges of their own
        (:meth:`worker_plan`).
    start, stop : int, optional
        The rows this writer covers: ``start`` a chunk boundary, ``stop`` a
        chunk boundary or the arrays' end (default: all of them).

    Attributes
    ----------
    residual : ndarray, shape (stop - start,)
        Every squared residual written, kept for the flag rule.
    """

    def __init__(self, arrays: dict, chunk: int, dtype, group: str | None = None, start: int = 0,
                 stop: int | None = None):
        self.start = start
        self.stop = arrays["residual"].shape[0] if stop is None else stop
        self.chunk, self.dtype, self.group = chunk, np.dtype(dtype), group
        self.arrays = arrays
        self.rows = RowWriter(arrays, chunk, start)
        self.residual = np.empty(self.stop - start)

    def __call__(self, start: int, z: np.ndarray, sumsq: np.ndarray) -> None:
        r, f = residuals(z, sumsq)
        self.residual[start - self.start:start - self.start + len(r)] = r
        self.rows.write(start, scores=z.astype(self.dtype, copy=False), residual=r, residual_fraction=f)

    def close(self) -> None:
        self.rows.close()

    def abort(self) -> None:
        self.rows.abort()

    def result(self) -> np.ndarray:
        """What a worker sends back: the residuals of its rows (the flag rule needs all of them)."""
        return self.residual

    def worker_plan(self) -> "StoredRows | None":
        """A recipe other processes use to write row ranges of the same arrays (None when in memory)."""
        return None if self.group is None else StoredRows(_absolute(self.group), self.chunk, "scores",
                                                           self.dtype.str)

    def receive(self, start: int, residual: np.ndarray) -> None:
        """Take the residuals of rows that another process wrote."""
        self.residual[start - self.start:start - self.start + len(residual)] = residual


def _absolute(path: str) -> str:
    """A path as another process must see it: absolute when local (workers need not share our folder)."""
    from rankfold.sources.location import is_url

    return path if is_url(path) else os.path.abspath(path)


def score_sink(n: int, k: int, writer=None, dtype="float32") -> ScoreWriter:
    """A :class:`ScoreWriter` over new per-sample arrays: in memory (float64), or in ``writer``'s store.

    ``writer`` is a :class:`rankfold.result.ResultWriter` (scores stored as
    ``dtype``, arrays chunked by :func:`chunk_rows`; its partial store is the
    group cluster workers open), or None for numpy arrays returned in memory.
    """
    chunk = chunk_rows(n, k)
    if writer is None:
        arrays = {"scores": np.empty((n, k)), "residual": np.empty(n), "residual_fraction": np.empty(n)}
        return ScoreWriter(arrays, chunk, np.float64)
    arrays = {"scores": writer.create("scores", (n, k), dtype, ("sample", "component"), (chunk, k)),
              "residual": writer.create("residual", (n,), "float64", ("sample",), (chunk,)),
              "residual_fraction": writer.create("residual_fraction", (n,), "float64", ("sample",), (chunk,))}
    return ScoreWriter(arrays, chunk, dtype, writer.tmp)


class _TallRows:
    """The capture sink of a worker filling rows of a stored :class:`TallProduct`."""

    def __init__(self, arrays: dict, chunk: int, start: int):
        self.rows = RowWriter(arrays, chunk, start)

    def __call__(self, start: int, y: np.ndarray, sumsq: np.ndarray) -> None:
        self.rows.write(start, y=y, sumsq=sumsq)

    def close(self) -> None:
        self.rows.close()

    def abort(self) -> None:
        self.rows.abort()

    def result(self) -> None:
        return None  # the rows are in the scratch store


@dataclass(frozen=True)
class StoredRows:
    """How a worker process writes a row range of stored per-sample arrays (picklable).

    ``kind`` is ``"scores"`` (a :class:`ScoreWriter` over ``SCORE_ARRAYS``,
    scores stored as ``dtype``) or ``"tall"`` (the ``y`` and ``sumsq`` arrays
    of a :class:`TallProduct`).  Writers of disjoint ranges that start and end
    on chunk boundaries never share a chunk.
    """

    group: str
    chunk: int
    kind: str
    dtype: str = "<f8"

    @property
    def names(self) -> tuple[str, ...]:
        return SCORE_ARRAYS if self.kind == "scores" else ("y", "sumsq")

    def open(self) -> dict:
        import zarr

        group = zarr.open_group(self.group, mode="r+")
        return {name: group[name] for name in self.names}

    def start(self, lo: int, hi: int):
        """A sink for rows ``lo`` to ``hi`` (called with blocks in order), with close/abort/result."""
        if lo % self.chunk:
            raise ValueError(f"a row range must start on a chunk boundary ({self.chunk} rows); got {lo}")
        if self.kind == "scores":
            return ScoreWriter(self.open(), self.chunk, self.dtype, self.group, lo, hi)
        return _TallRows(self.open(), self.chunk, lo)


def residuals(scores: np.ndarray, sumsq: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Squared reconstruction residuals and their fraction of each sample's squared norm.

    ``scores`` (rows, k) in float64, ``sumsq`` (rows,) the centered squared norms.
    A sample with zero norm sits at the center: residual and fraction 0.
    """
    explained = np.einsum("ij,ij->i", scores, scores)
    residual = np.maximum(sumsq - explained, 0.0)  # round-off can leave a tiny negative
    fraction = np.divide(residual, sumsq, out=np.zeros_like(residual), where=sumsq > 0)
    return residual, fraction


@dataclass(frozen=True)
class FlagRule:
    """The robust outlier rule and the statistics it was applied with."""

    median: float
    mad: float
    threshold: float
    cutoff: float
    flagged: int

    def as_dict(self) -> dict:
        return {"median": self.median, "mad": self.mad, "threshold": self.threshold, "cutoff": self.cutoff,
                "flagged": self.flagged, "scale": "cube root of the squared residual",
                "rule": f"cbrt(residual) > median + {self.threshold:g} * {MAD_TO_SIGMA} * MAD, median and "
                        "MAD of cbrt(residual) (robust z-score, common practice; cube root after Wilson and "
                        "Hilferty 1931)"}


def flag_rule(residual: np.ndarray, threshold: float) -> FlagRule:
    """Median and MAD of the residuals' cube roots, and the residual above which samples are flagged.

    When the MAD is zero (at least half the residuals are equal, for example
    all zero when every component is kept) nothing can be called unusual by
    this rule, and the cutoff is infinite.
    """
    roots = np.cbrt(residual)
    median = float(np.median(roots))
    mad = float(np.median(np.abs(roots - median)))
    cutoff = (median + threshold * MAD_TO_SIGMA * mad) ** 3 if mad > 0 else float("inf")
    return FlagRule(median, mad, float(threshold), cutoff, int(np.count_nonzero(residual > cutoff)))


@dataclass
class SampleParts:
    """What a route hands over for the per-sample outputs (see the module docstring).

    Exactly one of ``scores`` (n, k) or ``tall`` (a :class:`TallProduct`, with
    ``coefficients`` (w, k)) is set, or neither when a scores pass is needed.
    ``sumsq`` (n,) goes with ``scores``.
    """

    scores: np.ndarray | None = None
    sumsq: np.ndarray | None = None
    tall: "TallProduct | None" = None
    coefficients: np.ndarray | None = None

    def flip(self, flips: np.ndarray) -> None:
        """Apply the sign rule's flips to whatever holds the scores."""
        if self.scores is not None:
            self.scores *= flips
        if self.coefficients is not None:
            self.coefficients *= flips


class TallProduct:
    """``Y = Xc Q`` (n, w) and each sample's squared norm, in memory or in a scratch Zarr group.

    Filled in row order by the randomized route's last pass; read back chunk by
    chunk to form scores once the Ritz coefficients are known.
    """

    def __init__(self, n: int, width: int, scratch: str | None, chunk_bytes: int = CHUNK_BYTES,
                 shared: bool = False):
        self.n, self.width, self.scratch = n, width, scratch
        self.shared = shared and scratch is not None  # other processes see the scratch folder
        self.chunk = chunk_rows(n, width + 1, chunk_bytes=chunk_bytes)
        if scratch is None:
            self.y = np.empty((n, width))
            self.sumsq = np.empty(n)
        else:
            import zarr

            group = zarr.open_group(scratch, mode="w", zarr_format=3)
            # Uncompressed: written once and read once, right away; compression
            # would cost more time than the bytes it saves.
            self.y = group.create_array("y", shape=(n, width), dtype="float64", chunks=(self.chunk, width),
                                        compressors=None)
            self.sumsq = group.create_array("sumsq", shape=(n,), dtype="float64", chunks=(self.chunk,),
                                            compressors=None)
        self.writer = RowWriter({"y": self.y, "sumsq": self.sumsq}, self.chunk)

    @staticmethod
    def bytes_needed(n: int, width: int) -> int:
        return n * (width + 1) * 8

    def __call__(self, start: int, y: np.ndarray, sumsq: np.ndarray) -> None:
        """The capture sink of the last pass: rows ``start`` onwards of ``Y`` and their squared norms."""
        self.writer.write(start, y=y, sumsq=sumsq)

    def worker_plan(self) -> StoredRows | None:
        """A recipe for cluster workers to fill row ranges themselves (scratch beside the output only)."""
        return StoredRows(_absolute(self.scratch), self.chunk, "tall") if self.shared else None

    def receive(self, start: int, value) -> None:
        """Rows written by another process: nothing comes back (they are in the scratch store)."""

    def chunks(self):
        """Yield ``(start, y, sumsq)`` for consecutive row ranges."""
        self.writer.close()
        for a in range(0, self.n, self.chunk):
            b = min(self.n, a + self.chunk)
            yield a, np.asarray(self.y[a:b]), np.asarray(self.sumsq[a:b])

    def remove(self) -> None:
        self.writer.abort()
        if self.scratch is not None:
            import shutil

            shutil.rmtree(self.scratch, ignore_errors=True)
