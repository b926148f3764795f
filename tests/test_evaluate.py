"""Bookkeeping of stream/evaluate.py: every expected number below is worked out by hand; the
literature's scores (HitRate, point adjustment) by hand from their papers' definitions, and
point-wise precision/recall/F1 also with scikit-learn's."""

from __future__ import annotations

import math
import statistics
from pathlib import Path

import numpy as np
import orjson
import pytest
from sklearn.metrics import f1_score, precision_score, recall_score

import shiftsieve.replay_data as replay_data
from shiftsieve.stream.labels import DEFAULT_TOLERANCE_SECONDS, EvaluationError, LabelledIncident, Labels, load_labels
from shiftsieve.stream.scoring import format_table, load_events, score_events


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
    fire(1500.0, "api-1/1500", ("a", 5.0)),  # second onset inside a matched label: a repeat, not a false alert
    fire(4950.0, "db-1/4950", ("y", 8.0), ("x", 6.0)),  # 50 s early, within the default 120 s
    fire(9000.0, "db-1/9000", ("x", 6.0)),
    fire(300.0, "api-1/300", state="resolved"),  # never fired: not a prediction
]


def test_matching_scores() -> None:
    e = score_events(EVENTS, TWO)
    assert [p.incident for p in e.predicted] == ["api-1/1030", "api-2/1100", "api-1/1500", "db-1/4950", "db-1/9000"]
    assert [m.predicted.incident for m in e.matches] == ["api-1/1030", "db-1/4950"]
    assert [p.incident for p in e.false_alerts] == ["api-2/1100", "db-1/9000"]
    assert e.missed == () and [p.incident for p in e.repeats] == ["api-1/1500"] and e.unscored == ()
    assert e.precision == 0.5   # matched / (matched + false alerts) = 2 / 4: the repeat is neither
    assert e.recall == 1.0
    assert e.f1 == pytest.approx(2 * 0.5 * 1.0 / 1.5)  # 2/3
    # api-1: top-3 = b(7), a(6), d(5) holds 2 of {a, b, c}; db-1: top-1 = y holds none of {x}
    assert [m.localisation for m in e.matches] == pytest.approx([2 / 3, 0.0])
    assert e.localisation == pytest.approx(1 / 3)
    assert [m.delay_seconds for m in e.matches] == [30.0, -50.0]
    assert e.delay_mean_seconds == -10.0 and e.delay_max_seconds == 30.0
    assert e.delay_median_seconds == statistics.median([30.0, -50.0])   # the stdlib's median: -10
    assert e.delay_median_steps is None                                  # no step_seconds in TWO
    assert e.false_alerts_per_10k == 1.0  # 2 * 10000 / 20000
    assert e.matches[0].predicted.metrics == (("b", 7.0), ("a", 6.0), ("d", 5.0))


def test_vectors_argument_overrides_labels() -> None:
    assert score_events(EVENTS, TWO, vectors=1000).false_alerts_per_10k == 20.0  # 2 * 10000 / 1000


def test_zero_labels_and_silence_is_perfect() -> None:
    surge = Labels("surge", 6000, ())
    e = score_events([], surge)
    assert (e.precision, e.recall, e.f1) == (1.0, 1.0, 1.0)
    assert e.localisation is None and e.delay_mean_seconds is None and e.delay_max_seconds is None
    assert e.false_alerts_per_10k == 0.0


def test_zero_labels_with_a_false_alert() -> None:
    e = score_events([fire(10.0, "api-1/10", ("a", 7.0))], Labels("surge", 6000, ()))
    assert (e.precision, e.recall, e.f1) == (0.0, 1.0, 0.0)
    assert e.false_alerts_per_10k == pytest.approx(10000 / 6000)
    assert e.repeats == ()


def test_silent_detector_misses_everything() -> None:
    e = score_events([], TWO)
    assert (e.precision, e.recall, e.f1) == (1.0, 0.0, 0.0)
    assert [lab.entity for lab in e.missed] == ["api-1", "db-1"]


@pytest.mark.parametrize("onset, matched", [(940.0, True), (939.5, False), (2000.0, True), (2000.5, False)])
def test_tolerance_window_edges(onset: float, matched: bool) -> None:
    labels = Labels("edge", 100, (label("api-1", 1000.0, 2000.0, "a"),))
    e = score_events([fire(onset, f"api-1/{onset}", ("a", 6.0))], labels, tolerance_seconds=60.0)
    assert bool(e.matches) is matched


def test_greedy_by_onset_each_label_once() -> None:
    labels = Labels("overlap", 100, (label("api-1", 2000.0, 4000.0, "a"), label("api-1", 1000.0, 3000.0, "a")))
    events = [fire(2600.0, "api-1/p2", ("a", 6.0)), fire(2500.0, "api-1/p1", ("a", 6.0))]
    e = score_events(events, labels)
    # p1 (earlier onset) takes the earlier-starting label, p2 the other one
    assert [(m.predicted.incident, m.label.start, m.delay_seconds) for m in e.matches] == [
        ("api-1/p1", 1000.0, 1500.0), ("api-1/p2", 2000.0, 600.0)]
    assert e.delay_mean_seconds == 1050.0 and e.delay_max_seconds == 1500.0


def test_localisation_ties_break_by_name() -> None:
    labels = Labels("tie", 100, (label("api-1", 0.0, 100.0, "a"),))
    e = score_events([fire(10.0, "api-1/10", ("z", 5.0), ("a", -5.0))], labels)
    assert e.localisation == 1.0  # |a| == |z|: a ranks first by name


def test_report_and_dict() -> None:
    e = score_events(EVENTS, TWO)
    d = orjson.loads(orjson.dumps(e.to_dict()))
    assert (d["labelled"], d["predicted"], d["matched"], d["false_alerts"], d["repeats"]) == (2, 5, 2, 2, 1)
    assert d["false_alerts_per_10k_vectors"] == 1.0 and d["unscored"] == 0
    assert d["matches"][0]["reported_metrics"] == {"b": 7.0, "a": 6.0, "d": 5.0}
    assert d["repeat_incidents"] == [{"incident": "api-1/1500", "entity": "api-1", "onset": 1500.0}]
    assert d["point_adjusted"] is None and d["false_alerts_per_entity_day"] is None   # no timestamps given
    table = format_table(e)
    for text in ("precision 0.500", "recall 1.000", "F1 0.667", "localisation 0.333",
                 "delay mean -10.0 s  median -10.0 s  max 30.0 s", "1.00 per 10k vectors", "repeats 1: further onsets",
                 "onset 1970-01-01T02:30:00Z", "top x +6.0\u03c3"):
        assert text in table
    assert "localisation n/a" in format_table(score_events([], Labels("surge", 6000, ())))


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
        score_events([{"entity": "a", "state": "firing", "incident": "a/1"}], TWO)
    with pytest.raises(EvaluationError, match="already belongs to entity"):
        score_events([fire(1.0, "a/1"), {**fire(2.0, "a/1"), "entity": "b"}], TWO)
    with pytest.raises(EvaluationError, match="vectors must be positive"):
        score_events([], TWO, vectors=0)


# --- scored_from, tolerance in steps, repeats: the ASD reading of published labelled sets ---------------

def _scored_labels(**extra) -> Labels:
    """api-1 sampled every 60 s at ts 0..540; labelled [120, 240] and [420, 480]; scored from ts 60."""
    incidents = (label("api-1", 120.0, 240.0, "a"), label("api-1", 420.0, 480.0, "a"))
    return Labels("scored", 10, incidents, step_seconds=60.0, tolerance_steps=1, scored_from={"api-1": 60.0},
                  **extra)


def closed(ts: float, incident: str) -> dict:
    return fire(ts, incident, state="resolved")


SCORED_EVENTS = [
    fire(0.0, "api-1/0", ("a", 6.0)), closed(0.0, "api-1/0"),          # before scored_from: not scored
    fire(180.0, "api-1/180", ("a", 6.0)), closed(180.0, "api-1/180"),  # detects [120, 240], 1 step late
    fire(200.0, "api-1/200", ("a", 6.0)), closed(200.0, "api-1/200"),  # again inside it: a repeat
    fire(540.0, "api-1/540", ("a", 6.0)),                             # after [420, 480]: false, never closed
]
API_TS = {"api-1": np.arange(0.0, 600.0, 60.0)}


def test_scored_from_repeats_and_delay_in_steps() -> None:
    e = score_events(SCORED_EVENTS, _scored_labels(), timestamps=API_TS)
    assert e.tolerance_seconds == 60.0                        # 1 step of 60 s
    assert [p.incident for p in e.unscored] == ["api-1/0"]
    assert [m.predicted.incident for m in e.matches] == ["api-1/180"]
    assert [p.incident for p in e.repeats] == ["api-1/200"]
    assert [p.incident for p in e.false_alerts] == ["api-1/540"]
    assert [lab.start for lab in e.missed] == [420.0]
    assert (e.precision, e.recall) == (0.5, 0.5)              # 1 / (1 + 1); 1 of 2 labels
    assert e.delay_median_seconds == 60.0 and e.delay_median_steps == 1.0
    # Scored time: the 9 vectors at or after ts 60, 60 s each = 540 s of one entity.
    assert e.scored_entity_days == pytest.approx(540 / 86400)
    assert e.false_alerts_per_entity_day == pytest.approx(1 / (540 / 86400))


def test_point_adjusted_f1_as_defined_by_xu_et_al_2018() -> None:
    # Xu et al., WWW 2018 ("Donut"), the adjustment: when any point of a labelled segment is
    # alerted, every point of that segment counts as alerted; points outside segments as they are.
    # Scored points are ts 60..540 (scored_from 60): indices 1..9 of API_TS.
    #   labelled (segments [120, 240] and [420, 480]):  ts 120 180 240, 420 480
    #   alerted (spans [180, 180], [200, 200], [540, open)): ts 180, 540   ([0, 0] is unscored)
    #   adjusted: the first segment holds ts 180, so 120 180 240 are alerted; the second holds none.
    y_true = [0, 1, 1, 1, 0, 0, 1, 1, 0]
    y_adjusted = [0, 1, 1, 1, 0, 0, 0, 0, 1]
    pa = score_events(SCORED_EVENTS, _scored_labels(), timestamps=API_TS).point_adjusted
    assert (pa.points, pa.labelled_points, pa.alerted_points) == (9, 5, 4)
    # scikit-learn's point-wise scores of the hand-adjusted vector are the reference.
    assert pa.precision == pytest.approx(precision_score(y_true, y_adjusted))   # 3 / 4
    assert pa.recall == pytest.approx(recall_score(y_true, y_adjusted))         # 3 / 5
    assert pa.f1 == pytest.approx(f1_score(y_true, y_adjusted))                 # 2 / 3
    # Without the adjustment only ts 180 would be a true positive: the convention inflates recall 3x.
    assert recall_score(y_true, [0, 0, 1, 0, 0, 0, 0, 0, 1]) == pytest.approx(pa.recall / 3)


def window(group_lasso: list[str], msbl: list[str]) -> dict:
    return {"group_lasso": [{"name": n, "score": 1.0} for n in group_lasso],
            "msbl": [{"name": n, "score": 1.0} for n in msbl], "rows": 8}


def test_hit_rate_as_defined_by_su_et_al_2019() -> None:
    # Su et al., KDD 2019 (OmniAnomaly), HitRate@P% = |top floor(P% |G|) of the ranking, within G| / |G|,
    # worked by hand:
    # api-1, G = {m1, m2, m4}: ranking by peak |shift| m3 m1 m7 m2 m5
    #   @100%: top 3 = m3 m1 m7 -> 1 of 3;  @150%: top floor(4.5) = 4 = m3 m1 m7 m2 -> 2 of 3
    #   M-SBL window (the last event's): m2 m4 m1 m9 -> top 3 holds all 3 -> 1, and 1
    #   group LASSO window: m4 -> 1/3 at both
    # db-1, G = {x, y}: ranking y z x -> @100%: top 2 = y z -> 1/2;  @150%: top 3 -> 2/2
    labels = Labels("hr", 100, (label("api-1", 0.0, 100.0, "m1", "m2", "m4"), label("db-1", 0.0, 100.0, "x", "y")))
    events = [
        {**fire(10.0, "api-1/10", ("m3", 9.0), ("m1", 8.0), ("m7", 7.0)), "window_metrics": window([], ["m9"])},
        fire(20.0, "api-1/10", ("m2", 6.0), ("m5", 5.0)),
        {**closed(50.0, "api-1/10"), "window_metrics": window(["m4"], ["m2", "m4", "m1", "m9"])},
        fire(10.0, "db-1/10", ("y", 5.0), ("z", 4.0), ("x", 3.0)),
    ]
    e = score_events(events, labels)
    api, db = e.matches
    assert {k: pytest.approx(v) for k, v in api.hit_rates.items()} == {
        "metrics": (1 / 3, 2 / 3), "group_lasso": (1 / 3, 1 / 3), "msbl": (1.0, 1.0)}
    assert db.hit_rates == {"metrics": (1 / 2, 1.0)}   # no window_metrics: no window ranking
    assert (e.hit_rate["metrics"].at_100, e.hit_rate["metrics"].at_150) == pytest.approx((5 / 12, 5 / 6))
    assert e.hit_rate["metrics"].matches == 2 and e.hit_rate["msbl"].matches == 1
    assert (e.hit_rate["msbl"].at_100, e.hit_rate["group_lasso"].at_150) == pytest.approx((1.0, 1 / 3))
    assert e.localisation == pytest.approx(5 / 12)   # the same definition as HitRate@100% on `metrics`
    d = orjson.loads(orjson.dumps(e.to_dict()))
    assert d["hit_rate"]["metrics"]["at_150"] == pytest.approx(5 / 6)
    assert d["matches"][0]["hit_rate"]["msbl"] == {"at_100": 1.0, "at_150": 1.0}
    assert "HitRate@100%/150%: metrics 0.42/0.83  group_lasso 0.33/0.33  msbl 1.00/1.00" in format_table(e)


@pytest.mark.parametrize("onset, matched", [(-500.0, True), (-500.5, False)])
def test_tolerance_in_steps_edges(onset: float, matched: bool) -> None:
    # 5 steps of 300 s before a start at 1000 s: onsets from -500 s on detect it.
    labels = Labels("asd", 100, (label("omi-1", 1000.0, 2000.0, "a"),), step_seconds=300.0, tolerance_steps=5)
    e = score_events([fire(onset, f"omi-1/{onset}", ("a", 6.0))], labels)
    assert bool(e.matches) is matched


def test_labels_without_the_new_keys_keep_the_default_tolerance() -> None:
    assert Labels("old", 10, (), step_seconds=30.0).tolerance_seconds == DEFAULT_TOLERANCE_SECONDS


def test_load_scoring_keys(tmp_path: Path) -> None:
    path = tmp_path / "asd.labels.json"
    path.write_text(orjson.dumps({"vectors": 10, "step_seconds": 300, "tolerance_steps": 5,
                                  "scored_from": {"omi-1": 1702512000, "omi-2": 1702512000.5},
                                  "incidents": [{"entity": "omi-1", "start": 1702740000.0, "end": 1702741500.0,
                                                 "metrics": ["m04"]}]}).decode())
    labels = load_labels(path)
    assert (labels.step_seconds, labels.tolerance_steps, labels.tolerance_seconds) == (300.0, 5, 1500.0)
    assert labels.scored_from == {"omi-1": 1702512000.0, "omi-2": 1702512000.5}
    assert labels.scored_after("omi-1") == 1702512000.0 and labels.scored_after("omi-3") == -math.inf


@pytest.mark.parametrize("extra, reason", [
    ({"step_seconds": 0}, "'step_seconds' must be a positive number"),
    ({"step_seconds": "5m"}, "'step_seconds' must be a positive number"),
    ({"tolerance_steps": 5}, "'tolerance_steps' needs 'step_seconds'"),
    ({"step_seconds": 300, "tolerance_steps": -1}, "'tolerance_steps' must be an integer >= 0"),
    ({"step_seconds": 300, "tolerance_steps": 2.5}, "'tolerance_steps' must be an integer >= 0"),
    ({"scored_from": [1702512000]}, "'scored_from' must map entities to epoch seconds"),
    ({"scored_from": {"omi-1": "2023-12-14"}}, "scored_from 'omi-1': must be a finite number"),
    ({"scored_from": {"": 5.0}}, "scored_from '': must be a finite number"),
    ({"scored_from": {"a": 6.0}}, "incident 0: ends before scored_from of 'a'"),
])
def test_bad_scoring_keys(tmp_path: Path, extra: dict, reason: str) -> None:
    path = tmp_path / "x.labels.json"
    path.write_text(orjson.dumps({"vectors": 10, "incidents": [{"entity": "a", "start": 1, "end": 5,
                                                                "metrics": ["m"]}], **extra}).decode())
    with pytest.raises(EvaluationError) as err:
        load_labels(path)
    message = str(err.value)
    assert message.startswith(str(path)) and reason in message and "\n" not in message


def test_bad_window_metrics_is_a_one_line_error(tmp_path: Path) -> None:
    path = tmp_path / "events.jsonl"
    path.write_bytes(orjson.dumps({**fire(1.0, "a/1"), "window_metrics": {"msbl": [{"score": 1.0}]}}))
    with pytest.raises(EvaluationError, match=r":1: 'window_metrics.msbl' must be a list of objects"):
        load_events(path)
