"""Least-squares refit of a LASSO solution on its support: unbiased magnitudes.

LASSO shrinks every selected coefficient by about its penalty. Refitting each sample's
coefficients by least squares on the support the LASSO chose, under the same projector
(:mod:`.projection`), gives unbiased magnitudes, and moves the baseline coordinates with them.
"""

from __future__ import annotations

import numpy as np

from .lasso import LassoResult
from .projection import GRAM_RTOL, ProjectedProblem, prepare_problem, project

__all__ = ["debias", "refit_solution"]


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
    prob = prepare_problem(Z, U, phi, mask)
    S = prob.check_coef(S)
    R, W = prob.residual(S)
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
    prob = prepare_problem(np.asarray(Z)[rows], U, phi, None if mask is None else np.asarray(mask)[rows],
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
    return np.einsum("bij,bj->bi", np.linalg.pinv(gram, rtol=GRAM_RTOL, hermitian=True), rhs)


def _refit(prob: ProjectedProblem, S: np.ndarray, R: np.ndarray,
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
        A, _ = project(cols, prob.U, None if m is None else m[:, None, :],
                       None if ginv is None else ginv[:, None, :, :])  # rows: P_b phi_j
        gram = A @ A.transpose(0, 2, 1)
        corr = np.einsum("bkn,bn->bk", cols, R[rows])
    rhs = np.einsum("bij,bj->bi", gram, current) + corr
    pad_row, pad_slot = np.nonzero(~valid)   # pads: rows and columns of gram 0 off the diagonal,
    gram[pad_row, pad_slot, pad_slot] = 1.0    # and an identity block on it makes them harmless
    if k == 1:   # the common case: one coefficient per row
        g = gram[:, 0, 0]
        coef = np.where(g > GRAM_RTOL, rhs[:, 0] / np.where(g > 0, g, 1.0), 0.0)[:, None]
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
