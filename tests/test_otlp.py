"""Tests of shiftsieve.stream.otlp: OTLP/JSON metrics requests -> Samples -> the same Vectors.

Reference for the encoding: the OTLP protobuf (opentelemetry-proto metrics/v1, common/v1)
and the proto3 JSON mapping (lowerCamelCase names, 64-bit integers as strings, doubles
may be the strings "NaN"/"Infinity", unset fields omitted).
"""

from __future__ import annotations

import copy
import json
from fractions import Fraction
from pathlib import Path
from typing import Any

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shiftsieve.stream.assemble import metric_labels
from shiftsieve.stream.decode import DecodeError, DecodeLimits, Vector, decode_vector
from shiftsieve.stream.otlp import OTLP_REASONS, decode_otlp
from shiftsieve.stream.samples import Sample, SampleAssembler

FAST = settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
FIXTURE = Path(__file__).parent / "data" / "otlp_gauge_sum.json"
ENTITY = ["service.name", "service.instance.id"]
T0 = 1780000020.0  # a bucket boundary for step 60


def fixture() -> dict:
    return orjson.loads(FIXTURE.read_bytes())


def request(points: list[dict], kind: str = "gauge", resource: list | None = None, **metric: Any) -> bytes:
    """A one-metric request for checkout/checkout-3."""
    attrs = resource if resource is not None else [
        {"key": "service.name", "value": {"stringValue": "checkout"}},
        {"key": "service.instance.id", "value": {"stringValue": "checkout-3"}}]
    body = {"name": "m", kind: {"dataPoints": points}, **metric}
    return orjson.dumps({"resourceMetrics": [{"resource": {"attributes": attrs},
                                              "scopeMetrics": [{"metrics": [body]}]}]})


def point(**fields: Any) -> dict:
    return {"timeUnixNano": "1780000005000000000", "asDouble": 1.5, **fields}


# --- the captured-style fixture ----------------------------------------------------------------

def test_fixture_decodes_to_the_expected_samples() -> None:
    samples, skipped = decode_otlp(FIXTURE.read_bytes(), resource_labels=ENTITY)
    # timeUnixNano / 1e9 rounded once (reference: exact rational arithmetic)
    t3 = float(Fraction(1780000005123456789, 10**9))
    t4 = float(Fraction(1780000004987000000, 10**9))
    c3 = {"service.name": "checkout", "service.instance.id": "checkout-3"}
    c4 = {"service.name": "checkout", "service.instance.id": "checkout-4"}
    assert samples == [
        Sample(t3, "lat_p99_ms", {**c3, "dependency": "payments", "quantile": "0.99"}, 182.0),
        Sample(t3, "lat_p99_ms", {**c3, "dependency": "inventory", "quantile": "0.99"}, 41.5),
        Sample(t3, "http_server_requests", {**c3, "http.response.status_code": "200", "retried": "false"}, 18423.0),
        Sample(t3, "http_server_requests", {**c3, "http.response.status_code": "503", "retried": "true"}, 7.0),
        Sample(t4, "lat_p99_ms", {**c4, "dependency": "payments", "quantile": "0.99"}, 175.25),
        Sample(t4, "process_open_fds", c4, 212.0),
    ]
    assert skipped == 2  # the two histogram points


def test_fixture_all_resource_attributes_become_labels_by_default() -> None:
    samples, _ = decode_otlp(FIXTURE.read_text())
    assert samples[0].labels["host.name"] == "node-7" and samples[0].labels["process.pid"] == "4127"
    assert samples[0].labels["telemetry.sdk.language"] == "go"


def test_fixture_assembles_into_vectors_per_resource_entity() -> None:
    samples, _ = decode_otlp(FIXTURE.read_bytes(), resource_labels=ENTITY)
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=30)
    assert all(a.add(s) == ([], None) for s in samples)
    v3, v4 = a.flush()
    bucket = 1779999960.0  # floor(1780000005.12 / 60) * 60
    assert v3 == Vector(bucket, "checkout/checkout-3", {
        'http_server_requests{http_response_status_code="200",retried="false"}': 18423.0,
        'http_server_requests{http_response_status_code="503",retried="true"}': 7.0,
        'lat_p99_ms{dependency="inventory",quantile="0.99"}': 41.5,
        'lat_p99_ms{dependency="payments",quantile="0.99"}': 182.0,
    }, {"service.name": "checkout", "service.instance.id": "checkout-3"})
    assert v4.entity == "checkout/checkout-4" and v4.ts == bucket
    assert v4.metrics == {'lat_p99_ms{dependency="payments",quantile="0.99"}': 175.25, "process_open_fds": 212.0}
    # reference: assemble.metric_labels reads the labels back for group_by
    assert metric_labels(next(iter(v3.metrics))) == {"http_response_status_code": "200", "retried": "false"}


# --- attribute values: every AnyValue kind -----------------------------------------------------

@pytest.mark.parametrize("value, text", [
    ({"stringValue": "payments"}, "payments"),
    ({"boolValue": True}, "true"),
    ({"intValue": "-42"}, "-42"),
    ({"intValue": 42}, "42"),              # proto3 JSON parsers accept int64 as a number too
    ({"doubleValue": 0.99}, "0.99"),
    ({"doubleValue": 2}, "2.0"),
    ({"doubleValue": "NaN"}, "NaN"),
    ({"doubleValue": "-Infinity"}, "-Inf"),
    ({"bytesValue": "3q2+7w=="}, "3q2+7w=="),
    ({"arrayValue": {"values": [{"stringValue": "a"}, {"intValue": "1"}]}}, '["a",1]'),
    ({"kvlistValue": {"values": [{"key": "k", "value": {"boolValue": False}}]}}, '{"k":false}'),
    ({"arrayValue": {}}, "[]"),
    ({}, ""),
    (None, ""),
])
def test_attribute_values_as_label_strings(value: Any, text: str) -> None:
    samples, _ = decode_otlp(request([point(attributes=[{"key": "a", "value": value}])]))
    assert samples[0].labels["a"] == text


def test_point_attribute_wins_over_resource_attribute_and_last_duplicate_key_wins() -> None:
    attrs = [{"key": "zone", "value": {"stringValue": "x"}}, {"key": "zone", "value": {"stringValue": "y"}}]
    raw = request([point(attributes=attrs)], resource=[{"key": "zone", "value": {"stringValue": "r"}}])
    assert decode_otlp(raw)[0][0].labels == {"zone": "y"}


# --- points that are skipped and counted -------------------------------------------------------

@pytest.mark.parametrize("fields", [
    {"flags": 1},                                      # FLAG_NO_RECORDED_VALUE
    {"asDouble": None},                                # no value
    {"asDouble": "NaN"}, {"asDouble": "Infinity"},     # not finite
    {"asDouble": 1e301},                               # beyond max_abs_value
    {"asDouble": "fast"}, {"asDouble": True},          # not a number
    {"asDouble": None, "asInt": "99999999999999999999"},  # beyond int64
    {"timeUnixNano": None}, {"timeUnixNano": "0"},     # unset
    {"timeUnixNano": "17800000050e8"}, {"timeUnixNano": -5},  # malformed
    {"timeUnixNano": "1780000005000"},                 # milliseconds: outside the accepted window
    {"timeUnixNano": 10**400},                         # beyond uint64 (read by the stdlib fallback parser)
])
def test_unusable_points_are_skipped_and_counted(fields: dict) -> None:
    good = point()
    raw = json.dumps({"resourceMetrics": [{"scopeMetrics": [{"metrics": [
        {"name": "m", "gauge": {"dataPoints": [good, {**good, **fields}]}}]}]}]})
    assert decode_otlp(raw) == ([Sample(1780000005.0, "m", {}, 1.5)], 1)


@pytest.mark.parametrize("kind", ["histogram", "exponentialHistogram", "summary"])
def test_distribution_points_are_skipped_and_counted(kind: str) -> None:
    assert decode_otlp(request([{"timeUnixNano": "1780000005000000000", "count": "3"}] * 3, kind)) == ([], 3)


def test_value_forms() -> None:
    forms = [{"asInt": "-7"}, {"asInt": 7}, {"asInt": 7.0}, {"asDouble": "2.5e1"}, {"asDouble": 3},
             {"asDouble": 1.0, "flags": 0}]
    samples, skipped = decode_otlp(request([{"timeUnixNano": "1780000005000000000", **f} for f in forms]))
    assert [s.value for s in samples] == [-7.0, 7.0, 7.0, 25.0, 3.0, 1.0] and skipped == 0
    assert all(type(s.value) is float for s in samples)
    assert decode_otlp(request([point(timeUnixNano=1780000005000000000)]))[0][0].ts == 1780000005.0


def test_empty_request_and_metric_without_data() -> None:
    assert decode_otlp(b'{"resourceMetrics": []}') == ([], 0)
    assert decode_otlp(b'{"resourceMetrics": [{"scopeMetrics": [{"metrics": [{"name": "m"}]}]}]}') == ([], 0)


def test_nan_literal_from_a_lenient_producer_is_a_skipped_point() -> None:
    raw = request([point()]).replace(b"1.5", b"NaN")
    assert decode_otlp(raw) == ([], 1)


# --- malformed requests: DecodeError with a reason ---------------------------------------------

def broken(path: list, value: Any) -> bytes:
    """The fixture with the element at `path` replaced by `value`."""
    obj = fixture()
    node = obj
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    return orjson.dumps(obj)


METRIC = ["resourceMetrics", 0, "scopeMetrics", 0, "metrics", 0]
POINT = METRIC + ["gauge", "dataPoints", 0]
MALFORMED = [
    (b"[]", "not_object"),
    (b'{"resource": {}}', "not_otlp"),
    (b"{not json", "bad_json"),
    (b'{"resourceMetrics": {}}', "bad_otlp"),
    (broken(["resourceMetrics", 0], 3), "bad_otlp"),
    (broken(["resourceMetrics", 0, "resource"], []), "bad_otlp"),
    (broken(["resourceMetrics", 0, "scopeMetrics"], "x"), "bad_otlp"),
    (broken(METRIC, "m"), "bad_otlp"),
    (broken(METRIC + ["gauge"], []), "bad_otlp"),
    (broken(METRIC + ["gauge", "dataPoints"], {}), "bad_otlp"),
    (broken(METRIC + ["sum"], {"dataPoints": []}), "bad_otlp"),     # oneof: gauge and sum
    (broken(POINT, 1.5), "bad_otlp"),
    (broken(POINT + ["asInt"], "1"), "bad_otlp"),                   # oneof: asDouble and asInt
    (broken(POINT + ["flags"], "1"), "bad_otlp"),
    (broken(METRIC + ["name"], ""), "no_name"),
    (broken(METRIC + ["name"], None), "no_name"),
    (broken(METRIC + ["name"], 7), "bad_name"),
    (broken(METRIC + ["name"], "m{a=\"b\"}"), "bad_name"),
    (broken(["resourceMetrics", 0, "resource", "attributes"], {}), "bad_attributes"),
    (broken(["resourceMetrics", 0, "resource", "attributes", 0], "service.name"), "bad_attributes"),
    (broken(POINT + ["attributes", 0, "key"], ""), "bad_attributes"),
    (broken(POINT + ["attributes", 0, "value"], "payments"), "bad_attributes"),
    (broken(POINT + ["attributes", 0, "value"], {"stringValue": 3}), "bad_attributes"),
    (broken(POINT + ["attributes", 0, "value"], {"stringValue": "a", "intValue": "1"}), "bad_attributes"),
    (broken(POINT + ["attributes", 0, "value"], {"intValue": "1e3"}), "bad_attributes"),
    (broken(POINT + ["attributes", 0, "value"], {"intValue": str(1 << 63)}), "bad_attributes"),
    (broken(POINT + ["attributes", 0, "value"], {"arrayValue": {"values": 1}}), "bad_attributes"),
    (broken(POINT + ["attributes", 0, "value"], {"kvlistValue": {"values": [{"value": {}}]}}), "bad_attributes"),
]


@pytest.mark.parametrize("raw, reason", MALFORMED)
def test_malformed_requests_raise_decode_error_with_reason(raw: bytes, reason: str) -> None:
    with pytest.raises(DecodeError) as info:
        decode_otlp(raw)
    assert info.value.reason == reason and str(info.value)


def test_too_large_is_checked_before_parsing() -> None:
    with pytest.raises(DecodeError) as info:
        decode_otlp(FIXTURE.read_bytes(), DecodeLimits(max_bytes=100))
    assert info.value.reason == "too_large"


@pytest.mark.parametrize("depth, ok", [(16, True), (17, False), (300, False)])
def test_attribute_nesting_is_bounded(depth: int, ok: bool) -> None:
    value = '{"arrayValue": {"values": [' * depth + '{"intValue": "1"}' + "]}}" * depth
    raw = request([point(attributes=[{"key": "a", "value": "VALUE"}])]).replace(b'"VALUE"', value.encode())
    if ok:
        assert decode_otlp(raw)[0][0].labels["a"] == "[" * depth + "1" + "]" * depth
    else:
        with pytest.raises(DecodeError) as info:
            decode_otlp(raw)
        assert info.value.reason == "bad_attributes"


def check_decodes_or_rejects(raw: bytes | str) -> None:
    try:
        samples, skipped = decode_otlp(raw)
    except DecodeError as exc:
        assert exc.reason in OTLP_REASONS and str(exc)
        return
    assert type(skipped) is int and skipped >= 0
    for s in samples:
        assert isinstance(s, Sample) and type(s.ts) is float and s.name
        assert s.value is None or type(s.value) is float
        assert all(isinstance(k, str) and k and isinstance(v, str) for k, v in s.labels.items())


VOCABULARY = ["resourceMetrics", "resource", "attributes", "scopeMetrics", "metrics", "name", "gauge", "sum",
              "histogram", "summary", "dataPoints", "timeUnixNano", "asDouble", "asInt", "flags", "key", "value",
              "stringValue", "intValue", "doubleValue", "boolValue", "bytesValue", "arrayValue", "kvlistValue",
              "values"]
scalars = (st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=6)
           | st.sampled_from(["1780000005000000000", "NaN", "-Infinity", "42", "1e3"]))
json_like = st.recursive(scalars, lambda inner: st.lists(inner, max_size=3)
                         | st.dictionaries(st.sampled_from(VOCABULARY) | st.text(max_size=4), inner, max_size=4),
                         max_leaves=20)


@FAST
@given(json_like)
def test_arbitrary_json_like_input_gives_samples_or_decode_error(obj: Any) -> None:
    check_decodes_or_rejects(json.dumps(obj))  # stdlib: also NaN literals and big integers


def subtree_paths(node: Any, path: tuple = ()) -> list[tuple]:
    out = [path]
    if isinstance(node, dict):
        for key, child in node.items():
            out += subtree_paths(child, path + (key,))
    elif isinstance(node, list):
        for i, child in enumerate(node):
            out += subtree_paths(child, path + (i,))
    return out


FIXTURE_PATHS = subtree_paths(fixture())[1:]


@FAST
@given(st.sampled_from(FIXTURE_PATHS), json_like)
def test_fixture_with_any_subtree_replaced_gives_samples_or_decode_error(path: tuple, value: Any) -> None:
    obj = copy.deepcopy(fixture())
    node = obj
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    check_decodes_or_rejects(json.dumps(obj))


@FAST
@given(st.binary(max_size=200))
def test_arbitrary_bytes_give_samples_or_decode_error(raw: bytes) -> None:
    check_decodes_or_rejects(raw)


# --- same data as vector messages and as OTLP (reference: decode_vector) -----------------------

def test_vector_messages_and_otlp_give_the_same_vectors() -> None:
    step = 60.0
    instances = ["checkout-3", "checkout-4"]
    expected = []
    for b in range(6):
        for n, instance in enumerate(instances):
            metrics = {"cpu_util": 0.1 * b + n, 'lat_p99_ms{dependency="payments"}': 180.0 + b,
                       'lat_p99_ms{dependency="inventory"}': 40.0 - b}
            expected.append(decode_vector(orjson.dumps({
                "ts": T0 + b * step, "entity": f"checkout/{instance}", "metrics": metrics,
                "labels": {"service.name": "checkout", "service.instance.id": instance}})))
    a = SampleAssembler(ENTITY, step, allowed_lateness=0)
    got = []
    for b in range(6):  # one request per step, as a collector batch: both entities, every series
        resource_metrics = []
        for v in (v for v in expected if v.ts == T0 + b * step):
            gauges = {}
            for name, value in v.metrics.items():
                attrs = [{"key": k, "value": {"stringValue": x}} for k, x in metric_labels(name).items()]
                gauges.setdefault(name.split("{")[0], []).append(
                    {"attributes": attrs, "timeUnixNano": str(int(v.ts + 7) * 10**9), "asDouble": value})
            resource_metrics.append({
                "resource": {"attributes": [{"key": k, "value": {"stringValue": x}} for k, x in v.labels.items()]},
                "scopeMetrics": [{"metrics": [{"name": g, "gauge": {"dataPoints": p}} for g, p in gauges.items()]}]})
        samples, skipped = decode_otlp(orjson.dumps({"resourceMetrics": resource_metrics}), resource_labels=ENTITY)
        assert skipped == 0
        for s in samples:
            out, reason = a.add(s)
            assert reason is None
            got += out
    got += a.flush()
    assert got == expected
