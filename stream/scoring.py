"""Score alert events against incident labels, as on-call engineers and the literature read them.

Why incident level: an operator acts on incidents, not on samples, so the main
scores count how many labelled faults were found, how many pages were false,
how fast and how well the culprit metrics were named.

- A *predicted incident* is one distinct ``incident`` id that has at least one
  ``firing`` event: its entity, its onset (first firing ts), its metrics (union
  over its firing events; each metric keeps its largest |shift_sigma|, ranked by
  that, descending, ties by name), the joint-window rankings of the last of its
  events that carries ``window_metrics`` (the longest window) and its span:
  ``[onset, ts of its last event]`` when that event is ``resolved``/``adapted``,
  else open to the end of the input.
- *Scored* predictions: onset at or after the entity's ``scored_from`` (labels;
  entities not listed are scored throughout).  The others (``unscored``) are
  neither detections nor false alerts: published sets label only a test part.
- Matching: scored predictions in onset order; each takes the earliest-starting
  label still free on its entity whose window ``[start - tolerance, end]`` holds
  its onset (so each label and each prediction is matched at most once).
- *Fragments*: scored predictions that match no free label but whose onset lies
  in an already matched label's window -- a detector splitting one fault into
  several onsets.  They are neither detections nor false alerts, counted apart.
  Every other scored prediction is a *false alert*.
- precision = matched / (matched + false alerts), recall = matched / labelled,
  F1 their harmonic mean.  Conventions: nothing scored -> precision 1.0 (nothing
  false was claimed); no labels -> recall 1.0; P + R = 0 -> F1 0.  So a silent
  detector on a file without labels scores 1.0 / 1.0 / 1.0.
- localisation: for a matched label with k true metrics, the share of them among
  the top-k metrics of its prediction; mean over matches (None if none).  It is
  HitRate@100% of the ``metrics`` ranking, under its older name.
- delay: onset - start over matches, in seconds (mean, median, max; None if no
  match) and, with the labels' ``step_seconds``, the median in steps.  It can be
  negative, down to -tolerance.
- false alerts per 10,000 vectors: false alerts * 10000 / vectors.  Per
  entity-day: false alerts / scored entity-days, an entity's scored days being
  its vectors at or after ``scored_from`` times the step (``step_seconds``, else
  the entity's median spacing) / 86400.  Needs the input's timestamps.
- HitRate@100% and @150% (:mod:`.literature`): per match, on each ranking of the
  prediction's metrics: ``metrics`` (by peak |shift_sigma|, every prediction) and, when its
  events carry ``window_metrics``, ``group_lasso`` and ``msbl``; mean over the matches
  that carry the ranking.
- Point-adjusted precision, recall and F1 (:mod:`.literature`; the published papers'
  convention, which inflates scores: reported only to compare with them): point-wise over
  each entity's scored vectors; a vector is alerted when it lies in a prediction's span,
  labelled when it lies in a label's ``[start, end]``.  Needs the input's timestamps.

Labels and their file format: :mod:`.labels`.  Bad input raises
:class:`.labels.EvaluationError` whose message is one line naming the file and line (or the
event index for events passed in directly).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import orjson

from .labels import EvaluationError, LabelledIncident, Labels, finite_number, read_input
from .literature import covered, hit_rate, point_adjust
from .timefmt import rfc3339

STATES = frozenset({"firing", "resolved", "adapted"})
WINDOW_RANKINGS = ("group_lasso", "msbl")          # the joint-window rankings of ``window_metrics``
RANKINGS = ("metrics", *WINDOW_RANKINGS)           # what HitRate is computed on
HIT_RATE_PERCENTS = (100, 150)
SECONDS_PER_DAY = 86400.0


@dataclass(frozen=True)
class PredictedIncident:
    """One incident id from the events: entity, onset, (metric, max |shift_sigma|) ranked, span, window rankings."""

    incident: str
    entity: str
    onset: float
    metrics: tuple[tuple[str, float], ...]
    closed: float = math.inf                      # ts of its closing resolved/adapted event (inf: still open)
    window: Mapping[str, tuple[str, ...]] = field(default_factory=dict)   # group_lasso / msbl -> names

    def ranking(self, name: str) -> tuple[str, ...] | None:
        """The metric names of ranking ``name`` (one of RANKINGS), best first; None if the events had none."""
        return tuple(m for m, _ in self.metrics) if name == "metrics" else self.window.get(name)


@dataclass(frozen=True)
class Match:
    """A labelled incident and the prediction that found it."""

    label: LabelledIncident
    predicted: PredictedIncident
    delay_seconds: float
    localisation: float
    hit_rates: Mapping[str, tuple[float, ...]] = field(default_factory=dict)   # ranking -> per HIT_RATE_PERCENTS


@dataclass(frozen=True)
class HitRate:
    """Mean HitRate@100% and @150% of one ranking over the ``matches`` that carry it."""

    at_100: float
    at_150: float
    matches: int


@dataclass(frozen=True)
class PointAdjusted:
    """Point-adjusted scores (module docstring; the published convention, inflated) and their counts."""

    precision: float
    recall: float
    f1: float
    points: int            # scored vectors
    labelled_points: int
    alerted_points: int    # after adjustment


@dataclass(frozen=True)
class Evaluation:
    """Scores of one events stream against one labels file."""

    scenario: str
    vectors: int
    tolerance_seconds: float
    labelled: int
    predicted: tuple[PredictedIncident, ...]
    matches: tuple[Match, ...]
    missed: tuple[LabelledIncident, ...]
    false_alerts: tuple[PredictedIncident, ...]
    repeats: tuple[PredictedIncident, ...]
    unscored: tuple[PredictedIncident, ...]
    precision: float
    recall: float
    f1: float
    localisation: float | None
    delay_mean_seconds: float | None
    delay_median_seconds: float | None
    delay_max_seconds: float | None
    false_alerts_per_10k: float
    step_seconds: float | None = None
    scored_entity_days: float | None = None
    false_alerts_per_entity_day: float | None = None
    hit_rate: Mapping[str, HitRate] = field(default_factory=dict)
    point_adjusted: PointAdjusted | None = None

    @property
    def delay_median_steps(self) -> float | None:
        """The median delay in sampling steps (None without a match or without ``step_seconds``)."""
        if self.delay_median_seconds is None or not self.step_seconds:
            return None
        return self.delay_median_seconds / self.step_seconds

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready form (scores first, then the per-incident detail)."""
        pa = self.point_adjusted
        return {
            "scenario": self.scenario, "vectors": self.vectors, "tolerance_seconds": self.tolerance_seconds,
            "step_seconds": self.step_seconds,
            "labelled": self.labelled, "predicted": len(self.predicted), "matched": len(self.matches),
            "precision": self.precision, "recall": self.recall, "f1": self.f1,
            "localisation": self.localisation,
            "hit_rate": {name: {"at_100": h.at_100, "at_150": h.at_150, "matches": h.matches}
                         for name, h in self.hit_rate.items()},
            "delay_mean_seconds": self.delay_mean_seconds, "delay_median_seconds": self.delay_median_seconds,
            "delay_median_steps": self.delay_median_steps, "delay_max_seconds": self.delay_max_seconds,
            "false_alerts": len(self.false_alerts), "false_alerts_per_10k_vectors": self.false_alerts_per_10k,
            "scored_entity_days": self.scored_entity_days,
            "false_alerts_per_entity_day": self.false_alerts_per_entity_day,
            "repeats": len(self.repeats), "unscored": len(self.unscored),
            "point_adjusted": None if pa is None else {
                "convention": "point-adjusted (Xu et al. 2018); inflates scores, for comparison with published "
                              "figures only",
                "precision": pa.precision, "recall": pa.recall, "f1": pa.f1, "points": pa.points,
                "labelled_points": pa.labelled_points, "alerted_points": pa.alerted_points},
            "matches": [{"entity": m.label.entity, "start": m.label.start, "end": m.label.end,
                         "true_metrics": list(m.label.metrics), "incident": m.predicted.incident,
                         "onset": m.predicted.onset, "delay_seconds": m.delay_seconds,
                         "localisation": m.localisation,
                         "hit_rate": {name: dict(zip(("at_100", "at_150"), rates))
                                      for name, rates in m.hit_rates.items()},
                         "reported_metrics": _metrics_dict(m.predicted)}
                        for m in self.matches],
            "missed": [{"entity": lab.entity, "start": lab.start, "end": lab.end, "metrics": list(lab.metrics)}
                       for lab in self.missed],
            "false_alert_incidents": [{"incident": p.incident, "entity": p.entity, "onset": p.onset,
                                       "reported_metrics": _metrics_dict(p)} for p in self.false_alerts],
            "repeat_incidents": [{"incident": p.incident, "entity": p.entity, "onset": p.onset}
                                   for p in self.repeats],
        }


def _metrics_dict(p: PredictedIncident) -> dict[str, float]:
    return {name: size for name, size in p.metrics}


def _window_problem(window: Any) -> str | None:
    """Why ``window_metrics`` is unusable, or None (only the rankings are read)."""
    if not isinstance(window, dict):
        return "'window_metrics' must be a JSON object"
    for method in WINDOW_RANKINGS:
        items = window.get(method, [])
        if not isinstance(items, list) or not all(isinstance(i, dict) and isinstance(i.get("name"), str)
                                                  and i["name"] for i in items):
            return f"'window_metrics.{method}' must be a list of objects with a non-empty 'name'"
    return None


def _event_problem(obj: Any) -> str | None:
    """Why `obj` is not a usable alert event, or None."""
    if not isinstance(obj, dict):
        return "not a JSON object"
    if not finite_number(obj.get("ts")):
        return "'ts' must be a finite number"
    for key in ("entity", "incident"):
        if not isinstance(obj.get(key), str) or not obj[key]:
            return f"'{key}' must be a non-empty string"
    if obj.get("state") not in STATES:
        return f"'state' must be one of {', '.join(sorted(STATES))}"
    metrics = obj.get("metrics", [])
    if not isinstance(metrics, list):
        return "'metrics' must be a list"
    for item in metrics:
        if not isinstance(item, dict) or not isinstance(item.get("name"), str) or not item["name"]:
            return "each metric needs a non-empty 'name'"
        if not finite_number(item.get("shift_sigma")):
            return f"metric {item['name']!r}: 'shift_sigma' must be a finite number"
    return _window_problem(obj["window_metrics"]) if "window_metrics" in obj else None


def load_events(path: str | Path) -> list[dict]:
    """Read alert events, one JSON object per line (blank lines skipped)."""
    events = []
    for number, line in enumerate(read_input(path, "events").splitlines(), start=1):
        if not line.strip():
            continue
        try:
            obj = orjson.loads(line)
        except orjson.JSONDecodeError:
            raise EvaluationError(f"{path}:{number}: not valid JSON") from None
        problem = _event_problem(obj)
        if problem:
            raise EvaluationError(f"{path}:{number}: {problem}")
        events.append(obj)
    return events


def predicted_incidents(events: Sequence[dict]) -> list[PredictedIncident]:
    """Group events by incident id into predictions, in onset order (ids without firing are dropped)."""
    entity: dict[str, str] = {}
    onset: dict[str, float] = {}
    sizes: dict[str, dict[str, float]] = {}
    last: dict[str, dict] = {}
    window: dict[str, dict] = {}
    for i, event in enumerate(events):
        problem = _event_problem(event)
        if problem:
            raise EvaluationError(f"event {i}: {problem}")
        key = event["incident"]
        if entity.setdefault(key, event["entity"]) != event["entity"]:
            raise EvaluationError(f"event {i}: incident {key!r} already belongs to entity {entity[key]!r}")
        last[key] = event
        if "window_metrics" in event:
            window[key] = event["window_metrics"]
        if event["state"] != "firing":
            continue
        onset[key] = min(onset.get(key, math.inf), float(event["ts"]))
        seen = sizes.setdefault(key, {})
        for item in event.get("metrics", []):
            seen[item["name"]] = max(seen.get(item["name"], 0.0), abs(float(item["shift_sigma"])))
    found = [PredictedIncident(key, entity[key], onset[key],
                               tuple(sorted(sizes[key].items(), key=lambda kv: (-kv[1], kv[0]))),
                               closed=math.inf if last[key]["state"] == "firing" else float(last[key]["ts"]),
                               window={method: tuple(item["name"] for item in window[key].get(method, []))
                                       for method in WINDOW_RANKINGS} if key in window else {})
             for key in onset]
    return sorted(found, key=lambda p: (p.onset, p.incident))


def _match(label: LabelledIncident, p: PredictedIncident) -> Match:
    rates = {}
    for name in RANKINGS:
        ranking = p.ranking(name)
        if ranking is not None:
            rates[name] = tuple(hit_rate(ranking, label.metrics, percent) for percent in HIT_RATE_PERCENTS)
    return Match(label, p, p.onset - label.start, rates["metrics"][0], rates)   # localisation: HitRate@100%


def _mean_hit_rates(matches: Sequence[Match]) -> dict[str, HitRate]:
    out = {}
    for name in RANKINGS:
        rates = [m.hit_rates[name] for m in matches if name in m.hit_rates]
        if rates:
            at_100, at_150 = np.mean(rates, axis=0)
            out[name] = HitRate(float(at_100), float(at_150), len(rates))
    return out


def _scores(hits: int, claimed: int, truth: int) -> tuple[float, float, float]:
    """precision, recall, F1 with the module's conventions for empty denominators."""
    precision = hits / claimed if claimed else 1.0
    recall = hits / truth if truth else 1.0
    return precision, recall, 2 * precision * recall / (precision + recall) if precision + recall else 0.0


def point_adjusted(predicted: Sequence[PredictedIncident], labels: Labels,
                   timestamps: Mapping[str, np.ndarray]) -> PointAdjusted:
    """Point-adjusted precision, recall, F1 over the scored vectors of ``timestamps`` (entity ->
    sorted ts of its vectors); the convention of Xu et al. 2018, see the module docstring."""
    spans: dict[str, list[tuple[float, float]]] = {}
    for p in predicted:
        spans.setdefault(p.entity, []).append((p.onset, p.closed))
    segments: dict[str, list[tuple[float, float]]] = {}
    for lab in labels.incidents:
        segments.setdefault(lab.entity, []).append((lab.start, lab.end))
    points = labelled_points = alerted_points = hits = 0
    for entity, all_ts in timestamps.items():
        ts = np.asarray(all_ts, dtype=float)
        ts = ts[ts >= labels.scored_after(entity)]
        labelled = covered(ts, segments.get(entity, []))
        alerted = point_adjust(covered(ts, spans.get(entity, [])), labelled)
        points += ts.size
        labelled_points += int(labelled.sum())
        alerted_points += int(alerted.sum())
        hits += int((alerted & labelled).sum())
    return PointAdjusted(*_scores(hits, alerted_points, labelled_points), points, labelled_points, alerted_points)


def scored_entity_days(labels: Labels, timestamps: Mapping[str, np.ndarray]) -> float:
    """Sum over entities of their vectors at or after ``scored_from`` times the step, in days."""
    seconds = 0.0
    for entity, all_ts in timestamps.items():
        ts = np.asarray(all_ts, dtype=float)
        step = labels.step_seconds or (float(np.median(np.diff(ts))) if ts.size > 1 else 0.0)
        seconds += int(np.count_nonzero(ts >= labels.scored_after(entity))) * step
    return seconds / SECONDS_PER_DAY


def score_events(events: Sequence[dict], labels: Labels, *, vectors: int | None = None,
             tolerance_seconds: float | None = None,
             timestamps: Mapping[str, np.ndarray] | None = None) -> Evaluation:
    """Match predicted incidents to labelled ones and compute the scores (module docstring).

    ``tolerance_seconds`` defaults to the labels'; ``timestamps`` (entity -> sorted ts of the
    input's vectors) enables the per-entity-day rate and the point-adjusted scores."""
    count = labels.vectors if vectors is None else vectors
    if count <= 0:
        raise EvaluationError(f"vectors must be positive, got {count}")
    tolerance = labels.tolerance_seconds if tolerance_seconds is None else tolerance_seconds
    if not tolerance >= 0:
        raise EvaluationError(f"tolerance_seconds must be >= 0, got {tolerance}")
    predicted = predicted_incidents(events)
    order = sorted(range(len(labels.incidents)), key=lambda i: (labels.incidents[i].start, i))
    free = set(order)
    matches: list[Match] = []
    false_alerts: list[PredictedIncident] = []
    repeats: list[PredictedIncident] = []
    unscored: list[PredictedIncident] = []
    for p in predicted:
        if p.onset < labels.scored_after(p.entity):
            unscored.append(p)
            continue
        covering = [i for i in order if _covers(labels.incidents[i], p, tolerance)]
        hit = next((i for i in covering if i in free), None)
        if hit is not None:
            free.discard(hit)
            matches.append(_match(labels.incidents[hit], p))
        else:   # every label covering it is already matched (it would have taken a free one)
            (repeats if covering else false_alerts).append(p)
    precision, recall, f1 = _scores(len(matches), len(matches) + len(false_alerts), len(labels.incidents))
    delays = [m.delay_seconds for m in matches]
    days = scored_entity_days(labels, timestamps) if timestamps is not None else None
    return Evaluation(
        scenario=labels.scenario, vectors=count, tolerance_seconds=float(tolerance),
        labelled=len(labels.incidents), predicted=tuple(predicted), matches=tuple(matches),
        missed=tuple(labels.incidents[i] for i in order if i in free), false_alerts=tuple(false_alerts),
        repeats=tuple(repeats), unscored=tuple(unscored), precision=precision, recall=recall, f1=f1,
        localisation=sum(m.localisation for m in matches) / len(matches) if matches else None,
        delay_mean_seconds=sum(delays) / len(delays) if delays else None,
        delay_median_seconds=float(np.median(delays)) if delays else None,
        delay_max_seconds=max(delays) if delays else None,
        false_alerts_per_10k=len(false_alerts) * 10000 / count,
        step_seconds=labels.step_seconds, scored_entity_days=days,
        false_alerts_per_entity_day=len(false_alerts) / days if days else None,
        hit_rate=_mean_hit_rates(matches),
        point_adjusted=point_adjusted(predicted, labels, timestamps) if timestamps is not None else None,
    )


def _covers(label: LabelledIncident, p: PredictedIncident, tolerance: float) -> bool:
    return p.entity == label.entity and label.start - tolerance <= p.onset <= label.end


def _num(value: float | None, digits: int = 3) -> str:
    return "n/a" if value is None else f"{value:.{digits}f}"


def _rates(rates: Mapping[str, Sequence[float]]) -> str:
    """``metrics 0.50/1.00  msbl ...``: HitRate@100%/@150% per ranking."""
    return "  ".join(f"{name} {'/'.join(f'{x:.2f}' for x in r)}" for name, r in rates.items()) or "n/a"


def format_table(evaluation: Evaluation) -> str:
    """Compact human-readable report of an `Evaluation` (times in RFC 3339, UTC)."""
    e = evaluation
    pa = e.point_adjusted
    steps = "" if e.delay_median_steps is None else f" ({e.delay_median_steps:.1f} steps)"
    per_day = "" if e.false_alerts_per_entity_day is None else \
        f", {e.false_alerts_per_entity_day:.2f} per entity-day ({e.scored_entity_days:.1f} scored entity-days)"
    delay = "delay: nothing matched" if e.delay_median_seconds is None else (
        f"delay mean {e.delay_mean_seconds:.1f} s  median {e.delay_median_seconds:.1f} s{steps}"
        f"  max {e.delay_max_seconds:.1f} s")
    lines = [
        f"scenario {e.scenario}: {e.labelled} labelled, {len(e.predicted)} predicted, {len(e.matches)} matched"
        f" (tolerance {e.tolerance_seconds:g} s; {len(e.unscored)} before scored_from, not scored)",
        f"precision {_num(e.precision)}  recall {_num(e.recall)}  F1 {_num(e.f1)}  localisation {_num(e.localisation)}",
        f"HitRate@100%/150%: {_rates({name: (h.at_100, h.at_150) for name, h in e.hit_rate.items()})}",
        delay,
        f"false alerts {len(e.false_alerts)} = {e.false_alerts_per_10k:.2f} per 10k vectors{per_day}"
        f" ({e.vectors:,} vectors)",
    ]
    if e.repeats:
        lines.append(f"repeats {len(e.repeats)}: further onsets inside a labelled incident already found "
                     f"(neither true nor false alerts)")
    if pa is not None:
        lines.append(f"point-adjusted (Xu et al. 2018; inflated, only to compare with published figures): "
                     f"precision {pa.precision:.3f}  recall {pa.recall:.3f}  F1 {pa.f1:.3f}")
    for m in e.matches:
        lines.append(f"  found  {m.label.entity}  start {rfc3339(m.label.start)}  delay {m.delay_seconds:+.1f} s"
                     f"  HitRate {_rates(m.hit_rates)}  {m.predicted.incident}"
                     f"  top {_top(m.predicted)}")
    for lab in e.missed:
        lines.append(f"  missed {lab.entity}  start {rfc3339(lab.start)}  end {rfc3339(lab.end)}"
                     f"  {','.join(lab.metrics)}")
    for p in e.false_alerts:
        lines.append(f"  false  {p.entity}  onset {rfc3339(p.onset)}  {p.incident}  top {_top(p)}")
    return "\n".join(lines)


def _top(p: PredictedIncident, k: int = 3) -> str:
    return ", ".join(f"{name} {size:+.1f}\u03c3" for name, size in p.metrics[:k]) or "-"
