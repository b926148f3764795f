"""Per-entity data the report's figures need, kept by an engine observer in bounded memory.

:class:`ReportCollector` is an engine observer (:data:`..engine.BatchObserver`) holding one
:class:`EntityTrace` per entity; it knows nothing of how the report is drawn.

Memory bound.  Each entity's record is *time-binned*: a bin covers ``width`` consecutive
rows and holds, per metric, six float32 channels (the signed shift with the largest
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

Rows the detector did not score are kept too, with their observed values and NaN in the other
channels: the warm-up (nothing scored yet), and per metric a new metric's probation, a metric
above :attr:`EntityDetector.MAX_SCORED_LEVERAGE` (the baseline explains it by itself).  So the
figures show what was never judged as such instead of leaving it out (:func:`.summary.unscored`).

>>> import numpy as np
>>> trace = EntityTrace(max_bins=4)
>>> rows = np.zeros((CHANNELS, 10, 1), np.float32); rows[SHIFT, :, 0] = np.arange(10) - 6.0
>>> trace.add(["cpu"], np.arange(10.0), rows)
>>> trace.width, trace.bins, trace.series()[1][SHIFT, :, 0].tolist()
(4, 2, [-6.0, -2.0, 3.0])
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Sequence

import numpy as np

from shiftsieve.models.batch_result import BatchResult
from shiftsieve.models.normaliser import to_metric_units

if TYPE_CHECKING:
    from ..assemble import EntityModel

#: Channels of a bin, in this order.
SHIFT, OBSERVED_LO, OBSERVED_HI, EXPECTED, BAND_LO, BAND_HI = range(6)
CHANNELS = 6


def merge_bins(block: np.ndarray, axis: int) -> np.ndarray:
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
        self.rows = 0                          # rows recorded, warm-up included
        self.scored = 0                        # rows the detector scored (after the warm-up)
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

    def add(self, names: Sequence[str], ts: np.ndarray, rows: np.ndarray, scored: int | None = None) -> None:
        """Append rows ``rows`` (CHANNELS, B, len(names)) with timestamps ``ts`` (B,), of which the
        last ``scored`` (default: all) were scored."""
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
        self.scored += rows.shape[1] if scored is None else scored
        if not self.detail:
            return
        pending = np.concatenate([self._staged, full], axis=1)
        pending_ts = np.concatenate([self._staged_ts, ts])
        while True:
            k = min(pending.shape[1] // self.width, self.max_bins - self.bins)
            if k:
                used = k * self.width
                block = pending[:, :used].reshape(CHANNELS, k, self.width, -1)
                self._append(merge_bins(block, axis=2), pending_ts[:used:self.width],
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
        self.data[:, :half] = merge_bins(pairs, axis=2)
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

    def last_ts(self) -> float:
        """Timestamp of the last row recorded (NaN when none is, or the detail was dropped)."""
        if self._staged_ts.size:
            return float(self._staged_ts[-1])
        return float(self.t_last[self.bins - 1]) if self.bins else math.nan

    def series(self) -> tuple[np.ndarray, np.ndarray]:
        """Bin start times (k,) and values (CHANNELS, k, n), the rows still staged as a last,
        shorter bin."""
        t = self.t_first[: self.bins]
        data = self.data[:, : self.bins]
        if self._staged.shape[1]:
            t = np.concatenate([t, self._staged_ts[:1]])
            data = np.concatenate([data, merge_bins(self._staged[:, None], axis=2)], axis=1)
        return t, data


def batch_rows(stream: "EntityModel", X: np.ndarray, result: BatchResult) -> tuple[int, np.ndarray]:
    """How many of a batch's rows were scored (the last ones; the others built the warm-up), and
    the channels of all its rows (CHANNELS, B, n) in metric units.

    Warm-up rows have only their observed values.  Shifts of metrics the detector does not score
    (not yet ``warmup`` samples, or leverage above :attr:`EntityDetector.MAX_SCORED_LEVERAGE`) and
    of missing values are NaN, so the report ranks only what the detector judges and can mark the rest.
    """
    det = stream.detector
    B = X.shape[0]
    u = result.units
    rows = np.full((CHANNELS,) + X.shape, np.nan, np.float32)
    rows[OBSERVED_LO] = rows[OBSERVED_HI] = X
    if det.warming_up or u is None:
        return 0, rows
    count = min(B, det.samples - det.config.warmup)
    scored_rows = slice(B - count, B)
    Xs = X[scored_rows]
    E = result.coords[scored_rows] @ u.basis.T
    half = det.lam * u.residual_scale
    scored = det.scored_columns()[: X.shape[1]]   # the metric columns (groups come after them)
    rows[SHIFT, scored_rows] = np.where(scored & np.isfinite(Xs), result.shift_sigma[scored_rows], np.nan)
    rows[EXPECTED, scored_rows] = to_metric_units(E, u.loc, u.scale, u.log_mask)
    rows[BAND_LO, scored_rows] = to_metric_units(E - half, u.loc, u.scale, u.log_mask)
    rows[BAND_HI, scored_rows] = to_metric_units(E + half, u.loc, u.scale, u.log_mask)
    return count, rows


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

    def __call__(self, stream: "EntityModel", ts: np.ndarray, X: np.ndarray, result: BatchResult) -> None:
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
        trace.add(stream.names, ts, rows, scored)
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
