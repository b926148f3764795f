"""Assembly: decoded vectors of one entity -> the dense arrays its detector consumes.

Each entity keeps the ordered list of metric names it has seen; a batch of
vectors becomes ``X`` (B, n) with NaN where a metric is missing.  Producers
almost always send the same metrics in the same order, so the column positions
of a key sequence are cached and a row is filled with one numpy assignment.
New names extend the entity (the detector learns them before scoring them);
names absent for ``drop_after`` samples are dropped once they are quiet.
"""

from __future__ import annotations

import fnmatch
import math
import re
from dataclasses import dataclass

import numpy as np

from shiftsieve.models.decision import QUIET
from shiftsieve.models.detector import DetectorConfig, EntityDetector

from .decode import Layout, Vector


_SERIES = re.compile(r'^[^{}]*\{(.*)\}$')
_LABEL = re.compile(r'\s*([A-Za-z_][A-Za-z0-9_]*)\s*=\s*"((?:[^"\\]|\\.)*)"\s*(?:,|$)')


def metric_labels(name: str) -> dict[str, str]:
    """Labels written into a metric name in Prometheus series notation.

    ``upstream_lat_ms{dependency="payments",quantile="0.99"}`` ->
    ``{"dependency": "payments", "quantile": "0.99"}``; a plain name has none.  This is how
    a vector message, whose ``labels`` describe the entity, says what each metric belongs to.
    """
    match = _SERIES.match(name)
    if not match:
        return {}
    return {key: value for key, value in _LABEL.findall(match.group(1))}


@dataclass(frozen=True)
class MetricRules:
    """Name-based metric settings: which metrics use a log scale and which form groups.

    Groups come from name patterns (``groups``: group name -> glob patterns) and from
    labels (``group_by``: label keys; the metrics sharing a value of such a label, in the
    name's series notation, form the group ``key=value``).
    """

    log_patterns: tuple[str, ...] = ("*_ms", "*_seconds", "*_bytes")
    groups: tuple[tuple[str, tuple[str, ...]], ...] = ()
    group_by: tuple[str, ...] = ()
    max_metrics: int = 5000
    drop_after: int = 1440

    def log_scale(self, names: list[str]) -> np.ndarray:
        """Metrics whose base name (without a ``{...}`` label set) matches a log pattern."""
        bases = [n.split("{", 1)[0] for n in names]
        return np.array([any(fnmatch.fnmatchcase(b, p) for p in self.log_patterns) for b in bases], dtype=bool)

    def group_members(self, names: list[str]) -> tuple[list[str], list[np.ndarray]]:
        """Groups with at least two members among ``names``: their labels and member indices."""
        found: dict[str, list[int]] = {}
        for label, patterns in self.groups:
            found[label] = [i for i, n in enumerate(names) if any(fnmatch.fnmatchcase(n, p) for p in patterns)]
        if self.group_by:
            for i, name in enumerate(names):
                labels = metric_labels(name)
                for key in self.group_by:
                    if key in labels:
                        found.setdefault(f"{key}={labels[key]}", []).append(i)
        chosen = [(label, idx) for label, idx in found.items() if len(idx) >= 2]
        return [label for label, _ in chosen], [np.array(idx, dtype=np.int64) for _, idx in chosen]


class EntityModel:
    """One entity's model: its metric names and columns, its detector, and what assembling its vectors needs."""

    def __init__(self, entity: str, rules: MetricRules, config: DetectorConfig) -> None:
        self.entity = entity
        self.rules = rules
        self.names: list[str] = []
        self.index: dict[str, int] = {}
        self.detector = EntityDetector(0, np.zeros(0, bool), config)
        self.group_labels: list[str] = []
        self._positions: dict[Layout, tuple[np.ndarray, bool]] = {}
        self._last_seen = np.zeros(0, dtype=np.int64)
        self.ignored_metrics = 0
        self.last_ts = float("-inf")
        self.last_residual_norm: float | None = None
        self.labels: dict[str, str] = {}

    def to_state(self) -> dict:
        """Everything the stream holds, as plain values and numpy arrays (the detector's under
        ``detector``, :meth:`EntityDetector.to_state`).  ``rules`` and the detector's settings are
        not state; the name index and the layout cache are derived.  ``last_ts`` and
        ``last_residual_norm`` are None when unknown (before the first vector or batch)."""
        return {"entity": self.entity, "names": list(self.names), "group_labels": list(self.group_labels),
                "labels": dict(self.labels), "last_ts": _finite_or_none(self.last_ts),
                "last_residual_norm": _finite_or_none(self.last_residual_norm),
                "ignored_metrics": self.ignored_metrics, "last_seen": self._last_seen,
                "detector": self.detector.to_state()}

    @classmethod
    def from_state(cls, state: dict, rules: MetricRules, config: DetectorConfig) -> EntityModel:
        """Inverse of :meth:`to_state`, with today's ``rules`` and detector settings ``config``."""
        stream = cls(state["entity"], rules, config)
        stream.detector = EntityDetector.from_state(state["detector"], config)
        stream.names = list(state["names"])
        stream.index = {name: i for i, name in enumerate(stream.names)}
        stream.group_labels = list(state["group_labels"])
        stream._last_seen = state["last_seen"]
        stream.ignored_metrics = state["ignored_metrics"]
        stream.last_ts = float("-inf") if state["last_ts"] is None else float(state["last_ts"])
        residual_norm = state["last_residual_norm"]
        stream.last_residual_norm = None if residual_norm is None else float(residual_norm)
        stream.labels = dict(state["labels"])
        return stream

    def assemble(self, vectors: list[Vector]) -> tuple[np.ndarray, np.ndarray]:
        """Dense ``X`` (B, n) and ``ts`` (B,) for a batch of this entity's vectors, in order.

        Rows are grouped by their shared name layout (producers use one or a few) and each
        group's value arrays are stacked at once; when a layout is exactly the entity's columns,
        the stack is ``X`` itself.
        """
        layouts: dict[Layout, list[int]] = {}
        for row, vector in enumerate(vectors):
            layouts.setdefault(vector.layout, []).append(row)
        self._admit_new_names(layouts)
        X = None
        for layout, rows in layouts.items():
            pos, identity = self._positions.get(layout) or self._positions_for(layout)
            block = np.stack([vectors[r].values for r in rows])
            if identity and len(rows) == len(vectors):
                X = block   # the common case: one layout, the entity's own column order
                break
            if X is None:
                X = np.full((len(vectors), len(self.names)), np.nan)
            known = pos >= 0
            if not known.all():   # names beyond max_metrics
                pos, block = pos[known], block[:, known]
            X[np.ix_(rows, pos)] = block
        ts = np.array([v.ts for v in vectors], dtype=float)
        self.last_ts = max(self.last_ts, float(ts.max()))
        if vectors[-1].labels:
            self.labels = vectors[-1].labels
        return X, ts

    def _positions_for(self, layout: Layout) -> tuple[np.ndarray, bool]:
        """Column of each name (-1: beyond max_metrics), and whether that is exactly 0..n-1."""
        pos = np.array([self.index.get(k, -1) for k in layout.names], dtype=np.int64)
        found = (pos, pos.size == len(self.names) and bool((pos == np.arange(pos.size)).all()))
        if len(self._positions) < 64:   # bounded cache: producers use few key layouts
            self._positions[layout] = found
        return found

    def _admit_new_names(self, layouts: dict[Layout, list[int]]) -> None:
        fresh: dict[str, None] = {}
        for layout in layouts:
            if layout not in self._positions:
                fresh.update((name, None) for name in layout.names if name not in self.index)
        if not fresh:
            return
        room = self.rules.max_metrics - len(self.names)
        new = list(fresh)[: max(room, 0)]
        self.ignored_metrics += len(fresh) - len(new)
        if not new:
            return
        start = len(self.names)
        self.names.extend(new)
        self.index.update((name, start + i) for i, name in enumerate(new))
        self._positions.clear()
        self.detector.extend(self.rules.log_scale(new))
        self._last_seen = np.concatenate([self._last_seen, np.full(len(new), self.detector.samples)])
        self._refresh_groups()

    def rewarm(self) -> None:
        """Start the detector over with the same metrics: it collects a new warm-up."""
        self.detector = EntityDetector(len(self.names), self.rules.log_scale(self.names), self.detector.config)
        self._refresh_groups()
        self._last_seen[:] = 0
        self.last_residual_norm = None

    @property
    def column_names(self) -> list[str]:
        """Names of the detector's decision columns: the metrics, then ``group:<label>`` per group."""
        return self.names + [f"group:{label}" for label in self.group_labels]

    def _refresh_groups(self) -> None:
        self.group_labels, members = self.rules.group_members(self.names)
        self.detector.set_groups(members)

    def observe(self, X: np.ndarray) -> None:
        """Record which metrics were present and drop those absent too long (only when quiet)."""
        present = np.isfinite(X).any(axis=0)
        self._last_seen[present] = self.detector.samples
        stale = (self.detector.samples - self._last_seen > self.rules.drop_after) & \
            (self.detector.tracker.state[: len(self.names)] == QUIET)
        if stale.any() and not self.detector.warming_up:
            keep = np.flatnonzero(~stale)
            self.detector.keep(keep)
            self.names = [self.names[i] for i in keep]
            self.index = {n: i for i, n in enumerate(self.names)}
            self._last_seen = self._last_seen[keep]
            self._positions.clear()
            self._refresh_groups()


def _finite_or_none(x: float | None) -> float | None:
    return float(x) if x is not None and math.isfinite(x) else None
