"""Flat views of list columns and the segment primitives rules build on, against plain Python over the same
rows (list slicing is the reference) and against pyarrow's own flattening."""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from corpuscle.io.batch import Flat, flatten_list, running_count, spans


def random_rows(rng, max_rows=20, max_len=14):
    lengths = rng.integers(0, max_len, size=rng.integers(0, max_rows))
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    return Flat(rng.integers(0, 5, size=offsets[-1]), offsets), offsets


@pytest.mark.parametrize("seed", range(6))
def test_row_counts_within_ranges_equal_slicing(seed):
    rng = np.random.default_rng(seed)
    for _ in range(300):
        flat, offs = random_rows(rng)
        mask = rng.random(offs[-1]) < 0.5
        k = int(rng.integers(-12, 12))
        lo, hi = flat.starts + max(0, -k), flat.ends - max(0, k)
        expected = [int(mask[max(a, s):min(b, e)].sum()) if min(b, e) > max(a, s) else 0
                    for a, b, s, e in zip(lo, hi, offs[:-1], offs[1:])]
        assert flat.row_counts(mask, lo, hi).tolist() == expected
        assert flat.row_counts(running_count(mask), lo, hi).tolist() == expected
        assert flat.row_counts(mask).tolist() == [int(mask[s:e].sum()) for s, e in zip(offs[:-1], offs[1:])]


def test_first_and_last_where_locate_take_and_spans():
    rng = np.random.default_rng(7)
    for _ in range(300):
        flat, offs = random_rows(rng)
        mask = rng.random(offs[-1]) < 0.3
        rows = [np.flatnonzero(mask[s:e]) + s for s, e in zip(offs[:-1], offs[1:])]
        assert flat.first_where(mask).tolist() == [int(r[0]) if r.size else -1 for r in rows]
        assert flat.last_where(mask).tolist() == [int(r[-1]) if r.size else -1 for r in rows]
        hits = np.flatnonzero(mask)
        r, o = flat.locate(hits)
        assert list(zip(r.tolist(), o.tolist())) == [(i, int(p - offs[i])) for i, rr in enumerate(rows) for p in rr]
        pick = np.flatnonzero(rng.random(flat.lengths.size) < 0.5)
        sub, source = flat.take(pick)
        assert [sub.values[a:b].tolist() for a, b in zip(sub.starts, sub.ends)] == \
            [flat.values[offs[i]:offs[i + 1]].tolist() for i in pick]
        assert np.array_equal(flat.values[source], sub.values)
        cuts = np.sort(rng.integers(0, offs[-1] + 1, size=2 * int(rng.integers(0, 5))))
        expected = np.zeros(offs[-1], dtype=bool)
        for a, b in zip(cuts[0::2], cuts[1::2]):
            expected[a:b] = True
        assert np.array_equal(spans(int(offs[-1]), cuts[0::2], cuts[1::2]), expected)


@pytest.mark.parametrize("type_", [pa.list_(pa.int32()), pa.large_list(pa.int64()), pa.list_(pa.uint16())])
def test_flatten_list_matches_pyarrow_including_slices_and_nulls(type_):
    rows = [[1, 2, 3], None, [], [4], [5, 6]]
    array = pa.array(rows, type=type_).slice(1)  # a sliced array: offsets do not start at 0
    flat = flatten_list(array)
    assert flat.lengths.tolist() == [0, 0, 1, 2]  # a null row reads as empty
    assert flat.values.tolist() == pa.array(rows[1:], type=type_).flatten().to_pylist() == [4, 5, 6]


def test_fixed_size_lists_flatten_with_regular_offsets():
    array = pa.array([[1, 2], [3, 4], [5, 6]], type=pa.list_(pa.int32(), 2))
    flat = flatten_list(array)
    assert flat.offsets.tolist() == [0, 2, 4, 6] and flat.values.tolist() == [1, 2, 3, 4, 5, 6]


@pytest.mark.parametrize("numpy_popcount", [True, False])
def test_mask_ranks_rank_and_select_equal_counting_in_python(numpy_popcount, monkeypatch):
    from corpuscle.io.batch import MaskRanks

    if not numpy_popcount:  # the bit-twiddling count used with numpy < 2.0
        monkeypatch.delattr(np, "bitwise_count", raising=False)
    rng = np.random.default_rng(11)
    for _ in range(200):
        mask = rng.random(int(rng.integers(0, 200))) < rng.random()
        ranks = MaskRanks(mask)
        bits = mask.tolist()
        assert ranks.rank(np.arange(mask.size + 1)).tolist() == [sum(bits[:i]) for i in range(mask.size + 1)]
        set_at = [i for i, bit in enumerate(bits) if bit]
        assert ranks.select(np.arange(1, len(set_at) + 1)).tolist() == set_at


def test_count_positions_and_first_of_equal_python_over_rows():
    rng = np.random.default_rng(5)
    for _ in range(300):
        flat, offs = random_rows(rng)
        positions = np.flatnonzero(rng.random(offs[-1]) < 0.2)
        inside = [[p for p in positions.tolist() if s <= p < e] for s, e in zip(offs[:-1], offs[1:])]
        assert flat.count_positions(positions).tolist() == [len(r) for r in inside]
        rows = np.flatnonzero(rng.random(flat.lengths.size) < 0.6)
        assert flat.first_of(positions, rows).tolist() == [inside[r][0] if inside[r] else -1 for r in rows]


def test_batch_memo_computes_once_and_consistent_batches_hold_no_cycle():
    import gc
    import weakref

    from corpuscle.io.batch import Batch, Shard
    from corpuscle.rules.api import consistent

    table = pa.table({"input_ids": pa.array([[1, 2], [3]]), "labels": pa.array([[2, -100], [-100]])})
    batch = Batch(Shard("x.parquet", "x.parquet", "parquet"), table, np.arange(2))
    calls = []
    first = batch.memo(("k", 1), lambda: calls.append(1) or np.arange(3))
    assert batch.memo(("k", 1), lambda: calls.append(1) or np.arange(3)) is first and calls == [1]
    assert consistent(batch, ["input_ids", "labels"]) is batch
    # A batch must be freed as soon as the last reference goes, not when the cycle collector runs: it holds a
    # batch's worth of Arrow memory, and a scan reads hundreds of batches.
    gc.disable()
    try:
        gone = weakref.ref(batch)
        del batch
        assert gone() is None
    finally:
        gc.enable()
