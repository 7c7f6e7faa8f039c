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
    sorted by hash, and a training n-gram is looked up with :func:`numpy.searchsorted` (binary search). 16 bytes per
    entry, plus the items' words (their UTF-8 bytes and 8 bytes of offset per word) kept for verification.

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
from corpuscle.kernels.minhash import POLY, mix64

#: Characters that make up words: Unicode letters and numbers (RE2 and ``regex`` syntax).
WORD_CLASS = r"\p{L}\p{N}"
_NON_WORD = f"[^{WORD_CLASS}]+"
_MASK64 = (1 << 64) - 1
# UTF-8 bytes of words hashed per step (bounds scratch memory).
_WORD_CHUNK_BYTES = 1 << 22


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


def split_words(texts) -> Words:
    """The normalized words of every text of ``texts`` (a pyarrow string array or a list of str; None and empty
    texts have no words)."""
    if not isinstance(texts, (pa.Array, pa.ChunkedArray)):
        texts = pa.array(list(texts), type=pa.large_string())
    if isinstance(texts, pa.ChunkedArray):
        texts = texts.combine_chunks()
    texts = texts.cast(pa.large_string())
    if len(texts) == 0:
        return Words.empty(0)
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
    words = pa.concat_arrays([words])  # a fresh array: offsets start at 0, data holds exactly these words
    _, offset_buffer, data_buffer = words.buffers()
    offsets = np.frombuffer(offset_buffer, dtype=np.int64)[words.offset:words.offset + count + 1]
    data = np.frombuffer(data_buffer, dtype=np.uint8)
    offsets = offsets - offsets[0]
    data = data[int(np.frombuffer(offset_buffer, dtype=np.int64)[words.offset]):][:int(offsets[-1])]
    return Words(data, offsets, word_ids(data, offsets), text_offsets)


def word_ids(data: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """64-bit ids of the words ``data[offsets[k]:offsets[k + 1]]`` (none empty): ``mix64(sum(b_j * POLY**j) ^
    L)`` over each word's bytes, a chunk of words at a time."""
    count = len(offsets) - 1
    ids = np.empty(count, dtype=np.uint64)
    w0 = 0
    while w0 < count:
        limit = offsets[w0] + _WORD_CHUNK_BYTES
        w1 = min(count, max(w0 + 1, int(np.searchsorted(offsets, limit, side="right")) - 1))
        lo, hi = int(offsets[w0]), int(offsets[w1])
        starts = offsets[w0:w1] - lo
        lengths = np.diff(offsets[w0:w1 + 1])
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
    """Indices of the words that start an n-gram (``n`` words of the same text from there), ascending."""
    lengths = np.diff(words.texts)
    ends = np.repeat(words.texts[1:], lengths)  # each word's text end
    return np.flatnonzero(np.arange(len(words), dtype=np.int64) + n <= ends)


def ngram_hashes(words: Words, starts: np.ndarray, n: int) -> np.ndarray:
    """The hash of the n-gram starting at each word of ``starts`` (see the module notes)."""
    keys = ngram_keys(n)
    h = np.full(len(starts), keys[n], dtype=np.uint64)
    for j in range(n):
        h += words.ids[starts + j] * keys[j]
    return mix64(h)


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

    def __init__(self, words: Words, n: int):
        self.n = n
        self.words = words
        starts = ngram_starts(words, n)
        hashes = ngram_hashes(words, starts, n)
        order = np.argsort(hashes, kind="stable")
        self.hashes = hashes[order]
        self.starts = starts[order]

    def __len__(self) -> int:
        return len(self.hashes)

    @property
    def nbytes(self) -> int:
        w = self.words
        return int(self.hashes.nbytes + self.starts.nbytes + w.data.nbytes + w.offsets.nbytes + w.ids.nbytes +
                   w.texts.nbytes)

    def text_of(self, word: np.ndarray) -> np.ndarray:
        """The text (item) each word index belongs to."""
        return np.searchsorted(self.words.texts, word, side="right") - 1

    def lookup(self, hashes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Candidates for each of ``hashes``: ``(which, start)`` -- the position in ``hashes`` and the first word of
        a set n-gram with the same hash (one pair per matching entry)."""
        if len(self.hashes) == 0 or len(hashes) == 0:
            return np.zeros(0, np.int64), np.zeros(0, np.int64)
        lo = np.searchsorted(self.hashes, hashes, side="left")
        hit = np.flatnonzero((lo < len(self.hashes)) & (self.hashes[np.minimum(lo, len(self.hashes) - 1)] == hashes))
        if len(hit) == 0:
            return np.zeros(0, np.int64), np.zeros(0, np.int64)
        hi = np.searchsorted(self.hashes, hashes[hit], side="right")
        counts = hi - lo[hit]
        which = np.repeat(hit, counts)
        first = np.repeat(lo[hit], counts)
        step = np.arange(len(which)) - np.repeat(np.cumsum(counts) - counts, counts)
        return which, self.starts[first + step]


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
