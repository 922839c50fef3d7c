"""``compare_results``: the per-component figures of two stored results of one source.

Split from :mod:`rankfold.compare.engine`, which holds the subset comparison
and the figures both share.
"""

from __future__ import annotations

import os

import numpy as np

from rankfold.compare.engine import DEFAULT_TARGET_ANGLE, _check_angle, _figures, _reference
from rankfold.compare.metrics import score_correlation
from rankfold.compare.output import ReportFolder, plain, write_report
from rankfold.errors import DataError
from rankfold.result import Result, open_result


def compare_results(a, b, *, out=None, target_angle: float = DEFAULT_TARGET_ANGLE, overwrite: bool = False) -> dict:
    """The per-component figures of two stored results of the same source, with ``a`` as reference.

    Parameters
    ----------
    a, b : str or Result
        Result stores (or opened results).  Their feature sets must be equal
        (the order may differ: ``b`` is aligned to ``a`` by feature name).
    out : str, optional
        Report folder to create; a folder holding anything is refused unless ``overwrite``
        (and then replaced only if it is a rankfold report).
    target_angle : float
        Degrees; ``meets_target`` says whether every compared component of
        ``b`` is closer than this to ``a``'s.

    Returns
    -------
    dict
        Kind "results": ``reference`` is ``a``, ``settings`` holds ``b``.
        When the ranks differ, the leading ``min(k_a, k_b)`` components are
        compared and the title says so.  Scores are correlated when both
        stores hold scores for the same samples.

    Raises
    ------
    DataError
        Different feature sets (the differing names are given), or one
        covariance and one correlation decomposition.
    OutputError
    """
    target = _check_angle(target_angle)
    folder = ReportFolder(out, overwrite) if out is not None else None
    ra = a if isinstance(a, Result) else open_result(os.fspath(a))
    rb = b if isinstance(b, Result) else open_result(os.fspath(b))
    order = _align_features(ra, rb)
    sa = bool(ra.attrs.get("parameters", {}).get("standardize"))
    sb = bool(rb.attrs.get("parameters", {}).get("standardize"))
    if sa != sb:
        raise DataError(f"{_name(ra)} is a {'correlation' if sa else 'covariance'} decomposition and {_name(rb)} a "
                        f"{'correlation' if sb else 'covariance'} one; their components are not comparable")
    aligned = Result(rb.path, np.asarray(rb.loadings)[order], rb.variance, rb.variance_fraction,
                     np.asarray(rb.center)[order], np.asarray(rb.scale)[order], np.asarray(rb.feature_names)[order],
                     rb.scores, rb.sample_ids, rb.attrs)
    k = min(ra.rank, rb.rank)
    note = "" if ra.rank == rb.rank else f"; the first {k} components compared (ranks {ra.rank} and {rb.rank})"
    entry = _figures(_label("B", rb), _result_params(rb), ra, aligned, k)
    entry["score_correlation"] = _result_score_correlation(ra, aligned, k)
    entry["meets_target"] = bool(np.max(entry["angle_degrees"]) < target)
    comparison = plain({
        "kind": "results",
        "title": f"{_name(ra)} against {_name(rb)}{note}",
        "source": str(ra.attrs.get("source", {}).get("path", "")),
        "subset": None,
        "reference": _reference(_label("A", ra), ra, k),
        "settings": [entry],
        "target_angle_degrees": float(target),
        "recommended": None,
        "full_table_estimate": None,
    })
    if folder is not None:
        with folder as tmp:
            write_report(comparison, tmp, result_a=ra, result_b=rb)
    return comparison


def _align_features(ra: Result, rb: Result) -> np.ndarray:
    """Indices putting ``rb``'s features in ``ra``'s order; refuse different feature sets."""
    fa = [str(x) for x in np.asarray(ra.feature_names)]
    fb = [str(x) for x in np.asarray(rb.feature_names)]
    if fa == fb:
        return np.arange(len(fb))
    only_a = [f for f in fa if f not in set(fb)]
    only_b = [f for f in fb if f not in set(fa)]
    if only_a or only_b:
        def listed(names):
            shown = ", ".join(repr(x) for x in names[:5])
            return f"{len(names)} ({shown}{', ...' if len(names) > 5 else ''})"
        raise DataError(f"{_name(ra)} and {_name(rb)} have different feature sets ({len(fa)} and {len(fb)} "
                        f"features): only in the first: {listed(only_a)}; only in the second: {listed(only_b)}. "
                        "Compare results of the same columns")
    if len(set(fa)) != len(fa):
        raise DataError(f"{_name(ra)}: feature names repeat, so the two results cannot be aligned by name")
    where = {f: i for i, f in enumerate(fb)}
    return np.array([where[f] for f in fa])


def _result_score_correlation(ra: Result, rb: Result, k: int):
    if ra.scores is None or rb.scores is None:
        return None
    if ra.scores.shape[0] != rb.scores.shape[0]:
        return None
    if ra.sample_ids is not None and rb.sample_ids is not None:
        if not np.array_equal(np.asarray(ra.sample_ids[:]), np.asarray(rb.sample_ids[:])):
            return None  # the same count of different samples: nothing to pair
    sa = np.asarray(ra.scores[:, :k], dtype=np.float64)
    sb = np.asarray(rb.scores[:, :k], dtype=np.float64)
    return score_correlation(sa, sb, np.asarray(ra.loadings[:, :k]), np.asarray(rb.loadings[:, :k]))


def _name(r: Result) -> str:
    return os.path.basename(str(r.path).rstrip("/")) if r.path else "the result"


def _label(which: str, r: Result) -> str:
    p = r.attrs.get("parameters", {})
    how = r.route
    if how == "sketch":
        kind = r.attrs.get("sketch", {}).get("kind", p.get("sketch"))
        how = (f"one-pass p={p.get('oversample')}" if kind == "one-pass" else
               f"{kind} p={p.get('oversample')} q={p.get('power_iterations')}")
    if r.route == "sketch":
        return f"{which}: {_name(r)} ({how}, seed {p.get('seed', '?')})"
    return f"{which}: {_name(r)} ({how} route)"


def _result_params(r: Result) -> dict:
    p = r.attrs.get("parameters", {})
    keep = ("route", "sketch", "oversample", "power_iterations", "seed", "standardize", "missing")
    return {key: p.get(key) for key in keep if key in p}
