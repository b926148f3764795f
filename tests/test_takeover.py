"""Scale-out on a real broker: two `shiftsieve run` processes in one consumer group share a
two-partition topic and one state directory; one is killed with SIGKILL, and the survivor takes
over its entities with their restored models and alerts on them.

The proof that the models were restored rather than re-learned: after the kill only 100 vectors
per entity arrive, fewer than the 200-vector warm-up, so a survivor that started those entities
afresh could not alert on them at all.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from kafka import KafkaProducer

API = (2, 5, 0)   # DEVELOPERS.md, Facts of this environment: groups of two settle on this broker with this version
ENTITIES = ["quay-north", "quay-south", "tickets-1", "tickets-2"]   # the fictional ferry line's services
N_METRICS, WARMUP, QUIET, SHIFTED = 20, 200, 300, 100
SHIFTED_METRIC = "m07"
T0 = 1_796_000_000.0   # 2026-11-30, inside the decoder's accepted time range


def _vectors(seed: int, count: int, start: int, shift: float) -> dict[str, list[bytes]]:
    """Per entity: a two-factor baseline plus noise; metric m07 moves by ``shift`` noise sigmas
    from the 20th vector on (the residual sigma is 1 by construction)."""
    rng = np.random.default_rng(seed)
    out = {}
    for k, entity in enumerate(ENTITIES):
        loadings = np.random.default_rng(100 + k).normal(size=(N_METRICS, 2)) * 5
        factors = rng.normal(size=(count, 2))
        X = 100 + factors @ loadings.T + rng.normal(size=(count, N_METRICS))
        X[20:, 7] += shift
        out[entity] = [json.dumps({"ts": T0 + 60.0 * (start + i), "entity": entity,
                                   "metrics": {f"m{j:02d}": float(x) for j, x in enumerate(row)}}).encode()
                       for i, row in enumerate(X)]
    return out


def _produce(broker: str, topic: str, per_entity: dict[str, list[bytes]]) -> None:
    producer = KafkaProducer(bootstrap_servers=broker, api_version=API)
    for k, entity in enumerate(ENTITIES):
        for value in per_entity[entity]:   # entities 0, 2 on partition 0; 1, 3 on partition 1
            producer.send(topic, key=entity.encode(), value=value, partition=k % 2)
    producer.flush()
    producer.close()



def _wait(predicate, timeout: float, what: str):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            value = predicate()
        except OSError:
            value = None
        if value:
            return value
        time.sleep(0.25)
    raise AssertionError(f"timed out waiting for {what}")


def _events(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines()] if path.exists() else []


def test_the_survivor_takes_over_a_killed_members_entities_with_their_models(kafka_broker, kafka_topic, tmp_path):
    from conftest import free_port, ready, scrape
    topic = kafka_topic(partitions=2)
    config = tmp_path / "shiftsieve.toml"
    config.write_text(f"[model]\nwarmup = {WARMUP}\n\n[state]\ndirectory = \"{tmp_path / 'state'}\"\n"
                      "snapshot_seconds = 0.5\n\n[kafka]\napi_version = \"2.5.0\"\nsession_timeout_ms = 6000\n")
    members = []
    try:
        for name in ("a", "b"):
            port = free_port()
            proc = subprocess.Popen(
                [sys.executable, "-m", "shiftsieve.stream.cli", "run", "--config", str(config),
                 "--listen", f"127.0.0.1:{port}", "--events", str(tmp_path / f"events-{name}.jsonl"),
                 "--source", f"kafka://{kafka_broker}/{topic}?group={topic}-detectors"],
                env=os.environ.copy(), stderr=open(tmp_path / f"stderr-{name}.txt", "wb"))
            members.append((name, proc, port))
        for name, _, port in members:   # both members own a partition
            _wait(lambda: ready(port), 90, f"member {name} ready")

        _produce(kafka_broker, topic, _vectors(seed=1, count=QUIET, start=0, shift=0.0))
        owners = {}
        for name, _, port in members:
            def warmed(port=port):
                m = scrape(port)
                mine = [e for e in ENTITIES if m.get(f'shiftsieve_entity_warming_up{{entity="{e}"}}') == 0.0]
                return mine if len(mine) == 2 and m.get("shiftsieve_messages_consumed_total") == 2 * QUIET else None
            owners[name] = _wait(warmed, 90, f"member {name} to warm up its two entities")
        assert sorted(owners["a"] + owners["b"]) == sorted(ENTITIES)
        time.sleep(3)   # a snapshot and the commit after it (snapshot_seconds = 0.5)
        name, victim, _ = members[0]
        victim.send_signal(signal.SIGKILL)
        victim.wait(timeout=10)

        _produce(kafka_broker, topic, _vectors(seed=2, count=SHIFTED, start=QUIET, shift=12.0))
        _, survivor, port = members[1]
        events_b = tmp_path / "events-b.jsonl"

        def firing_for_all():
            firing = {e["entity"] for e in _events(events_b) if e["state"] == "firing"
                      and e["metrics"][0]["name"] == SHIFTED_METRIC}
            return firing if firing == set(ENTITIES) else None
        _wait(firing_for_all, 120, "the survivor to alert on every entity, the killed member's included")
        m = scrape(port)
        for entity in owners["a"]:   # taken over with its model: not warming up, shift exported
            assert m[f'shiftsieve_entity_warming_up{{entity="{entity}"}}'] == 0.0
            assert m[f'shiftsieve_shift_sigma{{entity="{entity}",metric="{SHIFTED_METRIC}"}}'] > 5
        # The killed member's last commit covered its quiet phase, so the survivor read only the new vectors.
        assert m["shiftsieve_messages_consumed_total"] == 2 * QUIET + len(ENTITIES) * SHIFTED
        assert survivor.poll() is None
    finally:
        for _, proc, _ in members:
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        codes = [proc.wait(timeout=40) for _, proc, _ in members]
    assert codes[1] == 0, (tmp_path / "stderr-b.txt").read_text()[-2000:]
