"""`shiftsieve produce`: encodings read back by the project's decoders, OTLP/JSON shape, pacing,
looping, CLI errors, and a real broker (produce -> consume, produce -> service -> alert)."""

from __future__ import annotations

import doctest
import gzip
import json
import math
import os
import subprocess
import sys
import threading
import time
from decimal import Decimal
from pathlib import Path

import orjson
import pytest
from kafka import KafkaConsumer

from conftest import free_port
from shiftsieve.stream import produce as produce_module
from shiftsieve.stream.cli import main
from shiftsieve.stream.config import load_config
from shiftsieve.stream.decode import Vector, decode_vector
from shiftsieve.stream.demo import scenarios
from shiftsieve.stream.otlp import decode_otlp
from shiftsieve.stream.produce import (Pacer, ProduceError, parse_speedup, produce,
                                       source_path)
from shiftsieve.stream.replay import open_input
from shiftsieve.stream.samples import SampleAssembler, decode_sample

API_ENV = {"SHIFTSIEVE_KAFKA_API_VERSION": "2.5.0"}   # DEVELOPERS.md, Facts of this environment: what Tansu settles with
STEP = 30.0
START = 1790000000.0   # the run's "now" in the round trips
DEFAULT_ENTITY = ["service", "instance"]   # config source.entity_labels default


def demo_vectors(n: int) -> list[Vector]:
    with open_input(scenarios()["single_shift"], load_config(None)) as records:
        out = []
        for record in records:
            out.append(record)
            if len(out) == n:
                return out
    return out


def sent(vectors: list[Vector], encoding: str, entity_labels=DEFAULT_ENTITY, **kw) -> list[tuple[bytes, bytes]]:
    out: list[tuple[bytes, bytes]] = []
    produce(lambda: iter(vectors), lambda k, v: out.append((k, v)), encoding=encoding,
            entity_labels=entity_labels, step=STEP, start=kw.pop("start", START), **kw)
    return out


def shift_of(first_ts: float) -> float:
    # module docstring: the first vector moves to the start, rounded down to a whole step
    return math.floor((START - first_ts) / STEP) * STEP


def assembled(samples_per_message, entity_labels) -> list[Vector]:
    """The service's path: samples -> SampleAssembler (the reference for what a message means)."""
    assembler = SampleAssembler(entity_labels, STEP, 60.0)
    out: list[Vector] = []
    for samples in samples_per_message:
        for sample in samples:
            done, reason = assembler.add(sample)
            assert reason is None
            out.extend(done)
    return out + assembler.flush()


# --- round trips: the project's decoders are the reference ------------------------------------

def test_vector_messages_decode_to_the_input_moved_to_the_start():
    vectors = demo_vectors(120)
    messages = sent(vectors, "vector")
    shift = shift_of(vectors[0].ts)
    assert len(messages) == len(vectors)
    for (key, value), v in zip(messages, vectors):
        back = decode_vector(value)
        assert key == v.entity.encode()
        assert back == Vector(v.ts + shift, v.entity, v.metrics, v.labels)   # values exactly equal
    assert START - STEP < decode_vector(messages[0][1]).ts <= START


@pytest.mark.parametrize("encoding", ["sample", "otlp_json"])
@pytest.mark.parametrize("entity_labels", [DEFAULT_ENTITY, ["instance"]])
def test_sample_and_otlp_messages_reassemble_to_the_input(encoding, entity_labels):
    vectors = demo_vectors(120)
    messages = sent(vectors, encoding, entity_labels)
    if encoding == "sample":
        per_message = [[decode_sample(value)] for _, value in messages]
        assert len(messages) == sum(len(v.metrics) for v in vectors)
    else:
        per_message = [decode_otlp(value, resource_labels=entity_labels)[0] for _, value in messages]
        assert len(messages) == len(vectors)
    got = sorted(assembled(per_message, entity_labels), key=lambda v: (v.ts, v.entity))
    shift = shift_of(vectors[0].ts)
    expected = []
    for v in vectors:
        # the mapping the module docstring states: with service+instance, "service/entity"
        labels = {"instance": v.entity} if entity_labels == ["instance"] else \
            {"service": v.labels["service"], "instance": v.entity}
        entity = "/".join(labels.values())
        # samples.py: a step's vector has ts = floor(ts / step) * step
        expected.append(Vector(math.floor((v.ts + shift) / STEP) * STEP, entity, v.metrics, labels))
    expected.sort(key=lambda v: (v.ts, v.entity))
    assert got == expected


def test_series_labels_missing_values_and_entity_names_that_split():
    v = Vector(1780000020.5, "booking-api/booking-api-2",   # 1780000020 = 30 * 59333334
               {'db_query_lat_ms{dependency="manifest-db",quantile="0.99"}': 12.5, "cpu_util_ratio": None,
                'db_query_lat_ms{dependency="seatmap",quantile="0.99"}': 3.25},
               {"zone": "quay-b"})
    (sample_msgs, otlp_msgs) = (sent([v], e, start=None) for e in ("sample", "otlp_json"))
    samples = [decode_sample(m) for _, m in sample_msgs]
    assert {s.labels["service"] + "/" + s.labels["instance"] for s in samples} == {v.entity}   # split back exactly
    assert assembled([samples], DEFAULT_ENTITY) == [Vector(1780000020.0, v.entity, v.metrics,
                                                           {"service": "booking-api", "instance": "booking-api-2"})]
    points, skipped = decode_otlp(otlp_msgs[0][1], resource_labels=DEFAULT_ENTITY)
    assert skipped == 1   # the missing value: a FLAG_NO_RECORDED_VALUE point, skipped by the decoder
    (back,) = assembled([points], DEFAULT_ENTITY)
    assert back.metrics == {k: x for k, x in v.metrics.items() if x is not None}


# --- OTLP/JSON shape ------------------------------------------------------------------------------

def _paths(obj, prefix=""):
    if isinstance(obj, dict):
        return set().union(*(_paths(v, f"{prefix}.{k}") for k, v in obj.items())) | {prefix}
    if isinstance(obj, list):
        return set().union(set(), *(_paths(v, prefix + "[]") for v in obj))
    return {prefix}


def test_otlp_output_has_the_shape_of_a_collector_export():
    vectors = demo_vectors(3)
    ((_, raw),) = sent(vectors[:1], "otlp_json")
    request = orjson.loads(raw)
    fixture = json.loads((Path(__file__).parent / "data" / "otlp_gauge_sum.json").read_text())
    # same structure as the collector-shaped fixture: every field path we write appears there
    assert _paths(request) <= _paths(fixture), sorted(_paths(request) - _paths(fixture))
    (rm,) = request["resourceMetrics"]
    attributes = {a["key"]: a["value"]["stringValue"] for a in rm["resource"]["attributes"]}
    assert attributes["service"] == "booking-api" and attributes["instance"] == "booking-api-1"
    points = [p for m in rm["scopeMetrics"][0]["metrics"] for p in m["gauge"]["dataPoints"]]
    assert len(points) == len(vectors[0].metrics)
    for p in points:
        # OTLP spec, JSON protobuf encoding (opentelemetry-proto metrics.proto, fixed64 time_unix_nano):
        # 64-bit integers are decimal strings; field names are lowerCamelCase
        assert isinstance(p["timeUnixNano"], str) and p["timeUnixNano"].isdigit()
        expected_ns = (Decimal(vectors[0].ts + shift_of(vectors[0].ts)) * 10**9).to_integral_value()
        assert int(p["timeUnixNano"]) == int(expected_ns)   # stdlib decimal: exact nanoseconds
        assert isinstance(p["asDouble"], float)
    fields = {part.rstrip("[]") for path in _paths(request) for part in path.split(".")[1:]}
    assert fields and all(f[:1].islower() and "_" not in f for f in fields)   # proto3 JSON: lowerCamelCase


def test_doctest_example_runs():
    result = doctest.testmod(produce_module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0


# --- pacing and looping (injected clock, no real waiting) ------------------------------------

class FakeClock:
    def __init__(self) -> None:
        self.now = 100.0
        self.slept: list[float] = []

    def __call__(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        self.slept.append(seconds)
        self.now += seconds


def test_speedup_keeps_the_spacing_scaled():
    clock = FakeClock()
    stamps = []
    vectors = [Vector(1780000000.0 + 30 * i, "e", {"m": float(i)}, {}) for i in range(4)]
    produce(lambda: iter(vectors), lambda k, v: stamps.append(clock.now), encoding="vector",
            entity_labels=["instance"], step=STEP, speedup=60.0, clock=clock, sleep=clock.sleep)
    # 30 s of event time at 60x is 0.5 s of wall time between vectors
    assert stamps == pytest.approx([100.0, 100.5, 101.0, 101.5])
    assert max(clock.slept) <= 0.2   # sliced, so a stop request is seen promptly


def test_speedup_zero_never_sleeps_and_a_stop_ends_a_wait():
    clock = FakeClock()
    vectors = [Vector(1780000000.0 + 3600 * i, "e", {"m": 1.0}, {}) for i in range(3)]
    out = []
    summary = produce(lambda: iter(vectors), lambda k, v: out.append(v), encoding="vector", entity_labels=["x"],
                      step=STEP, speedup=0.0, clock=clock, sleep=clock.sleep)
    assert len(out) == 3 and clock.slept == [] and not summary.stopped
    pacer = Pacer(1.0, clock=clock, sleep=clock.sleep, stopped=lambda: len(clock.slept) >= 3)
    assert pacer.wait(0.0) and not pacer.wait(3600.0)   # an hour due, stopped after three slices
    assert sum(clock.slept) < 1


def test_loop_passes_keep_every_entity_increasing():
    vectors = demo_vectors(40)
    out: list[bytes] = []
    summary = produce(lambda: iter(vectors), lambda k, v: out.append(v), encoding="vector",
                      entity_labels=DEFAULT_ENTITY, step=STEP, loop=True, start=START,
                      stopped=lambda: len(out) >= 3 * len(vectors))
    assert summary.passes == 3 and summary.vectors == len(out)
    last: dict[str, float] = {}
    for raw in out:
        v = decode_vector(raw)
        assert v.ts > last.get(v.entity, -math.inf)   # else the engine refuses it as out_of_order
        last[v.entity] = v.ts
    period = decode_vector(out[len(vectors)]).ts - decode_vector(out[0]).ts
    span = vectors[-1].ts - vectors[0].ts
    assert period % STEP == 0 and span < period <= span + STEP


def test_bad_speedups_and_scenarios():
    assert parse_speedup("max") == parse_speedup("0") == 0.0 and parse_speedup("60") == 60.0
    for bad in ("fast", "-1", "inf", "nan", ""):
        with pytest.raises(ProduceError, match="--speedup"):
            parse_speedup(bad)
    with pytest.raises(ProduceError, match="no bundled incident named 'nope'"):
        source_path("nope", None)


def _cli(*args: str, env: dict | None = None, timeout: float = 30) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "produce", *args], capture_output=True,
                          timeout=timeout, env={**os.environ, **(env or {})})


@pytest.mark.parametrize("args, message", [
    (["--speedup", "fast"], "--speedup"),
    (["--scenario", "nope"], "no bundled incident"),
    (["--topic", "bad topic"], "invalid Kafka topic"),
    (["--brokers", "no-port"], "invalid Kafka bootstrap address"),
    (["--input", "/nonexistent/x.jsonl"], "cannot open"),
    ([], "cannot write to topic"),   # nothing listens on the port: bounded by max_block_ms (2 s)
])
def test_bad_input_is_one_line_and_exit_2(args, message):
    base = {"--brokers": f"127.0.0.1:{free_port()}", "--topic": "t"}
    for flag in ("--brokers", "--topic"):
        if flag in args:
            base.pop(flag)
    proc = _cli(*[x for kv in base.items() for x in kv], *args, env=API_ENV)
    lines = proc.stderr.decode().strip().splitlines()
    assert proc.returncode == 2 and len(lines) == 1, proc.stderr.decode()
    assert lines[0].startswith("shiftsieve: error: ") and message in lines[0]


# --- a real broker --------------------------------------------------------------------------------

def _write_jsonl(path: Path, vectors: list[Vector]) -> Path:
    path.write_bytes(b"".join(orjson.dumps({"ts": v.ts, "entity": v.entity, "metrics": v.metrics,
                                            "labels": v.labels}) + b"\n" for v in vectors))
    return path


def test_produce_then_consume_and_decode_every_message(kafka_broker, kafka_topic, tmp_path):
    topic = kafka_topic(partitions=2)
    vectors = demo_vectors(200)
    proc = _cli("--brokers", kafka_broker, "--topic", topic, "--encoding", "otlp_json",
                "--input", str(_write_jsonl(tmp_path / "in.jsonl", vectors)), env=API_ENV)
    assert proc.returncode == 0, proc.stderr.decode()
    assert "200 messages (200 vectors, 1 pass)" in proc.stderr.decode()
    consumer = KafkaConsumer(topic, bootstrap_servers=kafka_broker, api_version=(2, 5, 0),
                             auto_offset_reset="earliest", consumer_timeout_ms=3000)
    got = list(consumer)
    consumer.close()
    assert len(got) == len(vectors)
    partitions: dict[bytes, set[int]] = {}
    for message in got:
        samples, skipped = decode_otlp(message.value, resource_labels=DEFAULT_ENTITY)
        assert skipped == 0 and samples
        assert {s.labels["instance"].encode() for s in samples} == {message.key}
        partitions.setdefault(message.key, set()).add(message.partition)
    assert all(len(p) == 1 for p in partitions.values())   # keyed by entity: one partition each


def test_produced_samples_make_the_service_alert(kafka_broker, kafka_topic, tmp_path, monkeypatch):
    """single_shift's faulty entity as one sample per message at max speed, read by the service."""
    from shiftsieve.stream.service import Service
    topic = kafka_topic()
    with gzip.open(scenarios()["single_shift"]) as f:   # the labelled entity keeps the test short
        lines = [line for line in f if b'"entity":"booking-api-2"' in line]
    (tmp_path / "in.jsonl").write_bytes(b"".join(lines))
    env = {**API_ENV, "SHIFTSIEVE_SOURCE_ENCODING": "sample"}
    config = load_config(None, environ=env)
    for name, value in API_ENV.items():
        monkeypatch.setenv(name, value)
    assert main(["produce", "--brokers", kafka_broker, "--topic", topic, "--encoding", "sample",
                 "--input", str(tmp_path / "in.jsonl")]) == 0
    events = tmp_path / "events.jsonl"
    service = Service(config, source_url=f"kafka://{kafka_broker}/{topic}?group={topic}-det",
                      events_path=str(events), listen="127.0.0.1:0")
    runner = threading.Thread(target=service.run)
    runner.start()
    onsets: list[dict] = []
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and not onsets:
            time.sleep(0.5)
            if events.exists():
                onsets = [e for e in map(json.loads, events.read_text().splitlines()) if e.get("onset")]
    finally:
        service.stop()
        runner.join(timeout=30)
    # single_shift.labels.json: booking-api-2, db_pool_wait_p99_ms; entity per the documented mapping
    assert [(e["entity"], e["metrics"][0]["name"]) for e in onsets] == \
        [("booking-api/booking-api-2", "db_pool_wait_p99_ms")]
