"""`shiftsieve replay`, `evaluate` and `demo` as other tools call them (DEVELOPERS.md, Contracts)."""

import gzip
import json
import subprocess
import sys
from pathlib import Path

import pytest

from shiftsieve.stream.cli import main
from shiftsieve.stream.demo import scenarios

DATA = Path(__file__).parent / "data"


def _write_jsonl(path, rows, extra_lines=()):
    with open(path, "w") as f:
        for r in rows:
            f.write(json.dumps(r) + "\n")
        for line in extra_lines:
            f.write(line + "\n")


def _rows(n=700, entity="ferry-gate-1"):
    import numpy as np
    rng = np.random.default_rng(4)
    traffic = 50 + 20 * np.sin(np.arange(n) / 40.0)
    rows = []
    for t in range(n):
        base = traffic[t]
        rows.append({"ts": 1780000000.0 + 30 * t, "entity": entity,
                     "metrics": {"req_per_s": base + rng.normal(), "cpu_ratio": 0.01 * base + 0.01 * rng.normal(),
                                 "queue_len": 0.5 * base + rng.normal(), "lat_ms": 100 + base + rng.normal()}})
    return rows


def test_replay_is_deterministic_and_counts_bad_lines(tmp_path, capsys):
    src = tmp_path / "in.jsonl"
    _write_jsonl(src, _rows(), extra_lines=["{not json", '{"ts": 1, "entity": "", "metrics": {}}'])
    out1, out2, dead = tmp_path / "a.jsonl", tmp_path / "b.jsonl", tmp_path / "dead.jsonl"
    assert main(["replay", str(src), "--events", str(out1), "--dead-letter", str(dead)]) == 0
    err = capsys.readouterr().err
    assert "700 vectors" in err and "2 lines rejected" in err
    letters = [json.loads(l) for l in dead.read_text().splitlines()]
    assert [d["line"] for d in letters] == [701, 702]
    assert main(["replay", str(src), "--events", str(out2), "--quiet"]) == 0
    assert out1.read_bytes() == out2.read_bytes()


def test_replay_reads_wide_csv(tmp_path, capsys):
    out = tmp_path / "ev.jsonl"
    assert main(["replay", str(DATA / "wide_sample.csv"), "--events", str(out)]) == 0
    err = capsys.readouterr().err
    assert "400 vectors (0 scored), 2 entities" in err and "NOTHING WAS SCORED" in err
    assert out.exists()


@pytest.mark.parametrize("make,needle", [
    (lambda p: p / "missing.jsonl", "missing.jsonl"),
    (lambda p: (p / "x.parquet").write_bytes(b"PAR1") and p / "x.parquet", "x.parquet"),
    (lambda p: (p / "bad.jsonl").write_text("garbage\n{}\n") and p / "bad.jsonl", "no valid vector"),
    (lambda p: (p / "bad.jsonl.gz").write_bytes(b"not gzip") and p / "bad.jsonl.gz", "bad.jsonl.gz"),
])
def test_unusable_input_is_one_line_and_exit_2(tmp_path, capsys, make, needle):
    path = make(tmp_path)
    assert main(["replay", str(path), "--events", str(tmp_path / "e.jsonl")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("shiftsieve: error:") and needle in err and err.count("\n") == 1


def test_unwritable_events_file_is_a_clear_error(tmp_path, capsys):
    src = tmp_path / "in.jsonl"
    _write_jsonl(src, _rows(50))
    assert main(["replay", str(src), "--events", str(tmp_path / "no" / "dir" / "e.jsonl")]) == 2
    assert capsys.readouterr().err.startswith("shiftsieve: error:")


def test_console_script_runs_the_contract_command(tmp_path):
    """The exact command other tools call, as a separate process."""
    src = tmp_path / "in.jsonl.gz"
    with gzip.open(src, "wt") as f:
        for r in _rows(600):
            f.write(json.dumps(r) + "\n")
    out = tmp_path / "events.jsonl"
    proc = subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "replay", str(src), "--events", str(out)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert out.exists() and "Traceback" not in proc.stderr


def test_evaluate_command_on_a_replay(tmp_path, capsys):
    data = scenarios()["single_shift"]
    events = tmp_path / "e.jsonl"
    assert main(["replay", str(data), "--events", str(events), "--quiet"]) == 0
    assert main(["evaluate", "--events", str(events), str(data.with_name("single_shift.labels.json")), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["recall"] == 1.0 and report["precision"] == 1.0


def test_demo_prints_alerts_and_the_score(capsys):
    assert main(["demo", "--scenario", "single_shift"]) == 0
    out = capsys.readouterr().out
    assert "FIRING" in out and "db_pool_wait_p99_ms" in out and "RESOLVED" in out
    assert "judgement" in out
    assert main(["demo", "--scenario", "nope"]) == 2


def test_a_refused_vector_is_dead_lettered_with_its_original_bytes(tmp_path, capsys):
    """The engine refuses a sample that does not move time forward; its dead letter is the line
    as it was written (key order, spacing, an RFC 3339 time), not a re-encoding of the vector."""
    rows = _rows(20)
    late = ('{ "metrics": {"req_per_s": 1.5,  "lat_ms": 2}, "entity": "ferry-gate-1",'
            ' "ts": "2026-05-28T20:26:40Z" }')   # 1780000000 s: the first row's time again
    src, dead = tmp_path / "in.jsonl", tmp_path / "dead.jsonl"
    _write_jsonl(src, rows, extra_lines=[late])
    assert main(["replay", str(src), "--events", str(tmp_path / "ev.jsonl"), "--dead-letter", str(dead)]) == 0
    (letter,) = [json.loads(line) for line in dead.read_text().splitlines()]
    assert letter["reason"] == "out_of_order" and letter["line"] == 21
    assert letter["raw"] == late and letter["raw_encoding"] == "utf-8"


def test_invalid_values_are_counted_in_the_summary_and_dead_lettered_as_kept(tmp_path, capsys):
    """A vector with bad entries is kept with them missing (not a rejection: vectors + rejected is still
    every non-blank line), its entries counted by reason, and its line dead-lettered once, naming each
    entry with its reason and value. "12" is a string, not a number (RFC 8259, sections 6 and 7)."""
    rows = _rows(30)
    bad = ('{"ts": 1780000900.5, "entity": "ferry-gate-1", "metrics": {"req_per_s": "12", "cpu_ratio": "n/a", '
           '"queue_len": 3, "lat_ms": "12ms"}}')
    src, dead = tmp_path / "in.jsonl", tmp_path / "dead.jsonl"
    _write_jsonl(src, rows, extra_lines=[bad, "{not json"])
    assert main(["replay", str(src), "--events", str(tmp_path / "ev.jsonl"), "--dead-letter", str(dead)]) == 0
    err = capsys.readouterr().err
    assert "31 vectors" in err and "1 line rejected (bad_json 1)" in err
    assert "3 values invalid and treated as missing (not_a_number 2, numeric_string 1)" in err
    assert "the producer should send JSON numbers" in err
    # The rejection is written at once, the kept line when its vector is released by the reordering window.
    kept, rejected = sorted((json.loads(line) for line in dead.read_text().splitlines()), key=lambda d: d["line"])
    assert (kept["line"], kept["reason"], kept["kept"], kept["raw"]) == (31, "invalid_values", True, bad)
    assert kept["detail"] == ("req_per_s: numeric_string ('12'); cpu_ratio: not_a_number ('n/a'); "
                              "lat_ms: not_a_number ('12ms')")
    assert (rejected["line"], rejected["reason"], rejected["kept"]) == (32, "bad_json", False)


def test_a_csv_cell_that_is_not_a_number_is_counted(tmp_path, capsys):
    src = tmp_path / "in.csv"
    src.write_text("ts,entity,cpu,lat_ms\n1780000000,e1,0.5,oops\n1780000030,e1,NaN,12\n")
    dead = tmp_path / "dead.jsonl"
    assert main(["replay", str(src), "--events", str(tmp_path / "ev.jsonl"), "--dead-letter", str(dead)]) == 0
    assert "2 values invalid and treated as missing (non_finite 1, not_a_number 1)" in capsys.readouterr().err
    letters = [json.loads(line) for line in dead.read_text().splitlines()]
    assert [(d["line"], d["detail"], d["kept"]) for d in letters] == [
        (2, "lat_ms: not_a_number ('oops')", True), (3, "cpu: non_finite (nan)", True)]
