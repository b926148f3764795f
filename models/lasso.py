"""Projected LASSO: the sparse-change solver of shiftsieve.

For each sample ``b`` of a micro-batch (samples are rows, scikit-learn
convention) we solve

    min_s  1/2 || P_b (z_b - Phi s) ||^2 + sum_j penalty_bj |s_j|

where ``P_b`` removes the low-rank baseline ``span(M_b U)`` inside the
observed coordinates of sample ``b`` (``M_b = diag(mask_b)``):

    P_b = M_b - M_b U (U^T M_b U)^+ U^T M_b          (mask given)
    P   = I - U U^T                                  (mask None: fast path)

``P_b`` is a symmetric idempotent matrix, so ``||P_b (z - Phi s)|| =
||P_b z - P_b Phi s||`` and the problem is an ordinary LASSO with design
``P_b Phi`` and response ``P_b z``. This is what eliminating the baseline
coordinates ``w`` from the model ``z = U w + Phi s + e`` leaves.

Solver: accelerated proximal gradient (FISTA, Beck & Teboulle 2009) with
soft-thresholding and the gradient adaptive restart of O'Donoghue & Candes
(2015), vectorised over the batch, warm-startable. Stopping rule per sample:
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
"non-zero iff over the threshold").

Zero penalties are allowed, but a coordinate with penalty 0 only admits a
dual point once its correlation with the residual is exactly 0, so such
samples usually run to ``max_iter`` (as with scikit-learn's gap).

Everything here is pure computation: numpy in, numpy out.
"""

from __future__ import annotations

from dataclasses import dataclass
from numbers import Integral, Real

import numpy as np

__all__ = [
    "LassoResult",
    "solve_projected_lasso",
    "projected_residual",
    "debias",
    "refit_solution",
    "lasso_objective",
]

# Gap checks (and working-set compression) happen every _CHECK_EVERY FISTA
# iterations. The gap itself is cheap (the residual at the iterate is carried
# along anyway, see _fista); the check interval only trades a few reductions
# and array copies against at most _CHECK_EVERY - 1 surplus iterations.
_CHECK_EVERY = 2

# Relative eigenvalue cut-off of the pseudo-inverse of the per-sample Gram
# matrices U^T M_b U: directions of span(U) that are (nearly) unobserved for a
# sample are treated as unobserved rather than amplified.
_GRAM_RTOL = 1e-10

# Tolerance on ||U^T U - I||_max when validating the baseline.
_ORTHO_ATOL = 1e-6


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


# --------------------------------------------------------------------------
# The projector (one helper, used by every public function)
# --------------------------------------------------------------------------


def _project(
    X: np.ndarray,
    U: np.ndarray,
    m: np.ndarray | None,
    ginv: np.ndarray | None,
) -> tuple[np.ndarray, np.ndarray]:
    """Apply P_b to the rows of X and return (P_b x, baseline coordinates w).

    ``X``: (..., n). ``m``: observed indicator as floats, broadcastable to X,
    or None (all observed). ``ginv``: (U^T M_b U)^+ broadcastable to
    (..., r, r), or None with ``m`` None. ``w = argmin ||M_b (x - U w)||`` is
    returned so that ``U w`` is the baseline's value (also where unobserved).
    Cost: two thin products with U (plus an r x r product when masked).
    """
    if m is not None:
        X = X * m
    if U.shape[1] == 0:   # nothing to remove; still a new array, callers may write into it
        return (X if m is not None else X.copy()), np.zeros(X.shape[:-1] + (0,))
    W = X @ U
    if ginv is not None:
        W = np.einsum("...ij,...j->...i", ginv, W)
    UW = W @ U.T
    if m is not None:
        UW *= m
    return X - UW, W


@dataclass(frozen=True)
class _Problem:
    """Validated, NaN-free data shared by the public functions."""

    Z: np.ndarray  # (B, n), unobserved entries set to 0
    U: np.ndarray  # (n, r)
    phi: np.ndarray | None  # (n, p) or None (identity)
    m: np.ndarray | None  # (B, n) float 0/1, or None (all observed)
    ginv: np.ndarray | None  # (B, r, r) or None
    col_ok: np.ndarray | None  # (B, p) bool: column has observed support; None = all

    @property
    def p(self) -> int:
        return self.Z.shape[1] if self.phi is None else self.phi.shape[1]

    def phi_mul(self, S: np.ndarray) -> np.ndarray:
        """Rows s -> Phi s."""
        return S if self.phi is None else S @ self.phi.T

    def phi_t(self, R: np.ndarray) -> np.ndarray:
        """Rows r -> Phi^T r."""
        return R if self.phi is None else R @ self.phi

    def rows(self, idx: np.ndarray) -> tuple[np.ndarray | None, np.ndarray | None]:
        """(m, ginv) restricted to the samples idx."""
        if self.m is None:
            return None, None
        return self.m[idx], self.ginv[idx]


def _as_float_array(x, name: str, ndim: tuple[int, ...]) -> np.ndarray:
    try:
        a = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be a numeric array ({exc})") from None
    if a.ndim not in ndim:
        want = " or ".join(f"{d}-D" for d in ndim)
        raise ValueError(f"{name} must be {want}, got an array of shape {a.shape}")
    return a


def _prepare(Z, U, phi, mask, check: bool = True) -> _Problem:
    """Validate (Z, U, phi, mask) like scikit-learn does and precompute P_b.

    ``check=False`` keeps the shape checks but skips the value checks (finite
    entries, orthonormal U), for callers that validated the same inputs already.
    """
    Z = _as_float_array(Z, "Z", (2,))
    B, n = Z.shape
    if n == 0:
        raise ValueError("Z must have at least one column (metric)")

    U = _as_float_array(U, "U", (2,))
    if U.shape[0] != n:
        raise ValueError(f"U must have shape (n, r) with n = Z.shape[1] = {n}, got {U.shape}")
    r = U.shape[1]
    if r > n:
        raise ValueError(f"U has more columns ({r}) than rows ({n}); columns cannot be orthonormal")
    if check and not np.all(np.isfinite(U)):
        raise ValueError("U contains NaN or infinite values")
    if check and r and np.max(np.abs(U.T @ U - np.eye(r))) > _ORTHO_ATOL:
        raise ValueError("U must have orthonormal columns (U^T U = I)")

    if phi is not None:
        phi = _as_float_array(phi, "phi", (2,))
        if phi.shape[0] != n or phi.shape[1] == 0:
            raise ValueError(f"phi must have shape (n, p) with n = Z.shape[1] = {n} and p >= 1, got {phi.shape}")
        if check and not np.all(np.isfinite(phi)):
            raise ValueError("phi contains NaN or infinite values")

    m = ginv = col_ok = None
    if mask is not None:
        mask = np.asarray(mask)
        if mask.dtype != np.bool_:
            raise ValueError(f"mask must be a boolean array, got dtype {mask.dtype}")
        if mask.shape != Z.shape:
            raise ValueError(f"mask must have the shape of Z {Z.shape}, got {mask.shape}")
        if check and not np.all(np.isfinite(Z[mask])):
            raise ValueError("Z contains NaN or infinite values at observed entries (mask True)")
        if not mask.all():
            Z = np.where(mask, Z, 0.0)
            m = mask.astype(np.float64)
            # Per-sample Gram matrices U^T M_b U, pseudo-inverted in one call.
            G = (U.T[None, :, :] * m[:, None, :]) @ U
            ginv = np.linalg.pinv(G, rtol=_GRAM_RTOL, hermitian=True)
            if phi is None:
                col_ok = mask.copy()
            else:
                col_ok = (m @ (phi != 0)) > 0
    elif check and not np.all(np.isfinite(Z)):
        raise ValueError("Z contains NaN or infinite values (pass mask= to mark unobserved entries)")
    return _Problem(Z=Z, U=U, phi=phi, m=m, ginv=ginv, col_ok=col_ok)


def _check_rows(x, name: str, B: int, p: int, *, allow_inf: bool = False, check: bool = True) -> np.ndarray:
    """Validate a (p,) or (B, p) array (values only if ``check``) and return it as an array."""
    a = _as_float_array(x, name, (1, 2))
    if a.shape not in ((p,), (B, p)):
        raise ValueError(f"{name} must have shape ({p},) or ({B}, {p}), got {a.shape}")
    if check and (np.isnan(a) if allow_inf else ~np.isfinite(a)).any():
        raise ValueError(f"{name} contains {'NaN' if allow_inf else 'NaN or infinite'} values")
    return a


def _batch_rows(x, name: str, B: int, p: int, *, allow_inf: bool = False, check: bool = True) -> np.ndarray:
    """:func:`_check_rows`, returned as (B, p) (a fresh copy)."""
    out = np.empty((B, p))
    out[...] = _check_rows(x, name, B, p, allow_inf=allow_inf, check=check)
    return out


def _check_settings(tol, max_iter, lipschitz) -> None:
    """Validate the solver's scalar settings (``lipschitz`` None = the default)."""
    if isinstance(tol, bool) or not isinstance(tol, Real) or not (np.isfinite(tol) and tol > 0):
        raise ValueError(f"tol must be a positive finite number, got {tol!r}")
    if isinstance(max_iter, bool) or not isinstance(max_iter, Integral) or max_iter < 1:
        raise ValueError(f"max_iter must be an integer >= 1, got {max_iter!r}")
    if lipschitz is not None and (isinstance(lipschitz, bool) or not isinstance(lipschitz, Real)
                                  or not (np.isfinite(lipschitz) and lipschitz > 0)):
        raise ValueError(f"lipschitz must be a positive finite number, got {lipschitz!r}")


def _penalty_terms(pen: np.ndarray, col_ok: np.ndarray | None):
    """``(pen, pen_fin, inv_pen, zero_pen, frozen)`` for a validated penalty array (modified in place).

    Frozen coefficients (infinite penalty, or no observed support) get penalty ``inf``,
    ``pen_fin`` 0 and ``inv_pen`` 0 (no dual constraint); ``zero_pen`` marks penalties 0
    (``inv_pen`` 0, see :func:`_dual_norm`). ``zero_pen`` and ``frozen`` are None when empty.
    """
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
    return pen, pen_fin, inv_pen, zero_pen, frozen


def _rows(a: np.ndarray | None, idx: np.ndarray) -> np.ndarray | None:
    """Rows ``idx`` of a per-sample array; a shared (1, p) row (or None) is returned as is."""
    if a is None or a.shape[0] == 1:
        return a
    return a[idx]


def _check_coef(S, prob: _Problem) -> np.ndarray:
    S = _as_float_array(S, "S", (2,))
    want = (prob.Z.shape[0], prob.p)
    if S.shape != want:
        raise ValueError(f"S must have shape {want}, got {S.shape}")
    if not np.all(np.isfinite(S)):
        raise ValueError("S contains NaN or infinite values")
    return S


# --------------------------------------------------------------------------
# Primal / dual values
# --------------------------------------------------------------------------


def _dual_norm(C, inv_pen, zero_pen):
    """max_j |C_j| / penalty_j per row: the residual is dual feasible iff this is <= 1."""
    dnorm = np.maximum.reduce(np.abs(C) * inv_pen, axis=1, initial=0.0)
    if zero_pen is not None:
        # penalty 0: the dual constraint is C_j = 0 exactly.
        dnorm = np.where(np.any(zero_pen & (C != 0), axis=1), np.inf, dnorm)
    return dnorm


def _dual_value(R, Y, rr, dnorm):
    """Dual objective at theta = a R, a = min(1, 1/dnorm), the standard feasible rescaling."""
    a = 1.0 / np.maximum(dnorm, 1.0)   # = min(1, 1/dnorm), with no division by 0
    return a * np.einsum("ij,ij->i", R, Y) - 0.5 * a * a * rr


def _primal_dual(R, C, X, Y, pen_fin, inv_pen, zero_pen):
    """Primal value at X and dual value at the rescaled residual, per row.

    ``R = P(z - Phi x)``, ``C = Phi^T R`` (= (P Phi)^T R since P R = R),
    ``Y = P z``. Dual of the LASSO: max_theta theta.y - ||theta||^2/2 subject
    to |(P Phi)^T theta|_j <= penalty_j; theta = a R with
    a = min(1, min_j penalty_j / |C_j|) is feasible (the standard rescaling).
    Columns with infinite penalty carry no dual constraint (``inv_pen`` 0).
    """
    rr = np.einsum("ij,ij->i", R, R)
    primal = 0.5 * rr + np.einsum("ij,ij->i", pen_fin, np.abs(X))
    return primal, _dual_value(R, Y, rr, _dual_norm(C, inv_pen, zero_pen))


# --------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------


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
    prob = _prepare(Z, U, phi, mask, check=check_input)
    B, p = prob.Z.shape[0], prob.p
    if check_input:
        _check_settings(tol, max_iter, lipschitz)
    if lipschitz is None:
        L = 1.0 if prob.phi is None else float(np.linalg.norm(prob.phi, 2) ** 2)
    else:
        L = float(lipschitz)

    # Penalty-derived arrays are (B, p), or (1, p) when every sample shares them
    # (1-D penalty, nothing unobserved): the common case then costs no (B, p) passes.
    shared = np.ndim(penalty) == 1 and prob.col_ok is None
    pen = _batch_rows(penalty, "penalty", 1 if shared else B, p, allow_inf=True, check=check_input)
    if check_input and np.any(pen < 0):
        raise ValueError("penalty must be non-negative")
    pen, pen_fin, inv_pen, zero_pen, frozen = _penalty_terms(pen, prob.col_ok)

    if init is None or (np.ndim(init) == 1 and not np.any(init)):   # cold, or an all-zero warm start
        if init is not None:
            _check_rows(init, "init", 1, p, check=check_input)   # still validated
        X = np.zeros((B, p))
    else:
        X = _batch_rows(init, "init", B, p, check=check_input)
        if frozen is not None:
            X[np.broadcast_to(frozen, X.shape)] = 0.0

    # Before iterating: primal and dual values at two candidates, zero and
    # the warm start. At zero the residual is P z, so its gap is nearly free
    # (no extra product for phi None); a sample whose solution is zero thus
    # costs no iteration even when its warm start is stale.
    Y, W0 = _project(prob.Z, prob.U, prob.m, prob.ginv)
    C0 = prob.phi_t(Y)
    yy = np.einsum("ij,ij->i", Y, Y)
    dnorm0 = _dual_norm(C0, inv_pen, zero_pen)
    p_best = 0.5 * yy
    a0 = 1.0 / np.maximum(dnorm0, 1.0)
    d_best = np.maximum(a0 * yy - 0.5 * a0 * a0 * yy, 0.0)  # dual at a0 * P z; theta = 0 is always feasible
    # Zero is accepted only when it is exactly optimal (|Phi^T P z| <= penalty everywhere):
    # a small relative gap would otherwise hide a coordinate just over its threshold, and the
    # support is the detector's decision.
    zero_exact = dnorm0 <= 1.0
    thresh = tol * yy
    R, C = Y, C0
    warm = X.any(axis=1).nonzero()[0] if init is not None else np.zeros(0, dtype=np.int64)
    started = np.zeros(B, dtype=bool)   # rows that iterate from their warm start rather than zero
    if warm.size:
        m, ginv = prob.rows(warm)
        Rw, _ = _project(prob.Z[warm] - prob.phi_mul(X[warm]), prob.U, m, ginv)
        Cw = prob.phi_t(Rw)
        Pw, Dw = _primal_dual(Rw, Cw, X[warm], Y[warm], _rows(pen_fin, warm), _rows(inv_pen, warm),
                              _rows(zero_pen, warm))
        d_best[warm] = np.maximum(d_best[warm], Dw)
        # Iterate (and report) from the better of the two candidates, so the
        # result is never worse than either of them.
        better = Pw < p_best[warm]
        p_best[warm] = np.minimum(Pw, p_best[warm])
        X[warm[~better]] = 0.0
        R, C = Y.copy(), C0.copy()
        R[warm[better]] = Rw[better]
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
        _fista(prob, act, X[act], R[act], C[act], Y[act], _rows(pen, act), _rows(pen_fin, act),
               _rows(inv_pen, act), _rows(zero_pen, act), thresh[act], p_best[act], d_best[act],
               L, max_iter, coef, gap, converged, n_iter)
    # Residual and coordinates: those at zero (Y, W0, no longer needed as such) except in the
    # rows that ended with a support.
    moved = touched[coef[touched].any(axis=1)]
    if moved.size:
        m, ginv = prob.rows(moved)
        Y[moved], W0[moved] = _project(prob.Z[moved] - prob.phi_mul(coef[moved]), prob.U, m, ginv)
    return LassoResult(coef=coef, n_iter=n_iter, gap=gap, converged=converged, residual=Y, coords=W0)


def _soft_threshold(G: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """``G - clip(G, lo, hi)``: shrinks towards 0 by the thresholds (an infinite one gives exactly 0)."""
    return G - np.minimum(np.maximum(G, lo), hi)


def _fista(prob, act, X, R, C, Y, pen, pen_fin, inv_pen, zero_pen, thresh, p_best, d_best,
           L, max_iter, coef, gap, converged, n_iter) -> None:
    """FISTA on the working set ``act``; writes results into coef/gap/converged/n_iter.

    Carries the residual R and C = Phi^T R at the iterate x_k (one P-product
    per iteration). The gradient is affine in s, so the negative gradient at
    the extrapolated point y_k = x_k + beta (x_k - x_{k-1}) is the same
    combination of C_k and C_{k-1}: the gap at x_k comes for free.
    """
    Za = prob.Z[act]
    m, ginv = prob.rows(act)
    Xb = X.copy()  # best iterate so far (primal value p_best)
    Xp, Cp = X, C
    thr = pen / L
    neg_thr = -thr
    t = np.ones(act.size)
    for k in range(1, max_iter + 1):
        t_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * t * t))
        if k == 1:   # t = 1, beta = 0: a plain gradient step from x_1, which never restarts
            Xn = _soft_threshold(X + C / L, neg_thr, thr)
            t = t_next
        else:
            beta = ((t - 1.0) / t_next)[:, None]
            V = X + beta * (X - Xp)
            G = V + (C + beta * (C - Cp)) / L  # gradient step from y_k
            Xn = _soft_threshold(G, neg_thr, thr)
            # Adaptive restart, gradient scheme (O'Donoghue & Candes 2015): drop
            # the momentum of a sample whose step opposes its extrapolation.
            t = np.where(np.einsum("ij,ij->i", V - Xn, Xn - X) > 0, 1.0, t_next)
        R, _ = _project(Za - prob.phi_mul(Xn), prob.U, m, ginv)
        Xp, Cp, X, C = X, C, Xn, prob.phi_t(R)

        if k % _CHECK_EVERY and k != max_iter:
            continue
        P, D = _primal_dual(R, C, X, Y, pen_fin, inv_pen, zero_pen)
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
        coef[idx] = Xb[done]
        gap[idx] = g[done]
        converged[idx] = g[done] <= thresh[done]
        n_iter[idx] = k
        keep = ~done
        if not keep.any():
            return
        act = act[keep]
        X, Xp, C, Cp, Xb = X[keep], Xp[keep], C[keep], Cp[keep], Xb[keep]
        Za, Y, thresh = Za[keep], Y[keep], thresh[keep]
        thr, neg_thr, pen_fin = _rows(thr, keep), _rows(neg_thr, keep), _rows(pen_fin, keep)
        inv_pen, zero_pen = _rows(inv_pen, keep), _rows(zero_pen, keep)
        p_best, d_best, t = p_best[keep], d_best[keep], t[keep]
        if m is not None:
            m, ginv = m[keep], ginv[keep]


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
    prob = _prepare(Z, U, phi, mask)
    S = _check_coef(S, prob)
    return _project(prob.Z - prob.phi_mul(S), prob.U, prob.m, prob.ginv)


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


def debias(
    Z: np.ndarray,
    U: np.ndarray,
    S: np.ndarray,
    *,
    phi: np.ndarray | None = None,
    mask: np.ndarray | None = None,
) -> np.ndarray:
    """Least-squares refit of each row's coefficients on its support (non-zeros of S).

    Solves argmin over s_S of ||P_b(z_b - Phi_S s_S)||^2 (minimum-norm
    solution if P_b Phi_S is rank deficient); rows with empty support stay
    zero. LASSO shrinks magnitudes by about the penalty; the refit gives
    unbiased magnitudes on the selected support.

    >>> import numpy as np
    >>> U = np.ones((4, 1)) / 2.0
    >>> Z = np.array([[1.0, 1.0, 1.0, 9.0]])
    >>> debias(Z, U, np.array([[0.0, 0.0, 0.0, 6.6]]))
    array([[0., 0., 0., 8.]])
    """
    prob = _prepare(Z, U, phi, mask)
    S = _check_coef(S, prob)
    R, W = _project(prob.Z - prob.phi_mul(S), prob.U, prob.m, prob.ginv)
    rows, coef, _ = _refit(prob, S, R, W)
    out = S.copy()
    out[rows] = coef
    return out


def refit_solution(
    Z: np.ndarray,
    U: np.ndarray,
    result: LassoResult,
    *,
    phi: np.ndarray | None = None,
    mask: np.ndarray | None = None,
    check_input: bool = True,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`debias` for a solver result, reusing its residual and coordinates.

    Returns ``(rows, coef, coords)``: the rows with a non-empty support and, for
    those rows only, the refitted coefficients and the baseline coordinates at
    them (every other row is unchanged: zero coefficients, the result's
    coordinates). Pass the same ``Z``/``U``/``phi``/``mask`` as to the solver;
    ``check_input=False`` skips re-validating them (as scikit-learn's
    ``check_input``), for callers that just did. Only the rows with a support
    are read (and validated): with a mask, their projectors are all that is built.
    """
    rows = result.coef.any(axis=1).nonzero()[0]
    prob = _prepare(np.asarray(Z)[rows], U, phi, None if mask is None else np.asarray(mask)[rows],
                    check=check_input)
    _, coef, coords = _refit(prob, result.coef[rows], result.residual[rows], result.coords[rows])
    return rows, coef, coords


def _solve_normal_equations(gram: np.ndarray, rhs: np.ndarray, *, identity_dictionary: bool) -> np.ndarray:
    """Batched solve of ``gram x = rhs``; minimum-norm (pseudo-inverse) where gram is singular.

    With ``Phi = I`` the Gram matrix ``I - U_S G^+ U_S^T`` is singular only if a combination
    of the selected metrics lies in the baseline (leverage 1), so an LU solve is tried first;
    a group and all its members, in contrast, are routinely rank deficient.
    """
    if identity_dictionary:
        try:
            return np.linalg.solve(gram, rhs[..., None])[..., 0]
        except np.linalg.LinAlgError:
            pass
    return np.einsum("bij,bj->bi", np.linalg.pinv(gram, rtol=_GRAM_RTOL, hermitian=True), rhs)


def _refit(prob: _Problem, S: np.ndarray, R: np.ndarray,
           W: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Refit rows of S on their supports given ``R = P(z - Phi s)`` and coordinates ``W`` at S.

    Returns (rows with a support, their refitted coefficients, their coordinates). The normal
    equations read ``(Phi_S^T P Phi_S) s~ = Phi_S^T P z = (Phi_S^T P Phi_S) s_S + Phi_S^T R``,
    so neither ``P z`` nor anything else of size n per sample is recomputed.
    """
    rows = S.any(axis=1).nonzero()[0]
    if rows.size == 0:
        return rows, np.zeros((0, S.shape[1])), np.zeros((0, W.shape[1]))
    out, coords = S[rows], W[rows]
    # Supports differ per row: pad them to the largest size k and solve all the
    # k x k normal equations in one batched call (pads get an identity block).
    r_idx, c_idx = np.nonzero(S[rows])  # row-major: each row's support columns in order
    sizes = np.bincount(r_idx, minlength=rows.size)
    k = int(sizes.max())
    slot = np.arange(r_idx.size) - (np.cumsum(sizes) - sizes)[r_idx]
    valid = np.zeros((rows.size, k), dtype=bool)  # False = padding
    valid[r_idx, slot] = True
    m, ginv = prob.rows(rows)
    current = np.zeros((rows.size, k))   # s on the support slots, 0 in the pads
    current[r_idx, slot] = out[r_idx, c_idx]
    if prob.phi is None:
        # Phi_S are unit vectors: Phi_S^T P_b Phi_S = I - U_S G_b^+ U_S^T (support rows of U,
        # all observed) and Phi_S^T R = R_S.
        US = np.zeros((rows.size, k, prob.U.shape[1]))  # (B', k, r), 0 in the pads
        US[r_idx, slot] = prob.U[c_idx]
        inner = US if ginv is None else np.einsum("bkr,brs->bks", US, ginv)
        gram = np.eye(k) - inner @ US.transpose(0, 2, 1)
        corr = np.zeros((rows.size, k))
        corr[r_idx, slot] = R[rows[r_idx], c_idx]
    else:
        cols = np.zeros((rows.size, k, prob.phi.shape[0]))  # (B', k, n): phi_j per support slot, 0 in the pads
        cols[r_idx, slot] = prob.phi.T[c_idx]
        A, _ = _project(cols, prob.U, None if m is None else m[:, None, :],
                        None if ginv is None else ginv[:, None, :, :])  # rows: P_b phi_j
        gram = A @ A.transpose(0, 2, 1)
        corr = np.einsum("bkn,bn->bk", cols, R[rows])
    rhs = np.einsum("bij,bj->bi", gram, current) + corr
    pad_row, pad_slot = np.nonzero(~valid)   # pads: rows and columns of gram 0 off the diagonal,
    gram[pad_row, pad_slot, pad_slot] = 1.0    # and an identity block on it makes them harmless
    if k == 1:   # the common case: one coefficient per row
        g = gram[:, 0, 0]
        coef = np.where(g > _GRAM_RTOL, rhs[:, 0] / np.where(g > 0, g, 1.0), 0.0)[:, None]
    else:
        coef = _solve_normal_equations(gram, rhs, identity_dictionary=prob.phi is None)
    coef = coef * valid
    out[r_idx, c_idx] = coef[r_idx, slot]
    # Coordinates move with the refit: w~ = w - G^+ U^T M Phi (s~ - s).
    delta = coef - current
    if prob.U.shape[1]:
        if prob.phi is None:
            shift = np.einsum("bk,bkr->br", delta, US)
        else:
            moved = np.einsum("bk,bkn->bn", delta, cols)
            shift = (moved if m is None else moved * m) @ prob.U
        if ginv is not None:
            shift = np.einsum("brs,bs->br", ginv, shift)
        coords -= shift
    return rows, out, coords


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
    prob = _prepare(Z, U, phi, mask)
    S = _check_coef(S, prob)
    pen = _batch_rows(penalty, "penalty", S.shape[0], prob.p, allow_inf=True)
    if np.any(pen < 0):
        raise ValueError("penalty must be non-negative")
    R, _ = _project(prob.Z - prob.phi_mul(S), prob.U, prob.m, prob.ginv)
    with np.errstate(invalid="ignore"):
        l1 = np.where(S == 0, 0.0, pen * np.abs(S))
    return 0.5 * np.einsum("ij,ij->i", R, R) + l1.sum(axis=1)
