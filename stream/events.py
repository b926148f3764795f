"""Alert events: the contract's JSON objects, built from the decision layer's transitions.

    {"ts": 1780000060.0, "entity": "checkout-3", "state": "firing", "incident": "checkout-3/1780000060",
     "metrics": [{"name": "lat_p99_ms", "shift_sigma": 6.2, "value": 240.0, "expected": 181.0}]}

A group column of the dictionary is reported as one entry named ``group:<label>`` (its
members in ``members``, ``value``/``expected`` null).  Extra fields: ``onset`` (firing:
true when the event opens the incident),
``started`` (onset time of the incident), ``duration_seconds`` (resolved and
adapted).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Iterator

import numpy as np
import orjson

from shiftsieve.models.decision import Transition

if TYPE_CHECKING:
    from .assemble import EntityStream


def incident_id(entity: str, onset_ts: float) -> str:
    """Stable incident id: the entity and the onset time in whole seconds."""
    return f"{entity}/{int(math.floor(onset_ts))}"


def _number(x: float, digits: int) -> float | None:
    if not math.isfinite(x):
        return None
    return float(f"{x:.{digits}g}")


def _metric_entry(stream: "EntityStream", names: list[str], column: int, shift: float, value: float,
                  expected: float) -> dict:
    entry = {"name": names[column], "shift_sigma": round(float(shift), 2),
             "value": _number(float(value), 6), "expected": _number(float(expected), 6)}
    n = len(stream.names)
    if column >= n:   # a group column: say which metrics it moved
        entry["members"] = [stream.names[j] for j in stream.detector.groups[column - n]]
    return entry


def events_from_transitions(stream: "EntityStream", transitions: list[Transition],
                            ts: np.ndarray) -> Iterator[dict]:
    """One event per transition, metrics ranked by |shift_sigma| (descending, then by name)."""
    names = stream.column_names
    for t in transitions:
        order = sorted(range(t.metrics.size), key=lambda i: (-abs(float(t.shift[i])), names[t.metrics[i]]))
        event = {
            "ts": float(ts[t.row]),
            "entity": stream.entity,
            "state": t.kind,
            "incident": incident_id(stream.entity, t.onset_ts),
            "metrics": [_metric_entry(stream, names, int(t.metrics[i]), t.shift[i], t.value[i], t.expected[i])
                        for i in order],
            "started": t.onset_ts,
        }
        if t.kind == "firing":
            event["onset"] = t.onset
        else:
            event["duration_seconds"] = round(float(ts[t.row]) - t.onset_ts, 3)
        yield event


def encode_event(event: dict) -> bytes:
    """One JSON line (with trailing newline), keys in a stable order."""
    return orjson.dumps(event) + b"\n"


class EventFileWriter:
    """Write alert events to a JSON-lines file, each flushed at once so the file can be followed
    (``tail -f``) and a crash loses none; a context manager.  ``append`` keeps what a previous
    run wrote (the service), otherwise the file is replaced (a replay)."""

    def __init__(self, path: str, append: bool = False) -> None:
        self.path = path
        self._file = open(path, "ab" if append else "wb")

    def __call__(self, event: dict) -> None:
        self._file.write(encode_event(event))
        self._file.flush()

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> "EventFileWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
