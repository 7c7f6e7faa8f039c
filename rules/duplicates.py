"""Duplicate windows and documents across the whole scan: exact copies and near-duplicates.

A duplicate is content the model sees more than once per epoch: it is weighted as if it were several examples,
it is memorised more readily, and it spends budget that unseen text would have used. Two rules look for it:

* ``exact-duplicate``: windows (or documents) whose content is identical;
* ``near-duplicate``: windows whose shingle sets are similar above a threshold, estimated with MinHash and
  locality-sensitive hashing (:mod:`corpuscle.kernels.minhash`, :mod:`corpuscle.kernels.lsh`) -- a statistical estimate, and the findings
  say so.

Windows
    In a tokenized shard every row of the tokens column (``tokens_column``) is a window; in a text shard (no
    tokens column) every document of the text column (``text_column``). Empty windows -- no tokens, or null or
    empty text -- are left to ``empty-document``; a document with bytes but no words (punctuation only) has no
    shingles and takes part in ``exact-duplicate`` only. Windows are compared as stored, padding included (a run
    of padding adds one shingle to a window's shingle set, so it hardly moves a Jaccard similarity).

Content hash (``exact-duplicate``, and ``near-duplicate`` to fold exact copies)
    A window is a vector of 32-bit words: its token ids modulo 2**32 (so the same ids stored as int32 or int64
    hash the same; ids that differ by a multiple of 2**32 -- never valid ids -- alias), or the bytes of its
    UTF-8 text exactly as stored (no normalization: text that differs only in Unicode normalization or
    whitespace is not an exact copy; the near-duplicate rule, which lowercases and splits into words, sees it).
    Each of four lanes hashes the words ``s_0 .. s_{L-1}`` of a window with the multilinear family::

        lane = (k_c + k_len * (2 * L + domain) + sum_j k_j * s_j)  mod 2**64,   keep lane >> 32

    with ``domain`` 0 for token windows and 1 for text documents (a token window never equals a document), and
    64-bit keys ``k`` from :func:`corpuscle.kernels.minhash.mix64` of fixed inputs, independent per lane. For keys drawn at
    random this family is strongly universal on its top 32 bits (multilinear hashing of 32-bit words, from
    memory: Lemire and Kaser, "Strongly universal string hashing is fast", 2014), so two different windows agree
    in one lane with probability 2**-32 and in all four -- the 128-bit content hash -- with probability 2**-128;
    among ``n`` windows some pair collides with probability below ``n**2 / 2**129`` (about 1e-21 for a billion
    windows). Our keys are fixed pseudo-random numbers, so the figure holds for data not built against them.
    Whole batches are hashed at once: a reshape and ``np.einsum`` for windows of one length, ``np.add.reduceat``
    over the words otherwise; no Python loop per window.

Near-duplicates
    Each window's shingles (``n`` consecutive tokens, or ``n`` consecutive words after lowercasing; a window
    shorter than ``n`` is one shingle) get a MinHash signature of ``num_perm`` values (:mod:`corpuscle.kernels.minhash`), cut
    into ``b`` bands of ``r`` values with ``(b, r) = optimal_bands(threshold, num_perm)``. The signatures go to a
    temporary ``.npy`` file per shard (see :class:`SignatureSpill`); at the end of the shard the ``b`` band keys
    and a signature digest of every window are made from it into a second file (:class:`BandSpill`), which the
    state holds as memory maps. Every window has a global id in scan order (the shard's offset plus its index
    within the shard). The band keys are grouped by key in a partitioned shuffle (the rule is ``keyed``, see
    :mod:`corpuscle.rules.api`): ``partition`` splits a shard's keys by key modulo the number of partitions, and
    ``reduce_partition`` groups one partition's keys from all shards (:func:`corpuscle.kernels.lsh.partition_candidates`) and
    verifies its candidate pairs by their estimated Jaccard similarity (signatures read back from the files a chunk
    of pairs at a time, see :func:`read_rows`).
    Locally this runs in one process; on a cluster the keys stay on the workers and only the candidate pairs come
    back. The reduce step (``corpus``) folds exact copies into their first copy (a pair is kept when both ends
    are first copies), counts each pair once, and joins the pairs at or above the threshold into clusters
    (:func:`corpuscle.kernels.lsh.clusters`). A cluster's representative is its first window in scan order. The result is the
    same for any number of partitions.

Exact copies inside near-duplicate clusters
    Identical windows are reported by ``exact-duplicate`` only. A near-duplicate cluster is made of *distinct*
    contents (at least two), each listed once by its first copy; the finding counts the further exact copies of
    its members (``exactCopies``) and points to ``exact-duplicate`` for them. The drop list of ``near-duplicate``
    still holds every window of the cluster but the representative, exact copies included, so that running
    either rule alone and dropping its list removes what it reports.

Temporary files
    The signature files live in one folder per scan, ``corpuscle-minhash-<random>`` under the option
    ``signature_folder`` or, when it is empty (the default), the system temporary folder (``TMPDIR``) of the
    process that starts the scan; created at the first window and removed at the end of ``corpus()`` -- also when
    it fails -- and, should the scan be interrupted, when the process exits. The folder's path travels with the
    rule: a shard's file is written by the worker that scans it and read by the worker that reduces a partition,
    so on a cluster of several machines ``signature_folder`` must be a folder that every worker (and the process
    that starts the scan, which removes it) mounts at the same path. A local process pool or a single-machine
    cluster needs nothing. The band files lie in the same folder (8 bytes per band and window, beside the
    signatures' 4 bytes per permutation and window). The entries of the shuffle (window, band key, digest; 24 bytes
    each) are picked from them partition by partition; handed over in memory up to ``memory_limit_mb`` (default
    1024) megabytes, past it they go to ``.npy`` files in the same folder and are read back by memory map (see
    :meth:`NearDuplicate._spill`).

Memory
    What a scan holds grows with the number of windows only by what the corpus-wide steps need of each window:
    the row (4 bytes while rows fit in 32 bits), the length (4), the domain (1) and the content hash (16) -- 25
    bytes per window, held once when both rules run (they share the arrays of each batch, see :func:`_joined`).
    The band keys and digests stay on disk; the reduce reads them a block or a partition at a time (a partition's
    entries are 24 bytes per band key that falls into it, about ``24 * b / partitions`` bytes per window), and the
    grouping of exact copies (:class:`ScanWindows`) adds about 30 bytes per window while it runs. Everything else
    (shingle hashes, signatures of a batch, signature blocks read back, finer partitions of the reduce) is bounded
    by the constants below, whatever the size of a shard.
"""
from __future__ import annotations

import copy
import os
import shutil
import tempfile
import threading
import weakref
from dataclasses import dataclass

import numpy as np
import pyarrow.compute as pc
from corpuscle.findings import Finding, Level
from corpuscle.kernels.hashing import hex_digest
from corpuscle.kernels.lsh import (
    DEFAULT_MAX_BUCKET,
    Candidates,
    band_keys,
    clusters,
    estimated_jaccard,
    optimal_bands,
    partition_candidates,
    signature_digests,
)
from corpuscle.kernels.minhash import MinHashSettings, shingle_hashes, signatures, word_shingle_hashes
from corpuscle.kernels.spill import BandSpill, SignatureSpill, npy_blocks, npy_layout, read_rows, run_folder
from corpuscle.kernels.text import document_text
from corpuscle.kernels.windows import TOKENS, Windows, batch_windows, window_domain
from corpuscle.rules.api import Rule, ShardState, share

DROP_LIST = "drop-list"
"""Name of the extra output both rules give: ``[{"uri": ..., "row": ...}, ...]``, the windows to drop."""

DEFAULT_MAX_CLUSTERS = 1000

# Windows per step of the MinHash signatures in feed (bounds the signature matrix of a batch).
_SIGNATURE_WINDOWS = 8192
# Tokens (or text bytes) shingled per step in feed (bounds the scratch memory of the shingle hashes to ~10 MiB).
_SHINGLE_VALUES = 1 << 18
# Candidate pairs verified per step in corpus (bounds the signatures read back at once).
_VERIFY_PAIRS = 1 << 15
# Windows whose band keys are sorted into partitions per step (bounds the scratch memory of a partition's entries).
_PARTITION_WINDOWS = 1 << 14
# Band-key entries grouped into buckets per step of a partition's reduce (bounds its scratch memory, ~14 MiB).
_REDUCE_ENTRIES = 1 << 17


# -- the shuffle of band keys ----------------------------------------------------------------------------------


class BandPiece:
    """One shard's band keys that fall into one partition: an entry per (window, band) -- the window's index in the
    shard (``window``, int64), the band key (``keys``, uint64) and the window's signature digest (``digests``,
    uint64), in window then band order; ``windows`` is the shard's count of windows (for global ids) and
    ``signatures`` the path of its signature file.

    :meth:`NearDuplicate.partition` makes a shard's pieces as views of its band keys (a :class:`ShardBands` and a
    partition number): a piece picks its entries when they are asked for (:meth:`entries`, a chunk of windows at a
    time) and does not keep them, so the pieces waiting in memory for the reduce add nothing to the band keys the
    shard's state holds. A piece that is pickled -- sent to the process that reduces its partition -- carries its
    own entries only. A piece made with ``entries`` holds them (e.g. memory maps of spilled files)."""

    def __init__(self, windows: int, signatures: str | None, entries: tuple | None = None,
                 source: "ShardBands | None" = None, part: int = 0):
        if (entries is None) == (source is None):
            raise ValueError("a BandPiece takes either its entries or the ShardBands it picks them from")
        self.windows = windows
        self.signatures = signatures
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
        return {"windows": self.windows, "signatures": self.signatures, "_entries": self.entries(),
                "_source": None, "_part": 0}

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
        self.path = _band_file(keys, digests)
        self.keys, self.digests = (None, None) if self.path else (keys, digests)
        self.bands, self.firsts, self.parts = keys.shape[1], firsts, parts
        self.counts = np.zeros(parts, dtype=np.int64)
        for _, chunk, _ in self._chunks():
            self.counts += np.bincount((chunk % np.uint64(parts)).ravel().astype(np.intp), minlength=parts)

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
            which, band = np.nonzero(chunk % np.uint64(self.parts) == np.uint64(part))
            end = at + len(which)
            window[at:end], keys[at:end], digests[at:end] = windows[which], chunk[which, band], chunk_digests[which]
            at = end
        return window, keys, digests


def _band_file(keys: np.ndarray, digests: np.ndarray) -> str | None:
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
    by another partition), their estimated Jaccard similarity, and its bucket figures."""

    pairs: np.ndarray
    similarity: np.ndarray
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

    def __init__(self, states: list[ShardState]):
        self.states = states
        self.offsets = np.zeros(len(states) + 1, dtype=np.int64)
        np.cumsum([len(st.rows) for st in states], out=self.offsets[1:])
        self.count = int(self.offsets[-1])
        index = np.int32 if self.count < 2 ** 31 else np.int64

        def joined(name, empty):
            return _joined([getattr(st, name) for st in states], empty)

        self.rows = joined("rows", np.zeros(0, np.uint32))
        self.lengths = joined("lengths", np.zeros(0, np.uint32))
        self.domains = joined("domains", np.zeros(0, np.uint8))
        self.content = joined("content", np.zeros((0, 2), np.uint64))
        # Exact copies: sort by content, then id; a run of equal content is one group, its first id the first copy.
        order, new = _content_order(self.content)
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
        """``{"uri", "row"}`` of each window id (in the order given)."""
        uris = [st.uri for st in self.states]
        return [{"uri": uris[s], "row": r} for s, r in zip(self.shard_of(windows).tolist(),
                                                              self.rows[windows].tolist())]

    def sizes(self, windows: np.ndarray | None = None) -> dict:
        """Token and text-byte totals of the given windows (default: all)."""
        lengths, domains = (self.lengths, self.domains) if windows is None else \
            (self.lengths[windows], self.domains[windows])
        tokens = domains == TOKENS
        return {"tokens": int(lengths[tokens].sum(dtype=np.int64)),
                "textBytes": int(lengths[~tokens].sum(dtype=np.int64))}

    def group_finding(self, rule: Rule, members: np.ndarray, kind: str, message: str, cap: int,
                      **evidence) -> Finding:
        """A finding over windows of possibly several shards: instances carry the uri; members in id order."""
        members = np.sort(members)
        shown = members[:cap]
        shards = np.unique(self.shard_of(members))
        single = self.states[int(shards[0])].shard if len(shards) == 1 else None
        finding = Finding(rule.id, rule.level, message, single.uri if single else None, kind=kind,
                          count=int(len(members)), rows=self.rows[shown].astype(np.int64),
                          offsets=np.full(len(shown), -1, dtype=np.int64),
                          instance_uris=[self.states[s].uri for s in self.shard_of(shown).tolist()],
                          truncated=len(members) > len(shown), evidence=evidence)
        if single is not None and single.line_based:
            finding.start_line = int(self.rows[members[0]]) + 1
        return finding


def _content_order(content: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(order, new)``: ``order`` sorts windows by content hash, equal contents in window order (the sort is
    stable); ``new[k]`` says whether position ``k`` of ``order`` starts a run of equal content."""
    order = np.lexsort((content[:, 1], content[:, 0]))
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


def _first_copies(content: np.ndarray) -> np.ndarray | None:
    """Sorted indices of the windows whose content no earlier window has; None when that is every window."""
    order, new = _content_order(content)
    if new.all():
        return None
    return np.sort(order[new])


def _unit(domain: int) -> tuple[str, str]:
    """(what a window is called, what its length counts) for messages."""
    return ("windows", "tokens") if domain == TOKENS else ("documents", "UTF-8 bytes")


def _size_evidence(domain: int, total: int, redundant: int) -> dict:
    if domain == TOKENS:
        return {"tokens": total, "redundantTokens": redundant}
    return {"textBytes": total, "redundantTextBytes": redundant}


def _fractions(scan: ScanWindows, duplicates: np.ndarray) -> dict:
    """Counts and shares of duplicate windows, tokens and text bytes among all windows of the scan."""
    whole, dup = scan.sizes(), scan.sizes(duplicates)
    return {
        "windows": scan.count, "duplicateWindows": int(len(duplicates)),
        "windowFraction": share(len(duplicates), scan.count),
        "tokens": whole["tokens"], "duplicateTokens": dup["tokens"],
        "tokenFraction": share(dup["tokens"], whole["tokens"]),
        "textBytes": whole["textBytes"], "duplicateTextBytes": dup["textBytes"],
        "textByteFraction": share(dup["textBytes"], whole["textBytes"]),
    }


def _ranges(bounds: np.ndarray, limit: int):
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


def _joined(parts: list, empty: np.ndarray) -> np.ndarray:
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


def _check_int(rule_id: str, name: str, value, minimum: int, hint: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise ValueError(f"rule {rule_id}: {name} must be an integer >= {minimum}, got {value!r}; hint: {hint}")
    return value


# -- the rules --------------------------------------------------------------------------------------------------


class _DuplicateRule(Rule):
    """Shared by both rules: the windows of a batch and the per-shard arrays of them."""

    needs = {"tokens_column": "int-list", "text_column": "text"}  # either of them: see missing()
    needs_any = True
    outputs = (DROP_LIST,)

    def missing(self, batch, settings):
        """Either column is enough: token rows when the shard has them, documents otherwise."""
        if window_domain(batch, settings) is not None:
            return None
        return (f"neither a token column {settings.tokens_column!r} (integer lists) nor a text column "
                f"{settings.text_column!r} (strings); one of them is needed")

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.parts = {"rows": [], "lengths": [], "domains": [], "content": []}
        return state

    def _keep(self, state, windows: Windows, select: np.ndarray | None = None) -> None:
        """Keep the rows, lengths, domains and content hashes of the batch's windows (or of ``select`` of them).
        When all of them are kept, the batch's own arrays are kept: both rules of this module hold the same arrays
        then, and :meth:`end` joins them into arrays the two states share (see :func:`_joined`)."""
        names = ("rows", "lengths", "content", "domains")
        if select is not None and len(select) < len(windows.local):
            for name in names:
                state.parts[name].append(getattr(windows, name)[select])
            return
        for name in names:
            state.parts[name].append(getattr(windows, name))

    def end(self, state):
        parts = state.__dict__.pop("parts")
        # One array at a time, each list let go as soon as it is joined: the end of a shard briefly holds one
        # array twice, not the whole state. The arrays may be shared with the other rule's state: they are never
        # changed in place.
        state.rows = _joined(parts.pop("rows"), np.zeros(0, np.uint32))
        state.lengths = _joined(parts.pop("lengths"), np.zeros(0, np.uint32))
        state.domains = _joined(parts.pop("domains"), np.zeros(0, np.uint8))
        state.content = _joined(parts.pop("content"), np.zeros((0, 2), np.uint64))
        return state

    splittable = True

    def merge(self, first, second):
        """The windows of both parts, ``first``'s then ``second``'s (one window per row: nothing spans a cut).
        ``near-duplicate`` joins its parts after the shuffle has taken their band keys (each part's piece gives its
        windows the ids that follow on from the previous part's), so only the window tables are joined here."""
        merged = super().merge(first, second)
        for name in ("rows", "lengths", "domains", "content"):
            setattr(merged, name, np.concatenate([getattr(first, name), getattr(second, name)]))
        return merged

    def _max_clusters(self) -> int:
        return _check_int(self.id, "max_clusters", self.opts["max_clusters"], 0,
                          f"findings listed before one summary finding; the default is {DEFAULT_MAX_CLUSTERS}")


class ExactDuplicate(_DuplicateRule):
    """Windows (token rows) or documents (text) whose content is identical, within a shard or across shards.
    Every extra copy is trained on once more per epoch: it weights that content as several examples, makes
    verbatim memorisation more likely, and spends tokens that new text would have used; copies that straddle a
    train/validation split also inflate evaluation. Content is compared by a 128-bit hash of the token ids, or
    of the document's UTF-8 bytes exactly as stored (no normalization); the chance that two different windows
    share it is about 2**-128 (see the module notes of rules/duplicates.py). Empty windows are left to
    empty-document."""

    id = "exact-duplicate"
    level = Level.warning
    summary = "Identical windows (the same token ids) or byte-identical documents, within a shard or across shards."
    help = ("Keep the first copy of each group (scan order: shard order, then row) and drop the others: "
            "`corpuscle scan ... --drop-list FILE` writes one JSON line {\"uri\", \"row\"} per window to drop. "
            "Deduplicate before packing and tokenizing, and across every shard that goes into one run.")
    options = {"max_clusters": DEFAULT_MAX_CLUSTERS}

    def __init__(self, **options):
        super().__init__(**options)
        self._max_clusters()

    def feed(self, state, batch):
        self._keep(state, batch_windows(batch, state.settings))

    def corpus(self, states):
        scan = ScanWindows(states)
        cap = states[0].cap if states else 0
        sizes, starts = scan.group_sizes, scan.group_starts
        repeated = np.flatnonzero(sizes >= 2)
        # Largest groups first, then the one whose first copy comes first.
        first = scan.order[starts[repeated]]
        repeated = repeated[np.lexsort((first, -sizes[repeated]))]
        listed = repeated[:self._max_clusters()]
        findings = []
        for g in listed.tolist():
            members = scan.order[starts[g]:starts[g] + sizes[g]]
            findings.append(self._group(scan, members, cap))
        if len(repeated) > len(listed):
            findings.append(self._rest(scan, repeated[len(listed):], cap))
        copies = np.flatnonzero(scan.first_copy != np.arange(scan.count, dtype=scan.first_copy.dtype))
        metrics = {"exactDuplicates": {"groups": int(len(repeated)), **_fractions(scan, copies)}}
        return findings, metrics, {DROP_LIST: scan.drop_entries(copies)}

    def _group(self, scan: ScanWindows, members: np.ndarray, cap: int) -> Finding:
        head = int(members[0])
        domain = int(scan.domains[head])
        what, unit = _unit(domain)
        length = int(scan.lengths[head])
        copies = len(members)
        extra = "extra copy adds" if copies == 2 else "extra copies add"
        message = (f"{copies:,} {what} are exact copies of each other ({length:,} {unit} each); the "
                   f"{copies - 1:,} {extra} {length * (copies - 1):,} {unit} per epoch and weight this content "
                   f"{copies}x. The first copy is {scan.uri(head)} row "
                   f"{int(scan.rows[head]):,}: keep it and drop the others (--drop-list FILE writes the rows to "
                   "drop).")
        return scan.group_finding(self, members, f"copies-{hex_digest(scan.content[head])}", message, cap,
                                  copies=copies, contentHash=hex_digest(scan.content[head]),
                                  **_size_evidence(domain, length * copies, length * (copies - 1)))

    def _rest(self, scan: ScanWindows, groups: np.ndarray, cap: int) -> Finding:
        heads = scan.order[scan.group_starts[groups]]
        extra = int((scan.group_sizes[groups] - 1).sum())
        message = (f"{len(groups):,} more groups of exact copies ({extra:,} extra copies) are not listed one by "
                   f"one (max_clusters = {self._max_clusters():,}); the instances are their first copies. They "
                   "are in the corpus figures and in the drop list (--drop-list FILE). Raise max_clusters under "
                   "[rule.exact-duplicate] to list them.")
        return scan.group_finding(self, heads, "more-groups", message, cap, groups=int(len(groups)),
                                  extraCopies=extra)


class NearDuplicate(_DuplicateRule):
    """Windows (token rows) or documents (text) that are near-duplicates: their sets of n-token shingles (or
    n-word shingles after lowercasing) have an estimated Jaccard similarity at or above the threshold. Near
    copies -- the same page with a different header, a boilerplate licence, a document re-tokenized after a
    small edit -- act like exact copies in training: repeated content, more memorisation, less new text per
    token. The similarity is estimated with MinHash signatures and found with locality-sensitive hashing
    (b bands of r values): a heuristic, so a pair close to the threshold can be missed or included by chance
    (the standard error of an estimate s is sqrt(s(1-s)/num_perm)). Exact copies are reported by exact-duplicate;
    a cluster here has at least two different contents."""

    id = "near-duplicate"
    level = Level.warning
    summary = "Windows or documents whose estimated Jaccard similarity (MinHash LSH) is at or above the threshold."
    help = ("Keep the first window of each cluster (scan order: shard order, then row) and drop the others: "
            "`corpuscle scan ... --drop-list FILE` writes one JSON line {\"uri\", \"row\"} per window to drop. "
            "Near-deduplicate the documents before packing. If the listed windows are meant to be alike (shared "
            "templates), raise threshold under [rule.near-duplicate].")
    options = {"threshold": 0.8, "num_perm": 128, "seed": 1, "n": 5, "max_clusters": DEFAULT_MAX_CLUSTERS,
               "max_bucket": DEFAULT_MAX_BUCKET, "signature_folder": "", "memory_limit_mb": 1024}
    keyed = True  # the band keys are grouped by a partitioned shuffle (partition / reduce_partition)

    def __init__(self, **options):
        super().__init__(**options)
        threshold = self.opts["threshold"]
        if isinstance(threshold, bool) or not isinstance(threshold, (int, float)) or not 0 < threshold <= 1:
            raise ValueError(f"rule {self.id}: threshold must be a number in (0, 1], got {threshold!r}; hint: 0.8 "
                             "finds near copies, 0.5 also loosely related windows")
        try:
            self.minhash = MinHashSettings(num_perm=self.opts["num_perm"], n=self.opts["n"], seed=self.opts["seed"])
        except (TypeError, ValueError) as exc:
            raise ValueError(f"rule {self.id}: {exc}") from None
        self._max_clusters()
        _check_int(self.id, "max_bucket", self.opts["max_bucket"], 1,
                   f"windows per LSH bucket paired in full; the default is {DEFAULT_MAX_BUCKET}")
        _check_int(self.id, "memory_limit_mb", self.opts["memory_limit_mb"], 0,
                   "megabytes of band keys held in memory before they go to disk; the default is 1024")
        self.threshold = float(threshold)
        self.bands, self.rows_per_band = optimal_bands(self.threshold, self.minhash.num_perm)
        folder = self.opts["signature_folder"]
        if not isinstance(folder, str):
            raise ValueError(f"rule {self.id}: signature_folder must be a folder path (a string), got {folder!r}; "
                             "hint: leave it empty for the system temporary folder, or give a folder every worker "
                             "of a cluster mounts at the same path")
        # One folder per scan for the signature files: the path travels with the rule to worker processes.
        # Named after this process, so that a later scan removes it if this one is killed (see run_folder).
        self.spill_folder = run_folder(folder or tempfile.gettempdir(), "corpuscle-minhash")
        weakref.finalize(self, shutil.rmtree, self.spill_folder, True)  # an interrupted scan leaves nothing

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.spill = None
        return state

    def feed(self, state, batch):
        windows = batch_windows(batch, state.settings)
        n = self.minhash.n
        if windows.domain == TOKENS:
            flat = batch.flat(state.settings.tokens_column)
            sizes = flat.offsets

            def shingled_hashes(w0, w1):
                return shingle_hashes(flat.values, flat.offsets[w0:w1 + 1], n)
        else:
            text = document_text(batch, state.settings)
            if text.array is None:
                return
            sizes = np.zeros(len(text.array) + 1, dtype=np.int64)
            np.cumsum(pc.binary_length(text.array).fill_null(0).to_numpy(zero_copy_only=False), out=sizes[1:])

            def shingled_hashes(w0, w1):
                return word_shingle_hashes(text.array.slice(w0, w1 - w0), n)
        # Shingles are hashed a range of rows at a time (at least one row, at most about _SHINGLE_VALUES tokens or
        # text bytes otherwise): their scratch memory is some 40 bytes per token.
        shingled = []  # windows with at least one shingle, by range
        for w0, w1 in _ranges(sizes, _SHINGLE_VALUES):
            hashes, offsets = shingled_hashes(w0, w1)
            local = np.flatnonzero(offsets[1:] > offsets[:-1])
            if len(local) == 0:
                continue
            if state.spill is None:
                state.spill = SignatureSpill(self.spill_folder, self.minhash.num_perm)
            for lo in range(0, len(local), _SIGNATURE_WINDOWS):
                chosen = local[lo:lo + _SIGNATURE_WINDOWS]
                first, last = int(chosen[0]), int(chosen[-1])
                block = signatures(hashes, offsets[first:last + 2], self.minhash.num_perm, self.minhash.seed)
                state.spill.append(block[chosen - first])
            shingled.append(local + w0)
            del hashes, offsets
        if shingled:
            # Shingled windows are non-empty, so each is one of ``windows``.
            self._keep(state, windows, np.searchsorted(windows.local, np.concatenate(shingled)))

    def end(self, state):
        """The shard's band keys and signature digests, made from its signature file once the shard is read.

        They are wanted only by the reduce, so they go to a file of their own (:class:`BandSpill`, a block of
        signatures at a time) and the state holds read-only memory maps of it (``keys`` and ``digests``), which take
        no memory until read: :class:`ShardBands` reads the file itself, block by block, rather than the maps. Held
        in memory, they would be most of what a shard's state holds (8 bytes per band and window, of about 100)."""
        state = super().end(state)
        spill = state.__dict__.pop("spill")
        state.signatures_path = spill.close() if spill is not None else None
        if spill is None or spill.windows == 0:
            state.keys = np.zeros((0, self.bands), dtype=np.uint64)
            state.digests = np.zeros(0, dtype=np.uint64)
            return state
        bands = BandSpill(self.spill_folder, self.bands + 1)
        for _, block in npy_blocks(state.signatures_path):
            bands.append(np.column_stack((band_keys(block, self.bands, self.rows_per_band),
                                          signature_digests(block))))
        stored = np.load(bands.close(), mmap_mode="r")
        state.keys, state.digests = stored[:, :self.bands], stored[:, self.bands]
        return state

    # -- the reduce step -------------------------------------------------------------------------------------------

    def partition(self, state, parts):
        """Map side of the shuffle: the band keys of the shard's windows, by partition (key modulo ``parts``; the
        keys are mixed hashes, so the low bits spread evenly). A window whose content already appeared earlier in
        the same shard is left out: it is an exact copy, never a first copy, and the result does not need it. The
        pieces are views of the state's band keys (see :class:`BandPiece`): nothing is copied here."""
        slim = copy.copy(state)
        del slim.keys, slim.digests
        source = ShardBands(state.keys, state.digests, _first_copies(state.content), parts)
        count = len(state.rows)
        return slim, self._spill([BandPiece(count, state.signatures_path, source=source, part=p)
                                  for p in range(parts)])

    def _spill(self, pieces: list) -> list:
        """Bound the band keys held for the reduce (``memory_limit_mb``).

        Pieces are kept as they are while the entries of the pieces made by this process add up to at most
        ``memory_limit_mb`` megabytes at 24 bytes an entry (what they weigh once picked, in the reduce or on their
        way to another process; until then they are views of the shard's band keys). In a local scan that is every
        piece of the scan: this process splits every shard's state. Past it, each piece's entries are written with
        ``np.save`` to ``.npy`` files in the scan's temporary folder (the one of the signature files, removed with
        it), one piece at a time, and replaced by read-only memory maps of those files, which ``reduce_partition``
        reads back. The findings are the same either way.
        """
        size = sum(piece.nbytes for piece in pieces)
        held = getattr(self, "_held_bytes", 0) + size
        if held <= self.opts["memory_limit_mb"] * 2 ** 20:
            self._held_bytes = held
            return pieces
        os.makedirs(self.spill_folder, mode=0o700, exist_ok=True)
        out = []
        for piece in pieces:
            mapped = []
            for name, values in zip(("window", "keys", "digests"), piece.entries()):
                if values.size == 0:  # an empty file cannot be memory-mapped; nothing to hold anyway
                    mapped.append(values)
                    continue
                fd, path = tempfile.mkstemp(prefix=f"band-{name}-", suffix=".npy", dir=self.spill_folder)
                with os.fdopen(fd, "wb") as fh:
                    np.save(fh, values)
                mapped.append(np.load(path, mmap_mode="r"))
            out.append(BandPiece(piece.windows, piece.signatures, entries=tuple(mapped)))
        return out

    def reduce_partition(self, pieces):
        """Reduce side: the candidate pairs of the partition's buckets (global window ids in scan order) and their
        estimated Jaccard similarity, the signatures read back from the shards' signature files."""
        offsets = np.zeros(len(pieces) + 1, dtype=np.int64)
        np.cumsum([piece.windows for piece in pieces], out=offsets[1:])
        # The entries of all pieces, each piece picked and copied into place in turn.
        total = sum(piece.count for piece in pieces)
        keys, ids, digests = np.empty(total, np.uint64), np.empty(total, np.int64), np.empty(total, np.uint64)
        at = 0
        for s, piece in enumerate(pieces):
            window, piece_keys, piece_digests = piece.entries()
            end = at + len(window)
            np.add(window, offsets[s], out=ids[at:end])
            keys[at:end], digests[at:end] = piece_keys, piece_digests
            at = end
            del window, piece_keys, piece_digests
        found = self._bucket_candidates(keys, ids, digests)
        del keys, ids, digests
        similarity = self._verify(found.pairs, offsets, [piece.signatures for piece in pieces])
        return NearPartial(found.pairs, similarity, found.capped_buckets, found.largest_bucket)

    def _bucket_candidates(self, keys: np.ndarray, ids: np.ndarray, digests: np.ndarray) -> Candidates:
        """:func:`corpuscle.kernels.lsh.partition_candidates` of a partition's entries, in finer partitions of at most about
        :data:`_REDUCE_ENTRIES` entries each when it has more: its scratch memory is several times that of the
        entries it is given, so it is given a bounded share at a time.

        The finer partitions split by other bits of the key (bits 32 and up modulo their number; the keys are
        mixed hashes, so these spread evenly too): each bucket still lies wholly in one of them, and windows with
        identical signatures share all their keys, so the union of their pairs is the partition's pair set (the
        reasoning of :func:`~corpuscle.kernels.lsh.partition_candidates`), made unique here; capped buckets add up and the
        largest bucket is the largest of any."""
        max_bucket = self.opts["max_bucket"]
        finer = -(-len(keys) // _REDUCE_ENTRIES)
        if finer <= 1:
            return partition_candidates(keys, ids, digests=digests, max_bucket=max_bucket)
        which = ((keys >> np.uint64(32)) % np.uint64(finer)).astype(np.min_scalar_type(finer - 1))
        found, capped, largest = [], 0, 0
        for q in range(finer):
            mask = which == q
            part = partition_candidates(keys[mask], ids[mask], digests=digests[mask], max_bucket=max_bucket)
            found.append(part.pairs)
            capped += part.capped_buckets
            largest = max(largest, part.largest_bucket)
            del mask, part
        pairs = np.concatenate(found)
        del found
        pairs = pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]
        once = np.ones(len(pairs), dtype=bool)
        once[1:] = np.any(pairs[1:] != pairs[:-1], axis=1)
        return Candidates(pairs[once], capped, largest)

    def corpus(self, states, partials=None):
        try:
            if partials is None:
                states, partials = self.keyed_reduce(states)
            return self._corpus(states, partials)
        finally:
            shutil.rmtree(self.spill_folder, ignore_errors=True)
            self._held_bytes = 0

    def _corpus(self, states, partials):
        scan = ScanWindows(states)
        cap = states[0].cap if states else 0
        ids = np.arange(scan.count)
        first = scan.first_copy == ids
        distinct = np.flatnonzero(first)
        found, similarity = self._candidates(partials, first)
        pairs = found.pairs
        same = scan.domains[pairs[:, 0]] == scan.domains[pairs[:, 1]]  # a document never pairs a window
        pairs, similarity = pairs[same], similarity[same]
        kept = similarity >= self.threshold
        pairs, similarity = pairs[kept], similarity[kept]

        label = np.full(scan.count, -1, dtype=np.int64)
        label[distinct] = clusters(pairs, distinct)
        label = label[scan.first_copy]  # an exact copy belongs to its first copy's cluster
        members = np.bincount(label[distinct], minlength=scan.count)  # distinct contents per cluster
        in_cluster = members[label] >= 2
        drop = np.flatnonzero(in_cluster & (label != ids))
        near = drop[scan.first_copy[drop] == drop]  # distinct contents beyond the first: this rule's share

        heads = np.flatnonzero((label == ids) & (members >= 2))
        # Largest first (distinct contents, then all windows), then the one whose first window comes first.
        windows_per = np.bincount(label[in_cluster], minlength=scan.count)
        heads = heads[np.lexsort((heads, -windows_per[heads], -members[heads]))]
        listed = heads[:self._max_clusters()]
        findings = self._findings(scan, listed, label, pairs, similarity, found.capped_buckets, cap)
        if len(heads) > len(listed):
            findings.append(self._rest(scan, heads[len(listed):], members, cap))
        metrics = {"nearDuplicates": {
            "threshold": self.threshold, "bands": self.bands, "rowsPerBand": self.rows_per_band,
            "numPerm": self.minhash.num_perm, "shingleSize": self.minhash.n, "clusters": int(len(heads)),
            **_fractions(scan, near),
            "candidatePairs": int(len(found.pairs)), "verifiedPairs": int(len(pairs)),
            "cappedBuckets": found.capped_buckets, "largestBucket": found.largest_bucket,
        }}
        return findings, metrics, {DROP_LIST: scan.drop_entries(drop)}

    @staticmethod
    def _candidates(partials: list, first: np.ndarray) -> tuple[Candidates, np.ndarray]:
        """The candidate pairs of all partitions between first copies (an exact copy pairs through its first
        copy), each pair once, sorted, with its similarity: what candidate_pairs gives on all the keys at once."""
        pairs = np.concatenate([p.pairs for p in partials]) if partials else np.zeros((0, 2), np.int64)
        similarity = np.concatenate([p.similarity for p in partials]) if partials else np.zeros(0)
        keep = first[pairs[:, 0]] & first[pairs[:, 1]]
        pairs, similarity = pairs[keep], similarity[keep]
        order = np.lexsort((pairs[:, 1], pairs[:, 0]))
        pairs, similarity = pairs[order], similarity[order]
        once = np.ones(len(pairs), dtype=bool)
        once[1:] = np.any(pairs[1:] != pairs[:-1], axis=1)
        capped = sum(p.capped_buckets for p in partials)
        largest = max((p.largest_bucket for p in partials), default=0)
        return Candidates(pairs[once], capped, largest), similarity[once]

    def _verify(self, pairs: np.ndarray, offsets: np.ndarray, paths: list) -> np.ndarray:
        """Estimated Jaccard similarity of each pair, reading the signatures of a chunk of pairs at a time from the
        signature file of each window's shard (shard ``s`` holds the ids ``offsets[s]`` to ``offsets[s + 1] - 1``)."""
        similarity = np.empty(len(pairs), dtype=np.float64)
        for lo in range(0, len(pairs), _VERIFY_PAIRS):
            chunk = pairs[lo:lo + _VERIFY_PAIRS]
            needed, where = np.unique(chunk, return_inverse=True)
            where = where.reshape(chunk.shape)
            block = np.empty((len(needed), self.minhash.num_perm), dtype=np.uint32)
            shard = np.searchsorted(offsets, needed, side="right") - 1
            cuts = np.flatnonzero(np.diff(shard)) + 1
            for a, b in zip(np.concatenate(([0], cuts)).tolist(), np.concatenate((cuts, [len(needed)])).tolist()):
                s = int(shard[a])
                block[a:b] = read_rows(paths[s], needed[a:b] - offsets[s])
            similarity[lo:lo + len(chunk)] = estimated_jaccard(block[where[:, 0]], block[where[:, 1]])
        return similarity

    def _findings(self, scan, heads, label, pairs, similarity, capped, cap) -> list[Finding]:
        if len(heads) == 0:
            return []
        # Verified pairs by cluster, for the lowest and mean similarity of each.
        pair_label = label[pairs[:, 0]]
        by_pair = np.argsort(pair_label, kind="stable")
        pair_label, similarity = pair_label[by_pair], similarity[by_pair]
        # Windows by cluster, in id order.
        members = np.flatnonzero(np.isin(label, heads))
        members = members[np.argsort(label[members], kind="stable")]
        member_label = label[members]
        out = []
        for head in heads.tolist():
            lo, hi = np.searchsorted(member_label, head), np.searchsorted(member_label, head, side="right")
            group = members[lo:hi]
            distinct = group[scan.first_copy[group] == group]
            p_lo, p_hi = np.searchsorted(pair_label, head), np.searchsorted(pair_label, head, side="right")
            sims = similarity[p_lo:p_hi]
            out.append(self._cluster(scan, head, distinct, len(group) - len(distinct), sims, capped, cap))
        return out

    def _cluster(self, scan, head, distinct, copies, sims, capped, cap) -> Finding:
        domain = int(scan.domains[head])
        what, unit = _unit(domain)
        lowest, mean = float(sims.min()), float(sims.mean())
        total = int(scan.lengths[distinct].sum())
        shingles = f"{self.minhash.n}-{'token' if domain == TOKENS else 'word'} shingles"
        message = (f"{len(distinct):,} {what} are near-duplicates: estimated Jaccard similarity of their "
                   f"{shingles} {lowest:.2f} at the lowest, {mean:.2f} on average over {len(sims):,} verified "
                   f"pair(s) ({total:,} {unit} in all). This is an estimate, a heuristic and not a proof: MinHash LSH "
                   f"with {self.minhash.num_perm} permutations in b x r = {self.bands} x {self.rows_per_band} "
                   f"(bands x rows), threshold {self.threshold:g}.")
        if copies:
            message += f" {copies:,} exact cop{'y' if copies == 1 else 'ies'} of these {what} are reported by " \
                       "exact-duplicate."
        if capped:
            message += (f" {capped:,} LSH bucket(s) were too large to pair in full (max_bucket), so clusters may "
                        "come out split.")
        message += (f" The first is {scan.uri(head)} row {int(scan.rows[head]):,}: keep it and drop the others "
                    "(--drop-list FILE writes the rows to drop).")
        return scan.group_finding(
            self, distinct, f"cluster-{hex_digest(scan.content[head])}", message, cap,
            windows=int(len(distinct)), exactCopies=int(copies), similarityMin=round(lowest, 4),
            similarityMean=round(mean, 4), verifiedPairs=int(len(sims)), threshold=self.threshold,
            bands=self.bands, rowsPerBand=self.rows_per_band, numPerm=self.minhash.num_perm,
            shingleSize=self.minhash.n, method="MinHash LSH estimate (heuristic)",
            **_size_evidence(domain, total, total - int(scan.lengths[head])))

    def _rest(self, scan, heads, members, cap) -> Finding:
        windows = int(members[heads].sum())
        message = (f"{len(heads):,} more near-duplicate clusters ({windows:,} distinct windows or documents) are "
                   f"not listed one by one (max_clusters = {self._max_clusters():,}); the instances are their "
                   "first windows. They are estimates like the listed ones (MinHash LSH, heuristic), counted in "
                   "the corpus figures and included in the drop list (--drop-list FILE). Raise max_clusters under "
                   "[rule.near-duplicate] to list them.")
        return scan.group_finding(self, heads, "more-clusters", message, cap, clusters=int(len(heads)),
                                  windows=windows)


RULES = [NearDuplicate, ExactDuplicate]
