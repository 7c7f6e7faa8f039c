"""Hostile and unlucky inputs, one test per defect: each becomes a finding at its location (or a one-line usage
error, exit 2, for configs and paths), with a complete report and no traceback; memory stays bounded."""
from __future__ import annotations

import gzip
import json
import os
import shutil
import struct
import subprocess
import sys
import time
import zlib

import numpy as np

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner
from corpuscle.cli import main

from tests.shards import validate_sarif, write


def invoke(*args):
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert "Traceback" not in result.output, result.output
    assert result.exception is None or isinstance(result.exception, SystemExit), repr(result.exception)
    return result


def scan_json(*args):
    """Scan with a JSON report next to the first path; returns (result, report)."""
    first = str(args[0])
    out = os.path.join(os.path.dirname(first) if not os.path.isdir(first) else first, "..", "report.json")
    result = invoke("scan", *args, "--jobs", 1, "--quiet", "--json", out)
    return result, json.loads(open(out).read())


def kinds(report, rule):
    return [(f["kind"], [i["row"] for i in f["instances"]]) for f in report["findings"] if f["rule"] == rule]


# -- 1. one bad file never aborts the scan ------------------------------------------------------------------------

def _arrow_with_bad_offsets(path, stream: bool) -> None:
    """Three record batches; in the middle one the last list offset points far beyond the values (as a damaged
    file may hold: pyarrow's IPC reader checks the layout, not the offsets)."""
    good = pa.record_batch({"input_ids": pa.array([[1, 2, 3], [4, 5, 3]] * 5)})
    bad = pa.record_batch({"input_ids": pa.array([[7, 7, 3]] * 4)})
    sink = pa.BufferOutputStream()
    with (pa.ipc.new_stream if stream else pa.ipc.new_file)(sink, good.schema) as w:
        for rb in (good, bad, good):
            w.write_batch(rb)
    data = sink.getvalue().to_pybytes()
    offsets = struct.pack("<5i", 0, 3, 6, 9, 12)  # the first five offsets of every batch (int32, little-endian)
    first = data.index(offsets)
    second = data.index(offsets, first + 1)
    data = data[:second] + struct.pack("<5i", 0, 3, 6, 9, 1_000_000) + data[second + len(offsets):]
    with open(path, "wb") as fh:
        fh.write(data)


@pytest.mark.parametrize("stream", [False, True], ids=["file", "stream"])
def test_arrow_offsets_that_go_bad_after_the_first_records_are_a_finding(tmp_path, stream):
    _arrow_with_bad_offsets(tmp_path / "bad.arrow", stream)
    write(tmp_path / "good.jsonl", {"input_ids": [[1, 2, 3]] * 4})
    result, report = scan_json(tmp_path / "bad.arrow", tmp_path / "good.jsonl", "--eos-id", 3)
    assert result.exit_code == 1
    (bad,) = [f for f in report["findings"] if f["rule"] == "unreadable-shard"]
    assert "record batch 1 (4 rows from row 10) is invalid" in bad["message"]
    assert [i["row"] for i in bad["instances"]] == [10]
    # The first batch (10 rows) and, in a file, the third (10 more) are scanned; a stream stops at the damage
    # only if pyarrow cannot go on, which it can here: the batch is skipped either way.
    assert report["metrics"]["rows"] == 10 + 10 + 4
    assert not [n for n in report["notes"] if n["level"] == "error"]  # a finding, not an internal error


def test_a_file_name_that_is_not_utf8_is_written_to_sarif_and_json(tmp_path):
    folder = os.fsencode(tmp_path)
    name = folder + b"/caf\xe9.jsonl"
    with open(name, "wb") as fh:
        fh.write(b'{"text": "Warm the milk."}\n{"text": "Warm the milk."}\n')
    sarif, out = tmp_path / "r.sarif", tmp_path / "r.json"
    result = invoke("scan", os.fsdecode(name), "--jobs", 1, "--sarif", sarif, "--json", out, "--fail-at", "warning")
    assert result.exit_code == 1
    log = validate_sarif(json.loads(sarif.read_text(encoding="utf-8")))
    # RFC 3986 §2.1: the byte 0xE9 of the name is percent-encoded as it is on disk.
    assert log["runs"][0]["artifacts"][0]["location"]["uri"].endswith("/caf%E9.jsonl")
    report = json.loads(out.read_text(encoding="utf-8"))
    assert report["shards"][0]["uri"].endswith("/caf\\xe9.jsonl")
    assert [f["rule"] for f in report["findings"]] == ["exact-duplicate"]


# -- 2. memory bounded by the batch, not the longest record --------------------------------------------------------

def test_a_parquet_row_beyond_max_row_tokens_is_reported_without_decoding_it(tmp_path):
    ids = pa.array([0] * 5_000_000, pa.int32())
    column = pa.ListArray.from_arrays(pa.array([0, 5_000_000], pa.int32()), ids)
    pq.write_table(pa.table({"input_ids": column}), tmp_path / "long.parquet", compression="zstd")
    write(tmp_path / "ok.parquet", {"input_ids": [[1, 2, 3]] * 3})
    result, report = scan_json(tmp_path / "long.parquet", tmp_path / "ok.parquet", "--eos-id", 3)
    assert result.exit_code == 1
    assert kinds(report, "unreadable-record") == [("oversized", [0])]
    (f,) = [f for f in report["findings"] if f["rule"] == "unreadable-record"]
    assert "holds 5,000,000 values of column 'input_ids' in 1 row(s)" in f["message"]
    assert report["metrics"]["rows"] == 3


def _list_column(lengths, values) -> pa.ListArray:
    """A list<int32> column of rows of these lengths over ``values`` (numpy, concatenated)."""
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int32)
    return pa.ListArray.from_arrays(pa.array(offsets), pa.array(values))


def _tree_peak(args) -> tuple[int, int]:
    """(exit status, peak resident bytes of the process and all below it), sampled from /proc every 20 ms."""
    from tests.perf.bench_limits import tree_rss

    process = subprocess.Popen([str(a) for a in args], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    top = 0
    while process.poll() is None:
        top = max(top, tree_rss(process.pid))
        time.sleep(0.02)
    return process.returncode, top


@pytest.mark.skipif(not os.path.isdir("/proc/self"), reason="measures memory from /proc (Linux)")
def test_one_huge_row_among_small_ones_in_a_row_group_is_never_decoded(tmp_path):
    """One row group: 5,000 rows of 10 ids, a row of 5M ids (over max_row_tokens, decodable), 5,000 rows of 10,
    and a last row of 50M ids (beyond what is decoded at all).  The average row (about 5,500 ids) is far within
    max_row_tokens, so only the rows' lengths can tell."""
    rng = np.random.default_rng(16)
    small = rng.integers(0, 32_000, 10_000 * 10, dtype=np.int32)
    small[6_123 * 10 + 4] = 40_000  # row 6,123 of the small rows, which is shard row 6,124: offset 4
    lengths = [10] * 5_000 + [5_000_000] + [10] * 5_000 + [50_000_000]
    values = np.concatenate([small[:50_000], np.full(5_000_000, 11, np.int32), small[50_000:],
                             np.full(50_000_000, 7, np.int32)])
    path = tmp_path / "huge_row.parquet"
    pq.write_table(pa.table({"input_ids": _list_column(lengths, values)}), path, row_group_size=1 << 30,
                   compression="zstd")
    del values
    assert pq.ParquetFile(path).metadata.num_row_groups == 1
    # What decoding the last row takes, measured with pyarrow itself (the reference reader): over 1 GiB here.
    code = ("import pyarrow.parquet as pq, sys\n"
            "for b in pq.ParquetFile(sys.argv[1]).iter_batches(batch_size=1, row_groups=[0]): pass")
    status, decoding = _tree_peak([sys.executable, "-c", code, path])
    assert status == 0
    out = tmp_path / "r.json"
    status, peak = _tree_peak([os.path.join(os.path.dirname(sys.executable), "corpuscle"), "scan", path, "--jobs",
                               2, "--quiet", "--vocab-size", 32_000, "--json", out])
    assert status == 1
    assert peak < 1.5 * 2 ** 30  # the bound the README states
    assert peak < decoding / 2, (peak, decoding)  # the 50M row was never decoded
    report = json.loads(out.read_text())
    (oversized,) = [f for f in report["findings"] if f["rule"] == "unreadable-record"]
    assert (oversized["kind"], [i["row"] for i in oversized["instances"]]) == ("oversized", [5_000, 10_001])
    (above,) = [f for f in report["findings"] if f["rule"] == "token-range"]
    assert [(i["row"], i["offset"]) for i in above["instances"]] == [(6_124, 4)]
    assert report["metrics"]["rows"] == 10_000 and report["metrics"]["tokens"] == 100_000


def test_rows_after_one_too_large_to_decode_are_named_as_not_checked(tmp_path):
    """With max_row_tokens = 100, at most 400 values of a row are decoded: the rows' lengths come from the
    pages' repetition levels, in every codec and both data page versions pyarrow writes."""
    lengths = [10] * 50 + [200] + [10] * 50 + [1_000] + [10] * 20 + [300] + [10] * 5
    values = np.arange(sum(lengths), dtype=np.int32) % 1_000
    (tmp_path / "c.toml").write_text("max_row_tokens = 100\n")
    for codec in ("zstd", "snappy", "gzip", "none"):
        for version in ("1.0", "2.0"):
            path = tmp_path / codec / version / "a.parquet"
            path.parent.mkdir(parents=True)
            pq.write_table(pa.table({"input_ids": _list_column(lengths, values)}), path, compression=codec,
                           data_page_version=version, data_page_size=256)  # many pages, rows across them
            result, report = scan_json(path, "--config", tmp_path / "c.toml", "--vocab-size", 1_000)
            (f,) = [f for f in report["findings"] if f["rule"] == "unreadable-record"]
            # rows 50 (200 values: decoded alone and dropped), 101 (1,000: never decoded), 122 (300: after it)
            assert (f["kind"], [i["row"] for i in f["instances"]]) == ("oversized", [50, 101, 122]), (codec, version)
            assert report["metrics"]["rows"] == 100 and report["metrics"]["tokens"] == 1_000
            (lost,) = [f for f in report["findings"] if f["rule"] == "unreadable-shard"]
            assert [i["row"] for i in lost["instances"]] == [102]
            assert "rows 102-127 of row group 0 were not checked: row 101 before them holds 1,000 values" in \
                lost["message"]


def test_an_arrow_row_beyond_max_row_tokens_is_dropped_from_its_batch_and_named(tmp_path):
    write(tmp_path / "a.arrow", {"input_ids": [[1, 3], list(range(40)), [2, 3]]})
    (tmp_path / "c.toml").write_text("max_row_tokens = 10\n")
    result, report = scan_json(tmp_path / "a.arrow", "--config", tmp_path / "c.toml", "--eos-id", 3)
    assert kinds(report, "unreadable-record") == [("oversized", [1])]
    assert report["metrics"]["rows"] == 2 and report["metrics"]["tokens"] == 4


def test_a_gzip_line_that_inflates_beyond_max_record_bytes_is_skipped_and_the_next_lines_read(tmp_path):
    path = tmp_path / "bomb.jsonl.gz"
    with gzip.open(path, "wb", compresslevel=9) as fh:
        fh.write(b'{"text": "first line"}\n{"text": "' + b"a" * (3 << 20) + b'"}\n{"text": "third line"}\n')
    (tmp_path / "c.toml").write_text(f"max_record_bytes = {1 << 20}\n")
    result, report = scan_json(path, "--config", tmp_path / "c.toml")
    assert kinds(report, "unreadable-record") == [("oversized", [1])]
    assert report["metrics"]["rows"] == 2


def test_a_key_per_line_stops_at_max_keys(tmp_path):
    path = tmp_path / "keys.jsonl"
    path.write_text("".join(json.dumps({"text": f"note {i}", f"k{i}": i}) + "\n" for i in range(100)))
    (tmp_path / "c.toml").write_text("max_keys = 11\n")  # text and k0 .. k9
    result, report = scan_json(path, "--config", tmp_path / "c.toml")
    (f,) = [f for f in report["findings"] if f["rule"] == "unreadable-record"]
    assert (f["kind"], f["count"]) == ("too-many-keys", 90)
    assert [i["row"] for i in f["instances"]][:3] == [10, 11, 12]
    assert report["metrics"]["rows"] == 100  # the rest of each record is still scanned


def test_values_nested_deeper_than_max_depth_are_dropped_and_named(tmp_path):
    path = tmp_path / "deep.jsonl"
    deep = '{"a":' * 200 + "1" + "}" * 200
    path.write_text(f'{{"text": "flat", "meta": {deep}}}\n{{"text": "also flat"}}\n')
    result, report = scan_json(path)
    (f,) = [f for f in report["findings"] if f["rule"] == "unreadable-record"]
    assert (f["kind"], [i["row"] for i in f["instances"]]) == ("too-deep", [0])
    assert report["metrics"]["rows"] == 2


def test_limits_are_validated_as_settings(tmp_path):
    (tmp_path / "c.toml").write_text("max_depth = 0\n")
    write(tmp_path / "a.jsonl", {"text": ["x"]})
    result = invoke("scan", tmp_path / "a.jsonl", "--config", tmp_path / "c.toml")
    assert result.exit_code == 2 and "max_depth must be a whole number from 1 to 256" in result.output


# -- 3. bad data that passed with exit 0 ---------------------------------------------------------------------------

def test_a_parquet_footer_claiming_more_rows_than_it_holds_is_a_finding(tmp_path):
    path = tmp_path / "claim.parquet"
    pq.write_table(pa.table({"input_ids": [[1, 2, 3]] * 200}), path)
    data = path.read_bytes()
    size = struct.unpack("<I", data[-8:-4])[0]
    footer = data[-8 - size:-8]

    def varint(v):  # Thrift compact protocol: i64 as zigzag varint (the Parquet footer's encoding)
        out = b""
        while True:
            b, v = v & 0x7F, v >> 7
            if not v:
                return out + bytes([b])
            out += bytes([b | 0x80])

    footer = footer.replace(varint(2 * 200), varint(2 * 2 ** 62))  # num_rows of the file and of its row group
    path.write_bytes(data[:-8 - size] + footer + struct.pack("<I", len(footer)) + b"PAR1")
    assert pq.ParquetFile(path).metadata.num_rows == 2 ** 62  # pyarrow reads the claim as written
    result, report = scan_json(path, "--eos-id", 3)
    assert result.exit_code == 1
    (f,) = [f for f in report["findings"] if f["rule"] == "unreadable-shard"]
    assert "claims 4,611,686,018,427,387,904 rows" in f["message"] and "holds 200" in f["message"]
    assert report["metrics"]["rows"] == 200


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs named pipes")
def test_a_fifo_and_a_device_named_jsonl_are_unreadable_shards_never_opened(tmp_path):
    os.mkfifo(tmp_path / "pipe.jsonl")
    os.symlink("/dev/zero", tmp_path / "zero.jsonl")
    write(tmp_path / "ok.jsonl", {"text": ["Dice the onion."]})
    result, report = scan_json(tmp_path / "pipe.jsonl", tmp_path / "zero.jsonl", tmp_path / "ok.jsonl")
    assert result.exit_code == 1
    messages = {f["uri"].rsplit("/", 1)[-1]: f["message"] for f in report["findings"] if f["rule"] == "unreadable-shard"}
    assert "a FIFO (named pipe), not a regular file" in messages["pipe.jsonl"]
    assert "a character device, not a regular file" in messages["zero.jsonl"]
    assert all(f["level"] == "error" for f in report["findings"] if f["rule"] == "unreadable-shard")
    assert report["metrics"]["rows"] == 1


def test_an_unwritable_signature_folder_is_a_usage_error_before_scanning(tmp_path):
    write(tmp_path / "d" / "a.jsonl", {"text": ["Whisk the eggs."]})
    (tmp_path / "blocker").write_text("a file")
    (tmp_path / "c.toml").write_text(f'[rule.near-duplicate]\nsignature_folder = "{tmp_path / "blocker" / "sig"}"\n')
    result = invoke("scan", tmp_path / "d", "--config", tmp_path / "c.toml")
    assert result.exit_code == 2
    assert "is a file, not a folder" in result.output and "signature_folder" in result.output
    assert len(result.output.strip().splitlines()) == 1


@pytest.mark.parametrize("args, message", [
    (["--seq-len", 10 ** 11], "seq_len must be at most 16,777,216 tokens"),
    (["--eos-id", 2 ** 64], "eos_id must fit in a 64-bit integer"),
], ids=["seq-len", "eos-id"])
def test_values_out_of_range_are_usage_errors(tmp_path, args, message):
    write(tmp_path / "a.jsonl", {"text": ["Chop the parsley."]})
    result = invoke("scan", tmp_path / "a.jsonl", *args)
    assert result.exit_code == 2 and message in result.output


def test_a_float_in_an_integer_list_is_named_per_row_and_the_other_rows_are_checked(tmp_path):
    rows = [[5, 6, 7, 2] for _ in range(14)]
    rows[3], rows[5], rows[7] = [5, 6.5, 2], [5, None, 2], [5, [6], 2]
    path = tmp_path / "mixed.jsonl"
    path.write_text("".join(json.dumps({"input_ids": r}) + "\n" for r in rows))
    result, report = scan_json(path, "--eos-id", 2)
    (f,) = [f for f in report["findings"] if f["rule"] == "schema-mismatch"]
    assert f["kind"] == "mistyped" and [i["row"] for i in f["instances"]] == [3, 5, 7]
    assert report["metrics"]["tokens"] == 11 * 4  # the clean rows still read as integer token ids
    assert not [n for n in report["notes"] if "skipped" in n["message"] and n["rule"] == "token-range"
                and "not a list of integers" in n["message"]]


# -- 4. inputs and outputs ---------------------------------------------------------------------------------------

def test_reports_that_would_overwrite_input_shards_are_refused_before_scanning(tmp_path):
    a = write(tmp_path / "in.jsonl", {"text": ["Roast the squash."]})
    b = write(tmp_path / "in.parquet", {"text": ["Roast the squash."]})
    before = (open(a, "rb").read(), open(b, "rb").read())
    result = invoke("scan", a, b, "--sarif", a, "--json", b)
    assert result.exit_code == 2 and "is one of the input shards" in result.output
    assert (open(a, "rb").read(), open(b, "rb").read()) == before


def test_a_drop_list_inside_the_scanned_folder_is_refused(tmp_path):
    write(tmp_path / "data" / "a.jsonl", {"text": ["Proof the yeast."]})
    result = invoke("scan", tmp_path / "data", "--drop-list", tmp_path / "data" / "drops.jsonl")
    assert result.exit_code == 2 and "would be read as a shard by the next scan" in result.output
    assert not (tmp_path / "data" / "drops.jsonl").exists()
    ok = invoke("scan", tmp_path / "data", "--drop-list", tmp_path / "data" / "drops.json", "--quiet")
    assert ok.exit_code == 0  # an ending corpuscle does not scan is fine


def test_an_output_under_a_file_is_refused_before_scanning_with_a_clear_message(tmp_path):
    write(tmp_path / "a.jsonl", {"text": ["Sift the flour."]})
    (tmp_path / "notadir").write_text("x")
    result = invoke("scan", tmp_path / "a.jsonl", "--sarif", tmp_path / "notadir" / "r.sarif")
    assert result.exit_code == 2
    assert f"{tmp_path / 'notadir'} is a file, not a folder" in result.output
    assert "File exists" not in result.output


def test_a_gzip_damaged_near_its_end_reports_the_rows_before_the_damage_and_the_byte(tmp_path):
    data = b"".join(json.dumps({"text": f"recipe note number {i} with some words"}).encode() + b"\n"
                    for i in range(200))
    packed = bytearray(gzip.compress(data))
    packed[-20] ^= 0xFF  # inside the last deflate block, before the 8-byte trailer
    path = tmp_path / "d.jsonl.gz"
    path.write_bytes(bytes(packed))
    # The reference: what the standard library's zlib decodes before it fails (in 1-byte steps, to the byte).
    reference, decoder = b"", zlib.decompressobj(31)
    try:
        for i in range(len(packed)):
            reference += decoder.decompress(bytes(packed[i:i + 1]))
    except zlib.error:
        pass
    complete = reference.count(b"\n")
    result, report = scan_json(path)
    assert result.exit_code == 1
    (f,) = [f for f in report["findings"] if f["rule"] == "unreadable-shard"]
    assert report["metrics"]["rows"] == complete and complete > 150
    assert [i["row"] for i in f["instances"]] == [complete]
    assert "byte" in f["message"] and "nothing in it could be read" not in f["message"].lower()


@pytest.mark.skipif(shutil.which("zstd") is None, reason="needs the zstd command to write a frame with a checksum")
def test_a_bit_flip_in_a_zstd_frame_with_a_checksum_is_a_finding(tmp_path):
    data = b"".join(json.dumps({"text": f"stock note {i} simmer slowly"}).encode() + b"\n" for i in range(300))
    (tmp_path / "z.jsonl").write_bytes(data)
    subprocess.run(["zstd", "-q", "-f", str(tmp_path / "z.jsonl"), "-o", str(tmp_path / "z.jsonl.zst")], check=True)
    os.unlink(tmp_path / "z.jsonl")
    raw = bytearray((tmp_path / "z.jsonl.zst").read_bytes())
    raw[len(raw) // 2] ^= 0x10
    (tmp_path / "z.jsonl.zst").write_bytes(bytes(raw))
    result, report = scan_json(tmp_path / "z.jsonl.zst")
    assert result.exit_code == 1
    assert [f["kind"] for f in report["findings"] if f["rule"] == "unreadable-shard"] == ["unreadable"]


def test_a_zstd_frame_without_a_checksum_gets_a_note(tmp_path):
    write(tmp_path / "n.jsonl.zst", {"text": ["Blanch the beans."]})  # pyarrow writes frames without checksum
    result, report = scan_json(tmp_path / "n.jsonl.zst")
    assert result.exit_code == 0
    assert any("carries no content checksum" in n["message"] for n in report["notes"] if n["level"] == "note")


# -- 5. globs ------------------------------------------------------------------------------------------------------

def test_a_recursive_glob_over_a_symlink_loop_finds_each_shard_once(tmp_path):
    write(tmp_path / "d" / "a.jsonl", {"text": ["Grate the cheese."]})
    write(tmp_path / "d" / "sub" / "b.jsonl", {"text": ["Slice the bread."]})
    os.symlink("..", tmp_path / "d" / "sub" / "up")
    os.symlink(str(tmp_path / "d"), tmp_path / "d" / "sub" / "again")
    out = tmp_path / "r.json"
    invoke("scan", str(tmp_path / "d") + "/**/*.jsonl", "--jobs", 1, "--quiet", "--json", out)
    report = json.loads(out.read_text())
    assert sorted(s["uri"].rsplit("/", 1)[-1] for s in report["shards"]) == ["a.jsonl", "b.jsonl"]
    assert report["metrics"]["rows"] == 2


# -- 6. config -----------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("text, message", [
    ("[tool]\ncorpuscle = 5\n", "[tool.corpuscle] must be a table of settings"),
    ('tool = "x"\n', "'tool' must be a table"),
    ('[tool]\ncorpuscle = "eos"\n', "[tool.corpuscle] must be a table of settings"),
], ids=["number", "tool-string", "string"])
def test_a_malformed_tool_table_in_pyproject_is_one_line_exit_2(tmp_path, monkeypatch, text, message):
    write(tmp_path / "a.jsonl", {"text": ["Zest the lemon."]})
    (tmp_path / "pyproject.toml").write_text(text)
    monkeypatch.chdir(tmp_path)
    result = invoke("scan", "a.jsonl")
    assert result.exit_code == 2 and message in result.output
    assert len(result.output.strip().splitlines()) == 1


@pytest.mark.parametrize("make, message", [
    (lambda p: "/dev/zero", "is not a regular file"),
    (lambda p: (os.mkfifo(p / "fifo.toml"), str(p / "fifo.toml"))[1], "is not a regular file"),
    (lambda p: ((p / "big.toml").write_text("# " + "x" * (2 << 20) + "\n"), str(p / "big.toml"))[1],
     "more than a settings file needs"),
], ids=["device", "fifo", "too-large"])
def test_a_config_that_is_not_a_small_regular_file_is_refused(tmp_path, make, message):
    write(tmp_path / "a.jsonl", {"text": ["Toast the oats."]})
    result = invoke("scan", tmp_path / "a.jsonl", "--config", make(tmp_path))
    assert result.exit_code == 2 and message in result.output


@pytest.mark.parametrize("toml, message", [
    ("[rule.near-duplicate]\nnum_perm = 100000000\n", "num_perm must be between 1 and 4096"),
    ("[rule.near-duplicate]\nn = 1000000000\n", "n must be between 1 and 256"),
    ('[paths."["]\neos_id = 2\n', "is never closed"),
    ("ignore_index = 99999999999999999999\n", "ignore_index must fit in a 64-bit integer"),
    ("instance_cap = 1000000000\n", "instance_cap must be at most"),
], ids=["num-perm", "n", "glob", "ignore-index", "instance-cap"])
def test_config_values_beyond_sane_bounds_are_one_line_exit_2(tmp_path, toml, message):
    write(tmp_path / "a.jsonl", {"text": ["Toast the oats."]})
    (tmp_path / "c.toml").write_text(toml)
    result = invoke("scan", tmp_path / "a.jsonl", "--config", tmp_path / "c.toml")
    assert result.exit_code == 2 and message in result.output, result.output
    assert len(result.output.strip().splitlines()) == 1


# -- 7. --cluster local is secured ---------------------------------------------------------------------------------

def test_a_local_cluster_refuses_a_client_without_this_runs_certificate():
    distributed = pytest.importorskip("distributed")
    pytest.importorskip("cryptography")
    from corpuscle.engine.executors import DaskExecutor
    from distributed.security import Security

    with DaskExecutor("local", 1) as executor:
        address = executor.client.scheduler.address
        assert address.startswith("tls://127.0.0.1:")
        assert executor.client.submit(sum, [1, 2]).result() == 3  # this run's client works
        with pytest.raises(Exception, match="(?i)tls|certificate|ssl"):
            distributed.Client(address, timeout=5, security=Security.temporary())  # another certificate
        with pytest.raises(Exception):
            distributed.Client(address.replace("tls://", "tcp://"), timeout=5)  # no TLS at all


def test_a_null_inside_an_integer_list_is_named_not_read_as_id_minus_one(tmp_path):
    path = tmp_path / "nulls.jsonl"
    path.write_text('{"input_ids": [5, 6, 2]}\n{"input_ids": [5, null, 2]}\n{"input_ids": [5, 7, 2]}\n')
    result, report = scan_json(path, "--eos-id", 2, "--vocab-size", 10)
    (f,) = [f for f in report["findings"] if f["rule"] == "schema-mismatch"]
    assert (f["kind"], [i["row"] for i in f["instances"]]) == ("mistyped", [1])
    assert "list<int|null>" in f["message"]
    assert not [f for f in report["findings"] if f["rule"] == "token-range"]
    assert report["metrics"]["tokens"] == 6
