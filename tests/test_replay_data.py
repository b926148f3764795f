"""The bundled incidents: reproducible, in the vector-message contract, and honest to their labels."""

from __future__ import annotations

import csv
import gzip
import math
import subprocess
import sys
from functools import lru_cache
from pathlib import Path

import numpy as np
import orjson
import pytest

import shiftsieve.replay_data as replay_data
from shiftsieve.replay_data.generate import CATALOG, INCIDENT_NAMES

REPLAY = Path(replay_data.__file__).resolve().parent
CSV_SAMPLE = Path(__file__).resolve().parent / "data" / "wide_sample.csv"
RANK = 5  # the generator's number of shared factors
TRAFFIC_METRIC = {"booking-api": "http_requests_per_s", "seatmap-worker": "queue_consume_per_s",
                  "manifest-db": "db_transactions_per_s"}


@lru_cache(maxsize=None)
def load(name: str) -> tuple[list[dict], dict]:
    lines = gzip.decompress((REPLAY / f"{name}.jsonl.gz").read_bytes()).splitlines()
    return [orjson.loads(line) for line in lines], orjson.loads((REPLAY / f"{name}.labels.json").read_bytes())


def entity_matrix(rows: list[dict], entity: str) -> tuple[np.ndarray, list[str], np.ndarray]:
    """(ts, names, noise-whitened values) of the entity's never-missing metrics: each metric on its
    generation scale (log1p for the log metrics) divided by the catalog's noise sigma."""
    mine = [r for r in rows if r["entity"] == entity]
    catalog = {m.name: m for m in CATALOG[mine[0]["labels"]["service"]]}
    names = sorted(n for n in catalog if all(r["metrics"].get(n) is not None for r in mine))
    x = np.array([[r["metrics"][n] for n in names] for r in mine])
    for j, name in enumerate(names):
        x[:, j] = (np.log1p(x[:, j]) if catalog[name].log else x[:, j]) / catalog[name].sigma
    return np.array([r["ts"] for r in mine]), names, x


def baseline_projector(x: np.ndarray, fit: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(mean, I - U U^T) of a rank-RANK subspace fitted on the rows `fit` of noise-whitened data."""
    mean = x[fit].mean(axis=0)
    u = np.linalg.svd(x[fit] - mean, full_matrices=False)[2][:RANK].T
    return mean, np.eye(x.shape[1]) - u @ u.T


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("replay")
    subprocess.run([sys.executable, "-m", "shiftsieve.replay_data.generate", "--out", str(out),
                    "--csv-sample", str(out / "wide_sample.csv")], check=True, capture_output=True)
    return out


@pytest.mark.parametrize("name", INCIDENT_NAMES)
def test_regeneration_is_byte_identical(regenerated: Path, name: str) -> None:
    for suffix in (".jsonl.gz", ".labels.json"):
        assert (regenerated / f"{name}{suffix}").read_bytes() == (REPLAY / f"{name}{suffix}").read_bytes()


def test_csv_sample_is_byte_identical(regenerated: Path) -> None:
    assert (regenerated / "wide_sample.csv").read_bytes() == CSV_SAMPLE.read_bytes()


@pytest.mark.parametrize("name", INCIDENT_NAMES)
def test_messages_follow_the_contract(name: str) -> None:
    rows, labels = load(name)
    assert (REPLAY / f"{name}.jsonl.gz").stat().st_size < 1_000_000
    assert len(rows) == labels["vectors"]
    assert rows[0]["ts"] == labels["start"] and rows[-1]["ts"] == labels["end"]
    last: dict[str, float] = {}
    names: dict[str, set[str]] = {}
    for i, r in enumerate(rows):
        assert set(r) == {"ts", "entity", "metrics", "labels"}
        assert isinstance(r["ts"], float) and isinstance(r["entity"], str) and r["entity"]
        assert all(isinstance(k, str) and isinstance(v, str) for k, v in r["labels"].items())
        assert isinstance(r["metrics"], dict) and r["metrics"]
        for metric, value in r["metrics"].items():
            assert value is None or (isinstance(value, float) and math.isfinite(value) and value >= 0.0)
            assert value is None or not metric.endswith("_ratio") or value <= 1.0
        assert i == 0 or r["ts"] >= rows[i - 1]["ts"]
        if r["entity"] in last:
            gap = r["ts"] - last[r["entity"]]
            assert gap > 0 and gap % labels["step_seconds"] == 0
        last[r["entity"]] = r["ts"]
        names.setdefault(r["entity"], set()).update(r["metrics"])
    assert sorted(names) == sorted(labels["entities"]) and len(names) >= 3
    assert all(30 <= len(n) <= 60 for n in names.values())


@pytest.mark.parametrize("name", INCIDENT_NAMES)
def test_labels_agree_with_the_data(name: str) -> None:
    rows, labels = load(name)
    step = labels["step_seconds"]
    for inc in labels["incidents"]:
        assert inc["kind"] in ("step", "ramp")
        assert labels["start"] + 800 * step <= inc["start"] <= inc["end"] <= labels["end"]
        assert inc["metrics"] == sorted(inc["shift_sigma"]) and inc["metrics"]
        window = [r for r in rows if r["entity"] == inc["entity"] and inc["start"] <= r["ts"] <= inc["end"]]
        assert len(window) == round((inc["end"] - inc["start"]) / step) + 1
        assert all(r["metrics"].get(m) is not None for r in window for m in inc["metrics"])
    at = {(r["entity"], r["ts"]): r["metrics"] for r in rows}
    for t in labels["transients"]:
        assert at[t["entity"], t["ts"]].get(t["metric"]) is not None
    for g in labels["gaps"]:
        inside = [r for r in rows if r["entity"] == g["entity"] and g["start"] <= r["ts"] <= g["end"]]
        if not g["metrics"]:
            assert not inside
        for m in g["metrics"]:
            assert all((r["metrics"][m] is None) if g["how"] == "null" else (m not in r["metrics"]) for r in inside)
            assert len(inside) == round((g["end"] - g["start"]) / step) + 1
    for late in labels["late_metrics"]:
        mine = [r for r in rows if r["entity"] == late["entity"]]
        assert all(late["metric"] not in r["metrics"] for r in mine if r["ts"] < late["first_ts"])
        assert all(late["metric"] in r["metrics"] for r in mine if r["ts"] >= late["first_ts"])


def test_scenario_shapes() -> None:
    assert not load("surge")[1]["incidents"]
    (single,) = load("single_shift")[1]["incidents"]
    assert len(single["metrics"]) == 1 and single["kind"] == "step"
    (multi,) = load("multi_shift")[1]["incidents"]
    assert 3 <= len(multi["metrics"]) <= 5 and multi["kind"] == "step"
    labels = load("ramp")[1]
    assert [i["kind"] for i in labels["incidents"]] == ["ramp"]
    assert labels["transients"] and labels["late_metrics"]
    assert {g["how"] for g in labels["gaps"]} == {"null", "absent"}


@pytest.mark.parametrize("name", ["single_shift", "multi_shift", "ramp"])
def test_labelled_shifts_are_in_the_data(name: str) -> None:
    """Least squares on the labelled support, against a rank-5 baseline fitted on the normal
    period (noise-whitened with the catalog's sigma), recovers the labelled size; removing it
    leaves nothing on the other metrics."""
    rows, labels = load(name)
    for inc in labels["incidents"]:
        ts, names, x = entity_matrix(rows, inc["entity"])
        window = (ts >= inc["start"]) & (ts <= inc["end"])
        fit = (np.arange(ts.size) >= 200) & (ts < inc["start"])
        mean, p = baseline_projector(x, fit)
        support = [names.index(m) for m in inc["metrics"]]
        z = x[window] - mean
        shifts = np.linalg.lstsq(p[:, support], (z @ p).T, rcond=None)[0].T  # samples x support
        n = int(window.sum())
        profile = np.arange(1, n + 1) / n if inc["kind"] == "ramp" else np.ones(n)
        expected = profile[:, None] * np.array([inc["shift_sigma"][m] for m in inc["metrics"]])
        assert np.abs(shifts.mean(axis=0) - expected.mean(axis=0)).max() < 0.6
        rest = (z - shifts @ np.eye(len(names))[support]) @ p
        others = [j for j in range(len(names)) if j not in support]
        assert np.abs(rest[:, others].mean(axis=0)).max() < 0.75


def test_surge_exceeds_earlier_traffic() -> None:
    rows, labels = load("surge")
    (surge,) = labels["surges"]
    assert surge["traffic_ratio"] > 1.5
    for entity, service in labels["entities"].items():
        metric = TRAFFIC_METRIC[service]
        values = [(r["ts"], r["metrics"][metric]) for r in rows if r["entity"] == entity]
        before = max(v for t, v in values if t < surge["start"])
        during = max(v for t, v in values if surge["start"] <= t <= surge["end"])
        assert during > 1.3 * before


def test_surge_stays_on_the_shared_directions() -> None:
    """A baseline fitted before the surge explains the surge: residuals stay at noise level."""
    rows, labels = load("surge")
    (surge,) = labels["surges"]
    for entity in labels["entities"]:
        ts, _, x = entity_matrix(rows, entity)
        fit = ts < surge["start"]
        window = (ts >= surge["start"]) & (ts <= surge["end"])
        mean, p = baseline_projector(x, fit)
        r = (x - mean) @ p
        assert np.abs(r[window].mean(axis=0)).max() < 0.75
        assert np.percentile(np.abs(r[window]), 99) < 1.25 * np.percentile(np.abs(r[fit]), 99)


def test_naive_per_metric_threshold_fires_on_the_surge() -> None:
    """Common practice: a per-metric 3.5-sigma rolling z-score (window 120 samples) fires on a
    traffic surge although nothing is broken; that is the case the surge file is for."""
    rows, labels = load("surge")
    (surge,) = labels["surges"]
    width = 120
    for entity in labels["entities"]:
        ts, names, x = entity_matrix(rows, entity)
        onset = int(np.argmax(ts >= surge["start"]))
        inside = np.flatnonzero((ts >= surge["start"]) & (ts <= surge["end"]))
        fired = 0
        for j in range(len(names)):
            ref = np.array([x[i - width:i, j] for i in inside])
            z = (x[inside, j] - ref.mean(axis=1)) / ref.std(axis=1)
            fired += bool((np.abs(z) > 3.5).any())
        assert onset > width and fired >= len(names) // 2


def test_csv_sample_matches_the_ramp_file() -> None:
    rows, _ = load("ramp")
    at = {(r["entity"], r["ts"]): r["metrics"] for r in rows}
    with CSV_SAMPLE.open(newline="") as f:
        table = list(csv.reader(f))
    header, body = table[0], table[1:]
    assert header[:2] == ["ts", "entity"] and header[2:] == sorted(header[2:])
    assert 200 <= len(body) <= 1000 and len({row[1] for row in body}) == 2
    empty = 0
    for row in body:
        metrics = at[row[1], float(row[0])]
        for name, cell in zip(header[2:], row[2:]):
            empty += cell == ""
            assert (float(cell) if cell else None) == metrics.get(name)
    assert empty > 0
