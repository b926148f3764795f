"""Replay inputs: stream `Vector`s and `Rejected` lines from .jsonl, .jsonl.gz, .csv or .csv.gz files,
and from a Prometheus range-query response in .json or .json.gz (see promql.py; read whole, at most
`max_file_bytes` after decompression).

The format is chosen by suffix (case-insensitive). Reading is streaming and in
constant memory: lines are split from fixed-size chunks and a line longer than
`limits.max_bytes` is skipped (rejected as "too_large") without being held.

Whole-input problems raise `InputError` from `open_records` itself, before any
record: missing or unreadable file, unknown suffix, a file that is not gzip,
a CSV without a usable header. Everything after that is per line: a line that
cannot be decoded becomes a `Rejected` (1-based line number, reason slug,
sentence, original bytes) and reading goes on. Blank (whitespace-only) lines are
skipped silently, so for JSONL: non-blank lines == vectors + rejected; for CSV
the header line is the one non-blank line that yields neither.

A stream that breaks after the start (a gzip file cut short, corrupt
compressed data, an I/O error) ends the iteration with one last `Rejected`
whose reason is "truncated_input", "corrupt_input" or "read_error", whose line
is the line being read when it broke and whose raw is the partial line: every
complete line before it has been yielded, nothing is dropped silently.

CSV is "wide": a header with `ts`, `entity` (any position) and one column per
metric. Rows are single physical lines (quoted fields may hold commas, not
newlines). An empty cell is missing; a numeric cell becomes a float; any other
cell (also "null", "NA") goes to `vector_from_object` as text and is reported
there as an invalid value treated as missing, exactly like a string in JSON.
"""

from __future__ import annotations

import base64
import csv
import gzip
import os
import stat
import zlib
from dataclasses import dataclass
from types import TracebackType
from collections.abc import Iterator, Sequence
from typing import IO, Any, BinaryIO, Callable

import orjson

from .decode import DEFAULT_LIMITS, DecodeError, DecodeLimits, Vector, check_size, decode_vector, vector_from_object

__all__ = [
    "DEFAULT_RAW_CAP",
    "REASONS",
    "DeadLetterWriter",
    "InputError",
    "RecordStream",
    "Rejected",
    "input_size",
    "open_records",
]

#: Reasons a line is rejected by the readers, in addition to decode.REASONS.
REASONS = frozenset({"bad_encoding", "bad_csv_row", "truncated_input", "corrupt_input", "read_error"})

DEFAULT_RAW_CAP = 64 * 1024  # bytes of a rejected line kept for dead letters
_CHUNK = 64 * 1024
_BOM = b"\xef\xbb\xbf"
_SUFFIXES = {".jsonl": ("jsonl", False), ".jsonl.gz": ("jsonl", True),
             ".csv": ("csv", False), ".csv.gz": ("csv", True),
             ".json": ("promql", False), ".json.gz": ("promql", True)}
DEFAULT_MAX_FILE_BYTES = 64 << 20  # config input.max_file_bytes: a whole-document input (.json)


@dataclass(frozen=True, slots=True)
class Rejected:
    """A line that gave no vector: where, why, and its original bytes (capped; see `truncated`)."""

    line: int
    reason: str
    detail: str
    raw: bytes
    truncated: bool = False  # raw holds only the first raw_cap bytes of the line


class InputError(Exception):
    """The input as a whole is unusable; str() is one line naming the file."""


def input_size(path: str | os.PathLike[str]) -> int | None:
    """Bytes on disk (compressed size for .gz), for a progress bar; None if unknown."""
    try:
        info = os.stat(path)
    except OSError:
        return None
    return info.st_size if stat.S_ISREG(info.st_mode) else None


class RecordStream(Iterator[Vector | Rejected]):
    """Iterator of an input's records in file order, with progress (`bytes_read`), `line` and `close()`."""

    def __init__(self, path: str, file: BinaryIO, stream: IO[bytes],
                 records: Iterator[tuple[int, Vector | Rejected]]) -> None:
        self.path = path
        self.line = 0              # line number of the record returned last
        self._file = file          # the file on disk: its position is the progress
        self._stream = stream      # same object, or the gzip reader on top of it
        self._records = records
        self._bytes_read = 0

    @property
    def bytes_read(self) -> int:
        """Bytes of the file on disk consumed so far (compressed bytes for .gz; read-ahead included)."""
        if not self._file.closed:
            try:
                self._bytes_read = self._file.tell()
            except OSError:  # a broken file keeps its last known position
                pass
        return self._bytes_read

    def __iter__(self) -> RecordStream:
        return self

    def __next__(self) -> Vector | Rejected:
        try:
            self.line, record = next(self._records)
        except StopIteration:
            self.close()
            raise
        return record

    def close(self) -> None:
        """Release the file; idempotent. Called automatically at the end of the input."""
        self._bytes_read = self.bytes_read
        self._records.close()
        self._stream.close()
        self._file.close()

    def __enter__(self) -> RecordStream:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def open_records(path: str | os.PathLike[str], limits: DecodeLimits = DEFAULT_LIMITS, *,
                 raw_cap: int = DEFAULT_RAW_CAP, entity_labels: Sequence[str] = ("service", "instance"),
                 max_file_bytes: int = DEFAULT_MAX_FILE_BYTES) -> RecordStream:
    """Open a replay input; raises InputError if it is unusable as a whole (see module doc).

    `raw_cap` bounds the bytes of each rejected line kept in `Rejected.raw`; `entity_labels` and
    `max_file_bytes` apply to .json range-query responses (config source.entity_labels and
    input.max_file_bytes).
    """
    if raw_cap < 0:
        raise ValueError(f"raw_cap must be >= 0, got {raw_cap}")
    name = os.fspath(path)
    kind, compressed = _format(name)
    try:
        file: BinaryIO = open(name, "rb")
    except OSError as exc:
        raise InputError(f"{name}: cannot open: {exc.strerror or exc}") from None
    stream: IO[bytes] = gzip.GzipFile(fileobj=file, mode="rb") if compressed else file
    try:
        try:
            first = stream.read1(_CHUNK)  # fail early on a file that is not gzip or cannot be read
        except (OSError, EOFError, zlib.error) as exc:
            what = "not a readable gzip file" if compressed else "cannot read"
            raise InputError(f"{name}: {what}: {_one_line(exc)}") from None
        if kind == "promql":
            from .promql import query_range_records  # noqa: PLC0415  (promql.py imports this module)
            records = query_range_records(name, _whole(name, stream, first, max_file_bytes), limits,
                                          entity_labels=entity_labels, raw_cap=raw_cap)
        else:
            lines = _lines(stream, first, limits, raw_cap)
            records = _csv_records(name, lines, limits, raw_cap) if kind == "csv" else \
                _jsonl_records(lines, limits, raw_cap)
    except BaseException:
        stream.close()
        file.close()
        raise
    return RecordStream(name, file, stream, records)


def _format(name: str) -> tuple[str, bool]:
    lower = name.lower()
    for suffix, fmt in _SUFFIXES.items():
        if lower.endswith(suffix):
            return fmt
    raise InputError(f"{name}: unknown input format; expected a .jsonl, .jsonl.gz, .csv, .csv.gz, .json or "
                     f".json.gz file")


def _whole(name: str, stream: IO[bytes], first: bytes, max_file_bytes: int) -> bytes:
    """The rest of a whole-document input after `first`, at most `max_file_bytes`; InputError otherwise."""
    try:
        data = first + stream.read(max_file_bytes + 1 - len(first)) if len(first) <= max_file_bytes else first
    except (OSError, EOFError, zlib.error) as exc:
        raise InputError(f"{name}: cannot read: {_one_line(exc)}") from None
    if len(data) > max_file_bytes:
        raise InputError(f"{name}: more than {max_file_bytes:,} bytes (input.max_file_bytes); a .json input "
                         f"is read whole: export a shorter window or raise the limit")
    return data


def _lines(stream: IO[bytes], first: bytes, limits: DecodeLimits, raw_cap: int) -> Iterator[tuple[int, bytes] | Rejected]:
    """Non-blank physical lines as (1-based number, bytes without CR/LF), in constant memory.

    Over-long lines come out as Rejected("too_large"); a stream that breaks ends with one Rejected.
    """
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
                # An over-long line of whitespace only is blank like any other (skipped silently,
                # as LineSource in service.py does), so "non-blank lines == vectors + rejected" holds.
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
            chunk = stream.read1(_CHUNK)
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
        return _rejected(number, exc.reason, str(exc), head, raw_cap, truncated=len(head) < size)
    raise AssertionError("_too_large called for a line within the limit")


def _broken(number: int, exc: BaseException, partial: bytes, raw_cap: int) -> Rejected:
    if isinstance(exc, EOFError):
        reason, what = "truncated_input", "the compressed input ends early"
    elif isinstance(exc, (zlib.error, gzip.BadGzipFile)):
        reason, what = "corrupt_input", "the compressed input is corrupt"
    else:
        reason, what = "read_error", "reading the input failed"
    return _rejected(number, reason, f"{what} at line {number} ({_one_line(exc)}); "
                                     f"all lines before it were read", partial, raw_cap)


def _rejected(number: int, reason: str, detail: str, raw: bytes, raw_cap: int, truncated: bool = False) -> Rejected:
    if len(raw) > raw_cap:
        raw, truncated = raw[:raw_cap], True
    return Rejected(number, reason, detail, bytes(raw), truncated)


def _payload(number: int, line: bytes) -> bytes:
    """The line without a UTF-8 byte order mark at the start of the file."""
    return line[len(_BOM):] if number == 1 and line.startswith(_BOM) else line


def _decoded(lines: Iterator[tuple[int, bytes] | Rejected], parse: Callable[[int, bytes], Vector],
             raw_cap: int) -> Iterator[tuple[int, Vector | Rejected]]:
    """Parse every line; a DecodeError becomes a Rejected record, reader rejections pass through."""
    for item in lines:
        if isinstance(item, Rejected):
            yield item.line, item
            continue
        number, line = item
        try:
            yield number, parse(number, line)
        except DecodeError as exc:
            yield number, _rejected(number, exc.reason, str(exc), line, raw_cap)


def _jsonl_records(lines: Iterator[tuple[int, bytes] | Rejected], limits: DecodeLimits,
                   raw_cap: int) -> Iterator[tuple[int, Vector | Rejected]]:
    return _decoded(lines, lambda number, line: decode_vector(_payload(number, line), limits), raw_cap)


@dataclass(frozen=True, slots=True)
class _Header:
    width: int
    ts: int
    entity: int
    metrics: tuple[tuple[int, str], ...]  # (column index, metric name)


def _csv_records(name: str, lines: Iterator[tuple[int, bytes] | Rejected], limits: DecodeLimits,
                 raw_cap: int) -> Iterator[tuple[int, Vector | Rejected]]:
    """Reads the header now (InputError if unusable) and returns the generator of the rows."""
    header = _csv_header(name, next(lines, None), limits)
    return _decoded(lines, lambda number, line: vector_from_object(_csv_object(line, header), limits), raw_cap)


def _csv_header(name: str, item: tuple[int, bytes] | Rejected | None, limits: DecodeLimits) -> _Header:
    if item is None:
        raise InputError(f"{name}: empty CSV file; expected a header line with ts, entity and metric columns")
    if isinstance(item, Rejected):
        raise InputError(f"{name}: cannot read the CSV header: {item.detail}")
    number, line = item
    try:
        columns = _csv_fields(_payload(number, line))
    except DecodeError as exc:
        raise InputError(f"{name}: line {number}: bad CSV header: {exc}") from None
    positions: dict[str, int] = {}
    for index, column in enumerate(columns):
        if not column:
            raise InputError(f"{name}: line {number}: CSV header column {index + 1} has no name")
        if column in positions:
            raise InputError(f"{name}: line {number}: CSV header repeats column {column!r}")
        positions[column] = index
    missing = [c for c in ("ts", "entity") if c not in positions]
    if missing:
        raise InputError(f"{name}: line {number}: CSV header has no {' or '.join(missing)} column "
                         f"(expected ts, entity, then one column per metric)")
    metrics = tuple((i, c) for c, i in positions.items() if c not in ("ts", "entity"))
    if len(metrics) > limits.max_metrics:
        raise InputError(f"{name}: line {number}: CSV header has {len(metrics):,} metric columns, "
                         f"over the limit of {limits.max_metrics:,} (max_metrics)")
    return _Header(len(columns), positions["ts"], positions["entity"], metrics)


def _csv_fields(line: bytes) -> list[str]:
    """One CSV record from one physical line; DecodeError for bad UTF-8 or bad quoting."""
    try:
        text = line.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise DecodeError("bad_encoding", f"line is not valid UTF-8 ({exc.reason} at byte {exc.start})") from None
    try:
        return next(csv.reader([text], skipinitialspace=True, strict=True), [])
    except csv.Error as exc:
        raise DecodeError("bad_csv_row", f"bad CSV quoting: {exc}") from None


def _csv_object(line: bytes, header: _Header) -> dict[str, Any]:
    """A CSV row as the message object that vector_from_object validates (no checks of its own)."""
    cells = _csv_fields(line)
    if len(cells) != header.width:
        raise DecodeError("bad_csv_row", f"row has {len(cells)} fields, the header has {header.width}")
    return {"ts": _cell(cells[header.ts]), "entity": cells[header.entity],
            "metrics": {name: _cell(cells[i]) for i, name in header.metrics}}


def _cell(text: str) -> float | str | None:
    """Empty -> None (missing); numeric text -> float; anything else stays text for the validator."""
    if not text:
        return None
    try:
        return float(text)
    except ValueError:
        return text


class DeadLetterWriter:
    """Writes rejected lines as JSON lines, one object each, to replay or inspect later.

    {"line": N, "reason": slug, "detail": sentence, "raw": text, "raw_encoding": "utf-8" | "base64",
     "truncated": bool, "source": input path}. `raw` is the original line as text when it is valid
    UTF-8, else base64 of its bytes (see raw_encoding); with truncated false it is the whole line.
    `source` is given once here or per write (which wins); null if neither.
    The file is created (truncated) on open; OSError if it cannot be.
    """

    def __init__(self, path: str | os.PathLike[str], source: str | os.PathLike[str] | None = None) -> None:
        self.source = source
        self.count = 0
        self._file = open(path, "wb")

    def write(self, rejected: Rejected, source: str | os.PathLike[str] | None = None) -> None:
        source = source if source is not None else self.source
        try:
            raw, encoding = rejected.raw.decode("utf-8"), "utf-8"
        except UnicodeDecodeError:
            raw, encoding = base64.b64encode(rejected.raw).decode("ascii"), "base64"
        self._file.write(orjson.dumps({
            "line": rejected.line, "reason": rejected.reason, "detail": rejected.detail, "raw": raw,
            "raw_encoding": encoding, "truncated": rejected.truncated,
            # an undecodable file name (surrogate-escaped by the OS layer) must not break the JSON
            "source": None if source is None else os.fsencode(source).decode("utf-8", "backslashreplace"),
        }, option=orjson.OPT_APPEND_NEWLINE))
        self.count += 1

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> DeadLetterWriter:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__
