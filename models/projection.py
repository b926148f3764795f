"""The baseline projector ``P_b`` and the validated data of a projected problem.

For sample ``b`` (a row of ``Z``) with observed coordinates ``M_b = diag(mask_b)``,

    P_b = M_b - M_b U (U^T M_b U)^+ U^T M_b          (mask given)
    P   = I - U U^T                                  (mask None: fast path)

removes the low-rank baseline ``span(M_b U)`` inside the observed coordinates.  It is
symmetric and idempotent, which is what turns the detector's model ``z = U w + Phi s + e``
into an ordinary LASSO in ``s`` (:mod:`.lasso`).  The per-sample pseudo-inverses are
computed once per batch, when the problem is prepared.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .validation import as_float_array

__all__ = ["GRAM_RTOL", "ProjectedProblem", "prepare_problem", "project"]

#: Relative eigenvalue cut-off of the pseudo-inverse of the per-sample Gram
#: matrices U^T M_b U: directions of span(U) that are (nearly) unobserved for a
#: sample are treated as unobserved rather than amplified.
GRAM_RTOL = 1e-10

# Tolerance on ||U^T U - I||_max when validating the baseline.
_ORTHO_ATOL = 1e-6


def project(
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

    >>> U = np.ones((2, 1)) / np.sqrt(2.0)
    >>> project(np.array([[3.0, 1.0]]), U, None, None)[0]
    array([[ 1., -1.]])
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
class ProjectedProblem:
    """Validated, NaN-free data of a batch, with its projectors precomputed (:func:`prepare_problem`)."""

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

    def residual(self, S: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """:func:`project` of every row of ``Z - Phi S``: the residual and the baseline coordinates."""
        return project(self.Z - self.phi_mul(S), self.U, self.m, self.ginv)

    def check_coef(self, S) -> np.ndarray:
        """``S`` as a finite (B, p) coefficient array for this problem."""
        S = as_float_array(S, "S", (2,))
        want = (self.Z.shape[0], self.p)
        if S.shape != want:
            raise ValueError(f"S must have shape {want}, got {S.shape}")
        if not np.all(np.isfinite(S)):
            raise ValueError("S contains NaN or infinite values")
        return S


def prepare_problem(Z, U, phi, mask, check: bool = True) -> ProjectedProblem:
    """Validate (Z, U, phi, mask) like scikit-learn does and precompute P_b.

    ``check=False`` keeps the shape checks but skips the value checks (finite
    entries, orthonormal U), for callers that validated the same inputs already.
    """
    Z = as_float_array(Z, "Z", (2,))
    B, n = Z.shape
    if n == 0:
        raise ValueError("Z must have at least one column (metric)")

    U = as_float_array(U, "U", (2,))
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
        phi = as_float_array(phi, "phi", (2,))
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
            ginv = np.linalg.pinv(G, rtol=GRAM_RTOL, hermitian=True)
            if phi is None:
                col_ok = mask.copy()
            else:
                col_ok = (m @ (phi != 0)) > 0
    elif check and not np.all(np.isfinite(Z)):
        raise ValueError("Z contains NaN or infinite values (pass mask= to mark unobserved entries)")
    return ProjectedProblem(Z=Z, U=U, phi=phi, m=m, ginv=ginv, col_ok=col_ok)
