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
with an open incident: :meth:`.batch_result.BatchResult.window_residuals` gives a batch's rows
as ``Y = P z / d`` (the unshifted residual in residual sigmas) and
:meth:`EntityDetector.localise_window` solves the multiple-measurement-vector problem
``Y ~ A X`` on a window of them (:mod:`.window`).

The warm-up fit is :mod:`.warmup`, the probation of late metrics :mod:`.probation`, the
thresholds :mod:`.thresholds`.  :meth:`EntityDetector.to_state` and
:meth:`EntityDetector.from_state` carry everything the detector has learned.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from .batch_result import BatchResult, BatchUnits
from .decision import FIRING, QUIET, AlertTracker, DecisionConfig, Transition
from .dictionary import build_dictionary, column_scales, metric_effect
from .lasso import gross_start, solve_projected_lasso
from .normaliser import RobustNormaliser, decay_for_halflife
from .probation import Probation
from .refit import refit_solution
from .subspace import DEFAULT_ENERGY, DEFAULT_HALFLIFE, DEFAULT_MAX_RANK, SubspaceTracker
from .tail import tracked_tail_factors
from .thresholds import threshold_for, truncated_second_moment
from .warmup import fit_warmup
from .window import WindowLocalisation, localise_window, window_dictionary

__all__ = ["DetectorConfig", "EntityDetector"]


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

    @property
    def normaliser_settings(self) -> dict:
        """Keyword arguments of the entity's :class:`.normaliser.RobustNormaliser` (and its extensions)."""
        return {"halflife": self.normaliser_halflife, "settle": self.min_samples}

    @property
    def baseline_settings(self) -> dict:
        """Keyword arguments of the entity's :class:`.subspace.SubspaceTracker`."""
        return {"rank": self.rank, "energy": self.energy, "max_rank": self.max_rank, "halflife": self.baseline_halflife}


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
        self.normaliser = RobustNormaliser(np.asarray(log_mask, bool), **config.normaliser_settings)
        self.baseline = SubspaceTracker(**config.baseline_settings)
        self.tracker = AlertTracker(n_metrics, config.decision)
        self.residual_scale = np.ones(n_metrics)
        self.tail_factor = np.ones(n_metrics)
        self.warm_start = np.zeros(n_metrics)
        self.set_groups(list(groups or []))
        self._warmup_rows: list[np.ndarray] = []
        self.probation = Probation()   # metrics seen after warm-up, not yet modelled
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
        self.normaliser.extend(RobustNormaliser(log_mask, **self.config.normaliser_settings))
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
        self.probation.keep(index)
        self.set_groups([])

    # -- state ---------------------------------------------------------------------------------
    def to_state(self) -> dict:
        """Everything the detector has learned, as numpy arrays and plain values, its parts' under
        their names.  ``config`` is not state: lambda, the decays, the dictionary and its step size
        are derived from it and the groups.  The arrays are the detector's own, not copies."""
        rows = self._warmup_rows
        return {"normaliser": self.normaliser.to_state(), "baseline": self.baseline.to_state(),
                "tracker": self.tracker.to_state(), "probation": self.probation.to_state(self.baseline.rank),
                "residual_scale": self.residual_scale, "tail_factor": self.tail_factor, "admitted": self.admitted,
                "warm_start": self.warm_start,
                "warmup_rows": np.array(rows, dtype=float).reshape(len(rows), self.n_metrics),
                "groups": [np.asarray(g, dtype=np.int64) for g in self.groups], "samples": self.samples}

    @classmethod
    def from_state(cls, state: dict, config: DetectorConfig = DetectorConfig()) -> EntityDetector:
        """Inverse of :meth:`to_state`, with the settings ``config``."""
        log_mask = state["normaliser"]["log_mask"]
        det = cls(log_mask.size, log_mask, config, state["groups"])
        det.normaliser = RobustNormaliser.from_state(state["normaliser"], **config.normaliser_settings)
        det.baseline = SubspaceTracker.from_state(state["baseline"], **config.baseline_settings)
        det.tracker = AlertTracker.from_state(state["tracker"], config.decision)
        det.residual_scale, det.tail_factor = state["residual_scale"], state["tail_factor"]
        det.admitted, det.warm_start = state["admitted"], state["warm_start"]
        det._warmup_rows = list(state["warmup_rows"])
        det.probation = Probation.from_state(state["probation"])
        det.samples = state["samples"]
        return det

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
            self.admitted, self.residual_scale, self.tail_factor = fit_warmup(
                np.array(self._warmup_rows), self.normaliser, self.baseline,
                min_samples=self.config.min_samples, false_alarm=self.config.false_alarm)
            self._warmup_rows = []
            if X.shape[0] > need:
                return self._score_and_learn(X[need:], ts[need:], leading=need)
        return replace(self._empty(X.shape[0]), warmup_rows=X.shape[0])

    #: Metrics whose leverage exceeds this are neither selected nor scored (see _score_and_learn):
    #: the baseline has a direction mostly their own, leaves them less than a fifth of their noise
    #: variance as residual, and a least-squares refit would amplify that residual fivefold or more
    #: and swing the coordinates (seen on the bundled multi_shift: leverages 0.955-0.972 gave
    #: 100-sigma "shifts" of flat metrics).
    MAX_SCORED_LEVERAGE = 0.8
    def is_finite(self) -> bool:
        """Whether every learned array is finite (a False here means the entity must warm up again)."""
        norm = self.normaliser
        return all(np.isfinite(a).all() for a in (self.baseline.U, self.baseline.singular_values, norm.loc,
                                                   norm.scale, self.residual_scale, self.tail_factor, self.warm_start,
                                                   self.tracker.peak_shift))

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
        Z = units.normalise(X)   # clipped; NaN (missing) stays NaN
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
        rows of :meth:`.batch_result.BatchResult.window_residuals` (:func:`.window.window_dictionary`).

        Built with the current basis: the window's rows were projected with their own batch's
        basis, which rotates slowly (a halflife of ``baseline_halflife`` samples), so over a
        window of ~100 samples the two differ by little.
        """
        columns = np.flatnonzero(self.scored_columns())
        return window_dictionary(self.baseline.U, self.alert_scale, self.phi, columns), columns

    def localise_window(self, Y: np.ndarray, *, tol: float = 1e-4, max_iter: int = 300) -> WindowLocalisation:
        """Which columns moved together over the window ``Y`` (L, n) of
        :meth:`.batch_result.BatchResult.window_residuals` rows (:func:`.window.localise_window`,
        at this detector's ``false_alarm``)."""
        Y = np.asarray(Y, dtype=float)
        if Y.ndim != 2 or Y.shape[1] != self.n_metrics or Y.shape[0] == 0:
            raise ValueError(f"expected Y (L >= 1, {self.n_metrics}), got {Y.shape}")
        A, columns = self.window_dictionary()
        return localise_window(A, columns, Y, self.config.false_alarm, tol=tol, max_iter=max_iter)

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
        """Feed the samples of metrics on probation (:mod:`.probation`) and fold the loadings of
        those it releases into the basis.  Probation starts once the metric's normaliser has
        settled (fixed units) and lasts ``min_samples`` samples."""
        self.probation.add(Z, learning, coords)
        ready, loadings, scales = self.probation.graduate(self.config.min_samples)
        if not ready.size:
            return
        # Express the newcomer in units where its residual scale is the entity's typical one, so
        # its own noise has no more energy than another metric's and cannot claim a direction.
        typical = float(np.median(np.delete(self.residual_scale, ready))) if ready.size < self.n_metrics else 1.0
        factor = scales / typical
        units = np.ones(self.n_metrics)
        units[ready] = factor
        self.normaliser.rescale(units)
        self.baseline.set_rows(ready, loadings / factor[:, None])
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
                           units=result.units, warmup_rows=leading)
