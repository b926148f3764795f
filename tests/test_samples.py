"""Tests of shiftsieve.stream.samples: the one-sample message and assembly of samples into vectors."""

from __future__ import annotations

import json
import math
import random
from datetime import datetime

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shiftsieve.stream.assemble import metric_labels
from shiftsieve.stream.decode import DecodeError, DecodeLimits, Vector, decode_vector
from shiftsieve.stream.samples import (
    REJECT_REASONS,
    SAMPLE_REASONS,
    Sample,
    SampleAssembler,
    decode_sample,
    series_name,
)

FAST = settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
T0 = 1780000020.0  # = 29666667 * 60: a bucket boundary for step 60
ENTITY = ["service", "instance"]


def sample(ts: float, name: str = "cpu_util", value: float | None = 1.0, instance: str = "checkout-3",
           **labels: str) -> Sample:
    return Sample(ts, name, {"service": "checkout", "instance": instance, **labels}, value)


def message(**fields: object) -> bytes:
    base: dict[str, object] = {"ts": 1780000000.0, "name": "lat_p99_ms", "value": 182.0,
                               "labels": {"service": "checkout", "instance": "checkout-3"}}
    base.update(fields)
    return orjson.dumps({k: v for k, v in base.items() if v is not ...})


# --- decode_sample: the message from the brief --------------------------------------------------

def test_brief_example() -> None:
    raw = (b'{"ts": 1780000000.0, "name": "lat_p99_ms", "labels": {"service": "checkout", '
           b'"instance": "checkout-3", "dependency": "payments"}, "value": 182.0}')
    assert decode_sample(raw) == Sample(1780000000.0, "lat_p99_ms",
                                        {"service": "checkout", "instance": "checkout-3", "dependency": "payments"},
                                        182.0)


def test_rfc3339_ts_null_and_integer_values_no_labels() -> None:
    # reference: stdlib datetime for the RFC 3339 instant
    s = decode_sample('{"ts": "2026-05-28T12:00:00.5+02:00", "name": "conns", "value": 7}')
    assert s.ts == datetime.fromisoformat("2026-05-28T12:00:00.5+02:00").timestamp()
    assert s.value == 7.0 and type(s.value) is float and s.labels == {}
    assert decode_sample(message(value=None)).value is None
    assert decode_sample(message(labels=None)).labels == {}


def test_same_input_kinds_as_the_vector_decoder() -> None:
    raw = message()
    for kind in (bytearray, memoryview, bytes.decode):
        assert decode_sample(kind(raw)) == decode_sample(raw)


def test_stdlib_literals_become_a_rejection_not_bad_json() -> None:
    # reference: decode.py's policy, NaN/Infinity are read by the fallback parser
    with pytest.raises(DecodeError) as info:
        decode_sample(b'{"ts": 1780000000, "name": "x", "value": NaN}')
    assert info.value.reason == "non_finite"


REJECTIONS = {
    "bad_input": 12345,
    "too_large": message(name="x" * 150),
    "bad_json": b'{"ts": ',
    "not_object": b"[1, 2]",
    "no_ts": message(ts=...),
    "bad_ts": message(ts=True),
    "naive_ts": message(ts="2026-05-28T12:00:00"),
    "ts_out_of_range": message(ts=1780000000000.0),
    "no_name": message(name=""),
    "bad_name": message(name='lat{dependency="payments"}'),
    "bad_labels": message(labels={"service": 3}),
    "no_value": message(value=...),
    "numeric_string": message(value="182"),   # a JSON number sent as a string (RFC 8259: a string)
    "not_a_number": message(value="n/a"),
    "out_of_range": message(value=1e301),
    "non_finite": b'{"ts": 1780000000, "name": "x", "value": -Infinity}',
}


@pytest.mark.parametrize("reason", sorted(REJECTIONS))
def test_every_rejection_reason(reason: str) -> None:
    limits = DecodeLimits(max_bytes=200)
    with pytest.raises(DecodeError) as info:
        decode_sample(REJECTIONS[reason], limits)  # type: ignore[arg-type]
    assert info.value.reason == reason and str(info.value)


def test_rejection_table_covers_every_reason() -> None:
    assert set(REJECTIONS) == SAMPLE_REASONS


def test_name_rules() -> None:
    for name, reason in [(None, "no_name"), (5, "bad_name"), ("x" * 201, "bad_name"), ("a}", "bad_name")]:
        with pytest.raises(DecodeError) as info:
            decode_sample(message(name=name if name is not None else ...))
        assert info.value.reason == reason
    with pytest.raises(DecodeError) as info:
        decode_sample('{"ts": 1780000000, "name": "\\ud800", "value": 1}')
    assert info.value.reason == "bad_name"


def check_decodes_or_rejects(raw: bytes | str) -> None:
    try:
        s = decode_sample(raw)
    except DecodeError as exc:
        assert exc.reason in SAMPLE_REASONS and str(exc)
        return
    assert isinstance(s, Sample) and type(s.ts) is float and math.isfinite(s.ts)
    assert isinstance(s.name, str) and s.name
    assert s.value is None or (type(s.value) is float and math.isfinite(s.value))
    assert all(isinstance(k, str) and isinstance(v, str) for k, v in s.labels.items())


@FAST
@given(st.binary(max_size=300))
def test_arbitrary_bytes_give_a_sample_or_decode_error(raw: bytes) -> None:
    check_decodes_or_rejects(raw)


json_scalars = st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | st.text(max_size=8)
json_values = st.recursive(json_scalars, lambda inner: st.lists(inner, max_size=3)
                           | st.dictionaries(st.text(max_size=5), inner, max_size=3), max_leaves=8)
sample_like = st.fixed_dictionaries({}, optional={
    "ts": st.floats(1.7e9, 1.8e9) | st.sampled_from(["2026-05-28T12:00:00Z", "nope", ""]) | json_values,
    "name": st.text(max_size=10) | json_values,
    "labels": st.dictionaries(st.text(max_size=5), st.text(max_size=5), max_size=3) | json_values,
    "value": st.floats() | st.integers() | json_values,
})


@FAST
@given(sample_like)
def test_arbitrary_sample_like_objects_give_a_sample_or_decode_error(obj: dict) -> None:
    check_decodes_or_rejects(json.dumps(obj))  # stdlib: also NaN and big integers


# --- series notation (reference: assemble.metric_labels, the parser the model uses, and the
# --- Prometheus text exposition format: label values escape backslash, double quote, newline) ----

def test_series_name_sorted_escaped_and_read_back_by_metric_labels() -> None:
    name = series_name("lat_ms", {"zone": "eu-1", "dependency": 'pay"ments\\v2'})
    assert name == 'lat_ms{dependency="pay\\"ments\\\\v2",zone="eu-1"}'
    assert metric_labels(name) == {"dependency": 'pay\\"ments\\\\v2', "zone": "eu-1"}  # parser keeps escapes
    assert series_name("lat_ms", {"note": "a\nb"}) == 'lat_ms{note="a\\nb"}'


def test_series_name_plain_keys_made_label_names_empty_values_left_out() -> None:
    assert series_name("up", {}) == "up"
    assert series_name("up", {"shard": ""}) == "up"
    name = series_name("req", {"http.response.status_code": "200", "2xx": "y"})
    assert name == 'req{_2xx="y",http_response_status_code="200"}'
    assert metric_labels(name) == {"_2xx": "y", "http_response_status_code": "200"}
    with pytest.raises(ValueError):
        series_name("req", {"a.b": "1", "a_b": "2"})


# --- the assembler: exact scenarios (expected values computed by hand) ---------------------------

def test_two_entities_interleaved_bucketed_and_emitted_by_the_watermark() -> None:
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=10)
    assert a.add(sample(T0 + 1, "cpu_util", 0.4)) == ([], None)
    assert a.add(sample(T0 + 2, "cpu_util", 0.5, instance="checkout-4")) == ([], None)
    assert a.add(sample(T0 + 30, "lat_ms", 180.0, dependency="payments")) == ([], None)
    assert a.add(sample(T0 + 59.5, "lat_ms", None, instance="checkout-4", dependency="payments")) == ([], None)
    assert a.add(sample(T0 + 69.9, "cpu_util", 0.6)) == ([], None)  # bucket T0+60; 69.9 < 60 + 10
    out, reason = a.add(sample(T0 + 70, "cpu_util", 0.7, instance="checkout-4"))  # 70 >= 60 + 10: closes T0
    assert reason is None
    labels3, labels4 = {"service": "checkout", "instance": "checkout-3"}, {"service": "checkout", "instance": "checkout-4"}
    assert out == [
        Vector(T0, "checkout/checkout-3", {"cpu_util": 0.4, 'lat_ms{dependency="payments"}': 180.0}, labels3),
        Vector(T0, "checkout/checkout-4", {"cpu_util": 0.5, 'lat_ms{dependency="payments"}': None}, labels4),
    ]
    assert a.flush() == [Vector(T0 + 60, "checkout/checkout-3", {"cpu_util": 0.6}, labels3),
                         Vector(T0 + 60, "checkout/checkout-4", {"cpu_util": 0.7}, labels4)]
    assert a.counts["accepted"] == 6 and a.open_buckets == 0


def test_bucket_start_is_floor_of_ts_over_step() -> None:
    a = SampleAssembler(ENTITY, step=15, allowed_lateness=30)
    for ts in (T0 + 14.999, T0 - 0.001):
        a.add(sample(ts))
    assert [v.ts for v in a.flush()] == [math.floor((T0 - 0.001) / 15) * 15, T0]  # T0 - 15, T0


def test_late_duplicate_and_out_of_order_counts_exact() -> None:
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=30)
    a.add(sample(T0 + 10, value=1.0))
    a.add(sample(T0 + 70, value=2.0))             # newest open bucket: T0+60
    assert a.add(sample(T0 + 5, value=3.0)) == ([], None)    # out_of_order + duplicate; earlier ts loses
    assert a.add(sample(T0 + 20, value=4.0)) == ([], None)   # out_of_order + duplicate; later ts wins
    assert a.add(sample(T0 + 30, "mem", 5.0)) == ([], None)  # out_of_order only
    out, reason = a.add(sample(T0 + 90, value=6.0))          # duplicate in T0+60 (later ts wins); closes T0
    assert reason is None and out[0].metrics == {"cpu_util": 4.0, "mem": 5.0}
    assert a.add(sample(T0 + 59, value=7.0)) == ([], "late")
    assert a.add(sample(T0 + 59, "other", 7.0, instance="new")) == ([], "late")  # global: any entity
    assert a.flush()[0].metrics == {"cpu_util": 6.0}
    c = a.counts
    assert (c["accepted"], c["late"], c["duplicate"], c["out_of_order"]) == (6, 2, 3, 3)
    assert sum(c.values()) - c["duplicate"] - c["out_of_order"] == 8  # every sample: one outcome


def test_equal_ts_duplicate_keeps_the_later_arrival() -> None:
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=0)
    a.add(sample(T0, value=1.0))
    a.add(sample(T0, value=2.0))
    assert a.flush()[0].metrics == {"cpu_util": 2.0} and a.counts["duplicate"] == 1


def test_flush_closes_the_flushed_buckets_but_not_later_ones() -> None:
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=30)
    a.add(sample(T0 + 1))
    assert [v.ts for v in a.flush()] == [T0] and a.flush() == []
    assert a.add(sample(T0 + 59)) == ([], "late")            # never a second vector for T0
    assert a.add(sample(T0 + 61)) == ([], None)
    assert [v.ts for v in a.flush()] == [T0 + 60]


def test_entity_rejections() -> None:
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=0, limits=DecodeLimits(max_entity_length=20))
    assert a.add(Sample(T0, "x", {"service": "checkout"}, 1.0)) == ([], "no_entity")
    assert a.add(Sample(T0, "x", {"service": "checkout", "instance": ""}, 1.0)) == ([], "no_entity")
    assert a.add(sample(T0, instance="i" * 20)) == ([], "bad_entity")
    assert a.watermark == -math.inf  # rejected before placement: time does not move
    assert a.add(sample(T0, instance="c-1")) == ([], None)


def test_name_rejections_and_entity_labels_not_in_the_name() -> None:
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=0, limits=DecodeLimits(max_name_length=24))
    assert a.add(sample(T0, "lat_ms", dependency="paym")) == ([], "bad_name")  # 25 characters
    assert a.add(sample(T0, "lat_ms", **{"a.b": "1", "a_b": "2"})) == ([], "label_collision")
    assert a.add(sample(T0, "lat_ms", dependency="pay")) == ([], None)
    assert list(a.flush()[0].metrics) == ['lat_ms{dependency="pay"}']


def test_entity_cap_and_freed_slot_after_emission() -> None:
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=0, max_entities=2)
    a.add(sample(T0, instance="a"))
    a.add(sample(T0, instance="b"))
    assert a.add(sample(T0, instance="c")) == ([], "entity_limit")
    out, reason = a.add(sample(T0 + 60, instance="c"))   # closes T0 first: a and b leave, c fits
    assert reason is None and [v.entity for v in out] == ["checkout/a", "checkout/b"]
    assert a.counts["entity_limit"] == 1


def test_open_bucket_cap_and_series_cap() -> None:
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=600, max_open_buckets=2,
                        limits=DecodeLimits(max_metrics=2))
    a.add(sample(T0))
    a.add(sample(T0 + 60))
    assert a.add(sample(T0 + 120)) == ([], "bucket_limit")
    a.add(sample(T0, "mem"))
    assert a.add(sample(T0, "disk")) == ([], "too_many_metrics")
    assert a.add(sample(T0 + 1, "mem", 9.0)) == ([], None)  # a duplicate is not a new series
    assert [len(v.metrics) for v in a.flush()] == [2, 1]


@pytest.mark.parametrize("kwargs", [
    {"entity_labels": []}, {"entity_labels": "service"}, {"step": 0}, {"step": math.inf},
    {"allowed_lateness": -1}, {"max_entities": 0}, {"max_open_buckets": 1.5},
])
def test_constructor_rejects_unusable_settings(kwargs: dict) -> None:
    settings_ = {"entity_labels": ENTITY, "step": 60, "allowed_lateness": 0, **kwargs}
    with pytest.raises(ValueError):
        SampleAssembler(**settings_)


# --- the assembler: properties -----------------------------------------------------------------

streams = st.lists(st.tuples(st.integers(0, 600), st.sampled_from(["a", "b", "c", ""]),
                             st.sampled_from(["cpu", "mem", "lat"]), st.sampled_from(["", "payments", "db"]),
                             st.none() | st.floats(-1e3, 1e3)), max_size=80)


@FAST
@given(streams, st.sampled_from([10, 60]), st.sampled_from([0, 30, 200]), st.integers(1, 3), st.integers(1, 4))
def test_conservation_and_vector_invariants(rows: list, step: int, lateness: int, max_entities: int,
                                            max_buckets: int) -> None:
    a = SampleAssembler(ENTITY, step, lateness, max_entities, max_buckets, limits=DecodeLimits(max_metrics=4))
    vectors, reasons = [], []
    for offset, instance, name, dependency, value in rows:
        out, reason = a.add(sample(T0 + offset, name, value, instance, dependency=dependency))
        vectors += out
        reasons.append(reason)
    vectors += a.flush()
    c = a.counts
    rejected = [r for r in reasons if r is not None]
    assert set(rejected) <= REJECT_REASONS
    assert len(rows) == c["accepted"] + sum(c[r] for r in REJECT_REASONS)
    assert set(c) == {"accepted", "duplicate", "out_of_order"} | REJECT_REASONS
    assert all(c[r] == rejected.count(r) for r in REJECT_REASONS)
    assert sum(len(v.metrics) for v in vectors) == c["accepted"] - c["duplicate"]
    assert a.open_buckets == 0
    for entity in {v.entity for v in vectors}:
        times = [v.ts for v in vectors if v.entity == entity]
        assert times == sorted(set(times))  # in order, never two vectors for one bucket
    assert all(v.ts % step == 0 and 0 < len(v.metrics) <= 4 for v in vectors)


# --- same data as vector messages and as samples (reference: decode_vector) ---------------------

def vector_messages(buckets: int, step: float) -> list[bytes]:
    rng = random.Random(7)
    out = []
    for b in range(buckets):
        for instance in ("checkout-3", "checkout-4"):
            metrics = {"cpu_util": round(rng.random(), 3), 'lat_p99_ms{dependency="payments"}': rng.choice([None, 182.0]),
                       'lat_p99_ms{dependency="inventory",zone="eu-1"}': 40.0 + b}
            if b % 3 == 0:
                metrics["gc_pause_ms"] = 3.5
            out.append(orjson.dumps({"ts": T0 + b * step, "entity": f"checkout/{instance}", "metrics": metrics,
                                     "labels": {"service": "checkout", "instance": instance}}))
    return out


def as_samples(vectors: list[Vector], step: float) -> list[Sample]:
    """Each vector entry as one sample message, jittered inside its bucket, shuffled in pairs of buckets."""
    rng = random.Random(11)
    by_pair: dict[int, list[Sample]] = {}
    for v in vectors:
        for name, value in v.metrics.items():
            raw = orjson.dumps({"ts": v.ts + rng.uniform(0, step * 0.99), "name": name.split("{")[0],
                                "labels": {**v.labels, **metric_labels(name)}, "value": value})
            by_pair.setdefault(int((v.ts - T0) // (2 * step)), []).append(decode_sample(raw))
    out = []
    for pair in sorted(by_pair):
        rng.shuffle(by_pair[pair])
        out += by_pair[pair]
    return out


def test_vector_messages_and_samples_give_the_same_vectors() -> None:
    step = 60.0
    expected = [decode_vector(raw) for raw in vector_messages(12, step)]
    a = SampleAssembler(ENTITY, step, allowed_lateness=step)  # covers the shuffle window of two buckets
    got = []
    for s in as_samples(expected, step):
        out, reason = a.add(s)
        assert reason is None
        got += out
    got += a.flush()
    assert a.counts["late"] == a.counts["duplicate"] == 0 and a.counts["out_of_order"] > 0
    key = lambda v: (v.ts, v.entity)  # noqa: E731
    assert sorted(got, key=key) == sorted(expected, key=key)


def test_held_offsets_are_the_oldest_message_of_each_open_step() -> None:
    """What a snapshot or commit may cover: never past a sample still waiting in an open step."""
    a = SampleAssembler(ENTITY, step=60, allowed_lateness=10)
    a.add(sample(T0 + 1, "cpu_util"), ("t/0", 10))
    a.add(sample(T0 + 2, "lat_ms", instance="checkout-4"), ("t/1", 3))
    a.add(sample(T0 + 3, "mem_bytes"), ("t/0", 12))
    assert a.held_offsets() == {"t/0": 10, "t/1": 3}
    a.add(sample(T0 + 61, "cpu_util"), ("t/0", 20))            # next step; the first one stays open
    assert a.held_offsets() == {"t/0": 10, "t/1": 3}
    out, _ = a.add(sample(T0 + 75, "cpu_util", instance="checkout-4"), ("t/1", 30))   # closes step T0
    assert len(out) == 2 and a.held_offsets() == {"t/0": 20, "t/1": 30}
    _, reason = a.add(sample(T0 + 1, "late"), ("t/0", 5))      # refused: holds nothing
    assert reason == "late" and a.held_offsets() == {"t/0": 20, "t/1": 30}
    a.flush()
    assert a.held_offsets() == {}
