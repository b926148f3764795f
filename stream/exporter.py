"""Prometheus export: active shifts, per-entity health and the process's own counters.

Series follow the Prometheus naming conventions (base units, ``_total`` counters,
``_seconds``).  Label values are escaped by prometheus-client (backslash, double
quote, line feed: all the text format requires) after :func:`label_value` has
replaced the characters the format leaves raw but that break or fake lines for
other readers (see there), so no entity or metric name can break or inject into
the exposition.  Per-shift and per-entity series are
bounded by ``max_series``: beyond it new series are withheld and counted in
``shiftsieve_series_withheld_total`` instead of growing the scrape without limit.
"""

from __future__ import annotations

import re
from collections.abc import Iterable
from typing import TYPE_CHECKING

import numpy as np
from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client.core import HistogramMetricFamily
from prometheus_client.registry import Collector

from shiftsieve.models.decision import FIRING, PENDING, QUIET

from .config import HttpSection

if TYPE_CHECKING:
    from .registry import EntityRecord

#: Values of ``shiftsieve_metric_state``.
STATE_VALUES = {PENDING: 1, FIRING: 2}

# Characters replaced by U+FFFD in label values.  The Prometheus text format allows any UTF-8 in a
# label value and escapes only backslash, double quote and line feed (prometheus-client does that),
# so these would reach /metrics raw: C0 controls but TAB and LF (NUL truncates C strings; CR, VT, FF
# and FS..RS end a line for readers that split on more than LF, e.g. Python's str.splitlines(), so
# `x"} 1\rfake_metric 1` would read as an injected sample there), DEL, C1 controls (NEL U+0085 is
# a line break too), U+2028/U+2029 (line and paragraph separators) and lone surrogates (not
# encodable as UTF-8: generate_latest would raise and /metrics would fail as a whole; the decoders
# never pass one, this guards other callers). TAB is harmless inside quotes; LF is escaped as \n
# and so round-trips; everything else (RTL marks, emoji, combining characters) is kept as it is.
# Two names that differ only in replaced characters share their series: a price only names that
# no legitimate producer sends can pay.
_UNSAFE_LABEL_CHARS = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u2028\u2029\ud800-\udfff]")


def label_value(text: str) -> str:
    """``text`` as exported in a label: unsafe characters (see above) replaced by U+FFFD."""
    if text.isprintable():   # fast path, the common case: nothing to replace (isprintable is False for all of them)
        return text
    return _UNSAFE_LABEL_CHARS.sub("\ufffd", text)


class CountsHistogram(Collector):
    """A Prometheus histogram observed a whole array at a time (one ``np.searchsorted`` per batch
    instead of one ``observe`` call per vector), exposed as the standard ``_bucket``, ``_count`` and
    ``_sum`` series."""

    def __init__(self, name: str, documentation: str, bounds: tuple[float, ...]) -> None:
        self.name, self.documentation = name, documentation
        self.bounds = np.asarray(bounds, dtype=float)
        self.counts = np.zeros(self.bounds.size + 1, dtype=np.int64)   # the last one is +Inf
        self.sum = 0.0

    def observe_many(self, values: np.ndarray) -> None:
        values = np.asarray(values, dtype=float).ravel()
        if values.size:
            # bucket i counts values <= bounds[i] (Prometheus' "le"), so search from the left
            self.counts += np.bincount(np.searchsorted(self.bounds, values, side="left"),
                                       minlength=self.counts.size)
            self.sum += float(values.sum())

    def collect(self) -> Iterable[HistogramMetricFamily]:
        cumulative = np.cumsum(self.counts)
        buckets = [(f"{b:g}", int(c)) for b, c in zip(self.bounds, cumulative)] + [("+Inf", int(cumulative[-1]))]
        yield HistogramMetricFamily(self.name, self.documentation, buckets=buckets, sum_value=self.sum)


class Exporter:
    """Owns a registry; the service calls :meth:`observe_events` and :meth:`refresh`."""

    def __init__(self, max_series: int = HttpSection.max_series) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        self.max_series = max_series
        r = self.registry
        self.shift = Gauge("shiftsieve_shift_sigma", "Largest signed shift of a firing metric's current "
                           "episode, in residual sigmas", ["entity", "metric"], registry=r)
        self.state = Gauge("shiftsieve_metric_state", "Alert state of a metric that is not quiet "
                           "(1 pending, 2 firing)", ["entity", "metric"], registry=r)
        self.residual = Gauge("shiftsieve_entity_residual_norm_sigma", "Norm of the entity's last projected "
                              "residual, in residual sigmas", ["entity"], registry=r)
        self.rank = Gauge("shiftsieve_entity_baseline_rank", "Rank of the entity's baseline subspace",
                          ["entity"], registry=r)
        self.warming = Gauge("shiftsieve_entity_warming_up", "1 while the entity collects its warm-up",
                             ["entity"], registry=r)
        self.last_sample = Gauge("shiftsieve_entity_last_sample_timestamp_seconds", "Time stamp of the "
                                 "entity's newest vector", ["entity"], registry=r)
        self.withheld = Counter("shiftsieve_series_withheld_total", "Series not exported because of the "
                                "series cap", registry=r)
        self.consumed = Counter("shiftsieve_messages_consumed_total", "Messages read from the source", registry=r)
        self.decoded = Counter("shiftsieve_messages_decoded_total", "Messages decoded into vectors or samples",
                               registry=r)
        self.dead = Counter("shiftsieve_messages_dead_lettered_total", "Messages dead-lettered, by reason",
                            ["reason"], registry=r)
        self.invalid_values = Counter("shiftsieve_values_invalid_total", "Metric values treated as missing in "
                                      "vectors that were taken, by reason (numeric_string, not_a_number, "
                                      "non_finite, out_of_range, bad_name)", ["reason"], registry=r)
        self.samples = Counter("shiftsieve_samples_total", "Samples of the sample and otlp_json encodings, by "
                               "outcome (accepted or a rejection reason; duplicate and out_of_order count accepted samples "
                               "again, skipped counts unsupported OTLP points)", ["outcome"],
                               registry=r)
        self.events = Counter("shiftsieve_alert_events_total", "Alert events emitted, by state", ["state"],
                              registry=r)
        self.batch_seconds = Histogram("shiftsieve_batch_duration_seconds", "Time to process one poll's "
                                       "messages", registry=r,
                                       buckets=(0.001, 0.003, 0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0))
        self.ingest_delay = Histogram("shiftsieve_ingest_delay_seconds", "Time from the Kafka timestamp of "
                                      "a poll's oldest record until the gauges include it", registry=r,
                                      buckets=(0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0,
                                               30.0, 60.0))
        self.iterations = CountsHistogram("shiftsieve_solver_iterations", "Solver iterations per scored vector "
                                          "(0: the LASSO's zero check settled it)",
                                          (0, 1, 2, 4, 8, 16, 32, 64, 128, 256))
        r.register(self.iterations)
        self.lag = Gauge("shiftsieve_consumer_lag_messages", "Messages behind the end of the partition",
                         ["topic", "partition"], registry=r)
        self.rewarmed = Counter("shiftsieve_entity_rewarms_total", "Entities whose model went bad (non-finite "
                                "values, a failed factorisation) and that warm up again", registry=r)
        self.evicted = Counter("shiftsieve_entities_evicted_total", "Entity models evicted from memory "
                               "(engine.max_resident)", registry=r)
        self.snapshot_errors = Counter("shiftsieve_snapshot_errors_total", "Snapshots that failed their checks "
                                       "on restore (the entity warms up again)", registry=r)
        self.snapshot_age = Gauge("shiftsieve_snapshot_age_seconds", "Age of the oldest change to model state "
                                  "not yet in a snapshot (0 when every change is saved; only with state.directory)",
                                  registry=r)
        # Which series exist is kept on each entity's record (EntityRecord.exported); these count them.
        self.shift_series = 0
        self.entity_series = 0   # entities with their four gauges

    def _room(self) -> bool:
        return self.shift_series + 4 * self.entity_series < self.max_series

    def observe_events(self, events: list[dict]) -> None:
        for event in events:
            self.events.labels(event["state"]).inc()

    def refresh(self, records: Iterable[EntityRecord]) -> None:
        """Bring the gauges of ``records`` (entities that just processed vectors) up to date."""
        for record in records:
            stream = record.model
            det = stream.detector
            if record.exported is None:
                if not self._room():
                    self.withheld.inc()
                    continue
                record.exported = set()
                self.entity_series += 1
            label = label_value(record.entity)   # the bookkeeping keeps raw names; only the labels are sanitised
            self.rank.labels(label).set(det.baseline.rank)
            self.warming.labels(label).set(1 if det.warming_up else 0)
            self.last_sample.labels(label).set(stream.last_ts)
            if stream.last_residual_norm is not None:
                self.residual.labels(label).set(stream.last_residual_norm)
            columns = stream.column_names
            tracker = det.tracker
            busy = np.flatnonzero(tracker.state != QUIET)   # few: loop over those only
            exported = record.exported
            live = set()
            for j in busy:
                column = columns[j]
                if column not in exported:
                    if not self._room():
                        self.withheld.inc()
                        continue
                    exported.add(column)
                    self.shift_series += 1
                live.add(column)
                self.state.labels(label, label_value(column)).set(STATE_VALUES[int(tracker.state[j])])
                if tracker.state[j] == FIRING:
                    self.shift.labels(label, label_value(column)).set(float(tracker.peak_shift[j]))
            for column in exported - live:   # resolved, adapted, quiet again, or the metric was dropped
                exported.discard(column)
                self._remove_shift(label, column)

    def _remove_shift(self, label: str, column: str) -> None:
        """Drop one exported metric's state and shift series (the caller updates its key set)."""
        self.shift_series -= 1
        for gauge in (self.state, self.shift):
            try:
                gauge.remove(label, label_value(column))
            except KeyError:
                pass

    def forget(self, record: EntityRecord) -> None:
        """Remove every series of the entity (it moved to another process or was evicted)."""
        if record.exported is None:
            return
        label = label_value(record.entity)
        for column in record.exported:
            self._remove_shift(label, column)
        record.exported = None
        self.entity_series -= 1
        for gauge in (self.rank, self.warming, self.last_sample, self.residual):
            try:
                gauge.remove(label)
            except KeyError:
                pass

    def exposition(self) -> bytes:
        return generate_latest(self.registry)
