"""The engine: routes decoded vectors to their entity, micro-batches them, runs the
detector and turns its transitions into alert events for the sinks.

``source -> decode -> [engine: assemble -> model -> decide] -> sinks``.  The
engine is the same for replay and for the live service; only the batching
differs (replay fills batches of ``batch_size`` vectors per entity, the service
flushes after every poll).

Joint localisation: per entity with an open incident the engine keeps the incident's window
of residual rows (:class:`IncidentWindows`) and every event of the incident carries
``window_metrics``, the metrics that moved together over the window so far
(:meth:`EntityDetector.localise_window`; the field is described in :mod:`.events`).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Callable, Iterable

import numpy as np

from shiftsieve.models.detector import BatchResult, DetectorConfig

from .assemble import EntityStream, MetricRules
from .config import Config
from .decode import Vector
from .events import events_from_transitions, window_metrics

EventSink = Callable[[dict], None]
#: Called after each successfully scored batch with (stream, ts, X, result), result's columns
#: matching stream.names (e.g. the incident-review report); nothing runs when there are none.
BatchObserver = Callable[[EntityStream, np.ndarray, np.ndarray, BatchResult], None]


@dataclass
class EngineCounts:
    """Bookkeeping that must add up: every vector fed is processed, pending or rejected."""

    vectors: int = 0
    processed: int = 0
    rejected_entity_limit: int = 0
    rejected_out_of_order: int = 0
    solver_iterations: int = 0
    solver_unconverged: int = 0
    events: int = 0
    incidents: int = 0
    rewarmed: int = 0
    localisation_failed: int = 0   # incident windows whose joint localisation failed (events go out without it)


class _Window:
    """One open incident's residual rows (at most ``max_rows``, the first ones), with the metric
    names their columns stand for."""

    def __init__(self, names: list[str], max_rows: int) -> None:
        self.names = list(names)
        self.max_rows = max_rows
        self.blocks: list[np.ndarray] = []
        self.rows = 0

    def add(self, Y: np.ndarray, names: list[str]) -> None:
        if names != self.names:   # metrics came or went during the incident: columns follow names
            where = {name: j for j, name in enumerate(self.names)}
            old = np.array([where.get(name, -1) for name in names], dtype=np.int64)
            self.blocks = [np.where(old >= 0, b[:, old], 0.0) for b in self.blocks]   # new metrics: 0
            self.names = list(names)
        room = self.max_rows - self.rows
        if room > 0 and Y.shape[0]:
            self.blocks.append(Y[:room].copy())
            self.rows += min(room, Y.shape[0])

    def matrix(self) -> np.ndarray:
        return np.vstack(self.blocks)


class IncidentWindows:
    """The windows of joint localisation: per entity with an open incident, its residual rows
    (:meth:`BatchResult.window_residuals`) from ``lead`` samples before the onset (the first
    samples of a confirmed shift lie up to ``confirm_m - 1`` samples before it fires) up to
    ``max_rows`` rows; every event of the incident gets the ``top`` columns of both rankings.

    Memory is bounded: ``max_rows`` rows per open incident, and the last ``lead`` raw rows only
    for entities with a pending column (an onset can only begin where something is active).
    Windows are transient (not snapshotted): an incident restored from a snapshot starts a new
    window at its next batch.  They go when the incident closes, or the entity is dropped,
    adopted or warmed up again.
    """

    def __init__(self, max_rows: int = 120, top: int = 10, lead: int = 4) -> None:
        if max_rows < 1 or top < 1 or lead < 0:
            raise ValueError(f"need max_rows >= 1, top >= 1, lead >= 0; got {max_rows}, {top}, {lead}")
        self.max_rows, self.top, self.lead = max_rows, top, lead
        self._open: dict[str, _Window] = {}
        self._tails: dict[str, np.ndarray] = {}   # raw rows before the batch, pending entities only

    def __len__(self) -> int:
        return len(self._open)

    def forget(self, entity: str) -> None:
        self._open.pop(entity, None)
        self._tails.pop(entity, None)

    def localise(self, stream: EntityStream, X: np.ndarray, result: BatchResult) -> list[dict | None] | None:
        """``window_metrics`` for each of the batch's transitions (None: nothing to add to any)."""
        entity, detector = stream.entity, stream.detector
        window = self._open.pop(entity, None)
        tail = self._tails.pop(entity, None)
        if self.lead and detector.tracker.state.any():
            self._tails[entity] = self._next_tail(tail, X)
        if window is None and detector.tracker.incident is None and not result.transitions:
            return None   # the common case: no incident, nothing to do
        Y = result.window_residuals(X)
        names, start, fields = stream.names, 0, []
        for t in result.transitions:
            if t.onset or window is None:   # a new incident (or one restored without its window)
                window = _Window(names, self.max_rows)
                start = max(t.row - self.lead, 0) if t.onset else 0
                before = self.lead - t.row
                if t.onset and before > 0 and tail is not None and tail.shape[1] == X.shape[1]:
                    window.add(result.window_residuals(tail[-before:]), names)
            window.add(Y[start:t.row + 1], names)
            start = t.row + 1
            fields.append(window_metrics(detector.localise_window(window.matrix()), stream.column_names, self.top))
            if t.kind == "resolved":
                window = None
        if detector.tracker.incident is not None:
            window = window or _Window(names, self.max_rows)
            window.add(Y[start:], names)
            self._open[entity] = window
        return fields

    def _next_tail(self, tail: np.ndarray | None, X: np.ndarray) -> np.ndarray:
        if tail is not None and X.shape[0] < self.lead and tail.shape[1] == X.shape[1]:
            X = np.vstack([tail, X])
        return X[-self.lead:].copy()


class Engine:
    """Many entities, one process; each entity gets its own detector."""

    def __init__(self, detector_config: DetectorConfig, rules: MetricRules, *, batch_size: int = 64,
                 max_entities: int = 100_000, sinks: Iterable[EventSink] = (),
                 observers: Iterable[BatchObserver] = (), window_rows: int = 120) -> None:
        self.detector_config = detector_config
        self.rules = rules
        self.batch_size = batch_size
        self.max_entities = max_entities
        self.sinks = list(sinks)
        self.observers = list(observers)
        # Joint localisation over incident windows (window_rows = 0: off).
        self.windows = IncidentWindows(window_rows, lead=detector_config.decision.confirm_m - 1) \
            if window_rows else None
        self.entities: dict[str, EntityStream] = {}
        self._pending: dict[str, list[Vector]] = {}
        self.counts = EngineCounts()
        self.touched: set[str] = set()   # entities that processed vectors since the caller last cleared it
        self.touched_since_snapshot: set[str] = set()
        self.rewarmed: list[tuple[str, str]] = []   # (entity, why) since the caller last cleared it
        self._recent: dict[str, None] = {}   # entities, least recently fed first
        self.queued = 0   # vectors fed and not yet run

    @classmethod
    def from_config(cls, config: Config, **kwargs) -> "Engine":
        e = config.engine
        rules = MetricRules(log_patterns=tuple(config.model.log_metrics),
                            groups=tuple((k, tuple(v)) for k, v in config.model.groups.items()),
                            group_by=tuple(config.model.group_by),
                            max_metrics=e.max_metrics, drop_after=e.drop_after)
        return cls(config.detector_config(), rules, batch_size=e.batch_size, max_entities=e.max_entities, **kwargs)

    def feed(self, vector: Vector) -> str | None:
        """Queue one vector; its entity's batch runs when it is full.

        Returns ``None``, or the reason the vector was refused (``entity_limit``,
        ``out_of_order``) so the caller can dead-letter it.
        """
        self.counts.vectors += 1
        stream = self.entities.get(vector.entity)
        if stream is None:
            if len(self.entities) >= self.max_entities:
                self.counts.rejected_entity_limit += 1
                return "entity_limit"
            stream = self.entities[vector.entity] = EntityStream(vector.entity, self.rules, self.detector_config)
            self._pending[vector.entity] = []
        pending = self._pending[vector.entity]
        if not pending:   # once per batch, not per vector: batches are how recency is counted
            self._recent.pop(vector.entity, None)
            self._recent[vector.entity] = None
        last = pending[-1].ts if pending else stream.last_ts
        if vector.ts <= last:   # duplicates and late samples would corrupt the baseline
            self.counts.rejected_out_of_order += 1
            return "out_of_order"
        pending.append(vector)
        self.queued += 1
        if len(pending) >= self.batch_size:
            self._run(stream)
        return None

    def adopt(self, stream: EntityStream) -> None:
        """Take over an entity restored from a snapshot."""
        self.entities[stream.entity] = stream
        self._pending[stream.entity] = []
        self._recent[stream.entity] = None
        if self.windows is not None:
            self.windows.forget(stream.entity)

    def drop(self, entity: str) -> None:
        """Forget an entity (its partition moved to another process); pending vectors must be flushed first."""
        if self._pending.get(entity):
            raise RuntimeError(f"entity {entity!r} still has unprocessed vectors: flush before dropping it")
        self.entities.pop(entity, None)
        self._pending.pop(entity, None)
        self._recent.pop(entity, None)
        self.touched.discard(entity)
        self.touched_since_snapshot.discard(entity)
        if self.windows is not None:
            self.windows.forget(entity)

    def least_recent(self, keep: int) -> list[str]:
        """The entities beyond the ``keep`` most recently fed, least recent first: what to evict
        to hold at most ``keep`` models in memory."""
        return list(itertools.islice(self._recent, max(len(self.entities) - keep, 0)))

    def flush(self) -> None:
        """Run every partial batch (end of input; in the service every engine.max_delay_seconds)."""
        for entity, pending in self._pending.items():
            if pending:
                self._run(self.entities[entity])

    def _run(self, stream: EntityStream) -> None:
        vectors = self._pending[stream.entity]
        self._pending[stream.entity] = []
        self.queued -= len(vectors)
        X, ts = stream.assemble(vectors)
        self.touched.add(stream.entity)
        self.touched_since_snapshot.add(stream.entity)
        self.counts.processed += len(vectors)
        try:
            result = stream.detector.process(X, ts)
        except np.linalg.LinAlgError as exc:   # e.g. an SVD that did not converge on degenerate data
            self._rewarm(stream, f"linear algebra failed ({exc})")
            return
        if not (stream.detector.is_finite() and np.isfinite(result.shift_sigma).all()):
            self._rewarm(stream, "non-finite model values")   # the batch's transitions are not trusted
            return
        # Everything that names columns runs before observe(), which may drop stale metrics' columns.
        for observer in self.observers:
            observer(stream, ts, X, result)
        located = self._localise(stream, X, result) if self.windows is not None else None
        stream.last_residual_norm = float(result.residual_norm[-1])
        self.counts.solver_iterations += int(result.n_iter.sum())
        self.counts.solver_unconverged += int(np.count_nonzero(~result.converged))
        for event in events_from_transitions(stream, result.transitions, ts, located):
            self.counts.events += 1
            if event.get("onset"):   # an incident opens once (counted, not kept: the service runs for ever)
                self.counts.incidents += 1
            for sink in self.sinks:
                sink(event)
        stream.observe(X)

    def _localise(self, stream: EntityStream, X: np.ndarray, result: BatchResult) -> list[dict | None] | None:
        """The batch's ``window_metrics``; a failed factorisation costs the window, never the batch."""
        try:
            return self.windows.localise(stream, X, result)
        except np.linalg.LinAlgError:
            self.windows.forget(stream.entity)
            self.counts.localisation_failed += 1
            return None

    def _rewarm(self, stream: EntityStream, why: str) -> None:
        """A model that went bad is never scored with: the entity warms up again, and says so."""
        stream.rewarm()
        if self.windows is not None:
            self.windows.forget(stream.entity)
        self.counts.rewarmed += 1
        self.rewarmed.append((stream.entity, why))
