"""What the report shows, derived from the collector and the alert events: incidents grouped by
id, the time windows drawn on the figures, and each entity's :class:`EntityView` (the data of its
figures).  No drawing and no HTML here."""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Iterable, Sequence

import numpy as np

from ..labels import Labels
from .collector import OBSERVED_LO, SHIFT, EntityTrace

#: Seconds of context a zoomed incident shows before its onset at least (half of it after its end).
ZOOM_CONTEXT = 1800.0


@dataclass(frozen=True)
class Window:
    """A time window drawn on the figures: an alerted incident, a labelled fault or a labelled surge."""

    start: float
    end: float
    name: str


@dataclass(frozen=True)
class IncidentSummary:
    """One incident id, from the alert events: window, end state and metrics at their peak."""

    incident: str
    entity: str
    start: float
    end: float
    state: str                      # resolved, adapted, open (firing when the data ended) or unclosed
    metrics: tuple[dict, ...]       # event entries (name, shift_sigma, value, expected), peak |shift|, ranked
    window_metrics: dict | None     # joint-window rankings of the closing event, when present

    @property
    def duration(self) -> float:
        """Seconds from onset to end."""
        return self.end - self.start


def incidents_from_events(events: Iterable[dict], last_ts: dict[str, float]) -> list[IncidentSummary]:
    """Group events by incident id; each metric keeps the entry with its largest |shift_sigma|
    over the incident's events.  Incidents without a closing event end at their entity's last ts."""
    groups: dict[str, list[dict]] = {}
    for event in events:
        groups.setdefault(event["incident"], []).append(event)
    found = []
    for key, evs in groups.items():
        evs = sorted(evs, key=lambda e: e["ts"])
        closing = next((e for e in evs if e["state"] in ("resolved", "adapted")), None)
        start = min(float(e.get("started", e["ts"])) for e in evs)
        entity = evs[0]["entity"]
        end = float(closing["ts"]) if closing else max(last_ts.get(entity, start), float(evs[-1]["ts"]))
        peak: dict[str, dict] = {}
        for e in evs:
            for m in e.get("metrics", []):
                if m["name"] not in peak or abs(m["shift_sigma"]) > abs(peak[m["name"]]["shift_sigma"]):
                    peak[m["name"]] = m
        ranked = tuple(sorted(peak.values(), key=lambda m: (-abs(m["shift_sigma"]), m["name"])))
        found.append(IncidentSummary(key, entity, start, end, closing["state"] if closing else "open",
                                     ranked, (closing or {}).get("window_metrics")))
    return sorted(found, key=lambda i: (i.start, i.incident))


def mark_unclosed(incidents: list[IncidentSummary], still_open: Iterable[str] | None) -> list[IncidentSummary]:
    """Incidents without a closing event that the engine no longer held open at the end (``still_open``:
    the ids it did; None: unknown) become ``unclosed``: their entity's model was reset or dropped."""
    if still_open is None:
        return incidents
    held = set(still_open)
    return [replace(i, state="unclosed") if i.state == "open" and i.incident not in held else i for i in incidents]


@dataclass
class EntityView:
    """The data one entity's figures draw: chosen metrics, binned series, windows."""

    entity: str
    metrics: list[str]
    t: np.ndarray                  # (k,) bin start times, epoch seconds
    step: float                    # seconds per bin (for the last edge)
    values: np.ndarray             # (CHANNELS, k, len(metrics))
    incidents: list[Window]
    labelled: list[Window]
    labelled_metrics: list[tuple[str, ...]]   # the metrics of each labelled window
    width: int                     # rows per bin
    surges: list[Window] = field(default_factory=list)   # labelled benign traffic surges (every entity)
    t_end: float = math.nan        # the entity's last timestamp: where its data ends

    @property
    def end(self) -> float:
        """Where the data ends: ``t_end``, or one step after the last bin when it is unknown."""
        return self.t_end if math.isfinite(self.t_end) else float(self.t[-1]) + self.step


def unscored(view: EntityView) -> np.ndarray:
    """(k, metrics) bools: bins where a metric has an observed value but no shift, i.e. the detector
    did not score it there (warm-up, a new metric's probation, or a metric its baseline explains by
    itself).  Missing values are not marked: there is nothing to draw."""
    return np.isnan(view.values[SHIFT]) & ~np.isnan(view.values[OBSERVED_LO])


def unscored_spans(view: EntityView, column: int) -> list[tuple[float, float]]:
    """The stretches (start, end) in epoch seconds where metric ``column`` of ``view`` was not
    scored (:func:`unscored`); a bin spans from its start to the next one's (the last to ``end``)."""
    edges = np.append(view.t, view.end)
    padded = np.concatenate([[False], unscored(view)[:, column], [False]])
    flips = np.flatnonzero(padded[1:] != padded[:-1])
    return [(float(edges[a]), float(edges[b])) for a, b in zip(flips[::2], flips[1::2])]


def zoom_span(inc: IncidentSummary, view: EntityView) -> tuple[float, float]:
    """The time range of an incident's zoomed traces: :data:`ZOOM_CONTEXT` (or its duration, if
    longer) before the onset and half that after its end, never beyond the entity's data."""
    context = max(inc.duration, ZOOM_CONTEXT)
    first = float(view.t[0]) if view.t.size else inc.start
    lo = max(inc.start - context, first)
    hi = min(inc.end + context / 2, view.end)
    return (lo, hi) if hi > lo else (lo, lo + view.step)


def choose_metrics(trace: EntityTrace, incidents: Sequence[IncidentSummary], labelled: Iterable[str],
                   limit: int) -> list[str]:
    """Top metrics of an entity: those of its incidents by peak |shift|, then labelled ones, then
    the rest by the collector's peak |shift| (only metrics the trace has)."""
    chosen: dict[str, None] = {}
    for name in sorted({m["name"]: abs(m["shift_sigma"]) for inc in incidents for m in inc.metrics}.items(),
                       key=lambda kv: (-kv[1], kv[0])):
        chosen[name[0]] = None
    chosen.update((name, None) for name in labelled)
    order = np.argsort(-np.nan_to_num(trace.peak, nan=0.0), kind="stable")
    chosen.update((trace.names[j], None) for j in order[: limit + len(chosen)])
    return [name for name in chosen if name in trace.index][:limit]


def entity_view(trace: EntityTrace, entity: str, metrics: list[str], incidents: Sequence[IncidentSummary],
                labels: Labels | None) -> EntityView:
    """The data of one entity's figures: the binned series of ``metrics`` and the windows of its
    incidents, of the labelled faults on it and of the labelled traffic surges."""
    t, data = trace.series()
    cols = np.array([trace.index[m] for m in metrics], dtype=np.int64)
    step = float(np.median(np.diff(t))) if t.size > 1 else 30.0
    mine = [lab for lab in (labels.incidents if labels else ()) if lab.entity == entity]
    return EntityView(entity, metrics, t, step, data[:, :, cols],
                      [Window(i.start, i.end, i.incident) for i in incidents],
                      [Window(lab.start, lab.end, ", ".join(lab.metrics)) for lab in mine],
                      [lab.metrics for lab in mine], trace.width,
                      [Window(start, end, "traffic surge") for start, end in (labels.surges if labels else ())],
                      trace.last_ts())
