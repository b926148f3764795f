"""The incident-review report: ``shiftsieve replay INPUT --events OUT --report DIR``.

Two parts.  :class:`ReportCollector` is an engine observer (:data:`..engine.BatchObserver`)
that keeps, per entity, what the figures need, in bounded memory.  :func:`write_report`
turns it and the replay's alert events into ``DIR/index.html`` (self-contained: inline
CSS, no scripts, no external assets) and PNG figures beside it (matplotlib, Agg canvas,
never a display).

Modules, each using only those above it:

- :mod:`.collector`: the engine observer and each entity's time-binned record (memory bound);
- :mod:`.summary`: incidents from the events, the windows and the data of each entity's figures;
- :mod:`.figures`: the heatmap and trace figures;
- :mod:`.tables`: the HTML tables;
- :mod:`.scored`: what was scored (the warning when nothing or not everything was), incidents without an end;
- :mod:`.directory`: where a report may be written, and :class:`ReportError`;
- :mod:`.progress`: what the steps after the replay are doing, on stderr;
- :mod:`.page`: ``index.html`` from all of the above;
- :mod:`.build`: the replay, the optional scores, comparison and tuning, then the page.
"""

from .build import replay_with_report
from .collector import (BAND_HI, BAND_LO, CHANNELS, EXPECTED, OBSERVED_HI, OBSERVED_LO, SHIFT, EntityTrace,
                        ReportCollector)
from .directory import ReportError, prepare_directory
from .figures import NAME_CHARS, short_name
from .page import HEATMAP_METRICS, QUIET_ENTITIES, ReportInputs, incident_anchor, write_report
from .summary import EntityView, IncidentSummary, Window, choose_metrics, entity_view, incidents_from_events

__all__ = [
    "BAND_HI", "BAND_LO", "CHANNELS", "EXPECTED", "HEATMAP_METRICS", "NAME_CHARS", "OBSERVED_HI", "OBSERVED_LO",
    "QUIET_ENTITIES", "SHIFT", "EntityTrace", "EntityView", "IncidentSummary", "ReportCollector", "ReportError",
    "ReportInputs", "Window", "choose_metrics", "entity_view", "incident_anchor", "incidents_from_events",
    "prepare_directory", "replay_with_report", "short_name", "write_report",
]
