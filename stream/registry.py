"""The entities a process holds, one record each: adding, evicting, snapshotting and forgetting
an entity are one call each, and nothing about an entity lives anywhere else.

A record holds the entity's model (:class:`.assemble.EntityModel`), the vectors fed and not yet
run, where its vectors come from (partition) and what its restored snapshot already includes
(covered offsets), its open incident's window of residual rows, and which of its series the
exporter publishes.  The registry keeps the records in the order they arrived (the order partial
batches run in, so replays stay deterministic), their recency (for eviction) and two small
indexes of names: entities that ran since the gauges were refreshed, and entities changed since
their last snapshot.  Whoever publishes per-entity state elsewhere (the exporter)
subscribes to :attr:`EntityRegistry.on_remove`, so removing a record removes everything.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field

import numpy as np

from .assemble import EntityModel
from .decode import Vector


@dataclass(eq=False)
class IncidentWindow:
    """One open incident's residual rows (at most ``max_rows``, the first ones), with the metric
    names their columns stand for."""

    names: list[str]
    max_rows: int
    blocks: list[np.ndarray] = field(default_factory=list)
    rows: int = 0

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


@dataclass(eq=False)
class EntityRecord:
    """Everything this process holds for one entity."""

    model: EntityModel                                       # its metric layout and detector
    pending: list[Vector] = field(default_factory=list)       # fed, not yet run
    partition: str = ""                                       # "topic/partition" its vectors come from
    covered: dict[str, int] = field(default_factory=dict)     # offsets its restored snapshot includes
    window: IncidentWindow | None = None                      # the open incident's residual rows
    tail: np.ndarray | None = None                            # raw rows before the batch (pending entities)
    exported: set[str] | None = None                          # columns with published series (None: none)
    first_ts: float | None = None                             # its first vector fed to this process

    @property
    def entity(self) -> str:
        return self.model.entity


class ModelsView(Mapping[str, EntityModel]):
    """entity -> its model, read-only (what reports, tests and the exporter look at)."""

    def __init__(self, records: dict[str, EntityRecord]) -> None:
        self._records = records

    def __getitem__(self, entity: str) -> EntityModel:
        return self._records[entity].model

    def __iter__(self) -> Iterator[str]:
        return iter(self._records)

    def __len__(self) -> int:
        return len(self._records)


class EntityRegistry:
    """The records of this process's entities, in arrival order, with their recency."""

    def __init__(self) -> None:
        self._records: dict[str, EntityRecord] = {}
        self._recent: dict[str, None] = {}   # the same entities, least recently fed first
        self.models = ModelsView(self._records)
        self.ran: set[str] = set()       # processed vectors since the caller last cleared it (gauges)
        self.unsaved: set[str] = set()   # changed since its last snapshot
        self.on_remove: list[Callable[[EntityRecord], None]] = []

    def __len__(self) -> int:
        return len(self._records)

    def __contains__(self, entity: object) -> bool:
        return entity in self._records

    def get(self, entity: str) -> EntityRecord | None:
        return self._records.get(entity)

    def __getitem__(self, entity: str) -> EntityRecord:
        return self._records[entity]

    def records(self) -> Iterator[EntityRecord]:
        return iter(self._records.values())

    def add(self, model: EntityModel, covered: dict[str, int] | None = None) -> EntityRecord:
        """A new record (replacing any record of the same entity), the most recent."""
        self.remove(model.entity)
        record = self._records[model.entity] = EntityRecord(model, covered=dict(covered or {}))
        self._recent[model.entity] = None
        return record

    def touch(self, record: EntityRecord) -> None:
        """The entity was fed: it becomes the most recent."""
        self._recent.pop(record.entity, None)
        self._recent[record.entity] = None

    def mark_ran(self, record: EntityRecord) -> None:
        """The entity's model processed vectors: its gauges and its snapshot are out of date."""
        self.ran.add(record.entity)
        self.unsaved.add(record.entity)

    def least_recent(self, keep: int) -> list[str]:
        """The entities beyond the ``keep`` most recently fed, least recent first: what to evict
        to hold at most ``keep`` models in memory."""
        return list(itertools.islice(self._recent, max(len(self._records) - keep, 0)))

    def remove(self, entity: str) -> EntityRecord | None:
        """Forget the entity here and wherever it is published; its pending vectors must have run."""
        record = self._records.get(entity)
        if record is None:
            return None
        if record.pending:
            raise RuntimeError(f"entity {entity!r} still has unprocessed vectors: flush before dropping it")
        del self._records[entity]
        del self._recent[entity]
        self.ran.discard(entity)
        self.unsaved.discard(entity)
        for listener in self.on_remove:
            listener(record)
        return record
