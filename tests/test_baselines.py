"""The reference detectors of `shiftsieve evaluate` (models/baselines.py)."""


import numpy as np
import pytest
from scipy.stats import binom, norm

from shiftsieve.models.baselines import (
    EWMAZScore,
    HalfSpaceTreesDetector,
    calibrated_flags,
    ewma_zscore_calibrated,
    history_thresholds,
    pcp_calibrated,
    pcp_detect,
)
from shiftsieve.models.thresholds import threshold_for


def _reference_ewma(x, alpha):
    """The standard incremental EWMA/EWMV recursion written out per sample (Finch 2009,
    "Incremental calculation of weighted mean and variance", eqs. for exponential weights;
    from memory), with the running-mean start a_t = max(alpha, 1/t)."""
    mean = var = 0.0
    means, variances = [], []
    for t, value in enumerate(x, start=1):
        a = max(alpha, 1.0 / t)
        diff = value - mean
        mean += a * diff
        var = (1.0 - a) * (var + a * diff * diff)
        means.append(mean)
        variances.append(var)
    return np.array(means), np.array(variances)


def _state_after_each(ewma, X):
    means, variances = [], []
    for row in X:
        ewma.process(row[None, :])
        means.append(ewma.mean.copy())
        variances.append(ewma.var.copy())
    return np.array(means), np.array(variances)


def test_ewma_mean_and_variance_follow_the_recursion_and_numpy():
    rng = np.random.default_rng(0)
    T, halflife = 400, 20.0
    step = np.r_[np.zeros(150), np.ones(250)]                 # constant, then a step
    X = np.c_[step, 5.0 + rng.standard_normal(T), np.cumsum(rng.standard_normal(T))]
    ewma = EWMAZScore(3, halflife=halflife, warmup=10 * T)    # never scored: no cleaning
    means, variances = _state_after_each(ewma, X)
    alpha = 1.0 - 0.5 ** (1.0 / halflife)
    for j in range(3):
        ref_mean, ref_var = _reference_ewma(X[:, j], alpha)
        np.testing.assert_allclose(means[:, j], ref_mean, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(variances[:, j], ref_var, rtol=1e-10, atol=1e-12)
    # While t < 1/alpha the recursion is the plain running mean and population variance: numpy's.
    start = int(np.floor(1.0 / alpha))
    for t in (5, start - 1):
        np.testing.assert_allclose(means[t - 1], X[:t].mean(axis=0), rtol=1e-12)
        np.testing.assert_allclose(variances[t - 1], X[:t].var(axis=0), rtol=1e-10, atol=1e-14)
    # After it, the exponentially weighted mean and variance with explicit weights (numpy.average):
    # the first `start` samples share the running mean's weight, later ones decay by 1 - alpha.
    t = 300
    w = np.r_[np.full(start, 1.0 / start) * (1 - alpha) ** (t - start),
              alpha * (1 - alpha) ** (t - 1 - np.arange(start, t))]
    ref_mean = np.average(X[:t], axis=0, weights=w)
    np.testing.assert_allclose(means[t - 1], ref_mean, rtol=1e-10)
    np.testing.assert_allclose(variances[t - 1], np.average((X[:t] - ref_mean) ** 2, axis=0, weights=w), rtol=1e-8)
    # Constant then step: 0 exactly before the step; after it the closed form 1 - (1 - alpha)^k.
    assert means[149, 0] == 0.0 and variances[149, 0] == 0.0
    k = np.arange(1, 251)
    np.testing.assert_allclose(means[150:, 0], 1.0 - (1.0 - alpha) ** k, rtol=1e-10)


def test_ewma_flag_rate_on_gaussian_noise_matches_false_alarm():
    rng = np.random.default_rng(0)
    false_alarm, warmup = 1e-3, 2000
    X = rng.standard_normal((12_000, 20))
    flags = EWMAZScore(20, halflife=1000.0, false_alarm=false_alarm, warmup=warmup).process(X)
    scored = flags.active[warmup:]
    # 99 % binomial interval around the target (scipy.stats.binom); a long half-life keeps the
    # variance estimate's own noise (a t-like widening of the tails) negligible.
    lo, hi = binom.interval(0.99, scored.size, false_alarm)
    assert lo <= scored.sum() <= hi, scored.sum() / scored.size
    assert np.all(np.abs(flags.stat[warmup:][scored]) > threshold_for(false_alarm))


def test_ewma_does_not_learn_a_flagged_shift():
    rng = np.random.default_rng(2)
    X = rng.standard_normal((700, 2))
    X[600:, 0] += 10.0
    flags = EWMAZScore(2, halflife=30.0, warmup=300).process(X)
    # The cleaned value moves the mean by at most alpha * lambda sd per sample, so a 10-sigma
    # step stays flagged for at least (10 - lambda) / (alpha lambda) ~ 40 samples at halflife 30.
    assert flags.active[600:630, 0].all()
    assert not flags.active[600:630, 1].any()


def test_hst_flags_a_gross_outlier_and_its_false_alarm_rate_is_near_target():
    rng = np.random.default_rng(3)
    false_alarm, W = 0.01, 1000
    hst = HalfSpaceTreesDetector(5, false_alarm=false_alarm, window_size=250, seed=7)
    hst.fit(rng.standard_normal((W, 5)))
    null = hst.process(rng.standard_normal((3000, 5))).active[:, 0]
    # An empirical quantile of W warm-up scores can only give exceedance rates k / (W + 1): allow
    # that granularity on top of a 99 % binomial interval (scipy.stats.binom) around the target.
    lo, hi = binom.interval(0.99, null.size, false_alarm)
    slack = null.size / (W + 1)
    assert lo - slack <= null.sum() <= hi + slack, null.mean()
    outlier = np.full((1, 5), 8.0)    # 8 sigma on every metric: outside every warm-up value
    out = hst.process(outlier)
    assert out.active[0, 0] and out.stat[0, 0] > threshold_for(false_alarm)


def test_pcp_localises_a_stepped_metric():
    rng = np.random.default_rng(5)
    T, n = 400, 30
    F = rng.standard_normal((T, 3)) @ rng.standard_normal((3, n)) * 8.0 + rng.standard_normal((T, n))
    F[300:340, 11] += 8.0
    found = pcp_detect(F, warmup=200)
    assert found.decomposition.converged
    active = found.flags.active
    # The planted step is the ground truth: its metric is flagged on (nearly) every step row and
    # is the metric flagged most there; the others stay near their quiet rate.
    assert active[300:340, 11].mean() >= 0.9
    assert int(np.argmax(active[300:340].sum(axis=0))) == 11
    others = np.delete(active[300:340], 11, axis=1)
    assert others.mean() < 0.05


def test_pcp_flag_rate_after_warm_up_is_near_false_alarm_on_low_rank_plus_noise():
    # No fault: PCP puts the noise into S with heavy tails, so a Gaussian threshold on S flags
    # several times the target; the empirical warm-up quantile is calibrated. Reference: the
    # binomial variance of the count (as scipy.stats.binom) plus that of the quantile itself,
    # estimated from N warm-up cells (variance p(1-p)/N of its exceedance rate; a standard fact
    # about empirical quantiles), at 99 % (2.58 sd, normal approximation).
    rng = np.random.default_rng(8)
    T, n, warmup, false_alarm = 1500, 40, 500, 0.005
    F = rng.standard_normal((T, 3)) @ rng.standard_normal((3, n)) * 5.0 + rng.standard_normal((T, n))
    found = pcp_detect(F, warmup=warmup, false_alarm=false_alarm)
    after = found.flags.active[warmup:]
    M, N, p = after.size, warmup * n, false_alarm
    sd = np.sqrt(binom.var(M, p) + M * M * p * (1 - p) / N)
    assert abs(after.sum() - M * p) <= 2.58 * sd, after.mean()
    gaussian = np.abs(found.flags.stat[warmup:]) > threshold_for(false_alarm)
    assert gaussian.mean() > 1.5 * false_alarm   # what the calibration is for (measured 1.9x here)


@pytest.mark.parametrize("bad", [dict(halflife=0.0), dict(halflife=10.0, false_alarm=1.5),
                                 dict(halflife=10.0, warmup=1)])
def test_ewma_rejects_bad_settings(bad):
    with pytest.raises(ValueError):
        EWMAZScore(3, **bad)


# --- calibrated thresholds: each metric's own 1 - false_alarm quantile of its history ----------------------

def test_history_thresholds_are_numpy_quantiles_of_the_absolute_scores():
    rng = np.random.default_rng(11)
    scores = rng.standard_t(3, size=(400, 4))
    scores[rng.random((400, 4)) < 0.2] = np.nan     # missing cells are not scores
    scores[:, 2] = np.nan                            # no score at all: the Gaussian threshold
    scores[:, 3] = np.where(np.isnan(scores[:, 3]), np.nan, 0.0)   # all exactly zero: likewise
    false_alarm = 0.01
    got = history_thresholds(scores, false_alarm)
    for j in (0, 1):
        column = np.abs(scores[:, j][np.isfinite(scores[:, j])])
        assert got[j] == pytest.approx(np.quantile(column, 1 - false_alarm), rel=1e-12)   # numpy.quantile
    assert got[2] == got[3] == pytest.approx(norm.isf(false_alarm / 2))                   # scipy.stats.norm


def test_calibrated_flags_map_each_threshold_to_the_gaussian_one():
    stat = np.array([[1.0, 4.0], [-3.0, 9.0], [2.5, -8.5]])
    thresholds = np.array([2.0, 8.0])
    flags = calibrated_flags(stat, thresholds, 1e-3, np.zeros_like(stat))
    assert flags.active.tolist() == [[False, False], [True, True], [True, True]]
    lam = norm.isf(1e-3 / 2)                                         # scipy.stats.norm, two-sided
    np.testing.assert_allclose(flags.stat, stat * lam / thresholds)
    assert np.array_equal(np.abs(flags.stat) > lam, flags.active)    # the same decision in both units


def test_ewma_with_an_infinite_threshold_is_the_plain_ewma_zscore():
    # What the calibration scores: z_t = (x_t - m_{t-1}) / sqrt(v_{t-1}) of the textbook recursion
    # (Finch 2009, written out per sample above), nothing flagged or cleaned.
    rng = np.random.default_rng(12)
    X = rng.standard_t(3, size=(300, 2)) + 10.0
    X[200:, 0] += 30.0                                   # a step that a finite threshold would clean
    halflife, warmup = 20.0, 50
    flags = EWMAZScore(2, halflife=halflife, warmup=warmup, thresholds=np.inf).process(X)
    alpha = 1.0 - 0.5 ** (1.0 / halflife)
    for j in range(2):
        mean, var = _reference_ewma(X[:, j], alpha)
        z = (X[warmup:, j] - mean[warmup - 1:-1]) / np.sqrt(var[warmup - 1:-1])
        np.testing.assert_allclose(flags.stat[warmup:, j], z, rtol=1e-9)
    assert not flags.active.any() and np.all(flags.stat[:warmup] == 0.0)


def test_ewma_calibrated_meets_the_false_alarm_target_on_heavy_tails():
    # t(3) noise: the Gaussian threshold flags ~24x the target. The calibrated thresholds, set on the
    # first half, flag the second half at the target: 99 % bound from the binomial variance of the
    # count (scipy.stats.binom) plus that of each metric's threshold as an empirical quantile of
    # N history scores (exceedance-rate variance p(1-p)/N, a standard fact about quantiles).
    rng = np.random.default_rng(0)
    T, n, history, warmup, false_alarm = 20_000, 10, 10_000, 500, 1e-3
    F = rng.standard_t(3, size=(T, n))
    plain = EWMAZScore(n, halflife=200.0, false_alarm=false_alarm, warmup=warmup).process(F).active[history:]
    tuned = ewma_zscore_calibrated(F, history=history, halflife=200.0, false_alarm=false_alarm, warmup=warmup)
    after = tuned.active[history:]
    M, N = after.size, history - warmup
    sd = np.sqrt(binom.var(M, false_alarm) + n * (M / n) ** 2 * false_alarm * (1 - false_alarm) / N)
    assert abs(after.sum() - M * false_alarm) <= 2.58 * sd, after.sum()
    assert plain.sum() > 10 * M * false_alarm


def test_stacked_entities_give_each_entity_its_own_ewma():
    # The metrics are independent, so stacking entities side by side, the shorter padded with NaN
    # (missing: neither scored nor learned), must give exactly the per-entity results.
    rng = np.random.default_rng(13)
    A, B = rng.standard_t(3, size=(700, 3)), rng.standard_t(3, size=(500, 2))
    stacked = np.full((700, 5), np.nan)
    stacked[:, :3], stacked[:500, 3:] = A, B
    both = ewma_zscore_calibrated(stacked, history=np.array([600, 600, 600, 300, 300]), halflife=50.0,
                                  false_alarm=0.01, warmup=100)
    alone = [ewma_zscore_calibrated(A, history=600, halflife=50.0, false_alarm=0.01, warmup=100),
             ewma_zscore_calibrated(B, history=300, halflife=50.0, false_alarm=0.01, warmup=100)]
    for got, want in zip((both.stat[:, :3], both.stat[:500, 3:]), (alone[0].stat, alone[1].stat)):
        np.testing.assert_array_equal(got, want)


def test_pcp_calibrated_thresholds_are_each_metrics_history_quantile():
    # Half the metrics have t(2.5) noise, half Gaussian: PCP's pooled threshold is one number for
    # both. The calibrated one is, per metric, numpy.quantile of |S| over its own history rows, and
    # the reported stat is S scaled so that threshold maps to the Gaussian one (scipy.stats.norm).
    rng = np.random.default_rng(14)
    T, n, warmup, history, false_alarm = 1500, 20, 500, 1000, 0.01
    noise = np.c_[rng.standard_t(2.5, size=(T, 10)), 0.3 * rng.standard_normal((T, 10))]
    F = rng.standard_normal((T, 3)) @ rng.standard_normal((3, n)) * 5.0 + noise
    F[50:60, 4] = np.nan                                              # missing: not a history score
    raw = pcp_detect(F, warmup=warmup, false_alarm=false_alarm).flags.stat
    tuned = pcp_calibrated(F, warmup=warmup, history=history, false_alarm=false_alarm)
    lam = norm.isf(false_alarm / 2)
    for j in range(n):
        seen = np.isfinite(F[:history, j])
        tau = np.quantile(np.abs(raw[:history, j][seen]), 1 - false_alarm)
        np.testing.assert_array_equal(tuned.active[:, j], np.abs(raw[:, j]) > tau)
        np.testing.assert_allclose(tuned.stat[:, j], raw[:, j] * lam / tau, rtol=1e-12)
