"""Tests for rules/attention.py (document-attention).

Expected rows, offsets and shares are computed here by plain Python over the same lists the shards are written
from: a row holds several documents when a separator sits before its last real token.
"""
import pytest
from corpuscle import Level

from tests.shards import findings, locations, pack, run, write
from tests.test_separators import BOS, EOS, PAD, documents, real_lengths

RULE = "document-attention"
SEQ = 16


def inner_eos(id_rows, pad=PAD):
    """Per row: indices of eos followed by another real token of the same row."""
    return [[i for i in range(n - 1) if row[i] == EOS] for row, n in zip(id_rows, real_lengths(id_rows, pad))]


def expected_crossing(id_rows):
    inner = inner_eos(id_rows)
    rows = [(r, found[0]) for r, found in enumerate(inner) if found]
    docs = [len(found) + 1 for found in inner if found]
    return rows, docs


def check(f, id_rows):
    rows, docs = expected_crossing(id_rows)
    assert len(rows) >= 10
    assert f.level == Level.warning
    assert f.count == len(rows)
    assert locations(f) == rows
    assert f.evidence["rowsAffected"] == len(rows)
    assert f.evidence["rows"] == len(id_rows)
    assert f.evidence["share"] == pytest.approx(len(rows) / len(id_rows))
    assert f.evidence["meanDocumentsPerAffectedRow"] == pytest.approx(sum(docs) / len(docs))


def test_packed_rows_without_position_ids(tmp_path):
    cols = pack(documents(60, seed=8), SEQ, eos=EOS, pad=PAD, positions=False)
    report = run(write(tmp_path / "packed.parquet", cols), eos_id=EOS, pad_id=PAD)
    (f,) = findings(report, RULE)
    check(f, cols["input_ids"])
    assert "no position_ids column" in f.message and "document-aware attention mask" in f.message


def test_position_ids_that_never_restart(tmp_path):
    cols = pack(documents(60, seed=8), SEQ, eos=EOS, pad=PAD, positions=False)
    cols["position_ids"] = [list(range(SEQ)) for _ in cols["input_ids"]]  # 0..L-1 in every row
    (f,) = findings(run(write(tmp_path / "arange.parquet", cols), eos_id=EOS, pad_id=PAD), RULE)
    check(f, cols["input_ids"])
    assert "never restart" in f.message


def test_no_finding_with_position_ids_restarting_per_document(tmp_path):
    cols = pack(documents(60, seed=8), SEQ, eos=EOS, pad=PAD)
    assert findings(run(write(tmp_path / "aware.parquet", cols), eos_id=EOS, pad_id=PAD), RULE) == []


def test_no_finding_for_padded_rows_of_one_document(tmp_path):
    ids, mask = [], []
    for doc in documents(20, seed=6, low=2, high=SEQ - 1):
        row = doc + [EOS]
        mask.append([1] * len(row) + [0] * (SEQ - len(row)))
        ids.append(row + [PAD] * (SEQ - len(row)))
    assert findings(run(write(tmp_path / "one.parquet", {"input_ids": ids, "attention_mask": mask}), eos_id=EOS),
                    RULE) == []
    assert findings(run(write(tmp_path / "one_nomask.parquet", {"input_ids": ids}), eos_id=EOS, pad_id=PAD),
                    RULE) == []


def test_no_finding_when_pad_is_eos(tmp_path):
    # Rows of one document padded with the eos id: the trailing eos run is padding, not further documents.
    ids = []
    for doc in documents(20, seed=6, low=2, high=SEQ - 2):
        ids.append(doc + [EOS] * (SEQ - len(doc)))
    assert findings(run(write(tmp_path / "padeos.parquet", {"input_ids": ids}), eos_id=EOS, pad_id=EOS), RULE) == []


def test_bos_before_convention(tmp_path):
    cols = pack([[BOS] + d for d in documents(40, seed=12)], SEQ, eos=None, pad=PAD, positions=False)
    ids = cols["input_ids"]
    inner = [[i for i in range(1, n) if row[i] == BOS] for row, n in zip(ids, real_lengths(ids))]
    expected = [(r, found[0]) for r, found in enumerate(inner) if found]
    report = run(write(tmp_path / "bos.parquet", cols), bos_id=BOS, pad_id=PAD, separator="bos-before")
    (f,) = findings(report, RULE)
    assert locations(f) == expected
    affected = [found for found in inner if found]
    assert f.evidence["meanDocumentsPerAffectedRow"] == pytest.approx(
        sum(len(x) + 1 for x in affected) / len(affected))


def test_json_lines_rows_are_line_indices(tmp_path):
    cols = pack(documents(30, seed=8), SEQ, eos=EOS, pad=PAD, positions=False)
    path = write(tmp_path / "packed.jsonl", cols)
    lines = open(path, encoding="utf-8").read().splitlines()
    out, line_of = [], []
    for k, line in enumerate(lines):
        if k % 2 == 1:
            out.append("")  # a blank line before every second record
        line_of.append(len(out))
        out.append(line)
    with open(path, "w", encoding="utf-8") as fh:
        fh.write("\n".join(out) + "\n")
    (f,) = findings(run(path, eos_id=EOS, pad_id=PAD), RULE)
    rows, _ = expected_crossing(cols["input_ids"])
    assert locations(f) == [(line_of[r], offset) for r, offset in rows]
    assert f.evidence["rows"] == len(cols["input_ids"])


def test_text_shard_gives_no_finding(tmp_path):
    report = run(write(tmp_path / "text.jsonl", {"text": ["an invented line", "and one more"]}), eos_id=EOS)
    assert findings(report, RULE) == []
    assert any(n.rule_id == RULE and "no 'input_ids' column" in n.message for n in report.notes)
