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

:func:`fitted_tail_factors` turns that quantile into a factor on the Gaussian threshold at warm-up,
and :func:`tracked_tail_factors` keeps each metric's selection rate at the target afterwards.
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


#: Fitted tail factors below this are estimation noise, not a heavy tail: on 540 Gaussian samples
#: the POT estimate of the 1e-3 quantile over lambda has 5/50/95/99th percentiles 0.85, 1.00, 1.18
#: and 1.28 (measured, 4,000 columns), so a Gaussian metric keeps a factor of 1 in ~98 %.
MIN_FITTED_FACTOR = 1.25
#: Cap on a tail factor: a metric whose tail asks for more is still judged (it must move a lot).
MAX_FACTOR = 10.0
#: Step of the online tracker: a selection raises a metric's factor by ~2 %, and
#: ``1 / false_alarm`` samples without one lower it by as much.
TRACKING_RATE = 0.02
#: Floor of a tracked factor. At 1 the tracker's jitter is cut off below and a Gaussian metric's
#: factor drifts up: 18 % fewer flags than the target on a null stream. Light tails may need < 1.
MIN_TRACKED_FACTOR = 0.8


def fitted_tail_factors(R: np.ndarray, false_alarm: float, threshold: float) -> np.ndarray:
    """Per column of residuals ``R`` (W, n), in residual sigmas, the factor ``kappa`` by which the
    Gaussian ``threshold`` must grow to be exceeded with probability ``false_alarm``: the POT
    quantile over ``threshold``; 1 where there is no tail to fit or it is within estimation noise
    of a Gaussian's (below ``MIN_FITTED_FACTOR``), at most ``MAX_FACTOR``.

    >>> rng = np.random.default_rng(2)
    >>> R = np.column_stack([rng.standard_normal(5000), rng.standard_t(2, 5000)])
    >>> fitted_tail_factors(R, 1e-3, 3.29).round(1).tolist()   # Student t(2): 31.6 / 3.29 = 9.6 exactly
    [1.0, 9.9]
    """
    quantile = tail_quantile(R, false_alarm)
    kappa = np.where(np.isfinite(quantile), quantile / threshold, 1.0)
    return np.minimum(np.where(kappa >= MIN_FITTED_FACTOR, kappa, 1.0), MAX_FACTOR)


def tracked_tail_factors(kappa: np.ndarray, selections: np.ndarray, samples: int, false_alarm: float,
                         taking_part: np.ndarray) -> np.ndarray:
    """One step of the stochastic-approximation quantile tracker (Robbins & Monro 1951) for the
    factors ``kappa`` (n,): ``kappa exp(TRACKING_RATE (selections - samples false_alarm))`` where
    ``taking_part``, unchanged elsewhere, within ``[MIN_TRACKED_FACTOR, MAX_FACTOR]``.  It settles
    where a metric is selected at the ``false_alarm`` rate, whatever its residuals' shape.

    >>> k = np.ones(2)
    >>> for _ in range(100):   # 64 samples a batch: metric 0 selected 4 times (6 %), metric 1 never
    ...     k = tracked_tail_factors(k, np.array([4, 0]), 64, 1e-3, np.ones(2, bool))
    >>> k.round(2).tolist()    # metric 0 at the cap; metric 1 down by exp(-0.02 * 6.4)
    [10.0, 0.88]
    """
    step = np.where(taking_part, TRACKING_RATE * (selections - samples * false_alarm), 0.0)
    return np.clip(kappa * np.exp(step), MIN_TRACKED_FACTOR, MAX_FACTOR)
