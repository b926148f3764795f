"""``shiftsieve run``: the long-running detector.

    source (Kafka, stdin, a file) -> decode -> engine (assemble -> model -> decide) -> sinks
                                                              \\-> exporter (/metrics, /healthz, /readyz)

Each poll's messages are decoded and fed to the engine; an entity's batch runs when it is
full, and the rest at a flush: at once when the source is caught up, otherwise at most
every engine.max_delay_seconds.  Offsets are committed only when nothing consumed waits
outside a model (and, with a state directory, outside a snapshot).  Bad messages never
stop the service: they are counted and dead-lettered.  SIGTERM (or SIGINT) ends the current
poll, flushes, closes the sinks and returns exit status 0.  A file or stdin source
ends the service at its end.
"""

from __future__ import annotations

import signal
import sys
import threading
import time
from contextlib import ExitStack

from .alert_lines import ConsoleEvents
from .config import Config, ConfigError
from .decode import Vector
from .endpoints import Endpoints
from .engine import Engine, EventSink
from .events import EventFileWriter
from .exporter import Exporter
from .lines import Rejected
from .pipeline import Pipeline
from .readers import DeadLetterWriter
from .registry import EntityRecord
from .replay import ReplaySummary
from .sources import KafkaInput, LineSource, Message
from .state import SnapshotError, StateDirectory


class Service:
    """Wires source, engine, sinks, exporter and endpoints; :meth:`run` until stopped."""

    def __init__(self, config: Config, *, source_url: str, events_path: str | None = None,
                 dead_letter_path: str | None = None, listen: str | None = None) -> None:
        self.config = config
        self.source_url = source_url
        self.events_path = events_path
        self.dead_letter_path = dead_letter_path
        self.listen = listen or config.http.listen
        self.exporter = Exporter(max_series=config.http.max_series)
        self._emitted: list[dict] = []   # events of the current flush, for the exporter's counters
        self.engine = Engine.from_config(config, sinks=[self._emitted.append],
                                         observers=[lambda model, ts, X, result:
                                                    self.exporter.iterations.observe_many(result.scored_iterations)])
        self.engine.registry.on_remove.append(self.exporter.forget)   # a dropped entity's series go with it
        self.pipeline = Pipeline(self.engine, config, reject_sinks=[self._dead_letter],
                                 admit=self._admit, admitted=self._admitted)
        self._sample_counts: dict[str, int] = {}
        self._invalid_counts: dict[str, int] = {}   # pipeline.invalid_values as last exported
        self.kafka_sink = None
        self.state = StateDirectory(config.state.directory) if config.state.directory else None
        if self.state is not None:
            self.exporter.snapshot_age.set_function(self._snapshot_age)
        else:   # no snapshots are taken: an age of 0 would say they are all fresh
            self.exporter.registry.unregister(self.exporter.snapshot_age)
        self._lock = threading.RLock()   # engine and state: the poll loop vs. rebalance callbacks
        self.source = None
        self.dead: DeadLetterWriter | None = None
        self._snapshot_at = time.monotonic()
        self._unsaved_since: float | None = None   # when the oldest change not yet in a snapshot was made
        self._flushed_at = time.monotonic()
        self._busy = 0.0                 # seconds spent decoding and feeding since the last flush
        self._oldest_ms: int | None = None   # Kafka timestamp of the oldest record not yet in the gauges
        self.stopping = threading.Event()
        self.ready = False
        self.endpoints: Endpoints | None = None

    def stop(self, *_: object) -> None:
        self.stopping.set()

    def run(self) -> int:
        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGTERM, self.stop)
            signal.signal(signal.SIGINT, self.stop)
        started = time.perf_counter()
        with ExitStack() as stack:
            sinks = [self._event_output(stack)]
            self.dead = stack.enter_context(DeadLetterWriter(self.dead_letter_path, source=self.source_url)) \
                if self.dead_letter_path else None
            kafka = self.source_url.startswith("kafka://")
            if kafka:
                settings = self.config.kafka_settings(self.source_url)
                if self.config.kafka.alert_topic or self.config.kafka.dead_letter_topic:
                    from .kafka import KafkaSink
                    self.kafka_sink = KafkaSink(settings)
                    stack.callback(self.kafka_sink.close)
                    stack.callback(self.kafka_sink.flush)
                    if self.config.kafka.alert_topic:
                        alert_topic = self.config.kafka.alert_topic
                        sinks.append(lambda event: self.kafka_sink.send_event(alert_topic, event))
            engine = self.engine
            engine.sinks[:0] = sinks   # before the exporter's own: events are out before they are counted
            if kafka:
                # Closed before the sinks: its final revoke snapshots, commits and may still emit.
                source = self.source = KafkaInput(settings, on_revoke=self._revoked, on_lost=self._lost,
                                                  on_assign=self._assigned)
                stack.callback(source.close)
            else:
                source = self.source = LineSource(self.source_url, limits=self.config.decode_limits())
            self._snapshot_at = time.monotonic()
            try:
                self.endpoints = Endpoints(self.listen, self._exposition, lambda: self.ready).start()
            except OSError as exc:   # e.g. the address is in use by another process
                raise ConfigError(f"cannot listen on {self.listen} (http.listen, --listen): "
                                  f"{exc.strerror or exc}") from None
            stack.callback(self.endpoints.stop)
            print(f"shiftsieve: run: reading {self._source_name()} ({self.config.source.encoding} messages); "
                  f"/metrics, /healthz and /readyz on http://{self.endpoints.address}; alerts to "
                  f"{self._events_name()}", file=sys.stderr, flush=True)
            self.ready = not kafka
            poll = self.config.source.poll_seconds
            max_delay = self.config.engine.max_delay_seconds
            while not self.stopping.is_set():
                lines = source.poll(poll)
                caught_up = source.caught_up
                with self._lock:   # rebalance callbacks run on the Kafka client's thread
                    if lines:
                        self.take(lines)
                    # Caught up, the gauges follow at once; behind, vectors queue into full batches.
                    if caught_up or time.monotonic() - self._flushed_at >= max_delay:
                        self.flush()
                    if self.state is not None and \
                            time.monotonic() - self._snapshot_at >= self.config.state.snapshot_seconds:
                        self.snapshot()
                    durable = not engine.queued and (self.state is None or not engine.registry.unsaved)
                if kafka:
                    if durable:
                        # Offsets are committed once what they cover is durable: every vector is in
                        # its model, the events are out and, with a state directory, every entity's
                        # snapshot includes them. Outside the lock: a commit needs the client thread,
                        # which may be waiting on it.
                        source.commit(self._held())
                    self.ready = source.ready
                    for (lag_topic, partition), behind in source.behind.items():
                        self.exporter.lag.labels(lag_topic, str(partition)).set(behind)
                if source.exhausted:
                    break
            self.ready = False
            with self._lock:
                self.pipeline.close_steps()
                self.flush()
                if self.state is not None:
                    self.snapshot()
            if kafka:
                source.commit(self._held())
        ReplaySummary.of(self.pipeline, time.perf_counter() - started).print()
        return 0

    def _exposition(self) -> bytes:
        """/metrics, taken between polls: a scrape never sees an incident's series half updated."""
        with self._lock:
            return self.exporter.exposition()

    def _event_output(self, stack: ExitStack) -> EventSink:
        """Where alerts go: the --events file (JSON lines, appended; ``-`` is stdout), else stdout,
        for a person on a terminal and as JSON lines for a program otherwise."""
        if self.events_path is None and sys.stdout.isatty():
            return ConsoleEvents(sys.stdout)
        return stack.enter_context(EventFileWriter(self.events_path or "-", append=True))

    def _events_name(self) -> str:
        if self.events_path is None and sys.stdout.isatty():
            return "this terminal"
        if self.events_path in (None, "-"):
            return "stdout (JSON lines)"
        return f"{self.events_path} (JSON lines, appended)"

    def _source_name(self) -> str:
        return "stdin" if self.source_url == "-" else self.source_url

    def take(self, messages: list[Message | Rejected]) -> None:
        """One poll's messages: decode and feed them (an entity's batch runs once it is full)."""
        started = time.perf_counter()
        self.exporter.consumed.inc(len(messages))   # counters once per poll, not per message
        self.exporter.decoded.inc(self.pipeline.take(messages))
        self._note_unsaved()
        stamps = getattr(self.source, "timestamps_ms", None)
        if stamps and min(stamps) >= 0 and self._oldest_ms is None:
            self._oldest_ms = min(stamps)
        self._busy += time.perf_counter() - started

    def flush(self) -> None:
        """Run every queued vector, send the events, update the gauges and hold the memory bound.

        Called when the source is caught up, and at most every engine.max_delay_seconds while it
        is behind: between calls a backlog's vectors queue up into full batches, which is what
        makes catching up fast (see DEVELOPERS.md)."""
        started = time.perf_counter()
        self.engine.flush()
        self._note_unsaved()
        self._sync_sample_counts()
        self._sync_invalid_values()
        self.exporter.observe_events(self._emitted)
        self._emitted.clear()
        for entity, why in self.engine.rewarmed:
            print(f"shiftsieve: warning: entity {entity!r} warms up again: {why}", file=sys.stderr)
            self.exporter.rewarmed.inc()
        self.engine.rewarmed.clear()
        registry = self.engine.registry
        if registry.ran:
            self.exporter.refresh([registry[entity] for entity in sorted(registry.ran)])
            registry.ran.clear()
            self.exporter.batch_seconds.observe(self._busy + time.perf_counter() - started)
            self._busy = 0.0
        if self._oldest_ms is not None:
            self.exporter.ingest_delay.observe(max(0.0, time.time() - self._oldest_ms / 1000))
            self._oldest_ms = None
        self._evict()
        self._flushed_at = time.monotonic()

    # -- rebalancing (called on the Kafka client's thread, inside a poll) ---------------------------
    def _revoked(self, partitions: list[str]) -> None:
        """Partitions move to another member: snapshot what they changed, commit, forget their entities."""
        with self._lock:
            self.flush()
            if self.state is not None:
                self.snapshot()
            self.source.commit(self._held())
            self._forget(partitions)

    def _lost(self, partitions: list[str]) -> None:
        """Partitions were taken away (this member was fenced): another member may already own
        them, so their entities are forgotten without a snapshot that could overwrite its newer one."""
        with self._lock:
            self.flush()   # queued vectors must run before their entities go; nothing is committed
            self._forget(partitions)

    def _assigned(self, partitions: list[str]) -> None:
        """New partitions: their entities are restored from the state directory as they appear."""
        print(f"shiftsieve: assigned {', '.join(partitions) or 'no partitions'}", file=sys.stderr)

    def _forget(self, partitions: list[str]) -> None:
        gone = set(partitions)
        for name in gone:   # a partition that moved away must not keep exporting its last lag
            topic, _, partition = name.rpartition("/")
            try:
                self.exporter.lag.remove(topic, partition)
            except KeyError:
                pass
        for entity in [r.entity for r in self.engine.registry.records() if r.partition in gone]:
            self.engine.drop(entity)

    def _evict(self) -> None:
        """Hold at most engine.max_resident models: the least recently seen beyond it are
        snapshotted (with a state directory; restored when they return) and dropped."""
        limit = self.config.engine.max_resident
        registry = self.engine.registry
        if not limit or len(registry) <= limit:
            return
        positions = self._positions()
        for entity in registry.least_recent(limit):
            if self.state is not None and entity in registry.unsaved:
                self.state.save(registry[entity].model, positions)
            self.engine.drop(entity)
            self.exporter.evicted.inc()

    def _admit(self, vector: Vector, position: int, partition: str) -> bool:
        """Before a vector enters its model: restore its entity from a snapshot the first time, and
        skip what that snapshot already includes (exactly once in model state)."""
        record = self.engine.registry.get(vector.entity) or self._restore(vector.entity)
        covered = record.covered.get(partition) if record is not None else None
        return covered is None or position >= covered

    def _admitted(self, vector: Vector, position: int, partition: str) -> None:
        self.engine.registry[vector.entity].partition = partition

    def _restore(self, entity: str) -> EntityRecord | None:
        """Adopt ``entity``'s snapshot from the state directory, if it has one (an entity seen for
        the first time, after a restart or after its partition moved here)."""
        engine = self.engine
        if self.state is None or len(engine.registry) >= engine.max_entities:
            return None
        try:
            restored = self.state.load(entity, engine.rules, engine.detector_config)
        except SnapshotError as exc:   # a corrupt snapshot costs its entity's state, never the service
            print(f"shiftsieve: warning: {exc}; that entity warms up again", file=sys.stderr)
            self.exporter.snapshot_errors.inc()
            return None
        if restored is None:
            return None
        stream, offsets = restored
        return engine.adopt(stream, covered=offsets)

    def snapshot(self) -> None:
        """Write the snapshots of the entities that changed, covering everything consumed so far."""
        if self.engine.queued:
            self.flush()
        positions = self._positions()
        registry = self.engine.registry
        for entity in sorted(registry.unsaved):
            record = registry[entity]
            self.state.save(record.model, positions)
            record.covered = positions
        registry.unsaved.clear()
        self._snapshot_at = time.monotonic()
        self._unsaved_since = None

    def _note_unsaved(self) -> None:
        """Remember when model state first changed after the last snapshot (to one poll)."""
        if self._unsaved_since is None and self.state is not None and self.engine.registry.unsaved:
            self._unsaved_since = time.monotonic()

    def _snapshot_age(self) -> float:
        """``shiftsieve_snapshot_age_seconds``: how long the oldest unsaved change has waited."""
        since = self._unsaved_since
        return 0.0 if since is None else time.monotonic() - since

    def _held(self) -> dict[str, int] | None:
        """Per partition, the oldest offset whose samples wait in the assembler's open steps."""
        return self.pipeline.decoder.held_offsets()

    def _positions(self) -> dict[str, int]:
        """What a snapshot covers: the next offset per partition, but not past a held sample."""
        positions = self.source.positions() if hasattr(self.source, "positions") else {}
        for partition, offset in (self._held() or {}).items():
            if partition in positions:
                positions[partition] = min(positions[partition], offset)
        return positions

    def _sync_sample_counts(self) -> None:
        assembler = self.pipeline.decoder.assembler
        if assembler is None:
            return
        for outcome, total in assembler.counts.items():
            self.exporter.samples.labels(outcome).inc(total - self._sample_counts.get(outcome, 0))
        skipped = self.pipeline.decoder.skipped   # OTLP points of kinds not read: a series once there are some
        if skipped != self._sample_counts.get("skipped", 0):
            self.exporter.samples.labels("skipped").inc(skipped - self._sample_counts.get("skipped", 0))
        self._sample_counts = {**assembler.counts, "skipped": skipped}

    def _sync_invalid_values(self) -> None:
        """Values treated as missing (counted by the pipeline) into shiftsieve_values_invalid_total."""
        for reason, total in self.pipeline.invalid_values.items():
            if total != self._invalid_counts.get(reason, 0):
                self.exporter.invalid_values.labels(reason).inc(total - self._invalid_counts.get(reason, 0))
        self._invalid_counts = dict(self.pipeline.invalid_values)

    def _dead_letter(self, record: Rejected, partition: str) -> None:
        if not record.kept:   # a kept message's vector was processed: its values are counted apart
            self.exporter.dead.labels(record.reason).inc()
        if self.dead is not None:
            self.dead.write(record)
        if self.kafka_sink is not None and self.config.kafka.dead_letter_topic:
            self.kafka_sink.send_dead_letter(self.config.kafka.dead_letter_topic, record.raw, record.reason,
                                             f"{self.source_url}@{record.line}", kept=record.kept)
