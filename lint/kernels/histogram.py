"""Small, exact histograms on log-spaced bins, for the distributions a report plots (document lengths, padding
per row, duplicate cluster sizes).

A bin ``i`` holds the values ``v`` with ``edges[i] <= v < edges[i + 1]`` (integers); the counts add up to the
number of values counted, so a plot drawn from them agrees with the report's other figures.  The number of bins
grows with the logarithm of the largest value, so a histogram stays a few dozen numbers however large the corpus.
"""
from __future__ import annotations

import numpy as np

#: Fixed power-of-two bins for values counted while shards stream (so the counts of shards simply add up):
#: bin 0 holds 0, bin 1 holds 1, bin k (k >= 2) holds [2**(k-1), 2**k).
POW2_BINS = 48


def pow2_bin(values) -> np.ndarray:
    """The power-of-two bin of each non-negative integer (see :data:`POW2_BINS`): 0 for 0, else ``k`` with
    ``2**(k-1) <= v < 2**k`` (the binary exponent, exact for integers below 2**53)."""
    values = np.asarray(values, dtype=np.int64)
    return np.where(values > 0, np.frexp(values.astype(np.float64))[1], 0).astype(np.int64)


def pow2_edges(bins: int) -> list[int]:
    """The edges of the first ``bins`` power-of-two bins: 0, 1, 2, 4, ... (``bins + 1`` numbers)."""
    return [0, 1] + [2 ** k for k in range(1, bins)]


def log_edges(largest: int, per_octave: int = 2, start: int = 0, marks=()) -> np.ndarray:
    """Integer bin edges from ``start`` to past ``largest``, ``per_octave`` bins per doubling (rounded, so small
    values get one bin each), with every value of ``marks`` an edge (e.g. ``seq_len + 1``, so that "longer than
    the window" is a whole number of bins); an edge within a quarter octave of a mark gives way to it."""
    top = max(int(largest), start, *(int(m) for m in marks)) + 1
    steps = int(np.ceil(np.log2(max(top, 2)) * per_octave)) + 1
    edges = np.unique(np.round(2.0 ** (np.arange(steps + 1) / per_octave)).astype(np.int64))
    edges = edges[edges > start]
    for mark in marks:
        mark = int(mark)
        near = (edges > mark / 2 ** 0.25) & (edges < mark * 2 ** 0.25)
        edges = np.append(edges[~near], mark)
    edges = np.unique(np.concatenate(([start], edges)))
    if edges[-1] <= largest:
        edges = np.append(edges, 2 * edges[-1])
    # Trim empty edges above the largest value: the last bin is the first that holds it.
    last = int(np.searchsorted(edges, largest, side="right"))
    return edges[:last + 1]


def histogram(sizes, counts, edges) -> np.ndarray:
    """How many values fall in each bin of ``edges``, from distinct ``sizes`` (sorted ascending) each seen
    ``counts`` times (the form of :class:`corpuscle.kernels.documents.LengthHistogram`); exact integers."""
    sizes = np.asarray(sizes, dtype=np.int64)
    counts = np.asarray(counts, dtype=np.int64)
    cumulative = np.concatenate(([0], np.cumsum(counts)))
    at = np.searchsorted(sizes, np.asarray(edges, dtype=np.int64), side="left")
    return np.diff(cumulative[at])
