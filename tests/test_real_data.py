"""The main job on real, published server telemetry: floors on a slice of ASD.

ASD (Application Server Dataset), released with Li et al., "Multivariate Time Series Anomaly
Detection and Interpretation using Hierarchical Inter-Metric and Temporal Embedding", KDD 2021
(repository zhhlee/InterFusion, MIT licence: tests/data/asd/LICENSE). Three of its twelve servers,
19 metrics at a 5-minute step, with the anomaly segments and the metrics engineers named as
responsible (tests/data/asd/README.md says how the slice was cut). Results are read as the
issue about real telemetry asks: an onset detects a segment when it lies in [start - 5 steps,
end], every other onset after the server's test start is a false alert, HitRate@150% as in Su et
al., KDD 2019.

The floors hold the detector near what it measured on this slice when they were set (recall
0.48, 0.65 false alerts per entity-day, HitRate@150% of the joint-window ranking 0.52; max
|shift_sigma| 413 on the whole ASD set): a change that loses real detections, pages more, names the wrong metrics
or reports near-constant metrics at millions of sigmas fails here.  They are not goals: the goals
(event F1 >= 0.6 and more) are in the README's table of measured results, and not met yet.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from shiftsieve.stream.evaluate import compare_methods
from shiftsieve.stream.config import load_config
from shiftsieve.stream.labels import load_labels

DATA = Path(__file__).resolve().parent / "data" / "asd"


@pytest.fixture(scope="module")
def rows():
    labels = load_labels(DATA / "asd_slice.labels.json")
    scores = compare_methods(DATA / "asd_slice.jsonl.gz", load_config(None, environ={}), labels, methods=["shiftsieve", "ewma_zscore"])
    return labels, {r.method: r.evaluation for r in scores}


def test_the_slice_is_the_published_data_as_described(rows):
    labels, _ = rows
    assert labels.step_seconds == 300.0 and labels.tolerance_steps == 5
    assert sorted(labels.scored_from) == ["omi-1", "omi-11", "omi-6"]
    assert len(labels.incidents) == 21 and labels.vectors == 12300


def test_detection_and_false_alert_floors(rows):
    _, by_method = rows
    e = by_method["shiftsieve"]
    assert e.recall >= 0.33                            # measured 0.48 (10 of 21 segments)
    assert e.false_alerts_per_entity_day <= 0.8        # measured 0.65
    # The per-metric EWMA z-score with the same threshold and confirmation (what SREs run) pages
    # several times as often here (measured 2.73 a day, F1 0.20); shiftsieve stays ahead of it.
    assert e.f1 > by_method["ewma_zscore"].f1
    assert e.false_alerts_per_entity_day < by_method["ewma_zscore"].false_alerts_per_entity_day / 2


def test_named_metrics_floor(rows):
    _, by_method = rows
    window = by_method["shiftsieve"].hit_rate["msbl"]
    assert window.matches >= 6 and window.at_150 >= 0.45   # measured 0.52


def test_no_metric_is_reported_at_an_absurd_number_of_sigmas(rows):
    # Near-constant and quantised metrics (m02, m03 here) were reported at 1e6-1e15 sigmas before
    # the scale floor at the metric's resolution; a shift is now measured in steps it can take.
    _, by_method = rows
    sizes = [abs(size) for p in by_method["shiftsieve"].predicted for _, size in p.metrics]
    assert sizes and max(sizes) < 1000
