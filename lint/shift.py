"""Label shift: which offset k makes ``labels[t] == input_ids[t + k]`` within a row.

Under the ``shifted`` convention (common practice) the label at position t is the next token, k = 1; under
``aligned`` labels equal input_ids and the model or its loss shifts them, k = 0.  A pipeline that shifts twice
gives k = 2.  Positions whose label is ``ignore_index`` and positions where t + k leaves the row are not counted.

Each shift costs one comparison of two contiguous slices and one cumulative sum over the batch; per-row counts
are differences of that sum at the row bounds, so no per-position row index is built.
"""
from __future__ import annotations

import numpy as np

from .batch import Flat, running_count, spans  # noqa: F401 - spans is re-exported for rules

#: Shifts the label rule measures.
SHIFTS = (-1, 0, 1, 2, 3)

#: Which shift wins a tie (a row of repeated tokens agrees with several): the expected one first, then the two
#: conventions, then the rarer mistakes.
PREFERENCE = (1, 0, 2, 3, -1)


def shift_matches(tokens: Flat, labels: np.ndarray, ignore_index: int, shifts=SHIFTS) -> tuple[np.ndarray, np.ndarray]:
    """Per shift and row: how many comparable positions match, and how many positions were comparable.

    Returns two int64 arrays of shape ``(len(shifts), rows)``.  ``labels`` is the flat label array, aligned with
    ``tokens.values`` (same row lengths).  Position t of a row is comparable under shift k when its label is not
    ``ignore_index`` and t + k lies inside the same row.
    """
    n = tokens.values.size
    rows = tokens.lengths.size
    trained = labels != ignore_index
    trained_count = running_count(trained)
    matches = np.zeros((len(shifts), rows), dtype=np.int64)
    comparable = np.zeros((len(shifts), rows), dtype=np.int64)
    hit = np.zeros(n, dtype=bool)
    for i, k in enumerate(shifts):  # a loop over five shifts, each a few whole-batch passes
        _equal_shifted(tokens.values, labels, k, hit)
        hit &= trained
        lo = tokens.starts + max(0, -k)
        hi = tokens.ends - max(0, k)
        matches[i] = tokens.row_counts(hit, lo, hi)
        comparable[i] = tokens.row_counts(trained_count, lo, hi)
    return matches, comparable


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


def first_mismatch(tokens: Flat, labels: np.ndarray, ignore_index: int, shift: int) -> np.ndarray:
    """Per row: the 0-based position of the first trained label that is not ``input_ids[t + shift]`` (a label
    whose ``t + shift`` leaves the row counts as not matching), or -1 when every trained label matches."""
    n = tokens.values.size
    same = np.zeros(n, dtype=bool)
    _equal_shifted(tokens.values, labels, shift, same)
    # near a row's end (shift > 0) or start (shift < 0) the comparison reached into the neighbouring row
    lo, hi = tokens.starts + max(0, -shift), tokens.ends - max(0, shift)
    if shift > 0:
        same &= ~spans(n, np.maximum(hi, tokens.starts), tokens.ends)
    elif shift < 0:
        same &= ~spans(n, tokens.starts, np.minimum(lo, tokens.ends))
    bad = running_count((labels != ignore_index) & ~same)
    before = bad[tokens.starts]
    has = bad[tokens.ends] > before
    first = np.searchsorted(bad, before + 1, side="left") - 1  # flat index where the row's count first rises
    return np.where(has, first - tokens.starts, -1)


def _equal_shifted(values: np.ndarray, labels: np.ndarray, shift: int, out: np.ndarray) -> np.ndarray:
    """``out[t] = labels[t] == values[t + shift]`` where ``t + shift`` lies in the batch, False elsewhere
    (row bounds are the caller's business)."""
    n = values.size
    m = max(n - abs(shift), 0)
    out[:] = False
    if shift >= 0:
        np.equal(labels[:m], values[shift:shift + m], out=out[:m])
    else:
        np.equal(labels[n - m:], values[:m], out=out[n - m:])
    return out
