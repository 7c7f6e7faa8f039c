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
from corpuscle.kernels.minhash import WORD_CLASS, sample_shingles, shingle_hash, signatures
from corpuscle.kernels.spill import SignatureSpill
from corpuscle.kernels.windows import TOKENS
from corpuscle.report import droplist, sarif
from corpuscle.rules import duplicates
from corpuscle.rules.duplicates import DEFAULT_SHINGLE_SAMPLE, SAMPLE_LEAST, NearDuplicate
from corpuscle.settings import SettingsError
from datasketch import MinHash, MinHashLSH
from datasketch.lsh import _optimal_param

from tests.shards import findings, run, validate_sarif, write

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


def far_above_threshold(cluster, window: dict) -> bool:
    """Whether every pair of a reference cluster has exact Jaccard >= 0.9: then the LSH search misses none of them
    but with a small chance (the planted pairs near 0.8 are found or not)."""
    return min(jaccard(window[x], window[y]) for x in cluster for y in cluster if x < y) >= 0.9


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
    return components(edges, [key for key in edges if first_copy[key] == key]), similarity


def components(edges: dict, starts: list) -> list[frozenset]:
    """The connected components of at least two nodes reached from ``starts`` (graph search over ``edges``)."""
    found, done = [], set()
    for start in starts:
        if start in done:
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
    return found


def members(finding) -> list[tuple[str, int]]:
    """Every unit a finding names (its instances), in scan order."""
    return [(inst.get("uri", finding.uri), inst["row"]) for inst in finding.instances()]


def clusters_of(finding) -> list[list[tuple[str, int]]]:
    """The clusters a finding lists in its evidence, each as (uri, row) of its members in scan order."""
    return [sorted((m["uri"], m["row"]) for m in [c["kept"], *c["others"]]) for c in finding.evidence["clusterList"]]


def clusters(report, rule_id) -> list[list[tuple[str, int]]]:
    """All clusters of a rule in a report (over its findings)."""
    return [c for f in findings(report, rule_id) for c in clusters_of(f)]


def exact_clusters(windows: dict, threshold: float = 0.8) -> list[frozenset]:
    """Reference clusters by exact Jaccard of Python shingle sets: the pairs of distinct contents at or above the
    threshold, joined by graph search; exact copies folded into their first copy (``windows`` maps key ->
    (content, shingles) in scan order). Returns the clusters of first copies."""
    first, seen = {}, {}
    for key, (content, shingles) in windows.items():
        if shingles:
            first[key] = seen.setdefault(content, key)
    heads = [k for k in first if first[k] == k]
    sets = {k: set(windows[k][1]) for k in heads}
    edges = {k: set() for k in heads}
    for i, a in enumerate(heads):
        for b in heads[i + 1:]:
            if len(sets[a] & sets[b]) / len(sets[a] | sets[b]) >= threshold:
                edges[a].add(b)
                edges[b].add(a)
    return components(edges, heads)


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
    found = [set(c) for c in clusters(report, "near-duplicate")]
    window = {(f"data/{name}.parquet", row): w for name, rows in shards.items() for row, w in enumerate(rows)}

    # Verified candidates: the bands lean towards recall (weights 0.2 / 0.8 in datasketch's own optimisation).
    b, r = _optimal_param(0.8, 64, 0.2, 0.8)  # the rule's default: 64 permutations
    assert (b, r) == (8, 8)
    metrics = report.metrics["nearDuplicates"]
    assert (metrics["bands"], metrics["rowsPerBand"], metrics["threshold"]) == (b, r, 0.8)
    assert metrics["similarity"] == "exact Jaccard" and metrics["unit"] == "document"

    # Every planted pair with exact Jaccard >= 0.9 (Python sets) is in one reported cluster. The pairs are planted
    # at >= 0.96, where the chance of missing any of them is below 1% (banding probability, MMDS section 3.4).
    pairs = [(f"data/{s[0]}.parquet", s[1], f"data/{c[0]}.parquet", c[1]) for s, c in planted]
    strong = [(a, ra, c, rc) for a, ra, c, rc in pairs if jaccard(window[(a, ra)], window[(c, rc)]) >= 0.9]
    assert len(strong) == 5
    assert sum(miss_probability(jaccard(window[(a, ra)], window[(c, rc)]), b, r) for a, ra, c, rc in strong) < 0.01
    for a, ra, c, rc in strong:
        assert any({(a, ra), (c, rc)} <= cluster for cluster in found), (a, ra, c, rc)

    # Every reported cluster is (the exact copies of) a cluster of the exact reference -- components of the pairs
    # whose exact Jaccard of Python shingle sets is >= 0.8 -- and every verified pair is at or above the threshold.
    reference = exact_clusters({key: (tuple(w), shingles_of(w)) for key, w in window.items()})
    first = {}
    for key, w in window.items():
        first.setdefault(tuple(w), key)
    for cluster in found:
        heads = frozenset(first[tuple(window[k])] for k in cluster)
        assert heads in reference, cluster
        assert cluster == {k for k in window if first[tuple(window[k])] in heads}
    strong_heads = [c for c in reference if any({(a, ra), (x, rx)} <= c for a, ra, x, rx in strong)]
    assert len(found) >= len(strong_heads)
    for f in near:
        for c in f.evidence["clusterList"]:
            keys = sorted((m["uri"], m["row"]) for m in [c["kept"], *c["others"]])
            distinct = sorted({first[tuple(window[k])] for k in keys})
            sims = [jaccard(window[x], window[y]) for i, x in enumerate(distinct) for y in distinct[i + 1:]]
            assert c["similarityMin"] >= 0.8  # no reported pair below the threshold
            if len(distinct) == 2:  # one verified pair: its exact Jaccard, as Python sets give it
                assert c["similarityMin"] == c["similarityMean"] == round(sims[0], 4)
            assert c["distinct"] == len(distinct) and c["exactCopies"] == len(keys) - len(distinct)
        assert f.level.name == "warning" and "exact Jaccard" in f.message and "heuristic search" in f.message
        assert "b x r = 8 x 8" in f.message and "threshold 0.8" in f.message and "--drop-list" in f.message

    # The copy of a.parquet row 0 in b.parquet row 25 is exact: a member of the near cluster of row 0.
    with_copy = next(c for c in found if ("data/a.parquet", 0) in c)
    assert ("data/b.parquet", 25) in with_copy
    # Corpus figures: distinct windows beyond each cluster's first, and their tokens (512 each).
    beyond = sum(len({first[tuple(window[k])] for k in c}) - 1 for c in found)
    assert metrics["clusters"] == len(found)
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
    found = {frozenset(c) for c in clusters(report, "near-duplicate")}
    # Line 4 has an exact copy in part-1: a member of the cluster of lines 4 and 10 (and exact-duplicate's too).
    assert found == {frozenset({("text/part-0.jsonl", 4), ("text/part-0.jsonl", 10), ("text/part-1.jsonl", 0)}),
                     frozenset({("text/part-0.jsonl", 7), ("text/part-0.jsonl", 12)})}
    reference = exact_clusters({key: (text, shingles_of(words_of(text))) for key, text in doc.items()})
    assert set(reference) == {frozenset({("text/part-0.jsonl", 4), ("text/part-0.jsonl", 10)}),
                              frozenset({("text/part-0.jsonl", 7), ("text/part-0.jsonl", 12)})}
    # One finding within part-0 (lines 7 and 12), one between the two shards (the cluster of line 4).
    within = next(f for f in near if f.uri == "text/part-0.jsonl")
    between = next(f for f in near if f.uri is None)
    assert clusters_of(within) == [[("text/part-0.jsonl", 7), ("text/part-0.jsonl", 12)]]
    assert between.evidence["clusterList"][0]["exactCopies"] == 1
    assert between.kind.startswith("clusters-between-")
    # A JSON Lines finding in one shard points at the line of its first document (1-based).
    assert within.start_line == 8
    size = {key: len(text.encode()) for key, text in doc.items() if text}
    metrics = report.metrics["nearDuplicates"]
    assert metrics["duplicateTextBytes"] == size[("text/part-0.jsonl", 10)] + size[("text/part-0.jsonl", 12)]
    # The exact Jaccard of the pair (4, 10), as Python sets of word shingles give it.
    pair = between.evidence["clusterList"][0]
    assert pair["similarityMin"] == round(text_jaccard(("text/part-0.jsonl", 4), ("text/part-0.jsonl", 10)), 4)
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
    assert sorted(clusters(report, "exact-duplicate"), key=lambda g: (-len(g), g[0])) == expected
    assert len(expected) == 5  # the triple, a.0 / b.25, [1, 2, 3] three times, [7] * 40, [5]; not [7] * 39
    # Every group spans both shards: one finding between them, the largest groups first.
    (between,) = exact
    assert between.uri is None and between.kind.startswith("copies-between-")
    assert between.evidence["clusters"] == 5 and between.count == sum(len(g) for g in expected)
    triple, within = between.evidence["clusterList"][:2]
    assert clusters_of(between)[:2] == [[("data/a.parquet", 14), ("data/b.parquet", 20), ("data/b.parquet", 21)],
                                        [("data/a.parquet", 40), ("data/a.parquet", 43), ("data/b.parquet", 40)]]
    assert (triple["members"], triple["dropped"], triple["droppedTokens"]) == (3, 2, 2 * 512)
    assert triple["kept"] == {"uri": "data/a.parquet", "row": 14, "offset": 0, "length": 512}
    assert "(1) 3 documents: keep data/a.parquet row 14 (512 tokens); drop data/b.parquet row 20, " \
           "data/b.parquet row 21." in between.message
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
    assert [sorted(members(f)) for f in exact] == [sorted([("t.parquet", 0), ("t.parquet", 1), ("t.parquet", 7),
                                                           ("t.jsonl", 0), ("t.jsonl", 2)])]
    size = len(docs[0].encode("utf-8"))
    assert exact[0].evidence["duplicateBytes"] == 4 * size and exact[0].evidence["duplicates"] == 4
    assert "documents" in exact[0].message and "UTF-8 bytes" in exact[0].message
    # Lowercased text and a trailing space give the same words: near-duplicates of the first copy, not exact ones.
    # The decomposed spelling is a different word (other code points), and four words are one shingle (n = 5):
    # it has no shingle in common with the others (reference: words_of, the regex split).
    assert words_of(docs[3]) != words_of(docs[0]) == words_of(docs[2]) == words_of(docs[6])
    near = findings(report, "near-duplicate")
    (cluster,) = near[0].evidence["clusterList"]
    assert sorted(clusters_of(near[0])[0]) == sorted([("t.parquet", r) for r in (0, 1, 2, 6, 7)] +
                                                     [("t.jsonl", 0), ("t.jsonl", 2)])
    assert cluster["exactCopies"] == 4 and cluster["distinct"] == 3 and cluster["similarityMin"] == 1.0


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
        entries = list(map(json.loads, fh))
    for e in entries:  # every entry names its cluster, the copy kept and why
        assert set(e) == {"uri", "row", "offset", "length", "unit", "rule", "cluster", "kept", "reason"}, e
        assert set(e["kept"]) == {"uri", "row", "offset"} and e["reason"]
    return [(e["uri"], e["row"]) for e in entries]


def test_the_drop_list_leaves_no_duplicate_on_a_rescan(tmp_path):
    rng = np.random.default_rng(11)
    shards, _ = token_corpus(rng)
    paths = write_tokens(shards)
    result = CliRunner().invoke(main, ["scan", *paths, "--only", ",".join(RULES), "--drop-list", "drop.jsonl",
                                       "--jobs", "1"])
    assert result.exit_code == 0, result.output
    dropped = read_drop_list("drop.jsonl")
    # Reference: every exact copy but the first (Python equality) and every window of a cluster of the exact
    # reference (Python sets, Jaccard >= 0.8) but its first, with the exact copies of its members; once each, in
    # scan order.
    # A cluster whose similarity lies near the threshold (the planted pair of Jaccard 0.82) may or may not be found
    # by the LSH search, a heuristic: its members are dropped as a whole or not at all; every other one must be.
    window = {(f"data/{name}.parquet", row): w for name, rows in shards.items() for row, w in enumerate(rows)}
    reference = exact_clusters({key: (tuple(w), shingles_of(w)) for key, w in window.items()})
    first = {}
    for key, w in window.items():
        first.setdefault(tuple(w), key)
    expected = {key for key, w in window.items() if first[tuple(w)] != key}
    optional = []
    for cluster in reference:
        head = min(cluster, key=lambda k: (k[0], k[1]))
        members = {key for key, w in window.items() if first[tuple(w)] in cluster and key != head}
        if far_above_threshold(cluster, window):
            expected |= members
        else:
            optional.append(members)
    assert len(optional) == 1  # the pair of about 0.82
    expected |= optional[0] if optional[0] <= set(dropped) else set()
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
    assert len(clusters(one, "near-duplicate")) >= 5 and len(clusters(one, "exact-duplicate")) == 2


@pytest.mark.parametrize("verify", [True, False])
def test_band_keys_shingles_and_signatures_are_spilled_to_npy_files_and_removed_by_corpus(tmp_path, monkeypatch,
                                                                                          verify):
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    rng = np.random.default_rng(4)
    write("a.parquet", {"input_ids": [rng.integers(0, VOCAB, 64).tolist() for _ in range(30)] + [[]]},
          row_group_size=7)
    from corpuscle.io.sources import discover, open_shard

    rule = NearDuplicate(verify=verify)
    shard = discover(["a.parquet"])[0]
    settings = Settings()
    state = rule.begin(shard, settings)
    with open_shard(shard, batch_tokens=500) as reader:
        batches = list(reader)
    assert len(batches) > 1  # several batches appended to one file
    for batch in batches:
        rule.feed(state, batch)
    state = rule.end(state)
    assert rule.spill_folder.startswith(str(tmp_path))
    # Reference: the signatures of the 30 non-empty windows, computed here from the definitions.
    rows = pq.read_table("a.parquet").column("input_ids").to_pylist()
    flat = np.concatenate([np.array(w, dtype=np.int64) for w in rows[:30]])
    # Token documents (here one per row: no eos known) are shingled with the multilinear family.
    from corpuscle.kernels.lsh import band_keys, signature_digests
    from corpuscle.kernels.minhash import multilinear_shingle_hashes
    from corpuscle.kernels.units import as_words

    expected = signatures(*sample_shingles(*multilinear_shingle_hashes(as_words(flat), np.arange(31) * 64, 5),
                                           DEFAULT_SHINGLE_SAMPLE, SAMPLE_LEAST), rule.minhash.num_perm)
    # The band file, read with NumPy's .npy reader: the band keys and digests of those signatures.
    band_path = duplicates._band_file(state.keys, state.digests)
    assert os.path.dirname(band_path) == rule.spill_folder
    b, r = rule.bands, rule.rows_per_band
    assert (b, r) == ((8, 8) if verify else (5, 11))  # datasketch's choice for 64 permutations and the weights
    assert state.rows.tolist() == list(range(30)) and state.keys.shape == (30, b)
    stored_bands = np.load(band_path)
    np.testing.assert_array_equal(stored_bands[:, :b], band_keys(expected, b, r))
    np.testing.assert_array_equal(stored_bands[:, b], signature_digests(expected))
    if verify:
        # The shingle hashes of every window, for the exact verification (NumPy's reader again); no signature file.
        assert state.signatures_path is None
        shingles, ends = (np.load(path) for path in state.shingles_paths)
        hashes, offsets = multilinear_shingle_hashes(as_words(flat), np.arange(31) * 64, 5)
        np.testing.assert_array_equal(shingles[:, 0], hashes)
        np.testing.assert_array_equal(ends[:, 0], offsets[1:])
    else:
        # The signatures themselves, for the estimate; no shingle files.
        assert state.shingles_paths is None and os.path.dirname(state.signatures_path) == rule.spill_folder
        stored = np.load(state.signatures_path, mmap_mode="r")
        assert isinstance(stored, np.memmap) and stored.shape == (30, 64)
        np.testing.assert_array_equal(stored, expected)
        np.testing.assert_array_equal(np.load(state.signatures_path), expected)
        del stored
    del stored_bands
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


def test_max_clusters_lists_the_largest_and_leaves_the_rest_to_the_drop_list(tmp_path):
    rng = np.random.default_rng(9)
    base = [rng.integers(0, VOCAB, 256).tolist() for _ in range(3)]
    rows = [base[0], mutate(rng, base[0], 1), mutate(rng, base[0], 1), base[1], mutate(rng, base[1], 1),
            base[2], mutate(rng, base[2], 1), base[2], base[2], base[1]]
    write("a.parquet", {"input_ids": rows})
    report = run_dedup(["a.parquet"], **{"near-duplicate": {"max_clusters": 1}, "exact-duplicate": {"max_clusters": 1}})
    (near,) = findings(report, "near-duplicate")
    # One finding for the shard: three clusters; the largest (four windows around base 2: two distinct, two exact
    # copies) listed in the evidence, the count and the instances cover all ten windows.
    assert near.kind == "clusters" and near.evidence["clusters"] == 3 and near.evidence["clustersTruncated"]
    assert clusters_of(near) == [[("a.parquet", 5), ("a.parquet", 6), ("a.parquet", 7), ("a.parquet", 8)]]
    assert near.count == 10 and near.evidence["duplicates"] == 7
    assert "(1) 4 documents, exact Jaccard" in near.message and "(3) 3 documents, exact Jaccard" in near.message
    (exact,) = findings(report, "exact-duplicate")
    assert clusters_of(exact) == [[("a.parquet", 5), ("a.parquet", 7), ("a.parquet", 8)]]
    assert exact.evidence["clusters"] == 2 and exact.count == 5
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
    # Other thresholds and permutation counts take datasketch's (b, r): its default weights without verification,
    # recall-leaning weights (false negatives 0.8) with it.
    rule = NearDuplicate(threshold=0.5, num_perm=64, verify=False)
    assert (rule.bands, rule.rows_per_band) == _optimal_param(0.5, 64, 0.5, 0.5)
    rule = NearDuplicate(threshold=0.5, num_perm=64)
    assert (rule.bands, rule.rows_per_band) == _optimal_param(0.5, 64, 0.2, 0.8)
    with pytest.raises(ValueError, match="unit must be"):
        NearDuplicate(unit="row")
    with pytest.raises(ValueError, match="keep must be one of first, longest"):
        NearDuplicate(keep="last")
    with pytest.raises(ValueError, match="prefer must be a list of path globs"):
        NearDuplicate(prefer=[3])
    with pytest.raises(ValueError, match="verify must be true or false"):
        NearDuplicate(verify="yes")


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
    across = next(r for r in results if r["ruleId"] == "exact-duplicate")
    assert len(across["locations"]) == 2  # both shards
    assert across["properties"]["count"] == 5  # two groups: a.0 with b.25, a.14 with b.20 and b.21
    assert across["properties"]["instances"] == [{"row": 0, "offset": 0, "uri": "data/a.parquet"},
                                                 {"row": 14, "offset": 0, "uri": "data/a.parquet"},
                                                 {"row": 20, "offset": 0, "uri": "data/b.parquet"},
                                                 {"row": 21, "offset": 0, "uri": "data/b.parquet"},
                                                 {"row": 25, "offset": 0, "uri": "data/b.parquet"}]
    assert log["runs"][0]["properties"]["metrics"]["nearDuplicates"]["bands"] == 8


# -- documents in packed shards ---------------------------------------------------------------------------------

EOS = 2


def packed_corpus(rng, originals: int = 120, seq_len: int = 97):
    """Documents of random ids (lengths 20 to 400: many run over several rows of ``seq_len``), packed with an eos
    after each into two shards: shard a holds the originals with some exact and near copies of its own; shard b
    other documents with exact and near copies of shard a's. Near copies change 1 to 3 tokens, or drop one.
    Returns (documents per shard, planted (source, copy) pairs as (shard, index))."""
    docs = {"a": [rng.integers(3, VOCAB, int(rng.integers(20, 400))).tolist() for _ in range(originals)],
            "b": [rng.integers(3, VOCAB, int(rng.integers(20, 400))).tolist() for _ in range(60)]}
    planted = []

    def near(doc):
        if rng.random() < 0.3:
            out = list(doc)
            del out[int(rng.integers(1, len(out) - 1))]
            return out
        return mutate(rng, doc, int(rng.integers(1, 4)))

    for i in range(0, 40, 2):  # copies within shard a, inserted among the originals
        docs["a"].append(list(docs["a"][i]) if i % 4 == 0 else near(docs["a"][i]))
        planted.append((("a", i), ("a", len(docs["a"]) - 1)))
    for i in range(40, 100, 2):  # copies in shard b
        at = int(rng.integers(0, len(docs["b"]) + 1))
        docs["b"].insert(at, list(docs["a"][i]) if i % 4 == 0 else near(docs["a"][i]))
        planted = [(s, (c[0], c[1] + 1) if c[0] == "b" and c[1] >= at else c) for s, c in planted]
        planted.append((("a", i), ("b", at)))
    return docs, planted


def starts_of(docs: list, seq_len: int) -> list[tuple[int, int]]:
    """(row, offset) of each document's first token once packed with an eos after each (plain Python)."""
    out, at = [], 0
    for doc in docs:
        out.append(divmod(at, seq_len))
        at += len(doc) + 1
    return out


@pytest.mark.parametrize("arrangement", ["separators", "positions"])
def test_packed_documents_are_found_as_documents_at_their_first_token(tmp_path, monkeypatch, arrangement):
    rng = np.random.default_rng(17)
    seq_len = 97
    docs, planted = packed_corpus(rng)
    from tests.shards import pack

    paths = []
    for name in ("a", "b"):
        cols = pack(docs[name], seq_len, eos=EOS, pad=0, positions=arrangement == "positions")
        paths.append(write(f"p/{name}.parquet", {"input_ids": cols["input_ids"],
                                                 **({"position_ids": cols["position_ids"]}
                                                    if arrangement == "positions" else {})}, row_group_size=5))
    settings = Settings(only=RULES, eos_id=EOS, pad_id=0)
    report = scan(paths, settings, jobs=1)
    # Documents run over rows and batches: small batches give the very same report.
    import corpuscle.io.sources as sources

    default_batch = sources.DEFAULT_BATCH_TOKENS
    monkeypatch.setattr(sources, "DEFAULT_BATCH_TOKENS", 300)
    small = scan(paths, settings, jobs=1)
    assert [(f.kind, f.message, f.evidence) for f in small.findings] == \
        [(f.kind, f.message, f.evidence) for f in report.findings]
    monkeypatch.setattr(sources, "DEFAULT_BATCH_TOKENS", default_batch)
    # The local pool of two processes (states and pieces travel through pickle) reports the same.
    pooled = scan(paths, settings, jobs=2)
    assert comparable(pooled)[:2] == comparable(report)[:2] and pooled.outputs == report.outputs

    # How the documents were read (a heuristic when inferred) is in the corpus figures.
    reading = report.metrics["exactDuplicates"]["documentReading"]
    assert list(reading) == [{"positions": "position-restarts"}.get(arrangement, arrangement)]
    assert reading[list(reading)[0]]["shards"] == 2
    where = {(name, i): (f"p/{name}.parquet", *rc)
             for name in docs for i, rc in enumerate(starts_of(docs[name], seq_len))}
    document = {(name, i): d + [EOS] for name in docs for i, d in enumerate(docs[name])}  # a document ends in its eos
    located = {where[k]: k for k in where}
    reported = []
    for rule in RULES:
        for f in findings(report, rule):
            for c in f.evidence["clusterList"]:
                members_here = [c["kept"], *c["others"]]
                keys = [located[(m["uri"], m["row"], m["offset"])] for m in members_here]  # exact first tokens
                assert all(m["length"] == len(document[k]) for m, k in zip(members_here, keys))
                reported.append((rule, set(keys)))
    # Exact copies: every planted one, with its original (Python equality of the id lists).
    exact_planted = [(s, c) for s, c in planted if document[s] == document[c]]
    assert len(exact_planted) == 25
    for s, c in exact_planted:
        assert any(rule == "exact-duplicate" and {s, c} <= keys for rule, keys in reported), (s, c)
    # Near copies with exact Jaccard >= 0.9 (Python sets of 5-token shingles): at least 90% reported together with
    # their original (the banding curve misses a pair at 0.9 with probability about 0.006, MMDS section 3.4).
    near_planted = [(s, c) for s, c in planted if document[s] != document[c]
                    and jaccard(document[s], document[c]) >= 0.9]
    assert len(near_planted) >= 15
    found = [(s, c) for s, c in near_planted if any(rule == "near-duplicate" and {s, c} <= keys
                                                    for rule, keys in reported)]
    assert len(found) >= 0.9 * len(near_planted), (len(found), len(near_planted))
    # No reported near pair below the threshold: every pair of distinct contents in a cluster whose similarity is
    # reported is at or above 0.8 in Python sets, or the cluster joins it through other members.
    for rule, keys in reported:
        if rule != "near-duplicate":
            continue
        distinct = {tuple(document[k]): k for k in sorted(keys)}
        listed = list(distinct.values())
        best = [max(jaccard(document[x], document[y]) for y in listed if y != x) for x in listed]
        assert min(best) >= 0.8, keys
    # The drop list names each dropped document by row, offset and length, and the copy kept.
    dropped = droplist.entries(report)
    assert all({"row", "offset", "length", "kept", "cluster", "reason"} <= set(e) for e in dropped)
    for e in dropped:  # an exact-duplicate entry drops a copy of the very ids it keeps
        kept = document[located[(e["kept"]["uri"], e["kept"]["row"], e["kept"]["offset"])]]
        assert document[located[(e["uri"], e["row"], e["offset"])]] == kept or e["rule"] == "near-duplicate"


def test_window_unit_compares_whole_rows(tmp_path):
    rng = np.random.default_rng(17)
    docs, planted = packed_corpus(rng)
    from tests.shards import pack

    paths = [write(f"p/{name}.parquet", {"input_ids": pack(docs[name], 97, eos=EOS, pad=0,
                                                             positions=False)["input_ids"]})
             for name in ("a", "b")]
    windows = {"near-duplicate": {"unit": "window"}, "exact-duplicate": {"unit": "window"}}
    by_window = scan(paths, Settings(only=RULES, eos_id=EOS, pad_id=0, rule=windows), jobs=1)
    by_document = scan(paths, Settings(only=RULES, eos_id=EOS, pad_id=0), jobs=1)
    # Rows of a packed shard hold shifted copies: as windows, hardly anything repeats.
    rows = {(f"p/{n}.parquet", r): w for n in ("a", "b")
            for r, w in enumerate(pq.read_table(f"p/{n}.parquet").column("input_ids").to_pylist())}
    groups: dict = {}
    for key, w in rows.items():
        groups.setdefault(tuple(w), []).append(key)
    assert sorted(clusters(by_window, "exact-duplicate")) == sorted(g for g in groups.values() if len(g) > 1)
    assert by_window.metrics["exactDuplicates"]["unit"] == "window"
    assert by_window.metrics["exactDuplicates"]["windows"] == len(rows)
    assert len(clusters(by_document, "exact-duplicate")) == 25
    assert all(c["kept"]["offset"] == 0 for f in findings(by_window, "exact-duplicate")
               for c in f.evidence["clusterList"])


def test_long_documents_are_compared_by_their_first_tokens(tmp_path, monkeypatch):
    import corpuscle.kernels.units as units

    monkeypatch.setattr(units, "MAX_DOCUMENT_TOKENS", 50)
    rng = np.random.default_rng(2)
    head = rng.integers(3, VOCAB, 60).tolist()
    docs = [head + rng.integers(3, VOCAB, 40).tolist(), head + rng.integers(3, VOCAB, 45).tolist(),
            rng.integers(3, VOCAB, 30).tolist()]
    from tests.shards import pack

    write("l.parquet", {"input_ids": pack(docs, 32, eos=EOS, positions=False)["input_ids"]})
    report = run("l.parquet", only=("exact-duplicate",), eos_id=EOS)
    # The two long documents agree in their first 50 tokens: compared by them, they are one group; the report
    # counts them as over the limit.
    assert clusters(report, "exact-duplicate") == [[("l.parquet", 0), ("l.parquet", 3)]]
    assert report.metrics["exactDuplicates"]["documentsOverLimit"] == 2
    (f,) = findings(report, "exact-duplicate")
    assert [c["kept"]["length"] for c in f.evidence["clusterList"]] == [101]  # the full length, eos included


# -- the keep policy --------------------------------------------------------------------------------------------


def mirror_site(rng):
    """An original crawl (site/) and a mirror of it (mirror/) that sorts first: the mirror repeats the pages word
    for word or with a footer line added; the original also has pages of its own."""
    vocabulary = sorted({"".join(rng.choice(SYLLABLES, size=3)) for _ in range(2000)})
    pages = [" ".join(rng.choice(vocabulary, size=200)) for _ in range(12)]
    write_lines("crawl/site/pages.jsonl", [{"text": p} for p in pages])
    mirrored = [pages[i] if i % 2 else pages[i] + " mirrored by example mirror" for i in range(8)]
    write_lines("crawl/mirror/pages.jsonl", [{"text": p} for p in mirrored])
    return pages, mirrored


def test_the_keep_policy_keeps_the_original_over_its_mirror(tmp_path):
    rng = np.random.default_rng(8)
    pages, mirrored = mirror_site(rng)
    # By default the first copy in scan order is kept: the mirror, which sorts first.
    plain = run_dedup(["crawl"])
    assert {e["uri"] for e in droplist.entries(plain)} == {"crawl/site/pages.jsonl"}
    prefer = {"prefer": ["crawl/site/*"]}
    report = run_dedup(["crawl"], **{"near-duplicate": prefer, "exact-duplicate": prefer})
    dropped = droplist.entries(report)
    # Every mirrored page is dropped, each once, and the original kept: exact copies (odd pages) by
    # exact-duplicate, pages with the footer by near-duplicate.
    assert [(e["uri"], e["row"]) for e in dropped] == [("crawl/mirror/pages.jsonl", r) for r in range(8)]
    for e in dropped:
        assert e["kept"] == {"uri": "crawl/site/pages.jsonl", "row": e["row"], "offset": 0}
        assert e["reason"] == "the kept copy is under the preferred path 'crawl/site/*'; this one is under no " \
                              "preferred path"
        assert e["rule"] == ("exact-duplicate" if e["row"] % 2 else "near-duplicate")
        assert e["length"] == len(mirrored[e["row"]].encode())
    # One copy per cluster: dropping the list leaves every page once (Python check over the remaining texts).
    kept_texts = pages + [m for r, m in enumerate(mirrored) if ("crawl/mirror/pages.jsonl", r) not in
                          {(e["uri"], e["row"]) for e in dropped}]
    assert len(kept_texts) == 12
    # Protected paths are never dropped: the mirror protected too keeps both copies of every page.
    guarded = {"prefer": ["crawl/site/*"], "protect": ["crawl/mirror/*"]}
    both = run_dedup(["crawl"], **{"near-duplicate": guarded, "exact-duplicate": guarded})
    assert droplist.entries(both) == []
    assert len(clusters(both, "exact-duplicate")) == 4 and len(clusters(both, "near-duplicate")) == 4


def test_keep_longest_keeps_the_page_with_its_footer(tmp_path):
    rng = np.random.default_rng(8)
    pages, mirrored = mirror_site(rng)
    longest = {"keep": "longest"}
    report = run_dedup(["crawl"], **{"near-duplicate": longest, "exact-duplicate": longest})
    dropped = {(e["uri"], e["row"]): e for e in droplist.entries(report)}
    # The pages with the footer (even rows of the mirror) are longer than the originals: those are kept.
    for r in range(0, 8, 2):
        e = dropped[("crawl/site/pages.jsonl", r)]
        assert e["kept"]["uri"] == "crawl/mirror/pages.jsonl" and e["reason"].startswith("keep = longest: the kept")
    # Exact copies are as long as each other: the first in scan order (the mirror) stays.
    for r in range(1, 8, 2):
        assert dropped[("crawl/site/pages.jsonl", r)]["reason"] == \
            "keep = longest: as long as the kept copy, which comes first in scan order"


# -- verification -----------------------------------------------------------------------------------------------


def test_unverified_similarity_is_an_estimate_and_says_so(tmp_path):
    rng = np.random.default_rng(5)
    write_lines("text/part-0.jsonl", text_corpus(rng))
    report = run_dedup(["text"], **{"near-duplicate": {"verify": False}})
    (f,) = findings(report, "near-duplicate")
    assert "an estimate" in f.message and "not verified (verify = false)" in f.message
    assert f.evidence["method"] == "MinHash LSH estimate (heuristic)"
    assert report.metrics["nearDuplicates"]["similarity"] == "estimated Jaccard (MinHash, heuristic)"
    # b x r are datasketch's own for threshold 0.8 and the rule's 64 permutations with its default weights.
    assert (report.metrics["nearDuplicates"]["bands"], report.metrics["nearDuplicates"]["rowsPerBand"]) == \
        _optimal_param(0.8, 64, 0.5, 0.5)


def test_a_candidate_below_the_threshold_is_not_reported(tmp_path):
    """Verified, the reported similarity is the exact Jaccard of the shingle sets (Python sets); unverified, the
    MinHash estimate; and a candidate whose exact similarity is below the threshold is left out."""
    rng = np.random.default_rng(13)
    base = rng.integers(3, VOCAB, 300).tolist()
    rows = [base, mutate(rng, base, 8)]
    write("v.parquet", {"input_ids": rows})
    exact = jaccard(rows[0], rows[1])  # about 0.77

    # 128 permutations: with them this pair shares 4 of its 25 bands at threshold 0.5 (with the default 64, none
    # of 14 by chance: the search is a heuristic), and the test is about what is reported of a candidate.
    def similarity(**options):
        found = findings(run("v.parquet", only=("near-duplicate",), rule={"near-duplicate": {"num_perm": 128,
                                                                                             **options}}),
                         "near-duplicate")
        return [c["similarityMin"] for f in found for c in f.evidence["clusterList"]]

    assert similarity(threshold=0.5) == [round(exact, 4)]
    (estimate,) = similarity(threshold=0.5, verify=False)
    assert estimate != round(exact, 4) and abs(estimate - exact) < 0.2
    # Just above the exact value: the pair is still a candidate (it shares many bands), but not reported.
    report = run("v.parquet", only=("near-duplicate",), rule={"near-duplicate": {"threshold": exact + 0.0005,
                                                                                 "num_perm": 128}})
    assert findings(report, "near-duplicate") == [] and report.metrics["nearDuplicates"]["verifiedPairs"] == 0


def test_a_sampled_scan_compares_only_documents_read_whole(tmp_path):
    """With --sample, row groups are skipped: a document that runs into a skipped row group is a fragment and is
    not compared; every document reported starts where the packing put one and has its full length."""
    from corpuscle.engine.sampling import Sample

    from tests.shards import pack

    rng = np.random.default_rng(17)
    docs, _ = packed_corpus(rng)
    paths = [write(f"s/{name}.parquet", {"input_ids": pack(docs[name], 97, eos=EOS, pad=0,
                                                             positions=False)["input_ids"]}, row_group_size=4)
             for name in ("a", "b")]
    report = scan(paths, Settings(only=RULES, eos_id=EOS, pad_id=0), jobs=1, sample=Sample(0.5, seed=3))
    truth = {(f"s/{name}.parquet", *rc): len(d) + 1 for name in docs
             for rc, d in zip(starts_of(docs[name], 97), docs[name])}
    members_seen = [m for rule in RULES for f in findings(report, rule) for c in f.evidence["clusterList"]
                    for m in [c["kept"], *c["others"]]]
    assert members_seen  # some clusters lie wholly in the row groups read
    for m in members_seen:
        assert truth[(m["uri"], m["row"], m["offset"])] == m["length"], m
    full = scan(paths, Settings(only=RULES, eos_id=EOS, pad_id=0), jobs=1)
    assert report.metrics["exactDuplicates"]["windows"] < full.metrics["exactDuplicates"]["windows"]
    # Every unit the rule kept of a sampled shard is a whole document: its first token and length as packed.
    from corpuscle.engine.scan import scan_shard
    from corpuscle.io.sources import discover
    from corpuscle.rules.duplicates import ExactDuplicate

    shard = discover(["s/a.parquet"])[0]
    state = scan_shard(shard, Settings(eos_id=EOS, pad_id=0), [ExactDuplicate()],
                       sample=Sample(0.5, seed=3)).states["exact-duplicate"]
    units = list(zip(state.rows.tolist(), state.offsets.tolist(), state.lengths.tolist()))
    assert 0 < len(units) < len(docs["a"])
    assert all(truth[("s/a.parquet", row, offset)] == length for row, offset, length in units), units
