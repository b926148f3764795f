"""Bounded memory: `engine.max_resident` evicts the least recently seen models after each poll.

With a state directory an evicted entity is snapshotted and restored when it returns, so nothing
it learned is lost; every vector still counts exactly once (`detector.samples` adds up).
"""

from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys
import time

import numpy as np

from shiftsieve.stream.config import load_config
from shiftsieve.stream.engine import Engine
from shiftsieve.stream.state import StateDirectory

ENTITIES = [f"turnstile-{k}" for k in range(6)]   # the fictional ferry line's gates
N, WARMUP, PHASE, RETURN = 12, 150, 160, 100
T0 = 1_796_000_000.0


def lines(entities: list[str], count: int, start: int, seed: int) -> bytes:
    rng = np.random.default_rng(seed)
    out = []
    for i in range(count):
        for entity in entities:
            row = 50 + rng.normal(size=N)
            out.append(json.dumps({"ts": T0 + 30.0 * (start + i), "entity": entity,
                                   "metrics": {f"m{j}": float(v) for j, v in enumerate(row)}}))
    return ("\n".join(out) + "\n").encode()



def test_evicted_models_are_spilled_and_restored(tmp_path):
    from conftest import free_port, scrape
    port = free_port()
    env = {**os.environ, "SHIFTSIEVE_MODEL_WARMUP": str(WARMUP), "SHIFTSIEVE_ENGINE_MAX_RESIDENT": "2",
           "SHIFTSIEVE_STATE_DIRECTORY": f'"{tmp_path / "state"}"'}
    proc = subprocess.Popen([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--listen", f"127.0.0.1:{port}"],
                            stdin=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
    sent = 0

    def send(payload: bytes, count: int, evicted: int) -> dict[str, float]:
        """Send, then wait until all is consumed and the flush after it has evicted ``evicted`` in all."""
        nonlocal sent
        proc.stdin.write(payload)
        proc.stdin.flush()
        sent += count
        deadline, metrics = time.monotonic() + 60, {}
        while time.monotonic() < deadline:
            try:
                metrics = scrape(port)
                if metrics.get("shiftsieve_messages_consumed_total") == sent and \
                        metrics.get("shiftsieve_entities_evicted_total", 0) >= evicted:
                    return metrics
            except OSError:
                pass
            time.sleep(0.2)
        raise AssertionError(f"the service did not consume and evict as expected: {metrics}")
    try:
        for k in range(3):   # three phases of two entities each: each phase evicts the previous one
            metrics = send(lines(ENTITIES[2 * k: 2 * k + 2], PHASE, 0, seed=k), 2 * PHASE, evicted=2 * k)
        assert metrics["shiftsieve_entities_evicted_total"] == 4
        assert not any(k.startswith("shiftsieve_entity_warming_up") and ENTITIES[0] in k for k in metrics)
        # The first two return with fewer vectors than a warm-up: restored, they are scored at once.
        metrics = send(lines(ENTITIES[:2], RETURN, PHASE, seed=9), 2 * RETURN, evicted=6)
        for entity in ENTITIES[:2]:
            assert metrics[f'shiftsieve_entity_warming_up{{entity="{entity}"}}'] == 0.0
        assert metrics["shiftsieve_entities_evicted_total"] == 6
        proc.stdin.close()
        assert proc.wait(timeout=30) == 0, proc.stderr.read().decode()[-2000:]
    finally:
        if proc.poll() is None:
            proc.kill()
    engine = Engine.from_config(load_config(None))
    directory = StateDirectory(tmp_path / "state")
    assert directory.entities() == sorted(ENTITIES)
    config = dataclasses.replace(engine.detector_config, warmup=WARMUP)
    samples = {e: directory.load(e, engine.rules, config)[0].detector.samples for e in ENTITIES}
    # Exactly once across evictions: every vector sent is counted by its entity's model, none twice.
    assert samples == {e: PHASE + (RETURN if e in ENTITIES[:2] else 0) for e in ENTITIES}
