"""The reference detectors of `shiftsieve evaluate` (models/baselines.py)."""


import numpy as np
import pytest
from scipy.stats import binom

from shiftsieve.models.baselines import EWMAZScore, HalfSpaceTreesDetector, pcp_detect
from shiftsieve.models.detector import threshold_for



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
