"""Label shift: which offset k makes ``labels[t] == input_ids[t + k]`` within a row.

Under the ``shifted`` convention (common practice) the label at position t is the next token, k = 1; under
``aligned`` labels equal input_ids and the model or its loss shifts them, k = 0.  A pipeline that shifts twice
gives k = 2.  Positions whose label is ``ignore_index`` and positions where t + k leaves the row are not counted.
"""
from __future__ import annotations

import numpy as np

from .batch import Flat

#: Shifts the label rule measures.
SHIFTS = (-1, 0, 1, 2, 3)


def shift_matches(tokens: Flat, labels: np.ndarray, ignore_index: int, shifts=SHIFTS) -> tuple[np.ndarray, np.ndarray]:
    """Per shift and row: how many comparable positions match, and how many positions were comparable.

    Returns two int64 arrays of shape ``(len(shifts), rows)``.  ``labels`` is the flat label array, aligned with
    ``tokens.values`` (same row lengths).
    """
    rows = tokens.lengths.size
    trained = labels != ignore_index
    pos, lengths, row_of = tokens.position, tokens.lengths, tokens.row_of
    matches = np.zeros((len(shifts), rows), dtype=np.int64)
    comparable = np.zeros((len(shifts), rows), dtype=np.int64)
    idx = np.arange(tokens.values.size, dtype=np.int64)
    for i, k in enumerate(shifts):  # a loop over five shifts, each a whole-batch numpy expression
        inside = trained & (pos + k >= 0) & (pos + k < lengths[row_of])
        where = idx[inside]
        hit = labels[where] == tokens.values[where + k]
        comparable[i] = np.bincount(row_of[where], minlength=rows)
        matches[i] = np.bincount(row_of[where[hit]], minlength=rows)
    return matches, comparable


def shift_agreement(tokens: Flat, labels: np.ndarray, ignore_index: int, shifts=SHIFTS) -> dict[int, float]:
    """For each shift, the share of comparable trained positions (over all rows) that it explains."""
    matches, comparable = shift_matches(tokens, labels, ignore_index, shifts)
    total_m, total_c = matches.sum(axis=1), comparable.sum(axis=1)
    return {k: (float(m / c) if c else 0.0) for k, m, c in zip(shifts, total_m, total_c)}
