"""Tests for rules/padding.py (padding-loss).

Shards are built here from plain Python lists (right- and left-padded rows, packed windows), and every expected
count and (row, offset) is computed by plain Python loops over the same lists, independently of the rule's numpy
code. The ignore index -100 is common practice (PyTorch's cross-entropy default).
"""
import random

import pytest
from corpuscle import Level
from corpuscle.rules.padding import PaddingLoss

from tests.shards import findings, locations, pack, run, write

RULE = "padding-loss"
PAD, BOS, EOS, IGNORE = 0, 1, 2, -100
SEQ = 12


def documents(count, seed, low=2, high=SEQ - 1):
    """Invented documents: content ids 10..99 (never a special id)."""
    rng = random.Random(seed)
    return [[rng.randrange(10, 100) for _ in range(rng.randint(low, high))] for _ in range(count)]


def padded(docs, side="right", labels="shifted", pad=PAD, eos=EOS, seq=SEQ):
    """One document (+ eos) per row, padded to ``seq`` on ``side``; labels ignore every padding position."""
    ids, mask, lab = [], [], []
    for doc in docs:
        real = doc + [eos]
        fill = seq - len(real)
        target = real[1:] + [IGNORE] if labels == "shifted" else list(real)
        if side == "right":
            ids.append(real + [pad] * fill)
            mask.append([1] * len(real) + [0] * fill)
            lab.append(target + [IGNORE] * fill)
        else:
            ids.append([pad] * fill + real)
            mask.append([0] * fill + [1] * len(real))
            lab.append([IGNORE] * fill + target)
    return {"input_ids": ids, "attention_mask": mask, "labels": lab}


def first_per_row(flags):
    """(row, first offset) of every row with a flag set, and the number of flagged positions."""
    hits = [(r, row.index(True)) for r, row in enumerate(flags) if True in row]
    return hits, sum(map(sum, flags))


def trailing_run(row, pad):
    """Indices of the run of ``pad`` at the end of ``row``."""
    n = len(row)
    while n and row[n - 1] == pad:
        n -= 1
    return range(n, len(row))


def leading_run(row, pad):
    n = 0
    while n < len(row) and row[n] == pad:
        n += 1
    return range(0, n)


# -- clean shards --------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("side", ["right", "left"])
@pytest.mark.parametrize("labels", ["shifted", "aligned"])
@pytest.mark.parametrize("pad", [PAD, EOS])
def test_clean_padded_shard_has_no_finding(tmp_path, side, labels, pad):
    cols = padded(documents(30, seed=1), side, labels, pad=pad)
    path = write(tmp_path / "shard.parquet", cols)
    report = run(path, eos_id=EOS, pad_id=pad, labels=labels)
    assert findings(report, RULE) == []
    slots = sum(map(len, cols["attention_mask"]))
    real = sum(map(sum, cols["attention_mask"]))
    assert report.metrics["realTokenFraction"] == real / slots
    assert report.metrics["padTokenFraction"] == (slots - real) / slots


def test_clean_json_lines_shard_with_inferred_settings(tmp_path):
    cols = padded(documents(20, seed=2))
    path = write(tmp_path / "shard.jsonl", cols)
    report = run(path)  # pad_id, eos_id and the label convention are inferred from the first batch
    assert findings(report, RULE) == []
    assert report.metrics["padTokenFraction"] == sum(m.count(0) for m in cols["attention_mask"]) / (20 * SEQ)


def packed_windows(pad):
    """Packed windows without padding, some starting and some ending on an eos."""
    docs = [list(range(11, 22)), list(range(30, 42)), [50, 51, 52], [60, 61, 62, 63, 64, 65]]  # 12+13+4+7 = 3 windows
    cols = pack(docs, SEQ, eos=EOS, pad=pad)
    assert all(IGNORE not in row[:-1] for row in cols["labels"]) and len(cols["input_ids"][-1]) == SEQ
    assert cols["input_ids"][-1][-1] == EOS, "the stream must fill the last window exactly"
    assert any(row[0] == EOS for row in cols["input_ids"]) and any(row[-1] == EOS for row in cols["input_ids"])
    return cols


@pytest.mark.parametrize("pad", [PAD, EOS])
def test_packed_shard_without_padding_has_no_finding(tmp_path, pad):
    cols = packed_windows(pad)
    path = write(tmp_path / "shard.parquet", cols)
    report = run(path, eos_id=EOS, pad_id=pad, labels="shifted")
    assert findings(report, RULE) == []
    assert report.metrics["padTokenFraction"] == 0.0 and report.metrics["realTokenFraction"] == 1.0


def test_shard_without_mask_or_pad_id_is_skipped_with_a_note(tmp_path):
    path = write(tmp_path / "shard.parquet", packed_windows(PAD))
    report = run(path, eos_id=EOS, labels="shifted")
    assert findings(report, RULE) == []
    [note] = [n for n in report.notes if n.rule_id == RULE]
    assert note.level == Level.note and "pad_id" in note.message and "--pad-id" in note.message
    assert "realTokenFraction" not in report.metrics


# -- labels trained on padding -------------------------------------------------------------------------------------

def test_labels_kept_at_masked_positions_aligned(tmp_path):
    cols = padded(documents(40, seed=3), labels="aligned")
    for r in range(0, 40, 3):  # a pipeline that copied input_ids into labels without masking padding
        cols["labels"][r] = list(cols["input_ids"][r])
    path = write(tmp_path / "shard.parquet", cols, row_group_size=9)
    report = run(path, eos_id=EOS, pad_id=PAD, labels="aligned")

    flags = [[m == 0 and lab != IGNORE for m, lab in zip(mask, labels)]
             for mask, labels in zip(cols["attention_mask"], cols["labels"])]
    expected, positions = first_per_row(flags)
    assert expected and positions > len(expected)
    [f] = findings(report, RULE, "trained-padding")
    assert f.count == len(expected)  # one instance per row, offset = its first trained padding position
    assert locations(f) == expected
    assert f.evidence == {"positions": positions, "paddingPositions": sum(m.count(0) for m in cols["attention_mask"]),
                          "paddingFrom": "attention_mask", "labelConvention": "aligned"}


def test_shifted_label_whose_target_is_padding(tmp_path):
    cols = padded(documents(30, seed=4))
    for r in range(1, 30, 4):  # labels = input_ids[1:] + [-100], then masked where attention_mask is 0 only
        ids, mask = cols["input_ids"][r], cols["attention_mask"][r]
        shifted = ids[1:] + [IGNORE]
        cols["labels"][r] = [lab if m else IGNORE for lab, m in zip(shifted, mask)]
    path = write(tmp_path / "shard.parquet", cols)
    report = run(path, eos_id=EOS, pad_id=PAD, labels="shifted")

    flags = []
    for mask, labels in zip(cols["attention_mask"], cols["labels"]):
        n = len(mask)
        flags.append([labels[t] != IGNORE and (mask[t] == 0 or (t + 1 < n and mask[t + 1] == 0)) for t in range(n)])
    expected, positions = first_per_row(flags)
    # the only trained label on padding is the one at the last real position, whose target is the first pad
    assert expected == [(r, sum(cols["attention_mask"][r]) - 1) for r in range(1, 30, 4)
                        if 0 in cols["attention_mask"][r]]
    [f] = findings(report, RULE, "trained-padding")
    assert locations(f) == expected and f.evidence["positions"] == positions == len(expected)
    assert f.evidence["labelConvention"] == "shifted"


def test_padding_from_pad_id_without_mask_json_lines(tmp_path):
    docs = documents(24, seed=5)
    right = padded(docs[:12], "right", "aligned")
    left = padded(docs[12:], "left", "aligned")
    ids = right["input_ids"] + left["input_ids"]
    labels = right["labels"] + left["labels"]
    for r in (0, 5, 13, 20):
        labels[r] = list(ids[r])  # labels not masked at padding
    path = write(tmp_path / "shard.jsonl", {"input_ids": ids, "labels": labels})
    report = run(path, eos_id=EOS, pad_id=PAD, labels="aligned")

    pads = [set(trailing_run(row, PAD)) | set(leading_run(row, PAD)) for row in ids]
    flags = [[t in pads[r] and lab != IGNORE for t, lab in enumerate(labels[r])] for r in range(len(ids))]
    expected, positions = first_per_row(flags)
    [f] = findings(report, RULE, "trained-padding")
    assert locations(f) == expected
    assert [r for r, _ in expected] == [r for r in (0, 5, 13, 20) if pads[r]]
    assert f.evidence["positions"] == positions and f.evidence["paddingFrom"] == "pad_id"
    assert f.evidence["paddingPositions"] == sum(map(len, pads))
    assert f.start_line == expected[0][0] + 1
    total = sum(map(len, ids))
    assert report.metrics["padTokenFraction"] == sum(map(len, pads)) / total


# -- attention mask shape ------------------------------------------------------------------------------------------

def broken_pattern(mask, side):
    """First offset breaking ones-then-zeros (right) or zeros-then-ones (left), or None when the row follows
    either pattern."""
    def first_break(row, head):
        seen_other = False
        for t, m in enumerate(row):
            if (m != 0) != head:
                seen_other = True
            elif seen_other:
                return t
        return None

    right, left = first_break(mask, True), first_break(mask, False)
    if right is None or left is None:
        return None
    return right if side == "right" else left


@pytest.mark.parametrize("side", ["right", "left"])
def test_mask_with_holes_is_located_for_the_shard_padding_side(tmp_path, side):
    cols = padded(documents(30, seed=6, high=8), side)
    masks = cols["attention_mask"]
    broken_rows = [2, 9, 10, 23]
    for r in broken_rows:  # a hole inside the real tokens, or a real token after the padding
        real = [t for t, m in enumerate(masks[r]) if m]
        pads = [t for t, m in enumerate(masks[r]) if not m]
        if r % 2:
            masks[r][real[len(real) // 2]] = 0
        else:
            masks[r][pads[len(pads) // 2] if side == "right" else pads[0]] = 1
    del cols["labels"]
    path = write(tmp_path / "shard.parquet", cols)
    report = run(path, eos_id=EOS, pad_id=PAD)

    expected = [(r, broken_pattern(m, side)) for r, m in enumerate(masks) if broken_pattern(m, side) is not None]
    assert [r for r, _ in expected] == broken_rows
    padded_rows = [m for m in masks if 0 in m and 1 in m]
    right = sum(m[0] == 1 for m in padded_rows)
    [f] = findings(report, RULE, "mask-shape")
    assert locations(f) == expected
    assert f.evidence == {"paddingSide": side, "rightPaddedRows": right, "leftPaddedRows": len(padded_rows) - right}
    assert "heuristic" in f.message and f"{side}-padded" in f.message
    hidden = findings(report, RULE, "masked-real-tokens")  # the holes inside real tokens (odd rows) hide tokens
    assert len(hidden) == 1 and "also in the mask-shape finding" in hidden[0].message


def test_mask_that_disagrees_with_the_pad_run(tmp_path):
    cols = padded(documents(30, seed=8, high=8))
    ids, masks = cols["input_ids"], cols["attention_mask"]
    for r in range(0, 30, 5):  # the mask reaches 2 positions into the padding
        n = sum(masks[r])
        masks[r] = [1] * min(SEQ, n + 2) + [0] * (SEQ - min(SEQ, n + 2))
    for r in range(2, 30, 7):  # the mask stops 2 tokens before the real ones end
        n = sum(masks[r])
        masks[r] = [1] * (n - 2) + [0] * (SEQ - n + 2)
    path = write(tmp_path / "shard.arrow", cols)
    report = run(path, eos_id=EOS, pad_id=PAD, labels="shifted")

    pad_runs = [set(trailing_run(row, PAD)) for row in ids]
    attended, attended_n = first_per_row([[m == 1 and t in pad_runs[r] for t, m in enumerate(masks[r])]
                                          for r in range(30)])
    hidden, hidden_n = first_per_row([[m == 0 and v != PAD for v, m in zip(ids[r], masks[r])] for r in range(30)])
    assert attended and hidden
    [a] = findings(report, RULE, "attended-padding")
    [h] = findings(report, RULE, "masked-real-tokens")
    assert locations(a) == attended and a.evidence == {"positions": attended_n, "padId": PAD}
    assert locations(h) == hidden and h.evidence == {"positions": hidden_n, "padId": PAD}
    assert findings(report, RULE, "mask-shape") == []  # both masks are still ones then zeros
    assert "mask-shape" not in h.message


# -- real eos never trained on when pad id == eos id --------------------------------------------------------------

def mask_labels_by_id(cols, labels):
    """The faulty pipeline: every label equal to the pad id (here also the eos id) becomes the ignore index."""
    out = []
    for ids in cols["input_ids"]:
        target = ids[1:] + [IGNORE] if labels == "shifted" else list(ids)
        out.append([IGNORE if v == EOS else v for v in target])
    return out


def eos_checks(ids_rows, masks, labels_rows, convention):
    """(row, offset) of real eos tokens whose label is ignored, and how many real eos were checked.

    A real eos has mask 1 and is not in the run of eos at the row end past its first token (that is padding).
    """
    lost, checked = [], 0
    for r, (ids, mask, labels) in enumerate(zip(ids_rows, masks, labels_rows)):
        end_run = trailing_run(ids, EOS)
        for t, v in enumerate(ids):
            if v != EOS or not mask[t] or (convention == "shifted" and t == 0) or (t in end_run and t != end_run.start):
                continue
            checked += 1
            if labels[t - 1 if convention == "shifted" else t] == IGNORE:
                lost.append((r, t))
    return lost, checked


@pytest.mark.parametrize("convention", ["shifted", "aligned"])
def test_eos_labels_ignored_because_pad_equals_eos(tmp_path, convention):
    cols = padded(documents(30, seed=9), "right", convention, pad=EOS)
    good = [list(row) for row in cols["labels"]]
    cols["labels"] = mask_labels_by_id(cols, convention)
    for r in range(0, 30, 4):
        cols["labels"][r] = good[r]  # some rows come from a correct pipeline
    masks = cols["attention_mask"]
    extended = [r for r in range(30) if masks[r][-1] == 0][:3]
    for r in extended:  # a mask of 1 on padding: attended padding, not an extra real eos
        masks[r][-1] = 1
    path = write(tmp_path / "shard.parquet", cols)
    report = run(path, eos_id=EOS, pad_id=EOS, labels=convention)

    lost, checked = eos_checks(cols["input_ids"], masks, cols["labels"], convention)
    assert len(lost) == 30 - len(range(0, 30, 4)) and checked == 30
    [f] = findings(report, RULE, "eos-never-trained")
    assert f.level == Level.error
    assert f.count == len(lost) and locations(f) == lost
    assert f.evidence == {"eosId": EOS, "realEos": checked, "share": len(lost) / checked,
                          "labelConvention": convention}
    assert findings(report, RULE, "trained-padding") == []  # the faulty pipeline does ignore the padding
    [attended] = findings(report, RULE, "attended-padding")
    assert locations(attended) == [(r, SEQ - 1) for r in extended]


def test_eos_labels_ignored_in_packed_rows_without_mask_label_convention_inferred(tmp_path):
    docs = documents(40, seed=10, high=9)
    cols = pack(docs, SEQ, eos=EOS, pad=EOS, positions=False)
    cols["labels"] = mask_labels_by_id(cols, "shifted")
    path = write(tmp_path / "shard.jsonl", cols)
    report = run(path, eos_id=EOS, pad_id=EOS)  # shifted labels inferred from the data

    ids_rows = cols["input_ids"]
    # Without a mask, the run of eos at a row end is padding but for its first token, the real eos; a run at the
    # row start is undecided (it may be the end of the previous window's document), so it is not checked.
    real_masks = []
    for row in ids_rows:
        run_ = trailing_run(row, EOS)
        undecided = set(leading_run(row, EOS)) - set(run_)
        real_masks.append([0 if (t in run_ and t != run_.start) or t in undecided else 1 for t in range(len(row))])
    lost, checked = eos_checks(ids_rows, real_masks, cols["labels"], "shifted")
    assert checked > 30 and len(lost) == checked  # every real eos is lost
    [f] = findings(report, RULE, "eos-never-trained")
    assert locations(f) == lost and f.evidence["realEos"] == checked
    assert f.evidence["labelConvention"] == "shifted"
    assert any(n.message.startswith("labels = shifted inferred") for n in report.notes)


def test_no_eos_check_when_pad_differs_from_eos(tmp_path):
    cols = padded(documents(10, seed=11))
    cols["labels"] = mask_labels_by_id(cols, "shifted")  # ignores eos labels, but pad id != eos id here
    report = run(write(tmp_path / "shard.parquet", cols), eos_id=EOS, pad_id=PAD, labels="shifted")
    assert findings(report, RULE, "eos-never-trained") == []


def test_rule_documentation():
    rule = PaddingLoss()
    assert rule.id == RULE and rule.level == Level.error
    with pytest.raises(ValueError, match="unknown option"):
        PaddingLoss(side="left")
