"""What the report is doing after the replay, on stderr: the comparison of methods, the tuning and
the figures take seconds to minutes, and a silent terminal looks like a hung one.

Each step writes a line when it starts and one when it ends (with its time); a step that loops
shows the replay's progress bar (:class:`..replay.Progress`) on a terminal and a line per item
elsewhere (a log keeps plain lines).  With progress off (``--quiet``) nothing is written.

>>> import io
>>> out = io.StringIO()
>>> with Steps(stream=out).step("drawing", total=2) as step:
...     step.item("a", vectors=10); step.item("b", vectors=20)
>>> print(out.getvalue(), end="")  # doctest: +ELLIPSIS
shiftsieve: drawing ...
shiftsieve:   a (1 of 2)
shiftsieve:   b (2 of 2)
shiftsieve: drawing: done in 0... s
"""

from __future__ import annotations

import sys
import time
from contextlib import contextmanager
from typing import Iterator, TextIO

from ..replay import Progress

PREFIX = "shiftsieve: "


class Step:
    """One running step: :meth:`item` says which of its ``total`` items starts."""

    def __init__(self, stream: TextIO | None, total: int) -> None:
        self.stream = stream
        self.total = total
        self.done = 0
        self.bar = Progress(total if stream is not None else None, stream or sys.stderr)

    def item(self, what: str, vectors: int = 0) -> None:
        """Item ``what`` starts; ``vectors`` is the work done so far, in vectors, for the bar."""
        if self.bar.enabled:
            self.bar.update(self.done, vectors)
        elif self.stream is not None:
            self.stream.write(f"{PREFIX}  {what} ({self.done + 1} of {self.total})\n")
            self.stream.flush()
        self.done += 1


class Steps:
    """The steps of a report; silent when ``enabled`` is False.  ``stream`` defaults to the
    ``sys.stderr`` of the moment (so that redirecting it catches the lines)."""

    def __init__(self, enabled: bool = True, stream: TextIO | None = None) -> None:
        self.enabled = enabled
        self.stream = stream

    def _out(self) -> TextIO | None:
        return (self.stream or sys.stderr) if self.enabled else None

    @contextmanager
    def step(self, text: str, total: int = 0) -> Iterator[Step]:
        """A step saying ``text`` when it starts and its time when it ends; ``total`` items for a loop."""
        out = self._out()
        started = time.perf_counter()
        if out is not None:
            out.write(f"{PREFIX}{text} ...\n")
            out.flush()
        step = Step(out, total)
        try:
            yield step
        finally:
            step.bar.close()
        if out is not None:   # not after an exception: its message says what happened instead
            out.write(f"{PREFIX}{text}: done in {time.perf_counter() - started:.1f} s\n")
            out.flush()
