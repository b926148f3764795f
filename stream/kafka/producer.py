"""`KafkaSink`: the producer for alert events (JSON, key = entity) and dead letters (the original
bytes, headers ``reason`` and ``source``).

A broker that is away makes sends fail at once (counted in ``failed_total``) instead of blocking
each one; the producer is created again on a later send.
"""

from __future__ import annotations

import threading
import time
from typing import Any

import orjson

from .connection import ConnectionState, client_connected, import_kafka
from .settings import KafkaSettings, check_topic


class KafkaSink:
    """Producer for JSON alert events (key = entity) and dead letters (original bytes + headers reason/source)."""

    _RETRY_SECONDS = 1.0

    def __init__(self, settings: KafkaSettings) -> None:
        self.settings = settings
        self._state = ConnectionState()
        self._producer: Any = None
        self._closed = False
        self._next_attempt = 0.0
        self._fail_fast_until = 0.0
        self.sent_total = 0
        self.failed_total = 0
        self._count_lock = threading.Lock()
        self._try_create()

    @property
    def connected(self) -> bool:
        """Whether the producer exists, its last send worked and a broker connection is up."""
        return client_connected(self._producer, self._closed, self._state)

    @property
    def last_error(self) -> str | None:
        return self._state.last_error

    def _try_create(self) -> bool:
        if self._producer is not None:
            return True
        if self._closed or time.monotonic() < self._next_attempt:
            return False
        kafka = import_kafka()
        kwargs = self.settings.producer_kwargs()
        if self.settings.api_version is None:
            kwargs["bootstrap_timeout_ms"] = 5000   # with api_version=auto the constructor talks to the broker
        try:
            self._producer = kafka.KafkaProducer(**kwargs)
        except Exception as exc:  # noqa: BLE001
            self._next_attempt = time.monotonic() + self._RETRY_SECONDS
            self._state.fail("connect", exc)
            return False
        self._state.ok()  # optimistic until a send says otherwise
        return True

    def _delivered(self, _meta: Any) -> None:
        with self._count_lock:
            self.sent_total += 1
        self._state.ok()

    def _failed(self, exc: BaseException) -> None:
        with self._count_lock:
            self.failed_total += 1
        self._state.fail("delivery", exc)

    def _send(self, topic: str, value: bytes, key: bytes | None, headers: list[tuple[str, bytes]] | None) -> bool:
        check_topic(topic)
        if self._closed or time.monotonic() < self._fail_fast_until or not self._try_create():
            # broker away: fail at once instead of blocking every send for max_block_ms
            with self._count_lock:
                self.failed_total += 1
            return False
        kafka = import_kafka()
        try:
            future = self._producer.send(topic, value=value, key=key, headers=headers)
        except Exception as exc:  # noqa: BLE001  (metadata timeout, message too large, closed)
            with self._count_lock:
                self.failed_total += 1
            if isinstance(exc, kafka.errors.KafkaTimeoutError):
                self._fail_fast_until = time.monotonic() + self._RETRY_SECONDS
            self._state.fail("send", exc)
            return False
        future.add_callback(self._delivered)
        future.add_errback(self._failed)
        return True

    def send_event(self, topic: str, event: dict) -> bool:
        """Queue one alert event: JSON value, key = ``event["entity"]``. False if it could not be queued."""
        value = orjson.dumps(event, option=orjson.OPT_SERIALIZE_NUMPY)
        entity = event.get("entity")
        key = str(entity).encode("utf-8") if entity is not None and entity != "" else None
        return self._send(topic, value, key, None)

    def send_dead_letter(self, topic: str, raw: bytes, reason: str, source: str, kept: bool = False) -> bool:
        """Queue one dead letter: the original bytes, headers ``reason`` and ``source`` (UTF-8), and
        ``kept: true`` when the message's vector was used with invalid values treated as missing."""
        headers = [("reason", str(reason).encode("utf-8")), ("source", str(source).encode("utf-8"))]
        if kept:
            headers.append(("kept", b"true"))
        return self._send(topic, bytes(raw), None, headers)

    def flush(self, timeout_s: float = 10) -> bool:
        """Wait up to ``timeout_s`` for queued messages. False if some are not confirmed."""
        if self._producer is None:
            return not self._closed  # nothing was queued (sends without a producer fail at once)
        try:
            self._producer.flush(timeout=timeout_s)
        except Exception as exc:  # noqa: BLE001
            self._state.fail("flush", exc)
            return False
        return True

    def close(self, timeout_s: float = 5) -> None:
        """Deliver what is queued (up to ``timeout_s``; briefly when disconnected), then close."""
        if self._closed:
            return
        connected = self.connected
        self._closed = True
        producer, self._producer = self._producer, None
        if producer is None:
            return
        try:
            producer.flush(timeout=timeout_s if connected else min(timeout_s, 0.5))
        except Exception as exc:  # noqa: BLE001  (broker away: undelivered messages are dropped, counted)
            self._state.fail("close", exc)
            # kafka-python's close() raises from its flush and leaves the sender thread running when
            # messages are still pending: abort them first, so close() below completes
            sender = getattr(producer, "_sender", None)
            if sender is not None:
                try:
                    sender.force_close()
                    sender.join(5)
                except Exception:  # noqa: BLE001
                    pass
        try:
            producer.close(timeout=0)
        except Exception as exc:  # noqa: BLE001
            self._state.fail("close", exc)

    def __enter__(self) -> KafkaSink:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"KafkaSink(bootstrap={self.settings.bootstrap!r}, connected={self.connected})"
