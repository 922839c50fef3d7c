"""The figures of a report: pure functions from numbers to PNG bytes.

Every function takes plain numpy arrays (already sampled or summarised by the
caller), draws with matplotlib's object-oriented API on a Figure that is never
registered with pyplot (so no GUI backend is ever touched and nothing global
is left behind), and returns the PNG bytes.  The look is rankfold's own: warm
paper background, ink-blue text, a twelve-colour palette chosen for contrast
on that background, condensed labels, no box around the plot.
"""

from __future__ import annotations

import io
from contextlib import contextmanager

import numpy as np

# --- the look -----------------------------------------------------------------

PAPER = "#fbf8f1"
INK = "#1f2b3d"
MUTED = "#6f7682"
RULE = "#e4ddcf"
ACCENT = "#c4572f"  # terracotta: thresholds, targets, the thing to notice
PALETTE = (
    "#23708a",  # deep teal
    "#c4572f",  # terracotta
    "#d9a21b",  # mustard
    "#5b4a8b",  # plum
    "#5f8a3a",  # moss
    "#b8407a",  # rose
    "#3c8fd0",  # sky
    "#8c6a43",  # walnut
    "#2f9e8f",  # sea green
    "#e07b54",  # apricot
    "#7a7f2a",  # olive
    "#4a4f5c",  # slate
)
MAX_LABEL_COLOURS = len(PALETTE)
SERIES = tuple(c for c in PALETTE if c != ACCENT)  # lines drawn beside an accent (target) line
DPI = 110

_RC = {
    "font.family": "DejaVu Sans",
    "font.size": 9.5,
    "axes.facecolor": PAPER,
    "figure.facecolor": PAPER,
    "savefig.facecolor": PAPER,
    "axes.edgecolor": MUTED,
    "axes.labelcolor": INK,
    "axes.titlecolor": INK,
    "axes.titlesize": 11,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlepad": 10,
    "axes.labelsize": 9.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.axisbelow": True,
    "grid.color": RULE,
    "grid.linestyle": "-",
    "grid.linewidth": 0.8,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "legend.frameon": False,
    "legend.fontsize": 8.5,
    "lines.linewidth": 1.8,
    "lines.markersize": 5,
}


@contextmanager
def _look():
    """Apply rankfold's style for the duration of one figure, leaving global settings as they were."""
    import matplotlib

    with matplotlib.rc_context(_RC):
        yield


def _figure(width: float = 7.2, height: float = 4.0, ncols: int = 1):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=DPI, layout="constrained")
    axes = fig.subplots(1, ncols, squeeze=False)[0]
    return fig, axes


def to_png(fig) -> bytes:
    """Render ``fig`` with the Agg canvas and return the PNG bytes."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": "rankfold"})
    return buf.getvalue()


def _components_axis(ax, k: int) -> None:
    ticks = np.arange(1, k + 1)
    if k > 20:  # keep tick labels legible
        ticks = ticks[:: int(np.ceil(k / 20))]
    ax.set_xticks(ticks)
    ax.set_xlabel("component")


# --- a single result ------------------------------------------------------------


def scree(variance, variance_fraction) -> bytes:
    """Bars of each component's share of the total variance, with the cumulative share as a line.

    Parameters
    ----------
    variance, variance_fraction : array_like, shape (k,)
    """
    variance = np.asarray(variance, dtype=np.float64)
    fraction = np.asarray(variance_fraction, dtype=np.float64)
    k = fraction.size
    x = np.arange(1, k + 1)
    with _look():
        fig, (ax,) = _figure()
        ax.bar(x, 100 * fraction, width=0.62, color=PALETTE[0], label="share of total variance")
        ax.set_ylabel("share of total variance (%)")
        ax.set_ylim(0, max(1e-9, 100 * fraction.max()) * 1.18)
        twin = ax.twinx()
        twin.plot(x, 100 * np.cumsum(fraction), color=ACCENT, marker="o", label="cumulative")
        twin.set_ylim(0, 105)
        twin.set_ylabel("cumulative (%)", color=ACCENT)
        twin.grid(False)
        twin.spines["right"].set_visible(True)
        twin.spines["right"].set_color(MUTED)
        for i in range(min(k, 12)):
            ax.annotate(f"{variance[i]:.3g}", (x[i], 100 * fraction[i]), textcoords="offset points",
                        xytext=(0, 3), ha="center", fontsize=7.5, color=MUTED)
        _components_axis(ax, k)
        ax.set_title("Variance per component")
        handles = ax.get_legend_handles_labels()[0] + twin.get_legend_handles_labels()[0]
        fig.legend(handles, [h.get_label() for h in handles], loc="outside lower center", ncols=2)
        return to_png(fig)


def scores_scatter(x, y, labels=None, *, total: int | None = None) -> bytes:
    """Scores on the first two components, one dot per (sampled) sample.

    Parameters
    ----------
    x, y : array_like, shape (p,)
        Scores on components 1 and 2 of the plotted samples.
    labels : array_like of str, shape (p,), optional
        At most :data:`MAX_LABEL_COLOURS` distinct values; one colour each.
    total : int, optional
        Number of samples in the result (said in the title when only some are drawn).
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    p = x.size
    size = 14 if p < 2000 else 6 if p < 10000 else 3
    alpha = 0.85 if p < 2000 else 0.55
    with _look():
        fig, (ax,) = _figure(8.0, 5.8)
        if labels is None:
            ax.scatter(x, y, s=size, color=PALETTE[0], alpha=alpha, linewidths=0)
        else:
            labels = np.asarray(labels)
            values = sorted(set(labels.tolist()))  # colours follow the sorted values, stable across reports
            counts = {v: int(np.count_nonzero(labels == v)) for v in values}
            # largest groups first, so that a rare group (a fault, an outlier batch) is drawn on top
            for value in sorted(values, key=lambda v: -counts[v]):
                mask = labels == value
                rare = counts[value] < 0.1 * p  # a small group drawn larger and opaque, or it vanishes
                ax.scatter(x[mask], y[mask], s=size * (2.5 if rare else 1), alpha=0.95 if rare else alpha,
                           color=PALETTE[values.index(value) % len(PALETTE)], linewidths=0,
                           label=f"{value} ({counts[value]:,})")
            handles, names = ax.get_legend_handles_labels()
            order = sorted(range(len(names)), key=lambda i: names[i])
            ax.legend([handles[i] for i in order], [names[i] for i in order], loc="upper left",
                      bbox_to_anchor=(1.01, 1.0), markerscale=max(1.0, 8 / size))
        ax.axhline(0, color=MUTED, linewidth=0.6)
        ax.axvline(0, color=MUTED, linewidth=0.6)
        shown = f"{p:,} samples" if total is None or total == p else f"{p:,} of {total:,} samples, drawn at random"
        ax.set_xlabel(f"component 1 score\n({shown})")
        ax.set_ylabel("component 2 score")
        ax.set_title("Scores on components 1 and 2")
        return to_png(fig)


def top_loadings(components: list[dict]) -> bytes:
    """Horizontal bars of the largest loadings (by magnitude) of a few components.

    Parameters
    ----------
    components : list of dict
        One per panel: ``{"component": int, "features": [str], "loadings": [float]}``,
        features ordered by decreasing magnitude.
    """
    n = max(1, len(components))
    rows = max(len(c["features"]) for c in components) if components else 1
    with _look():
        fig, axes = _figure(min(4.0 * n, 12.0), max(2.6, 0.28 * rows + 1.2), ncols=n)
        for ax, comp in zip(axes, components):
            names = list(comp["features"])[::-1]
            values = np.asarray(comp["loadings"], dtype=np.float64)[::-1]
            colours = [PALETTE[0] if v >= 0 else PALETTE[1] for v in values]
            ax.barh(np.arange(len(values)), values, color=colours, height=0.66)
            ax.set_yticks(np.arange(len(values)), labels=[_shorten(s) for s in names], fontsize=8)
            ax.axvline(0, color=MUTED, linewidth=0.7)
            ax.grid(axis="y", visible=False)
            ax.set_title(f"Component {comp['component']}")
            ax.set_xlabel("loading")
        return to_png(fig)


def _shorten(name: str, width: int = 28) -> str:
    return name if len(name) <= width else name[: width - 1] + "…"


def residual_histogram(edges, counts, *, threshold: float | None, flagged: int | None,
                       log_x: bool) -> bytes:
    """Distribution of the per-sample residuals, with the flag threshold.

    Parameters
    ----------
    edges : array_like, shape (b + 1,)
        Bin edges (geometric when ``log_x``).
    counts : array_like, shape (b,)
        Samples per bin (drawn on a log count axis, so a few outliers stay visible).
    threshold : float, optional
        Residual above which a sample is flagged (the stored ``residual_flag["cutoff"]``).
    flagged : int, optional
        Number of flagged samples (said in the legend).
    """
    edges = np.asarray(edges, dtype=np.float64)
    counts = np.asarray(counts, dtype=np.float64)
    with _look():
        fig, (ax,) = _figure(7.2, 3.8)
        ax.stairs(counts, edges, fill=True, color=PALETTE[0], alpha=0.9, label="samples")
        if log_x:
            ax.set_xscale("log")
        if counts.max(initial=0) > 0:
            ax.set_yscale("log")
            ax.set_ylim(0.7, counts.max() * 1.6)
        if threshold is not None and np.isfinite(threshold):
            text = "flag cutoff" if flagged is None else f"flag cutoff: {flagged:,} flagged"
            ax.axvline(threshold, color=ACCENT, linewidth=2, linestyle=(0, (4, 2)), label=text)
        ax.set_xlabel("residual (squared distance to the kept components)")
        ax.set_ylabel("samples (log scale)")
        ax.set_title("Residual per sample")
        ax.legend(loc="upper right")
        return to_png(fig)


# --- a comparison --------------------------------------------------------------


def _floor_positive(values, floor: float) -> np.ndarray:
    """Values for a log axis: exact zeros (agreement to the last bit) drawn at ``floor``."""
    v = np.abs(np.asarray(values, dtype=np.float64))
    return np.where(v > floor, v, floor)


def per_component_lines(series: list[tuple[str, list]], *, title: str, ylabel: str,
                        target: float | None = None, target_label: str = "", floor: float = 1e-12,
                        highlight: str | None = None) -> bytes:
    """One line per setting of a per-component figure on a log y axis.

    Parameters
    ----------
    series : list of (label, values)
        ``values`` has one entry per component; zeros are drawn at ``floor``.
    target : float, optional
        A horizontal target line (e.g. the angle a setting must stay under).
    highlight : str, optional
        Label of the recommended setting, drawn thicker.
    """
    markers = "osD^vP*Xh<>p"
    with _look():
        fig, (ax,) = _figure()
        k = 1
        for i, (label, values) in enumerate(series):
            v = _floor_positive(values, floor)
            k = max(k, v.size)
            wide = label == highlight
            ax.plot(np.arange(1, v.size + 1), v, color=SERIES[i % len(SERIES)], marker=markers[i % len(markers)],
                    linewidth=3.0 if wide else 1.5, label=f"{label} (recommended)" if wide else label,
                    zorder=3 if wide else 2)
        if target is not None:
            ax.axhline(target, color=ACCENT, linewidth=1.6, linestyle=(0, (5, 3)), label=target_label)
        ax.set_yscale("log")
        ax.set_ylabel(ylabel)
        _components_axis(ax, k)
        ax.set_title(title)
        ax.legend(loc="best", ncols=1 if len(series) < 6 else 2)
        return to_png(fig)


def scree_overlay(reference: tuple[str, list], others: list[tuple[str, list]]) -> bytes:
    """The reference's variances as bars and every other method's as lines, per component."""
    ref_label, ref_values = reference
    ref_values = np.asarray(ref_values, dtype=np.float64)
    k = ref_values.size
    x = np.arange(1, k + 1)
    with _look():
        fig, (ax,) = _figure()
        ax.bar(x, ref_values, width=0.66, color=RULE, edgecolor=MUTED, linewidth=0.6, label=ref_label)
        for i, (label, values) in enumerate(others):
            v = np.asarray(values, dtype=np.float64)
            ax.plot(np.arange(1, v.size + 1), v, color=SERIES[i % len(SERIES)], marker="o", label=label)
        ax.set_ylabel("variance")
        _components_axis(ax, k)
        ax.set_title("Variances: reference (bars) and each setting (lines)")
        ax.legend(loc="upper right", ncols=1 if len(others) < 6 else 2)
        return to_png(fig)
