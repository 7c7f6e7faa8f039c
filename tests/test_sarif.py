"""SARIF output: every log produced here is validated against the OASIS SARIF 2.1.0 JSON schema
(source: OASIS Static Analysis Results Interchange Format Version 2.1.0, errata01, sarif-schema-2.1.0.json, kept at
tests/data/ in the repository) with jsonschema, and checked for the shape corpuscle promises.
"""
from __future__ import annotations

import gzip
import json
import os

import pytest
from click.testing import CliRunner
from corpuscle import Settings, __version__, scan
from corpuscle.cli import main
from corpuscle.engine.registry import registry
from corpuscle.report import sarif

from tests.shards import pack, run, sarif_validator, write


@pytest.fixture(scope="module")
def validator():
    validator = sarif_validator()
    type(validator).check_schema(validator.schema)
    return validator


def valid(validator, log: dict) -> dict:
    errors = sorted(validator.iter_errors(log), key=lambda e: list(e.absolute_path))
    assert not errors, "\n".join(f"{list(e.absolute_path)}: {e.message}" for e in errors[:5])
    return log


def sarif_of(validator, paths, **settings) -> dict:
    """Scan in this process and render the report as SARIF (a round trip through its bytes), validated."""
    report = run(paths, **settings)
    return valid(validator, json.loads(sarif.render(report)))


# -- shards -------------------------------------------------------------------------------------------------

DOCS = [[10 + (i * 7) % 50, 11 + (i * 3) % 40, 12 + i % 30] for i in range(40)]

BROKEN_LINES = [
    b'{"input_ids": [10, 11, 12, 2]}',
    b"",
    b'{"input_ids": [10, 11',  # line index 2: not JSON
    b'{"input_ids": [13, 14, 2]}',
    b"[1, 2]",  # line index 4: not an object
    b'{"input_ids": "15 16 2"}',  # line index 5: a string where a list of ids belongs
]


def broken(path):
    with open(path, "wb") as fh:
        fh.write(b"\n".join(BROKEN_LINES) + b"\n")
    return str(path)


@pytest.fixture
def shards(tmp_path):
    """A clean packed shard, a broken JSON Lines shard, a corrupt Parquet file and an empty file."""
    os.makedirs("data")
    write("data/clean.parquet", pack(DOCS, 8, eos=2))
    broken("data/broken.jsonl")
    with open("data/corrupt.parquet", "wb") as fh:
        fh.write(b"PAR1" + bytes(100) + b"PAR1")
    open("data/empty.jsonl.gz", "wb").close()
    return tmp_path


# -- validity -----------------------------------------------------------------------------------------------


def test_a_clean_scan_is_valid_sarif_with_no_results(validator, shards):
    log = sarif_of(validator, "data/clean.parquet", vocab_size=100)
    assert log["version"] == "2.1.0"
    assert log["$schema"] == sarif.SCHEMA_URI
    assert log["runs"][0]["results"] == []


def test_a_broken_corpus_is_valid_sarif(validator, shards):
    log = sarif_of(validator, "data")
    results = log["runs"][0]["results"]
    kinds = {(r["ruleId"], r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"]) for r in results}
    assert {("unreadable-record", "data/broken.jsonl"), ("schema-mismatch", "data/broken.jsonl"),
            ("unreadable-shard", "data/corrupt.parquet"), ("unreadable-shard", "data/empty.jsonl.gz")} <= kinds


def test_the_file_written_by_the_cli_is_valid_sarif(validator, shards):
    for args in (["data"], ["data/clean.parquet", "--vocab-size", "100"], ["data/corrupt.parquet"],
                 ["data/empty.jsonl.gz", "--only", "unreadable-shard"]):
        result = CliRunner().invoke(main, ["scan", *args, "--sarif", "out.sarif", "--jobs", "1"])
        assert result.exit_code in (0, 1), result.output
        valid(validator, json.loads((shards / "out.sarif").read_text()))


def test_notifications_of_skipped_rules_and_inferred_values_are_valid(validator, tmp_path):
    write("text.jsonl", {"text": ["an invented sentence about kettles", "another about lighthouses"]})
    cols = pack(DOCS, 8, eos=2)
    write("ids.parquet", cols)
    log = sarif_of(validator, ["text.jsonl", "ids.parquet"])
    notes = log["runs"][0]["invocations"][0]["toolExecutionNotifications"]
    assert any(n["message"]["text"].startswith("seq_len = 8 inferred (heuristic)") for n in notes)
    skipped = [n for n in notes if n["message"]["text"] == "skipped: no 'input_ids' column"]
    assert skipped and all(n["associatedRule"]["id"] in registry() and n["level"] == "note" for n in skipped)
    assert {n["locations"][0]["physicalLocation"]["artifactLocation"]["uri"] for n in skipped} == {"text.jsonl"}
    assert log["runs"][0]["invocations"][0]["executionSuccessful"] is True


# -- shape (DESIGN.md section 5) ----------------------------------------------------------------------------


def test_driver_describes_every_rule_that_ran(validator, shards):
    log = sarif_of(validator, "data")
    driver = log["runs"][0]["tool"]["driver"]
    assert (driver["name"], driver["version"]) == ("corpuscle", __version__)
    available = registry()
    assert [r["id"] for r in driver["rules"]] == list(available)
    for entry in driver["rules"]:
        rule = available[entry["id"]]()
        assert entry["shortDescription"]["text"] == rule.summary
        assert entry["fullDescription"]["text"] == rule.description
        assert entry["help"]["text"].startswith(rule.help)
        assert entry["defaultConfiguration"]["level"] == rule.level.name
    only = sarif_of(validator, "data", only=("unreadable-shard",))["runs"][0]["tool"]["driver"]["rules"]
    assert [r["id"] for r in only] == ["unreadable-shard"]


def test_artifacts_carry_the_uri_as_given_and_the_length_in_bytes(validator, shards):
    log = sarif_of(validator, ["data/corrupt.parquet", "./data/clean.parquet", str(shards / "data" / "broken.jsonl")])
    artifacts = log["runs"][0]["artifacts"]
    assert [a["location"]["uri"] for a in artifacts] == [
        "data/corrupt.parquet", "./data/clean.parquet", str(shards / "data" / "broken.jsonl")]
    assert [a["length"] for a in artifacts] == [os.path.getsize(a["location"]["uri"]) for a in artifacts]
    assert artifacts[0]["length"] == 108


def test_results_have_rule_level_message_and_locations(validator, shards):
    log = sarif_of(validator, "data")
    run_ = log["runs"][0]
    rule_ids = [r["id"] for r in run_["tool"]["driver"]["rules"]]
    artifact_uris = [a["location"]["uri"] for a in run_["artifacts"]]
    assert run_["results"]
    for r in run_["results"]:
        assert r["level"] in ("error", "warning", "note")
        assert rule_ids[r["ruleIndex"]] == r["ruleId"]
        assert len(r["message"]["text"]) > 20
        location = r["locations"][0]["physicalLocation"]["artifactLocation"]
        assert artifact_uris[location["index"]] == location["uri"]
        assert set(r["properties"]) >= {"count", "instances"}
        assert r["properties"]["count"] >= len(r["properties"]["instances"])
    empty = [r for r in run_["results"] if r["ruleId"] == "unreadable-shard"
             and r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"] == "data/empty.jsonl.gz"]
    assert [r["level"] for r in empty] == ["warning"]


def test_json_lines_results_point_at_the_first_affected_line(validator, shards):
    log = sarif_of(validator, "data/broken.jsonl", only=("unreadable-record", "schema-mismatch"))
    got = {}
    for r in log["runs"][0]["results"]:
        region = r["locations"][0]["physicalLocation"]["region"]
        got[r["ruleId"], r["properties"]["instances"][0]["row"]] = (region["startLine"], r["properties"]["count"])
    # SARIF startLine is 1-based (SARIF 2.1.0 section 3.30.5); rows are 0-based line indices, blank lines counted.
    assert got == {("unreadable-record", 2): (3, 1), ("unreadable-record", 4): (5, 1),
                   ("schema-mismatch", 5): (6, 1)}


def test_parquet_results_have_no_line_region(validator, tmp_path):
    cols = pack(DOCS, 8, eos=2)
    cols["labels"][2] = cols["labels"][2][:3]
    write("short.parquet", cols)
    log = sarif_of(validator, "short.parquet", only=("schema-mismatch",))
    [result] = log["runs"][0]["results"]
    assert "region" not in result["locations"][0]["physicalLocation"]
    assert result["properties"]["instances"] == [{"row": 2, "offset": 3}]


def test_fingerprints_are_stable_across_runs(validator, shards):
    def prints(paths):
        log = sarif_of(validator, paths)
        return {(r["ruleId"], r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"],
                 r["properties"]["instances"][0]["row"] if r["properties"]["instances"] else None):
                r["partialFingerprints"]["corpuscleFinding/v1"] for r in log["runs"][0]["results"]}

    first = prints(["data"])
    second = prints(["data/empty.jsonl.gz", "data/broken.jsonl", "data/corrupt.parquet", "data/clean.parquet"])
    assert first == second
    assert len(set(first.values())) == len(first)  # one fingerprint per finding
    assert all(len(v) == 32 and int(v, 16) >= 0 for v in first.values())


def test_instances_are_capped_and_the_cut_is_flagged(validator, tmp_path):
    lines = [b'{"n": 1' if i % 2 else b'{"n": 0}' for i in range(20)]  # 10 bad lines: odd indices 1..19
    with open("many.jsonl", "wb") as fh:
        fh.write(b"\n".join(lines) + b"\n")
    capped = sarif_of(validator, "many.jsonl", only=("unreadable-record",), instance_cap=3)
    [result] = capped["runs"][0]["results"]
    assert result["properties"]["count"] == 10
    assert result["properties"]["instances"] == [{"row": 1, "offset": 7}, {"row": 3, "offset": 7},
                                                 {"row": 5, "offset": 7}]
    assert result["properties"]["instancesTruncated"] is True
    whole = sarif_of(validator, "many.jsonl", only=("unreadable-record",))
    [result] = whole["runs"][0]["results"]
    assert [i["row"] for i in result["properties"]["instances"]] == list(range(1, 20, 2))
    assert "instancesTruncated" not in result["properties"]


def test_run_metrics(validator, tmp_path):
    cols = pack(DOCS, 8, eos=2)  # 20 windows of 8 tokens
    write("a.parquet", cols)
    write("b.jsonl.gz", cols)
    log = sarif_of(validator, ["a.parquet", "b.jsonl.gz"])
    metrics = log["runs"][0]["properties"]["metrics"]
    assert (metrics["shards"], metrics["rows"], metrics["tokens"]) == (2, 40, 320)
    assert metrics["bytes"] == os.path.getsize("a.parquet") + os.path.getsize("b.jsonl.gz")
    assert metrics["seconds"] >= 0
    with gzip.open("b.jsonl.gz") as fh:  # the stdlib gzip module agrees on what the shard holds
        assert sum(len(json.loads(line)["input_ids"]) for line in fh) == 160


def test_the_api_report_and_the_cli_file_agree(validator, shards):
    report = scan(["data"], Settings(), jobs=1)
    CliRunner().invoke(main, ["scan", "data", "--sarif", "cli.sarif", "--jobs", "1"])
    from_cli = valid(validator, json.loads((shards / "cli.sarif").read_text()))
    from_api = valid(validator, json.loads(sarif.render(report)))
    assert from_cli["runs"][0]["results"] == from_api["runs"][0]["results"]
    assert from_cli["runs"][0]["artifacts"] == from_api["runs"][0]["artifacts"]


def test_a_uri_with_a_space_is_percent_encoded(validator, tmp_path):
    # RFC 3986 §2.1 (percent-encoding) and SARIF 2.1.0 §3.4.3: artifactLocation.uri is a URI reference, so a
    # space in a file name is written as %20; the uri stays otherwise as given.
    write("my data/clean shard.parquet", pack(DOCS, 8, eos=2))
    log = sarif_of(validator, "my data/clean shard.parquet", vocab_size=100)
    assert [a["location"]["uri"] for a in log["runs"][0]["artifacts"]] == ["my%20data/clean%20shard.parquet"]
