"""Warm-up fit of one entity's models: normaliser, baseline, residual scales and tail factors.

The first ``warmup`` vectors of an entity are fitted as a block, before anything is scored.
The baseline is fitted twice, the second time in units of each metric's noise (the error of
predicting it from the others): a weighted PCA, the maximum-likelihood fit of a factor model
with heteroscedastic noise.  In robust-sigma units alone a metric with little shared movement
has far more noise than one that moves with traffic, and its noise would claim a direction.
"""

from __future__ import annotations

import math
import warnings
from typing import NamedTuple

import numpy as np

from .normaliser import MAD_TO_SIGMA, RobustNormaliser, column_median
from .subspace import SubspaceTracker
from .tail import fitted_tail_factors
from .thresholds import threshold_for

__all__ = ["WARMUP_CLIP", "WarmupFit", "fit_warmup", "prediction_noise", "warmup_residual_scale"]

#: Warm-up values beyond this many robust sigmas are clipped, so a wild outlier of the warm-up
#: cannot own a baseline direction; recurring patterns such as batch jobs stay below it and are
#: learned (clipping them harder would bend their direction).
WARMUP_CLIP = 50.0


class WarmupFit(NamedTuple):
    """What the warm-up block gives besides the fitted normaliser and baseline (all (n,))."""

    admitted: np.ndarray         # bool: metrics with enough warm-up samples to be modelled
    residual_scale: np.ndarray   # d: robust scale of each metric's residual
    tail_factor: np.ndarray      # kappa: alerts are judged on d kappa


def fit_warmup(W: np.ndarray, normaliser: RobustNormaliser, baseline: SubspaceTracker, *, min_samples: int,
               false_alarm: float) -> WarmupFit:
    """Fit ``normaliser`` and ``baseline`` (in place) on the warm-up block ``W`` (w, n; NaN = missing)."""
    norm = normaliser.fit(W)
    usable = norm.count >= min_samples
    admitted = usable.copy()
    Z = np.where(usable, norm.transform(W), np.nan).clip(-WARMUP_CLIP, WARMUP_CLIP)
    baseline.fit(Z)
    noise = prediction_noise(Z, baseline)
    typical = float(np.median(noise[usable])) if usable.any() else 0.0
    if typical > 0:   # 0: the baseline explains (nearly) everything, there is no noise to weigh by
        norm.rescale(np.where(usable & (noise > 0), noise / typical, 1.0))
    Z = np.where(usable, norm.transform(W), np.nan).clip(-WARMUP_CLIP, WARMUP_CLIP)
    baseline.fit(Z)
    residual_scale, tail_factor = warmup_residual_scale(Z, baseline, false_alarm, norm.quantisation_noise())
    return WarmupFit(admitted, residual_scale, tail_factor)


def _robust_scale(R: np.ndarray) -> np.ndarray:
    """Per column of ``R`` (NaN = missing) ``MAD_TO_SIGMA`` times the median of ``|R|`` (NaN for a
    column with no value): the robust scale of a residual centred at 0."""
    with warnings.catch_warnings():   # metrics absent from the warm-up: all-NaN columns
        warnings.simplefilter("ignore", RuntimeWarning)
        return MAD_TO_SIGMA * column_median(np.abs(R))


def prediction_noise(Z: np.ndarray, tracker: SubspaceTracker) -> np.ndarray:
    """Per metric the robust scale of its error when predicted from the other metrics through
    the basis: the in-sample residual's MAD over ``1 - leverage`` (a direction a metric owns
    predicts nothing about it; leave-one-out algebra of projections)."""
    mad = _robust_scale(tracker.residuals(Z))
    leverage = np.einsum("ij,ij->i", tracker.U, tracker.U)
    return np.where(np.isfinite(mad), mad / np.maximum(1.0 - leverage, 0.01), 0.0)


def warmup_residual_scale(Z: np.ndarray, tracker: SubspaceTracker, false_alarm: float,
                          floor: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Robust per-metric scale ``d`` of in-sample residuals, corrected for the r fitted
    directions and never below ``floor`` (the quantisation noise), and the tail factors
    (:func:`.tail.fitted_tail_factors`): alerts are judged on ``d kappa``, so a metric whose
    residuals are heavy-tailed, bursty or discrete is flagged at the target rate instead of
    on every burst.
    """
    R = tracker.residuals(Z)
    W = Z.shape[0]
    mad = _robust_scale(R) * math.sqrt(W / max(W - tracker.rank, 1))
    d = np.maximum(np.where(np.isfinite(mad) & (mad > 1e-9), mad, 1.0), floor)
    return d, fitted_tail_factors(R / d, false_alarm, threshold_for(false_alarm))
