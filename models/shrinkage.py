"""Shrinkage operators: the proximal maps of the l1 and row-wise l2 (l2,1) penalties.

>>> import numpy as np
>>> soft_threshold(np.array([-3.0, 0.5, 2.0]), -1.0, 1.0)
array([-2.,  0.,  1.])
>>> block_soft_threshold(np.array([[3.0, 4.0], [0.3, 0.4]]), 1.0)
array([[2.4, 3.2],
       [0. , 0. ]])
"""

from __future__ import annotations

import numpy as np

__all__ = ["block_soft_threshold", "soft_threshold"]


def soft_threshold(G: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """``G - clip(G, lo, hi)``: shrinks towards 0 by the thresholds (an infinite one gives exactly 0)."""
    return G - np.minimum(np.maximum(G, lo), hi)


def block_soft_threshold(G: np.ndarray, thr: float) -> np.ndarray:
    """Prox of ``thr * sum_i ||X_i,:||``: each row shrunk towards 0 by ``thr`` in l2 norm."""
    norms = np.linalg.norm(G, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        factor = np.where(norms > thr, 1.0 - thr / norms, 0.0)
    return G * factor[:, None]
