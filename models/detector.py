"""One entity's detector: normalise -> baseline -> sparse shift -> decide, on micro-batches.

For a batch ``X`` (B, n) of raw metric vectors (NaN = missing) the detector

1. normalises each metric robustly (:mod:`.normaliser`),
2. solves the warm-started projected LASSO
   ``min_s 1/2 ||P (z - Phi s)||^2 + lambda sum_j d_j |s_j|`` with ``P = I - U U^T``
   (:mod:`.lasso`), where ``U`` is the tracked baseline (:mod:`.subspace`),
   ``d_j`` the metric's robust residual scale and ``lambda`` the two-sided
   Gaussian quantile of the target false-alarm probability,
3. refits the support by least squares for unbiased, signed magnitudes in
   residual sigmas, and the baseline's expected value for every metric,
4. feeds the decision layer (:mod:`.decision`), and
5. learns: the baseline, the normaliser and the residual scales are updated
   with the *cleaned* vectors only, so a fault never teaches the baseline.

Until ``warmup`` vectors have arrived it only collects them.

Joint localisation over an incident window is computed on demand, only for entities
with an open incident: :meth:`BatchResult.window_residuals` gives a batch's rows as
``Y = P z / d`` (the unshifted residual in residual sigmas) and
:meth:`EntityDetector.localise_window` solves the multiple-measurement-vector problem
``Y ~ A X`` on a window of them (:mod:`.mmv`: row-sparse group LASSO and M-SBL).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field, replace
from typing import NamedTuple

import numpy as np
from scipy.special import chdtri, erf, ndtri

from .decision import FIRING, QUIET, AlertTracker, DecisionConfig, Transition
from .dictionary import build_dictionary, column_scales, metric_effect
from .lasso import gross_start, projected_residual, solve_projected_lasso
from .mmv import MMVResult, group_lasso_mmv, msbl
from .normaliser import (MAD_TO_SIGMA, RobustNormaliser, column_median, decay_for_halflife, from_metric_units,
                         to_metric_units)
from .refit import refit_solution
from .subspace import DEFAULT_ENERGY, DEFAULT_HALFLIFE, DEFAULT_MAX_RANK, SubspaceTracker
from .tail import fitted_tail_factors, tracked_tail_factors


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


def _robust_scale(R: np.ndarray) -> np.ndarray:
    """Per column of ``R`` (NaN = missing) ``MAD_TO_SIGMA`` times the median of ``|R|`` (NaN for a
    column with no value): the robust scale of a residual centred at 0."""
    with warnings.catch_warnings():   # metrics absent from the warm-up: all-NaN columns
        warnings.simplefilter("ignore", RuntimeWarning)
        return MAD_TO_SIGMA * column_median(np.abs(R))


@dataclass(frozen=True)
class DetectorConfig:
    """Model settings for one entity; every count is in samples."""

    warmup: int = 540
    rank: int | None = None
    energy: float = DEFAULT_ENERGY
    max_rank: int = DEFAULT_MAX_RANK
    baseline_halflife: float = DEFAULT_HALFLIFE
    normaliser_halflife: float = 1440.0
    scale_halflife: float = 720.0
    false_alarm: float = 1e-3
    group_weight: float = 1.0
    min_samples: int = 30
    tol: float = 1e-4
    max_iter: int = 300
    decision: DecisionConfig = field(default_factory=DecisionConfig)

    def __post_init__(self) -> None:
        if self.warmup < 10:
            raise ValueError(f"warmup must be >= 10 samples, got {self.warmup}")
        if self.min_samples < 2:
            raise ValueError(f"min_samples must be >= 2, got {self.min_samples}")
        if not self.group_weight > 0:
            raise ValueError(f"group_weight must be > 0, got {self.group_weight}")
        threshold_for(self.false_alarm)
        for name in ("baseline_halflife", "normaliser_halflife", "scale_halflife"):
            decay_for_halflife(getattr(self, name))

    @property
    def threshold(self) -> float:
        return threshold_for(self.false_alarm)


class BatchUnits(NamedTuple):
    """The units a batch was scored with.  Learning replaces these arrays, never mutates them,
    so a batch's result keeps meaning what it meant when it was computed."""

    basis: np.ndarray            # U (n, r)
    loc: np.ndarray              # normaliser location (n,)
    scale: np.ndarray            # normaliser scale (n,)
    log_mask: np.ndarray         # (n,) bool
    residual_scale: np.ndarray   # alert scale d kappa (n,): residual sigmas as reported
    modelled: np.ndarray         # (n,) bool, metrics the basis knows


@dataclass(frozen=True)
class WindowLocalisation:
    """Joint localisation over a window of residuals (see :meth:`EntityDetector.localise_window`).

    ``columns`` (q,) are the dictionary columns (metrics, then groups) the two solutions' rows
    stand for; coefficients are shifts in residual sigmas, one column per window row.
    """

    columns: np.ndarray
    group_lasso: MMVResult
    msbl: MMVResult
    lam: float
    rows: int


@dataclass(frozen=True)
class BatchResult:
    """What one batch produced.  Arrays are (B, n) unless noted; empty while warming up."""

    transitions: list[Transition]
    shift_sigma: np.ndarray      # debiased per-metric shift in residual sigmas (0 off the support)
    coords: np.ndarray           # (B, r) baseline coordinates, in the basis used for this batch
    residual_norm: np.ndarray    # (B,) norm of the projected residual, in residual sigmas
    n_iter: np.ndarray           # (B,) solver iterations
    converged: np.ndarray        # (B,) solver reached its tolerance
    units: BatchUnits | None = None   # what the batch was scored with (None while warming up)

    def expected(self) -> np.ndarray:
        """The baseline's expected value (B, n) in the metrics' own units (NaN while warming up).

        Computed on demand: the hot path needs it only for the few busy metrics.  The basis
        rotates as it learns, so coordinates only mean something with the basis of their batch.
        """
        if self.units is None:
            return np.full(self.shift_sigma.shape, np.nan)
        u = self.units
        return to_metric_units(self.coords @ u.basis.T, u.loc, u.scale, u.log_mask)

    def window_residuals(self, X: np.ndarray) -> np.ndarray:
        """Rows ``X`` (k, n) in this batch's units as joint-localisation residuals: ``Y = P z / d``,
        the projected residual of the *unshifted* normalised vector, metric j in residual sigmas.

        A shift of ``c`` sigmas on metric j adds ``c d_j P e_j / d`` to a row, which is ``c``
        times column j of :meth:`EntityDetector.window_dictionary`.  An entry that is missing or
        unknown to the basis is 0 (no evidence), the rest are the residual of the basis fitted to
        the row's other entries, as the per-sample solver sees them.  Computed on demand (for
        entities with an open incident), never on the hot path.  Values are clipped at
        ``WINDOW_LIMIT`` residual sigmas.
        """
        if self.units is None:
            raise ValueError("no units: the batch was collected for warm-up, not scored")
        u = self.units
        Z = np.clip(from_metric_units(X, u.loc, u.scale, u.log_mask), -EntityDetector.Z_LIMIT, EntityDetector.Z_LIMIT)
        mask = np.isfinite(Z) & u.modelled
        residual, _ = projected_residual(Z, u.basis, np.zeros_like(Z), mask=None if mask.all() else mask)
        limit = EntityDetector.WINDOW_LIMIT
        return np.clip(residual / u.residual_scale, -limit, limit)


class EntityDetector:
    """Low-rank baseline plus sparse shift detection for one entity's metric vector.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(7)
    >>> loadings = rng.standard_normal((20, 2))
    >>> def draw(k):
    ...     return 50.0 + rng.standard_normal((k, 2)) @ loadings.T * 3.0 + rng.standard_normal((k, 20))
    >>> det = EntityDetector(20, [False] * 20, DetectorConfig(warmup=100))
    >>> _ = det.process(draw(100), np.arange(100.0))
    >>> quiet = det.process(draw(50), np.arange(100.0, 150.0))
    >>> X = draw(20); X[:, 4] += 12.0          # metric 4 shifts by ~12 sigma
    >>> out = det.process(X, np.arange(150.0, 170.0))
    >>> [(t.kind, t.metrics.tolist()) for t in out.transitions]
    [('firing', [4])]
    """

    def __init__(self, n_metrics: int, log_mask, config: DetectorConfig = DetectorConfig(),
                 groups: list[np.ndarray] | None = None) -> None:
        self.config = config
        self.lam = config.threshold
        self._scale_decay = decay_for_halflife(config.scale_halflife)
        self.normaliser = RobustNormaliser(np.asarray(log_mask, bool), halflife=config.normaliser_halflife,
                                           settle=config.min_samples)
        self.baseline = SubspaceTracker(rank=config.rank, energy=config.energy, max_rank=config.max_rank,
                                        halflife=config.baseline_halflife)
        self.tracker = AlertTracker(n_metrics, config.decision)
        self.residual_scale = np.ones(n_metrics)
        self.tail_factor = np.ones(n_metrics)
        self.warm_start = np.zeros(n_metrics)
        self.set_groups(list(groups or []))
        self._warmup_rows: list[np.ndarray] = []
        # Metrics on probation (seen after warm-up, not yet modelled): per metric the sums
        # sum w w^T, sum w z, sum z^2 over their samples, w = baseline coordinates.
        self._probation: dict[int, list] = {}
        self.admitted = np.zeros(n_metrics, dtype=bool)
        self.samples = 0

    # -- shape bookkeeping ---------------------------------------------------------------------
    @property
    def n_metrics(self) -> int:
        return self.normaliser.n_metrics

    @property
    def warming_up(self) -> bool:
        return self.baseline.rank == 0

    def set_groups(self, groups: list[np.ndarray]) -> None:
        """Replace the group columns (e.g. after metrics were added or dropped)."""
        self.groups = list(groups)
        self.phi = build_dictionary(self.n_metrics, self.groups)
        self._lipschitz = 1.0 if self.phi is None else float(np.linalg.norm(self.phi, 2) ** 2)
        self.warm_start = np.concatenate([self.warm_start[: self.n_metrics], np.zeros(len(self.groups))])
        # The decision layer has one state per dictionary column: metrics, then groups (whose
        # states restart when the groups change, which happens only as metrics come and go).
        self.tracker.keep(np.arange(self.n_metrics))
        self.tracker.extend(len(self.groups))

    def extend(self, log_mask) -> None:
        """Add metrics that appeared after warm-up; each is learned from scratch before it is scored."""
        log_mask = np.asarray(log_mask, bool)
        k = log_mask.size
        if self.warming_up:
            self._warmup_rows = [np.concatenate([r, np.full(k, np.nan)]) for r in self._warmup_rows]
        self.tracker.keep(np.arange(self.n_metrics))   # group states go; set_groups re-adds them
        self.normaliser.extend(RobustNormaliser(log_mask, halflife=self.config.normaliser_halflife,
                                                     settle=self.config.min_samples))
        self.baseline.extend(k)
        self.tracker.extend(k)
        self.residual_scale = np.concatenate([self.residual_scale, np.ones(k)])
        self.tail_factor = np.concatenate([self.tail_factor, np.ones(k)])
        self.admitted = np.concatenate([self.admitted, np.zeros(k, dtype=bool)])
        self.warm_start = np.concatenate([self.warm_start[: self.n_metrics - k], np.zeros(k)])
        self.set_groups(self.groups)   # same members; the dictionary grows by k identity columns

    def keep(self, index: np.ndarray) -> None:
        """Retain only the metrics at ``index`` (vanished metrics are dropped); call set_groups after."""
        index = np.asarray(index, dtype=np.int64)
        self.normaliser.keep(index)
        self.baseline.keep(index)
        self.tracker.keep(index)   # metric columns only: group states go, set_groups re-adds them
        self.residual_scale = self.residual_scale[index]
        self.tail_factor = self.tail_factor[index]
        self.admitted = self.admitted[index]
        self.warm_start = self.warm_start[index]
        renumber = {int(old): new for new, old in enumerate(index)}
        self._probation = {renumber[j]: v for j, v in self._probation.items() if j in renumber}
        self.set_groups([])

    # -- the batch path ------------------------------------------------------------------------
    def process(self, X: np.ndarray, ts: np.ndarray) -> BatchResult:
        """Score and learn one micro-batch ``X`` (B, n) with timestamps ``ts`` (B,)."""
        X = np.asarray(X, dtype=float)
        ts = np.asarray(ts, dtype=float)
        if X.ndim != 2 or X.shape[1] != self.n_metrics or ts.shape != (X.shape[0],):
            raise ValueError(f"expected X (B, {self.n_metrics}) and ts (B,), got {X.shape} and {ts.shape}")
        if self.warming_up:
            return self._collect_warmup(X, ts)
        return self._score_and_learn(X, ts)

    def _collect_warmup(self, X: np.ndarray, ts: np.ndarray) -> BatchResult:
        need = self.config.warmup - len(self._warmup_rows)
        self._warmup_rows.extend(X[:need])
        self.samples += min(need, X.shape[0])
        if len(self._warmup_rows) >= self.config.warmup:
            self._fit_warmup(np.array(self._warmup_rows))
            self._warmup_rows = []
            if X.shape[0] > need:
                return self._score_and_learn(X[need:], ts[need:], leading=need)
        return self._empty(X.shape[0])

    def _fit_warmup(self, W: np.ndarray) -> None:
        """Fit normaliser, baseline and residual scales on the warm-up block."""
        norm = self.normaliser.fit(W)
        usable = norm.count >= self.config.min_samples
        self.admitted = usable.copy()
        Z = np.where(usable, norm.transform(W), np.nan).clip(-self.WARMUP_CLIP, self.WARMUP_CLIP)
        # Fit twice: the second time in units of each metric's noise, the error of predicting it
        # from the others (a weighted PCA: the maximum-likelihood fit of a factor model with
        # heteroscedastic noise). In robust-sigma units alone a metric with little shared movement
        # has far more noise than one that moves with traffic, and its noise claims a direction.
        self.baseline.fit(Z)
        noise = self._prediction_noise(Z, self.baseline)
        typical = float(np.median(noise[usable])) if usable.any() else 0.0
        if typical > 0:   # 0: the baseline explains (nearly) everything, there is no noise to weigh by
            norm.rescale(np.where(usable & (noise > 0), noise / typical, 1.0))
        Z = np.where(usable, norm.transform(W), np.nan).clip(-self.WARMUP_CLIP, self.WARMUP_CLIP)
        self.baseline.fit(Z)
        self.residual_scale, self.tail_factor = self._warmup_residual_scale(Z, self.baseline, self.config.false_alarm,
                                                                            norm.quantisation_noise())

    #: Metrics whose leverage exceeds this are neither selected nor scored (see _score_and_learn):
    #: the baseline has a direction mostly their own, leaves them less than a fifth of their noise
    #: variance as residual, and a least-squares refit would amplify that residual fivefold or more
    #: and swing the coordinates (seen on the bundled multi_shift: leverages 0.955-0.972 gave
    #: 100-sigma "shifts" of flat metrics).
    MAX_SCORED_LEVERAGE = 0.8
    #: Warm-up values beyond this many robust sigmas are clipped, so a wild outlier of the warm-up
    #: cannot own a baseline direction; recurring patterns such as batch jobs stay below it and are
    #: learned (clipping them harder would bend their direction).
    WARMUP_CLIP = 50.0

    #: Columns M-SBL starts from in a joint-window localisation (the most correlated with the
    #: window). Measured on bench_service's stream (n = 200, 12 events): the localisation went
    #: from a median of 55 to 17 ms per event, with the same top 3 in 11 of the 12 events (the
    #: tail of a top ten is noise-level columns and reorders).
    WINDOW_CANDIDATES = 50

    #: Normalised values are clipped here before scoring: a value 1e300 away would overflow the
    #: squares of the solver; a billion robust sigmas is still an unmistakable shift.
    Z_LIMIT = 1e9
    #: Window residuals are clipped here (residual sigmas): a larger value says no more about which
    #: metric moved, and M-SBL's covariance ``I + A Gamma A^T`` would stop being numerically positive
    #: definite (seen with a jump of 1e12).
    WINDOW_LIMIT = 1e4

    def is_finite(self) -> bool:
        """Whether every learned array is finite (a False here means the entity must warm up again)."""
        norm = self.normaliser
        return all(np.isfinite(a).all() for a in (self.baseline.U, self.baseline.singular_values, norm.loc,
                                                   norm.scale, self.residual_scale, self.tail_factor, self.warm_start,
                                                   self.tracker.peak_shift))

    @staticmethod
    def _prediction_noise(Z: np.ndarray, tracker: SubspaceTracker) -> np.ndarray:
        """Per metric the robust scale of its error when predicted from the other metrics through
        the basis: the in-sample residual's MAD over ``1 - leverage`` (a direction a metric owns
        predicts nothing about it; leave-one-out algebra of projections)."""
        mad = _robust_scale(tracker.residuals(Z))
        leverage = np.einsum("ij,ij->i", tracker.U, tracker.U)
        return np.where(np.isfinite(mad), mad / np.maximum(1.0 - leverage, 0.01), 0.0)

    @staticmethod
    def _warmup_residual_scale(Z: np.ndarray, tracker: SubspaceTracker, false_alarm: float,
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

    @property
    def alert_scale(self) -> np.ndarray:
        """Per metric ``d kappa``: the residual sigma alerts and reported shifts are measured in."""
        return self.residual_scale * self.tail_factor

    def _empty(self, B: int) -> BatchResult:
        return BatchResult([], np.zeros((B, self.n_metrics)), np.zeros((B, self.baseline.rank)), np.zeros(B),
                           np.zeros(B, dtype=np.int64), np.ones(B, dtype=bool))

    def _score_and_learn(self, X: np.ndarray, ts: np.ndarray, leading: int = 0) -> BatchResult:
        cfg = self.config
        norm, U, phi = self.normaliser, self.baseline.U, self.phi
        alert_scale = self.alert_scale
        units = BatchUnits(U, norm.loc, norm.scale, norm.log_mask, alert_scale, self.admitted)
        B, n = X.shape
        Z = norm.transform(X)
        np.clip(Z, -self.Z_LIMIT, self.Z_LIMIT, out=Z)   # NaN (missing) stays NaN
        present = np.isfinite(Z)
        modelled = self.admitted                       # metrics the baseline knows
        settled = norm.count >= cfg.min_samples        # their units are fixed (see _fold_in)
        # mask None = every entry observed: the common case, which skips all masking passes.
        mask = None if modelled.all() and present.all() else present & modelled
        penalty = self.lam * column_scales(alert_scale, phi)
        if phi is not None:
            penalty[n:] *= cfg.group_weight
        # A metric the baseline explains by itself is not selected: the refit would amplify its
        # residual by 1 / (1 - leverage) and swing the coordinates, moving every expected value.
        penalty[:n][self.leverage() > self.MAX_SCORED_LEVERAGE] = np.inf
        Zo = Z if mask is None else np.where(mask, Z, 0.0)   # the solver fixes unobserved columns at 0
        fit = solve_projected_lasso(Zo, U, penalty, phi=phi, mask=mask, init=gross_start(Zo, U, self.warm_start, mask=mask), tol=cfg.tol,
                                    max_iter=cfg.max_iter, lipschitz=self._lipschitz, check_input=False)
        # Least-squares refit of the selected shifts (unbiased magnitudes). Shifts live in the
        # few rows with a support, so everything about them is computed on those rows only.
        support, coef_rows, coords_rows = refit_solution(Zo, U, fit, phi=phi, mask=mask, check_input=False)
        coords = fit.coords
        effect = np.zeros((B, n))         # refitted per-metric shift Phi s~ (normalised units)
        shift_sigma = np.zeros((B, n))
        selected = metric_effect(fit.coef[support], phi) != 0   # (support rows, n): what the LASSO chose
        if support.size:
            coords = coords.copy()
            coords[support] = coords_rows
            effect[support] = effect_rows = metric_effect(coef_rows, phi)
            shift_sigma[support] = effect_rows / alert_scale   # zero wherever unobserved
            Z[support] -= effect_rows   # Z is ours: from here on it is the cleaned signal
        firing_before = self.tracker.state[:n] == FIRING
        transitions = self._decide(X, ts, support, coef_rows, fit.coef, fit.residual, coords, shift_sigma)
        squares = fit.residual * fit.residual   # zero at unobserved entries
        self._learn(Z, present, mask, effect, coords, squares, support, selected, transitions)
        self._track_tails(selected, B, firing_before, transitions)
        if not modelled.all():
            self._fold_in(Z, present & settled & ~modelled, coords)
        if leading:   # rows refer to the caller's batch, which began with warm-up vectors
            transitions = [replace(t, row=t.row + leading) for t in transitions]
        self.warm_start = fit.coef[-1].copy()
        self.samples += B
        residual_norm = np.sqrt(squares @ (1.0 / self.residual_scale ** 2))
        return self._pad(leading, BatchResult(transitions, shift_sigma, coords, residual_norm,
                                              fit.n_iter, fit.converged, units))

    def _decide(self, X: np.ndarray, ts: np.ndarray, support: np.ndarray, coef_rows: np.ndarray,
                coef_lasso: np.ndarray, residual: np.ndarray, coords: np.ndarray,
                metric_shift: np.ndarray) -> list[Transition]:
        """Feed the decision layer, one state per dictionary column (metrics, then groups), with
        just the columns that are active or not quiet.

        A column's shift is its own refitted coefficient in its residual sigmas, so a group
        shift is one alert line ("the database got slower") and does not also count as a
        shift of each member.
        """
        n, phi = self.n_metrics, self.phi
        B, p = coef_lasso.shape
        scales = column_scales(self.alert_scale, phi)
        scored = self.scored_columns()
        if phi is None:   # columns are the metrics: their shifts are already computed
            shift = metric_shift
        else:
            shift = np.zeros((B, p))
            shift[support] = coef_rows / scales
        # Active: selected by the LASSO and still clear of the hysteresis bar after the refit (a
        # refit can shrink one of several correlated selections to almost nothing).
        support_active = (coef_lasso[support] != 0) & (np.abs(shift[support]) >= self.config.decision.clear_sigma)
        cols = ((support_active.any(axis=0) & scored) | (self.tracker.state != QUIET)).nonzero()[0]
        if cols.size == 0:   # the common case: every column quiet and staying so
            self.tracker.idle(B)
            return []
        active = np.zeros((B, cols.size), dtype=bool)
        active[support] = support_active[:, cols] & scored[cols]
        correlation = residual[:, cols] if phi is None else residual @ phi[:, cols]
        stat = (coef_lasso[:, cols] + correlation) / scales[cols]
        metric_cols = cols[cols < n]   # cols are sorted: metrics first, then groups (no value)
        k = metric_cols.size
        value = np.full((B, cols.size), np.nan)
        expected = np.full((B, cols.size), np.nan)
        value[:, :k] = X[:, metric_cols]
        expected[:, :k] = self.normaliser.inverse_columns(coords @ self.baseline.U[metric_cols].T, metric_cols)
        return self.tracker.step(active, shift[:, cols], stat, value, expected, ts, columns=cols)

    def leverage(self) -> np.ndarray:
        """(n,) each metric's leverage ``|U_j|^2``: the share of its own movement the baseline
        attributes to it alone when it is observed (1: a direction of its own)."""
        return np.einsum("ij,ij->i", self.baseline.U, self.baseline.U)

    def scored_columns(self) -> np.ndarray:
        """(p,) bool: the dictionary columns the decision layer judges.

        A metric the baseline explains by itself (leverage near 1: a direction of its own) leaves
        no residual to judge it by; its "shifts" are noise amplified by 1/(1 - leverage).  A metric
        is scored once it has ``warmup`` samples, a group when all its members are scored.
        """
        scored = (self.normaliser.count >= self.config.warmup) & (self.leverage() <= self.MAX_SCORED_LEVERAGE)
        if self.phi is not None:
            scored = np.concatenate([scored, [bool(scored[g].all()) for g in self.groups]])
        return scored

    # -- joint localisation over an incident window ----------------------------------------------
    def window_dictionary(self) -> tuple[np.ndarray, np.ndarray]:
        """``(A, columns)``: the scored dictionary columns ``columns`` (q,) and ``A`` (n, q), the
        matching columns of ``D^-1 P Phi C`` (``D``: residual scales, ``C``: column scales), so that
        a shift of one residual sigma on a column is a unit coefficient of ``Y ~ A X`` with the
        rows of :meth:`BatchResult.window_residuals`.

        Built with the current basis: the window's rows were projected with their own batch's
        basis, which rotates slowly (a halflife of ``baseline_halflife`` samples), so over a
        window of ~100 samples the two differ by little.
        """
        columns = np.flatnonzero(self.scored_columns())
        U, d = self.baseline.U, self.alert_scale
        phi = np.eye(self.n_metrics) if self.phi is None else self.phi
        Phi = phi[:, columns] * column_scales(d, self.phi)[columns]
        return (Phi - U @ (U.T @ Phi)) / d[:, None], columns

    def localise_window(self, Y: np.ndarray, *, tol: float = 1e-4, max_iter: int = 300) -> WindowLocalisation:
        """Which columns moved together over the window ``Y`` (L, n) of
        :meth:`BatchResult.window_residuals` rows: the row-sparse group LASSO with
        ``lam = window_threshold(false_alarm, L)``, and M-SBL with noise variance 1 (the
        residuals are in residual sigmas, so no ``lam`` and no noise to learn).

        ``tol``/``max_iter`` bound both solvers; M-SBL's EM is the slow one (at n = 200 and 120
        rows, ~30 iterations and ~36 ms at tol 1e-4, ~500 and ~0.8 s at 1e-6, same top ranks).
        """
        Y = np.asarray(Y, dtype=float)
        if Y.ndim != 2 or Y.shape[1] != self.n_metrics or Y.shape[0] == 0:
            raise ValueError(f"expected Y (L >= 1, {self.n_metrics}), got {Y.shape}")
        A, columns = self.window_dictionary()
        lam = window_threshold(self.config.false_alarm, Y.shape[0])
        # M-SBL's cost per iteration grows with the columns it keeps, and EM shrinks the gammas of
        # columns without signal only slowly: it starts from the WINDOW_CANDIDATES columns most
        # correlated with the window (sure independence screening, Fan & Lv 2008) and never
        # revives the others (zero gammas stay pruned). Rankings go no deeper than the top ten.
        correlation = np.linalg.norm(A.T @ Y.T, axis=1)
        candidates = np.argsort(-correlation, kind="stable")[: self.WINDOW_CANDIDATES]
        return WindowLocalisation(columns,
                                  group_lasso_mmv(A, Y.T, lam, tol=tol, max_iter=max_iter),
                                  msbl(A, Y.T, noise_var=1.0, tol=tol, max_iter=max_iter, candidates=candidates),
                                  lam, Y.shape[0])

    def _learn(self, cleaned: np.ndarray, present: np.ndarray, mask: np.ndarray | None, effect: np.ndarray,
               coords: np.ndarray, squares: np.ndarray, support: np.ndarray, selected: np.ndarray,
               transitions: list[Transition]) -> None:
        if mask is None:
            self.baseline.update(cleaned)
        else:
            # Holes filled by the baseline's own prediction; rows that are mostly holes are
            # skipped (they would only pull the basis towards its own guess).
            complete = np.where(mask, cleaned, coords @ self.baseline.U.T)
            self.baseline.update(complete[mask.mean(axis=1) >= 0.5])
        self._update_residual_scale(squares, mask, support, selected)
        self.normaliser.update(cleaned, present)
        for t in transitions:
            if t.kind == "adapted":   # the shift becomes the new normal, for a group on all its members
                n = self.n_metrics
                metrics = np.unique(np.concatenate([t.metrics[t.metrics < n]]
                                                   + [self.groups[c - n] for c in t.metrics[t.metrics >= n]]))
                self.normaliser.accept_shift(metrics, effect[t.row, metrics])
                self.warm_start[t.metrics] = 0.0

    def _fold_in(self, Z: np.ndarray, learning: np.ndarray, coords: np.ndarray) -> None:
        """Learn a late metric's baseline loadings by regression on the baseline coordinates while
        it is on probation, then fold them into the basis when it enters the model.

        Probation starts once the metric's normaliser has settled (fixed units) and lasts
        ``min_samples`` samples.  Entering with zero loadings would make its whole shared
        movement look like a shift, and the basis would swing to absorb it, disturbing every
        other metric's prediction.
        """
        cfg = self.config
        for j in np.flatnonzero(learning.any(axis=0)):
            rows = learning[:, j]
            w, z = coords[rows], Z[rows, j]
            stats = self._probation.setdefault(int(j), [0.0, 0.0, 0.0, 0])
            stats[0] = stats[0] + w.T @ w
            stats[1] = stats[1] + w.T @ z
            stats[2] += float(z @ z)
            stats[3] += int(rows.sum())
        ready = [j for j, stats in self._probation.items() if stats[3] >= cfg.min_samples]
        if not ready:
            return
        loadings, scales = [], []
        for j in ready:
            ww, wz, zz, k = self._probation.pop(j)
            u = np.linalg.lstsq(ww + 1e-9 * np.eye(len(wz)), wz, rcond=None)[0]
            rss = max(zz - 2.0 * u @ wz + u @ ww @ u, 0.0)
            loadings.append(u)
            scales.append(math.sqrt(rss / max(k - len(u), 1)) or 1.0)
        ready = np.array(ready)
        # Express the newcomer in units where its residual scale is the entity's typical one, so
        # its own noise has no more energy than another metric's and cannot claim a direction.
        typical = float(np.median(np.delete(self.residual_scale, ready))) if ready.size < self.n_metrics else 1.0
        factor = np.array(scales) / typical
        units = np.ones(self.n_metrics)
        units[ready] = factor
        self.normaliser.rescale(units)
        self.baseline.set_rows(ready, np.array(loadings) / factor[:, None])
        self.residual_scale = self.residual_scale.copy()   # replaced, not mutated: see BatchUnits
        self.residual_scale[ready] = typical
        self.tail_factor = self.tail_factor.copy()
        self.tail_factor[ready] = 1.0
        self.admitted = self.admitted.copy()
        self.admitted[ready] = True

    def _track_tails(self, selected: np.ndarray, B: int, firing_before: np.ndarray,
                     transitions: list[Transition]) -> None:
        """Keep each metric's selection rate at ``false_alarm`` (:func:`.tail.tracked_tail_factors`).

        A metric takes part when it ends the batch quiet, was not firing at its start and is in
        none of its transitions: a confirmed shift is not a tail to calibrate away, and one still
        pending at the end of a batch may be a slow ramp on its way to firing (counting it would
        raise the ramp's bar ahead of it).  Selections that never confirm are what the target is
        about.  ``selected`` (support rows, n) holds the LASSO's selections.
        """
        n = self.n_metrics
        calm = ~firing_before & (self.tracker.state[:n] == QUIET)
        for t in transitions:
            calm[t.metrics[t.metrics < n]] = False
        counts = selected.sum(axis=0) if selected.size else np.zeros(n)
        self.tail_factor = tracked_tail_factors(self.tail_factor, counts, B, self.config.false_alarm, calm)

    def _update_residual_scale(self, squares: np.ndarray, mask: np.ndarray | None, support: np.ndarray,
                               selected: np.ndarray) -> None:
        """Exponentially weighted mean square of the residual (``squares`` (B, n), 0 where unobserved)
        over the observed entries the LASSO did not select, divided by the second moment of a
        standard normal truncated at ``lambda``.

        Selected entries carry no information on the noise (their residual is pinned at
        ``lambda d`` by the optimality conditions) and would inflate ``d`` during a long shift,
        desensitising the metric just when it matters.  They sit in the few ``support`` rows
        (``selected`` holds those rows), so they are subtracted from the full sums rather than
        masked out of them.
        """
        B = squares.shape[0]
        decay = self._scale_decay
        weights = (1.0 - decay) * decay ** np.arange(B - 1, -1, -1)
        moment = weights @ squares
        used_weight = weights.sum() if mask is None else weights @ mask   # per metric (or all alike)
        used = B if mask is None else mask.sum(axis=0)
        if support.size:
            moment -= weights[support] @ np.where(selected, squares[support], 0.0)
            used_weight = used_weight - weights[support] @ selected
            used = used - selected.sum(axis=0)
        kept = decay ** used
        total = used_weight + kept
        truncated = truncated_second_moment(self.lam * self.tail_factor)
        variance = (kept * self.residual_scale ** 2 + moment / truncated) / total
        floor = self.normaliser.quantisation_noise()
        self.residual_scale = np.sqrt(np.maximum(variance, np.maximum(floor * floor, 1e-12)))

    def _pad(self, leading: int, result: BatchResult) -> BatchResult:
        if not leading:
            return result
        empty = self._empty(leading)
        return BatchResult(result.transitions,
                           *(np.concatenate([getattr(empty, f), getattr(result, f)])
                             for f in ("shift_sigma", "coords", "residual_norm", "n_iter", "converged")),
                           units=result.units)
