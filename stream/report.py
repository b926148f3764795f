"""The incident-review report: ``shiftsieve replay INPUT --events OUT --report DIR``.

Two parts.  :class:`ReportCollector` is an engine observer (:data:`.engine.BatchObserver`)
that keeps, per entity, what the figures need, in bounded memory.  :func:`write_report`
turns it and the replay's alert events into ``DIR/index.html`` (self-contained: inline
CSS, no scripts, no external assets) and PNG figures beside it (matplotlib, Agg canvas,
never a display).

Memory bound.  Each entity's record is *time-binned*: a bin covers ``width`` consecutive
scored rows and holds, per metric, six float32 channels (the signed shift with the largest
|shift| in the bin, the observed minimum and maximum, the mean expected value and the
band's minimum and maximum).  When an entity reaches ``max_bins`` bins, neighbouring pairs
merge and ``width`` doubles, so an entity never holds more than ``max_bins`` bins however
long the replay (2,048 by default: more than the pixels across a figure).  All entities
together hold at most ``max_cells`` float32 cells (checked after every batch); beyond it the
detail of the least interesting entity (no incident, smallest peak |shift|) is dropped and
the report says so; its per-metric peaks are kept.  The bound is about 4 bytes x
``max_cells`` (64 MiB by default) plus ``O(n)`` per entity.

The band is the detection band: the baseline's expected value +/- ``lambda d_j`` (``lambda``
the detector's threshold, ``d_j`` the metric's residual scale), mapped to the metric's units.
A value outside it alone makes the zero solution of the LASSO non-optimal for that metric,
i.e. the detector considers it; confirmation (k of m) decides whether it alerts.

>>> import numpy as np
>>> trace = EntityTrace(max_bins=4)
>>> rows = np.zeros((CHANNELS, 10, 1), np.float32); rows[SHIFT, :, 0] = np.arange(10) - 6.0
>>> trace.add(["cpu"], np.arange(10.0), rows)
>>> trace.width, trace.bins, trace.series()[1][SHIFT, :, 0].tolist()
(4, 2, [-6.0, -2.0, 3.0])
"""

from __future__ import annotations

import html
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable, Sequence

import numpy as np

from shiftsieve.models.detector import BatchResult
from shiftsieve.models.normaliser import to_metric_units

from .decode import _iso as rfc3339
from .demo import _duration as human_duration
from .evaluate import Evaluation, Labels

if TYPE_CHECKING:
    from .assemble import EntityStream
    from .config import Config
    from .replay import ReplaySummary

#: Channels of a bin, in this order.
SHIFT, OBSERVED_LO, OBSERVED_HI, EXPECTED, BAND_LO, BAND_HI = range(6)
CHANNELS = 6
MARKER = '<meta name="generator" content="shiftsieve report">'   # how a previous report is recognised

HEATMAP_METRICS = 12   # rows of the heatmap
HEATMAP_COLUMNS = 500  # display columns at most: about 1.5 pixels each at the figure's width
TRACE_METRICS = 6      # panels of a trace figure
QUIET_ENTITIES = 3     # entities shown when nothing fired
NAME_CHARS = 44        # metric names longer than this are cut with an ellipsis in figures


class ReportError(Exception):
    """The report cannot be written; the message is one line."""


def _reduce(block: np.ndarray, axis: int) -> np.ndarray:
    """Merge rows (or bins) of ``block`` (CHANNELS, ..., n) along ``axis``, channel by channel."""
    out = np.empty(block.shape[:axis] + block.shape[axis + 1:], np.float32)
    shift = block[SHIFT]
    pick = np.expand_dims(np.where(np.isnan(shift), -1.0, np.abs(shift)).argmax(axis=axis - 1), axis - 1)
    out[SHIFT] = np.take_along_axis(shift, pick, axis=axis - 1).squeeze(axis - 1)   # signed, largest |shift|
    for ch in (OBSERVED_LO, BAND_LO):
        out[ch] = np.fmin.reduce(block[ch], axis=axis - 1)   # fmin/fmax skip NaN
    for ch in (OBSERVED_HI, BAND_HI):
        out[ch] = np.fmax.reduce(block[ch], axis=axis - 1)
    count = np.count_nonzero(~np.isnan(block[EXPECTED]), axis=axis - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        out[EXPECTED] = np.nansum(block[EXPECTED], axis=axis - 1) / count   # NaN where nothing was expected
    return out


class EntityTrace:
    """One entity's time-binned record (module docstring): ``width`` rows per bin, at most
    ``max_bins`` bins, plus each metric's peak |shift| over the whole replay."""

    def __init__(self, max_bins: int = 2048) -> None:
        if max_bins < 2 or max_bins % 2:
            raise ValueError(f"max_bins must be an even number >= 2, got {max_bins}")
        self.max_bins = max_bins
        self.names: list[str] = []
        self.index: dict[str, int] = {}
        self.width = 1
        self.bins = 0
        self.data = np.empty((CHANNELS, 0, 0), np.float32)   # (CHANNELS, capacity, n)
        self.t_first = np.empty(0)                            # first and last ts of each bin
        self.t_last = np.empty(0)
        self._staged = np.empty((CHANNELS, 0, 0), np.float32)   # rows not yet a full bin
        self._staged_ts = np.empty(0)
        self.peak = np.zeros(0, np.float32)   # per metric, kept even when the detail is dropped
        self.rows = 0
        self.detail = True
        self.dropped_at: float | None = None   # ts when the detail was dropped
        self.threshold = math.nan              # the detector's lambda and k-of-m rule, for the captions
        self.confirm = (0, 0)

    @property
    def cells(self) -> int:
        """float32 cells held (the quantity the collector bounds)."""
        return self.data.size + self._staged.size

    def columns(self, names: Sequence[str]) -> np.ndarray:
        """Column of each name, adding new names (their past is NaN)."""
        fresh = [name for name in names if name not in self.index]
        if fresh:
            self.index.update((name, len(self.names) + i) for i, name in enumerate(fresh))
            self.names.extend(fresh)
            grow = ((0, 0), (0, 0), (0, len(fresh)))
            self.data = np.pad(self.data, grow, constant_values=np.nan)
            self._staged = np.pad(self._staged, grow, constant_values=np.nan)
            self.peak = np.pad(self.peak, (0, len(fresh)))
        return np.array([self.index[name] for name in names], dtype=np.int64)

    def add(self, names: Sequence[str], ts: np.ndarray, rows: np.ndarray) -> None:
        """Append scored rows ``rows`` (CHANNELS, B, len(names)) with timestamps ``ts`` (B,)."""
        cols = self.columns(names)
        if len(cols) == len(self.names) and (cols == np.arange(len(cols))).all():
            full = rows
        else:
            full = np.full((CHANNELS, rows.shape[1], len(self.names)), np.nan, np.float32)
            full[:, :, cols] = rows
        shift = np.abs(full[SHIFT])
        if shift.size:
            self.peak = np.fmax(self.peak, np.fmax.reduce(shift, axis=0))
        self.rows += rows.shape[1]
        if not self.detail:
            return
        pending = np.concatenate([self._staged, full], axis=1)
        pending_ts = np.concatenate([self._staged_ts, ts])
        while True:
            k = min(pending.shape[1] // self.width, self.max_bins - self.bins)
            if k:
                used = k * self.width
                block = pending[:, :used].reshape(CHANNELS, k, self.width, -1)
                self._append(_reduce(block, axis=2), pending_ts[:used:self.width],
                             pending_ts[self.width - 1:used:self.width])
                pending, pending_ts = pending[:, used:], pending_ts[used:]
            if pending.shape[1] < self.width:
                break
            self._merge_pairs()   # full: halve the bins, double the width
        self._staged, self._staged_ts = pending.copy(), pending_ts

    def _append(self, bins: np.ndarray, first: np.ndarray, last: np.ndarray) -> None:
        need = self.bins + bins.shape[1]
        if need > self.data.shape[1]:   # capacity doubles up to max_bins: short replays stay small
            capacity = min(self.max_bins, max(need, 2 * self.data.shape[1], 64))
            grown = np.full((CHANNELS, capacity, len(self.names)), np.nan, np.float32)
            grown[:, : self.bins] = self.data[:, : self.bins]
            self.data = grown
            self.t_first = np.concatenate([self.t_first[: self.bins], np.full(capacity - self.bins, np.nan)])
            self.t_last = np.concatenate([self.t_last[: self.bins], np.full(capacity - self.bins, np.nan)])
        self.data[:, self.bins:need] = bins
        self.t_first[self.bins:need] = first
        self.t_last[self.bins:need] = last
        self.bins = need

    def _merge_pairs(self) -> None:
        half = self.bins // 2
        pairs = self.data[:, : 2 * half].reshape(CHANNELS, half, 2, -1)
        self.data[:, :half] = _reduce(pairs, axis=2)
        self.data[:, half: self.bins] = np.nan
        self.t_first[:half] = self.t_first[: 2 * half: 2]
        self.t_last[:half] = self.t_last[1: 2 * half: 2]
        self.bins = half
        self.width *= 2

    def drop_detail(self, ts: float) -> None:
        """Free the binned record (memory bound); the peaks stay."""
        self.detail = False
        self.dropped_at = ts
        self.data = np.empty((CHANNELS, 0, len(self.names)), np.float32)
        self._staged = np.empty((CHANNELS, 0, len(self.names)), np.float32)
        self.t_first = self.t_last = self._staged_ts = np.empty(0)
        self.bins = 0

    def series(self) -> tuple[np.ndarray, np.ndarray]:
        """Bin start times (k,) and values (CHANNELS, k, n), the rows still staged as a last,
        shorter bin."""
        t = self.t_first[: self.bins]
        data = self.data[:, : self.bins]
        if self._staged.shape[1]:
            t = np.concatenate([t, self._staged_ts[:1]])
            data = np.concatenate([data, _reduce(self._staged[:, None], axis=2)], axis=1)
        return t, data


def batch_rows(stream: "EntityStream", X: np.ndarray, result: BatchResult) -> tuple[slice, np.ndarray]:
    """The scored rows of a batch and their channels (CHANNELS, rows, n) in metric units.

    Shifts of metrics the detector does not score (not yet ``warmup`` samples, or leverage above
    :attr:`EntityDetector.MAX_SCORED_LEVERAGE`) and of missing values are NaN, so the report
    ranks and draws only what the detector judges.
    """
    det = stream.detector
    B = X.shape[0]
    u = result.units
    if det.warming_up or u is None:
        return slice(B, B), np.empty((CHANNELS, 0, X.shape[1]), np.float32)
    scored_rows = slice(B - min(B, det.samples - det.config.warmup), B)
    Xs = X[scored_rows]
    E = result.coords[scored_rows] @ u.basis.T
    half = det.lam * u.residual_scale
    scored = det.scored_columns()[: X.shape[1]]   # the metric columns (groups come after them)
    rows = np.empty((CHANNELS,) + Xs.shape, np.float32)
    rows[SHIFT] = np.where(scored & np.isfinite(Xs), result.shift_sigma[scored_rows], np.nan)
    rows[OBSERVED_LO] = rows[OBSERVED_HI] = Xs
    rows[EXPECTED] = to_metric_units(E, u.loc, u.scale, u.log_mask)
    rows[BAND_LO] = to_metric_units(E - half, u.loc, u.scale, u.log_mask)
    rows[BAND_HI] = to_metric_units(E + half, u.loc, u.scale, u.log_mask)
    return scored_rows, rows


class ReportCollector:
    """Engine observer keeping each entity's :class:`EntityTrace`, all within ``max_cells``.

    >>> collector = ReportCollector(max_bins=64, max_cells=10_000)
    >>> collector.traces, collector.cells
    ({}, 0)
    """

    def __init__(self, *, max_bins: int = 2048, max_cells: int = 1 << 24) -> None:
        if max_cells < CHANNELS * 2:
            raise ValueError(f"max_cells must be >= {CHANNELS * 2}, got {max_cells}")
        self.max_bins = max_bins
        self.max_cells = max_cells
        self.traces: dict[str, EntityTrace] = {}
        self.fired: set[str] = set()
        self.cells = 0

    def __call__(self, stream: "EntityStream", ts: np.ndarray, X: np.ndarray, result: BatchResult) -> None:
        trace = self.traces.get(stream.entity)
        if trace is None:
            trace = self.traces[stream.entity] = EntityTrace(self.max_bins)
        if any(t.kind == "firing" for t in result.transitions):
            self.fired.add(stream.entity)
        scored, rows = batch_rows(stream, X, result)
        trace.threshold = stream.detector.lam
        decision = stream.detector.config.decision
        trace.confirm = (decision.confirm_k, decision.confirm_m)
        before = trace.cells
        trace.add(stream.names, ts[scored], rows)
        self.cells += trace.cells - before
        if self.cells > self.max_cells:
            self._shed(float(ts[-1]))

    def _interest(self, entity: str) -> tuple[bool, float]:
        peak = self.traces[entity].peak
        return entity in self.fired, float(peak.max()) if peak.size else 0.0

    def _shed(self, ts: float) -> None:
        """Drop the detail of the least interesting entities until the cells fit."""
        for entity in sorted((e for e, t in self.traces.items() if t.detail), key=self._interest):
            if self.cells <= self.max_cells:
                return
            trace = self.traces[entity]
            self.cells -= trace.cells
            trace.drop_detail(ts)
            self.cells += trace.cells


# --- what the figures show ------------------------------------------------------------------

@dataclass(frozen=True)
class Window:
    """A time window drawn on the figures: an alerted incident or a labelled fault."""

    start: float
    end: float
    name: str


@dataclass(frozen=True)
class IncidentSummary:
    """One incident id, from the alert events: window, end state and metrics at their peak."""

    incident: str
    entity: str
    start: float
    end: float
    state: str                      # resolved, adapted, or open (still firing at the end of the replay)
    metrics: tuple[dict, ...]       # event entries (name, shift_sigma, value, expected), peak |shift|, ranked
    window_metrics: dict | None     # joint-window rankings of the closing event, when present

    @property
    def duration(self) -> float:
        return self.end - self.start


def incidents_from_events(events: Iterable[dict], last_ts: dict[str, float]) -> list[IncidentSummary]:
    """Group events by incident id; each metric keeps the entry with its largest |shift_sigma|
    over the incident's events.  Incidents without a closing event end at their entity's last ts."""
    groups: dict[str, list[dict]] = {}
    for event in events:
        groups.setdefault(event["incident"], []).append(event)
    found = []
    for key, evs in groups.items():
        evs = sorted(evs, key=lambda e: e["ts"])
        closing = next((e for e in evs if e["state"] in ("resolved", "adapted")), None)
        start = min(float(e.get("started", e["ts"])) for e in evs)
        entity = evs[0]["entity"]
        end = float(closing["ts"]) if closing else max(last_ts.get(entity, start), float(evs[-1]["ts"]))
        peak: dict[str, dict] = {}
        for e in evs:
            for m in e.get("metrics", []):
                if m["name"] not in peak or abs(m["shift_sigma"]) > abs(peak[m["name"]]["shift_sigma"]):
                    peak[m["name"]] = m
        ranked = tuple(sorted(peak.values(), key=lambda m: (-abs(m["shift_sigma"]), m["name"])))
        found.append(IncidentSummary(key, entity, start, end, closing["state"] if closing else "open",
                                     ranked, (closing or {}).get("window_metrics")))
    return sorted(found, key=lambda i: (i.start, i.incident))


@dataclass
class EntityView:
    """The data one entity's figures draw: chosen metrics, binned series, windows."""

    entity: str
    metrics: list[str]
    t: np.ndarray                  # (k,) bin start times, epoch seconds
    step: float                    # seconds per bin (for the last edge)
    values: np.ndarray             # (CHANNELS, k, len(metrics))
    incidents: list[Window]
    labelled: list[Window]
    labelled_metrics: list[tuple[str, ...]]   # the metrics of each labelled window
    width: int                     # scored rows per bin
    surges: list[Window] = field(default_factory=list)   # labelled benign traffic surges (every entity)


def choose_metrics(trace: EntityTrace, incidents: Sequence[IncidentSummary], labelled: Iterable[str],
                   limit: int) -> list[str]:
    """Top metrics of an entity: those of its incidents by peak |shift|, then labelled ones, then
    the rest by the collector's peak |shift| (only metrics the trace has)."""
    chosen: dict[str, None] = {}
    for name in sorted({m["name"]: abs(m["shift_sigma"]) for inc in incidents for m in inc.metrics}.items(),
                       key=lambda kv: (-kv[1], kv[0])):
        chosen[name[0]] = None
    chosen.update((name, None) for name in labelled)
    order = np.argsort(-np.nan_to_num(trace.peak, nan=0.0), kind="stable")
    chosen.update((trace.names[j], None) for j in order[: limit + len(chosen)])
    return [name for name in chosen if name in trace.index][:limit]


def entity_view(trace: EntityTrace, entity: str, metrics: list[str], incidents: Sequence[IncidentSummary],
                labels: Labels | None) -> EntityView:
    t, data = trace.series()
    cols = np.array([trace.index[m] for m in metrics], dtype=np.int64)
    step = float(np.median(np.diff(t))) if t.size > 1 else 30.0
    mine = [lab for lab in (labels.incidents if labels else ()) if lab.entity == entity]
    return EntityView(entity, metrics, t, step, data[:, :, cols],
                      [Window(i.start, i.end, i.incident) for i in incidents],
                      [Window(lab.start, lab.end, ", ".join(lab.metrics)) for lab in mine],
                      [lab.metrics for lab in mine], trace.width,
                      [Window(start, end, "traffic surge") for start, end in (labels.surges if labels else ())])


# --- figures ------------------------------------------------------------------------------

# Okabe & Ito (2008) colour-blind-safe palette; the heatmap uses ColorBrewer's diverging RdBu.
OBSERVED_COLOUR = "#0072B2"
EXPECTED_COLOUR = "#E69F00"
INCIDENT_COLOUR = "#D55E00"
LABEL_COLOUR = "#009E73"
BAND_COLOUR = "#999999"
SURGE_COLOUR = "#56B4E9"
STYLE = {"font.size": 10, "axes.titlesize": 10, "axes.labelsize": 10, "legend.fontsize": 9,
         "xtick.labelsize": 9, "ytick.labelsize": 9, "axes.spines.top": False, "axes.spines.right": False,
         "timezone": "UTC", "savefig.dpi": 100}
FIG_WIDTH = 11.0   # inches at 100 dpi: 1,100 px, the page's content width


def short_name(name: str, limit: int = NAME_CHARS) -> str:
    """A metric name cut to ``limit`` characters with an ellipsis (figures only; tables show it whole)."""
    return name if len(name) <= limit else name[: limit - 1] + "\u2026"


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


def _legend_handles(view: EntityView, with_lines: bool, solid: bool = False) -> list:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    handles = []
    if with_lines:
        handles += [Line2D([], [], color=OBSERVED_COLOUR, lw=1.3, label="observed"),
                    Line2D([], [], color=EXPECTED_COLOUR, lw=1.6, label="expected (baseline)"),
                    Patch(facecolor=BAND_COLOUR, alpha=0.35, label="detection band")]
    if view.incidents:
        handles.append(Patch(facecolor=INCIDENT_COLOUR, alpha=0.8 if solid else 0.25, label="alerted incident"))
    if view.labelled:
        handles.append(Patch(facecolor="white", edgecolor=LABEL_COLOUR, hatch="////", label="labelled fault"))
    if view.surges:
        handles.append(Patch(facecolor=SURGE_COLOUR, alpha=0.6 if solid else 0.3,
                             label="labelled traffic surge (no fault)"))
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
    merged = _reduce(block.reshape(CHANNELS, -1, factor, shift.shape[1]), axis=2)[SHIFT]
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


def draw_traces(view: EntityView, path: Path, metrics: Sequence[str], span: tuple[float, float] | None = None,
                title: str = "") -> None:
    """One panel per metric: observed, expected, the detection band, windows shaded."""
    import matplotlib
    from matplotlib.ticker import EngFormatter
    cols = [view.metrics.index(m) for m in metrics]
    t = _dates(view.t)
    keep = np.ones(t.size, bool) if span is None else (view.t >= span[0]) & (view.t <= span[1])
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
            ax.set_title(short_name(name, 90), loc="left", fontweight="bold")
            ax.margins(x=0)
            if view.labelled:   # headroom for the labelled-fault bar along the top
                lo, hi = ax.get_ylim()
                ax.set_ylim(lo, hi + 0.12 * (hi - lo))
            if np.nanmax(np.abs(v[[OBSERVED_HI, BAND_HI]]), initial=0.0) >= 1e4:   # 36 M, not 3.6e7
                ax.yaxis.set_major_formatter(EngFormatter(sep=" "))
            else:
                ax.yaxis.get_major_formatter().set_useOffset(False)
        if span is not None:
            axes[-1].set_xlim(*_dates(list(span)))
        axes[-1].set_xlabel("time (UTC)")
        _time_axis(axes[-1])
        fig.legend(handles=_legend_handles(view, with_lines=True), loc="outside upper left", ncol=5,
                   frameon=False, title=title or None, title_fontproperties={"weight": "bold"},
                   alignment="left")
        fig.savefig(path)


# --- the page -----------------------------------------------------------------------------

CSS = """
body { font: 15px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; color: #1a1a1a; margin: 0; }
main { max-width: 1140px; margin: 0 auto; padding: 1.5em 1.2em 4em; }
h1 { font-size: 1.6em; margin-bottom: .2em; } h2 { margin-top: 2em; border-bottom: 1px solid #ccc; }
h3 { margin-top: 1.6em; } .meta { color: #555; }
.caution { background: #fff4e5; border-left: 4px solid #D55E00; padding: .6em 1em; }
.quiet { background: #eef6f1; border-left: 4px solid #009E73; padding: .6em 1em; font-size: 1.1em; }
.note { background: #f3f3f3; border-left: 4px solid #999; padding: .5em 1em; }
table { border-collapse: collapse; margin: .6em 0 1em; font-variant-numeric: tabular-nums; }
th, td { padding: .25em .7em; border-bottom: 1px solid #e2e2e2; text-align: left; vertical-align: top; }
th { background: #f6f6f6; } td.num { text-align: right; white-space: nowrap; }
.name { font-family: ui-monospace, Menlo, Consolas, monospace; word-break: break-all; }
img { max-width: 100%; height: auto; display: block; margin: .4em 0; }
figcaption { color: #555; font-size: .92em; margin-bottom: 1.2em; }
pre { background: #f6f6f6; padding: .8em; overflow-x: auto; }
"""

E = html.escape


def _num(x: Any, fmt: str = ",.4g") -> str:
    return "\u2013" if x is None or (isinstance(x, float) and not math.isfinite(x)) else format(x, fmt)


def _exact(x: float | None) -> str:
    """An event's value as the events file has it (already rounded to 6 significant digits), no exponent."""
    return "\u2013" if x is None else np.format_float_positional(float(x), trim="-")


def _table(head: Sequence[str], rows: Iterable[Sequence[str]], numeric: Sequence[int] = ()) -> str:
    """An HTML table; cells are already-escaped HTML, ``numeric`` columns right-aligned."""
    out = ["<table><tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>"]
    for row in rows:
        out.append("<tr>" + "".join(f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>"
                                    for i, c in enumerate(row)) + "</tr>")
    return "\n".join(out) + "</table>"


def _metric_table(inc: IncidentSummary, labelled: set[str]) -> str:
    rows = []
    for rank, m in enumerate(inc.metrics, 1):
        name = E(m["name"]) + (f" <small>({E(', '.join(m['members']))})</small>" if m.get("members") else "")
        rows.append([str(rank), f'<span class="name">{name}</span>', f"{m['shift_sigma']:+.2f}",
                     _exact(m.get("value")), _exact(m.get("expected")), "\u2713" if m["name"] in labelled else ""])
    head = ["#", "metric", "shift (\u03c3)", "observed", "expected"] + (["labelled"] if labelled else [])
    return _table(head, [r[: len(head)] for r in rows], numeric=(0, 2, 3, 4))


def _window_table(window: dict) -> str:
    methods = [(key, title) for key, title in (("group_lasso", "group LASSO"), ("msbl", "M-SBL")) if window.get(key)]
    if not methods:
        return ""
    depth = max(len(window[key]) for key, _ in methods)
    rows = []
    for i in range(depth):
        row = [str(i + 1)]
        for key, _ in methods:
            item = window[key][i] if i < len(window[key]) else None
            row += [f'<span class="name">{E(str(item["name"]))}</span>', _num(item.get("score"), ".3g")] \
                if item else ["", ""]
        rows.append(row)
    head = ["#"] + [h for _, title in methods for h in (E(title), "score")]
    rows_note = f" over {int(window['rows'])} rows" if isinstance(window.get("rows"), (int, float)) else ""
    return (f"<p>Metrics that moved together over the whole incident window{rows_note} "
            f"(joint-window rankings):</p>" + _table(head, rows, numeric=tuple(range(2, len(head), 2))))


def _evaluation_html(ev: Evaluation) -> str:
    scores = _table(["labelled", "alerted", "matched", "precision", "recall", "F1", "localisation",
                     "mean delay", "max delay", "false alerts", "per 10k vectors"],
                    [[str(ev.labelled), str(len(ev.predicted)), str(len(ev.matches)), f"{ev.precision:.2f}",
                      f"{ev.recall:.2f}", f"{ev.f1:.2f}", _num(ev.localisation, ".2f"),
                      "\u2013" if ev.delay_mean_seconds is None else f"{ev.delay_mean_seconds:+.0f} s",
                      "\u2013" if ev.delay_max_seconds is None else f"{ev.delay_max_seconds:+.0f} s",
                      str(len(ev.false_alerts)), f"{ev.false_alerts_per_10k:.2f}"]],
                    numeric=tuple(range(11)))
    rows = [["found", E(m.label.entity), rfc3339(m.label.start), E(m.predicted.incident),
             f"{m.delay_seconds:+.0f} s", f"{m.localisation:.2f}"] for m in ev.matches]
    rows += [["<b>missed</b>", E(lab.entity), rfc3339(lab.start), "\u2013", "\u2013",
              E(", ".join(lab.metrics))] for lab in ev.missed]
    rows += [["false alert", E(p.entity), rfc3339(p.onset), E(p.incident), "\u2013", "\u2013"]
             for p in ev.false_alerts]
    detail = _table(["", "entity", "start / onset", "incident", "delay", "localisation / labelled metrics"],
                    rows) if rows else ""
    return (f"<p>Scored at incident level against the labels (onsets up to {ev.tolerance_seconds:g} s before a "
            f"labelled start count; localisation is the share of the labelled metrics among the top-k "
            f"reported).</p>{scores}{detail}")


def _comparison_html(rows: Sequence[Any]) -> str:
    body = [[E(str(r.method)), "yes" if r.localises else "no", f"{r.evaluation.precision:.2f}",
             f"{r.evaluation.recall:.2f}", f"{r.evaluation.f1:.2f}",
             _num(r.evaluation.localisation, ".2f") if r.localises else "\u2013",
             "\u2013" if r.evaluation.delay_mean_seconds is None else f"{r.evaluation.delay_mean_seconds:+.0f} s",
             f"{r.evaluation.false_alerts_per_10k:.2f}", f"{r.vectors_per_second:,.0f}"] for r in rows]
    return ("<p>The same input and labels through each method (incident-level scores).</p>"
            + _table(["method", "names metrics", "precision", "recall", "F1", "localisation", "mean delay",
                      "false alerts / 10k", "vectors/s"], body, numeric=tuple(range(2, 9))))


@dataclass
class ReportInputs:
    """Everything the page shows besides the collector: the replay's events and the optional parts."""

    title: str
    events: list[dict]
    summary: str = ""
    labels: Labels | None = None
    evaluation: Evaluation | None = None
    comparison: Sequence[Any] | None = None   # stream.compare.MethodScore rows
    tuning_text: str | None = None            # stream.tune.format_tuning
    tuning_toml: str | None = None            # stream.tune.toml_fragment
    missing: list[str] = field(default_factory=list)   # optional parts that could not be produced, and why


def prepare_directory(directory: str | Path) -> Path:
    """Create ``directory`` or check it may be overwritten (empty, or a previous report: its
    ``index.html`` carries :data:`MARKER` and every other entry is a PNG); check it is writable.
    Raises :class:`ReportError` with a one-line message otherwise; user files are never deleted."""
    path = Path(directory)
    if path.exists() and not path.is_dir():
        raise ReportError(f"--report {path}: exists and is not a directory")
    if path.is_dir():
        entries = list(path.iterdir())
        index = path / "index.html"
        ours = index.is_file() and MARKER in index.read_text(encoding="utf-8", errors="replace")[:2000]
        if entries and not (ours and all(e == index or (e.suffix == ".png" and e.is_file()) for e in entries)):
            raise ReportError(f"--report {path}: directory is not empty and not a previous report; "
                              f"choose another or empty it")
    try:
        path.mkdir(parents=True, exist_ok=True)
        probe = path / ".write-test"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as exc:
        raise ReportError(f"--report {path}: cannot write there ({exc.strerror or exc})") from None
    return path


def write_report(directory: str | Path, collector: ReportCollector, inputs: ReportInputs) -> Path:
    """Write ``index.html`` and its PNG figures into ``directory`` (see :func:`prepare_directory`);
    returns the page's path."""
    out = prepare_directory(directory)
    for old in out.glob("*.png"):   # a previous report's figures (prepare_directory checked they are ours)
        old.unlink()
    last_ts = {e: float(t.t_last[t.bins - 1]) if t.bins else -math.inf for e, t in collector.traces.items()}
    incidents = incidents_from_events(inputs.events, last_ts)
    labels = inputs.labels
    by_entity: dict[str, list[IncidentSummary]] = {}
    for inc in incidents:
        by_entity.setdefault(inc.entity, []).append(inc)
    labelled_by_entity: dict[str, list[str]] = {}
    for lab in labels.incidents if labels else ():
        labelled_by_entity.setdefault(lab.entity, []).extend(lab.metrics)
    page = [f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">{MARKER}",
            f"<title>{E(inputs.title)}</title><style>{CSS}</style></head><body><main>",
            f"<h1>{E(inputs.title)}</h1>"]
    if inputs.summary:
        page.append(f'<p class="meta">{E(inputs.summary)}</p>')
    page.append('<p class="caution">Alerts inform the people on call; they do not replace their judgement. '
                "Do not wire them to automatic remediation without a review like this one.</p>")
    page.append("<h2>Incidents</h2>")
    if incidents:
        page.append(_table(["incident", "entity", "onset (UTC)", "duration", "end state", "top metrics"],
                           [[f'<a href="#{_anchor(i.incident)}">{E(i.incident)}</a>', E(i.entity),
                             rfc3339(i.start), human_duration(i.duration), E(i.state),
                             E(", ".join(m["name"] for m in i.metrics[:3]))] for i in incidents]))
    else:
        page.append('<p class="quiet"><b>Nothing fired.</b> No alert was raised on any entity during this '
                    "replay. The figures below show the metrics that moved most, for context.</p>")
    if inputs.evaluation is not None:
        page += ["<h2>Against the labels</h2>", _evaluation_html(inputs.evaluation)]
    if inputs.comparison:
        page += ["<h2>Method comparison</h2>", _comparison_html(inputs.comparison)]
    if inputs.tuning_text is not None or inputs.tuning_toml is not None:
        page.append("<h2>Recommended settings</h2>")
        if inputs.tuning_text:
            page.append(f"<pre>{E(inputs.tuning_text)}</pre>")
        if inputs.tuning_toml:
            page.append(f"<p>Put this into the configuration file:</p><pre>{E(inputs.tuning_toml)}</pre>")
    for note in inputs.missing:
        page.append(f'<p class="note">{E(note)}</p>')
    shown = list(by_entity) or sorted(
        collector.traces, key=lambda e: -float(np.nan_to_num(collector.traces[e].peak, nan=0.0).max(initial=0.0))
    )[:QUIET_ENTITIES]
    for number, entity in enumerate(shown):
        page += _entity_section(out, number, entity, collector.traces[entity], by_entity.get(entity, []),
                                labelled_by_entity.get(entity, []), labels)
    page.append(_notes(collector))
    page.append("</main></body></html>\n")
    index = out / "index.html"
    index.write_text("\n".join(page), encoding="utf-8")
    return index


def _anchor(text: str) -> str:
    return "i-" + "".join(c if c.isalnum() else "-" for c in text)


def _entity_section(out: Path, number: int, entity: str, trace: EntityTrace, incidents: list[IncidentSummary],
                    labelled: list[str], labels: Labels | None) -> list[str]:
    part = [f"<h2>{E(entity)}</h2>"]
    if not incidents:
        part.append(f"<p>No incident on this entity; peak |shift| {_num(float(np.nan_to_num(trace.peak).max(initial=0.0)), '.1f')} "
                    "residual \u03c3 over the replay.</p>")
    if not trace.detail or trace.rows == 0:
        why = (f"its detail was dropped at {rfc3339(trace.dropped_at)} to stay within the report's memory bound"
               if not trace.detail else "no scored vectors (it was still warming up)")
        part.append(f'<p class="note">No figures for this entity: {E(why)}.</p>')
    else:
        metrics = choose_metrics(trace, incidents, labelled, HEATMAP_METRICS)
        view = entity_view(trace, entity, metrics, incidents, labels)
        heat = f"entity-{number:03d}-heatmap.png"
        draw_heatmap(view, out / heat, trace.threshold, emphasise=(m["name"] for inc in incidents for m in inc.metrics))
        marks = [w for w, present in (("bold: the incidents' metrics", bool(incidents)),
                                      ("green: labelled metrics", bool(view.labelled))) if present]
        part.append(f'<figure><img src="{heat}" alt="shift heatmap of {E(entity)}"><figcaption>Signed shift of '
                    f"the top metrics in residual sigmas (red up, blue down; the colour scale is linear up to "
                    f"\u00b1\u03bb = {trace.threshold:.2f} and logarithmic beyond; grey: not scored, i.e. "
                    f"missing or a metric the baseline explains by itself{'; ' if marks else ''}"
                    f"{'; '.join(marks)}). {_windows_caption(view)} Each column is {trace.width} scored "
                    f"vector(s), showing the largest |shift| among them; a single vector far outside its band "
                    f"does not alert by itself.</figcaption></figure>")
        traces = f"entity-{number:03d}-traces.png"
        top = metrics[:TRACE_METRICS]
        draw_traces(view, out / traces, top)
        part.append(f'<figure><img src="{traces}" alt="traces of {E(entity)}"><figcaption>'
                    f"{_band_caption(trace, view)}</figcaption></figure>")
        for k, inc in enumerate(incidents):
            names = _incident_metrics(inc, view)
            context = max(inc.duration, 1800.0)
            zoom = f"entity-{number:03d}-incident-{k:02d}.png"
            draw_traces(view, out / zoom, names, span=(inc.start - context, inc.end + context / 2),
                        title=f"incident {short_name(inc.incident, 60)}")
            part += _incident_section(inc, set(labelled), zoom, _band_caption(trace, view))
        return part
    for inc in incidents:
        part += _incident_section(inc, set(labelled), None, "")
    return part


def _incident_metrics(inc: IncidentSummary, view: EntityView) -> list[str]:
    """What an incident's zoomed traces show: its metrics, then those of labelled faults it overlaps."""
    names = dict.fromkeys(m["name"] for m in inc.metrics)
    for w, lab in zip(view.labelled, view.labelled_metrics):
        if w.start <= inc.end and inc.start <= w.end:
            names.update(dict.fromkeys(lab))
    return [n for n in names if n in view.metrics][:TRACE_METRICS] or view.metrics[:TRACE_METRICS]


def _band_caption(trace: EntityTrace, view: EntityView) -> str:
    observed = ("Observed (blue; its min\u2013max range where a step holds several vectors, here "
                f"{trace.width})" if trace.width > 1 else "Observed (blue)")
    k, m = trace.confirm
    return (f"{observed}, the baseline's expected value (orange) and the detection band (grey): "
            f"expected \u00b1 \u03bb = {trace.threshold:.2f} residual sigmas of the metric, mapped to its own "
            f"units. Outside the band the detector considers a shift; it alerts after {k} of {m} such "
            f"vectors. {_windows_caption(view)}")


def _windows_caption(view: EntityView) -> str:
    parts = (["shaded: alerted incidents"] if view.incidents else []) + \
        (["hatched bar along the top (dashed edges in traces): labelled faults"] if view.labelled else []) + \
        (["light blue: labelled traffic surges, where nothing should fire"] if view.surges else [])
    text = "; ".join(parts)
    return f"{text[:1].upper()}{text[1:]}." if parts else ""


def _incident_section(inc: IncidentSummary, labelled: set[str], figure: str | None, caption: str) -> list[str]:
    state = {"open": "still firing at the end of the replay", "resolved": "resolved",
             "adapted": "accepted as the new normal (adapted)"}.get(inc.state, inc.state)
    part = [f'<h3 id="{_anchor(inc.incident)}">Incident {E(inc.incident)}</h3>',
            f"<p>Onset <b>{rfc3339(inc.start)}</b>, duration <b>{human_duration(inc.duration)}</b>, "
            f"{E(state)}. Metrics ranked by their peak |shift| over the incident's events, with the "
            "observed and expected values at that peak:</p>",
            _metric_table(inc, labelled)]
    if figure:
        part.append(f'<figure><img src="{figure}" alt="traces around incident {E(inc.incident)}">'
                    f"<figcaption>The incident's metrics (and those of a labelled fault it overlaps) around its "
                    f"window. {caption}</figcaption></figure>")
    if inc.window_metrics:
        part.append(_window_table(inc.window_metrics))
    return part


def _notes(collector: ReportCollector) -> str:
    dropped = [e for e, t in collector.traces.items() if not t.detail]
    text = ("<h2>How to read this</h2><p>Shifts are the detector's debiased estimates in residual sigmas "
            "(how far a metric moved against the shared pattern of its entity). The expected value is the "
            "low-rank baseline's prediction for that vector; the band is expected \u00b1 \u03bb d, with "
            "\u03bb the detector's threshold (from <code>model.false_alarm</code>) and d the metric's "
            "residual scale. Times are UTC (RFC 3339).</p>"
            f"<p>Memory: figures keep at most {collector.max_bins:,} time steps per entity (longer replays "
            f"merge neighbouring steps) and {collector.max_cells:,} values in all.")
    if dropped:
        more = " \u2026" if len(dropped) > 20 else ""
        text += (f" The detail of {len(dropped)} entit{'y' if len(dropped) == 1 else 'ies'} with no incident "
                 f"or smaller shifts was dropped to stay within that bound: "
                 f"{E(', '.join(sorted(dropped)[:20]))}{more}.")
    return text + "</p>"


def replay_with_report(path: str | Path, config: "Config", *, directory: str | Path, events_path: str | None,
                       dead_letter_path: str | None = None, labels_path: str | None = None,
                       budget_per_day: float | None = None, quiet_until: str | None = None,
                       progress: bool = True) -> tuple["ReplaySummary", Path]:
    """``shiftsieve replay INPUT --events OUT --report DIR [--labels L] [--budget B] [--quiet-until TS]``:
    the replay, then the page.  With labels: the labelled windows, the incident-level scores and
    the method comparison (:mod:`.compare`); with a budget: the recommended settings (:mod:`.tune`).
    Every argument is checked before the replay runs, so a mistake costs no waiting."""
    from .compare import compare_methods
    from .evaluate import evaluate, load_labels
    from .replay import replay
    from .tune import TuneError, format_tuning, parse_time, toml_fragment, tune

    if quiet_until is not None and budget_per_day is None:
        raise ReportError("--quiet-until goes with --budget")
    out = prepare_directory(directory)
    labels = load_labels(labels_path) if labels_path else None
    try:
        quiet = parse_time(quiet_until) if quiet_until is not None else None
    except TuneError as exc:
        raise ReportError(str(exc)) from None
    collector = ReportCollector()
    events: list[dict] = []
    summary = replay(path, config, events_path=events_path, dead_letter_path=dead_letter_path,
                     sinks=[events.append], observers=[collector], progress=progress)
    inputs = ReportInputs(title=f"Incident review: {Path(path).name}", events=events,
                          summary=f"{Path(path).name}: {summary.format()}", labels=labels)
    if labels is not None:
        inputs.evaluation = evaluate(events, labels, vectors=summary.vectors)
        inputs.comparison = compare_methods(path, config, labels)
    if budget_per_day is not None:
        try:
            result = tune(path, config, budget_per_day=budget_per_day, quiet_until=quiet, labels=labels)
        except TuneError as exc:
            raise ReportError(str(exc)) from None
        inputs.tuning_text = format_tuning(result)
        if result.recommended is not None:
            inputs.tuning_toml = toml_fragment(result)
        else:
            inputs.missing.append(f"No setting tried keeps alerts within {budget_per_day:g} per day on the quiet "
                                  "period: there is no configuration fragment to recommend.")
    return summary, write_report(out, collector, inputs)
