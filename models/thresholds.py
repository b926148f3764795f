"""The false-alarm target as thresholds, under the Gaussian null of residuals in residual sigmas.

Every decision of the detector is a comparison with one of these: the per-sample LASSO penalty
(:func:`threshold_for`), the joint-window group LASSO's (:func:`window_threshold`), and the
correction of a residual scale estimated from unselected samples (:func:`truncated_second_moment`).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import chdtri, erf, ndtri

__all__ = ["threshold_for", "truncated_second_moment", "window_threshold"]


def threshold_for(false_alarm: float) -> float:
    """Two-sided Gaussian quantile ``lambda`` with ``P(|N(0,1)| > lambda) = false_alarm``."""
    if not 0.0 < false_alarm < 1.0:
        raise ValueError(f"false_alarm must be in (0, 1), got {false_alarm!r}")
    return float(-ndtri(false_alarm / 2.0))


def window_threshold(false_alarm: float, rows: int) -> float:
    """The group LASSO's ``lam`` for a window of ``rows`` residuals: the chi quantile with
    ``P(chi_rows > lam) = false_alarm``.

    Under no shift a column's correlation with ``rows`` unit-variance residuals is a vector of
    ``rows`` independent standard normals, whose norm is chi-distributed; its row of the
    solution is zero exactly when that norm is ``<= lam``.  With one row this is
    :func:`threshold_for` (``|N(0, 1)|`` is chi with one degree of freedom), so the window
    keeps the per-sample false-alarm target.

    >>> round(window_threshold(1e-3, 1), 6) == round(threshold_for(1e-3), 6)
    True
    """
    threshold_for(false_alarm)
    if rows < 1:
        raise ValueError(f"rows must be >= 1, got {rows!r}")
    return float(np.sqrt(chdtri(rows, false_alarm)))


def truncated_second_moment(c: float | np.ndarray) -> float | np.ndarray:
    """``E[X^2 | |X| < c]`` for standard normal X: ``1 - 2 c phi(c) / (2 Phi(c) - 1)``.

    Residual scales are estimated from the samples the LASSO did not select, i.e. with
    ``|residual| < lambda d``; their mean square underestimates ``d^2`` by this factor.

    >>> round(float(truncated_second_moment(50.0)), 12)
    1.0
    """
    c = np.asarray(c, dtype=float)
    inside = erf(c / math.sqrt(2.0))  # P(|X| < c)
    density = np.exp(-0.5 * c * c) / math.sqrt(2.0 * math.pi)
    moment = 1.0 - 2.0 * c * density / inside
    return float(moment) if moment.ndim == 0 else moment
