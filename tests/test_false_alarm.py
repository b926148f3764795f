"""False-alarm rate of the detector on null streams against the configured target."""

import numpy as np
import pytest
from scipy.stats import binom

from shiftsieve.models.detector import DetectorConfig, EntityDetector
from shiftsieve.models.thresholds import threshold_for, truncated_second_moment


def null_stream(seed, n=50, r=3, samples=6000):
    """Shared low-rank movement (strong) plus independent Gaussian noise: nothing ever shifts."""
    rng = np.random.default_rng(seed)
    loadings = rng.standard_normal((n, r)) * 4.0
    level = rng.uniform(10, 1000, n)
    noise = rng.uniform(0.5, 3.0, n)
    X = level + rng.standard_normal((samples, r)) @ loadings.T + noise * rng.standard_normal((samples, n))
    return X


@pytest.mark.parametrize("target,seed", [(0.01, 1), (0.002, 2)])
def test_flag_rate_on_null_stream_within_binomial_interval(target, seed):
    X = null_stream(seed)
    det = EntityDetector(X.shape[1], np.zeros(X.shape[1], bool),
                         DetectorConfig(warmup=300, rank=3, false_alarm=target))
    burn_in = 2000   # warm-up plus settling of the residual scales
    flagged = trials = 0
    for start in range(0, X.shape[0], 100):
        out = det.process(X[start:start + 100], np.arange(start, start + 100, dtype=float))
        if start >= burn_in:
            flagged += np.count_nonzero(out.shift_sigma)
            trials += out.shift_sigma.size
    # scipy.stats.binom: 99 % interval of the flag count if each sample of each metric is flagged
    # independently with the target probability.
    lo, hi = binom.interval(0.99, trials, target)
    assert lo <= flagged <= hi, (flagged, trials * target, lo, hi)


def test_threshold_is_the_two_sided_gaussian_quantile():
    from scipy.stats import norm
    # scipy.stats.norm: P(|X| > lambda) = 2 (1 - Phi(lambda)).
    for alpha in (0.1, 1e-3, 1e-6):
        lam = threshold_for(alpha)
        assert 2 * norm.sf(lam) == pytest.approx(alpha, rel=1e-9)
    assert threshold_for(1e-3) == pytest.approx(3.2905, abs=1e-4)   # standard normal table


def test_truncated_moment_matches_numerical_integral():
    from scipy.integrate import quad
    from scipy.stats import norm
    # E[X^2 | |X| < c], by scipy.integrate.quad against scipy.stats.norm.
    for c in (1.0, 2.576, 3.29):
        ref = quad(lambda x: x * x * norm.pdf(x), -c, c)[0] / (norm.cdf(c) - norm.cdf(-c))
        assert truncated_second_moment(c) == pytest.approx(ref, rel=1e-9)
