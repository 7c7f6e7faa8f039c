"""Inputs a real corpus holds now and then: they become findings at their location, never a crash."""
from __future__ import annotations

import os

import pyarrow as pa
import pyarrow.parquet as pq
from click.testing import CliRunner
from corpuscle.cli import main

from tests.shards import findings, locations, run


def test_a_symbolic_link_loop_is_an_unreadable_shard_and_the_rest_is_scanned(tmp_path):
    os.symlink("b.jsonl", tmp_path / "a.jsonl")
    os.symlink("a.jsonl", tmp_path / "b.jsonl")
    (tmp_path / "good.jsonl").write_text('{"text": "Rye bread wants a long, cool rise."}\n')
    result = CliRunner().invoke(main, ["scan", str(tmp_path), "--jobs", "1", "--json", str(tmp_path / "r.json")])
    assert result.exit_code == 1, result.output
    assert isinstance(result.exception, SystemExit) and "Traceback" not in result.output
    report = run(tmp_path)
    bad = findings(report, "unreadable-shard")
    assert sorted(os.path.basename(f.uri) for f in bad) == ["a.jsonl", "b.jsonl"]
    # SARIF 2.1.0 §3.24.10 (artifact.length): -1 means the length is not known.
    assert {s.uri.rsplit("/", 1)[-1]: s.length for s in report.shards} == {
        "a.jsonl": -1, "b.jsonl": -1, "good.jsonl": os.path.getsize(tmp_path / "good.jsonl")}
    assert report.metrics["rows"] == 1


def test_a_dictionary_encoded_text_column_is_text(tmp_path):
    # pyarrow's dictionary_encode is the reference for the encoding; the scan must see the decoded strings.
    texts = ["Sear the leeks.", "", "Sear the leeks."]
    path = tmp_path / "d.parquet"
    pq.write_table(pa.table({"text": pa.array(texts).dictionary_encode()}), path)
    report = run(path)
    assert not findings(report, "schema-mismatch")
    (empty,) = findings(report, "empty-document")
    assert locations(empty) == [(1, -1)]
    (copies,) = findings(report, "exact-duplicate")
    assert copies.rows.tolist() == [0, 2]


def test_a_binary_text_column_is_named_as_text_in_the_schema_finding(tmp_path):
    path = tmp_path / "b.parquet"
    pq.write_table(pa.table({"text": pa.array([b"abc", b"\xff"], type=pa.binary())}), path)
    (f,) = findings(run(path), "schema-mismatch")
    assert f.count == 2 and "not a string column of document text" in f.message
    assert f.evidence == {"column": "text", "observedType": "binary"}
