"""stale-setting: a given special id the shard never uses, a vocab_size below a special id in use, and the findings
of other rules that rest on the stale value, linked to it and listed after it.

Expected numbers are computed with plain Python over the columns the helper builds (tests/shards.py)."""
from __future__ import annotations

import json
import random

from click.testing import CliRunner
from corpuscle.cli import main
from corpuscle.report import text

from tests.shards import findings, pack, run, validate_sarif, write
from tests.test_split import SerialPair, cut  # noqa: F401 - cut: the fixture that splits every shard
from tests.test_split import report as split_report

random.seed(7)
DOCS = [[random.randrange(10, 500) for _ in range(random.randrange(3, 20))] for _ in range(60)]
SEQ = 32


def restarts(cols):
    """(row, offset) of every position_ids restart inside a row, in order."""
    return [(r, t) for r, pos in enumerate(cols["position_ids"]) for t in range(1, len(pos)) if pos[t] == 0]


def test_a_given_eos_that_never_occurs_names_the_id_before_every_restart(tmp_path):
    cols = pack(DOCS, SEQ, eos=3)  # the data's separator is 3; the settings say 2
    path = write(tmp_path / "a.parquet", cols)
    report = run(path, eos_id=2, vocab_size=600)
    expected = restarts(cols)
    assert all(cols["input_ids"][r][t - 1] == 3 for r, t in expected)
    [root] = findings(report, "stale-setting")
    assert (root.kind, root.level.name) == ("eos_id-unseen", "error")
    assert root.count == len(expected) == 56
    assert list(zip(root.rows.tolist(), root.offsets.tolist())) == [(r, t - 1) for r, t in expected]
    assert root.evidence["suggestedValue"] == 3 and root.evidence["occurrences"] == 0
    assert "eos_id = 2 (given) never occurs" in root.message and "eos_id is probably 3" in root.message
    assert root.fix.startswith("Set eos_id = 3 ")
    # missing-separator fires on every boundary: it rests on eos_id, is linked to the cause, and comes after it
    [boundaries] = findings(report, "missing-separator", "boundary-no-eos")
    assert boundaries.count == 56
    assert boundaries.caused_by == root.fingerprint and boundaries.fingerprint in root.explains
    assert report.findings[0] is root and report.findings[1] is boundaries
    summary = text.render(report).splitlines()
    first = next(i for i, line in enumerate(summary) if line.startswith("ERROR"))
    row, token = expected[0][0], expected[0][1] - 1  # the eos place before the first restart: row 0, token 13
    assert summary[first].startswith(f"ERROR stale-setting  {path}: 56 document ends (first at row {row}, token "
                                     f"{token}): eos_id = 2 never occurs")
    assert summary[first + 1].startswith("      fix: Set eos_id = 3 ")
    assert summary[first + 2].startswith("      cause of: ")
    assert summary[first + 3].startswith("ERROR missing-separator ")
    assert summary[first + 4] == "      fix: same cause as the stale-setting finding above: fix that first."


def test_the_right_eos_or_no_given_eos_gives_no_finding(tmp_path):
    cols = pack(DOCS, SEQ, eos=3)
    path = write(tmp_path / "a.parquet", cols)
    assert not findings(run(path, eos_id=3, vocab_size=600), "stale-setting")
    assert not findings(run(path), "stale-setting")  # nothing given: nothing to contradict
    text_path = write(tmp_path / "t.jsonl", {"text": ["an invented note about kettles", "one about gulls"]})
    assert not findings(run(text_path, eos_id=2), "stale-setting")


def test_no_suggestion_when_no_id_stands_at_the_document_ends(tmp_path):
    cols = pack(DOCS, SEQ)  # no separator at all
    path = write(tmp_path / "a.parquet", cols)
    [root] = findings(run(path, eos_id=2), "stale-setting")
    assert root.evidence["suggestedValue"] is None and root.count == len(restarts(cols))
    assert "so no value is suggested" in root.message


def test_a_vocab_size_below_a_special_id_in_use_is_the_stale_setting(tmp_path):
    cols = pack(DOCS, SEQ, eos=512)  # the eos added after the vocabulary of 512 was fixed
    path = write(tmp_path / "a.parquet", cols)
    report = run(path, eos_id=512, vocab_size=512)
    places = [(r, t) for r, ids in enumerate(cols["input_ids"]) for t, i in enumerate(ids) if i == 512]
    [root] = findings(report, "stale-setting")
    assert root.kind == "vocab_size-stale" and root.count == len(places) == 60
    assert root.evidence["suggestedValue"] == 513 and root.evidence["otherIdsAbove"] == 0
    assert root.message.startswith("vocab_size = 512 (given) is stale: special ids at or above it occur in this "
                                   "shard (eos_id = 512 (60 times)) and every id at or above it in the shard is one "
                                   "of these special ids")
    assert "the tokenizer is not at fault" in root.message
    [above] = findings(report, "token-range", "above-vocab")
    [labels] = findings(report, "label-alignment", "label-out-of-vocab")
    assert above.caused_by == labels.caused_by == root.fingerprint
    assert sorted(root.explains) == sorted([above.fingerprint, labels.fingerprint])
    log = validate_sarif(_sarif(path))
    by_rule = {r["ruleId"]: r for r in log["runs"][0]["results"] if r["properties"]["kind"] in
               ("vocab_size-stale", "above-vocab")}
    assert by_rule["token-range"]["properties"]["rootCause"] == by_rule["stale-setting"]["partialFingerprints"][
        "corpuscleFinding/v1"]


def _sarif(path) -> dict:
    CliRunner().invoke(main, ["scan", path, "--eos-id", "512", "--vocab-size", "512", "--jobs", "1", "--sarif",
                              "r.sarif"])
    return json.loads(open("r.sarif").read())


def test_a_given_pad_id_never_used_where_the_mask_marks_padding(tmp_path):
    rows = [[5, 6, 7, 2, 9, 9, 9, 9], [8, 2, 9, 9, 9, 9, 9, 9], [5, 5, 5, 5, 5, 6, 7, 2]]  # pads are id 9
    mask = [[int(i != 9) for i in row] for row in rows]
    path = write(tmp_path / "p.parquet", {"input_ids": rows, "attention_mask": mask})
    [root] = findings(run(path, eos_id=2, pad_id=0), "stale-setting")
    masked = [(r, t) for r, m in enumerate(mask) for t, v in enumerate(m) if v == 0]
    assert (root.kind, root.level.name, root.count) == ("pad_id-unseen", "warning", len(masked))
    assert root.evidence["suggestedValue"] == 9


def test_a_given_eos_never_used_in_a_shard_without_boundaries_is_named_without_a_suggestion(tmp_path):
    rows = [[10 + (r * 7 + t) % 90 for t in range(16)] for r in range(6)]  # ids 10..99: no 2, no restart, no padding
    path = write(tmp_path / "w.parquet", {"input_ids": rows, "position_ids": [list(range(16))] * 6})
    report = run(path, eos_id=2)
    [root] = findings(report, "stale-setting")
    assert (root.kind, root.count, root.unit, root.evidence["suggestedValue"]) == ("eos_id-unseen", 1, "shard", None)
    assert f"never occurs in this shard's {6 * 16} tokens" in root.message
    assert [f.caused_by for f in findings(report, "missing-separator")] == [root.fingerprint]


def test_a_given_bos_that_never_occurs_names_the_id_at_every_document_start(tmp_path):
    stream, pos = [], []
    for doc in DOCS:
        stream += [1] + doc
        pos += list(range(len(doc) + 1))
    spans = [(i, i + SEQ) for i in range(0, len(stream) - SEQ + 1, SEQ)]
    cols = {"input_ids": [stream[a:b] for a, b in spans], "position_ids": [pos[a:b] for a, b in spans]}
    path = write(tmp_path / "b.parquet", cols)
    [root] = findings(run(path, separator="bos-before", bos_id=7), "stale-setting")
    starts = [(r, t) for r, p in enumerate(cols["position_ids"]) for t in range(len(p)) if p[t] == 0]
    assert all(cols["input_ids"][r][t] == 1 for r, t in starts)
    assert root.kind == "bos_id-unseen" and root.count == len(starts)
    assert list(zip(root.rows.tolist(), root.offsets.tolist())) == starts
    assert root.evidence["suggestedValue"] == 1


def test_a_given_pad_id_beyond_the_vocabulary_that_the_shard_never_uses_is_a_warning(tmp_path):
    path = write(tmp_path / "a.parquet", pack(DOCS, SEQ, eos=2))  # packed: no padding, no pad id anywhere
    [f] = findings(run(path, eos_id=2, pad_id=600, vocab_size=600), "stale-setting")
    assert (f.kind, f.level.name, f.count, f.unit) == ("pad_id-beyond-vocab", "warning", 1, "shard")
    assert "pad_id = 600 (given) is at or above vocab_size = 600 (given)" in f.message
    assert not findings(run(path, eos_id=2, pad_id=599, vocab_size=600), "stale-setting")


def test_a_shard_scanned_in_parts_gives_the_findings_of_a_whole_scan(tmp_path, cut):
    cols = pack(DOCS * 4, SEQ, eos=3)
    path = write(tmp_path / "a.parquet", cols, row_group_size=10)
    for given in ({"eos_id": 2}, {"eos_id": 3, "pad_id": 700, "vocab_size": 600}):
        whole = split_report([path], only=("stale-setting",), **given)
        parted = split_report([path], SerialPair(), only=("stale-setting",), **given)
        assert parted == whole and len(cut[-1]) == 2
        assert [f["kind"] for f in whole["findings"]] == (["eos_id-unseen"] if given["eos_id"] == 2 else
                                                            ["pad_id-beyond-vocab"])
    assert whole["findings"] and parted["findings"][0]["count"] == 1
    counts = split_report([path], only=("stale-setting",), eos_id=2)["findings"][0]["count"]
    assert counts == len(restarts(cols))

