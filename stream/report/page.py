"""The report's page, ``index.html``: self-contained (inline CSS, no scripts, no external assets),
its PNG figures beside it.  Lays out, per entity shown, the figures (:mod:`.figures`) and the
tables (:mod:`.tables`) of the summaries (:mod:`.summary`) of a :class:`.ReportCollector`.

In the order the person on call needs it: what was not scored (:mod:`.scored`), what moved (the
incidents, then each entity's figures and incidents), what was scored per entity, then the scores
against the labels, the comparison of methods and the recommended settings."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from html import escape
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..coverage import EntityCoverage, OpenIncident
from ..labels import Labels
from ..scoring import Evaluation
from ..timefmt import human_duration, rfc3339
from .collector import EntityTrace, ReportCollector
from .directory import MARKER, prepare_directory
from .figures import draw_heatmap, draw_traces, short_name
from .progress import Steps
from .scored import coverage_table, coverage_warning, open_note
from .summary import (EntityView, IncidentSummary, choose_metrics, entity_view, incidents_from_events, mark_unclosed,
                      unscored, zoom_span)
from .tables import (comparison_html, end_state, evaluation_html, format_number, incidents_table, metric_table,
                     window_table)

HEATMAP_METRICS = 12   # rows of the heatmap
TRACE_METRICS = 6      # panels of a trace figure
QUIET_ENTITIES = 3     # entities shown when nothing fired

CSS = """
body { font: 15px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; color: #1a1a1a; margin: 0; }
main { max-width: 1140px; margin: 0 auto; padding: 1.5em 1.2em 4em; }
h1 { font-size: 1.6em; margin-bottom: .2em; } h2 { margin-top: 2em; border-bottom: 1px solid #ccc; }
h3 { margin-top: 1.6em; } .meta { color: #555; }
.caution { background: #fff4e5; border-left: 4px solid #D55E00; padding: .6em 1em; }
.quiet { background: #eef6f1; border-left: 4px solid #009E73; padding: .6em 1em; font-size: 1.1em; }
.note { background: #f3f3f3; border-left: 4px solid #999; padding: .5em 1em; }
.warning { background: #fdecea; border-left: 6px solid #B00020; padding: .6em 1em; font-size: 1.1em; }
.warning p, .warning ul { margin: .3em 0; } b.open { color: #B00020; }
.footnote { color: #555; font-size: .88em; }
table { border-collapse: collapse; margin: .6em 0 1em; font-variant-numeric: tabular-nums; }
th, td { padding: .25em .7em; border-bottom: 1px solid #e2e2e2; text-align: left; vertical-align: top; }
th { background: #f6f6f6; } td.num { text-align: right; white-space: nowrap; }
.name { font-family: ui-monospace, Menlo, Consolas, monospace; word-break: break-all; }
img { max-width: 100%; height: auto; display: block; margin: .4em 0; }
figcaption { color: #555; font-size: .92em; margin-bottom: 1.2em; }
pre { background: #f6f6f6; padding: .8em; overflow-x: auto; max-width: 100%; box-sizing: border-box; }
pre.settings { white-space: pre-wrap; overflow-wrap: anywhere; }
"""


@dataclass
class ReportInputs:
    """Everything the page shows besides the collector: the replay's events and the optional parts."""

    title: str
    events: list[dict]
    summary: str = ""
    labels: Labels | None = None
    evaluation: Evaluation | None = None
    comparison: Sequence[Any] | None = None   # stream.compare.MethodScore rows
    tuning_text: str | None = None            # stream.tune.format_tuning
    tuning_toml: str | None = None            # stream.tune.toml_fragment
    missing: list[str] = field(default_factory=list)   # optional parts that could not be produced, and why
    coverage: list[EntityCoverage] | None = None   # the replay's per-entity coverage (None: not known)
    still_open: list[OpenIncident] | None = None   # incidents the engine held open at the end (None: not known)


def write_report(directory: str | Path, collector: ReportCollector, inputs: ReportInputs,
                 steps: Steps | None = None) -> Path:
    """Write ``index.html`` and its PNG figures into ``directory`` (see :func:`prepare_directory`);
    returns the page's path.  ``steps`` shows the drawing of the figures (default: silent)."""
    out = prepare_directory(directory)
    for old in out.glob("*.png"):   # a previous report's figures (prepare_directory checked they are ours)
        old.unlink()
    last_ts = {e: t.last_ts() for e, t in collector.traces.items() if math.isfinite(t.last_ts())}
    last_ts.update((c.entity, c.last_ts) for c in inputs.coverage or () if math.isfinite(c.last_ts))
    incidents = mark_unclosed(incidents_from_events(inputs.events, last_ts),
                              None if inputs.still_open is None else [o.incident for o in inputs.still_open])
    labels = inputs.labels
    by_entity: dict[str, list[IncidentSummary]] = {}
    for inc in incidents:
        by_entity.setdefault(inc.entity, []).append(inc)
    labelled_by_entity: dict[str, list[str]] = {}
    for lab in labels.incidents if labels else ():
        labelled_by_entity.setdefault(lab.entity, []).extend(lab.metrics)
    page = [f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">{MARKER}",
            f"<title>{escape(inputs.title)}</title><style>{CSS}</style></head><body><main>",
            f"<h1>{escape(inputs.title)}</h1>"]
    if inputs.summary:
        page.append(f'<p class="meta">{escape(inputs.summary)}</p>')
    page.append('<p class="caution">Alerts inform the people on call; they do not replace their judgement. '
                "Do not wire them to automatic remediation without a review like this one.</p>")
    if inputs.coverage:
        page.append(coverage_warning(inputs.coverage))
    page.append("<h2>What moved: the incidents</h2>")
    if incidents:
        page += [incidents_table(incidents, incident_anchor), open_note(incidents, incident_anchor)]
    elif _scored_any(collector, inputs.coverage):
        page.append('<p class="quiet"><b>Nothing fired.</b> No alert was raised on any entity during this '
                    "replay. The figures below show the metrics that moved most, for context.</p>")
    else:
        page.append('<p class="warning"><b>No incident, because nothing was scored</b>: every entity was still '
                    "warming up when the data ended. The figures below show what was observed.</p>")
    shown = list(by_entity) or sorted(
        collector.traces, key=lambda e: -float(np.nan_to_num(collector.traces[e].peak, nan=0.0).max(initial=0.0))
    )[:QUIET_ENTITIES]
    with (steps or Steps(False)).step(f"drawing the figures of {len(shown)} entities", total=len(shown)) as step:
        for number, entity in enumerate(shown):
            step.item(entity, vectors=sum(collector.traces[e].rows for e in shown[:number]))
            page += _entity_section(out, number, entity, collector.traces[entity], by_entity.get(entity, []),
                                    labelled_by_entity.get(entity, []), labels)
    if inputs.coverage:
        counts = {entity: len(found) for entity, found in by_entity.items()}
        page += ["<h2>What was scored, per entity</h2>", coverage_table(inputs.coverage, counts)]
    page += _scores_and_settings(inputs)
    page.append(_notes(collector))
    page.append("</main></body></html>\n")
    index = out / "index.html"
    index.write_text("\n".join(part for part in page if part), encoding="utf-8")
    return index


def _scored_any(collector: ReportCollector, coverage: list[EntityCoverage] | None) -> bool:
    """Whether the detector scored anything (the replay's coverage, else the collector's record)."""
    if coverage is not None:
        return any(c.scored for c in coverage)
    return any(t.scored for t in collector.traces.values())


def _scores_and_settings(inputs: ReportInputs) -> list[str]:
    """After what moved: the scores against the labels, the comparison of methods, the recommended
    settings, and why an optional part is missing."""
    part = []
    if inputs.evaluation is not None:
        part += ["<h2>How the alerts match the labelled faults</h2>", evaluation_html(inputs.evaluation)]
    if inputs.comparison:
        part += ["<h2>How other detection methods did on the same data</h2>", comparison_html(inputs.comparison)]
    if inputs.tuning_text is not None or inputs.tuning_toml is not None:
        part.append("<h2>Recommended settings for the alert budget</h2>")
        if inputs.tuning_text:
            part.append(f"<pre>{escape(inputs.tuning_text)}</pre>")
        if inputs.tuning_toml:
            part.append(f'<p>Put this into the configuration file:</p><pre class="settings">'
                        f"{escape(inputs.tuning_toml)}</pre>")
    part += [f'<p class="note">{escape(note)}</p>' for note in inputs.missing]
    return part


def incident_anchor(text: str) -> str:
    """The HTML id of an incident's section: its id with every character but letters and digits a dash."""
    return "i-" + "".join(c if c.isalnum() else "-" for c in text)


def _entity_section(out: Path, number: int, entity: str, trace: EntityTrace, incidents: list[IncidentSummary],
                    labelled: list[str], labels: Labels | None) -> list[str]:
    """One entity's section: how much of it was scored, its figures (unless its detail was dropped or
    nothing of it was recorded), then one subsection per incident."""
    part = [f"<h2>{escape(entity)}</h2>"]
    if trace.scored:
        part.append(f"<p>{trace.scored:,} of its {trace.rows:,} vectors scored (the first "
                    f"{trace.rows - trace.scored:,} built its baseline).</p>")
    else:
        part.append(f'<p class="note"><b>None of its {trace.rows:,} vectors was scored</b>: it was still warming '
                    "up when the data ended.</p>")
    if not incidents and trace.scored:
        peak = float(np.nan_to_num(trace.peak).max(initial=0.0))
        part.append(f"<p>No incident on this entity; peak |shift| {format_number(peak, '.1f')} "
                    "residual \u03c3 over the replay.</p>")
    if not trace.detail or trace.rows == 0:
        why = (f"its detail was dropped at {rfc3339(trace.dropped_at)} to stay within the report's memory bound"
               if not trace.detail else "no vector of it was recorded")
        part.append(f'<p class="note">No figures for this entity: {escape(why)}.</p>')
        for inc in incidents:
            part += _incident_section(inc, set(labelled), None, "")
        return part
    metrics = choose_metrics(trace, incidents, labelled, HEATMAP_METRICS)
    view = entity_view(trace, entity, metrics, incidents, labels)
    if trace.scored:   # a heatmap of nothing but grey says less than the caption
        heat = f"entity-{number:03d}-heatmap.png"
        draw_heatmap(view, out / heat, trace.threshold, emphasise=(m["name"] for inc in incidents for m in inc.metrics))
        marks = [w for w, present in (("bold: the incidents' metrics", bool(incidents)),
                                      ("green: labelled metrics", bool(view.labelled))) if present]
        part.append(f'<figure><img src="{heat}" alt="shift heatmap of {escape(entity)}"><figcaption>'
                    "Signed shift of the top metrics in residual sigmas (\u03c3; red up, blue down; the colour scale "
                    f"is linear up to \u00b1\u03bb = {trace.threshold:.2f} \u03c3 and logarithmic beyond; grey: not "
                    "scored, i.e. missing, the warm-up, a new metric's probation, or a metric the baseline explains "
                    f"by itself{'; ' if marks else ''}{'; '.join(marks)}). {_windows_caption(view)} Each column is "
                    f"{trace.width} vector(s), showing the largest |shift| among them; a single vector far outside "
                    "its band does not alert by itself.</figcaption></figure>")
    traces = f"entity-{number:03d}-traces.png"
    draw_traces(view, out / traces, metrics[:TRACE_METRICS])
    part.append(f'<figure><img src="{traces}" alt="traces of {escape(entity)}"><figcaption>'
                f"{_band_caption(trace, view)}</figcaption></figure>")
    for k, inc in enumerate(incidents):
        zoom = f"entity-{number:03d}-incident-{k:02d}.png"
        draw_traces(view, out / zoom, _incident_metrics(inc, view), span=zoom_span(inc, view),
                    title=f"incident {short_name(inc.incident, 60)}")
        part += _incident_section(inc, set(labelled), zoom, _band_caption(trace, view))
    return part


def _incident_metrics(inc: IncidentSummary, view: EntityView) -> list[str]:
    """What an incident's zoomed traces show: its metrics, then those of labelled faults it overlaps."""
    names = dict.fromkeys(m["name"] for m in inc.metrics)
    for w, lab in zip(view.labelled, view.labelled_metrics):
        if w.start <= inc.end and inc.start <= w.end:
            names.update(dict.fromkeys(lab))
    return [n for n in names if n in view.metrics][:TRACE_METRICS] or view.metrics[:TRACE_METRICS]


def _band_caption(trace: EntityTrace, view: EntityView) -> str:
    observed = ("Observed (blue; its min\u2013max range where a step holds several vectors, here "
                f"{trace.width})" if trace.width > 1 else "Observed (blue)")
    k, m = trace.confirm
    unscored_text = ("Hatched grey over the full height: not scored (the warm-up, a new metric's probation, or "
                     "a metric the baseline explains by itself)." if unscored(view).any() else "")
    if not trace.scored:
        return f"{observed} values; nothing was scored yet, so there is no expected value or band. {unscored_text}"
    return " ".join(text for text in (
        f"{observed}, the baseline's expected value (orange) and the detection band (grey): "
        f"expected \u00b1 \u03bb = {trace.threshold:.2f} residual sigmas of the metric, mapped to its own "
        f"units. Outside the band the detector considers a shift; it alerts after {k} of {m} such vectors.",
        _windows_caption(view), unscored_text) if text)


def _windows_caption(view: EntityView) -> str:
    parts = (["shaded: alerted incidents"] if view.incidents else []) + \
        (["hatched bar along the top (dashed edges in traces): labelled faults"] if view.labelled else []) + \
        (["light blue: labelled traffic surges, where nothing should fire"] if view.surges else [])
    text = "; ".join(parts)
    return f"{text[:1].upper()}{text[1:]}." if parts else ""


def _incident_section(inc: IncidentSummary, labelled: set[str], figure: str | None, caption: str) -> list[str]:
    unended = inc.state in ("open", "unclosed")
    duration = f"at least <b>{human_duration(inc.duration)}</b> (to its entity's last vector)" if unended else \
        f"duration <b>{human_duration(inc.duration)}</b>"
    part = [f'<h3 id="{incident_anchor(inc.incident)}">Incident {escape(inc.incident)}</h3>',
            f"<p>Onset <b>{rfc3339(inc.start)}</b>, {duration}, {end_state(inc.state)}. Metrics ranked by their "
            "peak |shift| over the incident's events, with the observed and expected values at that peak:</p>",
            metric_table(inc, labelled)]
    if figure:
        part.append(f'<figure><img src="{figure}" alt="traces around incident {escape(inc.incident)}">'
                    f"<figcaption>The incident's metrics (and those of a labelled fault it overlaps) around its "
                    f"window. {caption}</figcaption></figure>")
    if inc.window_metrics:
        part.append(window_table(inc.window_metrics))
    return part


def _notes(collector: ReportCollector) -> str:
    dropped = [e for e, t in collector.traces.items() if not t.detail]
    text = ("<h2>How to read this</h2><p>Shifts are the detector's debiased estimates in residual sigmas "
            "(how far a metric moved against the shared pattern of its entity). The expected value is the "
            "low-rank baseline's prediction for that vector; the band is expected \u00b1 \u03bb d, with "
            "\u03bb the detector's threshold (from <code>model.false_alarm</code>) and d the metric's "
            "residual scale. Times are UTC (RFC 3339).</p>"
            f"<p>Memory: figures keep at most {collector.max_bins:,} time steps per entity (longer replays "
            f"merge neighbouring steps) and {collector.max_cells:,} values in all.")
    if dropped:
        more = " \u2026" if len(dropped) > 20 else ""
        text += (f" The detail of {len(dropped)} entit{'y' if len(dropped) == 1 else 'ies'} with no incident "
                 f"or smaller shifts was dropped to stay within that bound: "
                 f"{escape(', '.join(sorted(dropped)[:20]))}{more}.")
    return text + "</p>"
