"""Locality-sensitive hashing over MinHash signatures: bands, candidates, clusters.

The signature of a window is cut into ``b`` bands of ``r`` values. Two windows
become a *candidate pair* when all ``r`` values of at least one band agree,
which for windows of Jaccard similarity ``s`` happens with probability
``1 - (1 - s**r)**b``: an S-shaped curve whose steep part sits near the
threshold that :func:`optimal_bands` aims at. Candidates are then *verified*
with :func:`estimated_jaccard` (the fraction of equal signature values, an
unbiased estimate of the Jaccard similarity with standard error
``sqrt(s * (1 - s) / num_perm)``), and :func:`clusters` joins the verified
pairs into groups of near-duplicate windows. All results here are
statistical estimates, not proofs of similarity.

Sharded use: each shard keeps ``band_keys(signatures, b, r)``, its window ids
and, optionally, ``signature_digests(signatures)``. Merging shards is
concatenating those arrays; :func:`candidate_pairs` on the merged arrays gives
the same answer as on one big shard. On a cluster the arrays need not meet in
one process: partition the ``(key, window, digest)`` entries by key, run
:func:`partition_candidates` on each partition, and the union of the pairs is
the same answer again.
"""

from __future__ import annotations

import math
import operator
from functools import lru_cache
from typing import NamedTuple

import numpy as np
from corpuscle.kernels.minhash import _check_int, fixed_keys, mix64
from corpuscle.kernels.order import lexorder

#: Bytes of 64-bit products made per step of :func:`band_keys_and_digests` (1 MiB: they stay in cache).
_BAND_BLOCK_BYTES = 1 << 20

DEFAULT_MAX_BUCKET = 1024
"""Distinct signatures per bucket above which only a linear set of pairs is made."""



class Candidates(NamedTuple):
    """Candidate pairs and what the bucket cap did to them.

    ``pairs`` is an int64 array of shape ``(m, 2)``, each row ``(i, j)`` with
    ``i < j``, rows unique and sorted. ``capped_buckets`` counts buckets that
    held more than the cap of distinct signatures and so got only a linear
    set of pairs; when it is non-zero, clusters may be split where the only
    similar pairs were among those left out. ``largest_bucket`` is the size
    of the largest bucket seen (in distinct signatures when digests were given).
    """

    pairs: np.ndarray
    capped_buckets: int
    largest_bucket: int


def optimal_bands(threshold: float, num_perm: int, weights: tuple[float, float] = (0.5, 0.5)) -> tuple[int, int]:
    """The ``(b, r)`` that ``datasketch.MinHashLSH(threshold, num_perm, weights)`` chooses, from datasketch itself.

    Among all ``b`` bands of ``r`` rows with ``b * r <= num_perm`` datasketch picks the pair minimising
    ``w_fp * FP + w_fn * FN``, where ``FP`` is the area under the candidate curve ``1 - (1 - s**r)**b`` for ``s``
    in ``[0, threshold]`` and ``FN`` the area above it for ``s`` in ``[threshold, 1]``.  Its search function is
    called directly, because ``MinHashLSH`` refuses the ``b == 1`` that the search returns at thresholds near 1.
    """
    threshold = float(threshold)
    if not 0.0 <= threshold <= 1.0:
        raise ValueError(f"threshold must be between 0 and 1, got {threshold}; hint: 0.8 is a common choice")
    num_perm = _check_int("num_perm", num_perm, 1, "use the num_perm of the signatures")
    if len(weights) != 2 or min(weights) < 0 or not math.isclose(sum(weights), 1.0):
        raise ValueError(f"weights must be two non-negative numbers summing to 1, got {weights}; hint: (0.5, 0.5)")
    return _datasketch_bands(threshold, num_perm, float(weights[0]), float(weights[1]))


#: ``_optimal_param`` of datasketch for common settings, ``(threshold, num_perm, w_fp, w_fn): (b, r)``, computed
#: once with datasketch (tests/test_lsh.py checks every entry against it): importing datasketch (and SciPy, whose
#: numerical integration it calls) takes about half a second, a tenth of a scan of a 50M-token shard.
KNOWN_BANDS = {
    (th, n, fp, fn): (b, r)
    for (th, n), pairs in {
        (0.5, 64): ((14, 4), (15, 3)), (0.5, 128): ((25, 5), (30, 4)), (0.5, 256): ((42, 6), (51, 5)),
        (0.6, 64): ((10, 6), (14, 4)), (0.6, 128): ((18, 7), (23, 5)), (0.6, 256): ((32, 8), (38, 6)),
        (0.7, 64): ((8, 8), (10, 6)), (0.7, 128): ((14, 9), (18, 7)), (0.7, 256): ((25, 10), (28, 9)),
        (0.75, 64): ((7, 9), (9, 7)), (0.75, 128): ((11, 11), (16, 8)), (0.75, 256): ((21, 12), (25, 10)),
        (0.8, 64): ((5, 11), (8, 8)), (0.8, 128): ((9, 13), (12, 10)), (0.8, 256): ((17, 15), (21, 12)),
        (0.85, 64): ((4, 15), (6, 10)), (0.85, 128): ((8, 16), (9, 13)), (0.85, 256): ((13, 19), (16, 16)),
        (0.9, 64): ((3, 21), (4, 14)), (0.9, 128): ((5, 25), (7, 18)), (0.9, 256): ((9, 28), (12, 21)),
        (0.95, 64): ((2, 32), (3, 21)), (0.95, 128): ((3, 42), (4, 30)), (0.95, 256): ((5, 51), (7, 36)),
    }.items()
    for (fp, fn), (b, r) in zip(((0.5, 0.5), (0.2, 0.8)), pairs)
}


@lru_cache(maxsize=32)
def _datasketch_bands(threshold: float, num_perm: int, false_positive_weight: float,
                      false_negative_weight: float) -> tuple[int, int]:
    known = KNOWN_BANDS.get((threshold, num_perm, false_positive_weight, false_negative_weight))
    if known is not None:
        return known
    from datasketch.lsh import _optimal_param  # the search behind MinHashLSH(threshold, num_perm, weights)

    b, r = _optimal_param(threshold, num_perm, false_positive_weight, false_negative_weight)
    return int(b), int(r)


def band_keys(signatures, b: int, r: int) -> np.ndarray:
    """One 64-bit key per window and band, shape ``(windows, b)``, uint64.

    Band ``k`` covers signature columns ``k * r`` to ``(k + 1) * r - 1``
    (columns past ``b * r`` are not banded, as in datasketch). Its key is
    ``mix64(c_k + sum_j K_j * v_j)`` over the band's values ``v_j`` (mod 2**64), with a fixed pseudo-random
    64-bit multiplier ``K_j`` per signature column and constant ``c_k`` per band (``mix64`` of fixed inputs,
    :mod:`corpuscle.kernels.minhash`): multilinear hashing of the 32-bit values, so equal bands give equal keys,
    and two different bands share a key with probability at most 2**-33 for multipliers drawn at random (from
    memory: the multilinear family modulo 2**64; with these fixed multipliers that is a heuristic figure, and a
    spurious shared key only makes one more candidate pair, which is verified).
    """
    return band_keys_and_digests(signatures, b, r)[0]


def signature_digests(signatures) -> np.ndarray:
    """A 64-bit digest of each whole signature (uint64, one per window).

    Windows with identical signatures have equal digests; different
    signatures share a digest with probability at most 2**-33 (the multilinear hash of :func:`band_keys` over
    all columns, with its own constant; heuristic in the same way). Passed to
    :func:`candidate_pairs`, digests collapse floods of exact duplicates.
    """
    signatures = _as_signatures(signatures)
    return band_keys_and_digests(signatures, 1, signatures.shape[1])[1]


#: Seed of the column multipliers and band constants of :func:`band_keys_and_digests`.
_BAND_KEY_SEED = 0xB4_9D_5E_ED_0F_0B_A9_D5


def _band_multipliers(columns: int) -> np.ndarray:
    """``columns`` column multipliers, then the digest constant, then band constants (one per column at most)."""
    return fixed_keys(2 * columns + 1, _BAND_KEY_SEED)


def band_keys_and_digests(signatures, b: int, r: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`band_keys` and :func:`signature_digests` of the same signatures, from one pass over them: each value
    is widened and multiplied by its column multiplier once; the band keys sum a band's products, the digest all
    of them."""
    signatures = _as_signatures(signatures)
    b = _check_int("b", b, 1, "take (b, r) from optimal_bands")
    r = _check_int("r", r, 1, "take (b, r) from optimal_bands")
    columns = signatures.shape[1]
    if b * r > columns:
        raise ValueError(
            f"b * r = {b * r} exceeds the {columns} values per signature; "
            "hint: take (b, r) from optimal_bands"
        )
    multipliers = _band_multipliers(columns)
    factors, digest_constant, band_constants = multipliers[:columns], multipliers[columns], \
        multipliers[columns + 1:columns + 1 + b]
    keys = np.empty((len(signatures), b), dtype=np.uint64)
    digests = np.empty(len(signatures), dtype=np.uint64)
    # A block of windows at a time (about _BAND_BLOCK_BYTES of 64-bit products): the products stay in cache
    # between their multiplication and the two sums.
    step = max(1, _BAND_BLOCK_BYTES // (8 * max(1, columns)))
    scratch = np.empty((min(step, len(signatures)), columns), dtype=np.uint64)
    for w0 in range(0, len(signatures), step):
        chunk = signatures[w0:w0 + step]
        products = scratch[:len(chunk)]
        products[:] = chunk
        products *= factors
        banded = products[:, :b * r].reshape(len(chunk), b, r)
        np.sum(banded, axis=2, out=keys[w0:w0 + step])
        np.sum(products, axis=1, out=digests[w0:w0 + step])
    keys += band_constants
    digests += digest_constant
    return mix64(keys), mix64(digests)


def candidate_pairs(keys, window_ids=None, *, digests=None, max_bucket: int = DEFAULT_MAX_BUCKET) -> Candidates:
    """Pairs of windows that share at least one band key.

    ``keys`` has shape ``(windows, b)`` as from :func:`band_keys`;
    ``window_ids`` (default ``0 .. windows - 1``) names the rows, and may be
    any int64 ids, e.g. global ids across shards. All entries
    ``(key, window)`` are sorted together and each run of equal keys is a
    bucket; within a bucket of ``m`` windows every one of the
    ``m * (m - 1) / 2`` pairs is a candidate.

    Huge buckets are guarded in two steps:

    1. With ``digests`` (from :func:`signature_digests`), windows with the
       same digest -- identical signatures -- are reduced to the one with the
       smallest id. The result holds the pairs (that window, each other copy),
       whose estimated Jaccard is 1, and the buckets are formed from these
       representatives only. This loses nothing: a copy has the same
       buckets and the same estimated Jaccard to every other window as its
       representative, so the clusters of verified pairs are exactly those
       that all pairs would give, however many copies there are.
    2. A bucket that still holds more than ``max_bucket`` windows gets only
       the pairs of its first (smallest) window with every other one and of
       consecutive windows in id order: ``2m - 3`` pairs instead of
       ``m * (m - 1) / 2``. These keep the bucket connected but cannot show
       every similar pair, so verified clusters may then come out split;
       ``Candidates.capped_buckets`` counts such buckets so that a report can
       say so. Finding every similar pair in such a bucket requires checking
       all of them, which is what the cap refuses to do.
    """
    keys = np.asarray(keys)
    if keys.ndim != 2 or keys.dtype != np.uint64:
        raise TypeError("keys must be a (windows, bands) uint64 array; hint: pass the result of band_keys")
    ids = _window_ids(window_ids, len(keys))
    max_bucket = _check_int("max_bucket", max_bucket, 1, f"the default is {DEFAULT_MAX_BUCKET}")
    found = []
    if digests is not None:
        digests = np.asarray(digests)
        if digests.shape != (len(keys),) or digests.dtype != np.uint64:
            raise TypeError("digests must be one uint64 per window; hint: pass the result of signature_digests")
        order = lexorder((ids, digests))
        ordered = ids[order]
        first = np.ones(len(order), dtype=bool)
        first[1:] = digests[order][1:] != digests[order][:-1]
        representative = ordered[np.maximum.accumulate(np.where(first, np.arange(len(order)), 0))]
        found.append(np.column_stack((representative[~first], ordered[~first])))
        keys, ids = keys[order[first]], ordered[first]

    return _bucket_pairs(keys.ravel(), np.repeat(ids, keys.shape[1]), max_bucket, found)


def partition_candidates(keys, window_ids, *, digests=None, max_bucket: int = DEFAULT_MAX_BUCKET) -> Candidates:
    """:func:`candidate_pairs` for one partition of a shuffle of band keys.

    On a cluster the band keys of all shards are partitioned by key (every entry with the same key goes to the
    same partition), so no process holds them all. A partition sees flat entries: ``keys[i]`` is a band key of
    window ``window_ids[i]`` (a window appears once per band whose key fell into the partition), and
    ``digests[i]`` that window's :func:`signature_digests` value. The result is, for this partition's buckets,
    what :func:`candidate_pairs` gives for them on all keys at once: a bucket lies wholly in one partition, and
    windows with identical signatures share every band key, so they meet in every partition that holds any of
    their keys and are reduced to the same representative there. The union of the pairs of all partitions
    (rows made unique) is therefore the pair set of :func:`candidate_pairs`; ``capped_buckets`` add up and
    ``largest_bucket`` is the maximum over the partitions.
    """
    keys = np.asarray(keys)
    ids = np.asarray(window_ids)
    if keys.ndim != 1 or keys.dtype != np.uint64 or ids.shape != keys.shape or ids.dtype.kind not in "iu":
        raise TypeError("keys must be a flat uint64 array of band keys with one integer window id each; hint: "
                        "ravel the band_keys of the partition's windows")
    ids = ids.astype(np.int64)
    max_bucket = _check_int("max_bucket", max_bucket, 1, f"the default is {DEFAULT_MAX_BUCKET}")
    if digests is not None:
        digests = np.asarray(digests)
        if digests.shape != keys.shape or digests.dtype != np.uint64:
            raise TypeError("digests must be one uint64 per entry; hint: the signature_digests of each entry's window")
    if np.any(ids[1:] < ids[:-1]):  # entries in window id order (as the shards give them, usually already)
        order = lexorder((ids,))
        keys, ids = keys[order], ids[order]
        digests = digests[order] if digests is not None else None
    found = []
    if digests is not None:
        # The partition's windows (one entry per band), then the windows sorted by digest, then id.
        window = np.ones(len(ids), dtype=bool)
        window[1:] = ids[1:] != ids[:-1]
        w_ids, w_digests = ids[window], digests[window]
        by_digest = lexorder((w_ids, w_digests))
        ordered, ordered_digests = w_ids[by_digest], w_digests[by_digest]
        first = np.ones(len(ordered), dtype=bool)
        first[1:] = ordered_digests[1:] != ordered_digests[:-1]
        representative = ordered[np.maximum.accumulate(np.where(first, np.arange(len(ordered)), 0))]
        found.append(np.column_stack((representative[~first], ordered[~first])))
        # Buckets from the representatives' entries only (still in id order).
        is_representative = np.empty(len(w_ids), dtype=bool)
        is_representative[by_digest] = representative == ordered
        keep = np.repeat(is_representative, np.diff(np.append(np.flatnonzero(window), len(ids))))
        keys, ids = keys[keep], ids[keep]
    return _bucket_pairs(keys, ids, max_bucket, found)


def _bucket_pairs(bucket_keys: np.ndarray, members: np.ndarray, max_bucket: int, found: list) -> Candidates:
    """Group ``(key, window)`` entries by key and pair the windows of each bucket (capped as described in
    :func:`candidate_pairs`); ``found`` holds pairs made before (identical signatures)."""
    order = lexorder((members, bucket_keys))
    bucket_keys, members = bucket_keys[order], members[order]
    repeated = np.zeros(len(members), dtype=bool)
    repeated[1:] = (bucket_keys[1:] == bucket_keys[:-1]) & (members[1:] == members[:-1])
    bucket_keys, members = bucket_keys[~repeated], members[~repeated]

    starts = np.flatnonzero(np.concatenate(([True], bucket_keys[1:] != bucket_keys[:-1])))
    sizes = np.diff(np.append(starts, len(members)))
    largest = int(sizes.max()) if len(sizes) else 0
    small = (sizes >= 2) & (sizes <= max_bucket)
    # Every pair of a small bucket: each member pairs with the members after it.
    after = np.repeat(np.where(small, starts + sizes, 0), sizes) - np.arange(len(members)) - 1
    after = np.maximum(after, 0)
    left = np.repeat(np.arange(len(members)), after)
    right = left + 1 + _ragged_arange(after)
    found.append(np.column_stack((members[left], members[right])))
    # Large buckets: first member with each other one, and consecutive members.
    large = np.flatnonzero(sizes > max_bucket)
    if len(large):
        position = np.repeat(starts[large], sizes[large] - 1) + _ragged_arange(sizes[large] - 1) + 1
        head = np.repeat(starts[large], sizes[large] - 1)
        found.append(np.column_stack((members[head], members[position])))
        found.append(np.column_stack((members[position - 1], members[position])))

    pairs = np.concatenate(found) if found else np.empty((0, 2), dtype=np.int64)
    # Members are sorted by id, so every pair is (smaller, larger) already; a
    # window id given twice could still pair with itself.
    pairs = pairs[pairs[:, 0] != pairs[:, 1]]
    pairs = pairs[lexorder((pairs[:, 1], pairs[:, 0]))]
    keep = np.ones(len(pairs), dtype=bool)
    keep[1:] = np.any(pairs[1:] != pairs[:-1], axis=1)
    return Candidates(pairs[keep], int(len(large)), largest)


def estimated_jaccard(sig_a, sig_b) -> np.ndarray:
    """Estimated Jaccard similarity: the fraction of positions where two signatures agree.

    ``sig_a`` and ``sig_b`` have shape ``(pairs, num_perm)`` (or broadcast to
    it); returns float64 of shape ``(pairs,)``. The standard error of the
    estimate for true similarity ``s`` is ``sqrt(s * (1 - s) / num_perm)``.
    """
    sig_a, sig_b = np.asarray(sig_a), np.asarray(sig_b)
    if sig_a.shape[-1] != sig_b.shape[-1]:
        raise ValueError("signatures must have the same num_perm; hint: make both with the same MinHash settings")
    return np.count_nonzero(sig_a == sig_b, axis=-1) / sig_a.shape[-1]


def clusters(pairs, windows) -> np.ndarray:
    """Connected components of windows joined by pairs: one label per window.

    ``windows`` is the number of windows (ids ``0 .. windows - 1``) or an
    array of distinct window ids; ``pairs`` an ``(m, 2)`` array of ids. The
    label of a window is the smallest id in its component -- its
    representative, the first of the group in scan order when ids follow
    scan order -- so a window that pairs with nothing is labelled with its
    own id. Returns int64 labels aligned with ``windows``.

    Union-find in whole-array steps: each step hooks, for every pair whose
    ends lie in different trees, the larger root onto the smaller one
    (``np.minimum.at`` keeps the smallest offer) and then compresses all
    paths by pointer jumping. Every step merges at least one pair of trees,
    so the loop ends; in practice the number of steps grows like the
    logarithm of the component size (14 for a million windows chained in
    random order).
    """
    if np.ndim(windows) == 0:
        ids = np.arange(_check_count(windows), dtype=np.int64)
    else:
        ids = _window_ids(windows, np.size(windows))
    sorted_ids = np.sort(ids)
    if np.any(sorted_ids[1:] == sorted_ids[:-1]):
        raise ValueError("window ids must be distinct; hint: give each window of the scan its own id")
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    where = np.searchsorted(sorted_ids, pairs)
    if len(pairs) and (
        np.any(where >= len(sorted_ids)) or np.any(sorted_ids[np.minimum(where, len(sorted_ids) - 1)] != pairs)
    ):
        raise ValueError("pairs name a window that is not among the windows; hint: pass every window id")
    u, v = where[:, 0], where[:, 1]
    parent = np.arange(len(sorted_ids))
    while True:
        root_u, root_v = parent[u], parent[v]
        apart = root_u != root_v
        if not apart.any():
            break
        np.minimum.at(parent, np.maximum(root_u, root_v)[apart], np.minimum(root_u, root_v)[apart])
        while True:
            jumped = parent[parent]
            if np.array_equal(jumped, parent):
                break
            parent = jumped
    return sorted_ids[parent[np.searchsorted(sorted_ids, ids)]]


# --- helpers -------------------------------------------------------------------


def _check_count(windows) -> int:
    if isinstance(windows, bool):
        raise TypeError(f"windows must be a count or an array of ids, got {windows!r}; hint: pass len(signatures)")
    try:
        count = operator.index(windows)
    except TypeError:
        raise TypeError(
            f"windows must be a count or an array of ids, got {windows!r}; hint: pass len(signatures)"
        ) from None
    if count < 0:
        raise ValueError(f"windows must not be negative, got {count}; hint: pass len(signatures)")
    return count


def _as_signatures(signatures) -> np.ndarray:
    signatures = np.asarray(signatures)
    if signatures.ndim != 2 or signatures.dtype != np.uint32:
        raise TypeError(
            "signatures must be a (windows, num_perm) uint32 array; hint: pass the result of corpuscle.kernels.minhash.signatures"
        )
    return signatures


def _window_ids(window_ids, count: int) -> np.ndarray:
    if window_ids is None:
        return np.arange(count, dtype=np.int64)
    ids = np.asarray(window_ids)
    if ids.shape != (count,) or ids.dtype.kind not in "iu":
        raise TypeError(
            f"window ids must be {count} integers, one per window; hint: omit them to number rows 0, 1, ..."
        )
    return ids.astype(np.int64)


def _ragged_arange(counts: np.ndarray) -> np.ndarray:
    """0 .. c-1 for each count c, concatenated."""
    total = int(counts.sum())
    return np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)


# --- exact verification ---------------------------------------------------------


def unique_sets(hashes, offsets) -> tuple[np.ndarray, np.ndarray]:
    """Each window's shingle hashes as a set: sorted and without repeats, back to back.

    ``hashes`` (uint32) and ``offsets`` as :func:`corpuscle.kernels.minhash.shingle_hashes` gives them; returns
    ``(values, set_offsets)``. One sort of ``window << 32 | hash`` for all windows at once.
    """
    hashes = np.asarray(hashes, dtype=np.uint32)
    offsets = np.asarray(offsets, dtype=np.int64)
    counts = np.diff(offsets)
    owner = np.repeat(np.arange(len(counts), dtype=np.uint64), counts)
    keyed = (owner << np.uint64(32)) | hashes[offsets[0]:offsets[-1]].astype(np.uint64)
    keyed.sort()  # (np.unique would do, but may hash rather than sort: a plain sort is faster here)
    if len(keyed) > 1:
        keyed = keyed[np.concatenate(([True], keyed[1:] != keyed[:-1]))]
    set_offsets = np.zeros(len(counts) + 1, dtype=np.int64)
    np.cumsum(np.bincount((keyed >> np.uint64(32)).astype(np.int64), minlength=len(counts)), out=set_offsets[1:])
    return (keyed & np.uint64(0xFFFFFFFF)).astype(np.uint32), set_offsets


def exact_jaccard(values, set_offsets, pairs) -> np.ndarray:
    """The exact Jaccard similarity ``|A & B| / |A | B|`` of the sets of each pair, float64.

    ``values``/``set_offsets`` are sets as :func:`unique_sets` gives them; ``pairs`` an ``(m, 2)`` array of set
    indices. Vectorized over all pairs: the first set of every pair is laid out with its pair's number in the
    high bits, the second likewise, and one sort of the two together puts each common element next to its copy
    (sets are free of repeats, so a pair-tagged element occurs once in each layout at most): equal neighbours
    count the common elements. Two empty sets have similarity 0.
    """
    values = np.asarray(values, dtype=np.uint32)
    set_offsets = np.asarray(set_offsets, dtype=np.int64)
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    sizes = np.diff(set_offsets)
    size_a, size_b = sizes[pairs[:, 0]], sizes[pairs[:, 1]]

    def tagged(which: np.ndarray, size: np.ndarray) -> np.ndarray:
        tag = np.repeat(np.arange(len(pairs), dtype=np.uint64), size)
        position = np.arange(int(size.sum())) + np.repeat(set_offsets[which] - (np.cumsum(size) - size), size)
        return (tag << np.uint64(32)) | values[position].astype(np.uint64)

    both = np.concatenate((tagged(pairs[:, 0], size_a), tagged(pairs[:, 1], size_b)))
    both.sort()  # numpy's default sort: no stability needed, and much faster than a merge sort on 64-bit keys
    twice = both[1:][both[1:] == both[:-1]]
    common = np.bincount((twice >> np.uint64(32)).astype(np.int64), minlength=len(pairs))
    union = size_a + size_b - common
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(union > 0, common / np.maximum(union, 1), 0.0)
