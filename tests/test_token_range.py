"""Tests for rules/token_range.py (token-range).

Expectations are computed here by plain Python over the same lists the shards are written from. Storage-type
limits come from numpy (``np.iinfo``) and the wrapped values from numpy's own integer casting (``astype``, which
keeps the low bits: two's-complement wrap-around, as documented for numpy integer conversion).
"""
import json
import random

import numpy as np
import pyarrow as pa
import pytest
from corpuscle import Level
from corpuscle.report.sarif import to_sarif

from tests.shards import findings, locations, run, validate_sarif, write

RULE = "token-range"


def id_rows(count, seed, low=0, high=1000, length=(4, 24)):
    rng = random.Random(seed)
    return [[rng.randrange(low, high) for _ in range(rng.randint(*length))] for _ in range(count)]


def where(rows, test):
    """Every (row, offset) whose id passes ``test``, in file order."""
    return [(r, t) for r, row in enumerate(rows) for t, v in enumerate(row) if test(v)]


def first_max(rows):
    top = max(v for row in rows for v in row)
    return top, next((r, t) for r, row in enumerate(rows) for t, v in enumerate(row) if v == top)


def typed(rows, type_):
    return pa.array(rows, type=pa.list_(type_))


def valid_sarif(report) -> dict:
    """The report as SARIF, validated against the OASIS SARIF 2.1.0 schema (a JSON Schema draft-04 document)."""
    return validate_sarif(json.loads(json.dumps(to_sarif(report), default=int)))


# -- ids outside [0, vocab_size) ------------------------------------------------------------------------------

@pytest.mark.parametrize("name", ["shard.parquet", "shard.arrow"])
def test_negative_and_above_vocab_ids_each_located(tmp_path, name):
    vocab = 1000
    rows = id_rows(40, seed=1)
    rng = random.Random(2)
    for _ in range(9):  # padding sentinels and labels written into input_ids
        row = rows[rng.randrange(len(rows))]
        row[rng.randrange(len(row))] = rng.choice([-1, -100])
    for _ in range(7):  # ids of a larger vocabulary
        row = rows[rng.randrange(len(rows))]
        row[rng.randrange(len(row))] = rng.randrange(vocab, 1200)
    path = write(tmp_path / name, {"input_ids": rows}, row_group_size=7)  # several batches per shard

    report = run(path, vocab_size=vocab)
    ids = [v for row in rows for v in row]
    negative = where(rows, lambda v: v < 0)
    above = where(rows, lambda v: v >= vocab)
    assert negative and above

    [neg] = findings(report, RULE, "negative")
    assert neg.level == Level.error
    assert neg.count == len(negative)
    assert locations(neg) == negative
    assert neg.evidence == {"rowsAffected": len({r for r, _ in negative}),
                            "ignoreIndexIds": sum(v == -100 for v in ids),
                            "minId": min(ids), "maxId": max(ids), "vocabSize": vocab}

    [big] = findings(report, RULE, "above-vocab")
    assert big.count == len(above)
    assert locations(big) == above
    assert big.evidence == {"rowsAffected": len({r for r, _ in above}), "minId": min(ids), "maxId": max(ids),
                            "vocabSize": vocab}
    assert not findings(report, RULE, "narrow-storage")  # int64 holds any vocabulary


def test_json_lines_rows_are_line_indices(tmp_path):
    vocab = 500
    rows = id_rows(12, seed=3, high=vocab)
    rows[2][1], rows[5][0], rows[5][3], rows[11][-1] = -7, 500, 731, -1
    lines = []
    for i, row in enumerate(rows):
        lines.append(json.dumps({"input_ids": row}))
        if i in (0, 4):
            lines.append("")  # blank lines still count as lines
    path = tmp_path / "shard.jsonl"
    path.write_text("\n".join(lines) + "\n")
    line_of = [i for i, line in enumerate(lines) if line]

    report = run(str(path), vocab_size=vocab)
    [neg] = findings(report, RULE, "negative")
    [big] = findings(report, RULE, "above-vocab")
    expected = [(line_of[r], t) for r, t in where(rows, lambda v: v < 0)]
    assert locations(neg) == expected == [(3, 1), (13, len(rows[11]) - 1)]
    assert locations(big) == [(line_of[r], t) for r, t in where(rows, lambda v: v >= vocab)]
    assert neg.start_line == line_of[2] + 1  # SARIF startLine is 1-based
    assert big.evidence["maxId"] == 731 and neg.evidence["minId"] == -7


def test_clean_shards_give_no_finding(tmp_path):
    vocab = 1000
    rows = id_rows(30, seed=4, high=vocab)
    rows[0][0], rows[1][0] = 0, vocab - 1  # both ends of the range are valid
    paths = [write(tmp_path / "a.parquet", {"input_ids": typed(rows, pa.int32())}),
             write(tmp_path / "b.jsonl", {"input_ids": rows})]
    report = run(paths, vocab_size=vocab)
    assert findings(report, RULE) == []


def test_instance_cap_keeps_the_first_locations_and_the_true_count(tmp_path):
    rows = [[5, -1, -1, 6], [-1] * 5, [7, -2, 8]]
    path = write(tmp_path / "shard.parquet", {"input_ids": rows})
    report = run(path, vocab_size=100, instance_cap=4)
    [neg] = findings(report, RULE, "negative")
    expected = where(rows, lambda v: v < 0)
    assert neg.count == len(expected) == 8
    assert locations(neg) == expected[:4]
    assert neg.truncated


# -- vocab_size not set -------------------------------------------------------------------------------------------

def test_without_vocab_size_negatives_are_reported_and_one_note_names_the_largest_id(tmp_path):
    a = id_rows(10, seed=5, high=30_000)
    b = id_rows(10, seed=6, high=50_000)
    a[3][2] = -100
    paths = [write(tmp_path / "a.parquet", {"input_ids": a}), write(tmp_path / "b.parquet", {"input_ids": b})]
    report = run(paths)

    [neg] = findings(report, RULE, "negative")
    assert locations(neg) == [(3, 2)]
    assert "vocabSize" not in neg.evidence and neg.evidence["ignoreIndexIds"] == 1
    assert findings(report, RULE, "above-vocab") == [] and findings(report, RULE, "narrow-storage") == []

    [note] = findings(report, RULE, "vocab-unset")
    assert note.level == Level.note and note.uri is None
    (top_a, at_a), (top_b, at_b) = first_max(a), first_max(b)
    assert note.count == 2
    assert locations(note) == [at_a, at_b]
    assert note.instance_uris == paths
    assert note.evidence == {"maxId": max(top_a, top_b), "shards": 2}
    assert f"at least {max(top_a, top_b) + 1:,} entries" in note.message

    [result] = [r for r in valid_sarif(report)["runs"][0]["results"] if r["ruleId"] == RULE and r["level"] == "note"]
    assert result["properties"]["instances"] == [{"row": at_a[0], "offset": at_a[1], "uri": paths[0]},
                                                 {"row": at_b[0], "offset": at_b[1], "uri": paths[1]}]
    assert [loc["physicalLocation"]["artifactLocation"]["uri"] for loc in result["locations"]] == paths


def test_no_vocab_note_when_vocab_size_is_given(tmp_path):
    path = write(tmp_path / "a.parquet", {"input_ids": id_rows(5, seed=7)})
    assert findings(run(path, vocab_size=1000), RULE) == []


# -- storage type too narrow --------------------------------------------------------------------------------------

def test_uint16_cannot_hold_a_vocabulary_of_70000(tmp_path):
    vocab = 70_000
    true = id_rows(60, seed=8, low=0, high=vocab)  # what the tokenizer produced
    true[4][0] = 65_530  # a valid id just below the uint16 maximum
    stored = [np.array(row, dtype=np.int64).astype(np.uint16).tolist() for row in true]  # numpy wraps mod 2**16
    wrapped = where(true, lambda v: v > 65_535)
    assert wrapped and all(stored[r][t] == true[r][t] - 65_536 for r, t in wrapped)
    path = write(tmp_path / "shard.parquet", {"input_ids": typed(stored, pa.uint16())}, row_group_size=10)

    report = run(path, vocab_size=vocab)
    [narrow] = findings(report, RULE, "narrow-storage")  # once per shard, not per batch
    top, at = first_max(stored)
    type_max = int(np.iinfo(np.uint16).max)
    assert type_max == 65_535 == 2 ** 16 - 1
    assert narrow.count == 1 and locations(narrow) == [at]
    assert narrow.evidence == {"storageType": "uint16", "storageMax": type_max, "vocabSize": vocab, "maxId": top,
                               "nearStorageMax": type_max - top <= 0.01 * type_max}
    assert narrow.evidence["nearStorageMax"] is True
    assert "heuristic" in narrow.message
    # wrapped ids look valid: nothing is negative or above the vocabulary
    assert findings(report, RULE, "negative") == findings(report, RULE, "above-vocab") == []

    [result] = [r for r in valid_sarif(report)["runs"][0]["results"] if r["ruleId"] == RULE]
    assert result["properties"]["storageType"] == "uint16" and result["properties"]["count"] == 1
    assert result["properties"]["instances"] == [{"row": at[0], "offset": at[1]}]


@pytest.mark.parametrize("vocab, expected", [(65_536, False), (65_537, True)])
def test_uint16_holds_exactly_65536_ids(tmp_path, vocab, expected):
    rows = [[0, 1, 65_535], [17, 300]]
    path = write(tmp_path / "shard.arrow", {"input_ids": typed(rows, pa.uint16())})
    assert bool(findings(run(path, vocab_size=vocab), RULE, "narrow-storage")) is expected


def test_int16_wraps_large_ids_to_negative(tmp_path):
    vocab = 40_000
    true = id_rows(25, seed=9, high=vocab)
    stored = [np.array(row, dtype=np.int64).astype(np.int16).tolist() for row in true]  # two's complement
    path = write(tmp_path / "shard.parquet", {"input_ids": typed(stored, pa.int16())})
    report = run(path, vocab_size=vocab)

    [narrow] = findings(report, RULE, "narrow-storage")
    assert narrow.evidence["storageType"] == "int16"
    assert narrow.evidence["storageMax"] == int(np.iinfo(np.int16).max) == 32_767
    assert "or negative" in narrow.message
    [neg] = findings(report, RULE, "negative")
    assert locations(neg) == where(true, lambda v: v > 32_767) == where(stored, lambda v: v < 0)


@pytest.mark.parametrize("type_, dtype", [(pa.int8(), np.int8), (pa.uint8(), np.uint8)])
def test_byte_types_are_too_narrow_for_a_small_vocabulary(tmp_path, type_, dtype):
    rows = [[1, 2, 3], [4, 5]]
    path = write(tmp_path / "shard.parquet", {"input_ids": typed(rows, type_)})
    [narrow] = findings(run(path, vocab_size=300), RULE, "narrow-storage")
    assert narrow.evidence["storageMax"] == int(np.iinfo(dtype).max)
    assert narrow.evidence["storageType"] == str(type_)
    assert narrow.evidence["nearStorageMax"] is False  # max id 5 is far from the type's maximum


def test_int32_holds_a_large_vocabulary(tmp_path):
    rows = id_rows(10, seed=10, high=200_000)
    path = write(tmp_path / "shard.parquet", {"input_ids": typed(rows, pa.int32())})
    assert findings(run(path, vocab_size=200_000), RULE) == []


def test_null_inside_a_token_list_is_reported_as_id_minus_one(tmp_path):
    # corpuscle.io.batch reads a null inside a token list as -1, outside every vocabulary
    path = write(tmp_path / "shard.parquet", {"input_ids": pa.array([[4, None, 6], [7, 8]], type=pa.list_(pa.int32()))})
    [neg] = findings(run(path, vocab_size=100), RULE, "negative")
    assert locations(neg) == [(0, 1)] and neg.evidence["minId"] == -1
