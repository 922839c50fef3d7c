"""The report of a comparison: a reference decomposition against one or more settings.

The comparison itself is computed elsewhere (the ``compare`` command); this
module only checks the dict it produces, draws it and writes the folder
(``index.html``, ``figures/*.png``, ``comparison.json``).
"""

from __future__ import annotations

import os

from rankfold.errors import UsageError
from rankfold.memory import format_bytes
from rankfold.reporting import figures
from rankfold.reporting.output import REPORT_MARKER, REPORT_VERSION, write_folder
from rankfold.reporting.page import Section, render_page
from rankfold.reporting.result_report import json_bytes

_SETTING_LISTS = ("variance", "variance_fraction", "eigenvalue_relative_error", "angle_degrees")
ANGLE_FLOOR = 1e-9  # degrees: exact agreement is drawn here on the log axis
ERROR_FLOOR = 1e-16  # relative eigenvalue error at the level of float64 rounding


def _need(mapping: dict, key: str, where: str):
    if not isinstance(mapping, dict) or key not in mapping:
        raise UsageError(f"comparison: {where} has no {key!r} entry")
    return mapping[key]


def _check(comparison: dict) -> int:
    """Check the fields the report reads; return the number of components."""
    if not isinstance(comparison, dict):
        raise UsageError(f"comparison must be a dict, not {type(comparison).__name__}")
    kind = _need(comparison, "kind", "the comparison")
    if kind not in ("subset", "results"):
        raise UsageError(f"comparison: kind must be 'subset' or 'results', not {kind!r}")
    ref = _need(comparison, "reference", "the comparison")
    k = len(_need(ref, "variance", "reference"))
    settings = _need(comparison, "settings", "the comparison")
    if not isinstance(settings, list) or not settings:
        raise UsageError("comparison: settings must be a non-empty list")
    for i, s in enumerate(settings):
        where = f"setting {i} ({s.get('label', '?') if isinstance(s, dict) else '?'})"
        _need(s, "label", where)
        for key in _SETTING_LISTS:
            if len(_need(s, key, where)) != k:
                raise UsageError(f"comparison: {where} has {len(s[key])} {key} value(s); the reference has {k}")
    _need(comparison, "target_angle_degrees", "the comparison")
    rec = comparison.get("recommended")
    if rec is not None and rec not in [s["label"] for s in settings]:
        raise UsageError(f"comparison: recommended setting {rec!r} is not among the settings")
    return k


def _num(value, fmt: str) -> str:
    return "-" if value is None else format(float(value), fmt)


def _params(params: dict) -> str:
    return ", ".join(f"{k}={v}" for k, v in (params or {}).items()) or "-"


def write_comparison_report(comparison: dict, out_dir, *, result_a=None, result_b=None,
                            overwrite: bool = False) -> str:
    """Write the report of a comparison to the folder ``out_dir``.

    Parameters
    ----------
    comparison : dict
        As produced by the compare command: ``kind`` ("subset" or "results"),
        ``title``, ``source``, ``subset`` (or None), ``reference`` (label and
        per-component ``variance``, ``variance_fraction``, ``seconds``, ``passes``),
        ``settings`` (each with per-component ``variance``, ``variance_fraction``,
        ``eigenvalue_relative_error``, ``angle_degrees``, ``score_correlation`` or
        None, and ``seconds``, ``passes``, ``error_bound``, ``true_error``,
        ``meets_target``, ``params``), ``target_angle_degrees``, ``recommended``
        (a setting's label or None) and ``full_table_estimate`` (or None).
    out_dir : str or os.PathLike
        Report folder to create (refused if it exists and is not empty, unless ``overwrite``).
    result_a, result_b : rankfold.Result, optional
        The two stored results of a ``"results"`` comparison, named on the page.
    overwrite : bool
        Replace an existing report folder (never a folder that is not a report).

    Returns
    -------
    str
        Absolute path of ``index.html``.
    """
    k = _check(comparison)
    ref = comparison["reference"]
    settings = comparison["settings"]
    target = float(comparison["target_angle_degrees"])
    recommended = comparison.get("recommended")
    files: dict[str, bytes] = {}
    sections: list[Section] = []

    png = figures.per_component_lines(
        [(s["label"], s["angle_degrees"]) for s in settings], title="Angle to the reference, per component",
        ylabel="principal angle (degrees, log scale)", target=target,
        target_label=f"target: {target:g} degrees", floor=ANGLE_FLOOR, highlight=recommended)
    files["figures/angles.png"] = png
    sections.append(Section(
        "Angle to the reference",
        [f"The angle between each setting's component and the reference's ({ref['label']}); a setting meets "
         f"the target when every angle stays under {target:g} degrees. Exact agreement is drawn at "
         f"{ANGLE_FLOOR:g} degrees."],
        figure=(png, "Principal angle per component and setting, with the target", "figures/angles.png")))

    png = figures.per_component_lines(
        [(s["label"], s["eigenvalue_relative_error"]) for s in settings],
        title="Variance error relative to the reference, per component",
        ylabel="|relative error| (log scale)", floor=ERROR_FLOOR, highlight=recommended)
    files["figures/variance_error.png"] = png
    sections.append(Section(
        "Variance error",
        ["|variance - reference variance| / reference variance for each component; "
         f"values at {ERROR_FLOOR:g} are agreement to float64 rounding."],
        figure=(png, "Relative variance error per component and setting", "figures/variance_error.png")))

    png = figures.scree_overlay((ref["label"], ref["variance"]), [(s["label"], s["variance"]) for s in settings])
    files["figures/scree.png"] = png
    sections.append(Section(
        "Variances of both methods",
        [f"Bars: {ref['label']}; lines: each setting. Where the lines leave the bars, the setting misjudges "
         "that component's variance."],
        figure=(png, "Variances per component, reference and settings overlaid", "figures/scree.png")))

    header = ["setting", "parameters", "seconds", "passes", "largest angle", "min |score corr.|",
              "error bound", "true error", "meets target"]
    rows, highlight = [], None
    for i, s in enumerate(settings):
        corr = s.get("score_correlation")
        rows.append([s["label"] + (" (recommended)" if s["label"] == recommended else ""), _params(s.get("params")),
                     _num(s.get("seconds"), ".2f"), str(s.get("passes", "-")),
                     f"{max(abs(float(a)) for a in s['angle_degrees']):.3g}",
                     "-" if corr is None else f"{min(abs(float(c)) for c in corr):.6f}",
                     _num(s.get("error_bound"), ".4g"), _num(s.get("true_error"), ".4g"),
                     "yes" if s.get("meets_target") else "no"])
        if s["label"] == recommended:
            highlight = i
    rows.append([f"{ref['label']} (reference)", "-", _num(ref.get("seconds"), ".2f"), str(ref.get("passes", "-")),
                 "0", "1", "-", "-", "-"])
    if recommended:
        verdict = (f"Recommended: {recommended}, the cheapest setting whose every component is within "
                   f"{target:g} degrees of the reference.")
    else:
        verdict = f"No setting kept every component within {target:g} degrees of the reference."
    sections.append(Section(
        "Settings", [verdict, "Error bound: the a posteriori estimate the randomized route reports; true error: "
                              "the same quantity measured against the reference."],
        table=(header, rows), highlight=highlight))

    est = comparison.get("full_table_estimate")
    if est:
        sentence = (f"On the full table, the {est.get('route')} route with the recommended setting would take about "
                    f"{_duration(est.get('seconds'))} in {est.get('passes')} pass(es) over the data, using at most "
                    f"{format_bytes(int(est.get('peak_memory', 0)))} of memory (the planner's estimate for this machine).")
        sections.append(Section("The full table", [sentence]))
    elif comparison["kind"] == "subset":
        sections.append(Section("The full table", absent=["No estimate for the full table: no setting was "
                                                          "recommended, or the planner gave none."]))

    facts = [("compared", comparison["kind"]), ("source", str(comparison.get("source")))]
    sub = comparison.get("subset")
    if sub:
        facts.append(("subset", f"{int(sub['samples']):,} samples x {int(sub['features']):,} features "
                                f"({float(sub['fraction']):.2%} of the samples, seed {sub['seed']})"))
    if comparison.get("cluster"):
        from rankfold.compare.text import cluster_line

        facts.append(("cluster", cluster_line(comparison["cluster"]).removeprefix("subset read on ")))
    for name, r in (("result A", result_a), ("result B", result_b)):
        if r is not None:
            facts.append((name, f"{os.path.abspath(r.path)} ({r.route} route, {r.n_samples:,} x {r.n_features:,})"))
    facts.append(("reference", str(ref["label"])))
    facts.append(("components", str(k)))
    numbers = {REPORT_MARKER: REPORT_VERSION, "kind": "comparison", "comparison": comparison,
               "figures": {"angles": "figures/angles.png", "variance_error": "figures/variance_error.png",
                           "scree": "figures/scree.png"}}
    html = render_page(str(comparison.get("title") or "rankfold comparison"),
                       f"{len(settings)} setting(s) against {ref['label']}, {k} component(s)", facts, sections,
                       "Written by rankfold. The numbers behind every figure are in comparison.json beside this page.")
    files["index.html"] = html.encode("utf-8")
    files["comparison.json"] = json_bytes(numbers)
    folder = write_folder(os.fspath(out_dir), files, overwrite)
    return os.path.join(folder, "index.html")


def _duration(seconds) -> str:
    s = float(seconds or 0)
    if s < 120:
        return f"{s:.0f} s"
    if s < 7200:
        return f"{s / 60:.0f} min"
    return f"{s / 3600:.1f} h"
