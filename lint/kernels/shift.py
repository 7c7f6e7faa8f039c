"""Label shift: which offset k makes ``labels[t] == input_ids[t + k]`` within a row.

Under the ``shifted`` convention (common practice) the label at position t is the next token, k = 1; under
``aligned`` labels equal input_ids and the model or its loss shifts them, k = 0.  A pipeline that shifts twice
gives k = 2.  Positions whose label is ``ignore_index`` and positions where t + k leaves the row are not counted.

Each shift costs one comparison of two contiguous slices (``labels[:-k]`` with ``input_ids[k:]``); the few
positions where that comparison crosses a row boundary are masked by index, and per-row counts are taken only
when some label disagrees, so no per-position row index is built.
"""
from __future__ import annotations

import numpy as np
from corpuscle.io.batch import Flat

#: Shifts the label rule measures.
SHIFTS = (-1, 0, 1, 2, 3)

#: Which shift wins a tie (a row of repeated tokens agrees with several): the expected one first, then the two
#: conventions, then the rarer mistakes.
PREFERENCE = (1, 0, 2, 3, -1)


def shift_matches(tokens: Flat, labels: np.ndarray, ignore_index: int, shifts=SHIFTS,
                  trained: np.ndarray | None = None,
                  trained_rows: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Per shift and row: how many comparable positions match, and how many positions were comparable.

    Returns two int64 arrays of shape ``(len(shifts), rows)``.  ``labels`` is the flat label array, aligned with
    ``tokens.values`` (same row lengths).  Position t of a row is comparable under shift k when its label is not
    ``ignore_index`` and t + k lies inside the same row.  A caller that already holds ``trained``
    (``labels != ignore_index``) and its per-row counts may pass them.

    Matches are counted as comparable positions less mismatches: in a clean batch there are none, so a shift
    costs one comparison of two contiguous slices and a check that nothing disagrees.
    """
    n = tokens.values.size
    rows = tokens.lengths.size
    if trained is None:
        trained = labels != ignore_index
    if trained_rows is None:
        trained_rows = tokens.row_counts(trained)
    matches = np.zeros((len(shifts), rows), dtype=np.int64)
    comparable = np.zeros((len(shifts), rows), dtype=np.int64)
    miss = np.empty(n, dtype=bool)
    for i, k in enumerate(shifts):  # a loop over the shifts, each one comparison and a few cheap passes
        _equal_shifted(tokens.values, labels, k, miss)
        np.greater(trained, miss, out=miss)  # trained and not equal
        comparable[i] = trained_rows
        for rows_with, edge in _edges(tokens, k):  # positions whose t + k leaves the row: not comparable
            miss[edge] = False
            comparable[i, rows_with] -= trained[edge]
        matches[i] = comparable[i] - tokens.row_counts(miss) if miss.any() else comparable[i]
    return matches, comparable


def _edges(tokens: Flat, shift: int):
    """The positions of each row whose ``t + shift`` lies outside the row, as (rows, flat positions) pairs: one
    pair per distance from the row end (shift > 0) or start (shift < 0)."""
    for j in range(abs(shift)):
        rows = np.flatnonzero(tokens.lengths > j)
        yield rows, (tokens.ends[rows] - 1 - j) if shift > 0 else (tokens.starts[rows] + j)


def shift_agreement(tokens: Flat, labels: np.ndarray, ignore_index: int, shifts=SHIFTS) -> dict[int, float]:
    """For each shift, the share of comparable trained positions (over all rows) that it explains."""
    matches, comparable = shift_matches(tokens, labels, ignore_index, shifts)
    total_m, total_c = matches.sum(axis=1), comparable.sum(axis=1)
    return {k: (float(m / c) if c else 0.0) for k, m, c in zip(shifts, total_m, total_c)}


def best_shift(matches: np.ndarray, comparable: np.ndarray, shifts=SHIFTS,
               prefer: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per row: the shift that explains the largest share of its comparable positions, that share, and whether
    the row could be measured at all (some shift had a comparable position).

    ``matches`` and ``comparable`` are the arrays :func:`shift_matches` returns for the same ``shifts``.  Ties go
    to ``prefer`` (the expected shift), then follow :data:`PREFERENCE`, so a row that several shifts explain
    equally well is never reported against the convention.  Unmeasured rows get shift ``prefer`` and share 0.
    """
    shifts = list(shifts)
    ranked = sorted(range(len(shifts)), key=lambda i: (shifts[i] != prefer, _rank(shifts[i])))
    share = np.where(comparable > 0, matches / np.maximum(comparable, 1), -1.0)[ranked]
    pick = np.argmax(share, axis=0)
    agreement = share[pick, np.arange(share.shape[1])]
    measured = agreement >= 0
    best = np.asarray(shifts, dtype=np.int64)[np.asarray(ranked, dtype=np.int64)[pick]]
    if prefer is not None:
        best[~measured] = prefer
    return best, np.maximum(agreement, 0.0), measured


def _rank(shift: int) -> int:
    return PREFERENCE.index(shift) if shift in PREFERENCE else len(PREFERENCE) + abs(shift)


def first_mismatch(tokens: Flat, labels: np.ndarray, ignore_index: int, shift: int,
                   rows: np.ndarray | None = None) -> np.ndarray:
    """Per row (or per row of ``rows``): the 0-based position of the first trained label that is not
    ``input_ids[t + shift]`` (a label whose ``t + shift`` leaves the row counts as not matching), or -1 when every
    trained label matches.

    The first :data:`PROBE` positions of each row are looked at first; only rows without a mismatch there are
    compared in full (none, when the rows follow another shift, which is what this is asked for most)."""
    rows = np.arange(tokens.lengths.size, dtype=np.int64) if rows is None else np.asarray(rows, dtype=np.int64)
    first, settled = _probe_mismatch(tokens, labels, ignore_index, shift, rows)
    open_rows = np.flatnonzero(~settled)
    if open_rows.size == 0:
        return first
    if open_rows.size * 4 < tokens.lengths.size:
        sub, source = tokens.take(rows[open_rows])
        first[open_rows] = _first_mismatch_full(sub, labels[source], ignore_index, shift)
    else:
        first[open_rows] = _first_mismatch_full(tokens, labels, ignore_index, shift)[rows[open_rows]]
    return first


#: How many leading positions of each row :func:`first_mismatch` checks before comparing whole rows.
PROBE = 16


def _probe_mismatch(tokens: Flat, labels: np.ndarray, ignore_index: int, shift: int, rows: np.ndarray):
    """For the given rows: the first mismatch among the row's first PROBE positions (-1 if none there), and
    whether that settles the row (a mismatch was found, or the row is no longer than the probe)."""
    n = tokens.values.size
    lengths = tokens.lengths[rows]
    if rows.size == 0 or n == 0:
        return np.full(rows.size, -1, dtype=np.int64), np.ones(rows.size, dtype=bool)
    width = int(min(PROBE, lengths.max()))
    step = np.arange(width, dtype=np.int64)
    inside = step < lengths[:, None]
    at = np.minimum(tokens.offsets[rows][:, None] + step, n - 1)
    target = step + shift
    reachable = (target >= 0) & (target < lengths[:, None])
    label = labels[at]
    same = reachable & (label == tokens.values[np.clip(at + shift, 0, n - 1)])
    bad = inside & (label != ignore_index) & ~same
    found = bad.any(axis=1)
    first = np.where(found, np.argmax(bad, axis=1), -1)
    return first, found | (lengths <= width)


def _first_mismatch_full(tokens: Flat, labels: np.ndarray, ignore_index: int, shift: int) -> np.ndarray:
    n = tokens.values.size
    bad = np.empty(n, dtype=bool)
    _equal_shifted(tokens.values, labels, shift, bad)
    trained = labels != ignore_index
    np.greater(trained, bad, out=bad)  # trained and not equal
    for _, edge in _edges(tokens, shift):  # t + shift leaves the row: the comparison reached a neighbour row
        bad[edge] = trained[edge]
    first = tokens.first_where(bad)
    return np.where(first >= 0, first - tokens.starts, -1)


def _equal_shifted(values: np.ndarray, labels: np.ndarray, shift: int, out: np.ndarray) -> np.ndarray:
    """``out[t] = labels[t] == values[t + shift]`` where ``t + shift`` lies in the batch, False elsewhere
    (row bounds are the caller's business)."""
    n = values.size
    m = max(n - abs(shift), 0)
    if shift >= 0:
        np.equal(labels[:m], values[shift:shift + m], out=out[:m])
        out[m:] = False
    else:
        np.equal(labels[n - m:], values[:m], out=out[n - m:])
        out[:n - m] = False
    return out
