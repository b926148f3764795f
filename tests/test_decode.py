"""Tests of shiftsieve.stream.decode: the vector message contract, every rejection, robustness."""

from __future__ import annotations

import json
import math
import pickle
from datetime import datetime, timedelta, timezone

import numpy as np
import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shiftsieve.stream import decode
from shiftsieve.stream.decode import (
    DEFAULT_LIMITS,
    INVALID_VALUE_REASONS,
    REASONS,
    DecodeError,
    DecodeLimits,
    Vector,
    decode_vector,
    encode_vector,
    parse_timestamp,
    vector_from_object,
)
from shiftsieve.stream.values import describe_invalid

FAST = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def message(**fields: object) -> bytes:
    base: dict[str, object] = {"ts": 1780000000.0, "entity": "checkout-3", "metrics": {"cpu_util": 0.41}}
    base.update(fields)
    return orjson.dumps({k: v for k, v in base.items() if v is not ...})


def assert_invariants(v: Vector, limits: DecodeLimits = DEFAULT_LIMITS) -> None:
    """What every decoded Vector guarantees to the model."""
    assert isinstance(v, Vector)
    assert type(v.ts) is float and math.isfinite(v.ts) and limits.min_ts <= v.ts <= limits.max_ts
    assert isinstance(v.entity, str) and v.entity.strip() and len(v.entity) <= limits.max_entity_length
    assert 0 < len(v.metrics) <= limits.max_metrics
    for name, x in v.metrics.items():
        assert isinstance(name, str) and 0 < len(name) <= limits.max_name_length
        assert x is None or (type(x) is float and math.isfinite(x) and abs(x) <= limits.max_abs_value)
    for name, reason in v.invalid:
        assert reason in INVALID_VALUE_REASONS
        if reason != "bad_name":
            assert v.metrics[name] is None
    assert all(isinstance(k, str) and k and isinstance(x, str) for k, x in v.labels.items())
    # the layout and array assembly stacks are the metrics themselves, NaN where missing
    assert v.layout.names == tuple(v.metrics) and v.values.dtype == np.float64
    np.testing.assert_array_equal(v.values, [np.nan if x is None else x for x in v.metrics.values()])
    # every kept string is valid UTF-8: the vector can be written out again (events, snapshots)
    orjson.dumps({"entity": v.entity, "metrics": v.metrics, "labels": v.labels, "invalid": v.invalid})


def decodes_or_rejects(raw: object, limits: DecodeLimits = DEFAULT_LIMITS) -> Vector | DecodeError:
    try:
        v = decode_vector(raw, limits)  # type: ignore[arg-type]
    except DecodeError as exc:
        assert exc.reason in REASONS and str(exc)
        return exc
    assert_invariants(v, limits)
    return v


# --- the contract -------------------------------------------------------------------------------

def test_design_contract_example() -> None:
    v = decode_vector(b'{"ts": 1780000000.0, "entity": "checkout-3", '
                      b'"metrics": {"cpu_util": 0.41, "lat_p99_ms": 182.0}}')
    assert v == Vector(1780000000.0, "checkout-3", {"cpu_util": 0.41, "lat_p99_ms": 182.0}, {}, ())


def test_contract_example_with_labels_and_missing_values() -> None:
    v = decode_vector('{"ts": 1780000000, "entity": "checkout-3", "metrics": {"cpu_util": 0.41, '
                      '"lat_p99_ms": null, "conns": 7}, "labels": {"host": "h1"}}')
    assert v.ts == 1780000000.0 and type(v.ts) is float
    assert v.metrics == {"cpu_util": 0.41, "lat_p99_ms": None, "conns": 7.0}
    assert type(v.metrics["conns"]) is float
    assert v.labels == {"host": "h1"} and v.invalid == ()


@pytest.mark.parametrize("kind", [bytes, bytearray, memoryview, lambda b: b.decode()])
def test_accepts_bytes_bytearray_memoryview_and_str(kind) -> None:
    raw = message(labels={"host": "h1"})
    assert decode_vector(kind(raw)) == decode_vector(raw)


def test_unknown_top_level_keys_are_ignored_and_labels_may_be_null() -> None:
    v = decode_vector(message(labels=None, schema=2, extra={"nested": [1, 2]}))
    assert v.labels == {} and v.metrics == {"cpu_util": 0.41}


def test_duplicate_keys_last_one_wins() -> None:
    v = decode_vector(b'{"ts": 1780000000, "entity": "a", "entity": "b", '
                      b'"metrics": {"x": 1, "x": 2}}')
    assert v.entity == "b" and v.metrics == {"x": 2.0}


# --- timestamps (outside reference: the stdlib datetime) -------------------------------------------

@pytest.mark.parametrize("text", [
    "2026-05-28T12:00:00Z",
    "2026-05-28T12:00:00+02:00",
    "2026-05-28T12:00:00-05:30",
    "2026-05-28T23:59:59+14:00",
    "2026-05-28T12:00:00.5Z",
    "2026-05-28T12:00:00.123Z",
    "2026-05-28T12:00:00.123456+01:00",
    "2026-05-28 12:00:00Z",            # RFC 3339 section 5.6 allows a space
    "2026-05-28t12:00:00Z",
    "2000-02-29T00:00:00Z",
    "2026-05-28T12:00:00-00:00",       # "unknown local offset": still UTC
])
def test_rfc3339_equals_stdlib_datetime(text: str) -> None:
    assert parse_timestamp(text) == datetime.fromisoformat(text).timestamp()


def test_rfc3339_lowercase_z_and_long_fractions() -> None:
    assert parse_timestamp("2026-05-28T12:00:00z") == parse_timestamp("2026-05-28T12:00:00Z")
    # datetime keeps microseconds only; nanoseconds agree to the float's resolution
    ref = datetime.fromisoformat("2026-05-28T12:00:00.123456Z").timestamp()
    assert parse_timestamp("2026-05-28T12:00:00.123456789Z") == pytest.approx(ref, abs=1e-6)


def test_leap_second_maps_to_next_minute() -> None:
    assert parse_timestamp("2016-12-31T23:59:60Z") == datetime(2017, 1, 1, tzinfo=timezone.utc).timestamp()


_offsets = st.integers(-(23 * 60 + 59), 23 * 60 + 59).map(lambda m: timezone(timedelta(minutes=m)))


@FAST
@given(st.datetimes(min_value=datetime(1971, 1, 1), max_value=datetime(2200, 1, 1), timezones=_offsets),
       st.sampled_from(["T", " "]))
def test_rfc3339_property_against_datetime_isoformat(dt: datetime, sep: str) -> None:
    text = dt.isoformat(sep=sep)
    assert parse_timestamp(text) == dt.timestamp()


def test_numeric_timestamps() -> None:
    assert parse_timestamp(1780000000) == 1780000000.0
    assert parse_timestamp(1780000000.25) == 1780000000.25
    assert parse_timestamp(np.float64(1.5)) == 1.5


@pytest.mark.parametrize("value, reason", [
    (True, "bad_ts"), (None, "bad_ts"), ([1], "bad_ts"), (math.nan, "bad_ts"), (math.inf, "bad_ts"),
    (10 ** 400, "bad_ts"), ("1780000000", "bad_ts"), ("2026-05-28", "bad_ts"), ("2026-13-01T00:00:00Z", "bad_ts"),
    ("2026-02-30T00:00:00Z", "bad_ts"), ("2026-05-28T24:00:00Z", "bad_ts"), ("2026-05-28T12:00:00+24:00", "bad_ts"),
    ("2026-05-28T12:00:00+0200", "bad_ts"), (" 2026-05-28T12:00:00Z", "bad_ts"), ("２０２６-05-28T12:00:00Z", "bad_ts"),
    ("2026-05-28T12:00:00", "naive_ts"), ("2026-05-28T12:00:00.5", "naive_ts"),
])
def test_parse_timestamp_rejections(value: object, reason: str) -> None:
    with pytest.raises(DecodeError) as info:
        parse_timestamp(value)
    assert info.value.reason == reason


def test_timestamp_in_milliseconds_gets_a_hint() -> None:
    with pytest.raises(DecodeError, match="milliseconds") as info:
        decode_vector(message(ts=1780000000123))
    assert info.value.reason == "ts_out_of_range"


def test_timestamp_window_is_configurable_and_inclusive() -> None:
    limits = DecodeLimits(min_ts=0.0, max_ts=10.0)
    assert decode_vector(message(ts=0), limits).ts == 0.0
    assert decode_vector(message(ts=10), limits).ts == 10.0
    with pytest.raises(DecodeError):
        decode_vector(message(ts=10.5), limits)


# --- every rejection reason ---------------------------------------------------------------------------

REJECTIONS: list[tuple[object, str]] = [
    (12345, "bad_input"),
    (None, "bad_input"),
    (b" " * (DEFAULT_LIMITS.max_bytes + 1), "too_large"),
    ("é" * (DEFAULT_LIMITS.max_bytes // 2 + 1), "too_large"),      # counted in UTF-8 bytes, not characters
    (b"", "bad_json"),
    (b'{"ts": 1780000000, "entity": "a", "metrics": {"x": 1}', "bad_json"),
    (b'{"ts": 1780000000, "entity": "a", "metrics": {"x": 1}} trailing', "bad_json"),
    (b'{"ts": 1780000000, "entity": "\xff", "metrics": {"x": 1}}', "bad_json"),
    (b"[" * 10_000 + b"]" * 10_000, "bad_json"),
    (b"NaN", "not_object"),                  # read on the lenient path: a number, not an object
    (b'[{"ts": 1780000000}]', "not_object"),
    (b'"text"', "not_object"),
    (message(ts=...), "no_ts"),
    (message(ts=None), "no_ts"),
    (message(ts=False), "bad_ts"),
    (message(ts="yesterday"), "bad_ts"),
    (b'{"ts": NaN, "entity": "a", "metrics": {"x": 1}}', "bad_ts"),
    (message(ts="2026-05-28T12:00:00"), "naive_ts"),
    (message(ts=1.0), "ts_out_of_range"),
    (message(ts="2150-01-01T00:00:00Z"), "ts_out_of_range"),
    (message(entity=...), "no_entity"),
    (message(entity=""), "no_entity"),
    (message(entity=" \t"), "no_entity"),
    (message(entity=3), "bad_entity"),
    (message(entity="e" * 257), "bad_entity"),
    (b'{"ts": 1780000000, "entity": "\\ud800", "metrics": {"x": 1}}', "bad_entity"),  # lone surrogate escape
    (message(metrics=...), "no_metrics"),
    (message(metrics=None), "no_metrics"),
    (message(metrics={}), "no_metrics"),
    (message(metrics={"": 1.0, "x" * 201: 2.0}), "no_metrics"),  # no usable name left
    (message(metrics=[0.4]), "bad_metrics"),
    (message(metrics="cpu=0.4"), "bad_metrics"),
    (message(metrics={f"m{i}": 1.0 for i in range(10_001)}), "too_many_metrics"),
    (message(labels=["host"]), "bad_labels"),
    (message(labels={"host": 1}), "bad_labels"),
    (message(labels={"": "x"}), "bad_labels"),
]


@pytest.mark.parametrize("raw, reason", REJECTIONS, ids=[r for _, r in REJECTIONS])
def test_rejection(raw: object, reason: str) -> None:
    with pytest.raises(DecodeError) as info:
        decode_vector(raw)  # type: ignore[arg-type]
    assert info.value.reason == reason
    assert str(info.value) and "\n" not in str(info.value)


def test_every_reason_has_an_example() -> None:
    assert {reason for _, reason in REJECTIONS} == REASONS


def test_lone_surrogates_from_python_callers_are_rejected_not_propagated() -> None:
    base = {"ts": 1780000000, "entity": "a", "metrics": {"x": 1.0}}
    with pytest.raises(DecodeError) as info:
        vector_from_object({**base, "entity": "a\ud800"})
    assert info.value.reason == "bad_entity"
    with pytest.raises(DecodeError) as info:
        vector_from_object({**base, "labels": {"host": "\udc00"}})
    assert info.value.reason == "bad_labels"
    v = vector_from_object({**base, "metrics": {"x\ud800": 1.0, "y": 2.0}})
    assert v.metrics == {"y": 2.0} and v.invalid == (("x\\ud800", "bad_name"),)


def test_decode_error_is_a_value_error_with_reason_and_pickles() -> None:
    with pytest.raises(ValueError) as info:
        decode_vector(b"{")
    err = info.value
    assert isinstance(err, DecodeError) and err.reason == "bad_json"
    assert str(err).startswith("not valid JSON") and "line 1" not in str(err)
    again = pickle.loads(pickle.dumps(err))
    assert again.reason == err.reason and str(again) == str(err)


# --- single bad values are missing, recorded, and lose nothing else ------------------------------------

@pytest.mark.parametrize("text, reason", [
    # RFC 8259 (section 3) keeps strings and numbers apart: a number in quotes is a string, but one whose
    # text is a JSON number (section 6 grammar) gets its own reason, since its fix is to drop the quotes.
    ('"0.5"', "numeric_string"), ('"12"', "numeric_string"), ('"-1.5e3"', "numeric_string"),
    ('" 12 "', "numeric_string"),
    ('"n/a"', "not_a_number"), ('"12ms"', "not_a_number"), ('"+1"', "not_a_number"), ('".5"', "not_a_number"),
    ('"NaN"', "not_a_number"), ('"0x10"', "not_a_number"), ('"\u0661"', "not_a_number"),   # ARABIC-INDIC ONE
    ("true", "not_a_number"), ("[1]", "not_a_number"), ('{"v": 1}', "not_a_number"),
    ("NaN", "non_finite"), ("Infinity", "non_finite"), ("-Infinity", "non_finite"), ("1e400", "non_finite"),
    ("1" + "0" * 400, "out_of_range"), ("1e301", "out_of_range"), ("-1e301", "out_of_range"),
])
def test_invalid_value_is_missing_and_listed(text: str, reason: str) -> None:
    raw = '{"ts": 1780000000, "entity": "a", "metrics": {"good": 1.5, "bad": %s, "gap": null}}' % text
    v = decode_vector(raw)
    assert v.metrics == {"good": 1.5, "bad": None, "gap": None}
    assert v.invalid == (("bad", reason),)
    assert len(v.shown) == 1 and v.shown[0]   # the value, for the dead letter


def test_invalid_values_are_shown_shortened_beside_their_reason() -> None:
    v = decode_vector(message(metrics={"cpu_util": "n/a", "lat_ms": "12", "ok": 1.0, "long": "x" * 500}))
    assert v.shown[:2] == ("'n/a'", "'12'") and len(v.shown[2]) <= 64
    assert describe_invalid(v.invalid, v.shown).startswith("cpu_util: not_a_number ('n/a'); "
                                                           "lat_ms: numeric_string ('12'); long: not_a_number ('xxx")


def test_bad_metric_names_are_left_out_and_listed() -> None:
    long = "n" * 201
    v = decode_vector(orjson.dumps({"ts": 1780000000, "entity": "a", "metrics": {"": 1, long: 2, "ok": 3}}))
    assert v.metrics == {"ok": 3.0}
    assert v.invalid == (("", "bad_name"), ("n" * 200 + "...", "bad_name"))


def test_all_values_invalid_is_still_a_vector() -> None:
    v = decode_vector(message(metrics={"a": "x", "b": None}))
    assert v.metrics == {"a": None, "b": None} and v.invalid == (("a", "not_a_number"),)


def test_python_number_types_via_vector_from_object() -> None:
    v = vector_from_object({"ts": 1780000000, "entity": "a",
                            "metrics": {"f32": np.float32(0.5), "i64": np.int64(3), "b": np.bool_(True), 7: 1.0}})
    assert v.metrics == {"f32": 0.5, "i64": 3.0, "b": None}
    assert set(v.invalid) == {("b", "not_a_number"), ("7", "bad_name")}


def test_limits_are_configurable() -> None:
    limits = DecodeLimits(max_bytes=200, max_metrics=2, max_name_length=3, max_entity_length=4, max_abs_value=10.0)
    v = decode_vector(message(entity="abcd", metrics={"abc": 10, "abcd": 1}), limits)
    assert v.metrics == {"abc": 10.0} and v.invalid == (("abc...", "bad_name"),)
    assert decode_vector(message(entity="e", metrics={"x": 11}), limits).invalid == (("x", "out_of_range"),)
    for raw, reason in [(message(entity="abcde"), "bad_entity"),
                        (message(entity="e", metrics={"a": 1, "b": 2, "c": 3}), "too_many_metrics"),
                        (message(entity="e", labels={"k": "v" * 200}), "too_large")]:
        with pytest.raises(DecodeError) as info:
            decode_vector(raw, limits)
        assert info.value.reason == reason


@pytest.mark.parametrize("kwargs", [{"max_bytes": 0}, {"max_metrics": 1.5}, {"min_ts": 5.0, "max_ts": 5.0},
                                    {"max_ts": math.inf}, {"max_abs_value": math.nan}])
def test_bad_limits_are_refused(kwargs: dict) -> None:
    with pytest.raises(ValueError):
        DecodeLimits(**kwargs)


# --- robustness properties: a Vector with the invariants, or DecodeError, nothing else ------------------

json_scalars = (st.none() | st.booleans() | st.integers() | st.floats(allow_nan=True, allow_infinity=True)
                | st.text(max_size=20))
json_values = st.recursive(json_scalars, lambda inner: st.lists(inner, max_size=4)
                           | st.dictionaries(st.text(max_size=8), inner, max_size=4), max_leaves=20)
metric_values = (st.none() | st.booleans() | st.integers(-(10 ** 30), 10 ** 30) | st.floats() | json_values
                 | st.sampled_from([1e300, -1e300, 1e301, 2 ** 64, -(2 ** 63) - 1]))
names = st.text(min_size=0, max_size=12) | st.sampled_from(["cpu_util", "lat_p99_ms", "é", "名前", "😀", "x" * 201])
timestamps = (st.floats() | st.integers() | st.booleans() | st.none()
              | st.datetimes(timezones=st.just(timezone.utc)).map(lambda d: d.isoformat()) | st.text(max_size=30))
def mostly(valid: st.SearchStrategy, anything: st.SearchStrategy) -> st.SearchStrategy:
    """`valid` three times in four (a plain `|` would flatten and drown it), so vectors are explored too."""
    return st.integers(0, 3).flatmap(lambda i: anything if i == 0 else valid)


messages = st.fixed_dictionaries(
    {"ts": mostly(st.sampled_from([1780000000.0, 1780000000, "2026-05-28T12:00:00Z", "2026-05-28 12:00:00.25+02:00"]),
                  timestamps),
     "entity": mostly(st.text(min_size=1, max_size=10), json_values),
     "metrics": mostly(st.dictionaries(names, metric_values, min_size=1, max_size=8), json_values)},
    optional={"labels": st.dictionaries(st.text(max_size=5), st.text(max_size=5) | json_scalars, max_size=3)
              | json_values, "extra": json_values})


def _lenient_json(obj: object) -> str:
    """JSON text as Python's json module writes it: NaN/Infinity literals and big integers included."""
    return json.dumps(obj)


@FAST
@given(st.binary(max_size=300))
def test_property_arbitrary_bytes(raw: bytes) -> None:
    decodes_or_rejects(raw)


@FAST
@given(st.text(max_size=200))
def test_property_arbitrary_text(raw: str) -> None:
    decodes_or_rejects(raw)


@FAST
@given(json_values)
def test_property_arbitrary_json_values(obj: object) -> None:
    decodes_or_rejects(_lenient_json(obj).encode())


def _outcome(result: Vector | DecodeError) -> object:
    return result.reason if isinstance(result, DecodeError) else result


@FAST
@given(messages)
def test_property_message_shaped_objects(obj: dict) -> None:
    """Python-json text (NaN, Infinity, big ints, \\u escapes) decodes; the fast orjson path agrees with it."""
    result = _outcome(decodes_or_rejects(_lenient_json(obj)))
    if _orjson_can_write(obj):
        assert _outcome(decodes_or_rejects(orjson.dumps(obj))) == result


def _orjson_can_write(obj: object) -> bool:
    try:
        orjson.dumps(obj)
    except orjson.JSONEncodeError:
        return False
    return not _has_non_finite(obj)  # orjson writes NaN/inf as null, which is a different message


def _has_non_finite(obj: object) -> bool:
    if isinstance(obj, float):
        return not math.isfinite(obj)
    if isinstance(obj, dict):
        return any(map(_has_non_finite, obj.values()))
    if isinstance(obj, list):
        return any(map(_has_non_finite, obj))
    return False


@FAST
@given(messages, st.binary(max_size=3), st.integers(0, 400))
def test_property_damaged_messages(obj: dict, junk: bytes, at: int) -> None:
    raw = _lenient_json(obj).encode()
    at = min(at, len(raw))
    decodes_or_rejects(raw[:at] + junk + raw[at:])
    decodes_or_rejects(raw[:at])


@FAST
@given(st.dictionaries(names, metric_values, min_size=1, max_size=12), st.sampled_from([DEFAULT_LIMITS, DecodeLimits(max_abs_value=1e3, max_name_length=4)]))
def test_property_fast_path_agrees_with_checked_path(metrics: dict, limits: DecodeLimits) -> None:
    fast = decode._metrics_fast(metrics, limits)
    if fast is not None:
        assert fast[:2] == decode._metrics_checked(metrics, limits)[:2]
        assert all(type(x) in (float, type(None)) for x in fast[0].values())
        # the array the fast path builds is the one a Vector derives from the checked dict
        derived = Vector(0.0, "e", fast[0], {})
        assert fast[2] is derived.layout and fast[2].names == tuple(fast[0])
        np.testing.assert_array_equal(fast[3], derived.values)


@FAST
@given(messages)
def test_property_encode_vector_round_trip(obj: dict) -> None:
    result = decodes_or_rejects(_lenient_json(obj))
    if isinstance(result, Vector):
        again = decode_vector(encode_vector(result))
        assert again == Vector(result.ts, result.entity, result.metrics, result.labels, ())


@pytest.mark.parametrize("depth", [1_000, 1_025, 10_000, 100_000])
def test_deep_nesting_is_bad_json_or_ignored_value(depth: int) -> None:
    for nested in (b"[" * depth + b"]" * depth, b'{"a":' * depth + b"1" + b"}" * depth):
        raw = b'{"ts": 1780000000, "entity": "a", "metrics": {"x": 1, "deep": ' + nested + b"}}"
        result = decodes_or_rejects(raw)
        if isinstance(result, DecodeError):
            assert result.reason == "bad_json"
        else:
            assert result.invalid == (("deep", "not_a_number"),)
    assert isinstance(decodes_or_rejects(b"[" * depth + b"]" * depth), DecodeError)


def test_huge_number_texts() -> None:
    for text in ["1e999999", "-" + "9" * 5000, "0." + "0" * 5000 + "1", "1" * 4301]:
        decodes_or_rejects('{"ts": 1780000000, "entity": "a", "metrics": {"x": %s}}' % text)
        decodes_or_rejects('{"ts": %s, "entity": "a", "metrics": {"x": 1}}' % text)
