"""Place new samples into an existing decomposition, out of core.

:func:`project` reads a table in blocks within the memory ceiling, applies
the stored transformation (``(x - center) / scale``, the training means for
missing values under ``fill-mean``), multiplies by the loadings, and writes
scores, residuals, residual fractions and flags, as a Zarr group (default) or
a Parquet file.  Features are matched by name: every feature of the result
must be in the table (refused otherwise, with the missing names); extra
columns are ignored with a warning.

New samples are flagged against the *training* cutoff stored with the result
(``attrs["residual_flag"]``), so that a batch of new records is judged by what
the decomposition was built on, not by the batch itself.
"""

from __future__ import annotations

import dataclasses
import os
import time
import warnings
from dataclasses import dataclass

import numpy as np

from rankfold.cluster import check_cluster_argument, optional_session
from rankfold.errors import OutputError, SourceError, UsageError
from rankfold.memory import default_memory_limit, parse_memory, return_freed_memory_promptly
from rankfold.result import Result, ResultWriter, _remove, check_parent_folder, open_result
from rankfold.routes import scores as scores_stage
from rankfold.routes.common import RouteInput, check_values
from rankfold.sample_outputs import DEFAULT_FLAG_THRESHOLD, SCORE_DTYPES, chunk_rows, flag_rule, score_sink
from rankfold.sources import Source, open_source

FORMATS = ("zarr", "parquet")
PROJECTION_KEY = "rankfold_projection"
PROJECTION_VERSION = 1


class ExtraColumnsWarning(UserWarning):
    """The table holds columns the decomposition does not use; they are ignored."""


@dataclass(frozen=True)
class Projection:
    """Per-sample outputs of :func:`project`.

    Attributes
    ----------
    path : str or None
    scores : array, shape (n, k)
    residual, residual_fraction : array, shape (n,)
    flagged : array of bool, shape (n,)
    sample_ids : array, shape (n,), or None
    attrs : dict
    """

    path: str | None
    scores: np.ndarray
    residual: np.ndarray
    residual_fraction: np.ndarray
    flagged: np.ndarray
    sample_ids: np.ndarray | None
    attrs: dict


def project(result, source, *, out=None, format: str = "zarr", memory_limit=None, overwrite: bool = False,
            scores_dtype: str = "float32", id_column: str | None = None, array: str | None = None,
            progress=None, cluster=None) -> Projection:
    """Scores, residuals and flags of the samples of ``source`` in the components of ``result``.

    Parameters
    ----------
    result : Result or str
        A decomposition (or the path of its store).
    source : str
        Table of new samples holding every feature of ``result`` by name; the
        layout options (samples as rows or columns, missing code) are those the
        decomposition was made with.
    out : str, optional
        Where to write: a Zarr group (``format="zarr"``) or a Parquet file
        (``format="parquet"``, one column per component plus ``residual``,
        ``residual_fraction``, ``flagged`` and the id column).  Without it the
        outputs are returned in memory.
    format : {"zarr", "parquet"}
    memory_limit : int or str, optional
        Ceiling for blocks and buffers; default 60% of the available memory.
    overwrite : bool
        Replace an earlier projection at ``out``.
    scores_dtype : {"float32", "float64"}
    id_column : str, optional
        Parquet id column; default the one the decomposition used.
    array : str, optional
        Array name inside a Zarr group.
    progress : callable, optional
        Called after every block, as in :func:`rankfold.decompose`.
    cluster : distributed.Client or str, optional
        Run the pass on a dask.distributed cluster, as in :func:`rankfold.decompose`:
        each worker reads its own range of samples and, with ``out``, writes
        its own chunks of the outputs (``out`` must then be on storage every
        worker sees).  See docs/cluster.md.

    Returns
    -------
    Projection

    Raises
    ------
    UsageError, SourceError, DataError, MemoryLimitError, OutputError, ClusterError
    """
    if format not in FORMATS:
        raise UsageError(f"format must be one of {', '.join(FORMATS)}; got {format!r}")
    if scores_dtype not in SCORE_DTYPES:
        raise UsageError(f"scores_dtype must be one of {', '.join(SCORE_DTYPES)}; got {scores_dtype!r}")
    check_cluster_argument(cluster)
    res = result if isinstance(result, Result) else open_result(os.fspath(result))
    limit = parse_memory(memory_limit) if memory_limit is not None else default_memory_limit()
    if out is not None:
        out = os.fspath(out)
        _check_projection_out(out, overwrite)
    params = res.attrs.get("parameters", {})
    return_freed_memory_promptly()
    src, positions = _open_matching(os.fspath(source), res, params, id_column, array)
    try:
        n, k = src.n_samples, res.rank
        inp = RouteInput(src, k, bool(params.get("standardize")), params.get("missing", "refuse"), limit, progress,
                         outputs_held=out is None)
        fill = inp.missing == "fill-mean"
        axis = src.native_axis

        def prepare(block, start):
            check_values(block, start, axis, inp, allow_missing=fill)
            return block

        t0 = time.perf_counter()
        loadings, center, scale = (np.asarray(a, dtype=np.float64) for a in (res.loadings, res.center, res.scale))
        passes: list = []
        chunk = chunk_rows(n, k)
        marker = (PROJECTION_KEY, PROJECTION_VERSION)
        staging = out if format == "zarr" else os.path.join(os.path.dirname(os.path.abspath(out)),
                                                             f".{os.path.basename(out)}.staging-{os.getpid()}")
        writer = ResultWriter(staging, overwrite, marker, checked=False) if out else None
        try:
            cluster_info = None
            sink = score_sink(n, k, writer, scores_dtype)
            try:
                with optional_session(cluster, src) as session:
                    scores_stage.project(dataclasses.replace(inp, cluster=session), loadings, center, scale, sink,
                                         passes, "projection", prepare=prepare, positions=positions)
                    sink.close()
                    if session is not None:
                        cluster_info = session.summary()
            except BaseException:
                sink.abort()  # before the partial store is removed
                raise
            every = sink.residual
            flag = _flag(res, every)
            flagged = every > flag["cutoff"]
            ids = src.read_sample_ids()
            attrs = {PROJECTION_KEY: PROJECTION_VERSION, "result": res.path, "source": src.fingerprint(),
                     "n_samples": int(n), "rank": int(k), "residual_flag": flag,
                     "passes": [p.as_dict() for p in passes], "seconds": round(time.perf_counter() - t0, 6)}
            if cluster_info is not None:
                attrs["cluster"] = cluster_info
            if writer is None:
                return Projection(None, sink.arrays["scores"], sink.arrays["residual"],
                                  sink.arrays["residual_fraction"], flagged, ids, attrs)
            with writer:
                writer.add("flagged", flagged, ("sample",), (chunk,))
                if ids is not None and len(ids) == n:
                    ids = np.asarray(ids)
                    writer.add("sample_ids", ids.astype(str) if ids.dtype.kind in "OUS" else ids, ("sample",),
                               (chunk,))
                writer.add("component", np.arange(1, k + 1, dtype=np.int32), ("component",))
                writer.commit(attrs)
        except BaseException:
            if writer is not None:
                writer.abandon()
            raise
        if format == "parquet":
            _zarr_to_parquet(writer.out, out, id_column or params.get("id_column"))
        return open_projection(out)
    finally:
        src.close()


def _flag(res: Result, residual: np.ndarray) -> dict:
    """The training cutoff when the result has one; otherwise the rule applied to these samples."""
    trained = res.attrs.get("residual_flag")
    if trained:
        return {**trained, "from": "training", "flagged": int(np.count_nonzero(residual > trained["cutoff"]))}
    rule = flag_rule(residual, DEFAULT_FLAG_THRESHOLD).as_dict()
    return {**rule, "from": "these samples (the result holds no training residuals)"}


def _open_matching(path: str, res: Result, params: dict, id_column, array) -> tuple[Source, np.ndarray | None]:
    """Open ``path`` with the result's layout and match its features to the result's by name."""
    wanted = [str(name) for name in res.feature_names]
    id_column = id_column if id_column is not None else params.get("id_column")
    layout = dict(samples_as=params.get("samples_as", "rows"), missing_code=params.get("missing_code"),
                  array=array if array is not None else params.get("array"))
    from rankfold.sources import detect_format

    if detect_format(path) == "parquet":
        available = _parquet_names(path)
        _check_names(path, wanted, [a for a in available if a != id_column])
        # Exact names, escaped so that brackets or stars in a name are not read as patterns.
        src = open_source(path, columns=[_escape(name) for name in wanted], id_column=id_column,
                          samples_as="rows", missing_code=layout["missing_code"])
    else:
        src = open_source(path, **layout)
        _check_names(path, wanted, [str(name) for name in src.feature_names])
    names = [str(name) for name in src.feature_names]
    if names == wanted:
        return src, None
    where = {name: i for i, name in enumerate(names)}
    return src, np.array([where[name] for name in wanted])


def _check_names(path: str, wanted: list[str], available: list[str]) -> None:
    have = set(available)
    missing = [name for name in wanted if name not in have]
    if missing:
        shown = ", ".join(repr(name) for name in missing[:10]) + (f" and {len(missing) - 10} more" if len(missing) > 10 else "")
        raise SourceError(f"{path}: {len(missing):,} feature(s) of the decomposition are not in this table: {shown}. "
                          "New samples must carry every feature the components were computed from, by the same names.")
    extra = sorted(have - set(wanted))
    if extra:
        shown = ", ".join(repr(name) for name in extra[:10]) + (" ..." if len(extra) > 10 else "")
        warnings.warn(f"{path}: {len(extra):,} column(s) not in the decomposition are ignored: {shown}",
                      ExtraColumnsWarning, stacklevel=3)


def _parquet_names(path: str) -> list[str]:
    import pyarrow.dataset as ds

    try:
        return list(ds.dataset(path, format="parquet").schema.names)
    except Exception as exc:  # pyarrow raises several types for unreadable files
        raise SourceError(f"{path}: cannot read the Parquet schema ({type(exc).__name__}: {exc})") from None


def _escape(name: str) -> str:
    return "".join(f"[{ch}]" if ch in "*?[" else ch for ch in name)


def _check_projection_out(out: str, overwrite: bool) -> None:
    if os.path.lexists(out) and overwrite and not _is_projection(out):
        raise OutputError(f"{out}: exists and is not a rankfold projection, so --overwrite will not replace it; "
                          "remove it yourself or choose another --out")
    if os.path.lexists(out) and not overwrite:
        raise OutputError(f"{out}: already exists; choose another --out or pass --overwrite to replace it")
    check_parent_folder(out)


def _is_projection(path: str) -> bool:
    import json

    if os.path.isfile(path):
        try:
            import pyarrow.parquet as pq

            meta = pq.read_schema(path).metadata or {}
            return PROJECTION_KEY.encode() in meta
        except Exception:
            return False
    try:
        with open(os.path.join(path, "zarr.json")) as fh:
            return PROJECTION_KEY in json.load(fh).get("attributes", {})
    except (OSError, ValueError):
        return False


def _zarr_to_parquet(staging: str, out: str, id_column: str | None) -> None:
    """Copy a staged projection store into one Parquet file, a row group per chunk; then remove the store."""
    import json

    import pyarrow as pa
    import pyarrow.parquet as pq
    import zarr

    group = zarr.open_group(staging, mode="r")
    attrs = dict(group.attrs)
    scores = group["scores"]
    n, k = scores.shape
    chunk = scores.chunks[0]
    names = [f"component_{j + 1}" for j in range(k)]
    has_ids = "sample_ids" in group
    id_name = id_column or "sample_id"
    parent, name = os.path.split(os.path.abspath(out))
    tmp = os.path.join(parent, f".{name}.partial-{os.getpid()}")
    try:
        fields = ([pa.field(id_name, pa.from_numpy_dtype(group["sample_ids"].dtype)
                            if group["sample_ids"].dtype.kind not in "OUT" else pa.string())] if has_ids else [])
        fields += [pa.field(c, pa.from_numpy_dtype(scores.dtype)) for c in names]
        fields += [pa.field("residual", pa.float64()), pa.field("residual_fraction", pa.float64()),
                   pa.field("flagged", pa.bool_())]
        schema = pa.schema(fields, metadata={PROJECTION_KEY: json.dumps(attrs, default=str)})
        with pq.ParquetWriter(tmp, schema) as pw:
            for a in range(0, n, chunk):
                b = min(n, a + chunk)
                z = scores[a:b]
                cols = ([pa.array(np.asarray(group["sample_ids"][a:b]).tolist(), type=schema.field(0).type)]
                        if has_ids else [])
                cols += [pa.array(z[:, j]) for j in range(k)]
                cols += [pa.array(group["residual"][a:b]), pa.array(group["residual_fraction"][a:b]),
                         pa.array(group["flagged"][a:b])]
                pw.write_table(pa.Table.from_arrays(cols, schema=schema))
        if os.path.exists(out):
            _remove(out)
        os.rename(tmp, out)
    except OSError as exc:
        _remove(tmp)
        raise OutputError(f"{out}: cannot write the projection ({exc.strerror or exc}); nothing was left behind") from None
    except BaseException:
        _remove(tmp)
        raise
    finally:
        _remove(staging)


def open_projection(path: str) -> Projection:
    """Read a projection written by :func:`project` (Zarr group or Parquet file)."""
    import json

    if os.path.isfile(path):
        import pyarrow.parquet as pq

        table = pq.read_table(path)
        meta = table.schema.metadata or {}
        if PROJECTION_KEY.encode() not in meta:
            raise OutputError(f"{path}: not a rankfold projection")
        attrs = json.loads(meta[PROJECTION_KEY.encode()])
        names = [c for c in table.column_names if c.startswith("component_")]
        scores = np.column_stack([table[c].to_numpy() for c in names])
        ids = table.column(0).to_numpy(zero_copy_only=False) if table.column_names[0] not in names else None
        return Projection(path, scores, table["residual"].to_numpy(), table["residual_fraction"].to_numpy(),
                          table["flagged"].to_numpy(zero_copy_only=False), ids, attrs)
    import zarr

    if not _is_projection(path):
        raise OutputError(f"{path}: not a rankfold projection")
    group = zarr.open_group(path, mode="r")

    def lazy(name):
        return group[name] if name in group else None

    return Projection(path, group["scores"], group["residual"], group["residual_fraction"], group["flagged"],
                      lazy("sample_ids"), dict(group.attrs))
