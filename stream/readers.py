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
there as an invalid value treated as missing, exactly like a string in JSON ("not_a_number";
CSV has no types, so numeric text is a number and "numeric_string" never applies).
"""

from __future__ import annotations

import base64
import csv
import gzip
import os
import stat
import zlib
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from types import TracebackType
from typing import IO, Any, BinaryIO, Callable

import orjson

from .decode import DEFAULT_LIMITS, DecodeError, DecodeLimits, Vector, decode_vector, vector_from_object
from .lines import (CHUNK_BYTES, DEFAULT_RAW_CAP, InputError, Rejected, one_line, rejected, split_lines,
                    strip_bom)
from .promql import query_range_records

__all__ = [
    "REASONS",
    "DeadLetterWriter",
    "RecordStream",
    "input_size",
    "open_records",
]

#: Reasons a line is rejected by the readers, in addition to decode.REASONS.
REASONS = frozenset({"bad_encoding", "bad_csv_row", "truncated_input", "corrupt_input", "read_error"})

_SUFFIXES = {".jsonl": ("jsonl", False), ".jsonl.gz": ("jsonl", True),
             ".csv": ("csv", False), ".csv.gz": ("csv", True),
             ".json": ("promql", False), ".json.gz": ("promql", True)}
DEFAULT_MAX_FILE_BYTES = 64 << 20  # config input.max_file_bytes: a whole-document input (.json)
#: (line number, record, original line or None)
Numbered = tuple[int, Vector | Rejected, bytes | None]


def input_size(path: str | os.PathLike[str]) -> int | None:
    """Bytes on disk (compressed size for .gz), for a progress bar; None if unknown."""
    try:
        info = os.stat(path)
    except OSError:
        return None
    return info.st_size if stat.S_ISREG(info.st_mode) else None


class RecordStream(Iterator[Vector | Rejected]):
    """Iterator of an input's records in file order, with progress (`bytes_read`), `line`, `raw` and `close()`."""

    def __init__(self, path: str, file: BinaryIO, stream: IO[bytes],
                 records: Iterator[Numbered]) -> None:
        self.path = path
        self.line = 0              # line number of the record returned last
        self.raw: bytes | None = None   # its original line (None: a record of a whole-document input)
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
            self.line, record, self.raw = next(self._records)
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
            first = stream.read1(CHUNK_BYTES)  # fail early on a file that is not gzip or cannot be read
        except (OSError, EOFError, zlib.error) as exc:
            what = "not a readable gzip file" if compressed else "cannot read"
            raise InputError(f"{name}: {what}: {one_line(exc)}") from None
        if kind == "promql":
            document = query_range_records(name, _whole(name, stream, first, max_file_bytes), limits,
                                           entity_labels=entity_labels, raw_cap=raw_cap)
            records = ((number, record, None) for number, record in document)
        else:
            lines = split_lines(lambda: stream.read1(CHUNK_BYTES), first, limits, raw_cap)
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
        raise InputError(f"{name}: cannot read: {one_line(exc)}") from None
    if len(data) > max_file_bytes:
        raise InputError(f"{name}: more than {max_file_bytes:,} bytes (input.max_file_bytes); a .json input "
                         f"is read whole: export a shorter window or raise the limit")
    return data


def _decoded(lines: Iterator[tuple[int, bytes] | Rejected], parse: Callable[[int, bytes], Vector],
             raw_cap: int) -> Iterator[Numbered]:
    """Parse every line; a DecodeError becomes a Rejected record, reader rejections pass through."""
    for item in lines:
        if isinstance(item, Rejected):
            yield item.line, item, item.raw
            continue
        number, line = item
        try:
            yield number, parse(number, line), line
        except DecodeError as exc:
            yield number, rejected(number, exc.reason, str(exc), line, raw_cap), line


def _jsonl_records(lines: Iterator[tuple[int, bytes] | Rejected], limits: DecodeLimits,
                   raw_cap: int) -> Iterator[Numbered]:
    return _decoded(lines, lambda number, line: decode_vector(strip_bom(number, line), limits), raw_cap)


@dataclass(frozen=True, slots=True)
class _Header:
    width: int
    ts: int
    entity: int
    metrics: tuple[tuple[int, str], ...]  # (column index, metric name)


def _csv_records(name: str, lines: Iterator[tuple[int, bytes] | Rejected], limits: DecodeLimits,
                 raw_cap: int) -> Iterator[Numbered]:
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
        columns = _csv_fields(strip_bom(number, line))
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
     "truncated": bool, "kept": bool, "source": input path}. `raw` is the original line as text when it
    is valid UTF-8, else base64 of its bytes (see raw_encoding); with truncated false it is the whole line.
    `kept` is true for a line whose vector was used with invalid values treated as missing (reason
    "invalid_values", the detail names each entry); false for a line that gave nothing.
    `source` is given once here or per write (which wins); null if neither.
    The file is created (truncated) on open; OSError if it cannot be.
    """

    def __init__(self, path: str | os.PathLike[str], source: str | os.PathLike[str] | None = None) -> None:
        self.source = source
        self.count = 0
        self._file = open(path, "wb")

    def write(self, record: Rejected, source: str | os.PathLike[str] | None = None) -> None:
        source = source if source is not None else self.source
        try:
            raw, encoding = record.raw.decode("utf-8"), "utf-8"
        except UnicodeDecodeError:
            raw, encoding = base64.b64encode(record.raw).decode("ascii"), "base64"
        self._file.write(orjson.dumps({
            "line": record.line, "reason": record.reason, "detail": record.detail, "raw": raw,
            "raw_encoding": encoding, "truncated": record.truncated, "kept": record.kept,
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
