"""128-bit content hashes of windows and documents: equal content, equal hash; stable across runs.

A window is a vector of 32-bit words: its token ids modulo 2**32 (so the same ids stored as int32 or int64
hash the same; ids that differ by a multiple of 2**32 -- never valid ids -- alias), or the bytes of its
UTF-8 text exactly as stored (no normalization: text that differs only in Unicode normalization or
whitespace is not an exact copy; the near-duplicate rule, which lowercases and splits into words, sees it).
Each of four lanes hashes the words ``s_0 .. s_{L-1}`` of a window with the multilinear family::

    lane = (k_c + k_len * (2 * L + domain) + sum_j k_j * s_j)  mod 2**64,   keep lane >> 32

with ``domain`` 0 for token windows and 1 for text documents (a token window never equals a document), and
64-bit keys ``k`` from :func:`corpuscle.kernels.minhash.mix64` of fixed inputs, independent per lane. For keys drawn at
random this family is strongly universal on its top 32 bits (multilinear hashing of 32-bit words, from
memory: Lemire and Kaser, "Strongly universal string hashing is fast", 2014), so two different windows agree
in one lane with probability 2**-32 and in all four -- the 128-bit content hash -- with probability 2**-128;
among ``n`` windows some pair collides with probability below ``n**2 / 2**129`` (about 1e-21 for a billion
windows). Our keys are fixed pseudo-random numbers, so the figure holds for data not built against them.
Whole batches are hashed at once: a reshape and ``np.einsum`` for windows of one length, ``np.add.reduceat``
over the words otherwise; no Python loop per window.
"""
from __future__ import annotations

import numpy as np
from corpuscle.kernels.minhash import mix64

# Words hashed per step of content_hashes (bounds its scratch memory to about 32 MiB).
_HASH_CHUNK = 1 << 20
# Word positions whose keys are kept in a table (2 MiB); longer windows get their keys made piece by piece.
_KEY_TABLE = 1 << 16
# Lanes of the content hash; each keeps 32 bits.
_LANES = 4
_KEY_SEED = 0x5EED_C0DE_D0C5_F00D


def _key_block(first: int, count: int) -> np.ndarray:
    """Keys ``first .. first + count - 1`` of every lane, shape ``(lanes, count)``."""
    index = np.arange(first, first + count, dtype=np.uint64)[None, :] * np.uint64(_LANES)
    index = index + np.arange(_LANES, dtype=np.uint64)[:, None]
    return mix64(index ^ np.uint64(_KEY_SEED))


_CONSTANT_KEYS = _key_block(0, 2)  # column 0: k_c, column 1: k_len
_POSITION_KEYS = _key_block(2, _KEY_TABLE)  # column j: k_j of word position j


def _position_keys(first: int, count: int) -> np.ndarray:
    """Per-lane keys of word positions ``first .. first + count - 1``, shape ``(lanes, count)``."""
    if first + count <= _KEY_TABLE:
        return _POSITION_KEYS[:, first:first + count]
    return _key_block(2 + first, count)


def _words(values: np.ndarray) -> np.ndarray:
    """Values as 32-bit words (modulo 2**32) in uint64, ready for the 64-bit multiply-add."""
    if values.dtype == np.uint8:
        return values.astype(np.uint64)
    if values.dtype.itemsize == 4:
        return values.view(np.uint32).astype(np.uint64)
    return values.astype(np.uint32).astype(np.uint64)


def content_hashes(values: np.ndarray, starts: np.ndarray, ends: np.ndarray, domain: int) -> np.ndarray:
    """128-bit content hash of each window ``values[starts[i]:ends[i]]``, shape ``(windows, 2)``, uint64.

    ``values`` is a flat integer array (token ids, or the uint8 bytes of text); the windows must be non-empty.
    They usually lie back to back (``starts[i + 1] == ends[i]``), as the non-empty rows of an Arrow list or
    string array do; when they do not, their values are gathered first. Equal windows of the same ``domain``
    give equal hashes; see the module notes for the family and its collision probability.
    """
    starts = np.asarray(starts, dtype=np.int64)
    ends = np.asarray(ends, dtype=np.int64)
    lengths = ends - starts
    if len(starts) > 1 and not np.array_equal(starts[1:], ends[:-1]):
        packed = np.zeros(len(starts) + 1, dtype=np.int64)
        np.cumsum(lengths, out=packed[1:])
        values = values[np.arange(packed[-1]) + np.repeat(starts - packed[:-1], lengths)]
        starts, ends = packed[:-1], packed[1:]
    lanes = np.empty((len(starts), _LANES), dtype=np.uint64)
    long = np.flatnonzero(lengths > _KEY_TABLE)
    w0 = 0
    while w0 < len(starts):
        if lengths[w0] > _KEY_TABLE:  # one long window, a piece at a time
            lanes[w0] = 0
            for p0 in range(0, int(lengths[w0]), _HASH_CHUNK):
                piece = _words(values[starts[w0] + p0:min(ends[w0], starts[w0] + p0 + _HASH_CHUNK)])
                lanes[w0] += _position_keys(p0, len(piece)) @ piece
            w0 += 1
            continue
        # Windows w0 .. w1 - 1: at most _HASH_CHUNK words (at least one window), none of them long.
        w1 = int(np.searchsorted(ends, starts[w0] + _HASH_CHUNK, side="right"))
        after = int(np.searchsorted(long, w0))
        w1 = max(w0 + 1, min(w1, int(long[after]) if after < len(long) else len(starts)))
        lo, hi = int(starts[w0]), int(ends[w1 - 1])
        size = lengths[w0:w1]
        words = _words(values[lo:hi])
        longest = int(size.max())
        keys = _position_keys(0, longest)
        if np.all(size == longest):
            lanes[w0:w1] = np.einsum("wl,kl->wk", words.reshape(w1 - w0, longest), keys)
        else:
            position = np.arange(hi - lo, dtype=np.int64) - np.repeat(starts[w0:w1] - lo, size)
            for lane in range(_LANES):
                lanes[w0:w1, lane] = np.add.reduceat(words * keys[lane][position], starts[w0:w1] - lo)
        w0 = w1
    lanes += _CONSTANT_KEYS[:, 0]
    lanes += _CONSTANT_KEYS[:, 1] * (lengths.astype(np.uint64)[:, None] * np.uint64(2) + np.uint64(domain))
    top = lanes >> np.uint64(32)
    return np.column_stack((top[:, 0] << np.uint64(32) | top[:, 1], top[:, 2] << np.uint64(32) | top[:, 3]))


def hex_digest(content: np.ndarray) -> str:
    """A content hash as 32 hex digits (stable across runs: fingerprints of findings use it)."""
    return f"{int(content[0]):016x}{int(content[1]):016x}"


# -- documents of a token stream ---------------------------------------------------------------------------------

#: Odd bases of the two polynomial lanes of :func:`document_hashes` (fixed pseudo-random numbers).
_STREAM_BASES = (0x9FB21C651E98DF25, 0xC2B2AE3D27D4EB4F)
#: Tokens per block of the prefix sums of :func:`document_hashes` (bounds the small power tables).
_STREAM_BLOCK = 1 << 12
#: Tokens per chunk of the products summed (their scratch, 8 bytes a token, stays in a core's cache).
_STREAM_CHUNK = 1 << 15


def _powers(base: int, count: int) -> np.ndarray:
    """``base**0 .. base**(count - 1)`` modulo 2**64."""
    out = np.full(count, base, dtype=np.uint64)
    if count:
        out[0] = 1
        np.multiply.accumulate(out, out=out)
    return out


def _inverse(base: int) -> int:
    """The inverse of an odd number modulo 2**64 (Newton's iteration doubles the correct bits each step)."""
    inv = base
    for _ in range(6):
        inv = (inv * (2 - base * inv)) & 0xFFFF_FFFF_FFFF_FFFF
    return inv


_STREAM_TABLES = [(_powers(b, _STREAM_BLOCK), _powers(_inverse(b), _STREAM_BLOCK),
                   int(_powers(b, _STREAM_BLOCK + 1)[-1]), int(_powers(_inverse(b), _STREAM_BLOCK + 1)[-1]))
                  for b in _STREAM_BASES]


def document_hashes(words: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """128-bit content hash of each document ``words[offsets[i]:offsets[i + 1]]`` of a token stream, shape
    ``(documents, 2)``, uint64: equal token ids, equal hash; stable across runs.

    ``words`` holds the documents' token ids modulo 2**32 as uint32 or uint64 (:func:`corpuscle.kernels.units.as_words`,
    shared with the shingle hashes); the documents lie back to back. Each of two lanes is the polynomial
    ``sum_j m_j * x**j`` modulo 2**64 over the document's words ``m_j``, with its own odd base ``x``, evaluated
    for every document at once from one running sum over the whole stream::

        P[i] = sum_{t < i} m_t * x**t,    lane(doc [s, e)) = (P[e] - P[s]) * x**(-s)

    (odd numbers are invertible modulo 2**64); ``P[e] - P[s]`` is summed directly, over segments that never cross a
    block of :data:`_STREAM_BLOCK` tokens (a multiply and a reduction per token and lane, no gather), and each lane
    is finished with the document's length and ``mix64``. This is a fingerprint, not a universal hash: for
    documents not built against it two different ones share both lanes with probability about 2**-128
    (heuristic), but crafted inputs can collide (polynomial hashing modulo a power of two is weak against
    Thue-Morse-like sequences, from memory).
    Window rows keep :func:`content_hashes`, whose guarantee is stated in the module notes.
    """
    from corpuscle.kernels.minhash import mix64

    offsets = np.asarray(offsets, dtype=np.int64)
    count = len(offsets) - 1
    out = np.empty((count, 2), dtype=np.uint64)
    if count <= 0:
        return out.reshape(0, 2)
    lo, hi = int(offsets[0]), int(offsets[-1])
    size = hi - lo
    block = _STREAM_BLOCK
    blocks = -(-size // block) if size else 1
    whole = size // block  # blocks read in place; the last, partial one is copied into a padded block
    grid = words[lo:lo + whole * block].reshape(whole, block)
    if whole < blocks:
        last = np.zeros((1, block), dtype=np.uint64)
        last[0, :size - whole * block] = words[lo + whole * block:hi]
    bounds = offsets - lo
    b_of, u_of = bounds // block, bounds % block
    lengths = np.diff(offsets).astype(np.uint64)
    # The stream cut at every document start and every block start: each segment lies in one block, so its terms
    # m_t * x**t are x**(jB) (its block's power) times its sum of m_t * x**u (u within the block). A segment's sum
    # is one np.add.reduceat over the products, a document's sum the sum of its segments (a second reduceat): the
    # same numbers modulo 2**64 as the difference of the running sums, P[e] - P[s], without a cumulative sum
    # (which numpy does one element at a time, some ten times slower than a reduction).
    starts = bounds[:-1]
    points = np.union1d(starts[starts < size], np.arange(0, size, block, dtype=np.int64))
    empty = bounds[1:] == starts
    first_segment = np.where(empty, 0, np.searchsorted(points, starts))  # an empty document's sum is set to 0
    segment_block = points // block
    chunk_blocks = max(1, _STREAM_CHUNK // block)
    scratch = np.empty((min(chunk_blocks, blocks), block), dtype=np.uint64)
    # 32-bit words are widened to 64 bits a chunk at a time, once for both lanes.
    wide = np.empty_like(scratch) if words.dtype != np.uint64 else None
    segment_sums = np.zeros((len(_STREAM_TABLES), len(points)), dtype=np.uint64)
    for r0 in range(0, blocks, chunk_blocks):
        r1 = min(blocks, r0 + chunk_blocks)
        a, z = np.searchsorted(points, [r0 * block, r1 * block])
        if a == z:
            continue
        local = scratch[:r1 - r0]
        source = grid[r0:r1] if r1 <= whole else np.concatenate([grid[r0:whole], last])
        if wide is not None:
            wide[:r1 - r0] = source
            source = wide[:r1 - r0]
        cuts = points[a:z] - r0 * block
        for lane, (small, _, _, _) in enumerate(_STREAM_TABLES):
            np.multiply(source, small, out=local)  # m_t * x**u within each block
            segment_sums[lane, a:z] = np.add.reduceat(local.reshape(-1), cuts)
    for lane, (_, inv_small, big, inv_big) in enumerate(_STREAM_TABLES):
        block_pow = _powers(big, blocks + 1)
        if len(points):
            document = np.add.reduceat(segment_sums[lane] * block_pow[segment_block], first_segment)
            document[empty] = 0
        else:
            document = np.zeros(count, dtype=np.uint64)
        inv_pow = inv_small[u_of[:-1]] * _powers(inv_big, blocks + 1)[b_of[:-1]]
        lane_value = document * inv_pow
        lane_value ^= lengths * np.uint64(0x9E3779B97F4A7C15) + np.uint64(lane)
        out[:, lane] = mix64(lane_value)
    return out
