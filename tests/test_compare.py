"""`shiftsieve evaluate INPUT LABELS`: shiftsieve against the baselines (stream/evaluate.py), scored
against the bundled incidents' labels files (the generator's planted ground truth)."""

import json

import pytest

from shiftsieve.stream.cli import main
from shiftsieve.stream.config import load_config
from shiftsieve.stream.evaluate import METHODS, compare_methods, compare_vectors, format_comparison
from shiftsieve.stream.replay import replay
from shiftsieve.stream.demo import scenarios
from shiftsieve.stream.labels import EvaluationError, load_labels


def _files(name):
    data = scenarios()[name]
    return data, data.with_name(f"{name}.labels.json")


@pytest.fixture(scope="module")
def single_shift():
    data, labels = _files("single_shift")
    return compare_methods(data, load_config(None), load_labels(labels))


def test_every_method_runs_and_shiftsieve_finds_the_labelled_fault(single_shift):
    assert [r.method for r in single_shift] == list(METHODS)
    by = {r.method: r for r in single_shift}
    e = by["shiftsieve"].evaluation
    # The labels file is the reference: one step incident on booking-api-2, db_pool_wait_p99_ms.
    assert (e.labelled, len(e.matches), len(e.false_alerts)) == (1, 1, 0)
    assert e.localisation == 1.0
    assert all(r.evaluation.vectors == 6000 and r.vectors_per_second > 0 for r in single_shift)
    assert not by["halfspacetrees"].localises
    hst = by["halfspacetrees"].evaluation.predicted
    assert hst and all(p.metrics == () for p in hst)   # whole-vector events name no metric


def test_table_has_one_row_per_method_and_no_hit_rate_for_hst(single_shift):
    table = format_comparison(single_shift).splitlines()
    head = table[1].split("  ")
    for column in ("F1", "prec", "recall", "false/day", "repeat", "HR metrics", "HR msbl", "PA-F1*",
                   "seconds", "vectors/s"):
        assert column in [cell.strip() for cell in head if cell.strip()]
    hst = dict(zip([c.strip() for c in head if c.strip()],
                   [c.strip() for c in next(line for line in table if line.startswith("halfspacetrees"))
                    .split("  ") if c.strip()]))
    assert hst["HR metrics"] == "n/a"
    assert all(len(line) <= 140 for line in table)
    assert sum(line.split(" ")[0] in METHODS for line in table) == len(METHODS)
    assert "point-adjusted F1 (Xu et al. 2018)" in " ".join(table) and "inflates" in " ".join(table)


def test_surge_per_metric_zscore_alerts_more_than_shiftsieve():
    # Per-metric thresholds fire on traffic surges (README); the surge file's labels say there is no
    # fault, so every alert is false.
    data, labels = _files("surge")
    rows = compare_methods(data, load_config(None), load_labels(labels), methods=["shiftsieve", "ewma_zscore"])
    shiftsieve, ewma = (r.evaluation for r in rows)
    assert shiftsieve.labelled == 0
    assert len(shiftsieve.false_alerts) <= len(ewma.false_alerts)
    assert len(ewma.false_alerts) > 0


def test_unknown_method_is_refused():
    data, labels = _files("single_shift")
    with pytest.raises(EvaluationError, match="unknown method nope"):
        compare_methods(data, load_config(None), load_labels(labels), methods=["nope"])


def test_cli_compares_methods_as_json(capsys):
    data, labels = _files("single_shift")
    assert main(["evaluate", str(data), str(labels), "--methods", "shiftsieve,halfspacetrees", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [r["method"] for r in rows] == ["shiftsieve", "halfspacetrees"]
    assert rows[0]["f1"] == 1.0 and rows[1]["localises"] is False


def test_cli_scores_an_events_file_with_its_input(tmp_path, capsys):
    # With INPUT, the events are scored over the input's time: 4 entities of the bundled file, each
    # scored after scored_from; the labels file is the generator's, plus a scored_from for one entity.
    data, labels = _files("single_shift")
    events = tmp_path / "events.jsonl"
    assert main(["replay", str(data), "--events", str(events), "--quiet"]) == 0
    scored = tmp_path / "scored.labels.json"
    spec = json.loads(labels.read_text())
    start = spec["incidents"][0]["start"]
    scored.write_text(json.dumps({**spec, "tolerance_steps": 4, "scored_from": {"booking-api-2": start - 3600}}))
    assert main(["evaluate", "--events", str(events), str(data), str(scored), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["recall"] == 1.0 and report["tolerance_seconds"] == 4 * spec["step_seconds"]
    # Scored time: three entities whole (1500 vectors each), booking-api-2 (ts 1780000004 + 30 k, k < 1500)
    # from 1780027004 - 3600 = 1780023404 on: k >= 780, 720 vectors; 30 s each.
    assert spec["step_seconds"] == 30.0 and start == 1780027004.0
    assert report["scored_entity_days"] == pytest.approx((3 * 1500 + 720) * 30 / 86400)
    assert report["point_adjusted"]["f1"] > 0 and "inflates" in report["point_adjusted"]["convention"]


def test_cli_scores_an_events_file(tmp_path, capsys):
    data, labels = _files("single_shift")
    events = tmp_path / "empty.jsonl"
    events.write_text("")
    assert main(["evaluate", "--events", str(events), str(labels), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["recall"] == 0.0 and report["precision"] == 1.0   # evaluate.py's stated conventions


@pytest.mark.parametrize("args, message", [
    (["INPUT", "LABELS", "--methods", "shiftsieve,nope"], "unknown method nope"),
    (["missing.jsonl", "LABELS"], "missing.jsonl"),
    (["INPUT", "missing.labels.json"], "missing.labels.json"),
    (["INPUT"], "takes INPUT LABELS"),
    (["--events", "e.jsonl", "INPUT", "LABELS", "LABELS"], "takes EVENTS [INPUT] LABELS"),
    (["--events", "e.jsonl", "LABELS", "--config", "c.toml"], "--config only with INPUT"),
    (["INPUT", "BAD_LABELS"], "scored_from 'booking-api-2': must be a finite number"),
])
def test_cli_errors_are_one_line_with_exit_2(tmp_path, capsys, args, message):
    data, labels = _files("single_shift")
    bad = tmp_path / "bad.labels.json"
    bad.write_text(json.dumps({**json.loads(labels.read_text()), "scored_from": {"booking-api-2": "soon"}}))
    real = {"INPUT": str(data), "LABELS": str(labels), "missing.jsonl": str(tmp_path / "missing.jsonl"),
            "BAD_LABELS": str(bad)}
    assert main(["evaluate", *[real.get(a, a) for a in args]]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("shiftsieve: error:") and message in err and "\n" not in err


def test_one_replay_serves_the_comparison(single_shift):
    """The report compares on the vectors its replay read and reuses its events: the scores must be
    those of the separate comparison run (times aside: they measure different things)."""
    data, labels = _files("single_shift")
    config = load_config(None)
    events, vectors = [], []
    summary = replay(data, config, sinks=[events.append], vector_sink=vectors.append, progress=False)
    methods = ["shiftsieve", "ewma_zscore", "halfspacetrees"]   # streamed, stacked, per entity: each path once
    rows = compare_vectors(vectors, config, load_labels(labels), methods=methods,
                           shiftsieve_run=(events, summary.seconds))

    def scores(row):
        return {k: v for k, v in row.to_dict().items() if k not in ("seconds", "vectors_per_second")}
    assert [scores(r) for r in rows] == [scores(r) for r in single_shift if r.method in methods]
    assert rows[0].seconds == summary.seconds


def test_every_baseline_is_a_reference_method_of_one_interface():
    from shiftsieve.stream.evaluate import reference_methods
    methods = reference_methods(load_config(None))
    assert set(methods) == set(METHODS) - {"shiftsieve"}
    assert {name for name, m in methods.items() if not m.localises} == {"halfspacetrees"}   # whole vectors only
