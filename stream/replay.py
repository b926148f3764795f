"""Replay: run a recorded file through the full detector, deterministically.

``shiftsieve replay INPUT --events OUT.jsonl [--config FILE] [--dead-letter FILE]``
runs the records of one file through the pipeline every command uses (:mod:`.pipeline`); it
reads ``.jsonl``, ``.jsonl.gz``, wide ``.csv`` (``.csv.gz``) or a Prometheus range-query
export (``.json``, ``.json.gz``, see :mod:`.promql`); undecodable lines are skipped,
counted and optionally written to the dead-letter file; the replay goes on.
"""

from __future__ import annotations

import sys
import time
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, TextIO

from .config import Config
from .coverage import EntityCoverage, OpenIncident, coverage_notes, entity_coverage, open_incident_notes, \
    open_incidents, print_notes, scored_total
from .decode import Vector
from .engine import BatchObserver, Engine, EventSink
from .events import EventFileWriter
from .lines import InputError, Rejected
from .pipeline import Pipeline
from .readers import DeadLetterWriter, input_size, open_records
from .reorder import OrderSummary, TimeOrdered
from .values import invalid_value_notes


@dataclass
class ReplaySummary:
    """What a replay did; ``vectors + rejected`` is every non-blank line of the input."""

    vectors: int
    rejected: int
    rejected_by_reason: dict[str, int]
    entities: int
    incidents: int
    events: int
    seconds: float
    solver_unconverged: int = 0
    rewarmed: list[tuple[str, str]] = field(default_factory=list)   # (entity, why): models that went bad
    coverage: list[EntityCoverage] = field(default_factory=list)   # per entity: vectors, scored, warm-up
    still_open: list[OpenIncident] = field(default_factory=list)   # incidents firing when the input ended
    invalid_values: dict[str, int] = field(default_factory=dict)   # entries treated as missing, by reason
    order: OrderSummary = field(default_factory=lambda: OrderSummary({}))   # refused for time order, reordered

    @classmethod
    def of(cls, pipeline: Pipeline, seconds: float, window: TimeOrdered | None = None) -> "ReplaySummary":
        """What ``pipeline`` and its engine did so far (a replay at its end, ``run`` when it stops)."""
        engine = pipeline.engine
        return cls(vectors=engine.counts.processed, rejected=pipeline.rejected,
                   rejected_by_reason=dict(pipeline.rejected_by_reason), entities=len(engine.entities),
                   incidents=engine.counts.incidents, events=engine.counts.events,
                   solver_unconverged=engine.counts.solver_unconverged, rewarmed=list(engine.rewarmed),
                   coverage=entity_coverage(engine.registry.records()),
                   still_open=open_incidents(engine.registry.records()), seconds=seconds,
                   invalid_values=dict(pipeline.invalid_values), order=OrderSummary.of(engine.order_refusals, window))

    @property
    def rate(self) -> float:
        return self.vectors / self.seconds if self.seconds > 0 else float("inf")

    @property
    def scored(self) -> int:
        """Vectors scored (the rest built warm-ups)."""
        return scored_total(self.coverage)

    def format(self) -> str:
        """The summary a person reads: one line of figures, then a line per thing worth knowing
        (entities that never warmed up, incidents still open, values treated as missing, vectors
        refused for their time)."""
        lines = [self._figures(), *coverage_notes(self.coverage), *open_incident_notes(self.still_open),
                 *invalid_value_notes(self.invalid_values), *self.order.notes(self.rejected_by_reason)]
        return "\n".join(lines)

    def print(self, stream: TextIO | None = None) -> None:
        """The summary on ``stream`` (stderr): headline lines prefixed with the program's name, details
        indented."""
        print_notes(self.format().splitlines(), stream)

    def _figures(self) -> str:
        reasons = ", ".join(f"{k} {v}" for k, v in sorted(self.rejected_by_reason.items()))
        line = (f"{_count(self.vectors, 'vector')} ({self.scored:,} scored), "
                f"{_count(self.entities, 'entity', 'entities')}, "
                f"{_count(self.incidents, 'incident')} ({_count(self.events, 'event')}) in {self.seconds:.2f} s "
                f"({self.rate:,.0f} vectors/s)")
        if self.rejected:
            line += f"; {_count(self.rejected, 'line')} rejected ({reasons})"
        if self.solver_unconverged:   # tolerance not reached within model.max_iter: worth knowing
            line += f"; solver: {self.solver_unconverged} vectors stopped at max_iter"
        if self.rewarmed:
            line += "; warmed up again: " + ", ".join(f"{e} ({why})" for e, why in self.rewarmed)
        return line


def _count(n: int, one: str, many: str | None = None) -> str:
    return f"{n:,} {one if n == 1 else many or one + 's'}"


class Progress:
    """A one-line progress bar on a terminal; silent otherwise."""

    def __init__(self, total: int | None, stream: TextIO = sys.stderr) -> None:
        self.total = total
        self.stream = stream
        self.enabled = bool(total) and stream.isatty()
        self._last = 0.0

    def update(self, done: int, vectors: int) -> None:
        now = time.monotonic()
        if not self.enabled or now - self._last < 0.2:
            return
        self._last = now
        share = min(done / self.total, 1.0)
        bar = "#" * int(share * 30)
        self.stream.write(f"\r[{bar:<30}] {share:4.0%} {vectors:,} vectors")
        self.stream.flush()

    def close(self) -> None:
        if self.enabled:
            self.stream.write("\r" + " " * 60 + "\r")
            self.stream.flush()


def open_input(path: str | Path, config: Config) -> TimeOrdered:
    """The records of a replay input under the configured limits and entity labels, each entity's
    vectors put back in time order within source.allowed_lateness_seconds (:mod:`.reorder`): the one
    way replay, evaluate, tune and produce read their input."""
    return TimeOrdered(open_records(path, config.decode_limits(), entity_labels=config.source.entity_labels,
                                    max_file_bytes=config.input.max_file_bytes),
                       config.source.allowed_lateness_seconds)


def replay(path: str | Path, config: Config, *, events_path: str | None = None,
           dead_letter_path: str | None = None, sinks: list[EventSink] | None = None,
           progress: bool = True, observers: list[BatchObserver] | None = None,
           vector_sink: Callable[[Vector], None] | None = None) -> ReplaySummary:
    """Replay one file through the pipeline (:mod:`.pipeline`); raises :class:`InputError` when the
    input as a whole is unusable.

    ``observers`` see every scored batch (:data:`.engine.BatchObserver`), e.g. the report's collector;
    ``vector_sink`` gets every vector the engine accepted (the report compares methods on them).
    """
    path = Path(path)
    started = time.perf_counter()
    with ExitStack() as stack:
        records = open_input(path, config)
        reject_sinks = []
        if dead_letter_path:
            dead = stack.enter_context(DeadLetterWriter(dead_letter_path, source=str(path)))
            reject_sinks.append(lambda record, partition: dead.write(record))
        all_sinks = list(sinks or [])
        if events_path:
            all_sinks.append(stack.enter_context(EventFileWriter(events_path)))
        engine = Engine.from_config(config, sinks=all_sinks, observers=observers or ())
        admitted = None if vector_sink is None else (lambda vector, position, partition: vector_sink(vector))
        pipeline = Pipeline(engine, config, reject_sinks=reject_sinks, admitted=admitted)
        bar = Progress(input_size(path) if progress else None)
        count = 0
        for record in records:
            if isinstance(record, Rejected):
                pipeline.reject(record)
                continue
            count += 1
            pipeline.feed((record,), records.line, raw=records.raw)
            if count % 4096 == 0:
                bar.update(records.bytes_read, count)
        engine.flush()
        bar.close()
    accepted = engine.counts.processed
    if accepted == 0:
        raise InputError(f"{path}: no valid vector in the input ({pipeline.rejected} lines rejected)")
    return ReplaySummary.of(pipeline, time.perf_counter() - started, records)
