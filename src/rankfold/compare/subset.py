"""Drawing a reproducible random subset of a table cheaply, and holding it.

The draw has two stages, so that it reads only part of the table:

1. The samples axis is cut into ``units``: ranges of consecutive samples
   aligned to the storage (Zarr chunks), about ``TARGET_UNITS`` of them.
   Each unit is chosen with probability ``b``.
2. Inside a chosen unit every sample is kept with probability ``q = p / b``
   (a Bernoulli draw per sample).

Every sample is therefore kept with probability ``p`` (the requested
fraction), the subset's expected size is ``n p``, and, given the chosen units,
its size is Binomial(samples in chosen units, ``q``).  Only the chosen units
are read: a fraction ``b`` of the table.  ``b = sqrt(p)`` (at least enough
for ``MIN_UNITS`` units) balances the two costs: a smaller ``b`` reads less
but concentrates the subset in fewer stretches of the table, which matters
when the table is sorted (by time, by machine, by population).

Both stages use one ``numpy.random.default_rng(seed)`` stream, and the units
depend only on the table's shape and storage (not on the memory ceiling), so
a seed gives the same subset on any machine.  Features, when subsampled, are a
uniform choice without replacement of ``round(f m)`` of them, from a second
stream of the same seed.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np

from rankfold.errors import DataError, UsageError
from rankfold.sources.base import Partition, Source
from rankfold.sources.matrix import StoredMatrixSource
from rankfold.sources.npy import NpySource

TARGET_UNITS = 2048
MIN_UNITS = 32


def parse_fraction(name: str, value) -> float:
    """A fraction in (0, 1] from a float or text such as ``"5%"`` or ``"0.05"``.

    Raises
    ------
    UsageError
        Naming ``name``, the rule and the value.
    """
    text = value
    if isinstance(value, str):
        s = value.strip()
        try:
            number = float(s[:-1]) / 100 if s.endswith("%") else float(s)
        except ValueError:
            raise UsageError(f"{name} must be a fraction in (0, 1] such as 0.05 or '5%'; got {text!r}") from None
    elif isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool):
        number = float(value)
    else:
        raise UsageError(f"{name} must be a fraction in (0, 1] such as 0.05 or '5%'; got {text!r}")
    if not (math.isfinite(number) and 0 < number <= 1):
        raise UsageError(f"{name} must be a fraction in (0, 1] (above 0%, at most 100%); got {text!r}")
    return number


@dataclass(frozen=True)
class SubsetDraw:
    """Which samples and features a subset holds, and how they were drawn.

    Attributes
    ----------
    rows : ndarray of int64, shape (n_subset,)
        Sample indices into the source, increasing.
    features : ndarray of int64, shape (m_subset,)
        Feature indices into the source, increasing.
    units : Partition
        The sample ranges of stage 1.
    chosen_units : ndarray of int64
        Indices into ``units.bounds`` of the units read.
    unit_probability, row_probability : float
        ``b`` and ``q`` of the module docstring; ``b * q`` is the fraction.
    fraction, feature_fraction : float
    seed : int
    """

    rows: np.ndarray
    features: np.ndarray
    units: Partition
    chosen_units: np.ndarray
    unit_probability: float
    row_probability: float
    fraction: float
    feature_fraction: float
    seed: int

    @property
    def rows_in_chosen_units(self) -> int:
        return int(sum(self.units.bounds[i][1] - self.units.bounds[i][0] for i in self.chosen_units))

    def summary(self) -> dict:
        """The ``subset`` entry of a comparison."""
        return {"samples": int(self.rows.size), "features": int(self.features.size),
                "fraction": float(self.fraction), "seed": int(self.seed)}


def sample_units(source: Source) -> Partition:
    """Stage-1 ranges of samples: about TARGET_UNITS, whole storage chunks where the storage has them."""
    n = source.n_samples
    align = _sample_alignment(source)
    size = max(align, math.ceil(n / TARGET_UNITS))
    return Partition.regular("samples", n, size, align)


def _sample_alignment(source: Source) -> int:
    """Samples per storage chunk, where reading part of a chunk decodes all of it (Zarr); else 1.

    ``.npy`` maps any row range directly and Parquet streams row groups, so
    their units need no alignment (the ``.npy`` reader's preferred step, 8 MB
    of rows, would leave too few units to spread the subset).
    """
    return source.sample_chunk()


def draw_subset(source: Source, fraction: float, feature_fraction: float | None = None,
                seed: int = 0) -> SubsetDraw:
    """Choose the samples (and features) of a subset; reads no data.

    Parameters
    ----------
    source : Source
    fraction : float in (0, 1]
        Expected share of the samples kept.
    feature_fraction : float in (0, 1], optional
        Share of the features kept (exactly ``max(1, round(f m))`` of them).
    seed : int

    Returns
    -------
    SubsetDraw
    """
    n, m = source.shape
    rng = np.random.default_rng(seed)
    units = sample_units(source)
    b = min(1.0, max(math.sqrt(fraction), MIN_UNITS / max(1, len(units))))
    q = fraction / b
    chosen = np.flatnonzero(rng.random(len(units)) < b) if b < 1 else np.arange(len(units))
    rows = []
    for i in chosen:
        start, stop = units.bounds[i]
        rows.append(start + np.flatnonzero(rng.random(stop - start) < q))
    rows = np.concatenate(rows).astype(np.int64) if rows else np.empty(0, np.int64)
    f = 1.0 if feature_fraction is None else feature_fraction
    if f < 1:
        frng = np.random.default_rng([seed, 1])
        keep = max(1, int(round(f * m)))
        features = np.sort(frng.choice(m, size=keep, replace=False)).astype(np.int64)
    else:
        features = np.arange(m, dtype=np.int64)
    return SubsetDraw(rows, features, units, chosen.astype(np.int64), b, q, float(fraction), f, int(seed))


def smallest_fraction(n_samples: int, needed: int) -> float:
    """The smallest sample fraction (rounded up to two significant digits) very likely to hold ``needed`` samples.

    The expected size must exceed ``needed`` by four standard deviations of
    a Poisson count (``4 sqrt(needed)``): a Bernoulli(p) draw over n samples
    has mean n p and variance n p (1 - p) <= n p (common practice).
    """
    want = (needed + 4 * math.sqrt(needed)) / max(1, n_samples)
    if want >= 1:
        return 1.0
    step = 10.0 ** (math.floor(math.log10(want)) - 1)
    return min(1.0, math.ceil(want / step * (1 - 1e-12)) * step)


class ArraySource(StoredMatrixSource):
    """An in-memory samples x features float64 array seen as a :class:`Source`."""

    def __init__(self, data: np.ndarray, feature_names, label: str):
        super().__init__(label, "subset", data.shape, data.dtype, "rows", None)
        self.data = data
        self.feature_names = tuple(feature_names)

    def _rows(self, start, stop, cols):
        return self.data[start:stop, cols]

    def _fill_rows(self, start, stop, out):
        np.copyto(out, self.data[start:stop])

    def fingerprint(self) -> dict:
        return {"kind": "subset", "path": self.path, "stored_shape": list(self.stored_shape),
                "dtype": str(self.storage_dtype), "native_axis": "samples"}


def materialize(source: Source, draw: SubsetDraw, memory_limit: int, scratch: str, session=None) -> Source:
    """Read the drawn subset into a samples x features float64 table.

    In memory when it takes at most a quarter of ``memory_limit``; otherwise in
    ``scratch/subset.npy`` (the caller removes ``scratch``).  Reads only the
    chosen units, each in pieces of at most an eighth of the ceiling.

    Parameters
    ----------
    source : Source
    draw : SubsetDraw
    memory_limit : int
        Bytes; also each cluster worker's ceiling for its reads.
    scratch : str
        Folder for ``subset.npy`` when the subset is held on disk.
    session : rankfold.cluster.ClusterSession, optional
        Read on the cluster's workers instead (:mod:`rankfold.cluster.subset`):
        the same reads cut into groups, only the drawn rows travel back; the
        table is the same array.

    Returns
    -------
    Source
        Shape ``(draw.rows.size, draw.features.size)``.
    """
    n_sub, m_sub = draw.rows.size, draw.features.size
    nbytes = n_sub * m_sub * 8
    names = [source.feature_names[j] for j in draw.features]
    label = f"{source.path} (subset: {n_sub:,} samples x {m_sub:,} features, seed {draw.seed})"
    if nbytes <= memory_limit // 4:
        data = np.empty((n_sub, m_sub), dtype=np.float64)
        target = None
    else:
        os.makedirs(scratch, exist_ok=True)
        target = os.path.join(scratch, "subset.npy")
        data = np.lib.format.open_memmap(target, mode="w+", dtype=np.float64, shape=(n_sub, m_sub))
    piece_rows = max(1, (memory_limit // 8) // max(1, source.bytes_per_unit("samples")))
    widest = max((b - a for a, b in _read_spans(source, draw)), default=0)
    if source.native_axis == "features" and widest > piece_rows:
        # Samples stored as columns, and a chosen unit does not fit one read: every read of a
        # range of samples walks all the stored rows, so read the stored rows once instead.
        if session is None:
            filled = _fill_from_features(source, draw, data, memory_limit)
        else:
            from rankfold.cluster.subset import fill_from_features

            filled = fill_from_features(session, source, draw, data, feature_blocks(source, draw, memory_limit),
                                        memory_limit)
    elif session is None:
        filled = _fill_from_samples(source, draw, data, piece_rows)
    else:
        from rankfold.cluster.subset import fill_from_samples

        filled = fill_from_samples(session, source, draw, data, _read_spans(source, draw), piece_rows, memory_limit)
    if filled != n_sub:  # pragma: no cover - guards the bookkeeping above
        raise DataError(f"{source.path}: read {filled} subset samples, expected {n_sub}")
    if target is None:
        return ArraySource(data, names, label)
    data.flush()
    del data
    return NpySource(target, feature_names=names)


def _read_spans(source: Source, draw: SubsetDraw) -> list[tuple[int, int]]:
    """Ranges of samples to read: per storage group holding drawn rows, its first to last drawn row.

    A storage group is what a read cannot skip inside: a Parquet row group
    (reading rows from its middle decodes it from its start, but consecutive
    reads continue one stream), otherwise a chosen unit (whole Zarr chunks).
    """
    starts = source.group_starts()  # Parquet: first row of every row group
    if starts is None:
        edges = [draw.units.bounds[i] for i in draw.chosen_units]
    else:
        bounds = list(starts) + [source.n_samples]
        edges = list(zip(bounds[:-1], bounds[1:]))
    spans = []
    for start, stop in edges:
        lo, hi = np.searchsorted(draw.rows, [start, stop])
        if hi > lo:
            spans.append((int(draw.rows[lo]), int(draw.rows[hi - 1]) + 1))
    return spans


def _fill_from_samples(source: Source, draw: SubsetDraw, data: np.ndarray, piece_rows: int) -> int:
    """Read each span of :func:`_read_spans` in consecutive pieces of ``piece_rows``; keep the drawn rows."""
    filled = 0
    for picked in pick_rows(source, _read_spans(source, draw), draw.rows, draw.features, piece_rows):
        data[filled:filled + picked.shape[0]] = picked
        filled += picked.shape[0]
    return filled


def pick_rows(source: Source, spans, rows: np.ndarray, features: np.ndarray, piece_rows: int):
    """The drawn rows of each span, read in consecutive pieces of at most ``piece_rows`` samples.

    Parameters
    ----------
    source : Source
    spans : sequence of (int, int)
        Sample ranges from :func:`_read_spans`, increasing.
    rows : ndarray of int64
        Drawn sample indices, increasing; at least those inside ``spans``.
    features : ndarray of int64
        Kept feature indices, increasing.
    piece_rows : int

    Yields
    ------
    ndarray, shape (r, features.size)
        The drawn rows of one piece, in order (pieces without drawn rows are skipped).
    """
    all_features = features.size == source.n_features
    for start, stop in spans:
        lo, hi = np.searchsorted(rows, [start, stop])
        for a in range(start, stop, piece_rows):
            b = min(stop, a + piece_rows)
            r0, r1 = np.searchsorted(rows[lo:hi], [a, b]) + lo
            if r1 == r0:
                continue
            # read() handles the orientation: samples stored as columns come back as rows.
            block = source.read("samples", a, b)
            picked = block[rows[r0:r1] - a]
            del block
            yield picked if all_features else picked[:, features]
            del picked


def feature_blocks(source: Source, draw: SubsetDraw, memory_limit: int) -> list[tuple[int, int]]:
    """Ranges of whole features (stored rows) to read, each at most an eighth of the ceiling, holding kept features."""
    step = max(1, (memory_limit // 8) // max(1, source.bytes_per_unit("features")))
    blocks = []
    for a in range(0, source.n_features, step):
        b = min(source.n_features, a + step)
        f0, f1 = np.searchsorted(draw.features, [a, b])
        if f1 > f0:
            blocks.append((a, b))
    return blocks


def pick_columns(source: Source, blocks, rows: np.ndarray, features: np.ndarray):
    """The drawn samples of the kept features of each feature block of :func:`feature_blocks`.

    Yields
    ------
    (f0, f1, ndarray of shape (rows.size, f1 - f0))
        Positions ``f0:f1`` into ``features`` and the subset's columns there.
    """
    for a, b in blocks:
        f0, f1 = (int(i) for i in np.searchsorted(features, [a, b]))
        block = source.read("features", a, b)  # (b - a, n_samples)
        picked = block[features[f0:f1] - a][:, rows].T
        del block
        yield f0, f1, picked
        del picked


def _fill_from_features(source: Source, draw: SubsetDraw, data: np.ndarray, memory_limit: int) -> int:
    """Read blocks of whole features (the stored rows) once; keep the drawn samples and features."""
    for f0, f1, picked in pick_columns(source, feature_blocks(source, draw, memory_limit), draw.rows,
                                       draw.features):
        data[:, f0:f1] = picked
    return draw.rows.size
