"""Word n-grams for evaluation-set overlap: normalization, hashing, a sorted hash set, and verification of hits.

Normalization (the contamination check of Brown et al. 2020, *Language Models are Few-Shot Learners*, Appendix C,
which looks for n-grams of words shared between an evaluation item and the training data "ignoring all
punctuation, whitespace, and casing" -- quoted from memory)
    A text is lowercased with Arrow's ``utf8_lower`` (Unicode simple case mapping, one code point to one code
    point) and cut into *words*: maximal runs of alphanumeric characters, i.e. of the Unicode classes letter
    (``\\p{L}``) and number (``\\p{N}``). Everything else -- spaces, punctuation, symbols, combining marks,
    underscores -- only separates words. No Unicode normalization is applied (a decomposed "é" is "e" followed by
    a combining mark, which splits the word). ``"Don't stop-believing!"`` is ``don t stop believing``.
    :func:`normalized_words` gives the words of one text in plain Python, for explanations and tests.

N-grams and their hashes
    An n-gram is ``n`` consecutive words of one text; n-grams never cross a text's end. A word is a 64-bit id of
    its UTF-8 bytes ``b_0 .. b_{L-1}`` (``mix64(sum(b_j * POLY**j) ^ L)``, the word id of
    :mod:`corpuscle.kernels.minhash`), and an n-gram ``w_0 .. w_{n-1}`` hashes as::

        h = mix64(KEY_n + sum_j KEY_j * w_j)   (mod 2**64)

    with fixed odd 64-bit keys (:func:`ngram_keys`). Whole arrays of words are hashed with ``n`` shifted
    multiply-adds -- no Python loop per word or per n-gram.

The evaluation set (:class:`NgramSet`)
    Every n-gram of every evaluation item becomes an entry (hash, position of its first word); the entries are
    sorted by hash, and a training n-gram is looked up with :func:`numpy.searchsorted` (binary search). In front of
    the binary search, a bit filter indexed by the top bits of the hash (at least 16 bits per entry, a power of two)
    rules out most training n-grams with one gather: a training n-gram that shares no hash with the set passes it
    with probability at most about 1/16 (the share of bits set), and only those are searched. 12 bytes per entry
    (hash and a 32-bit word index) plus 2 for the filter, plus the items' words (their UTF-8 bytes and 8 bytes of
    offset per word) kept for verification.

Verification
    A hash match is only a candidate: :func:`verify` compares the words of the training n-gram with those of the
    evaluation n-gram byte for byte (vectorized over all candidates of a batch), so a hash collision never becomes
    a finding.
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from corpuscle.kernels.minhash import POLY, mix64, word_ids

#: Characters that make up words: Unicode letters and numbers (RE2 and ``regex`` syntax).
WORD_CLASS = r"\p{L}\p{N}"
_NON_WORD = f"[^{WORD_CLASS}]+"
_MASK64 = (1 << 64) - 1
#: Largest bit filter in front of the sorted hashes (2**30 bits: 128 MiB, for sets of 64M n-grams and more).
FILTER_MAX_BITS = 1 << 30
# N-grams hashed per step of ngram_hashes (bounds its scratch memory to a few MiB).
_HASH_CHUNK = 1 << 18


def normalized_words(text: str) -> list[str]:
    """The words of ``text`` as this module defines them, in plain Python (for messages and tests): lowercase,
    then maximal runs of letters and numbers."""
    import regex  # a dependency of the package: Unicode property classes like RE2's

    return regex.findall(f"[{WORD_CLASS}]+", pc.utf8_lower(pa.array([text])).to_pylist()[0])


@dataclass
class Words:
    """The words of many texts: ``data`` (all words' UTF-8 bytes end to end), ``offsets`` (word ``k`` is
    ``data[offsets[k]:offsets[k + 1]]``), ``ids`` (64-bit word ids) and ``texts`` (text ``i`` holds the words
    ``texts[i]`` .. ``texts[i + 1] - 1``)."""

    data: np.ndarray
    offsets: np.ndarray
    ids: np.ndarray
    texts: np.ndarray

    @property
    def lengths(self) -> np.ndarray:
        return np.diff(self.offsets)

    def __len__(self) -> int:
        return len(self.ids)

    @classmethod
    def empty(cls, texts: int = 0) -> "Words":
        return cls(np.zeros(0, np.uint8), np.zeros(1, np.int64), np.zeros(0, np.uint64),
                   np.zeros(texts + 1, np.int64))


def join_words(parts: list[Words]) -> Words:
    """The words of several :class:`Words` end to end (texts in order)."""
    if not parts:
        return Words.empty(0)
    if len(parts) == 1:
        return parts[0]
    data = np.concatenate([p.data for p in parts])
    word_shift = np.cumsum([0] + [len(p) for p in parts])
    byte_shift = np.cumsum([0] + [int(p.offsets[-1]) for p in parts])
    offsets = np.concatenate([parts[0].offsets[:1]] + [p.offsets[1:] + b for p, b in zip(parts, byte_shift)])
    texts = np.concatenate([parts[0].texts[:1]] + [p.texts[1:] + w for p, w in zip(parts, word_shift)])
    return Words(data, offsets, np.concatenate([p.ids for p in parts]), texts)


def split_words_chunked(texts: pa.Array, chunk: int = 1 << 14) -> Words:
    """:func:`split_words` of a large array ``chunk`` texts at a time (bounds the scratch memory of the split)."""
    return join_words([split_words(texts.slice(lo, chunk)) for lo in range(0, len(texts), chunk)] or
                      [Words.empty(0)])


def split_words(texts) -> Words:
    """The normalized words of every text of ``texts`` (a pyarrow string array or a list of str; None and empty
    texts have no words).

    Texts made only of ASCII characters (for them the word characters are exactly ``[A-Za-z0-9]`` and lowercasing
    is ``A-Z`` to ``a-z``) are split with table lookups over their bytes; the others with Arrow's ``utf8_lower``
    and a regular-expression split. Both give the same words on ASCII text; the words come back in text order."""
    if not isinstance(texts, (pa.Array, pa.ChunkedArray)):
        texts = pa.array(list(texts), type=pa.large_string())
    if isinstance(texts, pa.ChunkedArray):
        texts = texts.combine_chunks()
    texts = texts.cast(pa.large_string())
    if len(texts) == 0:
        return Words.empty(0)
    if texts.null_count:
        texts = pc.fill_null(texts, "")
    ascii_rows = np.asarray(pc.string_is_ascii(texts), dtype=bool)
    if ascii_rows.all():
        return _ascii_words(texts)
    if not ascii_rows.any():
        return _unicode_words(texts)
    fast = np.flatnonzero(ascii_rows)
    slow = np.flatnonzero(~ascii_rows)
    return _interleave([_ascii_words(texts.take(pa.array(fast))), _unicode_words(texts.take(pa.array(slow)))],
                       [fast, slow], len(texts))


#: Byte tables of the ASCII path: which bytes are word characters, and each byte lowercased.
_ASCII_WORD = np.zeros(256, dtype=bool)
_ASCII_WORD[[*range(48, 58), *range(65, 91), *range(97, 123)]] = True
_ASCII_LOWER = np.arange(256, dtype=np.uint8)
_ASCII_LOWER[65:91] += 32


def _ascii_words(texts: pa.Array) -> Words:
    """:func:`split_words` of ASCII-only texts (large_string, no nulls), by table lookups over their bytes."""
    count = len(texts)
    _, offset_buffer, data_buffer = texts.buffers()
    offsets = np.frombuffer(offset_buffer, dtype=np.int64)[texts.offset:texts.offset + count + 1]
    if data_buffer is None or offsets[-1] == offsets[0]:
        return Words.empty(count)
    data = np.frombuffer(data_buffer, dtype=np.uint8)[int(offsets[0]):int(offsets[-1])]
    rel = offsets - offsets[0]
    word = _ASCII_WORD[data]
    first = word.copy()
    first[1:] &= ~word[:-1]
    last = word.copy()
    last[:-1] &= ~word[1:]
    full = np.flatnonzero(rel[1:] > rel[:-1])  # texts with at least one byte: their ends break words
    first[rel[full]] = word[rel[full]]
    last[rel[full + 1] - 1] = word[rel[full + 1] - 1]
    begins = np.flatnonzero(first)
    lengths = np.flatnonzero(last) - begins + 1
    word_offsets = np.zeros(len(begins) + 1, dtype=np.int64)
    np.cumsum(lengths, out=word_offsets[1:])
    compact = _ASCII_LOWER[data[word]]
    owners = np.searchsorted(rel, begins, side="right") - 1
    text_offsets = np.zeros(count + 1, dtype=np.int64)
    np.cumsum(np.bincount(owners, minlength=count), out=text_offsets[1:])
    if len(begins) == 0:
        return Words.empty(count)
    return Words(compact, word_offsets, word_ids(compact, word_offsets), text_offsets)


def _unicode_words(texts: pa.Array) -> Words:
    """:func:`split_words` with Arrow's Unicode kernels (any text)."""
    pieces = pc.split_pattern_regex(pc.utf8_lower(texts), pattern=_NON_WORD)
    words = pc.list_flatten(pieces)
    owners = pc.list_parent_indices(pieces)
    nonempty = pc.greater(pc.binary_length(words), 0)  # a separator at either end leaves an empty piece
    words = words.filter(nonempty).cast(pa.large_string())
    owners = np.asarray(owners.filter(nonempty), dtype=np.int64)
    text_offsets = np.zeros(len(texts) + 1, dtype=np.int64)
    np.cumsum(np.bincount(owners, minlength=len(texts)), out=text_offsets[1:])
    count = len(words)
    if count == 0:
        return Words.empty(len(texts))
    _, offset_buffer, data_buffer = words.buffers()
    raw = np.frombuffer(offset_buffer, dtype=np.int64)[words.offset:words.offset + count + 1]
    offsets = raw - raw[0]
    data = np.frombuffer(data_buffer, dtype=np.uint8)[int(raw[0]):int(raw[-1])]
    return Words(data, offsets, word_ids(data, offsets), text_offsets)


def _interleave(parts: list[Words], rows: list[np.ndarray], count: int) -> Words:
    """One :class:`Words` of ``count`` texts from parts that hold the texts ``rows[i]`` (ascending) each."""
    text_of = np.concatenate([r[np.repeat(np.arange(len(r)), np.diff(p.texts))] for p, r in zip(parts, rows)])
    joined = join_words(parts)
    order = np.argsort(text_of, kind="stable")  # words of one text stay in order
    lengths = joined.lengths[order]
    offsets = np.zeros(len(order) + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    source = joined.offsets[:-1][order]
    data = joined.data[np.repeat(source - offsets[:-1], lengths) + np.arange(int(offsets[-1]), dtype=np.int64)]
    text_offsets = np.zeros(count + 1, dtype=np.int64)
    np.cumsum(np.bincount(text_of, minlength=count), out=text_offsets[1:])
    return Words(data, offsets, joined.ids[order], text_offsets)


def word_id(word: str) -> int:
    """The id of one word in plain Python (what :func:`word_ids` computes)."""
    data = word.encode("utf-8")
    poly, power = 0, 1
    for byte in data:
        poly = (poly + byte * power) & _MASK64
        power = (power * POLY) & _MASK64
    return int(mix64(np.array([poly ^ len(data)], dtype=np.uint64))[0])


def ngram_keys(n: int) -> np.ndarray:
    """The ``n + 1`` fixed odd keys of the n-gram hash: one per position, then one for the length ``n``."""
    z = np.arange(1, n + 2, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15) + np.uint64(n << 32)
    return mix64(z) | np.uint64(1)


def ngram_starts(words: Words, n: int) -> np.ndarray:
    """Indices of the words that start an n-gram (``n`` words of the same text from there), ascending; uint32 when
    the words can be counted in 32 bits (half the memory of a large evaluation set), else int64."""
    counts = np.maximum(np.diff(words.texts) - (n - 1), 0)
    total = int(counts.sum())
    kind = np.uint32 if len(words) < 2 ** 32 else np.int64
    if total == 0:
        return np.zeros(0, dtype=kind)
    firsts = np.cumsum(counts) - counts  # where each text's starts begin in the output
    out = np.arange(total, dtype=np.int64)
    out += np.repeat(words.texts[:-1] - firsts, counts)
    return out.astype(kind)


def ngram_hashes(words: Words, starts: np.ndarray, n: int) -> np.ndarray:
    """The hash of the n-gram starting at each word of ``starts`` (see the module notes), a chunk of starts at a
    time (bounds the scratch memory)."""
    keys = ngram_keys(n)
    out = np.empty(len(starts), dtype=np.uint64)
    for lo in range(0, len(starts), _HASH_CHUNK):
        at = starts[lo:lo + _HASH_CHUNK].astype(np.int64)
        h = np.full(len(at), keys[n], dtype=np.uint64)
        for j in range(n):
            h += words.ids[at + j] * keys[j]
        out[lo:lo + len(at)] = mix64(h)
    return out


def ngram_hash(words: list[str], n: int | None = None) -> int:
    """The hash of one n-gram given as its words, in plain Python over :func:`word_id` (for tests)."""
    n = len(words) if n is None else n
    keys = [int(k) for k in ngram_keys(n)]
    h = keys[n]
    for key, word in zip(keys, words):
        h = (h + key * word_id(word)) & _MASK64
    return int(mix64(np.array([h], dtype=np.uint64))[0])


class NgramSet:
    """The n-grams of a set of texts (the evaluation items), sorted by hash for binary search.

    ``hashes`` (uint64, ascending) and ``starts`` (int64: the first word of each n-gram in ``words``); ``words``
    are the texts' words, kept to verify candidates. Built once per process and shared by every shard it scans.
    """

    def __init__(self, words: Words, n: int, starts: np.ndarray | None = None):
        """The n-grams of ``words``: all of them, or only those starting at ``starts`` (e.g. whole short texts)."""
        self.n = n
        self.words = words
        starts = ngram_starts(words, n) if starts is None else starts
        hashes = ngram_hashes(words, starts, n)
        order = np.argsort(hashes, kind="stable")
        hashes = hashes[order]  # the unsorted arrays are let go one at a time
        self.hashes = hashes
        starts = starts[order]
        self.starts = starts
        del order, hashes, starts
        # A one-hash bit filter on the top bits: most training n-grams are ruled out by one gather, and only those
        # that pass it are binary-searched (at least 16 bits per entry: about 1 in 16 passes by chance, or fewer).
        bits = int(min(FILTER_MAX_BITS, max(16, 1 << int(np.ceil(np.log2(max(1, 16 * len(self.hashes))))))))
        self.shift = np.uint64(64 - int(np.log2(bits)))
        self.filter = np.zeros(bits // 8, dtype=np.uint8)
        for lo in range(0, len(self.hashes), _HASH_CHUNK):
            top = self.hashes[lo:lo + _HASH_CHUNK] >> self.shift
            np.bitwise_or.at(self.filter, (top >> np.uint64(3)).astype(np.int64),
                             (np.uint8(1) << (top & np.uint64(7)).astype(np.uint8)))
        # The word ids were needed for the hashes only; verification reads the words' bytes.
        self.words = Words(words.data, words.offsets, np.zeros(0, np.uint64), words.texts)

    def __len__(self) -> int:
        return len(self.hashes)

    @property
    def nbytes(self) -> int:
        w = self.words
        return int(self.hashes.nbytes + self.starts.nbytes + self.filter.nbytes + w.data.nbytes + w.offsets.nbytes +
                   w.texts.nbytes)

    def text_of(self, word: np.ndarray) -> np.ndarray:
        """The text (item) each word index belongs to."""
        return np.searchsorted(self.words.texts, word, side="right") - 1

    def lookup(self, hashes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Candidates for each of ``hashes``: ``(which, start)`` -- the position in ``hashes`` and the first word of
        a set n-gram with the same hash (one pair per matching entry)."""
        none = np.zeros(0, np.int64), np.zeros(0, np.int64)
        if len(self.hashes) == 0 or len(hashes) == 0:
            return none
        top = hashes >> self.shift
        passed = np.flatnonzero((self.filter[(top >> np.uint64(3)).astype(np.int64)] >>
                                 (top & np.uint64(7)).astype(np.uint8)) & np.uint8(1))
        if len(passed) == 0:
            return none
        lo = np.searchsorted(self.hashes, hashes[passed], side="left")
        found = (lo < len(self.hashes)) & (self.hashes[np.minimum(lo, len(self.hashes) - 1)] == hashes[passed])
        hit, lo = passed[found], lo[found]
        if len(hit) == 0:
            return none
        hi = np.searchsorted(self.hashes, hashes[hit], side="right")
        counts = hi - lo
        which = np.repeat(hit, counts)
        first = np.repeat(lo, counts)
        step = np.arange(len(which)) - np.repeat(np.cumsum(counts) - counts, counts)
        return which, self.starts[first + step].astype(np.int64)


def verify(a: Words, a_starts: np.ndarray, b: Words, b_starts: np.ndarray, n: int) -> np.ndarray:
    """Whether the n words of ``a`` from each of ``a_starts`` equal the n words of ``b`` from the matching
    ``b_starts``, byte for byte (a bool per pair)."""
    pairs = len(a_starts)
    if pairs == 0:
        return np.zeros(0, dtype=bool)
    steps = np.arange(n)
    a_len = a.lengths[a_starts[:, None] + steps]
    b_len = b.lengths[b_starts[:, None] + steps]
    same = (a_len == b_len).all(axis=1)
    idx = np.flatnonzero(same)
    if len(idx) == 0:
        return same
    a_lo, b_lo = a.offsets[a_starts[idx]], b.offsets[b_starts[idx]]
    size = a.offsets[a_starts[idx] + n] - a_lo
    firsts = np.cumsum(size) - size
    position = np.arange(int(size.sum()), dtype=np.int64) - np.repeat(firsts, size)
    differ = a.data[np.repeat(a_lo, size) + position] != b.data[np.repeat(b_lo, size) + position]
    bad = np.add.reduceat(differ.astype(np.int64), firsts) > 0
    same[idx[bad]] = False
    return same


def word_char_offset(text: str, word: int) -> int:
    """The 0-based character offset in ``text`` of its word number ``word`` (-1 when it has fewer words)."""
    import regex

    lowered = pc.utf8_lower(pa.array([text])).to_pylist()[0]  # one code point per code point: offsets hold
    for k, match in enumerate(itertools.islice(regex.finditer(f"[{WORD_CLASS}]+", lowered), word + 1)):
        if k == word:
            return match.start()
    return -1
