"""Principal Component Pursuit: the batch low-rank-plus-sparse decomposition, the offline reference.

    min_{L, S}  ||L||_* + lam ||S||_1   subject to   L + S = M

(Candes, Li, Ma & Wright 2011, "Robust principal component analysis?"). Under
incoherence, with rank(L0) and the number of corrupted entries small enough, it
recovers the low-rank baseline ``L0`` and the sparse changes ``S0`` exactly,
with ``lam = 1 / sqrt(max(n1, n2))`` and no other tuning. The online detector
approximates the same split one micro-batch at a time; PCP on a whole stretch
(samples as rows) is what to compare it against offline.

Solver: the inexact augmented Lagrange multiplier method (Lin, Chen & Ma 2010,
Algorithm 5): alternate singular value thresholding for ``L`` and soft
thresholding for ``S`` on the augmented Lagrangian, update the multiplier, and
grow the penalty ``mu`` geometrically. Stops when ``||M - L - S||_F <= tol *
||M||_F``. One thin SVD per iteration.

>>> import numpy as np
>>> rng = np.random.default_rng(0)
>>> L0 = rng.standard_normal((60, 2)) @ rng.standard_normal((2, 40))
>>> S0 = np.zeros((60, 40)); S0[rng.random((60, 40)) < 0.05] = 10.0
>>> res = principal_component_pursuit(L0 + S0)
>>> res.converged, int(np.linalg.matrix_rank(res.low_rank, tol=1e-6))
(True, 2)
>>> bool(np.linalg.norm(res.low_rank - L0) < 1e-5 * np.linalg.norm(L0))
True

Everything here is pure computation: numpy in, numpy out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from .shrinkage import soft_threshold
from .validation import as_float_array, check_positive, check_solver_settings

__all__ = ["PCPResult", "principal_component_pursuit"]

# Lin, Chen & Ma (2010), Algorithm 5: mu grows by this factor per iteration, up
# to _MU_MAX_RATIO times its start (their rho = 1.5 and mu_bar = 1e7 mu_0).
_MU_GROWTH = 1.5
_MU_MAX_RATIO = 1e7


@dataclass(frozen=True)
class PCPResult:
    """Result of :func:`principal_component_pursuit`: ``M ~ low_rank + sparse``.

    ``n_iter``: ALM iterations; ``converged``: ``||M - L - S||_F <= tol * ||M||_F``
    reached within ``max_iter``.
    """

    low_rank: np.ndarray
    sparse: np.ndarray
    n_iter: int
    converged: bool


def principal_component_pursuit(
    M: np.ndarray,
    *,
    lam: float | None = None,
    mu: float | None = None,
    tol: float = 1e-7,
    max_iter: int = 1000,
) -> PCPResult:
    """min ||L||_* + lam ||S||_1 s.t. L + S = M, inexact ALM (Lin, Chen & Ma 2010); lam default 1/sqrt(max(n1, n2)) (Candès et al. 2011).

    ``mu``: the starting penalty of the augmented Lagrangian; default ``1.25 /
    ||M||_2`` (Lin et al.). It grows by 1.5 per iteration up to 1e7 times its
    start. ``M`` must be finite (no missing entries).

    >>> import numpy as np
    >>> M = np.outer([1.0, 2.0, 3.0, 4.0], [1.0, 1.0, 1.0, 1.0]); M[0, 3] += 8.0
    >>> res = principal_component_pursuit(M)
    >>> np.round(res.sparse, 4), res.converged
    (array([[0., 0., 0., 8.],
           [0., 0., 0., 0.],
           [0., 0., 0., 0.],
           [0., 0., 0., 0.]]), True)
    """
    M = as_float_array(M, "M", (2,))
    if M.size == 0:
        raise ValueError(f"M must have at least one row and one column, got shape {M.shape}")
    if not np.all(np.isfinite(M)):
        raise ValueError("M contains NaN or infinite values")
    check_solver_settings(tol, max_iter, None)
    if lam is None:
        lam = 1.0 / np.sqrt(max(M.shape))
    check_positive(lam, "lam")
    if mu is not None:
        check_positive(mu, "mu")

    norm_fro = float(np.linalg.norm(M))
    if norm_fro == 0.0:
        return PCPResult(low_rank=np.zeros_like(M), sparse=np.zeros_like(M), n_iter=0, converged=True)
    norm_two = float(linalg.svdvals(M, check_finite=False)[0])
    mu = 1.25 / norm_two if mu is None else float(mu)
    mu_max = _MU_MAX_RATIO * mu
    # Dual start Y = M / J(M), J(M) = max(||M||_2, ||M||_inf / lam): the largest
    # multiple of M inside the dual ball (Lin et al., section 3.1).
    Y = M / max(norm_two, float(np.max(np.abs(M))) / lam)
    L = np.zeros_like(M)
    S = np.zeros_like(M)
    for k in range(1, max_iter + 1):
        # L-step: singular value thresholding of M - S + Y / mu at 1 / mu.
        U, s, Vt = linalg.svd(M - S + Y / mu, full_matrices=False, check_finite=False)
        r = int(np.count_nonzero(s > 1.0 / mu))
        L = (U[:, :r] * (s[:r] - 1.0 / mu)) @ Vt[:r]
        # S-step: entrywise soft thresholding of M - L + Y / mu at lam / mu.
        t = lam / mu
        S = soft_threshold(M - L + Y / mu, -t, t)
        Z = M - L - S
        Y += mu * Z
        mu = min(mu * _MU_GROWTH, mu_max)
        if np.linalg.norm(Z) <= tol * norm_fro:
            return PCPResult(low_rank=L, sparse=S, n_iter=k, converged=True)
    return PCPResult(low_rank=L, sparse=S, n_iter=max_iter, converged=False)
