"""``shiftsieve replay INPUT --events OUT --report DIR``: the replay feeding a collector, then the
optional scores, comparison and tuning, then the page; each step after the replay says on stderr
what it is doing (:mod:`.progress`), since together they take longer than the replay."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from .collector import ReportCollector
from .directory import ReportError, prepare_directory
from .page import ReportInputs, write_report
from .progress import Steps

if TYPE_CHECKING:
    from ..config import Config
    from ..decode import Vector
    from ..replay import ReplaySummary


def replay_with_report(path: str | Path, config: "Config", *, directory: str | Path, events_path: str | None,
                       dead_letter_path: str | None = None, labels_path: str | None = None,
                       budget_per_day: float | None = None, quiet_until: str | None = None,
                       progress: bool = True) -> tuple["ReplaySummary", Path]:
    """``shiftsieve replay INPUT --events OUT --report DIR [--labels L] [--budget B] [--quiet-until TS]``:
    the replay, then the page.  With labels: the labelled windows, the incident-level scores and
    the method comparison (:mod:`..evaluate`, on the vectors this replay read); with a budget: the recommended settings (:mod:`..tune`).
    Every argument is checked before the replay runs, so a mistake costs no waiting.  With
    ``progress``, each step after the replay writes what it is doing to stderr."""
    from ..evaluate import METHODS, compare_vectors, vector_timestamps
    from ..labels import load_labels
    from ..replay import replay
    from ..scoring import score_events
    from ..tune import TuneError, format_tuning, parse_time, toml_fragment, tune

    if quiet_until is not None and budget_per_day is None:
        raise ReportError("--quiet-until goes with --budget")
    out = prepare_directory(directory)
    labels = load_labels(labels_path) if labels_path else None
    try:
        quiet = parse_time(quiet_until) if quiet_until is not None else None
    except TuneError as exc:
        raise ReportError(str(exc)) from None
    collector = ReportCollector()
    steps = Steps(progress)
    events: list[dict] = []
    vectors: list[Vector] = []   # one read of the input serves the page and the comparison
    summary = replay(path, config, events_path=events_path, dead_letter_path=dead_letter_path,
                     sinks=[events.append], observers=[collector], progress=progress,
                     vector_sink=vectors.append if labels is not None else None)
    figures = summary.format().split("\n", 1)[0]   # the page says what the other lines say, its own way
    inputs = ReportInputs(title=f"Incident review: {Path(path).name}", events=events,
                          summary=f"{Path(path).name}: {figures}", labels=labels, coverage=summary.coverage,
                          still_open=summary.still_open)
    if labels is not None:
        timestamps = vector_timestamps(vectors)
        inputs.evaluation = score_events(events, labels, vectors=summary.vectors, timestamps=timestamps)
        inputs.comparison = []
        with steps.step(f"comparing {len(METHODS)} detection methods on the {summary.vectors:,} vectors",
                        total=len(METHODS)) as step:
            for done, name in enumerate(METHODS):   # one at a time, so the progress can say which
                step.item(name, vectors=done * summary.vectors)
                inputs.comparison += compare_vectors(vectors, config, labels, methods=[name],
                                                     shiftsieve_run=(events, summary.seconds))
        vectors.clear()
    if budget_per_day is not None:
        try:
            with steps.step(f"looking for settings within {budget_per_day:g} alerts per day "
                            "(a replay per setting tried)"):
                result = tune(path, config, budget_per_day=budget_per_day, quiet_until=quiet, labels=labels)
        except TuneError as exc:
            raise ReportError(str(exc)) from None
        inputs.tuning_text = format_tuning(result)
        if result.recommended is not None:
            inputs.tuning_toml = toml_fragment(result)
        else:
            inputs.missing.append(f"No setting tried keeps alerts within {budget_per_day:g} per day on the quiet "
                                  "period: there is no configuration fragment to recommend.")
    return summary, write_report(out, collector, inputs, steps)
