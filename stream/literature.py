"""Two scores of the anomaly-detection literature, as pure functions, for ``shiftsieve evaluate``.

- HitRate@P% (Su et al., KDD 2019, "Robust anomaly detection for multivariate time
  series through stochastic recurrent neural network" -- OmniAnomaly): how many of the
  metrics an engineer named responsible a detector ranks at the top.
- Point adjustment (Xu et al., WWW 2018, "Unsupervised anomaly detection via variational
  auto-encoder for seasonal KPIs in web applications" -- Donut): when any point of a
  labelled segment is alerted, the whole segment counts as alerted.  Most published
  point-wise F1 figures use it; it inflates them (one alerted point in a day-long segment
  finds the whole day), so the project reports it only to compare with those figures.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np


def hit_rate(ranking: Sequence[str], labelled: Sequence[str], percent: int) -> float:
    """HitRate@``percent``%: the share of ``labelled`` among the top
    ``floor(percent / 100 * |labelled|)`` of ``ranking`` (best first); a metric the ranking
    does not hold is never a hit.

    >>> hit_rate(["a", "x", "b"], ["a", "b"], 100)    # top 2: a, x
    0.5
    >>> hit_rate(["a", "x", "b"], ["a", "b"], 150)    # top 3: a, x, b
    1.0
    """
    truth = set(labelled)
    top = percent * len(truth) // 100
    return len(truth.intersection(ranking[:top])) / len(truth)


def covered(ts: np.ndarray, spans: Sequence[tuple[float, float]]) -> np.ndarray:
    """Which of the sorted times ``ts`` lie in at least one closed interval of ``spans``.

    >>> covered(np.arange(6.0), [(1.0, 2.0), (2.0, 2.5), (5.0, 9.0)]).astype(int).tolist()
    [0, 1, 1, 0, 0, 1]
    """
    if not spans:
        return np.zeros(ts.size, dtype=bool)
    lo, hi = np.array(spans, dtype=float).T
    count = np.zeros(ts.size + 1, dtype=np.int64)
    np.add.at(count, np.searchsorted(ts, lo, "left"), 1)
    np.add.at(count, np.searchsorted(ts, hi, "right"), -1)
    return np.cumsum(count[:-1]) > 0


def point_adjust(alerted: np.ndarray, labelled: np.ndarray) -> np.ndarray:
    """``alerted`` after point adjustment: every run of consecutive ``labelled`` points that
    holds an alerted point becomes alerted as a whole; points outside runs are unchanged.

    >>> point_adjust(np.array([0, 0, 1, 0, 0, 1], bool), np.array([0, 1, 1, 1, 0, 0], bool)).astype(int).tolist()
    [0, 1, 1, 1, 0, 1]
    """
    out = np.array(alerted, dtype=bool)
    edges = np.diff(np.r_[0, np.asarray(labelled, dtype=np.int8), 0])
    for first, stop in zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)):
        if out[first:stop].any():
            out[first:stop] = True
    return out
