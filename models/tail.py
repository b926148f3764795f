"""Per-metric tail calibration: thresholds that meet a false-alarm target whatever the distribution.

The LASSO selects a metric when its residual exceeds ``lambda`` residual sigmas, ``lambda`` the
two-sided Gaussian quantile of the target ``false_alarm``.  Real metrics are rarely Gaussian:
bursty, discrete and heavy-tailed residuals exceed that bar far more often than ``false_alarm``.
Each metric's threshold is therefore set from its own residuals by peaks over threshold
(Pickands 1975; Siffer et al., "Anomaly Detection in Streams with Extreme Value Theory", KDD
2017): the excesses of ``|r|`` over a high empirical quantile ``u`` follow a generalized Pareto
distribution, fitted here by probability-weighted moments (Hosking & Wallis, Technometrics 1987),
and the ``1 - false_alarm`` quantile is read off its tail:

    q = u + sigma / xi * ((false_alarm / zeta) ** -xi - 1),   zeta = P(|r| > u)

(``u + sigma log(zeta / false_alarm)`` when ``xi = 0``).  Everything is vectorised over metrics.
"""

from __future__ import annotations

import warnings

import numpy as np

#: Share of the samples above the POT threshold ``u`` (Siffer et al. use the 98 % quantile on long
#: streams; a warm-up of a few hundred samples needs a lower ``u`` to leave enough excesses).
TAIL_SHARE = 0.1
#: The shape is clipped to this range: beyond it a PWM fit on a few dozen excesses is noise
#: (Hosking & Wallis report the PWM estimator reliable for -0.5 < xi < 0.5; they write k = -xi).
MAX_SHAPE = 0.5
#: Fewer excesses than this and no tail is fitted (the Gaussian threshold stands): a PWM fit on
#: a dozen excesses put Gaussian metrics' thresholds 30-50 % too high now and then (warm-up of
#: 150 samples), which cut their k-of-m alert rate by more than half.
MIN_EXCESSES = 50


def gpd_fit_pwm(excesses: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Generalized Pareto ``(shape xi, scale sigma)`` per column of ``excesses`` (m, k) >= 0 by
    probability-weighted moments; NaN entries are ignored.

    With the sorted excesses ``y_(1) <= ... <= y_(m)``, ``a0 = mean(y)`` and
    ``a1 = mean((m - i) / (m - 1) y_(i))`` estimate ``E[y]`` and ``E[y (1 - F(y))]``, and
    ``xi = 2 - a0 / (a0 - 2 a1)``, ``sigma = 2 a0 a1 / (a0 - 2 a1)`` (Hosking & Wallis 1987,
    with their ``k = -xi``).

    >>> rng = np.random.default_rng(0)
    >>> y = rng.exponential(2.0, size=(20000, 1))       # GPD with xi = 0, sigma = 2
    >>> xi, sigma = gpd_fit_pwm(y)
    >>> bool(abs(xi[0]) < 0.05 and abs(sigma[0] - 2.0) < 0.1)
    True
    """
    Y = np.sort(np.asarray(excesses, dtype=float), axis=0)   # NaN last
    m = np.count_nonzero(np.isfinite(Y), axis=0)
    i = np.arange(1, Y.shape[0] + 1)[:, None]
    weight = np.where(i <= m, (m - i) / np.maximum(m - 1, 1), 0.0)
    Yz = np.where(np.isfinite(Y), Y, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        a0 = Yz.sum(axis=0) / m
        a1 = (weight * Yz).sum(axis=0) / m
        denom = a0 - 2.0 * a1
        xi = 2.0 - a0 / denom
        sigma = 2.0 * a0 * a1 / denom
    ok = np.isfinite(xi) & np.isfinite(sigma) & (sigma > 0)
    return np.where(ok, xi, 0.0), np.where(ok, sigma, np.where(np.isfinite(a0), a0, 0.0))


def tail_quantile(R: np.ndarray, false_alarm: float, *, tail_share: float = TAIL_SHARE) -> np.ndarray:
    """Per column of ``R`` (W, n; NaN = missing) the value ``q`` with ``P(|r| > q) = false_alarm``,
    estimated by peaks over threshold; NaN where a column has fewer than ``MIN_EXCESSES`` excesses.

    Where ``false_alarm`` is not below ``tail_share`` the empirical quantile is returned.

    >>> rng = np.random.default_rng(1)
    >>> R = rng.standard_normal((5000, 1))
    >>> q = tail_quantile(R, 1e-3)          # two-sided 1e-3 quantile of N(0, 1) is 3.29
    >>> bool(abs(q[0] - 3.29) < 0.3)
    True
    """
    A = np.abs(np.asarray(R, dtype=float))
    count = np.count_nonzero(np.isfinite(A), axis=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # all-NaN columns
        if false_alarm >= tail_share:
            return np.nanquantile(A, 1.0 - false_alarm, axis=0)
        u = np.nanquantile(A, 1.0 - tail_share, axis=0)
    above = A > u   # NaN compares False
    zeta = above.sum(axis=0) / np.maximum(count, 1)
    xi, sigma = gpd_fit_pwm(np.where(above, A - u, np.nan))
    xi = np.clip(xi, -MAX_SHAPE, MAX_SHAPE)
    ratio = false_alarm / np.maximum(zeta, 1e-300)
    with np.errstate(divide="ignore", invalid="ignore"):
        power = np.where(np.abs(xi) > 1e-6, (ratio ** -xi - 1.0) / np.where(xi == 0, 1.0, xi), -np.log(ratio))
    q = u + sigma * power
    return np.where(above.sum(axis=0) >= MIN_EXCESSES, q, np.nan)
