"""The engine: routes decoded vectors to their entity, micro-batches them, runs the
detector and turns its transitions into alert events for the sinks.

``source -> decode -> [engine: assemble -> model -> decide] -> sinks``.  The
engine is the same for replay and for the live service; only the batching
differs (replay fills batches of ``batch_size`` vectors per entity, the service
flushes after every poll).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Callable, Iterable

import numpy as np

from shiftsieve.models.detector import DetectorConfig

from .assemble import EntityStream, MetricRules
from .config import Config
from .decode import Vector
from .events import events_from_transitions

EventSink = Callable[[dict], None]


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


class Engine:
    """Many entities, one process; each entity gets its own detector."""

    def __init__(self, detector_config: DetectorConfig, rules: MetricRules, *, batch_size: int = 64,
                 max_entities: int = 100_000, sinks: Iterable[EventSink] = ()) -> None:
        self.detector_config = detector_config
        self.rules = rules
        self.batch_size = batch_size
        self.max_entities = max_entities
        self.sinks = list(sinks)
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

    def drop(self, entity: str) -> None:
        """Forget an entity (its partition moved to another process); pending vectors must be flushed first."""
        if self._pending.get(entity):
            raise RuntimeError(f"entity {entity!r} still has unprocessed vectors: flush before dropping it")
        self.entities.pop(entity, None)
        self._pending.pop(entity, None)
        self._recent.pop(entity, None)
        self.touched.discard(entity)
        self.touched_since_snapshot.discard(entity)

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
        stream.observe(X)
        stream.last_residual_norm = float(result.residual_norm[-1])
        self.counts.solver_iterations += int(result.n_iter.sum())
        self.counts.solver_unconverged += int(np.count_nonzero(~result.converged))
        for event in events_from_transitions(stream, result.transitions, ts):
            self.counts.events += 1
            if event.get("onset"):   # an incident opens once (counted, not kept: the service runs for ever)
                self.counts.incidents += 1
            for sink in self.sinks:
                sink(event)

    def _rewarm(self, stream: EntityStream, why: str) -> None:
        """A model that went bad is never scored with: the entity warms up again, and says so."""
        stream.rewarm()
        self.counts.rewarmed += 1
        self.rewarmed.append((stream.entity, why))
