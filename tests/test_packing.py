"""Tests for corpuscle.kernels.packing: three window layouts of a set of document lengths.

The layouts are checked against plain Python loops written here, batched best-fit
decreasing against a one-piece-at-a-time best-fit decreasing, and the packings
against the exact optimum and the published worst-case bound for best fit on
decreasing lists.
"""

import os
import sys

import numpy as np
import pytest

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from corpuscle.kernels.packing import (  # noqa: E402
    AsBuilt,
    best_fit_decreasing,
    best_fit_decreasing_fills,
    compare_layouts,
    concat_chunk,
    lower_bound,
    one_per_window,
    savings,
)

# --------------------------------------------------------------------------- references


def ref_one_per_window(lengths, seq_len):
    """(windows, real, padding, dropped), one document per window, by a plain loop."""
    windows = real = dropped = 0
    for length in lengths:
        if length == 0:
            continue
        windows += 1
        kept = length if length < seq_len else seq_len
        real += kept
        dropped += length - kept
    return windows, real, windows * seq_len - real, dropped


def ref_concat_chunk(lengths, seq_len):
    """(windows, real, padding, dropped), filling windows token run by token run."""
    windows = fill = real = 0
    for length in lengths:
        left = length
        while left:
            if fill == 0:
                windows += 1
            take = min(left, seq_len - fill)
            fill = (fill + take) % seq_len
            left -= take
            real += take
    return windows, real, windows * seq_len - real, 0


def ref_bfd_fills(lengths, seq_len):
    """Sorted window fills of best-fit decreasing, placing one piece at a time.

    Documents are cut into pieces of seq_len plus a remainder, the pieces sorted
    largest first, and each goes into the open window with the least room that
    still holds it (linear scan), or into a new window.
    """
    pieces = []
    for length in lengths:
        while length >= seq_len:
            pieces.append(seq_len)
            length -= seq_len
        if length:
            pieces.append(length)
    pieces.sort(reverse=True)
    rooms = []
    for piece in pieces:
        best = None
        for i, room in enumerate(rooms):
            if room >= piece and (best is None or room < rooms[best]):
                best = i
        if best is None:
            rooms.append(seq_len - piece)
        else:
            rooms[best] -= piece
    return sorted(seq_len - room for room in rooms)


def fills_as_list(fills):
    return np.repeat(np.arange(len(fills)), fills).tolist()


def opt_windows(items, capacity):
    """Exact fewest windows for items (each <= capacity): DP over subsets.

    best[mask] is the lexicographically smallest (windows used, load of the last
    window) over all orders of the items in mask placed by next fit. Any packing,
    read window by window, is such an order using no more windows than it, and a
    smaller pair never extends to a worse one, so best[all] is the optimum.
    """
    n = len(items)
    if n == 0:
        return 0
    best = [None] * (1 << n)
    best[0] = (1, 0)
    for mask in range(1 << n):
        windows, load = best[mask]
        for i in range(n):
            bit = 1 << i
            if mask & bit:
                continue
            size = items[i]
            cand = (windows, load + size) if load + size <= capacity else (windows + 1, size)
            nxt = mask | bit
            if best[nxt] is None or cand < best[nxt]:
                best[nxt] = cand
    return best[-1][0]


def opt_windows_brute(items, capacity):
    """Exact fewest windows by trying every partition of the items (small n only)."""
    best = len(items)

    def place(i, loads):
        nonlocal best
        if len(loads) >= best:
            return
        if i == len(items):
            best = len(loads)
            return
        for k in range(len(loads)):
            if loads[k] + items[i] <= capacity:
                loads[k] += items[i]
                place(i + 1, loads)
                loads[k] -= items[i]
        loads.append(items[i])
        place(i + 1, loads)
        loads.pop()

    if items:
        place(0, [])
    else:
        best = 0
    return best


def random_lengths(rng, seq_len):
    """Document lengths mixing empty, short, exact and overlong documents."""
    n = int(rng.integers(0, 60))
    kind = int(rng.integers(0, 4))
    if kind == 0:
        lengths = rng.integers(0, 3 * seq_len + 2, n)
    elif kind == 1:  # many short pieces: several per window
        lengths = rng.integers(1, max(2, seq_len // 3 + 1), n)
    elif kind == 2:  # sizes around a half and a third of the window
        lengths = rng.integers(max(1, seq_len // 5), seq_len // 2 + 2, n)
    else:
        lengths = np.where(rng.random(n) < 0.2, seq_len, rng.integers(0, seq_len + 1, n))
    return lengths.astype(np.int64)


SEQ_LENS = [1, 2, 3, 4, 5, 7, 8, 10, 12, 16, 31, 32, 50, 64, 100, 128]

# --------------------------------------------------------------------------- layouts vs plain loops


def test_layouts_match_plain_loops_on_random_instances():
    rng = np.random.default_rng(20240601)
    for case in range(400):
        seq_len = SEQ_LENS[case % len(SEQ_LENS)]
        lengths = random_lengths(rng, seq_len)
        plain = lengths.tolist()
        got = compare_layouts(lengths, seq_len)
        for layout, expected in (
            (got.one_per_window, ref_one_per_window(plain, seq_len)),
            (got.concat_chunk, ref_concat_chunk(plain, seq_len)),
        ):
            # source: the plain loops above
            assert (layout.windows, layout.real_tokens, layout.padding, layout.dropped) == expected, (
                case,
                layout.name,
            )
            assert layout.slots == layout.windows * seq_len
        # source: one-piece-at-a-time best fit above
        ref_fills = ref_bfd_fills(plain, seq_len)
        bfd = got.best_fit_decreasing
        assert bfd.windows == len(ref_fills)
        assert bfd.real_tokens == sum(plain) and bfd.dropped == 0
        assert bfd.padding == len(ref_fills) * seq_len - sum(ref_fills)
        # source: stdlib arithmetic on the plain lengths
        assert got.lower_bound == -(-sum(plain) // seq_len)
        assert got.lower_bound <= bfd.windows


def test_percentages_follow_their_definitions():
    # lengths 3, 10, 2, 1 in windows of 8 (hand count)
    got = compare_layouts([3, 10, 2, 1], 8)
    opw = got.one_per_window
    assert (opw.windows, opw.slots, opw.real_tokens, opw.padding, opw.dropped) == (4, 32, 14, 18, 2)
    assert opw.padding_pct == pytest.approx(100 * 18 / 32)
    assert opw.dropped_pct == pytest.approx(100 * 2 / 16)
    cc = got.concat_chunk
    assert (cc.windows, cc.padding, cc.dropped, cc.padding_pct) == (2, 0, 0, 0.0)
    bfd = got.best_fit_decreasing
    # 10 -> one full window + piece 2; pieces 3, 2, 2, 1 share one window
    assert (bfd.windows, bfd.padding) == (2, 0)
    assert best_fit_decreasing_fills([3, 10, 2, 1], 8).tolist() == [0, 0, 0, 0, 0, 0, 0, 0, 2]


# --------------------------------------------------------------------------- batched vs one at a time


def test_batched_bfd_equals_one_at_a_time_bfd():
    rng = np.random.default_rng(7)
    checked = 0
    for case in range(800):
        seq_len = SEQ_LENS[case % len(SEQ_LENS)]
        lengths = random_lengths(rng, seq_len)
        ref = ref_bfd_fills(lengths.tolist(), seq_len)  # source: one-at-a-time reference above
        fills = best_fit_decreasing_fills(lengths, seq_len)
        assert fills.shape == (seq_len + 1,) and fills[0] == 0
        assert int(fills.sum()) == len(ref), case
        assert fills_as_list(fills) == ref, case  # same multiset of window fills
        checked += 1
    assert checked >= 500


def test_batched_bfd_equals_one_at_a_time_on_a_skewed_shard():
    # a few hundred documents, log-normal lengths, window 512: many room groups at once
    rng = np.random.default_rng(11)
    lengths = np.clip(rng.lognormal(4.5, 1.2, 600), 1, 3000).astype(np.int64)
    ref = ref_bfd_fills(lengths.tolist(), 512)  # source: one-at-a-time reference above
    assert fills_as_list(best_fit_decreasing_fills(lengths, 512)) == ref


def test_textbook_worst_case_for_decreasing_fit():
    # Items 1/2+e, 1/4+2e, 1/4+e (six each) and 1/4-2e (twelve), here with capacity 120
    # and e = 1/120: the optimum is 9 full windows ({61,31,28} x6, {32,32,28,28} x3),
    # decreasing fit needs 11 = 11/9 * 9 (from memory: the tight family of Johnson et al. 1974).
    lengths = [61] * 6 + [32] * 6 + [31] * 6 + [28] * 12
    optimum = [[61, 31, 28]] * 6 + [[32, 32, 28, 28]] * 3
    assert sorted(x for w in optimum for x in w) == sorted(lengths)
    assert all(sum(w) == 120 for w in optimum)
    fills = best_fit_decreasing_fills(lengths, 120)
    assert fills_as_list(fills) == ref_bfd_fills(lengths, 120)  # source: one-at-a-time reference
    assert fills_as_list(fills) == [93] * 8 + [112] * 3  # 61+32 x6, 31*3 x2, 28*4 x3
    assert best_fit_decreasing(lengths, 120).windows == 11
    assert lower_bound(lengths, 120) == len(optimum) == 9


# --------------------------------------------------------------------------- bounds against the optimum


def test_opt_dp_matches_brute_force():
    rng = np.random.default_rng(3)
    for _ in range(150):
        capacity = int(rng.choice([5, 10, 12, 20]))
        items = rng.integers(1, capacity + 1, int(rng.integers(0, 8))).tolist()
        assert opt_windows(items, capacity) == opt_windows_brute(items, capacity), (items, capacity)


def test_bfd_within_published_bound_of_optimum():
    rng = np.random.default_rng(1974)
    worse_than_opt = 0
    for case in range(600):
        seq_len = int(rng.choice([10, 12, 20, 30, 60, 100]))
        n = int(rng.integers(1, 11))
        if case % 2:  # sizes between a fifth and a half: where decreasing fit goes wrong
            items = rng.integers(seq_len // 5 + 1, seq_len // 2 + 2, n)
        else:
            items = rng.integers(1, seq_len + 1, n)
        items = items.astype(np.int64)
        opt = opt_windows(items.tolist(), seq_len)
        bfd = best_fit_decreasing(items, seq_len).windows
        bound = lower_bound(items, seq_len)
        # sanity: ceil(total / capacity) <= OPT <= BFD (common practice: volume bound)
        assert bound <= opt <= bfd, (items.tolist(), seq_len)
        # Johnson, Demers, Ullman, Garey & Graham, "Worst-case performance bounds for simple
        # one-dimensional packing algorithms", SIAM J. Comput. 3(4), 1974, abstract: on a list
        # in decreasing order neither first fit nor best fit uses more than 11/9 OPT + 4 bins.
        assert 9 * bfd <= 11 * opt + 36, (items.tolist(), seq_len)
        # Dosa 2007 proved FFD <= 11/9 OPT + 6/9 (tight) for first fit decreasing; it is not
        # the cited bound for best fit, but it holds empirically on these instances.
        assert 9 * bfd <= 11 * opt + 6, (items.tolist(), seq_len)
        worse_than_opt += bfd > opt
    assert worse_than_opt > 0  # the instances do reach packings worse than the optimum


# --------------------------------------------------------------------------- edge cases


def test_empty_input():
    for lengths in ([], np.zeros(0, dtype=np.int64), [0, 0, 0]):
        got = compare_layouts(lengths, 16)
        for layout in got:
            assert (layout.windows, layout.slots, layout.real_tokens, layout.padding, layout.dropped) == (0,) * 5
            assert (layout.padding_pct, layout.dropped_pct) == (0.0, 0.0)
        assert got.lower_bound == 0
        assert best_fit_decreasing_fills(lengths, 16).tolist() == [0] * 17


def test_all_documents_longer_than_window():
    lengths = [5, 9, 13]  # window 4, total 27
    opw = one_per_window(lengths, 4)
    assert (opw.windows, opw.real_tokens, opw.padding, opw.dropped) == (3, 12, 0, 15)  # cut 1 + 5 + 9
    assert opw.dropped_pct == pytest.approx(100 * 15 / 27)
    cc = concat_chunk(lengths, 4)
    assert (cc.windows, cc.padding, cc.dropped) == (7, 1, 0)
    bfd = best_fit_decreasing(lengths, 4)
    assert (bfd.windows, bfd.padding, bfd.dropped) == (7, 1, 0)  # 6 full windows + pieces 1,1,1
    assert best_fit_decreasing_fills(lengths, 4).tolist() == [0, 0, 0, 1, 6]


def test_documents_exactly_one_window():
    got = compare_layouts(np.full(5, 8, dtype=np.int64), 8)
    for layout in got:
        assert (layout.windows, layout.padding, layout.dropped, layout.padding_pct) == (5, 0, 0, 0.0)
    assert got.lower_bound == 5


def test_window_of_one_token():
    lengths = [0, 3, 1, 2]
    opw = one_per_window(lengths, 1)
    assert (opw.windows, opw.real_tokens, opw.padding, opw.dropped) == (3, 3, 0, 3)
    for layout in (concat_chunk(lengths, 1), best_fit_decreasing(lengths, 1)):
        assert (layout.windows, layout.padding, layout.dropped) == (6, 0, 0)
    assert best_fit_decreasing_fills(lengths, 1).tolist() == [0, 6]


def test_accepts_other_integer_dtypes():
    for dtype in (np.int32, np.uint16, np.uint64):
        lengths = np.array([3, 10, 2, 1], dtype=dtype)
        assert best_fit_decreasing(lengths, 8).windows == 2
        assert one_per_window(lengths, np.int64(8)).dropped == 2


# --------------------------------------------------------------------------- argument checks


@pytest.mark.parametrize("seq_len", [0, -3, 2.5, True, "2048", None])
def test_rejects_bad_seq_len(seq_len):
    with pytest.raises(ValueError, match="seq_len must be an integer >= 1.*hint"):
        compare_layouts([1, 2], seq_len)


@pytest.mark.parametrize(
    "lengths, message",
    [
        ([3, -1, 2], "must be >= 0, found -1 at index 1"),
        (np.array([1.0, 2.0]), "must hold integers"),
        (np.array([True, False]), "must hold integers"),
        (np.ones((2, 2), dtype=np.int64), "1-D"),
    ],
)
def test_rejects_bad_lengths(lengths, message):
    for fn in (one_per_window, concat_chunk, best_fit_decreasing, best_fit_decreasing_fills, lower_bound):
        with pytest.raises(ValueError, match=message + ".*hint"):
            fn(lengths, 8)


# --------------------------------------------------------------------------- savings against the as-built layout


def test_savings_against_as_built():
    # as built: one document per row of 8, cut at 8 -> 4 rows, 14 real tokens, 2 cut off
    layouts = compare_layouts([3, 10, 2, 1], 8)
    saved = savings((32, 14, 18, 2), layouts)
    assert set(saved) == {"one_per_window", "concat_chunk", "best_fit_decreasing"}
    opw = saved["one_per_window"]
    assert (opw.slots_saved, opw.windows_saved, opw.slots_saved_pct, opw.tokens_recovered) == (0, 0.0, 0.0, 0)
    for name in ("concat_chunk", "best_fit_decreasing"):
        s = saved[name]
        assert (s.slots_saved, s.windows_saved, s.slots_saved_pct, s.tokens_recovered) == (16, 2.0, 50.0, 2)
    # an as-built layout tighter than a candidate gives a negative saving
    tight = savings(AsBuilt(slots=16, real_tokens=16, padding=0, truncated=0), layouts)
    assert tight["one_per_window"].slots_saved == -16
    assert tight["one_per_window"].tokens_recovered == -2


def test_savings_rejects_inconsistent_as_built():
    layouts = compare_layouts([3, 10], 8)
    with pytest.raises(ValueError, match="must equal real_tokens \\+ padding.*hint"):
        savings((32, 14, 10, 2), layouts)
    with pytest.raises(ValueError, match="non-negative integer.*hint"):
        savings((32, -1, 33, 2), layouts)
    with pytest.raises(ValueError, match="tuple.*hint"):
        savings((32, 14), layouts)
