"""``decompose`` and ``plan``: validate once, plan, run the route, store the result."""

from __future__ import annotations

import datetime
import os
import platform
import time

import numpy as np

from rankfold import stopping
from rankfold.checkpoint import DEFAULT_EVERY, Checkpointer
from rankfold.cluster import check_cluster_argument, optional_session
from rankfold.errors import Interrupted, SourceError, UsageError
from rankfold.memory import default_memory_limit, parse_memory, return_freed_memory_promptly
from rankfold.result import Result, ResultWriter, check_output_path, open_result
from rankfold.routes import scores as scores_stage
from rankfold.sample_outputs import (DEFAULT_FLAG_THRESHOLD, SCORE_DTYPES, FlagRule, chunk_rows, flag_rule,
                                     score_sink)
from rankfold.machine import MachineSpeed, machine_speed
from rankfold.planner import Plan, PlanRequest, make_plan
from rankfold.routes import ROUTES
from rankfold.routes.sketch import KINDS as SKETCH_KINDS
from rankfold.routes.common import Decomposition, ProgressCallback, RouteInput
from rankfold.sources import Source, open_source

MISSING_POLICIES = ("refuse", "fill-mean")
ROUTE_NAMES = ("auto", "memory", "features", "samples", "sketch")
ACCURACY = ("exact", "approximate")
MAX_OVERSAMPLE = 1000
MAX_POWER_ITERATIONS = 50
FEATURE_CHUNK = 65536


def decompose(source, rank: int, *, memory_limit=None, standardize: bool = False, columns=None,
              samples_as: str = "rows", missing: str = "refuse", route: str = "auto", out=None,
              seed: int = 0, exclude=None, id_column: str | None = None,
              missing_code: float | None = None, array: str | None = None, overwrite: bool = False,
              progress: ProgressCallback | None = None, accuracy: str = "exact", oversample: int = 10,
              power_iterations: int = 2, sketch: str = "subspace", scores: bool = True,
              scores_dtype: str = "float32", flag_threshold: float = DEFAULT_FLAG_THRESHOLD,
              on_plan=None, speed: MachineSpeed | None = None, checkpoint_every: float = DEFAULT_EVERY,
              restart: bool = False, on_resume=None, cluster=None) -> Result:
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
    route : {"auto", "memory", "features", "samples", "sketch"}
        Force a route; ``auto`` lets the planner (:mod:`rankfold.planner`)
        choose the fastest that fits the ceiling and meets ``accuracy``.
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
    accuracy : {"exact", "approximate"}
        ``exact`` (default) keeps to the exact routes unless none fits the
        ceiling; ``approximate`` lets the planner take the randomized route
        when it is faster.
    oversample : int
        Extra sketch columns beyond ``rank`` (randomized route; default 10).
    power_iterations : int
        Passes of subspace iteration (randomized route; default 2).
    sketch : {"subspace", "krylov", "one-pass"}
        Randomized method; see :mod:`rankfold.routes.sketch`.
    scores : bool
        Write every sample's scores, squared reconstruction residual, residual
        fraction and outlier flag (default).  Routes that do not produce scores
        on the way read the data once more; the plan counts it.
    scores_dtype : {"float32", "float64"}
        Dtype of the stored scores (float32 halves their size; in-memory
        results without ``out`` keep float64).
    flag_threshold : float
        Samples whose residual exceeds ``median + flag_threshold * 1.4826 * MAD``
        are flagged (:mod:`rankfold.sample_outputs`); default 3.5.
    on_plan : callable, optional
        Called with the :class:`~rankfold.planner.Plan` before any data is read.
    speed : MachineSpeed, optional
        Machine speeds for the time estimates; default the cached probe.
    checkpoint_every : float
        Seconds between checkpoints within a pass (default 300); 0 saves after
        every block. Checkpoints are kept only when ``out`` is given, in
        ``.NAME.checkpoint`` beside it (:mod:`rankfold.checkpoint`), and are
        removed once the result is complete. Calling ``decompose`` again with
        the same arguments resumes from the last one.
    restart : bool
        Discard a checkpoint left by an earlier run instead of resuming it.
    on_resume : callable, optional
        Called with a one-line message ("resuming ...: pass 2 of 4 (feature
        Gram), block 342 of 1,000") when a checkpoint is resumed.
    cluster : distributed.Client or str, optional
        Run every pass as tasks on a dask.distributed cluster: a client, a
        scheduler address (``"tcp://host:8786"``), or ``"local:N"`` for N
        worker processes on this machine (started and closed here).  Workers
        open the source themselves, so it must be a path or URL they can all
        read.  The in-memory route runs in this process.  See docs/cluster.md.

    Returns
    -------
    Result
        Loadings (m, k), variances (k,), variance fractions, center and scale,
        feature names, per-sample scores (n, k), residuals and flags, and attributes.

    Raises
    ------
    UsageError, SourceError, DataError, MemoryLimitError, OutputError
    CheckpointError
        A checkpoint beside ``out`` belongs to another source or other
        parameters (the message lists what changed), or is in use.
    Interrupted
        SIGINT or SIGTERM arrived (handlers are installed while the passes run,
        from the main thread only); the state was saved first when ``out`` is given.

    Notes
    -----
    Routes and their costs are described in :mod:`rankfold.routes`; the sign
    rule in :mod:`rankfold.linalg`.
    """
    _check_choice("accuracy", accuracy, ACCURACY)
    _check_choice("sketch", sketch, SKETCH_KINDS)
    _check_count("oversample", oversample, 0, MAX_OVERSAMPLE)
    _check_count("power_iterations", power_iterations, 0, MAX_POWER_ITERATIONS)
    if sketch == "one-pass" and route in ("auto", "sketch") and samples_as == "rows" and (
            standardize or missing == "fill-mean"):
        raise UsageError("sketch='one-pass' on samples stored as rows cannot standardize or fill missing "
                         "values: both need the column moments before the single pass; use "
                         "sketch='subspace' (one extra pass)")
    _check_choice("missing", missing, MISSING_POLICIES)
    _check_choice("route", route, ROUTE_NAMES)
    _check_choice("scores_dtype", scores_dtype, SCORE_DTYPES)
    _check_threshold(flag_threshold)
    if isinstance(rank, bool) or not isinstance(rank, (int, np.integer)):
        raise UsageError(f"rank must be a whole number, got {rank!r}")
    _check_count("seed", seed, 0, 2**63 - 1)
    if isinstance(checkpoint_every, bool) or not isinstance(checkpoint_every, (int, float, np.integer, np.floating)) \
            or not np.isfinite(checkpoint_every) or checkpoint_every < 0:
        raise UsageError(f"checkpoint_every must be a number of seconds, 0 or more; got {checkpoint_every!r}")
    check_cluster_argument(cluster)
    limit = parse_memory(memory_limit) if memory_limit is not None else None
    if out is not None:
        out = os.fspath(out)
        check_output_path(out, overwrite)

    return_freed_memory_promptly()
    opened = isinstance(source, Source)
    src = source if opened else open_source(os.fspath(source), samples_as=samples_as, columns=columns,
                                           exclude=exclude, id_column=id_column,
                                           missing_code=missing_code, array=array)
    ckpt = None
    try:
        _check_rank(src, rank)
        if out is not None:
            # What decides the answer, as asked: the route and the memory limit are resolved
            # below ("auto", None for the default) and the checkpoint keeps what they became.
            identity = {"rank": int(rank), "route": route, "accuracy": accuracy,
                        "memory_limit": None if limit is None else int(limit),
                        "standardize": bool(standardize), "missing": missing, "missing_code": missing_code,
                        "columns": list(columns) if columns else None,
                        "exclude": list(exclude) if exclude else None, "samples_as": samples_as,
                        "array": array, "id_column": id_column, "seed": int(seed), "oversample": int(oversample),
                        "power_iterations": int(power_iterations), "sketch": sketch, "scores": bool(scores),
                        "scores_dtype": scores_dtype, "flag_threshold": float(flag_threshold)}
            ckpt = Checkpointer.open(out, identity, src.fingerprint(), float(checkpoint_every), bool(restart))
        resolved = ckpt.resolved if ckpt is not None else None
        if limit is None:
            # A resumed run keeps the default ceiling it started with: the default follows the
            # memory available now, and another ceiling would cut other blocks.
            limit = resolved["memory_limit"] if resolved else default_memory_limit()
        request = dict(accuracy=accuracy, oversample=oversample, power_iterations=power_iterations,
                       sketch=sketch, missing=missing, standardize=standardize, scores=bool(scores),
                       scratch_free=_free_disk(out), outputs_held=out is None, clustered=cluster is not None)
        chosen = make_plan(plan_request(src, rank, limit, route=route, **request), speed or machine_speed())
        if resolved and chosen.route != resolved["route"]:
            # The choice rests on measured machine speeds, which drift between runs; the
            # checkpoint holds passes of the route first chosen, so keep it.
            chosen = make_plan(plan_request(src, rank, limit, route=resolved["route"], **request),
                               speed or machine_speed())
        if ckpt is not None:
            ckpt.settle(chosen.route, limit, chosen.estimate.passes)
        if on_plan is not None:
            on_plan(chosen)
        if ckpt is not None and on_resume is not None and ckpt.resume_message():
            on_resume(ckpt.resume_message())
        params = {"rank": int(rank), "standardize": bool(standardize), "missing": missing,
                  "missing_code": missing_code, "samples_as": samples_as, "route": chosen.route,
                  "memory_limit": int(limit), "seed": int(seed),
                  "columns": list(columns) if columns else None,
                  "exclude": list(exclude) if exclude else None, "id_column": id_column,
                  "accuracy": accuracy, "oversample": int(oversample),
                  "power_iterations": int(power_iterations), "sketch": sketch, "scores": bool(scores),
                  "scores_dtype": scores_dtype, "flag_threshold": float(flag_threshold)}
        # With a checkpoint the partial store and scratch folder get a fixed name, so that a
        # resumed run replaces what a killed one left (the checkpoint's lock keeps runs apart).
        writer = ResultWriter(out, overwrite, tag="resumable" if ckpt else None) if out is not None else None
        try:
            with optional_session(cluster, src) as session, stopping.stop_on_signals():
                inp = RouteInput(src, int(rank), bool(standardize), missing, limit, progress, int(oversample),
                                 int(power_iterations), sketch, int(seed), scores=bool(scores),
                                 scratch=writer.scratch_folder() if writer else None, outputs_held=writer is None,
                                 checkpoint=ckpt, cluster=session)
                return _run(inp, chosen, params, writer, scores_dtype, float(flag_threshold))
        except BaseException:
            if writer is not None:
                writer.abandon()
            raise
    finally:
        if ckpt is not None:
            ckpt.close()
        if not opened:
            src.close()


def _run(inp: RouteInput, chosen: Plan, params: dict, writer: ResultWriter | None, scores_dtype: str,
         flag_threshold: float) -> Result:
    """Run the chosen route and the per-sample stage; store or return the result."""
    src = inp.source
    t0 = time.perf_counter()
    dec = ROUTES[chosen.route].run(inp)
    _stop_between_passes(inp)
    per_sample, flag, sample_ids = {}, None, None
    # No score exceeds sqrt((n - 1) * variance) of its component; past float32's range
    # (about 3.4e38) float32 would store inf, so such scores are kept in float64.
    if scores_dtype == "float32" and np.sqrt(2.0 * (dec.n_samples - 1) * float(dec.variance.max(initial=0.0))) \
            >= np.finfo(np.float32).max:
        scores_dtype = params["scores_dtype"] = "float64"
    if inp.scores:
        per_sample, flag = _sample_outputs(dec, inp, writer, scores_dtype, flag_threshold)
        _stop_between_passes(inp)
        # Ids go with scores; reading an id column of a billion rows for nothing would
        # break the memory ceiling, so they are read only when scores are stored.
        sample_ids = src.read_sample_ids()
    elif dec.parts.tall is not None:
        dec.parts.tall.remove()
    src.check_unchanged(after_last=True)  # a table rewritten during the last pass is refused too
    seconds = time.perf_counter() - t0
    attrs = _attributes(src, dec, params, chosen.reasons, seconds)
    attrs["plan"] = {"estimated_seconds": round(chosen.estimate.seconds, 3),
                     "estimated_peak_memory": int(chosen.estimate.peak_memory),
                     "passes": chosen.estimate.passes, "bytes_read": chosen.estimate.bytes_read}
    if flag is not None:
        attrs["residual_flag"] = flag.as_dict()
    if inp.cluster is not None:
        attrs["cluster"] = inp.cluster.summary()
    if writer is None:
        return Result(None, dec.loadings, dec.variance, dec.variance / dec.total_variance, dec.center,
                      dec.scale, np.asarray(src.feature_names), per_sample.get("scores"), sample_ids, attrs,
                      per_sample.get("residual"), per_sample.get("residual_fraction"), per_sample.get("flagged"))
    with writer:
        for name, (data, dims, chunks) in _arrays(src, dec, sample_ids).items():
            writer.add(name, data, dims, chunks)
        writer.commit(attrs)
    if inp.checkpoint is not None:
        inp.checkpoint.remove()  # only once the result is complete under its name
    return open_result(writer.out)


def _stop_between_passes(inp: RouteInput) -> None:
    """Honour a SIGINT/SIGTERM that arrived after the last pass had saved its state."""
    signal_name = stopping.requested()
    if signal_name:
        raise Interrupted(f"stopped by {signal_name} after the last pass; "
                          + ("run the same command again to finish from the checkpoint in "
                             f"{inp.checkpoint.folder}" if inp.checkpoint else "nothing was saved"))


def _sample_outputs(dec: Decomposition, inp: RouteInput, writer: ResultWriter | None, scores_dtype: str,
                    flag_threshold: float) -> tuple[dict, FlagRule]:
    """Scores, residuals and flags, into the store under construction or into memory."""
    n, k = dec.n_samples, dec.loadings.shape[1]
    if writer is None:
        sink = score_sink(n, k)
        every = scores_stage.write(dec, inp, sink)
        rule = flag_rule(every, flag_threshold)
        return {**sink.arrays, "flagged": every > rule.cutoff}, rule
    with writer:  # a failed write (a full disk) becomes an OutputError and removes the partial store
        every = scores_stage.write(dec, inp, score_sink(n, k, writer, scores_dtype))
        rule = flag_rule(every, flag_threshold)
        writer.add("flagged", every > rule.cutoff, ("sample",), (chunk_rows(n, k),))
    return {}, rule


def _free_disk(out) -> int | None:
    """Free bytes in the folder that will hold the output and its scratch arrays."""
    import shutil

    if out is None:
        return None
    try:
        return shutil.disk_usage(os.path.dirname(os.path.abspath(out))).free
    except OSError:
        return None


def plan_request(src: Source, rank: int, limit: int, **options) -> PlanRequest:
    """What the planner needs to know about ``src``, from its metadata only."""
    axes = ("samples", "features")
    return PlanRequest(
        n_samples=src.n_samples, n_features=src.n_features, itemsize=src.storage_dtype.itemsize,
        native_axis=src.native_axis, rank=int(rank), memory_limit=int(limit),
        bytes_per_unit={a: src.bytes_per_unit(a) for a in axes},
        min_block_bytes={a: src.min_block_bytes(a) for a in axes},
        read_fixed_bytes={a: src.fixed_read_bytes(a) for a in axes},
        table_bytes=src.n_samples * src.n_features * src.storage_dtype.itemsize,
        alignment={a: src.alignment(a) for a in axes},
        cores=os.cpu_count() or 1, **options)


def plan(source, rank: int, *, memory_limit=None, standardize: bool = False, columns=None,
         samples_as: str = "rows", missing: str = "refuse", route: str = "auto", exclude=None,
         missing_code: float | None = None, array: str | None = None, accuracy: str = "exact",
         oversample: int = 10, power_iterations: int = 2, sketch: str = "subspace", scores: bool = True,
         speed: MachineSpeed | None = None) -> Plan:
    """The plan :func:`decompose` would follow, from the source's metadata only.

    Parameters are those of :func:`decompose`. Returns a :class:`~rankfold.planner.Plan`
    (route, passes, bytes read, flops, peak memory, estimated time, reasons);
    ``Plan.lines()`` renders it as text.
    """
    _check_choice("accuracy", accuracy, ACCURACY)
    _check_choice("sketch", sketch, SKETCH_KINDS)
    _check_choice("route", route, ROUTE_NAMES)
    _check_choice("missing", missing, MISSING_POLICIES)
    _check_count("oversample", oversample, 0, MAX_OVERSAMPLE)
    _check_count("power_iterations", power_iterations, 0, MAX_POWER_ITERATIONS)
    limit = parse_memory(memory_limit) if memory_limit is not None else default_memory_limit()
    src = source if isinstance(source, Source) else open_source(
        os.fspath(source), samples_as=samples_as, columns=columns, exclude=exclude,
        missing_code=missing_code, array=array)
    try:
        _check_rank(src, rank)
        return make_plan(plan_request(src, rank, limit, route=route, accuracy=accuracy, oversample=oversample,
                                      power_iterations=power_iterations, sketch=sketch, missing=missing,
                                      standardize=standardize, scores=bool(scores)), speed or machine_speed())
    finally:
        if src is not source:
            src.close()


def _check_choice(name: str, value, allowed) -> None:
    if value not in allowed:
        raise UsageError(f"{name} must be one of {', '.join(allowed)}; got {value!r}")


def _check_threshold(value) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not np.isfinite(value) or value <= 0:
        raise UsageError(f"flag_threshold must be a positive number of robust standard deviations; got {value!r}")


def _check_count(name: str, value, low: int, high: int) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not low <= value <= high:
        raise UsageError(f"{name} must be a whole number from {low} to {high}; got {value!r}")


def _check_rank(src: Source, rank) -> None:
    n, m = src.shape
    if n == 0 or m == 0:
        raise SourceError(f"{src.path}: the table is empty ({n} samples x {m} features); "
                          "check the path and the column selection")
    if isinstance(rank, bool) or not isinstance(rank, (int, np.integer)):
        raise UsageError(f"rank must be a whole number, got {rank!r}")
    if not 1 <= rank <= min(n, m):
        raise UsageError(f"rank must be between 1 and min(samples, features) = {min(n, m)} "
                         f"for {src.path}; got {rank}")


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
    schunk = (chunk_rows(src.n_samples, k),)
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
        **dec.extra,
    }


def _versions() -> dict:
    import pyarrow
    import scipy
    import zarr

    from rankfold import __version__

    return {"rankfold": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "zarr": zarr.__version__, "pyarrow": pyarrow.__version__}
