"""The report's HTML tables: an incident's metrics, the joint-window rankings, the scores against
the labels and the method comparison, and the plain :func:`html_table` the page uses too."""

from __future__ import annotations

import math
from html import escape
from typing import Any, Iterable, Sequence

import numpy as np

from ..timefmt import rfc3339
from ..scoring import Evaluation
from .summary import IncidentSummary


def format_number(x: Any, fmt: str = ",.4g") -> str:
    """``x`` formatted with ``fmt``; a dash for None, NaN and infinities."""
    return "\u2013" if x is None or (isinstance(x, float) and not math.isfinite(x)) else format(x, fmt)


def _exact(x: float | None) -> str:
    """An event's value as the events file has it (already rounded to 6 significant digits), no exponent."""
    return "\u2013" if x is None else np.format_float_positional(float(x), trim="-")


def html_table(head: Sequence[str], rows: Iterable[Sequence[str]], numeric: Sequence[int] = ()) -> str:
    """An HTML table; cells are already-escaped HTML, ``numeric`` columns right-aligned."""
    out = ["<table><tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>"]
    for row in rows:
        out.append("<tr>" + "".join(f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>"
                                    for i, c in enumerate(row)) + "</tr>")
    return "\n".join(out) + "</table>"


def metric_table(inc: IncidentSummary, labelled: set[str]) -> str:
    """An incident's metrics ranked by peak |shift|, with the events' observed and expected values
    (and, when some metrics are labelled, which)."""
    rows = []
    for rank, m in enumerate(inc.metrics, 1):
        members = f" <small>({escape(', '.join(m['members']))})</small>" if m.get("members") else ""
        name = escape(m["name"]) + members
        rows.append([str(rank), f'<span class="name">{name}</span>', f"{m['shift_sigma']:+.2f}",
                     _exact(m.get("value")), _exact(m.get("expected")), "\u2713" if m["name"] in labelled else ""])
    head = ["#", "metric", "shift (\u03c3)", "observed", "expected"] + (["labelled"] if labelled else [])
    return html_table(head, [r[: len(head)] for r in rows], numeric=(0, 2, 3, 4))


def window_table(window: dict) -> str:
    """The joint-window rankings of a closing event (group LASSO, M-SBL); empty when it has none."""
    methods = [(key, title) for key, title in (("group_lasso", "group LASSO"), ("msbl", "M-SBL")) if window.get(key)]
    if not methods:
        return ""
    depth = max(len(window[key]) for key, _ in methods)
    rows = []
    for i in range(depth):
        row = [str(i + 1)]
        for key, _ in methods:
            item = window[key][i] if i < len(window[key]) else None
            row += [f'<span class="name">{escape(str(item["name"]))}</span>',
                    format_number(item.get("score"), ".3g")] if item else ["", ""]
        rows.append(row)
    head = ["#"] + [h for _, title in methods for h in (escape(title), "score")]
    rows_note = f" over {int(window['rows'])} rows" if isinstance(window.get("rows"), (int, float)) else ""
    return (f"<p>Metrics that moved together over the whole incident window{rows_note} "
            f"(joint-window rankings):</p>" + html_table(head, rows, numeric=tuple(range(2, len(head), 2))))


def evaluation_html(ev: Evaluation) -> str:
    """Incident-level scores against the labels, then each match, miss and false alert."""
    scores = html_table(["labelled", "alerted", "matched", "precision", "recall", "F1", "localisation",
                         "mean delay", "max delay", "false alerts", "per 10k vectors"],
                        [[str(ev.labelled), str(len(ev.predicted)), str(len(ev.matches)), f"{ev.precision:.2f}",
                          f"{ev.recall:.2f}", f"{ev.f1:.2f}", format_number(ev.localisation, ".2f"),
                          "\u2013" if ev.delay_mean_seconds is None else f"{ev.delay_mean_seconds:+.0f} s",
                          "\u2013" if ev.delay_max_seconds is None else f"{ev.delay_max_seconds:+.0f} s",
                          str(len(ev.false_alerts)), f"{ev.false_alerts_per_10k:.2f}"]],
                        numeric=tuple(range(11)))
    rows = [["found", escape(m.label.entity), rfc3339(m.label.start), escape(m.predicted.incident),
             f"{m.delay_seconds:+.0f} s", f"{m.localisation:.2f}"] for m in ev.matches]
    rows += [["<b>missed</b>", escape(lab.entity), rfc3339(lab.start), "\u2013", "\u2013",
              escape(", ".join(lab.metrics))] for lab in ev.missed]
    rows += [["false alert", escape(p.entity), rfc3339(p.onset), escape(p.incident), "\u2013", "\u2013"]
             for p in ev.false_alerts]
    detail = html_table(["", "entity", "start / onset", "incident", "delay", "localisation / labelled metrics"],
                        rows) if rows else ""
    return (f"<p>Scored at incident level against the labels (onsets up to {ev.tolerance_seconds:g} s before a "
            f"labelled start count; localisation is the share of the labelled metrics among the top-k "
            f"reported).</p>{scores}{detail}")


def comparison_html(rows: Sequence[Any]) -> str:
    """One line per method: ``rows`` are :func:`..evaluate.compare_vectors`' ``MethodScore`` rows."""
    body = [[escape(str(r.method)), "yes" if r.localises else "no", f"{r.evaluation.precision:.2f}",
             f"{r.evaluation.recall:.2f}", f"{r.evaluation.f1:.2f}",
             format_number(r.evaluation.localisation, ".2f") if r.localises else "\u2013",
             "\u2013" if r.evaluation.delay_mean_seconds is None else f"{r.evaluation.delay_mean_seconds:+.0f} s",
             f"{r.evaluation.false_alerts_per_10k:.2f}", f"{r.vectors_per_second:,.0f}"] for r in rows]
    return ("<p>The same input and labels through each method (incident-level scores). shiftsieve's "
            "vectors/s is the replay's own, reading the input and collecting this page included; the "
            "others' count their model alone.</p>"
            + html_table(["method", "names metrics", "precision", "recall", "F1", "localisation", "mean delay",
                          "false alerts / 10k", "vectors/s"], body, numeric=tuple(range(2, 9))))
