"""OTLP/JSON metrics: one ExportMetricsServiceRequest per message -> `Sample`s for `SampleAssembler`.

This is what an OpenTelemetry Collector's Kafka exporter writes with ``encoding: otlp_json``
(the protobuf -> JSON mapping of opentelemetry-proto: lowerCamelCase field names, 64-bit
integers usually as strings, enums as numbers, zero/empty fields omitted)::

    {"resourceMetrics": [{"resource": {"attributes": [{"key": "service.name", "value": {"stringValue": "checkout"}}]},
      "scopeMetrics": [{"metrics": [{"name": "lat_p99_ms", "gauge": {"dataPoints": [
        {"attributes": [...], "timeUnixNano": "1780000005000000000", "asDouble": 182.0}]}}]}]}]}

Each gauge or sum data point becomes one Sample: ts = timeUnixNano / 1e9 (exact integer
division, one rounding), labels = resource attributes then point attributes (a point
attribute wins on the same key; within one list the last occurrence wins; scope
attributes are not labels), value = asDouble or asInt. Sums keep their value as sent
(a cumulative counter stays a running total). Attribute values become label strings:
stringValue and bytesValue (base64) as they are, boolValue "true"/"false", intValue in
decimal, doubleValue the shortest round-trip form ("NaN", "+Inf", "-Inf" for the
others), arrayValue / kvlistValue as compact JSON, an empty AnyValue "".

`resource_labels` selects the resource attributes that become labels (None = all).
Pass at least the entity labels: every other resource attribute (host.name,
telemetry.sdk.version ...) would otherwise be written into every series name.

Error policy, like the vector message's "a single bad metric loses only itself":

- `DecodeError` (reasons in `OTLP_REASONS`) when the message is not OTLP in shape: size,
  JSON, not an object, no ``resourceMetrics`` ("not_otlp": probably another encoding on
  the topic), a container of the wrong type, two members of a oneof ("bad_otlp"), an
  attribute that is not ``{key, value}`` with a known value ("bad_attributes"), a metric
  without a usable name ("no_name", "bad_name").
- Skipped and counted (the second return value): every histogram, exponential
  histogram and summary point; points flagged FLAG_NO_RECORDED_VALUE; points without
  a value or whose value is not a number, not finite or beyond ``max_abs_value``;
  points whose time is missing (0), malformed or outside the accepted window.

An empty ``resourceMetrics`` list is a valid, empty request: ``([], 0)``. Note that
collector batches can exceed the default ``max_bytes`` (1 MiB): raise it for this input.
"""

from __future__ import annotations

import math
import re
from collections.abc import Collection, Iterable, Mapping
from fractions import Fraction
from typing import Any

import orjson

from .decode import DEFAULT_LIMITS, DecodeError, DecodeLimits, load_json
from .samples import Sample, check_name, check_value
from .values import is_utf8, kind_of

__all__ = ["OTLP_REASONS", "decode_otlp", "encode_otlp"]

#: Reasons `decode_otlp` rejects a whole message (DecodeError.reason).
OTLP_REASONS = frozenset({
    "bad_input", "too_large", "bad_json", "not_object",
    "not_otlp", "bad_otlp", "bad_attributes", "no_name", "bad_name",
})

_VALUE_KINDS = ("gauge", "sum")
_SKIPPED_KINDS = ("histogram", "exponentialHistogram", "summary")
_NO_RECORDED_VALUE = 1  # DataPointFlags.FLAG_NO_RECORDED_VALUE_MASK
_INT64 = re.compile(r"-?[0-9]{1,19}")
_UINT64 = re.compile(r"[0-9]{1,20}")
_DOUBLE = re.compile(r"-?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?|NaN|-?Infinity")
_NS = 1_000_000_000


def decode_otlp(raw: bytes | bytearray | memoryview | str, limits: DecodeLimits = DEFAULT_LIMITS, *,
                resource_labels: Collection[str] | None = None) -> tuple[list[Sample], int]:
    """The gauge and sum samples of one OTLP/JSON metrics request, and how many points were skipped."""
    obj = load_json(raw, limits)
    if not isinstance(obj, Mapping):
        raise DecodeError("not_object", f"message must be a JSON object, not {kind_of(obj)}")
    if obj.get("resourceMetrics") is None:
        raise DecodeError("not_otlp", "no 'resourceMetrics': not an OTLP metrics export request")
    samples: list[Sample] = []
    skipped = 0
    for i, rm in enumerate(_list(obj, "resourceMetrics", "")):
        path = f"resourceMetrics[{i}]"
        rm = _object(rm, path)
        resource = _object(rm.get("resource"), f"{path}.resource")
        base = _attributes(resource.get("attributes"), f"{path}.resource")
        if resource_labels is not None:
            base = {k: v for k, v in base.items() if k in resource_labels}
        for j, sm in enumerate(_list(rm, "scopeMetrics", path)):
            scope_path = f"{path}.scopeMetrics[{j}]"
            for k, metric in enumerate(_list(_object(sm, scope_path), "metrics", scope_path)):
                skipped += _metric(_object(metric, f"{scope_path}.metrics[{k}]"), base, limits, samples,
                                   f"{scope_path}.metrics[{k}]")
    return samples, skipped


def encode_otlp(resource: Mapping[str, str], samples: Iterable[Sample], *, scope: str = "shiftsieve") -> bytes:
    """One ExportMetricsServiceRequest in the shape `decode_otlp` reads (and a collector writes): one
    resource with string attributes ``resource``, one scope, one gauge per sample name with a point
    per sample (attributes = its labels, ``timeUnixNano`` a decimal string, ``asDouble``; a missing
    value is a point flagged FLAG_NO_RECORDED_VALUE, which the decoder skips). Read back, a sample
    has labels ``resource | labels`` and the same ts (nanoseconds rounded exactly, one rounding each
    way) and value."""
    gauges: dict[str, list[dict[str, Any]]] = {}
    times: dict[float, str] = {}   # the samples of one request mostly share one time
    for sample in samples:
        point: dict[str, Any] = {"attributes": _key_values(sample.labels)} if sample.labels else {}
        if sample.ts not in times:
            times[sample.ts] = str(round(Fraction(sample.ts) * _NS))
        point["timeUnixNano"] = times[sample.ts]
        if sample.value is None:
            point["flags"] = _NO_RECORDED_VALUE
        else:
            point["asDouble"] = sample.value
        gauges.setdefault(sample.name, []).append(point)
    metrics = [{"name": name, "gauge": {"dataPoints": points}} for name, points in gauges.items()]
    return orjson.dumps({"resourceMetrics": [{"resource": {"attributes": _key_values(resource)},
                                              "scopeMetrics": [{"scope": {"name": scope}, "metrics": metrics}]}]})


def _key_values(labels: Mapping[str, str]) -> list[dict[str, Any]]:
    return [{"key": key, "value": {"stringValue": value}} for key, value in labels.items()]


def _metric(metric: Mapping, base: dict[str, str], limits: DecodeLimits, out: list[Sample], path: str) -> int:
    """Append the metric's samples to `out`; return its skipped points."""
    try:
        name = check_name(metric.get("name"), limits)
    except DecodeError as exc:
        raise DecodeError(exc.reason, f"{path}: {exc}") from None
    kinds = [kind for kind in _VALUE_KINDS + _SKIPPED_KINDS if metric.get(kind) is not None]
    if len(kinds) > 1:
        raise DecodeError("bad_otlp", f"{path} ({name!r}) has more than one data field: {', '.join(kinds)}")
    if not kinds:
        return 0
    data_path = f"{path}.{kinds[0]}"
    points = _list(_object(metric[kinds[0]], data_path), "dataPoints", data_path)
    if kinds[0] in _SKIPPED_KINDS:
        return len(points)
    skipped = 0
    for n, point in enumerate(points):
        point_path = f"{data_path}.dataPoints[{n}]"
        point = _object(point, point_path)
        labels = base | _attributes(point.get("attributes"), point_path)
        sample = _sample(point, name, labels, limits, point_path)
        if sample is None:
            skipped += 1
        else:
            out.append(sample)
    return skipped


def _sample(point: Mapping, name: str, labels: dict[str, str], limits: DecodeLimits, path: str) -> Sample | None:
    """The point as a Sample, or None when its time or value is unusable."""
    flags = point.get("flags")
    if flags is not None and (type(flags) is not int or flags < 0):
        raise DecodeError("bad_otlp", f"{path}.flags must be a non-negative integer, not {kind_of(flags)}")
    has_double, has_int = point.get("asDouble") is not None, point.get("asInt") is not None
    if has_double and has_int:
        raise DecodeError("bad_otlp", f"{path} has both asDouble and asInt")
    if (flags or 0) & _NO_RECORDED_VALUE or not (has_double or has_int):
        return None
    ts = _time(point.get("timeUnixNano"))
    if ts is None or not limits.min_ts <= ts <= limits.max_ts:
        return None
    number = _double(point["asDouble"]) if has_double else _int(point["asInt"])
    if number is None:
        return None
    try:
        return Sample(ts, name, labels, check_value(number, limits))
    except DecodeError:
        return None


def _time(value: Any) -> float | None:
    """Epoch seconds from a uint64 of nanoseconds (string or number); None if unset or malformed."""
    if type(value) is int:
        ns = value
    elif isinstance(value, str) and _UINT64.fullmatch(value):
        ns = int(value)
    else:
        return None
    return ns / _NS if 0 < ns < 1 << 64 else None


def _double(value: Any) -> float | int | None:
    """A proto3 JSON double: a number or its string form ("1.5", "NaN", "-Infinity")."""
    if type(value) in (float, int):
        return value
    if isinstance(value, str) and _DOUBLE.fullmatch(value):
        return float(value)
    return None


def _int(value: Any) -> int | None:
    """A proto3 JSON int64: a decimal string or an integral number."""
    if type(value) is int:
        return value
    if type(value) is float and value.is_integer():
        return int(value)
    if isinstance(value, str) and _INT64.fullmatch(value):
        return int(value)
    return None


def _attributes(value: Any, path: str) -> dict[str, str]:
    """A KeyValue list as labels (key -> string form of the AnyValue)."""
    if value is None:
        return {}
    if not isinstance(value, list):
        raise DecodeError("bad_attributes", f"{path}.attributes must be a list, not {kind_of(value)}")
    out = {}
    for item in value:
        # fast path, the common case: an ASCII key with an ASCII stringValue
        if type(item) is dict and len(item) == 2:
            key, any_value = item.get("key"), item.get("value")
            if type(key) is str and key.isascii() and key and type(any_value) is dict and len(any_value) == 1:
                text = any_value.get("stringValue")
                if type(text) is str and text.isascii():
                    out[key] = text
                    continue
        key, plain = _key_value(item, f"{path}.attributes")
        out[key] = _label_text(plain)
    return out


def _key_value(item: Any, path: str, depth: int = 0) -> tuple[str, Any]:
    if not isinstance(item, Mapping):
        raise DecodeError("bad_attributes", f"{path} entries must be {{key, value}} objects, not {kind_of(item)}")
    key = item.get("key")
    if not isinstance(key, str) or not key or not is_utf8(key):
        raise DecodeError("bad_attributes", f"{path} has an entry without a usable key")
    return key, _plain(item.get("value"), f"{path}[{key!r}]", depth)


def _plain(value: Any, path: str, depth: int) -> Any:
    """An AnyValue as a plain Python value (str, bool, int, float, list, dict or None)."""
    if value is None:
        return None
    if not isinstance(value, Mapping):
        raise DecodeError("bad_attributes", f"{path} value must be an AnyValue object, not {kind_of(value)}")
    kinds = [kind for kind in _ANY_KINDS if value.get(kind) is not None]
    if len(kinds) > 1:
        raise DecodeError("bad_attributes", f"{path} value has more than one field: {', '.join(kinds)}")
    if not kinds:
        return None
    kind, item = kinds[0], value[kinds[0]]
    if kind in _SCALARS:
        result = _SCALARS[kind](item)
    else:
        if depth >= _MAX_DEPTH:
            raise DecodeError("bad_attributes", f"{path} value nests arrays/kvlists deeper than {_MAX_DEPTH}")
        items = item.get("values", []) if isinstance(item, Mapping) else None
        if not isinstance(items, list):
            result = None
        elif kind == "arrayValue":
            result = [_plain(x, f"{path}[{n}]", depth + 1) for n, x in enumerate(items)]
        else:
            result = dict(_key_value(x, path, depth + 1) for x in items)
    if result is None:
        raise DecodeError("bad_attributes", f"{path} has a malformed {kind}: {kind_of(item)}")
    return result


def _int64(value: Any) -> int | None:
    number = _int(value)
    return number if number is not None and -(1 << 63) <= number < (1 << 63) else None


def _double_value(value: Any) -> float | None:
    number = _double(value)
    return None if number is None else float(number)


_SCALARS = {
    "stringValue": lambda x: x if isinstance(x, str) and is_utf8(x) else None,
    "bytesValue": lambda x: x if isinstance(x, str) and is_utf8(x) else None,  # base64 text
    "boolValue": lambda x: x if isinstance(x, bool) else None,
    "intValue": _int64,
    "doubleValue": _double_value,
}
_ANY_KINDS = (*_SCALARS, "arrayValue", "kvlistValue")
_MAX_DEPTH = 16  # nesting of arrayValue / kvlistValue in one attribute


def _label_text(value: Any) -> str:
    """The label string of a plain attribute value."""
    if isinstance(value, str):
        return value
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isfinite(value):
            return repr(value)
        return "NaN" if math.isnan(value) else ("+Inf" if value > 0 else "-Inf")
    return orjson.dumps(value).decode()


def _list(obj: Mapping, key: str, path: str) -> list:
    value = obj.get(key)
    if value is None:
        return []
    if not isinstance(value, list):
        raise DecodeError("bad_otlp", f"{path + '.' if path else ''}{key} must be a list, not {kind_of(value)}")
    return value


def _object(value: Any, path: str) -> Mapping:
    if value is None:
        return {}
    if not isinstance(value, Mapping):
        raise DecodeError("bad_otlp", f"{path} must be an object, not {kind_of(value)}")
    return value
