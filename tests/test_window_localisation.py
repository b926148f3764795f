"""Joint localisation over an incident window (``window_metrics``): the residual system the
detector builds, the group LASSO against scikit-learn, the engine's bounded windows, replay."""

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from sklearn.linear_model import MultiTaskLasso

from shiftsieve.models.decision import DecisionConfig
from shiftsieve.models.detector import DetectorConfig, EntityDetector
from shiftsieve.models.thresholds import threshold_for, window_threshold
from shiftsieve.models.mmv import group_lasso_mmv, rank_rows
from shiftsieve.stream.assemble import MetricRules
from shiftsieve.stream.config import load_config
from shiftsieve.stream.decode import Vector
from shiftsieve.stream.engine import Engine
from shiftsieve.stream.replay import replay
from shiftsieve.stream.state import restore_entity, snapshot_entity

DATA = Path(__file__).resolve().parents[1] / "replay_data"
N, WARMUP, START, STOP = 60, 200, 350, 430
SHIFTED = {5: 9.0, 17: 6.0, 40: 4.5}          # metric -> step in noise sigmas (different sizes)
CFG = DetectorConfig(warmup=WARMUP, decision=DecisionConfig())


def low_rank_stream(seed: int, samples: int = 520, n: int = N, rank: int = 3) -> np.ndarray:
    """Shared low-rank movement (3 factors, loadings x3) plus unit noise, steps on SHIFTED."""
    rng = np.random.default_rng(seed)
    loadings = rng.standard_normal((n, rank)) * 3.0
    X = 100.0 + rng.standard_normal((samples, rank)) @ loadings.T + rng.standard_normal((samples, n))
    for j, size in SHIFTED.items():
        X[START:STOP, j] += size
    return X


def run_engine(X: np.ndarray, **kwargs) -> tuple[Engine, list[dict]]:
    events: list[dict] = []
    engine = Engine(CFG, MetricRules(), batch_size=16, sinks=[events.append], **kwargs)
    names = [f"m{j:02d}" for j in range(X.shape[1])]
    for t, row in enumerate(X):
        engine.feed(Vector(float(t), "svc", dict(zip(names, row.tolist())), {}))
    engine.flush()
    return engine, events


@pytest.fixture(scope="module")
def synthetic():
    return run_engine(low_rank_stream(0))


def test_closing_event_ranks_the_three_shifted_metrics_first(synthetic):
    engine, events = synthetic
    closing = [e for e in events if e["state"] in ("resolved", "adapted")]
    assert closing and all("window_metrics" in e for e in events)
    window = closing[-1]["window_metrics"]
    truth = {f"m{j:02d}" for j in SHIFTED}           # the planted ground truth
    for method in ("group_lasso", "msbl"):
        top = [entry["name"] for entry in window[method][:3]]
        assert set(top) == truth, (method, window[method])
    # The window runs from confirm_m - 1 samples before the onset to the close (capped at 120).
    assert window["rows"] == min(int(closing[-1]["ts"]) - int(closing[-1]["started"]) + 5, 120)


def _detector_after_warmup(seed: int) -> tuple[EntityDetector, np.ndarray]:
    X = low_rank_stream(seed)
    log_mask = np.zeros(N, bool)
    log_mask[[2, 9]] = True                         # two metrics on the symmetric log scale
    det = EntityDetector(N, log_mask, CFG)
    det.process(X[:WARMUP + 50], np.arange(WARMUP + 50.0))
    return det, X


def test_window_system_equals_a_numpy_recomputation_from_the_detector_units():
    det, X = _detector_after_warmup(1)
    batch = X[WARMUP + 50:WARMUP + 66].copy()
    batch[3, [4, 11]] = np.nan                      # a row with missing entries
    result = det.process(batch, np.arange(WARMUP + 50.0, WARMUP + 66.0))
    Y = result.window_residuals(batch)
    u = result.units
    F = batch.copy()
    F[:, u.log_mask] = np.sign(F[:, u.log_mask]) * np.log1p(np.abs(F[:, u.log_mask]))
    Z = (F - u.loc) / u.scale
    Q, _ = np.linalg.qr(u.basis)                    # reference: numpy QR of the batch's basis
    expected = (Z - (Z @ Q) @ Q.T) / u.residual_scale
    seen = np.isfinite(Z[3])                        # reference: numpy least squares on the observed entries
    w = np.linalg.lstsq(u.basis[seen], Z[3, seen], rcond=None)[0]
    expected[3] = 0.0
    expected[3, seen] = (Z[3, seen] - u.basis[seen] @ w) / u.residual_scale[seen]
    np.testing.assert_allclose(Y, expected, atol=1e-9)

    A, columns = det.window_dictionary()
    assert columns.tolist() == np.flatnonzero(det.scored_columns()).tolist()
    Qn, _ = np.linalg.qr(det.baseline.U)
    d = det.alert_scale
    reference = ((np.eye(N) - Qn @ Qn.T) * d / d[:, None])[:, columns]
    np.testing.assert_allclose(A, reference, atol=1e-12)


def test_a_shift_of_one_residual_sigma_is_a_unit_coefficient():
    det, X = _detector_after_warmup(2)
    rows = X[WARMUP + 50:WARMUP + 54]
    result = det.process(rows, np.arange(WARMUP + 50.0, WARMUP + 54.0))
    j = 7                                           # a linear-scale metric: one residual sigma is d_j * scale_j
    moved = rows.copy()
    moved[:, j] += 2.5 * result.units.residual_scale[j] * result.units.scale[j]
    delta = result.window_residuals(moved) - result.window_residuals(rows)
    # Against the batch's own basis (A is built with the latest, equal here up to one batch of learning).
    P = np.eye(N) - result.units.basis @ result.units.basis.T
    d = result.units.residual_scale
    np.testing.assert_allclose(delta, np.tile(2.5 * P[:, j] * d[j] / d, (4, 1)), atol=1e-9)


def test_window_threshold_is_the_chi_quantile_and_the_per_sample_threshold_for_one_row():
    for rows in (1, 5, 120):                        # reference: scipy.stats.chi
        assert window_threshold(1e-3, rows) == pytest.approx(stats.chi.ppf(1 - 1e-3, rows), rel=1e-10)
    # |N(0,1)| is chi with one degree of freedom: reference scipy.stats.norm.
    assert window_threshold(1e-3, 1) == pytest.approx(stats.norm.ppf(1 - 5e-4), rel=1e-10)
    assert window_threshold(1e-3, 1) == pytest.approx(threshold_for(1e-3), rel=1e-10)
    with pytest.raises(ValueError, match="rows must be >= 1"):
        window_threshold(1e-3, 0)


def test_group_lasso_ranking_agrees_with_scikit_learn_multitask_lasso():
    det, X = _detector_after_warmup(3)
    window = X[START - 4:START + 40]
    result = det.process(X[WARMUP + 50:START - 4], np.arange(WARMUP + 50.0, START - 4.0))
    result = det.process(window, np.arange(START - 4.0, START + 40.0))
    Y = result.window_residuals(window)
    A, columns = det.window_dictionary()
    lam = window_threshold(CFG.false_alarm, Y.shape[0])
    ours = group_lasso_mmv(A, Y.T, lam, tol=1e-10, max_iter=20000)
    # scikit-learn: (1 / (2 n_samples)) ||Y - A W||_F^2 + alpha ||W||_21, so alpha = lam / n_rows.
    ref = MultiTaskLasso(alpha=lam / A.shape[0], fit_intercept=False, tol=1e-12, max_iter=100000).fit(A, Y.T)
    ref_norms = np.linalg.norm(ref.coef_.T, axis=1)
    names = [str(c) for c in columns]
    ranked = rank_rows(ours, names, rel_tol=1e-3)
    assert [n for n, _ in ranked] == [names[i] for i in np.argsort(-ref_norms)[:len(ranked)]]
    np.testing.assert_allclose(ours.row_norms, ref_norms, rtol=1e-3, atol=1e-3 * ref_norms.max())
    # The engine's solve (looser tolerance) ranks the same top columns.
    loc = det.localise_window(Y)
    assert [n for n, _ in rank_rows(loc.group_lasso, names, 3)] == [n for n, _ in ranked[:3]]


def test_windows_are_bounded_and_cleared_when_the_incident_closes():
    engine, events = run_engine(low_rank_stream(4), window_rows=30)
    rows = [e["window_metrics"]["rows"] for e in events]
    assert rows and max(rows) == 30 and min(rows) >= 1
    assert events[-1]["state"] == "resolved"
    records = list(engine.registry.records())
    assert all(r.window is None for r in records)   # closed: no window kept
    for r in records:                               # raw rows only for pending entities, at most lead
        assert r.tail is None or r.tail.shape[0] <= engine.windows.lead
    # An entity that goes takes its window with it.
    engine2, _ = run_engine(low_rank_stream(4)[:START + 20])
    record = engine2.registry["svc"]
    assert record.window is not None
    engine2.drop("svc")
    assert "svc" not in engine2.registry and engine2.registry.get("svc") is None


def test_localisation_changes_no_alert_and_is_off_with_window_rows_zero(synthetic):
    _, with_windows = synthetic
    _, without = run_engine(low_rank_stream(0), window_rows=0)
    assert all("window_metrics" not in e for e in without)
    assert [{k: v for k, v in e.items() if k != "window_metrics"} for e in with_windows] == without


def test_a_failed_factorisation_costs_the_window_not_the_alerts(synthetic, monkeypatch):
    _, with_windows = synthetic

    def fail(self, Y, **kwargs):
        raise np.linalg.LinAlgError("not positive definite")   # what a Cholesky failure raises (numpy)

    monkeypatch.setattr(EntityDetector, "localise_window", fail)
    engine, events = run_engine(low_rank_stream(0))
    assert all("window_metrics" not in e for e in events)
    assert [{k: v for k, v in e.items() if k != "window_metrics"} for e in with_windows] == events
    assert engine.counts.localisation_failed > 0
    assert all(r.window is None for r in engine.registry.records())


def test_a_restored_incident_starts_a_fresh_window(tmp_path):
    X = low_rank_stream(5)
    engine, events = run_engine(X[:START + 20])
    assert engine.entities["svc"].detector.tracker.incident is not None
    data = snapshot_entity(engine.entities["svc"], {})
    restored, _ = restore_entity(data, MetricRules(), CFG)
    later: list[dict] = []
    engine2 = Engine(CFG, MetricRules(), batch_size=16, sinks=[later.append])
    engine2.adopt(restored)
    names = [f"m{j:02d}" for j in range(N)]
    for t in range(START + 20, X.shape[0]):
        engine2.feed(Vector(float(t), "svc", dict(zip(names, X[t].tolist())), {}))
    engine2.flush()
    closing = [e for e in later if e["state"] == "resolved"]
    assert closing and closing[-1]["window_metrics"]["rows"] <= int(closing[-1]["ts"]) - (START + 20) + 1
    assert engine2.registry["svc"].window is None


def test_replay_multi_shift_closing_events_localise_the_labelled_fault():
    labels = json.loads((DATA / "multi_shift.labels.json").read_text())
    (incident,) = labels["incidents"]
    events: list[dict] = []
    replay(DATA / "multi_shift.jsonl.gz", load_config(None), sinks=[events.append], progress=False)
    closing = [e for e in events if e["state"] in ("resolved", "adapted")]
    assert closing and all("window_metrics" in e for e in closing)
    fault = [e for e in closing if e["entity"] == incident["entity"]
             and incident["start"] - 120 <= e["started"] <= incident["end"]]
    window = fault[-1]["window_metrics"]
    truth = set(incident["metrics"])                # the generator's planted ground truth
    top = {entry["name"] for entry in window["msbl"][:10]}
    # Measured: 4 of 5 (upstream_payment_lat_p99_ms is missed: after projection its column is
    # 0.96-correlated with p50's, which explains both); the per-sample ranking also finds 4 of 5.
    assert len(top & truth) >= 4, window["msbl"]
