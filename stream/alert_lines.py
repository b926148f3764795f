"""Alert events as a person reads them at 3 a.m.: aligned lines, RFC 3339 times in UTC, values with
SI prefixes (``1.16 G``, as the report's figures label their axes), and each metric's change as a
difference and a percentage beside observed and expected.

Used by ``shiftsieve demo`` and by ``shiftsieve run`` on a terminal; the events file and a
non-terminal ``run`` keep the JSON contract (:mod:`.events`).
"""

from __future__ import annotations

import math
from typing import TextIO

from .timefmt import human_duration, rfc3339

#: Metrics shown per event; the JSON event has them all.
MAX_ROWS = 8

_PREFIXES = {-12: "p", -9: "n", -6: "\u00b5", -3: "m", 3: "k", 6: "M", 9: "G", 12: "T", 15: "P", 18: "E"}


def si(x: float | None, sign: bool = False) -> str:
    """``x`` to three significant digits with an SI prefix outside [0.01, 1000): ``1.16 G``,
    ``182``, ``0.41``, ``4.2 m``; ``-`` when missing or not finite.

    >>> si(1.16e9), si(182.0), si(0.41), si(-0.0042), si(12.5, sign=True), si(None)
    ('1.16 G', '182', '0.41', '-4.2 m', '+12.5', '-')
    """
    if x is None or not math.isfinite(x):
        return "-"
    plus = "+" if sign and x > 0 else ""
    magnitude = abs(x)
    if magnitude == 0 or 0.01 <= magnitude < 1000:
        return f"{plus}{x:.3g}"
    exponent = min(max(int(math.floor(math.log10(magnitude) / 3)) * 3, -12), 18)
    mantissa = x / 10.0 ** exponent
    if abs(float(f"{mantissa:.3g}")) >= 1000 and exponent < 18:   # 999.6 k rounds to 1.00 M
        exponent += 3
        mantissa = x / 10.0 ** exponent
    return f"{plus}{mantissa:.3g} {_PREFIXES[exponent]}"


def change(value: float | None, expected: float | None) -> str:
    """Observed minus expected, and as a percentage of expected: ``+59 (+32.6 %)``."""
    if value is None or expected is None or not (math.isfinite(value) and math.isfinite(expected)):
        return "-"
    diff = value - expected
    if expected == 0:
        return si(diff, sign=True)
    return f"{si(diff, sign=True)} ({100.0 * diff / abs(expected):+.1f} %)"


def format_event(event: dict, max_rows: int = MAX_ROWS) -> str:
    """A few aligned lines per event: what happened, where, and the metrics ranked by shift."""
    state = event["state"].upper()
    head = f"{rfc3339(event['ts'])}  {state:9s} {event['entity']}  incident {event['incident']}"
    if event["state"] == "firing":
        head += "  (new incident)" if event.get("onset") else "  (joins incident)"
    elif event["state"] == "resolved":
        head += f"  after {human_duration(event['duration_seconds'])}; peak shifts:"
    else:
        head += f"  after {human_duration(event['duration_seconds'])}: accepted as the new normal"
    shown = event["metrics"][:max_rows]
    width = max(28, *(len(m["name"]) for m in shown)) if shown else 28
    rows = [f"    {'metric':{width}s} {'shift':>9s} {'observed':>10s} {'expected':>10s}  change"]
    for m in shown:
        rows.append(f"    {m['name']:{width}s} {m['shift_sigma']:+8.1f}\u03c3 {si(m['value']):>10s} "
                    f"{si(m['expected']):>10s}  {change(m['value'], m['expected'])}")
    if len(event["metrics"]) > max_rows:
        rows.append(f"    ... and {len(event['metrics']) - max_rows} more")
    return "\n".join([head, *rows])


class ConsoleEvents:
    """An event sink that prints each event for a person (:func:`format_event`), flushed at once."""

    def __init__(self, stream: TextIO) -> None:
        self.stream = stream

    def __call__(self, event: dict) -> None:
        self.stream.write(format_event(event) + "\n\n")
        self.stream.flush()
