"""Decision layer: per-metric alert states and per-entity incidents.

Each metric of an entity moves through ``quiet -> pending -> firing`` and back:

- a sample is *active* when the metric's sparse shift is non-zero;
- ``pending -> firing`` needs ``confirm_k`` active samples among the last
  ``confirm_m`` (so a one-sample spike never fires with the defaults);
- ``firing -> quiet`` (resolved) needs ``clear_after`` consecutive samples whose
  statistic is below ``clear_sigma`` — a lower bar than the firing threshold, so
  a shift hovering at the threshold does not flap (hysteresis);
- a metric still firing after ``adapt_after`` samples is *adapted*: the caller
  accepts its shift as the new normal and it returns to quiet.

Metrics that fire while an incident is open on the entity join it; the incident
closes when none of its metrics is firing.  The tracker works on arrays, loops
only over samples in which something is happening, and over just those metrics.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

QUIET, PENDING, FIRING = 0, 1, 2


@dataclass(frozen=True)
class DecisionConfig:
    """Confirmation, hysteresis and adaptation settings (in samples and residual sigmas)."""

    confirm_k: int = 3
    confirm_m: int = 5
    clear_sigma: float = 2.0
    clear_after: int = 5
    adapt_after: int = 1440  # 0 = never adapt

    def __post_init__(self) -> None:
        if not 1 <= self.confirm_m <= 63:
            raise ValueError(f"confirm_m must be in 1..63, got {self.confirm_m}")
        if not 1 <= self.confirm_k <= self.confirm_m:
            raise ValueError(f"confirm_k must be in 1..confirm_m ({self.confirm_m}), got {self.confirm_k}")
        if not self.clear_sigma >= 0:
            raise ValueError(f"clear_sigma must be >= 0, got {self.clear_sigma}")
        if self.clear_after < 1:
            raise ValueError(f"clear_after must be >= 1, got {self.clear_after}")
        if self.adapt_after < 0:
            raise ValueError(f"adapt_after must be >= 0 (0 = never), got {self.adapt_after}")


@dataclass(frozen=True)
class Transition:
    """Something people should hear about, at batch row ``row``.

    ``kind`` is ``"firing"`` (incident onset or metrics joining it), ``"adapted"``
    (shift accepted as the new normal) or ``"resolved"`` (the incident closed).
    ``shift``, ``value`` and ``expected`` are per listed metric: the current sample
    for firing and adapted, the incident peak for resolved.
    """

    kind: str
    row: int
    onset_ts: float
    metrics: np.ndarray
    shift: np.ndarray
    value: np.ndarray
    expected: np.ndarray
    onset: bool = False


@dataclass
class Incident:
    """The open incident of an entity: when it began, the columns firing in it (``members``) and
    those that fired in it and have since cleared (``resolved``)."""

    onset_ts: float
    members: set[int] = field(default_factory=set)
    resolved: set[int] = field(default_factory=set)

    def to_state(self) -> dict:
        """As plain JSON values (sorted column lists)."""
        return {"onset_ts": self.onset_ts, "members": sorted(self.members), "resolved": sorted(self.resolved)}

    @classmethod
    def from_state(cls, state: dict) -> Incident:
        """Inverse of :meth:`to_state`."""
        return cls(float(state["onset_ts"]), set(state["members"]), set(state["resolved"]))


class AlertTracker:
    """Per-metric alert state for one entity.

    Examples
    --------
    >>> import numpy as np
    >>> tracker = AlertTracker(2, DecisionConfig(confirm_k=2, confirm_m=3, clear_after=2))
    >>> active = np.array([[0, 0], [1, 0], [1, 0], [0, 0], [0, 0]], bool)
    >>> shift = np.where(active, 6.0, 0.0)
    >>> out = tracker.step(active, shift, shift, shift, shift, np.arange(5.0))
    >>> [(t.kind, t.row, t.metrics.tolist()) for t in out]
    [('firing', 2, [0]), ('resolved', 4, [0])]
    """

    _PER_METRIC = ("state", "history", "below", "firing_for", "peak_shift", "peak_value", "peak_expected")

    def __init__(self, n_metrics: int, config: DecisionConfig = DecisionConfig()) -> None:
        self.config = config
        self._window_mask = np.uint64((1 << config.confirm_m) - 1)
        self.state = np.zeros(n_metrics, dtype=np.int8)
        self.history = np.zeros(n_metrics, dtype=np.uint64)
        self.below = np.zeros(n_metrics, dtype=np.int64)
        self.firing_for = np.zeros(n_metrics, dtype=np.int64)
        self.peak_shift = np.zeros(n_metrics)
        self.peak_value = np.zeros(n_metrics)
        self.peak_expected = np.zeros(n_metrics)
        self.incident: Incident | None = None

    @property
    def n_metrics(self) -> int:
        return self.state.size

    def step(self, active: np.ndarray, shift: np.ndarray, stat: np.ndarray, value: np.ndarray,
             expected: np.ndarray, ts: np.ndarray, columns: np.ndarray | None = None) -> list[Transition]:
        """Advance over a batch in sample order; returns the transitions in order.

        Arrays are (B, n), or (B, k) for the metrics ``columns`` (k,) when given; the
        other metrics must be quiet and are inactive throughout the batch.  ``shift``
        is the reported (debiased) shift in residual sigmas, ``stat`` the statistic
        compared with ``clear_sigma``; ``value``/``expected`` ride along into the
        transitions.
        """
        active = np.asarray(active, dtype=bool)
        B = active.shape[0]
        cfg = self.config
        if columns is None:
            columns = np.arange(self.n_metrics)
        else:   # the other metrics (quiet, inactive) only age
            inside = self.history[columns]
            self.idle(B)
            self.history[columns] = inside
        # Window counts ignore resets inside the batch, so they bound the true counts from above:
        # a metric that never reaches confirm_k and is not firing cannot change anything but its
        # history and its quiet/pending flag, which are computed for all such metrics at once.
        # Cheapest bound first: fewer than confirm_k active samples in the batch and history.
        firing = self.state[columns] == FIRING
        enough = active.sum(axis=0) + np.bitwise_count(self.history[columns]) >= cfg.confirm_k
        maybe = (firing | enough).nonzero()[0]
        if maybe.size == 0:   # the common case: nothing can happen in this batch
            self._advance_quietly(active, columns)
            return []
        can_fire = self._window_counts(active[:, maybe], columns[maybe]) >= cfg.confirm_k
        is_hot = firing[maybe] | can_fire.any(axis=0)
        hot_local, can_fire = maybe[is_hot], can_fire[:, is_hot]
        cold = np.ones(columns.size, dtype=bool)
        cold[hot_local] = False
        self._advance_quietly(active[:, cold], columns[cold])
        if hot_local.size == 0:
            return []
        hot = columns[hot_local]   # metric ids; data columns are hot_local
        active, shift, stat = active[:, hot_local], shift[:, hot_local], stat[:, hot_local]
        value, expected = value[:, hot_local], expected[:, hot_local]
        muted = np.zeros(hot.size, dtype=bool)  # adapted this batch: later rows still show the old shift
        out: list[Transition] = []
        row = 0
        while row < B:
            # Jump over the rows in which no transition is possible, then take the next one singly.
            event = self._next_possible_event(row, hot, stat, can_fire)
            self._jump(row, event, hot, active & ~muted, shift, stat, value, expected)
            if event >= B:
                break
            out.extend(self._step_row(event, hot, active[event] & ~muted, shift[event], stat[event],
                                      value[event], expected[event], float(ts[event]), muted))
            row = event + 1
        return out

    def idle(self, samples: int) -> None:
        """Advance over ``samples`` samples in which every metric is quiet and inactive: histories age."""
        self.history = self._shifted(self.history, samples)

    def _next_possible_event(self, row: int, hot: np.ndarray, stat: np.ndarray, can_fire: np.ndarray) -> int:
        """First row >= ``row`` at which a hot metric could fire, clear or adapt (B if none)."""
        cfg = self.config
        B = stat.shape[0]
        firing = self.state[hot] == FIRING
        candidate = (can_fire[row:] & ~firing).any(axis=1)
        if firing.any():
            low = np.abs(stat[row:, firing]) < cfg.clear_sigma
            run = self._low_runs(low, self.below[hot[firing]])
            candidate |= (run >= cfg.clear_after).any(axis=1)
            if cfg.adapt_after:
                due = row + int(np.min(cfg.adapt_after - self.firing_for[hot[firing]])) - 1
                if due < B:
                    candidate[max(due - row, 0)] = True
        hits = np.flatnonzero(candidate)
        return row + int(hits[0]) if hits.size else B

    @staticmethod
    def _low_runs(low: np.ndarray, carry: np.ndarray) -> np.ndarray:
        """Length of the run of consecutive low rows ending at each row; ``carry`` continues a run."""
        idx = np.arange(low.shape[0])[:, None]
        last_break = np.maximum.accumulate(np.where(low, -1, idx), axis=0)
        return np.where(last_break < 0, idx + 1 + carry, idx - last_break)

    def _jump(self, start: int, stop: int, hot: np.ndarray, active: np.ndarray, shift: np.ndarray,
              stat: np.ndarray, value: np.ndarray, expected: np.ndarray) -> None:
        """Advance hot metrics over rows [start, stop) in which, by construction, nothing transitions."""
        if stop <= start:
            return
        firing = self.state[hot] == FIRING
        self._advance_quietly(active[start:stop], hot)   # history; pending/quiet flags
        if not firing.any():
            return
        ids = hot[firing]
        self.state[ids] = FIRING
        low = np.abs(stat[start:stop, firing]) < self.config.clear_sigma
        self.below[ids] = self._low_runs(low, self.below[ids])[-1]
        self.firing_for[ids] += stop - start
        seg = np.abs(shift[start:stop, firing])
        top = np.argmax(seg, axis=0)
        cols = np.arange(ids.size)
        higher = seg[top, cols] > np.abs(self.peak_shift[ids])
        rows = start + top[higher]
        local = np.flatnonzero(firing)[higher]
        self.peak_shift[ids[higher]] = shift[rows, local]
        self.peak_value[ids[higher]] = value[rows, local]
        self.peak_expected[ids[higher]] = expected[rows, local]

    def _step_row(self, row: int, hot: np.ndarray, a: np.ndarray, shift: np.ndarray, stat: np.ndarray,
                  value: np.ndarray, expected: np.ndarray, ts: float, muted: np.ndarray) -> list[Transition]:
        """The rules applied to one row for the hot metrics; updates ``muted`` with adapted metrics."""
        cfg = self.config
        hist = ((self.history[hot] << np.uint64(1)) | a.astype(np.uint64)) & self._window_mask
        state = self.state[hot]
        fire = (state != FIRING) & (np.bitwise_count(hist) >= cfg.confirm_k)
        firing = state == FIRING
        below = np.where(firing & (np.abs(stat) < cfg.clear_sigma), self.below[hot] + 1, 0)
        firing_for = np.where(firing, self.firing_for[hot] + 1, 0)
        clear = firing & (below >= cfg.clear_after)
        adapt = firing & ~clear & (cfg.adapt_after > 0) & (firing_for >= cfg.adapt_after)
        ended = clear | adapt
        self._track_peaks(hot, firing | fire, shift, value, expected)
        self.history[hot] = np.where(ended, np.uint64(0), hist)
        self.state[hot] = np.where(fire | (firing & ~ended), FIRING, np.where(ended | (hist == 0), QUIET, PENDING))
        self.below[hot] = np.where(fire, 0, below)
        self.firing_for[hot] = np.where(fire, 0, firing_for)
        muted |= adapt
        return self._incident_transitions(row, ts, hot, fire, clear, adapt, shift, value, expected)

    def _window_counts(self, active: np.ndarray, columns: np.ndarray) -> np.ndarray:
        """Active samples among the last ``confirm_m`` at every row (B, k), history included."""
        m = self.config.confirm_m
        B = active.shape[0]
        cum = np.zeros((B + 1, active.shape[1]), dtype=np.int64)
        np.cumsum(active, axis=0, out=cum[1:])
        counts = cum[1:].copy()          # row t: cum[t + 1] - cum[max(t + 1 - m, 0)]
        if B >= m:
            counts[m - 1:] -= cum[:B - m + 1]
        # Row t also counts the newest m - 1 - t samples of the history (bit 0 = the previous sample).
        head = min(m - 1, B)
        if head:
            bits = (np.uint64(1) << (m - 1 - np.arange(head)).astype(np.uint64)) - np.uint64(1)
            counts[:head] += np.bitwise_count(self.history[columns][None, :] & bits[:, None])
        return counts

    def _advance_quietly(self, active: np.ndarray, metrics: np.ndarray) -> None:
        """Age the history of ``metrics`` (ids; data columns of ``active``) over rows in which none can fire."""
        L = active.shape[0]
        if L == 0 or metrics.size == 0:
            return
        tail = active[-min(L, self.config.confirm_m):][::-1].astype(np.uint64)   # older bits leave the window
        bits = np.bitwise_or.reduce(tail << np.arange(tail.shape[0], dtype=np.uint64)[:, None], axis=0)
        history = (self._shifted(self.history[metrics], L) | bits) & self._window_mask
        self.history[metrics] = history
        self.state[metrics] = np.where(history != 0, PENDING, QUIET)

    def _shifted(self, history: np.ndarray, samples: int) -> np.ndarray:
        """History after ``samples`` inactive samples (numpy shifts by >= 64 bits are undefined)."""
        if samples >= 64:
            return np.zeros_like(history)
        return (history << np.uint64(samples)) & self._window_mask

    def _track_peaks(self, hot: np.ndarray, live: np.ndarray, shift: np.ndarray, value: np.ndarray,
                     expected: np.ndarray) -> None:
        """Keep each firing metric's largest |shift| (and its value/expected); data indexed like ``hot``."""
        fresh = self.state[hot] != FIRING
        higher = live & (fresh | (np.abs(shift) > np.abs(self.peak_shift[hot])))
        ids = hot[higher]
        self.peak_shift[ids] = shift[higher]
        self.peak_value[ids] = value[higher]
        self.peak_expected[ids] = expected[higher]

    def _incident_transitions(self, row: int, ts: float, hot: np.ndarray, fired: np.ndarray, cleared: np.ndarray,
                              adapted: np.ndarray, shift: np.ndarray, value: np.ndarray,
                              expected: np.ndarray) -> list[Transition]:
        """Group this row's metric transitions (boolean masks over ``hot``) into incident transitions."""
        out: list[Transition] = []
        if fired.any():
            onset = self.incident is None
            if onset:
                self.incident = Incident(onset_ts=ts)
            self.incident.members.update(hot[fired].tolist())
            out.append(Transition("firing", row, self.incident.onset_ts, hot[fired], shift[fired], value[fired],
                                  expected[fired], onset=onset))
        if self.incident is None:
            return out
        if adapted.any():
            self.incident.members.difference_update(hot[adapted].tolist())
            out.append(Transition("adapted", row, self.incident.onset_ts, hot[adapted], shift[adapted],
                                  value[adapted], expected[adapted]))
        if cleared.any():
            self.incident.members.difference_update(hot[cleared].tolist())
            self.incident.resolved.update(hot[cleared].tolist())
        if not self.incident.members:
            done = np.array(sorted(self.incident.resolved), dtype=np.int64)
            if done.size:
                out.append(Transition("resolved", row, self.incident.onset_ts, done, self.peak_shift[done],
                                      self.peak_value[done], self.peak_expected[done]))
            self.incident = None
        return out

    def to_state(self) -> dict:
        """The per-metric arrays and the open incident (:meth:`Incident.to_state`, or None)."""
        state: dict = {name: getattr(self, name) for name in self._PER_METRIC}
        state["incident"] = None if self.incident is None else self.incident.to_state()
        return state

    @classmethod
    def from_state(cls, state: dict, config: DecisionConfig = DecisionConfig()) -> AlertTracker:
        """Inverse of :meth:`to_state`, with the settings ``config``."""
        tracker = cls(state["state"].size, config)
        for name in cls._PER_METRIC:
            setattr(tracker, name, state[name])
        tracker.incident = None if state["incident"] is None else Incident.from_state(state["incident"])
        return tracker

    def extend(self, k: int) -> None:
        """Append ``k`` quiet metrics."""
        for name in self._PER_METRIC:
            arr = getattr(self, name)
            setattr(self, name, np.concatenate([arr, np.zeros(k, dtype=arr.dtype)]))

    def keep(self, index: np.ndarray) -> None:
        """Retain only the metrics at ``index`` (callers drop only quiet metrics, or group columns)."""
        for name in self._PER_METRIC:
            setattr(self, name, getattr(self, name)[index])
        if self.incident is not None:
            renumber = {int(old): new for new, old in enumerate(index)}
            self.incident.members = {renumber[m] for m in self.incident.members if m in renumber}
            self.incident.resolved = {renumber[m] for m in self.incident.resolved if m in renumber}
