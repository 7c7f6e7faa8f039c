"""Batch: a slice of one shard's records as Arrow columns, with flat numpy views of list columns.

A tokenized list column (``input_ids``, ``labels`` ...) is seen as one flat numpy array of all values plus an
offsets array (row ``i`` is ``values[offsets[i]:offsets[i+1]]``).  Rules write numpy expressions over these flat
arrays; nothing here loops over rows.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.types as pat


@dataclass(frozen=True)
class Shard:
    """A file to scan: its uri as the user gave it, its format, and its size in bytes."""

    uri: str
    path: str
    format: str  # "jsonl" | "parquet" | "arrow"
    compression: str | None = None
    length: int = 0

    @property
    def line_based(self) -> bool:
        return self.format == "jsonl"


class Flat:
    """A list column as flat ``values`` plus ``offsets`` (length rows+1, starting at 0)."""

    __slots__ = ("values", "offsets", "__dict__")

    def __init__(self, values: np.ndarray, offsets: np.ndarray):
        self.values = values
        self.offsets = offsets

    @cached_property
    def lengths(self) -> np.ndarray:
        return np.diff(self.offsets)

    @property
    def starts(self) -> np.ndarray:
        return self.offsets[:-1]

    @property
    def ends(self) -> np.ndarray:
        return self.offsets[1:]

    # Segment operations: per-row results from whole-array passes, without an N-sized row index.  Prefer these to
    # ``row_of``/``position`` in hot paths: a cumulative sum is one pass, a gather over N positions is several.

    def row_counts(self, mask: np.ndarray, lo: np.ndarray | None = None, hi: np.ndarray | None = None) -> np.ndarray:
        """How many positions of each row have ``mask`` set, optionally only within ``[lo, hi)`` (flat indices).

        A bool mask is counted through its :class:`MaskRanks` (the mask packed 8 positions a byte); ``mask`` may
        also be a running count from :func:`running_count`, to reuse it for several ranges, or an integer mask
        (summed per whole row).
        """
        n = self.values.size
        if mask.size == n + 1 and mask.dtype != bool:
            lo = self.starts if lo is None else np.clip(lo, 0, n)
            hi = self.ends if hi is None else np.clip(np.maximum(hi, lo), 0, n)
            return mask[hi].astype(np.int64) - mask[lo]
        if mask.dtype != bool and lo is None and hi is None:
            return self._segment_sums(mask)
        lo = self.starts if lo is None else np.clip(lo, self.starts, self.ends)
        hi = self.ends if hi is None else np.clip(np.maximum(hi, lo), lo, self.ends)
        if mask.dtype != bool:
            total = np.zeros(n + 1, dtype=np.int64)
            np.cumsum(mask, out=total[1:])
            return total[hi] - total[lo]
        ranks = MaskRanks(mask)
        return ranks.rank(hi) - ranks.rank(lo)

    def _segment_sums(self, mask: np.ndarray) -> np.ndarray:
        """Per row, the sum of an integer ``mask`` over the row."""
        rows = self.lengths.size
        if rows == 0 or mask.size == 0:
            return np.zeros(rows, dtype=np.int64)
        filled = self.lengths > 0
        if filled.all():
            return np.add.reduceat(mask, self.starts, dtype=np.int64)
        # The starts of non-empty rows increase strictly, and each one's sum runs to the next one's start: its end.
        sums = np.zeros(rows, dtype=np.int64)
        sums[filled] = np.add.reduceat(mask, self.starts[filled], dtype=np.int64)
        return sums

    def count_positions(self, positions: np.ndarray) -> np.ndarray:
        """Per row, how many of the given flat positions (sorted ascending) lie in it: a binary search per row
        bound, so a few thousand separator positions cost nothing like a pass over the batch."""
        return np.diff(np.searchsorted(positions, self.offsets, side="left"))

    def first_of(self, positions: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """For the given rows, the first of the flat ``positions`` (sorted ascending) inside each row, or -1."""
        rows = np.asarray(rows, dtype=np.int64)
        if positions.size == 0:
            return np.full(rows.size, -1, dtype=np.int64)
        at = np.searchsorted(positions, self.offsets[rows], side="left")
        found = positions[np.minimum(at, positions.size - 1)]
        return np.where((at < positions.size) & (found < self.offsets[rows + 1]), found, -1)

    def first_where(self, mask: np.ndarray) -> np.ndarray:
        """Per row, the flat index of the first position where ``mask`` is set, or -1 when there is none."""
        ranks = MaskRanks(mask)
        before, after = ranks.rank(self.starts), ranks.rank(self.ends)
        has = after > before
        found = np.full(has.size, -1, dtype=np.int64)
        found[has] = ranks.select(before[has] + 1)
        return found

    def last_where(self, mask: np.ndarray) -> np.ndarray:
        """Per row, the flat index of the last position where ``mask`` is set, or -1 when there is none."""
        ranks = MaskRanks(mask)
        before, after = ranks.rank(self.starts), ranks.rank(self.ends)
        has = after > before
        found = np.full(has.size, -1, dtype=np.int64)
        found[has] = ranks.select(after[has])
        return found

    def take(self, rows: np.ndarray) -> tuple["Flat", np.ndarray]:
        """The given rows as a new Flat, and the flat positions they came from (to take parallel columns too)."""
        rows = np.asarray(rows, dtype=np.int64)
        lengths = self.lengths[rows]
        offsets = np.zeros(rows.size + 1, dtype=np.int64)
        np.cumsum(lengths, out=offsets[1:])
        source = np.arange(offsets[-1], dtype=np.int64) + np.repeat(self.starts[rows] - offsets[:-1], lengths)
        return Flat(self.values[source], offsets), source

    def rows_at(self, positions: np.ndarray) -> np.ndarray:
        """Batch-local row of each flat position (binary search: cheap for a few positions, not for all)."""
        return np.searchsorted(self.offsets, positions, side="right") - 1

    def first_in_row(self, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Rows having at least one position with ``mask`` set, and the in-row offset of the first such position."""
        hits = np.flatnonzero(mask)
        if hits.size == 0:
            empty = np.zeros(0, dtype=np.int64)
            return empty, empty
        rows = self.rows_at(hits)
        rows, first = np.unique(rows, return_index=True)
        return rows, hits[first] - self.offsets[rows]

    def locate(self, positions: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Batch-local (row, in-row offset) of flat positions."""
        rows = self.rows_at(positions)
        return rows, positions - self.offsets[rows]

    @cached_property
    def row_of(self) -> np.ndarray:
        """For every flat position, the batch-local row it belongs to (N-sized: avoid in hot paths)."""
        return np.repeat(np.arange(self.lengths.size, dtype=np.int64), self.lengths)

    @cached_property
    def position(self) -> np.ndarray:
        """For every flat position, its 0-based token index within its row (N-sized: avoid in hot paths)."""
        out = np.arange(self.values.size, dtype=np.int64)
        out -= np.repeat(self.starts, self.lengths)
        return out

    @cached_property
    def is_last(self) -> np.ndarray:
        """True at the last position of every row."""
        mask = np.zeros(self.values.size, dtype=bool)
        mask[self.ends[self.lengths > 0] - 1] = True
        return mask

    @cached_property
    def is_first(self) -> np.ndarray:
        """True at the first position of every row."""
        mask = np.zeros(self.values.size, dtype=bool)
        mask[self.starts[self.lengths > 0]] = True
        return mask

    def count_per_row(self, mask: np.ndarray) -> np.ndarray:
        """How many positions of each row have ``mask`` set."""
        return self.row_counts(mask)


def running_count(mask: np.ndarray) -> np.ndarray:
    """``out[i]`` = how many of ``mask[:i]`` are set (length N+1): segment counts are differences of it.

    32-bit when the batch allows it: a cumulative sum into int32 is about four times faster than into int64.
    Hot paths use :class:`MaskRanks` instead, which answers the same questions from an eighth of the memory."""
    csum = np.zeros(mask.size + 1, dtype=np.int32 if mask.size < 2**31 - 1 else np.int64)
    np.cumsum(mask, out=csum[1:])
    return csum


def running_count_between(mask: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Per range, how many of ``mask[lo:hi]`` are set."""
    ranks = MaskRanks(mask)
    return ranks.rank(hi) - ranks.rank(lo)


#: Per byte value: how many bits are set, and (little bit order) the position of its k-th set bit.
_POPCOUNT = np.array([bin(b).count("1") for b in range(256)], dtype=np.uint8)
_SELECT = np.array([[([i for i in range(8) if b >> i & 1] + [0] * 8)[k] for k in range(8)] for b in range(256)],
                   dtype=np.int64)
#: The ``r`` low bits of a byte, for r in 0..7.
_LOW_BITS = np.array([(1 << r) - 1 for r in range(8)], dtype=np.uint8)


def _byte_popcount(packed: np.ndarray) -> np.ndarray:
    """Set bits of every byte (``packed.size`` a multiple of 8): numpy's popcount where it has one (2.0+), else
    the bit-twiddling count within each byte of 64-bit words (no table lookup: a gather is far slower)."""
    if hasattr(np, "bitwise_count"):
        return np.bitwise_count(packed)
    x = packed.view(np.uint64)
    x = x - ((x >> np.uint64(1)) & np.uint64(0x5555555555555555))
    x = (x & np.uint64(0x3333333333333333)) + ((x >> np.uint64(2)) & np.uint64(0x3333333333333333))
    x = (x + (x >> np.uint64(4))) & np.uint64(0x0F0F0F0F0F0F0F0F)
    return x.view(np.uint8)


class MaskRanks:
    """A bool mask packed 8 positions a byte, with a running count of set positions per byte: how many positions
    are set before any flat index (``rank``) and where the k-th set position is (``select``).

    It answers what an N-sized running count would (segment counts, first and last set position of each row) from
    N/8 bytes and a running count over them: a few small passes instead of a cumulative sum into a new N-sized
    integer array, which at tens of millions of positions per batch costs more in fresh memory than in arithmetic.
    """

    __slots__ = ("packed", "before")

    def __init__(self, mask: np.ndarray):
        n = mask.size
        # one spare byte (rank(n) reads byte n // 8), and whole 8-byte words for the popcount
        self.packed = np.zeros((n // 64 + 1) * 8, dtype=np.uint8)
        self.packed[:(n + 7) // 8] = np.packbits(mask, bitorder="little")
        self.before = np.zeros(self.packed.size + 1, dtype=np.int32 if n < 2**31 - 1 else np.int64)
        np.cumsum(_byte_popcount(self.packed), dtype=self.before.dtype, out=self.before[1:])

    def rank(self, positions: np.ndarray) -> np.ndarray:
        """How many positions before each of ``positions`` (flat indices in ``[0, N]``) are set (int64)."""
        positions = np.asarray(positions, dtype=np.int64)
        byte = positions >> 3
        return self.before[byte].astype(np.int64) + _POPCOUNT[self.packed[byte] & _LOW_BITS[positions & 7]]

    def select(self, k: np.ndarray) -> np.ndarray:
        """The flat index of the k-th set position (1-based; every ``k`` must lie in ``[1, total]``)."""
        k = np.asarray(k, dtype=np.int64)
        byte = np.searchsorted(self.before, k, side="left") - 1
        return byte * 8 + _SELECT[self.packed[byte], k - self.before[byte] - 1]


def spans(n: int, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """A mask of ``n`` flat positions, True within every ``[lo[i], hi[i])`` (ranges must not overlap)."""
    keep = hi > lo
    edges = np.zeros(n + 1, dtype=np.int8)
    edges[lo[keep]] += 1  # starts of non-empty, non-overlapping ranges are distinct, and so are their ends
    edges[hi[keep]] -= 1
    return np.cumsum(edges[:n], dtype=np.int8).view(bool)


def is_list(type_: pa.DataType) -> bool:
    return pat.is_list(type_) or pat.is_large_list(type_) or pat.is_fixed_size_list(type_)


def is_integer_list(type_: pa.DataType) -> bool:
    return is_list(type_) and pat.is_integer(type_.value_type)


def is_text(type_: pa.DataType) -> bool:
    return pat.is_string(type_) or pat.is_large_string(type_)


def flatten_list(array: pa.Array | pa.ChunkedArray) -> Flat:
    """Flat values + offsets of a (large/fixed-size) list array; null rows count as empty."""
    if isinstance(array, pa.ChunkedArray):
        array = array.combine_chunks() if array.num_chunks != 1 else array.chunk(0)
    if pat.is_fixed_size_list(array.type):
        size = array.type.list_size
        array = array.cast(pa.list_(array.type.value_type)) if array.null_count else array
        if pat.is_fixed_size_list(array.type):
            values = array.flatten()
            offsets = np.arange(len(array) + 1, dtype=np.int64) * size
            return Flat(_to_numpy(values), offsets)
    if array.null_count:
        array = pc.fill_null(array, pa.scalar([], type=array.type))
    offsets = np.asarray(array.offsets, dtype=np.int64)
    values = array.values.slice(int(offsets[0]), int(offsets[-1] - offsets[0]))
    return Flat(_to_numpy(values), offsets - offsets[0])


def _to_numpy(values: pa.Array) -> np.ndarray:
    if values.null_count:
        # A null inside a token list is not a token; -1 is outside every vocabulary and is reported as such.
        values = pc.fill_null(values.cast(pa.int64()), -1)
    return values.to_numpy(zero_copy_only=False)


def _decode_dictionaries(table):
    """Dictionary-encoded columns (Parquet writes repetitive strings that way) as plain arrays, so that a
    dictionary of strings is a text column like any other."""
    if not any(pat.is_dictionary(f.type) for f in table.schema):
        return table
    columns = [c.dictionary_decode() if pat.is_dictionary(c.type) else c for c in table.columns]
    return type(table).from_arrays(columns, names=table.schema.names)


class Batch:
    """Consecutive records of one shard.

    ``rows[i]`` is the 0-based record index of batch row ``i`` within its shard in file order (for JSON Lines the
    0-based line index, blank lines included).  ``columns`` maps a column name to its Arrow array.
    """

    def __init__(self, shard: Shard, table: pa.Table | pa.RecordBatch, rows: np.ndarray):
        self.shard = shard
        self.table = _decode_dictionaries(table)
        self.rows = np.asarray(rows, dtype=np.int64)
        self.problems: list = []  # corpuscle.io.sources.Problem objects met while reading these records
        self._flat: dict[str, Flat] = {}
        self._memo: dict = {}

    def __len__(self) -> int:
        return self.table.num_rows

    @property
    def uri(self) -> str:
        return self.shard.uri

    @property
    def column_names(self) -> list[str]:
        return list(self.table.schema.names)

    def has(self, name: str | None) -> bool:
        return name is not None and name in self.table.schema.names

    def column(self, name: str) -> pa.Array:
        col = self.table.column(name)
        if isinstance(col, pa.ChunkedArray):
            col = col.combine_chunks() if col.num_chunks != 1 else col.chunk(0)
        return col

    def type_of(self, name: str) -> pa.DataType:
        return self.table.schema.field(name).type

    def flat(self, name: str) -> Flat:
        """Flat numpy view of an integer list column (cached per batch)."""
        if name not in self._flat:
            self._flat[name] = flatten_list(self.column(name))
        return self._flat[name]

    def memo(self, key, make):
        """A per-batch fact that several rules share (the real-token mask, separator positions ...): computed by
        ``make()`` the first time ``key`` is asked for, then the same object.  The key must name everything the
        fact depends on besides the batch (column names, token ids), since rules may be given different settings.
        Callers must not modify what they get."""
        try:
            return self._memo[key]
        except KeyError:
            value = self._memo[key] = make()
            return value

    def select(self, mask: np.ndarray) -> "Batch":
        """The rows where ``mask`` is true, as a new batch of the same shard."""
        return Batch(self.shard, self.table.filter(pa.array(mask)), self.rows[mask])


#: A shard's facts are inferred from its first records: at least this many rows or tokens (or the whole shard),
#: gathered over its first batches when they are small (a first Parquet row group of a few rows, say).
FIRST_ROWS = 1024
FIRST_TOKENS = 1 << 20


def enough_first_records(batches: list[Batch], tokens_column: str) -> bool:
    """Whether ``batches`` (a shard's first, in order) hold enough records to infer its facts from."""
    rows = tokens = 0
    for batch in batches:
        rows += len(batch)
        if len(batch) and batch.has(tokens_column) and is_integer_list(batch.type_of(tokens_column)):
            tokens += int(batch.flat(tokens_column).values.size)
    return rows >= FIRST_ROWS or tokens >= FIRST_TOKENS


def first_records(batches: list[Batch]) -> Batch | None:
    """The records of a shard's first batches as one batch (None when they hold none); when their columns differ
    (JSON Lines blocks typed apart), the first batch with records alone."""
    full = [batch for batch in batches if len(batch)]
    if len(full) <= 1:
        return full[0] if full else None
    try:
        tables = [b.table if isinstance(b.table, pa.Table) else pa.Table.from_batches([b.table]) for b in full]
        joined = pa.concat_tables(tables)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError):
        return full[0]
    return Batch(full[0].shard, joined, np.concatenate([b.rows for b in full]))
