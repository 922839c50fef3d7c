"""``decompose``: the one entry point that validates, chooses a route, runs it, stores it."""

from __future__ import annotations

import datetime
import os
import platform
import time

import numpy as np

from rankfold.errors import SourceError, UsageError
from rankfold.memory import default_memory_limit, parse_memory, return_freed_memory_promptly
from rankfold.result import Result, check_output_path, open_result, write_result
from rankfold.routes import ROUTES
from rankfold.routes.choose import choose_route
from rankfold.routes.common import Decomposition, ProgressCallback, RouteInput
from rankfold.sources import Source, open_source

MISSING_POLICIES = ("refuse", "fill-mean")
ROUTE_NAMES = ("auto", "memory", "features", "samples")
FEATURE_CHUNK = 65536
SAMPLE_CHUNK = 65536


def decompose(source, rank: int, *, memory_limit=None, standardize: bool = False, columns=None,
              samples_as: str = "rows", missing: str = "refuse", route: str = "auto", out=None,
              seed: int = 0, exclude=None, id_column: str | None = None,
              missing_code: float | None = None, array: str | None = None, overwrite: bool = False,
              progress: ProgressCallback | None = None) -> Result:
    """Leading principal components of a table, streamed in blocks within a memory ceiling.

    Parameters
    ----------
    source : str or Source
        Parquet file or folder, Zarr array or group, ``.npy`` file, or an opened source.
    rank : int
        Number of components, ``1 <= rank <= min(n_samples, n_features)``.
    memory_limit : int or str, optional
        Ceiling for data and state, in bytes or as ``"512MB"``. Default: 60% of
        the available memory.
    standardize : bool
        Scale each feature to unit variance (correlation PCA) instead of
        covariance PCA.
    columns, exclude : list of str, optional
        Parquet feature columns to use or to leave out (names or fnmatch patterns).
    samples_as : {"rows", "columns"}
        How samples are stored in a 2-D array source.
    missing : {"refuse", "fill-mean"}
        Refuse missing values (default), or fill each with its column mean.
    route : {"auto", "memory", "features", "samples"}
        Force a route; ``auto`` chooses from the shape and the ceiling.
    out : str, optional
        Path of the result store to write (a Zarr v3 group). Without it the
        result is returned only, with ``path`` set to None.
    seed : int
        Seed for randomized steps; the exact routes do not use it, it is
        recorded for reproducibility.
    id_column : str, optional
        Parquet column stored as ``sample_ids``.
    missing_code : float, optional
        A stored value meaning "missing" (for example -1 in int8 genotype stores).
    array : str, optional
        Array name when ``source`` is a Zarr group with several arrays.
    overwrite : bool
        Replace an existing result store at ``out``.
    progress : callable, optional
        Called with a dict (pass, block, blocks, bytes, seconds) after every block.

    Returns
    -------
    Result
        Loadings (m, k), variances (k,), variance fractions, center and scale,
        feature names, scores when the route gives them, and attributes.

    Raises
    ------
    UsageError, SourceError, DataError, MemoryLimitError, OutputError

    Notes
    -----
    Routes and their costs are described in :mod:`rankfold.routes`; the sign
    rule in :mod:`rankfold.linalg`.
    """
    if missing not in MISSING_POLICIES:
        raise UsageError(f"missing must be one of {', '.join(MISSING_POLICIES)}; got {missing!r}")
    if route not in ROUTE_NAMES:
        raise UsageError(f"route must be one of {', '.join(ROUTE_NAMES)}; got {route!r}")
    if isinstance(rank, bool) or not isinstance(rank, (int, np.integer)):
        raise UsageError(f"rank must be a whole number, got {rank!r}")
    if not isinstance(seed, (int, np.integer)) or isinstance(seed, bool):
        raise UsageError(f"seed must be a whole number, got {seed!r}")
    limit = parse_memory(memory_limit) if memory_limit is not None else default_memory_limit()
    if out is not None:
        out = os.fspath(out)
        check_output_path(out, overwrite)

    return_freed_memory_promptly()
    opened = isinstance(source, Source)
    src = source if opened else open_source(os.fspath(source), samples_as=samples_as, columns=columns,
                                           exclude=exclude, id_column=id_column,
                                           missing_code=missing_code, array=array)
    try:
        n, m = src.shape
        if n == 0 or m == 0:
            raise SourceError(f"{src.path}: the table is empty ({n} samples x {m} features); "
                              "check the path and the column selection")
        if not 1 <= rank <= min(n, m):
            raise UsageError(f"rank must be between 1 and min(samples, features) = {min(n, m)} "
                             f"for {src.path}; got {rank}")
        reasons: tuple[str, ...] = ("forced with route=" + route,)
        if route == "auto":
            choice = choose_route(n, m, rank, limit, src.native_axis)
            route, reasons = choice.route, choice.reasons
        t0 = time.perf_counter()
        inp = RouteInput(src, int(rank), bool(standardize), missing, limit, progress)
        dec = ROUTES[route].run(inp)
        seconds = time.perf_counter() - t0
        params = {"rank": int(rank), "standardize": bool(standardize), "missing": missing,
                  "missing_code": missing_code, "samples_as": samples_as, "route": route,
                  "memory_limit": int(limit), "seed": int(seed),
                  "columns": list(columns) if columns else None,
                  "exclude": list(exclude) if exclude else None, "id_column": id_column}
        attrs = _attributes(src, dec, params, reasons, seconds)
        # Ids go with scores; reading an id column of a billion rows for nothing would
        # break the memory ceiling, so they are read only when scores are stored.
        sample_ids = None
        if dec.scores is not None:
            sample_ids = src.read_sample_ids()
        if out is None:
            return Result(None, dec.loadings, dec.variance, dec.variance / dec.total_variance, dec.center,
                          dec.scale, np.asarray(src.feature_names), dec.scores, sample_ids, attrs)
        write_result(out, _arrays(src, dec, sample_ids), attrs, overwrite)
        return open_result(out)
    finally:
        if not opened:
            src.close()


def _arrays(src: Source, dec: Decomposition, sample_ids) -> dict:
    """Name -> (data, dimension names, chunks) of everything the store holds."""
    k = dec.loadings.shape[1]
    fchunk = (min(FEATURE_CHUNK, src.n_features),)
    arrays = {
        "loadings": (dec.loadings, ("feature", "component"), fchunk + (k,)),
        "variance": (dec.variance, ("component",), None),
        "variance_fraction": (dec.variance / dec.total_variance, ("component",), None),
        "center": (dec.center, ("feature",), fchunk),
        "scale": (dec.scale, ("feature",), fchunk),
        "feature_names": (np.asarray(src.feature_names, dtype=str), ("feature",), fchunk),
        "component": (np.arange(1, k + 1, dtype=np.int32), ("component",), None),
    }
    schunk = (min(SAMPLE_CHUNK, src.n_samples),)
    if dec.scores is not None:
        arrays["scores"] = (dec.scores.astype(np.float32), ("sample", "component"), schunk + (k,))
    if sample_ids is not None and len(sample_ids) == src.n_samples:
        ids = np.asarray(sample_ids)
        arrays["sample_ids"] = (ids.astype(str) if ids.dtype.kind in "OUS" else ids, ("sample",), schunk)
    return arrays


def _attributes(src: Source, dec: Decomposition, params: dict, reasons, seconds: float) -> dict:
    return {
        "route": dec.route,
        "route_reasons": list(reasons),
        "rank": int(dec.loadings.shape[1]),
        "n_samples": int(src.n_samples),
        "n_features": int(src.n_features),
        "total_variance": float(dec.total_variance),
        "parameters": params,
        "source": src.fingerprint(),
        "passes": [p.as_dict() for p in dec.passes],
        "seconds": round(seconds, 6),
        "created": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "versions": _versions(),
        "sign_rule": "largest-magnitude loading of each component is positive",
    }


def _versions() -> dict:
    import pyarrow
    import scipy
    import zarr

    from rankfold import __version__

    return {"rankfold": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "zarr": zarr.__version__, "pyarrow": pyarrow.__version__}
