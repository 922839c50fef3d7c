"""Plain-text reports comparing a decomposition with what the demo planted.

Each function returns lines of text; printing is left to the caller (the
command line), so the library itself stays silent.

A `result` is anything with the attributes of :class:`rankfold.Result`:
``loadings`` (features x k), ``variance``, ``variance_fraction``, ``center``,
``scale``, ``feature_names``, ``route``, ``rank`` and, optionally,
``scores`` (samples x k) and ``sample_ids``.
"""

from __future__ import annotations

import string

import numpy as np

from rankfold.demo.fleet import FleetTruth
from rankfold.demo.fleet_design import MODE_DESCRIPTIONS
from rankfold.demo.panel import PanelTruth
from rankfold.report import component_table

MATCH = 0.9  # |cosine| from which a component counts as a planted mode
PARTIAL = 0.5  # ... and from which it is a blend worth naming


def _founder_label(index: int) -> str:
    letters = string.ascii_uppercase
    return letters[index] if index < len(letters) else f"F{index + 1}"


def _texts(values) -> list[str]:
    """Names as str, whether stored as str, numpy strings or UTF-8 bytes."""
    return [v.decode() if isinstance(v, bytes) else str(v) for v in np.asarray(values).tolist()]


def _order_of(ids, wanted) -> np.ndarray | None:
    """Positions of `wanted` within `ids`; None if any is absent."""
    position = {v: i for i, v in enumerate(_texts(ids))}
    try:
        return np.array([position[w] for w in _texts(wanted)], dtype=np.int64)
    except KeyError:
        return None


def _panel_scores(result, truth: PanelTruth) -> np.ndarray | None:
    """The result's scores in the panel's line order, or None if they cannot be matched."""
    scores = getattr(result, "scores", None)
    if scores is None:
        return None
    scores = np.asarray(scores, dtype=float)
    ids = getattr(result, "sample_ids", None)
    if ids is None:
        # Without ids we can only trust the order when the count agrees.
        return scores if scores.shape[0] == truth.line_ids.size else None
    order = _order_of(ids, truth.line_ids)
    return None if order is None else scores[order]


def _cross_shares(scores, truth: PanelTruth, centres: np.ndarray) -> tuple[float, float] | None:
    """Correlation and mean gap between recorded and estimated founder shares of crosses.

    A cross of founders a and b with share s of a lies near
    ``s * centre_a + (1 - s) * centre_b``; projecting its scores onto the
    segment between the two centres estimates s.
    """
    crosses = np.flatnonzero(truth.admixed)
    if crosses.size < 3:
        return None
    major = centres[truth.founder[crosses]]
    minor = centres[truth.second_founder[crosses]]
    axis = major - minor
    estimate = ((scores[crosses] - minor) * axis).sum(axis=1) / (axis**2).sum(axis=1)
    recorded = truth.founder_share[crosses]
    if np.std(recorded) == 0 or np.std(estimate) == 0:
        return None
    return float(np.corrcoef(recorded, estimate)[0, 1]), float(np.mean(np.abs(estimate - recorded)))


def summarize_panel(result, truth: PanelTruth) -> list[str]:
    """Say how well the components recover the panel's founder structure.

    Parameters
    ----------
    result : Result-like
        Decomposition of the dosage array with lines as samples.
    truth : PanelTruth
        What :func:`rankfold.demo.panel.write_panel` planted.

    Returns
    -------
    list of str
        Size of the panel, the variance table, each founder group's mean score
        on the leading components, how many pure lines sit nearest their own
        founder's centre, and whether crosses sit between their two founders.
    """
    n_founders = truth.n_founders
    pure = ~truth.admixed
    lines = [
        f"{truth.line_ids.size:,} lines ({int(truth.admixed.sum()):,} of them crosses of two founders), "
        f"{truth.n_markers:,} markers, {n_founders} founder populations",
        f"computed by the {result.route!r} route, {result.rank} components kept",
        "",
        *component_table(result, top=5),
    ]
    scores = _panel_scores(result, truth)
    if scores is None:
        return lines + ["", "no per-line scores to compare with the founders "
                            "(scores not kept, or their ids are not the panel's lines)"]
    shown = min(scores.shape[1], n_founders)
    labels = [_founder_label(f) for f in range(n_founders)]
    fraction = np.asarray(result.variance_fraction, dtype=float)
    lines += ["", "mean score of each founder's pure lines:",
              f"{'component':>9}  {'fraction':>8}  " + "  ".join(f"{'founder ' + x:>10}" for x in labels)]
    for c in range(shown):
        means = [scores[pure & (truth.founder == f), c].mean() for f in range(n_founders)]
        lines.append(f"{c + 1:>9}  {fraction[c]:>8.2%}  " + "  ".join(f"{m:>+10.3g}" for m in means))
    # n founder groups span n - 1 directions, so that many components should suffice.
    used = min(scores.shape[1], n_founders - 1)
    lead = scores[:, :used]
    centres = np.array([lead[pure & (truth.founder == f)].mean(axis=0) for f in range(n_founders)])
    distance = ((lead[pure][:, None, :] - centres[None, :, :]) ** 2).sum(axis=2)
    right = int((distance.argmin(axis=1) == truth.founder[pure]).sum())
    span = "component 1" if used == 1 else f"components 1-{used}"
    lines += ["", f"on {span}, {right:,} of {int(pure.sum()):,} pure lines ({right / pure.sum():.1%}) "
                  "lie nearest the centre of their own founder"]
    shares = _cross_shares(lead, truth, centres)
    if shares is not None:
        corr, gap = shares
        lines += ["crosses lie between their two founders: the main founder's share read off their "
                  "position", f"  follows the recorded share (correlation {corr:.2f}, mean gap {gap:.2f})"]
    return lines


def _fleet_alignment(result, truth: FleetTruth) -> tuple[np.ndarray, np.ndarray, list[int]]:
    """|cosine| between each component and each mode, over the channels both know.

    Returns the (components x modes) matrix, the variance fractions and the
    positions of the result's features within the truth's channels.
    """
    names = _texts(result.feature_names)
    known = {name: i for i, name in enumerate(truth.channel_names)}
    rows = [i for i, n in enumerate(names) if n in known]
    channels = [known[names[i]] for i in rows]
    loadings = np.asarray(result.loadings, dtype=float)[rows]
    # Normalize: some conventions scale loadings by the component's spread.
    loadings = loadings / np.linalg.norm(loadings, axis=0, keepdims=True)
    patterns = np.array([truth.mode_patterns[m][channels] for m in truth.mode_patterns])
    patterns = patterns / np.linalg.norm(patterns, axis=1, keepdims=True)
    return np.abs(loadings.T @ patterns.T), np.asarray(result.variance_fraction, dtype=float), rows


def _reading(cosines: np.ndarray, modes: list[str]) -> str:
    best = int(cosines.argmax())
    if cosines[best] >= MATCH:
        description = MODE_DESCRIPTIONS.get(modes[best])
        return f"{modes[best]} ({description})" if description else modes[best]
    blend = [modes[i] for i in np.argsort(cosines)[::-1] if cosines[i] >= PARTIAL]
    if blend:
        return "a blend of " + " and ".join(blend)
    return "no planted mode (noise or the late faults)"


def _spread_lines(result, truth: FleetTruth, rows: list[int]) -> list[str]:
    scale = getattr(result, "scale", None)
    if scale is None:
        return []
    scale = np.asarray(scale, dtype=float)[rows]
    if scale.size == 0 or np.all(scale == 1.0):
        return []
    names = [_texts(result.feature_names)[i] for i in rows]
    units = dict(zip(truth.channel_names, truth.channel_units))
    low, high = int(scale.argmin()), int(scale.argmax())
    return [f"channel spreads run from {scale[low]:.3g} {units[names[low]]} ({names[low]}) "
            f"to {scale[high]:.3g} {units[names[high]]} ({names[high]});",
            "  each channel was divided by its spread, or the largest units would have drowned the rest"]


def summarize_fleet(result, truth: FleetTruth, top: int = 6) -> list[str]:
    """Say which components recover the fleet's planted modes.

    Parameters
    ----------
    result : Result-like
        Correlation decomposition (standardized channels) of the fleet records.
    truth : FleetTruth
        What :func:`rankfold.demo.fleet.write_fleet` planted.
    top : int
        Number of leading components to compare with the modes.

    Returns
    -------
    list of str
        Size of the fleet, the spread of the channels, the variance table,
        each component's |cosine| with every planted mode and its reading,
        and which component recovered which mode.
    """
    modes = list(truth.mode_patterns)
    n_records = len(truth.machine_ids) * truth.records_per_machine
    lines = [f"{n_records:,} records from {len(truth.machine_ids)} machines"]
    if not set(_texts(result.feature_names)) & set(truth.channel_names):
        return lines + ["none of the result's features is a sensor channel of this fleet; nothing to compare"]
    cosines, fraction, rows = _fleet_alignment(result, truth)
    lines[0] += f", {len(rows)} of {len(truth.channel_names)} sensor channels used"
    lines.append(f"computed by the {result.route!r} route, {result.rank} components kept")
    lines += _spread_lines(result, truth, rows)
    lines += ["", *component_table(result, top=top), "",
              "|cosine| between each component's direction and each planted mode:",
              f"{'component':>9}  {'fraction':>8}  " + "  ".join(f"{m:>9}" for m in modes) + "  reading"]
    shown = min(top, cosines.shape[0])
    for c in range(shown):
        cells = "  ".join(f"{v:>9.3f}" for v in cosines[c])
        lines.append(f"{c + 1:>9}  {fraction[c]:>8.2%}  {cells}  {_reading(cosines[c], modes)}")
    found = []
    for m, mode in enumerate(modes):
        c = int(cosines[:shown, m].argmax())
        found.append(f"{mode} by component {c + 1} ({cosines[c, m]:.3f})" if cosines[c, m] >= MATCH
                     else f"{mode} not recovered (best {cosines[c, m]:.2f}, component {c + 1})")
    lines += ["", "planted modes: " + "; ".join(found)]
    if truth.drifting_machines:
        lines.append(f"machines given a late fault: {', '.join(truth.drifting_machines)} "
                     "(their late records should stand out by reconstruction error)")
        lines += _residual_lines(result, truth)
    return lines


def machine_residuals(result, truth: FleetTruth) -> list[tuple[str, int, float]]:
    """Per machine: flagged records and largest squared residual, most flagged first.

    Record ids are ``MACHINE-NUMBER`` (:mod:`rankfold.demo.fleet`); the
    residuals and flags come from the result's per-sample arrays.
    """
    ids = np.asarray(result.sample_ids[:]).tolist()  # numpy's variable-width strings: go through Python str
    residual = np.asarray(result.residual[:])
    flagged = np.asarray(result.flagged[:])
    machine = np.array([str(i).rsplit("-", 1)[0] for i in ids])
    rows = []
    for name in truth.machine_ids:
        mine = machine == name
        rows.append((name, int(flagged[mine].sum()), float(residual[mine].max(initial=0.0))))
    rows.sort(key=lambda r: (-r[1], -r[2]))
    return rows


def _residual_lines(result, truth: FleetTruth) -> list[str]:
    if getattr(result, "residual", None) is None or getattr(result, "sample_ids", None) is None:
        return ["(no per-sample residuals in this result: run without --no-scores to rank machines)"]
    ranked = machine_residuals(result, truth)
    planted = set(truth.drifting_machines)
    shown = ranked[:len(planted) + 2]
    lines = ["", "machines ranked by records flagged for a large reconstruction error:",
             f"  {'machine':>8}  {'flagged':>8}  {'largest residual':>16}"]
    for name, count, worst in shown:
        mark = "  <- given a late fault" if name in planted else ""
        lines.append(f"  {name:>8}  {count:>8,}  {worst:>16.4g}{mark}")
    top = {name for name, _, _ in ranked[:len(planted)]}
    verdict = ("the machines given a late fault are exactly the top " + str(len(planted))
               if top == planted else
               f"only {len(top & planted)} of the {len(planted)} machines given a late fault are in the top {len(planted)}")
    return lines + [verdict]
