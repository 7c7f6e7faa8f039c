"""Inference of shard facts from a shard's first records: heuristics, each reported with its evidence.

The engine fills the facts the user left unset (``seq_len``, ``pad_id``, ``eos_id``, ``bos_id``, the label
convention) from the first records of each shard before its rules run; a value given in the config or on the
command line always wins.
"""
from __future__ import annotations

import dataclasses

import numpy as np
from corpuscle.io.batch import is_integer_list
from corpuscle.kernels.shift import shift_agreement  # measured the same way the label rule measures it
from corpuscle.settings import Settings

# -- inference from a shard's first records -----------------------------------------------------------------

#: A value is inferred only when this share of the evidence agrees, over at least MIN_EVIDENCE observations.
AGREEMENT = 0.9
MIN_EVIDENCE = 4
MAJORITY = 0.6


def _dominant(values: np.ndarray) -> tuple[int | None, float, int]:
    """The most common value, its share, and how many observations there were."""
    if values.size == 0:
        return None, 0.0, 0
    uniq, counts = np.unique(values, return_counts=True)
    top = int(np.argmax(counts))
    return int(uniq[top]), float(counts[top] / values.size), int(values.size)


def infer_from_batch(settings: Settings, batch) -> Settings:
    """Fill unset facts of a tokenized shard from its first records (``batch``: its first batches joined up to
    :data:`lint.batch.FIRST_ROWS` rows or :data:`lint.batch.FIRST_TOKENS` tokens), each with its evidence.

    These are heuristics and are reported as inferred: ``seq_len`` (most common row length), ``pad_id`` (the id
    under attention_mask 0), ``eos_id`` (the id before position restarts, else the last real token of rows),
    ``bos_id`` (the id at restarts or row starts), and the label convention (shift 0 or 1 that explains labels).
    """
    s = dataclasses.replace(settings, origin=dict(settings.origin), evidence=dict(settings.evidence))
    tok = s.tokens_column
    if not batch.has(tok) or not is_integer_list(batch.type_of(tok)) or len(batch) == 0:
        return s
    flat = batch.flat(tok)
    n = len(batch)
    where = f"the first {n:,} rows"
    if s.seq_len is None:
        length, share, seen = _dominant(flat.lengths)
        if length and share >= 0.5 and seen >= MIN_EVIDENCE:
            s.infer("seq_len", length, f"most common row length ({share:.0%} of {where})")

    real_end = flat.lengths.copy()  # per row: number of real (non-padding) tokens
    if batch.has(s.mask_column) and is_integer_list(batch.type_of(s.mask_column)):
        mask = batch.flat(s.mask_column)
        if mask.values.size == flat.values.size and np.array_equal(mask.lengths, flat.lengths):
            pad_positions = mask.values == 0
            pad, share, seen = _dominant(flat.values[pad_positions])
            if s.pad_id is None and seen >= MIN_EVIDENCE and share >= AGREEMENT:
                s.infer("pad_id", pad, f"id under attention_mask 0 at {share:.0%} of {seen:,} masked positions "
                                       f"in {where}")
            real_end = flat.count_per_row(~pad_positions)
    elif s.pad_id is not None:
        # No attention mask: a row's real tokens end at its last token that is not the (known) pad id.
        last = flat.last_where(flat.values != s.pad_id)
        real_end = np.where(last >= 0, last - flat.starts + 1, 0)

    restarts = None
    if batch.has(s.positions_column) and is_integer_list(batch.type_of(s.positions_column)):
        pos = batch.flat(s.positions_column)
        if np.array_equal(pos.lengths, flat.lengths):
            restarts = np.flatnonzero((pos.values == 0) & ~flat.is_first)
    if restarts is not None and restarts.size:
        eos, share, seen = _dominant(flat.values[restarts - 1])
        # A majority suffices here: a pipeline that drops some separators still puts eos before most restarts,
        # and that is exactly the shard whose missing separators must be found.
        if seen >= MIN_EVIDENCE and share >= MAJORITY:
            s.infer("eos_id", eos, f"id before {share:.0%} of {seen:,} position restarts in {where}")
        bos, share, seen = _dominant(flat.values[restarts])
        if seen >= MIN_EVIDENCE and share >= AGREEMENT and bos != s.eos_id:
            s.infer("bos_id", bos, f"id at {share:.0%} of {seen:,} position restarts in {where}")
    has_real = real_end > 0
    last_real = flat.values[(flat.offsets[:-1] + real_end - 1)[has_real]]
    if s.eos_id is None:
        eos, share, seen = _dominant(last_real)
        if seen >= MIN_EVIDENCE and share >= AGREEMENT:
            s.infer("eos_id", eos, f"last real token of {share:.0%} of {where}")
    if s.bos_id is None and s.separator in ("bos-before", "both"):
        bos, share, seen = _dominant(flat.values[flat.offsets[:-1][has_real]])
        if seen >= MIN_EVIDENCE and share >= AGREEMENT and bos != s.eos_id:
            s.infer("bos_id", bos, f"first token of {share:.0%} of {where}")

    if s.labels is None and batch.has(s.labels_column) and is_integer_list(batch.type_of(s.labels_column)):
        labels = batch.flat(s.labels_column)
        if np.array_equal(labels.lengths, flat.lengths):
            agree = shift_agreement(flat, labels.values, s.ignore_index, shifts=(0, 1))
            best = max(agree, key=agree.get)
            # Both shifts explaining the labels (e.g. long runs of one id) is no evidence for either convention.
            if agree[best] >= AGREEMENT and agree[1 - best] < AGREEMENT:
                name = "shifted" if best == 1 else "aligned"
                s.infer("labels", name, f"labels equal input_ids shifted by {best} at {agree[best]:.1%} of "
                                        f"trained positions in {where}")
    return s
