"""Documents of a shard: where each one starts, how long it is, and whether its window cut it.

A training shard stores documents in one of a few arrangements, and the length of a document is read differently
in each:

``text``
    Raw text, one document per row.  Its length is counted in tokens with a tokenizer file (``tokenizer``
    setting, :mod:`corpuscle.kernels.tokenize`), otherwise in UTF-8 bytes; the unit travels with every figure.
``position-restarts``
    Packed token rows whose ``position_ids`` restart at 0 at every document start and run on across rows: a row
    whose first position is not 0 continues the previous row's last document, so a document can run over several
    rows (and batches, and shards): its length is the sum of its pieces.
``separators``
    Packed token rows (with no ``position_ids``, or ones that restart at every window): a document starts after
    each ``eos`` (at the next row's start when the eos ends a row), at each ``bos`` (``bos-before``, ``both``), where
    ``position_ids`` restart inside a row, and after a padded row.  A row start that none of these marks continues
    the previous row's document (concatenate-and-chunk): a restart at a window start says nothing by itself.
``length-columns``
    Packed token rows with a document-length column (``doc_lengths``: the lengths of the documents in the row;
    ``cu_seqlens``: their cumulative offsets): the column gives the starts inside each row, joined across rows like
    ``separators`` (every row start is a document start when no separator id is known).
``one-per-row``
    Token rows that each hold at most one document (typically padded to the window): the row's real tokens are
    the document.
``undecided``
    Full, unpadded rows of one length with nothing to tell documents apart (no separator id, no restart inside a
    row, no length column): whether a row is a document or a window of a stream cannot be told; the length rules
    skip the shard and say so.

The arrangement of a token shard is inferred once, from its first records (:func:`infer_arrangement`), by the clear
majority of the rows: packed when enough rows hold a document boundary inside them (a separator followed by a real
token that is not a separator, or a position restart between real tokens), ``position-restarts`` when the
position_ids also run on across rows; else one document per row, and the few rows that hold a boundary are left to
the rules that report them.  The choice is a heuristic and is reported with its reason.

Real tokens are told from padding by :class:`~corpuscle.kernels.tokens.RealTokens`, the reading every rule and the
inference of facts share: the attention mask when there is one, else runs of ``pad_id`` at a row's end (keeping
the eos when ``pad_id`` equals ``eos_id``) and start, else every token is real.

A document is **cut** only when the layout shows the rest is gone: its last token is the last token of a full row
(no padding, at least ``seq_len`` tokens), it is not ``eos``, and the next row begins a new document (one document
per row, a bos or a position restart at the next row's start).  This needs ``eos_id`` and a separator convention
with ``eos`` after each document.  In packed streams a document longer than the window is reported as such, never
as cut.

Consecutive shards of one packed stream are read like consecutive rows (:func:`stitch_shards`): a shard whose last
document is left open continues into the next shard's first tokens when those start no document.

Everything per batch is a handful of whole-array passes (a comparison, a ``flatnonzero``, at most one cumulative
count when there is padding); per-document work is on arrays the size of the number of documents, and locations
are looked up only for the few documents that are reported.  :class:`DocumentTally` carries the one open document
across batches and keeps the lengths as a :class:`LengthHistogram`, so a shard's state stays small.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from corpuscle.io.batch import Batch, Flat, is_integer_list
from corpuscle.kernels.tokens import RealTokens, _real_key, real_tokens  # noqa: F401 (re-exported)

POSITIONS = "position-restarts"
SEPARATORS = "separators"
ONE_PER_ROW = "one-per-row"
TEXT = "text"
LENGTHS = "length-columns"
UNDECIDED = "undecided"
#: Arrangements whose documents run across rows (and shards).
PACKED = (POSITIONS, SEPARATORS, LENGTHS)

#: Quantiles reported for document lengths (percent), and how they are computed.
QUANTILES = (50, 90, 99)
QUANTILE_METHOD = "linear interpolation between closest ranks (numpy.percentile default)"


# -- length histogram ---------------------------------------------------------------------------------------

class LengthHistogram:
    """Counts of documents per length: exact, mergeable, and small.

    Lengths below :attr:`DENSE` are counted in a dense array while a shard streams; longer ones are kept as
    values (there are at most ``tokens / DENSE`` of them).  :meth:`compact` turns both into sorted
    ``sizes``/``counts`` (one entry per distinct length), the form that travels between processes and that
    :mod:`corpuscle.kernels.packing` takes (``counts=``).
    """

    DENSE = 1 << 15

    def __init__(self):
        self._dense: np.ndarray | None = None
        self._long: list[np.ndarray] = []
        self._long_size = 0
        self._sizes = np.zeros(0, dtype=np.int64)
        self._counts = np.zeros(0, dtype=np.int64)

    def add(self, lengths) -> None:
        lengths = np.asarray(lengths, dtype=np.int64).ravel()
        if lengths.size == 0:
            return
        short = lengths < self.DENSE
        if not short.all():
            self._long.append(lengths[~short])
            self._long_size += self._long[-1].size
            lengths = lengths[short]
            if self._long_size > self.DENSE:
                self._fold_long()
        if lengths.size:
            if self._dense is None:
                self._dense = np.zeros(self.DENSE, dtype=np.int64)
            counted = np.bincount(lengths)
            self._dense[:counted.size] += counted

    def add_counts(self, sizes, counts) -> None:
        """Add ``counts[i]`` documents of length ``sizes[i]``."""
        sizes = np.asarray(sizes, dtype=np.int64)
        counts = np.asarray(counts, dtype=np.int64)
        self.compact()
        self._sizes, self._counts = _merge(self._sizes, self._counts, sizes, counts)

    def _fold_long(self) -> None:
        values = np.concatenate(self._long)
        self._long, self._long_size = [], 0
        sizes, counts = np.unique(values, return_counts=True)
        self._sizes, self._counts = _merge(self._sizes, self._counts, sizes, counts.astype(np.int64))

    def compact(self) -> "LengthHistogram":
        """Fold everything into sorted ``sizes``/``counts`` (and free the dense array)."""
        if self._long:
            self._fold_long()
        if self._dense is not None:
            sizes = np.flatnonzero(self._dense)
            self._sizes, self._counts = _merge(self._sizes, self._counts, sizes, self._dense[sizes])
            self._dense = None
        return self

    @property
    def sizes(self) -> np.ndarray:
        return self.compact()._sizes

    @property
    def counts(self) -> np.ndarray:
        return self.compact()._counts

    @property
    def documents(self) -> int:
        return int(self.counts.sum())

    @property
    def tokens(self) -> int:
        return int(np.dot(self.sizes, self.counts)) if self.sizes.size else 0

    @property
    def max(self) -> int:
        return int(self.sizes[-1]) if self.sizes.size else 0

    def quantiles(self, percents=QUANTILES) -> dict[str, float]:
        """``{"p50": ..., "p90": ..., "p99": ...}`` of the lengths, as :func:`numpy.percentile` gives them with its
        default method (linear interpolation between the closest ranks), computed from the counts."""
        return {f"p{p:g}": percentile(self.sizes, self.counts, p) for p in percents}

    def expand(self) -> np.ndarray:
        """Every length once per document (``np.repeat``; for tests and small shards)."""
        return np.repeat(self.sizes, self.counts)

    @classmethod
    def merged(cls, histograms) -> "LengthHistogram":
        out = cls()
        for h in histograms:
            out.add_counts(h.sizes, h.counts)
        return out

    def __getstate__(self):
        self.compact()
        return dict(self.__dict__)


def _merge(sizes_a, counts_a, sizes_b, counts_b) -> tuple[np.ndarray, np.ndarray]:
    if sizes_b.size == 0:
        return sizes_a, counts_a
    both = np.concatenate([sizes_a, sizes_b])
    weights = np.concatenate([counts_a, counts_b])
    sizes, inverse = np.unique(both, return_inverse=True)
    counts = np.zeros(sizes.size, dtype=np.int64)
    np.add.at(counts, inverse, weights)
    return sizes, counts


def percentile(sizes: np.ndarray, counts: np.ndarray, percent: float) -> float:
    """The ``percent`` percentile of a length histogram, exactly as ``numpy.percentile`` (method ``"linear"``,
    its default) gives it for the expanded lengths: virtual index ``(n - 1) * q``, linear interpolation between
    the two closest ranks (numpy's own interpolation formula, so results agree to the last bit)."""
    n = int(counts.sum())
    if n == 0:
        return 0.0
    q = np.true_divide(percent, 100)
    virtual = (n - 1) * q
    lower = int(np.floor(virtual))
    upper = min(lower + 1, n - 1)
    cum = np.cumsum(counts)
    a = sizes[np.searchsorted(cum, lower, side="right")]
    b = sizes[np.searchsorted(cum, upper, side="right")]
    t = virtual - lower
    diff = b - a
    return float(b - diff * (1 - t)) if t >= 0.5 else float(a + diff * t)


# -- real tokens (one reading, shared with every rule: corpuscle.kernels.tokens) -----------------------------------

# RealTokens and _running live in corpuscle.kernels.tokens and stay importable from here.
__all__ = ["RealTokens", "LengthHistogram", "DocumentTally", "BatchDocuments", "documents_of", "infer_arrangement",
           "length_column", "length_boundaries", "length_column_problems", "undecided", "percentile", "QUANTILES",
           "QUANTILE_METHOD", "stitch_shards", "stitched_lengths", "Stitched", "PACKED", "POSITIONS", "SEPARATORS", "ONE_PER_ROW", "TEXT", "LENGTHS", "UNDECIDED"]


# -- arrangement ------------------------------------------------------------------------------------------------

def _positions(batch: Batch, tokens: Flat, settings) -> Flat | None:
    name = settings.positions_column
    if batch.has(name) and is_integer_list(batch.type_of(name)):
        positions = batch.flat(name)
        if np.array_equal(positions.lengths, tokens.lengths):
            return positions
    return None


def _marker(settings) -> tuple[str, int | None]:
    """The separator that marks document boundaries: ('eos', id) ends a document, ('bos', id) starts one."""
    if settings.separator == "bos-before":
        return "bos", settings.bos_id
    return "eos", settings.eos_id


def length_column(batch: Batch, settings) -> tuple[str, str, Flat] | None:
    """The batch's document-length column, if it has one: ``(kind, column name, flat values)`` with kind
    ``"doc_lengths"`` (lengths of the documents of each row) or ``"cu_seqlens"`` (their cumulative offsets, 0 ...
    the row's real length)."""
    for kind, name in (("doc_lengths", settings.doc_lengths_column), ("cu_seqlens", settings.cu_seqlens_column)):
        if batch.has(name) and is_integer_list(batch.type_of(name)):
            return kind, name, batch.flat(name)
    return None


def _piece_ends(kind: str, column: Flat) -> tuple[np.ndarray, np.ndarray]:
    """Per entry of a length column: its row and the offset within the row where a document ends (doc_lengths:
    the running sum within the row; cu_seqlens: the value itself)."""
    rows = column.row_of
    values = column.values.astype(np.int64)
    if kind == "cu_seqlens":
        return rows, values
    total = np.cumsum(values)
    before = np.concatenate([[0], total])[column.starts]  # sum of the earlier rows' entries
    return rows, total - before[rows]


def length_boundaries(batch: Batch, tokens: Flat, settings) -> np.ndarray:
    """Sorted flat indices where the batch's length column starts a document inside a row (strictly between the
    row's start and the end of its real tokens; shared per batch).  Empty without a length column."""
    found = length_column(batch, settings)
    if found is None:
        return np.zeros(0, dtype=np.int64)
    kind, name, column = found

    def make():
        if column.lengths.size != tokens.lengths.size:
            return np.zeros(0, dtype=np.int64)
        rows, ends = _piece_ends(kind, column)
        per_row = real_tokens(batch, tokens, settings).per_row
        inside = (ends > 0) & (ends < per_row[rows])
        return np.unique(tokens.starts[rows[inside]] + ends[inside])
    return batch.memo(("length-boundaries", name, kind) + _real_key(settings)[1:], make)


def length_column_problems(batch: Batch, tokens: Flat, settings) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Where the batch's length column contradicts its token rows, as batch-local ``(rows, offsets)`` per kind:

    ``lengths-mismatch``: rows whose lengths do not describe the row: a negative length, cumulative offsets that
    do not start at 0 or go down, or a total that is not the row's real length (offset: where the first problem
    is, the smaller of the total and the real length for a wrong total);
    ``lengths-vs-separators``: document starts the column gives inside a row that the separator does not mark
    (under eos-after and both: the token before is not eos; under bos-before: the token is not bos; offset: the
    start).  Needs the separator id; without it only the first kind is checked."""
    found = length_column(batch, settings)
    empty = (np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64))
    if found is None:
        return {}
    kind, _, column = found
    if column.lengths.size != tokens.lengths.size:
        return {}
    per_row = real_tokens(batch, tokens, settings).per_row
    rows, ends = _piece_ends(kind, column)
    values = column.values.astype(np.int64)
    n_rows = tokens.lengths.size
    big = np.iinfo(np.int64).max
    first = np.full(n_rows, big, dtype=np.int64)  # per row: offset of its first problem
    if kind == "doc_lengths":
        bad = values < 0
        np.minimum.at(first, rows[bad], np.maximum(ends[bad] - values[bad], 0))
        total = np.zeros(n_rows, dtype=np.int64)
        np.add.at(total, rows, values)
    else:
        lead = column.starts[column.lengths > 0]
        wrong_start = values[lead] != 0
        np.minimum.at(first, rows[lead[wrong_start]], 0)
        down = np.flatnonzero(values[1:] < values[:-1]) + 1
        down = down[~column.is_first[down]]
        np.minimum.at(first, rows[down], np.maximum(values[down - 1], 0))
        total = np.zeros(n_rows, dtype=np.int64)
        has = column.lengths > 0
        total[has] = values[column.ends[has] - 1]
    mismatch = total != per_row
    np.minimum.at(first, np.flatnonzero(mismatch), np.clip(np.minimum(total, per_row)[mismatch], 0, None))
    bad_rows = np.flatnonzero(first != big)
    out = {"lengths-mismatch": (bad_rows, np.minimum(first[bad_rows], tokens.lengths[bad_rows]))}  # inside the row
    name, marker = _marker(settings)
    if marker is None:
        out["lengths-vs-separators"] = empty
        return out
    starts = length_boundaries(batch, tokens, settings)
    starts = starts[~np.isin(tokens.rows_at(starts), bad_rows)]  # a row whose lengths are wrong is reported once
    if settings.separator in ("eos-after", "both"):
        unmarked = tokens.values[starts - 1] != settings.eos_id
        if settings.separator == "both" and settings.bos_id is not None:
            unmarked |= tokens.values[starts] != settings.bos_id
    else:
        unmarked = tokens.values[starts] != marker
    r, off = tokens.locate(starts[unmarked])
    out["lengths-vs-separators"] = (r, off)
    return out


def _inner_restarts(batch: Batch, tokens: Flat, settings, real: RealTokens) -> np.ndarray | None:
    """Flat indices where position_ids restart at 0 inside a row between two real tokens (None without a usable
    position_ids column)."""
    positions = _positions(batch, tokens, settings)
    if positions is None:
        return None
    at = np.flatnonzero(positions.values == 0)
    at = at[~tokens.is_first[at]]
    if real.mask is not None:
        at = at[real.mask[at] & real.mask[at - 1]]
    return at


def _inner_separators(tokens: Flat, real: RealTokens, name: str, marker: int) -> np.ndarray:
    """Flat indices of the document starts a separator marks inside a row: after an eos that a real token other
    than eos follows in the same row (a doubled eos starts no document), or at a bos that is not its row's first
    real token."""
    values = tokens.values
    at = np.flatnonzero(values == marker)
    if real.mask is not None:
        at = at[real.mask[at]]
    if name == "eos":
        at = at + 1
        at = at[at < values.size]
        at = at[~tokens.is_first[at]]
        keep = values[at] != marker
        if real.mask is not None:
            keep &= real.mask[at]
        return at[keep]
    first = real.first_from(tokens.starts[tokens.rows_at(at)])
    return at[at != first]


#: A shard is read as packed when at least this share of its first rows hold a document boundary inside them (or
#: PACKED_SHARE_UNPADDED, and at least two rows, when at most MOSTLY_PADDED of the rows are padded: long documents
#: packed into windows leave few rows with a boundary inside, one padded document per row pads most rows): a few
#: rows that disagree do not change the reading.
PACKED_SHARE = 0.10
PACKED_SHARE_UNPADDED = 0.02
MOSTLY_PADDED = 0.5
#: Position_ids run on across rows (a row may start mid-document at a position > 0) when at least this share of
#: the rows start at a position above 0.
CARRY_SHARE = 0.10


def undecided(batch: Batch, settings) -> str | None:
    """Why the documents of this token batch cannot be told apart (see :data:`UNDECIDED`), or None; cheap when a
    separator id is known (then they always can)."""
    if _marker(settings)[1] is not None or length_column(batch, settings) is not None:
        return None
    arrangement, why = infer_arrangement(batch, settings)
    return why if arrangement == UNDECIDED else None


def infer_arrangement(batch: Batch, settings) -> tuple[str, str]:
    """How documents sit in a shard's rows, from its first records: ``(arrangement, why)`` (a heuristic decided
    by the clear majority of the rows; cached on the batch)."""
    key = ("arrangement", settings.tokens_column, settings.mask_column, settings.positions_column,
           settings.separator, settings.eos_id, settings.bos_id, settings.pad_id, settings.doc_lengths_column,
           settings.cu_seqlens_column)
    return batch.memo(key, lambda: _infer_arrangement(batch, settings))


def _infer_arrangement(batch: Batch, settings) -> tuple[str, str]:
    tok = settings.tokens_column
    if not (batch.has(tok) and is_integer_list(batch.type_of(tok))):
        return TEXT, "raw text, one document per row"
    tokens = batch.flat(tok)
    found = length_column(batch, settings)
    if found is not None:
        return LENGTHS, f"the {found[1]} column gives the documents of each row"
    real = real_tokens(batch, tokens, settings)
    with_real = real.per_row > 0
    rows = int(np.count_nonzero(with_real))
    padded = int(np.count_nonzero(with_real & (real.per_row < tokens.lengths)))
    restarts = _inner_restarts(batch, tokens, settings, real)
    name, marker = _marker(settings)
    marks = [a for a in (restarts, None if marker is None else _inner_separators(tokens, real, name, marker))
             if a is not None and a.size]
    inside = np.zeros(tokens.lengths.size, dtype=bool)
    for at in marks:
        inside[tokens.rows_at(at)] = True
    packed_rows = int(np.count_nonzero(inside))
    what = " or ".join(w for w, a in (("position restarts", restarts), (f"{name}", marker)) if a is not None)
    unpadded = padded <= max(1, int(rows * 0.01))
    few = PACKED_SHARE_UNPADDED * rows
    packed = packed_rows > 0 and (packed_rows >= PACKED_SHARE * rows
                                  or (unpadded and packed_rows >= few)
                                  or (padded <= MOSTLY_PADDED * rows and packed_rows >= max(2, few)))
    where = f"of the first {rows:,} rows"
    positions = _positions(batch, tokens, settings)
    carry = 0
    if positions is not None and rows and (packed or unpadded):
        # rows that start mid-document: their first real position is above 0 (left padding aside: unpadded rows)
        first = real.first_from(tokens.starts[with_real])
        carry = int(np.count_nonzero(positions.values[first] > 0))
    if carry and carry >= CARRY_SHARE * rows:
        return POSITIONS, (f"{carry:,} {where} start at a position above 0 and {packed_rows:,} hold a document "
                           f"boundary inside them: packed documents whose position_ids restart per document and "
                           f"run on across rows")
    if packed:
        return SEPARATORS, (f"{packed_rows:,} {where} hold a document boundary inside them ({what}): packed "
                            f"documents, joined across rows unless a separator or padding ends them")
    if marker is None and (restarts is None or not restarts.size):
        lengths = tokens.lengths[with_real]
        counts = np.bincount(lengths) if lengths.size else np.zeros(1, dtype=np.int64)
        common, length = counts.max(), int(counts.argmax())
        fits = settings.seq_len is None or length <= settings.seq_len  # rows over the window are split anyway
        if unpadded and rows and common >= 0.9 * rows and fits:
            return UNDECIDED, (f"rows of one length ({length:,} tokens), unpadded, and no {name}_id, no position "
                               f"restart inside a row and no length column to tell documents apart: whether each "
                               f"row is one document or a window of a packed stream cannot be told")
        return ONE_PER_ROW, (f"no {name}_id known and no position restart inside a row: each row is taken as one "
                             f"document ({padded:,} {where} are padded)")
    others = f"; {packed_rows:,} rows that hold a boundary inside are reported as such" if packed_rows else ""
    return ONE_PER_ROW, f"no boundary ({what}) inside {rows - packed_rows:,} {where}: one document per row{others}"


# -- documents of one batch -------------------------------------------------------------------------------------

@dataclass
class BatchDocuments:
    """The documents of one batch, as pieces to join with what came before and after.

    ``head`` real tokens at the start of the batch continue the document left open by the previous batch;
    ``closes`` says whether that document ends in this batch.  ``lengths``/``cut`` describe the documents that
    start and end here, ``starts`` where each starts (flat index of its first token, or row for text).  ``tail``
    real tokens at the end start a document that continues into the next batch (``tail_start``), and
    ``tail_cut`` says whether it is cut if the next batch does not continue it.
    """

    arrangement: str
    unit: str
    head: int
    closes: bool
    head_cut: bool
    lengths: np.ndarray
    cut: np.ndarray
    starts: np.ndarray
    tail: int
    tail_start: int
    tail_cut: bool
    slots: int
    real_tokens: int
    rows: int
    padded_rows: int
    locate: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]


def documents_of(batch: Batch, settings, arrangement: str) -> BatchDocuments:
    """The documents of ``batch`` under ``arrangement`` (cached on the batch, so rules sharing it pay once)."""
    key = (arrangement, settings.tokens_column, settings.text_column, settings.mask_column,
           settings.positions_column, settings.eos_id, settings.bos_id, settings.pad_id, settings.seq_len,
           settings.separator, settings.tokenizer, settings.doc_lengths_column, settings.cu_seqlens_column)
    return batch.memo(("documents",) + key, lambda: _text_documents(batch, settings) if arrangement == TEXT else
                      _token_documents(batch, settings, arrangement))


def _text_documents(batch: Batch, settings) -> BatchDocuments:
    from corpuscle.kernels.tokenize import text_lengths

    column = batch.column(settings.text_column)
    lengths, present, unit = text_lengths(column, settings.tokenizer)
    keep = lengths > 0
    rows = np.flatnonzero(present)[keep]
    lengths = lengths[keep]

    shard_rows = batch.rows  # not the batch: it caches these documents, and a cycle would outlive the batch

    def locate(which):
        return shard_rows[rows[which]], np.zeros(np.size(which), dtype=np.int64)

    return BatchDocuments(TEXT, unit, 0, True, False, lengths, np.zeros(lengths.size, dtype=bool),
                          np.arange(lengths.size), 0, -1, False, 0, int(lengths.sum()), len(batch), 0, locate)


def _token_documents(batch: Batch, settings, arrangement: str) -> BatchDocuments:
    tokens = batch.flat(settings.tokens_column)
    values, offsets = tokens.values, tokens.offsets
    n = values.size
    real = real_tokens(batch, tokens, settings)
    name, marker = _marker(settings)
    nonempty = tokens.lengths > 0

    # Document starts (flat indices, sorted).
    if arrangement == POSITIONS:  # position_ids restart per document and run on across rows
        restart = _positions(batch, tokens, settings).values == 0
        if real.mask is not None:
            restart &= real.mask
        starts = np.flatnonzero(restart)
    elif arrangement in (SEPARATORS, LENGTHS):
        # Packed rows: a document starts after each eos (at the next row's start when the eos ends a row), at each
        # bos, where position_ids restart inside a row, where the length column says, and after a padded row. A
        # row start that none of these marks continues the previous row's document (concatenate-and-chunk).
        parts = []
        eos = settings.eos_id if settings.separator in ("eos-after", "both") else None
        bos = settings.bos_id if settings.separator in ("bos-before", "both") else None
        if eos is not None:
            at = np.flatnonzero(values == eos)
            if real.mask is not None:
                at = at[real.mask[at]]
            parts.append(at + 1)
        if bos is not None:
            at = np.flatnonzero(values == bos)
            parts.append(at[real.mask[at]] if real.mask is not None else at)
        restarts = _inner_restarts(batch, tokens, settings, real)
        if restarts is not None:
            parts.append(restarts)
        if arrangement == LENGTHS:
            parts.append(length_boundaries(batch, tokens, settings))
            if eos is None and bos is None:  # nothing says whether a row continues the previous one
                parts.append(tokens.starts[nonempty])
        parts.append(tokens.ends[nonempty & (real.per_row < tokens.lengths)])  # padding ends a row's last document
        starts = np.unique(np.concatenate(parts)) if parts else np.zeros(0, dtype=np.int64)
    else:  # ONE_PER_ROW
        starts = tokens.starts[nonempty]

    # Real tokens of each segment: [0, s0), [s0, s1), ..., [s_last, n).
    bounds = np.empty(starts.size + 2, dtype=np.int64)
    bounds[0], bounds[-1] = 0, n
    bounds[1:-1] = starts
    seg = np.diff(real.upto(bounds))

    # A segment is cut when it ends at the end of a full row whose last token is not eos.
    cut = np.zeros(seg.size, dtype=bool)
    if marker is not None and name == "eos" and settings.seq_len is not None and n:
        full_cut = nonempty & (real.per_row == tokens.lengths) & (tokens.lengths >= settings.seq_len)
        full_cut[nonempty] &= values[tokens.ends[nonempty] - 1] != marker
        if full_cut.any():
            ends = bounds[1:]
            at = np.searchsorted(offsets, ends, side="left")
            at_row_end = (ends > 0) & (at < offsets.size)
            at_row_end[at_row_end] &= offsets[at[at_row_end]] == ends[at_row_end]
            cut[at_row_end] = full_cut[at[at_row_end] - 1]

    k = starts.size
    closed_tail = arrangement == ONE_PER_ROW
    middle = slice(1, k + 1) if closed_tail else slice(1, k)
    lengths, doc_cut = seg[middle], cut[middle]
    doc_starts = starts[:lengths.size]
    keep = lengths > 0
    if not keep.all():
        lengths, doc_cut, doc_starts = lengths[keep], doc_cut[keep], doc_starts[keep]
    tail, tail_start, tail_cut = 0, -1, bool(cut[k])  # with no start in the batch, cut[0] is the candidate
    if k and not closed_tail:
        tail, tail_start = int(seg[k]), int(starts[-1])
    head = int(seg[0])

    # The closure holds the batch's row indices, not the batch: the batch caches these documents, and a reference
    # cycle through it would keep its Arrow buffers alive until the cyclic garbage collector runs.
    shard_rows = batch.rows

    def locate(flat_index):
        flat_index = real.first_from(np.minimum(np.asarray(flat_index, dtype=np.int64), n))
        rows, offs = tokens.locate(flat_index)
        return shard_rows[rows], offs

    return BatchDocuments(arrangement, "tokens", head, k > 0, bool(cut[0]) if k else False, lengths, doc_cut,
                          doc_starts, tail, tail_start, tail_cut, n, real.total, len(batch),
                          int(np.count_nonzero(real.per_row < tokens.lengths)), locate)


# -- a shard's documents ----------------------------------------------------------------------------------------

Hit = Callable[[np.ndarray, np.ndarray], None]


class DocumentTally:
    """Streaming tally of a shard's documents: lengths (histogram), documents over the window, cut documents,
    and the token budget as built (slots, real tokens), with the one open document carried across batches.

    ``add`` takes the :class:`BatchDocuments` of each batch in order; ``close`` ends the shard (the open document
    is complete then, but never counted as cut: it may continue in the next shard).  ``on_overlong`` and
    ``on_cut`` receive ``(rows, offsets)`` of the start of each such document, in shard order.

    A tally of one part of a split shard (see :mod:`corpuscle.engine.split`) is open at both ends.  When parts come before it
    (:meth:`expect_lead`), the real tokens before its first document start are the *lead*: they belong to the
    document the previous part left open, so they are held aside, not counted as a document.  When parts follow,
    it ends with :meth:`pause` instead of :meth:`close`, keeping its open document in ``carry``.  :meth:`joined`
    then stitches two consecutive parts: the previous part's carry plus this part's lead is one document, emitted
    between the two parts' own documents -- so the joined tally is the tally of one scan of both parts.
    """

    def __init__(self, seq_len: int | None, on_overlong: Hit | None = None, on_cut: Hit | None = None):
        self.seq_len = seq_len
        self.unit: str | None = None
        self.arrangement: str | None = None
        self.lengths = LengthHistogram()
        self.overlong = 0
        self.overlong_tokens = 0
        self.beyond_window = 0
        self.cut = 0
        self.slots = 0
        self.real_tokens = 0
        self.rows = 0
        self.padded_rows = 0
        self.carry: list | None = None  # [length, row, offset, cut if closed at the next boundary]
        # Of a part that continues an earlier one: [length, row, offset, cut if closed here (None: as the earlier
        # part's carry says), closed (a document starts after it, or the shard ended)]
        self.lead: list | None = None
        self._on_overlong = on_overlong
        self._on_cut = on_cut
        # The shard's first document when its first real tokens start no document (they continue a document of
        # the shard before, in a packed stream), and the document the shard's end left open (no eos, no padding
        # ended it): [length, row, offset] each, for stitching consecutive shards (:func:`stitch_shards`). Not
        # kept by a tally joined from parts of a split shard.
        self.opening: list | None = None
        self.closing: list | None = None
        self.stitchable = True
        self._opening_doc: list | None = None

    def expect_lead(self) -> None:
        """This tally's first rows may continue a document of the previous part of the shard: hold them aside."""
        if self.rows or self.lead is not None:
            raise RuntimeError("expect_lead must be called before the first batch")
        self.lead = [0, -1, -1, None, False]

    def add(self, docs: BatchDocuments) -> None:
        self.unit = self.unit or docs.unit
        self.arrangement = self.arrangement or docs.arrangement
        self.slots += docs.slots
        self.real_tokens += docs.real_tokens
        self.rows += docs.rows
        self.padded_rows += docs.padded_rows
        lead = self.lead if self.lead is not None and not self.lead[4] else None
        open_doc = lead if lead is not None else self.carry
        if docs.head:
            if open_doc is None or (lead is not None and open_doc[0] == 0):  # a new document, or a lead begun
                row, off = docs.locate(np.zeros(1, dtype=np.int64))
                if open_doc is None:
                    open_doc = self.carry = [0, int(row[0]), int(off[0]), False]
                    if self.rows == docs.rows and docs.arrangement in PACKED and self.lead is None:
                        self._opening_doc = open_doc  # the shard's first tokens continue an earlier document
                else:
                    open_doc[1:3] = int(row[0]), int(off[0])
            open_doc[0] += docs.head
            open_doc[3] = docs.head_cut if docs.closes else docs.tail_cut
        if docs.closes:
            if lead is not None:
                lead[4] = True
            elif self.carry is not None:
                self._close_carry(self.carry[3])
        self._emit(docs.lengths, docs.cut, docs.starts, docs.locate)
        if docs.tail:
            row, off = docs.locate(np.asarray([docs.tail_start]))
            self.carry = [docs.tail, int(row[0]), int(off[0]), docs.tail_cut]

    def close(self) -> None:
        """The shard ended: its open document is complete (not counted as cut)."""
        if self.lead is not None and not self.lead[4]:
            self.lead[3], self.lead[4] = False, True  # no document started in this part: the lead ran to the end
        if self.carry is not None:
            if self.arrangement in PACKED:
                self.closing = list(self.carry[:3])
            self._close_carry(False)
        self.pause()

    def pause(self) -> None:
        """The part ended but the shard goes on: keep the open document for :meth:`joined`."""
        self.lengths.compact()
        self._on_overlong = self._on_cut = None  # callbacks do not travel between processes

    def joined(self, later: "DocumentTally", on_overlong: Hit | None = None,
               on_cut: Hit | None = None) -> "DocumentTally":
        """The tally of this part and the ``later`` one that follows it (which called :meth:`expect_lead`), as one
        scan of both gives it; the document stitched at the cut is reported to ``on_overlong``/``on_cut``."""
        out = DocumentTally(self.seq_len, on_overlong, on_cut)
        out.unit = self.unit or later.unit
        out.arrangement = self.arrangement or later.arrangement
        for name in ("overlong", "overlong_tokens", "beyond_window", "cut", "slots", "real_tokens", "rows",
                     "padded_rows"):
            setattr(out, name, getattr(self, name) + getattr(later, name))
        out.lengths = LengthHistogram.merged([self.lengths, later.lengths])
        out.stitchable = False  # the documents at the shard's two ends are not tracked through the parts
        out.lead = None if self.lead is None else list(self.lead)
        carry, lead = self.carry, later.lead or [0, -1, -1, None, True]
        if out.lead is not None and not out.lead[4]:  # no document started in this part: the lead goes on
            if not out.lead[0]:
                out.lead[1:3] = lead[1:3]
            out.lead[0] += lead[0]
            out.lead[3] = lead[3] if lead[3] is not None else out.lead[3]
            out.lead[4] = lead[4]
            out.carry = None if later.carry is None else list(later.carry)
            return out
        length = (carry[0] if carry else 0) + lead[0]
        row, off = (carry[1], carry[2]) if carry else (lead[1], lead[2])
        cut = lead[3] if lead[3] is not None else bool(carry and carry[3])
        if lead[4]:
            out.carry = None if later.carry is None else list(later.carry)
            if length:
                out.carry, after = [length, row, off, cut], out.carry
                out._close_carry(cut)
                out.carry = after
        else:  # nothing started in the later part: the document goes on
            out.carry = [length, row, off, cut] if length else None
        out._on_overlong = out._on_cut = None
        return out

    def _close_carry(self, cut: bool) -> None:
        if self.carry is self._opening_doc:
            self.opening = list(self.carry[:3])
            self._opening_doc = None
        length, row, off, _ = self.carry
        self.carry = None
        one = np.asarray([length], dtype=np.int64)
        self._emit(one, np.asarray([cut]), np.zeros(1, dtype=np.int64),
                   lambda which: (np.full(np.size(which), row, dtype=np.int64),
                                  np.full(np.size(which), off, dtype=np.int64)))

    def _emit(self, lengths: np.ndarray, cut: np.ndarray, starts: np.ndarray, locate) -> None:
        if lengths.size == 0:
            return
        self.lengths.add(lengths)
        if self.seq_len is not None and self.unit == "tokens":
            over = lengths > self.seq_len
            if over.any():
                self.overlong += int(over.sum())
                self.overlong_tokens += int(lengths[over].sum())
                self.beyond_window += int(lengths[over].sum()) - int(over.sum()) * self.seq_len
                if self._on_overlong:
                    self._on_overlong(*locate(starts[over]))
        if cut.any():
            self.cut += int(cut.sum())
            if self._on_cut:
                self._on_cut(*locate(starts[cut]))

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_on_overlong"] = state["_on_cut"] = None
        return state

    def __setstate__(self, state):
        state.setdefault("opening", None)
        state.setdefault("closing", None)
        state.setdefault("stitchable", False)
        state.setdefault("_opening_doc", None)
        self.__dict__.update(state)


@dataclass
class Stitched:
    """A document that runs from the end of one shard into the start of the next (``before`` and ``after`` are
    the indices of the two tallies): its length, and where it starts (row, offset in the earlier shard)."""

    before: int
    after: int
    length: int
    row: int
    offset: int
    pieces: tuple[int, int]


def stitch_shards(tallies: list["DocumentTally"]) -> list[Stitched]:
    """The documents that run from one shard into the next, for consecutive shards of one packed stream (``tallies``
    in shard order): where a shard ends with its last document left open (no eos, no padding ended it) and the
    next one begins with tokens that start no document, the two pieces are one document -- the same reading as
    between two rows.  A shard that is one open document from end to end joins a chain.  Tallies of other
    arrangements, of another unit or window, or joined from parts of a split shard, are not stitched."""
    stitched: list[Stitched] = []
    for i in range(len(tallies) - 1):
        a, b = tallies[i], tallies[i + 1]
        if not (a.stitchable and b.stitchable and a.closing and b.opening and a.unit == b.unit == "tokens"
                and a.seq_len == b.seq_len):
            continue
        if stitched and stitched[-1].after == i and a.opening == a.closing:  # a is one open document: extend
            chain = stitched.pop()
            stitched.append(Stitched(chain.before, i + 1, chain.length + b.opening[0], chain.row, chain.offset,
                                     (chain.pieces[0], b.opening[0])))
        else:
            stitched.append(Stitched(i, i + 1, a.closing[0] + b.opening[0], a.closing[1], a.closing[2],
                                     (a.closing[0], b.opening[0])))
    return stitched


def stitched_lengths(tallies: list["DocumentTally"], stitched: list[Stitched],
                     members: list[int] | None = None) -> LengthHistogram:
    """The lengths of the documents of ``tallies`` (only those at the indices ``members``, when given), with the
    pieces of every stitched document among them replaced by the whole document."""
    members = list(range(len(tallies))) if members is None else members
    merged = LengthHistogram.merged(tallies[i].lengths for i in members)
    inside = [st for st in stitched if st.before in members and st.after in members]
    if not inside:
        return merged
    remove = []
    for st in inside:
        remove += list(st.pieces)
        remove += [tallies[k].opening[0] for k in range(st.before + 1, st.after)]  # whole shards in a chain
    sizes, counts = np.unique(np.asarray(remove, dtype=np.int64), return_counts=True)
    out = LengthHistogram()
    out.add_counts(merged.sizes, merged.counts)
    out.add_counts(sizes, -counts.astype(np.int64))
    out.add_counts(np.asarray([st.length for st in inside], dtype=np.int64), np.ones(len(inside), dtype=np.int64))
    keep = out.counts > 0
    out._sizes, out._counts = out.sizes[keep], out.counts[keep]
    return out
