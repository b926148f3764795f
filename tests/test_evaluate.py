"""Bookkeeping of stream/evaluate.py: every expected number below is worked out by hand."""

from __future__ import annotations

from pathlib import Path

import orjson
import pytest

import shiftsieve.replay_data as replay_data
from shiftsieve.stream.evaluate import (
    EvaluationError,
    LabelledIncident,
    Labels,
    evaluate,
    format_table,
    load_events,
    load_labels,
)


def fire(ts: float, incident: str, *metrics: tuple[str, float], state: str = "firing") -> dict:
    return {"ts": ts, "entity": incident.split("/")[0], "state": state, "incident": incident,
            "metrics": [{"name": n, "shift_sigma": s, "value": 1.0, "expected": 0.0} for n, s in metrics]}


def label(entity: str, start: float, end: float, *metrics: str) -> LabelledIncident:
    return LabelledIncident(entity, start, end, metrics, {m: 6.0 for m in metrics}, "step")


TWO = Labels("two", 20000, (label("api-1", 1000.0, 2000.0, "a", "b", "c"), label("db-1", 5000.0, 6000.0, "x")))
EVENTS = [
    fire(1030.0, "api-1/1030", ("a", 6.0), ("d", 5.0)),
    fire(1060.0, "api-1/1030", ("b", -7.0), ("a", 4.0)),  # b joins; a keeps its larger 6.0
    fire(1900.0, "api-1/1030", state="resolved"),
    fire(1100.0, "api-2/1100", ("a", 9.0)),  # right window, wrong entity
    fire(1500.0, "api-1/1500", ("a", 5.0)),  # second prediction inside a matched label: a fragment
    fire(4950.0, "db-1/4950", ("y", 8.0), ("x", 6.0)),  # 50 s early, within the default 120 s
    fire(9000.0, "db-1/9000", ("x", 6.0)),
    fire(300.0, "api-1/300", state="resolved"),  # never fired: not a prediction
]


def test_matching_scores() -> None:
    e = evaluate(EVENTS, TWO)
    assert [p.incident for p in e.predicted] == ["api-1/1030", "api-2/1100", "api-1/1500", "db-1/4950", "db-1/9000"]
    assert [m.predicted.incident for m in e.matches] == ["api-1/1030", "db-1/4950"]
    assert [p.incident for p in e.false_alerts] == ["api-2/1100", "api-1/1500", "db-1/9000"]
    assert e.missed == () and e.fragments == 1
    assert e.precision == pytest.approx(2 / 5)
    assert e.recall == 1.0
    assert e.f1 == pytest.approx(2 * 0.4 * 1.0 / 1.4)  # 4/7
    # api-1: top-3 = b(7), a(6), d(5) holds 2 of {a, b, c}; db-1: top-1 = y holds none of {x}
    assert [m.localisation for m in e.matches] == pytest.approx([2 / 3, 0.0])
    assert e.localisation == pytest.approx(1 / 3)
    assert [m.delay_seconds for m in e.matches] == [30.0, -50.0]
    assert e.delay_mean_seconds == -10.0 and e.delay_max_seconds == 30.0
    assert e.false_alerts_per_10k == 1.5  # 3 * 10000 / 20000
    assert e.matches[0].predicted.metrics == (("b", 7.0), ("a", 6.0), ("d", 5.0))


def test_vectors_argument_overrides_labels() -> None:
    assert evaluate(EVENTS, TWO, vectors=1000).false_alerts_per_10k == 30.0  # 3 * 10000 / 1000


def test_zero_labels_and_silence_is_perfect() -> None:
    surge = Labels("surge", 6000, ())
    e = evaluate([], surge)
    assert (e.precision, e.recall, e.f1) == (1.0, 1.0, 1.0)
    assert e.localisation is None and e.delay_mean_seconds is None and e.delay_max_seconds is None
    assert e.false_alerts_per_10k == 0.0


def test_zero_labels_with_a_false_alert() -> None:
    e = evaluate([fire(10.0, "api-1/10", ("a", 7.0))], Labels("surge", 6000, ()))
    assert (e.precision, e.recall, e.f1) == (0.0, 1.0, 0.0)
    assert e.false_alerts_per_10k == pytest.approx(10000 / 6000)
    assert e.fragments == 0


def test_silent_detector_misses_everything() -> None:
    e = evaluate([], TWO)
    assert (e.precision, e.recall, e.f1) == (1.0, 0.0, 0.0)
    assert [lab.entity for lab in e.missed] == ["api-1", "db-1"]


@pytest.mark.parametrize("onset, matched", [(940.0, True), (939.5, False), (2000.0, True), (2000.5, False)])
def test_tolerance_window_edges(onset: float, matched: bool) -> None:
    labels = Labels("edge", 100, (label("api-1", 1000.0, 2000.0, "a"),))
    e = evaluate([fire(onset, f"api-1/{onset}", ("a", 6.0))], labels, tolerance_seconds=60.0)
    assert bool(e.matches) is matched


def test_greedy_by_onset_each_label_once() -> None:
    labels = Labels("overlap", 100, (label("api-1", 2000.0, 4000.0, "a"), label("api-1", 1000.0, 3000.0, "a")))
    events = [fire(2600.0, "api-1/p2", ("a", 6.0)), fire(2500.0, "api-1/p1", ("a", 6.0))]
    e = evaluate(events, labels)
    # p1 (earlier onset) takes the earlier-starting label, p2 the other one
    assert [(m.predicted.incident, m.label.start, m.delay_seconds) for m in e.matches] == [
        ("api-1/p1", 1000.0, 1500.0), ("api-1/p2", 2000.0, 600.0)]
    assert e.delay_mean_seconds == 1050.0 and e.delay_max_seconds == 1500.0


def test_localisation_ties_break_by_name() -> None:
    labels = Labels("tie", 100, (label("api-1", 0.0, 100.0, "a"),))
    e = evaluate([fire(10.0, "api-1/10", ("z", 5.0), ("a", -5.0))], labels)
    assert e.localisation == 1.0  # |a| == |z|: a ranks first by name


def test_report_and_dict() -> None:
    e = evaluate(EVENTS, TWO)
    d = orjson.loads(orjson.dumps(e.to_dict()))
    assert (d["labelled"], d["predicted"], d["matched"], d["false_alerts"], d["fragments"]) == (2, 5, 2, 3, 1)
    assert d["false_alerts_per_10k_vectors"] == 1.5
    assert d["matches"][0]["reported_metrics"] == {"b": 7.0, "a": 6.0, "d": 5.0}
    table = format_table(e)
    for text in ("precision 0.400", "recall 1.000", "F1 0.571", "localisation 0.333",
                 "delay mean -10.0 s  max 30.0 s", "1.50 per 10k vectors", "1 fragments"):
        assert text in table
    assert "localisation n/a" in format_table(evaluate([], Labels("surge", 6000, ())))


def test_load_round_trip(tmp_path: Path) -> None:
    path = tmp_path / "events.jsonl"
    path.write_bytes(b"\n".join(orjson.dumps(ev) for ev in EVENTS) + b"\n\n")
    assert load_events(path) == EVENTS
    labels = load_labels(Path(replay_data.__file__).parent / "single_shift.labels.json")
    assert labels.scenario == "single_shift" and labels.vectors == 6000
    assert [(i.entity, i.metrics, i.kind) for i in labels.incidents] == [
        ("booking-api-2", ("db_pool_wait_p99_ms",), "step")]


@pytest.mark.parametrize("lines, where, reason", [
    ([b'{"ts": 1, "entity": "a", "state": "firing", "incident": "a/1"}', b"{nope"], ":2:", "not valid JSON"),
    ([b"[1, 2]"], ":1:", "not a JSON object"),
    ([b'{"ts": "soon", "entity": "a", "state": "firing", "incident": "a/1"}'], ":1:", "'ts'"),
    ([b'{"ts": 1, "entity": "a", "state": "pending", "incident": "a/1"}'], ":1:", "'state'"),
    ([b'{"ts": 1, "entity": "a", "state": "firing", "incident": ""}'], ":1:", "'incident'"),
    ([b'{"ts": 1, "entity": "a", "state": "firing", "incident": "a/1", "metrics": [{"name": "m"}]}'],
     ":1:", "shift_sigma"),
])
def test_bad_event_lines(tmp_path: Path, lines: list[bytes], where: str, reason: str) -> None:
    path = tmp_path / "events.jsonl"
    path.write_bytes(b"\n".join(lines))
    with pytest.raises(EvaluationError) as err:
        load_events(path)
    message = str(err.value)
    assert message.startswith(f"{path}{where}") and reason in message and "\n" not in message


@pytest.mark.parametrize("text, reason", [
    ('{"vectors": 10,\n "incidents": [}', ":2: not valid JSON"),
    ('{"incidents": []}', "'vectors'"),
    ('{"vectors": 10, "incidents": [{"entity": "a", "start": 5, "end": 1, "metrics": ["m"]}]}', "incident 0"),
    ('{"vectors": 10, "incidents": [{"entity": "a", "start": 1, "end": 5, "metrics": []}]}', "'metrics'"),
    ('{"vectors": 10, "incidents": [], "surges": {"start": 1}}', "'surges' must be a list"),
    ('{"vectors": 10, "incidents": [], "surges": [{"start": 9, "end": 1}]}', "surge 0"),
])
def test_bad_labels(tmp_path: Path, text: str, reason: str) -> None:
    path = tmp_path / "x.labels.json"
    path.write_text(text)
    with pytest.raises(EvaluationError) as err:
        load_labels(path)
    assert str(err.value).startswith(str(path)) and reason in str(err.value)


def test_missing_files_and_bad_arguments(tmp_path: Path) -> None:
    with pytest.raises(EvaluationError, match="cannot read events"):
        load_events(tmp_path / "nothing.jsonl")
    with pytest.raises(EvaluationError, match="cannot read labels"):
        load_labels(tmp_path / "nothing.labels.json")
    with pytest.raises(EvaluationError, match="event 0: 'ts'"):
        evaluate([{"entity": "a", "state": "firing", "incident": "a/1"}], TWO)
    with pytest.raises(EvaluationError, match="already belongs to entity"):
        evaluate([fire(1.0, "a/1"), {**fire(2.0, "a/1"), "entity": "b"}], TWO)
    with pytest.raises(EvaluationError, match="vectors must be positive"):
        evaluate([], TWO, vectors=0)
