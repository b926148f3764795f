"""Compare shiftsieve with the detectors practitioners use, on the same input and labels.

``shiftsieve evaluate INPUT LABELS [--methods a,b]`` loads the replay input once,
runs each method on it, scores its alert events with :func:`.evaluate.evaluate`
and prints one table.  The methods (:mod:`shiftsieve.models.baselines`):

- ``shiftsieve``: the engine, exactly as ``shiftsieve replay`` runs it;
- ``ewma_zscore``: per-metric exponentially weighted z-score;
- ``halfspacetrees``: river's ``HalfSpaceTrees`` on whole vectors (incident level
  only: its events name no metric, localisation is n/a);
- ``pcp``: batch Principal Component Pursuit of each entity's whole matrix (offline).

All four use the configured warm-up, ``model.false_alarm``, ``model.log_metrics``
and decision layer (``[decision]``): the baselines' flags go through the same
:class:`~shiftsieve.models.decision.AlertTracker` and become alert events with
:mod:`.events`, so they are scored exactly like shiftsieve's.  ``vectors/s`` is
the wall clock of the method alone (model, decision, events), not of loading.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from shiftsieve.models.baselines import EWMAZScore, Flags, HalfSpaceTreesDetector, pcp_detect
from shiftsieve.models.decision import AlertTracker
from shiftsieve.models.normaliser import log_scaled, symexp

from .assemble import EntityStream
from .config import Config
from .decode import Vector
from .engine import Engine
from .evaluate import Evaluation, EvaluationError, Labels, evaluate
from .events import events_from_transitions
from .readers import InputError, Rejected
from .replay import open_input

METHODS = ("shiftsieve", "ewma_zscore", "halfspacetrees", "pcp")
LOCALISES = {"shiftsieve": True, "ewma_zscore": True, "halfspacetrees": False, "pcp": True}

#: Half-life of the EWMA z-score, in samples (30 min at the demo's 30 s step): short enough to
#: follow the demo's daily traffic swing, as a per-metric threshold must to be usable at all
#: (at shiftsieve's own normaliser half-life, 1440, the daily swing alone fires every metric).
EWMA_HALFLIFE = 60.0
#: Seed of the HalfSpaceTrees' random splits (replays must be reproducible).
HST_SEED = 42


@dataclass(frozen=True)
class MethodScore:
    """One row of the comparison: a method, its incident-level scores and its speed."""

    method: str            # "shiftsieve", "ewma_zscore", "halfspacetrees", "pcp"
    localises: bool
    evaluation: Evaluation
    vectors_per_second: float

    def to_dict(self) -> dict:
        return {"method": self.method, "localises": self.localises,
                "vectors_per_second": self.vectors_per_second, **self.evaluation.to_dict()}


@dataclass
class _Entity:
    stream: EntityStream   # names and the column -> name mapping used by the events
    X: np.ndarray          # (T, n) raw values, NaN = missing
    ts: np.ndarray
    log_mask: np.ndarray


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


def _load(path: str | Path, config: Config) -> list[Vector]:
    """The input's valid vectors in file order (undecodable lines are skipped, as replay does)."""
    with open_input(path, config) as records:
        vectors = [r for r in records if not isinstance(r, Rejected)]
    if not vectors:
        raise InputError(f"{path}: no valid vector in the input")
    return vectors


def _entities(vectors: list[Vector], engine: Engine) -> list[_Entity]:
    """Per entity, the dense matrix of its in-order vectors (later-or-equal ts are refused, as the engine does)."""
    by_entity: dict[str, list[Vector]] = {}
    for v in vectors:
        own = by_entity.setdefault(v.entity, [])
        if not own or v.ts > own[-1].ts:
            own.append(v)
    out = []
    for entity, own in by_entity.items():
        stream = EntityStream(entity, engine.rules, engine.detector_config)
        X, ts = stream.assemble(own)
        out.append(_Entity(stream, X, ts, engine.rules.log_scale(stream.names)))
    return out


def _model_scale(e: _Entity) -> np.ndarray:
    return log_scaled(e.X, e.log_mask)


def _events(e: _Entity, flags: Flags, start: int, config: Config, whole_vector: bool = False) -> list[dict]:
    """The decision layer and the event format for ``flags`` of rows ``start:`` (after warm-up)."""
    ts = e.ts[start:]
    if whole_vector:
        value = expected = np.full(flags.stat.shape, np.nan)
    else:
        value = e.X[start:]
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


def _after_warmup(flags: Flags, start: int) -> Flags:
    return Flags(flags.active[start:], flags.stat[start:], flags.expected[start:])


def _ewma(e: _Entity, config: Config) -> list[dict]:
    m = config.model
    W = min(m.warmup, e.X.shape[0])
    flags = EWMAZScore(e.X.shape[1], halflife=EWMA_HALFLIFE, false_alarm=m.false_alarm,
                       warmup=m.warmup).process(_model_scale(e))
    return _events(e, _after_warmup(flags, W), W, config)


def _hst(e: _Entity, config: Config) -> list[dict]:
    m = config.model
    W = min(m.warmup, e.X.shape[0])
    if W < 2:
        return []
    F = _model_scale(e)
    detector = HalfSpaceTreesDetector(F.shape[1], false_alarm=m.false_alarm, seed=HST_SEED).fit(F[:W])
    return _events(e, detector.process(F[W:]), W, config, whole_vector=True)


def _pcp(e: _Entity, config: Config) -> list[dict]:
    W = min(config.model.warmup, e.X.shape[0])
    if W < 2:
        return []
    found = pcp_detect(_model_scale(e), warmup=W, false_alarm=config.model.false_alarm)
    return _events(e, _after_warmup(found.flags, W), W, config)


_BASELINES = {"ewma_zscore": _ewma, "halfspacetrees": _hst, "pcp": _pcp}


def _shiftsieve(vectors: list[Vector], config: Config) -> list[dict]:
    events: list[dict] = []
    engine = Engine.from_config(config, sinks=[events.append])
    for vector in vectors:
        engine.feed(vector)
    engine.flush()
    return events


def compare_methods(path: str | Path, config: Config, labels: Labels, *,
                    methods: Sequence[str] | None = None) -> list[MethodScore]:
    """Run each method on the input at ``path``, score it against ``labels``; rows in ``methods`` order."""
    chosen = check_methods(list(METHODS if methods is None else methods))
    vectors = _load(path, config)
    entities = _entities(vectors, Engine.from_config(config)) if set(chosen) - {"shiftsieve"} else []
    count = sum(e.X.shape[0] for e in entities) if entities else len(vectors)
    rows = []
    for name in chosen:
        started = time.perf_counter()
        if name == "shiftsieve":
            events = _shiftsieve(vectors, config)
        else:
            events = [ev for e in entities for ev in _BASELINES[name](e, config)]
        seconds = time.perf_counter() - started
        rows.append(MethodScore(name, LOCALISES[name], evaluate(events, labels, vectors=count),
                                count / seconds if seconds > 0 else float("inf")))
    return rows


def format_comparison(rows: Sequence[MethodScore]) -> str:
    """The one table: F1, precision, recall, localisation, mean delay, false alerts per 10k, vectors/s."""
    head = ("method", "F1", "precision", "recall", "localisation", "delay mean s", "false/10k", "vectors/s")
    body = []
    for r in rows:
        e = r.evaluation
        loc = "n/a" if not r.localises or e.localisation is None else f"{e.localisation:.2f}"
        delay = "n/a" if e.delay_mean_seconds is None else f"{e.delay_mean_seconds:.0f}"
        body.append((r.method, f"{e.f1:.2f}", f"{e.precision:.2f}", f"{e.recall:.2f}", loc, delay,
                     f"{e.false_alerts_per_10k:.1f}", f"{r.vectors_per_second:,.0f}"))
    widths = [max(len(row[i]) for row in (head, *body)) for i in range(len(head))]
    scenario = rows[0].evaluation.scenario if rows else ""
    lines = [f"scenario {scenario}: {rows[0].evaluation.labelled} labelled incidents, "
             f"{rows[0].evaluation.vectors} vectors" if rows else "no methods"]
    for row in (head, *body):
        lines.append("  ".join(cell.ljust(w) if i == 0 else cell.rjust(w) for i, (cell, w) in enumerate(zip(row, widths))))
    return "\n".join(lines)
