"""Tests for rules/separators.py (missing-separator).

Every expectation is computed here by plain Python over the same lists the shard is written from (position
restarts, adjacent ids, last real tokens), independently of the rule's numpy code.
"""
import random

import pytest
from corpuscle import Level
from corpuscle.rules.separators import MissingSeparator

from tests.shards import findings, locations, pack, run, write

RULE = "missing-separator"
PAD, BOS, EOS = 0, 1, 2
SEQ = 16


def documents(count, seed, low=3, high=20):
    """Invented documents: content ids 10..99 (never a special id), lengths low..high."""
    rng = random.Random(seed)
    return [[rng.randrange(10, 100) for _ in range(rng.randint(low, high))] for _ in range(count)]


def inner_starts(position_rows, real_rows=None):
    """(row, index) of every position restart after the start of its row, between two real tokens."""
    out = []
    for r, pos in enumerate(position_rows):
        n = len(pos) if real_rows is None else real_rows[r]
        out += [(r, i) for i in range(1, n) if pos[i] == 0]
    return out


def real_lengths(id_rows, pad=PAD):
    """Tokens before the trailing run of ``pad`` in each row."""
    out = []
    for row in id_rows:
        n = len(row)
        while n and row[n - 1] == pad:
            n -= 1
        out.append(n)
    return out


def kinds(report):
    return sorted(f.kind for f in findings(report, RULE))


def packed_with_gaps(tmp_path, name="shard.parquet", drop_every=2, want=25, **write_args):
    """Packed windows (eos after every document) in which the eos before ``want`` inner boundaries is replaced
    by a content token; the layout (and so every offset) stays the same. Returns path, columns, expected."""
    cols = pack(documents(80, seed=7), SEQ, eos=EOS, pad=PAD)
    starts = inner_starts(cols["position_ids"], real_lengths(cols["input_ids"]))
    chosen = starts[::drop_every][:want]
    assert len(chosen) == want  # the fixture has enough boundaries
    for r, i in chosen:
        assert cols["input_ids"][r][i - 1] == EOS
        cols["input_ids"][r][i - 1] = 55
    path = write(tmp_path / name, cols, **write_args)
    return path, cols, chosen


# -- boundaries marked by position_ids ----------------------------------------------------------------------

def test_25_boundaries_without_eos_give_25_exact_instances(tmp_path):
    path, cols, expected = packed_with_gaps(tmp_path, row_group_size=4)  # several batches
    report = run(path, eos_id=EOS, pad_id=PAD)
    assert kinds(report) == ["boundary-no-eos"]
    (f,) = findings(report, RULE, "boundary-no-eos")
    assert f.level == Level.error
    assert f.count == 25
    assert locations(f) == expected
    total = len(inner_starts(cols["position_ids"], real_lengths(cols["input_ids"])))
    assert f.evidence["boundaries"] == total
    assert f.evidence["missing"] == 25
    assert f.evidence["share"] == pytest.approx(25 / total)
    assert f.evidence["separatorId"] == EOS
    assert "append eos after every document" in f.message.lower()
    assert f"25 of {total:,} document boundaries" in f.message


def test_instance_cap_keeps_count_and_flags_the_cut(tmp_path):
    path, _, expected = packed_with_gaps(tmp_path)
    (f,) = findings(run(path, eos_id=EOS, pad_id=PAD, instance_cap=10), RULE, "boundary-no-eos")
    assert f.count == 25 and f.truncated
    assert locations(f) == expected[:10]


def test_clean_packed_shard_gives_no_finding(tmp_path):
    cols = pack(documents(80, seed=7), SEQ, eos=EOS, pad=PAD)
    report = run(write(tmp_path / "clean.parquet", cols), eos_id=EOS, pad_id=PAD)
    assert findings(report, RULE) == []


def test_json_lines_rows_are_line_indices_with_blank_lines(tmp_path):
    cols = pack(documents(80, seed=7), SEQ, eos=EOS, pad=PAD)
    starts = inner_starts(cols["position_ids"], real_lengths(cols["input_ids"]))
    chosen = starts[1::3][:25]
    for r, i in chosen:
        cols["input_ids"][r][i - 1] = 55
    jsonl = write(tmp_path / "plain.jsonl", cols)
    lines = open(jsonl, encoding="utf-8").read().splitlines()
    out, line_of = [], []
    for k, line in enumerate(lines):  # a blank line before every third record, two at the start
        if k == 0:
            out += ["", ""]
        elif k % 3 == 0:
            out.append("   ")
        line_of.append(len(out))
        out.append(line)
    with open(jsonl, "w", encoding="utf-8") as fh:
        fh.write("\n".join(out) + "\n")
    (f,) = findings(run(jsonl, eos_id=EOS, pad_id=PAD), RULE, "boundary-no-eos")
    assert locations(f) == [(line_of[r], i) for r, i in chosen]
    assert f.start_line == line_of[chosen[0][0]] + 1  # SARIF region.startLine is 1-based


def test_bos_before_boundaries(tmp_path):
    docs = [[BOS] + d for d in documents(60, seed=11)]
    cols = pack(docs, SEQ, eos=None, pad=PAD)  # bos-before: no eos at all, which is fine here
    starts = inner_starts(cols["position_ids"], real_lengths(cols["input_ids"]))
    chosen = starts[::3][:12]
    for r, i in chosen:
        assert cols["input_ids"][r][i] == BOS
        cols["input_ids"][r][i] = 66
    report = run(write(tmp_path / "bos.parquet", cols), bos_id=BOS, eos_id=EOS, pad_id=PAD,
                 separator="bos-before")
    assert kinds(report) == ["boundary-no-bos"]  # no eos findings, no unterminated padded row
    (f,) = findings(report, RULE, "boundary-no-bos")
    assert locations(f) == chosen
    assert f.evidence["boundaries"] == len(starts) and f.evidence["separatorId"] == BOS
    assert "prepend bos" in f.message.lower()


def test_both_reports_each_missing_separator_on_its_own(tmp_path):
    docs = [[BOS] + d for d in documents(70, seed=3)]
    cols = pack(docs, SEQ, eos=EOS, pad=PAD)
    starts = inner_starts(cols["position_ids"], real_lengths(cols["input_ids"]))
    no_eos, no_bos = starts[0::4], starts[1::4] + starts[0::8]  # some boundaries lack both
    for r, i in no_eos:
        cols["input_ids"][r][i - 1] = 55
    for r, i in no_bos:
        cols["input_ids"][r][i] = 66
    report = run(write(tmp_path / "both.parquet", cols), bos_id=BOS, eos_id=EOS, pad_id=PAD, separator="both")
    assert kinds(report) == ["boundary-no-bos", "boundary-no-eos"]
    assert locations(findings(report, RULE, "boundary-no-eos")[0]) == no_eos
    assert locations(findings(report, RULE, "boundary-no-bos")[0]) == sorted(no_bos)


def test_position_ids_starting_above_zero_are_a_continuation(tmp_path):
    # A document cut across two rows: the second row starts at position 5, which is not a boundary.
    cols = {"input_ids": [[10, 11, 12, 13, 14], [15, 16, EOS, 20, EOS]],
            "position_ids": [[0, 1, 2, 3, 4], [5, 6, 7, 0, 1]]}
    report = run(write(tmp_path / "cont.parquet", cols), eos_id=EOS)
    assert findings(report, RULE) == []


# -- shards without position_ids -----------------------------------------------------------------------------

def test_shard_without_any_eos_is_reported_as_glued(tmp_path):
    cols = pack(documents(40, seed=5), 32, eos=None, pad=PAD, positions=False)
    rows = len(cols["input_ids"])
    full = [r for r, row in enumerate(cols["input_ids"]) if PAD not in row]
    assert len(full) == rows - 1  # only the last window is padded
    report = run(write(tmp_path / "glued.parquet", cols), eos_id=EOS, pad_id=PAD)
    assert kinds(report) == ["no-eos", "unterminated-row"]
    (f,) = findings(report, RULE, "no-eos")
    assert f.count == len(full) and locations(f) == [(r, -1) for r in full]
    assert f.evidence == {"windows": len(full), "windowTokens": 32 * len(full), "separatorCount": 0,
                          "tokensPerSeparator": 100_000, "separatorId": EOS, "heuristic": True}
    assert "heuristic" in f.message and "glued" in f.message
    (u,) = findings(report, RULE, "unterminated-row")
    last = cols["input_ids"][-1]
    assert locations(u) == [(rows - 1, real_lengths([last])[0] - 1)]


@pytest.mark.parametrize("eos_count, reported", [(1, True), (2, False)])
def test_rare_eos_threshold_option(tmp_path, eos_count, reported):
    # 20 windows of 64 tokens = 1,280 tokens; with one eos per 1,000 tokens as the bar, 1 eos is too few
    # (1 * 1000 < 1280) and 2 are enough (2 * 1000 >= 1280).
    rng = random.Random(1)
    rows = [[rng.randrange(10, 100) for _ in range(64)] for _ in range(20)]
    for k in range(eos_count):
        rows[3 + 5 * k][40] = EOS
    path = write(tmp_path / "rare.parquet", {"input_ids": rows})
    report = run(path, eos_id=EOS, rule={RULE: {"tokens_per_separator": 1000}})
    got = findings(report, RULE, "no-eos")
    if not reported:
        assert got == []
        return
    (f,) = got
    assert f.count == 19 and [r for r, _ in locations(f)] == [r for r in range(20) if r != 3]
    assert f.evidence["separatorCount"] == 1 and f.evidence["windowTokens"] == 1280
    assert f.message.startswith("only 1 eos")


def test_documents_one_per_row_without_eos_are_not_glued(tmp_path):
    # Variable-length rows without padding are documents, not windows: no seq_len is inferred, nothing glued.
    cols = {"input_ids": documents(12, seed=9, low=3, high=40)}
    report = run(write(tmp_path / "docs.parquet", cols), eos_id=EOS)
    assert findings(report, RULE) == []


@pytest.mark.parametrize("with_mask", [True, False])
def test_padded_rows_not_ending_in_eos(tmp_path, with_mask):
    docs = documents(30, seed=21, low=2, high=SEQ)
    ends = [k % 3 != 0 for k in range(30)]  # every third document lacks its eos
    ids, mask = [], []
    for doc, ended in zip(docs, ends):
        row = (doc + [EOS] if ended else doc)[:SEQ]
        mask.append([1] * len(row) + [0] * (SEQ - len(row)))
        ids.append(row + [PAD] * (SEQ - len(row)))
    cols = {"input_ids": ids, "attention_mask": mask} if with_mask else {"input_ids": ids}
    expected = [(r, sum(m) - 1) for r, m in enumerate(mask) if sum(m) < SEQ and ids[r][sum(m) - 1] != EOS]
    padded = sum(1 for m in mask if sum(m) < SEQ)
    assert len(expected) >= 5
    report = run(write(tmp_path / "padded.parquet", cols), eos_id=EOS, pad_id=PAD)
    assert kinds(report) == ["unterminated-row"]
    (f,) = findings(report, RULE, "unterminated-row")
    assert locations(f) == expected
    assert f.evidence["paddedRows"] == padded and f.evidence["missing"] == len(expected)


# -- doubled separators -------------------------------------------------------------------------------------

def adjacent(id_rows, token, real_rows):
    """(row, index of the second) of every pair of ``token`` next to each other among a row's real tokens."""
    return [(r, i) for r, row in enumerate(id_rows) for i in range(1, real_rows[r])
            if row[i] == token and row[i - 1] == token]


def test_doubled_eos(tmp_path):
    docs = documents(50, seed=13)
    for k in range(0, 50, 4):
        docs[k] = docs[k] + [EOS]  # the template adds one, the packer another
    cols = pack(docs, SEQ, eos=EOS, pad=PAD)
    expected = adjacent(cols["input_ids"], EOS, real_lengths(cols["input_ids"]))
    assert len(expected) >= 8
    report = run(write(tmp_path / "double.parquet", cols), eos_id=EOS, pad_id=PAD)
    assert kinds(report) == ["doubled-eos"]
    (f,) = findings(report, RULE, "doubled-eos")
    assert locations(f) == expected
    real_eos = sum(row[:n].count(EOS) for row, n in zip(cols["input_ids"], real_lengths(cols["input_ids"])))
    assert f.evidence["separatorCount"] == real_eos


def test_doubled_bos(tmp_path):
    docs = [[BOS, BOS] + d if k % 5 == 0 else [BOS] + d for k, d in enumerate(documents(40, seed=17))]
    cols = pack(docs, SEQ, eos=None, pad=PAD)
    expected = adjacent(cols["input_ids"], BOS, real_lengths(cols["input_ids"]))
    assert len(expected) >= 5
    report = run(write(tmp_path / "bb.parquet", cols), bos_id=BOS, pad_id=PAD, separator="bos-before")
    assert kinds(report) == ["doubled-bos"]
    assert locations(findings(report, RULE, "doubled-bos")[0]) == expected


def one_per_row_padded_with_eos(docs):
    ids, mask = [], []
    for doc in docs:
        row = (doc + [EOS])[:SEQ]
        mask.append([1] * len(row) + [0] * (SEQ - len(row)))
        ids.append(row + [EOS] * (SEQ - len(row)))  # pad id == eos id
    return ids, mask


@pytest.mark.parametrize("with_mask", [True, False])
def test_padding_made_of_eos_is_not_doubled(tmp_path, with_mask):
    ids, mask = one_per_row_padded_with_eos(documents(20, seed=4, low=2, high=10))
    cols = {"input_ids": ids, "attention_mask": mask} if with_mask else {"input_ids": ids}
    report = run(write(tmp_path / "padeos.parquet", cols), eos_id=EOS, pad_id=EOS)
    assert findings(report, RULE) == []


@pytest.mark.parametrize("with_mask", [True, False])
def test_real_doubled_eos_is_still_found_when_pad_is_eos(tmp_path, with_mask):
    docs = documents(20, seed=4, low=2, high=10)
    docs[6] = [30, EOS, EOS, 31]  # eos eos in the middle of the document's real tokens
    ids, mask = one_per_row_padded_with_eos(docs)
    cols = {"input_ids": ids, "attention_mask": mask} if with_mask else {"input_ids": ids}
    (f,) = findings(run(write(tmp_path / "padeos2.parquet", cols), eos_id=EOS, pad_id=EOS), RULE, "doubled-eos")
    assert locations(f) == [(6, 2)]


# -- settings ------------------------------------------------------------------------------------------------

def test_skipped_with_a_note_when_the_separator_id_is_unknown(tmp_path):
    # No position restarts, no padding and varied last tokens: eos cannot be inferred.
    path = write(tmp_path / "unknown.parquet", {"input_ids": documents(10, seed=2)})
    report = run(path)
    assert findings(report, RULE) == []
    notes = [n.message for n in report.notes if n.rule_id == RULE]
    assert len(notes) == 1 and "eos_id is not set" in notes[0] and "--eos-id" in notes[0]
    report = run(path, eos_id=EOS, separator="bos-before")
    notes = [n.message for n in report.notes if n.rule_id == RULE]
    assert len(notes) == 1 and "bos_id is not set" in notes[0]


def test_text_shard_is_skipped(tmp_path):
    report = run(write(tmp_path / "text.jsonl", {"text": ["an invented line", "another one"]}), eos_id=EOS)
    assert findings(report, RULE) == []


def test_option_is_validated():
    with pytest.raises(ValueError, match="tokens_per_separator"):
        MissingSeparator(tokens_per_separator=0)
    with pytest.raises(ValueError, match="unknown option"):
        MissingSeparator(tokens_per_eos=5)
