"""The dictionary ``Phi = [I, G]``: one column per metric plus optional group columns.

A group column is the unit-norm indicator of a set of metrics (one host, one
family such as latency, one dependency), so "the database got slower" can be a
single coefficient instead of many.  Its penalty uses the root-mean-square of the
members' residual scales, which gives a group the same false-alarm probability
as a single metric when residuals are independent.

Example: four metrics, the last two forming one group.

>>> import numpy as np
>>> phi = build_dictionary(4, [np.array([2, 3])])
>>> phi.shape, round(float(phi[2, 4]), 4)          # the group column has unit norm
((4, 5), 0.7071)
>>> column_scales(np.array([1.0, 1.0, 2.0, 2.0]), phi).round(3).tolist()   # RMS of the members
[1.0, 1.0, 2.0, 2.0, 2.0]
>>> metric_effect(np.array([[0, 0, 0, 0, 1.0]]), phi).round(4).tolist()   # the group moves both
[[0.0, 0.0, 0.7071, 0.7071]]
"""

from __future__ import annotations

import numpy as np


def build_dictionary(n_metrics: int, groups: list[np.ndarray]) -> np.ndarray | None:
    """``[I, G]`` (n, n + g) for the member index arrays in ``groups``; ``None`` (= identity) without groups."""
    if not groups:
        return None
    G = np.zeros((n_metrics, len(groups)))
    for column, members in enumerate(groups):
        members = np.asarray(members, dtype=np.int64)
        if members.size == 0:
            raise ValueError(f"group {column} has no members")
        G[members, column] = 1.0 / np.sqrt(members.size)
    return np.hstack([np.eye(n_metrics), G])


def column_scales(metric_scale: np.ndarray, phi: np.ndarray | None) -> np.ndarray:
    """Residual scale of every dictionary column: the metric's own, or the RMS over a group's members."""
    if phi is None:
        return metric_scale
    n = metric_scale.size
    G = phi[:, n:]
    return np.concatenate([metric_scale, np.sqrt((G ** 2).T @ metric_scale ** 2)])


def metric_effect(coef: np.ndarray, phi: np.ndarray | None) -> np.ndarray:
    """Per-metric shift ``Phi s`` (B, n) implied by coefficients (B, p)."""
    return coef if phi is None else coef @ phi.T
