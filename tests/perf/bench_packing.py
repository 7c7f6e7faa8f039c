"""Timing of corpuscle.kernels.packing on a large invented corpus (run by hand, not collected by pytest).

    python tests/perf/bench_packing.py [--docs N] [--seq-len S] [--reference-docs M]

Draws N document lengths (default 10 million) from a log-normal distribution clipped
to [1, 50,000] tokens, a skewed mix of many short and few very long documents, and
times each layout at window length S (default 2048). Then, for comparison, it times a
best-fit decreasing that places one piece at a time on the first M documents
(default 1 million; 0 skips it) and checks that both give the same window fills.
"""

import argparse
import bisect
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))

from corpuscle.kernels.packing import (  # noqa: E402
    best_fit_decreasing,
    best_fit_decreasing_fills,
    compare_layouts,
    concat_chunk,
    lower_bound,
    one_per_window,
)


def one_at_a_time_fills(lengths, seq_len):
    """Best-fit decreasing placing each piece by itself.

    Rooms are counted per size with a sorted list of occupied rooms, so each piece
    costs one bisect; a linear scan over all windows would need hours at 1M pieces.
    """
    full = int((lengths // seq_len).sum())
    pieces = np.sort(lengths % seq_len)[::-1]
    pieces = pieces[pieces > 0].tolist()
    room = [0] * (seq_len + 1)
    occupied = []
    for s in pieces:
        i = bisect.bisect_left(occupied, s)
        if i < len(occupied):
            r = occupied[i]
            room[r] -= 1
            if not room[r]:
                del occupied[i]
        else:
            r = seq_len
        left = r - s
        if left and not room[left]:
            bisect.insort(occupied, left)
        room[left] += 1
    fills = np.zeros(seq_len + 1, dtype=np.int64)
    fills[1:] += np.asarray(room[:seq_len], dtype=np.int64)[::-1]
    fills[seq_len] += full
    return fills


def timed(label, fn, n):
    start = time.perf_counter()
    result = fn()
    took = time.perf_counter() - start
    print(f"{label:<28} {took:8.3f} s   {n / took:14,.0f} documents/s")
    return result


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--docs", type=int, default=10_000_000)
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--reference-docs", type=int, default=1_000_000)
    args = parser.parse_args()

    rng = np.random.default_rng(2048)
    lengths = np.clip(rng.lognormal(mean=6.0, sigma=1.5, size=args.docs), 1, 50_000).astype(np.int64)
    n, seq_len = lengths.size, args.seq_len
    print(f"{n:,} documents, {int(lengths.sum()):,} tokens, median length {int(np.median(lengths))}, "
          f"window {seq_len}")

    timed("one_per_window", lambda: one_per_window(lengths, seq_len), n)
    timed("concat_chunk", lambda: concat_chunk(lengths, seq_len), n)
    timed("best_fit_decreasing", lambda: best_fit_decreasing(lengths, seq_len), n)
    timed("lower_bound", lambda: lower_bound(lengths, seq_len), n)
    layouts = timed("compare_layouts (all)", lambda: compare_layouts(lengths, seq_len), n)
    for layout in layouts:
        print(f"  {layout.name:<22} windows {layout.windows:>12,}  padding {layout.padding_pct:7.3f} %  "
              f"dropped {layout.dropped_pct:7.3f} %")
    print(f"  {'lower bound':<22} windows {layouts.lower_bound:>12,}")

    m = min(args.reference_docs, n)
    if m:
        head = lengths[:m]
        batched = timed(f"batched BFD, {m:,} docs", lambda: best_fit_decreasing_fills(head, seq_len), m)
        single = timed(f"one-at-a-time, {m:,} docs", lambda: one_at_a_time_fills(head, seq_len), m)
        print("  same window fills:", bool(np.array_equal(batched, single)))


if __name__ == "__main__":
    main()
