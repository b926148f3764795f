"""Joint localisation over a window: row-sparse multiple-measurement-vector (MMV) solvers.

An incident window stacks ``L`` residual vectors as the columns of ``Y`` (n, L).
The metrics (and metric groups) that moved *together* during the incident are
the rows of ``X`` (m, L) that are non-zero in ``Y ~ A X``: one support shared by
every column, with values free to vary along the window. Two solvers:

- :func:`group_lasso_mmv`: the row-sparse (l2,1) group LASSO

      min_X  1/2 ||Y - A X||_F^2 + lam * sum_i ||X_i,:||_2

  by FISTA (Beck & Teboulle 2009) with the block soft-threshold prox and the
  gradient adaptive restart of O'Donoghue & Candes (2015), stopped on the
  duality gap ``<= tol * ||Y||_F^2`` (scikit-learn's ``MultiTaskLasso`` rule).
- :func:`msbl`: M-SBL (Wipf & Rao 2007), empirical Bayes with ``X_i,: ~ N(0,
  gamma_i I)``: EM on the hyperparameters ``gamma``, no ``lam`` to choose.

:func:`rank_rows` turns either result into the ranked names of the rows that
moved. ``A`` is typically ``[I, G]`` (metrics and group columns), in residual
sigmas, so a fixed ``noise_var=1.0`` is the natural M-SBL noise.

>>> import numpy as np
>>> rng = np.random.default_rng(0)
>>> A = rng.standard_normal((20, 40)) / np.sqrt(20)
>>> X = np.zeros((40, 5)); X[[3, 17]] = 4.0 * rng.standard_normal((2, 5))
>>> Y = A @ X + 0.01 * rng.standard_normal((20, 5))
>>> names = [f"m{i}" for i in range(40)]
>>> [(name, round(score, 1)) for name, score in rank_rows(msbl(A, Y, noise_var=1e-4), names, k=3)]
[('m3', 4.4), ('m17', 4.2), ('m14', 0.0)]
>>> [name for name, _ in rank_rows(group_lasso_mmv(A, Y, lam=0.5), names)]
['m3', 'm17']

Everything here is pure computation: numpy in, numpy out.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from numbers import Integral

import numpy as np
from scipy import linalg

from .shrinkage import block_soft_threshold
from .validation import as_float_array, check_positive, check_solver_settings

__all__ = ["MMVResult", "group_lasso_mmv", "msbl", "rank_rows"]

# Learned M-SBL noise never drops below this fraction of the mean power of Y:
# on noiseless data the EM update drives it towards 0 and Sigma_y towards
# singular (its Cholesky factor would fail long before the support changes).
_NOISE_FLOOR = 1e-10


@dataclass(frozen=True)
class MMVResult:
    """Result of :func:`group_lasso_mmv` or :func:`msbl`.

    ``coef``: (m, L) row-sparse solution (M-SBL: the posterior mean);
    ``row_norms``: (m,) l2 norm of each row, the ranking score; ``n_iter``:
    iterations spent (0 when the start was already optimal); ``converged``:
    whether the stopping rule was met within ``max_iter``. M-SBL also fills
    ``gamma`` (m,) (0 for pruned rows) and ``noise_var`` (the variance used,
    learned or given).
    """

    coef: np.ndarray
    row_norms: np.ndarray
    n_iter: int
    converged: bool
    gamma: np.ndarray | None = None
    noise_var: float | None = None


def _check_system(A, Y, check_input: bool) -> tuple[np.ndarray, np.ndarray]:
    """``A`` (n, m) and ``Y`` (n, L) as float arrays; shapes always, finiteness if ``check_input``."""
    A = as_float_array(A, "A", (2,))
    Y = as_float_array(Y, "Y", (2,))
    n, m = A.shape
    if n == 0 or m == 0:
        raise ValueError(f"A must have at least one row and one column, got shape {A.shape}")
    if Y.shape[0] != n or Y.shape[1] == 0:
        raise ValueError(f"Y must have shape (n, L) with n = A.shape[0] = {n} and L >= 1, got {Y.shape}")
    if check_input:
        if not np.all(np.isfinite(A)):
            raise ValueError("A contains NaN or infinite values")
        if not np.all(np.isfinite(Y)):
            raise ValueError("Y contains NaN or infinite values")
    return A, Y


def _result(coef: np.ndarray, n_iter: int, converged: bool, **extra) -> MMVResult:
    return MMVResult(coef=coef, row_norms=np.linalg.norm(coef, axis=1), n_iter=n_iter,
                     converged=converged, **extra)


# --------------------------------------------------------------------------
# Group LASSO (l2,1), FISTA
# --------------------------------------------------------------------------


def _spectral_norm_sq(A: np.ndarray) -> float:
    """``||A||_2^2``: the largest eigenvalue of the smaller Gram matrix (one LAPACK call)."""
    G = A.T @ A if A.shape[1] <= A.shape[0] else A @ A.T
    k = G.shape[0]
    return float(linalg.eigvalsh(G, subset_by_index=[k - 1, k - 1])[0])


def _duality_gap(X: np.ndarray, R: np.ndarray, C: np.ndarray, Y: np.ndarray, lam: float) -> float:
    """Gap at ``X`` given ``R = Y - A X`` and ``C = A^T R``; the dual point is R rescaled to feasibility.

    Dual feasibility: every ``||(A^T theta)_i,:|| <= lam``. With ``lam = 0`` only a
    residual exactly orthogonal to A is feasible, so the gap stays at the primal value.
    """
    rr = float(np.vdot(R, R))
    dnorm = float(np.sqrt(np.max(np.einsum("ij,ij->i", C, C))))
    scale = 1.0 if dnorm <= lam else lam / dnorm
    primal = 0.5 * rr + lam * float(np.linalg.norm(X, axis=1).sum())
    dual = scale * float(np.vdot(R, Y)) - 0.5 * scale * scale * rr
    return primal - dual


def group_lasso_mmv(
    A: np.ndarray,
    Y: np.ndarray,
    lam: float,
    *,
    coef_init: np.ndarray | None = None,
    tol: float = 1e-6,
    max_iter: int = 1000,
    check_input: bool = True,
    lipschitz: float | None = None,
) -> MMVResult:
    """min_X 1/2 ||Y - A X||_F^2 + lam * sum_i ||X_i,:||_2   (A (n, m), Y (n, L)).

    FISTA with step ``1 / ||A||_2^2`` (pass ``lipschitz``, an upper bound on
    ``||A||_2^2``, to skip computing it when solving many windows with one A),
    warm-started from ``coef_init`` (m, L). Stops when the duality gap is
    ``<= tol * ||Y||_F^2``. Zero is returned at once, exactly, when it is
    optimal: ``lam >= max_i ||A_i^T Y||_2``. ``check_input=False`` keeps the
    shape checks and skips the value checks (finite entries, ``lam >= 0``).

    >>> import numpy as np
    >>> A = np.eye(3); Y = np.array([[3.0, 4.0], [0.1, 0.0], [0.0, 0.0]])
    >>> res = group_lasso_mmv(A, Y, lam=1.0)
    >>> np.round(res.coef, 6), res.converged      # row 0 shrunk by 1 in norm (5 -> 4)
    (array([[2.4, 3.2],
           [0. , 0. ],
           [0. , 0. ]]), True)
    """
    A, Y = _check_system(A, Y, check_input)
    if check_input:
        check_positive(lam, "lam", allow_zero=True)
    check_solver_settings(tol, max_iter, lipschitz)
    m, L = A.shape[1], Y.shape[1]
    lam = float(lam)
    thresh = tol * float(np.vdot(Y, Y))

    C0 = A.T @ Y
    if np.max(np.einsum("ij,ij->i", C0, C0)) <= lam * lam:   # zero satisfies the KKT conditions exactly
        return _result(np.zeros((m, L)), 0, True)
    if coef_init is None:
        X, R, C = np.zeros((m, L)), Y, C0
    else:
        X = as_float_array(coef_init, "coef_init", (2,)).copy()
        if X.shape != (m, L):
            raise ValueError(f"coef_init must have shape {(m, L)}, got {X.shape}")
        if check_input and not np.all(np.isfinite(X)):
            raise ValueError("coef_init contains NaN or infinite values")
        R = Y - A @ X
        C = A.T @ R
        if _duality_gap(X, R, C, Y, lam) <= thresh:
            return _result(X, 0, True)

    step = 1.0 / (_spectral_norm_sq(A) if lipschitz is None else float(lipschitz))
    thr = lam * step
    Xp, Cp = X, C
    t = 1.0
    for k in range(1, max_iter + 1):
        # The residual is affine in X, so A^T(Y - A V) at the extrapolated point V
        # is the same combination of C_k and C_{k-1}: one product with A and one
        # with A^T per iteration, and the gap at X_k comes for free.
        t_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * t * t))
        beta = (t - 1.0) / t_next
        V = X + beta * (X - Xp)
        Xn = block_soft_threshold(V + step * (C + beta * (C - Cp)), thr)
        # Gradient adaptive restart (O'Donoghue & Candes 2015): drop the momentum
        # when the step opposes the extrapolation.
        t = 1.0 if np.vdot(V - Xn, Xn - X) > 0 else t_next
        R = Y - A @ Xn
        Xp, Cp, X, C = X, C, Xn, A.T @ R
        if _duality_gap(X, R, C, Y, lam) <= thresh:
            return _result(X, k, True)
    return _result(X, max_iter, False)


# --------------------------------------------------------------------------
# M-SBL (Wipf & Rao 2007), EM
# --------------------------------------------------------------------------


def _posterior(A_s: np.ndarray, g: np.ndarray, Y: np.ndarray, noise_var: float) -> tuple[np.ndarray, np.ndarray]:
    """``(B, q)`` for the active rows, in the n x n form: ``B = A_s^T Sigma_y^-1 Y`` (k, L) and
    ``q_i = a_i^T Sigma_y^-1 a_i`` (k,), where ``Sigma_y = noise I + A_s Gamma A_s^T = C C^T``.

    The posterior of the active rows is then ``Mu = Gamma B`` and ``Sigma_ii = g_i - g_i^2 q_i``.
    """
    S_y = (A_s * g) @ A_s.T
    S_y.flat[:: S_y.shape[0] + 1] += noise_var
    C = linalg.cholesky(S_y, lower=True, check_finite=False)
    W = linalg.solve_triangular(C, A_s, lower=True, check_finite=False)
    V = linalg.solve_triangular(C, Y, lower=True, check_finite=False)
    return W.T @ V, np.einsum("ij,ij->j", W, W)


def msbl(
    A: np.ndarray,
    Y: np.ndarray,
    *,
    noise_var: float | None = None,
    tol: float = 1e-6,
    max_iter: int = 1000,
    prune: float = 1e-8,
    check_input: bool = True,
    gamma_init: np.ndarray | None = None,
    candidates: np.ndarray | None = None,
    update: str = "em",
) -> MMVResult:
    """M-SBL (Wipf & Rao 2007): EM on the hyperparameters gamma of X_i,: ~ N(0, gamma_i I); no lambda.

    Each iteration computes the posterior of X given gamma (the n x n form,
    ``Sigma_y = noise I + A Gamma A^T``, so m > n costs nothing extra) and
    updates gamma. ``update="em"``: ``gamma_i = ||mu_i||^2 / L + Sigma_ii``, the
    EM step, which never increases the M-SBL cost ``L log|Sigma_y| + tr(Y^T
    Sigma_y^-1 Y)`` but shrinks the gammas of rows without signal only like 1/k
    once the noise dominates them. ``update="fixed_point"``: ``gamma_i =
    (||mu_i||^2 / L) / (1 - Sigma_ii / gamma_i)``, the MacKay-style fixed point
    also given by Wipf & Rao, not monotone but it drives those gammas to 0
    geometrically. Rows whose gamma falls below ``prune`` times the largest are
    removed for good (gamma 0, coefficient 0). Stops when ``max_i |gamma_new -
    gamma| <= tol * max_i gamma_new``; ``coef`` is the posterior mean at the
    returned gamma.

    ``noise_var``: the noise variance, fixed (with residuals in residual sigmas,
    1.0). None learns it with the update of the same kind: EM ``noise <-
    (||Y - A Mu||_F^2 / L + noise * sum_i (1 - Sigma_ii / gamma_i)) / n``, fixed
    point ``noise <- (||Y - A Mu||_F^2 / L) / (n - sum_i (1 - Sigma_ii /
    gamma_i))``, from a start at a tenth of the mean power of Y and floored at
    1e-10 of it; on nearly noiseless data give it instead, the learned value
    shrinks slowly. ``gamma_init`` (m,) warm-starts (zeros stay pruned); the
    default gives every row the mean power of Y over the mean squared column
    norm of A. ``candidates`` (indices, with the default start only) screens: only
    those rows start there, the others start pruned (e.g. the columns most
    correlated with Y, which bounds the cost per iteration).

    >>> import numpy as np
    >>> A, Y = np.eye(3), np.array([[5.0], [0.1], [0.0]])
    >>> res = msbl(A, Y, noise_var=1.0, update="fixed_point")
    >>> res.converged, np.round(res.gamma, 3)      # gamma_0 -> y_0^2 - noise, the rest pruned
    (True, array([24.,  0.,  0.]))
    >>> res = msbl(A, Y, noise_var=1.0)            # EM: the same maximum, approached slowly
    >>> np.round(res.gamma, 3)
    array([2.4e+01, 5.0e-03, 5.0e-03])
    """
    A, Y = _check_system(A, Y, check_input)
    check_solver_settings(tol, max_iter, None)
    if noise_var is not None:
        check_positive(noise_var, "noise_var")
    check_positive(prune, "prune", allow_zero=True)
    if update not in ("em", "fixed_point"):
        raise ValueError(f"update must be 'em' or 'fixed_point', got {update!r}")
    n, m = A.shape
    L = Y.shape[1]
    power = float(np.vdot(Y, Y)) / (n * L)
    if power == 0.0:   # Y = 0: every gamma is 0 at the maximum of the evidence
        return _result(np.zeros((m, L)), 0, True, gamma=np.zeros(m),
                       noise_var=float(noise_var) if noise_var is not None else 0.0)

    col_sq = np.einsum("ij,ij->j", A, A)
    if candidates is not None and gamma_init is not None:
        raise ValueError("give gamma_init or candidates, not both")
    if gamma_init is None:
        gamma = np.full(m, power / (float(np.mean(col_sq)) or 1.0))
        if candidates is not None:
            index = np.asarray(candidates)
            if index.ndim != 1 or index.size == 0 or not np.issubdtype(index.dtype, np.integer) \
                    or index.min() < 0 or index.max() >= m:
                raise ValueError(f"candidates must be a non-empty 1-d array of column indices in 0..{m - 1}")
            keep = np.zeros(m, dtype=bool)
            keep[index] = True
            gamma[~keep] = 0.0
    else:
        gamma = as_float_array(gamma_init, "gamma_init", (1,)).copy()
        if gamma.shape != (m,):
            raise ValueError(f"gamma_init must have shape ({m},), got {gamma.shape}")
        if check_input and not (np.all(np.isfinite(gamma)) and np.all(gamma >= 0) and gamma.any()):
            raise ValueError("gamma_init must be finite, non-negative and not all zero")
    learn = noise_var is None
    noise = 0.1 * power if learn else float(noise_var)
    floor = _NOISE_FLOOR * power
    em = update == "em"

    gamma[col_sq == 0] = 0.0   # a zero column explains nothing (and would divide by q_i = 0)
    active = np.flatnonzero(gamma > 0)
    converged = False
    n_iter = 0
    for n_iter in range(1, max_iter + 1):
        if active.size == 0:   # Y orthogonal to every column: the evidence is largest at gamma = 0
            converged = True
            break
        A_s, g = A[:, active], gamma[active]
        B, q = _posterior(A_s, g, Y, noise)
        b2 = np.einsum("ij,ij->i", B, B) / L        # ||mu_i||^2 / L = g_i^2 b2_i
        explained = g * q                           # 1 - Sigma_ii / g_i, in [0, 1)
        if em:
            # ||mu_i||^2 / L + Sigma_ii, Sigma_ii = g - g^2 q clipped (cancellation when g is large)
            g_new = g * g * b2 + np.maximum(g - g * g * q, 0.0)
        else:
            g_new = g * b2 / q
        if learn:
            R = Y - A_s @ (g[:, None] * B)
            rr = float(np.vdot(R, R)) / L
            noise = (rr + noise * float(explained.sum())) / n if em else rr / (n - float(explained.sum()))
            noise = max(noise, floor)
        top = float(g_new.max())
        converged = float(np.max(np.abs(g_new - g))) <= tol * top
        gamma[active] = g_new
        keep = g_new > prune * top if top > 0 else np.zeros(g_new.size, dtype=bool)
        if not keep.all():
            gamma[active[~keep]] = 0.0
            active = active[keep]
        if converged:
            break

    coef = np.zeros((m, L))
    g = gamma[active]
    coef[active] = g[:, None] * _posterior(A[:, active], g, Y, noise)[0]
    return _result(coef, n_iter, converged, gamma=gamma, noise_var=noise)


# --------------------------------------------------------------------------
# Ranking
# --------------------------------------------------------------------------


def rank_rows(
    result: MMVResult,
    names: Sequence[str],
    k: int | None = None,
    *,
    rel_tol: float = 1e-6,
) -> list[tuple[str, float]]:
    """Names of the nonzero rows by descending row norm (ties by name), with their row norms; at most k.

    A row counts as nonzero when its norm exceeds ``rel_tol`` times the largest
    (M-SBL's posterior mean is never exactly 0 on unpruned rows).

    >>> import numpy as np
    >>> res = MMVResult(coef=np.array([[1.0], [3.0], [0.0], [3.0]]),
    ...                 row_norms=np.array([1.0, 3.0, 0.0, 3.0]), n_iter=0, converged=True)
    >>> rank_rows(res, ["a", "d", "c", "b"])
    [('b', 3.0), ('d', 3.0), ('a', 1.0)]
    """
    norms = np.asarray(result.row_norms, dtype=np.float64)
    if len(names) != norms.shape[0]:
        raise ValueError(f"names has {len(names)} entries for {norms.shape[0]} rows")
    if k is not None and (isinstance(k, bool) or not isinstance(k, Integral) or k < 0):
        raise ValueError(f"k must be a non-negative integer or None, got {k!r}")
    check_positive(rel_tol, "rel_tol", allow_zero=True)
    top = float(norms.max(initial=0.0))
    rows = np.flatnonzero(norms > rel_tol * top) if top > 0 else np.zeros(0, dtype=np.int64)
    ranked = sorted(((names[i], float(norms[i])) for i in rows), key=lambda item: (-item[1], item[0]))
    return ranked if k is None else ranked[:k]
