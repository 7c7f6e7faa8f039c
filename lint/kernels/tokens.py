"""Real tokens vs padding, separator and restart positions of a batch: the facts several rules share.

Each fact is computed once per batch and shared through ``Batch.memo``; the keys name the settings a fact depends
on, and ``tokens`` is always ``batch.flat(settings.tokens_column)``.  Separator and restart positions are kept as
sorted flat indices: a window holds a few documents, so these lists are short and everything derived from them
costs next to nothing.
"""
from __future__ import annotations

import numpy as np
from corpuscle.io.batch import Batch, Flat, MaskRanks, is_integer_list, spans


def last_index(flat: Flat, mask: np.ndarray) -> np.ndarray:
    """Per row, the flat index of the last position where ``mask`` is set, or -1 when there is none."""
    return flat.last_where(mask)


def first_index(flat: Flat, mask: np.ndarray) -> np.ndarray:
    """Per row, the flat index of the first position where ``mask`` is set, or -1 when there is none."""
    return flat.first_where(mask)


def _real_key(settings) -> tuple:
    return ("real", settings.tokens_column, settings.mask_column, settings.pad_id, settings.eos_id)


def real_positions(batch: Batch, tokens: Flat, settings) -> np.ndarray:
    """True at every flat position that holds a real token rather than padding (shared per batch; read-only).

    The attention mask decides when the batch has one (``attention_mask != 0``). Without it, a run of ``pad_id``
    at the end of a row is padding; when ``pad_id`` equals ``eos_id`` the first id of that run is kept as the
    eos that ends the row's last document and only the rest counts as padding. Without either, every token is
    real.
    """
    return batch.memo(_real_key(settings), lambda: _real_positions(batch, tokens, settings))


def _real_positions(batch: Batch, tokens: Flat, settings) -> np.ndarray:
    name = settings.mask_column
    if batch.has(name) and is_integer_list(batch.type_of(name)):
        mask = batch.flat(name)
        if np.array_equal(mask.lengths, tokens.lengths):
            return mask.values != 0
    pad = settings.pad_id
    if pad is None:
        return np.ones(tokens.values.size, dtype=bool)
    end = last_index(tokens, tokens.values != pad) - tokens.offsets[:-1] + 1  # past the last non-pad token
    end = np.maximum(end, 0)
    if pad == settings.eos_id:
        end = np.minimum(end + 1, tokens.lengths)
    return spans(tokens.values.size, tokens.starts, tokens.starts + end)


def padding_positions(batch: Batch, tokens: Flat, settings) -> np.ndarray:
    """True at every flat position that is padding: the complement of :func:`real_positions` (shared per batch;
    read-only)."""
    return batch.memo(("padding",) + _real_key(settings)[1:], lambda: ~real_positions(batch, tokens, settings))


def real_ranks(batch: Batch, tokens: Flat, settings) -> MaskRanks:
    """:class:`~lint.batch.MaskRanks` of :func:`real_positions`: how many real tokens lie in any range, and where
    the k-th real token is (shared per batch)."""
    return batch.memo(("real-ranks",) + _real_key(settings)[1:],
                      lambda: MaskRanks(real_positions(batch, tokens, settings)))


def padding_free(batch: Batch, tokens: Flat, settings) -> bool:
    """Whether every position of the batch is a real token (then the checks that involve padding are skipped)."""
    return batch.memo(("padding-free",) + _real_key(settings)[1:],
                      lambda: bool(real_positions(batch, tokens, settings).all()))


def real_per_row(batch: Batch, tokens: Flat, settings) -> np.ndarray:
    """Per row, how many of its positions are real tokens (shared per batch; read-only)."""
    def count():
        if padding_free(batch, tokens, settings):
            return tokens.lengths
        ranks = real_ranks(batch, tokens, settings)
        return ranks.rank(tokens.ends) - ranks.rank(tokens.starts)
    return batch.memo(("real-per-row",) + _real_key(settings)[1:], count)


def token_positions(batch: Batch, tokens: Flat, settings, token_id: int | None) -> np.ndarray:
    """Sorted flat indices of every position holding ``token_id``, padding included (empty when it is None)."""
    if token_id is None:
        return np.zeros(0, dtype=np.int64)
    return batch.memo(("token-positions", settings.tokens_column, int(token_id)),
                      lambda: np.flatnonzero(tokens.values == token_id))


def real_token_positions(batch: Batch, tokens: Flat, settings, token_id: int | None) -> np.ndarray:
    """Sorted flat indices of the real (not padding) positions holding ``token_id``."""
    at = token_positions(batch, tokens, settings, token_id)
    if at.size == 0 or padding_free(batch, tokens, settings):
        return at
    return at[real_positions(batch, tokens, settings)[at]]


def inner_starts(batch: Batch, tokens: Flat, settings, candidates: np.ndarray) -> np.ndarray:
    """The ``candidates`` (sorted flat indices) that can start a document inside a row: not a row's first
    position, and both the candidate and the position before it are real tokens."""
    keep = ~tokens.is_first[candidates]
    if not padding_free(batch, tokens, settings):
        real = real_positions(batch, tokens, settings)
        keep &= real[candidates] & real[candidates - 1]  # a candidate that is no row start has a predecessor
    return candidates[keep]


def position_restarts(batch: Batch, tokens: Flat, settings) -> np.ndarray | None:
    """Flat indices where position_ids restart at 0 inside a row, between two real tokens: document starts
    after the first document of the row (shared per batch; read-only). None when the batch has no usable
    position_ids column."""
    name = settings.positions_column
    if not (batch.has(name) and is_integer_list(batch.type_of(name))):
        return None
    positions = batch.flat(name)
    if not np.array_equal(positions.lengths, tokens.lengths):
        return None
    return batch.memo(("restarts", name) + _real_key(settings)[1:],
                      lambda: inner_starts(batch, tokens, settings, np.flatnonzero(positions.values == 0)))


def missing_ids(settings, keys) -> str | None:
    """Why a rule cannot run without the special ids ``keys`` under the shard's separator convention."""
    for key in keys:
        if getattr(settings, key) is None:
            return (f"{key} is not set and could not be inferred, and separator = {settings.separator} needs it "
                    f"(give --{key.replace('_', '-')})")
    return None


def parallel_columns(settings) -> list[str]:
    return [settings.tokens_column, settings.mask_column, settings.positions_column]
