"""``compare_subset`` (and the figures ``compare_results`` shares): a comparison as one dict.

The dict (written as ``comparison.json`` in the report folder) has the keys
``kind`` ("subset" or "results"), ``title``, ``source``, ``subset``,
``reference``, ``settings`` (one entry per randomized setting, or the second
result), ``target_angle_degrees``, ``recommended`` and
``full_table_estimate``; see docs/tutorial.md for an example and the meaning
of every figure.
"""

from __future__ import annotations

import math
import os
import shutil
import tempfile

import numpy as np

from rankfold.compare.metrics import (component_angles, eigenvalue_relative_error, outside_norm,
                                      outside_norm_streamed, score_correlation)
from rankfold.compare.output import ReportFolder, plain, write_report
from rankfold.compare.settings import DEFAULT_OVERSAMPLE, Setting, as_settings, default_settings
from rankfold.compare.subset import ArraySource, draw_subset, materialize, parse_fraction, smallest_fraction
from rankfold.errors import DataError, MemoryLimitError, UsageError
from rankfold.memory import default_memory_limit, parse_memory
from rankfold.result import Result
from rankfold.routes.sketch import basis_width
from rankfold.sources import Source, open_source

# A component within 5 degrees of the exact one has loadings correlated above
# cos(5 deg) = 0.996 with it: the same features lead it, in the same order, and
# its scores rank the samples the same way for any practical reading.  Tighter
# targets mostly buy agreement on noise; looser ones let the axis turn enough
# to change which features look second and third.
DEFAULT_TARGET_ANGLE = 5.0


def compare_subset(source, rank: int, *, subset=0.05, feature_subset=None, settings=None,
                   target_angle: float = DEFAULT_TARGET_ANGLE, seed: int = 0, memory_limit=None,
                   out=None, standardize: bool = False, missing: str = "refuse", samples_as: str = "rows",
                   columns=None, exclude=None, missing_code=None, array=None, cluster=None,
                   overwrite: bool = False) -> dict:
    """Exact against randomized principal components on a random subset of a table.

    Draws a reproducible subset (see :mod:`rankfold.compare.subset`), runs the
    exact route the planner picks on it and every randomized setting, and
    measures each setting against the exact answer per component.

    Parameters
    ----------
    source : str or Source
        The full table (any format :func:`rankfold.open_source` reads).
    rank : int
        Components compared, ``k``.
    subset : float or str
        Expected fraction of the samples kept, in (0, 1]: ``0.05`` or ``"5%"``.
    feature_subset : float or str, optional
        Fraction of the features kept (all by default).
    settings : str or list, optional
        Randomized settings, e.g. ``"subspace:p=10,q=2;krylov:q=1"``
        (:mod:`rankfold.compare.settings`); default: subspace q = 0, 1, 2,
        Krylov q = 2 and one-pass, all with oversampling 10 (less when the
        subset has too few features).
    target_angle : float
        A setting meets the target when its largest angle to the exact
        components, over the ``k`` components, is below this many degrees.
    seed : int
        Seed of the subset draw and of every setting's test matrix.
    memory_limit : int or str, optional
        Ceiling for the subset and the runs on it (default 60% of available memory).
    out : str, optional
        Report folder to create: ``index.html``, ``figures/*.png`` and
        ``comparison.json`` (:mod:`rankfold.reporting`).  A folder holding
        anything is refused unless ``overwrite``.
    standardize, missing, samples_as, columns, exclude, missing_code, array
        As in :func:`rankfold.decompose`.
    cluster : distributed.Client or str, optional
        Read the subset on a dask.distributed cluster: a client, a scheduler
        address (``tcp://host:8786``) or ``"local:N"``.  Workers read the
        chosen parts of the table and send back only the drawn rows; the
        subset is the serial one bit for bit.  The exact run and the settings
        still run in this process, one after the other, so that their
        timings compare.  The session's summary is stored under
        ``"cluster"``.  See docs/cluster.md.

    Returns
    -------
    dict
        The comparison (keys listed in the module docstring); per-component
        lists have length ``k``.

    Raises
    ------
    UsageError
        Bad arguments, or a subset too small for the rank (with the smallest
        fraction that would do).
    SourceError, DataError, MemoryLimitError, OutputError
    ClusterError
        Unreachable scheduler, workers that differ or cannot read the source,
        a failure on the cluster while reading.
    """
    fraction = parse_fraction("subset", subset)
    feature_fraction = None if feature_subset is None else parse_fraction("feature_subset", feature_subset)
    target = _check_angle(target_angle)
    _check_int("seed", seed, 0, 2**63 - 1)
    _check_int("rank", rank, 1, 2**31)
    if missing not in ("refuse", "fill-mean"):
        raise UsageError(f"missing must be one of refuse, fill-mean; got {missing!r}")
    if not isinstance(standardize, (bool, np.bool_)):
        raise UsageError(f"standardize must be True or False; got {standardize!r}")
    if cluster is not None:
        from rankfold.cluster.session import check_cluster_argument  # imports no dask

        check_cluster_argument(cluster)
    limit = parse_memory(memory_limit) if memory_limit is not None else default_memory_limit()
    chosen = as_settings(settings) if settings is not None else None
    folder = ReportFolder(out, overwrite) if out is not None else None

    opened = isinstance(source, Source)
    src = source if opened else open_source(os.fspath(source), samples_as=samples_as, columns=columns,
                                           exclude=exclude, missing_code=missing_code, array=array)
    try:
        n, m = src.shape
        if not 1 <= rank <= min(n, m):
            raise UsageError(f"rank must be between 1 and min(samples, features) = {min(n, m)} for "
                             f"{src.path}; got {rank}")
        m_sub = m if feature_fraction is None else max(1, int(round(feature_fraction * m)))
        if chosen is None:
            one_pass = not (standardize or missing == "fill-mean")
            chosen = default_settings(max(0, min(DEFAULT_OVERSAMPLE, m_sub - rank)), one_pass)
        _check_fits(src, rank, chosen, fraction, feature_fraction, m_sub)
        draw = draw_subset(src, fraction, feature_fraction, seed)
        needed = rank + max(max(s.oversample for s in chosen), 1)
        if draw.rows.size < needed:
            raise DataError(f"{src.path}: the {fraction:.2%} subset drawn with seed {seed} holds "
                            f"{draw.rows.size} samples, fewer than the {needed} that rank {rank} plus "
                            f"oversampling needs; use --subset {_percent(smallest_fraction(n, needed))} "
                            "or more, or another --seed")
        # Scores are computed here from the loadings, on the subset, so the runs skip their own.
        options = dict(standardize=standardize, missing=missing, seed=seed, scores=False)
        if folder is None:
            scratch_parent = tempfile.mkdtemp(prefix="rankfold-compare-")
            try:
                return _run_subset(src, draw, rank, chosen, target, limit, options,
                                   os.path.join(scratch_parent, "scratch"), cluster)
            finally:
                shutil.rmtree(scratch_parent, ignore_errors=True)
        with folder as tmp:
            comparison = _run_subset(src, draw, rank, chosen, target, limit, options, os.path.join(tmp, "scratch"),
                                     cluster)
            shutil.rmtree(os.path.join(tmp, "scratch"), ignore_errors=True)
            write_report(comparison, tmp)
        return comparison
    finally:
        if not opened:
            src.close()


def _run_subset(src: Source, draw, rank: int, settings: list[Setting], target: float, limit: int,
                options: dict, scratch: str, cluster=None) -> dict:
    import rankfold

    sub, cluster_summary = _read_subset(src, draw, limit, scratch, cluster)
    held = sub.data.nbytes if isinstance(sub, ArraySource) else 0
    run_limit = limit - held
    try:
        exact = rankfold.decompose(sub, rank, route="auto", accuracy="exact", memory_limit=run_limit, **options)
        if exact.route == "sketch":
            raise MemoryLimitError(f"no exact route fits the subset of {sub.n_samples:,} x {sub.n_features:,} "
                                   f"within the memory limit; use a smaller --subset or --feature-subset, "
                                   "or raise --memory-limit")
        runs = [(s, rankfold.decompose(sub, rank, memory_limit=run_limit, **s.params(), **options))
                for s in settings]
        # Every figure below uses the reference's transform (subset means, and spreads when
        # standardizing): the settings compute the same moments of the same rows.
        view = _SubsetView(sub, exact, limit // 8)
        ref_scores = view.scores(exact.loadings)
        entries = []
        for setting, r in runs:
            entry = _figures(setting.label, setting.params(), exact, r)
            entry["score_correlation"] = score_correlation(ref_scores, view.scores(r.loadings),
                                                           exact.loadings, r.loadings)
            entry["true_error"] = view.outside_norm(r.loadings)
            entry["meets_target"] = bool(np.max(entry["angle_degrees"]) < target)
            entries.append(entry)
    finally:
        sub.close()
        if not isinstance(sub, ArraySource):
            shutil.rmtree(scratch, ignore_errors=True)
    best = _recommend(entries, rank)
    estimate = None
    if best is not None:
        estimate = _full_table_estimate(src, rank, best["params"], limit, options)
    comparison = {
        "kind": "subset",
        "title": f"Exact against randomized components on a {draw.fraction:.1%} subset of "
                 f"{_source_name(src.path)} (rank {rank})",
        "source": str(src.path),
        "subset": draw.summary(),
        "reference": _reference(f"exact ({exact.route} route)", exact),
        "settings": entries,
        "target_angle_degrees": float(target),
        "recommended": best["label"] if best is not None else None,
        "full_table_estimate": estimate,
    }
    if cluster_summary is not None:
        comparison["cluster"] = cluster_summary
    return plain(comparison)


def _read_subset(src: Source, draw, limit: int, scratch: str, cluster) -> tuple[Source, dict | None]:
    """The subset, read here or on ``cluster``; with the cluster session's summary (None when serial).

    The session ends once the subset is read: the runs that follow are timed
    against each other in this process, and a local cluster's worker
    processes would only compete with them for cores and memory.
    """
    if cluster is None:
        return materialize(src, draw, limit, scratch), None
    from rankfold.cluster import connect

    with connect(cluster, src) as session:
        sub = materialize(src, draw, limit, scratch, session=session)
        return sub, session.summary()


def _source_name(path: str) -> str:
    """The last part of a path, with its parent when that is a Zarr store (``panel.zarr/dosage``)."""
    parent, name = os.path.split(str(path).rstrip("/"))
    return f"{os.path.basename(parent)}/{name}" if parent.endswith(".zarr") else (name or str(path))


class _SubsetView:
    """The subset centered and scaled as the reference did it, missing values at zero.

    An in-memory subset is transformed in place once (the runs are over, and a
    second copy would double its memory); a subset on disk is transformed
    block by block at every use.
    """

    def __init__(self, sub: Source, reference: Result, block_bytes: int):
        self.sub = sub
        self.center, self.scale = reference.center, reference.scale
        self.n = sub.n_samples
        self.y = None
        if isinstance(sub, ArraySource):
            self.y = self._transform(sub.data)
        self.partition = sub.partition("samples", max(block_bytes, sub.bytes_per_unit("samples")))

    def _transform(self, x: np.ndarray) -> np.ndarray:
        x -= self.center
        x /= self.scale
        # Missing values were filled with the column mean by the routes: zero once centered.
        x[np.isnan(x)] = 0.0
        return x

    def blocks(self):
        if self.y is not None:
            yield self.y
            return
        for a, b in self.partition.bounds:
            yield self._transform(self.sub.read("samples", a, b))

    def scores(self, loadings: np.ndarray) -> np.ndarray:
        """Sample coordinates ``Y @ loadings``, shape (n, k)."""
        return np.vstack([y @ loadings for y in self.blocks()])

    def apply_covariance(self, v: np.ndarray) -> np.ndarray:
        """``C v`` with ``C = Y^T Y / (n - 1)`` the subset's covariance (or correlation)."""
        out = np.zeros((self.sub.n_features,) + v.shape[1:])
        for y in self.blocks():
            out += y.T @ (y @ v)
        return out / (self.n - 1)

    def outside_norm(self, loadings: np.ndarray) -> float:
        """Spectral norm of the covariance left outside ``loadings`` (:func:`metrics.outside_norm`)."""
        if self.y is not None:
            return outside_norm(self.y, loadings)
        return outside_norm_streamed(self.apply_covariance, loadings, self.sub.n_features)


def _figures(label: str, params: dict, reference: Result, other: Result, k: int | None = None) -> dict:
    k = k or reference.loadings.shape[1]
    b = other.attrs
    bound = b.get("error_bound") or {}
    return {
        "label": label,
        "params": params,
        "variance": np.asarray(other.variance[:k], dtype=float),
        "variance_fraction": np.asarray(other.variance_fraction[:k], dtype=float),
        "eigenvalue_relative_error": eigenvalue_relative_error(reference.variance[:k], other.variance[:k]),
        "angle_degrees": component_angles(np.asarray(reference.loadings[:, :k]), np.asarray(other.loadings[:, :k])),
        "score_correlation": None,
        "seconds": float(b.get("seconds", float("nan"))),
        "passes": len(b.get("passes", [])),
        "error_bound": bound.get("spectral_norm"),
        "true_error": None,
        "meets_target": False,
    }


def _reference(label: str, result: Result, k: int | None = None) -> dict:
    k = k or result.loadings.shape[1]
    return {"label": label, "variance": np.asarray(result.variance[:k], dtype=float),
            "variance_fraction": np.asarray(result.variance_fraction[:k], dtype=float),
            "seconds": float(result.attrs.get("seconds", float("nan"))),
            "passes": len(result.attrs.get("passes", []))}


def _recommend(entries: list[dict], rank: int) -> dict | None:
    """The cheapest setting meeting the target: fewest passes, then the narrowest basis, then least time.

    Passes dominate the cost of a full run (each is a read of the whole table);
    between equal passes the basis width decides the memory (block Krylov keeps
    ``q + 1`` bases), and measured time on a subset, which two settings of equal
    passes and width share up to noise, breaks what ties remain.
    """
    meeting = [e for e in entries if e["meets_target"]]
    if not meeting:
        return None

    def cost(e):
        p = e["params"]
        return (e["passes"], basis_width(rank, p["oversample"], p["power_iterations"], p["sketch"]), e["seconds"])

    return min(meeting, key=cost)


def _full_table_estimate(src: Source, rank: int, params: dict, limit: int, options: dict) -> dict | None:
    from rankfold.api import plan

    try:
        # The full run writes scores (the default), so the estimate includes them.
        p = plan(src, rank, memory_limit=limit, standardize=options["standardize"], missing=options["missing"],
                 route="sketch", sketch=params["sketch"], oversample=params["oversample"],
                 power_iterations=params["power_iterations"])
    except MemoryLimitError:
        return None  # the setting does not fit the full table's ceiling; the report says no estimate
    e = p.estimate
    return {"route": p.route, "seconds": float(e.seconds), "peak_memory": int(e.peak_memory),
            "passes": int(e.passes)}


def _check_fits(src: Source, rank: int, settings: list[Setting], fraction: float,
                feature_fraction: float | None, m_sub: int) -> None:
    """Refuse, before reading, a subset too small for the rank and the settings' oversampling."""
    n, m = src.shape
    widest = max(settings, key=lambda s: s.oversample)
    needed = rank + max(widest.oversample, 1)
    if m_sub < needed:
        what = (f"the feature subset keeps {m_sub} of {m} features" if feature_fraction is not None
                else f"{src.path} has {m} features")
        hint = (f"use --feature-subset {_percent(min(1.0, math.ceil(1000 * needed / m) / 1000))} or more, or "
                if feature_fraction is not None and needed <= m else "")
        raise UsageError(f"{what}, fewer than rank {rank} plus the oversampling {widest.oversample} of setting "
                         f"'{widest.label}' ({needed}); {hint}lower the rank or p")
    expected = n * fraction
    want = smallest_fraction(n, needed)
    if expected < needed + 4 * math.sqrt(needed):
        if want >= 1.0 and n < needed + 4 * math.sqrt(needed):
            raise UsageError(f"subset {_percent(fraction)} of {n:,} samples is too small for rank {rank}: "
                             f"about {expected:.0f} samples expected, and even the whole table would leave "
                             f"little margin over the {needed} needed; lower the rank or the oversampling")
        raise UsageError(f"subset {_percent(fraction)} of {n:,} samples is too small for rank {rank}: about "
                         f"{expected:.0f} samples expected, {needed} needed (rank plus oversampling "
                         f"{widest.oversample}) with a safety margin; the smallest subset that fits is "
                         f"{_percent(want)}")


def _check_angle(value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) or not (
            0 < float(value) <= 90):
        raise UsageError(f"target_angle must be a number of degrees in (0, 90]; got {value!r}")
    return float(value)


def _check_int(name: str, value, low: int, high: int) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not low <= value <= high:
        raise UsageError(f"{name} must be a whole number from {low} to {high}; got {value!r}")


def _percent(f: float) -> str:
    return f"{100 * f:.3g}%"


def compare_paths(paths, *, rank=None, out=None, target_angle: float = DEFAULT_TARGET_ANGLE, overwrite: bool = False,
                  **subset_options) -> dict:
    """What ``rankfold compare`` does with its positional arguments.

    Two rankfold results: :func:`compare_results`.  One data source (with
    ``rank``): :func:`compare_subset`.  Anything else is a usage error that
    says which argument is what.
    """
    from rankfold.result import is_result

    paths = [os.fspath(p) for p in paths]
    results = [p for p in paths if is_result(p)]
    if len(paths) == 2:
        if len(results) != 2:
            other = next(p for p in paths if p not in results)
            raise UsageError(f"{other}: not a rankfold result; compare takes either two result stores "
                             "(RESULT_A.zarr RESULT_B.zarr) or one data source with --rank")
        if subset_options.get("cluster") is not None:
            raise UsageError("cluster: comparing two stored results reads no table, so nothing runs on a cluster; "
                             "--cluster applies to a subset comparison of one data source (SOURCE --rank K)")
        given = [k for k, v in subset_options.items() if v not in (None, False, "refuse", "rows")]
        if rank is not None or given:
            names = ", ".join(["rank"] * (rank is not None) + given)
            raise UsageError(f"{names}: these options apply to a subset comparison of a data source, "
                             "not to two stored results")
        from rankfold.compare.results import compare_results  # it builds on this module

        return compare_results(paths[0], paths[1], out=out, target_angle=target_angle, overwrite=overwrite)
    if len(paths) != 1:
        raise UsageError(f"compare takes one data source or two result stores; got {len(paths)} paths")
    if results:
        raise UsageError(f"{paths[0]}: is a rankfold result; give a second result to compare it with, or the "
                         "data source itself with --rank for a subset comparison")
    if rank is None:
        raise UsageError(f"{paths[0]}: a subset comparison needs --rank K")
    options = {k: v for k, v in subset_options.items() if v is not None}
    options.setdefault("seed", 0)
    return compare_subset(paths[0], rank, out=out, target_angle=target_angle, overwrite=overwrite, **options)


def report_page(folder: str) -> str | None:
    """The HTML page of a report folder, or None when there is none."""
    pages = sorted(f for f in os.listdir(folder) if f.endswith(".html")) if os.path.isdir(folder) else []
    return os.path.join(folder, pages[0]) if pages else None
