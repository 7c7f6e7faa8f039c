"""Finding shards and reading them: discovery, every reader, bounded batches, row indices, and bad input.

References: pyarrow's own readers (pyarrow.json, pyarrow.parquet, pyarrow.ipc) give the values a shard holds; the
stdlib ``json`` module gives the values a JSON line holds (RFC 8259 JSON).  Every expected row index is computed in
the test from the lines it writes.
"""
from __future__ import annotations

import glob
import gzip
import json
import os
import zlib

import numpy as np
import pyarrow as pa
import pyarrow.json as pa_json
import pyarrow.parquet as pq
import pytest
from corpuscle.io.sources import EXPECTED, NoShardsFound, Problem, discover, open_shard
from hypothesis import HealthCheck, given
from hypothesis import settings as hsettings
from hypothesis import strategies as st

from tests.shards import findings, locations, run, write

# -- helpers ------------------------------------------------------------------------------------------------


def read(path, **kw):
    """All batches of one shard, read through discover() + open_shard()."""
    [shard] = discover([str(path)])
    with open_shard(shard, **kw) as reader:
        return list(reader)


def table_of(batches) -> pa.Table:
    tables = [pa.Table.from_batches([b.table]) if isinstance(b.table, pa.RecordBatch) else b.table
              for b in batches if len(b)]
    return pa.concat_tables(tables, promote_options="default")


def rows_of(batches) -> list[int]:
    return [int(r) for b in batches for r in b.rows]


def problems_of(batches) -> list[Problem]:
    return [p for b in batches for p in b.problems]


def write_lines(path, lines: list[bytes], end: bytes = b"\n") -> str:
    """Write raw JSON Lines (bytes as given), each followed by ``end`` except where noted by the caller."""
    with open(path, "wb") as fh:
        fh.write(end.join(lines) + end)
    return str(path)


COLUMNS = {
    "input_ids": [[5, 6, 7, 2], [9, 2], [], [11, 12, 13, 14, 15, 2]],
    "text": ["plain words", "Grüße aus Köln — ✓", "", "雪の朝 🌨 and a tab\there"],
    "score": [0.5, -1.25, 3.0e10, 7.0],
    "doc": [0, 1, 9_007_199_254_740_993, -(2 ** 63)],  # beyond 2**53 (not exact in a double) and int64 min
}


# -- discovery ----------------------------------------------------------------------------------------------


@pytest.fixture
def tree(tmp_path):
    """data/ with shards in nested folders, a hidden file, a hidden folder and a non-shard; other/ beside it."""
    cols = {"input_ids": [[1, 2, 3]]}
    for rel in ("data/a.jsonl", "data/b.parquet", "data/sub/c.arrow", "data/sub/deeper/d.jsonl.gz",
                "data/.hidden.jsonl", "data/.cache/e.jsonl", "data/sub/.f.parquet",
                "other/x.jsonl.zst", "other/y.parquet"):
        write(rel, cols)
    (tmp_path / "data" / "notes.txt").write_text("not a shard")
    return tmp_path


def uris(shards):
    return [s.uri for s in shards]


def test_folder_is_walked_recursively_in_sorted_order_without_hidden_files(tree):
    shards = discover(["data"])
    assert uris(shards) == ["data/a.jsonl", "data/b.parquet", "data/sub/c.arrow", "data/sub/deeper/d.jsonl.gz"]
    assert [(s.format, s.compression) for s in shards] == [
        ("jsonl", None), ("parquet", None), ("arrow", None), ("jsonl", "gzip")]
    for s in shards:
        assert s.length == os.path.getsize(s.path) > 0
    assert discover(["other"])[0].compression == "zstd"


def test_uri_is_the_path_as_given(tree):
    assert uris(discover(["data/"])) == uris(discover(["data"]))
    assert uris(discover(["./data/sub"])) == ["./data/sub/c.arrow", "./data/sub/deeper/d.jsonl.gz"]
    assert uris(discover(["data/sub/c.arrow"])) == ["data/sub/c.arrow"]
    absolute = str(tree / "data" / "sub")
    assert uris(discover([absolute])) == [absolute + "/c.arrow", absolute + "/deeper/d.jsonl.gz"]


def test_globs_files_and_folders(tree):
    assert uris(discover(["other/*.parquet"])) == ["other/y.parquet"]
    # "**" is recursive; glob skips names starting with a dot (stdlib glob rule), as the folder walk does.
    assert uris(discover(["data/**/*.jsonl*"])) == ["data/a.jsonl", "data/sub/deeper/d.jsonl.gz"]
    # A glob that matches a folder walks it.
    assert uris(discover(["oth*"])) == ["other/x.jsonl.zst", "other/y.parquet"]


def test_mixed_arguments_keep_argument_order_and_drop_repeats(tree):
    shards = discover(["other/x.jsonl.zst", "data/sub", "other/*", "data/sub/c.arrow"])
    assert uris(shards) == ["other/x.jsonl.zst", "data/sub/c.arrow", "data/sub/deeper/d.jsonl.gz",
                            "other/y.parquet"]


def test_a_hidden_file_named_explicitly_is_read(tree):
    assert uris(discover(["data/.hidden.jsonl"])) == ["data/.hidden.jsonl"]


def test_a_file_name_with_glob_characters_is_taken_as_given(tmp_path):
    write("part[1].jsonl", {"n": [1]})
    write("part1.jsonl", {"n": [2]})
    assert uris(discover(["part[1].jsonl"])) == ["part[1].jsonl"]
    assert uris(discover(["part[0-9].jsonl"])) == ["part1.jsonl"]  # not an existing name: a glob (fnmatch rules)


def test_a_recursive_glob_with_an_unclosed_bracket_set_matches_as_stdlib_glob_does(tmp_path):
    # "[]" and "[!]" open sets that never close: literal brackets. Reference: the stdlib's glob.glob.
    write("a/x[].jsonl", {"n": [1]})
    write("a/y[!].jsonl", {"n": [2]})
    write("a/z1.jsonl", {"n": [3]})
    for pattern in ("**/x[].jsonl", "**/y[!].jsonl", "**/z[0-9].jsonl"):
        assert uris(discover([pattern])) == sorted(glob.glob(pattern, recursive=True)), pattern
    assert uris(discover(["**/x[].jsonl"])) == ["a/x[].jsonl"]


def test_no_shard_found_names_the_expected_suffixes(tree):
    os.makedirs("empty")
    with pytest.raises(NoShardsFound) as err:
        discover(["empty"])
    assert str(err.value) == ("no shard found under empty: expected .jsonl, .jsonl.gz, .jsonl.zst, .parquet, "
                              ".arrow files")
    with pytest.raises(NoShardsFound) as err:
        discover(["data/notes.txt", "nowhere"])
    assert str(err.value) == (f"no shard found under data/notes.txt, nowhere (nowhere does not exist): "
                              f"expected {EXPECTED} files")
    assert EXPECTED == ".jsonl, .jsonl.gz, .jsonl.zst, .parquet, .arrow"


# -- every reader yields what was written ---------------------------------------------------------------------


def reference(path: str, fmt: str) -> pa.Table:
    """The same file read by pyarrow's own readers (the reference)."""
    if fmt.startswith("jsonl"):
        return pa_json.read_json(path)  # decompresses .gz / .zst by the file ending
    if fmt == "parquet":
        return pq.read_table(path)
    with pa.memory_map(path) as source:
        if fmt == "arrow":
            return pa.ipc.open_file(source).read_all()
        return pa.ipc.open_stream(source).read_all()


@pytest.mark.parametrize("name,fmt", [("s.jsonl", "jsonl"), ("s.jsonl.gz", "jsonl.gz"), ("s.jsonl.zst", "jsonl.zst"),
                                      ("s.parquet", "parquet"), ("file.arrow", "arrow"),
                                      ("stream.arrow", "arrows")])
def test_each_reader_yields_the_values_pyarrow_reads(tmp_path, name, fmt):
    path = write(tmp_path / name, COLUMNS, fmt=fmt, row_group_size=2)
    batches = read(path)
    assert problems_of(batches) == []
    got = table_of(batches)
    ref = reference(path, fmt)
    assert got.column_names == ref.column_names == list(COLUMNS)
    for column in COLUMNS:
        assert got.column(column).to_pylist() == ref.column(column).to_pylist() == COLUMNS[column], column
    assert rows_of(batches) == [0, 1, 2, 3]


def test_parquet_with_several_row_groups(tmp_path):
    ids = [[r * 10 + k for k in range(r % 5)] for r in range(23)]
    path = write(tmp_path / "groups.parquet", {"input_ids": ids, "n": list(range(23))}, row_group_size=5)
    assert pq.ParquetFile(path).metadata.num_row_groups == 5
    batches = read(path)
    assert table_of(batches).column("input_ids").to_pylist() == pq.read_table(path).column("input_ids").to_pylist()
    assert table_of(batches).column("input_ids").to_pylist() == ids
    assert rows_of(batches) == list(range(23))


def test_arrow_stream_and_file_are_told_apart_by_content(tmp_path):
    file_path = write(tmp_path / "f.arrow", COLUMNS, fmt="arrow")
    stream_path = write(tmp_path / "s.arrow", COLUMNS, fmt="arrows")
    with open(file_path, "rb") as fh:  # Arrow IPC file format opens with the magic "ARROW1" (Arrow columnar spec)
        assert fh.read(6) == b"ARROW1"
    with open(stream_path, "rb") as fh:
        assert fh.read(6) != b"ARROW1"
    assert table_of(read(file_path)).equals(table_of(read(stream_path)))


# -- bounded batches ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("name,fmt", [("t.parquet", "parquet"), ("t.arrow", "arrow"), ("ts.arrow", "arrows")])
def test_tokenized_shards_arrive_in_batches_near_the_token_budget(tmp_path, name, fmt):
    # 1,000 rows of 10 tokens, stored in groups of 250; a budget of 100 tokens means 10 rows per batch.
    ids = [[r] * 10 for r in range(1000)]
    path = write(tmp_path / name, {"input_ids": ids}, fmt=fmt, row_group_size=250)
    batches = read(path, batch_tokens=100)
    assert [len(b) for b in batches] == [10] * 100
    for b in batches:
        assert b.rows.tolist() == list(range(int(b.rows[0]), int(b.rows[0]) + 10))  # contiguous
        assert b.flat("input_ids").values.tolist() == [v for r in b.rows.tolist() for v in ids[r]]
    assert rows_of(batches) == list(range(1000))


def test_fixed_size_token_lists_are_bounded_too(tmp_path):
    # A fixed-size list column has no offsets; each row still holds list_size (here 10) tokens.
    values = pa.array(np.arange(10_000, dtype=np.int32))
    table = pa.table({"input_ids": pa.FixedSizeListArray.from_arrays(values, 10)})
    path = str(tmp_path / "fixed.arrow")
    with pa.ipc.new_file(path, table.schema) as w:
        w.write_table(table)
    batches = read(path, batch_tokens=100)
    assert [len(b) for b in batches] == [10] * 100
    assert np.concatenate([b.flat("input_ids").values for b in batches]).tolist() == list(range(10_000))


@pytest.mark.parametrize("name", ["l.jsonl", "l.jsonl.gz", "l.jsonl.zst"])
def test_json_lines_arrive_in_batches_of_about_batch_bytes(tmp_path, name):
    # Every line is exactly 50 bytes with its newline, so a 1,000-byte read holds exactly 20 whole lines.
    lines = [json.dumps({"n": i, "text": "w" * (30 - len(str(i)))}).encode() for i in range(1000)]
    assert {len(line) + 1 for line in lines} == {50}
    data = b"".join(line + b"\n" for line in lines)
    path = tmp_path / name
    if name.endswith(".gz"):
        path.write_bytes(gzip.compress(data))
    elif name.endswith(".zst"):
        with pa.CompressedOutputStream(str(path), "zstd") as out:
            out.write(data)
    else:
        path.write_bytes(data)
    batches = read(path, batch_bytes=1000)
    assert [len(b) for b in batches] == [20] * 50
    assert rows_of(batches) == list(range(1000))
    assert table_of(batches).column("n").to_pylist() == list(range(1000))


def test_a_line_longer_than_the_read_size_is_still_read_whole(tmp_path):
    long_text = "x" * 5000
    path = write_lines(tmp_path / "long.jsonl", [b'{"text": "short"}', json.dumps({"text": long_text}).encode(),
                                                  b'{"text": "after"}'])
    batches = read(path, batch_bytes=64)
    assert table_of(batches).column("text").to_pylist() == ["short", long_text, "after"]
    assert rows_of(batches) == [0, 1, 2]
    assert problems_of(batches) == []


# -- JSON Lines parsing against the stdlib json module ------------------------------------------------------

INT64 = st.integers(min_value=-(2 ** 63), max_value=2 ** 63 - 1)
TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=30)  # no lone surrogates: not UTF-8
FLOAT = st.floats(allow_nan=False, allow_infinity=False)  # NaN/Infinity are not JSON (RFC 8259 section 6)
RECORD = st.fixed_dictionaries({
    "text": TEXT,
    "n": INT64,
    "x": FLOAT,
    "ids": st.lists(INT64, max_size=6),
    "nested": st.lists(st.lists(st.integers(-5, 5), max_size=3), max_size=3),
    "tags": st.lists(TEXT, max_size=3),
    "flag": st.booleans(),
    "maybe": st.one_of(st.none(), st.integers(0, 9)),
})


@hsettings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(records=st.lists(RECORD, min_size=1, max_size=8), ascii_only=st.booleans())
def test_json_lines_values_equal_what_stdlib_json_loads_gives(tmp_path, records, ascii_only):
    lines = [json.dumps(r, ensure_ascii=ascii_only).encode("utf-8") for r in records]
    path = write_lines(tmp_path / "gen.jsonl", lines)
    batches = read(path)
    assert problems_of(batches) == []
    expected = [json.loads(line) for line in lines]  # reference: the stdlib json module
    assert table_of(batches).to_pylist() == expected
    assert rows_of(batches) == list(range(len(lines)))


def test_escapes_and_unicode_equal_stdlib_json(tmp_path):
    lines = [
        rb'{"text": "quote \" backslash \\ slash \/ controls \b\f\n\r\t end"}',
        rb'{"text": "\u00e9t\u00e9 \ud83d\ude00 \u0000 nul"}',  # escaped BMP chars, a surrogate pair, NUL
        '{"text": "raw: été 😀 עברית ‍ 漢字"}'.encode("utf-8"),
        rb'{"text": "", "ids": [9223372036854775807, -9223372036854775808, 0]}',
        rb'{"text": "floats", "x": [1e-300, 2.5E+3, -0.0, 123456789.123456789]}',
    ]
    path = write_lines(tmp_path / "esc.jsonl", lines)
    batches = read(path)
    assert problems_of(batches) == []
    expected = [json.loads(line) for line in lines]
    got = table_of(batches).to_pylist()
    assert [r["text"] for r in got] == [r["text"] for r in expected]
    assert got[3]["ids"] == [2 ** 63 - 1, -(2 ** 63), 0]
    assert got[4]["x"] == expected[4]["x"]


def test_columns_missing_from_the_first_record_are_kept(tmp_path):
    lines = [b'{"text": "a"}', b'{"text": "b", "labels": [1, 2]}', b'{"labels": [3], "extra": true}']
    batches = read(write_lines(tmp_path / "keys.jsonl", lines))
    got = table_of(batches)
    assert got.column_names == ["text", "labels", "extra"]
    expected = [json.loads(line) for line in lines]
    assert got.to_pylist() == [{k: r.get(k) for k in ("text", "labels", "extra")} for r in expected]


def test_row_indices_count_blank_lines(tmp_path):
    lines = [b'{"n": 0}', b"", b'{"n": 2}', b"   ", b"\r", b'{"n": 5}', b"", b""]
    batches = read(write_lines(tmp_path / "blanks.jsonl", lines))
    assert rows_of(batches) == [0, 2, 5]
    assert table_of(batches).column("n").to_pylist() == [0, 2, 5]
    assert problems_of(batches) == []


# -- bad records become problems with their exact row -------------------------------------------------------


def test_crlf_line_ends_are_read_like_lf(tmp_path):
    # RFC 8259 section 2: carriage return is insignificant whitespace after a value.
    lines = [b'{"n": 0}', b"", b'{"n": 2, "text": "two"}']
    batches = read(write_lines(tmp_path / "crlf.jsonl", lines, end=b"\r\n"))
    assert problems_of(batches) == []
    assert rows_of(batches) == [0, 2]
    assert table_of(batches).to_pylist() == [{"n": 0, "text": None}, {"n": 2, "text": "two"}]


def test_bad_json_and_non_object_lines(tmp_path):
    lines = [b'{"n": 0}', b'{"n": 1', b"", b"[1, 2]", b'{"n": 4}', b"42", b'"text"', b"null", b"{n: 8}",
             b'{"n": 9}']
    batches = read(write_lines(tmp_path / "bad.jsonl", lines))
    got = [(p.kind, p.row) for p in problems_of(batches)]
    assert got == [("bad-json", 1), ("not-object", 3), ("not-object", 5), ("not-object", 6), ("not-object", 7),
                   ("bad-json", 8)]
    assert rows_of(batches) == [0, 4, 9]
    assert problems_of(batches)[1].detail == "a JSON list where an object was expected"
    # Through the engine: one finding per kind with these rows (1-based SARIF line = first row + 1).
    report = run(tmp_path / "bad.jsonl", only=("unreadable-record",))
    [bad] = findings(report, "unreadable-record", "bad-json")
    [nonobj] = findings(report, "unreadable-record", "not-object")
    assert (bad.count, [r for r, _ in locations(bad)], bad.start_line) == (2, [1, 8], 2)
    assert (nonobj.count, [r for r, _ in locations(nonobj)], nonobj.start_line) == (4, [3, 5, 6, 7], 4)


def test_cut_off_last_line(tmp_path):
    path = tmp_path / "cut.jsonl"
    path.write_bytes(b'{"n": 0}\n\n{"n": 2}\n{"n": 3, "text": "the writer was kil')
    batches = read(path)
    assert [(p.kind, p.row) for p in problems_of(batches)] == [("cut-off", 3)]
    assert rows_of(batches) == [0, 2]


def test_a_complete_last_line_without_newline_is_a_record(tmp_path):
    path = tmp_path / "nonl.jsonl"
    path.write_bytes(b'{"n": 0}\n{"n": 1}')
    batches = read(path)
    assert problems_of(batches) == []
    assert rows_of(batches) == [0, 1]


def test_invalid_utf8_keeps_the_record_with_replacement_characters(tmp_path):
    bad_line = b'{"text": "caf\xe9 ok", "n": 1}'  # a Latin-1 byte where UTF-8 was expected
    path = write_lines(tmp_path / "latin.jsonl", [b'{"text": "fine", "n": 0}', b"", bad_line])
    batches = read(path)
    [problem] = problems_of(batches)
    assert (problem.kind, problem.row, problem.offset) == ("invalid-utf8", 2, bad_line.index(b"\xe9"))
    # The stdlib decoder with errors="replace" is the reference for the replaced text.
    expected = json.loads(bad_line.decode("utf-8", errors="replace"))["text"]
    assert table_of(batches).column("text").to_pylist() == ["fine", expected]
    assert table_of(batches).column("text").to_pylist()[1] == "caf\ufffd ok"
    assert rows_of(batches) == [0, 2]


def test_mistyped_values_are_read_as_null_and_reported_per_row(tmp_path):
    lines = [b'{"input_ids": [1, 2, 3]}', b'{"input_ids": [4, 5]}', b"", b'{"input_ids": ["a", "b"]}',
             b'{"input_ids": [6]}', b'{"input_ids": "seven"}', b'{"input_ids": [8, 9]}']
    batches = read(write_lines(tmp_path / "types.jsonl", lines))
    problems = problems_of(batches)
    assert [(p.kind, p.row, p.column) for p in problems] == [("mistyped", 3, "input_ids"),
                                                             ("mistyped", 5, "input_ids")]
    assert problems[0].detail == "column 'input_ids' holds list<str> here but list<int> in most rows"
    assert table_of(batches).column("input_ids").to_pylist() == [[1, 2, 3], [4, 5], None, [6], None, [8, 9]]
    assert rows_of(batches) == [0, 1, 3, 4, 5, 6]
    report = run(tmp_path / "types.jsonl", only=("schema-mismatch",))
    [finding] = findings(report, "schema-mismatch", "mistyped")
    assert (finding.count, [r for r, _ in locations(finding)]) == (2, [3, 5])


# -- unreadable files never raise ---------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["e.jsonl", "e.jsonl.gz", "e.parquet", "e.arrow"])
def test_an_empty_file_is_a_problem_not_an_error(tmp_path, name):
    (tmp_path / name).write_bytes(b"")
    batches = read(tmp_path / name)
    assert [(p.kind, p.row) for p in problems_of(batches)] == [("empty", 0)]
    assert rows_of(batches) == []


def test_a_file_of_blank_lines_or_an_empty_gzip_holds_no_records(tmp_path):
    (tmp_path / "blank.jsonl").write_bytes(b"\n\n  \n")
    (tmp_path / "nothing.jsonl.gz").write_bytes(gzip.compress(b""))
    for name in ("blank.jsonl", "nothing.jsonl.gz"):
        assert [(p.kind, p.row) for p in problems_of(read(tmp_path / name))] == [("empty", 0)]


def test_a_corrupt_parquet_file(tmp_path):
    path = write(tmp_path / "c.parquet", {"input_ids": [[1, 2, 3]] * 10})
    data = open(path, "rb").read()
    with open(path, "wb") as fh:
        fh.write(data[:-12] + b"\0" * 12)  # the footer length and the closing magic "PAR1" are gone
    batches = read(path)
    [problem] = problems_of(batches)
    assert (problem.kind, problem.row) == ("unreadable", 0)
    assert rows_of(batches) == []
    (tmp_path / "noise.parquet").write_bytes(bytes(range(256)) * 4)
    assert [(p.kind, p.row) for p in problems_of(read(tmp_path / "noise.parquet"))] == [("unreadable", 0)]


def test_a_truncated_gzip_keeps_the_lines_before_the_cut(tmp_path):
    lines = [json.dumps({"n": i, "text": f"line {i} " * 20}).encode() for i in range(2000)]
    whole = gzip.compress(b"".join(line + b"\n" for line in lines))
    path = tmp_path / "t.jsonl.gz"
    path.write_bytes(whole[: len(whole) // 2])
    batches = read(path, batch_bytes=1 << 14)
    [problem] = problems_of(batches)
    assert problem.kind == "unreadable"
    assert "ends early" in problem.detail and "cut off" in problem.detail
    read_rows = rows_of(batches)
    # The reference: the complete lines the standard library's zlib decodes from what is left of the file.
    decoded = zlib.decompressobj(31).decompress(whole[: len(whole) // 2])
    assert len(read_rows) == decoded.count(b"\n") and 0 < len(read_rows) < 2000
    assert read_rows == list(range(problem.row))  # every line before the cut, and the problem at the first lost
    assert table_of(batches).column("n").to_pylist() == read_rows


def test_a_truncated_arrow_file(tmp_path):
    path = write(tmp_path / "t.arrow", {"input_ids": [[1, 2, 3]] * 100}, fmt="arrow")
    data = open(path, "rb").read()
    with open(path, "wb") as fh:
        fh.write(data[: len(data) // 2])
    batches = read(path)
    assert [(p.kind, p.row) for p in problems_of(batches)] == [("unreadable", 0)]


def _corrupt_middle_row_group(path: str) -> None:
    """Flip 16 bytes in the middle of row group 1's data page (of its only column)."""
    column = pq.ParquetFile(path).metadata.row_group(1).column(0)
    assert not column.has_dictionary_page
    middle = column.data_page_offset + column.total_compressed_size // 2
    data = bytearray(open(path, "rb").read())
    for i in range(middle, middle + 16):
        data[i] ^= 0xFF
    with open(path, "wb") as fh:
        fh.write(bytes(data))


@pytest.mark.parametrize("compression", ["none", "snappy"])
def test_a_corrupt_row_group_is_reported_and_the_others_are_read(tmp_path, compression):
    # Page checksums (Parquet format: PageHeader.crc, CRC-32 of the page) make any flipped byte detectable; pyarrow
    # writes and verifies them from version 15.  Without them an uncompressed page decodes silently into wrong
    # values, which no reader can notice, so that case is not tested here.
    rng = np.random.default_rng(7)
    ids = rng.integers(0, 50_000, size=(300, 64)).tolist()
    path = str(tmp_path / "groups.parquet")
    pq.write_table(pa.table({"input_ids": ids}), path, row_group_size=100, compression=compression,
                   use_dictionary=False, write_page_checksum=True)
    _corrupt_middle_row_group(path)
    batches = read(path)
    [problem] = problems_of(batches)
    assert (problem.kind, problem.row) == ("unreadable", 100)
    assert problem.detail.startswith("row group 1 (rows 100-199) cannot be read: ")
    assert rows_of(batches) == list(range(100)) + list(range(200, 300))
    assert table_of(batches).column("input_ids").to_pylist() == ids[:100] + ids[200:]
    # The engine turns it into one unreadable-shard finding at row 100 and scans the rest.
    report = run(path, only=("unreadable-shard",))
    [finding] = findings(report, "unreadable-shard", "unreadable")
    assert (finding.count, locations(finding)) == (1, [(100, -1)])
    assert report.metrics["rows"] == 200


def test_problems_through_the_engine_never_raise(tmp_path):
    (tmp_path / "empty.jsonl").write_bytes(b"")
    (tmp_path / "noise.parquet").write_bytes(b"PAR1 but nothing else")
    whole = gzip.compress(b'{"n": 1}\n' * 1000)
    (tmp_path / "cut.jsonl.gz").write_bytes(whole[:-20])
    report = run(tmp_path, only=("unreadable-shard",))
    got = sorted((f.uri.rsplit("/", 1)[1], f.kind, f.level.name) for f in report.findings)
    assert got == [("cut.jsonl.gz", "unreadable", "error"), ("empty.jsonl", "empty", "warning"),
                   ("noise.parquet", "unreadable", "error")]


def test_a_byte_order_mark_does_not_cost_the_first_record(tmp_path):
    # The stdlib reference: json.loads(data.decode("utf-8-sig")) reads the first line of a file that starts with
    # a UTF-8 byte-order mark (RFC 8259 §8.1 lets parsers ignore it); so must the reader.
    path = tmp_path / "bom.jsonl"
    path.write_bytes(b"\xef\xbb\xbf" + b'{"text": "first"}\n{"text": "second"}\n')
    expected = [json.loads(line) for line in path.read_bytes().decode("utf-8-sig").splitlines()]
    shard = discover([str(path)])[0]
    with open_shard(shard) as reader:
        got = [b for b in reader]
    assert [p.kind for b in got for p in b.problems] == []
    assert [row for b in got for row in b.table.to_pylist()] == expected
