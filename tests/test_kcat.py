"""Cross-check with an independent Kafka client: kcat (librdkafka) produces the incident and reads the alerts back.

`shiftsieve run` (kafka-python) sits in between. With kafka-python on both sides a bug shared by its
producer and consumer (framing, keys, partitioning) would cancel out; kcat on both sides catches it.
"""

import gzip
import json
import os
import shutil
import signal
import socket
import struct
import subprocess
import sys
import threading
import time

import pytest

from conftest import free_port, recv_exactly
from shiftsieve.stream.demo import scenarios

pytestmark = pytest.mark.skipif(shutil.which("kcat") is None,
                                reason="kcat not on PATH (Debian package kcat; .ci/run installs it)")

# Expected values: the bundled labels file replay_data/single_shift.labels.json (its only incident).
ENTITY, TOP_METRIC = "booking-api-2", "db_pool_wait_p99_ms"



# Why kcat talks to the broker through HandshakeRelay: Debian 12's kcat links librdkafka 2.0.2, which
# skips one byte too few per tagged field (fixed upstream in 2023: confluentinc/librdkafka#4278). Tansu
# sends four default-valued tagged fields in its ApiVersions v3 response, so librdkafka fails the
# handshake ("ApiVersionRequest failed: Local: Read underflow") and never connects; no librdkafka
# setting avoids it (a broker.version.fallback below 0.10 skips ApiVersions but produces MessageSet
# v0, which Tansu rejects). The relay rewrites two responses and nothing else: ApiVersions v3 loses
# those tagged fields (all at their defaults), and Metadata advertises the relay's port instead of the
# broker's so kcat's second connection also comes through it. Produce and Fetch pass byte for byte.
# With a fixed librdkafka the relay is not needed, and harmless.

def _uvarint(buf: bytes, p: int) -> tuple[int, int]:
    shift = value = 0
    while True:
        b = buf[p]
        p += 1
        value |= (b & 0x7F) << shift
        shift += 7
        if not b & 0x80:
            return value, p


def _skip_tags(buf: bytes, p: int) -> int:
    count, p = _uvarint(buf, p)
    for _ in range(count):
        _, p = _uvarint(buf, p)
        size, p = _uvarint(buf, p)
        p += size
    return p


def _strip_api_versions_tags(resp: bytes) -> bytes:
    """ApiVersions v3+ response (header v0): keep keys and throttle time, empty the trailing tags."""
    (error,) = struct.unpack_from(">h", resp, 4)
    if error:
        return resp
    count, p = _uvarint(resp, 6)
    for _ in range(count - 1):
        p = _skip_tags(resp, p + 6)   # api_key, min_version, max_version, tags
    return resp[:p + 4] + b"\x00"     # throttle_time_ms, no tags


def _rewrite_metadata_port(resp: bytes, version: int, old: int, new: int) -> bytes:
    """Metadata response: brokers advertised on port ``old`` get port ``new`` (same length)."""
    flexible = version >= 9
    out = bytearray(resp)
    p = _skip_tags(resp, 4) if flexible else 4
    if version >= 3:
        p += 4                        # throttle_time_ms
    if flexible:
        count, p = _uvarint(resp, p)
        count -= 1
    else:
        (count,) = struct.unpack_from(">i", resp, p)
        p += 4
    for _ in range(count):
        p += 4                        # node_id
        if flexible:
            size, p = _uvarint(resp, p)
            p += size - 1
        else:
            (size,) = struct.unpack_from(">h", resp, p)
            p += 2 + size
        if struct.unpack_from(">i", resp, p)[0] == old:
            struct.pack_into(">i", out, p, new)
        p += 4
        if version >= 1:              # rack, nullable
            if flexible:
                size, p = _uvarint(resp, p)
                p += max(size - 1, 0)
            else:
                (size,) = struct.unpack_from(">h", resp, p)
                p += 2 + max(size, 0)
        if flexible:
            p = _skip_tags(resp, p)
    return bytes(out)


class HandshakeRelay:
    """A loopback TCP relay to one broker; see the comment above for what it rewrites."""

    def __init__(self, upstream: str):
        host, port = upstream.rsplit(":", 1)
        self.upstream = (host, int(port))
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.port = self.listener.getsockname()[1]
        self.address = f"127.0.0.1:{self.port}"
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while True:
            try:
                client, _ = self.listener.accept()
            except OSError:
                return
            try:
                server = socket.create_connection(self.upstream, timeout=5)
                server.settimeout(None)
            except OSError:
                client.close()
                continue
            pending: dict[int, tuple[int, int]] = {}   # correlation id -> (api key, api version)
            for args in ((client, server, pending, True), (server, client, pending, False)):
                threading.Thread(target=self._pump, args=args, daemon=True).start()

    def _pump(self, src: socket.socket, dst: socket.socket, pending: dict, requests: bool) -> None:
        try:
            while True:
                (size,) = struct.unpack(">i", recv_exactly(src, 4))
                frame = recv_exactly(src, size)
                if requests:
                    key, version, corr = struct.unpack_from(">hhi", frame)
                    pending[corr] = (key, version)
                else:
                    key, version = pending.pop(struct.unpack_from(">i", frame)[0], (None, None))
                    if key == 18 and version >= 3:
                        frame = _strip_api_versions_tags(frame)
                    elif key == 3:
                        frame = _rewrite_metadata_port(frame, version, self.upstream[1], self.port)
                dst.sendall(struct.pack(">i", len(frame)) + frame)
        except (OSError, EOFError, struct.error):
            pass
        finally:
            for s in (src, dst):
                try:
                    s.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass
                s.close()

    def close(self) -> None:
        try:
            self.listener.shutdown(socket.SHUT_RDWR)   # wakes the blocked accept()
        except OSError:
            pass
        self.listener.close()


def kcat(*args: str, timeout: float = 60) -> subprocess.CompletedProcess:
    return subprocess.run(["kcat", *args], capture_output=True, text=True, timeout=timeout)


def read_alerts(broker: str, topic: str) -> list[tuple[str, dict]]:
    """(key, event) for every message on ``topic``, read from the beginning by kcat."""
    consumed = kcat("-C", "-b", broker, "-t", topic, "-o", "beginning", "-e", "-q", "-J")
    assert consumed.returncode == 0, consumed.stderr[-2000:]
    records = [json.loads(line) for line in consumed.stdout.splitlines() if line.strip()]
    return [(r["key"], json.loads(r["payload"])) for r in records]


def test_kcat_produces_incident_and_reads_alerts_back(kafka_broker, kafka_topic, tmp_path):
    source, alerts = kafka_topic(partitions=2), kafka_topic()
    relay = HandshakeRelay(kafka_broker)
    try:
        messages = tmp_path / "messages.tsv"
        with gzip.open(scenarios()["single_shift"]) as src, open(messages, "wb") as out:
            for line in src:
                line = line.rstrip(b"\n")
                assert b"\t" not in line
                out.write(json.loads(line)["entity"].encode() + b"\t" + line + b"\n")
        produced = kcat("-b", relay.address, "-t", source, "-P", "-K", r"\t", "-l", str(messages))
        assert produced.returncode == 0 and "ERROR" not in produced.stderr, produced.stderr[-2000:]

        events, stderr = tmp_path / "events.jsonl", tmp_path / "run.stderr"
        env = {**os.environ, "SHIFTSIEVE_KAFKA_API_VERSION": "2.5.0", "SHIFTSIEVE_KAFKA_SESSION_TIMEOUT_MS": "6000",
               "SHIFTSIEVE_KAFKA_ALERT_TOPIC": f'"{alerts}"'}
        with open(stderr, "wb") as err:
            proc = subprocess.Popen([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--listen",
                                     f"127.0.0.1:{free_port()}", "--source",
                                     f"kafka://{kafka_broker}/{source}?group={source}-det", "--events", str(events)],
                                    env=env, stderr=err)
        # Wait on the alert topic, not on --events: that file is written through a buffer (flushed at exit).
        try:
            deadline = time.monotonic() + 120
            while time.monotonic() < deadline and proc.poll() is None:
                on_topic = read_alerts(relay.address, alerts)
                if any(e["state"] == "firing" for _, e in on_topic):
                    break
                time.sleep(1)
        finally:
            proc.send_signal(signal.SIGTERM)
            code = proc.wait(timeout=30)
        assert code == 0, stderr.read_text(errors="replace")[-2000:]

        firing = [e for e in map(json.loads, events.read_text().splitlines()) if e["state"] == "firing"]
        assert firing, "no firing event in --events: " + stderr.read_text(errors="replace")[-2000:]
        assert firing[0]["entity"] == ENTITY and firing[0]["metrics"][0]["name"] == TOP_METRIC, firing[0]
        on_topic = read_alerts(relay.address, alerts)   # again: SIGTERM flushed the producer
        match = [(key, e) for key, e in on_topic if e["state"] == "firing" and e["incident"] == firing[0]["incident"]]
        assert match, f"firing event {firing[0]['incident']} not on the alert topic: {on_topic}"
        key, event = match[0]
        assert key == ENTITY and event == firing[0]
    finally:
        relay.close()
