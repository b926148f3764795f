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

import os
import queue
import signal
import sys
import threading
import time
from contextlib import ExitStack
from pathlib import Path
from typing import TYPE_CHECKING


if TYPE_CHECKING:
    from .kafka import KafkaSettings

from .config import Config, ConfigError
from .decode import DecodeError, Vector, decode_vector, encode_vector
from .endpoints import Endpoints
from .engine import Engine
from .events import EventFileWriter
from .exporter import Exporter
from .otlp import decode_otlp
from .readers import DeadLetterWriter, Rejected
from .replay import decode_limits
from .samples import SampleAssembler, decode_sample, encode_sample
from .state import SnapshotError, StateDirectory


class LineSource:
    """Lines of a file or of stdin, read by a background thread so polls can time out."""

    def __init__(self, url: str, max_batch: int = 5000, max_line: int = 1 << 20) -> None:
        self.url = url
        self.max_batch = max_batch
        self.max_line = max_line
        self._queue: queue.Queue[tuple[int, bytes] | None] = queue.Queue(maxsize=4 * max_batch)
        self.exhausted = False
        # A raw descriptor, not sys.stdin: a daemon thread blocked inside a buffered reader would
        # hold its lock and abort the interpreter at shutdown (after SIGTERM).
        fd = os.dup(sys.stdin.fileno()) if url == "-" else os.open(Path(url), os.O_RDONLY)
        self._thread = threading.Thread(target=self._read, args=(fd,), name="shiftsieve-source", daemon=True)
        self._thread.start()

    def _read(self, fd: int) -> None:
        # cut_nonblank: the head kept of an over-long pending line is all that is left of it, so
        # whether the line was blank is decided before cutting (a line of 5,000 spaces and an "x"
        # is a line to count and dead-letter, not a blank one).
        number, pending, cut_nonblank = 0, b"", False
        try:
            while chunk := os.read(fd, 1 << 16):
                *lines, pending = (pending + chunk).split(b"\n")
                for i, line in enumerate(lines):
                    number += 1
                    line = line.rstrip(b"\r")
                    if number == 1 and line.startswith(b"\xef\xbb\xbf") and line[3:].strip():
                        line = line[3:]   # a UTF-8 BOM, stripped as replay does (a BOM alone stays a bad line)
                    if line.strip() or (i == 0 and cut_nonblank):
                        self._queue.put((number, line))   # blocks when the detector falls behind
                if lines:
                    cut_nonblank = False
                if len(pending) > self.max_line:   # keep a line's head only: the decoder rejects it as too large
                    cut_nonblank = cut_nonblank or bool(pending.strip())
                    pending = pending[: self.max_line + 1]
            if pending.strip() or cut_nonblank:
                self._queue.put((number + 1, pending.rstrip(b"\r")))
        finally:
            os.close(fd)
            self._queue.put(None)

    @property
    def caught_up(self) -> bool:
        """Nothing more is waiting to be read right now."""
        return self._queue.empty()

    def poll(self, timeout: float) -> list[tuple[int, bytes, str]]:
        """Up to ``max_batch`` (line number, line, "") triples; waits at most ``timeout`` s for the first."""
        out: list[tuple[int, bytes, str]] = []
        try:
            item = self._queue.get(timeout=timeout)
            while True:
                if item is None:
                    self.exhausted = True
                    break
                out.append((*item, ""))
                if len(out) >= self.max_batch:
                    break
                item = self._queue.get_nowait()
        except queue.Empty:
            pass
        return out


def kafka_settings(config: Config, url: str) -> "KafkaSettings":
    """Client settings from a ``kafka://`` URL and the [kafka] section (secrets from file or env)."""
    from .kafka import KafkaSettings, parse_kafka_url
    bootstrap, topic, group = parse_kafka_url(url)
    k = config.kafka
    password = k.sasl_password
    if k.sasl_password_file:
        try:
            password = Path(k.sasl_password_file).read_text().strip()
        except OSError as exc:
            raise ConfigError(f"kafka.sasl_password_file: cannot read {k.sasl_password_file}: "
                              f"{exc.strerror}") from None
    version = None if k.api_version == "auto" else tuple(int(p) for p in k.api_version.split("."))
    return KafkaSettings(bootstrap=bootstrap, topic=topic, group=group, api_version=version,
                         security_protocol=k.security_protocol, sasl_mechanism=k.sasl_mechanism or None,
                         sasl_username=k.sasl_username or None, sasl_password=password or None,
                         ssl_cafile=k.ssl_cafile or None, ssl_certfile=k.ssl_certfile or None,
                         ssl_keyfile=k.ssl_keyfile or None, session_timeout_ms=k.session_timeout_ms,
                         max_message_bytes=config.input.max_message_bytes,
                         fetch_partition_bytes=k.fetch_partition_bytes)


class KafkaInput:
    """A consumer-group source: records as (offset, value, "topic/partition"); offsets are committed
    by the service only after the poll's effects are done (at-least-once: a crash replays
    uncommitted records).  ``on_revoke`` / ``on_lost`` / ``on_assign`` get "topic/partition" names."""

    exhausted = False   # a topic does not end

    def __init__(self, settings: "KafkaSettings", on_revoke=None, on_lost=None, on_assign=None) -> None:
        from .kafka import KafkaSource
        self._hooks = {"revoke": on_revoke, "lost": on_lost, "assign": on_assign}
        self.source = KafkaSource(settings, on_assign=self._assigned, on_revoke=self._revoked,
                                  on_lost=self._lost)
        self._next: dict[tuple[str, int], int] = {}
        self._committed: dict[tuple[str, int], int] = {}
        self.timestamps_ms: list[int] = []   # Kafka timestamps of the last poll's records
        self.behind: dict[tuple[str, int], int] = {}   # lag per partition after the last poll

    def _call(self, hook: str, parts: list[tuple[str, int]]) -> None:
        if self._hooks[hook] is not None:
            self._hooks[hook]([f"{t}/{p}" for t, p in parts])

    def _revoked(self, parts: list[tuple[str, int]]) -> None:
        self._call("revoke", parts)   # the service snapshots and commits before the partitions move
        self._forget(parts)

    def _lost(self, parts: list[tuple[str, int]]) -> None:
        self._call("lost", parts)
        self._forget(parts)

    def _assigned(self, parts: list[tuple[str, int]]) -> None:
        self._call("assign", parts)

    def _forget(self, parts: list[tuple[str, int]]) -> None:
        for tp in parts:
            self._next.pop(tp, None)
            self._committed.pop(tp, None)

    def poll(self, timeout: float) -> list[tuple[int, bytes, str]]:
        records = self.source.poll(timeout)
        for r in records:
            self._next[(r.topic, r.partition)] = r.offset + 1
        self.timestamps_ms = [r.timestamp_ms for r in records]
        self.behind = self.source.lag()   # once per poll: caught_up and the lag gauge both read it
        return [(r.offset, r.value, f"{r.topic}/{r.partition}") for r in records]

    @property
    def caught_up(self) -> bool:
        """No assigned partition has records beyond what was polled (as of the last fetch)."""
        return not any(self.behind.values())

    def positions(self) -> dict[str, int]:
        """Next offset per partition consumed so far."""
        return {f"{t}/{p}": o for (t, p), o in {**self._committed, **self._next}.items()}

    @property
    def ready(self) -> bool:
        return bool(self.source.connected and self.source.assignment())

    def commit(self, floor: dict[str, int] | None = None) -> None:
        """Commit what was consumed, but never past ``floor`` ("topic/partition" -> offset: the
        oldest message whose data is still held outside the models)."""
        target = {}
        for (t, p), offset in self._next.items():
            limit = floor.get(f"{t}/{p}") if floor else None
            offset = offset if limit is None else min(offset, limit)
            if self._committed.get((t, p)) != offset:
                target[(t, p)] = offset
        if target and self.source.commit(target):
            self._committed.update(target)

    def close(self) -> None:
        self.source.close()


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
        self.limits = decode_limits(config)
        source = config.source
        self.assembler = None if source.encoding == "vector" else SampleAssembler(
            source.entity_labels, source.step_seconds, source.allowed_lateness_seconds,
            max_entities=config.engine.max_entities, limits=self.limits)
        self._sample_counts: dict[str, int] = {}
        self.kafka_sink = None
        self.state = StateDirectory(config.state.directory) if config.state.directory else None
        self._covered: dict[str, dict[str, int]] = {}   # entity -> offsets its restored snapshot includes
        self._partition_of: dict[str, str] = {}   # entity -> the "topic/partition" its vectors come from
        self._lock = threading.RLock()   # engine and state: the poll loop vs. rebalance callbacks
        self.engine: Engine | None = None
        self.source = None
        self.dead: DeadLetterWriter | None = None
        self._snapshot_at = time.monotonic()
        self._flushed_at = time.monotonic()
        self._emitted: list[dict] = []   # events of the current flush, for the exporter's counters
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
        with ExitStack() as stack:
            sinks = []
            if self.events_path:
                sinks.append(stack.enter_context(EventFileWriter(self.events_path, append=True)))
            self.dead = stack.enter_context(DeadLetterWriter(self.dead_letter_path, source=self.source_url)) \
                if self.dead_letter_path else None
            kafka = self.source_url.startswith("kafka://")
            if kafka:
                settings = kafka_settings(self.config, self.source_url)
                if self.config.kafka.alert_topic or self.config.kafka.dead_letter_topic:
                    from .kafka import KafkaSink
                    self.kafka_sink = KafkaSink(settings)
                    stack.callback(self.kafka_sink.close)
                    stack.callback(self.kafka_sink.flush)
                    if self.config.kafka.alert_topic:
                        alert_topic = self.config.kafka.alert_topic
                        sinks.append(lambda event: self.kafka_sink.send_event(alert_topic, event))
            self.engine = engine = Engine.from_config(self.config, sinks=[*sinks, self._emitted.append])
            if kafka:
                # Closed before the sinks: its final revoke snapshots, commits and may still emit.
                source = self.source = KafkaInput(settings, on_revoke=self._revoked, on_lost=self._lost,
                                                  on_assign=self._assigned)
                stack.callback(source.close)
            else:
                source = self.source = LineSource(self.source_url, max_line=self.limits.max_bytes)
            self._snapshot_at = time.monotonic()
            self.endpoints = Endpoints(self.listen, self.exporter.exposition, lambda: self.ready).start()
            stack.callback(self.endpoints.stop)
            self.ready = not kafka
            poll = self.config.http.poll_seconds
            max_delay = self.config.engine.max_delay_seconds
            while not self.stopping.is_set():
                lines = source.poll(poll)
                caught_up = source.caught_up
                with self._lock:   # rebalance callbacks run on the Kafka client's thread
                    if lines:
                        self._take(lines)
                    # Caught up, the gauges follow at once; behind, vectors queue into full batches.
                    if caught_up or time.monotonic() - self._flushed_at >= max_delay:
                        self._flush()
                    if self.state is not None and \
                            time.monotonic() - self._snapshot_at >= self.config.state.snapshot_seconds:
                        self._snapshot()
                    durable = not engine.queued and (self.state is None or not engine.touched_since_snapshot)
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
                if self.assembler is not None:   # the steps still open are complete now
                    self._feed(self.assembler.flush(), 0)
                self._flush()
                if self.state is not None:
                    self._snapshot()
            if kafka:
                source.commit(self._held())
        return 0

    def _take(self, lines: list[tuple[int, bytes, str]]) -> None:
        """One poll's messages: decode and feed them (an entity's batch runs once it is full)."""
        started = time.perf_counter()
        self.exporter.consumed.inc(len(lines))   # counters once per poll, not per message
        self.exporter.decoded.inc(sum(self._consume(number, line, partition) for number, line, partition in lines))
        stamps = getattr(self.source, "timestamps_ms", None)
        if stamps and min(stamps) >= 0 and self._oldest_ms is None:
            self._oldest_ms = min(stamps)
        self._busy += time.perf_counter() - started

    def _flush(self) -> None:
        """Run every queued vector, send the events, update the gauges and hold the memory bound.

        Called when the source is caught up, and at most every engine.max_delay_seconds while it
        is behind: between calls a backlog's vectors queue up into full batches, which is what
        makes catching up fast (see DEVELOPERS.md)."""
        started = time.perf_counter()
        self.engine.flush()
        if self.assembler is not None:
            self._sync_sample_counts()
        self.exporter.observe_events(self._emitted)
        self._emitted.clear()
        for entity, why in self.engine.rewarmed:
            print(f"shiftsieve: warning: entity {entity!r} warms up again: {why}", file=sys.stderr)
            self.exporter.rewarmed.inc()
        self.engine.rewarmed.clear()
        touched = self.engine.touched
        if touched:
            self.exporter.refresh(self.engine, sorted(touched))
            touched.clear()
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
            self._flush()
            if self.state is not None:
                self._snapshot()
            self.source.commit(self._held())
            self._forget(partitions)

    def _lost(self, partitions: list[str]) -> None:
        """Partitions were taken away (this member was fenced): another member may already own
        them, so their entities are forgotten without a snapshot that could overwrite its newer one."""
        with self._lock:
            self._flush()   # queued vectors must run before their entities go; nothing is committed
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
        for entity in [e for e, p in self._partition_of.items() if p in gone]:
            self._drop(entity)

    def _drop(self, entity: str) -> None:
        self.engine.drop(entity)
        self.exporter.forget(entity)
        self._covered.pop(entity, None)
        self._partition_of.pop(entity, None)

    def _evict(self) -> None:
        """Hold at most engine.max_resident models: the least recently seen beyond it are
        snapshotted (with a state directory; restored when they return) and dropped."""
        limit = self.config.engine.max_resident
        if not limit or len(self.engine.entities) <= limit:
            return
        positions = self._positions()
        for entity in self.engine.least_recent(limit):
            if self.state is not None and entity in self.engine.touched_since_snapshot:
                self.state.save(self.engine.entities[entity], positions)
            self._drop(entity)
            self.exporter.evicted.inc()

    def _consume(self, number: int, line: bytes, partition: str = "") -> bool:
        """Decode and feed one message; False when it was dead-lettered as undecodable."""
        try:
            vectors = self._vectors(line, number, partition)
        except DecodeError as exc:
            self._dead_letter(number, line, exc.reason, str(exc))
            return False
        self._feed(vectors, number, partition)
        return True

    def _feed(self, vectors: list[Vector], number: int, partition: str = "") -> None:
        engine = self.engine
        for vector in vectors:
            entity = vector.entity
            if entity not in engine.entities:
                self._restore(entity)
            covered = self._covered.get(entity, {}).get(partition)
            if covered is not None and number < covered:
                continue   # already inside the entity's restored snapshot: exactly once in model state
            refused = engine.feed(vector)
            if refused is not None:
                self._dead_letter(number, encode_vector(vector), refused,
                                  f"vector of {entity!r} at ts {vector.ts} refused: {refused}")
            else:
                self._partition_of[entity] = partition

    def _restore(self, entity: str) -> None:
        """Adopt ``entity``'s snapshot from the state directory, if it has one (an entity seen for
        the first time, after a restart or after its partition moved here)."""
        engine = self.engine
        if self.state is None or len(engine.entities) >= engine.max_entities:
            return
        try:
            restored = self.state.load(entity, engine.rules, engine.detector_config)
        except SnapshotError as exc:   # a corrupt snapshot costs its entity's state, never the service
            print(f"shiftsieve: warning: {exc}; that entity warms up again", file=sys.stderr)
            self.exporter.snapshot_errors.inc()
            return
        if restored is not None:
            stream, offsets = restored
            engine.adopt(stream)
            self._covered[entity] = offsets

    def _snapshot(self) -> None:
        """Write the snapshots of the entities that changed, covering everything consumed so far."""
        if self.engine.queued:
            self._flush()
        positions = self._positions()
        engine = self.engine
        for entity in sorted(engine.touched_since_snapshot):
            self.state.save(engine.entities[entity], positions)
            self._covered[entity] = positions
        engine.touched_since_snapshot.clear()
        self._snapshot_at = time.monotonic()
        self.exporter.snapshot_age.set(0.0)

    def _held(self) -> dict[str, int] | None:
        """Per partition, the oldest offset whose samples wait in the assembler's open steps."""
        return self.assembler.held_offsets() if self.assembler is not None else None

    def _positions(self) -> dict[str, int]:
        """What a snapshot covers: the next offset per partition, but not past a held sample."""
        positions = self.source.positions() if hasattr(self.source, "positions") else {}
        for partition, offset in (self._held() or {}).items():
            if partition in positions:
                positions[partition] = min(positions[partition], offset)
        return positions

    def _vectors(self, raw: bytes, number: int, partition: str = "") -> list[Vector]:
        """The complete vectors one message yields in the configured encoding (DecodeError if none)."""
        if self.assembler is None:
            return [decode_vector(raw, self.limits)]
        if self.config.source.encoding == "sample":
            samples = [decode_sample(raw, self.limits)]
        else:
            # Resource attributes other than the entity's would land in every metric name.
            samples, skipped = decode_otlp(raw, self.limits, resource_labels=self.config.source.entity_labels)
            if skipped:
                self.exporter.samples.labels("skipped").inc(skipped)
        vectors: list[Vector] = []
        for sample in samples:
            done, reason = self.assembler.add(sample, (partition, number))
            vectors.extend(done)
            if reason is not None:   # late, no entity label, over a cap: counted and kept
                self._dead_letter(number, encode_sample(sample), reason,
                                  f"sample {sample.name!r} at ts {sample.ts} refused: {reason}")
        return vectors

    def _sync_sample_counts(self) -> None:
        for outcome, total in self.assembler.counts.items():
            self.exporter.samples.labels(outcome).inc(total - self._sample_counts.get(outcome, 0))
        self._sample_counts = dict(self.assembler.counts)

    def _dead_letter(self, number: int, raw: bytes, reason: str, detail: str) -> None:
        self.exporter.dead.labels(reason).inc()
        if self.dead is not None:
            self.dead.write(Rejected(line=number, reason=reason, detail=detail, raw=raw))
        if self.kafka_sink is not None and self.config.kafka.dead_letter_topic:
            self.kafka_sink.send_dead_letter(self.config.kafka.dead_letter_topic, raw, reason,
                                             f"{self.source_url}@{number}")
