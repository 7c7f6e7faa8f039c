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

        Whole rows take one ``np.add.reduceat`` over the mask as it is (no copy); a range that leaves out a few
        positions at a row's ends subtracts those few. ``mask`` may also be a running count from
        :func:`running_count`, to reuse it for several ranges.
        """
        n = self.values.size
        if mask.size == n + 1 and mask.dtype != bool:
            lo = self.starts if lo is None else np.clip(lo, 0, n)
            hi = self.ends if hi is None else np.clip(np.maximum(hi, lo), 0, n)
            return mask[hi].astype(np.int64) - mask[lo]
        full = self._segment_sums(mask)
        if lo is None and hi is None:
            return full
        lo = self.starts if lo is None else np.clip(lo, self.starts, self.ends)
        hi = self.ends if hi is None else np.clip(np.maximum(hi, lo), lo, self.ends)
        head, tail = lo - self.starts, self.ends - hi
        if max(int(head.max(initial=0)), int(tail.max(initial=0))) > EDGE_LIMIT:
            return running_count_between(mask, lo, hi)
        for j in range(int(head.max(initial=0))):  # a few edge positions per row, e.g. the k of a label shift
            cut = head > j
            full[cut] -= mask[self.starts[cut] + j]
        for j in range(int(tail.max(initial=0))):
            cut = tail > j
            full[cut] -= mask[self.ends[cut] - 1 - j]
        return full

    def _segment_sums(self, mask: np.ndarray) -> np.ndarray:
        """Per row, the sum of ``mask`` over the row (bool or integer mask)."""
        rows = self.lengths.size
        if rows == 0 or mask.size == 0:
            return np.zeros(rows, dtype=np.int64)
        data = mask.view(np.int8) if mask.dtype == bool else mask
        filled = self.lengths > 0
        if filled.all():
            return np.add.reduceat(data, self.starts, dtype=np.int64)
        # The starts of non-empty rows increase strictly, and each one's sum runs to the next one's start: its end.
        sums = np.zeros(rows, dtype=np.int64)
        sums[filled] = np.add.reduceat(data, self.starts[filled], dtype=np.int64)
        return sums

    def first_where(self, mask: np.ndarray) -> np.ndarray:
        """Per row, the flat index of the first position where ``mask`` is set, or -1 when there is none."""
        count = running_count(mask)
        before, after = count[self.starts], count[self.ends]
        found = np.searchsorted(count, before + 1, side="left") - 1
        return np.where(after > before, found, -1)

    def last_where(self, mask: np.ndarray) -> np.ndarray:
        """Per row, the flat index of the last position where ``mask`` is set, or -1 when there is none."""
        count = running_count(mask)
        before, after = count[self.starts], count[self.ends]
        found = np.searchsorted(count, after, side="left") - 1
        return np.where(after > before, found, -1)

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

    32-bit when the batch allows it: a cumulative sum into int32 is about four times faster than into int64."""
    csum = np.zeros(mask.size + 1, dtype=np.int32 if mask.size < 2**31 - 1 else np.int64)
    np.cumsum(mask, out=csum[1:])
    return csum


#: Ranges that leave out more than this many positions at a row's ends are counted with a running count.
EDGE_LIMIT = 8


def running_count_between(mask: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Per range, how many of ``mask[lo:hi]`` are set (one cumulative sum over the mask)."""
    count = running_count(mask)
    return count[hi].astype(np.int64) - count[lo]


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


class Batch:
    """Consecutive records of one shard.

    ``rows[i]`` is the 0-based record index of batch row ``i`` within its shard in file order (for JSON Lines the
    0-based line index, blank lines included).  ``columns`` maps a column name to its Arrow array.
    """

    def __init__(self, shard: Shard, table: pa.Table | pa.RecordBatch, rows: np.ndarray):
        self.shard = shard
        self.table = table
        self.rows = np.asarray(rows, dtype=np.int64)
        self.problems: list = []  # lint.sources.Problem objects met while reading these records
        self._flat: dict[str, Flat] = {}

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

    def select(self, mask: np.ndarray) -> "Batch":
        """The rows where ``mask`` is true, as a new batch of the same shard."""
        return Batch(self.shard, self.table.filter(pa.array(mask)), self.rows[mask])
