"""Decision layer: confirmation, hysteresis, adaptation and incident grouping."""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from shiftsieve.models.decision import FIRING, PENDING, QUIET, AlertTracker, DecisionConfig


def reference_run(active, stat, cfg: DecisionConfig):
    """The rules of the decision layer written as the plainest per-sample, per-metric loop.

    Returns [(row, kind, metric)] with kind in fire/clear/adapt, and the final states.
    """
    B, n = active.shape
    window = [[] for _ in range(n)]
    state = [QUIET] * n
    below = [0] * n
    firing_for = [0] * n
    out = []
    for t in range(B):
        for j in range(n):
            a = bool(active[t, j])
            window[j] = (window[j] + [a])[-cfg.confirm_m:]
            count = sum(window[j])
            if state[j] == FIRING:
                below[j] = below[j] + 1 if abs(stat[t, j]) < cfg.clear_sigma else 0
                firing_for[j] += 1
                if below[j] >= cfg.clear_after:
                    out.append((t, "clear", j)); state[j] = QUIET; window[j] = []
                elif cfg.adapt_after and firing_for[j] >= cfg.adapt_after:
                    out.append((t, "adapt", j)); state[j] = QUIET; window[j] = []
            elif count >= cfg.confirm_k:
                out.append((t, "fire", j)); state[j] = FIRING; below[j] = 0; firing_for[j] = 0
            else:
                state[j] = PENDING if count else QUIET
    return out, state


def tracker_run(active, stat, cfg, batch):
    tracker = AlertTracker(active.shape[1], cfg)
    events = []
    for start in range(0, active.shape[0], batch):
        a = active[start:start + batch]
        s = stat[start:start + batch]
        rows = np.arange(start, start + a.shape[0], dtype=float)
        for t in tracker.step(a, s, s, s, s, rows):
            kind = {"firing": "fire", "adapted": "adapt"}.get(t.kind)
            if kind:
                events += [(start + t.row, kind, int(j)) for j in t.metrics]
    return tracker, events


@settings(max_examples=150, deadline=None)
@given(seed=st.integers(0, 10_000), density=st.floats(0.02, 0.6), batch=st.sampled_from([1, 3, 7, 64, 500]),
       k=st.integers(1, 4), extra=st.integers(0, 3), clear_after=st.integers(1, 4))
def test_vectorised_tracker_equals_plain_rules(seed, density, batch, k, extra, clear_after):
    rng = np.random.default_rng(seed)
    B, n = 200, 6
    # Bursty activity: runs of active samples, as persistent shifts produce.
    active = rng.random((B, n)) < density
    active |= np.roll(active, 1, axis=0) & (rng.random((B, n)) < 0.7)
    stat = np.where(active, 5.0, rng.uniform(0, 3, (B, n)))
    cfg = DecisionConfig(confirm_k=k, confirm_m=k + extra, clear_sigma=2.0, clear_after=clear_after)
    expected, final = reference_run(active, stat, cfg)
    tracker, got = tracker_run(active, stat, cfg, batch)
    fired = [e for e in expected if e[1] == "fire"]
    assert sorted(e for e in got if e[1] == "fire") == sorted(fired)
    assert tracker.state.tolist() == final


def test_one_sample_spikes_never_fire_with_defaults():
    cfg = DecisionConfig()   # 3 of 5
    active = np.zeros((100, 4), bool)
    active[::7, :] = True    # isolated spikes
    tracker = AlertTracker(4, cfg)
    shift = np.where(active, 9.0, 0.0)
    assert tracker.step(active, shift, shift, shift, shift, np.arange(100.0)) == []


def test_hysteresis_keeps_a_hovering_shift_in_one_incident():
    """A shift that dips under the firing threshold but stays above clear_sigma does not flap."""
    cfg = DecisionConfig(confirm_k=3, confirm_m=5, clear_sigma=2.0, clear_after=5)
    B = 80
    active = np.zeros((B, 1), bool)
    active[10:60:2] = True           # above the firing threshold every other sample
    stat = np.where(active, 4.0, 2.5)  # in between: 2.5 sigma, above clear_sigma
    stat[60:] = 0.5
    tracker = AlertTracker(1, cfg)
    out = tracker.step(active, stat, stat, stat, stat, np.arange(B, dtype=float))
    assert [(t.kind, t.row) for t in out] == [("firing", 14), ("resolved", 64)]


def test_metrics_firing_together_form_one_incident():
    cfg = DecisionConfig(confirm_k=2, confirm_m=3, clear_after=2)
    active = np.zeros((30, 3), bool)
    active[5:15, 0] = True
    active[8:20, 2] = True
    stat = np.where(active, 6.0, 0.0)
    tracker = AlertTracker(3, cfg)
    out = tracker.step(active, stat, stat, stat, stat, 100.0 + np.arange(30.0))
    kinds = [(t.kind, t.metrics.tolist(), t.onset_ts) for t in out]
    assert kinds == [("firing", [0], 106.0), ("firing", [2], 106.0), ("resolved", [0, 2], 106.0)]
    assert out[0].onset and not out[1].onset


def test_adapt_after_accepts_a_persistent_shift():
    cfg = DecisionConfig(confirm_k=2, confirm_m=3, adapt_after=10)
    active = np.zeros((40, 1), bool)
    active[5:] = True
    stat = np.where(active, 6.0, 0.0)
    tracker = AlertTracker(1, cfg)
    out = tracker.step(active, stat, stat, stat, stat, np.arange(40.0))
    # Fires at row 6, adapted 10 samples later; the rest of the batch is muted.
    assert [(t.kind, t.row) for t in out] == [("firing", 6), ("adapted", 16)]
    assert tracker.incident is None and tracker.state[0] == QUIET


def test_resolved_reports_peak_shift():
    cfg = DecisionConfig(confirm_k=1, confirm_m=1, clear_after=1)
    shift = np.array([[0.0], [4.0], [-9.0], [5.0], [0.0]])
    active = shift != 0
    value = 100 + shift
    tracker = AlertTracker(1, cfg)
    out = tracker.step(active, shift, shift, value, np.full_like(shift, 100.0), np.arange(5.0))
    resolved = out[-1]
    assert resolved.kind == "resolved"
    assert resolved.shift.tolist() == [-9.0] and resolved.value.tolist() == [91.0]


def test_config_validation():
    with pytest.raises(ValueError, match="confirm_k"):
        DecisionConfig(confirm_k=6, confirm_m=5)
    with pytest.raises(ValueError, match="confirm_m"):
        DecisionConfig(confirm_m=64)
    with pytest.raises(ValueError, match="adapt_after"):
        DecisionConfig(adapt_after=-1)
