"""Generate the bundled replay incidents: deterministic, labelled demo telemetry.

Run ``python -m shiftsieve.replay_data.generate [--out DIR] [--csv-sample PATH]``.
The output is byte-for-byte reproducible (fixed seeds, sorted keys, gzip with
mtime 0), so the committed files can be checked against a fresh run.

Scenario (fictional): Brinehaven Ferry Line sells crossings to the Skerrow
Isles. Four instances are scraped every 30 s: ``booking-api-1`` and
``booking-api-2`` (the HTTP API tier), ``seatmap-worker-1`` (a queue consumer
that allocates seats and vehicle-deck lanes) and ``manifest-db-1`` (the
passenger manifest database), 33-40 metrics each, 1500 samples per entity.

Data model, per entity and metric j (the model shiftsieve assumes)::

    g_j(x_j(t)) = g_j(base_j) + sigma_j * (sum_f L_jf * factor_f(t) + eps_j(t) + fault_j(t))

- ``g_j`` is log1p for metrics named ``*_ms``, ``*_seconds``, ``*_bytes``
  (latencies, lags, memory: multiplicative, never negative; the same patterns
  as the model's default ``log_metrics``, whose symmetric log is log1p for
  positive values) and the identity for the rest (rates, ratios, counts).
- ``sigma_j`` is the noise std on that scale (relative for log1p metrics);
  every shift in the labels is in units of it, so faults are added on that
  scale too. ``eps`` is N(0, 1), or a standardised log-normal (right-skewed,
  occasional large upward spikes) for the heavy-tailed metrics.
- Five shared factors: ``traffic`` (a day compressed into 560 samples, 0 at
  night to about 1 at the peak, plus a small wander), ``batch`` (a fare-table
  sync every 180 samples, 20 samples long), ``drift`` (slow, unit std),
  ``runtime`` (GC / checkpoint activity, AR(1), unit std), ``mix`` (share of
  vehicle bookings, slow AR(1), unit std). Loadings are up to tens of sigmas,
  so the shared movement alone trips any per-metric threshold.
- The shared part is linear on each metric's scale, so a bigger surge stays
  exactly on the same shared directions. (Generated linear but modelled on a
  log scale, or the reverse, a surge of twice the usual traffic would bend
  away from them by several sigmas on some metrics.)
- Values are rounded to a power of ten between 1/20 and 1/2 of the metric's
  smallest noise std, which keeps the files small without changing the noise.

Labels file ``NAME.labels.json`` (one JSON object, keys sorted):

- ``scenario`` (str, the file stem), ``description`` (str),
  ``step_seconds`` (float), ``start`` / ``end`` (float: first and last ts in
  the file), ``vectors`` (int: lines in the .jsonl.gz), ``entities``
  ({entity: service}), ``log_suffixes`` (metric-name endings whose sigma is on
  the log1p scale).
- ``incidents``: what a detector must find, each ``{"entity", "start", "end",
  "metrics", "shift_sigma", "kind"}``: ``start`` / ``end`` are the ts of the
  entity's first and last faulty sample (inclusive); ``metrics`` the shifted
  metrics, sorted; ``shift_sigma`` {metric: signed size in noise sigmas};
  ``kind`` is ``"step"`` (constant shift over the window) or ``"ramp"``
  (linear from about 0 at ``start`` to ``shift_sigma`` at ``end``).
- ``surges``: benign traffic surges, ``{"start", "end", "traffic_ratio"}``
  (peak traffic over the highest traffic earlier in the file); all entities.
- ``transients``: one-sample spikes that must not raise alerts,
  ``{"entity", "ts", "metric", "shift_sigma"}``.
- ``gaps``: missing data, ``{"entity", "start", "end", "metrics", "how"}``;
  ``how`` is ``"null"`` (sent as null) or ``"absent"`` (key left out); empty
  ``metrics`` means the entity sent no vector at all in the window.
- ``late_metrics``: ``{"entity", "metric", "first_ts"}`` for metrics that only
  appear mid-file.

``--csv-sample PATH`` also writes a wide CSV (``ts,entity,<metric...>``, empty
cell = missing) of a slice of the ``ramp`` incident: both booking-api
instances, samples 900-1099, with the late metric and an absent block in it.
"""

from __future__ import annotations

import argparse
import csv
import gzip
import io
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import orjson

T0 = 1780000000.0
STEP_SECONDS = 30.0
SAMPLES = 1500
DAY_SAMPLES = 560
BATCH_EVERY, BATCH_FIRST, BATCH_LEN = 180, 100, 20
FACTORS = ("traffic", "batch", "drift", "runtime", "mix")
HEAVY_SHAPE = 0.6  # log-normal shape of the heavy-tailed noise: skewness about 2.3
LOG_SUFFIXES = ("_ms", "_seconds", "_bytes")  # generated on a log1p scale (the model's default log_metrics)
INCIDENT_NAMES = ("surge", "single_shift", "multi_shift", "ramp")


@dataclass(frozen=True)
class Metric:
    """One metric: scale(value) = scale(base) + sigma * (loadings . factors + noise + fault).

    The scale is the identity, or log1p for `log` metrics (sigma then is relative).
    """

    name: str
    base: float
    sigma: float
    loadings: tuple[float, ...]
    heavy: bool
    log: bool

    def values(self, excursion: np.ndarray) -> np.ndarray:
        """Metric values from an excursion in sigma units."""
        if self.log:
            return np.expm1(np.log1p(self.base) + self.sigma * excursion)
        return self.base + self.sigma * excursion


def _m(name: str, base: float, sigma: float, heavy: bool = False, **load: float) -> Metric:
    """Catalog shorthand; loadings by factor initial (T, B, D, R, M), in sigmas."""
    return Metric(name, base, sigma, tuple(float(load.get(f[0].upper(), 0.0)) for f in FACTORS),
                  heavy, name.endswith(LOG_SUFFIXES))


_PROCESS = [
    _m("cpu_util_ratio", 0.13, 0.008, T=35, B=2, R=1.5),
    _m("cpu_throttled_ratio", 0.0065, 0.0005, T=12, R=1),
    _m("load_avg_1m", 0.6, 0.05, T=30, B=4),
    _m("process_resident_memory_bytes", 1.15e9, 0.0035, T=6, D=2, R=6),
    _m("heap_used_bytes", 5.2e8, 0.012, T=10, D=4, R=18),
    _m("gc_pause_p99_ms", 45.0, 0.03, heavy=True, T=4, R=5),
    _m("gc_collections_per_s", 0.5, 0.02, T=14, R=5),
    _m("gc_cpu_ratio", 0.012, 0.0005, T=8, R=5),
    _m("threads_live", 110.0, 1.5, T=10, D=2),
    _m("open_fds", 260.0, 5.0, T=22, D=3),
]

_DB_CLIENT = [
    _m("db_pool_active_conns", 4.0, 0.4, T=18, B=3),
    _m("db_pool_idle_conns", 34.0, 0.5, T=-16, B=-3),
    _m("db_pool_wait_p99_ms", 2.5, 0.055, T=8, B=4),
    _m("db_query_lat_p50_ms", 2.8, 0.03, T=5, B=8, M=1),
    _m("db_query_lat_p99_ms", 16.0, 0.055, heavy=True, T=5, B=8),
    _m("db_queries_per_s", 140.0, 6.0, T=60, M=3),
]

_HOST_IO = [
    _m("disk_write_bytes_per_s", 2.6e5, 2.2e4, T=25, B=3),
    _m("log_lines_per_s", 120.0, 6.0, heavy=True, T=45),
    _m("net_rx_bytes_per_s", 6.0e4, 2.5e3, T=60, M=3),
    _m("net_tx_bytes_per_s", 6.5e5, 2.0e4, heavy=True, T=62, M=4),
    _m("tcp_connections_established", 40.0, 2.5, T=30),
    _m("tcp_retransmits_per_s", 0.75, 0.08, T=7),
]

CATALOG: dict[str, list[Metric]] = {
    "booking-api": _PROCESS + _DB_CLIENT + _HOST_IO + [
        _m("http_requests_per_s", 55.0, 2.5, T=70, M=2),
        _m("http_inflight_requests", 6.0, 0.4, T=25, R=1.5),
        _m("http_req_lat_p50_ms", 32.0, 0.035, T=10, B=3, R=2, M=3),
        _m("http_req_lat_p90_ms", 75.0, 0.035, T=10, B=3, R=2, M=3),
        _m("http_req_lat_p99_ms", 250.0, 0.035, heavy=True, T=8, B=3, R=2, M=2),
        _m("http_5xx_ratio", 0.0035, 0.0003, T=4, M=1),
        _m("http_4xx_ratio", 0.021, 0.0012, T=3, M=3),
        _m("http_tls_handshake_p99_ms", 9.0, 0.06, T=6),
        _m("cache_hit_ratio", 0.9, 0.004, T=-2, D=3, M=-3),
        _m("cache_evictions_per_s", 3.8, 0.2, T=7, D=3),
        _m("sessions_active", 180.0, 12.0, T=65),
        _m("bookings_confirmed_per_s", 1.2, 0.06, T=45, M=-2),
        _m("upstream_payment_req_per_s", 4.5, 0.35, T=45),
        _m("upstream_payment_lat_p50_ms", 110.0, 0.045, T=4, M=2),
        _m("upstream_payment_lat_p99_ms", 520.0, 0.05, heavy=True, T=4, M=2),
        _m("upstream_payment_timeouts_per_s", 0.28, 0.03, T=6),
        _m("upstream_seatmap_lat_p50_ms", 14.0, 0.045, T=6, B=5),
        _m("upstream_seatmap_lat_p99_ms", 55.0, 0.06, T=6, B=5),
    ],
    "seatmap-worker": _PROCESS + _DB_CLIENT + _HOST_IO + [
        _m("queue_depth_msgs", 36.0, 3.0, T=35, B=10),
        _m("queue_consume_per_s", 30.0, 2.0, T=65),
        _m("queue_produce_per_s", 29.0, 2.0, T=64),
        _m("queue_lag_seconds", 1.0, 0.05, T=10, B=10),
        _m("job_duration_p50_ms", 20.0, 0.04, T=8, B=6, M=4),
        _m("job_duration_p99_ms", 150.0, 0.04, heavy=True, T=6, B=5, M=3),
        _m("job_retries_per_s", 0.35, 0.04, T=7),
        _m("job_failures_ratio", 0.005, 0.0004, T=3),
        _m("seat_lock_wait_p99_ms", 7.0, 0.07, T=10, B=4),
        _m("lane_allocations_per_s", 7.5, 0.35, T=40, M=3),
        _m("seats_allocated_per_s", 32.0, 1.6, T=55, M=-2),
        _m("upstream_manifest_lat_p50_ms", 4.0, 0.04, T=5, B=10),
        _m("upstream_manifest_lat_p99_ms", 28.0, 0.06, heavy=True, T=5, B=10),
    ],
    "manifest-db": [
        _m("db_connections_active", 18.0, 1.2, T=35, B=6),
        _m("db_connections_idle", 80.0, 1.2, T=-20, B=-6),
        _m("db_transactions_per_s", 180.0, 10.0, T=65, B=15),
        _m("db_rollbacks_per_s", 1.8, 0.15, T=6, M=1),
        _m("db_rows_read_per_s", 9.0e3, 350.0, T=55, B=40, M=4),
        _m("db_rows_written_per_s", 700.0, 50.0, T=40, B=60),
        _m("db_query_lat_p50_ms", 1.6, 0.025, T=5, B=10),
        _m("db_query_lat_p99_ms", 14.0, 0.055, heavy=True, T=5, B=12),
        _m("db_lock_waits_per_s", 0.9, 0.1, T=8, B=6),
        _m("db_buffer_hit_ratio", 0.985, 0.0008, T=-2, B=-8, D=1),
        _m("db_checkpoint_write_bytes_per_s", 1.5e7, 3e5, T=3, B=4, R=12),
        _m("db_wal_bytes_per_s", 2.2e6, 1.6e5, T=40, B=35),
        _m("db_replication_lag_seconds", 0.3, 0.015, T=4, B=10, R=2),
        _m("db_temp_bytes_per_s", 6e5, 3e4, heavy=True, B=30),
        _m("db_seq_scans_per_s", 4.0, 0.4, T=3, B=25),
        _m("db_index_scans_per_s", 1200.0, 60.0, T=60, M=2),
        _m("db_autovacuum_workers", 4.0, 0.15, D=2, R=4),
        _m("db_table_bloat_ratio", 0.12, 0.003, D=8),
        _m("cpu_util_ratio", 0.14, 0.008, T=30, B=12, R=2),
        _m("cpu_iowait_ratio", 0.065, 0.003, T=3, B=8, R=4),
        _m("load_avg_1m", 0.9, 0.08, T=30, B=12),
        _m("process_resident_memory_bytes", 6.2e9, 0.0013, T=3, D=6, R=2),
        _m("fs_page_cache_bytes", 1.8e10, 0.0028, B=-3, D=6),
        _m("disk_read_bytes_per_s", 7.5e6, 5e5, T=10, B=45, M=2),
        _m("disk_write_bytes_per_s", 2.8e7, 8e5, T=30, B=25, R=8),
        _m("disk_io_util_ratio", 0.18, 0.012, T=10, B=20, R=2),
        _m("disk_read_lat_ms", 1.2, 0.035, T=2, B=10),
        _m("disk_write_lat_ms", 5.0, 0.03, heavy=True, B=8, R=3),
        _m("disk_free_bytes", 4.2e11, 0.0005, D=-10),
        _m("net_rx_bytes_per_s", 8e6, 5e5, T=55, B=10),
        _m("net_tx_bytes_per_s", 3.4e7, 1.5e6, T=55, B=20, M=3),
        _m("tcp_connections_established", 95.0, 1.5, T=20),
        _m("open_fds", 900.0, 8.0, T=10, D=3),
    ],
}


@dataclass(frozen=True)
class Entity:
    """A scraped instance: its service catalog, scrape offset and message labels."""

    name: str
    service: str
    offset_seconds: float
    host: str
    zone: str


ENTITIES = (
    Entity("booking-api-1", "booking-api", 0.0, "bh-app-01", "quay-a"),
    Entity("booking-api-2", "booking-api", 4.0, "bh-app-02", "quay-b"),
    Entity("manifest-db-1", "manifest-db", 9.0, "bh-db-01", "quay-a"),
    Entity("seatmap-worker-1", "seatmap-worker", 15.0, "bh-wrk-01", "quay-a"),
)
_BY_NAME = {e.name: e for e in ENTITIES}


@dataclass(frozen=True)
class Fault:
    """A labelled shift, in sigmas on each metric's scale, over samples first..last inclusive."""

    entity: str
    first: int
    last: int
    shift_sigma: dict[str, float]
    kind: str = "step"


@dataclass(frozen=True)
class Surge:
    """Extra traffic: rises over `rise` samples, holds, then decays exponentially."""

    start: int
    height: float
    rise: int = 6
    hold: int = 60
    decay: float = 30.0

    def shape(self, n: int) -> np.ndarray:
        i = np.arange(n, dtype=float) - self.start
        up = np.clip((i + 1) / self.rise, 0.0, 1.0)
        down = np.exp(-np.clip(i - self.rise - self.hold, 0.0, None) / self.decay)
        return self.height * up * down

    @property
    def end(self) -> int:
        """Last sample with more than 5 % of the extra traffic."""
        return self.start + self.rise + self.hold + int(np.ceil(self.decay * np.log(20.0)))


@dataclass(frozen=True)
class Gap:
    """Missing data on one entity; empty `metrics` = no vector sent at all."""

    entity: str
    first: int
    last: int
    metrics: tuple[str, ...]
    how: str


@dataclass(frozen=True)
class Scenario:
    """One incident file: its seed, story and what is injected (sample indices per entity)."""

    name: str
    seed: int
    description: str
    faults: tuple[Fault, ...] = ()
    surge: Surge | None = None
    transients: tuple[tuple[str, int, str, float], ...] = ()
    gaps: tuple[Gap, ...] = ()
    late: tuple[tuple[str, str, int], ...] = ()


_RUNTIME_FAMILY = ("gc_collections_per_s", "gc_cpu_ratio", "gc_pause_p99_ms", "heap_used_bytes")
_DISK_FAMILY = tuple(m.name for m in CATALOG["manifest-db"] if m.name.startswith("disk_"))

SCENARIOS = (
    Scenario(
        "surge", 101,
        "Skerrow folk-festival ticket release: traffic jumps to nearly twice the day's peak within "
        "three minutes, holds for half an hour and fades over the next 45 minutes. Every metric "
        "moves with traffic exactly as it does the rest of the day, only more; there is no fault, "
        "so no alert is correct.",
        surge=Surge(start=1330, height=0.95),
    ),
    Scenario(
        "single_shift", 202,
        "booking-api-2: a misrouted health check holds a pooled database connection for its whole "
        "timeout, so pool checkouts wait longer (db_pool_wait_p99_ms +6 sigma for 45 minutes) while "
        "active and idle pool counts barely move. Recovers when the route is fixed.",
        faults=(Fault("booking-api-2", 900, 989, {"db_pool_wait_p99_ms": 6.0}),),
    ),
    Scenario(
        "multi_shift", 303,
        "booking-api-1: the payment provider's endpoint for this instance's zone slows down for an "
        "hour: payment latency p50/p99 and timeouts up, 5xx ratio up, confirmed bookings down.",
        faults=(Fault("booking-api-1", 1250, 1369, {
            "bookings_confirmed_per_s": -5.0,
            "http_5xx_ratio": 5.0,
            "upstream_payment_lat_p50_ms": 6.0,
            "upstream_payment_lat_p99_ms": 9.0,
            "upstream_payment_timeouts_per_s": 7.0,
        }),),
    ),
    Scenario(
        "ramp", 404,
        "seatmap-worker-1 leaks memory after a deploy: resident memory ramps to +16 sigma over five "
        "hours until the worker is restarted. Also: one-sample spikes on other metrics (not "
        "incidents), a runtime-exporter outage on booking-api-2 (metrics absent), a disk-exporter "
        "timeout on manifest-db-1 (metrics null), lost scrapes of seatmap-worker-1, and a TLS "
        "metric that appears only after an exporter upgrade on the booking-api instances.",
        faults=(Fault("seatmap-worker-1", 850, 1449, {"process_resident_memory_bytes": 16.0}, "ramp"),),
        transients=(
            ("booking-api-1", 420, "http_req_lat_p99_ms", 9.0),
            ("booking-api-2", 610, "gc_pause_p99_ms", 12.0),
            ("manifest-db-1", 777, "db_lock_waits_per_s", 10.0),
            ("seatmap-worker-1", 930, "queue_depth_msgs", 11.0),
            ("booking-api-1", 1010, "tcp_retransmits_per_s", 8.0),
            ("manifest-db-1", 1120, "db_replication_lag_seconds", 14.0),
            ("booking-api-2", 1290, "http_5xx_ratio", 9.0),
            ("seatmap-worker-1", 1333, "job_retries_per_s", 10.0),
            ("booking-api-1", 1480, "cache_evictions_per_s", 8.0),
            ("manifest-db-1", 1470, "db_query_lat_p99_ms", 12.0),
        ),
        gaps=(
            Gap("seatmap-worker-1", 700, 714, (), "absent"),
            Gap("booking-api-2", 1000, 1059, _RUNTIME_FAMILY, "absent"),
            Gap("manifest-db-1", 1200, 1239, _DISK_FAMILY, "null"),
        ),
        late=(("booking-api-1", "http_tls_handshake_p99_ms", 950),
              ("booking-api-2", "http_tls_handshake_p99_ms", 1100)),
    ),
)
CSV_SAMPLE = ("ramp", ("booking-api-1", "booking-api-2"), 900, 1099)


def _ar1(rng: np.random.Generator, n: int, phi: float) -> np.ndarray:
    """Stationary unit-variance AR(1) series."""
    e = rng.standard_normal(n)
    x = np.empty(n)
    x[0] = e[0]
    s = np.sqrt(1.0 - phi * phi)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + s * e[i]
    return x


def _standardise(x: np.ndarray) -> np.ndarray:
    return (x - x.mean()) / x.std()


def _global_factors(rng: np.random.Generator, n: int) -> dict[str, np.ndarray]:
    """Factors shared by all entities: traffic (daily cycle), batch schedule, request mix."""
    theta = 2.0 * np.pi * np.arange(n) / DAY_SAMPLES
    day = (1.0 - np.cos(theta)) / 2.0
    traffic = day * (1.0 + 0.08 * np.sin(2.0 * theta)) + 0.03 * _ar1(rng, n, 0.97)
    batch = np.zeros(n)
    ramp = np.minimum(np.arange(BATCH_LEN) + 1, BATCH_LEN - np.arange(BATCH_LEN)) / 3.0
    for start in range(BATCH_FIRST, n, BATCH_EVERY):
        run = np.minimum(ramp, 1.0) * (1.0 + 0.1 * rng.standard_normal())
        batch[start:start + BATCH_LEN] = run[: n - start]
    return {"traffic": traffic, "batch": batch, "mix": _standardise(_ar1(rng, n, 0.99))}


def _excursions(rng: np.random.Generator, shared: dict[str, np.ndarray], metrics: list[Metric]) -> np.ndarray:
    """Metric x sample matrix of shared movement plus noise, in each metric's sigma units."""
    n = shared["traffic"].size
    own = {
        "traffic": shared["traffic"] + 0.015 * _ar1(rng, n, 0.9),
        "batch": shared["batch"],
        "drift": _standardise(_ar1(rng, n, 0.998)),
        "runtime": _ar1(rng, n, 0.85),
        "mix": shared["mix"],
    }
    factors = np.stack([own[f] for f in FACTORS])
    loadings = np.array([m.loadings for m in metrics])
    noise = rng.standard_normal((len(metrics), n))
    for j, m in enumerate(metrics):
        if m.heavy:
            noise[j] = _standardise(np.exp(HEAVY_SHAPE * noise[j]))
    return loadings @ factors + noise


def _decimals(metric: Metric, values: np.ndarray) -> int:
    """Decimal places that keep the rounding quantum between 1/20 and 1/2 of the smallest noise std."""
    noise = metric.sigma * (1.0 + values.min()) if metric.log else metric.sigma
    return -int(np.floor(np.log10(noise / 2.0)))


def _ts(entity: Entity, sample: int) -> float:
    return T0 + sample * STEP_SECONDS + entity.offset_seconds


def build(scenario: Scenario) -> tuple[list[dict], dict]:
    """Return (vector messages in timestamp order, labels) for one scenario."""
    rng = np.random.default_rng(scenario.seed)
    shared = _global_factors(rng, SAMPLES)
    labels: dict = {"scenario": scenario.name, "description": scenario.description,
                    "step_seconds": STEP_SECONDS, "entities": {e.name: e.service for e in ENTITIES},
                    "log_suffixes": list(LOG_SUFFIXES),
                    "incidents": [], "surges": [], "transients": [], "gaps": [], "late_metrics": []}
    if scenario.surge is not None:
        s = scenario.surge
        before = shared["traffic"][: s.start].max()
        shared["traffic"] = shared["traffic"] + s.shape(SAMPLES)
        labels["surges"].append({"start": min(_ts(e, s.start) for e in ENTITIES),
                                 "end": max(_ts(e, s.end) for e in ENTITIES),
                                 "traffic_ratio": round(float(shared["traffic"][s.start:s.end + 1].max() / before), 2)})
    rows: list[dict] = []
    for entity in ENTITIES:
        metrics = CATALOG[entity.service]
        index = {m.name: j for j, m in enumerate(metrics)}
        excursion = _excursions(rng, shared, metrics)
        for f in (f for f in scenario.faults if f.entity == entity.name):
            width = f.last - f.first + 1
            shape = np.arange(1, width + 1) / width if f.kind == "ramp" else np.ones(width)
            for name, size in f.shift_sigma.items():
                excursion[index[name], f.first:f.last + 1] += size * shape
            labels["incidents"].append({"entity": f.entity, "start": _ts(entity, f.first), "end": _ts(entity, f.last),
                                        "metrics": sorted(f.shift_sigma), "shift_sigma": dict(f.shift_sigma),
                                        "kind": f.kind})
        for name, sample, metric, size in (t for t in scenario.transients if t[0] == entity.name):
            excursion[index[metric], sample] += size
            labels["transients"].append({"entity": name, "ts": _ts(entity, sample), "metric": metric,
                                         "shift_sigma": size})
        values = np.stack([m.values(excursion[j]) for j, m in enumerate(metrics)])
        _check_range(scenario.name, entity.name, metrics, values)
        missing = [(g.first, g.last, g.metrics, g.how) for g in scenario.gaps if g.entity == entity.name]
        first_seen = {metric: sample for name, metric, sample in scenario.late if name == entity.name}
        decimals = [_decimals(m, values[j]) for j, m in enumerate(metrics)]
        for i in range(SAMPLES):
            if any(a <= i <= b and not names for a, b, names, _ in missing):
                continue
            sample = {m.name: round(float(values[j, i]), decimals[j])
                      for j, m in enumerate(metrics) if i >= first_seen.get(m.name, 0)}
            for a, b, names, how in missing:
                if a <= i <= b:
                    for name in names:
                        if how == "null":
                            sample[name] = None
                        else:
                            sample.pop(name, None)
            rows.append({"ts": _ts(entity, i), "entity": entity.name, "metrics": sample,
                         "labels": {"service": entity.service, "host": entity.host, "zone": entity.zone}})
    for g in scenario.gaps:
        e = _BY_NAME[g.entity]
        labels["gaps"].append({"entity": g.entity, "start": _ts(e, g.first), "end": _ts(e, g.last),
                               "metrics": sorted(g.metrics), "how": g.how})
    for name, metric, sample in scenario.late:
        labels["late_metrics"].append({"entity": name, "metric": metric, "first_ts": _ts(_BY_NAME[name], sample)})
    rows.sort(key=lambda r: (r["ts"], r["entity"]))
    labels.update(vectors=len(rows), start=rows[0]["ts"], end=rows[-1]["ts"])
    return rows, labels


def _check_range(scenario: str, entity: str, metrics: list[Metric], values: np.ndarray) -> None:
    """The catalog must keep values physical: non-negative, ratios at most 1."""
    for j, m in enumerate(metrics):
        low, high = values[j].min(), values[j].max()
        if low < 0.0 or (m.name.endswith("_ratio") and high > 1.0):
            raise ValueError(f"{scenario}/{entity}/{m.name}: values span [{low:.4g}, {high:.4g}]")


def _jsonl_gz(rows: list[dict]) -> bytes:
    body = b"".join(orjson.dumps(r, option=orjson.OPT_SORT_KEYS) + b"\n" for r in rows)
    return gzip.compress(body, compresslevel=9, mtime=0)


def _labels_json(labels: dict) -> bytes:
    return orjson.dumps(labels, option=orjson.OPT_SORT_KEYS | orjson.OPT_INDENT_2) + b"\n"


def _wide_csv(rows: list[dict], entities: Sequence[str], first: int, last: int) -> bytes:
    """Wide CSV of the given entities' vectors, samples first..last; empty cell = missing."""
    picked = [r for r in rows if r["entity"] in entities
              and _ts(_BY_NAME[r["entity"]], first) <= r["ts"] <= _ts(_BY_NAME[r["entity"]], last)]
    columns = sorted({name for r in picked for name in r["metrics"]})
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["ts", "entity", *columns])
    for r in picked:
        cells = [r["metrics"].get(c) for c in columns]
        writer.writerow([orjson.dumps(r["ts"]).decode(), r["entity"],
                         *("" if v is None else orjson.dumps(v).decode() for v in cells)])
    return out.getvalue().encode()


def write_all(out: Path, csv_sample: Path | None = None) -> list[Path]:
    """Write every incident (and optionally the CSV sample); return the paths written."""
    out.mkdir(parents=True, exist_ok=True)
    written = []
    for scenario in SCENARIOS:
        rows, labels = build(scenario)
        for path, data in ((out / f"{scenario.name}.jsonl.gz", _jsonl_gz(rows)),
                           (out / f"{scenario.name}.labels.json", _labels_json(labels))):
            path.write_bytes(data)
            written.append(path)
        if csv_sample is not None and scenario.name == CSV_SAMPLE[0]:
            csv_sample.parent.mkdir(parents=True, exist_ok=True)
            csv_sample.write_bytes(_wide_csv(rows, *CSV_SAMPLE[1:]))
            written.append(csv_sample)
    return written


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m shiftsieve.replay_data.generate",
                                     description="Write the bundled replay incidents (deterministic).")
    parser.add_argument("--out", type=Path, default=Path(__file__).resolve().parent,
                        help="output folder (default: the replay_data package folder)")
    parser.add_argument("--csv-sample", type=Path, default=None,
                        help="also write a wide CSV slice of the ramp incident to this path")
    args = parser.parse_args(argv)
    for path in write_all(args.out, args.csv_sample):
        print(f"{path}  {path.stat().st_size} bytes")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
