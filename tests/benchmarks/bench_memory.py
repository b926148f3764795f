"""Memory benchmark: many entities through the service's engine path, with and without a cap.

Run:  python tests/benchmarks/bench_memory.py [--quick] [--entities E] [--vectors V] [--cap C]
                                               [--order entity|round] [--poll P] [--jobs J]
                                               [--configs abc] [--seed S]

The claim (reliability issue): "Memory stays bounded with many entities (100,000 entities of
20 metrics: least-recently-seen models are evicted or spilled to the state store under a
configured cap; RSS is reported)."

What runs: the real ``Service`` (stream/service.py) with its real ``Engine``, exporter and
state directory, driven in-process without a source: decoded ``Vector`` objects are handed to
``Service.pipeline.feed`` one "poll" (P = 2,000 vectors) at a time, each poll followed by
``Service.flush`` -- which runs the engine, refreshes the exporter and evicts beyond
``engine.max_resident``, exactly as the poll loop does.  Decoding and Kafka are not measured
(bench_service.py does that).  Values come from one fixed-seed rank-3-plus-noise model of 20
metrics shared by all entities; ``model.warmup`` is 20 and every entity sends V = 25 vectors
(warm-up, then 5 scored), ts steps of 60 s.

Orders: ``entity`` (default): each entity sends all its vectors before the next one starts (a
fleet that is enumerated; with a cap, an entity is evicted after it is done and never
returns).  ``round``: round k sends vector k of every entity -- with a cap below E every
entity is evicted between any two of its vectors, the worst case: without a state directory
no entity ever finishes its warm-up, with one every vector costs a snapshot save (fsync) and
a load.  Round-robin with spill costs ~5 ms per vector: E = 100,000 takes hours; use it with
--entities.

Configurations, each in a fresh subprocess (this script re-invokes itself) so that peak RSS
(``ru_maxrss``) and the final ``VmRSS`` are that configuration's alone:

  (a) no cap (engine.max_resident 0): every model stays resident;
  (b) engine.max_resident = C (10,000) without state.directory: evicted models are lost and
      an entity that returns warms up again;
  (c) the same cap with state.directory in a temporary directory: evicted entities are
      snapshotted and restored when they return (spill).

Printed per configuration: wall time, the time in the service (feed + flush, without
generating the vectors), vectors/s on that time, CPU seconds, RSS (baseline before the first
vector, peak, end), evictions, snapshot saves and loads, snapshot files and bytes on disk,
and the sizes of the engine's, the service's and the exporter's per-entity bookkeeping after
the run (each must be bounded by the cap: a dict that keeps evicted entities is a leak).  For
(a): RSS growth per resident entity.

Sizes and time: the engine costs ~3.5 ms of CPU per entity here (its warm-up fit and first
batch), a snapshot save ~3 ms more (mostly the fsync).  E = 100,000, the issue's size
(--entities 100000), takes ~350 CPU-seconds in (a) and (b) and ~460 in (c): measured 15 min
on 2 shared cores with the three at once.  The default is therefore E = 50,000 with the same
cap (~7 min); memory per entity and the capped plateau do not depend on E.  By default the
three configurations run at the same time (--jobs 3): on a 2-core machine they share the
cores, so wall times and vectors/s are inflated, CPU seconds are not; --jobs 1 runs them one
after the other.  Figures only: nothing is asserted.
``--quick``: 5,000 entities, cap 1,000 (under a minute).
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

T0 = 1_796_000_000.0   # first ts, inside the decoder's accepted window
STEP = 60.0
N_METRICS = 20
RANK = 3
CONFIGS = {
    "a": "no cap",
    "b": "cap, no state directory (evicted models are lost)",
    "c": "cap + state directory (spill)",
}


# -- figures of this process ---------------------------------------------------------------------
def vm_rss_mib() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024   # KiB on Linux


def cpu_seconds() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


# -- workload ------------------------------------------------------------------------------------
class Workload:
    """Vectors of E entities x V steps from one low-rank-plus-noise model shared by all entities."""

    def __init__(self, entities: int, vectors: int, order: str, seed: int) -> None:
        self.E, self.V, self.order, self.seed = entities, vectors, order, seed
        rng = np.random.default_rng(seed)
        self.names = [f"m{k:02d}_{('util', 'rate', 'ms', 'ratio')[k % 4]}" for k in range(N_METRICS)]
        self.mean = rng.uniform(50.0, 500.0, N_METRICS)
        self.loadings = rng.standard_normal((N_METRICS, RANK)) * (0.05 * self.mean)[:, None]
        self.sigma = 0.01 * self.mean
        self.entities = [f"host-{e:06d}" for e in range(entities)]

    @property
    def total(self) -> int:
        return self.E * self.V

    def pairs(self, start: int, count: int) -> tuple[np.ndarray, np.ndarray]:
        """(entity index, step) of vectors ``start .. start + count - 1`` in the chosen order."""
        i = np.arange(start, start + count)
        if self.order == "entity":
            return i // self.V, i % self.V
        return i % self.E, i // self.E

    def chunk(self, start: int, count: int):
        from shiftsieve.stream.decode import Vector
        ent, step = self.pairs(start, count)
        rng = np.random.default_rng([self.seed, start])
        X = (self.mean + rng.standard_normal((count, RANK)) @ self.loadings.T
             + rng.standard_normal((count, N_METRICS)) * self.sigma)
        names, entities = self.names, self.entities
        return [Vector(ts=T0 + STEP * k, entity=entities[e], metrics=dict(zip(names, row)), labels={})
                for e, k, row in zip(ent.tolist(), step.tolist(), np.round(X, 3).tolist())]


class NoSource:
    """What ``_evict`` and ``_snapshot`` ask of a source: the offsets consumed (none here)."""

    def positions(self) -> dict[str, int]:
        return {}


# -- one configuration (child process) -------------------------------------------------------------
def child(params: dict) -> dict:
    from shiftsieve.stream.config import load_config
    from shiftsieve.stream.service import Service

    E, V, cap, spill = params["entities"], params["vectors"], params["cap"], params["spill"]
    state_dir = params.get("state_dir")
    environ = {"SHIFTSIEVE_MODEL_WARMUP": str(params["warmup"]),
               "SHIFTSIEVE_ENGINE_MAX_RESIDENT": str(cap),
               "SHIFTSIEVE_ENGINE_MAX_ENTITIES": str(max(E, 100_000))}
    if spill:
        environ["SHIFTSIEVE_STATE_DIRECTORY"] = json.dumps(state_dir)   # a TOML string
    config = load_config(None, environ)
    service = Service(config, source_url="-", listen="127.0.0.1:0")
    engine = service.engine
    service.source = NoSource()
    io = {"saves": 0, "save_s": 0.0, "loads": 0, "restored": 0, "load_s": 0.0}
    if service.state is not None:
        save, load = service.state.save, service.state.load

        def timed_save(*a, **k):
            t = time.perf_counter()
            try:
                return save(*a, **k)
            finally:
                io["saves"] += 1
                io["save_s"] += time.perf_counter() - t

        def timed_load(*a, **k):
            t = time.perf_counter()
            try:
                out = load(*a, **k)
                io["restored"] += out is not None
                return out
            finally:
                io["loads"] += 1
                io["load_s"] += time.perf_counter() - t
        service.state.save, service.state.load = timed_save, timed_load

    work = Workload(E, V, params["order"], params["seed"])
    poll = params["poll"]
    work.chunk(0, min(poll, work.total))   # the generator's own transient memory is in the baseline
    gc.collect()
    rss_base = vm_rss_mib()
    trace: list[tuple[int, float]] = []    # (vectors fed, VmRSS MiB) at every 10 % of the input
    marks = {int(work.total * q / 10) for q in range(1, 11)}
    gen_s = svc_s = svc_cpu = 0.0
    wall0, cpu0 = time.perf_counter(), cpu_seconds()
    done = 0
    while done < work.total:
        count = min(poll, work.total - done)
        t = time.perf_counter()
        vectors = work.chunk(done, count)
        t1, c1 = time.perf_counter(), time.process_time()
        service.pipeline.feed(vectors, done)
        service.flush()
        t2, c2 = time.perf_counter(), time.process_time()
        gen_s, svc_s, svc_cpu = gen_s + (t1 - t), svc_s + (t2 - t1), svc_cpu + (c2 - c1)
        del vectors
        done += count
        if any(done >= m > done - count for m in marks):
            trace.append((done, vm_rss_mib()))
            print(f"bench_memory ({params['key']}): {done:,}/{work.total:,} vectors, "
                  f"{len(engine.entities):,} resident, VmRSS {trace[-1][1]:,.0f} MiB", file=sys.stderr, flush=True)
    wall, cpu = time.perf_counter() - wall0, cpu_seconds() - cpu0
    gc.collect()
    rss_end, rss_peak = vm_rss_mib(), peak_rss_mib()   # before anything below allocates

    ex = service.exporter
    gauges = {"shift_sigma": ex.shift, "metric_state": ex.state, "residual_norm": ex.residual,
              "baseline_rank": ex.rank, "warming_up": ex.warming, "last_sample": ex.last_sample}
    sizes = {
        "registry records": len(engine.registry),
        "registry records with pending": sum(1 for r in engine.registry.records() if r.pending),
        "registry.ran": len(engine.registry.ran),
        "registry.unsaved": len(engine.registry.unsaved),
        "records with covered offsets": sum(1 for r in engine.registry.records() if r.covered),
        "exporter entity series": ex.entity_series,
        "exporter shift series": ex.shift_series,
        **{f"gauge {name} series": len(g._metrics) for name, g in gauges.items()},
    }
    snap_files = snap_bytes = 0
    if spill:   # streamed: a list of 90,000 paths would itself add ~40 MiB to this process
        with os.scandir(state_dir) as it:
            for entry in it:
                if entry.name.endswith(".snap"):
                    snap_files, snap_bytes = snap_files + 1, snap_bytes + entry.stat().st_size
    scoring = sum(1 for s in engine.entities.values() if not s.detector.warming_up)
    counts = engine.counts
    return {
        "key": params["key"], "E": E, "V": V, "cap": cap, "spill": spill, "order": params["order"],
        "vectors": work.total, "wall_s": wall, "gen_s": gen_s, "service_s": svc_s, "service_cpu_s": svc_cpu,
        "cpu_s": cpu,
        "rss_base": rss_base, "rss_end": rss_end, "rss_peak": rss_peak, "trace": trace,
        "evicted": ex.evicted._value.get(), "resident": len(engine.entities), "scoring": scoring,
        "processed": counts.processed,
        "rejected": counts.rejected_entity_limit + counts.rejected_out_of_order + counts.rejected_duplicate_ts,
        "events": counts.events, "incidents": counts.incidents, "rewarmed": counts.rewarmed,
        "withheld": ex.withheld._value.get(), "max_series": ex.max_series,
        "snap_files": snap_files, "snap_bytes": snap_bytes,
        "sizes": sizes, **io,
    }


# -- the parent: run the configurations, print the figures ------------------------------------------
def run_configs(args: argparse.Namespace, scratch: Path) -> list[dict]:
    pending = []
    for key in args.configs:
        state_dir = scratch / f"state-{key}"
        params = {"key": key, "entities": args.entities, "vectors": args.vectors, "warmup": args.warmup,
                  "cap": 0 if key == "a" else args.cap, "spill": key == "c", "order": args.order,
                  "poll": args.poll, "seed": args.seed, "state_dir": str(state_dir)}
        pending.append(params)
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    env = {k: v for k, v in env.items() if not k.startswith("SHIFTSIEVE_") or k in
           ("SHIFTSIEVE_REQUIRE_BROKER", "SHIFTSIEVE_TANSU_BIN")}   # a stray setting would change the run
    running: list[tuple[dict, subprocess.Popen, float]] = []
    results: dict[str, dict] = {}
    while pending or running:
        while pending and len(running) < args.jobs:
            params = pending.pop(0)
            proc = subprocess.Popen([sys.executable, str(Path(__file__).resolve()), "--child", json.dumps(params)],
                                    stdout=subprocess.PIPE, text=True, env=env)
            running.append((params, proc, time.perf_counter()))
            print(f"({params['key']}) {CONFIGS[params['key']]}: started", flush=True)
        for item in list(running):
            params, proc, started = item
            if proc.poll() is None:
                continue
            running.remove(item)
            out = proc.stdout.read()
            if proc.returncode != 0:
                raise RuntimeError(f"configuration ({params['key']}) failed with exit status {proc.returncode}")
            results[params["key"]] = json.loads(out.strip().splitlines()[-1])
            print(f"({params['key']}) done in {time.perf_counter() - started:,.1f} s", flush=True)
        time.sleep(0.2)
    return [results[k] for k in args.configs]


def report(args: argparse.Namespace, results: list[dict], total_s: float) -> None:
    r0 = results[0]
    print()
    print(f"bench_memory: E = {r0['E']:,} entities x V = {r0['V']} vectors of {N_METRICS} metrics "
          f"({r0['vectors']:,} vectors), model.warmup {args.warmup}, order {args.order}, "
          f"{args.poll:,} vectors per poll, cap C = {args.cap:,}; {os.cpu_count()} cores, "
          f"{args.jobs} configuration(s) at a time; total {total_s:,.0f} s")
    head = (f"{'config':<7}{'resident':>9}{'scoring':>9}{'evicted':>9}{'saves':>8}{'loads':>8}{'wall s':>8}"
            f"{'svc s':>8}{'vec/s':>8}{'svc CPU':>8}{'vec/CPUs':>9}{'base':>7}{'peak':>7}{'end':>7}{'files':>8}"
            f"{'disk MiB':>9}")
    print(head)
    for r in results:
        print(f"({r['key']}){'':<4}{r['resident']:>9,}{r['scoring']:>9,}{int(r['evicted']):>9,}{r['saves']:>8,}"
              f"{r['loads']:>8,}{r['wall_s']:>8.1f}{r['service_s']:>8.1f}{r['vectors'] / r['service_s']:>8,.0f}"
              f"{r['service_cpu_s']:>8.1f}{r['vectors'] / r['service_cpu_s']:>9,.0f}"
              f"{r['rss_base']:>7.0f}{r['rss_peak']:>7.0f}{r['rss_end']:>7.0f}"
              f"{r['snap_files']:>8,}{r['snap_bytes'] / 2**20:>9.1f}")
    print("  RSS in MiB: base = VmRSS before the first vector, peak = ru_maxrss, end = VmRSS after the run;")
    print("  svc s, svc CPU = wall and CPU seconds in Service.pipeline.feed + flush (vector generation excluded);")
    print("  vec/s and vec/CPUs = vectors per svc s and per svc CPU second (with shared cores, trust the latter);")
    print("  scoring = resident entities past their warm-up")
    for r in results:
        print(f"({r['key']}) {CONFIGS[r['key']]}: VmRSS at 10 % steps "
              + " ".join(f"{rss:.0f}" for _, rss in r["trace"]) + " MiB")
        extra = []
        if r["saves"]:
            extra.append(f"{1000 * r['save_s'] / r['saves']:.2f} ms per snapshot save "
                         f"({r['snap_bytes'] / max(r['snap_files'], 1) / 1024:.1f} KiB per file)")
        if r["loads"]:
            extra.append(f"{r['loads']:,} loads ({r['restored']:,} restored), "
                         f"{1000 * r['load_s'] / r['loads']:.2f} ms per load")
        extra.append(f"processed {r['processed']:,}, rejected {r['rejected']:,}, events {r['events']:,}, "
                     f"incidents opened {r['incidents']:,}, rewarms {r['rewarmed']}, "
                     f"series withheld {int(r['withheld']):,} (http.max_series {r['max_series']:,})")
        print("    " + "; ".join(extra))
    by = {r["key"]: r for r in results}
    if "a" in by:
        a = by["a"]
        per = (a["rss_end"] - a["rss_base"]) * 1024 / a["resident"]
        print(f"memory per resident entity, (a): ({a['rss_end']:,.0f} - {a['rss_base']:,.0f}) MiB / "
              f"{a['resident']:,} = {per:,.1f} KiB (VmRSS end - base)")
        for key in ("b", "c"):
            if key in by:
                r = by[key]
                expect = r["rss_base"] + r["cap"] * per / 1024
                print(f"  ({key}) with cap {r['cap']:,}: base + cap x per-entity = {expect:,.0f} MiB; "
                      f"measured end {r['rss_end']:,.0f}, peak {r['rss_peak']:,.0f} MiB; "
                      f"vs (a) peak {a['rss_peak']:,.0f} MiB: {r['rss_peak'] / a['rss_peak']:.2f} x")
    print("bookkeeping after the run (entries; bound: the cap, or E without one):")
    names = list(r0["sizes"])
    width = max(len(n) for n in names)
    print(f"  {'':<{width}}" + "".join(f"{'(' + r['key'] + ')':>10}" for r in results))
    leaks = []
    for name in names:
        row = f"  {name:<{width}}"
        for r in results:
            n = r["sizes"][name]
            bound = r["cap"] or r["E"]
            row += f"{n:>9,}{'!' if n > bound else ' '}"
            if n > bound:
                leaks.append(f"({r['key']}) {name} = {n:,} > {bound:,}")
        print(row)
    print("  bounded by the cap: " + ("yes, every entry" if not leaks else "NO: " + "; ".join(leaks)))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="5,000 entities, cap 1,000")
    parser.add_argument("--entities", type=int, default=None,
                        help="entities E (50,000; --quick 5,000; the issue's size is 100,000: ~15 min on 2 cores)")
    parser.add_argument("--vectors", type=int, default=25, help="vectors per entity V (25)")
    parser.add_argument("--warmup", type=int, default=20, help="model.warmup (20)")
    parser.add_argument("--cap", type=int, default=None, help="engine.max_resident of (b), (c) (10,000; --quick 1,000)")
    parser.add_argument("--order", choices=("entity", "round"), default="entity",
                        help="entity: all of an entity's vectors, then the next; round: vector k of every entity")
    parser.add_argument("--poll", type=int, default=2000, help="vectors per poll (2,000)")
    parser.add_argument("--jobs", type=int, default=3, help="configurations run at the same time (3)")
    parser.add_argument("--configs", default="abc", help="which of a, b, c to run (abc)")
    parser.add_argument("--seed", type=int, default=20240607)
    parser.add_argument("--child", metavar="JSON", help=argparse.SUPPRESS)   # one configuration
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(child(json.loads(args.child))), flush=True)
        return 0
    if args.entities is None:
        args.entities = 5_000 if args.quick else 50_000
    if args.cap is None:
        args.cap = 1_000 if args.quick else 10_000
    if min(args.entities, args.vectors, args.cap, args.poll, args.jobs) < 1 or args.warmup < 10 \
            or not args.configs or set(args.configs) - set(CONFIGS):
        parser.error("--entities, --vectors, --cap, --poll, --jobs must be positive, --warmup >= 10, "
                     "--configs a subset of abc")
    if args.vectors <= args.warmup:
        print(f"bench_memory: note: V = {args.vectors} <= model.warmup {args.warmup}: no entity is ever scored",
              flush=True)
    if args.order == "round" and "c" in args.configs and args.cap < args.entities:
        print(f"bench_memory: note: round-robin with spill saves and loads a snapshot per vector: "
              f"~{args.entities * args.vectors * 0.005 / 60:,.0f} min for (c)", flush=True)
    scratch = Path(tempfile.mkdtemp(prefix="bench-memory-"))
    try:
        started = time.perf_counter()
        results = run_configs(args, scratch)
        report(args, results, time.perf_counter() - started)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
