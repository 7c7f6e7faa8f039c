"""What three window layouts would make of a set of document lengths.

A training job cuts its documents into fixed windows of ``seq_len`` tokens. How it
does so decides how much of the token budget is spent on padding and how many
document tokens never reach the model. Given the length of every document, this
module computes, for three layouts, the windows they need and the tokens they keep,
pad and drop, so that a rule can put the as-built layout of a shard next to them:

``one_per_window``
    Each document in a window of its own, cut to ``seq_len`` and padded up to it.
    An **empty document takes no window**: it has nothing to train on, and the
    ``empty-document`` rule reports it separately.
``concat_chunk``
    All documents joined end to end and cut every ``seq_len`` tokens. The last,
    partial window is **kept and padded**, so this layout drops nothing and pads
    fewer than ``seq_len`` tokens in all. (The other common choice, dropping the
    partial window, would trade that padding for ``total % seq_len`` dropped
    tokens; this module does not model it.)
``best_fit_decreasing``
    A document longer than ``seq_len`` is split into full windows plus one
    remainder piece; the pieces are then packed by best-fit decreasing (largest
    piece first, each into the open window with the least room that still holds
    it, a new window when none does). Nothing is cut or dropped.

The lengths are taken as given: if the layout adds a separator token per document
(``eos-after``, ``bos-before``), count it in the lengths before calling.

``lower_bound`` is ``ceil(total / seq_len)``: no layout that keeps every token can
use fewer windows.

Every function also takes the documents as a length histogram: ``counts[i]``
documents of length ``lengths[i]`` (``counts=None``: one document per entry). The
results are the same as for the expanded list ``np.repeat(lengths, counts)``, at a
cost that depends on the number of distinct lengths, not on the number of documents.

Everything is numpy over the whole length array. Best-fit decreasing works on
counts: there are at most ``seq_len - 1`` distinct piece sizes, and the windows
are kept as counts per remaining room, so its cost after one ``bincount`` depends
on ``seq_len``, not on the number of documents (see :func:`best_fit_decreasing_fills`).
"""

from __future__ import annotations

import bisect
import numbers
from dataclasses import dataclass, field

import numpy as np

__all__ = [
    "Layout",
    "Layouts",
    "AsBuilt",
    "Saving",
    "one_per_window",
    "concat_chunk",
    "best_fit_decreasing",
    "best_fit_decreasing_fills",
    "lower_bound",
    "compare_layouts",
    "savings",
]


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class Layout:
    """What one layout makes of the documents.

    ``slots`` is ``windows * seq_len``; ``real_tokens + padding == slots``;
    ``real_tokens + dropped == document_tokens``. ``padding_pct`` is padding as a
    percentage of slots, ``dropped_pct`` dropped tokens as a percentage of all
    document tokens (both 0.0 when there is nothing to divide by).
    """

    name: str
    seq_len: int
    windows: int
    real_tokens: int
    dropped: int
    slots: int = field(init=False)
    padding: int = field(init=False)
    document_tokens: int = field(init=False)
    padding_pct: float = field(init=False)
    dropped_pct: float = field(init=False)

    def __post_init__(self) -> None:
        slots = self.windows * self.seq_len
        total = self.real_tokens + self.dropped
        object.__setattr__(self, "slots", slots)
        object.__setattr__(self, "padding", slots - self.real_tokens)
        object.__setattr__(self, "document_tokens", total)
        object.__setattr__(self, "padding_pct", 100.0 * (slots - self.real_tokens) / slots if slots else 0.0)
        object.__setattr__(self, "dropped_pct", 100.0 * self.dropped / total if total else 0.0)


@dataclass(frozen=True)
class Layouts:
    """The three layouts of one set of documents, and the lower bound on windows."""

    one_per_window: Layout
    concat_chunk: Layout
    best_fit_decreasing: Layout
    lower_bound: int

    def __iter__(self):
        return iter((self.one_per_window, self.concat_chunk, self.best_fit_decreasing))


@dataclass(frozen=True)
class AsBuilt:
    """How a shard is actually laid out: its token slots and what fills them.

    ``slots`` counts every position of every row (``real_tokens + padding``);
    ``truncated`` counts document tokens that were cut off and appear nowhere.
    """

    slots: int
    real_tokens: int
    padding: int
    truncated: int

    def __post_init__(self) -> None:
        for name in ("slots", "real_tokens", "padding", "truncated"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < 0:
                raise ValueError(
                    f"as-built {name} must be a non-negative integer, got {value!r}; "
                    "hint: count tokens with numpy and pass int(...)"
                )
        if self.real_tokens + self.padding != self.slots:
            raise ValueError(
                f"as-built slots ({self.slots}) must equal real_tokens + padding "
                f"({self.real_tokens} + {self.padding}); hint: count every position of every row as a slot"
            )


@dataclass(frozen=True)
class Saving:
    """What a layout would save against the as-built one.

    ``slots_saved`` and ``windows_saved`` (``slots_saved / seq_len``, fractional when
    the as-built rows are ragged) are negative when the layout needs more room;
    ``slots_saved_pct`` is relative to the as-built slots; ``tokens_recovered`` is
    how many more document tokens the layout keeps than the as-built one.
    """

    layout: str
    slots_saved: int
    windows_saved: float
    slots_saved_pct: float
    tokens_recovered: int


# --------------------------------------------------------------------------- checks


def _check_seq_len(seq_len) -> int:
    if isinstance(seq_len, bool) or not isinstance(seq_len, numbers.Integral) or seq_len < 1:
        raise ValueError(
            f"seq_len must be an integer >= 1, got {seq_len!r}; "
            "hint: pass the context window in tokens, e.g. seq_len=2048"
        )
    return int(seq_len)


def _check_lengths(lengths) -> np.ndarray:
    arr = np.asarray(lengths)
    if arr.size == 0:
        return np.zeros(0, dtype=np.int64)
    if arr.ndim != 1:
        raise ValueError(
            f"lengths must be a 1-D array of document lengths, got shape {arr.shape}; "
            "hint: flatten it, one entry per document"
        )
    if arr.dtype == np.bool_ or not np.issubdtype(arr.dtype, np.integer):
        raise ValueError(
            f"lengths must hold integers, got dtype {arr.dtype}; "
            "hint: token counts are whole numbers, cast with .astype(np.int64)"
        )
    if np.issubdtype(arr.dtype, np.signedinteger):
        if arr.min() < 0:
            raise ValueError(
                f"lengths must be >= 0, found {int(arr.min())} at index {int(arr.argmin())}; "
                "hint: a document length counts tokens and cannot be negative"
            )
    elif arr.max() > np.iinfo(np.int64).max:
        raise ValueError("lengths do not fit in int64; hint: check the length column for corrupt values")
    return arr.astype(np.int64, copy=False)


def _check_counts(counts, arr: np.ndarray) -> np.ndarray | None:
    """Documents per length (same shape as the lengths); None (one document per length) when not given."""
    if counts is None:
        return None
    cnt = np.asarray(counts)
    if cnt.size == 0 and arr.size == 0:
        return np.zeros(0, dtype=np.int64)
    if cnt.shape != arr.shape:
        raise ValueError(
            f"counts must have one entry per length, got shape {cnt.shape} for lengths of shape {arr.shape}; "
            "hint: counts[i] is how many documents have length lengths[i]"
        )
    if cnt.dtype == np.bool_ or not np.issubdtype(cnt.dtype, np.integer):
        raise ValueError(f"counts must hold integers, got dtype {cnt.dtype}; hint: cast with .astype(np.int64)")
    if np.issubdtype(cnt.dtype, np.signedinteger) and cnt.size and cnt.min() < 0:
        raise ValueError(
            f"counts must be >= 0, found {int(cnt.min())} at index {int(cnt.argmin())}; "
            "hint: a count of documents cannot be negative"
        )
    return cnt.astype(np.int64, copy=False)


def _total(arr: np.ndarray, cnt: np.ndarray | None) -> int:
    """Sum of the lengths, each taken ``cnt`` times when counts are given."""
    if cnt is None:
        return int(arr.sum())
    return int(np.dot(arr, cnt)) if arr.size else 0


# --------------------------------------------------------------------------- layouts


def lower_bound(lengths, seq_len, counts=None) -> int:
    """``ceil(total / seq_len)``: the fewest windows any layout keeping every token needs."""
    seq_len = _check_seq_len(seq_len)
    arr = _check_lengths(lengths)
    total = _total(arr, _check_counts(counts, arr))
    return -(-total // seq_len)


def one_per_window(lengths, seq_len, counts=None) -> Layout:
    """Each non-empty document in its own window, cut to ``seq_len``, padded to it.

    Empty documents take no window. Dropped tokens are ``sum(max(0, L - seq_len))``.
    """
    seq_len = _check_seq_len(seq_len)
    arr = _check_lengths(lengths)
    cnt = _check_counts(counts, arr)
    total = _total(arr, cnt)
    kept = _total(np.minimum(arr, seq_len), cnt)
    windows = int(np.count_nonzero(arr)) if cnt is None else int(cnt[arr > 0].sum())
    return Layout("one_per_window", seq_len, windows, kept, total - kept)


def concat_chunk(lengths, seq_len, counts=None) -> Layout:
    """All documents end to end, cut every ``seq_len`` tokens; the last partial window is padded."""
    seq_len = _check_seq_len(seq_len)
    arr = _check_lengths(lengths)
    total = _total(arr, _check_counts(counts, arr))
    return Layout("concat_chunk", seq_len, -(-total // seq_len), total, 0)


def best_fit_decreasing_fills(lengths, seq_len, counts=None) -> np.ndarray:
    """Window fills of the best-fit-decreasing layout, as counts.

    Returns an int64 array ``fills`` of length ``seq_len + 1``: ``fills[f]`` is the
    number of windows holding ``f`` real tokens (``fills[0]`` is always 0). The
    window count is ``fills.sum()``.

    Method. Each document of length ``L`` gives ``L // seq_len`` full windows and, when
    ``L % seq_len > 0``, one piece of that size. The pieces are counted per size
    (one ``bincount``), and the open windows are kept as counts per remaining room
    ``r``, with a sorted list of the rooms that hold at least one window.

    Batching is exact. Let ``c`` pieces of size ``s`` arrive (all larger pieces
    placed). Best fit puts the first in a window of the smallest room ``r >= s``.
    No window had room in ``[s, r)``, so if ``r - s >= s`` the same window is now the
    unique tightest fit and takes the next piece too: it takes ``k = r // s`` pieces
    in a row and ends at ``r % s < s``, where size ``s`` never fits again. Then the
    next window of room ``r`` does the same, then those of the next larger room,
    and when no window fits, a new window (room ``seq_len``) takes
    ``seq_len // s`` pieces in a row. Which of several equal-room windows is chosen
    does not change the multiset of rooms, and the rest of the algorithm depends
    on nothing else, so moving whole groups of windows with integer arithmetic
    gives exactly the window fills of placing the pieces one at a time.

    Cost. ``O(n)`` numpy for the split and the ``bincount``, then a Python loop over
    events. Per distinct piece size (``D <= seq_len - 1`` of them) there is at most
    one event that splits a group or opens windows, and it adds at most two rooms.
    Every other event empties the group at room ``r`` into room ``r % s``, which is
    at most ``(r - 1) / 2``. With the potential ``sum(bit_length(r))`` over the
    occupied rooms, an emptying lowers it by at least 1 and a splitting/opening
    event raises it by at most ``2 * B`` with ``B = bit_length(seq_len - 1)``; so
    there are at most ``D * (2 * B + 1)`` events (about 47,000 for
    ``seq_len = 2048``), each costing one ``bisect`` and at most one list insertion
    into a list of at most ``seq_len`` rooms. The total is ``O(n)`` numpy work plus
    ``O(seq_len * log(seq_len))`` events, independent of the number of documents.
    """
    seq_len = _check_seq_len(seq_len)
    arr = _check_lengths(lengths)
    fills = np.zeros(seq_len + 1, dtype=np.int64)
    if arr.size == 0:
        return fills
    full_windows, pieces = np.divmod(arr, seq_len)
    if counts is None:
        fills[seq_len] = int(full_windows.sum())
        piece_counts = np.bincount(pieces, minlength=seq_len)
    else:  # a histogram: count[i] documents of length arr[i]
        cnt = _check_counts(counts, arr)
        fills[seq_len] = _total(full_windows, cnt)
        piece_counts = np.zeros(seq_len, dtype=np.int64)
        np.add.at(piece_counts, pieces, cnt)
    piece_counts[0] = 0  # no remainder piece

    room = [0] * (seq_len + 1)  # room[r]: open windows with r tokens of room left
    occupied: list[int] = []  # sorted rooms r >= 1 with room[r] > 0

    def add(r: int, m: int) -> None:
        if m:
            if r and not room[r]:
                bisect.insort(occupied, r)
            room[r] += m

    def take(r: int, m: int) -> None:
        room[r] -= m
        if not room[r]:
            del occupied[bisect.bisect_left(occupied, r)]

    for s in np.flatnonzero(piece_counts)[::-1].tolist():
        c = int(piece_counts[s])
        while c:
            i = bisect.bisect_left(occupied, s)
            if i == len(occupied):
                break
            r = occupied[i]
            w = room[r]
            k = r // s
            if c >= w * k:  # every window of room r takes k pieces
                take(r, w)
                add(r % s, w)
                c -= w * k
            else:  # pieces run out inside this group
                m, j = divmod(c, k)
                take(r, m + (1 if j else 0))
                add(r % s, m)
                if j:
                    add(r - j * s, 1)
                c = 0
        if c:  # no open window fits: open new ones
            k = seq_len // s
            m, j = divmod(c, k)
            add(seq_len % s, m)
            if j:
                add(seq_len - j * s, 1)

    # a window with r tokens of room holds seq_len - r real tokens
    fills[1:] += np.asarray(room[:seq_len], dtype=np.int64)[::-1]
    return fills


def best_fit_decreasing(lengths, seq_len, counts=None) -> Layout:
    """Split documents longer than ``seq_len``, pack the pieces by best-fit decreasing.

    Nothing is dropped; padding is the room left in the windows. See
    :func:`best_fit_decreasing_fills` for the method and its cost.
    """
    seq_len = _check_seq_len(seq_len)
    arr = _check_lengths(lengths)
    cnt = _check_counts(counts, arr)
    windows = int(best_fit_decreasing_fills(arr, seq_len, cnt).sum())
    return Layout("best_fit_decreasing", seq_len, windows, _total(arr, cnt), 0)


def compare_layouts(lengths, seq_len, counts=None) -> Layouts:
    """All three layouts of the same documents, and ``lower_bound``."""
    seq_len = _check_seq_len(seq_len)
    arr = _check_lengths(lengths)
    cnt = _check_counts(counts, arr)
    return Layouts(
        one_per_window=one_per_window(arr, seq_len, cnt),
        concat_chunk=concat_chunk(arr, seq_len, cnt),
        best_fit_decreasing=best_fit_decreasing(arr, seq_len, cnt),
        lower_bound=lower_bound(arr, seq_len, cnt),
    )


def savings(as_built, layouts: Layouts) -> dict[str, Saving]:
    """What each layout would save against the as-built layout, keyed by layout name.

    ``as_built`` is an :class:`AsBuilt` or a ``(slots, real_tokens, padding, truncated)``
    tuple. The comparison is fair when the layouts were computed from the
    documents' full lengths (before the as-built truncation).
    """
    if not isinstance(as_built, AsBuilt):
        try:
            as_built = AsBuilt(*as_built)
        except TypeError:
            raise ValueError(
                f"as_built must be AsBuilt or a (slots, real_tokens, padding, truncated) tuple, got {as_built!r}; "
                "hint: pass four token counts"
            ) from None
    if not isinstance(layouts, Layouts):
        raise ValueError("layouts must be the result of compare_layouts(); hint: call compare_layouts(lengths, seq_len)")
    result = {}
    for layout in layouts:
        saved = as_built.slots - layout.slots
        result[layout.name] = Saving(
            layout=layout.name,
            slots_saved=saved,
            windows_saved=saved / layout.seq_len,
            slots_saved_pct=100.0 * saved / as_built.slots if as_built.slots else 0.0,
            tokens_recovered=as_built.truncated - layout.dropped,
        )
    return result
