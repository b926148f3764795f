"""The report's HTML tables: the incidents, an incident's metrics, the metrics that moved together,
the scores against the labels and the method comparison, and the plain :func:`html_table` the page
uses too.  Numbers as people read them: times in RFC 3339 (UTC), values with SI prefixes
(:func:`..alert_lines.si`, as the figures' value axes), a change as a difference and a percentage,
every score with its unit in the column heading."""

from __future__ import annotations

import math
from html import escape
from typing import Any, Callable, Iterable, Sequence

from ..alert_lines import change, si
from ..scoring import Evaluation
from ..timefmt import human_duration, rfc3339
from .summary import IncidentSummary

#: How an incident ended, for people; "unclosed": no closing event although the data went on
#: (its entity's model was reset or dropped), unlike "open" (still firing when the data ended).
END_STATES = {"open": "still open at the end of the data", "resolved": "resolved",
              "adapted": "accepted as the new normal (adapted)",
              "unclosed": "never closed (its entity's model was reset or dropped)"}


def format_number(x: Any, fmt: str = ",.4g") -> str:
    """``x`` formatted with ``fmt``; a dash for None, NaN and infinities."""
    return "\u2013" if x is None or (isinstance(x, float) and not math.isfinite(x)) else format(x, fmt)


def percent(x: float | None) -> str:
    """A share in [0, 1] as a percentage (``83 %``); a dash when there is none."""
    return "\u2013" if x is None or not math.isfinite(x) else f"{100.0 * x:.0f}\u00a0%"


def _dash(text: str) -> str:
    """The tables' dash for what :mod:`..alert_lines` writes as ``-`` (missing)."""
    return "\u2013" if text == "-" else text


def end_state(state: str) -> str:
    """An incident's end state as HTML, marked when its end is not known."""
    text = escape(END_STATES.get(state, state))
    return f'<b class="open">{text}</b>' if state in ("open", "unclosed") else text


def incidents_table(incidents: Sequence[IncidentSummary], anchor: Callable[[str], str]) -> str:
    """One line per incident, linked to its section (``anchor`` of its id)."""
    return html_table(["incident", "entity", "onset (UTC)", "duration", "end", "top metrics"],
                      [[f'<a href="#{anchor(i.incident)}">{escape(i.incident)}</a>', escape(i.entity),
                        rfc3339(i.start), human_duration(i.duration) + ("+" if i.state in ("open", "unclosed")
                                                                         else ""),
                        end_state(i.state), escape(", ".join(m["name"] for m in i.metrics[:3]))]
                       for i in incidents])


def html_table(head: Sequence[str], rows: Iterable[Sequence[str]], numeric: Sequence[int] = ()) -> str:
    """An HTML table; cells are already-escaped HTML, ``numeric`` columns right-aligned."""
    out = ["<table><tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>"]
    for row in rows:
        out.append("<tr>" + "".join(f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>"
                                    for i, c in enumerate(row)) + "</tr>")
    return "\n".join(out) + "</table>"


def metric_table(inc: IncidentSummary, labelled: set[str]) -> str:
    """An incident's metrics ranked by peak |shift|, with the events' observed and expected values,
    the change between them (and, when some metrics are labelled, which)."""
    rows = []
    for rank, m in enumerate(inc.metrics, 1):
        members = f" <small>({escape(', '.join(m['members']))})</small>" if m.get("members") else ""
        name = escape(m["name"]) + members
        value, expected = m.get("value"), m.get("expected")
        rows.append([str(rank), f'<span class="name">{name}</span>', f"{m['shift_sigma']:+.2f}",
                     _dash(si(value)), _dash(si(expected)), _dash(change(value, expected)),
                     "\u2713" if m["name"] in labelled else ""])
    head = ["#", "metric", "shift (residual \u03c3)", "observed", "expected", "change (observed \u2212 expected)"] \
        + (["labelled"] if labelled else [])
    return html_table(head, [r[: len(head)] for r in rows], numeric=(0, 2, 3, 4, 5))


#: The joint fits of ``window_metrics`` (:mod:`..events`): key, the page's plain name, the method.
WINDOW_FITS = (("group_lasso", "penalised fit",
                "the group LASSO (Yuan &amp; Lin 2006), row-sparse over the window with the per-sample "
                "false-alarm threshold; its scores are shrunk towards zero"),
               ("msbl", "Bayesian fit",
                "M-SBL (Wipf &amp; Rao 2007), sparse Bayesian learning with no threshold to choose; its "
                "scores are posterior means"))
SUPERSCRIPTS = "\u00b9\u00b2"


def window_table(window: dict) -> str:
    """The metrics that moved together over an incident (the closing event's ``window_metrics``),
    as ranked by each joint fit, the methods named in a footnote; empty when it has none."""
    fits = [(key, name, method, SUPERSCRIPTS[i]) for i, (key, name, method) in enumerate(WINDOW_FITS)
            if window.get(key)]
    if not fits:
        return ""
    depth = max(len(window[key]) for key, *_ in fits)
    rows = []
    for i in range(depth):
        row = [str(i + 1)]
        for key, *_ in fits:
            item = window[key][i] if i < len(window[key]) else None
            row += [f'<span class="name">{escape(str(item["name"]))}</span>',
                    format_number(item.get("score"), ".3g")] if item else ["", ""]
        rows.append(row)
    head = ["#"] + [h for _, name, _, mark in fits for h in (f"metric ({name}{mark})", "RMS shift (residual \u03c3)")]
    samples = f"{int(window['rows'])} samples" if isinstance(window.get("rows"), (int, float)) else "samples"
    notes = "; ".join(f"{mark} {name}: {method}" for _, name, method, mark in fits)
    return ("<h4>Metrics that moved together over the incident</h4>"
            f"<p>Fitted jointly over the incident's first {samples} (from just before its onset): the metrics "
            "whose shifts explain the whole window, ranked by the root mean square of their fitted shift.</p>"
            + html_table(head, rows, numeric=tuple(range(2, len(head), 2)))
            + f'<p class="footnote">{notes}.</p>')


def _delay(seconds: float | None) -> str:
    return "\u2013" if seconds is None else f"{seconds:+.0f} s"


def _false_rate(ev: Evaluation) -> str:
    """False alerts per scored entity-day (per 10k vectors when the days are unknown)."""
    if ev.false_alerts_per_entity_day is not None:
        return f"{ev.false_alerts_per_entity_day:.2f} per entity-day"
    return f"{ev.false_alerts_per_10k:.2f} per 10k vectors"


def evaluation_html(ev: Evaluation) -> str:
    """Incident-level scores against the labels, then each match, miss and false alert."""
    scores = html_table(["labelled", "alerted", "matched", "precision", "recall", "F1", "localisation",
                         "mean delay", "max delay", "false alerts", "false-alert rate"],
                        [[str(ev.labelled), str(len(ev.predicted)), str(len(ev.matches)), percent(ev.precision),
                          percent(ev.recall), percent(ev.f1), percent(ev.localisation), _delay(ev.delay_mean_seconds),
                          _delay(ev.delay_max_seconds), str(len(ev.false_alerts)), _false_rate(ev)]],
                        numeric=tuple(range(11)))
    rows = [["found", escape(m.label.entity), rfc3339(m.label.start), escape(m.predicted.incident),
             _delay(m.delay_seconds), percent(m.localisation)] for m in ev.matches]
    rows += [["<b>missed</b>", escape(lab.entity), rfc3339(lab.start), "\u2013", "\u2013",
              escape(", ".join(lab.metrics))] for lab in ev.missed]
    rows += [["false alert", escape(p.entity), rfc3339(p.onset), escape(p.incident), "\u2013", "\u2013"]
             for p in ev.false_alerts]
    detail = html_table(["", "entity", "start / onset (UTC)", "incident", "delay", "localisation / labelled metrics"],
                        rows) if rows else ""
    return (f"<p>Scored at incident level against the labels (onsets up to {ev.tolerance_seconds:g} s before a "
            f"labelled start count; delay: onset minus labelled start; localisation: the share of the labelled "
            f"metrics among the top-k reported).</p>{scores}{detail}")


#: What each compared method is, for the comparison's footnote (:mod:`..evaluate`).
METHOD_NOTES = {
    "shiftsieve": "this detector",
    "ewma_zscore": "a per-metric z-score against an exponentially weighted mean",
    "ewma_zscore_calibrated": "the same, its threshold calibrated on the history",
    "halfspacetrees": "Half-Space Trees (Tan et al. 2011) on whole vectors",
    "pcp": "principal component pursuit (Cand\u00e8s et al. 2011), robust PCA",
    "pcp_calibrated": "the same, its threshold calibrated on the history",
}


def comparison_html(rows: Sequence[Any]) -> str:
    """One line per method: ``rows`` are :func:`..evaluate.compare_vectors`' ``MethodScore`` rows."""
    body = [[escape(str(r.method)), "yes" if r.localises else "no", percent(r.evaluation.precision),
             percent(r.evaluation.recall), percent(r.evaluation.f1),
             percent(r.evaluation.localisation) if r.localises else "\u2013",
             _delay(r.evaluation.delay_mean_seconds), _false_rate(r.evaluation), f"{r.seconds:,.1f} s",
             f"{r.vectors_per_second:,.0f}"] for r in rows]
    notes = "; ".join(f"<code>{escape(str(r.method))}</code>: {METHOD_NOTES[r.method]}" for r in rows
                      if r.method in METHOD_NOTES)
    return ("<p>The same input and labels through each method (incident-level scores). shiftsieve's time is "
            "the replay's own, reading the input and collecting this page included; the others' count their "
            "model alone.</p>"
            + html_table(["method", "names metrics", "precision", "recall", "F1", "localisation", "mean delay",
                          "false-alert rate", "time", "vectors per second"], body, numeric=tuple(range(2, 10)))
            + (f'<p class="footnote">{notes}.</p>' if notes else ""))
