"""The reference methods ``shiftsieve evaluate`` compares shiftsieve with, behind one interface.

A :class:`ReferenceMethod` turns a matrix ``F`` (T, n) of metric values (on the modelling
scale, NaN = missing, rows in time order) into :class:`~shiftsieve.models.baselines.Flags`
for every row, given per column the rows it may learn before it is scored (``warmup``) and
the rows a practitioner would calibrate thresholds on (``history``).  The online methods
score each row with the state before it and then learn it (river's habit); PCP decomposes
the whole matrix at once, which is why it is an offline reference and not a product.
``columnwise`` says the columns are independent, so many entities' columns may be stacked
side by side and walked at once; ``localises`` says the flags name metrics (HalfSpaceTrees'
single column only says that the vector is odd).

shiftsieve itself is compared as the engine runs it in a replay (the product path, with its
own events), not through this interface.

Examples
--------
>>> import numpy as np
>>> rng = np.random.default_rng(1)
>>> F = rng.standard_normal((300, 3)); F[250:, 1] += 8.0
>>> flags = EWMAZScoreMethod(halflife=50.0, false_alarm=1e-3).detect(
...     F, warmup=np.full(3, 100), history=np.full(3, 100))
>>> flags.active.shape, bool(flags.active[250, 1])
((300, 3), True)
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Protocol

import numpy as np

from .baselines import EWMAZScore, Flags, HalfSpaceTreesDetector, ewma_zscore_calibrated, pcp_calibrated, pcp_detect


class ReferenceMethod(Protocol):
    """What ``evaluate`` runs for every method but shiftsieve (module docstring)."""

    localises: ClassVar[bool]
    columnwise: ClassVar[bool]

    def detect(self, F: np.ndarray, *, warmup: np.ndarray, history: np.ndarray) -> Flags:
        """Flags for every row of ``F``; ``warmup`` and ``history`` are per column (rows)."""
        ...


@dataclass(frozen=True)
class EWMAZScoreMethod:
    """Per-metric EWMA z-score (:class:`~shiftsieve.models.baselines.EWMAZScore`), with the Gaussian
    threshold or, ``calibrated``, each metric's own (:func:`~shiftsieve.models.baselines.ewma_zscore_calibrated`)."""

    halflife: float
    false_alarm: float
    calibrated: bool = False
    localises: ClassVar[bool] = True
    columnwise: ClassVar[bool] = True

    def detect(self, F: np.ndarray, *, warmup: np.ndarray, history: np.ndarray) -> Flags:
        warmup = np.maximum(warmup, 2)   # a column with fewer rows is never scored either way
        if self.calibrated:
            return ewma_zscore_calibrated(F, history=history, halflife=self.halflife,
                                          false_alarm=self.false_alarm, warmup=warmup)
        return EWMAZScore(F.shape[1], halflife=self.halflife, false_alarm=self.false_alarm,
                          warmup=warmup).process(F)


@dataclass(frozen=True)
class HalfSpaceTreesMethod:
    """river's HalfSpaceTrees on whole vectors (:class:`~shiftsieve.models.baselines.HalfSpaceTreesDetector`):
    fitted on the warm-up rows, which it does not flag; one whole-vector column."""

    false_alarm: float
    seed: int
    localises: ClassVar[bool] = False
    columnwise: ClassVar[bool] = False

    def detect(self, F: np.ndarray, *, warmup: np.ndarray, history: np.ndarray) -> Flags:
        rows = int(warmup[0])   # one entity: its columns share the warm-up
        detector = HalfSpaceTreesDetector(F.shape[1], false_alarm=self.false_alarm, seed=self.seed)
        later = detector.fit(F[:rows]).process(F[rows:])
        return Flags(np.vstack([np.zeros((rows, 1), bool), later.active]),
                     np.vstack([np.zeros((rows, 1)), later.stat]),
                     np.vstack([np.full((rows, 1), np.nan), later.expected]))


@dataclass(frozen=True)
class PCPMethod:
    """Batch Principal Component Pursuit of one entity's whole matrix (:func:`~shiftsieve.models.baselines.pcp_detect`),
    one threshold pooled over the warm-up or, ``calibrated``, each metric's own over its history."""

    false_alarm: float
    calibrated: bool = False
    localises: ClassVar[bool] = True
    columnwise: ClassVar[bool] = False

    def detect(self, F: np.ndarray, *, warmup: np.ndarray, history: np.ndarray) -> Flags:
        rows = int(warmup[0])
        if self.calibrated:
            return pcp_calibrated(F, warmup=rows, history=int(history[0]), false_alarm=self.false_alarm)
        return pcp_detect(F, warmup=rows, false_alarm=self.false_alarm).flags
