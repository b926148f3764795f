"""Alert events: the contract's JSON objects, built from the decision layer's transitions.

    {"ts": 1780000060.0, "entity": "checkout-3", "state": "firing", "incident": "checkout-3/1780000060",
     "metrics": [{"name": "lat_p99_ms", "shift_sigma": 6.2, "value": 240.0, "expected": 181.0}]}

A group column of the dictionary is reported as one entry named ``group:<label>`` (its
members in ``members``, ``value``/``expected`` null).  Extra fields: ``onset`` (firing:
true when the event opens the incident),
``started`` (onset time of the incident), ``duration_seconds`` (resolved and
adapted), and ``window_metrics``: joint localisation over the incident's window of
residuals so far (every event of an incident, for the closing one its whole window)::

    "window_metrics": {"group_lasso": [{"name": "lat_p99_ms", "score": 5.8}, ...],
                       "msbl": [{"name": "lat_p99_ms", "score": 6.1}, ...], "rows": 64}

``rows`` is the window's length in samples (from ``confirm_m - 1`` samples before the onset,
at most the first 120); each list holds the columns (names as in ``metrics``, groups as
``group:<label>``) whose row of the multiple-measurement-vector solution is non-zero, at most
10, ranked by ``score``, the row's root-mean-square over the window in residual sigmas: the
row-sparse group LASSO with the per-sample false-alarm target (chi quantile), and M-SBL, which
needs no threshold (its scores are posterior means, the LASSO's are shrunk).
"""

from __future__ import annotations

import math
import sys
from typing import TYPE_CHECKING, Iterator

import numpy as np
import orjson

from shiftsieve.models.decision import Transition
from shiftsieve.models.mmv import rank_rows

if TYPE_CHECKING:
    from shiftsieve.models.window import WindowLocalisation

    from .assemble import EntityModel


def incident_id(entity: str, onset_ts: float) -> str:
    """Stable incident id: the entity and the onset time in whole seconds."""
    return f"{entity}/{int(math.floor(onset_ts))}"


def _number(x: float, digits: int) -> float | None:
    if not math.isfinite(x):
        return None
    return float(f"{x:.{digits}g}")


def _metric_entry(stream: "EntityModel", names: list[str], column: int, shift: float, value: float,
                  expected: float) -> dict:
    entry = {"name": names[column], "shift_sigma": round(float(shift), 2),
             "value": _number(float(value), 6), "expected": _number(float(expected), 6)}
    n = len(stream.names)
    if column >= n:   # a group column: say which metrics it moved
        entry["members"] = [stream.names[j] for j in stream.detector.groups[column - n]]
    return entry


def window_metrics(localisation: "WindowLocalisation", names: list[str], top: int) -> dict:
    """The ``window_metrics`` field: both rankings (``top`` columns at most) named by ``names``
    (the dictionary's column names)."""
    rows = localisation.rows
    labels = [names[c] for c in localisation.columns]
    field = {method: [{"name": name, "score": _number(norm / math.sqrt(rows), 4)}
                      for name, norm in rank_rows(getattr(localisation, method), labels, top)]
             for method in ("group_lasso", "msbl")}
    field["rows"] = rows
    return field


def events_from_transitions(stream: "EntityModel", transitions: list[Transition], ts: np.ndarray,
                            windows: list[dict | None] | None = None) -> Iterator[dict]:
    """One event per transition, metrics ranked by |shift_sigma| (descending, then by name);
    ``windows``, when given, holds each transition's ``window_metrics`` (None: none)."""
    names = stream.column_names
    for i, t in enumerate(transitions):
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
        if windows is not None and windows[i] is not None:
            event["window_metrics"] = windows[i]
        yield event


def encode_event(event: dict) -> bytes:
    """One JSON line (with trailing newline), keys in a stable order."""
    return orjson.dumps(event) + b"\n"


class EventFileWriter:
    """Write alert events to a JSON-lines file, each flushed at once so the file can be followed
    (``tail -f``) and a crash loses none; a context manager.  ``append`` keeps what a previous
    run wrote (the service), otherwise the file is replaced (a replay); ``-`` is stdout."""

    def __init__(self, path: str, append: bool = False) -> None:
        self.path = path
        self._file = sys.stdout.buffer if path == "-" else open(path, "ab" if append else "wb")

    def __call__(self, event: dict) -> None:
        self._file.write(encode_event(event))
        self._file.flush()

    def close(self) -> None:
        if self.path != "-":
            self._file.close()

    def __enter__(self) -> "EventFileWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
