"""``shiftsieve produce``: write a replay input (by default a bundled incident) into a Kafka topic.

    shiftsieve produce --brokers HOST:PORT[,HOST:PORT] --topic TOPIC [--encoding vector|sample|otlp_json]
                       [--scenario NAME | --input FILE] [--speedup X] [--loop] [--config FILE]

For staging and the compose stack: a live detector reads what this writes. The input is read
like ``replay`` reads it (:func:`.replay.open_input`: same readers, limits and rejections;
rejected lines are counted and skipped). Every message is keyed by the vector's entity, so an
entity stays on one partition.

Encodings (the default is ``source.encoding`` of the configuration, so a producer and a
service sharing one configuration agree):

- ``vector``: the vector message (:func:`.decode.encode_vector`), one per vector.
- ``sample``: one message per metric (:func:`.samples.encode_sample`).
- ``otlp_json``: one OTLP/JSON ExportMetricsServiceRequest per vector (:func:`.otlp.encode_otlp`):
  the resource attributes are the vector's labels plus the entity labels, one gauge per metric.

Sample and OTLP messages carry the entity as labels, ``source.entity_labels`` (the service joins
their values with "/"), derived by :func:`entity_labels_for`: an entity that already reads
``v1/v2/...`` with one non-empty part per entity label is split back into them (exact); otherwise
the last entity label is the entity name and the others come from the vector's labels (the entity
name where a vector lacks one). With the default ``["service", "instance"]`` the demo's
``booking-api-2`` (label ``service="booking-api"``) arrives as ``booking-api/booking-api-2``; a
single entity label keeps every name as it is. A metric name in series notation,
``name{k="v"}``, is sent as its base name and labels; the service writes it back with sorted keys.
Metric labels named like an entity label give way to it. A missing value is ``null`` (sample) or
a point flagged "no recorded value" (OTLP, which the decoder skips: the metric is absent).

Time base: timestamps are rewritten so that a live stack sees current data. The first vector
moves to the run's start time, rounded down to a whole ``source.step_seconds`` (the spacing and
the phase within a step are kept, so the service assembles samples into the same steps); each
``--loop`` pass moves on by the input's span rounded up to the next whole step, so every entity's
timestamps keep increasing (the detector refuses older ones as out_of_order). ``--speedup X``
sends event time X times faster than real time (60: one minute of data per second) from the first
vector on; 0 (or ``max``) sends as fast as the broker takes it. Event time then runs ahead of the
wall clock, by design: the spacing between vectors is the data's, not the wall clock's.

A broker that cannot be reached, a topic that cannot be written, and bad arguments end with a
one-line error (:class:`ProduceError`, exit 2 from the CLI). SIGTERM or SIGINT stops after the
current message, delivers what was sent and exits 0; a one-line summary goes to stderr.

>>> v = Vector(1780000000.0, "booking-api-2", {"db_pool_wait_p99_ms": 2.4}, {"service": "booking-api"})
>>> entity_labels_for(v, ["service", "instance"])
{'service': 'booking-api', 'instance': 'booking-api-2'}
>>> [(key, value.decode()) for key, value in encode_messages(v, "sample", ["service", "instance"])]
[(b'booking-api-2', '{"ts":1780000000.0,"name":"db_pool_wait_p99_ms","labels":{"service":"booking-api","instance":"booking-api-2"},"value":2.4}')]
"""

from __future__ import annotations

import functools
import math
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

from .assemble import metric_labels
from .config import ENCODINGS, Config
from .decode import Vector, encode_vector
from .otlp import encode_otlp
from .lines import InputError, Rejected
from .replay import open_input
from .samples import Sample, encode_sample

__all__ = ["ENCODINGS", "Pacer", "ProduceError", "ProduceSummary", "encode_messages", "entity_labels_for",
           "parse_speedup", "produce", "run_produce"]

_GROUP = "shiftsieve-produce"       # required by the settings' URL form; a producer joins no group
_SLICE_SECONDS = 0.2                # longest single sleep, so a stop request is seen promptly
_FLUSH_SECONDS = 10.0


class ProduceError(Exception):
    """Bad arguments or an unusable broker; str() is one line."""


Message = tuple[bytes, bytes]   # (key, value)
Send = Callable[[bytes, bytes], None]


def parse_speedup(text: str) -> float:
    """``--speedup``: a positive finite factor, or 0 / ``max`` for as fast as possible (returned as 0.0)."""
    if text.strip().lower() == "max":
        return 0.0
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not (math.isfinite(value) and value >= 0):
        raise ProduceError(f"--speedup: expected a positive number, 0 or max, got {text!r}")
    return value


def entity_labels_for(vector: Vector, entity_labels: Sequence[str]) -> dict[str, str]:
    """The ``source.entity_labels`` values that name ``vector``'s entity (rules in the module docstring)."""
    parts = vector.entity.split("/")
    if len(parts) == len(entity_labels) and all(p.strip() for p in parts):
        return dict(zip(entity_labels, parts))
    *others, last = entity_labels
    labels = {key: vector.labels[key] if (vector.labels.get(key) or "").strip() else vector.entity
              for key in others}
    labels[last] = vector.entity
    return labels


@functools.lru_cache(maxsize=65536)
def _series(name: str) -> tuple[str, tuple[tuple[str, str], ...]]:
    """A metric name's base name and labels (series notation); a name without them as it is."""
    labels = metric_labels(name)
    return (name.split("{", 1)[0], tuple(labels.items())) if labels else (name, ())


def _samples(vector: Vector, entity: dict[str, str], with_entity: bool) -> list[Sample]:
    """One Sample per metric: base name, its series labels (minus entity keys), plus ``entity`` if asked."""
    out = []
    for name, value in vector.metrics.items():
        base, pairs = _series(name)
        labels = {k: v for k, v in pairs if k not in entity}
        if with_entity:
            labels.update(entity)
        out.append(Sample(vector.ts, base, labels, value))
    return out


def encode_messages(vector: Vector, encoding: str, entity_labels: Sequence[str]) -> list[Message]:
    """The (key, value) messages of one vector in ``encoding``; key = the entity (UTF-8)."""
    key = vector.entity.encode("utf-8")
    if encoding == "vector":
        return [(key, encode_vector(vector))]
    entity = entity_labels_for(vector, entity_labels)
    if encoding == "sample":
        return [(key, encode_sample(s)) for s in _samples(vector, entity, with_entity=True)]
    if encoding == "otlp_json":
        return [(key, encode_otlp(vector.labels | entity, _samples(vector, entity, with_entity=False)))]
    raise ValueError(f"unknown encoding {encoding!r}: one of {', '.join(ENCODINGS)}")


class Pacer:
    """Holds each vector back until its event time is due: the first ``wait`` starts the wall clock,
    then ``ts`` is due at ``start + (ts - first ts) / speedup`` (speedup 0: never waits).

    ``clock`` and ``sleep`` are injectable (tests); sleeps are sliced so ``stopped()`` is seen within
    0.2 s. ``wait`` returns False when stopped.
    """

    def __init__(self, speedup: float, *, clock: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], None] = time.sleep, stopped: Callable[[], bool] = lambda: False) -> None:
        if not (math.isfinite(speedup) and speedup >= 0):
            raise ValueError(f"speedup must be a finite number >= 0, got {speedup!r}")
        self.speedup = speedup
        self.clock, self.sleep, self.stopped = clock, sleep, stopped
        self._origin: tuple[float, float] | None = None   # (first ts, wall clock then)

    def wait(self, ts: float) -> bool:
        if self.stopped():
            return False
        if self._origin is None:
            self._origin = (ts, self.clock())
        if self.speedup == 0:
            return True
        first, wall = self._origin
        due = wall + (ts - first) / self.speedup
        while (left := due - self.clock()) > 0:
            self.sleep(min(left, _SLICE_SECONDS))
            if self.stopped():
                return False
        return True


@dataclass
class ProduceSummary:
    """What a run sent."""

    messages: int
    vectors: int
    passes: int
    rejected: int
    seconds: float
    stopped: bool = False

    @property
    def rate(self) -> float:
        return self.messages / self.seconds if self.seconds > 0 else float("inf")

    def format(self) -> str:
        line = (f"{self.messages:,} messages ({self.vectors:,} vectors, {self.passes} "
                f"pass{'es' if self.passes != 1 else ''}) in {self.seconds:.2f} s ({self.rate:,.0f} messages/s)")
        if self.rejected:
            line += f"; {self.rejected:,} input lines rejected"
        return line + ("; stopped by signal" if self.stopped else "")


def produce(open_records: Callable[[], Iterator[Vector | Rejected]], send: Send, *, encoding: str,
            entity_labels: Sequence[str], step: float, speedup: float = 0.0, loop: bool = False,
            start: float | None = None, clock: Callable[[], float] = time.monotonic,
            sleep: Callable[[float], None] = time.sleep, stopped: Callable[[], bool] = lambda: False,
            ) -> ProduceSummary:
    """Send every vector of ``open_records()`` (called once per pass, closed after it; e.g. a
    :class:`.readers.RecordStream`) through ``send(key, value)``.

    ``start``: epoch seconds the first vector moves to (rounded down to a whole ``step``; see the
    module docstring); None keeps the input's timestamps (passes after the first still move on).
    InputError when the first pass has no vector.
    """
    if encoding not in ENCODINGS:
        raise ValueError(f"unknown encoding {encoding!r}: one of {', '.join(ENCODINGS)}")
    pacer = Pacer(speedup, clock=clock, sleep=sleep, stopped=stopped)
    began = clock()
    messages = vectors = rejected = passes = 0
    shift: float | None = None
    span: tuple[float, float] | None = None   # (min ts, max ts) of the input, from the first pass
    while True:
        low, high = math.inf, -math.inf
        records = open_records()
        try:
            for record in records:
                if isinstance(record, Rejected):
                    rejected += 1
                    continue
                if shift is None:
                    shift = 0.0 if start is None else math.floor((start - record.ts) / step) * step
                low, high = min(low, record.ts), max(high, record.ts)
                moved = Vector(record.ts + shift, record.entity, record.metrics, record.labels) if shift else record
                if not pacer.wait(moved.ts):
                    return ProduceSummary(messages, vectors, passes + 1, rejected, clock() - began, stopped=True)
                for key, value in encode_messages(moved, encoding, entity_labels):
                    send(key, value)
                    messages += 1
                vectors += 1
        finally:
            getattr(records, "close", lambda: None)()   # also when stopped mid-pass
        passes += 1
        if span is None:
            if high < low:
                raise InputError("no valid vector in the input"
                                 + (f" ({rejected} lines rejected)" if rejected else ""))
            span = (low, high)
        if not loop or stopped():
            return ProduceSummary(messages, vectors, passes, rejected, clock() - began, stopped=stopped())
        shift += (math.floor((span[1] - span[0]) / step) + 1) * step


def source_path(scenario: str | None, input_path: str | None) -> Path:
    """The file to produce: ``--input``, else the bundled incident ``scenario`` (default: demo's)."""
    if input_path is not None:
        return Path(input_path)
    from .demo import DEFAULT_SCENARIO, scenarios   # noqa: PLC0415  (demo pulls in evaluation; only needed here)
    available = scenarios()
    name = scenario or DEFAULT_SCENARIO
    if name not in available:
        raise ProduceError(f"--scenario: no bundled incident named {name!r}; available: {', '.join(available)}")
    return available[name]


class _KafkaWriter:
    """kafka-python producer from the [kafka] settings; the first failure (sending, or a delivery
    reported later) is raised as one ProduceError."""

    def __init__(self, config: Config, brokers: str, topic: str) -> None:
        from .kafka import KafkaSettings, describe_error, import_kafka   # noqa: PLC0415  (kafka-python is heavy)
        self.describe_error = describe_error
        try:   # the bootstrap list and topic, checked with the settings' own one-line messages
            hosts = KafkaSettings(bootstrap=brokers, topic=topic, group=_GROUP).bootstrap
        except ValueError as exc:
            raise ProduceError(str(exc)) from None
        settings = config.kafka_settings(f"kafka://{','.join(hosts)}/{topic}?group={_GROUP}")
        self.kafka = import_kafka()
        self.topic, self.where = topic, ",".join(hosts)
        kwargs = settings.producer_kwargs()   # max_block_ms bounds every wait for metadata
        if settings.api_version is None:   # with api_version=auto the constructor talks to the broker
            kwargs["bootstrap_timeout_ms"] = 5000
        try:
            self.producer = self.kafka.KafkaProducer(**kwargs)
        except Exception as exc:  # noqa: BLE001  (no broker answers, TLS or SASL refused)
            raise ProduceError(f"cannot connect to Kafka at {self.where}: {describe_error(exc)}") from None
        self._error: str | None = None

    def _failed(self, exc: BaseException) -> None:
        if self._error is None:
            self._error = f"delivery to topic {self.topic!r} at {self.where} failed: {self.describe_error(exc)}"

    def send(self, key: bytes, value: bytes) -> None:
        if self._error is not None:
            raise ProduceError(self._error)
        try:
            future = self.producer.send(self.topic, key=key, value=value)
        except self.kafka.errors.KafkaTimeoutError as exc:
            raise ProduceError(f"cannot write to topic {self.topic!r} at {self.where} "
                               f"(broker unreachable or topic missing): {self.describe_error(exc)}") from None
        except Exception as exc:  # noqa: BLE001  (message too large, closed producer)
            raise ProduceError(f"cannot send to topic {self.topic!r}: {self.describe_error(exc)}") from None
        future.add_errback(self._failed)

    def close(self, timeout_s: float = _FLUSH_SECONDS) -> None:
        """Deliver what was sent (waiting at most ``timeout_s``), then close; ProduceError if some
        of it was not delivered."""
        try:
            self.producer.flush(timeout=timeout_s)
        except Exception as exc:  # noqa: BLE001  (not delivered in time: broker gone)
            self._failed(exc)
        try:
            self.producer.close(timeout=0)
        except Exception:  # noqa: BLE001  (its own flush of what is still pending: reported above)
            pass
        if self._error is not None:
            raise ProduceError(self._error)


def run_produce(config: Config, *, brokers: str, topic: str, encoding: str | None = None,
                scenario: str | None = None, input_path: str | None = None, speedup: str = "0",
                loop: bool = False) -> int:
    """The CLI command: validate, connect, produce until done or stopped, print the summary (stderr)."""
    encoding = encoding or config.source.encoding
    factor = parse_speedup(speedup)
    path = source_path(scenario, input_path)
    open_input(path, config).close()   # a missing or unreadable input fails before connecting
    writer = _KafkaWriter(config, brokers, topic)
    stop = threading.Event()
    handlers = {}
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGTERM, signal.SIGINT):
            handlers[sig] = signal.signal(sig, lambda *_: stop.set())
    try:
        try:
            summary = produce(lambda: open_input(path, config), writer.send, encoding=encoding,
                              entity_labels=config.source.entity_labels, step=config.source.step_seconds,
                              speedup=factor, loop=loop, start=time.time(), stopped=stop.is_set)
        except BaseException:
            try:
                writer.close(timeout_s=0.5)   # the first error is the one to report
            except ProduceError:
                pass
            raise
        flushing = time.monotonic()
        writer.close()
        summary.seconds += time.monotonic() - flushing   # the rate counts delivered messages
    finally:
        for sig, handler in handlers.items():
            signal.signal(sig, handler)
    print(f"shiftsieve: produced to topic {topic!r} ({encoding}): {summary.format()}", file=sys.stderr)
    return 0
