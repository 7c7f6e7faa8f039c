"""Units of deduplication: the documents of a token shard as one stream, carried across rows, batches and parts.

The duplicate rules compare *units*: by default the documents of a shard (``unit = "document"``), or its rows
(``unit = "window"``, what a training step sees). Documents are those of the document reading
(:func:`corpuscle.kernels.documents.documents_of`: separators, position restarts, one per row), over the real
tokens only (padding left out, :func:`corpuscle.kernels.tokens.real_positions`). A document may start in one row
and end rows, batches or parts later: :class:`DocumentStream` keeps the tokens of the one open document and hands
it on whole when it closes, so a document is hashed and shingled across row and batch boundaries exactly as if it
had been stored in one piece.

Each unit is located by its first token: the shard row and the offset within that row, and its length in real
tokens. A document longer than :data:`MAX_DOCUMENT_TOKENS` is compared by its first that many tokens (its length
stays the full length; the count of such documents is reported).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from corpuscle.io.batch import Batch
from corpuscle.kernels.documents import documents_of
from corpuscle.kernels.hashing import document_hashes
from corpuscle.kernels.tokens import real_positions, real_ranks
from corpuscle.kernels.windows import DOCUMENTS, Windows, narrow

#: Tokens of one document kept for comparison (64 MiB of int32 ids); the rest of a longer document is not compared.
MAX_DOCUMENT_TOKENS = 1 << 24


@dataclass
class Units:
    """Complete units handed on by one batch: their tokens back to back (``values``; ``words`` the same ids modulo
    2**32 as uint32, shared by the content hash and the shingles), ``bounds`` (one more than units), and per unit the
    shard row and in-row offset of its first token and its length in tokens (``lengths`` may exceed the compared
    tokens of a document over :data:`MAX_DOCUMENT_TOKENS`)."""

    values: np.ndarray
    words: np.ndarray
    bounds: np.ndarray
    rows: np.ndarray
    offsets: np.ndarray
    lengths: np.ndarray

    def __len__(self) -> int:
        return len(self.rows)


def as_windows(units: Units, hashes: np.ndarray) -> Windows:
    """The units as the duplicate rules keep them: shard row, in-row offset, length and content hash of each."""
    n = len(units)
    return Windows(DOCUMENTS, np.arange(n), narrow(units.rows), narrow(units.lengths), hashes,
                   np.full(n, DOCUMENTS, dtype=np.uint8), narrow(units.offsets))


def _empty_units() -> Units:
    z = np.zeros(0, dtype=np.int64)
    return Units(np.zeros(0, np.int64), np.zeros(0, np.uint32), np.zeros(1, np.int64), z, z.copy(), z.copy())


class DocumentStream:
    """The documents of one shard, batch by batch: :meth:`add` returns the documents that are complete after a
    batch (with their content hashes), :meth:`close` the one still open at the shard's end. Holds the open
    document's tokens (up to :data:`MAX_DOCUMENT_TOKENS`) and where it starts; nothing else is carried.

    Both duplicate rules read a shard's documents; the units of a batch (and their hashes) are computed once and
    shared through ``Batch.memo``, keyed by the open document each stream carries into the batch, so two streams
    that carry the same document get the very same result."""

    def __init__(self):
        self._open: _Open | None = None
        self._next_row = 0
        self.over_limit = 0
        self.fragments = 0
        self.gapped = False  # rows were skipped: the shard's last rows may not have been read either

    def add(self, batch: Batch, settings, arrangement: str) -> tuple[Units, Windows]:
        carry = self._open
        # A batch that does not follow on from the previous one (a sampled scan skipped rows, or a record between
        # them could not be read): the document open before it, and the tokens before its first document start,
        # are fragments of documents whose other part was not read. They are not compared.
        follows = not len(batch) or int(batch.rows[0]) == self._next_row
        if len(batch):
            self._next_row = int(batch.rows[-1]) + 1
        if not follows:
            self.fragments += carry is not None and carry is not FRAGMENT
            self.gapped = True
            carry = FRAGMENT
        key = ("dedup-units", arrangement, settings.tokens_column, settings.mask_column, settings.positions_column,
               settings.eos_id, settings.bos_id, settings.pad_id, settings.separator,
               None if carry is None else "fragment" if carry is FRAGMENT else
               (carry.row, carry.offset, carry.length, id(carry.pieces)))
        units, windows, after, over = batch.memo(key, lambda: _step(batch, settings, arrangement, carry))
        self._open = after
        self.over_limit += over
        return units, windows

    def close(self) -> tuple[Units, Windows]:
        """The document open at the shard's end (complete: a shard never continues into the next one; but when
        rows were skipped -- a sampled scan -- the rows after it may have been too, so it is left out then). Two
        streams closing the same open document get the same arrays (kept on it)."""
        carry, self._open = self._open, None
        if carry is None or carry is FRAGMENT or not carry.kept or self.gapped:
            units = _empty_units()
            return units, as_windows(units, np.zeros((0, 2), dtype=np.uint64))
        self.over_limit += carry.length > carry.kept
        if "closed" not in carry.cache:
            tokens = carry.tokens()
            words = as_words(tokens)
            bounds = np.asarray([0, len(tokens)], dtype=np.int64)
            units = Units(tokens, words, bounds, np.asarray([carry.row], dtype=np.int64),
                          np.asarray([carry.offset], dtype=np.int64), np.asarray([carry.length], dtype=np.int64))
            carry.cache["closed"] = units, as_windows(units, document_hashes(words, bounds))
        return carry.cache["closed"]


@dataclass(frozen=True)
class _Open:
    """The document open at the end of a batch: where it starts, its length so far, and its first tokens (up to
    :data:`MAX_DOCUMENT_TOKENS`, as a tuple of read-only pieces)."""

    row: int
    offset: int
    length: int
    kept: int
    pieces: tuple
    cache: dict = field(default_factory=dict, compare=False, repr=False)

    def tokens(self) -> np.ndarray:
        if not self.pieces:
            return np.zeros(0, dtype=np.int64)
        return self.pieces[0] if len(self.pieces) == 1 else np.concatenate(self.pieces)

    def extended(self, tokens: np.ndarray) -> "_Open":
        room = MAX_DOCUMENT_TOKENS - self.kept
        pieces = self.pieces
        kept = self.kept
        if room > 0 and len(tokens):
            piece = np.array(tokens[:room])  # a copy: the batch's buffers are let go
            piece.flags.writeable = False
            pieces, kept = pieces + (piece,), kept + len(piece)
        return _Open(self.row, self.offset, self.length + len(tokens), kept, pieces)


#: The open "document" after rows that were not read: a fragment, carried only to be left out when it closes.
FRAGMENT = _Open(-1, -1, 0, 0, ())


def as_words(values: np.ndarray) -> np.ndarray:
    """Token ids modulo 2**32 as uint32 (the same ids stored as int32 or int64 give the same words): a view of
    32-bit ids, no copy; the hashing kernels widen them to 64 bits a cache-sized piece at a time."""
    if values.dtype.itemsize == 4:
        return values.view(np.uint32)
    return values.view(np.uint64 if values.dtype.itemsize == 8 else values.dtype).astype(np.uint32)


def _step(batch: Batch, settings, arrangement: str, carry: "_Open | None"):
    """``(units, content hashes, open document after the batch, 1 if a document over the limit closed)``."""
    docs = documents_of(batch, settings, arrangement)
    tokens = batch.flat(settings.tokens_column)
    real = real_positions(batch, tokens, settings)
    if real.all():
        values = tokens.values

        def rank(flat):
            return np.asarray(flat, dtype=np.int64)
    else:
        values = tokens.values[real]
        rank = real_ranks(batch, tokens, settings).rank
    total = len(values)
    empty = _empty_units(), np.zeros((0, 2), dtype=np.uint64)

    def opened_here() -> _Open:
        row, off = docs.locate(np.zeros(1, dtype=np.int64))
        return _Open(int(row[0]), int(off[0]), 0, 0, ())

    if not docs.closes:  # no document starts in this batch: it all continues the open one
        if total and carry is not FRAGMENT:
            carry = (carry or opened_here()).extended(values)
        return empty[0], as_windows(*empty), carry, 0
    starts = np.asarray(docs.starts, dtype=np.int64)
    cuts = rank(starts) if len(starts) else np.zeros(0, dtype=np.int64)
    tail_at = int(rank(np.asarray([docs.tail_start]))[0]) if docs.tail else total
    head_end = int(cuts[0]) if len(cuts) else tail_at
    rows, offs = docs.locate(starts) if len(starts) else (np.zeros(0, np.int64), np.zeros(0, np.int64))
    rows, offs = np.asarray(rows, dtype=np.int64), np.asarray(offs, dtype=np.int64)
    lengths = np.diff(np.append(cuts, tail_at)).astype(np.int64)
    inner_values, inner_kept = values[head_end:tail_at], lengths
    over = int(np.count_nonzero(lengths > MAX_DOCUMENT_TOKENS))
    if over:  # documents over the limit are compared by their first tokens
        inner_kept = np.minimum(lengths, MAX_DOCUMENT_TOKENS)
        first = np.cumsum(inner_kept) - inner_kept
        at = np.arange(int(inner_kept.sum())) + np.repeat(cuts - head_end - first, inner_kept)
        inner_values = inner_values[at]
    # The document open before this batch ends where the first document of the batch starts: the first unit.
    if head_end > 0 and carry is None:
        carry = opened_here()
    if carry is not None and carry is not FRAGMENT:
        closing = carry.extended(values[:head_end])
        first = closing.tokens()
        over += int(closing.length > closing.kept)
        # One buffer each for the ids and the words, filled in place (no temporary of the batch's size).
        body = np.empty(len(first) + len(inner_values), dtype=values.dtype)
        body[:len(first)], body[len(first):] = first, inner_values
        words = as_words(body)
        rows, offs = np.append(closing.row, rows), np.append(closing.offset, offs)
        kept = np.append(len(first), inner_kept)
        lengths = np.append(closing.length, lengths)
    else:
        body, words, kept = inner_values, as_words(inner_values), inner_kept
    bounds = np.zeros(len(kept) + 1, dtype=np.int64)
    np.cumsum(kept, out=bounds[1:])
    keep = kept > 0
    if not keep.all():  # a unit without compared tokens (an empty document): nothing to compare
        bounds = np.append(bounds[:1], bounds[1:][keep])
        rows, offs, lengths = rows[keep], offs[keep], lengths[keep]
    after = None
    if docs.tail:
        row, off = docs.locate(np.asarray([docs.tail_start]))
        after = _Open(int(row[0]), int(off[0]), 0, 0, ()).extended(values[tail_at:])
    units = Units(body, words, bounds, rows, offs, lengths)
    return units, as_windows(units, document_hashes(words, bounds)), after, over
