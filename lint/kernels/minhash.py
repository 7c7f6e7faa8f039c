"""Shingle hashing and MinHash signatures for many windows at once.

A *window* is a run of token ids (a packed training row, a document) or the
words of one document. Windows arrive the way Arrow stores list columns: one
flat array of values and an offsets array, window ``i`` being
``values[offsets[i]:offsets[i + 1]]``. Everything here is numpy over those flat
arrays, with no Python loop per window, token or shingle.

Shingles
    A shingle is ``n`` consecutive tokens (or words) of one window; shingles
    never cross a window end. A window with fewer than ``n`` tokens, but at
    least one, yields a single shingle made of the whole window, so short
    windows can still be compared. An empty window yields no shingle, and its
    signature is all ``2**32 - 1`` -- the state of a fresh, never-updated
    ``datasketch.MinHash``.

Shingle hash (32 bits), with all arithmetic modulo 2**64::

    mix64(z):  z += 0x9E3779B97F4A7C15
               z ^= z >> 30;  z *= 0xBF58476D1CE4E5B9
               z ^= z >> 27;  z *= 0x94D049BB133111EB
               z ^= z >> 31            (the SplitMix64 output function)
    h = k                              (k = number of ids in the shingle)
    for each id:  h = h * POLY + mix64(id mod 2**64),   POLY = 0xD6E8FEB86659FD93
    shingle hash = mix64(h) >> 32

Ids are taken modulo 2**64, so a negative id hashes as its two's complement.
Each id is mixed before it enters the polynomial, which removes the structured
collisions a plain polynomial has on small integers; starting from ``k`` keeps
a short window distinct from an ``n``-gram that happens to end the same way.
:func:`shingle_hash` computes the same value for one shingle in plain Python
and can be passed to ``datasketch.MinHash`` as its ``hashfunc``.

Words (text windows)
    Text is lowercased with Arrow's ``utf8_lower`` (Unicode simple case
    mapping: ``"İ"`` becomes ``"i"`` and a final capital sigma becomes
    ``"σ"``, where Python's ``str.lower`` gives ``"i̇"`` and ``"ς"``) and cut
    into maximal runs of the characters in :data:`WORD_CLASS`: letters, marks,
    decimal digits, letter numbers and connector punctuation. That is
    ``regex``'s ``\\w`` except for the few symbols that ``\\w`` counts as
    alphabetic (circled letters such as ``"ⓐ"``) and the zero-width joiners.
    A word becomes a 64-bit id from its UTF-8 bytes ``b_0 .. b_{L-1}``::

        poly = sum(b_j * POLY**j)  (mod 2**64);   word id = mix64(poly ^ L)

    and the word ids of a document then go through the token path above.
    :func:`word_id` computes one word's id in plain Python.

MinHash signatures
    :func:`signatures` reproduces ``datasketch.MinHash(num_perm, seed,
    scheme="affine32")`` (datasketch 2.0.0) bit for bit: permutation ``k`` has
    an odd multiplier ``a_k`` and an offset ``b_k`` drawn from
    ``numpy.random.RandomState(seed)``; each 32-bit shingle hash is pre-mixed
    with the MurmurHash3 32-bit finalizer and mapped to
    ``(a_k * fmix32(h) + b_k) mod 2**32``; the signature keeps the minimum over
    the window's shingles for every ``k``.
"""

from __future__ import annotations

import operator
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

DEFAULT_N = 5
DEFAULT_NUM_PERM = 128
DEFAULT_SEED = 1
DEFAULT_CHUNK = 1 << 14
"""Shingles hashed per step of :func:`signatures`; bounds its scratch memory."""

EMPTY_VALUE = np.uint32(0xFFFFFFFF)
"""Signature value of a permutation that saw no shingle (an empty window)."""

WORD_CLASS = r"\p{L}\p{M}\p{Nd}\p{Nl}\p{Pc}"
"""Unicode classes of word characters, in syntax shared by RE2 and ``regex``."""

POLY = 0xD6E8FEB86659FD93
"""Odd multiplier of the polynomial hashes (shingles, words)."""

_MASK64 = (1 << 64) - 1
_GAMMA = 0x9E3779B97F4A7C15
_MIX1 = 0xBF58476D1CE4E5B9
_MIX2 = 0x94D049BB133111EB

# Permutations per block of the signature loop: a block of 16 permutations
# times DEFAULT_CHUNK shingles is 1 MiB of uint32, which stays in a core's L2
# cache while the multiply, the add and the per-window minimum pass over it.
_PERM_BLOCK = 16
# Tokens of the windows hashed per group in shingle_hashes: 64Ki tokens make about 1.5 MiB of scratch.
_SHINGLE_TOKENS = 1 << 16
# UTF-8 bytes of words hashed per step of the text path (bounds scratch memory).
_WORD_CHUNK_BYTES = 1 << 22
_NON_WORD = f"[^{WORD_CLASS}]+"


@dataclass(frozen=True)
class MinHashSettings:
    """Validated MinHash parameters: permutations, shingle size and seed.

    ``num_perm`` is the signature length (more permutations, smaller
    estimation error: the standard error of an estimated Jaccard similarity
    ``s`` is ``sqrt(s * (1 - s) / num_perm)``); ``n`` the tokens or words per
    shingle; ``seed`` chooses the permutations, and only signatures made with
    the same seed and ``num_perm`` can be compared.
    """

    num_perm: int = DEFAULT_NUM_PERM
    n: int = DEFAULT_N
    seed: int = DEFAULT_SEED

    def __post_init__(self) -> None:
        _check_num_perm(self.num_perm)
        _check_n(self.n)
        _check_seed(self.seed)


def _shingle_layout(offsets: np.ndarray, n: int):
    """Per window: its length, its number of shingles (a window shorter than ``n`` is one shingle, an empty one
    none), where its shingles start in the output, and the cuts into groups of whole windows (a cut at the first
    window starting at or after each multiple of :data:`_SHINGLE_TOKENS` tokens)."""
    lengths = np.diff(offsets)
    counts = np.where(lengths >= n, lengths - n + 1, (lengths > 0).astype(np.int64))
    shingle_offsets = np.zeros(len(lengths) + 1, dtype=np.int64)
    np.cumsum(counts, out=shingle_offsets[1:])
    first = int(offsets[0])
    marks = first + np.arange(_SHINGLE_TOKENS, int(offsets[-1]) - first, _SHINGLE_TOKENS)
    cuts = np.unique(np.concatenate(([0], np.searchsorted(offsets, marks), [len(lengths)])))
    return lengths, counts, shingle_offsets, cuts


def shingle_hashes(values, offsets, n: int = DEFAULT_N, mixed=None) -> tuple[np.ndarray, np.ndarray]:
    """Hash every ``n``-token shingle of many windows.

    ``values`` is a flat 1-D integer array of token ids and ``offsets`` an
    integer array with one entry more than there are windows. Returns
    ``(hashes, shingle_offsets)``: the uint32 shingle hashes of all windows,
    flat and in window order, and int64 offsets with ``hashes[shingle_offsets[i]:
    shingle_offsets[i + 1]]`` belonging to window ``i``. A window of length
    ``L >= n`` has ``L - n + 1`` shingles, a window of ``1 <= L < n`` one
    shingle of the whole window, an empty window none. The windows are hashed
    in groups of about :data:`_SHINGLE_TOKENS` tokens, so the scratch arrays
    (about 24 bytes per token of a group) stay in a core's cache: on a batch of
    millions of tokens, numpy passes over whole arrays would be bound by memory
    bandwidth, which the processes of a parallel scan share. ``mixed``, when
    given, is ``mix64`` of ``values`` as uint64 (computed once and shared with
    the content hash of documents); the result is the same.
    """
    _check_n(n)
    values = np.asarray(values)
    if values.ndim != 1 or values.dtype.kind not in "iu":
        raise TypeError(
            f"values must be a 1-D integer array of token ids, got {values.ndim}-D {values.dtype}; "
            "hint: pass the flat values of the list column"
        )
    offsets = _check_offsets(offsets, len(values), "offsets")
    lengths, counts, shingle_offsets, cuts = _shingle_layout(offsets, n)
    hashes = np.empty(int(shingle_offsets[-1]), dtype=np.uint32)
    for w0, w1 in zip(cuts[:-1].tolist(), cuts[1:].tolist()):
        _shingle_group(values, offsets[w0:w1 + 1], lengths[w0:w1], counts[w0:w1], n,
                       hashes[shingle_offsets[w0]:shingle_offsets[w1]], mixed)
    return hashes, shingle_offsets


def _shingle_group(values, offsets, lengths, counts, n: int, out: np.ndarray, mixed=None) -> None:
    """The shingle hashes of consecutive windows (``offsets`` into ``values``), written to ``out``."""
    first = int(offsets[0])
    if mixed is not None:
        tokens = mixed[first : int(offsets[-1])]
    else:
        tokens = mix64(values[first : int(offsets[-1])].astype(np.uint64))
    is_long = lengths >= n
    is_short = (lengths > 0) & ~is_long
    local = np.zeros(len(lengths) + 1, dtype=np.int64)
    np.cumsum(counts, out=local[1:])

    if is_long.any():
        starts = len(tokens) - n + 1
        full = np.full(starts, n, dtype=np.uint64)
        for k in range(n):
            full *= np.uint64(POLY)
            full += tokens[k : k + starts]
        # Position p starts a shingle of its own window when p + n <= window end:
        # the first L - n + 1 positions of each long window, none of a short one.
        inside = np.where(is_long, counts, 0)
        pattern = np.tile(np.array([True, False]), len(lengths))
        valid = np.repeat(pattern, np.column_stack((inside, lengths - inside)).ravel())
        out[np.repeat(is_long, counts)] = _finish(full[valid[:starts]])

    if is_short.any():
        short = np.flatnonzero(is_short)
        start = offsets[short] - first
        size = lengths[short]
        partial = size.astype(np.uint64)
        for k in range(n - 1):
            live = size > k
            partial[live] = partial[live] * np.uint64(POLY) + tokens[start[live] + k]
        out[local[short]] = _finish(partial)


#: Keys of :func:`multilinear_shingle_hashes`: one per token position of a shingle, then one per shingle length.
_SHINGLE_KEY_SEED = 0x51A6_1E5E_ED00_C0DE


@lru_cache(maxsize=16)
def fixed_keys(count: int, seed: int) -> np.ndarray:
    """``count`` fixed pseudo-random 64-bit keys, ``mix64(i ^ seed)`` for ``i`` in ``0 .. count - 1`` (read-only,
    cached): the multipliers of the multilinear hashes here and in :mod:`corpuscle.kernels.lsh`."""
    keys = mix64(np.arange(count, dtype=np.uint64) ^ np.uint64(seed))
    keys.flags.writeable = False
    return keys


@lru_cache(maxsize=8)
def _multilinear_keys(n: int) -> np.ndarray:
    """The 32-bit keys of :func:`multilinear_shingle_hashes`: the top halves of :func:`fixed_keys`."""
    keys = (fixed_keys(2 * n + 1, _SHINGLE_KEY_SEED) >> np.uint64(32)).astype(np.uint32)
    keys.flags.writeable = False
    return keys


def multilinear_shingle_hashes(words, offsets, n: int = DEFAULT_N) -> tuple[np.ndarray, np.ndarray]:
    """Hash every ``n``-token shingle of many windows with one multiplication per token of a shingle: the
    shingle hashes of token documents (:mod:`corpuscle.kernels.units`), where they are made for every token of a
    corpus and verified exactly afterwards.

    ``words`` are the token ids modulo 2**32 as uint32 (:func:`corpuscle.kernels.units.as_words`; uint64 is taken
    modulo 2**32), ``offsets`` as for :func:`shingle_hashes`, and the windowing is the same (a window shorter than
    ``n`` is one shingle of all its tokens). A shingle ``s_0 .. s_{L-1}`` (L = n, or the length of a short window)
    hashes to::

        k_{n + L} + sum_j k_j * s_j   (mod 2**32)

    with fixed pseudo-random 32-bit keys ``k`` (the top halves of ``mix64`` of fixed inputs): multilinear hashing
    modulo 2**32, all in 32-bit arithmetic (numpy multiplies 32-bit integers about twice as fast as 64-bit ones, and
    the words need no widening). For keys drawn at random, two different shingles collide with probability at most
    ``2**(z - 32)``, where ``z`` is the least number of trailing zero bits among their nonzero differences per
    position: 2**-32 when some position differs by an odd amount, about 2**-28 averaged over random ids (from
    memory: the multilinear family modulo a power of two). Its low bits follow the ids' low bits linearly; what uses
    the hashes only compares them, takes those under a threshold (the top bits) or mixes them first
    (:func:`signatures`). Not the hash family of :func:`shingle_hash` (which mixes every token first and is what
    datasketch is fed in the tests): cheaper, and used where no signature is compared with datasketch's.
    """
    hashes, shingle_offsets, _, _ = _multilinear(words, offsets, n, None)
    return hashes, shingle_offsets


def sampled_shingle_hashes(words, offsets, n: int, rate: int,
                           least: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`multilinear_shingle_hashes` and :func:`sample_shingles` of its result in one pass:
    ``(hashes, shingle_offsets, sampled, sample_offsets)``, the same arrays as the two calls give. The sample is
    taken group by group while a group's hashes are still in the cache, which saves a pass over every hash."""
    return _multilinear(words, offsets, n, (rate, least))


def _multilinear(words, offsets, n: int, sample: tuple[int, int] | None):
    _check_n(n)
    words = np.asarray(words)
    if words.ndim != 1 or words.dtype not in (np.uint32, np.uint64):
        raise TypeError("words must be a 1-D uint32 or uint64 array of token ids modulo 2**32; hint: Units.words")
    if words.dtype != np.uint32:
        words = words.astype(np.uint32)  # modulo 2**32
    offsets = _check_offsets(offsets, len(words), "offsets")
    keys = _multilinear_keys(n)
    lengths, counts, shingle_offsets, cuts = _shingle_layout(offsets, n)
    hashes = np.empty(int(shingle_offsets[-1]), dtype=np.uint32)
    widest = int(np.max(offsets[cuts[1:]] - offsets[cuts[:-1]])) if len(cuts) > 1 else 0
    scratch = np.empty((2, widest), dtype=np.uint32)  # the sums and the products of a group
    steps = np.arange(1, n, dtype=np.int64)
    highest = None if sample is None or sample[0] <= 1 else _sample_limits(counts, *sample)
    taken = []  # per group: the sampled hashes' positions in ``hashes``
    for w0, w1 in zip(cuts[:-1].tolist(), cuts[1:].tolist()):
        lo, hi = int(offsets[w0]), int(offsets[w1])
        group, size, count = words[lo:hi], lengths[w0:w1], counts[w0:w1]
        base = int(shingle_offsets[w0])
        out = hashes[base:int(shingle_offsets[w1])]
        is_long = size >= n
        short = np.flatnonzero((size > 0) & ~is_long)
        if is_long.any():
            starts = len(group) - n + 1
            full = np.multiply(group[:starts], keys[0], out=scratch[0][:starts])
            term = scratch[1][:starts]
            for k in range(1, n):
                full += np.multiply(group[k:k + starts], keys[k], out=term)
            full += keys[2 * n]
            # The shingles that run over the end of a unit (the n - 1 positions before each unit's end, which
            # also cover every position of a short unit) are not shingles of any unit: left out.
            valid = np.ones(starts, dtype=bool)
            crossing = (np.cumsum(size)[:, None] - steps).ravel()
            valid[crossing[(crossing >= 0) & (crossing < starts)]] = False
            if len(short):
                out[np.repeat(is_long, count)] = full[valid]
            else:
                out[:] = full[valid]
        if len(short):
            local = np.zeros(len(size) + 1, dtype=np.int64)
            np.cumsum(count, out=local[1:])
            start = offsets[w0:w1][short] - lo
            length = size[short]
            partial = keys[n + length].copy()
            for k in range(n - 1):
                live = length > k
                partial[live] += group[start[live] + k] * keys[k]
            out[local[short]] = partial
        if highest is not None:
            taken.append(np.flatnonzero(out <= np.repeat(highest[w0:w1], count)) + base)
    if sample is None:
        return hashes, shingle_offsets, None, None
    if highest is None:
        return hashes, shingle_offsets, hashes, shingle_offsets
    taken = np.concatenate(taken) if taken else np.zeros(0, dtype=np.int64)
    return hashes, shingle_offsets, hashes[taken], np.searchsorted(taken, shingle_offsets).astype(np.int64)


def _sample_limits(counts: np.ndarray, rate: int, least: int) -> np.ndarray:
    """Per window of ``counts`` shingles, the highest hash its sample takes (see :func:`sample_shingles`)."""
    share = np.maximum(1.0 / rate, least / np.maximum(counts, 1))
    return (np.minimum(np.floor(share * 2.0 ** 32), 2.0 ** 32) - 1).astype(np.uint32)  # hash < limit


def sample_shingles(hashes, shingle_offsets, rate: int, least: int) -> tuple[np.ndarray, np.ndarray]:
    """The shingles a MinHash signature is made from when only a sample of them is used: in a window of ``c``
    shingles, those whose hash is below ``2**32 * max(1 / rate, least / c)`` -- one in ``rate`` of a long
    window's shingles, about ``least`` of a shorter one, every shingle of a window of at most ``least``.
    ``rate`` 1 takes every shingle. Returns ``(hashes, shingle_offsets)`` of the sample, windows as given.

    The sample is consistent: a shingle is taken or left by its hash value alone (under a threshold that depends
    only on the window's size), so two windows whose shingle sets have Jaccard similarity ``s`` have samples of
    about that similarity -- exactly so in expectation when both are long or of the same size; when a short window
    meets one of another size, the thresholds differ by the ratio of their sizes and the samples' similarity is
    about ``s`` times that ratio (a near copy made by small edits has nearly the same size). The sample serves the
    search for candidates only; candidates are verified on the full shingle sets.
    """
    hashes = _as_uint32(hashes)
    shingle_offsets = _check_offsets(shingle_offsets, len(hashes), "shingle_offsets")
    if rate <= 1:
        return hashes, shingle_offsets
    lo = int(shingle_offsets[0])
    local = shingle_offsets - lo
    view = hashes[lo:int(shingle_offsets[-1])]
    counts = np.diff(local)
    highest = _sample_limits(counts, rate, least)
    # The positions taken, and per window the count of them before its start (a search among the few taken
    # positions, rather than a sum over every shingle).
    taken = np.flatnonzero(view <= np.repeat(highest, counts))
    return view[taken], np.searchsorted(taken, local).astype(np.int64)


def shingle_hash(shingle) -> int:
    """The 32-bit hash of one shingle, identical to :func:`shingle_hashes`.

    ``shingle`` is a sequence of token ids (a tuple, list or 1-D numpy array),
    or of words (``str`` or UTF-8 ``bytes``, each turned into its id with
    :func:`word_id`, without lowercasing). Made to serve as the ``hashfunc`` of
    ``datasketch.MinHash``, fed one shingle tuple per update.
    """
    h = len(shingle)
    for item in shingle:
        if isinstance(item, (str, bytes)):
            item = word_id(item)
        h = (h * POLY + _mix64_int(int(item) & _MASK64)) & _MASK64
    return _mix64_int(h) >> 32


def word_id(word: str | bytes) -> int:
    """The 64-bit id of one word: ``mix64(sum(b_j * POLY**j) ^ L)`` over its UTF-8 bytes."""
    data = word.encode("utf-8") if isinstance(word, str) else bytes(word)
    poly, power = 0, 1
    for byte in data:
        poly = (poly + byte * power) & _MASK64
        power = (power * POLY) & _MASK64
    return _mix64_int(poly ^ len(data))


def word_shingle_hashes(texts, n: int = DEFAULT_N) -> tuple[np.ndarray, np.ndarray]:
    """Hash every ``n``-word shingle of many documents.

    ``texts`` is a list of ``str`` (``None`` allowed) or a pyarrow string
    array (plain, large or chunked). Each document is lowercased, cut into
    words and its word ids are shingled as by :func:`shingle_hashes`; a null,
    empty or word-free document is an empty window. Returns ``(hashes,
    shingle_offsets)`` with one window per document.
    """
    _check_n(n)
    documents = _as_text_array(texts)
    pieces = pc.split_pattern_regex(pc.utf8_lower(documents), pattern=_NON_WORD)
    words = pc.list_flatten(pieces)
    owners = pc.list_parent_indices(pieces)
    # Text that starts or ends with a separator leaves an empty piece behind.
    nonempty = pc.greater(pc.binary_length(words), 0)
    words = words.filter(nonempty)
    owners = np.asarray(owners.filter(nonempty), dtype=np.int64)
    word_offsets = np.zeros(len(documents) + 1, dtype=np.int64)
    np.cumsum(np.bincount(owners, minlength=len(documents)), out=word_offsets[1:])
    return shingle_hashes(_word_ids(words), word_offsets, n)


def permutations(num_perm: int = DEFAULT_NUM_PERM, seed: int = DEFAULT_SEED) -> tuple[np.ndarray, np.ndarray]:
    """The ``(a, b)`` uint32 parameters of datasketch's ``affine32`` permutations.

    Drawn exactly as datasketch 2.0.0 draws them: from
    ``numpy.random.RandomState(seed)``, first ``a = 2 * randint(0, 2**31) + 1``
    (odd, so ``h -> a * h + b mod 2**32`` is a bijection), then
    ``b = randint(0, 2**32)``, ``num_perm`` of each. Read-only, cached.
    """
    _check_num_perm(num_perm)
    _check_seed(seed)
    return _permutations(int(num_perm), int(seed))


def signatures(
    hashes,
    shingle_offsets,
    num_perm: int = DEFAULT_NUM_PERM,
    seed: int = DEFAULT_SEED,
    chunk: int = DEFAULT_CHUNK,
) -> np.ndarray:
    """MinHash signatures of many windows, shape ``(windows, num_perm)``, uint32.

    ``hashes`` and ``shingle_offsets`` are as returned by
    :func:`shingle_hashes`. Row ``i`` equals the ``hashvalues`` of
    ``datasketch.MinHash(num_perm=num_perm, seed=seed, hashfunc=shingle_hash,
    scheme="affine32")`` after ``update_batch`` with window ``i``'s shingles;
    a window without shingles keeps every value at :data:`EMPTY_VALUE`.
    At most ``chunk`` shingles are processed at a time, which bounds the
    scratch memory to about ``64 * chunk`` bytes (a window may span chunks).
    """
    _check_num_perm(num_perm)
    _check_seed(seed)
    chunk = _check_int("chunk", chunk, 1, "a few tens of thousands of shingles keeps the work in cache")
    hashes = _as_uint32(hashes)
    shingle_offsets = _check_offsets(shingle_offsets, len(hashes), "shingle_offsets")
    a, b = _permutations(int(num_perm), int(seed))

    result = np.full((len(shingle_offsets) - 1, num_perm), EMPTY_VALUE, dtype=np.uint32)
    windows = np.flatnonzero(shingle_offsets[1:] > shingle_offsets[:-1])
    if len(windows) == 0:
        return result
    starts = shingle_offsets[windows]
    ends = shingle_offsets[windows + 1]
    # Permutation-major scratch: each row is one permutation applied to a run
    # of shingles, so every numpy call below walks long contiguous rows.
    minima = np.full((num_perm, len(windows)), EMPTY_VALUE, dtype=np.uint32)
    first, last = int(shingle_offsets[0]), int(shingle_offsets[-1])
    block = np.empty((min(_PERM_BLOCK, num_perm), min(chunk, last - first)), dtype=np.uint32)
    for lo in range(first, last, chunk):
        hi = min(lo + chunk, last)
        # Non-empty windows tile [first, last), so those meeting [lo, hi) are
        # consecutive; the first may have started in an earlier chunk.
        w0 = int(np.searchsorted(ends, lo, side="right"))
        w1 = int(np.searchsorted(starts, hi, side="left"))
        cuts = np.maximum(starts[w0:w1], lo) - lo
        mixed = _fmix32(hashes[lo:hi])
        for p0 in range(0, num_perm, _PERM_BLOCK):
            p1 = min(p0 + _PERM_BLOCK, num_perm)
            values = block[: p1 - p0, : hi - lo]
            np.multiply(a[p0:p1, None], mixed, out=values)
            np.add(values, b[p0:p1, None], out=values)
            seen = minima[p0:p1, w0:w1]
            np.minimum(seen, np.minimum.reduceat(values, cuts, axis=1), out=seen)
    result[windows] = minima.T
    return result


# --- validation ---------------------------------------------------------------


def _check_int(name: str, value, minimum: int, hint: str, maximum: int | None = None) -> int:
    if isinstance(value, bool):
        raise TypeError(f"{name} must be an integer, got {value!r}; hint: {hint}")
    try:
        number = operator.index(value)
    except TypeError:
        raise TypeError(f"{name} must be an integer, got {value!r}; hint: {hint}") from None
    if number < minimum or (maximum is not None and number > maximum):
        bounds = f"at least {minimum}" if maximum is None else f"between {minimum} and {maximum}"
        raise ValueError(f"{name} must be {bounds}, got {number}; hint: {hint}")
    return number


#: Upper bounds that keep a scan's memory and time sane: a signature is 4 bytes a permutation per window, and every
#: window shorter than ``n`` is one shingle.
MAX_NUM_PERM = 4096
MAX_N = 256


def _check_num_perm(num_perm) -> int:
    return _check_int("num_perm", num_perm, 1, "128 permutations is the usual choice", maximum=MAX_NUM_PERM)


def _check_n(n) -> int:
    return _check_int("n", n, 1, "shingles of 5 tokens or words are the usual choice", maximum=MAX_N)


def _check_seed(seed) -> int:
    return _check_int("seed", seed, 0, "use the same seed for every shard, e.g. 1", maximum=(1 << 32) - 1)


def _check_offsets(offsets, size: int, name: str) -> np.ndarray:
    offsets = np.asarray(offsets)
    if offsets.ndim != 1 or offsets.dtype.kind not in "iu" or len(offsets) == 0:
        raise TypeError(
            f"{name} must be a 1-D integer array with one entry more than there are windows; "
            "hint: an empty batch has offsets [0]"
        )
    offsets = offsets.astype(np.int64)
    if offsets[0] < 0 or offsets[-1] > size or np.any(offsets[1:] < offsets[:-1]):
        raise ValueError(
            f"{name} must rise from 0 or more to at most {size} without ever decreasing; "
            "hint: pass the offsets that belong to these values"
        )
    return offsets


def _as_uint32(hashes) -> np.ndarray:
    hashes = np.asarray(hashes)
    if hashes.ndim != 1 or hashes.dtype.kind not in "iu":
        raise TypeError("hashes must be a 1-D integer array; hint: pass the first result of shingle_hashes")
    if hashes.dtype == np.uint32:
        return hashes
    if len(hashes) and (hashes.min() < 0 or hashes.max() > 0xFFFFFFFF):
        raise ValueError("hashes must fit in 32 bits; hint: pass the first result of shingle_hashes")
    return hashes.astype(np.uint32)


def _as_text_array(texts) -> pa.Array:
    try:
        if isinstance(texts, pa.ChunkedArray):
            texts = texts.cast(pa.large_string()).combine_chunks()
        elif isinstance(texts, pa.Array):
            texts = texts.cast(pa.large_string())
        else:
            texts = pa.array(list(texts), type=pa.large_string())
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError, TypeError) as error:
        raise TypeError(
            f"texts must be strings (None for a missing document): {error}; hint: pass the text column of the batch"
        ) from None
    return texts


# --- hashing kernels ----------------------------------------------------------


def mix64(z: np.ndarray) -> np.ndarray:
    """Apply mix64 (see the module notes) to a uint64 array in place and return it.

    A fixed bijection of 64-bit values that spreads every input bit over
    every output bit; shared with the band keys of :mod:`corpuscle.kernels.lsh`.
    """
    z += np.uint64(_GAMMA)
    z ^= z >> np.uint64(30)
    z *= np.uint64(_MIX1)
    z ^= z >> np.uint64(27)
    z *= np.uint64(_MIX2)
    z ^= z >> np.uint64(31)
    return z


def _mix64_int(z: int) -> int:
    z = (z + _GAMMA) & _MASK64
    z = ((z ^ (z >> 30)) * _MIX1) & _MASK64
    z = ((z ^ (z >> 27)) * _MIX2) & _MASK64
    return z ^ (z >> 31)


def _finish(h: np.ndarray) -> np.ndarray:
    return (mix64(h) >> np.uint64(32)).astype(np.uint32)


def _fmix32(h: np.ndarray) -> np.ndarray:
    """MurmurHash3's 32-bit finalizer, as datasketch's affine32 scheme applies it."""
    h = h ^ (h >> np.uint32(16))
    h *= np.uint32(0x85EBCA6B)
    h ^= h >> np.uint32(13)
    h *= np.uint32(0xC2B2AE35)
    h ^= h >> np.uint32(16)
    return h


@lru_cache(maxsize=16)
def _permutations(num_perm: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    generator = np.random.RandomState(seed)
    a = generator.randint(0, 1 << 31, num_perm, dtype=np.uint32) * np.uint32(2) + np.uint32(1)
    b = generator.randint(0, 1 << 32, num_perm, dtype=np.uint32)
    a.flags.writeable = False
    b.flags.writeable = False
    return a, b


def _word_ids(words: pa.Array) -> np.ndarray:
    """Word ids of a large_string array without nulls or empty strings."""
    if len(words) == 0:
        return np.empty(0, dtype=np.uint64)
    _, offset_buffer, data_buffer = words.buffers()
    offsets = np.frombuffer(offset_buffer, dtype=np.int64)[words.offset : words.offset + len(words) + 1]
    return word_ids(np.frombuffer(data_buffer, dtype=np.uint8), offsets)


def word_ids(data: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """64-bit ids of the words ``data[offsets[k]:offsets[k + 1]]`` (none empty): ``mix64(sum(b_j * POLY**j) ^
    L)`` over each word's bytes, a chunk of :data:`_WORD_CHUNK_BYTES` bytes of words at a time."""
    count = len(offsets) - 1
    ids = np.empty(count, dtype=np.uint64)
    w0 = 0
    while w0 < count:
        limit = offsets[w0] + _WORD_CHUNK_BYTES
        w1 = min(count, max(w0 + 1, int(np.searchsorted(offsets, limit, side="right")) - 1))
        lo, hi = int(offsets[w0]), int(offsets[w1])
        starts = offsets[w0:w1] - lo
        lengths = np.diff(offsets[w0 : w1 + 1])
        position = np.arange(hi - lo) - np.repeat(starts, lengths)
        powers = np.full(int(lengths.max()), POLY, dtype=np.uint64)
        powers[0] = 1
        np.multiply.accumulate(powers, out=powers)
        terms = data[lo:hi].astype(np.uint64)
        terms *= powers[position]
        poly = np.add.reduceat(terms, starts)
        poly ^= lengths.astype(np.uint64)
        ids[w0:w1] = mix64(poly)
        w0 = w1
    return ids
