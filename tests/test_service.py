"""`shiftsieve run` as a process: stdin source, HTTP endpoints, exporter, SIGTERM."""

import gzip
import json
import shutil
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request

import numpy as np
import pytest

from conftest import free_port
from shiftsieve.stream.demo import scenarios



def get(url: str) -> tuple[int, bytes]:
    try:
        with urllib.request.urlopen(url, timeout=5) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as e:
        return e.code, e.read()


def wait_for(predicate, timeout=60.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(0.2)
    raise AssertionError("timed out")


@pytest.fixture()
def service(tmp_path):
    port = free_port()
    events = tmp_path / "events.jsonl"
    proc = subprocess.Popen([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--listen", f"127.0.0.1:{port}",
                             "--events", str(events), "--dead-letter", str(tmp_path / "dead.jsonl")],
                            stdin=subprocess.PIPE, stderr=subprocess.PIPE)
    base = f"http://127.0.0.1:{port}"
    wait_for(lambda: _up(base))
    yield proc, base, events, tmp_path
    if proc.poll() is None:
        proc.kill()
        proc.wait()


def _up(base):
    try:
        return get(base + "/healthz")[0] == 200
    except OSError:
        return False


def test_service_detects_exports_and_stops_cleanly_on_sigterm(service):
    proc, base, events, tmp_path = service
    lines = gzip.open(scenarios()["single_shift"]).read().splitlines()
    # Everything up to the middle of the incident (db_pool_wait_p99_ms on booking-api-2 from ~sample 900).
    cut = next(i for i, l in enumerate(lines) if json.loads(l)["ts"] >= 1780027004.0 + 30 * 20)
    proc.stdin.write(b"\n".join(lines[:cut]) + b"\n" + b"{garbage\n")
    proc.stdin.flush()

    def firing_series():
        status, body = get(base + "/metrics")
        text = body.decode()
        return status == 200 and 'shiftsieve_shift_sigma{entity="booking-api-2",metric="db_pool_wait_p99_ms"}' in text \
            and text

    text = wait_for(firing_series)
    assert 'shiftsieve_metric_state{entity="booking-api-2",metric="db_pool_wait_p99_ms"} 2.0' in text
    assert 'shiftsieve_messages_dead_lettered_total{reason="bad_json"} 1.0' in text
    assert "shiftsieve_entity_baseline_rank{" in text and "shiftsieve_batch_duration_seconds_bucket" in text
    assert get(base + "/readyz")[0] == 200
    # The events file is written as events happen (someone may be following it), not at exit.
    assert json.loads(wait_for(lambda: events.read_text().splitlines()[:1])[0])["state"] == "firing"
    assert get(base + "/nothing")[0] == 404
    request = urllib.request.Request(base + "/metrics", data=b"x", method="POST")
    with pytest.raises(urllib.error.HTTPError) as refused:
        urllib.request.urlopen(request, timeout=5)
    assert refused.value.code == 405
    if shutil.which("promtool"):   # Prometheus's own linter on our exposition
        check = subprocess.run(["promtool", "check", "metrics"], input=text.encode(), capture_output=True)
        assert check.returncode == 0, check.stdout + check.stderr

    started = time.monotonic()
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=10) == 0
    assert time.monotonic() - started < 5          # bounded: one poll (0.5 s) plus the flush
    firing = [json.loads(l) for l in events.read_text().splitlines()]
    assert firing and firing[0]["entity"] == "booking-api-2" and firing[0]["state"] == "firing"
    dead = [json.loads(l) for l in (tmp_path / "dead.jsonl").read_text().splitlines()]
    assert [d["reason"] for d in dead] == ["bad_json"]


def test_series_go_away_when_the_incident_resolves(service):
    proc, base, events, _ = service
    proc.stdin.write(gzip.open(scenarios()["single_shift"]).read())
    proc.stdin.close()                              # end of input: the service finishes and exits 0
    assert proc.wait(timeout=120) == 0
    states = [json.loads(l)["state"] for l in events.read_text().splitlines()]
    assert states == ["firing", "resolved"]


def test_bad_listen_address_is_a_one_line_error():
    proc = subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--listen", "nowhere"],
                          input=b"", capture_output=True, timeout=60)
    assert proc.returncode == 2 and proc.stderr.decode().startswith("shiftsieve: error: --listen")


def _run_service(tmp_path, payload: bytes, env: dict) -> list[dict]:
    events = tmp_path / "events.jsonl"
    proc = subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--listen", "127.0.0.1:0",
                           "--events", str(events)], input=payload, capture_output=True, timeout=300,
                          env={**__import__("os").environ, **env})
    assert proc.returncode == 0, proc.stderr.decode()[-2000:]
    return [json.loads(l) for l in events.read_text().splitlines()]


def test_one_sample_per_message_encoding_assembles_the_same_incident(tmp_path):
    """The bundled single_shift incident, re-encoded as one sample per message (entity as a label),
    is found like the vector messages are: same entity, same metric opening it."""
    out = []
    for line in gzip.open(scenarios()["single_shift"]):
        vec = json.loads(line)
        for name, value in vec["metrics"].items():
            out.append(json.dumps({"ts": vec["ts"], "name": name, "labels": {"host": vec["entity"]},
                                   "value": value}, separators=(",", ":")))
    events = _run_service(tmp_path, ("\n".join(out) + "\n").encode(),
                          {"SHIFTSIEVE_SOURCE_ENCODING": "sample", "SHIFTSIEVE_SOURCE_ENTITY_LABELS": '["host"]',
                           "SHIFTSIEVE_SOURCE_STEP_SECONDS": "30"})
    onsets = [e for e in events if e.get("onset")]
    assert [(e["entity"], e["metrics"][0]["name"]) for e in onsets] == [("booking-api-2", "db_pool_wait_p99_ms")]


def _found_the_fault(events: list[dict]) -> bool:
    """Whether an incident of the faulty entity opened during the labelled fault of single_shift
    (a model that warmed up on the fault may still alert later, when the metric returns to normal:
    its warm-up learned part of the fault as normal)."""
    label = json.loads((scenarios()["single_shift"].parent / "single_shift.labels.json").read_text())["incidents"][0]
    return any(e.get("onset") and e["entity"] == label["entity"] and label["start"] - 120 <= e["ts"] <= label["end"]
               for e in events)


def test_restart_restores_models_from_the_state_directory(tmp_path):
    """Stopped after 800 of 1500 samples and restarted on the rest: the second process restores
    every entity (no new warm-up, which alone would take 540 samples and swallow the fault at
    sample 900) and finds the incident."""
    lines = gzip.open(scenarios()["single_shift"]).read().splitlines()
    cut = next(i for i, l in enumerate(lines) if json.loads(l)["ts"] >= 1780000000.0 + 30 * 800)
    env = {"SHIFTSIEVE_STATE_DIRECTORY": f'"{tmp_path / "state"}"'}
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    (tmp_path / "c").mkdir()
    first = _run_service(tmp_path / "a", b"\n".join(lines[:cut]) + b"\n", env)
    assert first == []
    assert len(list((tmp_path / "state").iterdir())) == 4      # one snapshot per entity
    second = _run_service(tmp_path / "b", b"\n".join(lines[cut:]) + b"\n", env)
    onsets = [(e["entity"], e["metrics"][0]["name"]) for e in second if e.get("onset")]
    assert onsets == [("booking-api-2", "db_pool_wait_p99_ms")]
    alone = _run_service(tmp_path / "c", b"\n".join(lines[cut:]) + b"\n", {})   # control: no state
    assert not _found_the_fault(alone)


def test_a_restarted_service_reaches_the_state_of_an_uninterrupted_run(tmp_path):
    """The bundled single_shift stream through one process, and through two (stopped half-way,
    restarted on the rest, one state directory): same alerts, and models that agree.  Not bit for
    bit: each poll is one micro-batch and poll boundaries depend on timing, so the baselines differ
    by what a different batching gives (measured here: principal angles up to 0.03 rad, locations
    within 0.006 scale units, residual scales within 4 %)."""
    import scipy.linalg   # reference: principal angles between subspaces (Bjorck & Golub)
    from shiftsieve.stream.config import load_config
    from shiftsieve.stream.engine import Engine
    from shiftsieve.stream.state import StateDirectory

    lines = gzip.open(scenarios()["single_shift"]).read().splitlines()
    cut = len(lines) // 2
    for sub in ("one", "two"):
        (tmp_path / sub).mkdir()
    one = _run_service(tmp_path / "one", b"\n".join(lines) + b"\n",
                       {"SHIFTSIEVE_STATE_DIRECTORY": f'"{tmp_path / "one" / "state"}"'})
    env = {"SHIFTSIEVE_STATE_DIRECTORY": f'"{tmp_path / "two" / "state"}"'}
    _run_service(tmp_path / "two", b"\n".join(lines[:cut]) + b"\n", env)
    two = _run_service(tmp_path / "two", b"\n".join(lines[cut:]) + b"\n", env)   # the file is appended to

    def alerts(events):
        return [(e["entity"], e["state"], e["ts"], [m["name"] for m in e["metrics"]]) for e in events]
    assert alerts(one) == alerts(two) and alerts(one)
    engine = Engine.from_config(load_config(None))
    a_dir, b_dir = StateDirectory(tmp_path / "one" / "state"), StateDirectory(tmp_path / "two" / "state")
    assert a_dir.entities() == b_dir.entities() and len(a_dir.entities()) == 4
    for entity in a_dir.entities():
        a = a_dir.load(entity, engine.rules, engine.detector_config)[0].detector
        b = b_dir.load(entity, engine.rules, engine.detector_config)[0].detector
        assert a.baseline.rank == b.baseline.rank
        assert scipy.linalg.subspace_angles(a.baseline.U, b.baseline.U).max() < 0.1
        np.testing.assert_array_equal(a.normaliser.scale, b.normaliser.scale)   # fixed at warm-up
        assert np.max(np.abs(a.normaliser.loc - b.normaliser.loc) / a.normaliser.scale) < 0.05
        np.testing.assert_allclose(a.residual_scale, b.residual_scale, rtol=0.1)
        np.testing.assert_array_equal(a.tracker.state, b.tracker.state)


def test_a_corrupt_snapshot_is_reported_and_its_entity_warms_up_again(tmp_path):
    """A truncated snapshot fails its checksum on restore: the service says which file, that entity
    starts over (so it misses the incident, as a process without state does), the other entities are
    restored, and the entity's next snapshot is a good one."""
    from shiftsieve.stream.config import load_config
    from shiftsieve.stream.engine import Engine
    from shiftsieve.stream.state import StateDirectory

    lines = gzip.open(scenarios()["single_shift"]).read().splitlines()
    cut = next(i for i, l in enumerate(lines) if json.loads(l)["ts"] >= 1780000000.0 + 30 * 800)
    state = tmp_path / "state"
    env = {**__import__("os").environ, "SHIFTSIEVE_STATE_DIRECTORY": f'"{state}"'}

    def run(payload: bytes, events: str) -> subprocess.CompletedProcess:
        proc = subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--listen", "127.0.0.1:0",
                               "--events", str(tmp_path / events)], input=payload, capture_output=True,
                              timeout=300, env=env)
        assert proc.returncode == 0, proc.stderr.decode()[-2000:]
        return proc
    run(b"\n".join(lines[:cut]) + b"\n", "first.jsonl")
    directory = StateDirectory(state)
    bad = directory.file_for("booking-api-2")
    bad.write_bytes(bad.read_bytes()[:-100])
    second = run(b"\n".join(lines[cut:]) + b"\n", "second.jsonl")
    warning = second.stderr.decode()
    assert str(bad) in warning and "warms up again" in warning
    events = [json.loads(l) for l in (tmp_path / "second.jsonl").read_text().splitlines()]
    assert not _found_the_fault(events)
    engine = Engine.from_config(load_config(None))
    for entity in directory.entities():   # every snapshot loads, the rewritten one included
        assert directory.load(entity, engine.rules, engine.detector_config)[0].entity == entity


def test_commits_never_pass_a_held_offset(monkeypatch):
    """KafkaInput commits the next offset per partition, capped by the floor the service gives
    (the oldest message whose samples still wait in an open step), and moves on once it rises."""
    import shiftsieve.stream.kafka as kafka_module
    from shiftsieve.stream.kafka import Record
    from shiftsieve.stream.sources import KafkaInput

    class FakeSource:
        def __init__(self, settings, **callbacks):
            self.commits = []

        def poll(self, timeout):
            return [Record("t", 0, o, None, b"{}", 0) for o in range(5)] + [Record("t", 1, 7, None, b"{}", 0)]

        def commit(self, offsets):
            self.commits.append(dict(offsets))
            return True

        def lag(self):
            return {}
    monkeypatch.setattr(kafka_module, "KafkaSource", FakeSource)
    source = KafkaInput(settings=None)
    source.poll(0.1)
    source.commit({"t/0": 2})
    assert source.source.commits == [{("t", 0): 2, ("t", 1): 8}]
    assert source.positions() == {"t/0": 5, "t/1": 8}
    source.commit({"t/0": 2})          # nothing new: no request
    source.commit(None)                # the floor is gone: the rest of partition 0
    assert source.source.commits[1:] == [{("t", 0): 5}]


def test_a_byte_order_mark_on_the_first_line_is_not_a_bad_message(tmp_path):
    """Editors on some systems start a file with a UTF-8 BOM; replay ignores it, so does `run`."""
    line = json.dumps({"ts": 1796000000.0, "entity": "pier-1", "metrics": {"m": 1.0}}).encode()
    proc = subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--listen", "127.0.0.1:0",
                           "--dead-letter", str(tmp_path / "dead.jsonl")], input=b"\xef\xbb\xbf" + line + b"\n",
                          capture_output=True, timeout=60)
    assert proc.returncode == 0, proc.stderr.decode()[-2000:]
    assert (tmp_path / "dead.jsonl").read_text() == ""


def test_a_malformed_kafka_url_is_a_one_line_error():
    proc = subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--source", "kafka://broker/topic"],
                          capture_output=True, timeout=60)
    err = proc.stderr.decode().strip()
    assert proc.returncode == 2 and len(err.splitlines()) == 1 and err.startswith("shiftsieve: error: --source:"), err


def test_a_partition_that_moves_away_stops_exporting_its_lag():
    from shiftsieve.stream.config import load_config
    from shiftsieve.stream.engine import Engine
    from shiftsieve.stream.service import Service

    service = Service(load_config(None), source_url="-", listen="127.0.0.1:0")
    service.engine = Engine.from_config(service.config)
    service.exporter.lag.labels("pier-vectors", "0").set(12)
    service.exporter.lag.labels("pier-vectors", "1").set(3)
    service._forget(["pier-vectors/0"])
    text = service.exporter.exposition().decode()
    assert 'partition="0"' not in text and 'shiftsieve_consumer_lag_messages{partition="1",topic="pier-vectors"} 3.0' in text
