"""Tests of corpuscle.kernels.minhash: shingle hashing and MinHash signatures.

Reference library: datasketch 2.0.0 (``datasketch.MinHash`` with the
``affine32`` scheme), fed the same shingles one tuple at a time with
``update_batch``; the text path is checked against ``regex`` (word split) and
pyarrow (``utf8_lower``).
"""

from __future__ import annotations

import unicodedata

import corpuscle.kernels.minhash as minhash
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest
import regex
from corpuscle.kernels.minhash import (
    EMPTY_VALUE,
    WORD_CLASS,
    MinHashSettings,
    permutations,
    shingle_hash,
    shingle_hashes,
    signatures,
    word_id,
    word_shingle_hashes,
)
from datasketch import MinHash

MASK64 = (1 << 64) - 1


def python_shingles(window: list, n: int) -> list[tuple]:
    """Shingles of one window in plain Python: n-grams, or the whole window if shorter."""
    if len(window) >= n:
        return [tuple(window[i : i + n]) for i in range(len(window) - n + 1)]
    return [tuple(window)] if window else []


def datasketch_signature(shingles: list[tuple], num_perm: int, seed: int) -> np.ndarray:
    """Reference: datasketch.MinHash (affine32 scheme) with shingle_hash as its hashfunc."""
    sketch = MinHash(num_perm=num_perm, seed=seed, hashfunc=shingle_hash, scheme="affine32")
    sketch.update_batch(shingles)
    return sketch.hashvalues


def random_windows(rng, lengths, low, high, dtype):
    values = rng.integers(low, high, int(np.sum(lengths)), dtype=dtype)
    offsets = np.concatenate(([0], np.cumsum(lengths))).astype(np.int64)
    return values, offsets


def varied_lengths(rng, n: int, count: int) -> np.ndarray:
    """Window lengths covering 0, 1, n - 1, n, n + 1 and longer windows."""
    special = [0, 1, max(n - 1, 0), n, n + 1, 0, 0, 2 * n]
    return np.concatenate((special, rng.integers(0, 60, count))).astype(np.int64)


# --- the shingle hash ---------------------------------------------------------


def documented_shingle_hash(ids) -> int:
    """The shingle hash exactly as written in the corpuscle.kernels.minhash module notes."""

    def mix64(z):
        z = (z + 0x9E3779B97F4A7C15) & MASK64
        z ^= z >> 30
        z = (z * 0xBF58476D1CE4E5B9) & MASK64
        z ^= z >> 27
        z = (z * 0x94D049BB133111EB) & MASK64
        return z ^ (z >> 31)

    h = len(ids)
    for token in ids:
        h = (h * 0xD6E8FEB86659FD93 + mix64(token % (1 << 64))) & MASK64
    return mix64(h) >> 32


def test_shingle_hash_follows_its_documented_definition():
    for ids in [(1, 2, 3, 4, 5), (0,), (-100, 7), (2**64 - 1, 0, 50_000), tuple(range(12))]:
        assert shingle_hash(ids) == documented_shingle_hash(ids)
        assert 0 <= shingle_hash(ids) < 2**32
    # Negative ids hash as their two's complement; a short window differs from
    # an n-gram that only adds leading zeros.
    assert shingle_hash((-1,)) == shingle_hash((2**64 - 1,))
    assert shingle_hash((7, 8)) != shingle_hash((0, 0, 0, 7, 8))


@pytest.mark.parametrize("n", [1, 2, 5, 9])
@pytest.mark.parametrize(
    "dtype, low, high",
    [(np.int32, -200, 50_000), (np.uint16, 0, 2**16), (np.uint64, 2**63, 2**64 - 1), (np.int64, -(2**62), 2**62)],
)
@pytest.mark.parametrize("group", [minhash._SHINGLE_TOKENS, 7, 50])  # windows hashed a few at a time, or one by one
def test_shingle_hashes_equal_the_scalar_hash(n, dtype, low, high, group, monkeypatch):
    monkeypatch.setattr(minhash, "_SHINGLE_TOKENS", group)
    rng = np.random.default_rng(n)
    lengths = varied_lengths(rng, n, 80)
    values, offsets = random_windows(rng, lengths, low, high, dtype)
    hashes, shingle_offsets = shingle_hashes(values, offsets, n)
    assert hashes.dtype == np.uint32 and shingle_offsets.dtype == np.int64
    expected_counts = np.where(lengths >= n, lengths - n + 1, np.minimum(lengths, 1))
    np.testing.assert_array_equal(np.diff(shingle_offsets), expected_counts)
    for i in range(len(lengths)):
        window = values[offsets[i] : offsets[i + 1]].tolist()
        expected = [shingle_hash(s) for s in python_shingles(window, n)]
        assert hashes[shingle_offsets[i] : shingle_offsets[i + 1]].tolist() == expected


def test_shingle_hashes_accept_offsets_of_a_sliced_column():
    # Arrow offsets of a sliced list column do not start at 0.
    rng = np.random.default_rng(7)
    lengths = varied_lengths(rng, 5, 30)
    values, offsets = random_windows(rng, lengths, 0, 1000, np.int32)
    whole, whole_offsets = shingle_hashes(values, offsets, 5)
    part, part_offsets = shingle_hashes(values, offsets[10:25], 5)
    np.testing.assert_array_equal(part, whole[whole_offsets[10] : whole_offsets[24]])
    np.testing.assert_array_equal(part_offsets, whole_offsets[10:25] - whole_offsets[10])


def test_shingle_hashes_of_no_windows_and_of_empty_windows():
    hashes, shingle_offsets = shingle_hashes(np.array([], dtype=np.int32), np.array([0]), 5)
    assert hashes.shape == (0,) and shingle_offsets.tolist() == [0]
    hashes, shingle_offsets = shingle_hashes(np.array([], dtype=np.int32), np.array([0, 0, 0]), 5)
    assert hashes.shape == (0,) and shingle_offsets.tolist() == [0, 0, 0]


# --- signatures against datasketch --------------------------------------------


@pytest.mark.parametrize("num_perm, seed", [(1, 0), (128, 1), (256, 42), (7, 2**32 - 1)])
def test_permutations_equal_datasketch(num_perm, seed):
    a, b = permutations(num_perm, seed)
    reference = MinHash(num_perm=num_perm, seed=seed, scheme="affine32").permutations
    np.testing.assert_array_equal(a, reference[0])
    np.testing.assert_array_equal(b, reference[1])
    assert a.dtype == np.uint32 and np.all(a % 2 == 1)


@pytest.mark.parametrize(
    "num_perm, seed, n, chunk",
    [
        (128, 1, 5, minhash.DEFAULT_CHUNK),
        (128, 1, 5, 1),  # every shingle its own chunk: windows span chunks
        (33, 7, 3, 37),  # num_perm not a multiple of the permutation block
        (16, 0, 1, 500),
        (200, 12345, 9, 64),
    ],
)
def test_signatures_equal_datasketch(num_perm, seed, n, chunk):
    rng = np.random.default_rng(seed)
    lengths = varied_lengths(rng, n, 60)
    values, offsets = random_windows(rng, lengths, -5, 3000, np.int64)
    hashes, shingle_offsets = shingle_hashes(values, offsets, n)
    result = signatures(hashes, shingle_offsets, num_perm=num_perm, seed=seed, chunk=chunk)
    assert result.shape == (len(lengths), num_perm) and result.dtype == np.uint32
    for i in range(len(lengths)):
        window = values[offsets[i] : offsets[i + 1]].tolist()
        reference = datasketch_signature(python_shingles(window, n), num_perm, seed)
        np.testing.assert_array_equal(result[i], reference, err_msg=f"window {i} of length {lengths[i]}")


def test_signatures_equal_datasketch_on_long_windows():
    rng = np.random.default_rng(11)
    lengths = np.array([2048, 0, 2048, 3, 1500])
    values, offsets = random_windows(rng, lengths, 0, 50_000, np.int32)
    result = signatures(*shingle_hashes(values, offsets, 5), chunk=1000)
    for i in range(len(lengths)):
        window = values[offsets[i] : offsets[i + 1]].tolist()
        np.testing.assert_array_equal(result[i], datasketch_signature(python_shingles(window, 5), 128, 1))


def test_empty_windows_keep_the_fresh_datasketch_state():
    fresh = MinHash(num_perm=64, seed=3, scheme="affine32").hashvalues
    result = signatures(np.array([], dtype=np.uint32), np.array([0, 0, 0]), num_perm=64, seed=3)
    assert result.shape == (2, 64)
    np.testing.assert_array_equal(result[0], fresh)
    assert np.all(result == EMPTY_VALUE)
    assert signatures(np.array([], dtype=np.uint32), np.array([0]), num_perm=64).shape == (0, 64)


def test_signatures_of_duplicated_windows_are_identical():
    window = np.arange(100, 400)
    values = np.concatenate((window, [9, 9, 9], window))
    result = signatures(*shingle_hashes(values, [0, 300, 303, 603], 5))
    np.testing.assert_array_equal(result[0], result[2])
    assert np.any(result[0] != result[1])


# --- the text path ------------------------------------------------------------

TEXTS = [
    "The lighthouse keeper counted seventeen gulls, then nineteen, then gave up counting.",
    "the LIGHTHOUSE keeper counted seventeen gulls -- then nineteen; then gave up counting!",
    None,
    "",
    "   ... --- !!! ",
    "Ünïcödé wörds: naïve café_au-lait, ΟΔΟΣ ΠΡΟΣ ΤΗΝ ΘΑΛΑΣΣΑ, Москва 2031, 東京タワー x²½ Ⅻ ⓐ",
    "one two",
    "e\u0301te\u0301 (combining accents) and tabs\tand\nnewlines, snake_case_names, 3.14159",
    "a b c d e f g h i j k l m n o p q r s t u v w x y z " * 20,
]


def reference_words(text: str | None) -> list[str]:
    """Reference split: pyarrow's utf8_lower, then regex.findall over the word classes."""
    if text is None:
        return []
    lowered = pc.utf8_lower(pa.array([text])).to_pylist()[0]
    return regex.findall(f"[{WORD_CLASS}]+", lowered)


@pytest.mark.parametrize("n", [1, 3, 5])
def test_word_shingles_and_signatures_equal_the_reference(n):
    hashes, shingle_offsets = word_shingle_hashes(TEXTS, n)
    result = signatures(hashes, shingle_offsets, num_perm=64, seed=5)
    assert len(shingle_offsets) == len(TEXTS) + 1
    for i, text in enumerate(TEXTS):
        shingles = python_shingles(reference_words(text), n)
        assert hashes[shingle_offsets[i] : shingle_offsets[i + 1]].tolist() == [shingle_hash(s) for s in shingles]
        np.testing.assert_array_equal(result[i], datasketch_signature(shingles, 64, 5))
    # Case and punctuation do not matter: the first two documents are the same words.
    np.testing.assert_array_equal(result[0], result[1])
    assert np.all(result[2] == EMPTY_VALUE) and np.all(result[3] == EMPTY_VALUE) and np.all(result[4] == EMPTY_VALUE)


def test_word_split_details():
    assert reference_words(TEXTS[5])[:4] == ["ünïcödé", "wörds", "naïve", "café_au"]
    # Arrow lowercases with the simple case mapping: a final capital sigma stays σ.
    assert "οδοσ" in reference_words(TEXTS[5])
    words, offsets = word_shingle_hashes(["Ⅻ ⓐ x²½"], 1)
    # Ⅻ (a letter number) is a word, the circled letter and the super/fraction digits are not.
    assert words.tolist() == [shingle_hash(("ⅻ",)), shingle_hash(("x",))]


def test_word_class_is_backslash_w_but_for_alphabetic_symbols_and_joiners():
    # Reference: the regex package's Unicode \w. Our class leaves out only the
    # symbols that Unicode marks Other_Alphabetic (So, e.g. circled letters)
    # and the zero-width joiners (Cf).
    ours, word = regex.compile(f"[{WORD_CLASS}]"), regex.compile(r"\w")
    chars = [chr(c) for c in range(0x40000) if not 0xD800 <= c < 0xE000]
    differing = [c for c in chars if bool(ours.match(c)) != bool(word.match(c))]
    assert differing and all(word.match(c) and unicodedata.category(c) in ("So", "Cf") for c in differing)
    assert {"\u200c", "\u200d", "ⓐ"} <= set(differing)


def test_arrow_and_regex_agree_on_the_word_class():
    # pyarrow (RE2) splits the text; regex is the reference. They may differ
    # only on characters unassigned in Python 3.11's Unicode database (14.0),
    # because each ships its own, possibly newer, Unicode tables.
    chars = [chr(c) for c in range(0x40000) if not 0xD800 <= c < 0xE000]
    arrow = pc.match_substring_regex(pa.array(chars), pattern=f"^[{WORD_CLASS}]$").to_pylist()
    reference = regex.compile(f"[{WORD_CLASS}]")
    differing = [c for c, m in zip(chars, arrow, strict=True) if m != bool(reference.match(c))]
    assert all(unicodedata.category(c) == "Cn" for c in differing)


def test_word_id_follows_its_documented_definition():
    def documented(word: str) -> int:
        data = word.encode("utf-8")
        poly = sum(b * pow(0xD6E8FEB86659FD93, j, 1 << 64) for j, b in enumerate(data)) % (1 << 64)
        z = ((poly ^ len(data)) + 0x9E3779B97F4A7C15) & MASK64
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & MASK64
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & MASK64
        return z ^ (z >> 31)

    for word in ["a", "lighthouse", "naïve", "東京タワー", "x" * 300]:
        assert word_id(word) == documented(word) == word_id(word.encode("utf-8"))
    assert shingle_hash(("gull", "tern")) == shingle_hash((word_id("gull"), word_id("tern")))


def test_word_ids_are_the_same_when_hashed_in_small_chunks(monkeypatch):
    expected = word_shingle_hashes(TEXTS, 2)
    monkeypatch.setattr(minhash, "_WORD_CHUNK_BYTES", 7)
    chunked = word_shingle_hashes(TEXTS, 2)
    np.testing.assert_array_equal(chunked[0], expected[0])
    np.testing.assert_array_equal(chunked[1], expected[1])


def test_text_inputs_of_every_arrow_string_type_agree():
    expected = word_shingle_hashes(TEXTS, 3)
    for texts in [
        pa.array(TEXTS, type=pa.string()),
        pa.array(TEXTS, type=pa.large_string()),
        pa.chunked_array([TEXTS[:4], TEXTS[4:]], type=pa.string()),
        pa.array(["padding"] + TEXTS).slice(1),
    ]:
        hashes, shingle_offsets = word_shingle_hashes(texts, 3)
        np.testing.assert_array_equal(hashes, expected[0])
        np.testing.assert_array_equal(shingle_offsets, expected[1])


# --- validation ---------------------------------------------------------------


def test_settings_validate_with_a_hint():
    assert MinHashSettings() == MinHashSettings(num_perm=128, n=5, seed=1)
    with pytest.raises(ValueError, match=r"num_perm must be between 1 and .*got 0; hint"):
        MinHashSettings(num_perm=0)
    with pytest.raises(ValueError, match=r"n must be between 1 and 256, got 0; hint"):
        MinHashSettings(n=0)
    with pytest.raises(ValueError, match=r"seed must be between 0 and 4294967295, got -1"):
        MinHashSettings(seed=-1)
    with pytest.raises(TypeError, match=r"n must be an integer, got 2.5"):
        MinHashSettings(n=2.5)
    with pytest.raises(TypeError, match=r"num_perm must be an integer, got True"):
        MinHashSettings(num_perm=True)
    assert MinHashSettings(num_perm=np.int64(64)).num_perm == 64


def test_bad_arrays_are_refused_with_a_hint():
    with pytest.raises(TypeError, match="integer array of token ids"):
        shingle_hashes(np.array([1.5, 2.5]), [0, 2])
    with pytest.raises(ValueError, match="without ever decreasing"):
        shingle_hashes(np.arange(10), [0, 6, 4, 10])
    with pytest.raises(ValueError, match="at most 10"):
        shingle_hashes(np.arange(10), [0, 11])
    with pytest.raises(TypeError, match="one entry more than there are windows"):
        shingle_hashes(np.arange(10), [])
    with pytest.raises(ValueError, match="fit in 32 bits"):
        signatures(np.array([2**40]), [0, 1])
    with pytest.raises(ValueError, match="chunk must be at least 1"):
        signatures(np.array([1], dtype=np.uint32), [0, 1], chunk=0)
    with pytest.raises(TypeError, match="texts must be strings"):
        word_shingle_hashes([1, 2, 3])


def test_document_hashes_follow_their_definition_and_ignore_where_a_document_sits():
    from corpuscle.kernels.hashing import _STREAM_BASES, document_hashes
    from corpuscle.kernels.minhash import _mix64_int
    from corpuscle.kernels.units import as_words

    mask = (1 << 64) - 1
    rng = np.random.default_rng(4)
    docs = [rng.integers(0, 50_000, n).tolist() for n in (1, 7, 5000, 9000, 7)]
    docs[4] = list(docs[1])
    flat = np.array([t for d in docs for t in d], dtype=np.int64)
    offsets = np.concatenate(([0], np.cumsum([len(d) for d in docs])))
    got = document_hashes(as_words(flat), offsets)
    for d, h in zip(docs, got.tolist()):  # reference: the formula in Python integers
        mixed = [t & 0xFFFF_FFFF for t in d]
        expected = []
        for lane, base in enumerate(_STREAM_BASES):
            value = sum(m * pow(base, j, 1 << 64) for j, m in enumerate(mixed)) & mask
            value ^= (len(d) * 0x9E3779B97F4A7C15 + lane) & mask
            expected.append(_mix64_int(value))
        assert h == expected
    assert got[1].tolist() == got[4].tolist() and len({tuple(h) for h in got.tolist()}) == 4
    # int32 storage hashes as int64 does
    np.testing.assert_array_equal(document_hashes(as_words(flat.astype(np.int32)), offsets), got)


def test_multilinear_shingle_hashes_follow_their_definition():
    from corpuscle.kernels.minhash import _multilinear_keys, multilinear_shingle_hashes
    from corpuscle.kernels.units import as_words

    rng = np.random.default_rng(5)
    windows = [rng.integers(-5, 2**31, n).tolist() for n in (0, 1, 3, 4, 5, 6, 200)]
    flat = np.array([t for w in windows for t in w], dtype=np.int64)
    offsets = np.concatenate(([0], np.cumsum([len(w) for w in windows])))
    hashes, shingle_offsets = multilinear_shingle_hashes(as_words(flat), offsets, 5)
    keys = [int(k) for k in _multilinear_keys(5)]
    for i, w in enumerate(windows):  # reference: the formula in Python integers, shingles as in shingles_of
        shingles = [w[j:j + 5] for j in range(len(w) - 4)] if len(w) >= 5 else ([w] if w else [])
        expected = [(keys[5 + len(s)] + sum(keys[k] * (t & 0xFFFF_FFFF) for k, t in enumerate(s))) & 0xFFFF_FFFF
                    for s in shingles]
        assert hashes[shingle_offsets[i]:shingle_offsets[i + 1]].tolist() == expected
