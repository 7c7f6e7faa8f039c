"""Fuzzing: byte mutations (flip, cut, insert, overwrite) of small shards of every format, and structural mutations
of JSON values (hypothesis).  Each case: no exception escapes (no traceback), the exit status is 0 or 1, the SARIF
validates against the OASIS 2.1.0 schema, and the rows scanned are the rows an independent decoder reads (pyarrow
for Parquet and Arrow, the standard library's json / zlib for JSON Lines) wherever that decoder reads the file.

The seed is fixed, so a failure is reproducible.  CI runs about 1,000 cases; set CORPUSCLE_FUZZ_CASES=10000 to run
ten thousand by hand (the byte mutations take 80% of them, the JSON structures the rest).
"""
from __future__ import annotations

import gzip
import io
import json
import os
import random
import zlib

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner
from corpuscle import Settings, scan
from corpuscle.cli import main
from corpuscle.report import sarif
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.shards import pack, sarif_validator

CASES = int(os.environ.get("CORPUSCLE_FUZZ_CASES", "1000"))
BYTE_CASES = CASES * 4 // 5
SEED = 20261203
FORMATS = ("parquet", "arrow", "arrows", "jsonl", "jsonl.gz", "jsonl.zst")
#: Every this many cases also runs through the command line (the exit status and the absence of a traceback as a
#: user sees them); the others call the engine the command calls.
CLI_EVERY = 25

VALIDATOR = sarif_validator()


def _shards() -> dict[str, bytes]:
    """One small shard per format: packed token windows with labels (tokenized) and a text column."""
    rng = random.Random(SEED)
    docs = [[rng.randrange(3, 60) for _ in range(rng.randrange(2, 12))] for _ in range(12)]
    cols = pack(docs, 16, eos=2)
    cols["text"] = [f"note {i}: stir the sauce" for i in range(len(cols["input_ids"]))]
    table = pa.table(cols)
    out = {}
    sink = io.BytesIO()
    pq.write_table(table, sink, row_group_size=3, write_page_checksum=True)
    out["parquet"] = sink.getvalue()
    for name, opener in (("arrow", pa.ipc.new_file), ("arrows", pa.ipc.new_stream)):
        buffer = pa.BufferOutputStream()
        with opener(buffer, table.schema) as writer:
            writer.write_table(table, max_chunksize=4)
        out[name] = buffer.getvalue().to_pybytes()
    lines = b"".join(json.dumps(row).encode() + b"\n" for row in table.to_pylist())
    out["jsonl"] = lines
    out["jsonl.gz"] = gzip.compress(lines, mtime=0)
    buffer = pa.BufferOutputStream()
    with pa.CompressedOutputStream(buffer, "zstd") as stream:
        stream.write(lines)
    out["jsonl.zst"] = buffer.getvalue().to_pybytes()
    return out


SHARDS = _shards()


def mutate(data: bytes, rng: random.Random) -> tuple[bytes, str]:
    """One to three mutations of ``data``: flip a bit, cut the end off, insert random bytes, overwrite a run."""
    done = []
    for _ in range(rng.choice((1, 1, 1, 2, 3))):
        how = rng.choice(("flip", "cut", "insert", "overwrite"))
        at = rng.randrange(max(1, len(data)))
        if how == "flip" and data:
            data = data[:at] + bytes([data[at] ^ (1 << rng.randrange(8))]) + data[at + 1:]
        elif how == "cut":
            data = data[:at]
        elif how == "insert":
            data = data[:at] + rng.randbytes(rng.randrange(1, 9)) + data[at:]
        else:
            data = data[:at] + rng.randbytes(rng.randrange(1, 17)) + data[at + 17:]
        done.append(f"{how}@{at}")
    return data, " ".join(done)


# -- independent decoders: how many rows they read, or None when they cannot read the file whole ----------------

def _orjson_like(text: str):
    """The stdlib's json made as strict as orjson (the reader's parser): no NaN/Infinity, integers within 64 bits
    (RFC 8259 leaves both to the implementation; orjson's documented behaviour, from memory)."""
    def number(value: str):
        number = int(value)
        if not -(2 ** 63) <= number < 2 ** 64:
            raise ValueError("integer beyond 64 bits")
        return number

    def constant(name):
        raise ValueError(name)

    return json.loads(text, parse_int=number, parse_constant=constant)


def json_rows(data: bytes) -> tuple[int, int]:
    """``(records, empty)``: lines that hold a JSON object (invalid UTF-8 replaced, as the reader does), and how
    many of them are the empty object (which a block without any key reads as no row)."""
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    records = empty = 0
    for line in data.split(b"\n"):
        if not line.strip():
            continue
        try:
            value = _orjson_like(line.decode("utf-8", errors="replace"))
        except (ValueError, RecursionError):
            continue
        if isinstance(value, dict):
            records += 1
            empty += not value
    return records, empty


def gunzip_prefix(data: bytes) -> tuple[bytes, bool]:
    """What zlib decodes from a gzip file before any failure (a byte of input at a time), and whether it read the
    whole file cleanly."""
    out, decoder, at = [], zlib.decompressobj(31), 0
    try:
        while at < len(data):
            out.append(decoder.decompress(data[at:at + 1]))
            at += 1
            if decoder.eof:
                rest = decoder.unused_data + data[at:]
                if not rest.strip(b"\0"):
                    return b"".join(out), True
                decoder, data, at = zlib.decompressobj(31), rest, 0
    except zlib.error:
        return b"".join(out), False
    return b"".join(out), False


def expected_rows(fmt: str, data: bytes):
    """``(rows, tolerance)`` an independent decoder reads from the file, or None when it cannot tell."""
    try:
        if fmt == "parquet":
            return pq.ParquetFile(pa.BufferReader(data), page_checksum_verification=True).read().num_rows, 0
        if fmt in ("arrow", "arrows"):
            source = pa.BufferReader(data)
            reader = pa.ipc.open_file(source) if data[:6] == b"ARROW1" else pa.ipc.open_stream(source)
            table = reader.read_all()
            table.validate(full=True)
            return table.num_rows, 0
    except Exception:  # noqa: BLE001 - the reference cannot read it whole: no row count to compare
        return None
    if fmt == "jsonl.gz":
        data, _ = gunzip_prefix(data)
        lines = data[:data.rfind(b"\n") + 1]  # complete lines before any damage
        return _with_last(json_rows(lines), data[len(lines):])
    if fmt == "jsonl.zst":
        try:
            data = pa.CompressedInputStream(pa.BufferReader(data), "zstd").read()
        except Exception:  # noqa: BLE001
            return None
    records, empty = json_rows(data)
    return records, empty


def _with_last(counted: tuple[int, int], rest: bytes) -> tuple[int, int]:
    """A gzip prefix's rows; the bytes after its last newline may be one more record (the reader tries a last line
    without newline when the stream ends there)."""
    records, empty = counted
    more = json_rows(rest)[0] if rest.strip() else 0
    return records + more, empty + more


# -- the cases -----------------------------------------------------------------------------------------------------

def check(path: str, fmt: str, data: bytes, label: str, cli: bool, tmp_path) -> None:
    report = scan([path], Settings(), jobs=1)  # raises if anything escapes the guards
    assert report.exit_code in (0, 1), (label, [n.message for n in report.notes if n.internal])
    log = json.loads(sarif.render(report))
    errors = list(VALIDATOR.iter_errors(log))
    assert not errors, (label, errors[0].message)
    expected = expected_rows(fmt, data)
    if expected is not None:
        rows, tolerance = expected
        assert rows - tolerance <= report.metrics["rows"] <= rows, (label, report.metrics["rows"], rows)
    if cli:
        out = tmp_path / "r.sarif"
        result = CliRunner().invoke(main, ["scan", path, "--jobs", "1", "--quiet", "--sarif", str(out)])
        assert result.exit_code in (0, 1), (label, result.output)
        assert "Traceback" not in result.output and (result.exception is None or
                                                     isinstance(result.exception, SystemExit)), label


@pytest.mark.parametrize("fmt", FORMATS)
def test_byte_mutations_never_escape_and_count_what_a_reference_decoder_reads(tmp_path, fmt):
    rng = random.Random(f"{SEED}-{fmt}")
    suffix = ".arrow" if fmt == "arrows" else f".{fmt}"
    for case in range(BYTE_CASES // len(FORMATS)):
        data, how = mutate(SHARDS[fmt], rng)
        path = tmp_path / f"case{case}{suffix}"
        path.write_bytes(data)
        check(str(path), fmt, data, f"{fmt} case {case}: {how}", case % CLI_EVERY == 0, tmp_path)
        path.unlink()


def test_a_parquet_footer_that_makes_pyarrow_abort_is_an_unreadable_shard(tmp_path):
    """Case 321 of the Parquet mutations (a bit flipped in the footer) made pyarrow end the process (a C++
    exception thrown through its metadata accessor: SIGABRT) when its column metadata was looked at."""
    rng = random.Random(f"{SEED}-parquet")
    for _ in range(322):
        data, how = mutate(SHARDS["parquet"], rng)
    assert how == "flip@1838"
    path = tmp_path / "footer.parquet"
    path.write_bytes(data)
    report = scan([str(path)], Settings(), jobs=1)  # the test process survives
    (found,) = [f for f in report.findings if f.rule_id == "unreadable-shard"]
    assert found.rows.tolist() == [0] and report.metrics["rows"] == 0
    check(str(path), "parquet", data, how, True, tmp_path)


def json_values():
    """Any JSON value, nested (hypothesis' recursive strategy), with the integers and floats a writer may emit."""
    scalars = (st.none() | st.booleans() | st.integers(-(2 ** 63), 2 ** 63 - 1)
               | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=12))
    return st.recursive(scalars, lambda inner: st.lists(inner, max_size=6)
                        | st.dictionaries(st.text(max_size=6), inner, max_size=5), max_leaves=20)


@settings(max_examples=max(1, CASES - BYTE_CASES), deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(records=st.lists(st.fixed_dictionaries({}, optional={
    "input_ids": json_values() | st.lists(st.integers(-5, 70), max_size=20),
    "labels": json_values() | st.lists(st.integers(-100, 70), max_size=20),
    "text": json_values() | st.text(max_size=40),
    "extra": json_values(),
}), min_size=1, max_size=8))
def test_json_structures_of_any_shape_never_escape(tmp_path, records):
    data = b"".join(json.dumps(r).encode() + b"\n" for r in records)
    path = tmp_path / "structures.jsonl"
    path.write_bytes(data)
    check(str(path), "jsonl", data, f"records {records!r:.300}", False, tmp_path)

