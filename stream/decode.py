"""Decoding of the vector message (DEVELOPERS.md, Contracts) into a validated `Vector`.

One JSON object per Kafka message value or per line of a .jsonl file::

    {"ts": 1780000000.0, "entity": "checkout-3",
     "metrics": {"cpu_util": 0.41, "lat_p99_ms": 182.0}, "labels": {"host": "h1"}}

The decode layer never raises anything but `DecodeError` for bad input; its
`.reason` is one of `REASONS` and `str()` is a sentence for a human. Policy:

- A whole message is rejected only when it cannot give a usable vector: too
  large (checked before parsing), not JSON, not an object, bad or missing
  `ts` / `entity`, `metrics` missing, not an object or empty ("no_metrics":
  an empty vector carries no information and usually means a producer bug;
  also when every entry has a bad name), too many metrics, or malformed
  `labels` (must be string -> string; sizes bounded only by max_bytes).
- A single bad metric loses only itself: a value that is not a number (string,
  boolean, array, object), not finite, or beyond `max_abs_value` becomes
  missing (None) and is listed in `Vector.invalid` as (name, reason), its value
  shown in `Vector.shown`: "numeric_string" (a JSON number sent as a string,
  ``"12"``: the contract is a number, RFC 8259 keeps the two apart), "not_a_number"
  (other strings such as ``"n/a"``, booleans, arrays, objects),
  "non_finite" (NaN, infinities, and JSON numbers beyond
  double range such as 1e400), "out_of_range" (|x| > max_abs_value, or an
  integer too large for a float). An entry
  whose *name* is unusable (empty, too long, not a string, not encodable as
  UTF-8) is left out of `metrics` and listed as (clipped name, "bad_name").
- Parsing is orjson (fast path). JSON that orjson refuses is retried with the
  stdlib parser, which additionally reads the non-standard literals `NaN`,
  `Infinity`, `-Infinity` (emitted by Python's `json.dumps` by default) and
  numbers beyond double range; those values then fall under the per-metric
  rule above instead of losing the whole vector. Everything else orjson
  refuses (syntax, invalid UTF-8, nesting deeper than 1024) stays "bad_json".
- Duplicate keys: the last occurrence wins (both parsers behave so).
- Unknown top-level keys are ignored (forward compatibility); `labels` may be
  absent or null.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, Mapping

import numpy as np
import orjson

from .timefmt import rfc3339
from .values import is_number, is_utf8, kind_of, not_a_number_reason, show, show_value

__all__ = [
    "DEFAULT_LIMITS",
    "INVALID_VALUE_REASONS",
    "REASONS",
    "DecodeError",
    "DecodeLimits",
    "Vector",
    "check_labels",
    "check_size",
    "check_timestamp",
    "decode_vector",
    "encode_vector",
    "load_json",
    "parse_timestamp",
    "vector_from_object",
]

#: Reasons a whole message is rejected (DecodeError.reason).
REASONS = frozenset({
    "bad_input",         # not bytes / bytearray / memoryview / str
    "too_large",         # more than max_bytes
    "bad_json",          # not parseable JSON
    "not_object",        # top level is not a JSON object
    "no_ts", "bad_ts", "naive_ts", "ts_out_of_range",
    "no_entity", "bad_entity",
    "no_metrics", "bad_metrics", "too_many_metrics",
    "bad_labels",
})

#: Reasons in Vector.invalid for single entries treated as missing.
INVALID_VALUE_REASONS = frozenset({"bad_name", "numeric_string", "not_a_number", "non_finite", "out_of_range"})


class Layout:
    """An ordered tuple of metric names whose hash is computed once.

    Producers send the same names in the same order message after message; the decoder hands
    every such vector the same Layout object, so grouping a batch by layout and looking up its
    columns costs a pointer compare instead of hashing 200 names again at every step.
    """

    __slots__ = ("names", "_hash")

    def __init__(self, names: tuple[str, ...]) -> None:
        self.names = names
        self._hash = hash(names)

    def __hash__(self) -> int:
        return self._hash

    def __eq__(self, other: object) -> bool:
        return self is other or (type(other) is Layout and self._hash == other._hash and self.names == other.names)

    def __len__(self) -> int:
        return len(self.names)

    def __repr__(self) -> str:
        return f"Layout({len(self.names)} names)"


#: Layouts already seen, with their shortest and longest name when every name is a UTF-8 str:
#: checking 200 names costs more than parsing them. A bounded memo of a pure function of the
#: names, so sharing it between callers is safe.
_LAYOUTS: dict[tuple, tuple[Layout, tuple[int, int] | None]] = {}
_MAX_LAYOUTS = 1024


def layout_of(names: tuple) -> tuple[Layout, tuple[int, int] | None]:
    """The shared Layout of ``names``, and (shortest, longest) name length or None when a name is
    not a UTF-8-encodable str."""
    known = _LAYOUTS.get(names)
    if known is not None:
        return known
    try:
        "".join(names).encode("utf-8")  # TypeError for a non-str name, UnicodeEncodeError for surrogates
    except (TypeError, UnicodeEncodeError):
        lengths = None
    else:
        sizes = list(map(len, names))
        lengths = (min(sizes), max(sizes)) if sizes else (0, 0)
    if len(_LAYOUTS) >= _MAX_LAYOUTS:
        _LAYOUTS.clear()
    known = _LAYOUTS[names] = (Layout(names), lengths)
    return known


@dataclass(frozen=True, slots=True)
class Vector:
    """One entity's metric sample at one time; metric values are finite floats or None (missing).

    ``layout`` and ``values`` are the same metrics as a shared name layout and a float array
    (NaN where missing), which is what assembly stacks; they are derived from ``metrics`` when
    not given (the decoder builds them while it validates).
    """

    ts: float
    entity: str
    metrics: dict[str, float | None]
    labels: dict[str, str]
    invalid: tuple[tuple[str, str], ...] = ()
    layout: Layout = field(default=None, compare=False, repr=False)  # type: ignore[assignment]
    values: np.ndarray = field(default=None, compare=False, repr=False)  # type: ignore[assignment]
    #: The invalid entries' values as `values.show_value` gives them, parallel to ``invalid`` (for dead
    #: letters; empty when the decoder did not keep them).
    shown: tuple[str, ...] = field(default=(), compare=False, repr=False)

    def __post_init__(self) -> None:
        if self.layout is None:
            object.__setattr__(self, "layout", layout_of(tuple(self.metrics))[0])
        if self.values is None:
            object.__setattr__(self, "values", np.array(list(self.metrics.values()), dtype=float))


class DecodeError(ValueError):
    """Bad input: `.reason` is a slug from REASONS, `str()` a human sentence."""

    def __init__(self, reason: str, message: str) -> None:
        super().__init__(message)
        self.reason = reason

    def __reduce__(self) -> tuple[type, tuple[str, str]]:  # picklable across processes
        return (type(self), (self.reason, str(self)))


_TS_2000 = 946684800.0   # 2000-01-01T00:00:00Z
_TS_2100 = 4102444800.0  # 2100-01-01T00:00:00Z


@dataclass(frozen=True)
class DecodeLimits:
    """Bounds that keep one message from costing unbounded memory or poisoning the model."""

    max_bytes: int = 1 << 20          # whole message, checked before parsing
    max_metrics: int = 10_000         # entries in "metrics"
    max_name_length: int = 200        # characters of a metric name
    max_entity_length: int = 256      # characters of the entity
    min_ts: float = _TS_2000          # accepted window, inclusive, epoch seconds
    max_ts: float = _TS_2100
    max_abs_value: float = 1e300      # larger magnitudes are invalid (would overflow when squared)

    def __post_init__(self) -> None:
        for name in ("max_bytes", "max_metrics", "max_name_length", "max_entity_length"):
            value = getattr(self, name)
            if type(value) is not int or value < 1:
                raise ValueError(f"DecodeLimits.{name} must be a positive integer, got {value!r}")
        if not (math.isfinite(self.min_ts) and math.isfinite(self.max_ts) and self.min_ts < self.max_ts):
            raise ValueError(f"DecodeLimits needs finite min_ts < max_ts, got {self.min_ts!r}, {self.max_ts!r}")
        if not (self.max_abs_value > 0):
            raise ValueError(f"DecodeLimits.max_abs_value must be > 0, got {self.max_abs_value!r}")


DEFAULT_LIMITS = DecodeLimits()


def check_size(size: int, limits: DecodeLimits = DEFAULT_LIMITS) -> None:
    """Reject a message of `size` bytes over `limits.max_bytes` (shared with the file readers)."""
    if size > limits.max_bytes:
        raise DecodeError("too_large", f"message is {size:,} bytes, over the limit of "
                                       f"{limits.max_bytes:,} bytes (max_bytes)")


def load_json(raw: bytes | bytearray | memoryview | str, limits: DecodeLimits = DEFAULT_LIMITS) -> Any:
    """Size check, then parse (orjson; the stdlib fallback reads NaN/Infinity); DecodeError only."""
    if isinstance(raw, str):
        size = len(raw)  # a lower bound of the UTF-8 size, exact when it already exceeds the limit
        if size <= limits.max_bytes < 4 * size:
            size = len(raw.encode("utf-8", "surrogatepass"))
    elif isinstance(raw, (bytes, bytearray)):
        size = len(raw)
    elif isinstance(raw, memoryview):
        size = raw.nbytes
    else:
        raise DecodeError("bad_input", f"message must be bytes or str, not {type(raw).__name__}")
    check_size(size, limits)
    try:
        return orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        return _parse_lenient(raw, exc)


def decode_vector(raw: bytes | bytearray | memoryview | str,
                  limits: DecodeLimits = DEFAULT_LIMITS) -> Vector:
    """Parse and validate one JSON vector message; raises DecodeError only."""
    return vector_from_object(load_json(raw, limits), limits)


def encode_vector(vector: Vector) -> bytes:
    """The message for a Vector (e.g. for a dead letter); decode_vector gives it back with invalid=()."""
    obj: dict[str, Any] = {"ts": vector.ts, "entity": vector.entity, "metrics": vector.metrics}
    if vector.labels:
        obj["labels"] = vector.labels
    return orjson.dumps(obj)


def _parse_lenient(raw: bytes | bytearray | memoryview | str, strict_error: json.JSONDecodeError) -> Any:
    """Slow path: stdlib JSON also reads NaN/Infinity and out-of-range numbers; else bad_json."""
    try:
        text = raw if isinstance(raw, str) else bytes(raw).decode("utf-8")
        return json.loads(text)
    except (ValueError, RecursionError):  # JSONDecodeError, UnicodeDecodeError, int digit limit
        # orjson's "line 1 column N" would be confused with the line number of a file
        raise DecodeError("bad_json", f"not valid JSON: {strict_error.msg} (at character {strict_error.pos})") from None


def vector_from_object(obj: Any, limits: DecodeLimits = DEFAULT_LIMITS) -> Vector:
    """Validate a parsed message (a mapping, from JSON or a CSV row) into a Vector; DecodeError only."""
    if type(obj) is not dict and not isinstance(obj, Mapping):   # the ABC check is slow: dicts first
        raise DecodeError("not_object", f"message must be a JSON object, not {kind_of(obj)}")
    ts = check_timestamp(obj.get("ts"), limits)
    entity = _entity(obj.get("entity"), limits)
    metrics, invalid, layout, values, shown = _metrics(obj.get("metrics"), limits)
    labels = check_labels(obj.get("labels"))
    return Vector(ts, entity, metrics, labels, invalid, layout, values, shown)


def check_timestamp(value: Any, limits: DecodeLimits) -> float:
    """A message's ``ts`` as epoch seconds inside the accepted window; DecodeError otherwise."""
    if value is None:
        raise DecodeError("no_ts", "'ts' is missing")
    ts = parse_timestamp(value)
    if not limits.min_ts <= ts <= limits.max_ts:
        hint = " (it looks like milliseconds; send seconds)" if limits.min_ts <= ts / 1000 <= limits.max_ts else ""
        raise DecodeError("ts_out_of_range",
                          f"'ts' {ts!r} is outside the accepted window {rfc3339(limits.min_ts)} .. "
                          f"{rfc3339(limits.max_ts)}{hint}")
    return ts


_RFC3339 = re.compile(
    r"([0-9]{4})-([0-9]{2})-([0-9]{2})[Tt ]([0-9]{2}):([0-9]{2}):([0-9]{2})(?:\.([0-9]+))?"
    r"(?:([Zz])|([+-])([0-9]{2}):([0-9]{2}))?")
_EPOCH_ORDINAL = datetime(1970, 1, 1).toordinal()
_MAX_FRACTION_DIGITS = 9  # nanoseconds; a float epoch cannot hold more


def parse_timestamp(value: Any) -> float:
    """Epoch seconds from a finite number or an RFC 3339 string with a timezone; DecodeError otherwise.

    Leap second :60 is accepted (it maps to the next minute's :00); "-00:00" is read as UTC.
    """
    if isinstance(value, str):
        return _parse_rfc3339(value)
    if is_number(value):
        try:
            ts = float(value)
        except OverflowError:
            ts = math.inf
        if math.isfinite(ts):
            return ts
        raise DecodeError("bad_ts", f"'ts' must be a finite number, got {show(value)}")
    raise DecodeError("bad_ts", f"'ts' must be epoch seconds or an RFC 3339 string, not {kind_of(value)}")


def _parse_rfc3339(text: str) -> float:
    match = _RFC3339.fullmatch(text)
    if match is None:
        raise DecodeError("bad_ts", f"'ts' {show(text)} is not an RFC 3339 timestamp "
                                    f"like 2026-05-28T12:00:00Z")
    year, month, day, hour, minute, second, fraction, zulu, sign, off_h, off_m = match.groups()
    if zulu is None and sign is None:
        raise DecodeError("naive_ts", f"'ts' {show(text)} has no timezone; add 'Z' or an offset like +02:00")
    try:
        date = datetime(int(year), int(month), int(day), int(hour), int(minute), min(int(second), 59))
    except ValueError as exc:
        raise DecodeError("bad_ts", f"'ts' {show(text)} is not a valid date and time: {exc}") from None
    offset = 0
    if sign is not None:
        if int(off_h) > 23 or int(off_m) > 59:
            raise DecodeError("bad_ts", f"'ts' {show(text)} has an invalid UTC offset")
        offset = (int(off_h) * 3600 + int(off_m) * 60) * (1 if sign == "+" else -1)
    seconds = ((date.toordinal() - _EPOCH_ORDINAL) * 86400 + date.hour * 3600 + date.minute * 60
               + int(second) - offset)
    if not fraction:
        return float(seconds)
    fraction = fraction[:_MAX_FRACTION_DIGITS]
    scale = 10 ** len(fraction)
    return (seconds * scale + int(fraction)) / scale  # exact integers, one correctly rounded division


def _entity(value: Any, limits: DecodeLimits) -> str:
    if value is None:
        raise DecodeError("no_entity", "'entity' is missing")
    if not isinstance(value, str):
        raise DecodeError("bad_entity", f"'entity' must be a string, not {kind_of(value)}")
    if len(value) > limits.max_entity_length:
        raise DecodeError("bad_entity", f"'entity' is {len(value)} characters, over the limit of "
                                        f"{limits.max_entity_length} (max_entity_length)")
    if not value or value.isspace():
        raise DecodeError("no_entity", "'entity' is empty or only whitespace")
    if not is_utf8(value):
        raise DecodeError("bad_entity", "'entity' contains unpaired surrogates (not valid UTF-8)")
    return value


#: metrics, invalid entries, the Vector's layout and values (None: derived from the metrics), shown values
_Metrics = tuple[dict[str, float | None], tuple[tuple[str, str], ...], Layout | None, np.ndarray | None,
                 tuple[str, ...]]


def _metrics(value: Any, limits: DecodeLimits) -> _Metrics:
    if not value and (value is None or isinstance(value, Mapping)):
        raise DecodeError("no_metrics", "'metrics' is missing or empty")
    if type(value) is not dict and not isinstance(value, Mapping):
        raise DecodeError("bad_metrics", f"'metrics' must be an object of name -> number, not {kind_of(value)}")
    if len(value) > limits.max_metrics:
        raise DecodeError("too_many_metrics", f"'metrics' has {len(value):,} entries, over the limit of "
                                              f"{limits.max_metrics:,} (max_metrics)")
    return _metrics_fast(value, limits) or _metrics_checked(value, limits)


_PLAIN_VALUES = frozenset({float, int, type(None)})


def _metrics_fast(value: Mapping, limits: DecodeLimits) -> _Metrics | None:
    """The common all-valid case with C-level bulk checks (~3x faster than the loop), else None.

    It accepts only what `_metrics_checked` would pass through unchanged, so results are identical;
    it also returns the layout and the values array the Vector carries.
    """
    kinds = set(map(type, value.values()))
    if not kinds <= _PLAIN_VALUES:
        return None
    layout, lengths = layout_of(tuple(value))
    if lengths is None or lengths[0] == 0 or lengths[1] > limits.max_name_length:
        return None
    try:
        if type(None) in kinds:
            values = np.array(list(value.values()), dtype=float)   # None -> NaN
            present = values[~np.isnan(values)]
            # a NaN that was not a None (the lenient parser reads NaN) fails the count
            bounded = present.size == len(value) - sum(x is None for x in value.values())
        else:
            values = present = np.fromiter(value.values(), dtype=float, count=len(value))
            bounded = True
    except OverflowError:   # an integer beyond double range
        return None
    if not bounded or not (present.size == 0 or np.abs(present).max() <= limits.max_abs_value):   # NaN fails too
        return None
    out = dict(value)
    if int in kinds:
        for name in [name for name, x in out.items() if type(x) is int]:
            out[name] = float(out[name])
    return out, (), layout, values, ()


def _metrics_checked(value: Mapping, limits: DecodeLimits) -> _Metrics:
    """Entry-by-entry validation: bad values become None and are listed with a reason and their value."""
    max_name, max_abs = limits.max_name_length, limits.max_abs_value
    out: dict[str, float | None] = {}
    bad: list[tuple[str, str, Any]] = []   # (name, reason, value)
    for name, item in value.items():
        if type(name) is not str or not 0 < len(name) <= max_name or not (name.isascii() or is_utf8(name)):
            bad.append((_clip_name(name, max_name), "bad_name", item))
            continue
        out[name] = None
        if type(item) is float:
            x = item
        elif item is None:
            continue
        elif not is_number(item):
            bad.append((name, not_a_number_reason(item), item))
            continue
        else:
            try:
                x = float(item)
            except OverflowError:  # an integer beyond double range
                bad.append((name, "out_of_range", item))
                continue
        if -max_abs <= x <= max_abs:  # also false for NaN
            out[name] = x
        else:
            bad.append((name, "out_of_range" if math.isfinite(x) else "non_finite", item))
    if not out:  # only bad names: as empty as "metrics": {}
        raise DecodeError("no_metrics", f"'metrics' has no entry with a usable name "
                                        f"({len(bad)} bad, e.g. {bad[0][0]!r})")
    # The Vector derives its layout and values.
    return out, tuple((n, r) for n, r, _ in bad), None, None, tuple(show_value(x) for _, _, x in bad)


def check_labels(value: Any) -> dict[str, str]:
    """A message's ``labels`` (absent, or an object of non-empty string -> string); DecodeError otherwise."""
    if value is None:
        return {}
    if not isinstance(value, Mapping):
        raise DecodeError("bad_labels", f"'labels' must be an object of string -> string, not {kind_of(value)}")
    for key, item in value.items():
        if not isinstance(key, str) or not key or not is_utf8(key):
            raise DecodeError("bad_labels", f"label name {show(key)} must be a non-empty string")
        if not isinstance(item, str):
            raise DecodeError("bad_labels", f"label {key!r} must have a string value, not {kind_of(item)}")
        if not is_utf8(item):
            raise DecodeError("bad_labels", f"label {key!r} has unpaired surrogates (not valid UTF-8)")
    return dict(value)


def _clip_name(name: Any, limit: int) -> str:
    text = name if isinstance(name, str) else repr(name)
    text = text.encode("utf-8", "backslashreplace").decode("utf-8")
    return text if len(text) <= limit else text[:limit] + "..."
