"""Real tokens vs padding, separator and restart positions of a batch: the facts several rules share.

Each fact is computed once per batch and shared through ``Batch.memo``; the keys name the settings a fact depends
on, and ``tokens`` is always ``batch.flat(settings.tokens_column)``.  Separator and restart positions are kept as
sorted flat indices: a window holds a few documents, so these lists are short and everything derived from them
costs next to nothing.
"""
from __future__ import annotations

import numpy as np
from corpuscle.io.batch import Batch, Flat, MaskRanks, is_integer_list


def last_index(flat: Flat, mask: np.ndarray) -> np.ndarray:
    """Per row, the flat index of the last position where ``mask`` is set, or -1 when there is none."""
    return flat.last_where(mask)


def first_index(flat: Flat, mask: np.ndarray) -> np.ndarray:
    """Per row, the flat index of the first position where ``mask`` is set, or -1 when there is none."""
    return flat.first_where(mask)


def _real_key(settings) -> tuple:
    return ("real", settings.tokens_column, settings.mask_column, settings.pad_id, settings.eos_id)


def _running(mask: np.ndarray) -> np.ndarray:
    """``out[i]`` = set positions in ``mask[:i]`` (length N+1), int32 when it fits."""
    dtype = np.int32 if mask.size < np.iinfo(np.int32).max else np.int64
    out = np.zeros(mask.size + 1, dtype=dtype)
    np.cumsum(mask, out=out[1:])
    return out


class RealTokens:
    """Which flat positions of a token column hold real tokens, not padding: the one reading every rule and the
    inference of shard facts share (:func:`real_tokens`).

    The attention mask decides when the batch has one of the token column's shape (real where it is not 0).
    Without it, a run of ``pad_id`` at the end of a row is padding; when ``pad_id`` equals ``eos_id`` the first id
    of that run is kept as the eos that ends the row's last document, and only the rest is padding.  A run of
    ``pad_id`` at the start of a row is padding too (left padding) unless the pad id is also the eos or bos id.
    Without either, every token is real.

    ``mask`` is None when every position is real (``run`` is then None too: the running count is the index
    itself); ``per_row`` is the real tokens of each row; ``source`` says how padding was told
    (``"attention_mask"``, ``"pad_id"`` or ``None``).
    """

    def __init__(self, mask: np.ndarray | None, per_row: np.ndarray, source: str | None = None):
        self.mask = mask
        self.per_row = per_row
        self.source = source
        self._run = None

    @property
    def run(self) -> np.ndarray | None:
        """``run[i]`` = real tokens before flat index ``i`` (length N+1; None when every token is real)."""
        if self._run is None and self.mask is not None:
            self._run = _running(self.mask)
        return self._run

    @property
    def total(self) -> int:
        return int(self.per_row.sum())

    def upto(self, index: np.ndarray) -> np.ndarray:
        """Real tokens before each flat index."""
        return np.asarray(index, dtype=np.int64) if self.run is None else self.run[index].astype(np.int64)

    def first_from(self, index: np.ndarray) -> np.ndarray:
        """The first real position at or after each flat index (few indices: binary search)."""
        if self.run is None:
            return np.asarray(index, dtype=np.int64)
        return np.searchsorted(self.run, self.run[index] + 1, side="left") - 1

    def last_index(self, tokens: Flat) -> np.ndarray:
        """Per row, the flat index of its last real token (rows without one: its start - 1, to be masked out)."""
        if self.run is None:
            return tokens.ends - 1
        return np.searchsorted(self.run, self.run[tokens.ends], side="left") - 1

    @classmethod
    def of(cls, batch: Batch, tokens: Flat, settings) -> "RealTokens":
        """Read the real tokens of ``tokens`` (the batch's token column) under ``settings`` (not cached: use
        :func:`real_tokens`)."""
        n = tokens.values.size
        name = settings.mask_column
        if batch.has(name) and is_integer_list(batch.type_of(name)):
            mask_col = batch.flat(name)
            if np.array_equal(mask_col.lengths, tokens.lengths):
                real = mask_col.values != 0
                if np.count_nonzero(real) == n:
                    return cls(None, tokens.lengths, "attention_mask")
                out = cls(real, None, "attention_mask")
                out.per_row = (out.run[tokens.ends] - out.run[tokens.starts]).astype(np.int64)
                return out
        pad = settings.pad_id
        lengths = tokens.lengths
        nonempty = lengths > 0
        if pad is None or n == 0:
            return cls(None, lengths)
        padded = np.zeros(lengths.size, dtype=bool)
        padded[nonempty] = tokens.values[tokens.ends[nonempty] - 1] == pad
        # left padding: a run of pad ids at a row's start, unless the pad id is also a separator (a packed window
        # may open with the eos that ends the previous row's document, or with a bos)
        led = np.zeros(lengths.size, dtype=bool)
        if pad != settings.eos_id and pad != settings.bos_id:
            led[nonempty] = tokens.values[tokens.starts[nonempty]] == pad
        if not padded.any() and not led.any():
            return cls(None, lengths, "pad_id")
        # Past the last non-pad token of each padded row: the first index where the running count of non-pad
        # tokens reaches the row's total (rows-sized binary search over one cumulative count).
        nonpad = _running(tokens.values != pad)
        first = tokens.starts.copy()
        if led.any():  # the first non-pad token of each left-padded row (its start when the row is all padding)
            rows = np.flatnonzero(led)
            before = nonpad[tokens.starts[rows]]
            some = nonpad[tokens.ends[rows]] > before
            first[rows[some]] = np.searchsorted(nonpad, before[some] + 1, side="left") - 1
        rows = np.flatnonzero(padded)
        end = tokens.ends.copy()
        total = nonpad[tokens.ends[rows]]
        end[rows] = np.maximum(np.searchsorted(nonpad, total, side="left"), tokens.starts[rows])
        has_real = total > nonpad[tokens.starts[rows]]
        if pad == settings.eos_id:  # the first pad is the eos that ends the row's last document
            end[rows] = np.where(has_real, np.minimum(end[rows] + 1, tokens.ends[rows]), end[rows])
        end = np.maximum(end, first)
        per_row = np.where(nonempty, end - first, 0)
        # Real mask: +1 at each row's first real token, -1 past its last one, accumulated (int8, one pass).
        step = np.zeros(n + 1, dtype=np.int8)
        np.add.at(step, first[nonempty], 1)
        np.subtract.at(step, end[nonempty], 1)
        real = np.cumsum(step[:-1], dtype=np.int8).view(np.bool_)
        return cls(real, per_row, "pad_id")


def real_tokens(batch: Batch, tokens: Flat, settings) -> RealTokens:
    """The :class:`RealTokens` of the batch's token column (shared per batch; read-only): the single place that
    decides real tokens vs padding, for the rules and for the inference of facts alike."""
    return batch.memo(("real-tokens",) + _real_key(settings)[1:], lambda: RealTokens.of(batch, tokens, settings))


def real_positions(batch: Batch, tokens: Flat, settings) -> np.ndarray:
    """True at every flat position that holds a real token rather than padding (shared per batch; read-only);
    see :class:`RealTokens` for how padding is told."""
    def make():
        mask = real_tokens(batch, tokens, settings).mask
        return np.ones(tokens.values.size, dtype=bool) if mask is None else mask
    return batch.memo(_real_key(settings), make)


def padding_positions(batch: Batch, tokens: Flat, settings) -> np.ndarray:
    """True at every flat position that is padding: the complement of :func:`real_positions` (shared per batch;
    read-only)."""
    return batch.memo(("padding",) + _real_key(settings)[1:], lambda: ~real_positions(batch, tokens, settings))


def real_ranks(batch: Batch, tokens: Flat, settings) -> MaskRanks:
    """:class:`~corpuscle.io.batch.MaskRanks` of :func:`real_positions`: how many real tokens lie in any range, and where
    the k-th real token is (shared per batch)."""
    return batch.memo(("real-ranks",) + _real_key(settings)[1:],
                      lambda: MaskRanks(real_positions(batch, tokens, settings)))


def padding_free(batch: Batch, tokens: Flat, settings) -> bool:
    """Whether every position of the batch is a real token (then the checks that involve padding are skipped)."""
    return real_tokens(batch, tokens, settings).mask is None


def real_per_row(batch: Batch, tokens: Flat, settings) -> np.ndarray:
    """Per row, how many of its positions are real tokens (shared per batch; read-only)."""
    return real_tokens(batch, tokens, settings).per_row


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
    """Why a rule cannot run without the special ids ``keys`` under the shard's separator convention: the id that
    is missing, what the inference could not decide about it (when it tried), and the flag that gives it."""
    for key in keys:
        if getattr(settings, key) is None:
            why = getattr(settings, "undecided", {}).get(key)
            because = f" ({why})" if why else ""
            return (f"{key} is not set and could not be inferred{because}, and separator = {settings.separator} "
                    f"needs it (give --{key.replace('_', '-')})")
    return None


def inferred_facts(settings, keys) -> dict:
    """The facts among ``keys`` whose value was inferred from the data (not given): ``{key: value}``."""
    return {key: getattr(settings, key) for key in keys
            if settings.source(key) == "inferred" and getattr(settings, key) is not None}


def inferred_note(settings, keys) -> str:
    """A sentence for a finding that rests on inferred facts (empty when every fact it uses was given), e.g.
    " This rests on eos_id = 2, inferred from the data (heuristic): give --eos-id to confirm it."."""
    facts = inferred_facts(settings, keys)
    if not facts:
        return ""
    values = ", ".join(f"{k} = {v}" for k, v in facts.items())
    flags = " and ".join(f"--{k.replace('_', '-')}" for k in facts)
    return f" This rests on {values}, inferred from the data (heuristic): give {flags} to confirm."


def parallel_columns(settings) -> list[str]:
    return [settings.tokens_column, settings.mask_column, settings.positions_column]
