"""The bounded memory of the duplicate rules (rules/duplicates.py): the step sizes that bound it do not change a
finding or a figure, the two rules hold their per-window arrays once, and what is read back from the files on disk
(signatures, band keys) is what was written.

References, named beside each check:
* NumPy's own ``.npy`` reader (``np.load``) for the signature and band files;
* datasketch 2.0.0: ``MinHash(scheme="affine32").jaccard`` for the estimated similarity of a pair, and the
  near-duplicate clusters of the datasketch pipeline of tests/test_duplicates.py (MinHashLSH candidates verified
  by MinHash.jaccard, joined by a plain-Python graph search);
* Python equality of token lists for exact copies; pickle for a state that travels to another process.
"""
from __future__ import annotations

import pickle

import corpuscle.kernels.bands as bands
import corpuscle.kernels.spill as spill_files
import corpuscle.rules.duplicates as duplicates
import numpy as np
import pytest
from corpuscle.engine.scan import scan_shard
from corpuscle.io.sources import discover, open_shard
from corpuscle.kernels.lsh import band_keys, signature_digests
from corpuscle.kernels.minhash import shingle_hash
from corpuscle.kernels.spill import SignatureSpill, npy_blocks, read_rows
from corpuscle.rules.duplicates import ExactDuplicate, NearDuplicate
from corpuscle.settings import Settings
from datasketch import MinHash

from tests.test_duplicates import (
    clusters,
    exact_clusters,
    far_above_threshold,
    run_dedup,
    shingles_of,
    text_corpus,
    token_corpus,
    words_of,
    write_lines,
    write_tokens,
)


def test_rows_read_back_block_by_block_are_what_np_load_gives(tmp_path, monkeypatch):
    monkeypatch.setattr(spill_files, "_VERIFY_BLOCK_ROWS", 7)
    rng = np.random.default_rng(2)
    values = rng.integers(0, 2 ** 32, size=(100, 6), dtype=np.uint64)
    spill = SignatureSpill(str(tmp_path / "s"), 6)
    for lo in range(0, 100, 30):
        spill.append(values[lo:lo + 30].astype(np.uint32))
    saved = str(tmp_path / "saved.npy")
    np.save(saved, values)  # a file of another writer, of another dtype
    for path in (spill.close(), saved):
        reference = np.load(path)  # NumPy's reader
        for rows in ([0], [99], [6, 7], [0, 13, 14, 20, 21, 55, 99], np.sort(rng.choice(100, 40, replace=False)),
                     np.arange(100), []):
            got = read_rows(path, np.asarray(rows, dtype=np.int64))
            assert got.dtype == reference.dtype and got.shape == (len(rows), 6)
            np.testing.assert_array_equal(got, reference[np.asarray(rows, dtype=np.int64)])
        blocks = [(lo, block.copy()) for lo, block in npy_blocks(path)]  # the buffer is reused: keep copies
        assert [lo for lo, _ in blocks] == list(range(0, 100, 7))
        np.testing.assert_array_equal(np.concatenate([block for _, block in blocks]), reference)
        with pytest.raises(IndexError, match="the file has 100"):
            read_rows(path, np.array([3, 100]))


def test_verified_similarity_is_datasketch_jaccard(tmp_path, monkeypatch):
    # Small blocks and chunks: rows of one chunk of pairs come from several blocks of both files.
    monkeypatch.setattr(spill_files, "_VERIFY_BLOCK_ROWS", 5)
    monkeypatch.setattr(duplicates, "_VERIFY_PAIRS", 37)
    rule = NearDuplicate(signature_folder=str(tmp_path), num_perm=128)
    rng = np.random.default_rng(8)
    bases = [rng.integers(0, 10 ** 6, 80).tolist() for _ in range(4)]
    sketches, paths = [], []
    for _ in range(2):  # two shards of 23 windows: edits of four base windows, so similarities spread over [0, 1]
        spill = SignatureSpill(rule.spill_folder, 128)
        for _ in range(23):
            window = list(bases[int(rng.integers(4))])
            for at in rng.choice(80, size=int(rng.integers(0, 8)), replace=False):
                window[at] = int(rng.integers(10 ** 6, 2 * 10 ** 6))
            sketch = MinHash(num_perm=128, seed=1, hashfunc=shingle_hash, scheme="affine32")
            sketch.update_batch(shingles_of(window))
            sketches.append(sketch)
            spill.append(sketch.hashvalues.astype(np.uint32)[None, :])
        paths.append(spill.close())
    pairs = np.array([(i, j) for i in range(46) for j in range(i + 1, 46)], dtype=np.int64)
    similarity = rule._verify(pairs, np.array([0, 23, 46]), paths)
    # Reference: datasketch's MinHash.jaccard of the same two sketches.
    assert similarity.tolist() == [sketches[i].jaccard(sketches[j]) for i, j in pairs.tolist()]
    assert similarity.min() == 0.0 and similarity.max() > 0.9 and len(set(similarity.tolist())) > 20
    rule.corpus([])  # removes the scan's folder


def summary(report) -> tuple:
    found = [(f.rule_id, f.kind, f.count, f.message, f.instances(), f.evidence) for f in report.findings]
    return (found, report.outputs.get("drop-list"), report.metrics["nearDuplicates"],
            report.metrics["exactDuplicates"])


def tiny_steps(monkeypatch) -> None:
    """Every step that bounds the rules' memory made tiny, so that each loop runs many times."""
    for name, value in (("_SHINGLE_VALUES", 50), ("_SIGNATURE_WINDOWS", 2), ("_VERIFY_PAIRS", 3),
                        ("_EXACT_PAIRS", 2), ("_REDUCE_ENTRIES", 16)):
        monkeypatch.setattr(duplicates, name, value)
    monkeypatch.setattr(bands, "_PARTITION_WINDOWS", 3)
    monkeypatch.setattr(spill_files, "_VERIFY_BLOCK_ROWS", 4)


def test_the_steps_that_bound_memory_do_not_change_a_token_report(monkeypatch):
    rng = np.random.default_rng(11)
    shards, _ = token_corpus(rng)
    shards["a"][35] = list(shards["a"][36])  # an exact copy within a shard too (left out of its shuffle)
    paths = write_tokens(shards)
    default = run_dedup(paths)
    tiny_steps(monkeypatch)
    small = run_dedup(paths)
    assert summary(small) == summary(default)
    # The clusters are those of the exact reference (Python sets, Jaccard >= 0.8) with the exact copies of their
    # members -- every one whose pairs are all at 0.9 or more, and the one near the threshold (the planted pair of
    # about 0.82) when the LSH search, a heuristic, finds it -- and the exact copies those of Python equality.
    window = {(f"data/{name}.parquet", row): w for name, rows in shards.items() for row, w in enumerate(rows)}
    reference = exact_clusters({key: (tuple(w), shingles_of(w)) for key, w in window.items()})
    first: dict = {}
    for key, w in window.items():
        first.setdefault(tuple(w), key)

    def members(cluster):
        return frozenset(k for k in window if first[tuple(window[k])] in cluster)

    sure = {members(c) for c in reference if far_above_threshold(c, window)}
    found = {frozenset(c) for c in clusters(small, "near-duplicate")}
    assert len(sure) == len(reference) - 1 and sure <= found <= {members(c) for c in reference}
    groups: dict = {}
    for key, w in window.items():
        groups.setdefault(tuple(w), []).append(key)
    assert sorted(clusters(small, "exact-duplicate")) == sorted(g for g in groups.values() if len(g) > 1)


def test_the_steps_that_bound_memory_do_not_change_a_text_report(monkeypatch):
    lines = text_corpus(np.random.default_rng(5))
    write_lines("text/part-0.jsonl", lines)
    write_lines("text/part-1.jsonl", [{"text": lines[4]["text"]}, {"text": "a short one"}])
    default = run_dedup(["text"])
    tiny_steps(monkeypatch)
    small = run_dedup(["text"])
    assert summary(small) == summary(default)
    doc = {("text/part-0.jsonl", row): line["text"] for row, line in enumerate(lines) if line is not None}
    doc.update({("text/part-1.jsonl", 0): lines[4]["text"], ("text/part-1.jsonl", 1): "a short one"})
    reference = exact_clusters({key: (text, shingles_of(words_of(text))) for key, text in doc.items()})
    # Line 4's exact copy in part-1 joins its cluster.
    expected = {c | ({("text/part-1.jsonl", 0)} if ("text/part-0.jsonl", 4) in c else set()) for c in reference}
    assert {frozenset(c) for c in clusters(small, "near-duplicate")} == expected
    assert len(reference) == 2


def fed_states(path: str, rules: list, batch_tokens: int) -> list:
    """The ended states of ``rules`` fed the shard at ``path`` in batches of about ``batch_tokens``."""
    shard, settings = discover([path])[0], Settings()
    states = [rule.begin(shard, settings) for rule in rules]
    with open_shard(shard, batch_tokens=batch_tokens) as reader:
        for batch in reader:
            for rule, state in zip(rules, states):
                rule.feed(state, batch)
    return [rule.end(state) for rule, state in zip(rules, states)]


def test_both_rules_hold_their_per_window_arrays_once():
    rng = np.random.default_rng(4)
    rows = [rng.integers(0, 50_000, 64).tolist() for _ in range(30)] + [[]] + [[5, 6, 7]]
    rows[12] = list(rows[3])
    path = write_tokens({"a": rows})[0]
    near_rule, exact_rule = NearDuplicate(), ExactDuplicate()
    near, exact = fed_states(path, [near_rule, exact_rule], batch_tokens=300)  # several batches
    (alone,) = fed_states(path, [ExactDuplicate()], batch_tokens=300)
    # Reference: the non-empty rows and their lengths, in Python.
    kept = [row for row, w in enumerate(rows) if w]
    for name in ("rows", "offsets", "lengths", "domains", "content"):
        assert getattr(near, name) is getattr(exact, name)  # one array for both rules
        np.testing.assert_array_equal(getattr(exact, name), getattr(alone, name))
    assert exact.rows.tolist() == kept and exact.rows.dtype == np.uint32
    assert exact.lengths.tolist() == [len(rows[row]) for row in kept]
    assert exact.content[12].tolist() == exact.content[3].tolist() != exact.content[4].tolist()
    near_rule.corpus([])


def test_text_windows_without_words_keep_the_near_duplicate_arrays_apart():
    lines = [{"text": "tala mir ven sho"}, {"text": "...!!!"}, {"text": "kor vanu tel"}, {"text": None}]
    path = write_lines("t.jsonl", lines)
    near_rule = NearDuplicate()
    near, exact = fed_states(path, [near_rule, ExactDuplicate()], batch_tokens=300)
    # Reference: documents with bytes (exact-duplicate) and those with words (near-duplicate), in Python.
    assert exact.rows.tolist() == [0, 1, 2] and near.rows.tolist() == [0, 2]
    assert near.lengths.tolist() == [len(lines[0]["text"]), len(lines[2]["text"])]
    near_rule.corpus([])


def test_band_keys_go_to_a_file_and_both_ways_of_reading_them_agree(monkeypatch):
    monkeypatch.setattr(spill_files, "_VERIFY_BLOCK_ROWS", 4)
    monkeypatch.setattr(bands, "_PARTITION_WINDOWS", 3)
    rng = np.random.default_rng(6)
    rows = [rng.integers(0, 50_000, 40).tolist() for _ in range(25)]
    rows[20], rows[21] = list(rows[2]), list(rows[2])  # exact copies within the shard: not in the shuffle
    path = write_tokens({"a": rows})[0]
    rule = NearDuplicate(verify=False)  # the signatures are kept in a file of their own
    state = scan_shard(discover([path])[0], Settings(), [rule]).states["near-duplicate"]
    assert isinstance(state.keys, np.memmap) and duplicates._band_file(state.keys, state.digests)
    # Reference: NumPy's reader for the signature file; the keys are those of its signatures.
    stored = np.load(state.signatures_path)
    np.testing.assert_array_equal(state.keys, band_keys(stored, rule.bands, rule.rows_per_band))
    np.testing.assert_array_equal(state.digests, signature_digests(stored))
    copied = pickle.loads(pickle.dumps(state))  # as a state that came from another process: arrays, no file
    assert duplicates._band_file(copied.keys, copied.digests) is None
    for parts in (1, 3):
        _, from_file = rule.partition(state, parts)
        _, from_memory = rule.partition(copied, parts)
        entries = 0
        for a, b in zip(from_file, from_memory):
            travelled = pickle.loads(pickle.dumps(a))  # a piece sent to another process carries its entries
            for x, y, z in zip(a.entries(), b.entries(), travelled.entries()):
                np.testing.assert_array_equal(x, y)
                np.testing.assert_array_equal(x, z)
            assert a.count == len(a.window) and a.nbytes == 24 * a.count
            entries += a.count
        assert entries == 23 * rule.bands  # 25 windows less the 2 copies, every band key once
    rule.corpus([state])
