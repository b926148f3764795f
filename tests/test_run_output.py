"""What `shiftsieve run` tells the person who started it: where alerts go without --events, a start
line, an end-of-input summary, the listen address when it is taken, and the two series the README
tells operators to watch (solver iterations, snapshot age)."""

import gzip
import io
import json
import re
import signal
import socket
import subprocess
import sys
import time

import pytest

from shiftsieve.stream.config import load_config
from shiftsieve.stream.demo import scenarios
from shiftsieve.stream.service import Service
from shiftsieve.stream.sources import Message

RFC3339_UTC = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ")   # RFC 3339 section 5.6, "Z" for UTC


@pytest.fixture(scope="module")
def incident_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("run") / "single_shift.jsonl"
    path.write_bytes(gzip.open(scenarios()["single_shift"]).read())
    return path


class FakeTerminal(io.StringIO):
    def isatty(self) -> bool:
        return True


@pytest.fixture()
def keep_signal_handlers():
    """Service.run installs SIGTERM/SIGINT handlers when it runs on the main thread: put pytest's back."""
    saved = {s: signal.getsignal(s) for s in (signal.SIGTERM, signal.SIGINT)}
    yield
    for s, handler in saved.items():
        signal.signal(s, handler)


def test_without_events_a_pipe_gets_json_lines_and_stderr_a_start_line_and_a_summary(incident_file):
    proc = subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--source", str(incident_file),
                           "--listen", "127.0.0.1:0"], capture_output=True, timeout=120)
    assert proc.returncode == 0, proc.stderr.decode()
    events = [json.loads(line) for line in proc.stdout.decode().splitlines()]
    assert [(e["entity"], e["state"]) for e in events] == [("booking-api-2", "firing"), ("booking-api-2", "resolved")]
    err = proc.stderr.decode().splitlines()
    start = err[0]
    assert start.startswith("shiftsieve: run: reading ") and str(incident_file) in start
    assert re.search(r"on http://127\.0\.0\.1:\d+", start) and "alerts to stdout (JSON lines)" in start
    # The end-of-input summary, as replay prints it: every vector of the file, and how many were scored.
    assert any(line.startswith("shiftsieve: 6,000 vectors (3,840 scored), 4 entities, 1 incident (2 events)")
               for line in err), err


def test_on_a_terminal_alerts_are_lines_for_a_person(incident_file, keep_signal_handlers, monkeypatch):
    terminal = FakeTerminal()
    monkeypatch.setattr(sys, "stdout", terminal)
    service = Service(load_config(None), source_url=str(incident_file), listen="127.0.0.1:0")
    assert service.run() == 0
    text = terminal.getvalue()
    assert "FIRING    booking-api-2  incident booking-api-2/1780027064  (new incident)" in text
    assert "RESOLVED  booking-api-2" in text and "{" not in text   # no JSON for a person
    head = text.splitlines()[0]
    assert RFC3339_UTC.match(head)
    # The change beside observed and expected: observed - expected, and as a percentage of expected.
    row = next(line for line in text.splitlines() if line.strip().startswith("db_pool_wait_p99_ms"))
    observed, expected, diff, pct = re.search(
        r"([\d.]+)\s+([\d.]+)\s+([+-][\d.]+) \(([+-][\d.]+) %\)", row).groups()
    assert float(diff) == pytest.approx(float(observed) - float(expected), abs=0.011)
    assert float(pct) == pytest.approx(100 * (float(observed) - float(expected)) / float(expected), abs=1.0)


def test_an_address_in_use_is_named(incident_file):
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        address = f"127.0.0.1:{taken.getsockname()[1]}"
        proc = subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--source", str(incident_file),
                               "--listen", address], capture_output=True, timeout=60)
    assert proc.returncode == 2
    assert proc.stderr.decode().strip() == (f"shiftsieve: error: cannot listen on {address} (http.listen, --listen): "
                                            "Address already in use")


def _metric(text: str, name: str) -> float:
    return float(re.search(rf"^{re.escape(name)} (\S+)$", text, re.M).group(1))


def test_solver_iterations_histogram_counts_every_scored_vector(incident_file, keep_signal_handlers, tmp_path):
    service = Service(load_config(None), source_url=str(incident_file), listen="127.0.0.1:0",
                      events_path=str(tmp_path / "events.jsonl"))
    assert service.run() == 0
    text = service.exporter.exposition().decode()
    # Prometheus exposition format: a histogram's _count is its number of observations and its
    # buckets are cumulative, ending with le="+Inf" equal to _count (a stated fact of the format).
    scored = sum(max(m.detector.samples - m.detector.config.warmup, 0) for m in service.engine.entities.values())
    assert scored == 3840 and _metric(text, "shiftsieve_solver_iterations_count") == scored
    buckets = [float(v) for v in re.findall(r'^shiftsieve_solver_iterations_bucket\{le="[^"]+"\} (\S+)$', text, re.M)]
    assert buckets == sorted(buckets) and buckets[-1] == scored
    assert _metric(text, "shiftsieve_solver_iterations_sum") == service.engine.counts.solver_iterations
    # Without a state directory there are no snapshots, so there is no snapshot age to show.
    assert "shiftsieve_snapshot_age_seconds" not in text


def test_snapshot_age_is_the_age_of_the_oldest_unsaved_change(tmp_path, incident_file):
    config = load_config(None, environ={"SHIFTSIEVE_STATE_DIRECTORY": str(tmp_path / "state")})
    service = Service(config, source_url=str(incident_file), listen="127.0.0.1:0")

    def age() -> float:
        return _metric(service.exporter.exposition().decode(), "shiftsieve_snapshot_age_seconds")

    assert age() == 0.0   # nothing changed yet
    lines = incident_file.read_bytes().splitlines()[:80]
    service.take([Message(i, line) for i, line in enumerate(lines[:40])])
    service.flush()                  # the models changed: the age counts from here
    time.sleep(0.3)
    service.take([Message(40 + i, line) for i, line in enumerate(lines[40:])])
    service.flush()                  # changed again, still unsaved
    assert age() >= 0.3              # from the oldest change on, not from the newest
    service.snapshot()
    assert age() == 0.0
