"""Faults on a real broker: an unreachable or vanishing broker, and SIGKILL at random points.

`shiftsieve run` must stay up while the broker is away, say so on /readyz, and, with a state
directory, end with every vector in its entity's model exactly once (commits follow snapshots,
restored snapshots skip what they already cover); alert events are at-least-once.  The last test
is an expected failure: readiness follows the snapshot clock, not the broker.
"""

from __future__ import annotations

import itertools
import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from pathlib import Path

import numpy as np
from kafka import KafkaAdminClient, KafkaConsumer, KafkaProducer, TopicPartition
from kafka.admin import NewTopic

from conftest import exposition_samples, free_port

API = (2, 5, 0)   # DEVELOPERS.md, Facts of this environment: consumer groups settle on this broker with this version
N_METRICS, SHIFT, SHIFTED_METRIC = 20, 12.0, "m07"
T0 = 1_796_000_000.0   # 2026-11-30, inside the decoder's accepted time range


# -- a relay the test can cut ----------------------------------------------------------------------
class Proxy:
    """A loopback TCP relay to a broker on a fixed port. `close` closes the listening socket and
    every live connection (to the client the broker is gone: connections reset, connects refused);
    `open` listens on the same port again. ``rate`` (bytes/s) throttles broker -> client traffic, so
    that a backlog takes seconds to fetch and there is a "mid-stream" to cut."""

    def __init__(self, upstream_port: int, port: int, rate: float | None = None) -> None:
        self.upstream = ("127.0.0.1", upstream_port)
        self.port = port
        self.rate = rate
        self._lock = threading.Lock()
        self._listener: socket.socket | None = None
        self._live: set[socket.socket] = set()

    def open(self) -> None:
        listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(64)
        with self._lock:
            assert self._listener is None, "proxy already open"
            self._listener = listener
        threading.Thread(target=self._accept, args=(listener,), daemon=True).start()

    def close(self) -> None:
        with self._lock:
            listener, self._listener = self._listener, None
            live, self._live = self._live, set()
        for sock in ([listener] if listener else []) + list(live):
            _shut(sock)

    def _accept(self, listener: socket.socket) -> None:
        while True:
            try:
                client, _ = listener.accept()
            except OSError:
                return
            try:
                server = socket.create_connection(self.upstream, timeout=5)
                server.settimeout(None)
            except OSError:
                _shut(client)
                continue
            with self._lock:
                if self._listener is not listener:   # closed meanwhile
                    _shut(client), _shut(server)
                    return
                self._live.update((client, server))
            threading.Thread(target=self._pump, args=(client, server, None), daemon=True).start()
            threading.Thread(target=self._pump, args=(server, client, self.rate), daemon=True).start()

    def _pump(self, src: socket.socket, dst: socket.socket, rate: float | None) -> None:
        try:
            while data := src.recv(8192 if rate else 1 << 16):
                dst.sendall(data)
                if rate:
                    time.sleep(len(data) / rate)
        except OSError:
            pass
        finally:
            with self._lock:
                self._live.discard(src)
                self._live.discard(dst)
            _shut(src), _shut(dst)


def _shut(sock: socket.socket) -> None:
    try:
        sock.shutdown(socket.SHUT_RDWR)
    except OSError:
        pass
    sock.close()


# -- data ---------------------------------------------------------------------------------------------
def _vectors(entities: list[str], count: int, seed: int, shifted: str, shift_from: int) -> dict[str, list[bytes]]:
    """Per entity ``count`` vectors: a two-factor baseline plus unit noise; on ``shifted`` metric
    m07 moves by SHIFT noise sigmas from vector ``shift_from`` on."""
    out = {}
    for k, entity in enumerate(entities):
        rng = np.random.default_rng([seed, k])
        loadings = rng.normal(size=(N_METRICS, 2)) * 5
        X = 100 + rng.normal(size=(count, 2)) @ loadings.T + rng.normal(size=(count, N_METRICS))
        if entity == shifted:
            X[shift_from:, 7] += SHIFT
        out[entity] = [json.dumps({"ts": T0 + 60.0 * i, "entity": entity,
                                   "metrics": {f"m{j:02d}": float(x) for j, x in enumerate(row)}}).encode()
                       for i, row in enumerate(X)]
    return out


def _interleaved(per_entity: dict[str, list[bytes]], start: int, stop: int) -> list[tuple[str, bytes]]:
    """Vectors ``start:stop`` of every entity, step by step (as a live stream would bring them)."""
    return [(e, per_entity[e][i]) for i in range(start, stop) for e in per_entity]


def _produce(bootstrap: str, topic: str, messages: list[tuple[str, bytes]], per_second: float | None = None) -> None:
    producer = KafkaProducer(bootstrap_servers=bootstrap, api_version=API, linger_ms=5)
    started = time.monotonic()
    for n, (entity, value) in enumerate(messages):
        if per_second and n % 20 == 0:
            ahead = started + n / per_second - time.monotonic()
            if ahead > 0:
                time.sleep(ahead)
        producer.send(topic, key=entity.encode(), value=value, partition=0)
    producer.flush(30)
    producer.close()


# -- the service -----------------------------------------------------------------------------------
def _tail(path: Path, n: int = 3000) -> str:
    try:
        return path.read_text(errors="replace")[-n:]
    except OSError:
        return "(no stderr file)"


class Run:
    """One `shiftsieve run` process with its own events and stderr files."""

    def __init__(self, config: Path, bootstrap: str, topic: str, group: str, name: str, tmp: Path) -> None:
        self.port = free_port()
        self.name = name
        self.events = tmp / f"events-{name}.jsonl"
        self.stderr = tmp / f"stderr-{name}.txt"
        with open(self.stderr, "wb") as err:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "shiftsieve.stream.cli", "run", "--config", str(config),
                 "--listen", f"127.0.0.1:{self.port}", "--events", str(self.events),
                 "--source", f"kafka://{bootstrap}/{topic}?group={group}"],
                env=os.environ.copy(), stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=err)
        self.started = time.monotonic()

    def get(self, path: str) -> tuple[int, str]:
        """(status, body) of an endpoint; (0, reason) when it does not answer."""
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{self.port}{path}", timeout=3) as r:
                return r.status, r.read().decode()
        except urllib.error.HTTPError as exc:
            return exc.code, ""
        except OSError as exc:
            return 0, str(exc)

    def metrics(self) -> dict[str, float]:
        status, text = self.get("/metrics")
        if status != 200:
            return {}
        return exposition_samples(text)

    def ready(self) -> bool:
        return self.get("/readyz")[0] == 200

    def alive(self) -> bool:
        return self.proc.poll() is None

    def why(self) -> str:
        return f"[{self.name}: exit code {self.proc.poll()}; stderr tail:\n{_tail(self.stderr)}]"

    def kill(self) -> None:
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(timeout=10)

    def terminate(self, timeout: float = 60) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)
            return -9


def _config(path: Path, state: Path, warmup: int, snapshot_seconds: float) -> Path:
    path.write_text(f"[model]\nwarmup = {warmup}\n\n[state]\ndirectory = \"{state}\"\n"
                    f"snapshot_seconds = {snapshot_seconds}\n\n"
                    "[kafka]\napi_version = \"2.5.0\"\nsession_timeout_ms = 6000\n")
    return path


def _wait(predicate, timeout: float, what, run: Run | None = None, step: float = 0.1):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        if run is not None and not run.alive():
            break
        time.sleep(step)
    detail = what() if callable(what) else what
    raise AssertionError(f"timed out after {timeout:.0f}s waiting for {detail}" + (f"\n{run.why()}" if run else ""))


class Committed:
    """Reads consumer groups' committed offsets of partition 0 (OffsetFetch; joins no group)."""

    def __init__(self, bootstrap: str, topic: str) -> None:
        self.bootstrap, self.topic = bootstrap, topic
        self._consumers: dict[str, KafkaConsumer] = {}

    def __call__(self, group: str) -> int | None:
        try:
            if group not in self._consumers:
                self._consumers[group] = KafkaConsumer(bootstrap_servers=self.bootstrap, api_version=API,
                                                       group_id=group, enable_auto_commit=False)
            return self._consumers[group].committed(TopicPartition(self.topic, 0))
        except Exception:  # noqa: BLE001  (broker busy or away: ask again)
            return None

    def close(self) -> None:
        for consumer in self._consumers.values():
            consumer.close(autocommit=False)


def _events(path: Path) -> list[dict]:
    """The events of one run; a SIGKILL may cut the last line short, which is left out."""
    if not path.exists():
        return []
    lines = path.read_text().splitlines()
    out = []
    for n, line in enumerate(lines):
        try:
            out.append(json.loads(line))
        except json.JSONDecodeError:
            assert n == len(lines) - 1, f"{path}: line {n + 1} is not JSON: {line[:200]!r}"
    return out


def _models(state: Path, config: Path, entities: list[str]):
    from shiftsieve.stream.config import load_config
    from shiftsieve.stream.engine import Engine
    from shiftsieve.stream.state import StateDirectory
    engine = Engine.from_config(load_config(config, environ={}))
    directory = StateDirectory(state)
    assert directory.entities() == sorted(entities)
    return {e: directory.load(e, engine.rules, engine.detector_config)[0].detector for e in entities}


def _snapshot_offsets(state: Path, config: Path) -> dict[str, int]:
    """entity -> the partition-0 offset its snapshot covers (read after a SIGKILL, for the history)."""
    from shiftsieve.stream.config import load_config
    from shiftsieve.stream.engine import Engine
    from shiftsieve.stream.state import StateDirectory
    engine = Engine.from_config(load_config(config, environ={}))
    directory = StateDirectory(state)
    out = {}
    for entity in directory.entities():
        _, offsets = directory.load(entity, engine.rules, engine.detector_config)
        out[entity] = next(iter(offsets.values()), 0)
    return out


# -- 1. broker unreachable at start, cut mid-stream --------------------------------------------------
class Watcher:
    """Scrapes a run's /metrics every ~10 ms, and /readyz and /healthz every fifth time, in the
    background (the lag gauge may show a value for only ~100 ms)."""

    def __init__(self, run: Run, lag_key: str) -> None:
        self.run, self.lag_key = run, lag_key
        self.samples: list[dict] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()

    def _loop(self) -> None:
        ready = healthz = 0
        for n in itertools.count():
            if self._stop.is_set():
                return
            m = self.run.metrics()
            if n % 5 == 0:
                ready, healthz = self.run.get("/readyz")[0], self.run.get("/healthz")[0]
            self.samples.append({"t": time.monotonic(), "consumed": m.get("shiftsieve_messages_consumed_total"),
                                 "lag": m.get(self.lag_key), "ready": ready, "healthz": healthz,
                                 "alive": self.run.alive()})
            self._stop.wait(0.01)

    def since(self, t: float) -> list[dict]:
        return [s for s in list(self.samples) if s["t"] >= t]

    def last(self) -> dict:
        return self.samples[-1] if self.samples else {}

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(5)


CUT_ENTITIES = ["gangway-1", "gangway-2", "gangway-3"]   # the fictional ferry line's boarding gates
CUT_WARMUP, CUT_PHASE_A, CUT_TOTAL, CUT_SHIFT_FROM = 200, 2000, 2300, 2150


def test_broker_unreachable_at_start_and_cut_mid_stream(tansu_factory, tmp_path):
    """No broker at start: alive, not ready. Broker appears: ready, consumes. The connection is cut
    mid-stream for longer than the session timeout: alive, not ready, lag was exported while a
    backlog remained. Afterwards every vector is in its model exactly once and the incident is
    reported (duplicates share its id)."""
    proxy_port = free_port()
    broker = tansu_factory(advertised_port=proxy_port)   # clients reach it only through the proxy
    proxy = Proxy(broker.port, proxy_port, rate=800_000)   # ~1.3 s per MB fetched
    bootstrap, topic, group = f"127.0.0.1:{proxy_port}", "boarding-vectors", "boarding-detectors"
    proxy.open()
    admin = KafkaAdminClient(bootstrap_servers=bootstrap, api_version=API, client_id="shiftsieve-tests")
    admin.create_topics([NewTopic(topic, 1, 1)])
    admin.close()
    proxy.close()
    data = _vectors(CUT_ENTITIES, CUT_TOTAL, seed=7, shifted=CUT_ENTITIES[1], shift_from=CUT_SHIFT_FROM)
    state = tmp_path / "state"
    config = _config(tmp_path / "shiftsieve.toml", state, CUT_WARMUP, snapshot_seconds=0.01)
    run = Run(config, bootstrap, topic, group, "cut", tmp_path)
    watcher = Watcher(run, f'shiftsieve_consumer_lag_messages{{partition="0",topic="{topic}"}}')
    try:
        # No broker: the process is up and healthy, and not ready, for 4.5 s (some six of the client's
        # reconnect attempts: its backoff doubles from 50 ms, capped at 5 s by stream/kafka/settings.py).
        _wait(lambda: run.get("/healthz")[0] == 200, 30, "/healthz with the broker unreachable", run)
        t_up = time.monotonic() + 0.5   # the watcher's readiness scrapes are fresh from here on
        time.sleep(4.5)
        early = watcher.since(t_up)
        assert run.alive(), run.why()
        assert early and all(s["healthz"] == 200 and s["ready"] == 503 for s in early), \
            f"not alive+unready throughout: {[(s['healthz'], s['ready']) for s in early][:20]} {run.why()}"

        # The broker appears: the service joins and gets ready.
        proxy.open()
        _wait(run.ready, 90, "ready once the broker is reachable", run)
        _produce(bootstrap, topic, _interleaved(data, 0, 10))
        _wait(lambda: watcher.last().get("consumed") == 10 * len(CUT_ENTITIES), 60,
              lambda: f"the first messages consumed (last scrape {watcher.last()})", run)
        _produce(bootstrap, topic, _interleaved(data, 10, CUT_PHASE_A))
        produced = len(CUT_ENTITIES) * CUT_PHASE_A
        # The rest (~3.5 MB) comes in one fetch response, ~4.5 s through the throttled proxy: cut it mid-way.
        time.sleep(1.0)
        proxy.close()
        t_cut = time.monotonic()
        consumed_at_cut = watcher.last()["consumed"]
        assert consumed_at_cut < produced, f"the cut came after the whole backlog ({consumed_at_cut})"

        # Broker gone for 10 s (> session_timeout_ms 6000: the broker may expire the member).
        time.sleep(10)
        outage = watcher.since(t_cut)
        assert run.alive(), run.why()
        assert all(s["healthz"] == 200 for s in outage), f"/healthz failed during the outage {run.why()}"
        assert any(s["ready"] == 503 for s in outage), \
            f"/readyz never went not-ready during the outage: {[s['ready'] for s in outage]} {run.why()}"
        assert outage[-1]["ready"] == 503, f"still ready 10 s into the outage {run.why()}"

        proxy.open()
        _wait(run.ready, 90, "ready again after the broker came back", run)
        t_back = time.monotonic()
        _produce(bootstrap, topic, _interleaved(data, CUT_PHASE_A, CUT_TOTAL))
        produced = len(CUT_ENTITIES) * CUT_TOTAL
        committed = Committed(bootstrap, topic)
        try:
            _wait(lambda: committed(group) == produced, 120,
                  lambda: f"the commit to cover all {produced} messages "
                          f"(committed {committed(group)}, last scrape {watcher.last()})", run)
        finally:
            committed.close()
        _wait(lambda: watcher.last().get("lag") == 0, 30, "lag 0 at the end", run)
        # Lag is measured while connected only: after the outage it shows the backlog left again.
        lagging = [s for s in watcher.since(t_back) if (s["lag"] or 0) > 0]
        assert lagging, "no lag > 0 exported after the outage although a backlog was being fetched"
        assert max(s["lag"] for s in lagging) <= produced
    finally:
        watcher.stop()
        code = run.terminate()
        proxy.close()
        (tmp_path / "scrapes.json").write_text(json.dumps(watcher.samples))   # for a post-mortem
    assert code == 0, run.why()

    # Exactly once in model state: each entity's model counted each of its vectors once.
    models = _models(state, config, CUT_ENTITIES)
    samples = {e: d.samples for e, d in models.items()}
    assert samples == {e: CUT_TOTAL for e in CUT_ENTITIES}, f"{samples} {run.why()}"
    for e, d in models.items():
        assert (d.normaliser.count == CUT_TOTAL).all(), (e, d.normaliser.count)
    # At least once for events: the incident is there; repeats (replays) carry the same id.
    events = _events(run.events)
    shifted = [e for e in events if e["entity"] == CUT_ENTITIES[1]]
    firing = [e for e in shifted if e["state"] == "firing" and e["metrics"][0]["name"] == SHIFTED_METRIC]
    assert firing, f"no incident on {CUT_ENTITIES[1]}: {events}"
    assert {e["incident"] for e in shifted} == {firing[0]["incident"]}, shifted
    onset = firing[0]["ts"]
    assert T0 + 60.0 * CUT_SHIFT_FROM <= onset <= T0 + 60.0 * (CUT_SHIFT_FROM + 20), onset


# -- 2. SIGKILL at random points ---------------------------------------------------------------------
KILL_ENTITIES = ["quay-north", "quay-south", "tickets-1", "tickets-2"]
KILL_WARMUP, KILL_COUNT, KILL_SHIFT_FROM = 200, 800, 500
KILL_SEEDS = (11, 22, 33)
PRODUCE_PER_SECOND = 130.0   # 3,200 messages over ~25 s: kills land mid-stream (a group join takes 3-15 s)


class Lane:
    """One consumer group with its own state directory: a sequence of runs, each killed with SIGKILL
    at a seeded random time after it is ready, except the last, which consumes to the end."""

    def __init__(self, name: str, kills: list[float], tmp: Path, bootstrap: str, topic: str) -> None:
        self.name, self.kills, self.bootstrap, self.topic = name, list(kills), bootstrap, topic
        self.dir = tmp / name
        self.dir.mkdir()
        self.state = self.dir / "state"
        self.config = _config(self.dir / "shiftsieve.toml", self.state, KILL_WARMUP, snapshot_seconds=0.3)
        self.group = f"{topic}-{name}"
        self.runs: list[Run] = []
        self.ready_at: float | None = None
        self.log: list[str] = []
        self.consumed: list[float | None] = []   # messages each run read (scraped just before its end)
        self.done = False
        self.code: int | None = None
        self._start()

    @property
    def run(self) -> Run:
        return self.runs[-1]

    def _start(self) -> None:
        self.runs.append(Run(self.config, self.bootstrap, self.topic, self.group,
                             f"{self.name}-{len(self.runs)}", self.dir))
        self.ready_at = None

    def step(self, finished_producing: bool, committed) -> None:
        """Advance: note readiness, kill when due (and restart), finish when all is committed."""
        if self.done:
            return
        run = self.run
        assert run.alive(), f"{self.name}: run {len(self.runs) - 1} died {run.why()}"
        now = time.monotonic()
        assert now - run.started < 120, f"{self.name}: run {len(self.runs) - 1} took too long {run.why()}"
        if self.ready_at is None:
            if run.ready():
                self.ready_at = now
            return
        if self.kills:
            if now - self.ready_at >= self.kills[0]:
                consumed = run.metrics().get("shiftsieve_messages_consumed_total")
                run.kill()
                self.consumed.append(consumed)
                covered = sorted(set(_snapshot_offsets(self.state, self.config).values()))
                self.log.append(f"{run.name}: SIGKILL {self.kills[0]:.2f}s after ready, {consumed} consumed, "
                                f"committed offset {committed(self.group)}, snapshots cover {covered}")
                self.kills.pop(0)
                self._start()
            return
        if finished_producing and committed(self.group) == len(KILL_ENTITIES) * KILL_COUNT:
            consumed = run.metrics().get("shiftsieve_messages_consumed_total")
            self.code = run.terminate()
            self.consumed.append(consumed)
            self.log.append(f"{run.name}: SIGTERM after {consumed} consumed")
            self.done = True


def test_sigkill_at_random_points_ends_in_the_state_of_an_uninterrupted_run(kafka_broker, kafka_topic, tmp_path):
    """Runs SIGKILLed at seeded random times and restarted (same group, same state directory) end
    with the models of an uninterrupted run: nothing skipped, nothing counted twice, the same
    incidents (events at least once: the union of the runs' events, de-duplicated)."""
    import scipy.linalg   # principal angles between subspaces
    topic = kafka_topic(partitions=1)
    data = _vectors(KILL_ENTITIES, KILL_COUNT, seed=5, shifted=KILL_ENTITIES[1], shift_from=KILL_SHIFT_FROM)
    messages = _interleaved(data, 0, KILL_COUNT)
    lanes = [Lane("uninterrupted", [], tmp_path, kafka_broker, topic)]
    for seed in KILL_SEEDS:
        rng = np.random.default_rng(seed)
        lanes.append(Lane(f"seed{seed}", list(rng.uniform(0.2, 3.0, size=rng.integers(1, 3))),
                          tmp_path, kafka_broker, topic))
    produce_errors: list[BaseException] = []

    def produce() -> None:   # live, while the lanes run side by side: kills land mid-stream
        try:
            _produce(kafka_broker, topic, messages, PRODUCE_PER_SECOND)
        except BaseException as exc:  # noqa: BLE001  (reported by the main thread)
            produce_errors.append(exc)
    producer = threading.Thread(target=produce, daemon=True)
    producer.start()
    committed = Committed(kafka_broker, topic)
    try:
        deadline = time.monotonic() + 240
        while not all(lane.done for lane in lanes):
            assert not produce_errors, f"producing failed: {produce_errors[0]!r}"
            assert time.monotonic() < deadline, f"lanes not done: {[(l.name, l.log) for l in lanes]}"
            for lane in lanes:
                lane.step(not producer.is_alive(), committed)
            time.sleep(0.1)
    finally:
        committed.close()
        for lane in lanes:
            for run in lane.runs:
                if run.alive():
                    run.terminate()
    history = "; ".join(f"{lane.name}: {lane.log}" for lane in lanes)
    (tmp_path / "history.txt").write_text(history + "\n")   # for a post-mortem
    for lane in lanes:
        assert lane.code == 0, lane.run.why()
    # The kills lost uncommitted progress somewhere, so restarts re-read messages (else: a weak test).
    total = len(KILL_ENTITIES) * KILL_COUNT
    assert any(sum(c or 0 for c in lane.consumed) > total for lane in lanes[1:]), f"no replay: {history}"

    reference = _models(lanes[0].state, lanes[0].config, KILL_ENTITIES)
    assert {e: d.samples for e, d in reference.items()} == {e: KILL_COUNT for e in KILL_ENTITIES}

    def incidents(lane: Lane) -> set[tuple[str, str, str]]:
        return {(e["entity"], e["incident"], e["state"]) for run in lane.runs for e in _events(run.events)}
    expected = incidents(lanes[0])
    assert any(entity == KILL_ENTITIES[1] and state == "firing" for entity, _, state in expected), expected
    for lane in lanes[1:]:
        models = _models(lane.state, lane.config, KILL_ENTITIES)
        for entity in KILL_ENTITIES:
            a, b = reference[entity], models[entity]
            where = f"{lane.name} {entity} ({history})"
            assert b.samples == KILL_COUNT, f"{where}: {b.samples} samples, not {KILL_COUNT}"
            np.testing.assert_array_equal(b.normaliser.count, a.normaliser.count, err_msg=where)
            assert a.baseline.rank == b.baseline.rank, where
            angle = scipy.linalg.subspace_angles(a.baseline.U, b.baseline.U).max()
            assert angle < 0.1, f"{where}: baselines {angle:.3f} rad apart"
        assert incidents(lane) == expected, f"{lane.name} ({history})"


# -- 3. readiness between snapshots ------------------------------------------------------------------
class ReadyTooLong(AssertionError):
    """The claim under test failed (and only that: set-up failures stay plain failures)."""


def test_readiness_follows_a_broker_cut_between_snapshots(tansu_factory, tmp_path):
    """/readyz must follow the broker, not the snapshot clock: with the default snapshot interval a
    broker cut just after consuming must still turn /readyz to 503 within seconds."""
    proxy_port = free_port()
    broker = tansu_factory(advertised_port=proxy_port)
    proxy = Proxy(broker.port, proxy_port)
    bootstrap, topic, group = f"127.0.0.1:{proxy_port}", "pier-vectors", "pier-detectors"
    proxy.open()
    admin = KafkaAdminClient(bootstrap_servers=bootstrap, api_version=API, client_id="shiftsieve-tests")
    admin.create_topics([NewTopic(topic, 1, 1)])
    admin.close()
    config = _config(tmp_path / "shiftsieve.toml", tmp_path / "state", CUT_WARMUP, snapshot_seconds=30.0)
    run = Run(config, bootstrap, topic, group, "ready", tmp_path)
    try:
        _wait(run.ready, 90, "ready", run)
        data = _vectors(CUT_ENTITIES, 50, seed=3, shifted="", shift_from=0)
        _produce(bootstrap, topic, _interleaved(data, 0, 50))
        _wait(lambda: run.metrics().get("shiftsieve_messages_consumed_total") == 150, 60, "150 consumed", run)
        proxy.close()
        t_cut = time.monotonic()
        while time.monotonic() - t_cut < 8:
            if run.get("/readyz")[0] == 503:
                break
            time.sleep(0.1)
        else:
            raise ReadyTooLong(f"/readyz still 200 8 s after the broker went away {run.why()}")
        assert run.alive(), run.why()
    finally:
        code = run.terminate()
        proxy.close()
    assert code == 0, run.why()
