"""The README's demo: the bundled shards scan with the exit status and findings the README promises.

The expected defects are the ones fixtures/make_demo.py plants, one per shard; counts are recomputed here with
plain Python over the shard contents as pyarrow reads them (pyarrow is the reference reader)."""
from __future__ import annotations

import json

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
