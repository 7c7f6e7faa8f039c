"""The README's demo: the bundled shards scan with the exit status and findings the README promises.

The expected defects are the ones fixtures/make_demo.py plants, one per shard; counts are recomputed here with
plain Python over the shard contents as pyarrow reads them (pyarrow is the reference reader)."""
from __future__ import annotations

import json
import os

import pyarrow.parquet as pq
from click.testing import CliRunner
from corpuscle.cli import main

from tests.shards import REPO

DEMO = REPO / "fixtures" / "demo"
CONFIG = REPO / "fixtures" / "demo.toml"


def name(uri):
    return uri.rsplit("/", 1)[-1] if uri else None


def scan_demo(tmp_path):
    out = tmp_path / "demo.json"
    result = CliRunner().invoke(main, ["scan", str(DEMO), "--config", str(CONFIG), "--jobs", "1", "--json", str(out)])
    return result, json.loads(out.read_text())


def document_ids(member: dict) -> list[int]:
    """The token ids of a document located by shard, row, offset and length, read with pyarrow (rows end to end)."""
    rows = pq.read_table(DEMO / name(member["uri"])).column("input_ids").to_pylist()
    start = sum(len(r) for r in rows[:member["row"]]) + member["offset"]
    return [t for r in rows for t in r][start:start + member["length"]]


def test_the_demo_scan_exits_1_and_finds_each_planted_defect(tmp_path):
    result, report = scan_demo(tmp_path)
    assert result.exit_code == 1, result.output
    assert "Traceback" not in result.output
    # The packed pantry shards draw one-sentence documents from a small phrase book, so a few documents recur word
    # for word between shards: exact duplicates as documents, checked here against the token ids pyarrow reads.
    chance = [f for f in report["findings"] if f["rule"] == "exact-duplicate" and "pantry" in f["message"]]
    for f in chance:
        for c in f["evidence"]["clusterList"]:
            copies = [document_ids(m) for m in [c["kept"], *c["others"]]]
            assert all(ids == copies[0] for ids in copies[1:]) and len(copies[0]) == c["kept"]["length"]
    found = {(f["rule"], name(f["uri"])) for f in report["findings"] if f["level"] != "note" and f not in chance}
    assert found == {
        ("label-alignment", "pantry_shifted_twice.parquet"),
        ("label-alignment", "recipes_padded.jsonl"),
        ("padding-loss", "recipes_padded.jsonl"),
        ("missing-separator", "pantry_missing_eos.parquet"),
        ("document-attention", "pantry_no_positions.parquet"),
        ("token-range", "pantry_out_of_range.parquet"),
        ("unreadable-record", "recipes_damaged.jsonl.gz"),
        ("unreadable-shard", "pantry_upload_cut.parquet"),
        ("truncation-waste", "recipes_padded.jsonl"),
        ("truncation-waste", "recipes_damaged.jsonl.gz"),
        ("special-token-text", "notes_forum.jsonl"),
        ("encoding-error", "notes_forum.jsonl"),
        ("empty-document", "notes_forum.jsonl"),
        ("exact-duplicate", None),  # notes_mirror.jsonl copies four notes of notes_text.jsonl word for word
        ("near-duplicate", None),  # ... and three with their last word changed
    }
    copies = {(f["rule"], tuple(sorted((name(m["uri"]), m["row"]) for m in [c["kept"], *c["others"]])))
              for f in report["findings"] if f["rule"].endswith("duplicate") and f not in chance
              for c in f["evidence"]["clusterList"]}
    assert copies == {("exact-duplicate", (("notes_mirror.jsonl", r), ("notes_text.jsonl", r))) for r in range(4)} | \
        {("near-duplicate", (("notes_mirror.jsonl", r), ("notes_text.jsonl", r))) for r in (4, 5, 6)}
    clean = {"pantry_packed_clean.parquet", "pantry_packed_aligned.parquet", "notes_text.jsonl"}
    assert not [f for f in report["findings"] if name(f["uri"]) in clean and f not in chance]


def test_the_demo_counts_match_the_shards(tmp_path):
    _, report = scan_demo(tmp_path)
    by = {(f["rule"], name(f["uri"]), f["kind"]): f for f in report["findings"]}

    # Boundaries without eos (eos id 2 in the demo vocabulary): a position restart inside a row whose previous
    # token is not eos, counted with plain Python over the columns as pyarrow reads them.
    table = pq.read_table(DEMO / "pantry_missing_eos.parquet").to_pydict()
    expected = [(r, t) for r, (ids, pos) in enumerate(zip(table["input_ids"], table["position_ids"]))
                for t in range(1, len(ids)) if pos[t] == 0 and ids[t - 1] != 2]
    f = by[("missing-separator", "pantry_missing_eos.parquet", "boundary-no-eos")]
    assert f["count"] == len(expected) == 23
    assert [(i["row"], i["offset"]) for i in f["instances"]] == expected

    # Labels shifted twice: every row's labels are input_ids[t + 2].
    table = pq.read_table(DEMO / "pantry_shifted_twice.parquet").to_pydict()
    f = by[("label-alignment", "pantry_shifted_twice.parquet", "shift+2")]
    assert (f["evidence"]["observedShift"], f["evidence"]["expectedShift"]) == (2, 1)
    assert f["count"] == len(table["input_ids"])

    # Ids at or above the vocabulary size 512.
    table = pq.read_table(DEMO / "pantry_out_of_range.parquet").to_pydict()
    expected = [(r, t) for r, ids in enumerate(table["input_ids"]) for t, i in enumerate(ids) if i >= 512]
    f = by[("token-range", "pantry_out_of_range.parquet", "above-vocab")]
    assert [(i["row"], i["offset"]) for i in f["instances"]] == expected == [(3, 10), (7, 0)]


# -- the summary a CI log shows ---------------------------------------------------------------------------------


def summary(*extra):
    result = CliRunner().invoke(main, ["scan", str(DEMO), "--config", str(CONFIG), "--jobs", "1", *extra])
    return result.stdout.splitlines()


def test_the_demo_summary_fits_80_lines_and_names_every_rule_with_a_result(tmp_path):
    _, report = scan_demo(tmp_path)
    lines = summary()
    assert len(lines) == 79 <= 80
    assert lines[0].startswith("corpuscle ") and lines[1].startswith("Numbering: rows and offsets are 0-based")
    ruled = sorted({f["rule"] for f in report["findings"]})
    assert len(ruled) == 13
    # the table: one row per rule with a result, its findings, instances and shards (from the JSON report)
    start = lines.index(next(line for line in lines if line.startswith("rule ")))
    table = {line.split()[0]: line.split() for line in lines[start + 1:start + 1 + len(ruled)]}
    assert sorted(table) == ruled
    for rule_id, row in table.items():
        mine = [f for f in report["findings"] if f["rule"] == rule_id]
        shards = {f["uri"] for f in mine if f["uri"]} | {i["uri"] for f in mine if not f["uri"] for i in f["instances"]}
        assert [int(row[2]), int(row[3].replace(",", "")), int(row[4])] == \
            [len(mine), sum(f["count"] for f in mine), len(shards)], rule_id
    # every rule with a result has a line of its own after the table, each finding line followed by one fix line
    heads = [i for i, line in enumerate(lines) if line.split(" ")[0] in ("ERROR", "WARN", "NOTE")]
    assert {lines[i].split()[1] for i in heads} == set(ruled)
    for i in heads:
        follow = lines[i + 1:i + 9]  # a block lists at most five findings and the count of the rest
        assert any(line.startswith("      fix: ") for line in follow)
    # truncation-waste in two shards is one line; exact duplicates: the findings between shards under one block
    # (the five largest listed), and the one finding of a kind of its own (within a shard) on a line
    assert sum(1 for i in heads if lines[i].split()[1] == "truncation-waste") == 1
    assert [lines[i].split()[1] for i in heads].count("exact-duplicate") == 2
    assert "WARN  exact-duplicate  in 7 shards: 6 findings, 18 copies in all; the 5 largest:" in lines
    assert "      and 1 more findings (2 copies), listed in the SARIF/JSON report" in lines
    assert " @" not in "\n".join(lines)  # locations read "row 3, token 20"
    # the verdict is last; no corpus figures without --stats
    assert lines[-1].startswith("9 error(s), 17 warning(s), 1 note(s); exit 1 (fails at: error).")
    assert "Corpus figures" not in lines and not any(line.startswith("Token budget") for line in lines)


def test_stats_adds_the_corpus_figures_and_the_token_budget(tmp_path):
    _, report = scan_demo(tmp_path)
    plain, stats = summary(), summary("--stats")
    budget = report["metrics"]["tokenBudget"]
    assert stats[-1] == plain[-1].replace(plain[-1].split(";")[0], stats[-1].split(";")[0])
    assert stats[2:len(plain) - 2] == plain[2:len(plain) - 2]  # the same lines up to the figures (not the timing)
    block = stats[len(plain) - 2:-2]
    assert block[:2] == ["", "Corpus figures"]
    assert f"  rows: {report['metrics']['rows']:,}" in block and f"  tokens: {report['metrics']['tokens']:,}" in block
    assert (f"Token budget (tokens; seq_len 128; {budget['documents']:,} documents, {budget['documentTokens']:,} "
            "document tokens)") in block
    # 699: the last document of pantry_missing_eos (no eos: its planted defect) is read as running on into the
    # next shard, whose first row starts with nothing that marks a document start (a heuristic, in the metrics)
    assert (budget["documents"], budget["documentTokens"], report["metrics"]["documentTokens"]["documentsAcrossShards"]) == \
        (699, 32607, 1)
    assert len(block) == 41  # blank, heading, 31 lines of figures (wrapped at 100 columns), blank, 7 of the budget


def test_the_long_format_keeps_every_message_in_full(tmp_path):
    _, report = scan_demo(tmp_path)
    long = " ".join(" ".join(summary("--format", "long")).split())
    for f in report["findings"]:
        assert " ".join(f["message"].split()) in long


def test_the_demo_against_its_own_baseline_is_all_unchanged_and_exits_0(tmp_path):
    from tests.shards import validate_sarif

    args = ["scan", str(DEMO), "--config", str(CONFIG), "--jobs", "1"]
    assert CliRunner().invoke(main, [*args, "--sarif", "base.sarif"]).exit_code == 1
    again = CliRunner().invoke(main, [*args, "--baseline", "base.sarif", "--sarif", "now.sarif"])
    assert again.exit_code == 0
    results = validate_sarif(json.loads((tmp_path / "now.sarif").read_text()))["runs"][0]["results"]
    assert [r["baselineState"] for r in results] == ["unchanged"] * 27


# -- the demo's report does not change unless a change says so ---------------------------------------------------

GOLDEN = REPO / "tests" / "data" / "demo-report.json"


def stable(report: dict) -> dict:
    """The JSON report without what differs between runs and machines (timings)."""
    def strip(value):
        if isinstance(value, dict):
            return {k: strip(v) for k, v in value.items() if "second" not in k.lower()}
        if isinstance(value, list):
            return [strip(v) for v in value]
        return value
    return strip(report)


def test_the_demo_report_is_the_recorded_one(tmp_path, monkeypatch):
    """The whole JSON report of the demo (findings, locations, messages, figures) equals the one recorded in
    tests/data/demo-report.json, apart from timings: a refactoring must leave it byte-identical, and a change of
    behaviour shows in that file's diff. Record it again with CORPUSCLE_RECORD_DEMO=1 after such a change."""
    monkeypatch.chdir(REPO)  # shard uris as the README's command gives them: fixtures/demo/...
    out = tmp_path / "demo.json"
    CliRunner().invoke(main, ["scan", "fixtures/demo", "--config", "fixtures/demo.toml", "--jobs", "1", "--json",
                              str(out)])
    report = json.loads(out.read_text())
    now = json.dumps(stable(report), indent=1, sort_keys=True) + "\n"
    if os.environ.get("CORPUSCLE_RECORD_DEMO") == "1":
        GOLDEN.write_text(now)
    assert now == GOLDEN.read_text()
