"""Plain-text views of a result, shared by ``rankfold show`` and the demo."""

from __future__ import annotations

import numpy as np

from rankfold.memory import format_bytes
from rankfold.result import Result


def component_table(result: Result, top: int | None = None) -> list[str]:
    """Lines of a table: component, variance, fraction of the total, cumulative fraction."""
    k = result.rank if top is None else min(top, result.rank)
    lines = [f"{'component':>9}  {'variance':>14}  {'fraction':>8}  {'cumulative':>10}"]
    cumulative = np.cumsum(result.variance_fraction)
    for i in range(k):
        lines.append(f"{i + 1:>9}  {result.variance[i]:>14.6g}  {result.variance_fraction[i]:>8.2%}  "
                     f"{cumulative[i]:>10.2%}")
    return lines


def describe_result(result: Result, top: int | None = None) -> list[str]:
    """Everything ``rankfold show`` prints: header, component table, passes."""
    a = result.attrs
    params = a.get("parameters", {})
    mode = "correlation" if params.get("standardize") else "covariance"
    lines = [
        f"result   {result.path}",
        f"source   {a['source'].get('path')} ({a['source'].get('kind')})",
        f"table    {a['n_samples']:,} samples x {a['n_features']:,} features; {mode} PCA, "
        f"missing values: {params.get('missing')}",
        f"route    {a['route']} ({'; '.join(a.get('route_reasons', []))})",
        f"total variance {a['total_variance']:.6g}; {result.rank} component(s) kept explain "
        f"{float(np.sum(result.variance_fraction)):.2%}",
        "",
        *component_table(result, top),
        "",
        "passes over the data:",
    ]
    bound = a.get("error_bound")
    if bound:
        kind = a.get("sketch", {}).get("kind", "subspace")
        note = [f"randomized ({kind}): with probability {bound['probability']:.10f}, the covariance left "
                f"outside the returned components has spectral norm at most {bound['spectral_norm']:.4g} "
                f"({bound['relative_to_first']:.2%} of the first variance); {bound['source']}"]
        if "basis_spectral_norm" in bound:
            note.append(f"  outside the whole sketch basis ({bound['basis_width']} columns): at most "
                        f"{bound['basis_spectral_norm']:.4g}; components well above that are resolved")
        if kind == "one-pass":
            note.append("one-pass sketch: no power iteration, so variances and axes are less accurate than "
                        "subspace iteration on the same data; compare on a subset before trusting small components")
        lines[5:5] = note
    lines[-1:-1] = residual_lines(result.residual, result.residual_fraction, result.sample_ids,
                                  a.get("residual_flag"))
    for p in a.get("passes", []):
        lines.append(f"  {p['name']:<14} {p['blocks']:>6,} block(s) of up to {p['largest_block']:,} {p['axis']}, "
                     f"{format_bytes(p['bytes_read'])} read, {p['seconds']:.2f} s")
    lines.append(f"total time {a.get('seconds', 0):.2f} s; written {a.get('created', '?')}")
    return lines


WORST = 10


def residual_lines(residual, fraction, sample_ids, flag: dict | None, worst: int = WORST) -> list[str]:
    """The flag rule, how many samples it marks, and the samples explained worst."""
    if residual is None:
        return []
    values = np.asarray(residual[:])
    lines = []
    if flag:
        cutoff = flag["cutoff"]
        where = f"cutoff {cutoff:.4g}" if np.isfinite(cutoff) else "no cutoff (the residuals do not vary)"
        lines.append(f"residuals: {flag['flagged']:,} of {len(values):,} sample(s) flagged, {where} "
                     f"(robust z-score of cbrt(residual) above {flag['threshold']:g}: median {flag['median']:.4g}, "
                     f"MAD {flag['mad']:.4g} of the cube roots)")
    count = min(worst, len(values))
    if count:
        top = np.argpartition(values, len(values) - count)[len(values) - count:]
        top = top[np.argsort(values[top])[::-1]]
        frac = np.asarray(fraction[:])[top] if fraction is not None else np.full(count, np.nan)
        ids = np.asarray(sample_ids[:]) if sample_ids is not None else None
        lines.append(f"worst explained samples (largest squared residual):")
        lines.append(f"  {'sample':>10}  {'id':>16}  {'residual':>12}  {'fraction':>8}")
        for i, f in zip(top, frac):
            label = str(ids[i]) if ids is not None else "-"
            lines.append(f"  {int(i):>10,}  {label:>16}  {values[i]:>12.5g}  {f:>8.2%}")
        lines.append("")
    return lines


def describe_projection(done) -> list[str]:
    """What ``rankfold project`` prints."""
    a = done.attrs
    secs = a.get("seconds", 0.0)
    lines = [f"projected {a['n_samples']:,} sample(s) onto {a['rank']} component(s) of {a.get('result')} "
             f"in {secs:.2f} s" + (f"; written to {done.path}" if done.path else "")]
    flag = dict(a.get("residual_flag") or {})
    if flag:
        flag["flagged"] = int(np.count_nonzero(np.asarray(done.flagged[:])))
        lines.append(f"flags judged against {flag.get('from', 'training')} residuals")
    lines += residual_lines(done.residual, done.residual_fraction, done.sample_ids, flag)
    return lines
