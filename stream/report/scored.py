"""What was scored, on the page: "no incident" means "all clear" only where the detector scored.

A replay shorter than ``model.warmup`` scores nothing; the page then shows a warning in place of
"Nothing fired." with, per entity, how much it sent and what it would take
(:class:`..coverage.EntityCoverage`).  Entities that never warmed up beside others that did are
named as prominently; a table gives every entity's share of scored vectors; incidents still open
when the data ended are listed, since their end is not known.
"""

from __future__ import annotations

from html import escape
from typing import Callable, Mapping, Sequence

from ..coverage import NAMED, EntityCoverage
from .summary import IncidentSummary
from .tables import END_STATES, html_table, percent

#: Entities listed one by one in the coverage table before a line for the rest.
COVERAGE_ROWS = 20


def _plural(n: int, one: str, many: str) -> str:
    return f"{n:,} {one if n == 1 else many}"


def coverage_warning(coverage: Sequence[EntityCoverage]) -> str:
    """A warning box (HTML) when some or all entities never finished their warm-up, naming them
    with how much they sent and what it would take; empty when every entity was scored."""
    cold = [c for c in coverage if c.warming_up]
    if not cold:
        return ""
    if len(cold) == len(coverage):
        head = ("<b>Nothing was scored.</b> No entity finished its warm-up, so the absence of incidents says "
                "nothing about this input: it is not an all-clear.")
    else:
        head = (f"<b>{len(cold)} of {len(coverage)} entities never warmed up.</b> Nothing they sent was scored, "
                "so no incident on them is not an all-clear for them.")
    items = [f"<li><b>{escape(c.entity)}</b>: {c.vectors:,} of the {c.warmup:,} vectors its warm-up needs "
             f"(<code>model.warmup</code>); {escape(c.still_needed())} to score anything</li>" for c in cold[:NAMED]]
    if len(cold) > NAMED:
        items.append(f"<li>and {_plural(len(cold) - NAMED, 'more entity', 'more entities')}: see the table of "
                     "entities</li>")
    advice = (f"Replay a window that starts at least {cold[0].warmup:,} vectors per entity before what you want "
              "scored, or lower <code>model.warmup</code> (at least 10; a shorter warm-up gives a rougher baseline).")
    return f'<div class="warning"><p>{head}</p><ul>{"".join(items)}</ul><p>{advice}</p></div>'


def coverage_table(coverage: Sequence[EntityCoverage], incidents: Mapping[str, int]) -> str:
    """Per entity: vectors, how many were scored, incidents, and what an unscored one still needs.
    Entities that never warmed up come first; beyond :data:`COVERAGE_ROWS` the rest share a line."""
    ordered = sorted(coverage, key=lambda c: (not c.warming_up, -incidents.get(c.entity, 0), c.entity))
    rows = [[f'<span class="name">{escape(c.entity)}</span>', f"{c.vectors:,}", f"{c.scored:,}",
             percent(c.scored / c.vectors if c.vectors else None), str(incidents.get(c.entity, 0)),
             f"<b>warming up</b>: {escape(c.still_needed())}" if c.warming_up else ""]
            for c in ordered[:COVERAGE_ROWS]]
    rest = ordered[COVERAGE_ROWS:]
    if rest:
        vectors, scored = sum(c.vectors for c in rest), sum(c.scored for c in rest)
        rows.append([f"{_plural(len(rest), 'more entity', 'more entities')}", f"{vectors:,}", f"{scored:,}",
                     percent(scored / vectors if vectors else None),
                     str(sum(incidents.get(c.entity, 0) for c in rest)), ""])
    return ("<p>What the detector scored per entity: its first <code>model.warmup</code> vectors build the "
            "baseline and are not scored.</p>"
            + html_table(["entity", "vectors", "scored", "scored share", "incidents", "to score it"], rows,
                         numeric=(1, 2, 3, 4)))


def open_note(incidents: Sequence[IncidentSummary], anchor: Callable[[str], str]) -> str:
    """A box (HTML) naming the incidents whose end is not known; empty when there are none."""
    unended = [i for i in incidents if i.state in ("open", "unclosed")]
    if not unended:
        return ""
    links = ", ".join(f'<a href="#{anchor(i.incident)}">{escape(i.incident)}</a> ({escape(END_STATES[i.state])})'
                      for i in unended)
    verb = "has" if len(unended) == 1 else "have"
    return (f'<p class="warning"><b>{_plural(len(unended), "incident", "incidents")} {verb} no end yet:</b> '
            f"{links}. Their durations (marked +) run to the entity's last vector; they may still be going on.</p>")
