"""``shiftsieve tune``: the most sensitive settings that keep alerts within a budget on a quiet period.

Why: ``model.false_alarm`` and the k-of-m confirmation are probabilities and sample counts;
people think in pages per day. The tuner replays the input with a small grid of settings,
counts the incidents each opens during a stretch known to be quiet, and recommends the most
sensitive setting whose rate fits the budget; then it says what that setting found on the rest.

- **Quiet period**: vectors with ``ts < quiet_until``. Default: with labels that hold incidents,
  up to the first labelled start minus the evaluation tolerance (so that incident's whole
  matching window lies in the rest); otherwise the first half of the input's time span. Each
  entity's warm-up (``model.warmup`` vectors) lies inside it and cannot alert, so the rate is
  alerts / *scored* days: from the first vector any entity scores to ``quiet_until``. The rate
  is for the whole input (all entities), the way a pager sees it.
- **Alerts** are incidents opened (a distinct incident id with a ``firing`` event, see
  ``stream.evaluate.predicted_incidents``) with onset before ``quiet_until``; metrics joining
  an open incident are not new pages.
- **Search order**, most to least sensitive: ``false_alarm`` from high to low (a lower
  threshold finds smaller shifts), then for each the confirmations from short to long (a
  longer one costs only delay: k samples). The search stops at the first setting within the
  budget, which is therefore the most sensitive one that fits; ``candidates`` lists what was
  tried. When none fits, ``recommended`` is None and :func:`closest` names the one with the
  fewest alerts.
- **Cost**: every candidate is one full replay, which also gives the rest's incidents for
  free. The decision layer is not re-run alone on shared solver output: its state feeds back
  into the model (an adapted shift moves the normaliser; the assembler drops vanished metrics
  only while they are quiet), so a shortcut would not be the replay a user gets.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .config import Config
from .decode import DecodeError, parse_timestamp
from .labels import DEFAULT_TOLERANCE_SECONDS, Labels
from .scoring import Evaluation, format_table, predicted_incidents, score_events
from .lines import InputError, Rejected
from .reorder import taken_in_order
from .replay import open_input, replay
from .timefmt import rfc3339

#: The search grid, each axis from most to least sensitive (module docstring).
FALSE_ALARMS: tuple[float, ...] = (1e-3, 3e-4, 1e-4, 3e-5, 1e-5)
CONFIRMATIONS: tuple[tuple[int, int], ...] = ((2, 3), (3, 5), (4, 6), (5, 8))
SECONDS_PER_DAY = 86400.0
SOURCE = "shiftsieve tune"   # where the changed settings came from, as `config check` shows sources
EXIT_NOTHING_FITS = 1         # `shiftsieve tune` ran, but no setting tried fits the budget (2 = usage error)


class TuneError(ValueError):
    """Unusable tuning request (budget, quiet period); ``str()`` is one line."""


@dataclass(frozen=True)
class Candidate:
    """One setting tried and what it did on the quiet period."""

    false_alarm: float
    confirm_k: int
    confirm_m: int
    quiet_alerts: int
    quiet_alerts_per_day: float
    within_budget: bool


@dataclass(frozen=True)
class TuneResult:
    """The search, its recommendation and what the recommendation found after ``quiet_until``."""

    budget_per_day: float
    quiet_until: float
    quiet_days: float                     # scored days (after warm-up) before quiet_until
    candidates: tuple[Candidate, ...]     # everything tried, in search order
    recommended: Candidate | None         # None: nothing tried fits the budget (see closest())
    rest_incidents: int                   # incidents the recommended settings open after quiet_until
    rest: Evaluation | None               # scores on the rest when labels are given
    input: str = ""
    grid_size: int = 0                    # settings in the grid (the search may stop before its end)
    seconds: float = 0.0


@dataclass(frozen=True)
class _Span:
    """What one pass over the input says about time: every accepted ts and when scoring starts."""

    ts: np.ndarray                  # accepted vectors' timestamps
    scored_from: dict[str, float]   # entity -> ts of its first vector after warm-up


def parse_time(text: str) -> float:
    """Epoch seconds from ``1780027004`` or an RFC 3339 string; TuneError otherwise."""
    try:
        value = float(text)
    except ValueError:
        try:
            return parse_timestamp(text)
        except DecodeError as exc:
            reason = str(exc).removeprefix("'ts' ")   # the decoder names the message's field
            raise TuneError(f"--quiet-until: {reason}") from None
    if not math.isfinite(value):
        raise TuneError(f"--quiet-until: expected epoch seconds or an RFC 3339 time, got {text!r}")
    return value


def with_settings(config: Config, false_alarm: float, confirm_k: int, confirm_m: int) -> Config:
    """A copy of ``config`` with the three tuned settings replaced (their source says so)."""
    values = {(s.section, s.key): value for s, value, _ in config.items()}
    sources = dict(config.sources)
    for key, value in ((("model", "false_alarm"), false_alarm), (("decision", "confirm_k"), confirm_k),
                       (("decision", "confirm_m"), confirm_m)):
        values[key] = value
        sources[key] = SOURCE
    return Config(values, sources)


def _scan(path: Path, config: Config) -> _Span:
    """Timestamps the engine accepts (:func:`.reorder.taken_in_order`) and each entity's first scored ts."""
    warmup = config.model.warmup
    stamps: list[float] = []
    seen: dict[str, int] = {}
    scored_from: dict[str, float] = {}
    for record in taken_in_order(r for r in open_input(path, config) if not isinstance(r, Rejected)):
        stamps.append(record.ts)
        count = seen[record.entity] = seen.get(record.entity, 0) + 1
        if count == warmup + 1:
            scored_from[record.entity] = record.ts
    if not stamps:
        raise InputError(f"{path}: no valid vector in the input")
    return _Span(np.array(stamps), scored_from)


def _quiet_until(span: _Span, labels: Labels | None, quiet_until: float | None) -> float:
    first, last = float(span.ts.min()), float(span.ts.max())
    origin = "--quiet-until"
    if quiet_until is None:
        starts = [lab.start for lab in labels.incidents] if labels is not None else []
        origin = "the first labelled incident" if starts else "half of the input's span"
        quiet_until = min(starts) - DEFAULT_TOLERANCE_SECONDS if starts else first + (last - first) / 2
    if not first < quiet_until <= last:
        raise TuneError(f"quiet period end {rfc3339(quiet_until)} (from {origin}) lies outside the input "
                        f"({rfc3339(first)} to {rfc3339(last)})")
    if labels is not None:
        inside = [lab for lab in labels.incidents if lab.start - DEFAULT_TOLERANCE_SECONDS < quiet_until]
        if inside:
            raise TuneError(f"labelled incident on {inside[0].entity} at {rfc3339(inside[0].start)} lies in the "
                            f"quiet period; end it before {rfc3339(inside[0].start - DEFAULT_TOLERANCE_SECONDS)}")
    return quiet_until


def tune(path: str | Path, config: Config, *, budget_per_day: float, quiet_until: float | None = None,
         labels: Labels | None = None, false_alarms: tuple[float, ...] = FALSE_ALARMS,
         confirmations: tuple[tuple[int, int], ...] = CONFIRMATIONS) -> TuneResult:
    """Search the grid (module docstring) and report the recommendation on the rest of the input.

    Raises :class:`TuneError` for a bad budget or quiet period, ``InputError`` for an unusable
    input. The other settings of ``config`` are kept as they are.
    """
    started = time.perf_counter()
    if not (math.isfinite(budget_per_day) and budget_per_day >= 0):
        raise TuneError(f"--budget: expected a number of alerts per day >= 0, got {budget_per_day!r}")
    path = Path(path)
    span = _scan(path, config)
    until = _quiet_until(span, labels, quiet_until)
    scored = [ts for ts in span.scored_from.values() if ts < until]
    if not scored:
        raise TuneError(f"quiet period up to {rfc3339(until)} is too short: no entity is scored before it "
                        f"(model.warmup = {config.model.warmup} vectors per entity); choose a later "
                        f"--quiet-until or a shorter warm-up")
    quiet_days = (until - min(scored)) / SECONDS_PER_DAY
    grid = [(fa, k, m) for fa in false_alarms for k, m in confirmations]
    candidates: list[Candidate] = []
    rest_events: list[dict] = []
    for false_alarm, k, m in grid:
        events: list[dict] = []
        replay(path, with_settings(config, false_alarm, k, m), sinks=[events.append], progress=False)
        onsets = {p.incident: p.onset for p in predicted_incidents(events)}
        alerts = sum(onset < until for onset in onsets.values())
        rate = alerts / quiet_days
        candidates.append(Candidate(false_alarm, k, m, alerts, rate, rate <= budget_per_day))
        if rate <= budget_per_day:
            rest_events = [e for e in events if onsets.get(e["incident"], -math.inf) >= until]
            break
    recommended = candidates[-1] if candidates and candidates[-1].within_budget else None
    rest = None
    if labels is not None and recommended is not None:   # every label lies after the quiet period (checked)
        rest = score_events(rest_events, labels, vectors=int(np.count_nonzero(span.ts >= until)))
    return TuneResult(budget_per_day=float(budget_per_day), quiet_until=until, quiet_days=quiet_days,
                      candidates=tuple(candidates), recommended=recommended,
                      rest_incidents=len(predicted_incidents(rest_events)), rest=rest, input=str(path),
                      grid_size=len(grid), seconds=time.perf_counter() - started)


def closest(result: TuneResult) -> Candidate | None:
    """The candidate with the fewest quiet alerts (the most sensitive among equals)."""
    return min(result.candidates, key=lambda c: c.quiet_alerts, default=None)


def _printable(text: str) -> str:
    """Text safe inside a one-line TOML comment (control characters would end or break it)."""
    return "".join(c if c.isprintable() else "?" for c in text)


def _setting(c: Candidate) -> str:
    return f"false_alarm {c.false_alarm:g}, {c.confirm_k} of {c.confirm_m}"


def _quiet_text(result: TuneResult) -> str:
    return (f"quiet period up to {rfc3339(result.quiet_until)} "
            f"({result.quiet_days * 24:.2f} h scored after warm-up)")


def toml_fragment(result: TuneResult) -> str:
    """The recommended settings as TOML to merge into a config file, saying where they came from.

    Examples
    --------
    >>> import tomllib
    >>> pick = Candidate(1e-4, 3, 5, quiet_alerts=1, quiet_alerts_per_day=0.8, within_budget=True)
    >>> result = TuneResult(2.0, 1780043200.0, 1.25, (pick,), pick, 0, None, input="ferry.jsonl.gz")
    >>> text = toml_fragment(result)
    >>> print(text.splitlines()[0])
    # shiftsieve tune on ferry.jsonl.gz: quiet period up to 2026-05-29T08:26:40Z (30.00 h scored after warm-up),
    >>> tomllib.loads(text)
    {'model': {'false_alarm': 0.0001}, 'decision': {'confirm_k': 3, 'confirm_m': 5}}
    """
    c = result.recommended
    if c is None:
        raise TuneError(f"no setting tried keeps alerts within {result.budget_per_day:g} per day: nothing to write")
    return (f"# shiftsieve tune on {_printable(result.input)}: {_quiet_text(result)},\n"
            f"# budget {result.budget_per_day:g} alerts per day; measured {c.quiet_alerts} alerts "
            f"({c.quiet_alerts_per_day:.2f}/day) there with these settings.\n"
            f"# Merge into the [model] and [decision] tables of your config; other keys keep their values.\n"
            f"[model]\nfalse_alarm = {c.false_alarm!r}\n\n"
            f"[decision]\nconfirm_k = {c.confirm_k}\nconfirm_m = {c.confirm_m}\n")


def format_tuning(result: TuneResult) -> str:
    """The candidates as a table, the recommendation, and what it detected on the rest."""
    r = result
    lines = [f"tuning {_printable(r.input)}: {_quiet_text(r)}; one alert there is {1 / r.quiet_days:.2f}/day; "
             f"budget {r.budget_per_day:g}/day",
             f"tried {len(r.candidates)} of {r.grid_size} settings in {r.seconds:.1f} s "
             f"(most sensitive first: false_alarm high to low, then k of m short to long)",
             "",
             f"{'false_alarm':>11}  {'confirm':>7}  {'quiet alerts':>12}  {'per day':>8}  within budget"]
    for c in r.candidates:
        mark = "  <- recommended" if c is r.recommended else ""
        lines.append(f"{c.false_alarm:>11g}  {f'{c.confirm_k} of {c.confirm_m}':>7}  {c.quiet_alerts:>12d}  "
                     f"{c.quiet_alerts_per_day:>8.2f}  {'yes' if c.within_budget else 'no'}{mark}")
    lines.append("")
    if r.recommended is None:
        near = closest(r)
        lines.append(f"no setting tried keeps alerts within {r.budget_per_day:g}/day on the quiet period"
                     + (f"; closest: {_setting(near)} with {near.quiet_alerts} alerts "
                        f"({near.quiet_alerts_per_day:.2f}/day)" if near else ""))
        lines.append("look at what alerts there (shiftsieve replay --events), or choose a longer or quieter period")
        return "\n".join(lines)
    lines.append(f"recommended: {_setting(r.recommended)}: the most sensitive setting within the budget")
    lines.append(f"after {rfc3339(r.quiet_until)} it opens {r.rest_incidents} incident"
                 f"{'' if r.rest_incidents == 1 else 's'}")
    if r.rest is not None:
        lines.extend("  " + line for line in format_table(r.rest).splitlines())
    return "\n".join(lines)
