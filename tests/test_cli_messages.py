"""What the command line tells a person: its version, honest usage lines, and warnings where an
evaluation would otherwise read as a result (nothing scored, labels for entities not in the input)."""

import gzip
import json
from importlib.metadata import version

import pytest

from shiftsieve.stream.cli import main
from shiftsieve.stream.demo import scenarios


@pytest.fixture(scope="module")
def short_input(tmp_path_factory):
    """The first 40 lines of a bundled incident: 10 vectors per entity, far below model.warmup (540)."""
    path = tmp_path_factory.mktemp("cli") / "short.jsonl"
    path.write_bytes(b"\n".join(gzip.open(scenarios()["single_shift"]).read().splitlines()[:40]) + b"\n")
    return path


def test_version_is_the_installed_distribution_version(capsys):
    with pytest.raises(SystemExit) as done:
        main(["--version"])
    assert done.value.code == 0
    # the version pyproject.toml declares, as the installed package metadata reports it (importlib.metadata)
    assert capsys.readouterr().out.strip() == f"shiftsieve {version('shiftsieve')}"


def test_evaluate_usage_shows_its_two_forms_and_run_help_shows_several_brokers(capsys):
    for argv in (["evaluate", "--help"], ["run", "--help"]):
        with pytest.raises(SystemExit):
            main(argv)
    out = capsys.readouterr().out
    assert "shiftsieve evaluate INPUT LABELS [--config FILE]" in out
    assert "shiftsieve evaluate --events EVENTS [INPUT] LABELS" in out
    assert "INPUT LABELS [INPUT LABELS" not in out and "[INPUT LABELS ...]" not in out
    assert "HOST:PORT[,HOST:PORT...]" in out


def test_replay_shorter_than_warmup_says_nothing_was_scored(short_input, tmp_path, capsys):
    assert main(["replay", str(short_input), "--events", str(tmp_path / "e.jsonl")]) == 0
    err = capsys.readouterr().err
    assert "40 vectors (0 scored), 4 entities, 0 incidents" in err
    assert "shiftsieve: warning: NOTHING WAS SCORED" in err
    # what it would take: 530 more vectors at the input's 30 s step (540 - 10; 530 x 30 s = 4 h 25 min)
    assert "booking-api-2: 10 of the 540 vectors model.warmup needs; 530 more vectors, about 4 h 25 min" in err


def test_evaluate_warns_when_nothing_was_scored_and_when_labels_name_absent_entities(short_input, tmp_path, capsys):
    labels = json.loads(scenarios()["single_shift"].with_name("single_shift.labels.json").read_text())
    labels["incidents"][0]["entity"] = "booking-api-9"
    path = tmp_path / "labels.json"
    path.write_text(json.dumps(labels))
    assert main(["evaluate", str(short_input), str(path), "--methods", "shiftsieve"]) == 0
    err = capsys.readouterr().err
    assert "shiftsieve: warning: NOTHING WAS SCORED" in err
    assert "shiftsieve: warning: the labels name 1 entity not in the input (booking-api-9)" in err
