"""Soak benchmark: ``shiftsieve run`` on a real broker at a steady rate for minutes; memory at the
start and end of the steady state.

Run:  python tests/benchmarks/bench_soak.py [--quick] [--seconds S] [--rate R] [--entities E]
                                             [--metrics N] [--sample-seconds T] [--seed S]

The claim (reliability issue): "A soak run (minutes, bounded) at a steady rate reports
throughput and memory at start and end: no growth."

Starts one in-memory Tansu broker (tests/conftest.py ``start_tansu``), a 1-partition topic, and
``python -m shiftsieve.stream.cli run`` as its own process (kafka.api_version 2.5.0,
session_timeout_ms 6000, otherwise the defaults: model.warmup 540, engine.batch_size 64), so
that its RSS can be read from /proc/PID/status.  Once it is ready, a paced producer process
(this script re-invoked) sends R (2,000) vector messages/s of N (200) metrics for S (180)
seconds, spread round-robin over E (20) entities (ts steps of 60 s per entity, values from a
fixed-seed rank-8-plus-noise generator as in bench_service.py), each with its send time as
Kafka timestamp.  Incidents are injected: from 15 s on (--quick: 8 s), every 30 s (--quick:
6 s) the next entity's metrics m010-m012 move by +10 noise sigmas for 10 s (--quick: 4 s).

Every T (5; --quick 2) seconds the service's /metrics and VmRSS are sampled; a table shows
time, messages consumed, the consume rate over the interval, lag, the mean ingest delay of
the interval's flushes (from the histogram's sum and count), the service's VmRSS and CPU, and
the broker's VmRSS and CPU (Tansu's in-memory storage keeps every message: ~9 MiB/s at the
default rate, so a long soak also measures a broker that grows by gigabytes).  At the end:
throughput, VmRSS at the start of the steady state (the first sample one interval after
every entity has finished its warm-up) vs the last sample while the producer was sending,
the growth per minute (end minus start, and the least-squares slope over the steady
samples), VmRSS 2 s after the last message was consumed (nothing in flight: fetch buffers and
queued vectors are what make the samples while sending vary by a few MiB), the alert events
against the injected incidents, and the service's ``shiftsieve_ingest_delay_seconds``
histogram (count, sum/count, bucket quantiles).  The broker and the producer share the
machine's cores with the service.  Figures only: nothing is asserted.  ``--quick``: 20 s.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import numpy as np
import orjson

API = (2, 5, 0)          # DEVELOPERS.md, Facts of this environment: consumer groups settle on Tansu with this
T0 = 1_796_000_000.0     # first ts, inside the decoder's accepted window
STEP = 60.0
RANK = 8
SUFFIXES = ("util", "bytes", "ms", "rate", "ratio")   # as bench_service.py
SHIFTED = (10, 11, 12)   # metric indices an incident moves
SHIFT_SIGMAS = 10.0


# -- workload --------------------------------------------------------------------------------------
def make_model(seed: int, entities: int, n: int) -> dict:
    rng = np.random.default_rng(seed)
    means = rng.uniform(50.0, 500.0, (entities, n))
    return {"names": [f"m{k:03d}_{SUFFIXES[k % len(SUFFIXES)]}" for k in range(n)],
            "entities": [f"pump-{e:02d}" for e in range(entities)],
            "means": means, "loadings": rng.standard_normal((entities, n, RANK)) * (0.03 * means)[:, :, None],
            "sigma": 0.01 * means, "seed": seed}


def incidents(params: dict) -> list[dict]:
    """The injected incidents: entity, first and last message index (inclusive)."""
    out, rate, E = [], params["rate"], params["entities"]
    start, k = params["incident_start"], 0
    while start + params["incident_seconds"] <= params["seconds"]:
        entity = k % E
        first = int(start * rate)
        last = int((start + params["incident_seconds"]) * rate) - 1
        out.append({"entity": params["entity_names"][entity], "index": entity, "first": first, "last": last,
                    "start_s": start})
        start, k = start + params["incident_every"], k + 1
    return out


def make_messages(model: dict, start: int, count: int, injected: list[dict]) -> list[tuple[bytes, bytes]]:
    """Messages ``start .. start + count - 1``: message i is entity i mod E, step i div E."""
    E, n = len(model["entities"]), len(model["names"])
    rng = np.random.default_rng([model["seed"], start])
    idx = np.arange(start, start + count)
    ent = idx % E
    X = np.empty((count, n))
    W = rng.standard_normal((count, RANK))
    for e in np.unique(ent):
        rows = np.flatnonzero(ent == e)
        X[rows] = (model["means"][e] + W[rows] @ model["loadings"][e].T
                   + rng.standard_normal((rows.size, n)) * model["sigma"][e])
    for inc in injected:
        rows = np.flatnonzero((ent == inc["index"]) & (idx >= inc["first"]) & (idx <= inc["last"]))
        for j in SHIFTED:
            X[rows, j] += SHIFT_SIGMAS * model["sigma"][inc["index"], j]
    names, entities = model["names"], model["entities"]
    return [(entities[e].encode(), orjson.dumps({"ts": T0 + (i // E) * STEP, "entity": entities[e],
                                                 "metrics": dict(zip(names, row))}))
            for i, e, row in zip(idx.tolist(), ent.tolist(), np.round(X, 3).tolist())]


def paced_producer(params: dict) -> int:
    from kafka import KafkaProducer
    model = make_model(params["seed"], params["entities"], params["metrics"])
    params["entity_names"] = model["entities"]
    injected = incidents(params)
    producer = KafkaProducer(bootstrap_servers=f"127.0.0.1:{params['port']}", api_version=API, acks=1,
                             linger_ms=5, batch_size=1 << 18)
    producer.partitions_for(params["topic"])   # metadata before the clock
    rate, total = float(params["rate"]), int(params["rate"] * params["seconds"])
    chunk = max(1, int(rate / 4))               # a quarter second of messages generated at a time
    started, late = time.perf_counter(), 0.0
    for start in range(0, total, chunk):
        for i, (key, value) in enumerate(make_messages(model, start, min(chunk, total - start), injected),
                                         start):
            delay = started + i / rate - time.perf_counter()
            if delay > 0:
                time.sleep(delay)
            else:
                late = max(late, -delay)
            producer.send(params["topic"], key=key, value=value, timestamp_ms=int(time.time() * 1000))
    sent_s = time.perf_counter() - started
    producer.flush()
    producer.close()
    print(json.dumps({"sent": total, "seconds": sent_s, "rate": total / sent_s, "max_behind_s": late,
                      "incidents": injected}), flush=True)
    return 0


# -- the service under test ------------------------------------------------------------------------
def scrape(port: int) -> tuple[dict[str, float], str]:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        text = r.read().decode()
    return ({line.rsplit(" ", 1)[0]: float(line.rsplit(" ", 1)[1])
             for line in text.splitlines() if line and not line.startswith("#")}, text)


def ready(port: int) -> bool:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/readyz", timeout=5) as r:
            return r.status == 200
    except OSError:
        return False


def status_mib(pid: int, field: str) -> float:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1]) / 1024
    return float("nan")


def cpu_seconds(pid: int | None) -> float:
    """User + system CPU seconds of process ``pid`` so far (/proc/PID/stat)."""
    if not pid:
        return float("nan")
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def lag_of(metrics: dict[str, float]) -> float | None:
    lags = [v for k, v in metrics.items() if k.startswith("shiftsieve_consumer_lag_messages{")]
    return sum(lags) if lags else None


def warming(metrics: dict[str, float]) -> int | None:
    """Entities still warming up, or None before every entity has a series."""
    values = [v for k, v in metrics.items() if k.startswith("shiftsieve_entity_warming_up{")]
    return int(sum(values)) if values else None


def histogram(metrics: dict[str, float], name: str) -> dict:
    buckets = sorted((float(k.split('le="')[1].split('"')[0]), v) for k, v in metrics.items()
                     if k.startswith(f"{name}_bucket{{"))
    count, total = metrics.get(f"{name}_count", 0.0), metrics.get(f"{name}_sum", 0.0)

    def quantile(q: float) -> float:   # upper bound of the bucket holding the q-quantile
        for le, c in buckets:
            if c >= q * count:
                return le
        return float("inf")
    return {"count": count, "sum": total, "mean": total / count if count else float("nan"),
            "p50": quantile(0.5), "p90": quantile(0.9), "p99": quantile(0.99), "buckets": buckets}


def run(args: argparse.Namespace, port: int, scratch: Path, broker_pid: int | None = None) -> dict:
    from kafka import KafkaAdminClient
    from kafka.admin import NewTopic

    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    from conftest import free_port

    topic = "soak-vectors"
    admin = KafkaAdminClient(bootstrap_servers=f"127.0.0.1:{port}", api_version=API)
    admin.create_topics([NewTopic(topic, 1, 1)])
    admin.close()
    config = scratch / "soak.toml"
    config.write_text('[kafka]\napi_version = "2.5.0"\nsession_timeout_ms = 6000\n')
    listen = free_port()
    events = scratch / "events.jsonl"
    env = {k: v for k, v in os.environ.items() if not k.startswith("SHIFTSIEVE_")
           or k in ("SHIFTSIEVE_REQUIRE_BROKER", "SHIFTSIEVE_TANSU_BIN")}
    env["OPENBLAS_NUM_THREADS"] = "1"
    stderr = open(scratch / "service.stderr", "wb")
    service = subprocess.Popen([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--config", str(config),
                                "--listen", f"127.0.0.1:{listen}", "--events", str(events),
                                "--source", f"kafka://127.0.0.1:{port}/{topic}?group=soak"],
                               env=env, stderr=stderr)
    producer = None
    try:
        t0 = time.monotonic()
        while not ready(listen):
            if service.poll() is not None or time.monotonic() - t0 > 60:
                tail = (scratch / "service.stderr").read_text()[-2000:]
                raise RuntimeError(f"the service did not get ready: {tail}")
            time.sleep(0.2)
        print(f"service ready in {time.monotonic() - t0:.1f} s (pid {service.pid}); VmRSS idle "
              f"{status_mib(service.pid, 'VmRSS'):.1f} MiB", flush=True)
        params = {"port": port, "topic": topic, "rate": args.rate, "seconds": args.seconds, "seed": args.seed,
                  "entities": args.entities, "metrics": args.metrics, "incident_start": args.incident_start,
                  "incident_every": args.incident_every, "incident_seconds": args.incident_seconds}
        producer = subprocess.Popen([sys.executable, str(Path(__file__).resolve()), "--paced-producer",
                                     json.dumps(params)], stdout=subprocess.PIPE, text=True, env=env)
        started = time.monotonic()
        cpu0, broker_cpu0 = cpu_seconds(service.pid), cpu_seconds(broker_pid)
        samples: list[dict] = []
        print(f"{'t s':>6} {'consumed':>10} {'msg/s':>7} {'lag':>7} {'delay ms':>9} {'VmRSS MiB':>10} "
              f"{'warming':>8} {'CPU %':>6} {'broker MiB':>11} {'broker CPU %':>13}", flush=True)
        next_at = started
        drained_at = None
        while True:
            next_at += args.sample_seconds
            time.sleep(max(0.0, next_at - time.monotonic()))
            if service.poll() is not None:
                raise RuntimeError(f"the service exited ({service.returncode})")
            metrics, _ = scrape(listen)
            s = {"t": time.monotonic() - started,
                 "consumed": metrics.get("shiftsieve_messages_consumed_total", 0.0), "lag": lag_of(metrics),
                 "rss": status_mib(service.pid, "VmRSS"), "warming": warming(metrics),
                 "sending": producer.poll() is None,
                 "delay_n": metrics.get("shiftsieve_ingest_delay_seconds_count", 0.0),
                 "delay_sum": metrics.get("shiftsieve_ingest_delay_seconds_sum", 0.0),
                 "broker": status_mib(broker_pid, "VmRSS") if broker_pid else float("nan"),
                 "cpu": cpu_seconds(service.pid), "broker_cpu": cpu_seconds(broker_pid)}
            prev = samples[-1] if samples else {"t": 0.0, "consumed": 0.0, "delay_n": 0.0, "delay_sum": 0.0,
                                                "cpu": cpu0, "broker_cpu": broker_cpu0}
            cpu = 100 * (s["cpu"] - prev["cpu"]) / (s["t"] - prev["t"])
            broker_cpu = 100 * (s["broker_cpu"] - prev["broker_cpu"]) / (s["t"] - prev["t"])
            rate = (s["consumed"] - prev["consumed"]) / (s["t"] - prev["t"])
            flushes = s["delay_n"] - prev["delay_n"]   # mean ingest delay of the interval's flushes
            delay = f"{1000 * (s['delay_sum'] - prev['delay_sum']) / flushes:,.0f}" if flushes else "-"
            samples.append(s)
            lag = "-" if s["lag"] is None else f"{s['lag']:,.0f}"
            warm = "-" if s["warming"] is None else str(s["warming"])
            print(f"{s['t']:>6.0f} {s['consumed']:>10,.0f} {rate:>7,.0f} {lag:>7} {delay:>9} {s['rss']:>10.1f} "
                  f"{warm:>8} {cpu:>6.0f} {s['broker']:>11.0f} {broker_cpu:>13.0f}", flush=True)
            if not s["sending"]:
                total = int(args.rate * args.seconds)
                if s["consumed"] >= total and s["lag"] == 0:
                    drained_at = s["t"]
                    break
                if s["t"] > args.seconds + 60:
                    print("  the service did not drain within 60 s of the producer's end", flush=True)
                    break
        out = producer.stdout.read()
        if producer.wait() != 0 or not out.strip():
            raise RuntimeError(f"the paced producer failed (exit status {producer.returncode})")
        sent = json.loads(out.strip().splitlines()[-1])
        metrics, _ = scrape(listen)
        hwm = status_mib(service.pid, "VmHWM")
        idle = None
        if drained_at is not None:   # nothing in flight: what stays is what the service keeps
            time.sleep(2.0)
            idle = status_mib(service.pid, "VmRSS")
    finally:
        if producer is not None and producer.poll() is None:
            producer.kill()
            producer.wait()
        if service.poll() is None:
            service.send_signal(signal.SIGTERM)
        code = service.wait(timeout=40)
        stderr.close()
    evs = [json.loads(line) for line in events.read_text().splitlines()] if events.exists() else []
    return {"samples": samples, "sent": sent, "metrics": metrics, "hwm": hwm, "code": code, "events": evs,
            "drained_at": drained_at, "idle_rss": idle}


def report(args: argparse.Namespace, res: dict) -> None:
    samples, sent = res["samples"], res["sent"]
    print()
    print(f"bench_soak: {sent['sent']:,} messages of {args.metrics} metrics, {args.entities} entities, sent in "
          f"{sent['seconds']:.1f} s at {sent['rate']:,.0f} msg/s (target {args.rate:,.0f}; the producer was at "
          f"most {sent['max_behind_s']:.2f} s behind its schedule); {os.cpu_count()} cores, broker and producer "
          f"on the same machine; service exit status {res['code']}")
    sending = [s for s in samples if s["sending"]]
    warm_at = next((i for i, s in enumerate(samples) if s["warming"] == 0), None)
    steady = [s for s in sending[warm_at + 1:]] if warm_at is not None else []
    m = res["metrics"]
    consumed = m.get("shiftsieve_messages_consumed_total", 0.0)
    if sending:
        last = sending[-1]
        print(f"throughput: {last['consumed'] / last['t']:,.0f} msg/s consumed while sending "
              f"({last['consumed']:,.0f} in {last['t']:.0f} s); {consumed:,.0f} consumed in all"
              + (f", drained (lag 0) {res['drained_at'] - sent['seconds']:.1f} s after the producer's end"
                 if res["drained_at"] is not None else ", NOT drained"))
        print(f"lag while sending: max {max((s['lag'] or 0) for s in sending):,.0f}, "
              f"mean {np.mean([(s['lag'] or 0) for s in sending]):,.0f} messages")
    if len(steady) >= 2:
        a, b = steady[0], steady[-1]
        minutes = (b["t"] - a["t"]) / 60
        t = np.array([s["t"] for s in steady]) / 60
        rss = np.array([s["rss"] for s in steady])
        slope = float(np.polyfit(t, rss, 1)[0]) if len(steady) >= 3 else float("nan")
        print(f"VmRSS: steady state from t = {a['t']:.0f} s (warm-up done at t = {samples[warm_at]['t']:.0f} s): "
              f"{a['rss']:.1f} MiB; end of sending (t = {b['t']:.0f} s): {b['rss']:.1f} MiB; "
              f"change {b['rss'] - a['rss']:+.1f} MiB over {minutes:.1f} min = "
              f"{(b['rss'] - a['rss']) / minutes:+.2f} MiB/min; least-squares slope {slope:+.2f} MiB/min "
              f"over {len(steady)} samples; steady min {rss.min():.1f} / max {rss.max():.1f} MiB; "
              f"VmHWM {res['hwm']:.1f} MiB")
        if res["idle_rss"] is not None:
            print(f"VmRSS 2 s after the backlog drained (no fetch buffers or queued vectors in flight): "
                  f"{res['idle_rss']:.1f} MiB, {res['idle_rss'] - a['rss']:+.1f} MiB vs the steady-state start")
    else:
        print(f"VmRSS: too few steady-state samples ({len(steady)}) for a start/end comparison; "
              f"use a longer --seconds; VmHWM {res['hwm']:.1f} MiB")
    h = histogram(m, "shiftsieve_ingest_delay_seconds")
    print(f"shiftsieve_ingest_delay_seconds: count {h['count']:,.0f}, sum {h['sum']:,.2f} s, sum/count "
          f"{1000 * h['mean']:.1f} ms; bucket upper bounds of p50 {h['p50']:g} s, p90 {h['p90']:g} s, "
          f"p99 {h['p99']:g} s")
    b = histogram(m, "shiftsieve_batch_duration_seconds")
    print(f"shiftsieve_batch_duration_seconds: count {b['count']:,.0f}, sum/count {1000 * b['mean']:.1f} ms; "
          f"processing {b['sum'] / max(sent['seconds'], 1e-9):.0%} of the sending time")
    injected = sent["incidents"]
    firing = [e for e in res["events"] if e["state"] == "firing"]
    windows = [(inc["entity"], T0 + (inc["first"] // args.entities) * STEP,
                T0 + (inc["last"] // args.entities + 10) * STEP) for inc in injected]

    def inside(e: dict, w: tuple) -> bool:
        return e["entity"] == w[0] and w[1] <= e["ts"] <= w[2]
    caught = sum(1 for w in windows if any(inside(e, w) for e in firing))
    outside = sum(1 for e in firing if not any(inside(e, w) for w in windows))
    print(f"incidents injected {len(injected)} (+{SHIFT_SIGMAS:g} sigma on {len(SHIFTED)} metrics for "
          f"{args.incident_seconds:g} s), alerted on {caught}; alert events {len(res['events'])} "
          f"(firing {len(firing)}, of which {outside} outside the injected windows); dead-lettered "
          f"{sum(v for k, v in m.items() if k.startswith('shiftsieve_messages_dead_lettered_total')):,.0f}; "
          f"rewarms {m.get('shiftsieve_entity_rewarms_total', 0):,.0f}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="20 s, samples every 2 s")
    parser.add_argument("--seconds", type=float, default=None, help="how long the producer sends (180)")
    parser.add_argument("--rate", type=float, default=2000.0, help="messages/s (2,000)")
    parser.add_argument("--entities", type=int, default=20)
    parser.add_argument("--metrics", type=int, default=200)
    parser.add_argument("--sample-seconds", type=float, default=None, help="sampling interval (5; --quick 2)")
    parser.add_argument("--seed", type=int, default=20240611)
    parser.add_argument("--paced-producer", metavar="JSON", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.paced_producer:
        return paced_producer(json.loads(args.paced_producer))
    if args.seconds is None:
        args.seconds = 20.0 if args.quick else 180.0
    if args.sample_seconds is None:
        args.sample_seconds = 2.0 if args.quick else 5.0
    args.incident_start, args.incident_every, args.incident_seconds = (8.0, 6.0, 4.0) if args.quick \
        else (15.0, 30.0, 10.0)
    if min(args.seconds, args.rate, args.entities, args.sample_seconds) <= 0 or args.metrics <= max(SHIFTED):
        parser.error(f"--seconds, --rate, --entities, --sample-seconds must be positive, "
                     f"--metrics > {max(SHIFTED)}")

    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))   # tests/, for conftest.start_tansu
    from conftest import start_tansu

    scratch = Path(tempfile.mkdtemp(prefix="bench-soak-"))
    try:
        try:
            broker = start_tansu(scratch)
        except RuntimeError as exc:
            print(f"bench_soak: no Kafka broker: {exc}", file=sys.stderr)
            return 2
        print(f"broker: Tansu on 127.0.0.1:{broker.port} (in-memory, started in {broker.startup_s:.1f} s)",
              flush=True)
        try:
            res = run(args, broker.port, scratch, broker.proc.pid if broker.proc else None)
        finally:
            broker.stop()
        report(args, res)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
