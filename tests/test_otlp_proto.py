"""OTLP/JSON against the OpenTelemetry project's own schema (the opentelemetry-proto package).

The reference is opentelemetry-proto's generated ``ExportMetricsServiceRequest`` with
protobuf's JSON mapping: ``json_format.Parse`` refuses unknown or misspelt fields, and
``MessageToJson(use_integers_for_enums=True)`` writes what the OTLP specification's JSON
encoding prescribes (lowerCamelCase names, 64-bit integers as decimal strings, enums as
integers) -- the encoding an OpenTelemetry Collector's Kafka exporter writes as
``otlp_json``. The fixture, the producer's output and a request built with the official
classes all go through it.
"""

from fractions import Fraction
from pathlib import Path

from google.protobuf import json_format
from opentelemetry.proto.collector.metrics.v1.metrics_service_pb2 import ExportMetricsServiceRequest
from opentelemetry.proto.common.v1.common_pb2 import AnyValue, KeyValue
from opentelemetry.proto.metrics.v1 import metrics_pb2

from shiftsieve.stream.otlp import decode_otlp, encode_otlp
from shiftsieve.stream.samples import Sample

FIXTURE = Path(__file__).parent / "data" / "otlp_gauge_sum.json"
ENTITY = ["service.name", "service.instance.id"]


def _parse(raw: bytes) -> ExportMetricsServiceRequest:
    return json_format.Parse(raw.decode("utf-8"), ExportMetricsServiceRequest())   # strict: unknown fields fail


def test_the_fixture_is_a_valid_export_request_under_the_official_schema() -> None:
    request = _parse(FIXTURE.read_bytes())
    names = [m.name for rm in request.resource_metrics for sm in rm.scope_metrics for m in sm.metrics]
    assert "lat_p99_ms" in names and "http_server_requests" in names
    # re-serialised by protobuf as the OTLP JSON encoding, it decodes to the same samples
    canonical = json_format.MessageToJson(request, use_integers_for_enums=True, indent=None).encode()
    assert decode_otlp(canonical, resource_labels=ENTITY) == decode_otlp(FIXTURE.read_bytes(), resource_labels=ENTITY)


def test_the_producer_writes_requests_the_official_schema_accepts() -> None:
    resource = {"service.name": "booking-api", "service.instance.id": "booking-api-2", "zone": "north"}
    samples = [Sample(1780000030.25, "db_pool_wait_p99_ms", {}, 41.5), Sample(1780000030.25, "http_5xx_ratio", {}, 0.002)]
    request = _parse(encode_otlp(resource, samples))
    [rm] = request.resource_metrics
    assert {kv.key: kv.value.string_value for kv in rm.resource.attributes} == resource
    points = {m.name: m.gauge.data_points[0] for sm in rm.scope_metrics for m in sm.metrics}
    assert points["db_pool_wait_p99_ms"].as_double == 41.5 and points["http_5xx_ratio"].as_double == 0.002
    assert points["db_pool_wait_p99_ms"].time_unix_nano == 1780000030_250000000   # exact nanoseconds


def _attr(key: str, text: str) -> KeyValue:
    return KeyValue(key=key, value=AnyValue(string_value=text))


def test_a_request_built_with_the_official_classes_decodes_to_its_points() -> None:
    t = 1780000065_500000000
    gauge = metrics_pb2.Metric(name="berth_queue_depth", gauge=metrics_pb2.Gauge(data_points=[
        metrics_pb2.NumberDataPoint(time_unix_nano=t, as_double=7.25, attributes=[_attr("berth", "b2")])]))
    total = metrics_pb2.Metric(name="tickets_sold", sum=metrics_pb2.Sum(
        aggregation_temporality=metrics_pb2.AGGREGATION_TEMPORALITY_CUMULATIVE, is_monotonic=True,
        data_points=[metrics_pb2.NumberDataPoint(start_time_unix_nano=t - 60_000_000_000, time_unix_nano=t, as_int=1234)]))
    request = ExportMetricsServiceRequest(resource_metrics=[metrics_pb2.ResourceMetrics(
        resource={"attributes": [_attr("service.name", "ticketing"), _attr("service.instance.id", "ticketing-1")]},
        scope_metrics=[metrics_pb2.ScopeMetrics(metrics=[gauge, total])])])
    raw = json_format.MessageToJson(request, use_integers_for_enums=True, indent=None).encode()
    samples, skipped = decode_otlp(raw, resource_labels=ENTITY)
    ts = float(Fraction(t, 10**9))
    entity = {"service.name": "ticketing", "service.instance.id": "ticketing-1"}
    assert skipped == 0
    assert samples == [Sample(ts, "berth_queue_depth", {**entity, "berth": "b2"}, 7.25),
                       Sample(ts, "tickets_sold", entity, 1234.0)]
