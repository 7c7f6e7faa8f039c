"""Inference of shard facts from a shard's first records: heuristics, each reported with its evidence.

The engine fills the facts the user left unset (``seq_len``, ``pad_id``, ``eos_id``, ``bos_id``, the label
convention) from the first records of each shard before its rules run; a value given in the config or on the
command line always wins.
"""
from __future__ import annotations

import dataclasses

import numpy as np
from corpuscle.io.batch import is_integer_list
from corpuscle.kernels.documents import _inner_restarts, length_boundaries, length_column
from corpuscle.kernels.shift import shift_agreement  # measured the same way the label rule measures it
from corpuscle.kernels.tokens import RealTokens
from corpuscle.settings import Settings

# -- inference from a shard's first records -----------------------------------------------------------------

#: A value is inferred only when this share of the evidence agrees, over at least MIN_EVIDENCE observations.
AGREEMENT = 0.9
MIN_EVIDENCE = 4
MAJORITY = 0.6
#: Without an attention mask, a pad id is inferred only when at least this share of the rows end in a run of it.
RUN_ROWS = 0.25


def _dominant(values: np.ndarray) -> tuple[int | None, float, int]:
    """The most common value, its share, and how many observations there were."""
    if values.size == 0:
        return None, 0.0, 0
    uniq, counts = np.unique(values, return_counts=True)
    top = int(np.argmax(counts))
    return int(uniq[top]), float(counts[top] / values.size), int(values.size)


def _exclusive(values: np.ndarray, at: np.ndarray, token: int, real: np.ndarray | None) -> float:
    """Share of the real occurrences of ``token`` that lie at the flat indices ``at``: a separator sits (almost)
    only where documents meet, a content word that happens to start every document also occurs elsewhere."""
    hits = values == token
    if real is not None:
        hits &= real
    total = int(np.count_nonzero(hits))
    return int(np.count_nonzero(values[at] == token)) / total if total else 0.0


def infer_from_batch(settings: Settings, batch) -> Settings:
    """Fill unset facts of a tokenized shard from its first records (``batch``: its first batches joined up to
    :data:`corpuscle.io.batch.FIRST_ROWS` rows or :data:`corpuscle.io.batch.FIRST_TOKENS` tokens), each with its
    evidence; what the records cannot settle is left unset, with the reason in ``settings.undecided``.

    Heuristics, reported as inferred, each from strong and consistent evidence only: ``seq_len`` (most common row
    length), ``pad_id`` (the id under attention_mask 0), ``eos_id`` (the id before the document boundaries that
    position_ids or a length column mark inside rows, else the last real token of padded rows, else of all rows:
    padding told by the same reading the rules use, :func:`corpuscle.kernels.tokens.real_tokens`), ``bos_id`` (the
    id at document starts, only when no eos is found, and only an id found nowhere else), the separator
    convention (bos at every document start and no eos: ``bos-before``), and the label convention (the shift, 0
    or 1, that explains the labels).
    """
    s = dataclasses.replace(settings, origin=dict(settings.origin), evidence=dict(settings.evidence),
                            undecided=dict(settings.undecided))
    tok = s.tokens_column
    if not batch.has(tok) or not is_integer_list(batch.type_of(tok)) or len(batch) == 0:
        return s
    flat = batch.flat(tok)
    values = flat.values
    n = len(batch)
    where = f"the first {n:,} rows"
    if s.seq_len is None:
        length, share, seen = _dominant(flat.lengths)
        if length and share >= 0.5 and seen >= MIN_EVIDENCE:
            s.infer("seq_len", length, f"most common row length ({share:.0%} of {where})")

    if s.pad_id is None and batch.has(s.mask_column) and is_integer_list(batch.type_of(s.mask_column)):
        mask = batch.flat(s.mask_column)
        if np.array_equal(mask.lengths, flat.lengths):
            pad, share, seen = _dominant(values[mask.values == 0])
            if seen >= MIN_EVIDENCE and share >= AGREEMENT:
                s.infer("pad_id", pad, f"id under attention_mask 0 at {share:.0%} of {seen:,} masked positions "
                                       f"in {where}")
    has_mask = batch.has(s.mask_column) and is_integer_list(batch.type_of(s.mask_column))
    if s.pad_id is None and not has_mask and flat.values.size:
        # Without a mask: right padding is a run of one id at the end of many rows (a run of two or more: a row
        # rarely ends in the same content token twice).
        nonempty = flat.lengths >= 2
        ends = flat.ends[nonempty]
        run = values[ends - 1] == values[ends - 2]
        pad, share, seen = _dominant(values[ends[run] - 1])
        rows = int(np.count_nonzero(nonempty))
        if seen >= MIN_EVIDENCE and share >= AGREEMENT and seen >= RUN_ROWS * rows:
            # Only with the id before the run agreeing too (the eos): when it varies, the run may begin with the
            # eos itself (pad id = eos id) or the shard has no eos, and the ids alone cannot tell which.
            trial = dataclasses.replace(s, pad_id=pad)
            trial_real = RealTokens.of(batch, flat, trial)
            padded = (trial_real.per_row > 0) & (trial_real.per_row < flat.lengths)
            before, agree, _ = _dominant(values[trial_real.last_index(flat)[padded]])
            if agree >= AGREEMENT:
                s.infer("pad_id", pad, f"{seen:,} of {rows:,} rows in {where} end in a run of this id "
                                       f"({share:.0%} of the rows ending in a run of one id), after id {before} "
                                       f"in {agree:.0%} of them")
            else:
                s.undecided["pad_id"] = (f"{seen:,} of {rows:,} rows in {where} end in a run of id {pad}, but the "
                                         f"ids before it agree at {agree:.0%} at most: {pad} may be the eos id as "
                                         f"well, or the shard has no eos")
    if s.pad_id is None and not has_mask and flat.values.size and "pad_id" not in s.undecided:
        # Left padding: a run of one id at the start of many rows.
        nonempty = flat.lengths >= 2
        starts = flat.starts[nonempty]
        run = values[starts] == values[starts + 1]
        pad, share, seen = _dominant(values[starts[run]])
        rows = int(np.count_nonzero(nonempty))
        if seen >= MIN_EVIDENCE and share >= AGREEMENT and seen >= RUN_ROWS * rows:
            s.infer("pad_id", pad, f"{seen:,} of {rows:,} rows in {where} start with a run of this id "
                                   f"({share:.0%} of the rows starting with a run of one id: left padding)")
    real = RealTokens.of(batch, flat, s)  # the rules' reading of padding (pad_id as inferred, eos_id not yet)
    has_real = real.per_row > 0
    last = real.last_index(flat)

    # Document boundaries inside rows, where something other than a separator marks them.
    marked, how = None, None
    found = length_column(batch, s)
    if found is not None:
        marked, how = length_boundaries(batch, flat, s), f"document boundaries the {found[1]} column gives"
    else:
        restarts = _inner_restarts(batch, flat, s, real)
        if restarts is not None and restarts.size:
            marked, how = restarts, "position restarts"
    eos_tried = []
    if marked is not None and marked.size:
        eos, share, seen = _dominant(values[marked - 1])
        # A majority suffices here: a pipeline that drops some separators still puts eos before most boundaries,
        # and that is exactly the shard whose missing separators must be found.
        if s.eos_id is None and seen >= MIN_EVIDENCE and share >= MAJORITY:
            s.infer("eos_id", eos, f"id before {share:.0%} of {seen:,} {how} in {where}")
        elif s.eos_id is None:
            eos_tried.append(f"the ids before {seen:,} {how} agree at {share:.0%} at most")
    if s.eos_id is None:
        padded = has_real & (real.per_row < flat.lengths)
        for rows, what in ((padded, "padded rows"), (has_real, "rows")):
            eos, share, seen = _dominant(values[last[rows]])
            if seen >= MIN_EVIDENCE and share >= AGREEMENT:
                whose = where if rows is has_real else f"{seen:,} {what} in {where}"
                s.infer("eos_id", eos, f"last real token of {share:.0%} of {whose}")
                break
            if seen:
                eos_tried.append(f"the last real tokens of {seen:,} {what} agree at {share:.0%} at most")
            if rows is padded and seen >= MIN_EVIDENCE:
                break  # padded rows say how documents end; unpadded ones may be cut or continued
        if s.eos_id is None:
            s.undecided["eos_id"] = ("in " + where + ": " + "; ".join(eos_tried) if eos_tried else
                                     f"nothing in {where} marks where documents end")

    # bos, and with it the separator convention: only when no eos was found, and only an id that occurs nowhere
    # but at document starts (a content word that starts every document also occurs inside them).
    wants_bos = s.separator in ("bos-before", "both") or (s.eos_id is None and s.source("separator") == "default")
    if s.bos_id is None and wants_bos:
        row_starts = real.first_from(flat.starts[has_real])
        if marked is not None and marked.size:
            starts, what = marked, how
            every = np.union1d(marked, row_starts)  # a document may also start at a row's start
        else:
            starts, what = row_starts, "rows (their first real token)"
            every = starts
        bos, share, seen = _dominant(values[starts])
        alone = _exclusive(values, every, bos, real.mask) if bos is not None else 0.0
        if seen >= MIN_EVIDENCE and share >= AGREEMENT and alone >= AGREEMENT and bos != s.eos_id:
            s.infer("bos_id", bos, f"id at {share:.0%} of {seen:,} {what} in {where}, and {alone:.0%} of its "
                                   f"occurrences are there")
        elif seen:
            s.undecided["bos_id"] = (f"in {where}, the id at {seen:,} {what} agrees at {share:.0%} and "
                                     f"{alone:.0%} of its occurrences are there; both must reach {AGREEMENT:.0%}")
    if (s.source("separator") == "default" and s.eos_id is None and s.bos_id is not None
            and s.source("bos_id") == "inferred"):
        s.separator = "bos-before"
        s.origin["separator"] = "inferred"
        s.evidence["separator"] = (f"bos (id {s.bos_id}) starts the documents and no eos was found "
                                   f"({s.undecided.get('eos_id', 'none')})")

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
