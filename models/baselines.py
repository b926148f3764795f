"""Reference detectors that ``shiftsieve evaluate`` compares shiftsieve with.

Each turns one entity's matrix ``F`` (T, n) of metric values (already on the
modelling scale: the caller applies ``model.log_metrics``; NaN = missing) into
per-sample flags for the *same* decision layer shiftsieve uses
(:class:`~shiftsieve.models.decision.AlertTracker`), with the same per-sample
false-alarm target ``model.false_alarm`` and the same warm-up length, so the
comparison is about the baseline model and nothing else:

- :class:`EWMAZScore`: what most dashboards do, a per-metric exponentially
  weighted mean and variance and a z-score against them;
- :class:`HalfSpaceTreesDetector`: river's streaming ``HalfSpaceTrees``
  (Tan, Ting, Liu 2011) on the whole vector; it says *that* a vector is odd,
  not which metric, so it is scored at incident level only;
- :func:`pcp_detect`: batch Principal Component Pursuit (Candes, Li, Ma,
  Wright 2011) of the whole matrix, the offline low-rank-plus-sparse reference;
- :func:`ewma_zscore_calibrated`, :func:`pcp_calibrated`: the same two with the
  threshold a careful practitioner sets instead of the Gaussian one: per metric, the
  ``1 - false_alarm`` quantile of its own |score| over its history
  (:func:`history_thresholds`).  Real metrics are not Gaussian (heavy tails, steps,
  quantised values), so one threshold for all of them flags some far more often
  than ``false_alarm`` and others never.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtri

from .normaliser import RobustNormaliser, column_median, decay_for_halflife
from .pcp import PCPResult, principal_component_pursuit
from .thresholds import threshold_for, truncated_second_moment


@dataclass(frozen=True)
class Flags:
    """Per-sample output of a reference detector, (T, k) arrays ready for ``AlertTracker.step``.

    ``stat`` is signed and in (Gaussian-equivalent) sigmas: it is the decision layer's
    shift and its clearing statistic; ``active`` is ``|stat| > threshold`` where scored;
    ``expected`` is the detector's prediction on the input's scale (NaN if it has none).
    """

    active: np.ndarray
    stat: np.ndarray
    expected: np.ndarray


class EWMAZScore:
    """Per-metric exponentially weighted mean and variance, and the z-score against them.

    The recursion is the standard incremental one (Finch 2009, "Incremental calculation
    of weighted mean and variance"): ``d = x - m; m += a d; v = (1 - a) (v + a d^2)``
    with ``a = max(1 - decay, 1 / count)``, i.e. the plain running mean and variance
    while a metric has fewer samples than the average's effective length (the usual bias
    adjustment, as in :class:`~shiftsieve.models.normaliser.RobustNormaliser`).

    A sample is scored with the state *before* it, ``z = (x - m) / sqrt(v)``, once its
    metric has ``warmup`` samples; it is flagged when ``|z|`` exceeds the metric's threshold:
    ``thresholds`` (per metric, or one for all; ``inf`` never flags), by default
    ``threshold_for(false_alarm)``.  ``warmup`` may also be given per metric.
    Scored samples are learned the way shiftsieve learns (so the comparison is about the
    baseline model, not about this detail): the mean from the *cleaned* value
    ``m + clip(x - m, +-threshold sd)`` (shiftsieve learns from ``z - s`` with ``s``
    soft-thresholded at ``lambda``: the same clipping), and the variance only from
    unflagged samples, their squares divided by ``E[X^2 | |X| < threshold]`` for the
    truncation they went through (shiftsieve's residual scales, see DEVELOPERS.md).
    A flagged sample therefore neither pulls the mean much nor widens the variance, which
    would desensitise the metric during the very shift.  Missing values (NaN) are neither
    scored nor learned.

    The recursion depends on the previous sample's flag, so it cannot be written as a
    linear filter over time: :meth:`process` walks the samples of a batch in order, each
    step vectorised over the metrics.  The metrics are independent, so callers with many
    entities stack them side by side (rows padded with NaN) and walk them all at once.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(1)
    >>> X = rng.standard_normal((300, 3))
    >>> X[250:, 1] += 8.0                      # metric 1 steps by 8 sigma
    >>> ewma = EWMAZScore(3, halflife=50.0, warmup=100)
    >>> flags = ewma.process(X)
    >>> flags.active[250:253, 1].tolist()    # flagged at once, and the shift does not teach the mean
    [True, True, True]
    """

    def __init__(self, n_metrics: int, *, halflife: float, false_alarm: float = 1e-3,
                 warmup: int | np.ndarray = 540, thresholds: float | np.ndarray | None = None) -> None:
        if n_metrics < 0:
            raise ValueError(f"n_metrics must be >= 0, got {n_metrics}")
        self.warmup = np.broadcast_to(np.asarray(warmup, dtype=np.int64), (n_metrics,))
        if np.any(self.warmup < 2):
            raise ValueError(f"warmup must be >= 2 samples, got {warmup}")
        self.alpha = 1.0 - decay_for_halflife(halflife)
        gaussian = threshold_for(false_alarm)
        self.threshold = np.broadcast_to(np.asarray(gaussian if thresholds is None else thresholds, dtype=float),
                                          (n_metrics,))
        if not np.all(self.threshold > 0):
            raise ValueError("thresholds must be > 0")
        finite = np.isfinite(self.threshold)
        self._truncated_moment = np.ones(n_metrics)   # an infinite threshold truncates nothing
        self._truncated_moment[finite] = truncated_second_moment(self.threshold[finite])
        self.mean = np.zeros(n_metrics)
        self.var = np.zeros(n_metrics)
        self.count = np.zeros(n_metrics, dtype=np.int64)

    def process(self, X: np.ndarray) -> Flags:
        """Score, then learn, each row of ``X`` (B, n) in order."""
        X = np.asarray(X, dtype=float)
        if X.ndim != 2 or X.shape[1] != self.mean.size:
            raise ValueError(f"expected X (B, {self.mean.size}), got {X.shape}")
        # Everything that does not depend on the flags, for all rows at once.
        seen = np.isfinite(X)
        before = self.count + np.cumsum(seen, axis=0) - seen            # samples learned before each row
        scored = seen & (before >= self.warmup)
        rate = np.where(seen, np.maximum(self.alpha, 1.0 / (before + 1)), 0.0)
        values = np.where(seen, X, 0.0)
        limits = np.where(scored, self.threshold, np.inf)               # the cleaning: clip at +-threshold sd
        moments = np.where(scored, self._truncated_moment, 1.0)
        stat = np.zeros(X.shape)
        means = np.empty(X.shape)
        mean, var = self.mean, self.var
        for t in range(X.shape[0]):
            means[t] = mean
            diff = values[t] - mean
            sd = np.maximum(np.sqrt(var), np.maximum(1e-9, 1e-6 * np.abs(mean)))
            z = np.where(scored[t], diff / sd, 0.0)
            stat[t] = z
            a = rate[t]
            limit = limits[t] * sd
            mean = mean + a * np.minimum(np.maximum(diff, -limit), limit)
            a = np.where(np.abs(z) > self.threshold, 0.0, a)             # a flagged sample leaves the variance
            var = (1.0 - a) * (var + a * (diff * diff / moments[t]))
        self.mean, self.var = mean, var
        self.count = self.count + seen.sum(axis=0)
        return Flags(np.abs(stat) > self.threshold, stat, np.where(before > 0, means, np.nan))


class HalfSpaceTreesDetector:
    """river's ``HalfSpaceTrees`` on whole vectors, calibrated to a per-sample false-alarm rate.

    - Inputs must lie in [0, 1] (the trees' default limits): each metric is scaled by its
      warm-up minimum and maximum and clipped; a missing value takes the metric's warm-up
      median (metrics absent from the warm-up are left out).
    - :meth:`fit` learns the warm-up rows, then scores them; the anomaly-score threshold
      is the warm-up scores' order statistic whose exceedance probability for a new,
      exchangeable score, ``(k + 1) / (W + 1)``, is nearest ``false_alarm``.  That is as
      close as an empirical quantile of ``W`` scores can get: with the default warm-up
      (540) and ``false_alarm`` 1e-3 the threshold is the largest warm-up score and the
      rate 1 / 541, about 1.8e-3.
    - ``stat`` is the score's Gaussian-equivalent: the two-sided normal quantile of its
      empirical exceedance probability among the warm-up scores, so the decision layer's
      ``clear_sigma`` means what it means elsewhere.
    - After warm-up it scores each vector, then learns it only when it was not flagged
      (the same rule as the other detectors: a flagged sample does not teach the model).
    - Fixed ``seed``: the trees are random, and replays must be reproducible.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(2)
    >>> W = rng.standard_normal((300, 4))
    >>> hst = HalfSpaceTreesDetector(4, false_alarm=0.01, window_size=100, seed=3).fit(W)
    >>> X = rng.standard_normal((5, 4)); X[2] = 6.0   # one gross outlier vector
    >>> hst.process(X).active[:, 0].tolist()
    [False, False, True, False, False]
    """

    def __init__(self, n_metrics: int, *, false_alarm: float = 1e-3, n_trees: int = 10, height: int = 8,
                 window_size: int = 250, seed: int = 0) -> None:
        from river.anomaly import HalfSpaceTrees

        threshold_for(false_alarm)
        self.false_alarm = float(false_alarm)
        self.n_metrics = int(n_metrics)
        self.model = HalfSpaceTrees(n_trees=n_trees, height=height, window_size=window_size, seed=seed)
        self.lo = self.span = self.fill = None
        self.features = np.zeros(0, dtype=np.int64)
        self.warmup_scores = np.zeros(0)
        self.score_threshold = math.inf

    def _scaled(self, X: np.ndarray) -> np.ndarray:
        S = (X[:, self.features] - self.lo) / self.span
        return np.clip(np.where(np.isfinite(S), S, self.fill), 0.0, 1.0)

    def _row(self, s: np.ndarray) -> dict[int, float]:
        return dict(zip(self.features.tolist(), s.tolist()))

    def fit(self, W: np.ndarray) -> "HalfSpaceTreesDetector":
        """Scale, learn and calibrate on the warm-up block ``W`` (T0, n)."""
        W = np.asarray(W, dtype=float)
        if W.ndim != 2 or W.shape[1] != self.n_metrics or W.shape[0] < 2:
            raise ValueError(f"expected a warm-up block (>= 2, {self.n_metrics}), got {W.shape}")
        self.features = np.flatnonzero(np.isfinite(W).any(axis=0))
        V = W[:, self.features]
        self.lo = np.nanmin(V, axis=0)
        self.span = np.maximum(np.nanmax(V, axis=0) - self.lo, 1e-12)
        self.fill = (column_median(V) - self.lo) / self.span
        S = self._scaled(W)
        for s in S:
            self.model.learn_one(self._row(s))
        self.warmup_scores = np.sort([self.model.score_one(self._row(s)) for s in S])
        n = self.warmup_scores.size
        k = min(max(round(self.false_alarm * (n + 1)) - 1, 0), n - 1)   # k scores above the threshold
        self.score_threshold = float(self.warmup_scores[n - 1 - k])
        return self

    def gaussian_equivalent(self, scores: np.ndarray) -> np.ndarray:
        """Two-sided normal quantile of each score's exceedance probability among the warm-up scores."""
        n = self.warmup_scores.size
        above = n - np.searchsorted(self.warmup_scores, scores, side="left")   # warm-up scores >= score
        return -ndtri(np.minimum((above + 1) / (n + 1), 1.0) / 2.0)

    def process(self, X: np.ndarray) -> Flags:
        """Score each row of ``X`` (B, n) in order, learning the unflagged ones; k = 1 column."""
        if self.lo is None:
            raise RuntimeError("call fit() on the warm-up block first")
        S = self._scaled(np.asarray(X, dtype=float))
        scores = np.empty(S.shape[0])
        for t, s in enumerate(S):
            x = self._row(s)
            scores[t] = self.model.score_one(x)
            if not scores[t] > self.score_threshold:
                self.model.learn_one(x)
        active = scores > self.score_threshold
        return Flags(active[:, None], self.gaussian_equivalent(scores)[:, None], np.full((S.shape[0], 1), np.nan))


@dataclass(frozen=True)
class PCPDetection:
    """:func:`pcp_detect`'s flags and the decomposition they came from (normalised units)."""

    flags: Flags
    decomposition: PCPResult
    residual_scale: np.ndarray   # per column: RMS of S over the warm-up rows
    threshold: float             # on |S / residual_scale|: the warm-up's 1 - false_alarm quantile


def pcp_detect(F: np.ndarray, *, warmup: int, false_alarm: float = 1e-3, tol: float = 1e-7,
               max_iter: int = 1000) -> PCPDetection:
    """Offline low-rank-plus-sparse detection on one entity's whole matrix ``F`` (T, n).

    Columns are normalised by the median and MAD of the first ``warmup`` rows
    (:class:`~shiftsieve.models.normaliser.RobustNormaliser`), missing entries are set to
    the warm-up median (0) and never flagged, and Principal Component Pursuit splits the
    matrix into ``L + S``.  With noise, ``S = M - L`` holds the noise as well as the faults,
    peaked at zero with heavy tails, so a Gaussian threshold on it is not calibrated (measured:
    ten times the target on unit noise).  The threshold is therefore empirical, as for
    HalfSpaceTrees: ``S`` is scaled per column by its standard deviation over the warm-up rows,
    and ``S_tj`` is flagged when its magnitude exceeds the ``1 - false_alarm`` quantile of
    those warm-up values pooled over all metrics -- the same per-sample false-alarm target as
    the online detectors, on the part every method assumes quiet.  ``expected`` is ``L`` back
    on ``F``'s scale.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(4)
    >>> F = rng.standard_normal((200, 2)) @ rng.standard_normal((2, 12)) * 5 + rng.standard_normal((200, 12))
    >>> F[150:170, 7] += 10.0                  # metric 7 steps for 20 samples
    >>> found = pcp_detect(F, warmup=100).flags.active
    >>> int(np.argmax(found[150:170].sum(axis=0))), int(found[150:170, 7].sum())
    (7, 20)
    """
    F = np.asarray(F, dtype=float)
    if F.ndim != 2 or not 2 <= warmup <= F.shape[0]:
        raise ValueError(f"expected F (T, n) with 2 <= warmup <= T, got {F.shape} and warmup {warmup}")
    norm = RobustNormaliser(np.zeros(F.shape[1], bool)).fit(F[:warmup])
    Z = norm.transform(F)
    seen = np.isfinite(Z)
    M = np.where(seen, Z, 0.0)
    result = principal_component_pursuit(M, tol=tol, max_iter=max_iter)
    observed = seen[:warmup]
    count = observed.sum(axis=0)
    squares = np.where(observed, result.sparse[:warmup] ** 2, 0.0).sum(axis=0)
    scale = np.sqrt(np.divide(squares, count, out=np.zeros(F.shape[1]), where=count > 0))
    scale = np.where(scale > 1e-9, scale, 1.0)   # a metric unseen (or constant) in the warm-up: unit scale
    stat = np.where(seen, result.sparse / scale, 0.0)
    calm = np.abs(stat[:warmup][seen[:warmup]])
    threshold = float(np.quantile(calm, 1.0 - false_alarm)) if calm.size else threshold_for(false_alarm)
    flags = Flags(np.abs(stat) > threshold, stat, norm.inverse(result.low_rank))
    return PCPDetection(flags, result, scale, threshold)


#: Fixed-point rounds of :func:`ewma_zscore_calibrated` (score the history, re-set the thresholds).
CALIBRATION_ROUNDS = 3


def history_thresholds(scores: np.ndarray, false_alarm: float) -> np.ndarray:
    """Per column of ``scores`` (T, n; NaN = no score), the ``1 - false_alarm`` quantile of
    its |scores| (``numpy.nanquantile``, linear interpolation): the threshold that flags a
    share ``false_alarm`` of that history.

    A column without scores, or whose quantile is 0 (a history almost all exactly zero),
    keeps the Gaussian ``threshold_for(false_alarm)``: there is nothing to calibrate on.
    A history of ``N`` scores cannot resolve rates below ``1 / N``: then the threshold is
    about its largest score.

    >>> history_thresholds(np.array([[1.0, np.nan], [-3.0, np.nan], [2.0, np.nan]]), 0.5).round(3).tolist()
    [2.0, 0.674]
    """
    A = np.abs(np.asarray(scores, dtype=float))
    out = np.full(A.shape[1], threshold_for(false_alarm))
    has = np.isfinite(A).any(axis=0)
    if has.any():
        q = np.nanquantile(A[:, has], 1.0 - false_alarm, axis=0)
        out[has] = np.where(q > 0, q, out[has])
    return out


def calibrated_flags(stat: np.ndarray, thresholds: np.ndarray, false_alarm: float, expected: np.ndarray) -> Flags:
    """Flags for per-column ``thresholds`` on ``stat``, with ``stat`` rescaled by
    ``threshold_for(false_alarm) / threshold`` so each column's threshold maps to the
    Gaussian one: the decision layer's ``clear_sigma`` and the ranking by |shift| then
    mean the same on every metric (in units of its own threshold)."""
    scale = threshold_for(false_alarm) / np.asarray(thresholds, dtype=float)
    return Flags(np.abs(stat) > thresholds, stat * scale, expected)


def ewma_zscore_calibrated(F: np.ndarray, *, history: int | np.ndarray, halflife: float,
                           false_alarm: float = 1e-3, warmup: int | np.ndarray = 540) -> Flags:
    """:class:`EWMAZScore` with each metric's threshold calibrated on its own history.

    ``history`` (per column, or one for all) is the number of leading rows of ``F`` (T, n)
    to calibrate on.  The detector's z-scores depend on its threshold (a flagged sample is
    cleaned and leaves the variance), so the threshold is found as a fixed point: start
    from the Gaussian one, score the history, set each metric's threshold to the
    ``1 - false_alarm`` quantile of its |z| there (:func:`history_thresholds`), and repeat
    ``CALIBRATION_ROUNDS`` times (on t-distributed noise with 2.5 to 50 degrees of freedom
    the history's flag rate is then within about 10 % of the target, measured).  History
    rows are scored once a metric has ``min(warmup, history // 2)`` samples (at least 2),
    so a history that is only the warm-up still yields scores.  The detector then runs
    over all of ``F`` with those thresholds, and its ``stat`` is rescaled as
    :func:`calibrated_flags` says.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(6)
    >>> F = rng.standard_t(3, size=(6000, 4))   # heavy tails: the Gaussian threshold flags too often
    >>> plain = EWMAZScore(4, halflife=200.0, false_alarm=0.01, warmup=200).process(F).active[4000:]
    >>> tuned = ewma_zscore_calibrated(F, history=4000, halflife=200.0, false_alarm=0.01, warmup=200).active
    >>> round(float(plain.mean()), 3), round(float(tuned[4000:].mean()), 3)
    (0.064, 0.009)
    """
    F = np.asarray(F, dtype=float)
    n = F.shape[1]
    rows = np.broadcast_to(np.minimum(np.asarray(history, dtype=np.int64), F.shape[0]), (n,))
    past = np.where(np.arange(F.shape[0])[:, None] < rows, F, np.nan)[: int(rows.max(initial=0))]
    probe_warmup = np.maximum(2, np.minimum(warmup, rows // 2))
    seen = np.isfinite(past)
    scored = seen & (np.cumsum(seen, axis=0) - seen >= probe_warmup)
    thresholds = np.full(n, threshold_for(false_alarm))
    for _ in range(CALIBRATION_ROUNDS):
        z = EWMAZScore(n, halflife=halflife, warmup=probe_warmup, thresholds=thresholds).process(past).stat
        thresholds = history_thresholds(np.where(scored, z, np.nan), false_alarm)
    flags = EWMAZScore(n, halflife=halflife, warmup=warmup, thresholds=thresholds).process(F)
    return calibrated_flags(flags.stat, thresholds, false_alarm, flags.expected)


def pcp_calibrated(F: np.ndarray, *, warmup: int, history: int, false_alarm: float = 1e-3) -> Flags:
    """:func:`pcp_detect` with each metric's threshold calibrated on its own first ``history`` rows.

    The decomposition is the same; instead of one threshold pooled over all metrics of the
    warm-up, metric ``j`` is flagged when ``|S_tj|`` (scaled) exceeds the ``1 - false_alarm``
    quantile of its observed values over rows ``[0, history)`` (:func:`history_thresholds`),
    and ``stat`` is rescaled as :func:`calibrated_flags` says.  A metric whose sparse part
    is almost always exactly zero there keeps the Gaussian threshold.
    """
    F = np.asarray(F, dtype=float)
    found = pcp_detect(F, warmup=warmup, false_alarm=false_alarm)
    past = found.flags.stat[:history]
    thresholds = history_thresholds(np.where(np.isfinite(F[:history]), past, np.nan), false_alarm)
    return calibrated_flags(found.flags.stat, thresholds, false_alarm, found.flags.expected)
