"""The report's PNG figures (matplotlib, Agg canvas, never a display): the shift heatmap and the
observed/expected/band traces of one entity, their value axes written as the tables write values
(:func:`..alert_lines.si`).  matplotlib is imported inside the functions, so importing the report
costs nothing until a figure is drawn."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

from ..alert_lines import si
from .collector import BAND_HI, BAND_LO, CHANNELS, EXPECTED, OBSERVED_HI, OBSERVED_LO, SHIFT, merge_bins
from .summary import EntityView, unscored_spans

HEATMAP_COLUMNS = 500  # display columns at most: about 1.5 pixels each at the figure's width
NAME_CHARS = 44        # metric names longer than this are cut with an ellipsis in figures

# Okabe & Ito (2008) colour-blind-safe palette; the heatmap uses ColorBrewer's diverging RdBu.
OBSERVED_COLOUR = "#0072B2"
EXPECTED_COLOUR = "#E69F00"
INCIDENT_COLOUR = "#D55E00"
LABEL_COLOUR = "#009E73"
BAND_COLOUR = "#999999"
SURGE_COLOUR = "#56B4E9"
UNSCORED_COLOUR = "#BBBBBB"   # hatched, so that it does not read as the (solid grey) detection band
UNSCORED_HATCH = "\\\\\\"
UNSCORED_LABEL = "not scored"
STYLE = {"font.size": 10, "axes.titlesize": 10, "axes.labelsize": 10, "legend.fontsize": 9,
         "xtick.labelsize": 9, "ytick.labelsize": 9, "axes.spines.top": False, "axes.spines.right": False,
         "timezone": "UTC", "savefig.dpi": 100}
FIG_WIDTH = 11.0   # inches at 100 dpi: 1,100 px, the page's content width


def short_name(name: str, limit: int = NAME_CHARS) -> str:
    """A metric name cut to ``limit`` characters with an ellipsis (figures only; tables show it whole)."""
    return name if len(name) <= limit else name[: limit - 1] + "\u2026"


def si_ticks(values: Sequence[float]) -> tuple[list[str], str]:
    """Tick labels of a value axis and its offset text.  Labels are :func:`..alert_lines.si`, as in
    the tables; where its three significant digits cannot tell the ticks apart (a flat metric far
    from zero), they are differences from the first tick, which the offset text gives in full.

    >>> si_ticks([0.0, 2e6, 4e6])
    (['0', '2 M', '4 M'], '')
    >>> si_ticks([1003.0, 1003.005, 1003.01])
    (['0', '+5 m', '+0.01'], '+1,003')
    """
    labels = [si(float(v)) for v in values]
    if len(values) < 2 or len(set(labels)) == len(labels):
        return labels, ""
    step = float(np.min(np.abs(np.diff(values)))) or 1.0
    decimals = max(0, -math.floor(math.log10(step)) + 2)
    offset = float(values[0])
    text = f"{offset:+,.{decimals}f}"
    return ([si(round(float(v) - offset, decimals), sign=True) for v in values],
            text.rstrip("0").rstrip(".") if "." in text else text)


def _si_formatter():
    """A matplotlib formatter around :func:`si_ticks` (built lazily: matplotlib loads on first use)."""
    from matplotlib.ticker import Formatter

    class SIFormatter(Formatter):
        offset = ""

        def format_ticks(self, values):
            labels, self.offset = si_ticks(values)
            return labels

        def __call__(self, x, pos=None):
            return si(float(x))

        def get_offset(self):
            return self.offset

    return SIFormatter()


def _dates(ts: np.ndarray) -> np.ndarray:
    return (np.asarray(ts, float) * 1000.0).astype("datetime64[ms]")


def _time_axis(ax) -> None:
    import matplotlib.dates as mdates
    locator = mdates.AutoDateLocator(minticks=4, maxticks=10)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))


def _windows(ax, view: EntityView) -> None:
    """Alerted incidents shaded at full height; labelled faults as a hatched bar along the top with
    outlined edges, so the two stay distinct where they overlap; labelled traffic surges (no fault)
    as a light band behind everything."""
    for w in view.surges:
        ax.axvspan(*_dates([w.start, w.end]), color=SURGE_COLOUR, alpha=0.15, lw=0, zorder=0)
    for w in view.incidents:
        ax.axvspan(*_dates([w.start, w.end]), color=INCIDENT_COLOUR, alpha=0.15, lw=0, zorder=0)
    for w in view.labelled:
        start, end = _dates([w.start, w.end])
        ax.axvspan(start, end, ymin=0.9, ymax=1.0, facecolor="white", edgecolor=LABEL_COLOUR, hatch="////",
                   lw=1.0, zorder=3)
        for edge in (start, end):
            ax.axvline(edge, color=LABEL_COLOUR, lw=1.0, ls=(0, (4, 2)), zorder=3)


def _strip(ax, view: EntityView) -> None:
    """The heatmap's timeline: one row of alerted incidents, one of labelled faults, one of labelled
    traffic surges (the last two when the labels have any)."""
    rows = ["alerted"] + (["labelled"] if view.labelled else []) + (["surge"] if view.surges else [])
    ax.set_ylim(len(rows), 0)
    ax.set_yticks(np.arange(len(rows)) + 0.5, rows)
    ax.tick_params(axis="x", which="both", bottom=False, labelbottom=False)
    ax.tick_params(axis="y", length=0)
    ax.spines[["left", "bottom"]].set_visible(False)
    for w in view.incidents:
        ax.axvspan(*_dates([w.start, w.end]), ymin=1 - 1 / len(rows), ymax=1.0, color=INCIDENT_COLOUR,
                   alpha=0.8, lw=0)
    def band(row: int) -> dict:   # axvspan's y range of one row (rows run top to bottom)
        return {"ymin": 1 - (row + 1) / len(rows), "ymax": 1 - row / len(rows)}

    for w in view.labelled:
        ax.axvspan(*_dates([w.start, w.end]), **band(rows.index("labelled")), facecolor="white",
                   edgecolor=LABEL_COLOUR, hatch="////", lw=1.0)
    for w in view.surges:
        ax.axvspan(*_dates([w.start, w.end]), **band(rows.index("surge")), color=SURGE_COLOUR, alpha=0.6, lw=0)


def _figure(height: float):
    from matplotlib.figure import Figure
    return Figure(figsize=(FIG_WIDTH, height), layout="constrained")


def _legend_handles(view: EntityView, with_lines: bool, solid: bool = False, unscored: bool = False) -> list:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    handles = []
    if with_lines:
        handles.append(Line2D([], [], color=OBSERVED_COLOUR, lw=1.3, label="observed"))
    if with_lines and np.isfinite(view.values[EXPECTED]).any():   # nothing expected before the warm-up ends
        handles += [Line2D([], [], color=EXPECTED_COLOUR, lw=1.6, label="expected (baseline)"),
                    Patch(facecolor=BAND_COLOUR, alpha=0.35, label="detection band")]
    if view.incidents:
        handles.append(Patch(facecolor=INCIDENT_COLOUR, alpha=0.8 if solid else 0.25, label="alerted incident"))
    if view.labelled:
        handles.append(Patch(facecolor="white", edgecolor=LABEL_COLOUR, hatch="////", label="labelled fault"))
    if view.surges:
        handles.append(Patch(facecolor=SURGE_COLOUR, alpha=0.6 if solid else 0.3,
                             label="labelled traffic surge (no fault)"))
    if unscored:
        handles.append(Patch(facecolor="#F2F2F2", edgecolor=UNSCORED_COLOUR, hatch=UNSCORED_HATCH,
                             label=UNSCORED_LABEL))
    return handles


def _columns(shift: np.ndarray, t: np.ndarray, limit: int) -> tuple[np.ndarray, np.ndarray]:
    """At most ``limit`` display columns (bins, k), merging neighbours by largest |shift| so that a
    one-vector spike keeps at least a pixel instead of falling between two."""
    factor = -(-shift.shape[0] // limit)
    if factor <= 1:
        return shift, t
    pad = (-shift.shape[0]) % factor
    block = np.full((CHANNELS, shift.shape[0] + pad, shift.shape[1]), np.nan, np.float32)
    block[SHIFT, : shift.shape[0]] = shift
    merged = merge_bins(block.reshape(CHANNELS, -1, factor, shift.shape[1]), axis=2)[SHIFT]
    return merged, t[::factor]


def draw_heatmap(view: EntityView, path: Path, threshold: float, emphasise: Iterable[str] = ()) -> None:
    """Time x top metrics of the signed shift (residual sigmas), incident and labelled windows
    in a strip above.  The colour scale is linear within +/- ``threshold`` and logarithmic beyond,
    so a 5-sigma shift and a 100-sigma one are both readable.  The names in ``emphasise`` (the
    incidents' metrics) are bold, labelled metrics green."""
    import matplotlib
    from matplotlib.colors import SymLogNorm
    k = len(view.metrics)
    bold = set(emphasise)
    labelled = {m for names in view.labelled_metrics for m in names}
    with matplotlib.rc_context(STYLE):
        fig = _figure(1.5 + 0.3 * k)
        timeline_rows = 1 + bool(view.labelled) + bool(view.surges)
        strip, ax = fig.subplots(2, 1, sharex=True, height_ratios=[0.2 * timeline_rows, 0.3 * k])
        shift, t_cols = _columns(view.values[SHIFT], view.t, HEATMAP_COLUMNS)
        moved = np.abs(shift[np.isfinite(shift)])
        limit = max(10.0, float(moved.max(initial=0.0)))
        threshold = threshold if math.isfinite(threshold) else 3.0
        edges = _dates(np.append(t_cols, view.t[-1] + view.step))
        cmap = matplotlib.colormaps["RdBu_r"].with_extremes(bad="#d9d9d9")
        mesh = ax.pcolormesh(edges, np.arange(k + 1), np.ma.masked_invalid(shift.T), cmap=cmap,
                             norm=SymLogNorm(threshold, linscale=0.8, vmin=-limit, vmax=limit), rasterized=True)
        ax.set_yticks(np.arange(k) + 0.5, [short_name(m) for m in view.metrics])
        for label, name in zip(ax.get_yticklabels(), view.metrics):
            if name in bold:
                label.set_fontweight("bold")
            if name in labelled:
                label.set_color(LABEL_COLOUR)
        ax.set_ylim(k, 0)
        ax.tick_params(axis="y", length=0)
        ax.set_xlabel("time (UTC)")
        bar = fig.colorbar(mesh, ax=ax, aspect=max(4, 3 * k), pad=0.01)
        ticks = [t for t in (1, 10, 100, 1000, 10000) if 2 * threshold < t <= limit]
        bar.set_ticks([-t for t in ticks[::-1]] + [-threshold, 0.0, threshold] + ticks,
                      labels=[f"\u2212{t:g}" for t in ticks[::-1]] + [f"\u2212{threshold:.1f}", "0",
                                                                       f"{threshold:.1f}"] + [f"{t:g}" for t in ticks])
        bar.set_label("shift (residual \u03c3)")
        _strip(strip, view)
        if not view.incidents:
            strip.text(0.5, 0.5, "no alert fired", transform=strip.transAxes, ha="center", va="center",
                       color="#555555")
        strip.legend(handles=_legend_handles(view, with_lines=False, solid=True), loc="lower left",
                     bbox_to_anchor=(0, 1.0), ncol=3, frameon=False, borderaxespad=0.2)
        _time_axis(ax)
        fig.savefig(path)


def _unscored(ax, view: EntityView, column: int) -> bool:
    """Shade, at full height, the stretches where metric ``column`` was not scored; whether any was."""
    from matplotlib.collections import PolyCollection
    from matplotlib.dates import date2num
    spans = unscored_spans(view, column)
    if spans:
        x = date2num(_dates(np.array(spans).ravel())).reshape(-1, 2)
        ax.add_collection(PolyCollection([[(a, 0), (a, 1), (b, 1), (b, 0)] for a, b in x],
                                         transform=ax.get_xaxis_transform(), facecolor="#F2F2F2",
                                         edgecolor=UNSCORED_COLOUR, hatch=UNSCORED_HATCH, lw=0, zorder=0),
                          autolim=False)
    return bool(spans)


def draw_traces(view: EntityView, path: Path, metrics: Sequence[str], span: tuple[float, float] | None = None,
                title: str = "") -> None:
    """One panel per metric: observed, expected, the detection band, windows and unscored stretches
    shaded, from the data's start to its end (or over ``span``, within the data)."""
    import matplotlib
    cols = [view.metrics.index(m) for m in metrics]
    t = _dates(view.t)
    span = span or (float(view.t[0]), view.end)
    edges = np.append(view.t, view.end)
    keep = (edges[1:] >= span[0]) & (edges[:-1] <= span[1])   # the bins that reach into the span
    grey = False
    with matplotlib.rc_context(STYLE):
        fig = _figure(0.9 + 1.55 * len(cols))
        axes = np.atleast_1d(fig.subplots(len(cols), 1, sharex=True, squeeze=False)[:, 0])
        for ax, c, name in zip(axes, cols, metrics):
            v = view.values[:, keep, c]
            tk = t[keep]
            ax.fill_between(tk, v[BAND_LO], v[BAND_HI], color=BAND_COLOUR, alpha=0.35, lw=0, step="post")
            ax.step(tk, v[EXPECTED], where="post", color=EXPECTED_COLOUR, lw=1.6)
            if view.width > 1:   # several rows per bin: the observed range, not a single value
                ax.fill_between(tk, v[OBSERVED_LO], v[OBSERVED_HI], color=OBSERVED_COLOUR, alpha=0.8, lw=0.5,
                                step="post")
            else:
                ax.step(tk, v[OBSERVED_LO], where="post", color=OBSERVED_COLOUR, lw=0.9 if span is None else 1.2)
            _windows(ax, view)
            grey |= _unscored(ax, view, c)
            ax.set_title(short_name(name, 90), loc="left", fontweight="bold")
            if view.labelled:   # headroom for the labelled-fault bar along the top
                lo, hi = ax.get_ylim()
                ax.set_ylim(lo, hi + 0.12 * (hi - lo))
            ax.yaxis.set_major_formatter(_si_formatter())   # as the tables write values
        axes[-1].set_xlim(*_dates(list(span)))
        axes[-1].set_xlabel("time (UTC)")
        _time_axis(axes[-1])
        fig.legend(handles=_legend_handles(view, with_lines=True, unscored=grey), loc="outside upper left", ncol=5,
                   frameon=False, title=title or None, title_fontproperties={"weight": "bold"},
                   alignment="left")
        fig.savefig(path)
