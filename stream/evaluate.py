"""Compare shiftsieve with the detectors practitioners use, on the same input and labels.

``shiftsieve evaluate INPUT LABELS [--methods a,b]`` loads the replay input once,
runs each method on it, scores its alert events with :func:`.scoring.score_events`
and prints one table.  The methods (shiftsieve as the engine runs it; the others behind one
interface, :class:`shiftsieve.models.reference.ReferenceMethod`):

- ``shiftsieve``: the engine, exactly as ``shiftsieve replay`` runs it;
- ``ewma_zscore``: per-metric exponentially weighted z-score, Gaussian threshold;
- ``ewma_zscore_calibrated``: the same, each metric's threshold set on its own history;
- ``halfspacetrees``: river's ``HalfSpaceTrees`` on whole vectors (incident level
  only: its events name no metric, localisation and HitRate are n/a);
- ``pcp``: batch Principal Component Pursuit of each entity's whole matrix (offline),
  one threshold pooled over the warm-up;
- ``pcp_calibrated``: the same decomposition, each metric's threshold set on its own history.

All use the configured warm-up, ``model.false_alarm``, ``model.log_metrics`` and
decision layer (``[decision]``): the baselines' flags go through the same
:class:`~shiftsieve.models.decision.AlertTracker` and become alert events with
:mod:`.events`, so they are scored exactly like shiftsieve's.  An entity's
*history*, for the calibrated methods, is its vectors before the labels'
``scored_from`` (what a practitioner has before going live), or its warm-up when
that is longer or there is none.  ``seconds`` and ``vectors/s`` are the wall clock
of the method alone (model, decision, events), not of loading.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from shiftsieve.models.baselines import Flags
from shiftsieve.models.decision import AlertTracker
from shiftsieve.models.normaliser import log_scaled, symexp
from shiftsieve.models.reference import EWMAZScoreMethod, HalfSpaceTreesMethod, PCPMethod, ReferenceMethod

from .assemble import EntityModel
from .config import Config
from .coverage import NAMED, coverage_notes, timestamp_coverage
from .decode import Vector
from .engine import Engine
from .events import events_from_transitions
from .labels import EvaluationError, Labels
from .lines import InputError, Rejected
from .pipeline import Pipeline
from .reorder import taken_in_order
from .replay import open_input
from .scoring import Evaluation, score_events

METHODS = ("shiftsieve", "ewma_zscore", "ewma_zscore_calibrated", "halfspacetrees", "pcp", "pcp_calibrated")
#: Half-life of the EWMA z-score, in samples (30 min at the demo's 30 s step): short enough to
#: follow the demo's daily traffic swing, as a per-metric threshold must to be usable at all
#: (at shiftsieve's own normaliser half-life, 1440, the daily swing alone fires every metric).
EWMA_HALFLIFE = 60.0
#: Seed of the HalfSpaceTrees' random splits (replays must be reproducible).
HST_SEED = 42
#: The EWMA walks many entities' metrics side by side (one Python step per row for all of them);
#: entities are stacked in groups of at most this many matrix cells (~32 MB per float array).
STACK_CELLS = 1 << 22


@dataclass(frozen=True)
class MethodScore:
    """One row of the comparison: a method, its scores and its speed."""

    method: str            # one of METHODS
    localises: bool
    evaluation: Evaluation
    vectors_per_second: float
    seconds: float = 0.0   # wall clock of the method alone

    def to_dict(self) -> dict:
        return {"method": self.method, "localises": self.localises, "seconds": self.seconds,
                "vectors_per_second": self.vectors_per_second, **self.evaluation.to_dict()}


@dataclass
class _Entity:
    stream: EntityModel   # names and the column -> name mapping used by the events
    X: np.ndarray          # (T, n) raw values, NaN = missing
    ts: np.ndarray
    log_mask: np.ndarray
    warmup: int            # rows before the first scored one: min(model.warmup, T)
    history: int           # rows the calibrated methods calibrate on (module docstring)


@dataclass(frozen=True)
class _WholeVector:
    """What the events need of an entity for a detector with one whole-vector column."""

    entity: str
    names: tuple[str, ...] = ("anomaly_score",)

    @property
    def column_names(self) -> list[str]:
        return list(self.names)


def check_methods(names: Sequence[str]) -> list[str]:
    """The method names, checked and deduplicated; raises EvaluationError naming the unknown ones."""
    unknown = [name for name in names if name not in METHODS]
    if unknown or not names:
        raise EvaluationError(f"unknown method {', '.join(unknown) or '(none given)'}; "
                              f"choose from {', '.join(METHODS)}")
    return list(dict.fromkeys(names))


def parse_methods(text: str) -> list[str]:
    """``"a,b"`` (the ``--methods`` option) -> the checked method names."""
    return check_methods([name.strip() for name in text.split(",") if name.strip()])


def load_vectors(path: str | Path, config: Config) -> list[Vector]:
    """The input's valid vectors as replay feeds them (file order, each entity's disorder within
    source.allowed_lateness_seconds put back; undecodable lines are skipped)."""
    with open_input(path, config) as records:
        vectors = [r for r in records if not isinstance(r, Rejected)]
    if not vectors:
        raise InputError(f"{path}: no valid vector in the input")
    return vectors


def _in_order(vectors: list[Vector]) -> dict[str, list[Vector]]:
    """Per entity, the vectors the engine takes (:func:`.reorder.taken_in_order`), in order."""
    by_entity: dict[str, list[Vector]] = {}
    for v in taken_in_order(vectors):
        by_entity.setdefault(v.entity, []).append(v)
    return by_entity


def _timestamps(by_entity: dict[str, list[Vector]]) -> dict[str, np.ndarray]:
    return {entity: np.array([v.ts for v in own]) for entity, own in by_entity.items()}


def input_timestamps(path: str | Path, config: Config) -> dict[str, np.ndarray]:
    """Per entity, the increasing timestamps of the input's vectors (for scoring an events file)."""
    return vector_timestamps(load_vectors(path, config))


def vector_timestamps(vectors: list[Vector]) -> dict[str, np.ndarray]:
    """Per entity, the increasing timestamps of ``vectors`` (those the engine would accept)."""
    return _timestamps(_in_order(vectors))


def input_notes(timestamps: dict[str, np.ndarray], config: Config, labels: Labels) -> list[str]:
    """What a person must know before reading the scores: entities that never warmed up (every
    method scores nothing on them) and labelled entities that are not in the input."""
    notes = coverage_notes(timestamp_coverage(timestamps, config.model.warmup))
    absent = labels.missing_from(set(timestamps))
    if absent:
        shown = ", ".join(absent[:NAMED]) + (f" and {len(absent) - NAMED} more" if len(absent) > NAMED else "")
        notes.append(f"warning: the labels name {len(absent)} entit{'y' if len(absent) == 1 else 'ies'} not in the "
                     f"input ({shown}); their incidents can only be missed. Is it the right labels file, and do "
                     f"the entity names match (source.entity_labels)?")
    return notes


def _entities(by_entity: dict[str, list[Vector]], engine: Engine, config: Config, labels: Labels) -> list[_Entity]:
    """Per entity, the dense matrix of its vectors, its warm-up and its history (module docstring)."""
    out = []
    for entity, own in by_entity.items():
        stream = EntityModel(entity, engine.rules, engine.detector_config)
        X, ts = stream.assemble(own)
        warmup = min(config.model.warmup, X.shape[0])
        before = int(np.count_nonzero(ts < labels.scored_after(entity)))
        out.append(_Entity(stream, X, ts, engine.rules.log_scale(stream.names), warmup, max(warmup, before)))
    return out


def _model_scale(e: _Entity) -> np.ndarray:
    return log_scaled(e.X, e.log_mask)


def _after_warmup(e: _Entity, flags: Flags) -> Flags:
    return Flags(flags.active[e.warmup:], flags.stat[e.warmup:], flags.expected[e.warmup:])


def _events(e: _Entity, flags: Flags, config: Config, whole_vector: bool = False) -> list[dict]:
    """The decision layer and the event format for ``flags`` of the rows after the warm-up."""
    ts = e.ts[e.warmup:]
    if whole_vector:
        value = expected = np.full(flags.stat.shape, np.nan)
    else:
        value = e.X[e.warmup:]
        expected = np.array(flags.expected)
        expected[:, e.log_mask] = symexp(expected[:, e.log_mask])
    tracker = AlertTracker(flags.active.shape[1], config.detector_config().decision)
    transitions = tracker.step(flags.active, flags.stat, flags.stat, value, expected, ts)
    events = list(events_from_transitions(_WholeVector(e.stream.entity) if whole_vector else e.stream,
                                          transitions, ts))
    if whole_vector:   # it says that the vector is odd, not which metric: no metrics to rank
        for event in events:
            event["metrics"] = []
    return events


def _stacks(entities: list[_Entity]) -> list[list[_Entity]]:
    """Entities in groups whose stacked matrix (longest T x all their metrics) stays within STACK_CELLS."""
    groups: list[list[_Entity]] = []
    rows = cols = 0
    for e in sorted(entities, key=lambda e: e.X.shape[0]):
        T, n = e.X.shape
        if groups and max(rows, T) * (cols + n) <= STACK_CELLS:
            groups[-1].append(e)
            rows, cols = max(rows, T), cols + n
        else:
            groups.append([e])
            rows, cols = T, n
    return groups


def _detect(method: ReferenceMethod, entities: list[_Entity]) -> list[Flags]:
    """Run ``method`` once on the entities side by side (rows padded with NaN, i.e. missing) and
    split its flags back; a method that is not columnwise gets one entity at a time."""
    widths = [e.X.shape[1] for e in entities]
    edges = np.cumsum([0, *widths])
    F = np.full((max(e.X.shape[0] for e in entities), edges[-1]), np.nan)
    for e, lo, hi in zip(entities, edges[:-1], edges[1:]):
        F[: e.X.shape[0], lo:hi] = _model_scale(e)
    flags = method.detect(F, warmup=np.repeat([e.warmup for e in entities], widths),
                          history=np.repeat([e.history for e in entities], widths))
    if not method.columnwise:
        return [flags]
    return [Flags(*(a[: e.X.shape[0], lo:hi] for a in (flags.active, flags.stat, flags.expected)))
            for e, lo, hi in zip(entities, edges[:-1], edges[1:])]


def _reference_events(method: ReferenceMethod, entities: list[_Entity], config: Config) -> list[dict]:
    """A reference method's events over all entities, stacked when its columns are independent;
    a per-entity method skips entities with fewer than 2 warm-up rows."""
    groups = _stacks(entities) if method.columnwise else [[e] for e in entities if e.warmup >= 2]
    return [event for group in groups for e, flags in zip(group, _detect(method, group))
            for event in _events(e, _after_warmup(e, flags), config, whole_vector=not method.localises)]


def reference_methods(config: Config) -> dict[str, ReferenceMethod]:
    """The baselines by name, with the configured false-alarm target."""
    false_alarm = config.model.false_alarm
    return {"ewma_zscore": EWMAZScoreMethod(EWMA_HALFLIFE, false_alarm),
            "ewma_zscore_calibrated": EWMAZScoreMethod(EWMA_HALFLIFE, false_alarm, calibrated=True),
            "halfspacetrees": HalfSpaceTreesMethod(false_alarm, seed=HST_SEED),
            "pcp": PCPMethod(false_alarm),
            "pcp_calibrated": PCPMethod(false_alarm, calibrated=True)}


def _shiftsieve(vectors: list[Vector], config: Config) -> list[dict]:
    """shiftsieve's events on vectors already read: the pipeline replay runs, without the reading."""
    events: list[dict] = []
    engine = Engine.from_config(config, sinks=[events.append])
    Pipeline(engine, config).feed(vectors, 0)
    engine.flush()
    return events


def compare_methods(path: str | Path, config: Config, labels: Labels, *,
                    methods: Sequence[str] | None = None) -> list[MethodScore]:
    """Run each method on the input at ``path``, score it against ``labels``; rows in ``methods`` order."""
    return compare_vectors(load_vectors(path, config), config, labels, methods=methods)


def compare_vectors(vectors: list[Vector], config: Config, labels: Labels, *, methods: Sequence[str] | None = None,
                    shiftsieve_run: tuple[list[dict], float] | None = None) -> list[MethodScore]:
    """:func:`compare_methods` on vectors already read; ``shiftsieve_run`` is the engine's events on
    them and its seconds when a replay already produced them (the report: one read, one run)."""
    chosen = check_methods(list(METHODS if methods is None else methods))
    by_entity = _in_order(vectors)
    timestamps = _timestamps(by_entity)
    count = sum(ts.size for ts in timestamps.values())
    entities = _entities(by_entity, Engine.from_config(config), config, labels) \
        if set(chosen) - {"shiftsieve"} else []
    references = reference_methods(config)
    rows = []
    for name in chosen:
        started = time.perf_counter()
        if name == "shiftsieve" and shiftsieve_run is not None:
            events, seconds = shiftsieve_run
        else:
            events = _shiftsieve(vectors, config) if name == "shiftsieve" else \
                _reference_events(references[name], entities, config)
            seconds = time.perf_counter() - started
        localises = name == "shiftsieve" or references[name].localises
        rows.append(MethodScore(name, localises,
                                score_events(events, labels, vectors=count, timestamps=timestamps),
                                count / seconds if seconds > 0 else float("inf"), seconds))
    return rows


def _cell(value: float | None, digits: int = 2) -> str:
    return "n/a" if value is None else f"{value:.{digits}f}"


def _hit_cell(e: Evaluation, ranking: str, localises: bool) -> str:
    h = e.hit_rate.get(ranking)
    return "n/a" if h is None or not localises else f"{h.at_100:.2f}/{h.at_150:.2f}"


def format_comparison(rows: Sequence[MethodScore]) -> str:
    """The one table (F1, precision, recall, false alerts per entity-day, repeats, median delay,
    HitRate on each ranking, point-adjusted F1, time) and a legend.  Localisation is not a column:
    it is HitRate@100% of the metrics ranking (the JSON keeps it)."""
    head = ("method", "F1", "prec", "recall", "false/day", "repeat", "delay s (steps)",
            "HR metrics", "HR msbl", "HR gLASSO", "PA-F1*", "seconds", "vectors/s")
    body = []
    for r in rows:
        e = r.evaluation
        delay = "n/a" if e.delay_median_seconds is None else f"{e.delay_median_seconds:.0f}" + (
            "" if e.delay_median_steps is None else f" ({e.delay_median_steps:.1f})")
        body.append((r.method, f"{e.f1:.2f}", f"{e.precision:.2f}", f"{e.recall:.2f}",
                     _cell(e.false_alerts_per_entity_day), str(len(e.repeats)), delay,
                     _hit_cell(e, "metrics", r.localises), _hit_cell(e, "msbl", r.localises),
                     _hit_cell(e, "group_lasso", r.localises),
                     _cell(None if e.point_adjusted is None else e.point_adjusted.f1),
                     f"{r.seconds:.1f}", f"{r.vectors_per_second:,.0f}"))
    if not rows:
        return "no methods"
    widths = [max(len(row[i]) for row in (head, *body)) for i in range(len(head))]
    e = rows[0].evaluation
    days = "" if e.scored_entity_days is None else f", {e.scored_entity_days:.1f} scored entity-days"
    lines = [f"scenario {e.scenario}: {e.labelled} labelled incidents, {e.vectors} vectors{days}, "
             f"onsets up to {e.tolerance_seconds:g} s early count"]
    for row in (head, *body):
        lines.append("  ".join(cell.ljust(w) if i == 0 else cell.rjust(w)
                               for i, (cell, w) in enumerate(zip(row, widths))))
    lines += ["false/day: false alerts per scored entity-day; repeat: further onsets inside an already detected",
              "  label (neither true nor false alerts); delay: median onset - start; HR: HitRate@100%/@150% (Su et al. 2019) on",
              "  the incident's metrics by peak |shift| and on its joint-window rankings (M-SBL, group LASSO);",
              "  PA-F1*: point-adjusted F1 (Xu et al. 2018), the published papers' convention -- it inflates",
              "  scores; compare it only with published figures."]
    return "\n".join(lines)
