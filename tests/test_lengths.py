"""Tests for the length rules (overlong-document, truncation-waste) and corpuscle.kernels.documents.

Every expected figure is computed here, independently of the code under test, with plain Python over the same
lists of invented documents: document lengths and where each starts, real/padding/cut counts of a padded shard,
and window counts of the three layouts (one document per window, concatenate-and-chunk, and a best-fit
decreasing that places one piece at a time by a linear scan over the open windows). Length quantiles are checked
against numpy.percentile with its default method ("linear": linear interpolation between the closest ranks,
Hyndman & Fan's definition 7), byte lengths against the stdlib's UTF-8 encoder, token counts against the
tokenizers library's own encoder.
"""
from __future__ import annotations

import json
import pickle

import numpy as np
import pytest
from corpuscle.kernels.documents import LengthHistogram, percentile
from corpuscle.kernels.packing import compare_layouts
from corpuscle.report import json as json_report
from corpuscle.report import sarif, text
from corpuscle.settings import Settings, SettingsError

from tests.shards import findings, locations, pack, run, validate_sarif, write

RULES = ("overlong-document", "truncation-waste")
EOS, PAD = 2, 0


def invented_documents(seed: int, count: int, longest: int) -> list[list[int]]:
    """Documents of random ids in [3, 500) (never eos or pad) with lengths in [1, longest]."""
    rng = np.random.default_rng(seed)
    return [[int(x) for x in rng.integers(3, 500, size=int(n))] for n in rng.integers(1, longest + 1, size=count)]


def padded(documents, seq_len, eos=EOS, pad=PAD, mask=True):
    """One document per row: document + eos, cut to seq_len, padded with pad (attention_mask 0 on padding)."""
    ids, masks = [], []
    for doc in documents:
        row = (doc + [eos])[:seq_len]
        ids.append(row + [pad] * (seq_len - len(row)))
        masks.append([1] * len(row) + [0] * (seq_len - len(row)))
    cols = {"input_ids": ids}
    if mask:
        cols["attention_mask"] = masks
    return cols


# -- independent references (plain Python) ----------------------------------------------------------------------

def ref_windows(lengths, seq_len):
    """Windows of (one per window, concatenate-and-chunk, best-fit decreasing), one document at a time."""
    one = sum(1 for n in lengths if n > 0)
    total = sum(lengths)
    concat = (total + seq_len - 1) // seq_len
    pieces, full = [], 0
    for n in lengths:
        full += n // seq_len
        if n % seq_len:
            pieces.append(n % seq_len)
    rooms = []  # room left in each open window
    for piece in sorted(pieces, reverse=True):
        fits = [i for i, r in enumerate(rooms) if r >= piece]
        if fits:
            best = min(fits, key=lambda i: rooms[i])
            rooms[best] -= piece
        else:
            rooms.append(seq_len - piece)
    return one, concat, full + len(rooms)


def ref_starts(documents, seq_len, eos=True):
    """(row, offset) where each document starts when documents (+ eos) are packed end to end into windows."""
    out, at = [], 0
    for doc in documents:
        out.append((at // seq_len, at % seq_len))
        at += len(doc) + (1 if eos else 0)
    return out


def budget_of(report):
    return report.metrics["tokenBudget"]


# -- a padded shard: one document per row -----------------------------------------------------------------------

@pytest.mark.parametrize("fmt", ["parquet", "jsonl"])
def test_padded_shard_budget_equals_exact_counts(tmp_path, fmt):
    seq_len = 24
    docs = invented_documents(seed=3, count=40, longest=40)
    path = write(tmp_path / f"padded.{fmt}", padded(docs, seq_len))
    report = run(path, eos_id=EOS, pad_id=PAD, only=RULES)

    # exact figures, plain Python over the rows we wrote
    rows = [(d + [EOS])[:seq_len] for d in docs]
    slots = len(docs) * seq_len
    real = sum(len(r) for r in rows)
    cut_rows = [i for i, d in enumerate(docs) if len(d) + 1 > seq_len]  # full rows that do not end in eos
    assert cut_rows and len(cut_rows) < len(docs)
    lengths = [len(r) for r in rows]  # the document as the shard holds it
    one, concat, bfd = ref_windows(lengths, seq_len)

    budget = budget_of(report)
    built = budget["asBuilt"]
    assert (built["slots"], built["realTokens"], built["padding"], built["truncated"]) == \
        (slots, real, slots - real, len(cut_rows))
    assert built["windows"] == len(docs) and built["truncatedIsLowerBound"] is True
    assert budget["realTokenFraction"] == real / slots
    assert budget["padTokenFraction"] == (slots - real) / slots
    assert budget["truncatedTokenFraction"] == len(cut_rows) / (real + len(cut_rows))
    assert budget["documents"] == len(docs) and budget["documentTokens"] == real
    layouts = budget["layouts"]
    assert [layouts[k]["windows"] for k in ("oneDocumentPerWindow", "concatenateAndChunk", "bestFitDecreasing")] \
        == [one, concat, bfd]
    assert layouts["concatenateAndChunk"]["padding"] == concat * seq_len - real
    assert layouts["bestFitDecreasing"]["slotsSavedPct"] == pytest.approx(100 * (slots - bfd * seq_len) / slots)
    assert budget["lowerBound"] == concat

    waste = findings(report, "truncation-waste")
    assert len(waste) == 1  # padding is far above 10% of the slots
    ev = waste[0].evidence
    assert ev["asBuilt"]["padding"] == slots - real and ev["asBuilt"]["truncated"] == len(cut_rows)
    assert ev["layouts"]["bestFitDecreasing"]["windows"] == bfd
    assert waste[0].count == sum(1 for r in rows if len(r) < seq_len) + len(cut_rows)
    assert f"{slots:,} token slots" in waste[0].message and f"{len(cut_rows):,} documents cut" in waste[0].message

    cut = findings(report, "overlong-document", "cut")
    assert len(cut) == 1
    assert locations(cut[0]) == [(i, 0) for i in cut_rows]
    assert cut[0].count == len(cut_rows)
    assert not findings(report, "overlong-document", "longer-than-window")  # no row holds more than the window


def test_padded_shard_without_mask_pad_equal_to_eos(tmp_path):
    """No attention mask, pad_id == eos_id: the first eos after a document is its separator, the rest padding."""
    seq_len = 16
    docs = invented_documents(seed=5, count=25, longest=24)
    path = write(tmp_path / "padded.parquet", padded(docs, seq_len, pad=EOS, mask=False))
    report = run(path, eos_id=EOS, pad_id=EOS, only=RULES)
    rows = [(d + [EOS])[:seq_len] for d in docs]
    built = budget_of(report)["asBuilt"]
    assert built["realTokens"] == sum(len(r) for r in rows)
    assert built["padding"] == len(docs) * seq_len - sum(len(r) for r in rows)
    assert built["truncated"] == sum(1 for d in docs if len(d) + 1 > seq_len)
    assert locations(findings(report, "overlong-document", "cut")[0]) == \
        [(i, 0) for i, d in enumerate(docs) if len(d) + 1 > seq_len]


def test_waste_threshold_option(tmp_path):
    seq_len = 10
    docs = [[5] * 8] * 10 + [[6] * 5]  # 9 + 9 + ... real tokens per row of 10, one row of 6
    path = write(tmp_path / "padded.parquet", padded(docs, seq_len))
    slots, real = 11 * seq_len, 10 * 9 + 6
    waste = (slots - real) / slots  # 14 / 110 = 12.7%
    assert findings(run(path, eos_id=EOS, pad_id=PAD, only=RULES), "truncation-waste")
    quiet = run(path, eos_id=EOS, pad_id=PAD, only=RULES, rule={"truncation-waste": {"max_waste": 0.13}})
    assert not findings(quiet, "truncation-waste")
    assert budget_of(quiet)["asBuilt"]["wastedFraction"] == waste
    with pytest.raises(SettingsError, match="max_waste"):
        run(path, only=RULES, rule={"truncation-waste": {"max_waste": 1.5}})


# -- packed shards: documents joined across rows and batches --------------------------------------------------

@pytest.mark.parametrize("positions", [True, False])
@pytest.mark.parametrize("row_group_size", [None, 3, 1])
def test_packed_documents_joined_across_rows_and_batches(tmp_path, positions, row_group_size):
    seq_len = 16
    docs = invented_documents(seed=11, count=60, longest=45)
    cols = pack(docs, seq_len, eos=EOS, pad=PAD, positions=positions)
    path = write(tmp_path / "packed.parquet", cols, row_group_size=row_group_size)  # a batch per row group
    report = run(path, eos_id=EOS, pad_id=PAD, seq_len=seq_len, only=RULES)

    lengths = [len(d) + 1 for d in docs]  # each document with its eos
    starts = ref_starts(docs, seq_len)
    overlong = [i for i, n in enumerate(lengths) if n > seq_len]
    assert overlong

    found = findings(report, "overlong-document", "longer-than-window")
    assert len(found) == 1
    f = found[0]
    assert locations(f) == [starts[i] for i in overlong]
    assert f.count == len(overlong)
    ev = f.evidence
    assert ev["documents"] == len(docs) and ev["documentTokens"] == sum(lengths)
    assert ev["overlongTokens"] == sum(lengths[i] for i in overlong)
    assert ev["tokensBeyondWindow"] == sum(lengths[i] - seq_len for i in overlong)
    assert ev["documentShare"] == len(overlong) / len(docs)
    assert ev["tokenShare"] == sum(lengths[i] for i in overlong) / sum(lengths)
    # numpy.percentile, default method "linear"
    assert ev["lengthQuantiles"] == {"p50": float(np.percentile(lengths, 50)), "p90": float(np.percentile(lengths, 90)),
                                     "p99": float(np.percentile(lengths, 99)), "max": max(lengths)}
    assert ev["unit"] == "tokens"
    assert ev["arrangement"] == ("position-restarts" if positions else "separators")
    assert not findings(report, "overlong-document", "cut")  # a packed shard splits, it does not cut

    one, concat, bfd = ref_windows(lengths, seq_len)
    budget = budget_of(report)
    assert [budget["layouts"][k]["windows"] for k in ("oneDocumentPerWindow", "concatenateAndChunk",
                                                      "bestFitDecreasing")] == [one, concat, bfd]
    rows = len(cols["input_ids"])
    assert budget["asBuilt"]["slots"] == rows * seq_len
    assert budget["asBuilt"]["padding"] == rows * seq_len - sum(lengths)
    assert budget["layouts"]["oneDocumentPerWindow"]["dropped"] == sum(n - seq_len for n in lengths if n > seq_len)
    assert report.metrics["documentTokens"]["documents"] == len(docs)


def test_batches_fed_by_hand_give_the_same_documents(tmp_path):
    """The rule's state carries the open document from batch to batch (tiny batches from the reader)."""
    from corpuscle.engine.infer import infer_from_batch
    from corpuscle.io.sources import discover, open_shard
    from corpuscle.rules.lengths import OverlongDocument, TruncationWaste

    seq_len = 12
    docs = invented_documents(seed=17, count=30, longest=40)
    path = write(tmp_path / "packed.parquet", pack(docs, seq_len, eos=EOS, pad=PAD))
    shard = discover([path])[0]
    with open_shard(shard, batch_tokens=2 * seq_len) as reader:  # two rows per batch
        batches = list(reader)
    assert len(batches) >= len(pack(docs, seq_len, eos=EOS)["input_ids"]) // 2
    facts = infer_from_batch(Settings(eos_id=EOS, pad_id=PAD, seq_len=seq_len), batches[0])
    overlong, waste = OverlongDocument(), TruncationWaste()
    states = [rule.begin(shard, facts) for rule in (overlong, waste)]
    for batch in batches:
        for rule, state in zip((overlong, waste), states):
            rule.feed(state, batch)
    states = [pickle.loads(pickle.dumps(rule.end(state))) for rule, state in zip((overlong, waste), states)]

    lengths = [len(d) + 1 for d in docs]
    assert states[0].tally.lengths.expand().tolist() == sorted(lengths)
    assert states[1].tally.lengths.expand().tolist() == sorted(lengths)
    f = overlong.report(states[0])[0]
    starts = ref_starts(docs, seq_len)
    assert locations(f) == [starts[i] for i, n in enumerate(lengths) if n > seq_len]


def test_packed_rows_cut_when_the_next_row_restarts(tmp_path):
    """With position_ids, a full row that ends without eos and is followed by a restart was cut."""
    seq_len = 8
    ids = [[5, 6, 2, 7, 8, 9, 10, 11],      # doc A (3 with eos), doc B starts at 3 and fills the row, no eos
           [12, 13, 2, 14, 15, 2, 0, 0],    # restart at 0: B was cut; C (3), D (3), padding
           [16, 17, 18, 19, 20, 21, 22, 23],  # E starts, fills the row without eos ...
           [24, 25, 2, 26, 2, 0, 0, 0]]     # ... and continues here (position 8): E is 11 tokens, then F (2)
    pos = [[0, 1, 2, 0, 1, 2, 3, 4],
           [0, 1, 2, 0, 1, 2, 3, 4],
           [0, 1, 2, 3, 4, 5, 6, 7],
           [8, 9, 10, 0, 1, 2, 3, 4]]
    path = write(tmp_path / "cut.parquet", {"input_ids": ids, "position_ids": pos}, row_group_size=1)
    report = run(path, eos_id=EOS, pad_id=PAD, seq_len=seq_len, only=RULES)
    cut = findings(report, "overlong-document", "cut")
    assert len(cut) == 1 and locations(cut[0]) == [(0, 3)]  # B, cut at the end of row 0
    longer = findings(report, "overlong-document", "longer-than-window")
    assert len(longer) == 1 and locations(longer[0]) == [(2, 0)]  # E: 8 + 3 = 11 tokens
    assert longer[0].evidence["lengthQuantiles"]["max"] == 11
    tally_lengths = sorted([3, 5, 3, 3, 11, 2])
    assert budget_of(report)["documentTokens"] == sum(tally_lengths)
    assert budget_of(report)["asBuilt"]["truncated"] == 1


def test_clean_packed_shard_has_no_findings(tmp_path):
    seq_len = 32
    docs = invented_documents(seed=23, count=50, longest=20)
    cols = pack(docs, seq_len, eos=EOS, pad=PAD)
    path = write(tmp_path / "clean.parquet", cols)
    report = run(path, eos_id=EOS, pad_id=PAD, seq_len=seq_len, only=RULES)
    assert not findings(report, "overlong-document")
    assert not findings(report, "truncation-waste")  # only the last window is padded
    assert budget_of(report)["asBuilt"]["truncated"] == 0


# -- raw text ---------------------------------------------------------------------------------------------------

TEXTS = ["A short note about pears.", "", "Une île, un café, un thé — naïve.", None,
         "The harbour wall was longer than anyone remembered, and the gulls knew every stone of it.",
         "🙂 seven gulls 🙂"]


def test_text_shard_without_tokenizer_reports_bytes(tmp_path):
    path = write(tmp_path / "notes.parquet", {"text": TEXTS})
    report = run(path, seq_len=8, only=RULES)
    byte_lengths = [len(t.encode("utf-8")) for t in TEXTS if t]  # stdlib UTF-8; empty and null are no documents
    figures = report.metrics["documentBytes"]
    assert figures["unit"] == "bytes"
    assert figures["documents"] == len(byte_lengths) and figures["max"] == max(byte_lengths)
    assert figures["p50"] == float(np.percentile(byte_lengths, 50))
    assert figures["p90"] == float(np.percentile(byte_lengths, 90))
    assert "documentTokens" not in report.metrics and "tokenBudget" not in report.metrics
    assert not findings(report, "overlong-document")
    notes = [n.message for n in report.notes if n.rule_id == "overlong-document"]
    assert notes and "UTF-8 bytes" in notes[0] and "--tokenizer" in notes[0]
    summary = text.render(report, stats=True)  # the figures are in the summary only with --stats
    assert "documentBytes: unit bytes" in summary and "Token budget" not in summary


def test_text_shard_with_tokenizer_compares_tokens(tmp_path):
    tokenizers = pytest.importorskip("tokenizers")
    from tests.test_tokenize import bpe

    tok_path = bpe(tmp_path / "tok.json")
    path = write(tmp_path / "notes.jsonl", {"text": TEXTS})
    seq_len = 24
    report = run(path, seq_len=seq_len, tokenizer=tok_path, only=RULES)
    tok = tokenizers.Tokenizer.from_file(tok_path)
    counts = {i: len(tok.encode(t, add_special_tokens=False).ids) for i, t in enumerate(TEXTS) if t}
    over = [i for i, n in counts.items() if n > seq_len]
    assert over and len(over) < len(counts)
    f = findings(report, "overlong-document", "longer-than-window")[0]
    assert locations(f) == [(i, 0) for i in over]
    assert f.evidence["unit"] == "tokens" and f.evidence["documents"] == len(counts)
    assert f.evidence["lengthQuantiles"]["p50"] == float(np.percentile(list(counts.values()), 50))
    assert report.metrics["documentTokens"]["max"] == max(counts.values())
    assert "tokenBudget" not in report.metrics  # raw text has no windows as built


# -- reports ----------------------------------------------------------------------------------------------------

def test_budget_in_text_sarif_and_json(tmp_path):
    seq_len = 24
    docs = invented_documents(seed=29, count=30, longest=30)
    path = write(tmp_path / "padded.parquet", padded(docs, seq_len))
    report = run(path, eos_id=EOS, pad_id=PAD, only=RULES)
    budget = budget_of(report)
    assert "Token budget" not in text.render(report)  # the figures are in the summary only with --stats
    summary = text.render(report, stats=True)
    lines = summary.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("Token budget"))
    section = lines[start:start + 7]
    assert "seq_len 24" in section[0] and f"{len(docs)} documents" in section[0]
    assert section[2].split()[:4] == ["as", "built", str(len(docs)), "windows"]
    assert section[3].split()[:5] == ["one", "document", "per", "window", str(len(docs))]
    windows = budget["layouts"]["concatenateAndChunk"]["windows"]
    assert section[4].split()[:2] == ["concatenate-and-chunk", f"{windows:,}"]
    assert section[5].split()[:3] == ["best-fit", "decreasing", f"{budget['layouts']['bestFitDecreasing']['windows']:,}"]
    assert section[6].split()[:3] == ["lower", "bound", f"{budget['lowerBound']:,}"]
    assert "tokenBudget:" not in summary  # a section of its own, not a line of corpus figures

    doc = json.loads(json_report.render(report))
    assert doc["metrics"]["tokenBudget"] == json.loads(json.dumps(budget))
    log = json.loads(sarif.render(report))
    assert log["runs"][0]["properties"]["metrics"]["tokenBudget"]["asBuilt"]["padding"] == \
        budget["asBuilt"]["padding"]
    validate_sarif(log)  # OASIS SARIF 2.1.0 schema


# -- the length histogram and its quantiles ---------------------------------------------------------------------

@pytest.mark.parametrize("seed", range(6))
def test_histogram_quantiles_equal_numpy_percentile(seed):
    rng = np.random.default_rng(seed)
    lengths = np.clip(rng.lognormal(4, 1.5, size=int(rng.integers(1, 3000))), 1, 200_000).astype(np.int64)
    hist = LengthHistogram()
    for part in np.array_split(lengths, 7):
        hist.add(part)
    for p in (0, 1, 25, 50, 90, 99, 99.9, 100):
        # numpy.percentile, default method "linear"
        assert percentile(hist.sizes, hist.counts, p) == float(np.percentile(lengths, p))
    assert hist.documents == lengths.size and hist.tokens == int(lengths.sum()) and hist.max == int(lengths.max())
    assert hist.expand().tolist() == sorted(lengths.tolist())


def test_histogram_keeps_long_lengths_exact_and_merges():
    long = LengthHistogram.DENSE
    a, b = LengthHistogram(), LengthHistogram()
    a.add([1, 5, long + 3, 5, long * 40])
    b.add([5, long + 3, 2])
    a = pickle.loads(pickle.dumps(a))
    merged = LengthHistogram.merged([a, b])
    assert merged.sizes.tolist() == [1, 2, 5, long + 3, long * 40]
    assert merged.counts.tolist() == [1, 1, 3, 2, 1]


def test_layouts_from_counts_equal_layouts_from_expanded_lengths():
    rng = np.random.default_rng(41)
    lengths = rng.integers(0, 5000, size=4000)
    sizes, counts = np.unique(lengths, return_counts=True)
    for seq_len in (7, 512, 2048):
        assert compare_layouts(sizes, seq_len, counts) == compare_layouts(lengths, seq_len)
