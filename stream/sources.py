"""Sources of messages for ``shiftsieve run``: a file or stdin (`LineSource`) and a Kafka consumer
group (`KafkaInput`), behind one small interface (`Source`).

A source hands out what it read as `Message`s (position, original bytes, partition), or as
`Rejected` when a line could not even be read as a message (over the size limit, a broken
stream); decoding is the pipeline's job (:mod:`.pipeline`), in the configured encoding.
"""

from __future__ import annotations

import os
import queue
import sys
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Protocol

from .decode import DEFAULT_LIMITS, DecodeLimits
from .lines import CHUNK_BYTES, Rejected, split_lines, strip_bom

if TYPE_CHECKING:
    from .kafka import KafkaSettings


@dataclass(frozen=True, slots=True)
class Message:
    """One message as the source read it: its position (line number, Kafka offset), its original
    bytes, and the "topic/partition" it came from ("" for a file or stdin)."""

    position: int
    raw: bytes
    partition: str = ""


class Source(Protocol):
    """What the service polls: messages in order, with the state the poll loop needs."""

    exhausted: bool   # the input has ended (a file, stdin); a topic never does

    def poll(self, timeout: float) -> list[Message | Rejected]: ...

    @property
    def caught_up(self) -> bool: ...

    def positions(self) -> dict[str, int]: ...

    def commit(self, floor: dict[str, int] | None = None) -> None: ...

    def close(self) -> None: ...


class LineSource:
    """Lines of a file or of stdin, split by the one line splitter (:func:`.lines.split_lines`) on a
    background thread, so that polls can time out while the input is quiet."""

    exhausted = False

    def __init__(self, url: str, max_batch: int = 5000, limits: DecodeLimits = DEFAULT_LIMITS) -> None:
        self.url = url
        self.max_batch = max_batch
        self.limits = limits
        self._queue: queue.Queue[Message | Rejected | None] = queue.Queue(maxsize=4 * max_batch)
        # A raw descriptor, not sys.stdin: a daemon thread blocked inside a buffered reader would
        # hold its lock and abort the interpreter at shutdown (after SIGTERM).
        fd = os.dup(sys.stdin.fileno()) if url == "-" else os.open(Path(url), os.O_RDONLY)
        self._thread = threading.Thread(target=self._read, args=(fd,), name="shiftsieve-source", daemon=True)
        self._thread.start()

    def _read(self, fd: int) -> None:
        try:
            for item in split_lines(lambda: os.read(fd, CHUNK_BYTES), None, self.limits):
                if not isinstance(item, Rejected):
                    number, line = item
                    item = Message(number, strip_bom(number, line))
                self._queue.put(item)   # blocks when the detector falls behind
        finally:
            os.close(fd)
            self._queue.put(None)

    @property
    def caught_up(self) -> bool:
        """Nothing more is waiting to be read right now."""
        return self._queue.empty()

    def poll(self, timeout: float) -> list[Message | Rejected]:
        """Up to ``max_batch`` messages; waits at most ``timeout`` s for the first."""
        out: list[Message | Rejected] = []
        try:
            item = self._queue.get(timeout=timeout)
            while True:
                if item is None:
                    self.exhausted = True
                    break
                out.append(item)
                if len(out) >= self.max_batch:
                    break
                item = self._queue.get_nowait()
        except queue.Empty:
            pass
        return out

    def positions(self) -> dict[str, int]:
        """A file has no partitions to resume from: snapshots cover no offsets."""
        return {}

    def commit(self, floor: dict[str, int] | None = None) -> None:
        """Nothing to commit for a file or stdin."""

    def close(self) -> None:
        """The reading thread ends with its input (it is a daemon: it never holds the process)."""


class KafkaInput:
    """A consumer-group source: records as (offset, value, "topic/partition"); offsets are committed
    by the service only after the poll's effects are done (at-least-once: a crash replays
    uncommitted records).  ``on_revoke`` / ``on_lost`` / ``on_assign`` get "topic/partition" names."""

    exhausted = False   # a topic does not end

    def __init__(self, settings: "KafkaSettings", on_revoke=None, on_lost=None, on_assign=None) -> None:
        from .kafka import KafkaSource
        self._hooks = {"revoke": on_revoke, "lost": on_lost, "assign": on_assign}
        self.source = KafkaSource(settings, on_assign=self._assigned, on_revoke=self._revoked,
                                  on_lost=self._lost)
        self._next: dict[tuple[str, int], int] = {}
        self._committed: dict[tuple[str, int], int] = {}
        self.timestamps_ms: list[int] = []   # Kafka timestamps of the last poll's records
        self.behind: dict[tuple[str, int], int] = {}   # lag per partition after the last poll

    def _call(self, hook: str, parts: list[tuple[str, int]]) -> None:
        if self._hooks[hook] is not None:
            self._hooks[hook]([f"{t}/{p}" for t, p in parts])

    def _revoked(self, parts: list[tuple[str, int]]) -> None:
        self._call("revoke", parts)   # the service snapshots and commits before the partitions move
        self._forget(parts)

    def _lost(self, parts: list[tuple[str, int]]) -> None:
        self._call("lost", parts)
        self._forget(parts)

    def _assigned(self, parts: list[tuple[str, int]]) -> None:
        self._call("assign", parts)

    def _forget(self, parts: list[tuple[str, int]]) -> None:
        for tp in parts:
            self._next.pop(tp, None)
            self._committed.pop(tp, None)

    def poll(self, timeout: float) -> list[Message | Rejected]:
        records = self.source.poll(timeout)
        for r in records:
            self._next[(r.topic, r.partition)] = r.offset + 1
        self.timestamps_ms = [r.timestamp_ms for r in records]
        self.behind = self.source.lag()   # once per poll: caught_up and the lag gauge both read it
        return [Message(r.offset, r.value, f"{r.topic}/{r.partition}") for r in records]

    @property
    def caught_up(self) -> bool:
        """No assigned partition has records beyond what was polled (as of the last fetch)."""
        return not any(self.behind.values())

    def positions(self) -> dict[str, int]:
        """Next offset per partition consumed so far."""
        return {f"{t}/{p}": o for (t, p), o in {**self._committed, **self._next}.items()}

    @property
    def ready(self) -> bool:
        return bool(self.source.connected and self.source.assignment())

    def commit(self, floor: dict[str, int] | None = None) -> None:
        """Commit what was consumed, but never past ``floor`` ("topic/partition" -> offset: the
        oldest message whose data is still held outside the models)."""
        target = {}
        for (t, p), offset in self._next.items():
            limit = floor.get(f"{t}/{p}") if floor else None
            offset = offset if limit is None else min(offset, limit)
            if self._committed.get((t, p)) != offset:
                target[(t, p)] = offset
        if target and self.source.commit(target):
            self._committed.update(target)

    def close(self) -> None:
        self.source.close()
