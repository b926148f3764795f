"""Incident labels: what a replay input should have raised, and how its alerts are scored.

Labels (:func:`load_labels`): the format of ``replay_data/*.labels.json``
(schema in ``shiftsieve.replay_data.generate``) with three optional keys:
``step_seconds`` (the input's sampling step), ``tolerance_steps`` (the match
tolerance in steps, needs ``step_seconds``; without it the tolerance is
``DEFAULT_TOLERANCE_SECONDS``) and ``scored_from`` ({entity: epoch seconds}).

Bad input raises `EvaluationError` whose message is one line naming the file
and line (or the event index for events passed in directly).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import orjson

__all__ = ["DEFAULT_TOLERANCE_SECONDS", "EvaluationError", "LabelledIncident", "Labels", "finite_number",
           "load_labels", "read_input"]

DEFAULT_TOLERANCE_SECONDS = 120.0  # onsets a few steps early still count: label edges are one step coarse


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
    """The labels file of one replay input: scenario name, vector count, incidents, how to score them."""

    scenario: str
    vectors: int
    incidents: tuple[LabelledIncident, ...]
    description: str = ""
    surges: tuple[tuple[float, float], ...] = ()   # benign traffic surges (start, end): no fault, no alert due
    step_seconds: float | None = None             # the input's sampling step
    tolerance_steps: int | None = None            # None: DEFAULT_TOLERANCE_SECONDS
    scored_from: Mapping[str, float] = field(default_factory=dict)   # entity -> first scored ts

    @property
    def tolerance_seconds(self) -> float:
        """How early an onset may come and still detect a label."""
        if self.tolerance_steps is None or self.step_seconds is None:
            return DEFAULT_TOLERANCE_SECONDS
        return self.tolerance_steps * self.step_seconds

    def missing_from(self, entities: set[str]) -> list[str]:
        """Entities the labels name (incidents, ``scored_from``) that are not in ``entities``: a
        mismatched file or entity naming, since their incidents can only be missed."""
        named = {lab.entity for lab in self.incidents} | set(self.scored_from)
        return sorted(named - entities)

    def scored_after(self, entity: str) -> float:
        """The entity's first scored ts (-inf: scored throughout)."""
        return self.scored_from.get(entity, -math.inf)


def finite_number(value: Any) -> bool:
    """A finite JSON number (not a boolean)."""
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def read_input(path: str | Path, what: str) -> bytes:
    """The bytes of an evaluation input file; EvaluationError naming it when it cannot be read."""
    try:
        return Path(path).read_bytes()
    except OSError as exc:
        raise EvaluationError(f"{path}: cannot read {what}: {exc.strerror or exc}") from None


def _scoring_keys(path: str | Path, data: dict) -> tuple[float | None, int | None, dict[str, float]]:
    """The optional ``step_seconds``, ``tolerance_steps`` and ``scored_from`` of a labels file, checked."""
    step = data.get("step_seconds")
    if step is not None and not (finite_number(step) and step > 0):
        raise EvaluationError(f"{path}: 'step_seconds' must be a positive number of seconds")
    steps = data.get("tolerance_steps")
    if steps is not None:
        if not isinstance(steps, int) or isinstance(steps, bool) or steps < 0:
            raise EvaluationError(f"{path}: 'tolerance_steps' must be an integer >= 0")
        if step is None:
            raise EvaluationError(f"{path}: 'tolerance_steps' needs 'step_seconds'")
    scored_from = data.get("scored_from", {})
    if not isinstance(scored_from, dict):
        raise EvaluationError(f"{path}: 'scored_from' must map entities to epoch seconds")
    for entity, ts in scored_from.items():
        if not entity or not finite_number(ts):
            raise EvaluationError(f"{path}: scored_from {entity!r}: must be a finite number of epoch seconds")
    return (None if step is None else float(step), steps,
            {entity: float(ts) for entity, ts in scored_from.items()})


def load_labels(path: str | Path) -> Labels:
    """Read a labels file (module docstring) into `Labels`."""
    try:
        data = orjson.loads(read_input(path, "labels"))
    except orjson.JSONDecodeError as exc:
        raise EvaluationError(f"{path}:{exc.lineno}: not valid JSON ({exc.msg})") from None
    if not isinstance(data, dict):
        raise EvaluationError(f"{path}: labels must be a JSON object")
    vectors = data.get("vectors")
    if not isinstance(vectors, int) or isinstance(vectors, bool) or vectors <= 0:
        raise EvaluationError(f"{path}: 'vectors' must be a positive integer")
    if not isinstance(data.get("incidents"), list):
        raise EvaluationError(f"{path}: 'incidents' must be a list")
    step, tolerance_steps, scored_from = _scoring_keys(path, data)
    incidents = []
    for i, inc in enumerate(data["incidents"]):
        where = f"{path}: incident {i}"
        if not isinstance(inc, dict) or not isinstance(inc.get("entity"), str) or not inc["entity"]:
            raise EvaluationError(f"{where}: needs a non-empty 'entity'")
        if not (finite_number(inc.get("start")) and finite_number(inc.get("end")) and inc["start"] <= inc["end"]):
            raise EvaluationError(f"{where}: 'start' and 'end' must be numbers with start <= end")
        metrics = inc.get("metrics")
        if not isinstance(metrics, list) or not metrics or not all(isinstance(m, str) and m for m in metrics):
            raise EvaluationError(f"{where}: 'metrics' must be a non-empty list of names")
        shift = inc.get("shift_sigma", {})
        if not isinstance(shift, dict) or not all(finite_number(v) for v in shift.values()):
            raise EvaluationError(f"{where}: 'shift_sigma' must map names to numbers")
        if inc["end"] < scored_from.get(inc["entity"], -math.inf):
            raise EvaluationError(f"{where}: ends before scored_from of {inc['entity']!r}, so it can never "
                                  f"be found")
        incidents.append(LabelledIncident(inc["entity"], float(inc["start"]), float(inc["end"]),
                                          tuple(metrics), dict(shift), str(inc.get("kind", "step"))))
    surges = data.get("surges", [])
    if not isinstance(surges, list):
        raise EvaluationError(f"{path}: 'surges' must be a list")
    for i, surge in enumerate(surges):
        if not (isinstance(surge, dict) and finite_number(surge.get("start")) and finite_number(surge.get("end"))
                and surge["start"] <= surge["end"]):
            raise EvaluationError(f"{path}: surge {i}: 'start' and 'end' must be numbers with start <= end")
    return Labels(str(data.get("scenario", Path(path).name)), vectors, tuple(incidents),
                  str(data.get("description", "")),
                  tuple((float(s["start"]), float(s["end"])) for s in surges),
                  step_seconds=step, tolerance_steps=tolerance_steps, scored_from=scored_from)
