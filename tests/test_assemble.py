"""Assembly of vectors into arrays, metric labels, and group columns through the engine."""

import numpy as np
import pytest

from shiftsieve.stream.assemble import EntityModel, MetricRules, metric_labels
from shiftsieve.stream.config import load_config
from shiftsieve.stream.decode import Vector
from shiftsieve.stream.engine import Engine


def test_metric_labels_follow_prometheus_series_notation():
    # Prometheus exposition format: name{label="value",...}, values with escaped quotes.
    assert metric_labels('lat_ms{dependency="payments",quantile="0.99"}') == {"dependency": "payments",
                                                                             "quantile": "0.99"}
    assert metric_labels('x{path="/a\\"b"}') == {"path": '/a\\"b'}
    assert metric_labels("cpu_util_ratio") == {}


def test_groups_from_patterns_and_labels_and_log_scale_on_base_names():
    rules = MetricRules(log_patterns=("*_ms",), groups=(("db", ("db_*",)),), group_by=("dependency",))
    names = ["db_a", "db_b", 'lat_ms{dependency="pay"}', 'err{dependency="pay"}', 'lat_ms{dependency="seat"}']
    labels, members = rules.group_members(names)
    assert labels == ["db", "dependency=pay"]
    assert [m.tolist() for m in members] == [[0, 1], [2, 3]]     # one-member groups are dropped
    assert rules.log_scale(names).tolist() == [False, False, True, False, True]


def test_assembly_maps_names_to_columns_and_admits_new_ones():
    from shiftsieve.models.detector import DetectorConfig
    stream = EntityModel("e", MetricRules(), DetectorConfig())
    vecs = [Vector(1.0, "e", {"a": 1.0, "b": None}, {}), Vector(2.0, "e", {"b": 2.0, "c": 3.0}, {})]
    X, ts = stream.assemble(vecs)
    assert stream.names == ["a", "b", "c"]
    assert np.array_equal(X, np.array([[1.0, np.nan, np.nan], [np.nan, 2.0, 3.0]]), equal_nan=True)
    assert ts.tolist() == [1.0, 2.0]


def test_group_by_label_finds_a_dependency_slowdown_too_small_per_metric():
    """Twelve metrics of one dependency each move 1.2 residual sigmas: far below the per-metric
    threshold (3.29 for false_alarm = 0.001), but one group column sees sqrt(12) * 1.2 = 4.2."""
    rng = np.random.default_rng(8)
    n_other, n_dep, samples = 20, 12, 1500
    names = [f"m{i}" for i in range(n_other)] + [f'dep_m{i}{{dependency="payments"}}' for i in range(n_dep)]
    n = len(names)
    loadings = rng.standard_normal((n, 2)) * 5
    X = 100 + rng.standard_normal((samples, 2)) @ loadings.T + rng.standard_normal((samples, n))
    results = {}
    for group_by in ([], ["dependency"]):
        cfg = load_config(environ={"SHIFTSIEVE_MODEL_GROUP_BY": str(group_by).replace("'", '"'),
                                   "SHIFTSIEVE_MODEL_WARMUP": "300", "SHIFTSIEVE_MODEL_RANK": "2"})
        Xs = X.copy()
        # The residual scale of a metric is its noise sigma times sqrt(1 - leverage) ~ 0.96 here.
        Xs[1000:1100, n_other:] += 1.2 * 0.96
        events = []
        engine = Engine.from_config(cfg, sinks=[events.append])
        for t in range(samples):
            engine.feed(Vector(float(t), "svc", dict(zip(names, Xs[t].tolist())), {}))
        engine.flush()
        results[tuple(group_by)] = [m for e in events if e["state"] == "firing" for m in e["metrics"]]
    assert not results[()]                                    # per metric: nothing (noise stays quiet too)
    (group,) = results[("dependency",)]                       # as a group: one alert line
    assert group["name"] == "group:dependency=payments" and group["members"] == names[n_other:]
    # Its size: the group coefficient over the group's residual scale, sqrt(12) * 1.2 = 4.2.
    assert group["shift_sigma"] == pytest.approx(np.sqrt(12) * 1.2, rel=0.25)


def test_events_name_their_metrics_even_when_a_stale_metric_is_dropped_in_the_same_batch():
    # A metric absent for more than drop_after samples is dropped after its batch; a transition in
    # that batch must still be named by the columns it was scored with (the planted step is the truth).
    from shiftsieve.models.detector import DetectorConfig
    rng = np.random.default_rng(11)
    names = [f"m{j}" for j in range(8)]
    events: list[dict] = []
    engine = Engine(DetectorConfig(warmup=100), MetricRules(drop_after=30), batch_size=50, sinks=[events.append])
    for t in range(200):
        row = 10.0 + rng.standard_normal(8)
        if t >= 110:
            row[7] += 15.0   # the last column steps up inside the batch in which m0 is dropped
        metrics = dict(zip(names, row.tolist()))
        if t >= 100:
            del metrics["m0"]
        engine.feed(Vector(float(t), "pier-3", metrics, {}))
    engine.flush()
    assert "m0" not in engine.entities["pier-3"].names      # it was dropped
    firing = [e for e in events if e["state"] == "firing"]
    assert firing and firing[0]["metrics"][0]["name"] == "m7" and firing[0]["ts"] < 150
