"""The engine: routes decoded vectors to their entity, micro-batches them, runs the
detector and turns its transitions into alert events for the sinks.

``source -> decode -> [engine: assemble -> model -> decide] -> sinks``.  The
engine is the same for every command (:mod:`.pipeline` feeds it): an entity's batch runs
when it holds ``batch_size`` vectors, and :meth:`Engine.flush` runs the partial ones (replay
at the end of its input; the service when its source is caught up, and at most every
``engine.max_delay_seconds`` while it is behind).  Per-entity state is one record each in
:attr:`Engine.registry` (:mod:`.registry`).

Joint localisation: per entity with an open incident the engine keeps the incident's window
of residual rows (:class:`IncidentWindows`) and every event of the incident carries
``window_metrics``, the metrics that moved together over the window so far
(:meth:`EntityDetector.localise_window`; the field is described in :mod:`.events`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterable

import numpy as np

from shiftsieve.models.batch_result import BatchResult
from shiftsieve.models.detector import DetectorConfig

from .assemble import EntityModel, MetricRules
from .config import Config, EngineSection
from .decode import Vector
from .events import events_from_transitions, window_metrics
from .registry import EntityRecord, EntityRegistry, IncidentWindow
from .reorder import OrderRefusal, order_refusal

EventSink = Callable[[dict], None]
#: Called after each successfully scored batch with (stream, ts, X, result), result's columns
#: matching stream.names (e.g. the incident-review report); nothing runs when there are none.
BatchObserver = Callable[[EntityModel, np.ndarray, np.ndarray, BatchResult], None]


@dataclass
class EngineCounts:
    """Bookkeeping that must add up: every vector fed is processed, pending or rejected."""

    vectors: int = 0
    processed: int = 0
    rejected_entity_limit: int = 0
    rejected_out_of_order: int = 0   # older than the entity's last accepted vector
    rejected_duplicate_ts: int = 0   # at the same time as the entity's last accepted vector
    solver_iterations: int = 0
    solver_unconverged: int = 0
    events: int = 0
    incidents: int = 0
    rewarmed: int = 0
    localisation_failed: int = 0   # incident windows whose joint localisation failed (events go out without it)


class IncidentWindows:
    """The windows of joint localisation: per entity with an open incident, its residual rows
    (:meth:`BatchResult.window_residuals`) from ``lead`` samples before the onset (the first
    samples of a confirmed shift lie up to ``confirm_m - 1`` samples before it fires) up to
    ``max_rows`` rows; every event of the incident gets the ``top`` columns of both rankings.

    The rows live on the entity's record (``window``, and ``tail``: the last ``lead`` raw rows,
    kept only for entities with a pending column, since an onset can only begin where something
    is active), so memory is bounded by ``max_rows`` rows per open incident.  Windows are
    transient (not snapshotted): an incident restored from a snapshot starts a new window at its
    next batch.  They go when the incident closes, or the entity is dropped, adopted or warmed
    up again.
    """

    def __init__(self, max_rows: int = 120, top: int = 10, lead: int = 4) -> None:
        if max_rows < 1 or top < 1 or lead < 0:
            raise ValueError(f"need max_rows >= 1, top >= 1, lead >= 0; got {max_rows}, {top}, {lead}")
        self.max_rows, self.top, self.lead = max_rows, top, lead

    @staticmethod
    def forget(record: EntityRecord) -> None:
        record.window = None
        record.tail = None

    def localise(self, record: EntityRecord, X: np.ndarray, result: BatchResult) -> list[dict | None] | None:
        """``window_metrics`` for each of the batch's transitions (None: nothing to add to any)."""
        stream = record.model
        detector = stream.detector
        window, tail = record.window, record.tail
        record.window = record.tail = None
        if self.lead and detector.tracker.state.any():
            record.tail = self._next_tail(tail, X)
        if window is None and detector.tracker.incident is None and not result.transitions:
            return None   # the common case: no incident, nothing to do
        Y = result.window_residuals(X)
        names, start, fields = stream.names, 0, []
        for t in result.transitions:
            if t.onset or window is None:   # a new incident (or one restored without its window)
                window = IncidentWindow(list(names), self.max_rows)
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
            window = window or IncidentWindow(list(names), self.max_rows)
            window.add(Y[start:], names)
            record.window = window
        return fields

    def _next_tail(self, tail: np.ndarray | None, X: np.ndarray) -> np.ndarray:
        if tail is not None and X.shape[0] < self.lead and tail.shape[1] == X.shape[1]:
            X = np.vstack([tail, X])
        return X[-self.lead:].copy()


class Engine:
    """Many entities, one process; each entity gets its own detector and one record
    (:class:`.registry.EntityRecord`) in :attr:`registry`."""

    def __init__(self, detector_config: DetectorConfig, rules: MetricRules, *,
                 batch_size: int = EngineSection.batch_size, max_entities: int = EngineSection.max_entities, sinks: Iterable[EventSink] = (),
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
        self.registry = EntityRegistry()
        self.entities = self.registry.models   # entity -> EntityModel, read-only
        self.counts = EngineCounts()
        self.rewarmed: list[tuple[str, str]] = []   # (entity, why) since the caller last cleared it
        self.queued = 0   # vectors fed and not yet run
        self.order_refusals: dict[str, OrderRefusal] = {}   # per reason refused for time order: the first

    @classmethod
    def from_config(cls, config: Config, **kwargs) -> "Engine":
        e = config.engine
        return cls(config.detector_config(), config.metric_rules(), batch_size=e.batch_size,
                   max_entities=e.max_entities, **kwargs)

    def feed(self, vector: Vector) -> str | None:
        """Queue one vector; its entity's batch runs when it is full.

        Returns ``None``, or the reason the vector was refused (``entity_limit``, or
        ``duplicate_ts`` / ``out_of_order`` by :func:`.reorder.order_refusal`) so the caller can
        dead-letter it.
        """
        self.counts.vectors += 1
        record = self.registry.get(vector.entity)
        if record is None:
            if len(self.registry) >= self.max_entities:
                self.counts.rejected_entity_limit += 1
                return "entity_limit"
            record = self.registry.add(EntityModel(vector.entity, self.rules, self.detector_config))
        pending = record.pending
        if not pending:   # once per batch, not per vector: batches are how recency is counted
            self.registry.touch(record)
        last = self._newest(record)
        refused = order_refusal(vector.ts, last)
        if refused is not None:   # a step twice or backwards would corrupt the baseline
            return self._refuse_order(refused, vector, last)
        if not pending and record.first_ts is None:
            record.first_ts = vector.ts
        pending.append(vector)
        self.queued += 1
        if len(pending) >= self.batch_size:
            self._run(record)
        return None

    def last_accepted_ts(self, entity: str) -> float:
        """The time of the entity's newest vector taken (queued or run); -inf for an unknown entity."""
        record = self.registry.get(entity)
        return float("-inf") if record is None else self._newest(record)

    @staticmethod
    def _newest(record: EntityRecord) -> float:
        return record.pending[-1].ts if record.pending else record.model.last_ts

    def _refuse_order(self, reason: str, vector: Vector, last: float) -> str:
        """Count a refusal for time order and keep what the summary says about it."""
        if reason == "duplicate_ts":
            self.counts.rejected_duplicate_ts += 1
        else:
            self.counts.rejected_out_of_order += 1
        first = self.order_refusals.get(reason)
        if first is None:
            self.order_refusals[reason] = OrderRefusal(vector.entity, last, vector.ts, last - vector.ts)
        else:
            first.largest_gap = max(first.largest_gap, last - vector.ts)
        return reason

    def adopt(self, stream: EntityModel, covered: dict[str, int] | None = None) -> EntityRecord:
        """Take over an entity restored from a snapshot that includes the ``covered`` offsets."""
        return self.registry.add(stream, covered)

    def drop(self, entity: str) -> None:
        """Forget an entity everywhere (its partition moved to another process, or it is evicted);
        its pending vectors must be flushed first."""
        self.registry.remove(entity)

    def flush(self) -> None:
        """Run every partial batch (end of input; in the service every engine.max_delay_seconds)."""
        for record in list(self.registry.records()):
            if record.pending:
                self._run(record)

    def _run(self, record: EntityRecord) -> None:
        stream = record.model
        vectors, record.pending = record.pending, []
        self.queued -= len(vectors)
        X, ts = stream.assemble(vectors)
        self.registry.mark_ran(record)
        self.counts.processed += len(vectors)
        try:
            result = stream.detector.process(X, ts)
        except np.linalg.LinAlgError as exc:   # e.g. an SVD that did not converge on degenerate data
            self._rewarm(record, f"linear algebra failed ({exc})")
            return
        if not (stream.detector.is_finite() and np.isfinite(result.shift_sigma).all()):
            self._rewarm(record, "non-finite model values")   # the batch's transitions are not trusted
            return
        # Everything that names columns runs before observe(), which may drop stale metrics' columns.
        for observer in self.observers:
            observer(stream, ts, X, result)
        located = self._localise(record, X, result) if self.windows is not None else None
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

    def _localise(self, record: EntityRecord, X: np.ndarray, result: BatchResult) -> list[dict | None] | None:
        """The batch's ``window_metrics``; a failed factorisation costs the window, never the batch."""
        try:
            return self.windows.localise(record, X, result)
        except np.linalg.LinAlgError:
            IncidentWindows.forget(record)
            self.counts.localisation_failed += 1
            return None

    def _rewarm(self, record: EntityRecord, why: str) -> None:
        """A model that went bad is never scored with: the entity warms up again, and says so."""
        record.model.rewarm()
        IncidentWindows.forget(record)
        self.counts.rewarmed += 1
        self.rewarmed.append((record.entity, why))
