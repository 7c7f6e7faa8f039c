"""The corpus-wide side of the duplicate rules: the shuffle containers of LSH band keys and the index of every unit
(document or window) of a scan.

* :class:`ShardBands` and :class:`BandPiece`: one shard's band keys cut into the partitions of the keyed shuffle
  (see :mod:`corpuscle.rules.api`), picked from the band file a chunk of units at a time;
* :class:`NearPartial`: what one partition's reduce gives back;
* :class:`ScanWindows`: the units of all shards with global ids in scan order, their exact-copy groups, locations
  and the findings over units of several shards;
* :func:`joined`: per-unit arrays joined once and shared by both duplicate rules.

Moved here from rules/duplicates.py unchanged in behaviour, so that rules/ holds only rules.
"""
from __future__ import annotations

import threading
import weakref
from dataclasses import dataclass

import numpy as np
from corpuscle.findings import Finding
from corpuscle.kernels.order import lexorder
from corpuscle.kernels.spill import npy_blocks, npy_layout
from corpuscle.kernels.windows import DOCUMENTS

# Windows whose band keys are sorted into partitions per step (bounds the scratch memory of a partition's entries).
_PARTITION_WINDOWS = 1 << 14


# -- the shuffle of band keys ----------------------------------------------------------------------------------


class BandPiece:
    """One shard's band keys that fall into one partition: an entry per (window, band) -- the window's index in the
    shard (``window``, int64), the band key (``keys``, uint64) and the window's signature digest (``digests``,
    uint64), in window then band order; ``windows`` is the shard's count of windows (for global ids).

    :meth:`NearDuplicate.partition` makes a shard's pieces as views of its band keys (a :class:`ShardBands` and a
    partition number): a piece picks its entries when they are asked for (:meth:`entries`, a chunk of windows at a
    time) and does not keep them, so the pieces waiting in memory for the reduce add nothing to the band keys the
    shard's state holds. A piece that is pickled -- sent to the process that reduces its partition -- carries its
    own entries only. A piece made with ``entries`` holds them (e.g. memory maps of spilled files)."""

    def __init__(self, windows: int, entries: tuple | None = None, source: "ShardBands | None" = None,
                 part: int = 0):
        if (entries is None) == (source is None):
            raise ValueError("a BandPiece takes either its entries or the ShardBands it picks them from")
        self.windows = windows
        self._entries = entries
        self._source = source
        self._part = part

    def entries(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(window, keys, digests)`` of the piece's entries."""
        if self._entries is not None:
            return self._entries
        return self._source.pick(self._part)

    @property
    def count(self) -> int:
        """The number of entries (without picking them)."""
        return len(self._entries[0]) if self._entries is not None else int(self._source.counts[self._part])

    @property
    def nbytes(self) -> int:
        """Bytes of the entries once picked: 8 each for window, key and digest."""
        return sum(a.nbytes for a in self._entries) if self._entries is not None else 24 * self.count

    window = property(lambda self: self.entries()[0])
    keys = property(lambda self: self.entries()[1])
    digests = property(lambda self: self.entries()[2])

    def __getstate__(self):
        return {"windows": self.windows, "_entries": self.entries(), "_source": None, "_part": 0}

    def __setstate__(self, state):
        self.__dict__.update(state)


class ShardBands:
    """The band keys of one shard's windows, to be cut into partitions by key modulo ``parts``: ``keys`` (windows,
    bands) and ``digests`` as in the shard's state, ``firsts`` the sorted indices of the windows that take part
    (None: all of them). ``counts[p]`` is the number of entries of partition ``p``.

    When ``keys`` and ``digests`` are the memory maps of a band file that :meth:`NearDuplicate.end` made, the file
    is read instead, a block at a time into one buffer: reading the maps would make their pages count in this
    process's memory for as long as the state lives. Other arrays (e.g. a state that came from another process)
    are read as they are."""

    def __init__(self, keys: np.ndarray, digests: np.ndarray, firsts: np.ndarray | None, parts: int):
        self.path = band_file(keys, digests)
        self.keys, self.digests = (None, None) if self.path else (keys, digests)
        self.bands, self.firsts, self.parts = keys.shape[1], firsts, parts
        self.counts = np.zeros(parts, dtype=np.int64)
        for _, chunk, _ in self._chunks():
            self.counts += np.bincount(_part_of(chunk, parts).ravel().astype(np.intp), minlength=parts)

    def _chunks(self):
        """``(window indices, their band keys, their digests)``, a chunk of windows at a time (views that the next
        chunk may overwrite)."""
        firsts = self.firsts
        if self.path is not None:
            for lo, block in npy_blocks(self.path):
                if firsts is None:
                    yield np.arange(lo, lo + len(block)), block[:, :self.bands], block[:, self.bands]
                    continue
                a, z = np.searchsorted(firsts, [lo, lo + len(block)])
                rows = block[firsts[a:z] - lo]
                yield firsts[a:z], rows[:, :self.bands], rows[:, self.bands]
            return
        total = len(self.keys) if firsts is None else len(firsts)
        for lo in range(0, total, _PARTITION_WINDOWS):
            hi = min(total, lo + _PARTITION_WINDOWS)
            if firsts is None:
                yield np.arange(lo, hi), self.keys[lo:hi], self.digests[lo:hi]
            else:
                yield firsts[lo:hi], self.keys[firsts[lo:hi]], self.digests[firsts[lo:hi]]

    def pick(self, part: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(window, keys, digests)`` of the entries whose key is ``part`` modulo ``parts``, in window then band
        order."""
        count = int(self.counts[part])
        window = np.empty(count, dtype=np.int64)
        keys = np.empty(count, dtype=np.uint64)
        digests = np.empty(count, dtype=np.uint64)
        at = 0
        for windows, chunk, chunk_digests in self._chunks():
            # The entries' flat positions in (window, band) order, as np.nonzero of the 2-D mask gives them, but
            # by one 1-D scan (np.nonzero of a 2-D mask is about a third slower).
            flat = np.flatnonzero(_part_of(chunk, self.parts) == np.uint64(part))
            which, band = np.divmod(flat, self.bands)
            end = at + len(which)
            window[at:end], keys[at:end], digests[at:end] = windows[which], chunk[which, band], chunk_digests[which]
            at = end
        return window, keys, digests


def _part_of(keys: np.ndarray, parts: int) -> np.ndarray:
    """``keys % parts``: by a mask when ``parts`` is a power of two (the same numbers; a 64-bit division per key
    is an order of magnitude slower than a mask, and the partitions are picked once per partition)."""
    if parts & (parts - 1) == 0:
        return keys & np.uint64(parts - 1)
    return keys % np.uint64(parts)


def band_file(keys: np.ndarray, digests: np.ndarray) -> str | None:
    """The path of the band file when ``keys`` and ``digests`` are its memory maps as :meth:`NearDuplicate.end`
    makes them -- all rows; the key columns, and the digest column after them -- else None."""
    if not (isinstance(keys, np.memmap) and isinstance(digests, np.memmap)) or keys.ndim != 2 or \
            not keys.filename or keys.filename != digests.filename:
        return None
    try:
        shape, dtype, _ = npy_layout(keys.filename)
    except (OSError, ValueError):
        return None
    row = dtype.itemsize * shape[1]
    if dtype != np.dtype("<u8") or keys.dtype != dtype or digests.dtype != dtype or \
            shape != (len(keys), keys.shape[1] + 1) or digests.shape != (shape[0],) or \
            keys.strides != (row, dtype.itemsize) or digests.strides != (row,):
        return None
    start = keys.__array_interface__["data"][0]
    if digests.__array_interface__["data"][0] - start != dtype.itemsize * keys.shape[1]:
        return None
    return keys.filename


@dataclass
class NearPartial:
    """What one partition gives back: its candidate pairs (global ids, possibly exact copies, possibly also found
    by another partition) and its bucket figures. The pairs are verified once all partitions are in, each once."""

    pairs: np.ndarray
    capped_buckets: int
    largest_bucket: int


# -- the whole scan's windows -----------------------------------------------------------------------------------


class ScanWindows:
    """The windows of all shards of a scan, with global ids in scan order (shard order, then row).

    Window ``i`` of the shard at position ``s`` has id ``offsets[s] + i``; :meth:`shard_of` gives the position back.
    ``first_copy[id]`` is the id of the first window with the same content hash, so a window is an exact copy of an
    earlier one when ``first_copy[id] != id``. ``order`` sorts the ids by content, then id; ``group_starts`` and
    ``group_sizes`` give the start (in ``order``) and size of every run of equal content. Ids are int32 when the
    scan has fewer than 2**31 windows; a scan of one shard uses the shard's arrays as they are (no copy).
    """

    def __init__(self, states: list):
        self.states = states
        self.offsets = np.zeros(len(states) + 1, dtype=np.int64)
        np.cumsum([len(st.rows) for st in states], out=self.offsets[1:])
        self.count = int(self.offsets[-1])
        index = np.int32 if self.count < 2 ** 31 else np.int64

        def gathered(name, empty):
            return joined([getattr(st, name) for st in states], empty)

        self.rows = gathered("rows", np.zeros(0, np.uint32))
        self.at = gathered("offsets", np.zeros(0, np.uint32))
        self.lengths = gathered("lengths", np.zeros(0, np.uint32))
        self.domains = gathered("domains", np.zeros(0, np.uint8))
        self.content = gathered("content", np.zeros((0, 2), np.uint64))
        # Exact copies: sort by content, then id; a run of equal content is one group, its first id the first copy.
        order, new = content_order(self.content)
        self.order = order.astype(index)
        del order
        self.group_starts = np.flatnonzero(new).astype(index)
        del new
        self.group_sizes = np.diff(self.group_starts, append=index(self.count))
        self.first_copy = np.empty(self.count, dtype=index)
        self.first_copy[self.order] = np.repeat(self.order[self.group_starts], self.group_sizes)

    def shard_of(self, windows: np.ndarray) -> np.ndarray:
        """The position of each window's shard (in ``states``)."""
        return np.searchsorted(self.offsets, windows, side="right") - 1

    def uri(self, window: int) -> str:
        return self.states[int(self.shard_of(window))].uri

    def drop_entries(self, windows: np.ndarray) -> list[dict]:
        """``{"uri", "row", "offset", "length"}`` of each window id (in the order given)."""
        uris = [st.uri for st in self.states]
        return [{"uri": uris[s], "row": r, "offset": o, "length": n}
                for s, r, o, n in zip(self.shard_of(windows).tolist(), self.rows[windows].tolist(),
                                      self.at[windows].tolist(), self.lengths[windows].tolist())]

    def location(self, unit: int) -> dict:
        """``{"uri", "row", "offset", "length"}`` of one unit."""
        return {"uri": self.uri(unit), "row": int(self.rows[unit]), "offset": int(self.at[unit]),
                "length": int(self.lengths[unit])}

    def where(self, unit: int, uri: bool = True) -> str:
        """A unit's location for messages: ``shard row R`` or ``shard row R offset T`` (without the shard when
        ``uri`` is false)."""
        row, offset = int(self.rows[unit]), int(self.at[unit])
        return (f"{self.uri(unit)} " if uri else "") + f"row {row:,}" + (f" offset {offset:,}" if offset else "")

    def sizes(self, windows: np.ndarray | None = None) -> dict:
        """Token and text-byte totals of the given windows (default: all)."""
        lengths, domains = (self.lengths, self.domains) if windows is None else \
            (self.lengths[windows], self.domains[windows])
        tokens = domains != 1  # token windows and token documents; 1 is text
        return {"tokens": int(lengths[tokens].sum(dtype=np.int64)),
                "textBytes": int(lengths[~tokens].sum(dtype=np.int64))}

    def group_finding(self, rule, members: np.ndarray, kind: str, message: str, cap: int,
                      **evidence) -> Finding:
        """A finding over windows of possibly several shards: instances carry the uri; members in id order."""
        members = np.sort(members)
        shown = members[:cap]
        shards = np.unique(self.shard_of(members))
        single = self.states[int(shards[0])].shard if len(shards) == 1 else None
        offsets = self.at[shown].astype(np.int64)
        if not np.isin(self.domains[shown], [DOCUMENTS]).any():
            offsets = np.full(len(shown), -1, dtype=np.int64)  # rows and text documents: the row says it all
        finding = Finding(rule.id, rule.level, message, single.uri if single else None, kind=kind,
                          count=int(len(members)), rows=self.rows[shown].astype(np.int64),
                          offsets=offsets,
                          instance_uris=[self.states[s].uri for s in self.shard_of(shown).tolist()],
                          truncated=len(members) > len(shown), evidence=evidence)
        if single is not None and single.line_based:
            finding.start_line = int(self.rows[members[0]]) + 1
        return finding


def content_order(content: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(order, new)``: ``order`` sorts windows by content hash, equal contents in window order (the sort is
    stable); ``new[k]`` says whether position ``k`` of ``order`` starts a run of equal content."""
    order = lexorder((content[:, 1], content[:, 0]))
    new = np.empty(len(order), dtype=bool)
    new[:1] = True
    for lane in (0, 1):  # one lane at a time: a sorted copy of one column, not of both
        column = content[order, lane]
        if lane == 0:
            np.not_equal(column[1:], column[:-1], out=new[1:])
        else:
            new[1:] |= column[1:] != column[:-1]
        del column
    return order, new


def first_copies(content: np.ndarray) -> np.ndarray | None:
    """Sorted indices of the windows whose content no earlier window has; None when that is every window."""
    order, new = content_order(content)
    if new.all():
        return None
    return np.sort(order[new])


def ranges(bounds: np.ndarray, limit: int):
    """Consecutive ranges ``(w0, w1)`` of the rows whose values lie between ``bounds[w]`` and ``bounds[w + 1]``:
    each of at least one row, and of at most ``limit`` values unless its one row has more."""
    rows = len(bounds) - 1
    w0 = 0
    while w0 < rows:
        w1 = int(np.searchsorted(bounds, int(bounds[w0]) + limit, side="right")) - 1
        w1 = min(rows, max(w1, w0 + 1))
        yield w0, w1
        w0 = w1


_JOINS: dict = {}
_JOINS_LOCK = threading.Lock()


def joined(parts: list, empty: np.ndarray) -> np.ndarray:
    """The arrays of ``parts`` end to end (``empty`` when there are none), emptying the list: one array is returned
    as it is, and otherwise the parts are let go once the result holds them.

    Joining the very same array objects again (the other duplicate rule ending the same shard) gives the very same
    result, not a copy: the two rules' per-window arrays are held once. The results are remembered by weak
    references to them and to their parts (so nothing is kept alive here, and an entry counts only while all its
    parts are alive: ``id`` values are not reused while their objects live); each process has its own.
    """
    if not parts:
        return empty
    if len(parts) == 1:
        return parts.pop()
    key = tuple(id(part) for part in parts)
    with _JOINS_LOCK:
        refs, result = _JOINS.get(key, ((), None))
        out = result() if result is not None else None
        if out is None or len(refs) != len(parts) or any(ref() is not part for ref, part in zip(refs, parts)):
            out = np.concatenate(parts)
            for stale in [k for k, (rs, r) in _JOINS.items() if r() is None or any(x() is None for x in rs)]:
                del _JOINS[stale]
            _JOINS[key] = ([weakref.ref(part) for part in parts], weakref.ref(out))
    parts.clear()
    return out


