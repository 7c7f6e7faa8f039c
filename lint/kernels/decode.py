"""Token ids back to text with a tokenizer file: the documents of packed rows, decoded in batches.

Shared by the rules that read tokenized shards as text (evaluation overlap, the tokenizer round trip) and by the
decoded excerpts of token-level findings. The tokenizer is loaded by :func:`corpuscle.kernels.tokenize.load_tokenizer`
(optional dependency, cached per process).

Segments
    A packed row holds several documents separated by special tokens (eos, bos, padding). A *segment* is a maximal
    run of ordinary tokens within one row: no special token inside, never across a row end. Segments are found with
    whole-array numpy expressions; only the decoding itself goes through the tokenizer, one call per batch of
    segments (``decode_batch``, the library's own threads).
"""
from __future__ import annotations

import numpy as np

_LIMITS: dict = {}


def id_limit(tokenizer) -> int:
    """One more than the largest id the tokenizer has a token for (ids at or above it cannot be decoded); remembered
    per tokenizer object (loaded tokenizers are cached per process)."""
    key = id(tokenizer)
    if key in _LIMITS and _LIMITS[key][0] is tokenizer:
        return _LIMITS[key][1]
    limit = max(max(tokenizer.get_vocab(with_added_tokens=True).values(), default=-1) + 1,
                tokenizer.get_vocab_size(with_added_tokens=True))
    _LIMITS[key] = (tokenizer, limit)
    return limit


def special_ids(tokenizer) -> np.ndarray:
    """Ids of the tokenizer's special tokens (added tokens marked special), ascending."""
    try:
        added = tokenizer.get_added_tokens_decoder()
    except AttributeError:  # an old library: no way to ask, no special ids
        return np.zeros(0, dtype=np.int64)
    return np.array(sorted(i for i, tok in added.items() if getattr(tok, "special", False)), dtype=np.int64)


def segments(values: np.ndarray, offsets: np.ndarray, stop_ids, limit: int | None = None
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(lo, hi, row)``: the flat positions ``[lo, hi)`` of every segment -- a maximal run of tokens whose id is
    not in ``stop_ids`` (nor negative, nor ``limit`` or more when given: ids a tokenizer cannot decode) within one
    row (row ``i`` being ``values[offsets[i]:offsets[i + 1]]``) -- and its row."""
    n = len(values)
    if n == 0:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty, empty
    stop = np.asarray(list(stop_ids) if not isinstance(stop_ids, np.ndarray) else stop_ids, dtype=np.int64)
    keep = ~np.isin(values, stop) if len(stop) else np.ones(n, dtype=bool)
    if limit is not None:
        keep &= (values >= 0) & (values < limit)
    row_start = np.zeros(n, dtype=bool)
    row_end = np.zeros(n, dtype=bool)
    lengths = np.diff(offsets)
    row_start[offsets[:-1][lengths > 0]] = True
    row_end[offsets[1:][lengths > 0] - 1] = True
    before = np.empty(n, dtype=bool)
    before[0] = False
    before[1:] = keep[:-1]
    after = np.empty(n, dtype=bool)
    after[-1] = False
    after[:-1] = keep[1:]
    lo = np.flatnonzero(keep & (row_start | ~before))
    hi = np.flatnonzero(keep & (row_end | ~after)) + 1
    row = np.searchsorted(offsets, lo, side="right") - 1
    return lo.astype(np.int64), hi.astype(np.int64), row.astype(np.int64)


def decode_spans(tokenizer, values: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> list[str]:
    """The text of each span ``values[lo[k]:hi[k]]`` (special tokens skipped), decoded in one batch call."""
    if len(lo) == 0:
        return []
    if 2 * int((hi - lo).sum()) < len(values):  # a few spans (a sample): convert only them
        spans = [values[a:b].tolist() for a, b in zip(lo.tolist(), hi.tolist())]
    else:
        ids = values.tolist()
        spans = [ids[a:b] for a, b in zip(lo.tolist(), hi.tolist())]
    return tokenizer.decode_batch(spans, skip_special_tokens=True)


def first_token_of_word(tokenizer, ids: list[int], word: int, count_words) -> int:
    """The index in ``ids`` of the token where word number ``word`` of the decoded text begins: the smallest
    ``t`` whose decoded prefix ``ids[:t + 1]`` holds more than ``word`` words (``count_words(text)`` counts them),
    by binary search over prefixes (about log2(len(ids)) decodes); -1 when the text has too few words."""
    lo, hi = 0, len(ids)
    if count_words(tokenizer.decode(ids, skip_special_tokens=True)) <= word:
        return -1
    while lo < hi:
        mid = (lo + hi) // 2
        if count_words(tokenizer.decode(ids[:mid + 1], skip_special_tokens=True)) > word:
            hi = mid
        else:
            lo = mid + 1
    return lo


def excerpt(tokenizer, ids: list[int], at: int, before: int = 8, after: int = 8, limit: int = 80) -> str:
    """A short decoded context around token ``at`` of ``ids``: ``before`` tokens, the token in brackets, ``after``
    tokens (special tokens shown as themselves), at most ``limit`` characters on each side."""
    def text(part):
        part = [i for i in part if 0 <= i < 1 << 32]  # at most a few dozen ids; others cannot be decoded
        return tokenizer.decode(part, skip_special_tokens=False) if part else ""

    head = text(ids[max(0, at - before):at])[-limit:]
    tail = text(ids[at + 1:at + 1 + after])[:limit]
    token = tokenizer.id_to_token(int(ids[at])) if 0 <= at < len(ids) else None
    middle = token if token is not None else f"<id {ids[at]}>" if 0 <= at < len(ids) else ""
    return f"{head}[{middle}]{tail}"
