"""Service benchmark: Kafka -> ``shiftsieve run`` (in-process) -> Prometheus gauges, end to end.

Run:  python tests/benchmarks/bench_service.py [--quick] [--vectors N] [--latency-messages M]
                                                [--rate R] [--entities E] [--seed S]

Starts one in-memory Tansu broker (tests/conftest.py ``start_tansu``) and, all
on that broker and one 1-partition topic:

  1. produces N (default 100,000) vector messages of 200 metrics each (E = 20
     entities, key = entity, ts steps of 60 s per entity from 1,796,000,000;
     values from a fixed-seed rank-8-plus-noise generator); prints the produce
     rate (sends + final flush; generating the JSON is not timed);
  2. reads them back with a plain kafka-python ``KafkaConsumer`` (own group,
     earliest, no auto-commit, max_poll_records 2000 and the service's fetch
     sizes, kafka.fetch_partition_bytes and fetch_max_wait_ms): the bare consume rate;
  3. runs the real ``Service`` in a thread (defaults: model.warmup 540,
     engine.batch_size 64, source.poll_seconds 0.5; kafka.api_version 2.5.0)
     until it has processed all N: vectors/s, its ratio to the bare rate, the
     rate after warm-up (detection mode only) and the CPU the process used;
  4. with the service still running and caught up, a separate producer process
     sends M (default 5,000) more messages at a fixed rate (default 2,000/s)
     with their send time as Kafka timestamp; for each message the time from
     its send until the exporter's ``refresh`` after the poll that carried it
     has returned (the gauges include it): p50, p99, max;
  5. peak RSS of this process (producer, bare consumer and service included).

Both consume rates run the clock from the moment the first record is in hand
(the group join, seconds on this broker, is excluded) to the last record read
or processed.  The broker runs on the same machine and competes for its cores;
set OPENBLAS_NUM_THREADS=1 to keep numpy to one thread.  Figures only: nothing
about speed is asserted.  ``--quick`` (20,000 vectors, 1,000 latency messages)
runs in well under a minute.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import orjson

API = (2, 5, 0)          # DEVELOPERS.md, Facts of this environment: consumer groups settle on Tansu with this
T0 = 1_796_000_000.0     # first ts, inside the decoder's accepted window (2000 .. 2100)
STEP = 60.0              # seconds between an entity's vectors
N_METRICS = 200
RANK = 8
SUFFIXES = ("util", "bytes", "ms", "rate", "ratio")   # *_bytes and *_ms take the log-scale path


# -- workload ------------------------------------------------------------------------------------
def make_model(seed: int, entities: int, n: int = N_METRICS, r: int = RANK) -> dict:
    """Per entity: metric means, rank-r loadings and noise scales (all from ``seed``)."""
    rng = np.random.default_rng(seed)
    means = rng.uniform(50.0, 500.0, (entities, n))
    return {"names": [f"m{k:03d}_{SUFFIXES[k % len(SUFFIXES)]}" for k in range(n)],
            "entities": [f"svc-{e:02d}" for e in range(entities)],
            "means": means,
            "loadings": rng.standard_normal((entities, n, r)) * (0.03 * means)[:, :, None],
            "sigma": 0.01 * means, "seed": seed}


def make_messages(model: dict, start: int, count: int) -> list[tuple[bytes, bytes]]:
    """(key, value) of messages ``start .. start + count - 1``: message i is entity i mod E, step i div E."""
    E = len(model["entities"])
    rng = np.random.default_rng([model["seed"], start])
    idx = np.arange(start, start + count)
    ent = idx % E
    X = np.empty((count, len(model["names"])))
    W = rng.standard_normal((count, model["loadings"].shape[2]))
    for e in np.unique(ent):
        rows = np.flatnonzero(ent == e)
        X[rows] = (model["means"][e] + W[rows] @ model["loadings"][e].T
                   + rng.standard_normal((rows.size, X.shape[1])) * model["sigma"][e])
    names, entities = model["names"], model["entities"]
    out = []
    for i, e, row in zip(idx.tolist(), ent.tolist(), np.round(X, 3).tolist()):
        entity = entities[e]
        out.append((entity.encode(), orjson.dumps({"ts": T0 + (i // E) * STEP, "entity": entity,
                                                   "metrics": dict(zip(names, row))})))
    return out


def _producer(port: int):
    from kafka import KafkaProducer
    return KafkaProducer(bootstrap_servers=f"127.0.0.1:{port}", api_version=API, acks=1,
                         linger_ms=5, batch_size=1 << 18)


def _peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024   # KiB on Linux


def _cpu_seconds() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


# -- step 4's producer runs in its own process (no GIL shared with the service) -------------------
def paced_producer(params: dict) -> int:
    model = make_model(params["seed"], params["entities"])
    messages = make_messages(model, params["start"], params["count"])
    producer = _producer(params["port"])
    producer.partitions_for(params["topic"])   # metadata before the clock
    rate = float(params["rate"])
    started = time.perf_counter()
    for i, (key, value) in enumerate(messages):
        delay = started + i / rate - time.perf_counter()
        if delay > 0:
            time.sleep(delay)
        producer.send(params["topic"], key=key, value=value, timestamp_ms=int(time.time() * 1000))
    sent_s = time.perf_counter() - started
    producer.flush()
    producer.close()
    print(json.dumps({"sent": len(messages), "seconds": sent_s, "rate": len(messages) / sent_s}))
    return 0


# -- the service under test --------------------------------------------------------------------
class Recorder:
    """Wraps the service's ``take`` (one call per poll with records) and ``exporter.refresh`` (one
    per flush, when the gauges include what was taken): a record's latency ends at the refresh
    after the poll that carried it."""

    def __init__(self, service) -> None:
        self.service = service
        self._take = service.take
        self._refresh = service.exporter.refresh
        self.calls: list[tuple[float, int, int]] = []   # (perf_counter after refresh, processed, records)
        self.latency = False
        self.latencies: list[float] = []   # seconds, send -> gauges updated
        self._stamps: list[int] = []       # Kafka timestamps (ms) taken since the last refresh
        self.first_take: float | None = None

    def take(self, lines) -> None:
        if self.first_take is None:
            self.first_take = time.perf_counter()   # the first records are in hand
        self._take(lines)
        self._stamps.extend(getattr(self.service.source, "timestamps_ms", None) or [])

    def refresh(self, records) -> None:
        self._refresh(records)
        now = time.time()
        self.calls.append((time.perf_counter(), self.service.engine.counts.processed, len(self._stamps)))
        if self.latency:
            self.latencies.extend(now - ms / 1000 for ms in self._stamps)
        self._stamps = []


def _wait(predicate, timeout: float, step: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while not predicate():
        if time.monotonic() > deadline:
            raise RuntimeError(f"timed out after {timeout:.0f}s waiting for {what}")
        time.sleep(step)


def run(args: argparse.Namespace, port: int) -> dict:
    from kafka import KafkaAdminClient, KafkaConsumer
    from kafka.admin import NewTopic

    from shiftsieve.stream.config import load_config
    from shiftsieve.stream.service import Service

    N, M, E = args.vectors, args.latency_messages, args.entities
    topic = "bench-vectors"
    admin = KafkaAdminClient(bootstrap_servers=f"127.0.0.1:{port}", api_version=API)
    admin.create_topics([NewTopic(topic, 1, 1)])
    admin.close()
    model = make_model(args.seed, E)
    res: dict = {"N": N, "M": M, "E": E}

    # 1. produce
    producer = _producer(port)
    producer.partitions_for(topic)
    send_s, nbytes, chunk = 0.0, 0, 1000   # small chunks: generation adds little to the peak RSS
    for start in range(0, N, chunk):
        messages = make_messages(model, start, min(chunk, N - start))
        nbytes += sum(len(v) for _, v in messages)
        t = time.perf_counter()
        for key, value in messages:
            producer.send(topic, key=key, value=value)
        send_s += time.perf_counter() - t
    t = time.perf_counter()
    producer.flush()
    send_s += time.perf_counter() - t
    producer.close()
    res["produce_rate"] = N / send_s
    res["mean_bytes"] = nbytes / N
    print(f"1. produced {N:,} messages ({res['mean_bytes']:,.0f} B mean, {N_METRICS} metrics, {E} entities) "
          f"in {send_s:.2f} s: {res['produce_rate']:,.0f} msg/s  (acks=1, linger 5 ms, batch 256 KiB)", flush=True)
    res["rss_after_produce"] = _peak_rss_mib()

    # 2. bare consume
    # session_timeout_ms 6000: with kafka-python's 10000 the join takes ~15 s on Tansu (~3 s with this); the
    # join is not timed; the fetch settings (what the rate depends on) are the ones the service uses
    fetch = load_config(None, {}).kafka_settings(f"kafka://127.0.0.1:{port}/{topic}?group=bench-bare").consumer_kwargs()
    consumer = KafkaConsumer(topic, bootstrap_servers=f"127.0.0.1:{port}", api_version=API, group_id="bench-bare",
                             auto_offset_reset="earliest", enable_auto_commit=False, max_poll_records=2000,
                             session_timeout_ms=6000, max_partition_fetch_bytes=fetch["max_partition_fetch_bytes"],
                             fetch_max_wait_ms=fetch["fetch_max_wait_ms"])
    got, polls, t_first = 0, 0, None
    joined = time.perf_counter()
    deadline = time.monotonic() + 60 + N / 1000
    while got < N and time.monotonic() < deadline:
        batches = consumer.poll(timeout_ms=500)
        n = sum(len(v) for v in batches.values())
        if n and t_first is None:
            t_first = time.perf_counter()
        if n:
            got, polls = got + n, polls + 1
    t_last = time.perf_counter()
    consumer.close()
    if got < N:
        raise RuntimeError(f"bare consumer read only {got:,} of {N:,} messages")
    res["bare_rate"] = N / (t_last - t_first)
    print(f"2. bare KafkaConsumer: {N:,} messages in {t_last - t_first:.2f} s after the first record "
          f"(join {t_first - joined:.1f} s): {res['bare_rate']:,.0f} msg/s, "
          f"{N / polls:,.0f} records per non-empty poll", flush=True)
    res["rss_before_service"] = _peak_rss_mib()

    # 3. the service
    environ = {**os.environ, "SHIFTSIEVE_KAFKA_API_VERSION": "2.5.0"}
    config = load_config(None, environ)
    service = Service(config, source_url=f"kafka://127.0.0.1:{port}/{topic}?group=bench-service",
                      listen="127.0.0.1:0")
    rec = Recorder(service)
    service.exporter.refresh = rec.refresh
    service.take = rec.take
    failure: list[BaseException] = []

    def target() -> None:
        try:
            service.run()
        except BaseException as exc:   # noqa: BLE001  (reported by the main thread)
            failure.append(exc)

    thread = threading.Thread(target=target, name="bench-service", daemon=True)
    started = time.perf_counter()
    thread.start()
    try:
        _wait(lambda: rec.first_take is not None or failure, 60, 0.001, "the service's first record")
        t_first, cpu_first = rec.first_take, _cpu_seconds()
        _wait(lambda: (service.engine.counts.processed >= N) or failure, 60 + N / 500, 0.02,
              f"the service to process {N:,} vectors")
        cpu_last = _cpu_seconds()
        time.sleep(0.05)   # the poll that reached N records its batch duration just after the refresh
        if failure:
            raise failure[0]
        busy = service.exporter.batch_seconds._sum.get()   # time inside _process: decode, engine, gauges
        t_last = next(pc for pc, processed, _ in rec.calls if processed >= N)
        wall = t_last - t_first
        calls = [c for c in rec.calls if c[0] <= t_last]
        warm = E * config.model.warmup
        res.update(service_rate=N / wall, ratio=N / wall / res["bare_rate"], warm=warm,
                   cpu_cores=(cpu_last - cpu_first) / wall, polls=len(calls), busy=busy / wall,
                   per_poll=N / len(calls), max_per_poll=max(c[2] for c in calls))
        detect = [c for c in calls if c[1] >= warm]
        if len(detect) >= 2 and N - detect[0][1] > 0:
            res["detect_rate"] = (N - detect[0][1]) / (t_last - detect[0][0])
        else:
            res["detect_rate"] = None
        counts = service.engine.counts
        res["iterations"] = counts.solver_iterations / max(counts.processed - warm, 1)
        print(f"3. service: {N:,} vectors in {wall:.2f} s after the first record "
              f"(start and join {t_first - started:.1f} s): {res['service_rate']:,.0f} vectors/s, "
              f"{res['ratio']:.2f} x bare", flush=True)
        print(f"   warm-up: {min(warm, N):,} of the {N:,} vectors ({E} entities x model.warmup "
              f"{config.model.warmup}); detection mode only: "
              + (f"{res['detect_rate']:,.0f} vectors/s over {N - detect[0][1]:,} vectors"
                 if res["detect_rate"] else "n/a (no vectors after warm-up)"), flush=True)
        print(f"   {len(calls):,} flushes, {res['per_poll']:,.0f} records per flush (max "
              f"{res['max_per_poll']:,}); engine.batch_size {config.engine.batch_size}; "
              f"{1e6 * wall / N:.0f} us per vector, of which {1e6 * busy / N:.0f} us processing "
              f"(decode, engine, gauges: {res['busy']:.0%} of the time) and the rest in poll, commit and lag; "
              f"engine.max_delay_seconds {config.engine.max_delay_seconds}",
              flush=True)
        print(f"   process CPU {res['cpu_cores']:.2f} cores; solver iterations per detected vector "
              f"{res['iterations']:.2f}; alert events {counts.events}", flush=True)

        # 4. latency at a steady rate, service caught up
        before = service.engine.counts.processed
        busy_before = service.exporter.batch_seconds._sum.get()
        rec.latency = True
        params = {"port": port, "topic": topic, "start": N, "count": M, "rate": args.rate,
                  "seed": args.seed, "entities": E}
        child = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--paced-producer",
                                json.dumps(params)], capture_output=True, text=True, timeout=120 + M / args.rate)
        if child.returncode != 0:
            raise RuntimeError(f"paced producer failed ({child.returncode}): {child.stderr[-2000:]}")
        sent = json.loads(child.stdout.strip().splitlines()[-1])
        _wait(lambda: service.engine.counts.processed >= before + M or failure, 30, 0.02,
              f"the service to process the {M:,} latency messages")
        rec.latency = False
        time.sleep(0.05)
        if failure:
            raise failure[0]
        busy4 = service.exporter.batch_seconds._sum.get() - busy_before
        lat = np.array(rec.latencies) * 1000
        polls4 = [c for c in rec.calls if c[1] > before]
        poll_s = config.source.poll_seconds
        res.update(sent_rate=sent["rate"], p50=float(np.percentile(lat, 50)), p99=float(np.percentile(lat, 99)),
                   lat_max=float(lat.max()), lat_n=lat.size, poll_seconds=poll_s,
                   per_poll4=lat.size / max(len(polls4), 1))
        print(f"4. latency: {M:,} messages sent at {sent['rate']:,.0f}/s (target {args.rate:,.0f}/s) by another "
              f"process; send -> gauges updated over {lat.size:,} records: p50 {res['p50']:.1f} ms, "
              f"p99 {res['p99']:.1f} ms, max {res['lat_max']:.1f} ms", flush=True)
        print(f"   {len(polls4):,} flushes ({res['per_poll4']:.1f} records per flush, "
              f"{1000 * busy4 / max(len(polls4), 1):.1f} ms processing per flush); "
              f"source.poll_seconds {poll_s} (the longest a poll waits; it returns as soon as records arrive): "
              f"p99 is {res['p99'] / (1000 * poll_s):.0%} of it", flush=True)
    finally:
        service.stop()
        thread.join(30)
    if thread.is_alive():
        print("   warning: the service thread did not end within 30 s of stop()", flush=True)
    res["rss_peak"] = _peak_rss_mib()
    print(f"5. peak RSS of this process: {res['rss_peak']:,.0f} MiB (after producing "
          f"{res['rss_after_produce']:,.0f} MiB, before the service {res['rss_before_service']:,.0f} MiB)", flush=True)
    return res


def summary(res: dict) -> None:
    rate, detect = res["service_rate"], res["detect_rate"]
    rows = [
        ("produce, 1 partition", f"{res['produce_rate']:,.0f} msg/s"),
        ("bare KafkaConsumer", f"{res['bare_rate']:,.0f} msg/s"),
        ("service, all vectors", f"{rate:,.0f} vectors/s ({res['ratio']:.2f} x bare)"),
        (f"service, after warm-up ({res['warm']:,})",
         f"{detect:,.0f} vectors/s ({detect / res['bare_rate']:.2f} x bare)" if detect else "n/a"),
        ("process CPU during service run", f"{res['cpu_cores']:.2f} cores"),
        (f"latency at {res['sent_rate']:,.0f} msg/s", f"p50 {res['p50']:.1f} / p99 {res['p99']:.1f} / "
                                                      f"max {res['lat_max']:.1f} ms"),
        ("peak RSS", f"{res['rss_peak']:,.0f} MiB"),
    ]
    width = max(len(k) for k, _ in rows)
    print()
    print(f"summary: N = {res['N']:,} vectors of {N_METRICS} metrics, {res['E']} entities, "
          f"M = {res['M']:,} latency messages; {os.cpu_count()} cores, broker on the same machine")
    for k, v in rows:
        print(f"  {k:<{width}s}  {v}")

    def verdict(ok: bool) -> str:
        return "met" if ok else "NOT met"

    print("goals (from the issue):")
    print(f"  service >= 0.5 x bare consume rate:      {verdict(res['ratio'] >= 0.5)} "
          f"(all vectors {res['ratio']:.2f} x"
          + (f"; after warm-up {detect / res['bare_rate']:.2f} x)" if detect else ")"))
    print(f"  >= 10,000 vectors/s at n = 200, one core: {verdict(rate >= 10_000)} "
          f"(all vectors {rate:,.0f}/s"
          + (f"; after warm-up {detect:,.0f}/s" if detect else "")
          + f"; the service is one Python thread, the process used {res['cpu_cores']:.2f} cores)")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="20,000 vectors and 1,000 latency messages")
    parser.add_argument("--vectors", type=int, default=None, help="messages for the throughput steps (100,000)")
    parser.add_argument("--latency-messages", type=int, default=None, help="messages for the latency step (5,000)")
    parser.add_argument("--rate", type=float, default=2000.0, help="send rate of the latency step, messages/s")
    parser.add_argument("--entities", type=int, default=20, help="entities the messages are spread over")
    parser.add_argument("--seed", type=int, default=20240601)
    parser.add_argument("--paced-producer", metavar="JSON", help=argparse.SUPPRESS)   # step 4's child process
    args = parser.parse_args(argv)
    if args.paced_producer:
        return paced_producer(json.loads(args.paced_producer))
    if args.vectors is None:
        args.vectors = 20_000 if args.quick else 100_000
    if args.latency_messages is None:
        args.latency_messages = 1_000 if args.quick else 5_000
    if args.vectors < 1 or args.latency_messages < 1 or args.entities < 1 or args.rate <= 0:
        parser.error("--vectors, --latency-messages, --entities and --rate must be positive")

    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))   # tests/, for conftest.start_tansu
    from conftest import start_tansu

    scratch = Path(tempfile.mkdtemp(prefix="bench-service-"))
    try:
        try:
            broker = start_tansu(scratch)
        except RuntimeError as exc:
            print(f"bench_service: no Kafka broker: {exc}", file=sys.stderr)
            return 2
        print(f"broker: Tansu on 127.0.0.1:{broker.port} (in-memory, started in {broker.startup_s:.1f} s)", flush=True)
        try:
            res = run(args, broker.port)
        finally:
            broker.stop()
        summary(res)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
