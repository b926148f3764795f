"""What the Kafka clients need: `KafkaSettings`, the ``kafka://`` URL and the name checks.

`KafkaSettings` validates everything once, at construction, with one-line messages, and turns it
into kafka-python keyword arguments (`KafkaSettings.consumer_kwargs`, `KafkaSettings.producer_kwargs`).
Its ``repr()`` never shows the SASL password.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, fields
from typing import Any
from urllib.parse import parse_qsl, unquote, urlsplit

from .redact import redact_in_kafka_logs

SECURITY_PROTOCOLS = ("PLAINTEXT", "SSL", "SASL_PLAINTEXT", "SASL_SSL")
SASL_MECHANISMS = ("PLAIN", "SCRAM-SHA-256", "SCRAM-SHA-512")
CLIENT_ID = "shiftsieve"

# fullmatch, not ^...$: "$" also matches before a final newline, which would let "topic\n" through.
_TOPIC_RE = re.compile(r"[A-Za-z0-9._-]{1,249}")
_HOST_RE = re.compile(r"(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9._-]+):(\d{1,5})")


def _valid_topic(topic: Any) -> bool:
    return isinstance(topic, str) and bool(_TOPIC_RE.fullmatch(topic)) and topic not in (".", "..")


def _valid_host(hostport: str) -> bool:
    m = _HOST_RE.fullmatch(hostport)
    return bool(m) and 1 <= int(m.group(2)) <= 65535


def check_topic(topic: str) -> None:
    """Raise ValueError unless ``topic`` follows Kafka's topic-name rule (1-249 of A-Z a-z 0-9 . _ -,
    not . or ..), so a bad name fails where it is configured rather than at the first send."""
    if not _valid_topic(topic):
        raise ValueError(f"invalid Kafka topic {topic!r}: use 1-249 characters from A-Z a-z 0-9 . _ -")


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
            if not _valid_host(hostport):
                raise ValueError(f"invalid Kafka bootstrap address {hostport!r}: expected HOST:PORT")
        check_topic(self.topic)
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
            redact_in_kafka_logs(self.sasl_password)
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
        if not _valid_host(h):
            raise ValueError(f"invalid Kafka URL {url!r}: bad broker address {h!r}, {shape}")
    topic = unquote(parts.path[1:] if parts.path.startswith("/") else parts.path)
    if not topic:
        raise ValueError(f"invalid Kafka URL {url!r}: missing /TOPIC, {shape}")
    if not _valid_topic(topic):
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
