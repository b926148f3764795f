"""Tests of shiftsieve.stream.readers: replay inputs, per-line rejection, dead letters."""

from __future__ import annotations

import base64
import gzip
import io
import os
from pathlib import Path

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shiftsieve.stream import decode, readers
from shiftsieve.stream.decode import DecodeLimits, Vector, decode_vector
from shiftsieve.stream.lines import InputError, Rejected
from shiftsieve.stream.readers import DeadLetterWriter, input_size, open_records

TS = 1780000000.0


def jline(entity: str, ts: float = TS, **metrics: object) -> bytes:
    return orjson.dumps({"ts": ts, "entity": entity, "metrics": metrics or {"cpu": 0.5}})


def write(path: Path, data: bytes) -> Path:
    path.write_bytes(gzip.compress(data) if path.name.endswith(".gz") else data)
    return path


def read_all(path: Path, **kwargs: object) -> list[Vector | Rejected]:
    with open_records(path, **kwargs) as records:  # type: ignore[arg-type]
        return list(records)


def split(items: list[Vector | Rejected]) -> tuple[list[Vector], list[Rejected]]:
    return [i for i in items if isinstance(i, Vector)], [i for i in items if isinstance(i, Rejected)]


def non_blank_lines(data: bytes) -> int:
    return sum(1 for line in data.split(b"\n") if line.strip())


MIXED = b"\n".join([
    jline("checkout-1", cpu=0.1),              # 1
    jline("checkout-2", cpu=0.2),              # 2
    b"",                                       # 3 blank
    b"{not json",                              # 4 bad_json
    jline("checkout-1", TS + 10, cpu=0.3),     # 5
    b"   \t",                                  # 6 blank (whitespace)
    orjson.dumps({"ts": TS, "metrics": {"cpu": 1}}),  # 7 no_entity
    jline("checkout-2", TS + 10, cpu="high"),  # 8 vector with an invalid value
    b"\xff\xfe garbage",                       # 9 bad_json, not UTF-8
]) + b"\n"


# --- JSONL and JSONL.gz -------------------------------------------------------------------------------

@pytest.mark.parametrize("name", ["in.jsonl", "in.jsonl.gz", "IN.JSONL"])
def test_jsonl_interleaved_entities_bad_and_blank_lines(tmp_path: Path, name: str) -> None:
    items = read_all(write(tmp_path / name, MIXED))
    vectors, rejected = split(items)
    assert [(v.entity, v.ts) for v in vectors] == [("checkout-1", TS), ("checkout-2", TS),
                                                    ("checkout-1", TS + 10), ("checkout-2", TS + 10)]
    assert vectors[3].metrics == {"cpu": None} and vectors[3].invalid == (("cpu", "not_a_number"),)
    assert [(r.line, r.reason) for r in rejected] == [(4, "bad_json"), (7, "no_entity"), (9, "bad_json")]
    assert [r.raw for r in rejected] == [b"{not json", orjson.dumps({"ts": TS, "metrics": {"cpu": 1}}),
                                         b"\xff\xfe garbage"]
    assert len(vectors) + len(rejected) == non_blank_lines(MIXED)  # conservation


@pytest.mark.parametrize("name, data, header", [("l.jsonl", MIXED, 0), ("l.csv", None, 1)])
def test_stream_line_is_the_line_of_the_last_record(tmp_path: Path, name: str, data: bytes | None, header: int) -> None:
    data = data if data is not None else CSV
    with open_records(write(tmp_path / name, data)) as records:
        lines = [records.line for _ in records]
    non_blank = [i + 1 for i, line in enumerate(data.split(b"\n")) if line.strip()][header:]
    assert lines == non_blank


def test_file_order_is_kept(tmp_path: Path) -> None:
    data = b"".join(jline(f"e{i % 7}", TS + i, x=i) + b"\n" for i in range(500))
    items = read_all(write(tmp_path / "order.jsonl.gz", data))
    assert [v.metrics["x"] for v in items] == [float(i) for i in range(500)]


def test_crlf_bom_and_missing_final_newline(tmp_path: Path) -> None:
    data = b"\xef\xbb\xbf" + jline("a") + b"\r\n\r\n" + jline("b") + b"\r\n" + jline("c")
    items = read_all(write(tmp_path / "crlf.jsonl", data))
    assert [v.entity for v in items] == ["a", "b", "c"]


def test_empty_and_blank_only_files_yield_nothing(tmp_path: Path) -> None:
    assert read_all(write(tmp_path / "empty.jsonl", b"")) == []
    assert read_all(write(tmp_path / "blank.jsonl.gz", b"\n \n\t\n")) == []


def test_same_records_from_jsonl_and_gzip(tmp_path: Path) -> None:
    assert read_all(write(tmp_path / "a.jsonl", MIXED)) == read_all(write(tmp_path / "a.jsonl.gz", MIXED))


# --- over-long lines: skipped in constant memory, the rest goes on ----------------------------------------

@pytest.mark.parametrize("size", [150, 200_000])  # within one read chunk, and spanning several
def test_over_long_line_is_rejected_and_reading_continues(tmp_path: Path, size: int) -> None:
    limits = DecodeLimits(max_bytes=max(100, size // 2))
    big = b'{"ts": 1780000000, "entity": "a", "metrics": {"x": "' + b"y" * size + b'"}}'
    data = jline("a") + b"\n" + big + b"\n" + jline("b") + b"\n" + big  # the last one without a newline
    items = read_all(write(tmp_path / "long.jsonl", data), limits=limits, raw_cap=64)
    assert [type(i).__name__ for i in items] == ["Vector", "Rejected", "Vector", "Rejected"]
    for rejected, line in zip(items[1::2], (2, 4)):
        assert (rejected.line, rejected.reason, rejected.truncated) == (line, "too_large", True)
        assert rejected.raw == big[:64]
        assert f"{len(big):,} bytes" in rejected.detail


def test_line_exactly_at_the_limit_is_decoded(tmp_path: Path) -> None:
    line = jline("a")
    items = read_all(write(tmp_path / "edge.jsonl", line + b"\r\n" + line), limits=DecodeLimits(max_bytes=len(line)))
    assert [type(i) for i in items] == [Vector, Vector]


def test_raw_is_capped_and_flagged(tmp_path: Path) -> None:
    bad = b"x" * 100
    (rejected,) = read_all(write(tmp_path / "cap.jsonl", bad + b"\n"), raw_cap=10)
    assert (rejected.raw, rejected.truncated) == (b"x" * 10, True)
    (rejected,) = read_all(write(tmp_path / "nocap.jsonl", bad + b"\n"))
    assert (rejected.raw, rejected.truncated) == (bad, False)


# --- broken streams: everything read so far, then one final Rejected -------------------------------------

def test_truncated_gzip_yields_what_was_read_then_truncated_input(tmp_path: Path) -> None:
    data = b"".join(jline(f"e{i % 5}", TS + i, x=i) + b"\n" for i in range(20_000))
    full = gzip.compress(data)
    path = tmp_path / "cut.jsonl.gz"
    path.write_bytes(full[: len(full) // 2])
    items = read_all(path)
    *vectors, last = items
    assert isinstance(last, Rejected) and last.reason == "truncated_input"
    assert all(isinstance(v, Vector) for v in vectors) and 0 < len(vectors) < 20_000
    assert [v.metrics["x"] for v in vectors] == [float(i) for i in range(len(vectors))]
    assert last.line == len(vectors) + 1
    assert data.split(b"\n")[len(vectors)].startswith(last.raw)   # the partial line is kept
    assert "\n" not in last.detail and "line" in last.detail


def test_corrupt_gzip_ends_with_corrupt_input(tmp_path: Path) -> None:
    data = b"".join(jline("a", TS + i) + b"\n" for i in range(100))
    damaged = bytearray(gzip.compress(data))
    damaged[-8] ^= 0xFF  # the CRC32 in the trailer
    path = tmp_path / "crc.jsonl.gz"
    path.write_bytes(bytes(damaged))
    *vectors, last = read_all(path)
    assert len(vectors) == 100 and (last.line, last.reason) == (101, "corrupt_input")


class _FailingFile(io.BytesIO):
    """A file whose second read fails like a disk error."""

    def __init__(self, data: bytes) -> None:
        super().__init__(data)
        self.reads = 0

    def read1(self, size: int = -1) -> bytes:
        self.reads += 1
        if self.reads > 1:
            raise OSError(5, "Input/output error")
        return super().read1(size)


def test_read_error_mid_stream(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    data = jline("a") + b"\n" + jline("b")[:10]
    monkeypatch.setattr(readers, "open", lambda *a, **k: _FailingFile(data), raising=False)
    *vectors, last = read_all(tmp_path / "disk.jsonl")
    assert [v.entity for v in vectors] == ["a"]
    assert (last.line, last.reason, last.raw) == (2, "read_error", jline("b")[:10])


# --- whole-input errors ------------------------------------------------------------------------------------

def _input_error(path: Path) -> str:
    with pytest.raises(InputError) as info:
        open_records(path)
    message = str(info.value)
    assert "\n" not in message and str(path) in message
    return message


def test_missing_file_directory_and_unknown_suffix(tmp_path: Path) -> None:
    assert "No such file" in _input_error(tmp_path / "missing.jsonl")
    (tmp_path / "dir.csv").mkdir()
    _input_error(tmp_path / "dir.csv")
    assert "unknown input format" in _input_error(write(tmp_path / "data.parquet", jline("a")))
    assert "unknown input format" in _input_error(write(tmp_path / "data.ndjson", jline("a")))


def test_not_a_gzip_file(tmp_path: Path) -> None:
    path = tmp_path / "plain.jsonl.gz"
    path.write_bytes(jline("a") + b"\n")
    assert "gzip" in _input_error(path)


def test_gzip_cut_inside_its_header(tmp_path: Path) -> None:
    path = tmp_path / "stub.jsonl.gz"
    path.write_bytes(gzip.compress(jline("a"))[:5])
    assert "gzip" in _input_error(path)


@pytest.mark.parametrize("header, needle", [
    (b"", "empty CSV"),
    (b"\n\n", "empty CSV"),
    (b"time,entity,cpu", "no ts column"),
    (b"ts,host,cpu", "no entity column"),
    (b"cpu,mem", "no ts or entity column"),
    (b"ts,entity,cpu,cpu", "repeats column 'cpu'"),
    (b"ts,entity,cpu,", "column 4 has no name"),
    (b'ts,entity,"cpu', "bad CSV header"),
    (b"ts,entity,\xff", "bad CSV header"),
])
def test_csv_header_problems(tmp_path: Path, header: bytes, needle: str) -> None:
    data = header + b"\n1780000000,a,1\n" if header.strip() else header  # the empty cases stay empty
    assert needle in _input_error(write(tmp_path / "bad.csv", data))


def test_csv_header_over_the_metric_limit(tmp_path: Path) -> None:
    path = write(tmp_path / "wide.csv", b"ts,entity,a,b,c\n")
    with pytest.raises(InputError, match="max_metrics"):
        open_records(path, DecodeLimits(max_metrics=2))


# --- CSV ---------------------------------------------------------------------------------------------------

CSV = (b"ts,entity,cpu,lat_ms,conns\n"
       b"1780000000,checkout-1,0.5,182,7\n"            # 2
       b"2026-05-28T12:00:00Z,checkout-2,,190.5,\n"     # 3 empty cells: missing
       b"\n"                                            # 4 blank
       b"1780000010,checkout-1,high,NaN,null\n"         # 5 invalid values, still a vector
       b"1780000010,checkout-2,0.5\n"                   # 6 wrong width
       b"1780000020,,0.1,1,1\n"                         # 7 no entity
       b',"checkout-3",0.1,1,1\n'                       # 8 no ts
       b'1780000020,"check"out,0.1,1,1\n'               # 9 bad quoting
       b"1780000020,\xff,0.1,1,1\n"                     # 10 not UTF-8
       b'1780000030, "checkout,3", 0.25, 1e3, 2\n')    # 11 quoted comma, spaces after commas


@pytest.mark.parametrize("name", ["in.csv", "in.csv.gz"])
def test_csv_records(tmp_path: Path, name: str) -> None:
    vectors, rejected = split(read_all(write(tmp_path / name, CSV)))
    assert [(v.entity, v.ts) for v in vectors] == [("checkout-1", TS), ("checkout-2", 1779969600.0),
                                                    ("checkout-1", TS + 10), ("checkout,3", TS + 30)]
    assert vectors[0].metrics == {"cpu": 0.5, "lat_ms": 182.0, "conns": 7.0}
    assert vectors[1].metrics == {"cpu": None, "lat_ms": 190.5, "conns": None} and vectors[1].invalid == ()
    assert vectors[2].metrics == {"cpu": None, "lat_ms": None, "conns": None}
    assert vectors[2].invalid == (("cpu", "not_a_number"), ("lat_ms", "non_finite"), ("conns", "not_a_number"))
    assert vectors[3].metrics == {"cpu": 0.25, "lat_ms": 1000.0, "conns": 2.0}
    assert [(r.line, r.reason) for r in rejected] == [(6, "bad_csv_row"), (7, "no_entity"), (8, "no_ts"),
                                                      (9, "bad_csv_row"), (10, "bad_encoding")]
    assert rejected[-1].raw == b"1780000020,\xff,0.1,1,1"
    assert len(vectors) + len(rejected) == non_blank_lines(CSV) - 1  # the header yields neither


def test_csv_columns_in_any_order_with_bom(tmp_path: Path) -> None:
    data = b"\xef\xbb\xbfcpu,entity,ts\r\n0.5,a,1780000000\r\n"
    (v,) = read_all(write(tmp_path / "order.csv", data))
    assert (v.ts, v.entity, v.metrics) == (TS, "a", {"cpu": 0.5})


def test_csv_and_jsonl_decode_the_same_vectors(tmp_path: Path) -> None:
    """Both paths validate through vector_from_object, so equal content gives equal vectors."""
    rows = [(TS, "a", 0.5, None), (TS + 1, "b", "x", 2.0), (TS + 2, "a", 1e301, -3.0)]
    csv_text = "ts,entity,m1,m2\n" + "".join(
        f"{ts!r},{e},{'' if m1 is None else m1},{'' if m2 is None else m2}\n" for ts, e, m1, m2 in rows)
    jsonl = b"".join(orjson.dumps({"ts": ts, "entity": e, "metrics": {"m1": m1, "m2": m2}}) + b"\n"
                     for ts, e, m1, m2 in rows)
    assert read_all(write(tmp_path / "x.csv", csv_text.encode())) == read_all(write(tmp_path / "x.jsonl", jsonl))


# --- conservation and line numbers, as a property ---------------------------------------------------------

LINE_KINDS = {
    "good": lambda i: jline(f"e{i % 3}", TS + i),
    "bad_json": lambda i: b'{"ts": ' + str(i).encode(),
    "bad_ts": lambda i: orjson.dumps({"ts": "soon", "entity": "e", "metrics": {"x": i}}),
    "not_utf8": lambda i: b"\xc3\x28" + str(i).encode(),
    "blank": lambda i: b" " * (i % 3),
}


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(kinds=st.lists(st.sampled_from(sorted(LINE_KINDS)), max_size=40), gz=st.booleans(),
       crlf=st.booleans(), final_newline=st.booleans(), chunk=st.sampled_from([1, 7, 64, 64 * 1024]))
def test_property_conservation_and_line_numbers(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, kinds: list[str],
                                                gz: bool, crlf: bool, final_newline: bool, chunk: int) -> None:
    monkeypatch.setattr(readers, "CHUNK_BYTES", chunk)  # lines split across reads, even inside a CRLF
    end = b"\r\n" if crlf else b"\n"
    lines = [LINE_KINDS[k](i) for i, k in enumerate(kinds)]
    data = end.join(lines) + (end if final_newline and lines else b"")
    items = read_all(write(tmp_path / ("p.jsonl.gz" if gz else "p.jsonl"), data))
    vectors, rejected = split(items)
    assert len(vectors) + len(rejected) == sum(1 for k in kinds if k != "blank")
    assert [r.line for r in rejected] == [i + 1 for i, k in enumerate(kinds) if k not in ("good", "blank")]
    assert [r.raw for r in rejected] == [lines[i] for i, k in enumerate(kinds) if k not in ("good", "blank")]
    assert [v.ts for v in vectors] == [TS + i for i, k in enumerate(kinds) if k == "good"]


# --- every reader reason -----------------------------------------------------------------------------------

def test_reader_reasons_are_the_documented_ones() -> None:
    # Each has a test above: bad_encoding and bad_csv_row in test_csv_records; truncated_input,
    # corrupt_input and read_error in the broken-stream tests. too_large is decode's reason, shared.
    assert readers.REASONS == {"bad_encoding", "bad_csv_row", "truncated_input", "corrupt_input", "read_error"}
    assert readers.REASONS.isdisjoint(decode.REASONS)


# --- progress and resources ---------------------------------------------------------------------------------

@pytest.mark.parametrize("name", ["big.jsonl", "big.jsonl.gz"])
def test_bytes_read_grows_to_the_file_size(tmp_path: Path, name: str) -> None:
    data = b"".join(jline(f"e{i}", TS + i, x=i * 0.37) + b"\n" for i in range(20_000))
    path = write(tmp_path / name, data)
    size = input_size(path)
    assert size == os.path.getsize(path)
    seen = []
    with open_records(path) as records:
        for i, _ in enumerate(records):
            if i % 2000 == 0:
                seen.append(records.bytes_read)
        assert records.bytes_read == size
    assert seen == sorted(seen) and seen[0] < size


def test_input_size_unknown() -> None:
    assert input_size("/nonexistent/x.jsonl") is None


def test_close_early_releases_the_file(tmp_path: Path) -> None:
    records = open_records(write(tmp_path / "c.jsonl", jline("a") + b"\n" + jline("b")))
    assert isinstance(next(records), Vector)
    records.close()
    records.close()
    assert records.bytes_read > 0
    with pytest.raises(StopIteration):
        next(records)


# --- dead letters -------------------------------------------------------------------------------------------

def test_dead_letter_round_trip(tmp_path: Path) -> None:
    data = b"{oops\n\xff\xfe\x00binary\n" + jline("ok") + b"\n" + b"x" * 300 + b"\n"
    source = write(tmp_path / "in.jsonl", data)
    rejected = [r for r in read_all(source, raw_cap=100) if isinstance(r, Rejected)]
    out = tmp_path / "dead.jsonl"
    with DeadLetterWriter(out, source=source) as dead:
        for r in rejected:
            dead.write(r)
    assert dead.count == 3
    letters = [orjson.loads(line) for line in out.read_bytes().splitlines()]
    assert [(d["line"], d["reason"], d["raw_encoding"], d["truncated"]) for d in letters] == [
        (1, "bad_json", "utf-8", False), (2, "bad_json", "base64", False), (4, "bad_json", "utf-8", True)]
    assert all(d["source"] == str(source) and d["detail"] for d in letters)

    def raw_bytes(d: dict) -> bytes:
        return base64.b64decode(d["raw"]) if d["raw_encoding"] == "base64" else d["raw"].encode("utf-8")

    assert [raw_bytes(d) for d in letters] == [b"{oops", b"\xff\xfe\x00binary", b"x" * 100]
    lines = data.split(b"\n")
    for d in letters:
        if not d["truncated"]:
            assert raw_bytes(d) == lines[d["line"] - 1]  # the original line, byte for byte
            with pytest.raises(decode.DecodeError):
                decode_vector(raw_bytes(d))  # and it still fails the same way


def test_dead_letter_source_with_undecodable_file_name(tmp_path: Path) -> None:
    odd = os.fsdecode(b"in-\xff.jsonl")  # how Python presents a non-UTF-8 file name
    with DeadLetterWriter(tmp_path / "dead.jsonl", source=odd) as dead:
        dead.write(Rejected(1, "bad_json", "not valid JSON", b"{"))
    assert orjson.loads((tmp_path / "dead.jsonl").read_bytes())["source"] == "in-\\xff.jsonl"


def test_dead_letter_source_per_write_wins(tmp_path: Path) -> None:
    with DeadLetterWriter(tmp_path / "dead.jsonl") as dead:
        dead.write(Rejected(1, "bad_json", "x", b"{"))
        dead.write(Rejected(2, "bad_json", "x", b"{"), source=Path("b.jsonl"))
    assert [orjson.loads(x)["source"] for x in (tmp_path / "dead.jsonl").read_bytes().splitlines()] == [None, "b.jsonl"]


def test_dead_letter_file_is_created_even_when_empty(tmp_path: Path) -> None:
    with DeadLetterWriter(tmp_path / "none.jsonl", source="in.jsonl") as dead:
        pass
    assert dead.count == 0 and (tmp_path / "none.jsonl").read_bytes() == b""


def test_dead_letter_says_whether_the_vector_was_kept(tmp_path: Path) -> None:
    """A line whose vector was used with invalid values treated as missing is a dead letter too, marked kept."""
    line = b'{"ts": 1780000000, "entity": "a", "metrics": {"cpu_util": "n/a", "lat_ms": "12"}}'
    with DeadLetterWriter(tmp_path / "dead.jsonl") as dead:
        dead.write(Rejected(1, "bad_json", "not valid JSON", b"{"))
        dead.write(Rejected(2, "invalid_values", "cpu_util: not_a_number ('n/a'); lat_ms: numeric_string ('12')",
                            line, kept=True))
    letters = [orjson.loads(x) for x in (tmp_path / "dead.jsonl").read_bytes().splitlines()]
    assert [(d["reason"], d["kept"]) for d in letters] == [("bad_json", False), ("invalid_values", True)]
    assert letters[1]["raw"].encode() == line and decode_vector(line).invalid == (
        ("cpu_util", "not_a_number"), ("lat_ms", "numeric_string"))
