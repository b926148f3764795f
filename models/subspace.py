"""Online low-rank baseline: the subspace of shared movement of one entity's metrics.

Warm-up takes a thin SVD of the first block of normalised vectors (missing entries
filled by iterated low-rank imputation).  After that the basis follows the data
with a forgetting factor by block subspace iteration: for each micro-batch the
weighted second-moment matrix ``C_t = decay^B U S^2 U^T + sum_j w_j c_j c_j^T``
is applied once to the current basis, re-orthonormalised, and rotated by a
Rayleigh-Ritz step onto its principal directions.  That costs ``O(n B r)`` per
batch, never forms an ``n x n`` matrix, and converges like the power method
(ratio ``(sigma_{r+1} / sigma_r)^2`` per batch) on stationary data — the same
truncation as an incremental thin SVD (Brand 2006), at a fraction of its cost
for large batches.

The tracker is fed only *cleaned, completed* vectors (shift removed, missing
entries replaced by their baseline prediction), so faults and holes in the data
do not rotate the basis.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack

from .normaliser import decay_for_halflife

#: Defaults of the tracker's settings (share of warm-up energy the chosen rank explains, cap on
#: that rank, half-life in samples), declared once: ``DetectorConfig`` takes its defaults from them.
DEFAULT_ENERGY, DEFAULT_MAX_RANK, DEFAULT_HALFLIFE = 0.99, 8, 1440.0


def noise_rank(singular_values: np.ndarray, shape: tuple[int, int]) -> int:
    """Number of singular values above the optimal hard threshold for unknown noise level.

    Gavish & Donoho (2014), "The optimal hard threshold for singular values is 4/sqrt(3)":
    ``tau = omega(beta) * median(singular values)`` with aspect ratio ``beta <= 1`` and their
    polynomial approximation of ``omega``.  Components below it are indistinguishable from
    noise; keeping them would let single noisy metrics own a baseline direction (leverage
    near 1), which hides their shifts and inflates their alarms.
    """
    sv = np.asarray(singular_values, dtype=float)
    beta = min(shape) / max(shape)
    omega = 0.56 * beta ** 3 - 0.95 * beta ** 2 + 1.82 * beta + 1.43
    return int(np.count_nonzero(sv > omega * np.median(sv)))


def choose_rank(singular_values: np.ndarray, energy: float, max_rank: int,
                shape: tuple[int, int] | None = None) -> int:
    """Smallest rank whose components explain ``energy`` of the total energy, capped at
    ``max_rank`` and, given the data ``shape``, at the components above the noise threshold."""
    power = np.asarray(singular_values, dtype=float) ** 2
    total = power.sum()
    if total <= 0:
        return 1
    explained = np.cumsum(power) / total
    rank = int(np.searchsorted(explained, energy) + 1)
    if shape is not None:
        rank = min(rank, noise_rank(singular_values, shape))
    return max(1, min(rank, max_rank, power.size))


def impute_low_rank(Z: np.ndarray, rank: int, *, n_iter: int = 10) -> np.ndarray:
    """Fill NaN entries of ``Z`` (W, n) by iterated rank-``rank`` SVD reconstruction (hard impute)."""
    missing = ~np.isfinite(Z)
    filled = np.where(missing, 0.0, Z)
    if not missing.any():
        return filled
    for _ in range(n_iter):
        left, sv, right = np.linalg.svd(filled, full_matrices=False)
        approx = (left[:, :rank] * sv[:rank]) @ right[:rank]
        filled = np.where(missing, approx, filled)
    return filled


# The per-batch factorisations are of an n x r and an r x r matrix: numpy.linalg's wrappers cost
# several times the work itself there, so LAPACK is called directly (the same routines numpy
# calls, with the same results: Householder QR, divide-and-conquer symmetric eigensolver).


def _orthonormal_basis(A: np.ndarray) -> np.ndarray:
    """Q of the thin QR of ``A`` (n, r), n >= r: ``numpy.linalg.qr(A)[0]``."""
    qr, tau, _, _ = lapack.dgeqrf(A)
    return lapack.dorgqr(qr, tau, overwrite_a=True)[0]


def _symmetric_eigen(S: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Ascending eigenvalues and eigenvectors of the symmetric ``S``: ``numpy.linalg.eigh(S)``."""
    values, vectors, info = lapack.dsyevd(S, lower=1)   # numpy reads the lower triangle
    if info > 0:
        raise np.linalg.LinAlgError("Eigenvalues did not converge")
    return values, vectors


class SubspaceTracker:
    """Tracks an orthonormal basis ``U`` (n, r) of the dominant subspace of a vector stream.

    Parameters
    ----------
    rank:
        Fixed rank, or ``None`` to choose it at warm-up: by explained ``energy``, capped at
        ``max_rank`` and at the components above the noise threshold (:func:`noise_rank`).
    energy:
        Fraction of the warm-up energy the chosen rank must explain.
    max_rank:
        Cap on the chosen rank.
    halflife:
        Samples after which a vector's weight in the tracked second moment halves.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(1)
    >>> basis, _ = np.linalg.qr(rng.standard_normal((30, 2)))
    >>> def draw(k):
    ...     return rng.standard_normal((k, 2)) * [5.0, 3.0] @ basis.T + 0.1 * rng.standard_normal((k, 30))
    >>> tracker = SubspaceTracker(rank=2).fit(draw(200))
    >>> for _ in range(10):
    ...     tracker.update(draw(64))
    >>> angles = np.linalg.svd(basis.T @ tracker.U, compute_uv=False)
    >>> bool(angles.min() > 0.999)   # cosines of the principal angles
    True
    """

    def __init__(self, *, rank: int | None = None, energy: float = DEFAULT_ENERGY, max_rank: int = DEFAULT_MAX_RANK,
                 halflife: float = DEFAULT_HALFLIFE) -> None:
        if rank is not None and rank < 1:
            raise ValueError(f"rank must be >= 1 or None (auto), got {rank!r}")
        if not 0.0 < energy <= 1.0:
            raise ValueError(f"energy must be in (0, 1], got {energy!r}")
        if max_rank < 1:
            raise ValueError(f"max_rank must be >= 1, got {max_rank!r}")
        self.fixed_rank = rank
        self.energy = float(energy)
        self.max_rank = int(max_rank)
        self.decay = decay_for_halflife(halflife)
        self.U = np.zeros((0, 0))
        self.singular_values = np.zeros(0)

    @property
    def rank(self) -> int:
        return self.U.shape[1]

    def fit(self, Z: np.ndarray) -> "SubspaceTracker":
        """Warm-up from a block (W, n) of normalised vectors; NaN = missing."""
        Z = np.asarray(Z, dtype=float)
        cap = min(self.max_rank if self.fixed_rank is None else self.fixed_rank, *Z.shape)
        filled = impute_low_rank(Z, cap)
        _, sv, right = np.linalg.svd(filled, full_matrices=False)
        rank = min(self.fixed_rank, sv.size) if self.fixed_rank is not None else \
            choose_rank(sv, self.energy, self.max_rank, Z.shape)
        # Rescale the spectrum to the forgetting-weighted moment of the same W vectors,
        # sum_k decay^k c c^T ~ E[cc^T] (1 - decay^W) / (1 - decay), so updates weigh it right.
        W = Z.shape[0]
        weight = np.sqrt((1.0 - self.decay ** W) / (W * (1.0 - self.decay))) if self.decay < 1 else 1.0
        self.U = np.ascontiguousarray(right[:rank].T)
        self.singular_values = sv[:rank] * weight
        return self

    def residuals(self, Z: np.ndarray) -> np.ndarray:
        """In-sample residuals of a block ``Z`` (W, n) against the basis; missing entries stay NaN
        (the projection fills them by iterated low-rank imputation first)."""
        filled = impute_low_rank(Z, self.rank)
        return np.where(np.isfinite(Z), filled - (filled @ self.U) @ self.U.T, np.nan)

    def update(self, C: np.ndarray) -> None:
        """One block subspace-iteration step with forgetting on complete vectors ``C`` (B, n)."""
        C = np.asarray(C, dtype=float)
        B = C.shape[0]
        if B == 0 or self.rank == 0:
            return
        weights = self.decay ** np.arange(B - 1, -1, -1)[:, None]   # squared column weights
        old = self.U * (self.singular_values * np.sqrt(self.decay ** B))  # (n, r) factor of the old moment
        # Apply the moment Y Y^T, Y = [old, diag(sqrt(weights)) C]^T, to U once, then orthonormalise.
        applied = old @ (old.T @ self.U) + C.T @ (weights * (C @ self.U))
        Q = _orthonormal_basis(applied)
        # Rayleigh-Ritz: principal directions of Y inside span(Q), from the r x r matrix Q^T Y Y^T Q.
        OQ, CQ = old.T @ Q, C @ Q
        values, vectors = _symmetric_eigen(OQ.T @ OQ + CQ.T @ (weights * CQ))
        self.U = Q @ vectors[:, ::-1]   # eigenvalues come ascending
        self.singular_values = np.sqrt(np.maximum(values[::-1], 0.0))

    def extend(self, k: int) -> None:
        """Add ``k`` metrics with zero loadings (the basis stays orthonormal); updates then learn them."""
        self.U = np.vstack([self.U, np.zeros((k, self.rank))])

    def keep(self, index: np.ndarray) -> None:
        """Drop metrics not in ``index`` and re-orthonormalise, keeping the spectrum's rotation."""
        self._refactor(self.U[index])

    def set_rows(self, metrics: np.ndarray, loadings: np.ndarray) -> None:
        """Give ``metrics`` the rows ``loadings`` (k, r) in the current coordinates, then
        re-orthonormalise ("folding in" rows of a thin SVD)."""
        U = self.U.copy()
        U[metrics] = loadings
        self._refactor(U)

    def to_state(self) -> dict[str, np.ndarray]:
        """What the tracker has learned: the basis ``U`` (n, r) and its ``singular_values`` (r,)."""
        return {"U": self.U, "singular_values": self.singular_values}

    @classmethod
    def from_state(cls, state: dict[str, np.ndarray], *, rank: int | None = None, energy: float = DEFAULT_ENERGY,
                   max_rank: int = DEFAULT_MAX_RANK, halflife: float = DEFAULT_HALFLIFE) -> SubspaceTracker:
        """Inverse of :meth:`to_state`, with the settings of the constructor."""
        tracker = cls(rank=rank, energy=energy, max_rank=max_rank, halflife=halflife)
        tracker.U, tracker.singular_values = state["U"], state["singular_values"]
        return tracker

    def _refactor(self, U: np.ndarray) -> None:
        left, sv, _ = np.linalg.svd(U * self.singular_values, full_matrices=False)
        self.U = left
        self.singular_values = sv
