"""The numeric kernel of the projected LASSO: FISTA with restart on a working set of samples.

Accelerated proximal gradient (FISTA, Beck & Teboulle 2009) with soft-thresholding and the
gradient adaptive restart of O'Donoghue & Candes (2015), vectorised over the samples still
iterating.  Every ``_CHECK_EVERY`` iterations the duality gap of each sample is checked (the
dual point is the residual rescaled to dual feasibility); samples that reach their tolerance
leave the working set, so the cost follows the hard samples.  :mod:`.lasso` prepares the
problem, the penalties and the starting points, and calls :func:`fista`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .projection import ProjectedProblem, project
from .shrinkage import soft_threshold

__all__ = ["FistaOutput", "FistaSettings", "PenaltyTerms", "WorkingSet", "fista", "primal_dual", "take_rows"]

# Gap checks (and working-set compression) happen every _CHECK_EVERY FISTA
# iterations. The gap itself is cheap (the residual at the iterate is carried
# along anyway, see fista); the check interval only trades a few reductions
# and array copies against at most _CHECK_EVERY - 1 surplus iterations.
_CHECK_EVERY = 2


def take_rows(a: np.ndarray | None, idx: np.ndarray) -> np.ndarray | None:
    """Rows ``idx`` of a per-sample array; a shared (1, p) row (or None) is returned as is."""
    if a is None or a.shape[0] == 1:
        return a
    return a[idx]


@dataclass(frozen=True)
class PenaltyTerms:
    """The penalty and what the gap computations derive from it, per sample (B, p) or shared (1, p).

    Frozen coefficients (infinite penalty, or no observed support) have ``penalty`` inf,
    ``finite`` 0 and ``inverse`` 0 (no dual constraint); ``zero`` marks penalties 0
    (``inverse`` 0, see :meth:`dual_norm`). ``zero`` and ``frozen`` are None when empty.
    """

    penalty: np.ndarray
    finite: np.ndarray
    inverse: np.ndarray
    zero: np.ndarray | None
    frozen: np.ndarray | None

    @classmethod
    def from_penalty(cls, pen: np.ndarray, col_ok: np.ndarray | None) -> PenaltyTerms:
        """The terms of a validated penalty array (modified in place: frozen entries become inf)."""
        frozen = np.isinf(pen)
        if col_ok is not None:
            frozen |= ~col_ok
        if frozen.any():
            pen[frozen] = np.inf
            pen_fin = np.where(frozen, 0.0, pen)
        else:
            frozen, pen_fin = None, pen
        zero_pen = pen == 0
        if zero_pen.any():
            with np.errstate(divide="ignore"):
                inv_pen = 1.0 / pen   # 1 / inf = 0 at frozen columns
            inv_pen[zero_pen] = 0.0
        else:
            zero_pen, inv_pen = None, 1.0 / pen
        return cls(pen, pen_fin, inv_pen, zero_pen, frozen)

    def rows(self, idx: np.ndarray) -> PenaltyTerms:
        """The terms of the samples ``idx`` (indices or a boolean mask)."""
        return PenaltyTerms(*(take_rows(a, idx) for a in (self.penalty, self.finite, self.inverse, self.zero,
                                                          self.frozen)))

    def dual_norm(self, C: np.ndarray) -> np.ndarray:
        """max_j |C_j| / penalty_j per row: the residual is dual feasible iff this is <= 1."""
        dnorm = np.maximum.reduce(np.abs(C) * self.inverse, axis=1, initial=0.0)
        if self.zero is not None:
            # penalty 0: the dual constraint is C_j = 0 exactly.
            dnorm = np.where(np.any(self.zero & (C != 0), axis=1), np.inf, dnorm)
        return dnorm


def _dual_value(R, Y, rr, dnorm):
    """Dual objective at theta = a R, a = min(1, 1/dnorm), the standard feasible rescaling."""
    a = 1.0 / np.maximum(dnorm, 1.0)   # = min(1, 1/dnorm), with no division by 0
    return a * np.einsum("ij,ij->i", R, Y) - 0.5 * a * a * rr


def primal_dual(R: np.ndarray, C: np.ndarray, X: np.ndarray, Y: np.ndarray,
                terms: PenaltyTerms) -> tuple[np.ndarray, np.ndarray]:
    """Primal value at X and dual value at the rescaled residual, per row.

    ``R = P(z - Phi x)``, ``C = Phi^T R`` (= (P Phi)^T R since P R = R),
    ``Y = P z``. Dual of the LASSO: max_theta theta.y - ||theta||^2/2 subject
    to |(P Phi)^T theta|_j <= penalty_j; theta = a R with
    a = min(1, min_j penalty_j / |C_j|) is feasible (the standard rescaling).
    Columns with infinite penalty carry no dual constraint (``inverse`` 0).
    """
    rr = np.einsum("ij,ij->i", R, R)
    primal = 0.5 * rr + np.einsum("ij,ij->i", terms.finite, np.abs(X))
    return primal, _dual_value(R, Y, rr, terms.dual_norm(C))


@dataclass(frozen=True)
class WorkingSet:
    """The samples FISTA iterates on (``rows`` (k,) of the batch) and where each one starts.

    ``coef`` (k, p) the starting iterate and ``correlation`` (k, p) ``Phi^T P(z - Phi x)`` there;
    ``target`` (k, n) ``P z``; ``thresh`` (k,) the gap each sample must reach; ``primal``/``dual``
    (k,) the best values seen before iterating.
    """

    rows: np.ndarray
    coef: np.ndarray
    correlation: np.ndarray
    target: np.ndarray
    thresh: np.ndarray
    primal: np.ndarray
    dual: np.ndarray


@dataclass(frozen=True)
class FistaSettings:
    """Step-size constant ``lipschitz`` (an upper bound on ``||P Phi||_2^2``) and the iteration cap."""

    lipschitz: float
    max_iter: int


@dataclass(frozen=True)
class FistaOutput:
    """Per-sample results of the whole batch, written in place as samples finish."""

    coef: np.ndarray        # (B, p) best iterate
    gap: np.ndarray         # (B,) duality gap certified for it
    converged: np.ndarray   # (B,) gap <= thresh
    n_iter: np.ndarray      # (B,) iterations spent


def fista(prob: ProjectedProblem, *, start: WorkingSet, penalty: PenaltyTerms, settings: FistaSettings,
          out: FistaOutput) -> None:
    """FISTA on the working set ``start``; writes each sample's result into ``out`` at its row.

    ``penalty`` holds the terms of the whole batch. Carries the residual R and C = Phi^T R at
    the iterate x_k (one P-product per iteration). The gradient is affine in s, so the negative
    gradient at the extrapolated point y_k = x_k + beta (x_k - x_{k-1}) is the same combination
    of C_k and C_{k-1}: the gap at x_k comes for free.
    """
    act, X, C, Y = start.rows, start.coef, start.correlation, start.target
    thresh, p_best, d_best = start.thresh, start.primal, start.dual
    terms = penalty.rows(act)
    L, max_iter = settings.lipschitz, settings.max_iter
    Za = prob.Z[act]
    m, ginv = prob.rows(act)
    Xb = X.copy()  # best iterate so far (primal value p_best)
    Xp, Cp = X, C
    thr = terms.penalty / L
    neg_thr = -thr
    t = np.ones(act.size)
    for k in range(1, max_iter + 1):
        t_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * t * t))
        if k == 1:   # t = 1, beta = 0: a plain gradient step from x_1, which never restarts
            Xn = soft_threshold(X + C / L, neg_thr, thr)
            t = t_next
        else:
            beta = ((t - 1.0) / t_next)[:, None]
            V = X + beta * (X - Xp)
            G = V + (C + beta * (C - Cp)) / L  # gradient step from y_k
            Xn = soft_threshold(G, neg_thr, thr)
            # Adaptive restart, gradient scheme (O'Donoghue & Candes 2015): drop
            # the momentum of a sample whose step opposes its extrapolation.
            t = np.where(np.einsum("ij,ij->i", V - Xn, Xn - X) > 0, 1.0, t_next)
        R, _ = project(Za - prob.phi_mul(Xn), prob.U, m, ginv)
        Xp, Cp, X, C = X, C, Xn, prob.phi_t(R)

        if k % _CHECK_EVERY and k != max_iter:
            continue
        P, D = primal_dual(R, C, X, Y, terms)
        better = P < p_best
        p_best = np.where(better, P, p_best)
        Xb[better] = X[better]
        d_best = np.maximum(d_best, D)
        g = p_best - d_best
        done = g <= thresh
        if k == max_iter:
            done[:] = True
        if not done.any():
            continue
        idx = act[done]
        out.coef[idx] = Xb[done]
        out.gap[idx] = g[done]
        out.converged[idx] = g[done] <= thresh[done]
        out.n_iter[idx] = k
        keep = ~done
        if not keep.any():
            return
        act = act[keep]
        X, Xp, C, Cp, Xb = X[keep], Xp[keep], C[keep], Cp[keep], Xb[keep]
        Za, Y, thresh = Za[keep], Y[keep], thresh[keep]
        thr, neg_thr, terms = take_rows(thr, keep), take_rows(neg_thr, keep), terms.rows(keep)
        p_best, d_best, t = p_best[keep], d_best[keep], t[keep]
        if m is not None:
            m, ginv = m[keep], ginv[keep]
