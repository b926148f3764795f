"""Prometheus range-query JSON (``/api/v1/query_range``, ``resultType: matrix``) -> replay records.

A team exports an incident window from its TSDB and replays it as it is::

    {"status": "success", "data": {"resultType": "matrix", "result": [
        {"metric": {"__name__": "berth_queue_depth", "service": "booking-api", "instance": "bh-app-01"},
         "values": [[1780000000, "12"], [1780000030, "NaN"]]}]}}

Rules (the same as for live samples, `samples.SampleAssembler`, so an entity and its metric
names are the same whichever way its data arrived):

- entity = the values of `entity_labels` (config ``source.entity_labels``) joined with "/";
  the vector's `labels` are those labels. A series without one of them is rejected
  ("no_entity"); when no series has them all, the input is unusable (InputError naming
  the labels it has), since the configuration, not the data, is wrong.
- metric name = ``__name__`` plus the other labels in Prometheus series notation
  (`samples.series_name`), which `assemble.metric_labels` reads back. A series without
  ``__name__`` (the result of an expression such as ``rate(x[5m])``) is named
  `UNNAMED` (``value``) plus its other labels: one response holds one query, so its
  unnamed series differ by their labels.
- one vector per (entity, timestamp), holding the series of that entity with a point
  there (absent series are simply not in it), names sorted; vectors in time order, then
  by entity. Range queries align timestamps to the step, so an entity is a (time x series)
  grid, built with numpy.
- a value is a string as the API sends it (a JSON number is accepted too). "NaN", "+Inf",
  "-Inf" become missing and are listed in `Vector.invalid` as "non_finite"; beyond
  ``max_abs_value`` "out_of_range"; any other text "not_a_number" (decode.py's rule; numeric
  text is the API's encoding here, so "numeric_string" never applies).

Whole-document problems raise `InputError` at once: not JSON, not a response object, an
error response (``status: error`` with ``errorType``/``error``), a `resultType` other than
matrix, an empty result. Everything else is per item, as a `Rejected` whose `line` is the
1-based position of the series in ``data.result`` (`REASONS`): a malformed series loses
itself, a malformed point (not a ``[ts, value]`` pair, a timestamp that is not a number,
outside the accepted window, or repeated within its series) loses only itself.
Rejections come first, in document order, then the vectors.

Conservation: every point of the document is a value (or an `invalid` entry) of exactly
one vector, or covered by exactly one `Rejected` (a rejected series covers all its points).

>>> doc = (b'{"status":"success","data":{"resultType":"matrix","result":['
...        b'{"metric":{"__name__":"up","job":"ferry","instance":"bh-app-01"},'
...        b'"values":[[1780000000,"1"],[1780000030,"NaN"]]}]}}')
>>> [record for _, record in query_range_records("x.json", doc, entity_labels=["instance"])]
... # doctest: +NORMALIZE_WHITESPACE
[Vector(ts=1780000000.0, entity='bh-app-01', metrics={'up{job="ferry"}': 1.0}, labels={'instance': 'bh-app-01'},
        invalid=()),
 Vector(ts=1780000030.0, entity='bh-app-01', metrics={'up{job="ferry"}': None}, labels={'instance': 'bh-app-01'},
        invalid=(('up{job="ferry"}', 'non_finite'),))]
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson

from .decode import DEFAULT_LIMITS, DecodeError, DecodeLimits, Vector, check_labels, layout_of
from .lines import DEFAULT_RAW_CAP, InputError, Rejected
from .samples import check_name, series_identity
from .values import is_number, kind_of, show

__all__ = ["DEFAULT_ENTITY_LABELS", "REASONS", "UNNAMED", "query_range_records"]

DEFAULT_ENTITY_LABELS = ("service", "instance")  # config source.entity_labels' default
UNNAMED = "value"  # base name of a series without __name__

#: Reasons a series or a point of a range-query response is rejected (Rejected.reason).
REASONS = frozenset({
    "bad_series", "bad_labels", "no_name", "bad_name", "no_entity", "bad_entity", "label_collision",
    "duplicate_series", "too_many_metrics",                          # a whole series
    "bad_point", "bad_ts", "ts_out_of_range", "duplicate_ts",        # one point
})

# Per-value codes of a parsed point; 0 is a usable value, the others are Vector.invalid reasons.
_OK, _NON_FINITE, _NOT_A_NUMBER, _OUT_OF_RANGE = 0, 1, 2, 3
_INVALID = {_NON_FINITE: "non_finite", _NOT_A_NUMBER: "not_a_number", _OUT_OF_RANGE: "out_of_range"}
_MAX_MESSAGE = 200  # characters of a Prometheus error message quoted in an InputError
_VECTORS_HINT = " (a file of vector messages, one per line, is named .jsonl)"


@dataclass(frozen=True, slots=True)
class _Series:
    line: int              # 1-based position in data.result
    entity: str
    labels: dict[str, str]  # the entity labels
    name: str
    ts: np.ndarray         # (k,) float, unique
    values: np.ndarray     # (k,) float, NaN where code != _OK
    codes: np.ndarray      # (k,) int8


def query_range_records(name: str, data: bytes, limits: DecodeLimits = DEFAULT_LIMITS, *,
                        entity_labels: Sequence[str] = DEFAULT_ENTITY_LABELS,
                        raw_cap: int = DEFAULT_RAW_CAP) -> Iterator[tuple[int, Vector | Rejected]]:
    """(line, record) of a range-query response `data`; InputError (naming `name`) if unusable as a whole.

    The document is parsed and checked now; the records are produced as they are iterated.
    """
    if isinstance(entity_labels, str) or not entity_labels or not all(isinstance(k, str) and k for k in entity_labels):
        raise ValueError(f"entity_labels must be a non-empty list of label names, got {entity_labels!r}")
    result = _matrix(name, data)
    keys = tuple(entity_labels)
    rejected: list[Rejected] = []
    series: list[_Series] = []
    seen: dict[tuple[str, str], int] = {}   # (entity, name) -> line of its series
    per_entity: dict[str, int] = {}
    for line, item in enumerate(result, 1):
        try:
            found = _series(line, item, keys, limits, rejected, raw_cap)
        except DecodeError as exc:
            rejected.append(_rejected(line, exc.reason, f"series {line}: {exc}", item, raw_cap))
            continue
        key = (found.entity, found.name)
        if key in seen:
            rejected.append(_rejected(line, "duplicate_series", f"series {line}: {found.name!r} of entity "
                                      f"{found.entity!r} repeats series {seen[key]}", item, raw_cap))
        elif per_entity.get(found.entity, 0) >= limits.max_metrics:
            rejected.append(_rejected(line, "too_many_metrics", f"series {line}: entity {found.entity!r} already "
                                      f"has {limits.max_metrics:,} series (max_metrics)", item, raw_cap))
        else:
            seen[key] = line
            per_entity[found.entity] = per_entity.get(found.entity, 0) + 1
            series.append(found)
    if not series and rejected and all(r.reason == "no_entity" for r in rejected):
        raise InputError(f"{name}: no series carries all the entity labels (source.entity_labels); "
                         f"{rejected[0].detail}")
    return _records(rejected, series)


def _matrix(name: str, data: bytes) -> list:
    """The ``data.result`` list of a successful matrix response; InputError otherwise."""
    try:
        doc = orjson.loads(data)
    except orjson.JSONDecodeError as exc:
        try:  # the stdlib also reads integers beyond 64 bits; anything else it refuses too
            doc = json.loads(data)
        except (ValueError, RecursionError):
            raise InputError(f"{name}: not valid JSON: {exc.msg} (at byte {exc.pos}); expected a Prometheus "
                             f"query_range response{_VECTORS_HINT}") from None
    if not isinstance(doc, dict) or "status" not in doc:
        raise InputError(f"{name}: not a Prometheus query_range response (expected an object with "
                         f"\"status\" and \"data\", got {kind_of(doc)}){_VECTORS_HINT}")
    if doc["status"] == "error":
        message = " ".join(str(doc.get("error", "")).split())
        message = message if len(message) <= _MAX_MESSAGE else message[:_MAX_MESSAGE] + "..."
        raise InputError(f"{name}: the Prometheus API returned an error: {doc.get('errorType', 'unknown')}: "
                         f"{message or 'no message'}")
    if doc["status"] != "success":
        raise InputError(f"{name}: response status is {show(doc['status'])}, expected \"success\"")
    body = doc.get("data")
    if not isinstance(body, dict):
        raise InputError(f"{name}: response \"data\" must be an object, not {kind_of(body)}")
    kind = body.get("resultType")
    if kind != "matrix":
        raise InputError(f"{name}: resultType is {show(kind)}, expected \"matrix\" (export with "
                         f"/api/v1/query_range, not /api/v1/query)")
    result = body.get("result")
    if not isinstance(result, list):
        raise InputError(f"{name}: response \"data.result\" must be an array, not {kind_of(result)}")
    if not result:
        raise InputError(f"{name}: the range query returned no series (data.result is empty)")
    return result


def _series(line: int, item: Any, keys: tuple[str, ...], limits: DecodeLimits, rejected: list[Rejected],
            raw_cap: int) -> _Series:
    """One series of the result; its bad points go to `rejected`; DecodeError if the series is unusable."""
    if not isinstance(item, dict):
        raise DecodeError("bad_series", f"must be an object with \"metric\" and \"values\", not {kind_of(item)}")
    values = item.get("values")
    if not isinstance(values, list):
        raise DecodeError("bad_series", f"\"values\" must be an array of [ts, \"value\"] pairs, not {kind_of(values)}")
    labels = check_labels(item.get("metric"))
    base = check_name(labels.pop("__name__", None) or UNNAMED, limits)
    entity, metric = series_identity(base, labels, keys, limits)
    ts, x, codes, bad = _points(values, limits)
    where = f"series {line} ({metric!r} of {entity!r})"
    for position, reason, detail in bad:
        rejected.append(_rejected(line, reason, f"{where}, point {position + 1}: {detail}",
                                  {"metric": item.get("metric"), "values": [values[position]]}, raw_cap))
    return _Series(line, entity, {k: labels[k] for k in keys}, metric, ts, x, codes)


_Bad = list[tuple[int, str, str]]   # (position in "values", reason, detail) of rejected points
_Parsed = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, _Bad]   # positions, ts, values, codes, bad


def _points(values: list, limits: DecodeLimits) -> tuple[np.ndarray, np.ndarray, np.ndarray, _Bad]:
    """Timestamps, values and value codes of the usable points, and (position, reason, detail) of the others."""
    parsed = _fast_points(values)
    if parsed is None:
        parsed = _slow_points(values)
    positions, ts, x, codes, bad = parsed
    outside = ~((ts >= limits.min_ts) & (ts <= limits.max_ts))
    if outside.any():
        bad += [(int(p), "ts_out_of_range", f"ts {t!r} is outside the accepted window")
                for p, t in zip(positions[outside], ts[outside].tolist())]
        keep = ~outside
        positions, ts, x, codes = positions[keep], ts[keep], x[keep], codes[keep]
    _, first = np.unique(ts, return_index=True)
    if len(first) < len(ts):   # Prometheus never repeats a timestamp in a series; the first one stays
        repeated = np.setdiff1d(np.arange(len(ts)), first)
        bad += [(int(p), "duplicate_ts", f"ts {t!r} repeats an earlier point of the series")
                for p, t in zip(positions[repeated], ts[repeated].tolist())]
        positions, ts, x, codes = positions[first], ts[first], x[first], codes[first]
    magnitude = np.abs(x)
    codes = np.where(codes != _OK, codes,
                     np.where(np.isnan(magnitude) | np.isinf(magnitude), _NON_FINITE,
                              np.where(magnitude > limits.max_abs_value, _OUT_OF_RANGE, _OK))).astype(np.int8)
    x = np.where(codes == _OK, x, np.nan)
    bad.sort()
    return ts, x, codes, bad


def _fast_points(values: list) -> _Parsed | None:
    """Every point a [number, string] pair: one numpy conversion per column; None to take the slow path."""
    try:
        grid = np.array(values, dtype=object)
        if grid.ndim != 2 or grid.shape[1] != 2:
            return None
        if not set(map(type, grid[:, 0].tolist())) <= {int, float} or not set(map(type, grid[:, 1].tolist())) <= {str}:
            return None
        ts, x = grid[:, 0].astype(float), grid[:, 1].astype(float)
    except (ValueError, TypeError, OverflowError):
        return None
    n = len(values)
    return np.arange(n), ts, x, np.zeros(n, np.int8), []


def _slow_points(values: list) -> _Parsed:
    """Point by point, naming what is wrong with each bad one (only for series the fast path refused)."""
    positions, stamps, xs, codes, bad = [], [], [], [], []
    for position, point in enumerate(values):
        if not isinstance(point, list) or len(point) != 2:
            bad.append((position, "bad_point", f"must be a [ts, \"value\"] pair, not {show(point)}"))
            continue
        ts, value = point
        if not is_number(ts) or not math.isfinite(stamp := _float(ts)):
            bad.append((position, "bad_ts", f"ts must be a number of seconds, not {show(ts)}"))
            continue
        number = _float(value) if isinstance(value, str) or is_number(value) else math.nan
        positions.append(position)
        stamps.append(stamp)
        xs.append(number)
        codes.append(_NOT_A_NUMBER if number != number and not (isinstance(value, str) and _is_nan(value))
                     else _OK)
    return (np.array(positions, dtype=np.intp), np.array(stamps, dtype=float), np.array(xs, dtype=float),
            np.array(codes, dtype=np.int8), bad)


def _float(value: Any) -> float:
    """float(value), NaN for text that is not a number, inf for an integer beyond double range."""
    try:
        return float(value)
    except ValueError:
        return math.nan
    except OverflowError:
        return math.inf


def _is_nan(text: str) -> bool:
    return text.strip().lower() in ("nan", "+nan", "-nan")


def _records(rejected: list[Rejected], series: list[_Series]) -> Iterator[tuple[int, Vector | Rejected]]:
    """The rejections, then one vector per (entity, timestamp) in time order (then entity)."""
    for item in rejected:
        yield item.line, item
    grids = _grids(series)
    if not grids:
        return
    stamps = np.concatenate([g.ts for g in grids])
    owner = np.concatenate([np.full(len(g.ts), i) for i, g in enumerate(grids)])
    row = np.concatenate([np.arange(len(g.ts)) for g in grids])
    rank = np.argsort([g.entity for g in grids], kind="stable").argsort()
    for k in np.lexsort((rank[owner], stamps)).tolist():
        grid = grids[owner[k]]
        yield grid.line, grid.vector(int(row[k]))


@dataclass(frozen=True, slots=True)
class _Grid:
    """One entity as (time x series): values (NaN when absent or invalid) and codes (-1 absent)."""

    line: int
    entity: str
    labels: dict[str, str]
    names: list[str]
    ts: np.ndarray       # (T,)
    values: np.ndarray   # (T, S)
    codes: np.ndarray    # (T, S) int8

    def vector(self, r: int) -> Vector:
        codes = self.codes[r]
        ts = float(self.ts[r])
        if not codes.any():   # every series present and valid: the shared layout, no per-metric work
            values = self.values[r].copy()
            layout, _ = layout_of(tuple(self.names))
            return Vector(ts, self.entity, dict(zip(self.names, values.tolist())), dict(self.labels), (),
                          layout, values)
        present = np.flatnonzero(codes >= 0)
        names = [self.names[c] for c in present.tolist()]
        metrics: dict[str, float | None] = dict(zip(names, self.values[r, present].tolist()))
        invalid = tuple((self.names[c], _INVALID[int(codes[c])]) for c in np.flatnonzero(codes > 0).tolist())
        for metric, _ in invalid:
            metrics[metric] = None
        return Vector(ts, self.entity, metrics, dict(self.labels), invalid)


def _grids(series: list[_Series]) -> list[_Grid]:
    by_entity: dict[str, list[_Series]] = {}
    for s in series:
        by_entity.setdefault(s.entity, []).append(s)
    grids = []
    for entity, members in by_entity.items():
        members.sort(key=lambda s: s.name)
        stamps = np.concatenate([s.ts for s in members])
        column = np.concatenate([np.full(len(s.ts), c) for c, s in enumerate(members)])
        ts, row = np.unique(stamps, return_inverse=True)
        values = np.full((len(ts), len(members)), np.nan)
        codes = np.full((len(ts), len(members)), -1, dtype=np.int8)
        values[row, column] = np.concatenate([s.values for s in members])
        codes[row, column] = np.concatenate([s.codes for s in members])
        grids.append(_Grid(min(s.line for s in members), entity, members[0].labels,
                           [s.name for s in members], ts, values, codes))
    return grids


def _rejected(line: int, reason: str, detail: str, item: Any, raw_cap: int) -> Rejected:
    """A Rejected whose raw is the item as JSON (a series, or a one-point series), capped at raw_cap."""
    try:
        raw = orjson.dumps(item)
    except (TypeError, orjson.JSONEncodeError):   # integers beyond 64 bits, lone surrogates (stdlib parse)
        raw = json.dumps(item, default=repr).encode("ascii")
    truncated = len(raw) > raw_cap
    return Rejected(line, reason, detail, raw[:raw_cap], truncated)
