"""Peaks-over-threshold calibration (models/tail.py) against scipy.stats.genpareto and known
distributions."""

import numpy as np
import pytest
from scipy import stats

from shiftsieve.models.tail import gpd_fit_pwm, tail_quantile


@pytest.mark.parametrize("xi", [-0.3, 0.0, 0.25])
def test_pwm_fit_recovers_the_parameters_scipy_sampled(xi):
    # Reference: scipy.stats.genpareto (c = xi) draws the sample; the PWM estimator
    # (Hosking & Wallis 1987) is consistent, so 20,000 draws pin both parameters closely.
    y = stats.genpareto.rvs(c=xi, scale=2.0, size=(20000, 1), random_state=np.random.default_rng(3))
    shape, scale = gpd_fit_pwm(y)
    assert shape[0] == pytest.approx(xi, abs=0.05)
    assert scale[0] == pytest.approx(2.0, rel=0.05)


def test_pwm_fit_ignores_missing_entries_per_column():
    rng = np.random.default_rng(4)
    y = stats.genpareto.rvs(c=0.1, scale=1.0, size=(4000, 2), random_state=rng)
    y[2000:, 1] = np.nan
    shape, scale = gpd_fit_pwm(y)
    alone = gpd_fit_pwm(y[:2000, 1:])
    assert shape[1] == pytest.approx(alone[0][0]) and scale[1] == pytest.approx(alone[1][0])


@pytest.mark.parametrize("dist", [stats.norm(), stats.t(df=3), stats.laplace()])
def test_tail_quantile_matches_the_true_two_sided_quantile(dist):
    # The two-sided 1e-3 quantile of |X| is dist.ppf(1 - 5e-4) for a symmetric distribution
    # (scipy.stats). POT from 20,000 samples is within ~10 % of it, where the empirical 0.999
    # quantile rests on 20 points only.
    R = dist.rvs(size=(20000, 1), random_state=np.random.default_rng(5))
    q = tail_quantile(R, 1e-3)[0]
    assert q == pytest.approx(dist.ppf(1 - 5e-4), rel=0.12)


def test_heavy_tails_get_a_higher_threshold_than_gaussian_ones():
    # Student t with 3 degrees of freedom, scaled to unit MAD like the detector's residuals:
    # its 1e-3 two-sided quantile in MAD units is ~ 8.6 / 0.765 = 11.3 MAD against 3.29 / 0.674
    # = 4.9 for a normal (scipy.stats quantiles), so the calibrated threshold is over twice as high.
    rng = np.random.default_rng(6)
    gauss = stats.norm.rvs(size=5000, random_state=rng) / stats.norm.ppf(0.75)
    heavy = stats.t.rvs(df=3, size=5000, random_state=rng) / stats.t.ppf(0.75, df=3)
    q = tail_quantile(np.column_stack([gauss, heavy]), 1e-3)
    assert q[1] > 1.8 * q[0]


def test_too_few_samples_give_no_tail():
    q = tail_quantile(np.random.default_rng(7).standard_normal((50, 1)), 1e-3)
    assert np.isnan(q[0])
