"""Tests of corpuscle.kernels.lsh: band parameters, band keys, candidate pairs, clusters.

References: datasketch 2.0.0 (``MinHashLSH`` parameter choice and queries,
``MinHash.jaccard``); the banding probability ``1 - (1 - s**r)**b`` (Leskovec,
Rajaraman & Ullman, Mining of Massive Datasets, section 3.4); the binomial
distribution of the number of equal signature positions; and a plain-Python
graph search for connected components.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from corpuscle.kernels.lsh import (
    band_keys,
    candidate_pairs,
    clusters,
    estimated_jaccard,
    optimal_bands,
    signature_digests,
)
from corpuscle.kernels.minhash import shingle_hashes, signatures
from datasketch import MinHash, MinHashLSH

# Two-sided tail of a normal distribution beyond 4 standard deviations.
FOUR_SIGMA_TAIL = 6.334e-5


def binomial_interval(trials: int, p: float, tail: float = FOUR_SIGMA_TAIL) -> tuple[int, int]:
    """Central interval of Binomial(trials, p) leaving at most tail/2 on each side (exact sums)."""
    pmf = [math.comb(trials, k) * p**k * (1 - p) ** (trials - k) for k in range(trials + 1)]
    low, below = 0, 0.0
    while below + pmf[low] <= tail / 2:
        below += pmf[low]
        low += 1
    high, above = trials, 0.0
    while above + pmf[high] <= tail / 2:
        above += pmf[high]
        high -= 1
    return low, high


def poisson_upper(mean: float, tail: float = FOUR_SIGMA_TAIL / 2) -> int:
    """Smallest k with P(Poisson(mean) > k) <= tail."""
    k, term, cumulative = 0, math.exp(-mean), math.exp(-mean)
    while 1 - cumulative > tail:
        k += 1
        term *= mean / k
        cumulative += term
    return k


def token_windows(rng, count: int, length: int, vocab: int = 50_000):
    values = rng.integers(0, vocab, count * length)
    return values, np.arange(count + 1) * length


def mutated_copies(rng, base: np.ndarray, copies: int, max_changes: int) -> list[np.ndarray]:
    out = []
    for _ in range(copies):
        copy = base.copy()
        where = rng.choice(len(base), rng.integers(0, max_changes + 1), replace=False)
        copy[where] = rng.integers(0, 50_000, len(where))
        out.append(copy)
    return out


def flatten(windows: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    offsets = np.concatenate(([0], np.cumsum([len(w) for w in windows])))
    return np.concatenate(windows), offsets


def components_by_search(pairs, count: int) -> list[int]:
    """Reference: smallest member of each window's component, by depth-first search."""
    neighbours = {i: set() for i in range(count)}
    for i, j in pairs:
        neighbours[i].add(j)
        neighbours[j].add(i)
    label = [-1] * count
    for start in range(count):
        if label[start] < 0:
            stack, seen = [start], {start}
            while stack:
                for nxt in neighbours[stack.pop()] - seen:
                    seen.add(nxt)
                    stack.append(nxt)
            for member in seen:
                label[member] = min(seen)
    return label


# --- band parameters ----------------------------------------------------------


def weighted_error(threshold: float, b: np.ndarray, r: np.ndarray, weights=(0.5, 0.5)) -> np.ndarray:
    """``w_fp * FP + w_fn * FN`` of every (b, r): FP the area under the candidate curve 1 - (1 - s^r)^b on
    [0, threshold], FN the area above it on [threshold, 1] (Mining of Massive Datasets, section 3.4), integrated
    here independently of datasketch with Gauss-Legendre quadrature of 200 nodes (numpy)."""
    nodes, node_weights = np.polynomial.legendre.leggauss(200)
    below = threshold / 2 * (nodes + 1)
    above = threshold + (1 - threshold) / 2 * (nodes + 1)
    b, r = b[:, None].astype(float), r[:, None].astype(float)
    false_positive = threshold / 2 * ((1 - (1 - below**r) ** b) @ node_weights)
    false_negative = (1 - threshold) / 2 * (((1 - above**r) ** b) @ node_weights)
    return weights[0] * false_positive + weights[1] * false_negative


@pytest.mark.parametrize("num_perm", [16, 64, 128])
def test_optimal_bands_minimise_the_weighted_error_of_the_candidate_curve(num_perm):
    bands = np.concatenate([np.full(num_perm // b, b) for b in range(1, num_perm + 1)])
    rows = np.concatenate([np.arange(1, num_perm // b + 1) for b in range(1, num_perm + 1)])
    for threshold in np.round(np.arange(0.05, 1.0, 0.05), 2):
        for weights in ((0.5, 0.5), (0.3, 0.7)):
            b, r = optimal_bands(threshold, num_perm, weights)
            assert b * r <= num_perm
            errors = weighted_error(threshold, bands, rows, weights)
            chosen = weighted_error(threshold, np.array([b]), np.array([r]), weights)[0]
            assert chosen <= errors.min() + 1e-9, (threshold, weights, (b, r))


def test_optimal_bands_are_the_values_datasketch_documents():
    # Value quoted in datasketch's documentation of MinHashLSH (threshold 0.9, 128 permutations).
    assert optimal_bands(0.9, 128) == (5, 25)
    assert optimal_bands(1.0, 128)[0] == 1  # datasketch's search allows one band where MinHashLSH refuses it


def test_the_table_of_known_bands_is_what_datasketch_computes():
    # Reference: datasketch's own search (datasketch.lsh._optimal_param, behind MinHashLSH(threshold, num_perm,
    # weights)); the table only spares a scan the import of datasketch and SciPy.
    from datasketch.lsh import _optimal_param

    from corpuscle.kernels.lsh import KNOWN_BANDS

    assert len(KNOWN_BANDS) == 48
    for (threshold, num_perm, fp, fn), (b, r) in KNOWN_BANDS.items():
        assert _optimal_param(threshold, num_perm, fp, fn) == (b, r), (threshold, num_perm, fp, fn)


def test_optimal_bands_validate_with_a_hint():
    with pytest.raises(ValueError, match="threshold must be between 0 and 1, got 1.5; hint"):
        optimal_bands(1.5, 128)
    with pytest.raises(ValueError, match="num_perm must be at least 1"):
        optimal_bands(0.8, 0)
    with pytest.raises(ValueError, match="weights must be two non-negative numbers summing to 1"):
        optimal_bands(0.8, 128, (0.5, 0.6))


# --- band keys ----------------------------------------------------------------


def test_band_keys_are_equal_exactly_when_bands_are_equal():
    rng = np.random.default_rng(1)
    # Values from a tiny range so that many bands repeat by chance.
    sig = rng.integers(0, 3, (500, 12)).astype(np.uint32)
    keys = band_keys(sig, 4, 3)
    assert keys.shape == (500, 4) and keys.dtype == np.uint64
    for band in range(4):
        values = sig[:, band * 3 : band * 3 + 3]
        _, by_value = np.unique(values, axis=0, return_inverse=True)
        _, by_key = np.unique(keys[:, band], return_inverse=True)
        # Same partition of the windows: equal values <=> equal keys.
        assert len(set(zip(by_value.ravel(), by_key, strict=True))) == len(set(by_value.ravel())) == len(set(by_key))


def test_band_keys_differ_between_bands_and_ignore_unbanded_columns():
    sig = np.full((2, 10), 42, dtype=np.uint32)
    sig[1, 9] = 7  # column 9 lies past b * r = 9
    keys = band_keys(sig, 3, 3)
    assert len(set(keys[0].tolist())) == 3
    np.testing.assert_array_equal(keys[0], keys[1])
    with pytest.raises(ValueError, match="b \\* r = 12 exceeds the 10 values"):
        band_keys(sig, 4, 3)
    with pytest.raises(TypeError, match="uint32 array"):
        band_keys(sig.astype(np.int64), 3, 3)


# --- candidate probability (the S-curve) --------------------------------------


def pairs_with_exact_jaccard(rng, similarity: float, count: int, union: int = 100):
    """``count`` pairs of hash sets, each pair with Jaccard exactly ``similarity``."""
    common = round(similarity * union)
    only_a = (union - common) // 2
    windows = []
    for _ in range(count):
        values = rng.choice(2**32, union, replace=False).astype(np.uint32)
        windows.append(values[: common + only_a])
        windows.append(np.concatenate((values[:common], values[common + only_a :])))
    return windows


def test_candidate_rate_follows_the_banding_curve():
    # Mining of Massive Datasets, section 3.4: a pair of Jaccard similarity s
    # becomes a candidate with probability 1 - (1 - s**r)**b.
    rng = np.random.default_rng(2024)
    b, r = optimal_bands(0.7, 128)
    per_similarity = 400
    for similarity in (0.3, 0.5, 0.7, 0.8, 0.9):
        hashes, offsets = flatten(pairs_with_exact_jaccard(rng, similarity, per_similarity))
        sig = signatures(hashes, offsets)
        found = candidate_pairs(band_keys(sig, b, r)).pairs
        partners = found[(found[:, 0] % 2 == 0) & (found[:, 1] == found[:, 0] + 1)]
        expected = 1 - (1 - similarity**r) ** b
        low, high = binomial_interval(per_similarity, expected)
        assert low <= len(partners) <= high, (similarity, len(partners), expected * per_similarity)


def test_estimated_jaccard_lies_within_three_standard_errors():
    # Token windows and their mutated copies; the exact Jaccard of their
    # shingle sets is computed with Python sets. All pairs are checked, not
    # only LSH candidates: being a candidate means some band agreed, which
    # biases the estimate upward by about r * (1 - s) / num_perm.
    rng = np.random.default_rng(99)
    num_perm, n = 128, 5
    windows = []
    for _ in range(600):
        base = rng.integers(0, 50_000, 200)
        windows += [base, mutated_copies(rng, base, 1, 40)[0]]
    values, offsets = flatten(windows)
    sig = signatures(*shingle_hashes(values, offsets, n), num_perm=num_perm)
    estimate = estimated_jaccard(sig[0::2], sig[1::2])

    exceed, expected_exceed = 0, 0.0
    for k in range(len(windows) // 2):
        a = {tuple(windows[2 * k][i : i + n]) for i in range(200 - n + 1)}
        c = {tuple(windows[2 * k + 1][i : i + n]) for i in range(200 - n + 1)}
        exact = len(a & c) / len(a | c)
        error = 3 * math.sqrt(exact * (1 - exact) / num_perm)
        exceed += abs(estimate[k] - exact) > error + 1e-12
        # Exact chance of such an excursion: equal positions ~ Binomial(num_perm, exact).
        expected_exceed += sum(
            math.comb(num_perm, x) * exact**x * (1 - exact) ** (num_perm - x)
            for x in range(num_perm + 1)
            if abs(x / num_perm - exact) > error + 1e-12
        )
    # Exceedances are rare independent events: bound their count by a Poisson tail.
    assert exceed <= poisson_upper(expected_exceed), (exceed, expected_exceed)


def test_estimated_jaccard_equals_datasketch():
    rng = np.random.default_rng(5)
    values, offsets = token_windows(rng, 6, 40, vocab=60)
    sig = signatures(*shingle_hashes(values, offsets, 2), num_perm=64)
    sketches = [MinHash(num_perm=64, seed=1, hashvalues=row, scheme="affine32") for row in sig]
    ours = estimated_jaccard(sig[:, None, :], sig[None, :, :])
    for i in range(6):
        for j in range(6):
            assert ours[i, j] == sketches[i].jaccard(sketches[j])
    assert estimated_jaccard(np.array([1, 2, 3, 4]), np.array([1, 0, 3, 0])) == 0.5


# --- candidate pairs ----------------------------------------------------------


def near_duplicate_corpus(rng, groups: int = 150, per_group: int = 12, singles: int = 800):
    """Windows in groups of mutated copies, some exact copies, and unrelated windows."""
    windows = []
    for _ in range(groups):
        base = rng.integers(0, 50_000, 150)
        windows += mutated_copies(rng, base, per_group, 30)
        windows += [base] * int(rng.integers(0, 3))
    windows += list(rng.integers(0, 50_000, (singles, 150)))
    order = rng.permutation(len(windows))
    return [windows[i] for i in order]


def test_candidates_equal_datasketch_lsh_queries():
    rng = np.random.default_rng(3)
    windows = near_duplicate_corpus(rng)
    sig = signatures(*shingle_hashes(*flatten(windows), 5))
    b, r = optimal_bands(0.5, 128)
    ours = candidate_pairs(band_keys(sig, b, r))
    # Reference: datasketch.MinHashLSH with the same (b, r), fed our signatures.
    lsh = MinHashLSH(num_perm=128, params=(b, r))
    sketches = [MinHash(num_perm=128, seed=1, hashvalues=row, scheme="affine32") for row in sig]
    for i, sketch in enumerate(sketches):
        lsh.insert(i, sketch)
    reference = {(min(i, j), max(i, j)) for i, sketch in enumerate(sketches) for j in lsh.query(sketch) if j != i}
    assert len(reference) > 1000
    assert set(map(tuple, ours.pairs.tolist())) == reference
    assert len(ours.pairs) == len(reference) and ours.capped_buckets == 0
    assert np.all(ours.pairs[:, 0] < ours.pairs[:, 1])


def test_merging_shards_is_concatenation():
    rng = np.random.default_rng(8)
    windows = near_duplicate_corpus(rng, groups=40, singles=200)
    sig = signatures(*shingle_hashes(*flatten(windows), 5))
    keys, digests = band_keys(sig, 9, 13), signature_digests(sig)
    whole = candidate_pairs(keys, digests=digests)
    cuts = [0, 150, 151, 400, len(sig)]
    shards = [slice(lo, hi) for lo, hi in zip(cuts[:-1], cuts[1:], strict=True)]
    merged = candidate_pairs(
        np.concatenate([keys[s] for s in shards]),
        np.concatenate([np.arange(len(sig))[s] for s in shards]),
        digests=np.concatenate([digests[s] for s in shards]),
    )
    np.testing.assert_array_equal(merged.pairs, whole.pairs)
    # Window ids need not be row numbers: shifting every id shifts every pair.
    shifted = candidate_pairs(keys, np.arange(len(sig)) + 10**12, digests=digests)
    np.testing.assert_array_equal(shifted.pairs, whole.pairs + 10**12)


def test_digests_give_the_same_verified_clusters_as_all_pairs():
    rng = np.random.default_rng(21)
    base = rng.integers(0, 50_000, 150)
    other = rng.integers(0, 50_000, 150)
    windows = [base] * 300 + mutated_copies(rng, base, 40, 25) + [other] * 50 + mutated_copies(rng, other, 10, 60)
    windows += list(rng.integers(0, 50_000, (100, 150)))
    sig = signatures(*shingle_hashes(*flatten(windows), 5))
    keys = band_keys(sig, 9, 13)

    def verified_clusters(found):
        keep = estimated_jaccard(sig[found.pairs[:, 0]], sig[found.pairs[:, 1]]) >= 0.8
        return clusters(found.pairs[keep], len(sig))

    every = candidate_pairs(keys, max_bucket=10**6)
    collapsed = candidate_pairs(keys, digests=signature_digests(sig))
    assert every.largest_bucket >= 300 and collapsed.largest_bucket < 100
    assert len(collapsed.pairs) < len(every.pairs) / 10
    np.testing.assert_array_equal(verified_clusters(collapsed), verified_clusters(every))
    assert collapsed.capped_buckets == 0


def test_a_bucket_over_the_cap_gets_the_first_member_and_consecutive_pairs():
    keys = np.array([[5], [5], [5], [5], [5], [7], [7], [9]], dtype=np.uint64)
    ids = np.array([14, 10, 12, 11, 13, 16, 15, 17])
    found = candidate_pairs(keys, ids, max_bucket=3)
    expected = [(10, 11), (10, 12), (10, 13), (10, 14), (11, 12), (12, 13), (13, 14), (15, 16)]
    assert found.pairs.tolist() == [list(p) for p in expected]
    assert (found.capped_buckets, found.largest_bucket) == (1, 5)
    everything = candidate_pairs(keys, ids)
    assert len(everything.pairs) == 10 + 1 and everything.capped_buckets == 0


def test_candidate_pairs_of_nothing_and_bad_input():
    found = candidate_pairs(np.empty((0, 4), dtype=np.uint64))
    assert found.pairs.shape == (0, 2) and found.largest_bucket == 0
    with pytest.raises(TypeError, match="band_keys"):
        candidate_pairs(np.zeros((3, 2), dtype=np.int64))
    with pytest.raises(TypeError, match="one per window"):
        candidate_pairs(np.zeros((3, 2), dtype=np.uint64), [1, 2])
    with pytest.raises(TypeError, match="signature_digests"):
        candidate_pairs(np.zeros((3, 2), dtype=np.uint64), digests=np.zeros(3, dtype=np.int64))


# --- clusters -----------------------------------------------------------------


def test_clusters_of_hand_made_pairs():
    assert clusters([(1, 2), (2, 3), (5, 4), (7, 7)], 8).tolist() == [0, 1, 1, 1, 4, 4, 6, 7]
    assert clusters(np.empty((0, 2)), 3).tolist() == [0, 1, 2]
    assert clusters([(3, 0), (2, 1), (1, 0)], 4).tolist() == [0, 0, 0, 0]
    # Ids in any order; each label is the smallest id of the component.
    ids = [40, 10, 30, 20, 50]
    assert clusters([(50, 30), (20, 40)], ids).tolist() == [20, 10, 30, 20, 30]
    assert clusters([], 0).tolist() == []


def test_clusters_of_a_long_path_given_backwards():
    pairs = [(i + 1, i) for i in range(2000)][::-1]
    assert set(clusters(pairs, 2001).tolist()) == {0}


def test_clusters_equal_a_plain_graph_search():
    rng = np.random.default_rng(4)
    for count, edges in [(50, 30), (500, 400), (2000, 1900)]:
        pairs = rng.integers(0, count, (edges, 2))
        assert clusters(pairs, count).tolist() == components_by_search(pairs.tolist(), count)


def test_clusters_refuse_unknown_or_repeated_ids():
    with pytest.raises(ValueError, match="not among the windows"):
        clusters([(1, 9)], [1, 2, 3])
    with pytest.raises(ValueError, match="not among the windows"):
        clusters([(0, 5)], 3)
    with pytest.raises(ValueError, match="must be distinct"):
        clusters([], [1, 1, 2])


# --- the near-duplicate rule's bands, its shingle sample, exact verification -----------------------------------


def test_candidate_rate_of_the_rules_bands_follows_the_banding_curve():
    # The (b, r) near-duplicate takes when it verifies candidates: datasketch's optimisation with weights 0.2 for
    # false positives and 0.8 for false negatives. Mining of Massive Datasets, section 3.4: a pair of Jaccard
    # similarity s becomes a candidate with probability 1 - (1 - s**r)**b.
    from corpuscle.rules.duplicates import DEFAULT_NUM_PERM, RECALL_WEIGHTS

    for num_perm, bands in ((DEFAULT_NUM_PERM, (8, 8)), (128, (12, 10))):  # the rule's default, and 128
        b, r = optimal_bands(0.8, num_perm, RECALL_WEIGHTS)
        assert (b, r) == bands  # the bands datasketch's search chooses for these weights
        rng = np.random.default_rng(7)
        per_similarity = 400
        for similarity in (0.5, 0.7, 0.8, 0.9):
            hashes, offsets = flatten(pairs_with_exact_jaccard(rng, similarity, per_similarity))
            found = candidate_pairs(band_keys(signatures(hashes, offsets, num_perm), b, r)).pairs
            partners = found[(found[:, 0] % 2 == 0) & (found[:, 1] == found[:, 0] + 1)]
            expected = 1 - (1 - similarity**r) ** b
            low, high = binomial_interval(per_similarity, expected)
            assert low <= len(partners) <= high, (similarity, len(partners), expected * per_similarity)


def test_candidates_of_sampled_shingles_follow_the_curve_of_the_samples_jaccard():
    # With the rule's shingle sample (one in 16, at least 48 a window), each pair is a candidate with probability
    # 1 - (1 - s'**r)**b where s' is the exact Jaccard of the two samples (Python sets): the count of candidate
    # pairs lies within 4 standard deviations of the sum of those probabilities (a sum of independent Bernoulli
    # trials; normal approximation), and s' lies close to s.
    from corpuscle.kernels.minhash import sample_shingles
    from corpuscle.rules.duplicates import DEFAULT_NUM_PERM, DEFAULT_SHINGLE_SAMPLE, SAMPLE_LEAST

    b, r = 8, 8  # the rule's bands for its default of 64 permutations (test above)
    rng = np.random.default_rng(8)
    for similarity, union in ((0.9, 1600), (0.8, 3200), (0.9, 60)):
        windows = pairs_with_exact_jaccard(rng, similarity, 300, union=union)
        hashes, offsets = flatten(windows)
        sampled, sample_offsets = sample_shingles(hashes, offsets, DEFAULT_SHINGLE_SAMPLE, SAMPLE_LEAST)
        found = candidate_pairs(band_keys(signatures(sampled, sample_offsets, DEFAULT_NUM_PERM), b, r)).pairs
        partners = len(found[(found[:, 0] % 2 == 0) & (found[:, 1] == found[:, 0] + 1)])
        probabilities = []
        for i in range(0, len(windows), 2):
            a = set(sampled[sample_offsets[i]:sample_offsets[i + 1]].tolist())
            c = set(sampled[sample_offsets[i + 1]:sample_offsets[i + 2]].tolist())
            s = len(a & c) / len(a | c)
            probabilities.append(1 - (1 - s**r) ** b)
        mean = sum(probabilities)
        sd = math.sqrt(sum(p * (1 - p) for p in probabilities))
        assert abs(partners - mean) <= 4 * sd + 1, (similarity, union, partners, mean)
        assert partners >= 0.85 * len(probabilities) if similarity == 0.9 else True


def test_exact_jaccard_equals_python_sets():
    from corpuscle.kernels.lsh import exact_jaccard, unique_sets

    rng = np.random.default_rng(12)
    windows = [rng.integers(0, 60, int(rng.integers(0, 80))).astype(np.uint32) for _ in range(50)]
    hashes, offsets = flatten(windows)
    values, set_offsets = unique_sets(hashes, offsets)
    for i, w in enumerate(windows):  # reference: sorted(set(...))
        assert values[set_offsets[i]:set_offsets[i + 1]].tolist() == sorted(set(w.tolist()))
    pairs = rng.integers(0, 50, (500, 2))
    got = exact_jaccard(values, set_offsets, pairs)
    for (a, c), j in zip(pairs.tolist(), got.tolist()):
        sa, sc = set(windows[a].tolist()), set(windows[c].tolist())
        assert j == (len(sa & sc) / len(sa | sc) if sa | sc else 0.0)


def test_a_shingle_sample_is_the_documented_subset():
    from corpuscle.kernels.minhash import sample_shingles

    rng = np.random.default_rng(3)
    windows = [rng.integers(0, 2**32, n, dtype=np.uint64).astype(np.uint32) for n in (0, 1, 30, 48, 49, 300, 5000)]
    hashes, offsets = flatten(windows)
    sampled, sample_offsets = sample_shingles(hashes, offsets, 8, 48)
    for i, w in enumerate(windows):  # reference: the module's rule in plain Python
        limit = min(2**32, math.floor(max(1 / 8, 48 / max(len(w), 1)) * 2**32))
        assert sampled[sample_offsets[i]:sample_offsets[i + 1]].tolist() == [h for h in w.tolist() if h < limit]
    assert np.diff(sample_offsets).tolist()[:5] == [0, 1, 30, 48, 49]  # a window of at most 48 whole
    unchanged = sample_shingles(hashes, offsets, 1, 48)
    assert unchanged[0] is hashes and np.array_equal(unchanged[1], offsets)
