"""``shiftsieve run``: the long-running detector.

    source (stdin, a file) -> decode -> engine (assemble -> model -> decide) -> sinks
                                                      \\-> exporter (/metrics, /healthz, /readyz)

Each poll's messages are decoded and fed to the engine, which then flushes: every
entity's batch is whatever arrived in that poll.  Bad messages never stop the
service: they are counted and dead-lettered.  SIGTERM (or SIGINT) ends the current
poll, flushes, closes the sinks and returns exit status 0.  A file or stdin source
ends the service at its end.
"""

from __future__ import annotations

import os
import queue
import signal
import sys
import threading
import time
from contextlib import ExitStack
from pathlib import Path

from .config import Config
from .decode import DecodeError, decode_vector, encode_vector
from .endpoints import Endpoints
from .engine import Engine
from .events import EventFileWriter
from .exporter import Exporter
from .readers import DeadLetterWriter, Rejected
from .replay import decode_limits


class LineSource:
    """Lines of a file or of stdin, read by a background thread so polls can time out."""

    def __init__(self, url: str, max_batch: int = 5000, max_line: int = 1 << 20) -> None:
        self.url = url
        self.max_batch = max_batch
        self.max_line = max_line
        self._queue: queue.Queue[tuple[int, bytes] | None] = queue.Queue(maxsize=4 * max_batch)
        self.exhausted = False
        # A raw descriptor, not sys.stdin: a daemon thread blocked inside a buffered reader would
        # hold its lock and abort the interpreter at shutdown (after SIGTERM).
        fd = os.dup(sys.stdin.fileno()) if url == "-" else os.open(Path(url), os.O_RDONLY)
        self._thread = threading.Thread(target=self._read, args=(fd,), name="shiftsieve-source", daemon=True)
        self._thread.start()

    def _read(self, fd: int) -> None:
        number, pending = 0, b""
        try:
            while chunk := os.read(fd, 1 << 16):
                *lines, pending = (pending + chunk).split(b"\n")
                for line in lines:
                    number += 1
                    line = line.rstrip(b"\r")
                    if line.strip():
                        self._queue.put((number, line))   # blocks when the detector falls behind
                if len(pending) > self.max_line:   # keep a line's head only: the decoder rejects it as too large
                    pending = pending[: self.max_line + 1]
            if pending.strip():
                self._queue.put((number + 1, pending.rstrip(b"\r")))
        finally:
            os.close(fd)
            self._queue.put(None)

    def poll(self, timeout: float) -> list[tuple[int, bytes]]:
        """Up to ``max_batch`` lines; waits at most ``timeout`` seconds for the first one."""
        out: list[tuple[int, bytes]] = []
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


class Service:
    """Wires source, engine, sinks, exporter and endpoints; :meth:`run` until stopped."""

    def __init__(self, config: Config, *, source_url: str, events_path: str | None = None,
                 dead_letter_path: str | None = None, listen: str | None = None) -> None:
        self.config = config
        self.source_url = source_url
        self.events_path = events_path
        self.dead_letter_path = dead_letter_path
        self.listen = listen or config.http.listen
        self.exporter = Exporter(max_series=config.http.max_series)
        self.limits = decode_limits(config)
        self.stopping = threading.Event()
        self.ready = False
        self.endpoints: Endpoints | None = None

    def stop(self, *_: object) -> None:
        self.stopping.set()

    def run(self) -> int:
        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGTERM, self.stop)
            signal.signal(signal.SIGINT, self.stop)
        with ExitStack() as stack:
            sinks = []
            if self.events_path:
                sinks.append(stack.enter_context(EventFileWriter(self.events_path)))
            dead = stack.enter_context(DeadLetterWriter(self.dead_letter_path, source=self.source_url)) \
                if self.dead_letter_path else None
            emitted: list[dict] = []
            engine = Engine.from_config(self.config, sinks=[*sinks, emitted.append])
            source = LineSource(self.source_url, max_line=self.limits.max_bytes)
            self.endpoints = Endpoints(self.listen, self.exporter.exposition, lambda: self.ready).start()
            stack.callback(self.endpoints.stop)
            self.ready = True
            poll = self.config.http.poll_seconds
            while not self.stopping.is_set():
                lines = source.poll(poll)
                if lines:
                    started = time.perf_counter()
                    for number, line in lines:
                        self._consume(engine, number, line, dead)
                    engine.flush()
                    self.exporter.observe_events(emitted)
                    emitted.clear()
                    self.exporter.refresh(engine, sorted(engine.touched))
                    engine.touched.clear()
                    self.exporter.batch_seconds.observe(time.perf_counter() - started)
                if source.exhausted:
                    break
            self.ready = False
            engine.flush()
            self.exporter.observe_events(emitted)
        return 0

    def _consume(self, engine: Engine, number: int, line: bytes, dead: DeadLetterWriter | None) -> None:
        self.exporter.consumed.inc()
        try:
            vector = decode_vector(line, self.limits)
        except DecodeError as exc:
            self._dead_letter(dead, number, line, exc.reason, str(exc))
            return
        self.exporter.decoded.inc()
        refused = engine.feed(vector)
        if refused is not None:
            self._dead_letter(dead, number, encode_vector(vector), refused,
                              f"vector of {vector.entity!r} at ts {vector.ts} refused: {refused}")

    def _dead_letter(self, dead: DeadLetterWriter | None, number: int, raw: bytes, reason: str,
                     detail: str) -> None:
        self.exporter.dead.labels(reason).inc()
        if dead is not None:
            dead.write(Rejected(line=number, reason=reason, detail=detail, raw=raw))
