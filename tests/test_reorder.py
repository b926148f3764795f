"""Time order: duplicate_ts apart from out_of_order, replay's reordering window
(source.allowed_lateness_seconds) and what the summary and the dead letters say about refusals.

The reference for "in order" is the engine itself (its refusals decide what a model takes), and
for the times a person reads RFC 3339 (section 5.6, ``date-time`` in UTC with ``Z``).
"""

from __future__ import annotations

import gzip
import json
import re
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftsieve.stream.config import load_config
from shiftsieve.stream.decode import Vector
from shiftsieve.stream.demo import scenarios
from shiftsieve.stream.engine import Engine
from shiftsieve.stream.readers import open_records
from shiftsieve.stream.reorder import TimeOrdered, order_refusal, taken_in_order
from shiftsieve.stream.replay import replay

TS = 1780000000.0
#: RFC 3339 section 5.6 date-time, as timefmt.rfc3339 writes it (UTC, "Z").
RFC3339 = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(?:\.\d+)?Z")


def config(lateness: float | None = None):
    env = {} if lateness is None else {"SHIFTSIEVE_SOURCE_ALLOWED_LATENESS_SECONDS": repr(lateness)}
    return load_config(None, environ=env)


@pytest.fixture(scope="module")
def incident_lines() -> list[bytes]:
    """single_shift: 6,000 vectors of 4 interleaved entities, each every 30 s, in time order."""
    return gzip.open(scenarios()["single_shift"]).read().splitlines()


def write(path: Path, lines: list[bytes]) -> Path:
    path.write_bytes(b"\n".join(lines) + b"\n")
    return path


def run(path: Path, tmp_path: Path, lateness: float | None = None):
    events, dead = tmp_path / f"{path.stem}.events.jsonl", tmp_path / f"{path.stem}.dead.jsonl"
    summary = replay(path, config(lateness), events_path=str(events), dead_letter_path=str(dead), progress=False)
    return summary, events.read_bytes(), [json.loads(line) for line in dead.read_text().splitlines()]


# --- the rule ------------------------------------------------------------------------------------

def test_order_refusal_names_duplicates_apart_from_older_times():
    assert order_refusal(TS + 1, TS) is None
    assert order_refusal(TS, TS) == "duplicate_ts"
    assert order_refusal(TS - 1, TS) == "out_of_order"
    assert order_refusal(TS, float("-inf")) is None


def vec(entity: str, ts: float) -> Vector:
    return Vector(ts, entity, {"x": 1.0}, {})


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.sampled_from("abc"), st.integers(0, 12)), max_size=60))
def test_taken_in_order_is_what_the_engine_takes(items):
    """evaluate and tune filter files with taken_in_order: exactly the vectors the engine accepts."""
    vectors = [vec(entity, TS + 30 * step) for entity, step in items]
    engine = Engine.from_config(config())
    taken = [v for v in vectors if engine.feed(v) is None]
    assert list(taken_in_order(vectors)) == taken


# --- the window ----------------------------------------------------------------------------------

def ordered(lines: list[bytes], tmp_path: Path, lateness: float) -> list[tuple[int, str, float, bytes | None]]:
    with TimeOrdered(open_records(write(tmp_path / "in.jsonl", lines)), lateness) as records:
        return [(records.line, r.entity, r.ts, records.raw) for r in records]


def line(entity: str, ts: float) -> bytes:
    return json.dumps({"ts": ts, "entity": entity, "metrics": {"x": 1.0}}).encode()


def test_disorder_within_the_window_comes_out_in_time_order_with_its_line_and_bytes(tmp_path):
    stamps = [TS + 30, TS, TS + 90, TS + 60, TS + 120]   # two swaps, each 30 s behind the newest
    lines = [line("a", ts) for ts in stamps]
    out = ordered(lines, tmp_path, lateness=60)
    assert [ts for _, _, ts, _ in out] == sorted(stamps)
    assert [(number, raw) for number, _, ts, raw in out] == [(stamps.index(ts) + 1, lines[stamps.index(ts)])
                                                              for _, _, ts, _ in out]


def test_a_vector_beyond_the_window_passes_at_once_and_the_engine_judges_it(tmp_path):
    stamps = [TS, TS + 30, TS + 60, TS + 90, TS - 100]   # the last is 190 s behind the newest
    out = ordered([line("a", ts) for ts in stamps], tmp_path, lateness=60)
    assert [ts for _, _, ts, _ in out] == [TS, TS - 100, TS + 30, TS + 60, TS + 90]
    engine = Engine.from_config(config())
    assert [engine.feed(vec("a", ts)) for _, _, ts, _ in out] == [None, "out_of_order", None, None, None]


def test_the_window_holds_only_vectors_within_it(tmp_path):
    """Memory: per entity at most the vectors within `lateness` of its newest (3 at a 30 s step, 2 entities)."""
    lines = [line(e, TS + 30 * k) for k in range(200) for e in ("a", "b")]
    with TimeOrdered(open_records(write(tmp_path / "in.jsonl", lines)), 60) as records:
        most = 0
        for _ in records:
            most = max(most, records.held)
    assert most <= 2 * 3


def test_rejections_pass_through_and_entities_interleave_deterministically(tmp_path):
    lines = [line("a", TS + 30), line("b", TS + 30), b"{not json", line("a", TS), line("b", TS)]
    runs = []
    for _ in range(2):
        with TimeOrdered(open_records(write(tmp_path / "in.jsonl", lines)), 60) as records:
            runs.append([(records.line, getattr(r, "reason", None) or (r.entity, r.ts)) for r in records])
    assert runs[0] == runs[1] == [(3, "bad_json"), (4, ("a", TS)), (5, ("b", TS)), (1, ("a", TS + 30)),
                                  (2, ("b", TS + 30))]


# --- replay, end to end --------------------------------------------------------------------------

def test_a_reverse_ordered_file_within_the_window_gives_the_sorted_files_events(incident_lines, tmp_path):
    """Before the window a reverse-ordered file lost 5,996 of its 6,000 vectors (exit 0)."""
    sorted_summary, sorted_events, _ = run(write(tmp_path / "sorted.jsonl", incident_lines), tmp_path)
    summary, events, dead = run(write(tmp_path / "reverse.jsonl", incident_lines[::-1]), tmp_path, lateness=86400)
    assert (summary.vectors, summary.rejected, dead) == (6000, 0, [])
    assert events == sorted_events and sorted_summary.incidents == summary.incidents == 1
    assert summary.order.reordered == 5996
    assert "5,996 vectors arrived behind their entity's newest and were put back in time order" in summary.format()


def test_two_swapped_lines_cost_at_most_the_one_moved_back(incident_lines, tmp_path):
    """Lines 2001 and 2101 swapped: the later vector (booking-api-1, 25 of its 30 s steps ahead) used to
    make the 24 of its entity's vectors between them and the displaced one older than its last accepted
    time, 25 refused; now they pass it, and only the displaced one (660 s behind by then) is refused."""
    lines = list(incident_lines)
    lines[2000], lines[2100] = lines[2100], lines[2000]
    summary, _, dead = run(write(tmp_path / "swapped.jsonl", lines), tmp_path)
    assert summary.vectors == 5999 and summary.rejected_by_reason == {"out_of_order": 1}
    assert [d["line"] for d in dead] == [2101] and dead[0]["raw"].encode() == lines[2100]


def times(text: str) -> list[float]:
    """The RFC 3339 times in ``text``, as epoch seconds."""
    return [datetime.fromisoformat(s).timestamp() for s in re.findall(RFC3339, text)]


def test_beyond_the_window_refusals_are_reported_with_the_last_accepted_time(incident_lines, tmp_path):
    """Reverse order, 60 s window: 4 vectors per entity are taken (before the window: 1)."""
    summary, _, dead = run(write(tmp_path / "reverse.jsonl", incident_lines[::-1]), tmp_path)
    assert summary.vectors == 16 and summary.rejected_by_reason == {"out_of_order": 5984}
    first = summary.order.first["out_of_order"]
    notes = summary.format().splitlines()
    (warning,) = [n for n in notes if "older than their entity's last accepted time" in n]
    assert warning.startswith("warning: 5,984 vectors") and f"({first.entity}: last accepted" in warning
    assert times(warning) == [first.last_ts, first.ts] and first.ts < first.last_ts
    advice = notes[notes.index(warning) + 1]
    assert "Sort it" in advice and "source.allowed_lateness_seconds" in advice and "up to 60 s" in advice
    # Per entity the three newest are held and the fourth passes and is taken (90 s behind the newest);
    # the furthest refused, the entity's first vector, lies 1,496 steps of 30 s behind that one.
    assert "44,880 s behind" in advice
    letter = dead[0]
    assert letter["reason"] == "out_of_order" and not letter["kept"] and "last accepted vector, at" in letter["detail"]
    assert times(letter["detail"]) == [first.ts, first.last_ts]


def test_a_repeated_time_is_duplicate_ts_not_out_of_order(tmp_path):
    rows = [line("a", TS + 30 * k) for k in range(20)]
    path = write(tmp_path / "dup.jsonl", rows + [rows[5], rows[-1]])   # an old line again, the newest again
    summary, _, dead = run(path, tmp_path)
    assert summary.rejected_by_reason == {"out_of_order": 1, "duplicate_ts": 1}
    assert sorted(d["reason"] for d in dead) == ["duplicate_ts", "out_of_order"]
    text = summary.format()
    assert "1 vector repeated its entity's last accepted time and was refused as duplicate_ts" in text
    assert "1 vector older than its entity's last accepted time was refused" in text


def test_run_has_no_window_and_says_so():
    from shiftsieve.stream.reorder import OrderRefusal, OrderSummary
    notes = OrderSummary({"out_of_order": OrderRefusal("a", TS, TS - 30, 30.0)}).notes({"out_of_order": 2})
    assert "run takes them as they come" in notes[1] and "allowed_lateness" not in " ".join(notes)


def test_engine_keeps_the_first_refusal_and_the_largest_gap():
    engine = Engine.from_config(config())
    for ts in (TS, TS + 30, TS + 10, TS - 500, TS + 30):
        engine.feed(vec("a", ts))
    late, same = engine.order_refusals["out_of_order"], engine.order_refusals["duplicate_ts"]
    assert (late.entity, late.last_ts, late.ts, late.largest_gap) == ("a", TS + 30, TS + 10, 530.0)
    assert (same.last_ts, same.ts) == (TS + 30, TS + 30)
    assert (engine.counts.rejected_out_of_order, engine.counts.rejected_duplicate_ts) == (2, 1)
    assert np.isfinite(late.largest_gap)


def test_a_line_moved_far_ahead_costs_nothing(incident_lines, tmp_path):
    """Line 2101 moved to 2001 (25 of its entity's steps early): used to cost the 25 it jumped over."""
    lines = list(incident_lines)
    lines.insert(2000, lines.pop(2100))
    summary, _, dead = run(write(tmp_path / "ahead.jsonl", lines), tmp_path)
    assert (summary.vectors, summary.rejected, dead) == (6000, 0, [])
