"""The report of one result: numbers (report.json), figures (PNG) and the page (index.html)."""

from __future__ import annotations

import json
import os

import numpy as np

from rankfold.errors import UsageError
from rankfold.reporting import figures
from rankfold.reporting.output import REPORT_MARKER, REPORT_VERSION, write_folder
from rankfold.reporting.page import Section, render_page
from rankfold.reporting.samples import BLOCK_ROWS, check_labels, histogram, label_values, sample_rows, take_rows

LOADING_PANELS = 3  # components whose largest loadings are drawn


def _check_int(name: str, value, lowest: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < lowest:
        raise UsageError(f"{name} must be an integer >= {lowest}, not {value!r}")
    return int(value)


def _floats(values) -> list[float]:
    return [float(v) for v in np.asarray(values, dtype=np.float64).ravel()]


def _texts(values) -> list[str]:
    return [v.decode() if isinstance(v, bytes) else str(v) for v in np.asarray(values).tolist()]


def _get(result, name: str):
    """A per-sample field, or None when this result (or this version of Result) lacks it."""
    return getattr(result, name, None)


def write_result_report(result, out_dir, *, label_column: str | None = None, labels=None,
                        max_points: int = 20000, seed: int = 0, top_loadings: int = 10,
                        overwrite: bool = False) -> str:
    """Write a self-contained report of ``result`` to the folder ``out_dir``.

    The folder holds ``index.html`` (figures embedded, inline CSS, viewable with no
    network), ``figures/*.png`` and ``report.json`` (the numbers behind every
    figure).  It is written under a hidden temporary name and renamed when complete.

    Parameters
    ----------
    result : rankfold.Result
        From :func:`rankfold.decompose` or :func:`rankfold.open_result`.  Per-sample
        fields (``scores``, ``residual``, ``flagged``) may be numpy arrays, lazily
        read zarr arrays or None; only the plotted rows of ``scores`` are read, and
        ``residual`` is streamed in blocks for its histogram.
    out_dir : str or os.PathLike
        Report folder to create (refused if it exists and is not empty, unless ``overwrite``).
    label_column : str, optional
        Column of the result's Parquet source colouring the scatter (read for the
        plotted rows only); at most 12 distinct values.
    labels : array_like, shape (n_samples,), optional
        Labels given directly (Python callers); exclusive with ``label_column``.
    max_points : int
        Most samples drawn in the scatter; more are sampled at random with ``seed``.
    seed : int
        Seed of that sample (the same seed draws the same samples).
    top_loadings : int
        Loadings shown per component, by decreasing magnitude.
    overwrite : bool
        Replace an existing report folder (never a folder that is not a report).

    Returns
    -------
    str
        Absolute path of ``index.html``.

    Raises
    ------
    UsageError
        Bad parameters, a missing label column or one with too many distinct values.
    SourceError
        The source needed for labels is gone or changed.
    OutputError
        ``out_dir`` exists and is not empty, or its parent is not writable.
    """
    max_points = _check_int("max_points", max_points, 1)
    seed = _check_int("seed", seed, 0)
    top_loadings = _check_int("top_loadings", top_loadings, 1)
    if label_column is not None and labels is not None:
        raise UsageError("give label_column or labels, not both")
    out_dir = os.fspath(out_dir)

    attrs = dict(result.attrs)
    variance = np.asarray(result.variance, dtype=np.float64)
    fraction = np.asarray(result.variance_fraction, dtype=np.float64)
    k = variance.size
    numbers: dict = {REPORT_MARKER: REPORT_VERSION, "kind": "result", "result": os.path.abspath(result.path)}
    files: dict[str, bytes] = {}
    sections: list[Section] = []

    # scree and component table
    cumulative = np.cumsum(fraction)
    numbers["components"] = [
        {"component": i + 1, "variance": float(variance[i]), "variance_fraction": float(fraction[i]),
         "cumulative_fraction": float(cumulative[i])} for i in range(k)]
    png = figures.scree(variance, fraction)
    files["figures/scree.png"] = png
    sections.append(Section(
        "Variance per component",
        [f"The {k} kept component(s) explain {cumulative[-1]:.2%} of the total variance "
         f"({result.total_variance:.6g}); bars are each component's share, the line the running total."],
        figure=(png, "Share of the total variance per component, with the cumulative share", "figures/scree.png"),
        table=(["component", "variance", "share", "cumulative"],
               [[str(i + 1), f"{variance[i]:.6g}", f"{fraction[i]:.2%}", f"{cumulative[i]:.2%}"] for i in range(k)])))

    sections.append(_scatter_section(result, attrs, files, numbers, label_column, labels, max_points, seed))
    sections.append(_loadings_section(result, files, numbers, top_loadings))
    sections.append(_residual_section(result, attrs, files, numbers))
    sections.append(_run_section(attrs, numbers))

    source = attrs.get("source", {})
    n, m = int(attrs.get("n_samples", 0)), int(attrs.get("n_features", 0))
    mode = "correlation" if attrs.get("parameters", {}).get("standardize") else "covariance"
    facts = [("result", os.path.abspath(result.path)), ("source", f"{source.get('path')} ({source.get('kind')})"),
             ("table", f"{n:,} samples x {m:,} features, {mode} components"),
             ("route", str(attrs.get("route"))), ("computed", str(attrs.get("created", "?")))]
    numbers["table"] = {"n_samples": n, "n_features": m, "mode": mode, "source": source.get("path")}
    title = f"rankfold report: {os.path.basename(os.path.normpath(result.path))}"
    html = render_page(title, f"{k} principal component(s) of {source.get('path')}", facts, sections,
                       f"Written by rankfold {attrs.get('versions', {}).get('rankfold', '')}. "
                       "The numbers behind every figure are in report.json beside this page.")
    files["index.html"] = html.encode("utf-8")
    files["report.json"] = json_bytes(numbers)
    folder = write_folder(out_dir, files, overwrite)
    return os.path.join(folder, "index.html")


def _clean(value):
    """JSON-ready copy: numpy scalars and arrays as Python, NaN and infinities as null (strict JSON)."""
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, np.ndarray):
        return _clean(value.tolist())
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def json_bytes(numbers: dict) -> bytes:
    """``numbers`` as strict JSON (no NaN), UTF-8."""
    return json.dumps(_clean(numbers), indent=1, allow_nan=False).encode("utf-8")


def _scatter_section(result, attrs, files, numbers, label_column, labels, max_points, seed) -> Section:
    title = "Scores on the first two components"
    scores = _get(result, "scores")
    if label_column is not None:
        # Check the column exists even when no scatter can be drawn: a typo should not pass silently.
        label_values(attrs.get("source", {}), label_column, np.zeros(0, dtype=np.int64))
    if scores is None:
        numbers["scatter"] = None
        return Section(title, absent=[f"No scatter: this result holds no scores (the {attrs.get('route')} route "
                                      "did not store them), so there is nothing to draw per sample."])
    if len(scores.shape) != 2 or scores.shape[1] < 2:
        numbers["scatter"] = None
        return Section(title, absent=["No scatter: the result keeps a single component; a scatter needs two."])
    n = int(scores.shape[0])
    rows = sample_rows(n, max_points, seed)
    xy = take_rows(scores, rows, slice(0, 2)).astype(np.float64)
    text = None
    what = None
    if label_column is not None:
        text = check_labels(label_values(attrs["source"], label_column, rows), f"label column {label_column!r}",
                            figures.MAX_LABEL_COLOURS)
        what = f"column {label_column!r}"
    elif labels is not None:
        size = len(labels)
        if size != n:
            raise UsageError(f"labels has {size:,} entries; the result has {n:,} samples (one label per sample)")
        text = check_labels(take_rows(labels if hasattr(labels, "shape") else np.asarray(labels, dtype=object), rows),
                            "labels", figures.MAX_LABEL_COLOURS)
        what = "the labels given"
    png = figures.scores_scatter(xy[:, 0], xy[:, 1], text, total=n)
    files["figures/scores.png"] = png
    numbers["scatter"] = {"n_samples": n, "n_points": int(rows.size), "sampled": bool(rows.size < n),
                          "seed": seed, "rows": rows.tolist(), "x": _floats(xy[:, 0]), "y": _floats(xy[:, 1]),
                          "labels": None if text is None else text.tolist(), "label_source": what}
    paragraphs = ["Each dot is a sample placed by its scores on components 1 and 2."]
    if rows.size < n:
        paragraphs.append(f"{rows.size:,} of the {n:,} samples are drawn, chosen at random with seed {seed} "
                          "(the same seed draws the same samples).")
    if what:
        paragraphs.append(f"Colours follow {what}.")
    return Section(title, paragraphs, figure=(png, "Scores on components 1 and 2", "figures/scores.png"))


def _loadings_section(result, files, numbers, top) -> Section:
    loadings = np.asarray(result.loadings, dtype=np.float64)
    names = _texts(result.feature_names)
    panels = []
    for c in range(min(LOADING_PANELS, loadings.shape[1])):
        order = np.argsort(-np.abs(loadings[:, c]), kind="stable")[:top]
        panels.append({"component": c + 1, "features": [names[i] for i in order],
                       "loadings": _floats(loadings[order, c])})
    png = figures.top_loadings(panels)
    files["figures/loadings.png"] = png
    numbers["top_loadings"] = panels
    shown = min(top, loadings.shape[0])
    return Section("Largest loadings",
                   [f"The {shown} features weighing most (by magnitude) in each of the first "
                    f"{len(panels)} component(s); bars left of zero pull the other way. Sign rule: the largest "
                    "loading of each component is positive."],
                   figure=(png, "Largest loadings of the first components", "figures/loadings.png"))


def _residual_section(result, attrs, files, numbers) -> Section:
    title = "Residual per sample"
    residual = _get(result, "residual")
    if residual is None:
        numbers["residual"] = None
        return Section(title, absent=["No residual distribution: this result holds no per-sample residuals "
                                      "(they are stored with the scores by routes that compute them)."])
    edges, counts, log_x, n_finite = histogram(residual)
    flag = attrs.get("residual_flag") or {}
    # "cutoff" is the residual above which a sample is flagged; "threshold" is the rule's z multiplier
    cutoff = flag.get("cutoff")
    cutoff = float(cutoff) if cutoff is not None and np.isfinite(float(cutoff)) else None
    flagged = flag.get("flagged")
    if flagged is None and _get(result, "flagged") is not None:
        flags = result.flagged
        flagged = sum(int(np.count_nonzero(np.asarray(flags[s:s + BLOCK_ROWS])))
                      for s in range(0, int(flags.shape[0]), BLOCK_ROWS))
    png = figures.residual_histogram(edges, counts, threshold=cutoff, flagged=flagged, log_x=log_x)
    files["figures/residual.png"] = png
    numbers["residual"] = {"edges": _floats(edges), "counts": [int(c) for c in counts], "log_x": log_x,
                           "n_finite": n_finite, "cutoff": cutoff, "flagged": flagged,
                           "threshold": flag.get("threshold"), "rule": flag.get("rule"),
                           "median": flag.get("median"), "mad": flag.get("mad")}
    paragraphs = ["Squared distance of each sample to its reconstruction from the kept components; samples far "
                  "out to the right are poorly described by them."]
    if cutoff is not None:
        paragraphs.append(f"{flagged if flagged is not None else 'Some'} sample(s) lie above the flag cutoff "
                          f"{cutoff:.4g}" + (f" (rule: {flag['rule']})." if flag.get("rule") else "."))
    elif flag:
        paragraphs.append("No sample is flagged: the residuals are too uniform for the robust rule "
                          "(their median absolute deviation is zero), so it draws no cutoff.")
    return Section(title, paragraphs, figure=(png, "Histogram of residuals, log scale", "figures/residual.png"))


def _run_section(attrs, numbers) -> Section:
    passes = attrs.get("passes", [])
    rows = [[str(p.get("name")), f"{int(p.get('blocks', 0)):,}", _mb(p.get("bytes_read")), f"{float(p.get('seconds', 0)):.2f}"]
            for p in passes]
    paragraphs = [f"Route {attrs.get('route')}: " + "; ".join(attrs.get("route_reasons", []) or ["(no reasons recorded)"]),
                  f"Total time {float(attrs.get('seconds', 0)):.2f} s over {len(passes)} pass(es) over the data."]
    bound = attrs.get("error_bound")
    if bound:
        paragraphs.append(
            f"Randomized route: with probability {bound.get('probability', float('nan')):.10f}, the covariance left "
            f"outside the returned components has spectral norm at most {bound.get('spectral_norm', float('nan')):.4g} "
            f"({bound.get('relative_to_first', float('nan')):.2%} of the first variance).")
    numbers["run"] = {"route": attrs.get("route"), "route_reasons": attrs.get("route_reasons", []),
                      "seconds": attrs.get("seconds"), "passes": passes, "error_bound": bound or None,
                      "parameters": attrs.get("parameters", {})}
    return Section("How it was computed", paragraphs,
                   table=(["pass", "blocks", "read", "seconds"], rows) if rows else None)


def _mb(value) -> str:
    from rankfold.memory import format_bytes

    return format_bytes(int(value)) if value is not None else "?"
