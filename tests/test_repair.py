"""corpuscle repair: each fix against an independent recomputation of what the shard should hold, the inputs
left byte-identical, repacks that keep every document (and lose exactly the dropped ones), best-fit decreasing
within its published bound, round trips that rescan clean, and the refusal of an output inside an input.

Expected outputs are built in plain Python from the lists the shards were made of (tests/shards.py), never with
the code under test.
"""
from __future__ import annotations

import collections
import gzip
import hashlib
import itertools
import json
import os
import re

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner
from corpuscle import Settings
from corpuscle.cli import main
from corpuscle.io.sources import discover
from corpuscle.kernels.packing import best_fit_decreasing_fills
from corpuscle.repair import repair
from corpuscle.repair.repack import best_fit_assign
from corpuscle.repair.rewrite import ShardJob, rewrite_shard

from tests.shards import pack, run, write
from tests.test_packing import opt_windows

EOS, PAD, IGNORE = 2, 0, -100


def sha256(path) -> str:
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def documents(seed: int, count: int, longest: int, low: int = 5, high: int = 1000) -> list[list[int]]:
    rng = np.random.default_rng(seed)
    return [[int(t) for t in rng.integers(low, high, int(rng.integers(3, longest)))] for _ in range(count)]


def read(path) -> dict:
    if str(path).endswith(".parquet"):
        return pq.read_table(path).to_pydict()
    opener = gzip.open if str(path).endswith(".gz") else open
    with opener(path, "rb") as fh:
        rows = [json.loads(line) for line in fh if line.strip()]
    return {k: [r[k] for r in rows] for k in rows[0]}


def kinds(report, rule_id=None) -> collections.Counter:
    return collections.Counter((f.rule_id, f.kind, f.count) for f in report.findings
                               if rule_id is None or f.rule_id == rule_id)


def others(report, fixed) -> collections.Counter:
    return collections.Counter((f.rule_id, f.kind, f.count) for f in report.findings if f.rule_id not in fixed)


def cli(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


# -- labels shifted twice -----------------------------------------------------------------------------------------


def test_labels_shifted_twice_are_rebuilt_keeping_the_prompt_masks(tmp_path):
    docs = documents(1, 120, 60)
    cols = pack(docs, 64, eos=EOS, pad=PAD)
    truth = [list(row) for row in cols["labels"]]
    # masked on purpose: labels 1-3 of every third window (a prompt), in the correct labels (label 0 stays
    # trained: shifting once more drops it, so the input could not say it was masked)
    for i in range(0, len(truth), 3):
        truth[i][1:4] = [IGNORE] * 3
    # the defect: shifted once more, broken[t] = truth[t + 1], the last label ignored
    broken = [row[1:] + [IGNORE] for row in truth]
    cols = dict(cols, labels=broken)
    src = write(tmp_path / "in" / "twice.parquet", cols, row_group_size=16)
    before = sha256(src)
    facts = dict(eos_id=EOS, pad_id=PAD)
    result = repair([str(tmp_path / "in")], str(tmp_path / "out"), Settings(**facts), jobs=1)
    out = tmp_path / "out" / "twice.parquet"
    assert sha256(src) == before
    got = read(out)
    assert got["labels"] == truth  # the labels as they were before the second shift
    assert got["input_ids"] == cols["input_ids"] and got["position_ids"] == cols["position_ids"]
    assert result.exit_code == 0 and result.still_found == []
    changed = sum(a != b for a, b in zip(broken, truth))
    entry = json.loads((tmp_path / "out" / "repair.json").read_text())["shards"][0]
    assert entry["fixes"]["label-alignment"]["rowsChanged"] == changed
    assert entry["fixes"]["label-alignment"]["positionsChanged"] == sum(
        x != y for a, b in zip(broken, truth) for x, y in zip(a, b))
    # rescan: label-alignment clean, every other rule's findings and the token figures unchanged
    old, new = run(src, **facts), run(out, **facts)
    assert kinds(new, "label-alignment") == collections.Counter()
    assert others(new, {"label-alignment", "padding-loss"}) == others(old, {"label-alignment", "padding-loss"})
    for key in ("rows", "tokens", "realTokenFraction", "documentTokens"):
        assert new.metrics[key] == old.metrics[key], key


def test_a_prompt_masked_with_the_pad_id_stays_masked(tmp_path):
    docs = documents(19, 60, 40)
    cols = pack(docs, 48, eos=EOS, pad=PAD)
    truth = [list(row) for row in cols["labels"]]
    for row in truth[::2]:
        row[2:6] = [IGNORE] * 4  # a prompt, not trained
    marked = [[PAD if x == IGNORE else x for x in row] for row in truth]  # ignored labels written as the pad id
    broken = [row[1:] + [PAD] for row in marked]  # and shifted twice
    src = write(tmp_path / "p.parquet", dict(cols, labels=broken))
    result = repair([src], str(tmp_path / "out"), Settings(eos_id=EOS, pad_id=PAD), jobs=1)
    assert read(tmp_path / "out" / "p.parquet")["labels"] == truth
    assert result.exit_code == 0


def test_wrong_ignore_markers_become_the_ignore_index(tmp_path):
    docs = documents(2, 40, 30)
    cols = pack(docs, 32, eos=EOS, pad=PAD)
    truth = cols["labels"]
    marked = [[-1 if x == IGNORE else x for x in row] for row in truth]  # -1 used as the ignore marker
    src = write(tmp_path / "in" / "minus.jsonl", dict(cols, labels=marked))
    before = sha256(src)
    result = repair([src], str(tmp_path / "out"), Settings(eos_id=EOS, pad_id=PAD, labels="shifted"), jobs=1)
    assert sha256(src) == before
    assert read(tmp_path / "out" / "minus.jsonl")["labels"] == truth
    assert result.exit_code == 0


# -- loss on padding ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("side", ["right", "left"])
def test_loss_on_padding_and_broken_masks_are_fixed_keeping_the_side(tmp_path, side):
    docs = documents(3, 60, 40)
    width = 32
    ids, labels, mask, want_labels, want_mask = [], [], [], [], []
    for i, doc in enumerate(docs):
        real = (doc + [EOS])[:width]
        fill = width - len(real)
        row = real + [PAD] * fill if side == "right" else [PAD] * fill + real
        ids.append(row)
        labels.append(row[1:] + [IGNORE])  # the defect: labels built from ids, padding trained
        good_mask = [1] * len(real) + [0] * fill if side == "right" else [0] * fill + [1] * len(real)
        bad_mask = list(good_mask)
        if i % 4 == 0 and fill:  # the second defect: one padding position attended
            bad_mask[-1 if side == "right" else 0] = 1
        mask.append(bad_mask)
        want_mask.append(good_mask)
        # shifted labels: the next token where both it and the position are real, else ignored
        want_labels.append([row[t + 1] if t + 1 < width and good_mask[t] and good_mask[t + 1] else IGNORE
                            for t in range(width)])
    src = write(tmp_path / "in" / f"{side}.jsonl.gz",
                {"input_ids": ids, "labels": labels, "attention_mask": mask})
    before = sha256(src)
    facts = dict(eos_id=EOS, pad_id=PAD, labels="shifted")
    result = repair([src], str(tmp_path / "out"), Settings(**facts), fixes=("padding-loss",), jobs=1)
    out = tmp_path / "out" / f"{side}.jsonl.gz"
    assert sha256(src) == before
    assert gzip.decompress(out.read_bytes())  # still gzip
    got = read(out)
    assert got["attention_mask"] == want_mask
    assert got["labels"] == want_labels
    assert got["input_ids"] == ids
    assert result.exit_code == 0
    old, new = run(src, **facts), run(out, **facts)
    assert kinds(old, "padding-loss") and not kinds(new, "padding-loss")
    # every other figure is what the shard without the defects gives (the attended padding changed how the other
    # rules read the input, so the input itself is not the reference)
    control = write(tmp_path / "control" / f"{side}.jsonl",
                    {"input_ids": ids, "labels": want_labels, "attention_mask": want_mask})
    reference = run(control, **facts)
    assert others(new, {"padding-loss"}) == others(reference, {"padding-loss"})
    assert not kinds(reference, "padding-loss")
    for key in ("rows", "tokens", "realTokenFraction", "documentTokens"):
        assert new.metrics[key] == reference.metrics[key], key


# -- duplicates in packed shards, best fit ---------------------------------------------------------------------------


def expected_documents(docs: list[list[int]]) -> collections.Counter:
    """Each document with one eos (plain Python)."""
    return collections.Counter(tuple(doc + [EOS]) for doc in docs)


def python_documents(cols, pad):
    """Documents of a packed shard with position_ids (plain Python): tokens up to the padding, a document starting
    where position_ids restart at 0; a row that does not start at 0 continues the previous row's last document.
    Returns (tokens, first row, last row) per document."""
    docs = []
    for r, (ids, pos) in enumerate(zip(cols["input_ids"], cols["position_ids"])):
        end = len(ids)
        while end and ids[end - 1] == pad:
            end -= 1
        for t in range(end):
            if pos[t] == 0 or not docs:
                docs.append([[], r, r])
            docs[-1][0].append(ids[t])
            docs[-1][2] = r
    return docs


#: The duplicate rules comparing whole windows (rows) rather than documents: the drop list names windows.
WINDOWS = {"exact-duplicate": {"unit": "window"}, "near-duplicate": {"unit": "window"}}


def test_duplicate_windows_of_a_packed_shard_are_dropped_with_best_fit(tmp_path):
    seq_len = 128
    docs = documents(4, 300, 200)
    cols = pack(docs, seq_len, eos=EOS, pad=PAD)
    rows = len(cols["input_ids"])
    copied = [10, 11, 12, 13]
    cols = {k: v + [v[i] for i in copied] for k, v in cols.items()}
    src = write(tmp_path / "in" / "dup.parquet", cols, row_group_size=32)
    before = sha256(src)
    facts = dict(eos_id=EOS, pad_id=PAD, seq_len=seq_len, rule=WINDOWS)  # whole windows written twice
    scan = run(src, **facts)
    assert sorted(e["row"] for e in scan.outputs["drop-list"]) == list(range(rows, rows + 4))
    result = repair([src], str(tmp_path / "out"), Settings(**facts), repack="best-fit", jobs=1)
    out = tmp_path / "out" / "dup.parquet"
    assert sha256(src) == before
    assert result.exit_code == 0, result.still_found
    got = read(out)
    assert all(len(row) == seq_len for row in got["input_ids"])
    assert set(got) == set(cols)  # same columns
    # the documents a dropped window touches are dropped whole; every other document is kept exactly once
    dropped_rows = set(range(rows, rows + 4))
    kept, dropped = [], []
    for tokens, first, last in python_documents(cols, PAD):
        body = tokens[:-1] if tokens[-1] == EOS else tokens
        (dropped if dropped_rows & set(range(first, last + 1)) else kept).append(body)
    after = python_documents(got, PAD)
    assert collections.Counter(tuple(d[0]) for d in after) == expected_documents(kept)
    entry = json.loads((tmp_path / "out" / "repair.json").read_text())["shards"][0]
    assert entry["fixes"]["exact-duplicate"]["documentsDropped"] == len(dropped)
    assert entry["fixes"]["exact-duplicate"]["tokensRemoved"] == sum(len(d) for d in dropped)  # without eos
    assert entry["repack"]["windowsAfter"] == len(got["input_ids"])
    # (the multiset above is read row by row from position_ids: a split document runs on in the next rows)
    # labels: shifted inside each window, the last and the padding ignored (the input trained every target)
    for ids, labels, mask in zip(got["input_ids"], got["labels"], [None] * len(got["labels"])):
        real = len(ids)
        while real and ids[real - 1] == PAD:
            real -= 1
        want = [ids[t + 1] if t + 1 < real else IGNORE for t in range(seq_len)]
        assert labels == want
    new = run(out, **facts)
    assert not kinds(new, "exact-duplicate") and not kinds(new, "missing-separator")


def test_document_level_drop_entries_drop_exactly_those_documents(tmp_path):
    seq_len = 64
    docs = documents(5, 60, 50)
    cols = pack(docs, seq_len, eos=EOS, pad=PAD)
    src = write(tmp_path / "doc.parquet", cols)
    parsed = python_documents(cols, PAD)
    # name documents 3 and 17 by where they start: (row, offset of their first token)
    starts = []
    for target in (3, 17):
        row = parsed[target][1]
        offset = next(t for t, p in enumerate(cols["position_ids"][row]) if p == 0 and sum(
            1 for d in parsed[:target] if d[1] == row) == sum(1 for q in cols["position_ids"][row][:t] if q == 0))
        starts.append((row << 32) | offset)
    shard = discover([src])[0]
    job = ShardJob(shard, str(tmp_path / "out" / "doc.parquet"), "doc.parquet", Settings(eos_id=EOS, pad_id=PAD),
                   ("exact-duplicate",), "chunk", np.zeros(0, dtype=np.int64), np.asarray(sorted(starts)))
    outcome = rewrite_shard(job)
    assert outcome.error is None
    assert outcome.fixes["exact-duplicate"].documents_dropped == 2
    kept = [d[0][:-1] for i, d in enumerate(parsed) if i not in (3, 17)]
    want = pack(kept, seq_len, eos=EOS, pad=PAD)  # concatenate and chunk, as tests/shards.pack does it
    got = read(tmp_path / "out" / "doc.parquet")
    assert got["input_ids"] == want["input_ids"] and got["position_ids"] == want["position_ids"]
    assert got["labels"] == want["labels"]


def test_best_fit_repack_of_short_documents_is_best_fit_decreasing_exactly(tmp_path):
    seq_len = 96
    docs = documents(11, 400, 90)  # every document with its eos fits in a window
    cols = pack(docs, seq_len, eos=EOS, pad=PAD)
    cols = {k: v + [v[i] for i in (3, 4)] for k, v in cols.items()}  # two windows written twice
    src = write(tmp_path / "in" / "short.parquet", cols)
    facts = dict(eos_id=EOS, pad_id=PAD, seq_len=seq_len, rule=WINDOWS)
    result = repair([src], str(tmp_path / "out"), Settings(**facts), repack="best-fit", jobs=1)
    assert result.exit_code == 0, result.still_found
    got = read(tmp_path / "out" / "short.parquet")
    dropped_rows = {len(cols["input_ids"]) - 2, len(cols["input_ids"]) - 1}
    kept = [t[:-1] if t[-1] == EOS else t for t, first, last in python_documents(cols, PAD)
            if not dropped_rows & set(range(first, last + 1))]
    assert collections.Counter(tuple(d[0]) for d in python_documents(got, PAD)) == expected_documents(kept)
    fills = [0] * (seq_len + 1)
    for ids in got["input_ids"]:
        real = len(ids)
        while real and ids[real - 1] == PAD:
            real -= 1
        fills[real] += 1
    # the windows' fills are those of best-fit decreasing over the documents' lengths (kernels.packing, which
    # tests/test_packing.py checks against Johnson et al.'s bound and a one-at-a-time reference)
    assert fills == best_fit_decreasing_fills(np.asarray([len(d) + 1 for d in kept]), seq_len).tolist()
    layouts = result.outcomes[0].repack["layouts"]
    assert layouts["bestFitDecreasing"] == sum(fills) == result.outcomes[0].repack["windowsAfter"]
    assert layouts["lowerBound"] == -(-sum(len(d) + 1 for d in kept) // seq_len)


# -- missing separators, chunk ------------------------------------------------------------------------------------


def test_missing_separators_where_documents_are_known_are_inserted_by_chunk(tmp_path):
    seq_len = 128
    docs = documents(6, 300, 90)
    stream, pos = [], []
    for i, doc in enumerate(docs):
        body = doc + ([EOS] if i % 5 else [])  # every fifth document lost its eos
        stream += body
        pos += list(range(len(body)))
    ids, labels, positions = [], [], []
    for start in range(0, len(stream), seq_len):
        w, p = stream[start:start + seq_len], pos[start:start + seq_len]
        fill = seq_len - len(w)
        ids.append(w + [PAD] * fill)
        labels.append(w[1:] + [IGNORE] * (fill + 1))
        positions.append(p + list(range(len(p), len(p) + fill)))
    cols = {"input_ids": ids, "labels": labels, "position_ids": positions}
    src = write(tmp_path / "in" / "glued.parquet", cols, row_group_size=32)
    before = sha256(src)
    facts = dict(eos_id=EOS, pad_id=PAD)
    assert kinds(run(src, **facts), "missing-separator")
    result = repair([src], str(tmp_path / "out"), Settings(**facts), repack="chunk", jobs=1)
    assert sha256(src) == before
    assert result.exit_code == 0, result.still_found
    got = read(tmp_path / "out" / "glued.parquet")
    want = pack(docs, seq_len, eos=EOS, pad=PAD)  # every document with its eos, concatenated and chunked
    assert got == want
    entry = json.loads((tmp_path / "out" / "repair.json").read_text())["shards"][0]
    assert entry["fixes"]["missing-separator"]["tokensAdded"] == 60
    assert entry["repack"]["separatorsAdded"] == 300
    assert entry["budget"]["after"]["realTokens"] == sum(len(d) + 1 for d in docs)
    new = run(tmp_path / "out" / "glued.parquet", **facts)
    assert not kinds(new, "missing-separator")


def test_missing_separator_without_known_documents_is_unfixable(tmp_path):
    # glued: documents concatenated without any separator and cut into full windows; nothing marks a boundary
    stream = [t for doc in documents(7, 400, 30) for t in doc]
    ids = [stream[s:s + 32] for s in range(0, len(stream) - 32, 32)]
    src = write(tmp_path / "in" / "glued.parquet", {"input_ids": ids})
    got = cli("repair", src, "--out", tmp_path / "out", "--eos-id", EOS, "--fix", "missing-separator", "--jobs", 1)
    report = json.loads((tmp_path / "out" / "repair.json").read_text())["shards"][0]
    assert "boundary is unknown" in report["unfixable"]["missing-separator"]
    assert "cannot fix missing-separator" in got.output
    assert got.exit_code == 0, got.output  # nothing was claimed fixed: the copy is the input as it was
    assert read(tmp_path / "out" / "glued.parquet")["input_ids"] == ids
    # a repack would have to invent the boundaries: refused for this shard, which is not written (exit 3)
    got = cli("repair", src, "--out", tmp_path / "out2", "--eos-id", EOS, "--repack", "chunk", "--jobs", 1)
    assert got.exit_code == 3, got.output
    assert "the documents are not known" in got.output
    assert not (tmp_path / "out2" / "glued.parquet").exists()


# -- dropped rows and text ----------------------------------------------------------------------------------------


def test_rows_with_ids_beyond_the_vocabulary_and_empty_rows_are_dropped(tmp_path):
    rows = [[5, 6, 7, EOS], [5, 4000, 7, EOS], [PAD, PAD, PAD, PAD], [-3, 9, EOS, PAD], [8, 9, EOS, PAD]]
    mask = [[1 if x != PAD else 0 for x in r] for r in rows]
    src = write(tmp_path / "rows.arrow", {"input_ids": rows, "attention_mask": mask, "source": list("abcde")},
                fmt="arrow")
    before = sha256(src)
    result = repair([src], str(tmp_path / "out"), Settings(eos_id=EOS, pad_id=PAD, vocab_size=1000), jobs=1)
    assert sha256(src) == before
    table = pa.ipc.open_file(str(tmp_path / "out" / "rows.arrow")).read_all()
    assert table.schema == pa.ipc.open_file(src).schema
    # kept: the rows whose ids all lie in [0, 1000) and that hold a real token
    keep = [i for i, r in enumerate(rows) if all(0 <= x < 1000 for x in r) and any(mask[i])]
    assert table.column("input_ids").to_pylist() == [rows[i] for i in keep]
    assert table.column("source").to_pylist() == [list("abcde")[i] for i in keep]
    fixes = result.outcomes[0].fixes
    assert fixes["token-range"].rows_dropped == 2 and fixes["token-range"].listed == [1, 3]
    assert fixes["empty-document"].rows_dropped == 1 and fixes["empty-document"].listed == [2]
    assert result.exit_code == 0


def test_special_token_strings_and_control_characters_are_removed_from_text(tmp_path):
    texts = ["a plain note about bread", "soup<|endoftext|>stock </s> and salt", "tea\x07 with\x00 honey\tand lemon",
             "   ", "<s>ok</s>\x1b"]
    src = write(tmp_path / "text.jsonl.zst", {"text": texts, "id": list(range(5))})
    before = sha256(src)
    result = repair([src], str(tmp_path / "out"), Settings(), jobs=1)
    assert sha256(src) == before
    specials = ["<|endoftext|>", "</s>", "<s>"]
    controls = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f\x80-\x9f]")  # C0 but tab/LF/CR, DEL, C1 (from memory)
    want = []
    for t in texts:
        for s in specials:
            t = t.replace(s, "")
        want.append(controls.sub("", t))
    kept = [i for i, t in enumerate(want) if t.strip()]
    with pa.CompressedInputStream(str(tmp_path / "out" / "text.jsonl.zst"), "zstd") as fh:
        got = [json.loads(line) for line in fh.read().splitlines()]
    assert [g["text"] for g in got] == [want[i] for i in kept]
    assert [g["id"] for g in got] == kept
    fixes = result.outcomes[0].fixes
    assert fixes["special-token-text"].listed == [[1, 2], [4, 2]]
    assert fixes["encoding-error"].listed == [[2, 2], [4, 1]]
    assert fixes["empty-document"].listed == [3]
    assert result.exit_code == 0


# -- packing ------------------------------------------------------------------------------------------------------


def test_best_fit_assignment_gives_the_kernel_fills_and_keeps_johnsons_bound():
    rng = np.random.default_rng(1974)
    for case in range(300):
        seq_len = int(rng.choice([10, 12, 20, 30, 60, 100]))
        n = int(rng.integers(1, 11))
        low = seq_len // 5 + 1 if case % 2 else 1
        sizes = rng.integers(low, min(seq_len, seq_len // 2 + 2 if case % 2 else seq_len) + 1, n).astype(np.int64)
        order, window, windows = best_fit_assign(sizes, seq_len)
        fills = np.bincount(window, weights=sizes[order], minlength=windows).astype(np.int64)
        assert fills.max() <= seq_len
        assert sorted(order.tolist()) == list(range(n))  # every piece placed once
        kernel = best_fit_decreasing_fills(sizes, seq_len)
        assert np.array_equal(np.bincount(fills, minlength=seq_len + 1), kernel)
        # Johnson, Demers, Ullman, Garey & Graham, SIAM J. Comput. 3(4), 1974 (see tests/test_packing.py):
        # best fit on a decreasing list uses at most 11/9 OPT + 4 windows.
        opt = opt_windows(sizes.tolist(), seq_len)
        assert 9 * windows <= 11 * opt + 36


# -- formats, dry run, refusals -------------------------------------------------------------------------------------


def test_formats_schema_and_row_groups_follow_the_input(tmp_path):
    cols = pack(documents(8, 80, 40), 32, eos=EOS, pad=PAD)
    cols["labels"] = [row[1:] + [IGNORE] for row in cols["labels"]]  # shifted twice
    table = pa.table(cols).cast(pa.schema([("input_ids", pa.list_(pa.int32())), ("labels", pa.list_(pa.int32())),
                                           ("position_ids", pa.list_(pa.int16()))]))
    os.makedirs(tmp_path / "in" / "sub")
    pq.write_table(table, tmp_path / "in" / "sub" / "a.parquet", row_group_size=7, compression="zstd")
    write(tmp_path / "in" / "b.arrow", cols, fmt="arrows", row_group_size=5)
    result = repair([str(tmp_path / "in")], str(tmp_path / "out"), Settings(eos_id=EOS, pad_id=PAD), jobs=2)
    assert result.exit_code == 0
    out = pq.ParquetFile(tmp_path / "out" / "sub" / "a.parquet")
    assert out.schema_arrow == table.schema
    assert [out.metadata.row_group(i).num_rows for i in range(out.metadata.num_row_groups)] == \
        [7] * (table.num_rows // 7) + ([table.num_rows % 7] if table.num_rows % 7 else [])
    assert out.metadata.row_group(0).column(0).compression == "ZSTD"
    with open(tmp_path / "out" / "b.arrow", "rb") as fh:
        assert fh.read(6) != b"ARROW1"  # an IPC stream stays a stream
    stream = pa.ipc.open_stream(str(tmp_path / "out" / "b.arrow"))
    assert {len(b) for b in stream} <= {5, len(cols["input_ids"]) % 5}
    assert sorted(os.listdir(tmp_path / "out")) == ["b.arrow", "repair.json", "sub"]  # no temporary file left


def test_dry_run_prints_the_plan_and_writes_nothing(tmp_path):
    cols = pack(documents(9, 40, 30), 32, eos=EOS, pad=PAD)
    cols["labels"] = [row[1:] + [IGNORE] for row in cols["labels"]]
    src = write(tmp_path / "in" / "x.parquet", cols)
    got = cli("repair", src, "--out", tmp_path / "out", "--eos-id", EOS, "--pad-id", PAD, "--dry-run", "--jobs", 1)
    assert got.exit_code == 0, got.output
    assert not (tmp_path / "out").exists()
    changed = sum(1 for row in cols["labels"] if row != [IGNORE] * len(row))
    assert "dry run" in got.output and f"label-alignment: {changed} rows changed" in got.output
    real = cli("repair", src, "--out", tmp_path / "out", "--eos-id", EOS, "--pad-id", PAD, "--jobs", 1)
    assert real.exit_code == 0 and f"label-alignment: {changed} rows changed" in real.output
    assert "clean" in real.output


@pytest.mark.parametrize("where", ["inside", "same", "contains"])
def test_an_output_inside_an_input_is_refused_before_reading(tmp_path, where):
    src = write(tmp_path / "data" / "x.parquet", pack([[5, 6, 7]] * 10, 8, eos=EOS))
    given, out = {"inside": (tmp_path / "data", tmp_path / "data" / "fixed"),
                  "same": (tmp_path / "data", tmp_path / "data"),
                  "contains": (src, tmp_path)}[where]
    before = sorted(os.listdir(tmp_path / "data"))
    got = cli("repair", given, "--out", out)
    assert got.exit_code == 2 and "never writes where it reads" in got.output
    assert sorted(os.listdir(tmp_path / "data")) == before


def test_unknown_fix_is_a_usage_error(tmp_path):
    src = write(tmp_path / "x.parquet", pack([[5, 6, 7]] * 10, 8, eos=EOS))
    got = cli("repair", src, "--out", tmp_path / "out", "--fix", "overlong-document")
    assert got.exit_code == 2 and "--fix takes rule ids" in got.output


def test_a_shard_that_cannot_be_read_is_not_written_and_exits_3(tmp_path):
    good = write(tmp_path / "in" / "good.parquet", pack(documents(10, 20, 20), 16, eos=EOS, pad=PAD))
    bad = tmp_path / "in" / "bad.parquet"
    data = open(good, "rb").read()
    bad.write_bytes(data[: len(data) // 2])  # cut off: no footer
    got = cli("repair", tmp_path / "in", "--out", tmp_path / "out", "--eos-id", EOS, "--jobs", 1)
    assert got.exit_code == 3, got.output
    assert not (tmp_path / "out" / "bad.parquet").exists()
    assert (tmp_path / "out" / "good.parquet").exists()
    report = json.loads((tmp_path / "out" / "repair.json").read_text())
    assert [s["written"] for s in report["shards"]] == [False, True]


def test_a_continued_stream_keeps_its_last_labels(tmp_path):
    # one token stream cut into windows, each window's last label the next window's first token (on purpose);
    # the defect: ignored positions marked -1
    stream = [t for doc in documents(12, 60, 40) for t in doc + [EOS]]
    seq_len = 32
    rows = [stream[s:s + seq_len] for s in range(0, len(stream) - seq_len, seq_len)]
    truth = []
    for i, row in enumerate(rows):
        last = rows[i + 1][0] if i + 1 < len(rows) else IGNORE
        labels = row[1:] + [last]
        if i % 2:
            labels[5:9] = [IGNORE] * 4  # a masked span
        truth.append(labels)
    marked = [[-1 if x == IGNORE else x for x in row] for row in truth]
    src = write(tmp_path / "stream.parquet", {"input_ids": rows, "labels": marked}, row_group_size=7)
    result = repair([src], str(tmp_path / "out"), Settings(eos_id=EOS, labels="shifted"), jobs=1)
    assert read(tmp_path / "out" / "stream.parquet")["labels"] == truth  # across row groups and batches too
    assert result.exit_code == 0


def test_a_shard_against_the_corpus_convention_is_rebuilt_in_the_majority_one(tmp_path):
    shifted = pack(documents(13, 60, 30), 32, eos=EOS, pad=PAD)
    for name in ("a", "b", "c"):
        write(tmp_path / "in" / f"{name}.parquet", shifted)
    aligned = pack(documents(14, 60, 30), 32, eos=EOS, pad=PAD)
    want = aligned["labels"]
    aligned = dict(aligned, labels=[[x if p < sum(1 for y in ids if y != PAD) else IGNORE
                                     for p, x in enumerate(ids)] for ids in aligned["input_ids"]])
    write(tmp_path / "in" / "d.parquet", aligned)
    facts = dict(eos_id=EOS, pad_id=PAD)
    assert kinds(run(tmp_path / "in", **facts), "label-alignment")  # shards disagree on the label shift
    result = repair([str(tmp_path / "in")], str(tmp_path / "out"), Settings(**facts), jobs=1)
    assert read(tmp_path / "out" / "d.parquet")["labels"] == want
    assert read(tmp_path / "out" / "a.parquet")["labels"] == shifted["labels"]
    assert result.exit_code == 0 and not kinds(run(tmp_path / "out", **facts), "label-alignment")


def test_remainders_of_split_documents_open_their_own_windows_first():
    rng = np.random.default_rng(5)
    for _ in range(100):
        seq_len = int(rng.choice([16, 50, 128]))
        sizes = rng.integers(1, seq_len + 1, int(rng.integers(1, 40))).astype(np.int64)
        opens = rng.random(sizes.size) < 0.3
        opens &= sizes < seq_len
        order, window, windows = best_fit_assign(sizes, seq_len, opens)
        fills = np.bincount(window, weights=sizes[order], minlength=windows)
        assert fills.max() <= seq_len and sorted(order.tolist()) == list(range(sizes.size))
        first_in_window = {}
        for piece, w in zip(order.tolist(), window.tolist()):
            first_in_window.setdefault(w, piece)
        # every opener is the first piece of a window of its own
        assert sorted(first_in_window[w] for w in set(window[np.isin(order, np.flatnonzero(opens))].tolist())) \
            == sorted(np.flatnonzero(opens).tolist())


@pytest.mark.parametrize("kind", ["doc_lengths", "cu_seqlens"])
def test_length_columns_say_where_documents_are_for_a_repack(tmp_path, kind):
    # documents packed whole into padded rows, the length column giving each row's documents; some lack their eos
    seq_len = 64
    docs = documents(15, 90, 20)
    rows, lengths, bodies = [], [], []
    row, row_lengths = [], []
    for i, doc in enumerate(docs):
        body = doc + ([EOS] if i % 3 else [])
        bodies.append(doc)
        if len(row) + len(body) > seq_len:
            rows.append(row + [PAD] * (seq_len - len(row)))
            lengths.append(row_lengths)
            row, row_lengths = [], []
        row += body
        row_lengths.append(len(body))
    rows.append(row + [PAD] * (seq_len - len(row)))
    lengths.append(row_lengths)
    column = lengths if kind == "doc_lengths" else [[0] + list(itertools.accumulate(r)) + [seq_len] for r in lengths]
    src = write(tmp_path / "in" / "lengths.parquet", {"input_ids": rows, kind: column})
    result = repair([src], str(tmp_path / "out"), Settings(eos_id=EOS, pad_id=PAD, seq_len=seq_len), repack="chunk",
                    jobs=1)
    assert result.outcomes[0].facts["arrangement"]["value"] == "length-columns"
    got = read(tmp_path / "out" / "lengths.parquet")
    want = pack(bodies, seq_len, eos=EOS, pad=PAD, positions=False)
    assert got["input_ids"] == want["input_ids"]
    # the rebuilt length column: the pieces of each window (documents cut at window ends), from the same stream
    stream_ends = list(itertools.accumulate(len(d) + 1 for d in bodies))
    for w, (ids, lens) in enumerate(zip(got["input_ids"], got[kind])):
        lo, hi = w * seq_len, min((w + 1) * seq_len, stream_ends[-1])
        cuts = sorted({lo, hi} | {e for e in stream_ends if lo < e < hi})
        pieces = [b - a for a, b in zip(cuts, cuts[1:])]
        want_col = pieces if kind == "doc_lengths" else [0] + list(itertools.accumulate(pieces)) + (
            [seq_len] if hi - lo < seq_len else [])
        assert lens == want_col, w


def test_invalid_utf8_is_listed_as_unfixable(tmp_path):
    path = tmp_path / "bad.jsonl"
    path.write_bytes(b'{"text": "a fine line about rice"}\n{"text": "caf\xe9 au lait"}\n{"text": "ok\\u0007"}\n')
    result = repair([str(path)], str(tmp_path / "out"), Settings(), jobs=1)
    outcome = result.outcomes[0]
    assert "rows 1)" in outcome.unfixable["encoding-error invalid-utf8"]
    assert outcome.fixes["encoding-error"].listed == [[2, 1]]  # the control character was removed
    got = [json.loads(line) for line in (tmp_path / "out" / "bad.jsonl").read_text().splitlines()]
    assert [g["text"] for g in got] == ["a fine line about rice", "caf\ufffd au lait", "ok"]
    assert result.exit_code == 0


def test_a_shard_with_nothing_to_fix_is_copied_byte_for_byte(tmp_path):
    clean = write(tmp_path / "in" / "clean.parquet", pack(documents(16, 50, 30), 32, eos=EOS, pad=PAD))
    broken = pack(documents(17, 50, 30), 32, eos=EOS, pad=PAD)
    broken["labels"] = [row[1:] + [IGNORE] for row in broken["labels"]]
    write(tmp_path / "in" / "broken.parquet", broken)
    result = repair([str(tmp_path / "in")], str(tmp_path / "out"), Settings(eos_id=EOS, pad_id=PAD), jobs=1)
    assert result.exit_code == 0
    assert sha256(tmp_path / "out" / "clean.parquet") == sha256(clean)
    assert sha256(tmp_path / "out" / "broken.parquet") != sha256(tmp_path / "in" / "broken.parquet")
    assert {o.name: bool(o.fixes) for o in result.outcomes} == {"broken.parquet": True, "clean.parquet": False}


def test_exit_1_when_the_rescan_still_finds_what_a_fix_should_have_removed(tmp_path, monkeypatch):
    from corpuscle.repair import fixes

    cols = pack(documents(18, 40, 30), 32, eos=EOS, pad=PAD)
    cols["labels"] = [row[1:] + [IGNORE] for row in cols["labels"]]
    src = write(tmp_path / "in" / "x.parquet", cols)
    # a fix that does nothing: the rescan must catch it
    monkeypatch.setattr(fixes, "realign_labels", lambda tokens, labels, *args, **kw: labels.copy())
    got = cli("repair", src, "--out", tmp_path / "out", "--eos-id", EOS, "--pad-id", PAD, "--jobs", 1)
    assert got.exit_code == 1, got.output
    assert "label-alignment (shift+2)" in got.output
    report = json.loads((tmp_path / "out" / "repair.json").read_text())
    assert report["rescan"]["clean"] is False
    assert {f["kind"] for f in report["rescan"]["stillFound"]} == {"shift+2"}


def test_drop_list_entries_with_or_without_offsets_name_rows_of_unpacked_shards(tmp_path):
    from types import SimpleNamespace

    from corpuscle.findings import Level
    from corpuscle.repair.plan import plan_fixes

    texts = ["one note on barley", "two notes on oats", "three notes on rye", "four notes on spelt", "five"]
    src = write(tmp_path / "notes.jsonl", {"text": texts})
    shard = discover([src])[0]
    finding = SimpleNamespace(rule_id="near-duplicate", kind="cluster", level=Level.warning, uri=None,
                              instance_uris=[shard.uri, shard.uri], count=2)
    report = SimpleNamespace(findings=[finding], outputs={"drop-list": [
        {"uri": shard.uri, "row": 1}, {"uri": shard.uri, "row": 3, "offset": 0, "length": 19},
        {"uri": "elsewhere.jsonl", "row": 0}]})
    plan = plan_fixes(report, [shard], ("near-duplicate",))[shard.uri]
    assert plan["fixes"] == ("near-duplicate",)
    assert plan["drop_rows"].tolist() == [1] and plan["drop_starts"].tolist() == [3 << 32]
    job = ShardJob(shard, str(tmp_path / "out" / "notes.jsonl"), "notes.jsonl", Settings(), plan["fixes"], None,
                   plan["drop_rows"], plan["drop_starts"])
    outcome = rewrite_shard(job)
    got = [json.loads(line)["text"] for line in (tmp_path / "out" / "notes.jsonl").read_text().splitlines()]
    assert got == [texts[0], texts[2], texts[4]]
    assert outcome.fixes["near-duplicate"].listed == [1, 3]


def test_round_trip_of_a_shard_with_several_defects_equals_the_shard_built_right(tmp_path):
    width, vocab = 40, 1000
    docs = documents(20, 80, 45)
    clean = {"input_ids": [], "labels": [], "attention_mask": []}
    broken = {"input_ids": [], "labels": [], "attention_mask": []}
    for i, doc in enumerate(docs):
        real = (doc + [EOS])[:width]
        if i == 5:
            real[3] = vocab + 7  # an id beyond the vocabulary: the row is dropped
        if i == 9:
            real = []  # a row of padding only: dropped
        fill = width - len(real)
        ids = real + [PAD] * fill
        mask = [1] * len(real) + [0] * fill
        good = [ids[t + 1] if t + 1 < len(real) else IGNORE for t in range(width)]
        bad = ids[2:] + [PAD, PAD]  # shifted twice, padding trained
        broken["input_ids"].append(ids), broken["labels"].append(bad), broken["attention_mask"].append(mask)
        if i not in (5, 9):
            clean["input_ids"].append(ids), clean["labels"].append(good), clean["attention_mask"].append(mask)
    src = write(tmp_path / "in" / "many.parquet", broken, row_group_size=16)
    reference = write(tmp_path / "ref" / "many.parquet", clean, row_group_size=16)
    before = sha256(src)
    facts = dict(eos_id=EOS, pad_id=PAD, vocab_size=vocab, labels="shifted")
    found = run(src, **facts)
    assert {f.rule_id for f in found.findings} >= {"label-alignment", "padding-loss", "token-range",
                                                   "empty-document"}
    result = repair([src], str(tmp_path / "out"), Settings(**facts), jobs=1)
    assert sha256(src) == before
    assert result.exit_code == 0, result.still_found
    out = tmp_path / "out" / "many.parquet"
    assert read(out) == read(reference)
    new, ref = run(out, **facts), run(reference, **facts)
    assert kinds(new) == kinds(ref)
    for key in ("rows", "tokens", "realTokenFraction", "documentTokens", "labelSupervision"):
        assert new.metrics.get(key) == ref.metrics.get(key), key


@pytest.mark.parametrize("repack", [None, "best-fit", "chunk"])
def test_memory_of_a_repair_does_not_grow_with_the_shard(tmp_path, monkeypatch, repack):
    import tracemalloc

    import corpuscle.io.batch as batch_module
    import corpuscle.io.sources as sources
    import corpuscle.repair.repack as repack_module

    # small batches, buffers and first records (facts are inferred from them, as a scan does), so that both
    # shards are many of each
    monkeypatch.setattr(sources, "DEFAULT_BATCH_TOKENS", 16_384)
    monkeypatch.setattr(repack_module, "BUFFER_TOKENS", 16_384)
    monkeypatch.setattr(batch_module, "FIRST_ROWS", 64)
    monkeypatch.setattr(batch_module, "FIRST_TOKENS", 16_384)
    peaks = []
    for count in (1_000, 1_000, 4_000):  # documents: about 100k and 400k tokens (the first run warms up)
        cols = pack(documents(21, count, 200), 256, eos=EOS, pad=PAD)
        cols["labels"] = [row[1:] + [IGNORE] for row in cols["labels"]]  # shifted twice: every row is rebuilt
        src = write(tmp_path / f"in{len(peaks)}" / "w.parquet", cols, row_group_size=32)
        shard = discover([src])[0]
        job = ShardJob(shard, str(tmp_path / f"out{len(peaks)}" / "w.parquet"), "w.parquet",
                       Settings(eos_id=EOS, pad_id=PAD), ("label-alignment",), repack)
        tracemalloc.start()
        outcome = rewrite_shard(job)
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
        assert outcome.error is None and outcome.written
    # four times the shard, about the same peak: batches and buffers are bounded, nothing piles up
    assert peaks[2] < 1.5 * peaks[1], peaks


def test_clean_shards_of_every_layout_are_left_as_they_are(tmp_path):
    docs = documents(22, 120, 50)
    write(tmp_path / "in" / "packed_positions.parquet", pack(docs, 64, eos=EOS, pad=PAD))
    write(tmp_path / "in" / "packed_plain.arrow", pack(documents(23, 120, 50), 64, eos=EOS, pad=PAD,
                                                        positions=False))
    right, left = {"input_ids": [], "labels": [], "attention_mask": []}, {"input_ids": [], "attention_mask": []}
    for doc in documents(24, 120, 50):
        real = (doc + [EOS])[:48]
        fill = 48 - len(real)
        right["input_ids"].append(real + [PAD] * fill)
        right["labels"].append(real[1:] + [IGNORE] * (fill + 1))
        right["attention_mask"].append([1] * len(real) + [0] * fill)
        real = [t + 1 for t in real[:-1]] + [EOS]  # the left-padded rows are not copies of the right-padded ones
        left["input_ids"].append([PAD] * fill + real)
        left["attention_mask"].append([0] * fill + [1] * len(real))
    write(tmp_path / "in" / "padded_right.jsonl", right)
    write(tmp_path / "in" / "padded_left.jsonl.gz", left)
    write(tmp_path / "in" / "notes.jsonl", {"text": ["a note on leeks", "another on lentils", "one on figs"]})
    result = repair([str(tmp_path / "in")], str(tmp_path / "out"), Settings(eos_id=EOS, pad_id=PAD), jobs=1)
    assert result.exit_code == 0
    for o in result.outcomes:
        assert not o.fixes and not o.unfixable and o.copied, (o.uri, o.fixes, o.unfixable)
        assert sha256(tmp_path / "out" / o.name) == sha256(tmp_path / "in" / o.name)
    # a shard already laid out by concatenate-and-chunk comes back the same from a chunk repack
    again = repair([str(tmp_path / "in" / "packed_positions.parquet")], str(tmp_path / "again"),
                   Settings(eos_id=EOS, pad_id=PAD), repack="chunk", jobs=1)
    assert again.exit_code == 0
    assert read(tmp_path / "again" / "packed_positions.parquet") == read(tmp_path / "in" / "packed_positions.parquet")


def test_duplicate_documents_of_a_packed_shard_are_dropped_by_their_start_and_the_rest_repacked(tmp_path):
    """The default scan names duplicate documents (not windows) by their first token; a repair with --repack
    best-fit keeps exactly one copy of each: the documents after are those before, less the later copies (plain
    Python over the shard's own lists), and the rescan is clean."""
    import random

    rng = random.Random(3)
    docs = [[rng.randrange(3, 900) for _ in range(rng.randrange(20, 150))] for _ in range(120)]
    docs += [list(d) for d in docs[10:22]]  # 12 exact copies, packed at offsets unrelated to the windows
    rng.shuffle(docs)
    src = write(tmp_path / "in" / "a.parquet", pack(docs, 128, eos=EOS, pad=PAD))
    before = sha256(src)
    facts = dict(eos_id=EOS, pad_id=PAD, seq_len=128)
    entries = run(src, **facts).outputs["drop-list"]
    assert len(entries) == 12 and {e["unit"] for e in entries} == {"document"}
    result = repair([src], str(tmp_path / "out"), Settings(**facts), repack="best-fit", jobs=1)
    assert result.exit_code == 0, result.still_found
    assert sha256(src) == before
    seen, kept = set(), []
    for doc in docs:  # the first copy in scan order stays
        if tuple(doc) not in seen:
            seen.add(tuple(doc))
            kept.append(doc)
    got = read(tmp_path / "out" / "a.parquet")
    assert all(len(row) == 128 for row in got["input_ids"])
    assert collections.Counter(tuple(d[0]) for d in python_documents(got, PAD)) == expected_documents(kept)
    rescan = run(str(tmp_path / "out" / "a.parquet"), **facts)
    assert not [f for f in rescan.findings if f.rule_id in ("exact-duplicate", "near-duplicate")]
