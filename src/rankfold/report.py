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
    for p in a.get("passes", []):
        lines.append(f"  {p['name']:<14} {p['blocks']:>6,} block(s) of up to {p['largest_block']:,} {p['axis']}, "
                     f"{format_bytes(p['bytes_read'])} read, {p['seconds']:.2f} s")
    lines.append(f"total time {a.get('seconds', 0):.2f} s; written {a.get('created', '?')}")
    return lines
