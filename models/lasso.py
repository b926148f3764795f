"""Projected LASSO: the sparse-change solver of shiftsieve.

For each sample ``b`` of a micro-batch (samples are rows, scikit-learn
convention) we solve

    min_s  1/2 || P_b (z_b - Phi s) ||^2 + sum_j penalty_bj |s_j|

where ``P_b`` removes the low-rank baseline ``span(M_b U)`` inside the
observed coordinates of sample ``b`` (``M_b = diag(mask_b)``):

    P_b = M_b - M_b U (U^T M_b U)^+ U^T M_b          (mask given)
    P   = I - U U^T                                  (mask None: fast path)

``P_b`` is a symmetric idempotent matrix (:mod:`.projection`), so ``||P_b (z - Phi s)|| =
||P_b z - P_b Phi s||`` and the problem is an ordinary LASSO with design
``P_b Phi`` and response ``P_b z``. This is what eliminating the baseline
coordinates ``w`` from the model ``z = U w + Phi s + e`` leaves.

Solver: accelerated proximal gradient (FISTA, Beck & Teboulle 2009) with
soft-thresholding and the gradient adaptive restart of O'Donoghue & Candes
(2015), vectorised over the batch, warm-startable (the kernel is :mod:`.fista`;
this module is the estimator's API: validation, starting points, results). Stopping rule per sample:
duality gap <= ``tol * ||P_b z_b||^2``, the rule scikit-learn's coordinate
descent uses (it multiplies ``tol`` by ``||y||^2``), so a given ``tol`` means
the same thing in both. The dual point is the residual rescaled to dual
feasibility. Before any iteration the gap is checked at the warm start and at
zero, so a sample whose warm start is already optimal, or whose solution is
zero (the normal case), costs no iteration; converged samples leave the
working set every few iterations, so cost follows the hard samples. Zero is
accepted only when it satisfies the optimality conditions exactly: a small
relative gap must not hide a coordinate just over its threshold, because the
support is what the detector decides on (its false-alarm calibration needs
"non-zero iff over the threshold"). The least-squares refit of a solution on
its support is :mod:`.refit`.

Zero penalties are allowed, but a coordinate with penalty 0 only admits a
dual point once its correlation with the residual is exactly 0, so such
samples usually run to ``max_iter`` (as with scikit-learn's gap).

Everything here is pure computation: numpy in, numpy out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .fista import FistaOutput, FistaSettings, PenaltyTerms, WorkingSet, fista, primal_dual
from .projection import prepare_problem, project
from .validation import batch_rows, check_rows, check_solver_settings

__all__ = [
    "GROSS_FACTOR",
    "LassoResult",
    "gross_start",
    "lasso_objective",
    "projected_residual",
    "solve_projected_lasso",
]


@dataclass(frozen=True)
class LassoResult:
    """Result of :func:`solve_projected_lasso` (one entry per sample).

    ``coef``: (B, p) solution; ``n_iter``: (B,) FISTA iterations spent on the
    sample (0 if the warm start was already optimal); ``gap``: (B,) duality
    gap certified for ``coef``; ``converged``: (B,) ``gap <= tol*||P_b z_b||^2``;
    ``residual``: (B, n) ``P_b(z_b - Phi s_b)`` and ``coords``: (B, r) baseline
    coordinates at ``coef`` (as :func:`projected_residual` returns them), so
    callers need not recompute them.
    """

    coef: np.ndarray
    n_iter: np.ndarray
    gap: np.ndarray
    converged: np.ndarray
    residual: np.ndarray
    coords: np.ndarray


def solve_projected_lasso(
    Z: np.ndarray,
    U: np.ndarray,
    penalty: np.ndarray,
    *,
    phi: np.ndarray | None = None,
    mask: np.ndarray | None = None,
    init: np.ndarray | None = None,
    tol: float = 1e-6,
    max_iter: int = 500,
    lipschitz: float | None = None,
    check_input: bool = True,
) -> LassoResult:
    """Solve the projected LASSO for every row of Z with warm-started FISTA.

    Parameters: ``Z`` (B, n) samples as rows (NaN allowed where ``mask`` is
    False); ``U`` (n, r) orthonormal baseline (r may be 0); ``penalty`` (p,)
    or (B, p), >= 0, ``inf`` fixes a coefficient at 0; ``phi`` (n, p)
    dictionary or None (identity); ``mask`` (B, n) bool or None (all
    observed); ``init`` (p,) or (B, p) warm start or None (zeros); ``tol``
    relative duality-gap tolerance: a sample stops when
    ``gap <= tol * ||P_b z_b||^2`` (scikit-learn's rule); ``max_iter`` cap
    on FISTA iterations; ``lipschitz`` step-size constant, default
    ``||phi||_2^2`` (1 for phi None); ``check_input=False`` keeps the shape
    checks but skips the value checks (finite data, orthonormal ``U``,
    non-negative penalty, the settings), for callers that guarantee them
    (scikit-learn's ``check_input``).

    Coefficients of columns with no observed support in a sample are exactly
    0. The returned ``coef`` is the best iterate seen (never worse in
    objective than the warm start or than zero); ``gap`` is a valid duality
    gap for it.

    >>> import numpy as np
    >>> U = np.ones((4, 1)) / 2.0                      # baseline: common mode
    >>> Z = np.array([[1.0, 1.0, 1.0, 9.0],            # metric 3 shifted
    ...               [2.0, 2.0, 2.0, 2.0]])           # pure common mode
    >>> res = solve_projected_lasso(Z, U, penalty=1.0 * np.ones(4), tol=1e-10)
    >>> np.round(res.coef, 3)
    array([[0.   , 0.   , 0.   , 6.667],
           [0.   , 0.   , 0.   , 0.   ]])
    >>> res.n_iter[1], bool(res.converged.all())
    (np.int64(0), True)
    """
    prob = prepare_problem(Z, U, phi, mask, check=check_input)
    B, p = prob.Z.shape[0], prob.p
    if check_input:
        check_solver_settings(tol, max_iter, lipschitz)
    if lipschitz is None:
        L = 1.0 if prob.phi is None else float(np.linalg.norm(prob.phi, 2) ** 2)
    else:
        L = float(lipschitz)

    # Penalty-derived arrays are (B, p), or (1, p) when every sample shares them
    # (1-D penalty, nothing unobserved): the common case then costs no (B, p) passes.
    shared = np.ndim(penalty) == 1 and prob.col_ok is None
    pen = batch_rows(penalty, "penalty", 1 if shared else B, p, allow_inf=True, check=check_input)
    if check_input and np.any(pen < 0):
        raise ValueError("penalty must be non-negative")
    terms = PenaltyTerms.from_penalty(pen, prob.col_ok)

    if init is None or (np.ndim(init) == 1 and not np.any(init)):   # cold, or an all-zero warm start
        if init is not None:
            check_rows(init, "init", 1, p, check=check_input)   # still validated
        X = np.zeros((B, p))
    else:
        X = batch_rows(init, "init", B, p, check=check_input)
        if terms.frozen is not None:
            X[np.broadcast_to(terms.frozen, X.shape)] = 0.0

    # Before iterating: primal and dual values at two candidates, zero and
    # the warm start. At zero the residual is P z, so its gap is nearly free
    # (no extra product for phi None); a sample whose solution is zero thus
    # costs no iteration even when its warm start is stale.
    Y, W0 = project(prob.Z, prob.U, prob.m, prob.ginv)
    C0 = prob.phi_t(Y)
    yy = np.einsum("ij,ij->i", Y, Y)
    dnorm0 = terms.dual_norm(C0)
    p_best = 0.5 * yy
    a0 = 1.0 / np.maximum(dnorm0, 1.0)
    d_best = np.maximum(a0 * yy - 0.5 * a0 * a0 * yy, 0.0)  # dual at a0 * P z; theta = 0 is always feasible
    # Zero is accepted only when it is exactly optimal (|Phi^T P z| <= penalty everywhere):
    # a small relative gap would otherwise hide a coordinate just over its threshold, and the
    # support is the detector's decision.
    zero_exact = dnorm0 <= 1.0
    thresh = tol * yy
    C = C0
    warm = X.any(axis=1).nonzero()[0] if init is not None else np.zeros(0, dtype=np.int64)
    started = np.zeros(B, dtype=bool)   # rows that iterate from their warm start rather than zero
    if warm.size:
        m, ginv = prob.rows(warm)
        Rw, _ = project(prob.Z[warm] - prob.phi_mul(X[warm]), prob.U, m, ginv)
        Cw = prob.phi_t(Rw)
        Pw, Dw = primal_dual(Rw, Cw, X[warm], Y[warm], terms.rows(warm))
        d_best[warm] = np.maximum(d_best[warm], Dw)
        # Iterate (and report) from the better of the two candidates, so the
        # result is never worse than either of them.
        better = Pw < p_best[warm]
        p_best[warm] = np.minimum(Pw, p_best[warm])
        X[warm[~better]] = 0.0
        C = C0.copy()
        C[warm[better]] = Cw[better]
        started[warm[better]] = True

    coef = X  # rows still to iterate are copied out below; results are written back here
    gap = p_best - d_best
    converged = (gap <= thresh) & (zero_exact | started)
    n_iter = np.zeros(B, dtype=np.int64)

    # Rows that iterate or started warm: the only ones that can end with a support.
    touched = (~converged | started).nonzero()[0]
    act = (~converged).nonzero()[0]
    if act.size:
        fista(prob,
              start=WorkingSet(rows=act, coef=X[act], correlation=C[act], target=Y[act], thresh=thresh[act],
                               primal=p_best[act], dual=d_best[act]),
              penalty=terms, settings=FistaSettings(lipschitz=L, max_iter=max_iter),
              out=FistaOutput(coef=coef, gap=gap, converged=converged, n_iter=n_iter))
    # Residual and coordinates: those at zero (Y, W0, no longer needed as such) except in the
    # rows that ended with a support.
    moved = touched[coef[touched].any(axis=1)]
    if moved.size:
        m, ginv = prob.rows(moved)
        Y[moved], W0[moved] = project(prob.Z[moved] - prob.phi_mul(coef[moved]), prob.U, m, ginv)
    return LassoResult(coef=coef, n_iter=n_iter, gap=gap, converged=converged, residual=Y, coords=W0)


def projected_residual(
    Z: np.ndarray,
    U: np.ndarray,
    S: np.ndarray,
    *,
    phi: np.ndarray | None = None,
    mask: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Return (R, W): R = P_b(z_b - Phi s_b) per row (0 where unobserved) and
    W (B, r) the baseline coordinates w_b = argmin_w ||M_b(z_b - Phi s_b - U w)||,
    so that U w_b is the baseline's expected value (also at unobserved entries).

    >>> import numpy as np
    >>> U = np.ones((2, 1)) / np.sqrt(2.0)
    >>> R, W = projected_residual(np.array([[3.0, 1.0]]), U, np.zeros((1, 2)))
    >>> R, np.round(W @ U.T, 6)
    (array([[ 1., -1.]]), array([[2., 2.]]))
    """
    prob = prepare_problem(Z, U, phi, mask)
    return prob.residual(prob.check_coef(S))


#: An entry this many times farther out than its row's median |z| (plus one) is gross (see gross_start).
GROSS_FACTOR = 1e3


def gross_start(
    Z: np.ndarray,
    U: np.ndarray,
    init: np.ndarray,
    *,
    mask: np.ndarray | None = None,
) -> np.ndarray:
    """A starting point for :func:`solve_projected_lasso`: ``init`` (p,), and in rows of ``Z``
    (B, n) with a gross entry (``GROSS_FACTOR`` times the row's median ``|z|`` plus one) that
    entry's residual from baseline coordinates fitted without it ((B, p) then; identity
    dictionary columns first, as the solver's).

    The solver stops at a duality gap relative to ``||P z||^2``, which is loose for such a row:
    from a zero start one entry of 1e9 let it stop with shifts of ~1e10 on every column, the
    entry's pull on the coordinates spread over all of them.  The problem is convex, so a start
    only changes the path: started at the robust solution the solver stops there at once.

    >>> U = np.full((4, 1), 0.5)
    >>> gross_start(np.array([[1.0, 1.0, 1.0, 1e9]]), U, np.zeros(4)).round(3).tolist()
    [[0.0, 0.0, 0.0, 999999999.0]]
    """
    Z = np.asarray(Z, dtype=float)
    if not (Z.max(initial=0.0) > GROSS_FACTOR or Z.min(initial=0.0) < -GROSS_FACTOR):
        return init   # the usual case: nothing can be gross (the bar is at least GROSS_FACTOR)
    far = np.abs(Z)
    gross = far > GROSS_FACTOR * (np.median(far, axis=1, keepdims=True) + 1.0)
    if not gross.any():
        return init
    rows = np.flatnonzero(gross.any(axis=1))
    keep = ~gross[rows] if mask is None else mask[rows] & ~gross[rows]
    _, coords = projected_residual(Z[rows], U, np.zeros_like(Z[rows]), mask=keep)
    start = np.tile(init, (Z.shape[0], 1))
    n = Z.shape[1]
    metric_start = start[rows, :n]
    metric_start[gross[rows]] = (Z[rows] - coords @ U.T)[gross[rows]]
    start[rows, :n] = metric_start
    return start


def lasso_objective(
    Z: np.ndarray,
    U: np.ndarray,
    S: np.ndarray,
    penalty: np.ndarray,
    *,
    phi: np.ndarray | None = None,
    mask: np.ndarray | None = None,
) -> np.ndarray:
    """Objective 1/2 ||P_b(z_b - Phi s_b)||^2 + sum_j penalty_bj |s_bj| per row (B,).

    An infinite penalty contributes 0 where the coefficient is 0 (inf where
    it is not). For tests and diagnostics.

    >>> import numpy as np
    >>> U = np.zeros((2, 0))
    >>> lasso_objective(np.array([[3.0, 0.0]]), U, np.array([[1.0, 0.0]]), np.ones(2))
    array([3.])
    """
    prob = prepare_problem(Z, U, phi, mask)
    S = prob.check_coef(S)
    pen = batch_rows(penalty, "penalty", S.shape[0], prob.p, allow_inf=True)
    if np.any(pen < 0):
        raise ValueError("penalty must be non-negative")
    R, _ = prob.residual(S)
    with np.errstate(invalid="ignore"):
        l1 = np.where(S == 0, 0.0, pen * np.abs(S))
    return 0.5 * np.einsum("ij,ij->i", R, R) + l1.sum(axis=1)
