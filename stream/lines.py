"""Lines of an input and what becomes of those that give nothing: the lowest layer of every source.

One line splitter serves every line-oriented source (replay files, ``run`` from a file or stdin),
so they agree on what a line is: physical lines split at LF with a trailing CR removed, blank
(whitespace-only) lines skipped silently whatever their length, a line longer than the message
limit rejected as "too_large" without being held (its head is kept for the dead letter), and a
stream that breaks ends with one last rejection.  Every non-blank line therefore comes out
exactly once, as a line or as a `Rejected`: "non-blank lines == vectors + rejected" holds for
every command.
"""

from __future__ import annotations

import gzip
import zlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass

from .decode import DecodeError, DecodeLimits, check_size

__all__ = ["BOM", "CHUNK_BYTES", "DEFAULT_RAW_CAP", "InputError", "Rejected", "one_line", "rejected",
           "split_lines", "strip_bom"]

DEFAULT_RAW_CAP = 64 * 1024   # bytes of a rejected line kept for dead letters
CHUNK_BYTES = 64 * 1024       # bytes read at a time
BOM = b"\xef\xbb\xbf"         # a UTF-8 byte order mark, tolerated at the start of an input


@dataclass(frozen=True, slots=True)
class Rejected:
    """A line or message that gave no vector: where, why, and its original bytes (capped; see `truncated`).

    With ``kept`` it is a dead letter of a message whose vector was used all the same, with some
    entries treated as missing (reason "invalid_values"): written where rejections go, so the
    producer's mistake can be seen, but counted apart from them.
    """

    line: int
    reason: str
    detail: str
    raw: bytes
    truncated: bool = False  # raw holds only the first raw_cap bytes of the line
    kept: bool = False       # its vector was used (not a rejection)


class InputError(Exception):
    """The input as a whole is unusable; str() is one line naming the file."""


def rejected(number: int, reason: str, detail: str, raw: bytes, raw_cap: int = DEFAULT_RAW_CAP,
             truncated: bool = False) -> Rejected:
    """A `Rejected` whose raw bytes are capped at ``raw_cap``."""
    if len(raw) > raw_cap:
        raw, truncated = raw[:raw_cap], True
    return Rejected(number, reason, detail, bytes(raw), truncated)


def strip_bom(number: int, line: bytes) -> bytes:
    """The line without a UTF-8 byte order mark at the start of the input (line 1)."""
    return line[len(BOM):] if number == 1 and line.startswith(BOM) else line


def one_line(exc: BaseException) -> str:
    """An exception as one line of text, for messages to a person."""
    return " ".join(str(exc).split()) or type(exc).__name__


def split_lines(read: Callable[[], bytes], first: bytes | None, limits: DecodeLimits,
                raw_cap: int = DEFAULT_RAW_CAP) -> Iterator[tuple[int, bytes] | Rejected]:
    """Non-blank physical lines as (1-based number, bytes without CR/LF), in constant memory.

    ``read()`` returns the next chunk (``b""`` at the end); ``first`` is the chunk already read
    (None: read it here).  Over-long lines come out as Rejected("too_large"); a stream that
    breaks (OSError, EOFError, zlib.error from ``read``) ends with one Rejected naming the line
    being read.
    """
    if first is None:
        try:
            first = read()
        except (OSError, EOFError, zlib.error) as exc:
            yield _broken(1, exc, b"", raw_cap)
            return
    limit = limits.max_bytes + 1   # room for a CR before the LF
    number = 0
    pending = b""                  # start of the current line (only its head while skipping)
    skipped = 0                    # > 0: length so far of an over-long line being skipped
    blank = True                   # while skipping: no byte of the line so far is non-whitespace
    chunk = first
    while chunk:
        start = 0
        while (end := chunk.find(b"\n", start)) >= 0:
            number += 1
            if skipped:
                # An over-long line of whitespace only is blank like any other (skipped silently).
                item = None if blank and _blank(chunk[start:end]) else \
                    _too_large(number, skipped + end - start, pending, raw_cap, limits)
            else:
                item = _line(number, pending + chunk[start:end] if pending else chunk[start:end], limits, raw_cap)
            if item is not None:
                yield item
            skipped, pending, blank = 0, b"", True
            start = end + 1
        if skipped:
            skipped += len(chunk) - start
            blank = blank and _blank(chunk[start:])
        else:
            pending += chunk[start:]
            if len(pending) > limit:
                skipped, blank, pending = len(pending), _blank(pending), pending[:raw_cap]
        try:
            chunk = read()
        except (OSError, EOFError, zlib.error) as exc:
            yield _broken(number + 1, exc, pending, raw_cap)
            return
    if skipped:
        item = None if blank else _too_large(number + 1, skipped, pending, raw_cap, limits)
    else:
        item = _line(number + 1, pending, limits, raw_cap)
    if item is not None:
        yield item


def _blank(data: bytes) -> bool:
    """Empty or ASCII whitespace only (bytes.isspace, the same test as for a short line)."""
    return not data or data.isspace()


def _line(number: int, line: bytes, limits: DecodeLimits, raw_cap: int) -> tuple[int, bytes] | Rejected | None:
    """A complete line: None if blank (whatever its length), Rejected if over the size limit."""
    line = line.removesuffix(b"\r")
    if _blank(line):  # before the size check: a long run of whitespace is still a blank line
        return None
    if len(line) > limits.max_bytes:
        return _too_large(number, len(line), line, raw_cap, limits)
    return number, line


def _too_large(number: int, size: int, head: bytes, raw_cap: int, limits: DecodeLimits) -> Rejected:
    try:
        check_size(size, limits)
    except DecodeError as exc:
        return rejected(number, exc.reason, str(exc), head, raw_cap, truncated=len(head) < size)
    raise AssertionError("_too_large called for a line within the limit")


def _broken(number: int, exc: BaseException, partial: bytes, raw_cap: int) -> Rejected:
    if isinstance(exc, EOFError):
        reason, what = "truncated_input", "the compressed input ends early"
    elif isinstance(exc, (zlib.error, gzip.BadGzipFile)):
        reason, what = "corrupt_input", "the compressed input is corrupt"
    else:
        reason, what = "read_error", "reading the input failed"
    return rejected(number, reason, f"{what} at line {number} ({one_line(exc)}); "
                                    f"all lines before it were read", partial, raw_cap)
