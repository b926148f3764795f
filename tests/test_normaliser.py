"""Robust normaliser against scipy/numpy references."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import median_abs_deviation

from shiftsieve.models.normaliser import RobustNormaliser, symexp, symlog


def test_fit_is_median_and_normal_consistent_mad():
    rng = np.random.default_rng(0)
    X = rng.standard_t(3, size=(400, 5)) * [1, 2, 3, 4, 5] + 100
    X[::17, 2] = np.nan
    norm = RobustNormaliser(np.zeros(5, bool)).fit(X)
    # scipy.stats.median_abs_deviation(scale="normal"): MAD / Phi^-1(3/4).
    assert np.allclose(norm.loc, np.nanmedian(X, axis=0))
    assert np.allclose(norm.scale, median_abs_deviation(X, axis=0, scale="normal", nan_policy="omit"))
    assert norm.count.tolist() == [400, 400, 400 - len(range(0, 400, 17)), 400, 400]


def test_symlog_roundtrip_and_log_metrics():
    x = np.array([-1e6, -3.0, 0.0, 0.5, 1e9])
    assert np.allclose(symexp(symlog(x)), x)
    rng = np.random.default_rng(1)
    X = np.exp(rng.normal(5, 1, (300, 2)))
    norm = RobustNormaliser(np.array([True, False])).fit(X)
    # numpy reference: the log metric's location is the median of log1p(x).
    assert norm.loc[0] == pytest.approx(np.median(np.log1p(X[:, 0])))
    assert np.allclose(norm.inverse(norm.transform(X[:3])), X[:3])


def test_location_follows_cleaned_values_with_halflife():
    norm = RobustNormaliser(np.zeros(1, bool), halflife=100.0, settle=10)
    norm.fit(np.zeros((5000, 1)) + np.random.default_rng(2).normal(0, 1, (5000, 1)))
    start = norm.loc[0]
    # 100 samples one unit above the location move it halfway (definition of the half-life).
    norm.update(np.ones((100, 1)) / norm.scale, np.ones((100, 1), bool))
    assert norm.loc[0] - start == pytest.approx(0.5, rel=0.02)


def test_late_metric_learns_from_its_first_samples():
    norm = RobustNormaliser(np.zeros(0, bool), settle=30)
    norm.extend(RobustNormaliser(np.zeros(1, bool), settle=30))
    values = np.random.default_rng(3).normal(50.0, 4.0, (30, 1))
    norm.update(norm.transform(values), np.ones((30, 1), bool))
    # numpy reference: running mean and sqrt(pi/2) * mean absolute deviation.
    assert norm.loc[0] == pytest.approx(values.mean(), rel=1e-9)
    assert norm.scale[0] == pytest.approx(np.sqrt(np.pi / 2) * np.abs(values - values.mean()).mean(), rel=0.1)


def test_constant_metric_gets_a_floor_not_zero():
    norm = RobustNormaliser(np.zeros(1, bool)).fit(np.full((50, 1), 7.0))
    assert norm.scale[0] > 0 and np.isfinite(norm.transform(np.array([[8.0]]))).all()


@given(st.integers(1, 40), st.integers(1, 6), st.floats(0, 1), st.integers(0, 2**32 - 1))
@settings(max_examples=200, deadline=None)
def test_column_median_equals_numpy_nanmedian(rows, cols, missing, seed):
    """Reference: numpy.nanmedian (which column_median replaces for speed)."""
    import warnings
    from shiftsieve.models.normaliser import column_median
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(rows, cols)).round(1)          # rounding makes ties common
    A[rng.random((rows, cols)) < missing] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns
        expected = np.nanmedian(A, axis=0)
    np.testing.assert_array_equal(column_median(A), expected)


def test_quantised_and_two_valued_metrics_are_measured_in_their_own_steps():
    """A metric that sits at one value and now and then moves one step (MAD 0) gets the step
    as its unit, not a mean deviation of a few millionths: a jump of 9 steps is 9 units.
    (Data of this shape: ASD, Li et al. KDD 2021, metric m02 of most servers.)"""
    X = np.full((540, 2), 0.5)
    X[::200, 0] = 0.51                       # two-valued, rarely moves
    X[:, 1] = np.round(np.linspace(0, 1, 540), 2)   # quantised to 0.01
    norm = RobustNormaliser(np.zeros(2, bool)).fit(X)
    assert norm.resolution.tolist() == pytest.approx([0.01, 0.01])
    assert norm.scale[0] == pytest.approx(0.01)
    assert norm.transform(np.array([[0.59, 0.5]]))[0, 0] == pytest.approx(9.0)
    # Quantisation noise of a uniform rounding error: step / sqrt(12) (Widrow & Kollar 2008).
    assert norm.quantisation_noise()[0] == pytest.approx(1 / np.sqrt(12))


def test_a_metric_constant_in_warm_up_has_a_unit_of_one_percent_of_its_level():
    X = np.column_stack([np.full(100, 250.0), np.zeros(100)])
    norm = RobustNormaliser(np.zeros(2, bool)).fit(X)
    assert norm.scale.tolist() == pytest.approx([2.5, 1.0])
