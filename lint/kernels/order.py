"""Sorting keys that are mostly distinct (hashes, band keys) by an unstable sort, with ties put in order afterwards.

numpy's stable sorts (``np.lexsort``, ``np.argsort(kind="stable")``) of 64-bit keys are a merge sort; its default
``np.argsort`` is an introsort that numpy vectorizes on x86 (from memory: numpy 2.x, several times faster on hashes).
Where the keys are hashes, almost every key is distinct and only the few runs of equal keys need the order a stable
sort gives them: :func:`lexorder` sorts by the primary key with the fast sort, then sorts the entries of the runs of
equal primary keys again by every key and their index. The result is exactly ``np.lexsort(keys)``.
"""
from __future__ import annotations

import numpy as np


def lexorder(keys: tuple) -> np.ndarray:
    """The permutation ``np.lexsort(keys)`` gives (the last key primary; equal keys in index order), for 1-D keys of
    one length. Fast when the primary key has few repeated values; never slower than about twice ``np.lexsort``."""
    primary = np.asarray(keys[-1])
    order = np.argsort(primary)
    if len(order) < 2:
        return order
    ordered = primary[order]
    tie = ordered[1:] == ordered[:-1]
    del ordered
    if not tie.any():
        return order
    in_run = np.zeros(len(order), dtype=bool)
    in_run[1:] = tie
    in_run[:-1] |= tie
    del tie
    where = np.flatnonzero(in_run)
    runs = order[where]
    # The entries of the runs, sorted by every key and then their index: the runs take the same places in order
    # (they are whole runs, and sorting them by the primary key puts them in the order they already hold).
    order[where] = runs[np.lexsort((runs,) + tuple(np.asarray(k)[runs] for k in keys))]
    return order
