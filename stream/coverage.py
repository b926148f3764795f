"""What a run covered: per entity how much was scored, which entities never warmed up (and what it
would take), and which incidents were still open when the input ended.

"0 incidents" means "all clear" only when something was scored: a replay shorter than
``model.warmup`` scores nothing and must say so, per entity, with what it would take.  The
replay summary, the service's end-of-input summary, the report and ``evaluate`` all read these.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import TextIO

import numpy as np

from shiftsieve.models.decision import FIRING

from .events import incident_id
from .registry import EntityRecord
from .timefmt import human_duration, rfc3339

#: Entities named one by one in a note before "and N more".
NAMED = 5


@dataclass(frozen=True)
class EntityCoverage:
    """One entity's vectors and how many of them were scored (the rest built its warm-up)."""

    entity: str
    vectors: int          # vectors its model has taken, warm-up included
    warmup: int           # model.warmup: vectors collected before anything is scored
    first_ts: float | None
    last_ts: float

    @property
    def warming_up(self) -> bool:
        return self.vectors < self.warmup

    @property
    def scored(self) -> int:
        return max(self.vectors - self.warmup, 0)

    @property
    def step_seconds(self) -> float | None:
        """The entity's typical spacing of vectors, when it can be told."""
        if self.first_ts is None or self.vectors < 2 or not math.isfinite(self.last_ts - self.first_ts):
            return None
        return (self.last_ts - self.first_ts) / (self.vectors - 1) or None

    def still_needed(self) -> str:
        """What it would take to score it: vectors still missing, and how long they take to arrive."""
        more = self.warmup - self.vectors
        step = self.step_seconds
        when = f", about {human_duration(more * step)} of data at its {step:g} s step" if step else ""
        return f"{more:,} more vector{'s' if more != 1 else ''}{when}"


@dataclass(frozen=True)
class OpenIncident:
    """An incident still firing when the input ended, with its firing metrics at their peak."""

    entity: str
    incident: str
    started: float
    last_ts: float
    metrics: tuple[tuple[str, float], ...]   # (name, peak shift in residual sigmas), largest first


def entity_coverage(records: Iterable[EntityRecord]) -> list[EntityCoverage]:
    """Coverage of each entity in ``records`` (in their order)."""
    return [EntityCoverage(r.entity, r.model.detector.samples, r.model.detector.config.warmup, r.first_ts,
                           r.model.last_ts) for r in records]


def timestamp_coverage(timestamps: Mapping[str, np.ndarray], warmup: int) -> list[EntityCoverage]:
    """Coverage of an input read without running the engine (``evaluate``): per entity its
    increasing timestamps and the configured warm-up."""
    return [EntityCoverage(entity, int(ts.size), warmup, float(ts[0]) if ts.size else None,
                           float(ts[-1]) if ts.size else float("-inf")) for entity, ts in timestamps.items()]


def open_incidents(records: Iterable[EntityRecord]) -> list[OpenIncident]:
    """The incidents still open on ``records``, oldest first."""
    found = []
    for record in records:
        tracker = record.model.detector.tracker
        if tracker.incident is None:
            continue
        names = record.model.column_names
        firing = np.flatnonzero(tracker.state == FIRING)
        ranked = sorted(((names[j], float(tracker.peak_shift[j])) for j in firing), key=lambda m: (-abs(m[1]), m[0]))
        onset = tracker.incident.onset_ts
        found.append(OpenIncident(record.entity, incident_id(record.entity, onset), onset, record.model.last_ts,
                                  tuple(ranked)))
    return sorted(found, key=lambda i: (i.started, i.entity))


def scored_total(coverage: Iterable[EntityCoverage]) -> int:
    return sum(c.scored for c in coverage)


def coverage_notes(coverage: list[EntityCoverage]) -> list[str]:
    """Sentences for a person: nothing scored at all, or which entities never warmed up."""
    cold = [c for c in coverage if c.warming_up]
    if not cold:
        return []
    lines = []
    if len(cold) == len(coverage):
        lines.append("warning: NOTHING WAS SCORED: no entity finished its warm-up, so the absence of incidents "
                     "says nothing about this input.")
    else:
        lines.append(f"warning: {len(cold)} of {len(coverage)} entities never warmed up; nothing they sent was "
                     f"scored:")
    warmup = cold[0].warmup
    for c in cold[:NAMED]:
        lines.append(f"  {c.entity}: {c.vectors:,} of the {c.warmup:,} vectors model.warmup needs; "
                     f"{c.still_needed()}")
    if len(cold) > NAMED:
        lines.append(f"  ... and {len(cold) - NAMED} more")
    lines.append(f"  Replay a window that starts at least {warmup:,} steps before what you want scored, or "
                 f"lower model.warmup (at least 10; a short warm-up gives a rougher baseline).")
    return lines


def open_incident_notes(incidents: list[OpenIncident], top: int = 3) -> list[str]:
    """Sentences for a person: the incidents still open at the end of the input, with their top metrics."""
    if not incidents:
        return []
    lines = [f"{len(incidents)} incident{'s' if len(incidents) != 1 else ''} still open at the end of the input:"]
    for inc in incidents[:NAMED]:
        moved = ", ".join(f"{name} {shift:+.1f}\u03c3" for name, shift in inc.metrics[:top]) or "-"
        more = f" (+{len(inc.metrics) - top} more)" if len(inc.metrics) > top else ""
        lines.append(f"  {inc.entity}: since {rfc3339(inc.started)} ({human_duration(inc.last_ts - inc.started)} "
                     f"until its last vector): {moved}{more}")
    if len(incidents) > NAMED:
        lines.append(f"  ... and {len(incidents) - NAMED} more")
    return lines


def print_notes(lines: Iterable[str], stream: TextIO | None = None) -> None:
    """Lines for a person on ``stream`` (stderr): headlines prefixed with the program's name, details
    (indented lines) as they are."""
    stream = stream or sys.stderr
    for line in lines:
        print(line if line.startswith(" ") else f"shiftsieve: {line}", file=stream)
