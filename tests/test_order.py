"""Tests of lint/kernels/order.py: the fast sort of mostly distinct keys."""
import numpy as np
import pytest

from corpuscle.kernels.order import lexorder


@pytest.mark.parametrize("seed", range(4))
def test_lexorder_is_numpy_lexsort(seed):
    # Reference: numpy's np.lexsort (stable; the last key primary), on keys with many, few and no ties.
    rng = np.random.default_rng(seed)
    for trial in range(200):
        n = int(rng.integers(0, 300))
        distinct = int(rng.integers(1, 2 * n + 2))
        primary = rng.integers(0, distinct, size=n).astype(np.uint64)
        secondary = rng.integers(0, 4, size=n)
        descending = np.arange(n)[::-1].copy()
        for keys in ((primary,), (secondary, primary), (descending, primary), (descending, secondary, primary)):
            np.testing.assert_array_equal(lexorder(keys), np.lexsort(keys))


def test_lexorder_of_hashes_with_copies():
    # 64-bit hashes, one in fifty repeated: ties are put in index order, as np.lexsort puts them.
    rng = np.random.default_rng(9)
    keys = rng.integers(0, 2 ** 63, size=20_000, dtype=np.int64).view(np.uint64)
    keys[::50] = keys[1::50]
    ids = rng.permutation(len(keys))
    np.testing.assert_array_equal(lexorder((keys,)), np.lexsort((keys,)))
    np.testing.assert_array_equal(lexorder((ids, keys)), np.lexsort((ids, keys)))
    assert lexorder((np.zeros(0, np.uint64),)).tolist() == []
