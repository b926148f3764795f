"""Probation of metrics that appear after warm-up: their baseline loadings, learned before they count.

A late metric enters the model only once its loadings on the baseline directions are known.
Entering with zero loadings would make its whole shared movement look like a shift, and the
basis would swing to absorb it, disturbing every other metric's prediction.  While on probation
it is regressed on the baseline coordinates ``w`` of the samples it appears in: per metric the
sums ``sum w w^T``, ``sum w z``, ``sum z^2`` and the sample count are kept.

>>> import numpy as np
>>> probation = Probation()
>>> coords = np.arange(8.0).reshape(4, 2)
>>> probation.add(coords @ np.array([[2.0], [0.5]]), np.ones((4, 1), bool), coords)
>>> metrics, loadings, scales = probation.graduate(min_samples=4)
>>> metrics.tolist(), loadings.round(6).tolist(), len(probation)
([0], [[2.0, 0.5]], 0)
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["Probation"]


class Probation:
    """Regression sums of the metrics on probation, keyed by metric column."""

    def __init__(self) -> None:
        self.sums: dict[int, list] = {}   # metric -> [sum w w^T, sum w z, sum z^2, samples]

    def __len__(self) -> int:
        return len(self.sums)

    def add(self, Z: np.ndarray, learning: np.ndarray, coords: np.ndarray) -> None:
        """Accumulate the samples ``learning`` (B, n) bool of each metric: values ``Z`` (B, n), in
        normalised units, against the baseline coordinates ``coords`` (B, r)."""
        for j in np.flatnonzero(learning.any(axis=0)):
            rows = learning[:, j]
            w, z = coords[rows], Z[rows, j]
            stats = self.sums.setdefault(int(j), [0.0, 0.0, 0.0, 0])
            stats[0] = stats[0] + w.T @ w
            stats[1] = stats[1] + w.T @ z
            stats[2] += float(z @ z)
            stats[3] += int(rows.sum())

    def graduate(self, min_samples: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Release the metrics with ``min_samples`` samples: ``(metrics (k,), loadings (k, r),
        residual scales (k,))``, the least-squares loadings and the scale of what they leave."""
        ready = [j for j, stats in self.sums.items() if stats[3] >= min_samples]
        loadings, scales = [], []
        for j in ready:
            ww, wz, zz, k = self.sums.pop(j)
            u = np.linalg.lstsq(ww + 1e-9 * np.eye(len(wz)), wz, rcond=None)[0]
            rss = max(zz - 2.0 * u @ wz + u @ ww @ u, 0.0)
            loadings.append(u)
            scales.append(math.sqrt(rss / max(k - len(u), 1)) or 1.0)
        return np.array(ready, dtype=np.int64), np.array(loadings), np.array(scales)

    def keep(self, index: np.ndarray) -> None:
        """Retain only the metrics at ``index``, renumbered to their positions in it."""
        renumber = {int(old): new for new, old in enumerate(index)}
        self.sums = {renumber[j]: v for j, v in self.sums.items() if j in renumber}

    def to_state(self, rank: int) -> dict[str, np.ndarray]:
        """The sums as arrays: ``metric`` (q,), ``ww`` (q, s, s), ``wz`` (q, s), ``zz`` (q,) and
        ``count`` (q,); ``s`` is the regression size, ``rank`` (the baseline's) when none is held."""
        q = len(self.sums)
        s = len(next(iter(self.sums.values()))[1]) if self.sums else rank
        values = self.sums.values()
        return {"metric": np.array(list(self.sums), dtype=np.int64),
                "ww": np.array([v[0] for v in values], dtype=float).reshape(q, s, s),
                "wz": np.array([v[1] for v in values], dtype=float).reshape(q, s),
                "zz": np.array([v[2] for v in values], dtype=float),
                "count": np.array([v[3] for v in values], dtype=np.int64)}

    @classmethod
    def from_state(cls, state: dict[str, np.ndarray]) -> Probation:
        """Inverse of :meth:`to_state`."""
        probation = cls()
        probation.sums = {int(j): [ww, wz, float(zz), int(k)] for j, ww, wz, zz, k in
                          zip(state["metric"], state["ww"], state["wz"], state["zz"], state["count"])}
        return probation
