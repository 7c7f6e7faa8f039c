"""Tests for rules/labels.py (label-alignment) and the shift helpers in lint/shift.py.

Every expectation is computed here by plain Python over the same lists the shard is written from (which shift
explains a row's labels, the first label that breaks it, last labels, marker values), independently of the
rule's numpy code. Token ids within a row are drawn without repetition, so exactly one shift explains a row.
"""
import json
import random

import numpy as np
import pyarrow as pa
import pytest
from corpuscle import Level
from corpuscle.io.batch import Flat
from corpuscle.kernels.shift import best_shift, first_mismatch, shift_agreement, shift_matches
from corpuscle.rules.labels import LabelAlignment

from tests.shards import findings, locations, pack, run, write

RULE = "label-alignment"
IGNORE = -100  # common practice: PyTorch's cross-entropy ignore_index default
PAD, EOS = 0, 2
SHIFTS = (-1, 0, 1, 2, 3)


# --------------------------------------------------------------------------- invented data and references

def windows(count, seed, low=8, high=30):
    """Invented rows of token ids 10..29999, distinct within each row (so only one shift explains a row)."""
    rng = random.Random(seed)
    return [rng.sample(range(10, 30000), rng.randint(low, high)) for _ in range(count)]


def prompts(ids, seed):
    """Per row, how many leading labels are ignored (a masked prompt): 0 .. len-4."""
    rng = random.Random(seed)
    return [rng.randint(0, len(row) - 4) for row in ids]


def shifted_labels(ids, k, masked=None, marker=IGNORE):
    """labels[t] = ids[t+k] where that exists, else ``marker``; the first ``masked[r]`` labels are ``marker``."""
    out = []
    for r, row in enumerate(ids):
        n = len(row)
        lab = [row[t + k] if 0 <= t + k < n else marker for t in range(n)]
        m = masked[r] if masked else 0
        out.append([marker] * m + lab[m:])
    return out


def first_break(ids, labels, k, ignore=IGNORE):
    """First position whose trained label is not ids[t+k] (or t+k leaves the row); None when there is none."""
    for t, lab in enumerate(labels):
        if lab != ignore and not (0 <= t + k < len(ids) and lab == ids[t + k]):
            return t
    return None


def agreement(ids, labels, k, ignore=IGNORE):
    """Share of trained labels with t+k inside the row that equal ids[t+k] (None when there are none)."""
    comparable = [t for t, lab in enumerate(labels) if lab != ignore and 0 <= t + k < len(ids)]
    if not comparable:
        return None
    return sum(labels[t] == ids[t + k] for t in comparable) / len(comparable)


def label_findings(report):
    return findings(report, RULE)


# --------------------------------------------------------------------------- shift helpers

def test_shift_helpers_match_plain_python():
    ids = windows(40, seed=1, low=1, high=12)
    labels = shifted_labels(ids, 1, prompts([r + [0, 0, 0] for r in ids], 2))
    rng = random.Random(3)
    for row in labels:  # corrupt some labels
        for t in range(len(row)):
            if row[t] != IGNORE and rng.random() < 0.2:
                row[t] = 5
    flat = Flat(np.array(sum(ids, []), dtype=np.int64), np.cumsum([0] + [len(r) for r in ids]))
    values = np.array(sum(labels, []), dtype=np.int64)
    matches, comparable = shift_matches(flat, values, IGNORE)
    for i, k in enumerate(SHIFTS):
        for r in range(len(ids)):
            comp = [t for t, lab in enumerate(labels[r]) if lab != IGNORE and 0 <= t + k < len(ids[r])]
            assert comparable[i, r] == len(comp)
            assert matches[i, r] == sum(labels[r][t] == ids[r][t + k] for t in comp)
        expected_first = [first_break(ids[r], labels[r], k) for r in range(len(ids))]
        assert first_mismatch(flat, values, IGNORE, k).tolist() == [-1 if v is None else v for v in expected_first]
    best, agree, measured = best_shift(matches, comparable, SHIFTS, prefer=1)
    for r in range(len(ids)):
        shares = {k: agreement(ids[r], labels[r], k) for k in SHIFTS}
        known = {k: v for k, v in shares.items() if v is not None}
        assert measured[r] == bool(known)
        if known:
            top = max(known.values())
            assert agree[r] == pytest.approx(top)
            winners = [k for k, v in known.items() if v == top]
            assert best[r] == (1 if 1 in winners else [k for k in (0, 2, 3, -1) if k in winners][0])
    # the corpus-wide agreement the settings inference uses: matches over comparable, summed over rows
    total = shift_agreement(flat, values, IGNORE)
    for k in SHIFTS:
        comp = [(r, t) for r in range(len(ids)) for t, lab in enumerate(labels[r])
                if lab != IGNORE and 0 <= t + k < len(ids[r])]
        hit = sum(labels[r][t] == ids[r][t + k] for r, t in comp)
        assert total[k] == pytest.approx(hit / len(comp))


def test_ties_go_to_the_expected_shift():
    # one row whose tokens all repeat: every shift explains it fully
    flat = Flat(np.array([7] * 6), np.array([0, 6]))
    matches, comparable = shift_matches(flat, np.array([7] * 6), IGNORE)
    assert best_shift(matches, comparable, prefer=0)[0].tolist() == [0]
    assert best_shift(matches, comparable, prefer=1)[0].tolist() == [1]


def test_batch_shorter_than_the_shift():
    # two tokens in the whole batch: shifts 2 and 3 compare nothing (this used to raise on a slice mismatch)
    flat = Flat(np.array([5, 6]), np.array([0, 2]))
    matches, comparable = shift_matches(flat, np.array([6, IGNORE]), IGNORE)
    assert matches[:, 0].tolist() == [0, 0, 1, 0, 0] and comparable[:, 0].tolist() == [0, 1, 1, 0, 0]
    assert first_mismatch(flat, np.array([6, IGNORE]), IGNORE, 3).tolist() == [0]


# --------------------------------------------------------------------------- shift observed vs expected

@pytest.mark.parametrize("given", [None, "shifted"])
def test_labels_shifted_twice_give_one_error(tmp_path, given):
    ids = windows(53, seed=11)
    masked = prompts(ids, 12)
    labels = shifted_labels(ids, 2, masked)
    path = write(tmp_path / "twice.parquet", {"input_ids": ids, "labels": labels}, row_group_size=10)
    report = run(path, only=(RULE,), labels=given)
    found = label_findings(report)
    assert len(found) == 1
    f = found[0]
    assert (f.level, f.kind, f.count) == (Level.error, "shift+2", 53)
    assert f.evidence["observedShift"] == 2 and f.evidence["expectedShift"] == 1
    assert f.evidence["rows"] == 53 and f.evidence["agreement"] == 1.0
    assert locations(f) == [(r, first_break(ids[r], labels[r], 1)) for r in range(53)]
    assert locations(f)[:3] == [(r, masked[r]) for r in range(3)]
    assert "shifted twice" in f.message and "100% of 53 rows" in f.message
    if given is None:  # neither given nor inferable: the message says the convention was assumed
        assert f.evidence["conventionSource"] == "assumed" and "assumed" in f.message
    else:
        assert f.evidence["conventionSource"] == "given"


def test_narrow_integer_types_are_read_the_same(tmp_path):
    ids = windows(9, seed=13, high=20)  # ids < 30000 fit uint16
    labels = shifted_labels(ids, 2)
    path = write(tmp_path / "narrow.arrow", {
        "input_ids": pa.array(ids, type=pa.list_(pa.uint16())),
        "labels": pa.array(labels, type=pa.list_(pa.int32()))})
    found = label_findings(run(path, only=(RULE,), labels="shifted"))
    assert [(f.kind, f.count) for f in found] == [("shift+2", 9)]
    assert locations(found[0]) == [(r, 0) for r in range(9)]


def clean_shifted(tmp_path, seed=21):
    rng = random.Random(seed)
    docs = [[rng.randrange(10, 30000) for _ in range(rng.randint(3, 40))] for _ in range(70)]
    cols = pack(docs, 24, eos=EOS, pad=PAD)
    return write(tmp_path / "shifted.parquet", cols, row_group_size=16), cols


def clean_aligned(tmp_path, seed=22):
    """Rows of one document each, right-padded, labels == input_ids with padding ignored."""
    rng = random.Random(seed)
    ids, mask, labels = [], [], []
    for _ in range(40):
        doc = [rng.randrange(10, 30000) for _ in range(rng.randint(4, 24))] + [EOS]
        fill = 25 - len(doc)
        ids.append(doc + [PAD] * fill)
        mask.append([1] * len(doc) + [0] * fill)
        labels.append(doc + [IGNORE] * fill)
    cols = {"input_ids": ids, "attention_mask": mask, "labels": labels}
    return write(tmp_path / "aligned.parquet", cols, row_group_size=16), cols


@pytest.mark.parametrize("given", [None, "shifted"])
def test_clean_shifted_shard_has_no_findings(tmp_path, given):
    path, _ = clean_shifted(tmp_path)
    report = run(path, only=(RULE,), labels=given, pad_id=PAD)
    assert label_findings(report) == []
    if given is None:
        assert any("labels = shifted inferred" in n.message for n in report.notes)


@pytest.mark.parametrize("given", [None, "aligned"])
def test_clean_aligned_shard_has_no_findings(tmp_path, given):
    path, _ = clean_aligned(tmp_path)
    report = run(path, only=(RULE,), labels=given)
    assert label_findings(report) == []  # trained last labels are right under aligned: the model shifts


def test_aligned_data_under_shifted_convention(tmp_path):
    ids = windows(17, seed=31)
    labels = shifted_labels(ids, 0, prompts(ids, 32))
    path = write(tmp_path / "a.parquet", {"input_ids": ids, "labels": labels})
    found = label_findings(run(path, only=(RULE,), labels="shifted"))
    assert [(f.kind, f.count, f.level) for f in found] == [("shift+0", 17, Level.error)]
    assert locations(found[0]) == [(r, first_break(ids[r], labels[r], 1)) for r in range(17)]
    assert found[0].evidence["expectedShift"] == 1 and found[0].evidence["observedShift"] == 0


def test_shifted_data_under_aligned_convention(tmp_path):
    ids = windows(12, seed=33)
    labels = shifted_labels(ids, 1, prompts(ids, 34))
    path = write(tmp_path / "s.parquet", {"input_ids": ids, "labels": labels})
    found = label_findings(run(path, only=(RULE,), labels="aligned"))
    assert [(f.kind, f.count) for f in found] == [("shift+1", 12)]
    assert locations(found[0]) == [(r, first_break(ids[r], labels[r], 0)) for r in range(12)]
    assert found[0].evidence["expectedShift"] == 0


def test_labels_shifted_backwards(tmp_path):
    ids = windows(6, seed=35)
    labels = shifted_labels(ids, -1)
    found = label_findings(run(write(tmp_path / "b.jsonl", {"input_ids": ids, "labels": labels}),
                               only=(RULE,), labels="shifted"))
    assert [(f.kind, f.evidence["observedShift"]) for f in found] == [("shift-1", -1)]
    assert locations(found[0]) == [(r, first_break(ids[r], labels[r], 1)) for r in range(6)]


# --------------------------------------------------------------------------- rows that follow no shift

def test_rows_with_no_consistent_shift(tmp_path):
    ids = windows(30, seed=41, low=12)
    labels = shifted_labels(ids, 1, prompts(ids, 42))
    rng = random.Random(43)
    broken = sorted(rng.sample(range(30), 9))
    for r in broken:  # a third of the trained labels replaced by an id found in no row
        trained = [t for t, lab in enumerate(labels[r]) if lab != IGNORE]
        for t in rng.sample(trained, max(1, len(trained) // 3)):
            labels[r][t] = 5
    scrambled = broken[0]
    width = len(ids[scrambled])  # one row gets the tokens of another row as labels
    labels[scrambled] = ([IGNORE] + ids[(scrambled + 1) % 30] + [IGNORE] * width)[:width]
    path = write(tmp_path / "n.parquet", {"input_ids": ids, "labels": labels}, row_group_size=7)

    best = {r: max(v for v in (agreement(ids[r], labels[r], k) for k in SHIFTS) if v is not None)
            for r in range(30)}
    loose = [r for r in range(30) if best[r] < 0.9]
    assert loose == broken  # the data does what the test means
    found = label_findings(run(path, only=(RULE,), labels="shifted"))
    assert [(f.kind, f.count, f.level) for f in found] == [("no-shift", len(loose), Level.error)]
    assert locations(found[0]) == [(r, first_break(ids[r], labels[r], 1)) for r in loose]
    assert found[0].evidence["agreement"] == pytest.approx(sum(best[r] for r in loose) / len(loose), abs=1e-6)

    # a lower threshold accepts the partly corrupted rows as shifted; only the scrambled one stays
    low = min(best[r] for r in loose if r != scrambled)
    found = label_findings(run(path, only=(RULE,), labels="shifted", rule={RULE: {"min_agreement": low}}))
    assert [(f.kind, locations(f)) for f in found] == [
        ("no-shift", [(scrambled, first_break(ids[scrambled], labels[scrambled], 1))])]


# --------------------------------------------------------------------------- mixed conventions

def mixed_rows(seed):
    ids = windows(38, seed=seed)
    rng = random.Random(seed + 1)
    aligned = sorted(rng.sample(range(38), 8))
    masked = prompts(ids, seed + 2)
    labels = [shifted_labels([row], 0 if r in aligned else 1, [masked[r]])[0] for r, row in enumerate(ids)]
    return ids, labels, aligned


def test_mixed_conventions_within_a_shard(tmp_path):
    ids, labels, aligned = mixed_rows(51)
    shifted = [r for r in range(38) if r not in aligned]
    path = write(tmp_path / "m.parquet", {"input_ids": ids, "labels": labels}, row_group_size=5)

    found = {f.kind: f for f in label_findings(run(path, only=(RULE,), labels="shifted"))}
    assert sorted(found) == ["mixed-in-shard", "shift+0"]
    expected = [(r, first_break(ids[r], labels[r], 1)) for r in aligned]
    assert locations(found["shift+0"]) == expected
    mixed = found["mixed-in-shard"]
    assert (mixed.count, mixed.level, locations(mixed)) == (8, Level.error, expected)
    assert mixed.evidence["rowsShifted"] == 30 and mixed.evidence["rowsAligned"] == 8
    assert mixed.evidence["minorityShift"] == 0 and mixed.evidence["share"] == round(8 / 38, 6)

    # under the aligned convention the shifted rows are the mismatch; the mixed finding still lists the smaller
    # (aligned) group, at the first label that breaks the majority's shift 1
    found = {f.kind: f for f in label_findings(run(path, only=(RULE,), labels="aligned"))}
    assert sorted(found) == ["mixed-in-shard", "shift+1"]
    assert locations(found["shift+1"]) == [(r, first_break(ids[r], labels[r], 0)) for r in shifted]
    assert locations(found["mixed-in-shard"]) == expected

    # 8 of 38 rows is below a mixed_share of 25%: only the per-row mismatch remains
    found = label_findings(run(path, only=(RULE,), labels="shifted", rule={RULE: {"mixed_share": 0.25}}))
    assert [f.kind for f in found] == ["shift+0"]


def test_mixed_conventions_across_shards(tmp_path):
    a_ids, b_ids, c_ids = windows(12, seed=61), windows(5, seed=62), windows(9, seed=63)
    a = write(tmp_path / "a.parquet", {"input_ids": a_ids, "labels": shifted_labels(a_ids, 1)})
    b = write(tmp_path / "b.parquet", {"input_ids": b_ids, "labels": shifted_labels(b_ids, 0)})
    c = write(tmp_path / "c.jsonl", {"input_ids": c_ids, "labels": shifted_labels(c_ids, 1)})

    report = run([a, b, c], only=(RULE,))  # each shard's convention inferred on its own
    found = label_findings(report)
    assert len(found) == 1
    f = found[0]
    assert (f.kind, f.level, f.count, f.uri) == ("mixed-across-shards", Level.error, 1, None)
    assert [(i["uri"], i["row"]) for i in f.instances()] == [(b, 0)]
    assert f.evidence["majorityShift"] == 1
    assert f.evidence["shardsByShift"] == {"+1": 2, "+0": 1}
    assert f.evidence["rowsByShift"] == {"+1": 21, "+0": 5}
    assert report.metrics["labelShiftRows"] == {"+0": 5, "+1": 21}

    # with the convention given, shard b breaks it and is reported on its own, once (not again across shards)
    kinds = sorted((f.kind, f.uri) for f in label_findings(run([a, b, c], only=(RULE,), labels="shifted")))
    assert kinds == [("shift+0", b)]

    # a per-path setting declares shard b aligned: the difference is as configured, a note
    report = run([a, b, c], only=(RULE,), labels="shifted", path_tables={b: {"labels": "aligned"}})
    found = label_findings(report)
    assert [(f.kind, f.level, f.count) for f in found] == [("mixed-across-shards", Level.note, 1)]
    assert [(i["uri"], i["row"]) for i in found[0].instances()] == [(b, 0)]


# --------------------------------------------------------------------------- the last label under shifted

def ref_last_label(ids, labels):
    """Rows whose last label is trained and is not the next row's first token; the shard's last row counts
    only when no row of the shard continues into the next one."""
    n = len(ids)
    trained = [labels[r][-1] != IGNORE for r in range(n)]
    continued = [r for r in range(n - 1) if trained[r] and labels[r][-1] == ids[r + 1][0]]
    bad = [r for r in range(n - 1) if trained[r] and labels[r][-1] != ids[r + 1][0]]
    if trained[-1] and not continued:
        bad.append(n - 1)
    return [(r, len(ids[r]) - 1) for r in bad]


def test_last_label_of_a_rolled_row(tmp_path):
    ids = windows(23, seed=71)
    labels = [row[1:] + row[:1] for row in ids]  # a shift that wraps around: the last label is the first token
    path = write(tmp_path / "roll.parquet", {"input_ids": ids, "labels": labels}, row_group_size=4)
    found = label_findings(run(path, only=(RULE,), labels="shifted"))
    assert [(f.kind, f.level) for f in found] == [("last-label", Level.warning)]
    assert locations(found[0]) == ref_last_label(ids, labels) == [(r, len(ids[r]) - 1) for r in range(23)]
    assert found[0].evidence["wrapsAround"] == 23 and found[0].evidence["continued"] == 0


def test_last_label_continuing_the_stream_is_accepted(tmp_path):
    rng = random.Random(72)
    stream = rng.sample(range(10, 30000), 20 * 16 + 1)
    ids = [stream[i:i + 16] for i in range(0, 320, 16)]
    labels = [stream[i + 1:i + 17] for i in range(0, 320, 16)]  # last label = next window's first token
    path = write(tmp_path / "stream.parquet", {"input_ids": ids, "labels": labels}, row_group_size=3)
    assert ref_last_label(ids, labels) == []
    assert label_findings(run(path, only=(RULE,), labels="shifted")) == []


def test_last_label_mixture(tmp_path):
    rng = random.Random(73)
    stream = rng.sample(range(10, 30000), 30 * 12 + 1)
    ids = [stream[i:i + 12] for i in range(0, 360, 12)]
    labels = []
    for r, row in enumerate(ids):
        lab = row[1:] + [IGNORE]
        choice = rng.choice(["ignored", "eos", "next"])
        if choice == "eos":
            lab[-1] = EOS
        elif choice == "next":
            lab[-1] = stream[(r + 1) * 12]
        labels.append(lab)
    labels[-1][-1] = EOS  # the shard's last row: presumed continued, since other rows continue
    path = write(tmp_path / "mix.parquet", {"input_ids": ids, "labels": labels}, row_group_size=4)
    expected = ref_last_label(ids, labels)
    assert 3 < len(expected) < 30 and (29, 11) not in expected
    found = label_findings(run(path, only=(RULE,), labels="shifted"))
    assert [f.kind for f in found] == ["last-label"]
    assert locations(found[0]) == expected
    assert found[0].evidence["continued"] == 1 + sum(
        1 for r in range(29) if labels[r][-1] != IGNORE and labels[r][-1] == ids[r + 1][0])

    # with no continued row in the shard, its last row is reported too
    labels = [lab[:-1] + [EOS if lab[-1] != IGNORE else IGNORE] for lab in labels]
    path = write(tmp_path / "mix2.parquet", {"input_ids": ids, "labels": labels}, row_group_size=4)
    found = label_findings(run(path, only=(RULE,), labels="shifted"))
    assert locations(found[0]) == ref_last_label(ids, labels)
    assert (29, 11) in locations(found[0])


# --------------------------------------------------------------------------- label values

def padded(seed, count=25, width=20):
    """Shifted rows of one document each, right-padded: (ids, mask, labels with IGNORE at padding)."""
    rng = random.Random(seed)
    ids, mask, labels = [], [], []
    for _ in range(count):
        doc = rng.sample(range(10, 30000), rng.randint(4, width - 1)) + [EOS]
        fill = width - len(doc)
        ids.append(doc + [PAD] * fill)
        mask.append([1] * len(doc) + [0] * fill)
        labels.append(doc[1:] + [IGNORE] + [IGNORE] * fill)
    return ids, mask, labels


def test_minus_one_as_ignore_marker(tmp_path):
    ids, mask, labels = padded(81)
    masked = prompts(ids, 82)
    labels = [[-1] * m + [-1 if v == IGNORE else v for v in lab[m:]] for m, lab in zip(masked, labels)]
    path = write(tmp_path / "neg.parquet", {"input_ids": ids, "attention_mask": mask, "labels": labels},
                 row_group_size=6)
    report = run(path, only=(RULE,), labels="shifted")
    found = label_findings(report)
    assert [(f.kind, f.level) for f in found] == [("negative-label", Level.error)]
    f = found[0]
    assert locations(f) == [(r, lab.index(-1)) for r, lab in enumerate(labels)]
    assert f.evidence["value"] == -1 and f.evidence["values"] == [-1]
    assert f.evidence["positions"] == sum(lab.count(-1) for lab in labels)
    assert "marked with -1 instead of ignore_index -100" in f.message
    # the loss sees every label as trained: nothing equals ignore_index
    assert report.metrics["labelSupervision"]["trainedFraction"] == 1.0


def test_pad_id_as_ignore_marker(tmp_path):
    ids, mask, labels = padded(83)
    labels = [[PAD if m == 0 else v for v, m in zip(lab, mrow)] for lab, mrow in zip(labels, mask)]
    expected = [(r, mrow.index(0)) for r, mrow in enumerate(mask) if 0 in mrow]
    positions = sum(mrow.count(0) for mrow in mask)

    path = write(tmp_path / "pad.parquet", {"input_ids": ids, "attention_mask": mask, "labels": labels})
    found = label_findings(run(path, only=(RULE,), labels="shifted"))  # pad_id inferred from the mask
    assert [(f.kind, f.level) for f in found] == [("pad-label", Level.error)]
    assert locations(found[0]) == expected
    assert found[0].evidence["positions"] == positions and found[0].evidence["padId"] == PAD
    assert "pad id 0 (pad_id inferred)" in found[0].message

    # without a mask: the run of pad ids after the last real token is the padding
    path = write(tmp_path / "pad2.parquet", {"input_ids": ids, "labels": labels})
    found = label_findings(run(path, only=(RULE,), labels="shifted", pad_id=PAD))
    assert [f.kind for f in found] == ["pad-label"] and locations(found[0]) == expected
    # pad_id not given and no mask: most rows end in a run of 0, so 0 is inferred as the pad id (issue 10) and the
    # same positions are read as padding, with the finding saying that the pad id was inferred
    found = label_findings(run(path, only=(RULE,), labels="shifted"))
    assert [f.kind for f in found] == ["pad-label"] and locations(found[0]) == expected
    assert "pad id 0 (pad_id inferred)" in found[0].message
    # with fewer padded rows than the inference needs (a quarter), nothing says which positions are padding, so
    # the pad label of a padded row's last position reads as a trained last label
    few = [r for r, mrow in enumerate(mask) if 0 in mrow][:2]
    keep = [r for r, mrow in enumerate(mask) if 0 not in mrow] + few
    path = write(tmp_path / "pad3.parquet", {"input_ids": [ids[r] for r in keep],
                                             "labels": [labels[r] for r in keep]})
    found = label_findings(run(path, only=(RULE,), labels="shifted"))
    assert [f.kind for f in found] == ["last-label"]
    assert locations(found[0]) == [(keep.index(r), len(ids[r]) - 1) for r in few]


def test_labels_beyond_the_vocabulary(tmp_path):
    ids = windows(15, seed=85)
    labels = shifted_labels(ids, 1)
    rng = random.Random(86)
    for r in rng.sample(range(15), 5):
        for t in rng.sample(range(len(ids[r]) - 1), 2):
            labels[r][t] = 30000 + rng.randrange(0, 500)
    path = write(tmp_path / "v.parquet", {"input_ids": ids, "labels": labels})
    found = label_findings(run(path, only=(RULE,), labels="shifted", vocab_size=30000))
    beyond = [(r, t) for r in range(15) for t, v in enumerate(labels[r]) if v >= 30000]
    first = [(r, min(t for rr, t in beyond if rr == r)) for r in sorted({r for r, _ in beyond})]
    assert [f.kind for f in found] == ["label-out-of-vocab"]
    assert locations(found[0]) == first
    assert found[0].evidence["positions"] == len(beyond)
    assert found[0].evidence["maxLabel"] == max(labels[r][t] for r, t in beyond)
    # without vocab_size the values are not judged: they are labels no shift explains
    found = label_findings(run(path, only=(RULE,), labels="shifted"))
    loose = [r for r in range(15) if agreement(ids[r], labels[r], 1) < 0.9]
    assert loose and [f.kind for f in found] == ["no-shift"]
    assert locations(found[0]) == [(r, first_break(ids[r], labels[r], 1)) for r in loose]


def test_rows_with_nothing_to_train_on(tmp_path):
    ids = windows(20, seed=91)
    labels = shifted_labels(ids, 1)
    empty = [2, 3, 11, 19]
    for r in empty:
        labels[r] = [IGNORE] * len(ids[r])
    path = write(tmp_path / "e.parquet", {"input_ids": ids, "labels": labels}, row_group_size=6)
    report = run(path, only=(RULE,), labels="shifted")
    found = label_findings(report)
    assert [(f.kind, f.level, f.count) for f in found] == [("nothing-trained", Level.warning, 4)]
    assert locations(found[0]) == [(r, -1) for r in empty]
    assert found[0].instances() == [{"row": r} for r in empty]


# --------------------------------------------------------------------------- JSON Lines

def test_json_lines_rows_are_line_indices(tmp_path):
    ids = windows(14, seed=101)
    labels = shifted_labels(ids, 2, prompts(ids, 102))
    blank_before = {0: 1, 4: 2, 9: 1}  # blank lines written before these records
    lines, line_of = [], []
    for r in range(14):
        lines += [""] * blank_before.get(r, 0)
        line_of.append(len(lines))
        lines.append(json.dumps({"input_ids": ids[r], "labels": labels[r]}))
    path = tmp_path / "twice.jsonl"
    path.write_text("\n".join(lines) + "\n")
    found = label_findings(run(str(path), only=(RULE,)))
    assert len(found) == 1 and found[0].kind == "shift+2" and found[0].count == 14
    assert locations(found[0]) == [(line_of[r], first_break(ids[r], labels[r], 1)) for r in range(14)]
    assert found[0].start_line == line_of[0] + 1 == 2


# --------------------------------------------------------------------------- supervision figures

def test_supervision_figures_shifted(tmp_path):
    rng = random.Random(111)
    docs = [[rng.randrange(10, 30000) for _ in range(rng.randint(3, 30))] for _ in range(60)]
    cols = pack(docs, 20, eos=EOS, pad=PAD)
    ids, labels, pos = cols["input_ids"], cols["labels"], cols["position_ids"]
    starts = [(r, t) for r in range(len(ids)) for t in range(1, len(ids[r])) if pos[r][t] == 0]
    for r, t in starts[::3]:  # a pipeline that stops some documents' eos from predicting the next document
        labels[r][t - 1] = IGNORE
    cross = sum(labels[r][t - 1] != IGNORE for r, t in starts)
    total = sum(len(row) for row in labels)
    trained = sum(v != IGNORE for row in labels for v in row)
    expected = {"positions": total, "trainedFraction": round(trained / total, 6), "documentStarts": len(starts),
                "crossDocumentFraction": round(cross / len(starts), 6)}
    assert 0 < cross < len(starts)

    path = write(tmp_path / "p.parquet", cols)
    report = run(path, only=(RULE,), pad_id=PAD)
    assert label_findings(report) == []
    assert report.metrics["labelSupervision"] == {**expected, "documentStartsFrom": "position_ids"}

    # without position_ids the token after each eos marks a document start: the same starts here
    del cols["position_ids"]
    path = write(tmp_path / "q.parquet", cols)
    report = run(path, only=(RULE,), pad_id=PAD, eos_id=EOS)
    assert report.metrics["labelSupervision"] == {**expected, "documentStartsFrom": "eos_id"}


def test_supervision_figures_aligned(tmp_path):
    rng = random.Random(112)
    docs = [[rng.randrange(10, 30000) for _ in range(rng.randint(3, 30))] for _ in range(40)]
    cols = pack(docs, 20, eos=EOS, pad=PAD)
    ids, pos = cols["input_ids"], cols["position_ids"]
    real = [max(t + 1 for t, v in enumerate(row) if v != PAD) for row in ids]  # content ids are never PAD
    labels = [row[:n] + [IGNORE] * (len(row) - n) for row, n in zip(ids, real)]  # padding ignored
    starts = [(r, t) for r in range(len(ids)) for t in range(1, real[r]) if pos[r][t] == 0]
    for r, t in starts[1::2]:  # under aligned the label at the start itself is the cross-document target
        labels[r][t] = IGNORE
    cross = sum(labels[r][t] != IGNORE for r, t in starts)
    total = sum(len(row) for row in labels)
    trained = sum(v != IGNORE for row in labels for v in row)
    path = write(tmp_path / "al.parquet", {"input_ids": ids, "labels": labels, "position_ids": pos})
    report = run(path, only=(RULE,), labels="aligned")
    assert label_findings(report) == []
    assert report.metrics["labelSupervision"] == {
        "positions": total, "trainedFraction": round(trained / total, 6), "documentStarts": len(starts),
        "crossDocumentFraction": round(cross / len(starts), 6), "documentStartsFrom": "position_ids"}


# --------------------------------------------------------------------------- options

def test_options_are_validated():
    assert LabelAlignment(min_agreement=0.8).opts["min_agreement"] == 0.8
    with pytest.raises(ValueError, match="min_agreement must be a share"):
        LabelAlignment(min_agreement=1.5)
    with pytest.raises(ValueError, match="mixed_share must be a share"):
        LabelAlignment(mixed_share=0)
    with pytest.raises(ValueError, match="unknown option"):
        LabelAlignment(threshold=0.5)
