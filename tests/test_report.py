"""The incident-review report (`replay --report DIR`): page structure, figures, values, bounds."""

import doctest
import gzip
import html
import io
import json
import re
import struct
from contextlib import redirect_stderr
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
from scipy.stats import norm

from shiftsieve.stream import report
from shiftsieve.stream.alert_lines import si
from shiftsieve.stream.cli import EXIT_USAGE, main
from shiftsieve.stream.config import load_config
from shiftsieve.stream.coverage import EntityCoverage
from shiftsieve.stream.evaluate import METHODS
from shiftsieve.stream.labels import load_labels
from shiftsieve.stream.scoring import load_events, score_events
from shiftsieve.stream.replay import replay
from shiftsieve.stream.report import (SHIFT, EntityTrace, EntityView, ReportCollector, ReportInputs, Window,
                                      choose_metrics, entity_view, incident_anchor, incidents_from_events, write_report)
from shiftsieve.stream.report.scored import coverage_table, coverage_warning, open_note
from shiftsieve.stream.report.summary import IncidentSummary, mark_unclosed, unscored, unscored_spans, zoom_span
from shiftsieve.stream.report.tables import incidents_table

DATA = Path(__file__).resolve().parent.parent / "replay_data"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"   # RFC 2083 section 3.1 (the PNG file signature)
VOID = {"meta", "img", "br", "hr", "link", "input"}   # HTML elements without an end tag (HTML Living Standard)
HOSTILE = '<script>alert("x")</script>&{le="0.5"}'


class Page(HTMLParser):
    """Checks nesting with a stack, collects images, ids and the tables under each h3 id."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.images: list[str] = []
        self.tags: list[str] = []
        self.tables: dict[str, list[list[list[str]]]] = {}
        self._section = ""
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append(tag)
        if tag == "img":
            self.images.append(attrs["src"])
        if tag == "h3":
            self._section = attrs.get("id", "")
        if tag == "table":
            self.tables.setdefault(self._section, []).append([])
        if tag == "tr":
            self.tables[self._section][-1].append([])
        if tag in ("td", "th"):
            self._cell = []
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self.tables[self._section][-1][-1].append("".join(self._cell).strip())
            self._cell = None
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
            return
        self.stack.pop()

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _parse(path: Path) -> Page:
    page = Page()
    page.feed(path.read_text(encoding="utf-8"))
    page.close()
    return page


def _peak_entries(events: list[dict], incident: str) -> dict[str, dict]:
    """Each metric's entry with the largest |shift_sigma| over an incident's events (written here
    from the events file, independently of the report's code)."""
    best: dict[str, dict] = {}
    for event in events:
        if event["incident"] == incident:
            for m in event["metrics"]:
                if m["name"] not in best or abs(m["shift_sigma"]) > abs(best[m["name"]]["shift_sigma"]):
                    best[m["name"]] = m
    return best


@pytest.fixture(scope="module")
def single(tmp_path_factory):
    """The bundled single-shift incident through the CLI with --labels and --budget (progress on):
    the report's directory, the events and what went to stderr."""
    out = tmp_path_factory.mktemp("single")
    events_path = out / "events.jsonl"
    err = io.StringIO()
    with redirect_stderr(err):
        code = main(["replay", str(DATA / "single_shift.jsonl.gz"), "--events", str(events_path), "--report",
                     str(out / "report"), "--labels", str(DATA / "single_shift.labels.json"), "--budget", "2"])
    assert code == 0
    return out / "report", load_events(events_path), err.getvalue()


def test_page_parses_and_every_figure_is_a_png(single):
    directory, _, _ = single
    page = _parse(directory / "index.html")
    assert page.errors == [] and page.stack == []      # every element closed, in order
    assert "script" not in page.tags and "link" not in page.tags   # self-contained: no scripts, no external assets
    assert len(page.images) >= 3
    for src in page.images:
        assert "/" not in src and not src.startswith(("http", "data:"))   # relative, beside the page
        data = (directory / src).read_bytes()
        assert data[:8] == PNG_SIGNATURE
        width, height = struct.unpack(">II", data[16:24])   # IHDR comes first (RFC 2083 section 4.1.1)
        assert data[12:16] == b"IHDR" and 600 <= width <= 1400 and 150 <= height <= 1400
        assert matplotlib.image.imread(directory / src).shape[:2] == (height, width)


def test_incident_table_lists_labelled_metrics_with_the_events_values(single):
    directory, events, _ = single
    labels = load_labels(DATA / "single_shift.labels.json")
    page = _parse(directory / "index.html")
    (incident,) = {e["incident"] for e in events}
    table = page.tables[incident_anchor(incident)][0]
    head, rows = table[0], {row[1]: row for row in table[1:]}
    shift, value, expected = head.index("shift (residual \u03c3)"), head.index("observed"), head.index("expected")
    diff = head.index("change (observed \u2212 expected)")
    for name in labels.incidents[0].metrics:
        entry = _peak_entries(events, incident)[name]
        assert float(rows[name][shift]) == round(entry["shift_sigma"], 2)
        assert rows[name][value] == si(entry["value"])          # the events file's numbers, as the figures' axes
        assert rows[name][expected] == si(entry["expected"])
        # the change as a difference and a percentage of expected, computed here from the events
        percent = float(re.fullmatch(r"\S+(?: \S)? \(([-+][\d.]+) %\)", rows[name][diff]).group(1))
        assert percent == pytest.approx(100 * (entry["value"] - entry["expected"]) / abs(entry["expected"]), abs=0.051)
        assert rows[name][head.index("labelled")] == "\u2713"


def test_page_has_scores_comparison_settings_and_the_threshold(single):
    directory, _, _ = single
    text = (directory / "index.html").read_text(encoding="utf-8")
    for heading in ("How the alerts match the labelled faults", "How other detection methods did",
                    "Recommended settings", "[decision]"):
        assert heading in text
    # the band is expected +/- lambda d with lambda the two-sided Gaussian quantile of
    # model.false_alarm (default 1e-3): scipy.stats.norm as the reference
    assert f"\u03bb = {norm.isf(1e-3 / 2):.2f}" in text
    assert "do not replace their judgement" in text


def test_incidents_and_figures_come_before_the_comparison_and_tuning(single):
    directory, _, _ = single
    text = (directory / "index.html").read_text(encoding="utf-8")
    order = [text.index(mark) for mark in ("What moved: the incidents", '<h3 id="i-', "-incident-00.png",
                                           "How the alerts match the labelled faults",
                                           "How other detection methods did", "Recommended settings")]
    assert order == sorted(order)


def test_settings_block_wraps_inside_its_box(single):
    directory, _, _ = single
    text = (directory / "index.html").read_text(encoding="utf-8")
    block = re.search(r'<pre class="settings">(.*?)</pre>', text, re.S)
    assert block and "[decision]" in block.group(1)
    rule = re.search(r"pre\.settings\s*\{([^}]*)\}", text).group(1)   # the page's own CSS
    assert "white-space: pre-wrap" in rule and "overflow-wrap: anywhere" in rule


def test_headings_are_plain_words_the_methods_in_footnotes_and_scores_have_units(single):
    directory, _, _ = single
    text = (directory / "index.html").read_text(encoding="utf-8")
    headings = [html.unescape(h) for _, h in re.findall(r"<(h[1-4]|th)[^>]*>(.*?)</\1>", text, re.S)]
    assert "Metrics that moved together over the incident" in headings
    assert not [h for h in headings if re.search(r"lasso|m-?sbl|mmv", h, re.I)]
    footnotes = " ".join(re.findall(r'<p class="footnote">(.*?)</p>', text, re.S))
    assert "group LASSO" in footnotes and "M-SBL" in footnotes
    assert "RMS shift (residual \u03c3)" in headings and "shift (residual \u03c3)" in headings
    page = _parse(directory / "index.html")
    scores = next(t for ts in page.tables.values() for t in ts if t[0][:3] == ["method", "names metrics", "precision"])
    for row in scores[1:]:
        assert all(row[i].endswith("%") for i in (2, 3, 4))                  # precision, recall, F1
        assert row[6].endswith(" s") or row[6] == "\u2013"                    # mean delay (none without a match)
        assert row[7].endswith("per entity-day") and row[8].endswith(" s")


def test_progress_says_what_the_steps_after_the_replay_do(single):
    _, _, err = single
    lines = err.splitlines()
    start = lines.index("shiftsieve: comparing 6 detection methods on the 6,000 vectors ...")
    assert lines[start + 1: start + 1 + len(METHODS)] == [
        f"shiftsieve:   {name} ({i} of {len(METHODS)})" for i, name in enumerate(METHODS, 1)]
    assert lines[start + 1 + len(METHODS)].startswith("shiftsieve: comparing 6 detection methods on the 6,000 "
                                                      "vectors: done in ")
    steps = [i for i, line in enumerate(lines) if line.startswith(("shiftsieve: looking for settings",
                                                                    "shiftsieve: drawing the figures"))]
    summary = next(i for i, line in enumerate(lines) if line.startswith("shiftsieve: 6,000 vectors"))
    assert len(steps) == 4 and start < min(steps) and max(steps) < summary   # each step starts and ends


def test_a_replay_shorter_than_the_warmup_says_nothing_was_scored(tmp_path):
    short = tmp_path / "short.jsonl"
    with gzip.open(DATA / "single_shift.jsonl.gz", "rt") as f:   # one entity, 100 of the 540 warm-up vectors
        lines = [line for line in f if '"booking-api-1"' in line][:100]
    short.write_text("".join(lines))
    code = main(["replay", str(short), "--events", str(tmp_path / "e.jsonl"), "--report", str(tmp_path / "r"),
                 "--quiet"])
    assert code == 0
    text = (tmp_path / "r" / "index.html").read_text(encoding="utf-8")
    assert "Nothing fired." not in text and "Nothing was scored." in text and "not an all-clear" in text
    assert "booking-api-1</b>: 100 of the 540 vectors" in text and "440 more vectors" in text
    scored = next(t for t in _parse(tmp_path / "r" / "index.html").tables[""] if t[0][:3] == ["entity", "vectors",
                                                                                               "scored"])
    assert scored[1][:4] == ["booking-api-1", "100", "0", "0\u00a0%"]


def test_entities_that_never_warmed_up_are_named_beside_those_that_did():
    warm = EntityCoverage("warm-1", 900, 540, 0.0, 899 * 30.0)
    cold = EntityCoverage("cold-1", 60, 540, 0.0, 59 * 30.0)
    box = coverage_warning([warm, cold])
    assert "1 of 2 entities never warmed up" in box and "cold-1" in box and "warm-1" not in box
    assert cold.still_needed() in box
    assert coverage_warning([warm]) == ""
    table = coverage_table([warm, cold], {"warm-1": 2})
    assert table.index("cold-1") < table.index("warm-1") and "360" in table   # scored: 900 - 540


def test_incidents_without_an_end_are_marked():
    events = [{"ts": 100.0, "entity": "a", "state": "firing", "incident": "a/100",
               "metrics": [{"name": "m", "shift_sigma": 6.0, "value": 2.0, "expected": 1.0}]},
              {"ts": 200.0, "entity": "b", "state": "firing", "incident": "b/200", "metrics": []},
              {"ts": 300.0, "entity": "b", "state": "resolved", "incident": "b/200", "metrics": []}]
    incidents = incidents_from_events(events, {"a": 400.0})
    assert [(i.incident, i.state, i.end) for i in incidents] == [("a/100", "open", 400.0),
                                                                 ("b/200", "resolved", 300.0)]
    table = incidents_table(incidents, incident_anchor)
    assert "still open at the end of the data" in table and "6 min 40 s+" not in table and "5 min 00 s+" in table
    assert "a/100" in open_note(incidents, incident_anchor) and open_note(incidents[1:], incident_anchor) == ""
    # an incident the engine no longer held open at the end was never closed (its model was reset)
    (reset, _) = mark_unclosed(incidents, still_open=[])
    assert reset.state == "unclosed" and "never closed" in incidents_table([reset], incident_anchor)


def _view(t: np.ndarray, t_end: float) -> EntityView:
    values = np.full((report.CHANNELS, t.size, 1), np.nan, np.float32)
    return EntityView("e", ["m"], t, 30.0, values, [], [], [], 1, t_end=t_end)


def test_the_incident_zoom_stops_at_the_end_of_the_data():
    t = 1780000000.0 + 30.0 * np.arange(200)
    view = _view(t, float(t[-1]))
    late = IncidentSummary("e/x", "e", float(t[190]), float(t[-1]), "open", (), None)
    lo, hi = zoom_span(late, view)
    assert hi == t[-1] and lo == t[190] - 1800.0
    early = IncidentSummary("e/y", "e", float(t[10]), float(t[20]), "resolved", (), None)
    assert zoom_span(early, view) == (t[0], t[20] + 900.0)   # nor before its start


def test_unscored_stretches_are_in_the_figure_data(surge_and_bounded):
    free, _, _, _, summary = surge_and_bounded
    entity = next(iter(free.traces))
    trace = free.traces[entity]
    warmup = load_config(None).model.warmup
    assert trace.width == 1 and trace.rows - trace.scored == warmup   # the warm-up's observed values are kept
    view = entity_view(trace, entity, trace.names[:3], [], None)
    assert unscored(view)[:warmup].all() and not unscored(view)[warmup:].all()
    assert unscored_spans(view, 0)[0] == (view.t[0], view.t[warmup])
    assert np.isfinite(view.values[report.OBSERVED_LO, :warmup]).any()


def test_rerun_replaces_a_previous_report_and_refuses_user_files(single, tmp_path, capsys):
    directory, _, _ = single
    assert report.prepare_directory(directory) == directory   # a previous report may be overwritten
    user = tmp_path / "notes"
    user.mkdir()
    (user / "mine.txt").write_text("keep me")
    args = ["replay", str(DATA / "surge.jsonl.gz"), "--events", str(tmp_path / "e.jsonl"), "--quiet"]
    assert main(args + ["--report", str(user)]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert err.startswith("shiftsieve: error: --report") and err.count("\n") == 1 and "Traceback" not in err
    assert (user / "mine.txt").read_text() == "keep me"
    assert main(args + ["--report", str(user / "mine.txt" / "sub")]) == EXIT_USAGE   # not creatable
    assert main(args + ["--labels", str(DATA / "surge.labels.json")]) == EXIT_USAGE   # --labels needs --report
    assert capsys.readouterr().err.count("shiftsieve: error:") == 2


@pytest.fixture(scope="module")
def surge_and_bounded(tmp_path_factory):
    """One replay of the surge (nothing should fire) feeding a default collector and a tight one."""
    free, tight = ReportCollector(), ReportCollector(max_bins=64, max_cells=20_000)
    peak = []

    def bounded(*args):
        tight(*args)
        peak.append(tight.cells)

    events: list[dict] = []
    summary = replay(DATA / "surge.jsonl.gz", load_config(None), sinks=[events.append], observers=[free, bounded],
                     progress=False)
    return free, tight, peak, events, summary


def test_surge_report_says_nothing_fired(surge_and_bounded, tmp_path):
    free, _, _, events, summary = surge_and_bounded
    labels = load_labels(DATA / "surge.labels.json")
    assert events == []   # the labels say no alert is correct here
    index = write_report(tmp_path / "surge", free, ReportInputs("surge", events, labels=labels,
                                                                evaluation=score_events(events, labels)))
    page = _parse(index)
    text = index.read_text(encoding="utf-8")
    assert "Nothing fired." in text
    assert len(page.images) == 2 * report.QUIET_ENTITIES   # the top metrics are shown anyway
    # the labels file's benign traffic surge is drawn on every entity's figures (figure data)
    (start, end), = labels.surges
    entity = next(iter(free.traces))
    view = report.entity_view(free.traces[entity], entity, [], [], labels)
    assert [(w.start, w.end) for w in view.surges] == [(start, end)] and "traffic surges" in text
    assert all((index.parent / src).stat().st_size > 0 for src in page.images)


def test_memory_bound_holds_and_the_page_says_what_was_dropped(surge_and_bounded, tmp_path):
    free, tight, peak, events, _ = surge_and_bounded
    assert max(peak) <= tight.max_cells                       # after every batch
    assert all(t.bins <= 64 for t in tight.traces.values())
    dropped = [e for e, t in tight.traces.items() if not t.detail]
    assert dropped and len(dropped) < len(tight.traces)
    assert all(np.array_equal(tight.traces[e].peak, free.traces[e].peak) for e in tight.traces)   # peaks kept
    text = write_report(tmp_path / "tight", tight, ReportInputs("tight", events)).read_text(encoding="utf-8")
    assert "dropped" in text and all(html.escape(e) in text for e in dropped)


def test_binning_keeps_the_largest_shift_of_each_step():
    rng = np.random.default_rng(5)
    trace = EntityTrace(max_bins=8)
    raw = rng.standard_normal((1000, 3)).astype(np.float32) * 4
    ts = np.arange(1000) * 30.0
    for start in range(0, 1000, 7):   # uneven batches
        rows = np.full((report.CHANNELS, len(raw[start:start + 7]), 3), np.nan, np.float32)
        rows[SHIFT] = raw[start:start + 7]
        trace.add(["a", "b", "c"], ts[start:start + 7], rows)
    assert trace.bins <= 8 and trace.width == 128   # 1000 rows -> 7 full bins of 128 (widths double)
    t, values = trace.series()
    full = trace.bins * trace.width
    # reference: numpy, the signed value of largest magnitude in each block of `width` rows
    blocks = raw[:full].reshape(trace.bins, trace.width, 3)
    expected = np.take_along_axis(blocks, np.abs(blocks).argmax(axis=1)[:, None], axis=1)[:, 0]
    np.testing.assert_array_equal(values[SHIFT, : trace.bins], expected)
    np.testing.assert_array_equal(t[: trace.bins], ts[:full:trace.width])
    np.testing.assert_array_equal(trace.peak, np.abs(raw).max(axis=0))


def test_labelled_and_alerted_windows_are_in_the_figure_data(tmp_path):
    labels = load_labels(DATA / "single_shift.labels.json")
    collector, events = ReportCollector(), []
    replay(DATA / "single_shift.jsonl.gz", load_config(None), sinks=[events.append], observers=[collector],
           progress=False)
    label = labels.incidents[0]
    trace = collector.traces[label.entity]
    incidents = incidents_from_events(events, {})
    metrics = choose_metrics(trace, incidents, label.metrics, report.HEATMAP_METRICS)
    view = entity_view(trace, label.entity, metrics, incidents, labels)
    assert view.labelled == [Window(label.start, label.end, ", ".join(label.metrics))]
    resolved = next(e for e in events if e["state"] == "resolved")
    assert view.incidents == [Window(resolved["started"], resolved["ts"], resolved["incident"])]
    assert metrics[0] == label.metrics[0]   # the incident's metric leads the heatmap and the traces
    # The figure's expected value is the detector's: at the firing vector it equals the event's
    # `expected` (6 significant digits, stream/events.py).
    firing = next(e for e in events if e["state"] == "firing")
    row = int(np.flatnonzero(view.t == firing["ts"])[0])
    col = metrics.index(firing["metrics"][0]["name"])
    assert view.values[report.EXPECTED, row, col] == pytest.approx(firing["metrics"][0]["expected"], rel=1e-5)
    assert view.values[report.OBSERVED_LO, row, col] == pytest.approx(firing["metrics"][0]["value"], rel=1e-6)


def _hostile_input(path: Path) -> None:
    """Eight metrics moving with one shared factor; the hostile-named one shifts by ~10 sigma."""
    rng = np.random.default_rng(11)
    names = [HOSTILE] + [f"m{j}" for j in range(7)]
    loadings = rng.uniform(0.5, 2.0, len(names))
    with path.open("w") as f:
        for i in range(360):
            x = 100 + 10 * np.sin(i / 20) * loadings + rng.standard_normal(len(names))
            if 250 <= i < 300:
                x[0] += 10.0
            f.write(json.dumps({"ts": 1780000000 + 30 * i, "entity": "<marquee>edge</marquee>",
                                "metrics": dict(zip(names, x.tolist()))}) + "\n")


def test_hostile_names_are_escaped(tmp_path):
    _hostile_input(tmp_path / "in.jsonl")
    (tmp_path / "c.toml").write_text("[model]\nwarmup = 120\n")
    code = main(["replay", str(tmp_path / "in.jsonl"), "--events", str(tmp_path / "e.jsonl"), "--config",
                 str(tmp_path / "c.toml"), "--report", str(tmp_path / "r"), "--quiet"])
    assert code == 0
    events = load_events(tmp_path / "e.jsonl")
    assert any(m["name"] == HOSTILE for e in events for m in e["metrics"])   # it did fire
    text = (tmp_path / "r" / "index.html").read_text(encoding="utf-8")
    page = _parse(tmp_path / "r" / "index.html")
    assert "script" not in page.tags and "marquee" not in page.tags and page.errors == []
    assert html.escape(HOSTILE) in text and HOSTILE not in text and "<marquee>" not in text
    assert all((tmp_path / "r" / src).read_bytes()[:8] == PNG_SIGNATURE for src in page.images)


def test_short_names_keep_figures_readable():
    assert report.short_name("x" * 100) == "x" * (report.NAME_CHARS - 1) + "\u2026"
    assert report.short_name("cpu") == "cpu"


@pytest.mark.parametrize("module", [report.collector, report.figures, report.progress])
def test_docstring_examples(module):
    # figures: the value axes' labels are alert_lines.si, as the tables'; progress: the plain lines
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0
