"""What scoring one micro-batch produced, and the units it was scored in.

A result keeps the units of its own batch (:class:`BatchUnits`): the detector keeps learning,
and the basis, locations and scales move on, so expected values and joint-localisation
residuals are computed on demand from the batch's own units (only for the few entities and
metrics that need them).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .decision import Transition
from .lasso import projected_residual
from .normaliser import from_metric_units, to_metric_units

__all__ = ["BatchResult", "BatchUnits", "WINDOW_LIMIT", "Z_LIMIT"]

#: Normalised values are clipped here before scoring: a value 1e300 away would overflow the
#: squares of the solver; a billion robust sigmas is still an unmistakable shift.
Z_LIMIT = 1e9
#: Window residuals are clipped here (residual sigmas): a larger value says no more about which
#: metric moved, and M-SBL's covariance ``I + A Gamma A^T`` would stop being numerically positive
#: definite (seen with a jump of 1e12).
WINDOW_LIMIT = 1e4


class BatchUnits(NamedTuple):
    """The units a batch was scored with.  Learning replaces these arrays, never mutates them,
    so a batch's result keeps meaning what it meant when it was computed."""

    basis: np.ndarray            # U (n, r)
    loc: np.ndarray              # normaliser location (n,)
    scale: np.ndarray            # normaliser scale (n,)
    log_mask: np.ndarray         # (n,) bool
    residual_scale: np.ndarray   # alert scale d kappa (n,): residual sigmas as reported
    modelled: np.ndarray         # (n,) bool, metrics the basis knows

    def normalise(self, X: np.ndarray) -> np.ndarray:
        """Raw rows ``X`` (B, n) in these units, clipped at ``Z_LIMIT`` (a fresh array; missing stays NaN)."""
        Z = from_metric_units(X, self.loc, self.scale, self.log_mask)
        np.clip(Z, -Z_LIMIT, Z_LIMIT, out=Z)   # NaN (missing) stays NaN
        return Z


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
    warmup_rows: int = 0         # the first rows went into the warm-up and were not scored

    @property
    def scored_iterations(self) -> np.ndarray:
        """Solver iterations of the scored rows only."""
        return self.n_iter[self.warmup_rows:]

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
        times column j of :meth:`.detector.EntityDetector.window_dictionary`.  An entry that is missing or
        unknown to the basis is 0 (no evidence), the rest are the residual of the basis fitted to
        the row's other entries, as the per-sample solver sees them.  Computed on demand (for
        entities with an open incident), never on the hot path.  Values are clipped at
        ``WINDOW_LIMIT`` residual sigmas.
        """
        if self.units is None:
            raise ValueError("no units: the batch was collected for warm-up, not scored")
        u = self.units
        Z = u.normalise(X)
        mask = np.isfinite(Z) & u.modelled
        residual, _ = projected_residual(Z, u.basis, np.zeros_like(Z), mask=None if mask.all() else mask)
        return np.clip(residual / u.residual_scale, -WINDOW_LIMIT, WINDOW_LIMIT)
