"""``shiftsieve demo``: replay a bundled incident and print its alerts for a person to read."""

from __future__ import annotations

import sys
from importlib import resources
from pathlib import Path
from typing import TextIO

from .alert_lines import format_event
from .config import Config
from .labels import load_labels
from .scoring import format_table, score_events
from .lines import InputError
from .replay import replay

LABELS_SUFFIX = ".labels.json"

DEFAULT_SCENARIO = "single_shift"   # what `shiftsieve demo` and `shiftsieve produce` use by default


def _bundle() -> Path:
    return Path(str(resources.files("shiftsieve.replay_data")))


def scenarios() -> dict[str, Path]:
    """Bundled incident name -> data file."""
    found = {}
    for labels in sorted(_bundle().glob(f"*{LABELS_SUFFIX}")):
        name = labels.name[: -len(LABELS_SUFFIX)]
        data = labels.with_name(f"{name}.jsonl.gz")
        if data.exists():
            found[name] = data
    return found


def list_scenarios() -> str:
    lines = []
    for name, data in scenarios().items():
        labels = load_labels(data.with_name(f"{name}{LABELS_SUFFIX}"))
        lines.append(f"{name:14s} {labels.description}")
    return "\n".join(lines)


def run_demo(name: str, config: Config, *, events_path: str | None = None, out: TextIO | None = None) -> int:
    """Replay the bundled incident ``name``, print every alert, then the score against its labels."""
    out = sys.stdout if out is None else out
    available = scenarios()
    if name not in available:
        raise InputError(f"no bundled incident named {name!r}; available: {', '.join(available)}")
    data = available[name]
    labels = load_labels(data.with_name(f"{name}{LABELS_SUFFIX}"))
    events: list[dict] = []
    summary = replay(data, config, events_path=events_path, sinks=[events.append], progress=False)
    print(f"shiftsieve demo: {name} \u2014 {labels.description}", file=out)
    print(f"replayed {summary.format()}\n", file=out)
    if not events:
        print("no alerts.\n", file=out)
    for event in sorted(events, key=lambda e: e["ts"]):   # entities are processed batch by batch
        print(format_event(event) + "\n", file=out)
    print("Against the labelled truth:", file=out)
    print(format_table(score_events(events, labels, vectors=summary.vectors)), file=out)
    print("\nAlerts inform on-call engineers; they do not replace their judgement.", file=out)
    return 0
