"""Time order of an entity's vectors: the rule the engine applies, and the window that puts a
replay input's disorder back in order before the engine sees it.

The rule (:func:`order_refusal`): an entity's model takes only vectors later than its last
accepted one.  A vector at the same time is refused as "duplicate_ts" (a repeated line, two
producers writing one entity), an older one as "out_of_order": either would feed the baseline a
step twice or backwards.  The engine applies it, and ``evaluate`` and ``tune`` apply it to their
files the same way.

The window (:class:`TimeOrdered`): replay inputs (``replay``, ``evaluate``, ``tune`` and
``produce`` read them through :func:`.replay.open_input`) are put back in time order per entity
within ``source.allowed_lateness_seconds``, the setting that already bounds late samples
(:mod:`.samples`).  A vector at most that far behind its entity's newest is held, and released in
time order once the entity's newest has moved further than that past it; one further behind
passes on at once, and the engine takes it if it is still later than what it took, else refuses
it.  So a file in order within the window loses nothing, a line moved far ahead loses nothing
(the vectors it jumped over pass it; it is released after them), and one moved far back only
itself.  Memory: per entity, its vectors within the window and its newest time.  Deterministic:
releases follow the input, and at its end time (then input order).

``run`` stays strict: holding every vector until its entity's time has moved on by the window
would delay every alert by ``allowed_lateness_seconds``; a topic keyed by entity keeps each
entity's order, and the sample encodings already wait that long in their assembler.
"""

from __future__ import annotations

import heapq
import math
from collections import deque
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, replace

from .decode import Vector
from .lines import Rejected
from .readers import RecordStream
from .timefmt import rfc3339

__all__ = ["ORDER_REASONS", "OrderRefusal", "OrderSummary", "TimeOrdered", "order_refusal", "refusal_detail",
           "taken_in_order"]

#: Reasons the engine refuses a vector for its time.
ORDER_REASONS = ("out_of_order", "duplicate_ts")


def order_refusal(ts: float, last: float) -> str | None:
    """None when ``ts`` is later than the entity's last accepted time ``last``, else why it is refused."""
    if ts > last:
        return None
    return "duplicate_ts" if ts == last else "out_of_order"


def taken_in_order(vectors: Iterable[Vector]) -> Iterator[Vector]:
    """The vectors an engine fed ``vectors`` would take by :func:`order_refusal` (for the commands
    that read a file without one: evaluate's baselines, tune's scan)."""
    last: dict[str, float] = {}
    for vector in vectors:
        if order_refusal(vector.ts, last.get(vector.entity, -math.inf)) is None:
            last[vector.entity] = vector.ts
            yield vector


def refusal_detail(entity: str, ts: float, reason: str, last: float) -> str:
    """The dead letter's sentence for a vector the engine refused (``last``: its entity's last accepted time)."""
    text = f"vector of {entity!r} at {rfc3339(ts)} refused: {reason}"
    if reason == "duplicate_ts":
        return text + " (its entity's last accepted vector has the same time)"
    if reason == "out_of_order":
        return text + f" (older than its entity's last accepted vector, at {rfc3339(last)})"
    return text


@dataclass
class OrderRefusal:
    """The first vector refused for one reason of :data:`ORDER_REASONS`: its entity, the entity's last
    accepted time and the time that arrived; and the largest gap between the two over all refused for
    that reason (how much more window it would have taken to keep them)."""

    entity: str
    last_ts: float
    ts: float
    largest_gap: float


@dataclass(frozen=True)
class OrderSummary:
    """What a run did about time order: per reason of :data:`ORDER_REASONS`, the first refusal; and,
    for a replay input, the window (``lateness`` seconds; None: ``run``, which has none) and how
    many vectors it put back in order."""

    first: dict[str, OrderRefusal]
    reordered: int = 0
    lateness: float | None = None

    @classmethod
    def of(cls, first: dict[str, OrderRefusal], window: TimeOrdered | None = None) -> OrderSummary:
        """A copy of the engine's first refusals, with the window the input went through (if any)."""
        return cls({reason: replace(r) for reason, r in first.items()},
                   window.reordered if window is not None else 0, window.lateness if window is not None else None)

    def notes(self, refused: Mapping[str, int]) -> list[str]:
        """Sentences for a person: what was refused (``refused``: vectors per reason), whose, what to do."""
        lines = []
        late, same = self.first.get("out_of_order"), self.first.get("duplicate_ts")
        if late is not None:
            n = refused.get("out_of_order", 0)
            lines.append(f"warning: {_vectors(n)} older than {_their(n)} entity's last accepted time {_were(n)} "
                         f"refused ({late.entity}: last accepted {rfc3339(late.last_ts)}, then {rfc3339(late.ts)} "
                         f"arrived)")
            if self.lateness is None:
                lines.append("  Send each entity's vectors in time order: run takes them as they come (a topic "
                             "keyed by entity keeps its order).")
            else:
                lines.append(f"  Is the input sorted by time? Sort it, or raise source.allowed_lateness_seconds: up "
                             f"to {self.lateness:g} s of disorder per entity is put back in order; the furthest "
                             f"refused lay {_seconds(late.largest_gap)} behind its entity's last accepted time.")
        if same is not None:
            n = refused.get("duplicate_ts", 0)
            lines.append(f"warning: {_vectors(n)} repeated {_their(n)} entity's last accepted time and {_were(n)} "
                         f"refused as duplicate_ts ({same.entity}: {rfc3339(same.ts)} twice)")
            lines.append("  Is part of the input repeated, or do two sources write the same entity?")
        if self.reordered:
            lines.append(f"{_vectors(self.reordered)} arrived behind {_their(self.reordered)} entity's newest and "
                         f"{_were(self.reordered)} put back in time order (source.allowed_lateness_seconds "
                         f"{self.lateness:g})")
        return lines


def _vectors(n: int) -> str:
    return f"{n:,} vector{'s' if n != 1 else ''}"


def _were(n: int) -> str:
    return "were" if n != 1 else "was"


def _their(n: int) -> str:
    return "their" if n != 1 else "its"


def _seconds(gap: float) -> str:
    return f"{gap:,.0f} s" if math.isfinite(gap) else "an unknown time"


_Held = tuple[float, int, int, Vector, bytes | None]   # (ts, arrival, line, vector, raw): heap order


class TimeOrdered(Iterator[Vector | Rejected]):
    """A replay input's records, each entity's vectors put back in time order within ``lateness``
    seconds (module docstring); rejections pass at once.  As with :class:`.readers.RecordStream`,
    ``line`` and ``raw`` belong to the record returned last, and ``close()`` releases the file."""

    def __init__(self, records: RecordStream, lateness: float) -> None:
        if not lateness >= 0:
            raise ValueError(f"lateness must be >= 0 seconds, got {lateness!r}")
        self.records = records
        self.path = records.path
        self.lateness = lateness
        self.line = 0
        self.raw: bytes | None = None
        self.reordered = 0   # vectors that arrived behind their entity's newest, within the window
        self._newest: dict[str, float] = {}
        self._held: dict[str, list[_Held]] = {}
        self._out: deque[tuple[int, Vector | Rejected, bytes | None]] = deque()
        self._arrivals = 0
        self._ended = False

    @property
    def bytes_read(self) -> int:
        """Progress: bytes of the file consumed so far (see :attr:`.readers.RecordStream.bytes_read`)."""
        return self.records.bytes_read

    @property
    def held(self) -> int:
        """Vectors held now: per entity, at most those within the window of its newest."""
        return sum(map(len, self._held.values()))

    def __iter__(self) -> TimeOrdered:
        return self

    def __next__(self) -> Vector | Rejected:
        while not self._out:
            if self._ended:
                raise StopIteration
            try:
                record = next(self.records)
            except StopIteration:
                self._ended = True
                self._release_all()
                continue
            if isinstance(record, Rejected):
                self._out.append((self.records.line, record, self.records.raw))
            else:
                self._add(record, self.records.line, self.records.raw)
        self.line, record, self.raw = self._out.popleft()
        return record

    def _add(self, vector: Vector, line: int, raw: bytes | None) -> None:
        entity, ts = vector.entity, vector.ts
        newest = self._newest.get(entity, -math.inf)
        if ts > newest:
            self._newest[entity] = newest = ts
        edge = newest - self.lateness
        held = self._held.get(entity)
        if held is not None:
            while held and held[0][0] < edge:   # nothing within the window can still come before these
                _, _, number, earlier, bytes_ = heapq.heappop(held)
                self._out.append((number, earlier, bytes_))
            if not held:
                del self._held[entity]
                held = None
        if ts < edge:   # beyond the window: on at once, the engine takes it or refuses it
            self._out.append((line, vector, raw))
            return
        if ts < newest:
            self.reordered += 1
        if held is None:
            held = self._held[entity] = []
        heapq.heappush(held, (ts, self._arrivals, line, vector, raw))
        self._arrivals += 1

    def _release_all(self) -> None:
        """End of input: every vector still held, in time order (then input order)."""
        for _, _, line, vector, raw in sorted(item for held in self._held.values() for item in held):
            self._out.append((line, vector, raw))
        self._held.clear()

    def close(self) -> None:
        """Release the file and what is held; idempotent."""
        self.records.close()
        self._held.clear()
        self._out.clear()
        self._ended = True

    def __enter__(self) -> TimeOrdered:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
