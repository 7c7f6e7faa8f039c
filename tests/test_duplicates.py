"""Tests of rules/duplicates.py: exact-duplicate, near-duplicate and the drop list.

References, named beside each check:
* exact Jaccard similarity of shingle sets, computed with Python sets over the same shingles (n consecutive
  tokens, or n consecutive words after pyarrow's ``utf8_lower`` and a ``regex`` word split);
* datasketch 2.0.0: ``MinHash(scheme="affine32")`` fed the same shingles with ``shingle_hash`` as its hashfunc,
  ``MinHashLSH(threshold, num_perm)`` for the candidates and its (b, r), and ``MinHash.jaccard`` for the
  verification -- the near-duplicate clusters must equal those of this pipeline, joined by a plain-Python graph
  search;
* exact copies: Python equality of the token lists / document strings, grouped with a dict;
* the banding probability ``1 - (1 - s**r)**b`` (Leskovec, Rajaraman & Ullman, Mining of Massive Datasets,
  section 3.4) to show that the planted pairs are found with near certainty, not by luck of the seed;
* NumPy's own ``.npy`` reader for the signature files; the OASIS SARIF 2.1.0 schema for the report.
"""
from __future__ import annotations

import json
import os
import tempfile

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest
import regex
from click.testing import CliRunner
from corpuscle import Settings, scan
from corpuscle.cli import main
from corpuscle.engine.registry import registry
from corpuscle.engine.scan import select_rules
from corpuscle.kernels.hashing import content_hashes
from corpuscle.kernels.minhash import WORD_CLASS, shingle_hash, shingle_hashes, signatures
from corpuscle.kernels.spill import SignatureSpill
from corpuscle.kernels.windows import TOKENS
from corpuscle.report import droplist, sarif
from corpuscle.rules.duplicates import NearDuplicate
from corpuscle.settings import SettingsError
from datasketch import MinHash, MinHashLSH
from datasketch.lsh import _optimal_param

from tests.shards import findings, validate_sarif, write

RULES = ("near-duplicate", "exact-duplicate")
VOCAB = 50_000

# -- references -------------------------------------------------------------------------------------------------


def shingles_of(window: list, n: int = 5) -> list[tuple]:
    """Shingles in plain Python: n-grams, or the whole window when it is shorter than n."""
    if len(window) >= n:
        return [tuple(window[i:i + n]) for i in range(len(window) - n + 1)]
    return [tuple(window)] if window else []


def words_of(text: str | None) -> list[str]:
    """Reference word split: pyarrow's utf8_lower, then regex.findall over the word classes."""
    if not text:
        return []
    return regex.findall(f"[{WORD_CLASS}]+", pc.utf8_lower(pa.array([text])).to_pylist()[0])


def jaccard(a: list, b: list) -> float:
    """Exact Jaccard similarity of two windows' shingle sets (Python sets)."""
    sa, sb = set(shingles_of(a)), set(shingles_of(b))
    return len(sa & sb) / len(sa | sb)


def datasketch_clusters(windows: dict, threshold: float = 0.8) -> list[frozenset]:
    """Near-duplicate clusters by datasketch: MinHash (affine32, our shingle hash), MinHashLSH candidates,
    MinHash.jaccard >= threshold, connected components by graph search; exact copies folded into their first copy
    (``windows`` maps (uri, row) -> shingle list, in scan order, with a content key for exact equality)."""
    lsh = MinHashLSH(threshold=threshold, num_perm=128)
    sketches, first_copy, seen = {}, {}, {}
    for key, (content, shingles) in windows.items():
        if not shingles:
            continue
        first_copy[key] = seen.setdefault(content, key)
        sketch = MinHash(num_perm=128, seed=1, hashfunc=shingle_hash, scheme="affine32")
        sketch.update_batch(shingles)
        sketches[key] = sketch
        lsh.insert(key, sketch)
    edges = {key: set() for key in sketches}
    similarity = {}
    for key, sketch in sketches.items():
        for other in lsh.query(sketch):
            a, b = first_copy[key], first_copy[other]
            if a != b and sketch.jaccard(sketches[other]) >= threshold:
                edges[a].add(b)
                edges[b].add(a)
                similarity[frozenset((a, b))] = sketch.jaccard(sketches[other])
    found, done = [], set()
    for start in edges:
        if start in done or first_copy[start] != start:
            continue
        component, todo = set(), [start]
        while todo:
            node = todo.pop()
            if node not in component:
                component.add(node)
                todo += edges[node]
        done |= component
        if len(component) >= 2:
            found.append(frozenset(component))
    return found, similarity


def members(finding) -> list[tuple[str, int]]:
    return [(inst["uri"], inst["row"]) for inst in finding.instances()]


def miss_probability(s: float, b: int, r: int) -> float:
    """Chance that a pair of Jaccard similarity s shares no band (Mining of Massive Datasets, section 3.4)."""
    return (1 - s ** r) ** b


# -- corpora ----------------------------------------------------------------------------------------------------


def mutate(rng, window: list, changes: int, vocab: int = VOCAB) -> list:
    out = list(window)
    for at in rng.choice(len(out), size=changes, replace=False):
        out[at] = int(rng.integers(vocab, 2 * vocab))  # an id the random windows never use
    return out


def token_corpus(rng, length: int = 512, per_shard: int = 40):
    """Two shards of random windows with planted pairs: (shard, row) of the original and of the copy, changes."""
    shards = {name: [rng.integers(0, VOCAB, length).tolist() for _ in range(per_shard)] for name in ("a", "b")}
    planted = []
    # Must-find pairs (1 or 2 changed tokens, Jaccard >= 0.96), across shards and within one.
    for changes, source, copy in [(1, ("a", 0), ("b", 5)), (2, ("a", 3), ("b", 9)), (1, ("b", 12), ("b", 30)),
                                  (2, ("a", 20), ("a", 21)), (1, ("b", 2), ("a", 33))]:
        shards[copy[0]][copy[1]] = mutate(rng, shards[source[0]][source[1]], changes)
        planted.append((source, copy))
    # Pairs from clearly similar to unrelated-looking (Jaccard about 0.82, 0.67 and 0.5): found or not.
    for changes, source, copy in [(10, ("a", 6), ("b", 15)), (20, ("a", 8), ("b", 17)), (35, ("a", 10), ("a", 11))]:
        shards[copy[0]][copy[1]] = mutate(rng, shards[source[0]][source[1]], changes)
        planted.append((source, copy))
    # Exact copies: a triple across shards, and a copy of a window that also has a near copy.
    shards["b"][20] = list(shards["a"][14])
    shards["b"][21] = list(shards["a"][14])
    shards["b"][25] = list(shards["a"][0])
    return shards, planted


def write_tokens(shards: dict, folder: str = "data", dtypes=None) -> list[str]:
    paths = []
    for name, rows in shards.items():
        dtype = (dtypes or {}).get(name, pa.int32())
        path = f"{folder}/{name}.parquet"
        os.makedirs(folder, exist_ok=True)
        pq.write_table(pa.table({"input_ids": pa.array(rows, type=pa.list_(dtype))}), path)
        paths.append(path)
    return paths


SYLLABLES = ["ka", "lo", "mi", "ren", "tu", "sha", "vor", "pel", "qui", "dan", "fe", "gro", "hin", "jas", "nu"]


def text_corpus(rng, documents: int = 30, words: int = 300):
    """JSON Lines lines of invented words; planted near copies (one word changed, or only case and punctuation
    changed), exact copies, blank lines, a null and an empty document. Returns the lines (None = blank line)."""
    vocabulary = sorted({"".join(rng.choice(SYLLABLES, size=3)) for _ in range(3000)})
    docs = [" ".join(rng.choice(vocabulary, size=words)) + "." for _ in range(documents)]
    lines: list = [{"text": d} for d in docs]
    plain = docs[4].split(" ")
    plain[150] = "zzzword"
    lines[10] = {"text": " ".join(plain)}                          # one word changed: near copy of line 4
    lines[12] = {"text": docs[7].upper().replace(" ", ", ")}       # same words, other case and commas: near copy
    lines[14] = {"text": docs[9]}                                  # exact copy of line 9
    lines[15] = {"text": docs[9]}                                  # and another
    lines[20] = {"text": None}
    lines[21] = {"text": ""}
    lines[22] = None                                               # a blank line
    lines[23] = {"text": "...!!!"}                                 # bytes, but no words
    lines[24] = {"text": "...!!!"}                                 # an exact copy of it
    return lines


def write_lines(path: str, lines: list) -> str:
    os.makedirs(os.path.dirname(path) or ".", exist_ok=True)
    with open(path, "w", encoding="utf-8") as fh:
        fh.write("".join(("" if line is None else json.dumps(line, ensure_ascii=False)) + "\n" for line in lines))
    return path


def run_dedup(paths, jobs: int = 1, **options):
    return scan(paths, Settings(only=RULES, rule=options), jobs=jobs)


# -- near-duplicates --------------------------------------------------------------------------------------------


def test_planted_near_duplicates_across_two_parquet_shards():
    rng = np.random.default_rng(11)
    shards, planted = token_corpus(rng)
    paths = write_tokens(shards)
    report = run_dedup(paths)
    near = findings(report, "near-duplicate")
    clusters = [set(members(f)) for f in near]
    window = {(f"data/{name}.parquet", row): w for name, rows in shards.items() for row, w in enumerate(rows)}

    # The (b, r) chosen: datasketch's MinHashLSH parameters for threshold 0.8 and 128 permutations.
    b, r = _optimal_param(0.8, 128, 0.5, 0.5)
    assert (b, r) == (9, 13)
    assert all((f.evidence["bands"], f.evidence["rowsPerBand"]) == (b, r) for f in near)
    metrics = report.metrics["nearDuplicates"]
    assert (metrics["bands"], metrics["rowsPerBand"], metrics["threshold"]) == (b, r, 0.8)

    # Every planted pair with exact Jaccard >= 0.9 (Python sets) is in one reported cluster. The pairs are planted
    # at >= 0.96, where the chance of missing any of them is below 1% (banding probability, MMDS section 3.4).
    pairs = [(f"data/{s[0]}.parquet", s[1], f"data/{c[0]}.parquet", c[1]) for s, c in planted]
    strong = [(a, ra, c, rc) for a, ra, c, rc in pairs if jaccard(window[(a, ra)], window[(c, rc)]) >= 0.9]
    assert len(strong) == 5
    assert sum(miss_probability(jaccard(window[(a, ra)], window[(c, rc)]), b, r) for a, ra, c, rc in strong) < 0.01
    for a, ra, c, rc in strong:
        assert any({(a, ra), (c, rc)} <= cluster for cluster in clusters), (a, ra, c, rc)
    # No reported pair has exact Jaccard below 0.6.
    for cluster in clusters:
        listed = sorted(cluster)
        for i, x in enumerate(listed):
            for y in listed[i + 1:]:
                assert jaccard(window[x], window[y]) >= 0.6, (x, y)

    # The clusters equal datasketch's (MinHashLSH candidates verified by MinHash.jaccard, exact copies folded),
    # and so do the lowest and mean estimated similarity of each.
    reference, similarity = datasketch_clusters({key: (tuple(w), shingles_of(w)) for key, w in window.items()})
    assert {frozenset(c) for c in clusters} == set(reference)
    for f in near:
        listed = members(f)
        sims = [s for pair, s in similarity.items() if pair <= set(listed)]
        assert f.evidence["similarityMin"] == round(min(sims), 4)
        assert f.evidence["similarityMean"] == round(sum(sims) / len(sims), 4)
        assert f.evidence["verifiedPairs"] == len(sims)
        assert listed == sorted(listed, key=lambda k: (k[0] != "data/a.parquet", k[1]))  # scan order, first kept
        assert f.count == len(listed) and f.evidence["windows"] == len(listed)
        assert f.level.name == "warning" and "estimate" in f.message and "heuristic" in f.message
        assert "b x r = 9 x 13" in f.message and "threshold 0.8" in f.message and "--drop-list" in f.message

    # The copy of a.parquet row 0 in b.parquet row 25 is exact: counted, not listed, in the near cluster of row 0.
    with_copy = next(f for f in near if ("data/a.parquet", 0) in members(f))
    assert ("data/b.parquet", 25) not in members(with_copy) and with_copy.evidence["exactCopies"] == 1
    assert "reported by exact-duplicate" in with_copy.message
    # Corpus figures: distinct windows beyond each cluster's first, and their tokens (512 each).
    beyond = sum(len(c) - 1 for c in reference)
    assert metrics["clusters"] == len(reference)
    assert (metrics["windows"], metrics["duplicateWindows"], metrics["duplicateTokens"]) == (80, beyond, 512 * beyond)
    assert metrics["windowFraction"] == beyond / 80 and metrics["tokenFraction"] == beyond / 80
    assert metrics["verifiedPairs"] >= beyond and metrics["candidatePairs"] >= metrics["verifiedPairs"]


def test_planted_near_duplicates_in_a_text_shard():
    rng = np.random.default_rng(5)
    lines = text_corpus(rng)
    write_lines("text/part-0.jsonl", lines)
    write_lines("text/part-1.jsonl", [{"text": lines[4]["text"]}, {"text": "a short one"}])
    report = run_dedup(["text"])
    near = findings(report, "near-duplicate")
    doc = {}
    for uri, rows in (("text/part-0.jsonl", lines), ("text/part-1.jsonl", [{"text": lines[4]["text"]},
                                                                           {"text": "a short one"}])):
        for row, line in enumerate(rows):
            if line is not None:
                doc[(uri, row)] = line["text"]

    def text_jaccard(x, y):
        return jaccard(words_of(doc[x]), words_of(doc[y]))

    # Planted: one word changed (Jaccard 0.967) and a change of case and punctuation only (Jaccard 1).
    assert text_jaccard(("text/part-0.jsonl", 4), ("text/part-0.jsonl", 10)) >= 0.96
    assert text_jaccard(("text/part-0.jsonl", 7), ("text/part-0.jsonl", 12)) == 1.0
    clusters = {frozenset(members(f)) for f in near}
    # Line 4 has an exact copy in part-1 (reported by exact-duplicate), so the cluster lists lines 4 and 10.
    assert clusters == {frozenset({("text/part-0.jsonl", 4), ("text/part-0.jsonl", 10)}),
                        frozenset({("text/part-0.jsonl", 7), ("text/part-0.jsonl", 12)})}
    reference, _ = datasketch_clusters({key: (text, shingles_of(words_of(text))) for key, text in doc.items()})
    assert clusters == set(reference)
    by_first = {members(f)[0]: f for f in near}
    assert by_first[("text/part-0.jsonl", 4)].evidence["exactCopies"] == 1
    assert "5-word shingles" in by_first[("text/part-0.jsonl", 4)].message
    # A JSON Lines finding in one shard points at the line of its first document (1-based).
    assert by_first[("text/part-0.jsonl", 7)].uri == "text/part-0.jsonl"
    assert by_first[("text/part-0.jsonl", 7)].start_line == 8
    size = {key: len(text.encode()) for key, text in doc.items() if text}
    metrics = report.metrics["nearDuplicates"]
    assert metrics["duplicateTextBytes"] == size[("text/part-0.jsonl", 10)] + size[("text/part-0.jsonl", 12)]
    assert metrics["tokens"] == 0
    # Documents with words: 30 lines less null, empty, blank and the two word-free ones, plus part-1's two.
    assert metrics["windows"] == 30 - 5 + 2


def test_exact_duplicates_across_shards_with_exact_members():
    rng = np.random.default_rng(3)
    shards, _ = token_corpus(rng)
    # Windows of other lengths too (the hash path for mixed lengths), an empty and a null row (not windows), and
    # the same ids stored as int64 in shard b: exact copies are about ids, not their storage type.
    shards["a"] += [[1, 2, 3], [], [7] * 40, [1, 2, 3], [5]]
    shards["b"] += [[1, 2, 3], None, [7] * 40, [5], [7] * 39]
    paths = write_tokens(shards, dtypes={"b": pa.int64()})
    report = run_dedup(paths)
    # Reference: group the non-empty windows by Python equality of their id lists, in scan order.
    groups: dict[tuple, list] = {}
    for name, rows in shards.items():
        for row, w in enumerate(rows):
            if w:
                groups.setdefault(tuple(w), []).append((f"data/{name}.parquet", row))
    expected = sorted((g for g in groups.values() if len(g) > 1), key=lambda g: (-len(g), g[0]))
    exact = findings(report, "exact-duplicate")
    assert sorted((members(f) for f in exact), key=lambda g: (-len(g), g[0])) == expected
    assert len(expected) == 5  # the triple, a.0 / b.25, [1, 2, 3] three times, [7] * 40, [5]; not [7] * 39
    triple = next(f for f in exact if members(f)[0] == ("data/a.parquet", 14))
    assert members(triple) == [("data/a.parquet", 14), ("data/b.parquet", 20), ("data/b.parquet", 21)]
    assert (triple.count, triple.evidence["copies"], triple.evidence["tokens"],
            triple.evidence["redundantTokens"]) == (3, 3, 3 * 512, 2 * 512)
    assert triple.uri is None and "exact copies" in triple.message and "a.parquet row 14" in triple.message
    within = next(f for f in exact if members(f)[0] == ("data/a.parquet", 40))  # [1, 2, 3] twice in a, once in b
    assert members(within) == [("data/a.parquet", 40), ("data/a.parquet", 43), ("data/b.parquet", 40)]
    extra = sum(len(g) - 1 for g in expected)
    extra_tokens = sum(len(shards[g[0][0][5]][g[0][1]]) * (len(g) - 1) for g in expected)
    windows = sum(1 for rows in shards.values() for w in rows if w)
    tokens = sum(len(w) for rows in shards.values() for w in rows if w)
    metrics = report.metrics["exactDuplicates"]
    assert (metrics["groups"], metrics["windows"], metrics["duplicateWindows"]) == (5, windows, extra)
    assert (metrics["tokens"], metrics["duplicateTokens"]) == (tokens, extra_tokens)
    assert metrics["tokenFraction"] == extra_tokens / tokens


def test_exact_duplicate_documents_are_byte_identical_text():
    docs = ["Die Möwe zählt Wellen.", "Die Möwe zählt Wellen.", "die möwe zählt wellen.",
            "Die Mo\u0308we zählt Wellen.",  # the same letters, decomposed (NFD): other bytes, not an exact copy
            "", None, "Die Möwe zählt Wellen. ", "Die Möwe zählt Wellen."]
    write("t.parquet", {"text": docs})
    write_lines("t.jsonl", [{"text": docs[0]}, None, {"text": docs[0]}])
    report = run_dedup(["t.parquet", "t.jsonl"])
    exact = findings(report, "exact-duplicate")
    # Reference: Python string equality; JSON Lines rows are line indices (the blank line counts).
    assert [members(f) for f in exact] == [[("t.parquet", 0), ("t.parquet", 1), ("t.parquet", 7),
                                            ("t.jsonl", 0), ("t.jsonl", 2)]]
    size = len(docs[0].encode("utf-8"))
    assert exact[0].evidence["textBytes"] == 5 * size and exact[0].evidence["redundantTextBytes"] == 4 * size
    assert "documents" in exact[0].message and "UTF-8 bytes" in exact[0].message
    # Lowercased text and a trailing space give the same words: near-duplicates of the first copy, not exact ones.
    # The decomposed spelling is a different word (other code points), and four words are one shingle (n = 5):
    # it has no shingle in common with the others (reference: words_of, the regex split).
    assert words_of(docs[3]) != words_of(docs[0]) == words_of(docs[2]) == words_of(docs[6])
    near = findings(report, "near-duplicate")
    assert [members(f) for f in near] == [[("t.parquet", 0), ("t.parquet", 2), ("t.parquet", 6)]]
    assert near[0].evidence["exactCopies"] == 4 and near[0].evidence["similarityMin"] == 1.0


def test_content_hashes_agree_between_equal_and_mixed_lengths():
    rng = np.random.default_rng(2)
    same = rng.integers(-200, 2**31, (6, 50))
    mixed = [same[0], same[1, :7], same[2], [0], same[3], same[4, :49], same[5]]
    flat = np.concatenate(mixed).astype(np.int64)
    offsets = np.concatenate(([0], np.cumsum([len(w) for w in mixed])))
    by_mix = content_hashes(flat, offsets[:-1], offsets[1:], TOKENS)
    by_len = content_hashes(same.ravel().astype(np.int32), np.arange(6) * 50, np.arange(1, 7) * 50, TOKENS)
    np.testing.assert_array_equal(by_mix[[0, 2, 4, 6]], by_len[[0, 2, 3, 5]])
    # Reference: Python equality -- seven different windows, seven different hashes; a prefix differs too.
    assert len({tuple(h) for h in by_mix.tolist()}) == 7
    # Windows that do not lie back to back (a gap between them) hash as if they did.
    gapped = content_hashes(flat, offsets[:-1][[0, 2, 4]], offsets[1:][[0, 2, 4]], TOKENS)
    np.testing.assert_array_equal(gapped, by_mix[[0, 2, 4]])


def test_long_windows_hash_piece_by_piece_to_the_same_value(monkeypatch):
    import corpuscle.kernels.hashing as hashing

    rng = np.random.default_rng(6)
    lengths = [3, 300, 40, 250, 7]
    values = rng.integers(0, 256, sum(lengths)).astype(np.uint8)
    offsets = np.concatenate(([0], np.cumsum(lengths)))
    whole = content_hashes(values, offsets[:-1], offsets[1:], 1)
    # Windows over 64 words are "long" now: keys made per piece of at most 100 words, beyond the key table.
    monkeypatch.setattr(hashing, "_KEY_TABLE", 64)
    monkeypatch.setattr(hashing, "_HASH_CHUNK", 100)
    np.testing.assert_array_equal(content_hashes(values, offsets[:-1], offsets[1:], 1), whole)
    assert len({tuple(h) for h in whole.tolist()}) == 5


def test_content_hash_follows_its_documented_definition():
    from corpuscle.kernels.hashing import _CONSTANT_KEYS, _position_keys

    window = [5, 0, 2**32 - 1, 77, 3]
    mask = (1 << 64) - 1
    keys = _position_keys(0, len(window))
    top = []
    for lane in range(4):
        h = int(_CONSTANT_KEYS[lane, 0]) + int(_CONSTANT_KEYS[lane, 1]) * (2 * len(window) + TOKENS)
        h += sum(int(keys[lane, j]) * s for j, s in enumerate(window))
        top.append((h & mask) >> 32)
    expected = [top[0] << 32 | top[1], top[2] << 32 | top[3]]
    got = content_hashes(np.array(window, dtype=np.uint32), [0], [5], TOKENS)
    assert got.tolist() == [expected]
    # -1 as int32 or int64 is the word 2**32 - 1.
    assert content_hashes(np.array([5, 0, -1, 77, 3]), [0], [5], TOKENS).tolist() == [expected]


# -- the drop list ----------------------------------------------------------------------------------------------


def read_drop_list(path) -> list[tuple[str, int]]:
    with open(path) as fh:
        return [(e["uri"], e["row"]) for e in map(json.loads, fh)]


def test_the_drop_list_leaves_no_duplicate_on_a_rescan(tmp_path):
    rng = np.random.default_rng(11)
    shards, _ = token_corpus(rng)
    paths = write_tokens(shards)
    result = CliRunner().invoke(main, ["scan", *paths, "--only", ",".join(RULES), "--drop-list", "drop.jsonl",
                                       "--jobs", "1"])
    assert result.exit_code == 0, result.output
    dropped = read_drop_list("drop.jsonl")
    # Reference: every exact copy but the first (Python equality) and every window of a datasketch cluster but
    # its first, with the exact copies of its members; once each, in scan order.
    window = {(f"data/{name}.parquet", row): w for name, rows in shards.items() for row, w in enumerate(rows)}
    reference, _ = datasketch_clusters({key: (tuple(w), shingles_of(w)) for key, w in window.items()})
    first = {}
    for key, w in window.items():
        first.setdefault(tuple(w), key)
    expected = {key for key, w in window.items() if first[tuple(w)] != key}
    for cluster in reference:
        head = min(cluster, key=lambda k: (k[0], k[1]))
        expected |= {key for key, w in window.items() if first[tuple(w)] in cluster and key != head}
    assert set(dropped) == expected and len(dropped) == len(expected)
    assert dropped == sorted(dropped)  # a.parquet before b.parquet, rows ascending
    # Rewrite the shards without the dropped rows (pyarrow), then scan again: nothing left to report.
    os.makedirs("kept")
    for path in paths:
        table = pq.read_table(path)
        keep = np.array([(path, row) not in expected for row in range(table.num_rows)])
        pq.write_table(table.filter(pa.array(keep)), path.replace("data/", "kept/"))
    again = run_dedup(["kept"])
    assert findings(again, "near-duplicate") == [] and findings(again, "exact-duplicate") == []
    assert again.metrics["nearDuplicates"]["windows"] == 80 - len(expected)


def test_the_drop_list_of_a_text_shard_removes_its_lines(tmp_path):
    rng = np.random.default_rng(5)
    lines = text_corpus(rng)
    write_lines("text/part-0.jsonl", lines)
    result = CliRunner().invoke(main, ["scan", "text", "--only", ",".join(RULES), "--drop-list", "drop.jsonl",
                                       "--jobs", "1"])
    assert result.exit_code == 0, result.output
    # Line 10 (near copy of 4), 12 (same words as 7), 14 and 15 (copies of 9), 24 (copy of 23).
    assert read_drop_list("drop.jsonl") == [("text/part-0.jsonl", row) for row in (10, 12, 14, 15, 24)]
    dropped = {10, 12, 14, 15, 24}
    write_lines("kept/part-0.jsonl", [line for row, line in enumerate(lines) if row not in dropped])
    again = run_dedup(["kept"])
    assert findings(again, "near-duplicate") == [] and findings(again, "exact-duplicate") == []


def test_either_rule_alone_drops_what_it_reports(tmp_path):
    rng = np.random.default_rng(11)
    shards, _ = token_corpus(rng)
    paths = write_tokens(shards)
    for rule_id in RULES:
        report = scan(paths, Settings(only=(rule_id,)), jobs=1)
        dropped = {(e["uri"], e["row"]) for e in droplist.entries(report)}
        folder = f"kept-{rule_id}"
        os.makedirs(folder)
        for path in paths:
            table = pq.read_table(path)
            keep = np.array([(path, row) not in dropped for row in range(table.num_rows)])
            pq.write_table(table.filter(pa.array(keep)), path.replace("data/", f"{folder}/"))
        assert findings(scan([folder], Settings(only=(rule_id,)), jobs=1), rule_id) == []


def test_a_drop_list_without_the_duplicate_rules_is_empty_with_a_note(tmp_path):
    write("a.parquet", {"input_ids": [[1, 2, 3], [1, 2, 3]]})
    result = CliRunner().invoke(main, ["scan", "a.parquet", "--only", "schema-mismatch", "--drop-list", "d.jsonl",
                                       "--jobs", "1"])
    assert result.exit_code == 0, result.output
    assert open("d.jsonl").read() == ""
    assert result.stderr.startswith("note: the drop list d.jsonl is empty: only near-duplicate, exact-duplicate")
    assert "--drop-list FILE" in CliRunner().invoke(main, ["scan", "--help"]).output.replace("\n", " ") or \
        "--drop-list" in CliRunner().invoke(main, ["scan", "--help"]).output
    # With the rules and nothing to drop: an empty file and no note.
    result = CliRunner().invoke(main, ["scan", "a.parquet", "--only", "exact-duplicate", "--drop-list", "e.jsonl",
                                       "--jobs", "1"])
    assert read_drop_list("e.jsonl") == [("a.parquet", 1)] and result.stderr == ""


# -- parallel scans, temporary files, options, SARIF ------------------------------------------------------------


def comparable(report) -> tuple:
    found = [(f.rule_id, f.uri, f.kind, f.message, f.count, f.instances(), f.evidence) for f in report.findings]
    metrics = {k: v for k, v in report.metrics.items() if k != "seconds"}
    return found, metrics, report.outputs


def test_two_jobs_give_the_same_findings_as_one_and_leave_no_files(tmp_path, monkeypatch):
    spill_root = tmp_path / "spill"
    spill_root.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(spill_root))
    rng = np.random.default_rng(11)
    shards, _ = token_corpus(rng)
    shards["c"] = [list(shards["a"][0])] + [rng.integers(0, VOCAB, 512).tolist() for _ in range(5)]
    paths = write_tokens(shards)
    one = run_dedup(paths, jobs=1)
    assert [name for name in os.listdir(spill_root) if name.startswith("corpuscle-")] == []
    two = run_dedup(paths, jobs=2)  # states travel from the worker processes through pickle
    # (multiprocessing keeps a folder of its own there, pymp-*, while its forkserver lives)
    assert [name for name in os.listdir(spill_root) if name.startswith("corpuscle-")] == []
    assert comparable(one) == comparable(two)
    assert all(rule.spill_folder.startswith(str(spill_root)) for rule in one.rules + two.rules
               if rule.id == "near-duplicate")
    assert len(findings(one, "near-duplicate")) >= 5 and len(findings(one, "exact-duplicate")) == 2


def test_signatures_are_spilled_to_an_npy_file_and_removed_by_corpus(tmp_path, monkeypatch):
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    rng = np.random.default_rng(4)
    write("a.parquet", {"input_ids": [rng.integers(0, VOCAB, 64).tolist() for _ in range(30)] + [[]]},
          row_group_size=7)
    from corpuscle.io.sources import discover, open_shard

    rule = NearDuplicate()
    shard = discover(["a.parquet"])[0]
    settings = Settings()
    state = rule.begin(shard, settings)
    with open_shard(shard, batch_tokens=500) as reader:
        batches = list(reader)
    assert len(batches) > 1  # several batches appended to one file
    for batch in batches:
        rule.feed(state, batch)
    state = rule.end(state)
    assert os.path.dirname(state.signatures_path) == rule.spill_folder
    assert rule.spill_folder.startswith(str(tmp_path))
    # Reference: NumPy's .npy reader gives back the signatures of the 30 non-empty windows.
    rows = pq.read_table("a.parquet").column("input_ids").to_pylist()
    flat = np.concatenate([np.array(w, dtype=np.int64) for w in rows[:30]])
    expected = signatures(*shingle_hashes(flat, np.arange(31) * 64, 5))
    stored = np.load(state.signatures_path, mmap_mode="r")
    assert isinstance(stored, np.memmap) and stored.shape == (30, 128)
    np.testing.assert_array_equal(stored, expected)
    np.testing.assert_array_equal(np.load(state.signatures_path), expected)
    del stored
    assert state.rows.tolist() == list(range(30)) and state.keys.shape == (30, 9)
    rule.corpus([state])
    assert not os.path.exists(rule.spill_folder)


def test_a_spill_file_is_a_standard_npy_file(tmp_path):
    spill = SignatureSpill(str(tmp_path / "s"), 4)
    parts = [np.arange(8, dtype=np.uint32).reshape(2, 4), np.zeros((0, 4), np.uint32),
             np.full((3, 4), 2**32 - 1, dtype=np.uint32)]
    for part in parts:
        spill.append(part)
    path = spill.close()
    # Reference: numpy's .npy reader and its header parser.
    np.testing.assert_array_equal(np.load(path), np.concatenate(parts))
    with open(path, "rb") as fh:
        assert np.lib.format.read_magic(fh) == (1, 0)
        assert np.lib.format.read_array_header_1_0(fh) == ((5, 4), False, np.dtype("<u4"))
        assert fh.tell() % 64 == 0
    with pytest.raises(ValueError, match=r"shape \(windows, 4\)"):
        spill.append(np.zeros((1, 3), np.uint32))


def test_max_clusters_lists_the_largest_and_summarises_the_rest(tmp_path):
    rng = np.random.default_rng(9)
    base = [rng.integers(0, VOCAB, 256).tolist() for _ in range(3)]
    rows = [base[0], mutate(rng, base[0], 1), mutate(rng, base[0], 1), base[1], mutate(rng, base[1], 1),
            base[2], mutate(rng, base[2], 1), base[2], base[2], base[1]]
    write("a.parquet", {"input_ids": rows})
    report = run_dedup(["a.parquet"], **{"near-duplicate": {"max_clusters": 1}, "exact-duplicate": {"max_clusters": 1}})
    near = findings(report, "near-duplicate")
    listed = [f for f in near if f.kind.startswith("cluster-")]
    rest = [f for f in near if f.kind == "more-clusters"]
    # Largest first: three distinct windows around base 0 beat the pairs around bases 1 and 2.
    assert [members(f) for f in listed] == [[("a.parquet", 0), ("a.parquet", 1), ("a.parquet", 2)]]
    assert len(rest) == 1 and rest[0].count == 2 and members(rest[0]) == [("a.parquet", 3), ("a.parquet", 5)]
    assert rest[0].evidence == {"clusters": 2, "windows": 4} and "max_clusters = 1" in rest[0].message
    exact = findings(report, "exact-duplicate")
    assert [members(f) for f in exact if f.kind.startswith("copies-")] == [[("a.parquet", 5), ("a.parquet", 7),
                                                                           ("a.parquet", 8)]]
    more = next(f for f in exact if f.kind == "more-groups")
    assert members(more) == [("a.parquet", 3)] and more.evidence == {"groups": 1, "extraCopies": 1}
    assert report.metrics["nearDuplicates"]["clusters"] == 3
    # The drop list still holds every cluster: all but rows 0, 3 and 5.
    assert [e["row"] for e in droplist.entries(report)] == [1, 2, 4, 6, 7, 8, 9]


def test_options_are_validated_with_a_hint():
    with pytest.raises(ValueError, match=r"threshold must be a number in \(0, 1\].*hint"):
        NearDuplicate(threshold=0)
    with pytest.raises(ValueError, match="num_perm must be between 1 and"):
        NearDuplicate(num_perm=0)
    with pytest.raises(ValueError, match="max_clusters must be an integer >= 0"):
        NearDuplicate(max_clusters=-1)
    with pytest.raises(ValueError, match="unknown option"):
        NearDuplicate(bands=4)
    with pytest.raises(SettingsError, match="rule near-duplicate: threshold"):
        select_rules(Settings(rule={"near-duplicate": {"threshold": 1.5}}), registry())
    # Other thresholds and permutation counts take datasketch's (b, r).
    rule = NearDuplicate(threshold=0.5, num_perm=64)
    assert (rule.bands, rule.rows_per_band) == _optimal_param(0.5, 64, 0.5, 0.5)


def test_a_shard_without_windows_is_skipped_with_a_reason(tmp_path):
    write("a.parquet", {"score": [1, 2, 3]})
    report = run_dedup(["a.parquet"])
    skipped = [n.message for n in report.notes if n.rule_id in RULES]
    assert skipped == ["skipped: neither a token column 'input_ids' (integer lists) nor a text column 'text' "
                       "(strings); one of them is needed"] * 2
    assert report.metrics["nearDuplicates"]["windows"] == 0 and report.outputs == {"drop-list": []}


def test_sarif_with_duplicate_findings_validates_against_the_schema(tmp_path):
    rng = np.random.default_rng(11)
    shards, _ = token_corpus(rng)
    report = run_dedup(write_tokens(shards))
    log = json.loads(sarif.render(report))
    validate_sarif(log)  # OASIS SARIF 2.1.0 schema
    results = log["runs"][0]["results"]
    assert {r["ruleId"] for r in results} == set(RULES)
    across = next(r for r in results if r["ruleId"] == "exact-duplicate" and r["properties"]["count"] == 3)
    assert len(across["locations"]) == 2  # both shards
    assert across["properties"]["instances"] == [{"row": 14, "uri": "data/a.parquet"},
                                                 {"row": 20, "uri": "data/b.parquet"},
                                                 {"row": 21, "uri": "data/b.parquet"}]
    assert log["runs"][0]["properties"]["metrics"]["nearDuplicates"]["bands"] == 9
