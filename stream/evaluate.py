"""Score alert events (DESIGN.md section 2) against incident labels, at incident level.

Why incident level: an operator acts on incidents, not on samples, so the
scores count how many labelled faults were found, how many pages were false,
how fast and how well the culprit metrics were named.

- A *predicted incident* is one distinct ``incident`` id that has at least one
  ``firing`` event: its entity, its onset (first firing ts) and its metrics
  (union over its firing events; each metric keeps its largest |shift_sigma|,
  ranked by that, descending, ties by name). ``resolved`` / ``adapted`` events
  do not change the score.
- Matching: a prediction matches a label with the same entity when its onset
  lies in ``[start - tolerance, end]``. Predictions are taken in onset order;
  each takes the earliest-starting label still free, so each label is matched
  at most once and each prediction at most once.
- precision = matched / predicted, recall = matched / labelled, F1 their
  harmonic mean. Conventions: no predictions -> precision 1.0 (nothing false
  was claimed); no labels -> recall 1.0 (nothing to miss); P + R = 0 -> F1 0.
  So a silent detector on the surge file (no labels) scores 1.0 / 1.0 / 1.0.
- localisation: for a matched label with k true metrics, the share of them
  among the top-k metrics of its prediction; mean over matches (None if none).
- delay: onset - start in seconds over matches (mean, max; None if none). It
  can be negative, down to -tolerance.
- false alerts per 10,000 vectors: unmatched predictions * 10000 / vectors.
  ``fragments`` counts the unmatched predictions whose onset lies inside an
  already matched label's window (a detector splitting one fault in two).

Bad input raises `EvaluationError` whose message is one line naming the file
and line (or the event index for events passed in directly).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import orjson

DEFAULT_TOLERANCE_SECONDS = 120.0  # onsets a few steps early still count: label edges are one step coarse
STATES = frozenset({"firing", "resolved", "adapted"})


class EvaluationError(Exception):
    """Unusable evaluation input; the message is one line naming the file and line."""


@dataclass(frozen=True)
class LabelledIncident:
    """One labelled fault: entity, window [start, end] (epoch s), the shifted metrics."""

    entity: str
    start: float
    end: float
    metrics: tuple[str, ...]
    shift_sigma: dict[str, float]
    kind: str


@dataclass(frozen=True)
class Labels:
    """The labels file of one replay input: scenario name, vector count, incidents."""

    scenario: str
    vectors: int
    incidents: tuple[LabelledIncident, ...]
    description: str = ""
    surges: tuple[tuple[float, float], ...] = ()   # benign traffic surges (start, end): no fault, no alert due


@dataclass(frozen=True)
class PredictedIncident:
    """One incident id from the events: entity, onset and (metric, max |shift_sigma|) ranked."""

    incident: str
    entity: str
    onset: float
    metrics: tuple[tuple[str, float], ...]


@dataclass(frozen=True)
class Match:
    """A labelled incident and the prediction that found it."""

    label: LabelledIncident
    predicted: PredictedIncident
    delay_seconds: float
    localisation: float


@dataclass(frozen=True)
class Evaluation:
    """Incident-level scores of one events stream against one labels file."""

    scenario: str
    vectors: int
    tolerance_seconds: float
    labelled: int
    predicted: tuple[PredictedIncident, ...]
    matches: tuple[Match, ...]
    missed: tuple[LabelledIncident, ...]
    false_alerts: tuple[PredictedIncident, ...]
    fragments: int
    precision: float
    recall: float
    f1: float
    localisation: float | None
    delay_mean_seconds: float | None
    delay_max_seconds: float | None
    false_alerts_per_10k: float

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready form (scores first, then the per-incident detail)."""
        return {
            "scenario": self.scenario, "vectors": self.vectors, "tolerance_seconds": self.tolerance_seconds,
            "labelled": self.labelled, "predicted": len(self.predicted), "matched": len(self.matches),
            "precision": self.precision, "recall": self.recall, "f1": self.f1,
            "localisation": self.localisation,
            "delay_mean_seconds": self.delay_mean_seconds, "delay_max_seconds": self.delay_max_seconds,
            "false_alerts": len(self.false_alerts), "false_alerts_per_10k_vectors": self.false_alerts_per_10k,
            "fragments": self.fragments,
            "matches": [{"entity": m.label.entity, "start": m.label.start, "end": m.label.end,
                         "true_metrics": list(m.label.metrics), "incident": m.predicted.incident,
                         "onset": m.predicted.onset, "delay_seconds": m.delay_seconds,
                         "localisation": m.localisation, "reported_metrics": _metrics_dict(m.predicted)}
                        for m in self.matches],
            "missed": [{"entity": lab.entity, "start": lab.start, "end": lab.end, "metrics": list(lab.metrics)}
                       for lab in self.missed],
            "false_alert_incidents": [{"incident": p.incident, "entity": p.entity, "onset": p.onset,
                                       "reported_metrics": _metrics_dict(p)} for p in self.false_alerts],
        }


def _metrics_dict(p: PredictedIncident) -> dict[str, float]:
    return {name: size for name, size in p.metrics}


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _event_problem(obj: Any) -> str | None:
    """Why `obj` is not a usable alert event, or None."""
    if not isinstance(obj, dict):
        return "not a JSON object"
    if not _is_number(obj.get("ts")):
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
        if not _is_number(item.get("shift_sigma")):
            return f"metric {item['name']!r}: 'shift_sigma' must be a finite number"
    return None


def _read(path: str | Path, what: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except OSError as exc:
        raise EvaluationError(f"{path}: cannot read {what}: {exc.strerror or exc}") from None


def load_events(path: str | Path) -> list[dict]:
    """Read alert events, one JSON object per line (blank lines skipped)."""
    events = []
    for number, line in enumerate(_read(path, "events").splitlines(), start=1):
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


def load_labels(path: str | Path) -> Labels:
    """Read a labels file (schema: shiftsieve.replay_data.generate) into `Labels`."""
    try:
        data = orjson.loads(_read(path, "labels"))
    except orjson.JSONDecodeError as exc:
        raise EvaluationError(f"{path}:{exc.lineno}: not valid JSON ({exc.msg})") from None
    if not isinstance(data, dict):
        raise EvaluationError(f"{path}: labels must be a JSON object")
    vectors = data.get("vectors")
    if not isinstance(vectors, int) or isinstance(vectors, bool) or vectors <= 0:
        raise EvaluationError(f"{path}: 'vectors' must be a positive integer")
    if not isinstance(data.get("incidents"), list):
        raise EvaluationError(f"{path}: 'incidents' must be a list")
    incidents = []
    for i, inc in enumerate(data["incidents"]):
        where = f"{path}: incident {i}"
        if not isinstance(inc, dict) or not isinstance(inc.get("entity"), str) or not inc["entity"]:
            raise EvaluationError(f"{where}: needs a non-empty 'entity'")
        if not (_is_number(inc.get("start")) and _is_number(inc.get("end")) and inc["start"] <= inc["end"]):
            raise EvaluationError(f"{where}: 'start' and 'end' must be numbers with start <= end")
        metrics = inc.get("metrics")
        if not isinstance(metrics, list) or not metrics or not all(isinstance(m, str) and m for m in metrics):
            raise EvaluationError(f"{where}: 'metrics' must be a non-empty list of names")
        shift = inc.get("shift_sigma", {})
        if not isinstance(shift, dict) or not all(_is_number(v) for v in shift.values()):
            raise EvaluationError(f"{where}: 'shift_sigma' must map names to numbers")
        incidents.append(LabelledIncident(inc["entity"], float(inc["start"]), float(inc["end"]),
                                          tuple(metrics), dict(shift), str(inc.get("kind", "step"))))
    surges = data.get("surges", [])
    if not isinstance(surges, list):
        raise EvaluationError(f"{path}: 'surges' must be a list")
    for i, surge in enumerate(surges):
        if not (isinstance(surge, dict) and _is_number(surge.get("start")) and _is_number(surge.get("end"))
                and surge["start"] <= surge["end"]):
            raise EvaluationError(f"{path}: surge {i}: 'start' and 'end' must be numbers with start <= end")
    return Labels(str(data.get("scenario", Path(path).name)), vectors, tuple(incidents),
                  str(data.get("description", "")),
                  tuple((float(s["start"]), float(s["end"])) for s in surges))


def predicted_incidents(events: Sequence[dict]) -> list[PredictedIncident]:
    """Group events by incident id into predictions, in onset order (ids without firing are dropped)."""
    entity: dict[str, str] = {}
    onset: dict[str, float] = {}
    sizes: dict[str, dict[str, float]] = {}
    for i, event in enumerate(events):
        problem = _event_problem(event)
        if problem:
            raise EvaluationError(f"event {i}: {problem}")
        key = event["incident"]
        if entity.setdefault(key, event["entity"]) != event["entity"]:
            raise EvaluationError(f"event {i}: incident {key!r} already belongs to entity {entity[key]!r}")
        if event["state"] != "firing":
            continue
        onset[key] = min(onset.get(key, math.inf), float(event["ts"]))
        seen = sizes.setdefault(key, {})
        for item in event.get("metrics", []):
            seen[item["name"]] = max(seen.get(item["name"], 0.0), abs(float(item["shift_sigma"])))
    found = [PredictedIncident(key, entity[key], onset[key],
                               tuple(sorted(sizes[key].items(), key=lambda kv: (-kv[1], kv[0]))))
             for key in onset]
    return sorted(found, key=lambda p: (p.onset, p.incident))


def evaluate(events: Sequence[dict], labels: Labels, *, vectors: int | None = None,
             tolerance_seconds: float = DEFAULT_TOLERANCE_SECONDS) -> Evaluation:
    """Match predicted incidents to labelled ones and compute the scores (module docstring)."""
    count = labels.vectors if vectors is None else vectors
    if count <= 0:
        raise EvaluationError(f"vectors must be positive, got {count}")
    if not tolerance_seconds >= 0:
        raise EvaluationError(f"tolerance_seconds must be >= 0, got {tolerance_seconds}")
    predicted = predicted_incidents(events)
    order = sorted(range(len(labels.incidents)), key=lambda i: (labels.incidents[i].start, i))
    free = set(order)
    matches: list[Match] = []
    unmatched: list[PredictedIncident] = []
    for p in predicted:
        hit = next((i for i in order if i in free and _covers(labels.incidents[i], p, tolerance_seconds)), None)
        if hit is None:
            unmatched.append(p)
            continue
        free.discard(hit)
        label = labels.incidents[hit]
        top = {name for name, _ in p.metrics[: len(label.metrics)]}
        matches.append(Match(label, p, p.onset - label.start, len(top & set(label.metrics)) / len(label.metrics)))
    found = [m.label for m in matches]
    fragments = sum(any(_covers(lab, p, tolerance_seconds) for lab in found) for p in unmatched)
    precision = len(matches) / len(predicted) if predicted else 1.0
    recall = len(matches) / len(labels.incidents) if labels.incidents else 1.0
    f1 = 2 * precision * recall / (precision + recall) if precision + recall else 0.0
    delays = [m.delay_seconds for m in matches]
    return Evaluation(
        scenario=labels.scenario, vectors=count, tolerance_seconds=float(tolerance_seconds),
        labelled=len(labels.incidents), predicted=tuple(predicted), matches=tuple(matches),
        missed=tuple(labels.incidents[i] for i in order if i in free), false_alerts=tuple(unmatched),
        fragments=fragments, precision=precision, recall=recall, f1=f1,
        localisation=sum(m.localisation for m in matches) / len(matches) if matches else None,
        delay_mean_seconds=sum(delays) / len(delays) if delays else None,
        delay_max_seconds=max(delays) if delays else None,
        false_alerts_per_10k=len(unmatched) * 10000 / count,
    )


def _covers(label: LabelledIncident, p: PredictedIncident, tolerance: float) -> bool:
    return p.entity == label.entity and label.start - tolerance <= p.onset <= label.end


def _num(value: float | None, digits: int = 3) -> str:
    return "n/a" if value is None else f"{value:.{digits}f}"


def format_table(evaluation: Evaluation) -> str:
    """Compact human-readable report of an `Evaluation`."""
    e = evaluation
    lines = [
        f"scenario {e.scenario}: {e.labelled} labelled, {len(e.predicted)} predicted, {len(e.matches)} matched"
        f" (tolerance {e.tolerance_seconds:g} s)",
        f"precision {_num(e.precision)}  recall {_num(e.recall)}  F1 {_num(e.f1)}  localisation {_num(e.localisation)}",
        f"delay mean {_num(e.delay_mean_seconds, 1)} s  max {_num(e.delay_max_seconds, 1)} s",
        f"false alerts {len(e.false_alerts)} = {e.false_alerts_per_10k:.2f} per 10k vectors"
        f" ({e.vectors} vectors, {e.fragments} fragments)",
    ]
    for m in e.matches:
        lines.append(f"  found  {m.label.entity}  start {m.label.start:.1f}  delay {m.delay_seconds:+.1f} s"
                     f"  loc {m.localisation:.2f}  {m.predicted.incident}  top {_top(m.predicted)}")
    for lab in e.missed:
        lines.append(f"  missed {lab.entity}  start {lab.start:.1f}  end {lab.end:.1f}  {','.join(lab.metrics)}")
    for p in e.false_alerts:
        lines.append(f"  false  {p.entity}  onset {p.onset:.1f}  {p.incident}  top {_top(p)}")
    return "\n".join(lines)


def _top(p: PredictedIncident, k: int = 3) -> str:
    return ",".join(f"{name}({size:.1f})" for name, size in p.metrics[:k]) or "-"
