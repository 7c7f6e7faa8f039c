"""The fixes: one small transformation per rule, numpy over the flat buffers of one batch.

Each function takes flat arrays (a token column as :class:`~corpuscle.io.batch.Flat`, parallel flat label or mask
values) and returns new flat values of the same length, or a per-row mask of rows to drop; nothing here loops over
rows or tokens in Python, reads files or knows about settings files.  The driver (:mod:`corpuscle.repair.rewrite`)
decides which of them run on which shard.

Padding is read as the padding-loss rule reads it: with a known pad id, from the token ids (the run of pad ids at
the end of a row and the one at its start; when the pad id is the eos id the first pad of the end run is the
row's real eos, when it is the bos id the last pad of the start run is the real bos); without one, from the
attention mask (its non-zero positions, taken as one block from the first to the last of them).
"""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from corpuscle.io.batch import Flat, spans
from corpuscle.kernels.shift import SHIFTS, best_shift, shift_matches

# -- padding --------------------------------------------------------------------------------------------------


def real_from_ids(tokens: Flat, pad_id: int, eos_id: int | None = None, bos_id: int | None = None) -> np.ndarray:
    """True at the real (not padding) positions as read from the token ids (see the module docstring)."""
    non_pad = tokens.values != pad_id
    first = tokens.first_where(non_pad)
    last = tokens.last_where(non_pad)
    some = first >= 0
    starts, ends = tokens.starts, tokens.ends
    first = np.where(some, first, starts)
    end = np.where(some, last + 1, starts)
    if pad_id == eos_id:
        lo, hi = starts, np.minimum(end + 1, ends)
    elif pad_id == bos_id:
        lo, hi = np.maximum(first - 1, starts), ends
    else:
        lo, hi = first, end
    return spans(tokens.values.size, lo, np.maximum(hi, lo))


def real_from_mask(tokens: Flat, mask: np.ndarray) -> np.ndarray:
    """True from the first to the last non-zero mask position of each row: the mask as one block of real tokens,
    on whichever side its padding lies (a zero between two non-zeros is taken as a hidden real token)."""
    on = mask != 0
    first, last = tokens.first_where(on), tokens.last_where(on)
    some = first >= 0
    lo = np.where(some, first, tokens.starts)
    hi = np.where(some, last + 1, tokens.starts)
    return spans(tokens.values.size, lo, hi)


def consistent_mask(mask: np.ndarray, real: np.ndarray) -> np.ndarray:
    """The attention mask with 0 at padding and non-zero at real tokens (a non-zero value is kept, e.g. document
    numbers; a real token the mask hid gets 1)."""
    return np.where(real, np.where(mask != 0, mask, 1), 0).astype(mask.dtype, copy=False)


def next_in_row(tokens: Flat, mask: np.ndarray) -> np.ndarray:
    """``mask`` of the next position in the same row (False at the last position of every row)."""
    out = np.zeros_like(mask)
    out[:-1] = mask[1:]
    return out & ~tokens.is_last


def labels_off_padding(tokens: Flat, labels: np.ndarray, real: np.ndarray, shifted: bool,
                       ignore_index: int) -> np.ndarray:
    """Labels with ``ignore_index`` at padding and, with shifted labels, wherever the target (the next position in
    the row) is padding."""
    off = ~real
    if shifted:
        off = off | (real & ~next_in_row(tokens, real) & ~tokens.is_last)
    return np.where(off, ignore_index, labels).astype(labels.dtype, copy=False)


def train_real_eos(tokens: Flat, labels: np.ndarray, real: np.ndarray, eos_id: int, shifted: bool,
                   ignore_index: int) -> np.ndarray:
    """When the pad id is the eos id: make every real eos a target again (the label that predicts it, at the
    position before it with shifted labels, at itself with aligned labels, set to the eos id where it was
    ignored)."""
    eos = real & (tokens.values == eos_id)
    out = labels.copy()
    if shifted:
        at = np.flatnonzero(eos & ~tokens.is_first) - 1
    else:
        at = np.flatnonzero(eos)
    at = at[out[at] == ignore_index]
    out[at] = eos_id
    return out


# -- labels ---------------------------------------------------------------------------------------------------


def ignore_markers(labels: np.ndarray, real: np.ndarray, ignore_index: int, pad_id: int | None,
                   vocab_size: int | None, tokens: Flat | None = None, expected: int = 1,
                   separators: tuple = ()) -> np.ndarray:
    """Label values that mark an ignored position with the wrong value: negative values other than ignore_index
    (-1 ...), values >= vocab_size, and the pad id at padding.  Given ``tokens``, also the pad id at a real
    position whose target under the ``expected`` shift is not the pad id (a prompt masked with the pad id) --
    unless the pad id is also a separator id (``separators``), which is a real target."""
    marker = (labels < 0) & (labels != ignore_index)
    if vocab_size is not None:
        marker |= labels >= vocab_size
    if pad_id is not None and pad_id != ignore_index:
        is_pad = labels == pad_id
        marker |= ~real & is_pad
        if tokens is not None and pad_id not in separators and is_pad.any():
            target = tokens.values == pad_id if expected == 0 else next_in_row(tokens, tokens.values == pad_id)
            marker |= real & is_pad & ~target
    return marker


def row_shifts(tokens: Flat, labels: np.ndarray, ignored: np.ndarray, ignore_index: int,
               expected: int) -> np.ndarray:
    """Per row, the label shift k (of -1..3) that best explains ``labels[t] == input_ids[t + k]`` over its labels
    that are not ``ignored`` (ties and rows with nothing to measure: ``expected``)."""
    measured = np.where(ignored, ignore_index, labels)
    matches, comparable = shift_matches(tokens, measured, ignore_index, SHIFTS)
    best, _, _ = best_shift(matches, comparable, SHIFTS, prefer=expected)
    return best


def untrained_targets(tokens: Flat, ignored: np.ndarray, real: np.ndarray, shifts: np.ndarray) -> np.ndarray:
    """True at every token the input chose not to train as a target: the token ``t + k`` (k the row's observed
    shift) of every real position ``t`` whose label is ignored, where ``t + k`` lies in the row.  A position whose
    ``t + k`` leaves the row was ignored because of the shift, not on purpose, and marks nothing."""
    k = np.repeat(shifts, tokens.lengths)
    target = tokens.position + k
    inside = (target >= 0) & (target < np.repeat(tokens.lengths, tokens.lengths))
    at = np.flatnonzero(ignored & real & inside)
    out = np.zeros(tokens.values.size, dtype=bool)
    out[at + k[at]] = True
    return out


def build_labels(tokens: Flat, real: np.ndarray, untrained: np.ndarray, shifted: bool, ignore_index: int,
                 dtype) -> np.ndarray:
    """Labels in the expected convention: ``labels[t] = input_ids[t+1]`` (shifted) or ``input_ids[t]`` (aligned)
    where position t and its target are real tokens of the same row and the target is not in ``untrained``;
    ``ignore_index`` everywhere else (padding, the last position of a row under shifted)."""
    values = tokens.values
    out = np.full(values.size, ignore_index, dtype=dtype)
    if shifted:
        ok = real & next_in_row(tokens, real & ~untrained)
        at = np.flatnonzero(ok)
        out[at] = values[at + 1]
    else:
        ok = real & ~untrained
        out[ok] = values[ok]
    return out


def realign_labels(tokens: Flat, labels: np.ndarray, real: np.ndarray, expected: int, ignore_index: int,
                   pad_id: int | None, vocab_size: int | None, following: np.ndarray | None = None,
                   separators: tuple = ()) -> np.ndarray:
    """The label-alignment fix: labels rebuilt from input_ids in the expected convention (shift 1 or 0), keeping
    ignored what the input ignored on purpose (read through each row's observed shift) and reading wrong ignore
    markers (-1, the pad id at padding or where it is not the target, values >= vocab_size) as ignored.

    ``following`` (per row, the first token of the next record, -1 when unknown): under shifted labels a row's
    trained last label that equals it is kept, as the label rule accepts it: a pipeline that cuts one token
    stream into windows continues the stream there on purpose."""
    markers = ignore_markers(labels, real, ignore_index, pad_id, vocab_size, tokens, expected, separators)
    ignored = markers | (labels == ignore_index)
    shifts = row_shifts(tokens, labels, ignored, ignore_index, expected)
    untrained = untrained_targets(tokens, ignored, real, shifts)
    out = build_labels(tokens, real, untrained, expected == 1, ignore_index, labels.dtype)
    if expected == 1 and following is not None:
        rows = np.flatnonzero(tokens.lengths > 0)
        last = tokens.ends[rows] - 1
        kept = real[last] & ~ignored[last] & (labels[last] == following[rows]) & (following[rows] >= 0)
        out[last[kept]] = labels[last[kept]]
    return out


# -- rows to drop -----------------------------------------------------------------------------------------------


def out_of_range(values: np.ndarray, vocab_size: int | None) -> np.ndarray:
    """True at ids outside ``[0, vocab_size)`` (only negative ids when the vocabulary size is unknown)."""
    bad = values < 0
    if vocab_size is not None:
        bad |= values >= vocab_size
    return bad


def rows_with(tokens: Flat, mask: np.ndarray) -> np.ndarray:
    """Per row, whether ``mask`` is set at any of its positions."""
    return tokens.row_counts(mask) > 0


# -- text -------------------------------------------------------------------------------------------------------


def _literal(text: str) -> str:
    """An RE2 literal (``\\Q...\\E``), for Arrow's regular-expression kernels."""
    return "\\Q" + text.replace("\\E", "\\E\\\\E\\Q") + "\\E"


def strip_strings(array: pa.Array, strings) -> tuple[pa.Array, np.ndarray]:
    """The text column with every occurrence of ``strings`` removed, and how many were removed per row."""
    pattern = "|".join(_literal(s) for s in sorted(set(strings), key=len, reverse=True) if s)
    return _strip(array, pattern)


#: C0 control characters, DEL and C1 control characters (Unicode general category Cc, from memory).
CONTROLS = tuple(range(0x00, 0x20)) + (0x7F,) + tuple(range(0x80, 0xA0))


def strip_controls(array: pa.Array, allowed: str = "\t\n\r") -> tuple[pa.Array, np.ndarray]:
    """The text column without control characters other than ``allowed``, and how many were removed per row."""
    keep = {ord(ch) for ch in allowed}
    codes = [c for c in CONTROLS if c not in keep]
    return _strip(array, "[" + "".join(f"\\x{{{c:x}}}" for c in codes) + "]")


def _strip(array: pa.Array, pattern: str) -> tuple[pa.Array, np.ndarray]:
    if not pattern or len(array) == 0:
        return array, np.zeros(len(array), dtype=np.int64)
    counts = pc.fill_null(pc.count_substring_regex(array, pattern), 0).to_numpy(zero_copy_only=False)
    if not counts.any():
        return array, counts.astype(np.int64)
    return pc.replace_substring_regex(array, pattern, ""), counts.astype(np.int64)


def blank_text(array: pa.Array) -> np.ndarray:
    """Per row, whether the text is empty or whitespace only (null counts as empty)."""
    stripped = pc.utf8_trim_whitespace(array)
    return pc.fill_null(pc.equal(pc.utf8_length(stripped), 0), True).to_numpy(zero_copy_only=False)
