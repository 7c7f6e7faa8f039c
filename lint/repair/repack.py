"""Repacking: documents taken out of their windows and laid into new windows of ``seq_len`` tokens.

:class:`DocumentStream` reads the documents of a tokenized shard batch by batch (where they start and how long
they are comes from :func:`corpuscle.kernels.documents.documents_of`, real tokens from
:class:`~corpuscle.kernels.documents.RealTokens`), carrying the one document open at the end of a batch into the
next, strips each document's own separators and drops the documents a fix names.  A document is a run of token
ids plus, per token, whether the input chose not to train it as a target (so a prompt masked in the input stays
masked).

Two layouts (:class:`ChunkPacker`, :class:`BestFitPacker`) add the separator to every document (eos after it,
bos before it, or both, as the shard's convention says) and cut the result into windows:

``chunk``
    Documents end to end, cut every ``seq_len`` tokens; position_ids count on across a cut, so a document that
    runs over into the next window continues there; only the shard's last window is padded.
``best-fit``
    Best-fit decreasing over pieces: a document longer than ``seq_len`` gives full windows plus one remainder
    piece; the pieces, largest first, each go into the open window with the least room that still holds them
    (a new window when none does), with the batched group moves of
    :func:`corpuscle.kernels.packing.best_fit_decreasing_fills`, keeping which window each piece went to.  The
    remainder of a split document opens a window of its own before the other pieces are placed (they fill the
    room behind it), and that window goes right after the document's full windows, so
    the document runs on from row to row (position_ids count on through its pieces and restart at 0 at every
    other document).  Documents are packed in buffers of about ``buffer_tokens`` tokens, so memory stays
    bounded; for documents no longer than the window the number of windows is within best-fit decreasing's
    bound per buffer.

Windows are padded only where they are not full.  Labels follow the shard's convention (shifted: the next token
of the window; aligned: the token itself), ``ignore_index`` at padding, at the last position under shifted and
wherever the input did not train the target.
"""
from __future__ import annotations

import bisect
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
from corpuscle.io.batch import Batch, is_integer_list
from corpuscle.kernels.documents import LengthHistogram, RealTokens, documents_of

#: Tokens of documents collected before a best-fit buffer is packed.
BUFFER_TOKENS = 1 << 21


@dataclass
class Documents:
    """Documents as flat token ids with offsets, and per token whether it is a target the input did not train."""

    values: np.ndarray
    offsets: np.ndarray
    untrained: np.ndarray

    @property
    def lengths(self) -> np.ndarray:
        return np.diff(self.offsets)

    @property
    def count(self) -> int:
        return self.offsets.size - 1

    @classmethod
    def empty(cls, dtype=np.int64) -> "Documents":
        return cls(np.zeros(0, dtype=dtype), np.zeros(1, dtype=np.int64), np.zeros(0, dtype=bool))

    @classmethod
    def join(cls, parts: list["Documents"]) -> "Documents":
        parts = [p for p in parts if p.count]
        if not parts:
            return cls.empty()
        if len(parts) == 1:
            return parts[0]
        lengths = np.concatenate([p.lengths for p in parts])
        offsets = np.zeros(lengths.size + 1, dtype=np.int64)
        np.cumsum(lengths, out=offsets[1:])
        return cls(np.concatenate([p.values for p in parts]), offsets,
                   np.concatenate([p.untrained for p in parts]))

    def select(self, keep: np.ndarray) -> "Documents":
        if keep.all():
            return self
        lengths = self.lengths[keep]
        offsets = np.zeros(lengths.size + 1, dtype=np.int64)
        np.cumsum(lengths, out=offsets[1:])
        take = _ranges(self.offsets[:-1][keep], lengths)
        return Documents(self.values[take], offsets, self.untrained[take])


def _ranges(starts: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """The indices ``starts[i] .. starts[i] + lengths[i]`` of every range, concatenated."""
    total = int(lengths.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    out_starts = np.cumsum(lengths) - lengths
    return np.arange(total, dtype=np.int64) + np.repeat(np.asarray(starts, dtype=np.int64) - out_starts, lengths)


@dataclass
class DropCounts:
    """Documents and tokens a repack dropped, per reason; separators stripped from documents."""

    documents: dict = field(default_factory=dict)
    tokens: dict = field(default_factory=dict)
    listed: dict = field(default_factory=dict)  # reason -> [(row, offset), ...] of the first few
    separators_stripped: int = 0
    documents_without_separator: int = 0
    last_unterminated: bool = False

    def add(self, reason: str, lengths: np.ndarray, rows: np.ndarray, offsets: np.ndarray, cap: int) -> None:
        if lengths.size == 0:
            return
        self.documents[reason] = self.documents.get(reason, 0) + int(lengths.size)
        self.tokens[reason] = self.tokens.get(reason, 0) + int(lengths.sum())
        listed = self.listed.setdefault(reason, [])
        room = cap - len(listed)
        if room > 0:
            listed += [[int(r), int(o)] for r, o in zip(rows[:room].tolist(), offsets[:room].tolist())]


#: Arrangement of a shard whose length columns (``doc_lengths``: the lengths of the documents packed in each row;
#: ``cu_seqlens``: their cumulative offsets, 0 ... row length) say where its documents are.
LENGTHS = "length-columns"
LENGTH_COLUMNS = ("doc_lengths", "cu_seqlens")


def length_column(batch: Batch, settings) -> tuple[str, str] | None:
    """``(column, kind)`` of the length column that says where the documents of a shard without position_ids
    are (kind ``doc_lengths`` or ``cu_seqlens``), or None."""
    if batch.has(settings.positions_column):
        return None
    for kind in LENGTH_COLUMNS:
        name = getattr(settings, f"{kind}_column", kind)
        if batch.has(name) and is_integer_list(batch.type_of(name)):
            return name, kind
    return None


def length_documents(batch: Batch, tokens, real, settings) -> np.ndarray:
    """Real tokens of each document of a batch whose length column says where its documents are (every row
    starts a document; empty documents left out)."""
    name, kind = length_column(batch, settings)
    col = batch.flat(name)
    n = tokens.values.size
    row_of_entry = np.repeat(np.arange(col.lengths.size), col.lengths)
    values = col.values.astype(np.int64)
    if kind == "cu_seqlens":  # offsets 0 ... row length: every one but the row's end starts a document
        starts = tokens.starts[row_of_entry] + values
    else:  # doc_lengths: each document starts where the ones before it in the row end
        csum = np.cumsum(values)
        before_row = np.concatenate([[0], csum])[col.offsets[:-1]]
        starts = tokens.starts[row_of_entry] + csum - values - before_row[row_of_entry]
    starts = np.concatenate([[0], starts, tokens.starts[tokens.lengths > 0], [n]])
    bounds = np.unique(np.clip(starts, 0, n))
    seg = np.diff(real.upto(bounds))
    return seg[seg > 0]


class DocumentStream:
    """The documents of one tokenized shard, batch by batch, with the one open at a batch's end carried on.

    ``drop`` decides, for whole documents, which to leave out: ``drop(values, offsets, first_rows, last_rows,
    start_rows, start_offsets) -> {reason: bool mask}``.  ``untrained_of(batch, tokens, real)`` gives the flat
    mask of targets the input did not train (None: every token is trained)."""

    def __init__(self, settings, arrangement: str, drop=None, untrained_of=None, cap: int = 1000):
        self.s = settings
        self.arrangement = arrangement
        self.drop = drop
        self.untrained_of = untrained_of
        self.cap = cap
        self.counts = DropCounts()
        self.dtype = None
        # the open document: its pieces, and where it started (row, offset) and the rows it touches
        self._open: list[tuple[np.ndarray, np.ndarray]] = []
        self._open_at: tuple[int, int, int] | None = None  # start row, start offset, last row

    def feed(self, batch: Batch) -> Documents:
        s = self.s
        tokens = batch.flat(s.tokens_column)
        if self.dtype is None:
            self.dtype = tokens.values.dtype
        if tokens.values.size == 0:
            return Documents.empty(tokens.values.dtype)
        real = RealTokens.of(batch, tokens, s)
        where = np.flatnonzero(real.mask) if real.mask is not None else np.arange(tokens.values.size)
        stream = tokens.values[where]
        untrained = self.untrained_of(batch, tokens, real.mask) if self.untrained_of else None
        flags = untrained[where] if untrained is not None else np.zeros(stream.size, dtype=bool)
        if self.arrangement == LENGTHS:
            head, lengths, tail, closes = 0, length_documents(batch, tokens, real, s), 0, True
        else:
            docs = documents_of(batch, s, self.arrangement)
            head, lengths, tail, closes = int(docs.head), np.asarray(docs.lengths, dtype=np.int64), \
                int(docs.tail), docs.closes

        def rows_of(at):  # shard row of the real tokens ``at`` (indices into the stream)
            return batch.rows[np.searchsorted(tokens.offsets, where[at], side="right") - 1]

        def offs_of(at):  # their offsets within their rows
            flat = where[at]
            return flat - tokens.offsets[np.searchsorted(tokens.offsets, flat, side="right") - 1]
        if not closes:  # no document starts in this batch: it all continues the open one
            head, lengths, tail = stream.size, lengths[:0], 0
        closed = []
        if head:
            if self._open_at is None:
                self._open_at = (int(rows_of([0])[0]), int(offs_of([0])[0]), int(rows_of([0])[0]))
            self._open.append((stream[:head], flags[:head]))
            self._open_at = (*self._open_at[:2], int(rows_of([head - 1])[0]))
        if closes and self._open:
            closed.append(self._close_open())
        middle_lo = head
        middle_hi = stream.size - tail
        if lengths.sum() != middle_hi - middle_lo:  # zero-length documents were left out: sizes agree otherwise
            raise RuntimeError("document lengths do not add up to the batch's real tokens")
        if lengths.size:
            offsets = np.zeros(lengths.size + 1, dtype=np.int64)
            np.cumsum(lengths, out=offsets[1:])
            offsets += middle_lo
            first, last = offsets[:-1], offsets[1:] - 1
            first_rows = rows_of(first)
            closed.append((Documents(stream[middle_lo:middle_hi], offsets - middle_lo, flags[middle_lo:middle_hi]),
                           first_rows, offs_of(first), first_rows, rows_of(last)))
        if tail:
            self._open = [(stream[middle_hi:], flags[middle_hi:])]
            self._open_at = (int(rows_of([middle_hi])[0]), int(offs_of([middle_hi])[0]),
                             int(rows_of([stream.size - 1])[0]))
        return self._finish(closed)

    def close(self) -> Documents:
        """The shard ended: the open document is complete (``counts.last_unterminated`` says whether it ended
        without its separator: it may go on in the next shard, and gets one here like every document)."""
        if not self._open:
            return Documents.empty(self.dtype or np.int64)
        last = self._open[-1][0]
        s = self.s
        if s.separator in ("eos-after", "both") and s.eos_id is not None and last.size and last[-1] != s.eos_id:
            self.counts.last_unterminated = True
        return self._finish([self._close_open()])

    def _close_open(self):
        values = np.concatenate([v for v, _ in self._open])
        flags = np.concatenate([f for _, f in self._open])
        row, off, last = self._open_at
        self._open, self._open_at = [], None
        one = np.asarray([row], dtype=np.int64)
        return (Documents(values, np.asarray([0, values.size], dtype=np.int64), flags), one,
                np.asarray([off], dtype=np.int64), one, np.asarray([last], dtype=np.int64))

    def _finish(self, closed) -> Documents:
        out = []
        for docs, start_rows, start_offsets, first_rows, last_rows in closed:
            docs = self._strip(docs)
            if self.drop is not None:
                keep = np.ones(docs.count, dtype=bool)
                for reason, hit in self.drop(docs, first_rows, last_rows, start_rows, start_offsets).items():
                    hit = hit & keep
                    self.counts.add(reason, docs.lengths[hit], start_rows[hit], start_offsets[hit], self.cap)
                    keep &= ~hit
                docs = docs.select(keep)
            out.append(docs)
        return Documents.join(out)

    def _strip(self, docs: Documents) -> Documents:
        """Each document without its own separators (eos at its end, bos at its start, as the convention says):
        the packer adds them back, exactly one per document."""
        s = self.s
        lengths = docs.lengths
        keep = np.ones(docs.values.size, dtype=bool)
        nonempty = lengths > 0
        missing = np.zeros(docs.count, dtype=bool)
        if s.separator in ("eos-after", "both") and s.eos_id is not None:
            last = docs.offsets[1:][nonempty] - 1
            has = docs.values[last] == s.eos_id
            keep[last[has]] = False
            missing[np.flatnonzero(nonempty)[~has]] = True
        if s.separator in ("bos-before", "both") and s.bos_id is not None:
            first = docs.offsets[:-1][nonempty]
            has = docs.values[first] == s.bos_id
            keep[first[has]] = False
            missing[np.flatnonzero(nonempty)[~has]] = True
        self.counts.separators_stripped += int(np.count_nonzero(~keep))
        self.counts.documents_without_separator += int(np.count_nonzero(missing))
        if keep.all():
            return docs
        new_lengths = np.add.reduceat(keep, docs.offsets[:-1][nonempty]) if nonempty.any() else lengths
        lengths = lengths.copy()
        lengths[nonempty] = new_lengths
        offsets = np.zeros(lengths.size + 1, dtype=np.int64)
        np.cumsum(lengths, out=offsets[1:])
        return Documents(docs.values[keep], offsets, docs.untrained[keep])


def with_separators(docs: Documents, settings) -> Documents:
    """Every non-empty document with its separator(s) added (eos after, bos before, or both); empty documents
    are left out."""
    docs = docs.select(docs.lengths > 0)
    before = settings.separator in ("bos-before", "both") and settings.bos_id is not None
    after = settings.separator in ("eos-after", "both") and settings.eos_id is not None
    add = int(before) + int(after)
    if not add or docs.count == 0:
        return docs
    lengths = docs.lengths + add
    offsets = np.zeros(lengths.size + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    values = np.empty(int(offsets[-1]), dtype=docs.values.dtype)
    untrained = np.zeros(values.size, dtype=bool)
    body = _ranges(offsets[:-1] + int(before), docs.lengths)
    values[body] = docs.values
    untrained[body] = docs.untrained
    if before:
        values[offsets[:-1]] = settings.bos_id
    if after:
        values[offsets[1:] - 1] = settings.eos_id
    return Documents(values, offsets, untrained)


# -- windows ----------------------------------------------------------------------------------------------------


@dataclass
class Windows:
    """Windows of ``seq_len`` positions: token ids, untrained-target flags, position_ids, real tokens per window
    and the lengths of the pieces in each window."""

    values: np.ndarray  # (windows * seq_len,)
    untrained: np.ndarray
    positions: np.ndarray
    fill: np.ndarray  # real tokens per window
    piece_lengths: np.ndarray  # lengths of the pieces, by window
    piece_bounds: np.ndarray  # window i holds pieces piece_bounds[i] .. piece_bounds[i + 1]

    @property
    def count(self) -> int:
        return self.fill.size


def _lay_out(values: np.ndarray, untrained: np.ndarray, piece_src: np.ndarray, piece_len: np.ndarray,
             piece_window: np.ndarray, piece_pos0: np.ndarray, windows: int, seq_len: int, pad_id: int) -> Windows:
    """Copy pieces (in the given order: by window, then in the order they went in) into padded windows."""
    dest_start = np.zeros(piece_len.size, dtype=np.int64)
    if piece_len.size:
        csum = np.cumsum(piece_len) - piece_len  # start of each piece in the concatenation
        first_of_window = np.searchsorted(piece_window, piece_window, side="left")
        dest_start = piece_window * seq_len + csum - csum[first_of_window]
    out = np.full(windows * seq_len, pad_id, dtype=values.dtype)
    flags = np.zeros(windows * seq_len, dtype=bool)
    positions = np.tile(np.arange(seq_len, dtype=np.int64), windows)
    src = _ranges(piece_src, piece_len)
    dest = _ranges(dest_start, piece_len)
    out[dest] = values[src]
    flags[dest] = untrained[src]
    positions[dest] = _ranges(piece_pos0, piece_len)
    fill = np.bincount(piece_window, weights=piece_len, minlength=windows).astype(np.int64)
    # padding keeps the position_ids of a plain window (its index in the window), as written by np.tile above
    bounds = np.searchsorted(piece_window, np.arange(windows + 1), side="left")
    return Windows(out, flags, positions, fill, piece_len, bounds)


class _Packer:
    """What both packers do with each batch of documents before laying them out: add the separators (counted) and
    note the lengths, for the layouts the documents allow."""

    def _separated(self, docs: Documents) -> Documents:
        size = docs.values.size
        docs = with_separators(docs, self.s)
        self.separators_added += docs.values.size - size
        self.lengths.add(docs.lengths)
        return docs


class ChunkPacker(_Packer):
    """Concatenate-and-chunk: documents end to end, cut every ``seq_len`` tokens; the rest waits for the next
    documents, and the last window of the shard is padded."""

    def __init__(self, settings, seq_len: int, pad_id: int):
        self.s, self.seq_len, self.pad_id = settings, seq_len, pad_id
        self._rest = None  # (values, untrained, positions, piece lengths) not yet in a full window
        self.separators_added = 0
        self.lengths = LengthHistogram()  # of the documents with their separators, for the layouts they allow

    def add(self, docs: Documents) -> Windows | None:
        docs = self._separated(docs)
        positions = (np.arange(docs.values.size, dtype=np.int64)
                     - np.repeat(docs.offsets[:-1], docs.lengths))
        values, flags, lengths = docs.values, docs.untrained, docs.lengths
        if self._rest is not None:
            rv, rf, rp, rl = self._rest
            values, flags = np.concatenate([rv, values]), np.concatenate([rf, flags])
            positions, lengths = np.concatenate([rp, positions]), np.concatenate([rl, lengths])
        full = values.size // self.seq_len
        cut = full * self.seq_len
        windows = self._windows(values[:cut], flags[:cut], positions[:cut], lengths, full) if full else None
        if full:
            # the pieces of the rest: what is left of the document cut at the window end, then whole documents
            ends = np.cumsum(lengths)
            i = int(np.searchsorted(ends, cut, side="right"))
            rest_lengths = lengths[i:].copy()
            if rest_lengths.size:
                rest_lengths[0] = ends[i] - cut
            lengths = rest_lengths[rest_lengths > 0]
        self._rest = (values[cut:], flags[cut:], positions[cut:], lengths)
        return windows

    def close(self) -> Windows | None:
        if self._rest is None or self._rest[0].size == 0:
            return None
        values, flags, positions, lengths = self._rest
        self._rest = None
        return self._windows(values, flags, positions, lengths, 1)

    def _windows(self, values, flags, positions, lengths, windows) -> Windows:
        """Windows from a stream already in order: pieces are the documents cut at window ends."""
        seq_len = self.seq_len
        ends = np.cumsum(lengths)
        ends = ends[ends < values.size]
        cuts = np.arange(1, windows) * seq_len
        bounds = np.unique(np.concatenate([[0], ends, cuts, [values.size]]))
        piece_src = bounds[:-1]
        piece_len = np.diff(bounds)
        piece_window = piece_src // seq_len
        return _lay_out(values, flags, piece_src, piece_len, piece_window, positions[piece_src], windows, seq_len,
                        self.pad_id)


def best_fit_assign(sizes: np.ndarray, seq_len: int, opens: np.ndarray | None = None
                    ) -> tuple[np.ndarray, np.ndarray, int]:
    """Best-fit decreasing over pieces of the given sizes (each 1..seq_len): ``(order, window, windows)`` with
    ``order`` the pieces in the order they are placed (largest first, stable), ``window[i]`` the window of piece
    ``order[i]``, and the number of windows.  The group moves are those of
    :func:`corpuscle.kernels.packing.best_fit_decreasing_fills` (see its proof that they equal placing the pieces
    one at a time), with the windows of each room kept by id.

    Pieces marked in ``opens`` (the remainders of split documents) are placed first, each in a window of its own,
    so that they come first in it; the other pieces, largest first, fill the room behind them by best fit.
    Without ``opens`` this is best-fit decreasing exactly."""
    sizes = np.asarray(sizes, dtype=np.int64)
    opens = np.zeros(sizes.size, dtype=bool) if opens is None else np.asarray(opens, dtype=bool)
    order = np.lexsort((np.arange(sizes.size), -sizes, ~opens))  # openers first, then largest first
    window = np.empty(sizes.size, dtype=np.int64)
    rooms: dict[int, list[int]] = {}
    occupied: list[int] = []
    opened = 0
    pos = 0

    def add(r: int, ids: list[int]) -> None:
        if r and ids:
            if r not in rooms or not rooms[r]:
                rooms[r] = []
                bisect.insort(occupied, r)
            rooms[r].extend(ids)

    def take(r: int, m: int) -> list[int]:
        group = rooms[r]
        taken = group[len(group) - m:]
        del group[len(group) - m:]
        if not group:
            del occupied[bisect.bisect_left(occupied, r)]
        return taken

    def place(ids: list[int], r: int, s: int, c: int) -> None:
        """``c`` pieces of size ``s`` into the windows ``ids`` of room ``r``, ``r // s`` in each in turn (the last
        window may take fewer); each window then goes to its room left."""
        nonlocal pos
        k = r // s
        m, j = divmod(c, k)
        window[pos:pos + m * k] = np.repeat(ids[:m], k)
        pos += m * k
        add(r % s, ids[:m])
        if j:
            window[pos:pos + j] = ids[m]
            pos += j
            add(r - j * s, [ids[m]])

    if opens.any():  # each opener in a window of its own, before anything else is placed
        first = sizes[order[:int(opens.sum())]]
        opened = first.size
        window[:opened] = np.arange(opened)
        pos = opened
        room_of = seq_len - first
        by_room = np.argsort(room_of, kind="stable")
        rooms_left, first_at = np.unique(room_of[by_room], return_index=True)
        for r, ids in zip(rooms_left.tolist(), np.split(by_room, first_at[1:])):
            add(r, ids.tolist())
        sizes = sizes[~opens]
    values, counts = np.unique(sizes, return_counts=True)
    for s, c in zip(values[::-1].tolist(), counts[::-1].tolist()):
        while c:
            i = bisect.bisect_left(occupied, s)
            if i == len(occupied):
                break
            r = occupied[i]
            w, k = len(rooms[r]), r // s
            placed = min(c, w * k)  # every window of room r takes k pieces, or the pieces run out
            place(take(r, -(-placed // k)), r, s, placed)
            c -= placed
        if c:  # no open window fits: new ones of room seq_len
            count = -(-c // (seq_len // s))
            place(list(range(opened, opened + count)), seq_len, s, c)
            opened += count
    return order, window, opened


class BestFitPacker(_Packer):
    """Best-fit decreasing in buffers of about ``buffer_tokens`` tokens of documents."""

    def __init__(self, settings, seq_len: int, pad_id: int, buffer_tokens: int | None = None):
        self.s, self.seq_len, self.pad_id = settings, seq_len, pad_id
        self.buffer_tokens = BUFFER_TOKENS if buffer_tokens is None else buffer_tokens
        self._waiting: list[Documents] = []
        self._tokens = 0
        self.separators_added = 0
        self.lengths = LengthHistogram()  # of the documents with their separators, for the layouts they allow

    def add(self, docs: Documents) -> Windows | None:
        docs = self._separated(docs)
        if docs.count:
            self._waiting.append(docs)
            self._tokens += docs.values.size
        if self._tokens >= self.buffer_tokens:
            return self._pack()
        return None

    def close(self) -> Windows | None:
        return self._pack() if self._tokens else None

    def _pack(self) -> Windows:
        docs = Documents.join(self._waiting)
        self._waiting, self._tokens = [], 0
        seq_len = self.seq_len
        lengths = docs.lengths
        full, rest = np.divmod(lengths, seq_len)
        per_doc = full + (rest > 0)
        doc = np.repeat(np.arange(lengths.size), per_doc)
        chunk = np.arange(doc.size) - np.repeat(np.cumsum(per_doc) - per_doc, per_doc)
        piece_len = np.where(chunk < full[doc], seq_len, rest[doc])
        piece_src = docs.offsets[:-1][doc] + chunk * seq_len
        opens = (chunk == full[doc]) & (full[doc] > 0)  # the remainder of a split document
        order, window, windows = best_fit_assign(piece_len, seq_len, opens)
        # Window order: each split document's full windows in a row (they are opened one after another), then
        # the window its remainder opened, so its pieces follow each other and position_ids count on.
        of_piece = np.empty(piece_len.size, dtype=np.int64)
        of_piece[order] = window
        key = 2 * np.arange(windows, dtype=np.int64)
        remainders = np.flatnonzero(opens)
        key[of_piece[remainders]] = 2 * of_piece[remainders - 1] + 1
        rank = np.empty(windows, dtype=np.int64)
        rank[np.argsort(key, kind="stable")] = np.arange(windows)
        window = rank[window]
        by_window = np.argsort(window, kind="stable")  # pieces by window, in the order they went in
        placed = order[by_window]
        return _lay_out(docs.values, docs.untrained, piece_src[placed], piece_len[placed], window[by_window],
                        chunk[placed] * seq_len, windows, seq_len, self.pad_id)


def window_labels(win: Windows, seq_len: int, shifted: bool, ignore_index: int, dtype) -> np.ndarray:
    """Labels of the windows: the next token (shifted) or the token itself (aligned) where both are real and the
    target was trained in the input; ``ignore_index`` elsewhere."""
    n = win.values.size
    pos = np.arange(n) % seq_len
    real = pos < np.repeat(win.fill, seq_len)
    out = np.full(n, ignore_index, dtype=dtype)
    if shifted:
        ok = np.zeros(n, dtype=bool)
        ok[:-1] = real[:-1] & real[1:] & ~win.untrained[1:] & (pos[:-1] < seq_len - 1)
        at = np.flatnonzero(ok)
        out[at] = win.values[at + 1]
    else:
        ok = real & ~win.untrained
        out[ok] = win.values[ok]
    return out


def window_table(win: Windows, template: pa.Schema, settings, seq_len: int, shifted: bool | None) -> pa.Table:
    """The windows as a table of the input's schema: token ids, labels, position_ids, attention mask and length
    columns where the input has them; any other column is null."""
    s = settings
    n = win.count
    offsets = pa.array(np.arange(n + 1, dtype=np.int64) * seq_len, type=pa.int32() if n * seq_len < 2**31 else
                       pa.int64())
    real = (np.arange(n * seq_len) % seq_len) < np.repeat(win.fill, seq_len)
    columns = {}
    for field_ in template:
        name = field_.name
        if name == s.tokens_column:
            flat = win.values
        elif name == s.labels_column and shifted is not None:
            flat = window_labels(win, seq_len, shifted, s.ignore_index, np.int64)
        elif name == s.positions_column:
            flat = win.positions
        elif name == s.mask_column:
            flat = real.astype(np.int64)
        elif name in ("doc_lengths", "cu_seqlens"):
            columns[name] = _length_column(win, name, seq_len)
            continue
        else:
            columns[name] = pa.nulls(n)
            continue
        columns[name] = _list_of(flat, offsets, field_.type)
    names = list(columns)
    table = pa.table([columns[k] for k in names], names=names)
    return table.cast(pa.schema([template.field(k).with_nullable(True) for k in names]))


def _list_of(flat: np.ndarray, offsets: pa.Array, type_: pa.DataType) -> pa.Array:
    values = pa.array(flat)
    if pa.types.is_fixed_size_list(type_):
        return pa.FixedSizeListArray.from_arrays(values, type_.list_size)
    if pa.types.is_large_list(type_):
        return pa.LargeListArray.from_arrays(offsets.cast(pa.int64()), values)
    return pa.ListArray.from_arrays(offsets.cast(pa.int32()), values)


def _length_column(win: Windows, name: str, seq_len: int) -> pa.Array:
    """doc_lengths: the pieces' lengths per window; cu_seqlens: their cumulative offsets per window, from 0 to the
    window's length (the padding, where there is some, as a last segment)."""
    lengths, bounds = win.piece_lengths.astype(np.int64), win.piece_bounds.astype(np.int64)
    if name == "doc_lengths":
        return pa.ListArray.from_arrays(pa.array(bounds.astype(np.int32)), pa.array(lengths))
    padded = (win.fill < seq_len).astype(np.int64)
    per_window = np.diff(bounds) + 1 + padded  # 0, each piece's end, seq_len when padded
    offsets = np.zeros(win.count + 1, dtype=np.int64)
    np.cumsum(per_window, out=offsets[1:])
    values = np.zeros(int(offsets[-1]), dtype=np.int64)
    csum = np.cumsum(lengths)
    window_of_piece = np.repeat(np.arange(win.count), np.diff(bounds))
    before = np.concatenate([[0], csum])[bounds[:-1]]  # pieces' total before each window
    # piece p of window w ends at csum[p] - before[w], stored after the window's leading 0
    slot = offsets[:-1][window_of_piece] + 1 + (np.arange(lengths.size) - bounds[:-1][window_of_piece])
    values[slot] = csum - before[window_of_piece]
    values[offsets[1:][padded > 0] - 1] = seq_len
    return pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), pa.array(values))
