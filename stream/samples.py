"""Per-sample inputs: the one-sample message, and assembly of samples into per-entity vectors.

One sample per message (JSON)::

    {"ts": 1780000000.0, "name": "lat_p99_ms", "value": 182.0,
     "labels": {"service": "checkout", "instance": "checkout-3", "dependency": "payments"}}

`decode_sample` raises only `DecodeError` (reasons in `SAMPLE_REASONS`). `ts`, size and
JSON parsing follow the vector message exactly (decode.py). `value` is a number or
null (missing); unlike a vector entry, a single sample with an unusable value has nothing
else worth keeping, so it is rejected with the per-value reason ("numeric_string",
"not_a_number", "non_finite", "out_of_range"; decode.py's rule). `name` must not carry a
``{...}`` label set: labels go in `labels`, and the assembler writes the series notation itself.

`SampleAssembler` turns samples (from this message or from OTLP, see otlp.py) into the
`Vector`s the engine consumes, on a fixed `step`:

- entity = the values of `entity_labels`, joined with "/"; the vector's `labels` are those
  entity labels. A sample without one of them (or with an empty value) is "no_entity".
  Two entities whose joined values coincide (a value containing "/") share one entity.
- metric name = the sample name plus its other labels in Prometheus series notation,
  ``name{k="v",...}`` (`series_name`), which `assemble.metric_labels` reads back.
- time: bucket start = floor(ts / step) * step, the vector's `ts`.

Decisions (other engineers rely on them):

- **Global watermark** = the largest sample ts seen (over all entities). A bucket is
  emitted once ``watermark >= bucket_start + step + allowed_lateness``, and a sample
  for such a bucket is "late" (the same expression decides both, so a bucket is never
  emitted twice). Lateness is therefore a pure function of the sample's ts and the
  watermark: an entity's state is dropped as soon as its last open bucket is emitted,
  so memory holds only open buckets, churned entities (pods) vanish, and a silent
  entity's last vector is emitted on time instead of at shutdown. The price:
  `allowed_lateness` must cover clock skew between producers and lag between
  partitions, and a producer whose clock runs far ahead closes everyone's buckets.
- **Duplicates**: a second value for the same series in the same open bucket is counted
  as "duplicate" and the one with the later ts is kept (equal ts: the later arrival),
  i.e. the value as of the end of the bucket, independent of arrival order. A duplicate
  is still "accepted" (it was taken into an open bucket); it is not a rejection.
- "out_of_order": accepted into a bucket older than the entity's newest open bucket.
- Samples rejected before placement (no_entity, bad_entity, bad_name, label_collision)
  and late ones do not move the watermark; others do, before the caps are checked, so
  closing buckets frees room first.
- Caps: `max_entities` entities with open buckets ("entity_limit"), `max_open_buckets`
  per entity ("bucket_limit"), `limits.max_metrics` series per bucket
  ("too_many_metrics"); entity and series names are bounded by `limits` like a decoded
  vector ("bad_entity", "bad_name"). Label keys that are not Prometheus label names
  (``service.version``) are written with "_" for each other character; two keys that
  then collide are "label_collision"; labels with an empty value are left out.
- `flush()` emits every open bucket and moves the watermark past them, so a sample
  arriving afterwards for a flushed bucket is late, never a second vector.

`counts` holds one entry per outcome of `add` ("accepted" and each of `REJECT_REASONS`)
plus two annotations of accepted samples ("duplicate", "out_of_order"). Conservation:
samples added == ``counts["accepted"] + sum(counts[r] for r in REJECT_REASONS)``, and the
series in all emitted vectors number ``accepted - duplicate``.
"""

from __future__ import annotations

import functools
import heapq
import math
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import orjson

from .decode import (DEFAULT_LIMITS, DecodeError, DecodeLimits, Vector, check_labels, check_timestamp,
                     load_json)
from .values import is_number, is_utf8, kind_of, not_a_number_reason, show, show_value

__all__ = [
    "REJECT_REASONS",
    "SAMPLE_REASONS",
    "Sample",
    "SampleAssembler",
    "check_name",
    "check_value",
    "decode_sample",
    "encode_sample",
    "series_name",
]

#: Reasons `decode_sample` rejects a message (DecodeError.reason).
SAMPLE_REASONS = frozenset({
    "bad_input", "too_large", "bad_json", "not_object",
    "no_ts", "bad_ts", "naive_ts", "ts_out_of_range",
    "no_name", "bad_name", "bad_labels",
    "no_value", "numeric_string", "not_a_number", "non_finite", "out_of_range",
})

#: Reasons `SampleAssembler.add` rejects a sample.
REJECT_REASONS = frozenset({
    "late", "no_entity", "bad_entity", "bad_name", "label_collision",
    "entity_limit", "bucket_limit", "too_many_metrics",
})


@dataclass(frozen=True, slots=True)
class Sample:
    """One value of one series at one time; `value` None means missing."""

    ts: float
    name: str
    labels: dict[str, str]
    value: float | None


def decode_sample(raw: bytes | bytearray | memoryview | str, limits: DecodeLimits = DEFAULT_LIMITS) -> Sample:
    """Parse and validate one sample message; raises DecodeError only."""
    obj = load_json(raw, limits)
    if not isinstance(obj, Mapping):
        raise DecodeError("not_object", f"message must be a JSON object, not {kind_of(obj)}")
    ts = check_timestamp(obj.get("ts"), limits)
    name = check_name(obj.get("name"), limits)
    labels = check_labels(obj.get("labels"))
    if "value" not in obj:
        raise DecodeError("no_value", "'value' is missing (send null for a missing value)")
    return Sample(ts, name, labels, check_value(obj["value"], limits))


def encode_sample(sample: Sample) -> bytes:
    """The one-sample message of `sample`; `decode_sample` reads it back equal (e.g. for a producer)."""
    return orjson.dumps({"ts": sample.ts, "name": sample.name, "labels": sample.labels, "value": sample.value})


def check_name(value: Any, limits: DecodeLimits = DEFAULT_LIMITS) -> str:
    """A usable metric name (without a label set); DecodeError "no_name" / "bad_name" otherwise."""
    if value is None or value == "":
        raise DecodeError("no_name", "'name' is missing or empty")
    if not isinstance(value, str):
        raise DecodeError("bad_name", f"'name' must be a string, not {kind_of(value)}")
    if len(value) > limits.max_name_length:
        raise DecodeError("bad_name", f"'name' is {len(value)} characters, over the limit of "
                                      f"{limits.max_name_length} (max_name_length)")
    if not is_utf8(value):
        raise DecodeError("bad_name", "'name' contains unpaired surrogates (not valid UTF-8)")
    if "{" in value or "}" in value:
        raise DecodeError("bad_name", f"'name' {show(value)} contains braces; put series labels in 'labels'")
    return value


def check_value(value: Any, limits: DecodeLimits = DEFAULT_LIMITS) -> float | None:
    """A sample value as the vector decoder judges a metric entry: finite, bounded float or None."""
    if value is None:
        return None
    if not is_number(value):
        raise DecodeError(not_a_number_reason(value), f"'value' must be a number or null, not {show_value(value)}")
    try:
        x = float(value)
    except OverflowError:  # an integer beyond double range
        raise DecodeError("out_of_range", "'value' is an integer beyond double range") from None
    if -limits.max_abs_value <= x <= limits.max_abs_value:  # also false for NaN
        return x
    if math.isfinite(x):
        raise DecodeError("out_of_range", f"'value' {x!r} exceeds max_abs_value {limits.max_abs_value!r}")
    raise DecodeError("non_finite", f"'value' must be finite, got {x!r}")


_LABEL_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_NOT_LABEL_CHAR = re.compile(r"[^A-Za-z0-9_]")


@functools.lru_cache(maxsize=4096)
def _label_key(key: str) -> str:
    """A Prometheus label name for `key`: other characters become "_", a leading digit gets "_"."""
    if _LABEL_NAME.fullmatch(key):
        return key
    key = _NOT_LABEL_CHAR.sub("_", key)
    return "_" + key if key[:1].isdigit() else key


def _escape(value: str) -> str:
    return value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def series_name(name: str, labels: Mapping[str, str]) -> str:
    """``name{k="v",...}``: keys made label names and sorted, values escaped as in the Prometheus text
    format (backslash, double quote, newline); empty values left out; no labels -> plain `name`.

    ValueError when two keys map to the same label name (``a.b`` and ``a_b``).
    """
    pairs = {}
    for key, value in labels.items():
        if value:
            label = _label_key(key)
            if label in pairs:
                raise ValueError(f"labels {key!r} and another key both map to {label!r}")
            pairs[label] = value
    if not pairs:
        return name
    return name + "{" + ",".join(f'{k}="{_escape(pairs[k])}"' for k in sorted(pairs)) + "}"


def series_identity(name: str, labels: Mapping[str, str], entity_labels: Sequence[str],
                    limits: DecodeLimits = DEFAULT_LIMITS) -> tuple[str, str]:
    """The entity and metric of one series: the values of ``entity_labels`` joined with "/", and
    `series_name` of ``name`` with the other labels. Shared by live samples and replayed exports,
    so both name things alike. DecodeError (no_entity, bad_entity, label_collision, bad_name)."""
    missing = [k for k in entity_labels if not (labels.get(k) or "").strip()]   # as the vector decoder
    if missing:
        raise DecodeError("no_entity", f"has no {', '.join(missing)} label (source.entity_labels: "
                                       f"{', '.join(entity_labels)}); its labels: {', '.join(sorted(labels)) or 'none'}")
    entity = "/".join(labels[k] for k in entity_labels)
    if len(entity) > limits.max_entity_length:
        raise DecodeError("bad_entity", f"entity is {len(entity)} characters, over the limit of "
                                        f"{limits.max_entity_length} (max_entity_length)")
    try:
        metric = series_name(name, {k: v for k, v in labels.items() if k not in entity_labels})
    except ValueError as exc:
        raise DecodeError("label_collision", str(exc)) from None
    if len(metric) > limits.max_name_length:
        raise DecodeError("bad_name", f"metric name is {len(metric)} characters, over the limit of "
                                      f"{limits.max_name_length} (max_name_length)")
    return entity, metric


@dataclass(slots=True)
class _Entity:
    labels: dict[str, str]
    buckets: dict[float, dict[str, tuple[float, float | None]]]  # start -> series -> (ts, value)
    newest: float  # start of the newest open bucket


class SampleAssembler:
    """Samples -> one `Vector` per entity and step, emitted when the global watermark closes it.

    See the module docstring for the rules (watermark, duplicates, caps, conservation).
    """

    def __init__(self, entity_labels: Sequence[str], step: float, allowed_lateness: float,
                 max_entities: int = 100_000, max_open_buckets: int = 16, *,
                 limits: DecodeLimits = DEFAULT_LIMITS) -> None:
        if isinstance(entity_labels, str) or not entity_labels or not all(
                isinstance(k, str) and k for k in entity_labels):
            raise ValueError(f"entity_labels must be a non-empty list of label keys, got {entity_labels!r}")
        if not (math.isfinite(step) and step > 0):
            raise ValueError(f"step must be a positive number of seconds, got {step!r}")
        if not (math.isfinite(allowed_lateness) and allowed_lateness >= 0):
            raise ValueError(f"allowed_lateness must be >= 0 seconds, got {allowed_lateness!r}")
        for label, cap in (("max_entities", max_entities), ("max_open_buckets", max_open_buckets)):
            if type(cap) is not int or cap < 1:
                raise ValueError(f"{label} must be a positive integer, got {cap!r}")
        self.entity_labels = tuple(entity_labels)
        self.step = float(step)
        self.allowed_lateness = float(allowed_lateness)
        self.max_entities = max_entities
        self.max_open_buckets = max_open_buckets
        self.limits = limits
        self.watermark = -math.inf
        self.counts: dict[str, int] = dict.fromkeys(
            ("accepted", "duplicate", "out_of_order", *sorted(REJECT_REASONS)), 0)
        self._entities: dict[str, _Entity] = {}
        self._heap: list[tuple[float, str]] = []  # (bucket start, entity) of every open bucket
        # (bucket start, entity) -> {partition: lowest offset of a message with a sample in it}
        self._origins: dict[tuple[float, str], dict[str, int]] = {}

    @property
    def open_buckets(self) -> int:
        """Buckets held in memory, waiting for the watermark."""
        return len(self._heap)

    def held_offsets(self) -> dict[str, int]:
        """Per partition, the lowest offset of a message with a sample still in an open bucket: a
        snapshot or commit must not go past it, or a crash would lose the bucket's samples."""
        floor: dict[str, int] = {}
        for origins in self._origins.values():
            for partition, offset in origins.items():
                if offset < floor.get(partition, offset + 1):
                    floor[partition] = offset
        return floor

    def add(self, sample: Sample, origin: tuple[str, int] | None = None) -> tuple[list[Vector], str | None]:
        """Take one sample: the vectors it completes, and its rejection reason (None = accepted).

        ``origin`` is the (partition, offset) of its message, for :meth:`held_offsets`."""
        try:
            entity, name = series_identity(sample.name, sample.labels, self.entity_labels, self.limits)
        except DecodeError as exc:
            return [], self._reject(exc.reason)
        start = math.floor(sample.ts / self.step) * self.step
        if self._closed(start):
            return [], self._reject("late")
        emitted: list[Vector] = []
        if sample.ts > self.watermark:
            self.watermark = sample.ts
            emitted = self._emit(self._closed)
        reason = self._place(entity, start, name, sample)
        if reason is None and origin is not None:
            origins = self._origins.setdefault((start, entity), {})
            partition, offset = origin
            if offset < origins.get(partition, offset + 1):
                origins[partition] = offset
        return emitted, reason

    def flush(self) -> list[Vector]:
        """Emit every open bucket (end of input, shutdown); later samples for them are late."""
        if self._heap:
            newest = max(start for start, _ in self._heap)
            self.watermark = max(self.watermark, newest + self.step + self.allowed_lateness)
        return self._emit(lambda s: True)

    def _closed(self, start: float) -> bool:
        return start + self.step + self.allowed_lateness <= self.watermark

    def _place(self, entity: str, start: float, name: str, sample: Sample) -> str | None:
        state = self._entities.get(entity)
        if state is None:
            if len(self._entities) >= self.max_entities:
                return self._reject("entity_limit")
            labels = {key: sample.labels[key] for key in self.entity_labels}
            state = self._entities[entity] = _Entity(labels, {}, start)
        bucket = state.buckets.get(start)
        if bucket is None:
            if len(state.buckets) >= self.max_open_buckets:
                return self._reject("bucket_limit")
            bucket = state.buckets[start] = {}
            heapq.heappush(self._heap, (start, entity))
        held = bucket.get(name)
        if held is None and len(bucket) >= self.limits.max_metrics:
            return self._reject("too_many_metrics")
        if start < state.newest:
            self.counts["out_of_order"] += 1
        state.newest = max(state.newest, start)
        if held is not None:
            self.counts["duplicate"] += 1
        if held is None or sample.ts >= held[0]:
            bucket[name] = (sample.ts, sample.value)
        self.counts["accepted"] += 1
        return None

    def _emit(self, closed: Callable[[float], bool]) -> list[Vector]:
        """Pop the open buckets, oldest first (then by entity), while `closed(start)` holds."""
        out = []
        while self._heap and closed(self._heap[0][0]):
            start, entity = heapq.heappop(self._heap)
            state = self._entities[entity]
            bucket = state.buckets.pop(start)
            self._origins.pop((start, entity), None)
            if not state.buckets:
                del self._entities[entity]
            out.append(Vector(start, entity, {n: bucket[n][1] for n in sorted(bucket)}, dict(state.labels)))
        return out

    def _reject(self, reason: str) -> str:
        self.counts[reason] += 1
        return reason
