"""Padding that leaks into training: labels trained on padding, an attention mask that disagrees with the padding,
and real separators never trained on because the pad id equals the eos id.

Where padding is, per position:

* with an ``attention_mask`` column: padding is where the mask is 0, real where it is not 0 (a mask holding
  document numbers, 1 2 2 3 0 0, counts as real wherever it is not 0);
* without one, from ``pad_id``: the run of pad ids at the end of a row (right padding) and the run at its start
  (left padding). When the pad id is also the eos id, the first token of the end run is taken as the row's real
  eos and the start run is left undecided (a packed window may start on the eos of the previous document); when
  it is the bos id (and not the eos id), the last token of the start run is the real bos and the end run is left
  undecided. Pad ids inside a row are neither padding nor real.
"""
from __future__ import annotations

from functools import cached_property

import numpy as np
from corpuscle.findings import Finding, Level
from corpuscle.io.batch import Flat, MaskRanks, is_integer_list, spans
from corpuscle.kernels.histogram import POW2_BINS, pow2_bin, pow2_edges
from corpuscle.kernels.tokens import inferred_note, padding_positions, real_per_row, real_positions, real_ranks
from corpuscle.rules.api import CorpusResult, Rule, consistent, pct, share

# -- per-row arithmetic over flat arrays --------------------------------------------------------------------------

def _previous(flat: Flat, mask: np.ndarray) -> np.ndarray:
    """``mask`` of the previous position in the same row (False at row starts)."""
    out = np.zeros_like(mask)
    out[1:] = mask[:-1]
    return out & ~flat.is_first


def first_per_row(flat: Flat, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Batch-local rows that have ``mask`` set somewhere, and the 0-based offset of the first such position."""
    return flat.first_in_row(mask)


class PadRuns:
    """Padding read from the token ids alone (see the module docstring for the reading), as ranges of flat
    indices: per row, padding is ``[starts, lead_end)`` (left) and ``[trail_start, ends)`` (right), and the
    undecided pad-id run is ``[undecided_lo, undecided_hi)``. ``non_pad``: positions whose id is not the pad id
    (real whatever the mask says). Dense masks of padding and undecided positions are built only when asked for.
    """

    def __init__(self, flat: Flat, pad_id: int, eos_id: int | None, bos_id: int | None):
        self.flat = flat
        self.non_pad = flat.values != pad_id
        ranks = MaskRanks(self.non_pad)
        before, after = ranks.rank(flat.starts), ranks.rank(flat.ends)
        some = after > before  # a row of nothing but pad ids is read as right padding
        first, end = flat.starts.copy(), flat.starts.copy()  # first non-pad id; just past the last one
        first[some] = ranks.select(before[some] + 1)
        end[some] = ranks.select(after[some]) + 1
        starts, ends = flat.starts, flat.ends
        if pad_id == eos_id:  # the first of the end run is the real eos; the start run is undecided
            self.lead_end, self.trail_start = starts, np.minimum(end + 1, ends)
            self.undecided_lo, self.undecided_hi = starts, first
        elif pad_id == bos_id:  # the last of the start run is the real bos; the end run is undecided
            self.lead_end, self.trail_start = np.maximum(first - 1, starts), ends
            self.undecided_lo, self.undecided_hi = end, ends
        else:
            self.lead_end, self.trail_start = first, end
            self.undecided_lo = self.undecided_hi = ends

    @cached_property
    def padding(self) -> np.ndarray:
        """True at the positions taken as padding."""
        flat = self.flat
        return spans(flat.values.size, np.concatenate([flat.starts, self.trail_start]),
                     np.concatenate([self.lead_end, flat.ends]))

    @cached_property
    def undecided(self) -> np.ndarray:
        """True in the pad-id runs that may be real separators."""
        return spans(self.flat.values.size, self.undecided_lo, self.undecided_hi)

    def count_in_padding(self, ranks: MaskRanks) -> tuple[np.ndarray, np.ndarray]:
        """Per row, how many positions of the padding have the mask behind ``ranks`` set, and the flat index of
        the first of them (-1 where there is none)."""
        flat = self.flat
        at_start, at_lead_end = ranks.rank(flat.starts), ranks.rank(self.lead_end)
        at_trail, at_end = ranks.rank(self.trail_start), ranks.rank(flat.ends)
        lead, trail = at_lead_end - at_start, at_end - at_trail
        first = np.full(lead.size, -1, dtype=np.int64)
        in_lead, in_trail = lead > 0, (lead == 0) & (trail > 0)
        first[in_lead] = ranks.select(at_start[in_lead] + 1)
        first[in_trail] = ranks.select(at_trail[in_trail] + 1)
        return lead + trail, first


#: The mask pattern of a padded row, by padding side.
PATTERN = {"right": "ones then zeros", "left": "zeros then ones"}


# -- the rule -----------------------------------------------------------------------------------------------------

class PaddingLoss(Rule):
    """Padding must cost nothing but compute: no label is trained on it, the attention mask hides exactly the
    padding, and the real end of every document is still a target. Checks, per shard: (1) labels that are not the
    ignore index where the input is padding, or, with shifted labels, where the target (the next position) is
    padding: the loss is spent predicting filler; (2) attention masks that are not one block of ones and one block
    of zeros (ones then zeros for right padding, zeros then ones for left padding; the shard's side is inferred from
    the majority of its padded rows and reported as inferred); (3) with a known pad id, a mask of 1 on a pad-id run
    at either end of a row (padding attended) or a mask of 0 on a token that is not the pad id (real tokens hidden);
    (4) when the pad id equals the eos id, real eos tokens (mask 1, or without a mask, not in an undecided run; in
    both cases not padding as read from the ids) whose label is the ignore index: a pipeline that ignores every
    label equal to the pad id also ignores the real eos, and the model never learns to stop. The label of an eos at
    position t is the one at t - 1 with shifted labels and at t with aligned labels; (1) and (4) need the labels
    column, (4) a known label convention. The report's metrics give the real and pad share of all token slots of the
    checked shards (real = attention mask not 0, or, without a mask, not in a pad-id run as read above). A shard
    with neither an attention mask nor a pad id is skipped with a note."""

    id = "padding-loss"
    level = Level.error
    summary = ("Labels trained on padding; attention masks inconsistent with padding; real eos never trained on "
               "because the pad id equals the eos id.")
    kinds = {
        "attended-padding": "rows whose attention mask attends to padding",
        "trained-padding": "labels trained on padding",
        "masked-real-tokens": "real tokens under attention_mask 0",
        "eos-never-trained": "real eos never trained on because pad id equals eos id",
        "mask-shape": "attention masks whose ones and zeros do not form one block",
        "mask-shape:*": "locations of mask-shape rows by padding side (after the colon)",
    }
    help = ("Build labels from the attention mask, not from token ids: set labels to the ignore index (-100) "
            "wherever attention_mask is 0 and, with shifted labels, at the last real position of a padded row. "
            "Build the mask from each row's real length (ones for real tokens, zeros for padding, on one side). "
            "When the pad id equals the eos id, never ignore labels by token id: give padding its own id, or "
            "ignore by position so the real eos stays a target.")
    needs = {"tokens_column": "int-list"}

    def missing(self, batch, settings):
        reason = super().missing(batch, settings)
        if reason is None and settings.pad_id is None and not _has(batch, settings.mask_column):
            why = settings.undecided.get("pad_id")
            reason = (f"no {settings.mask_column!r} column and pad_id is not set or inferred"
                      f"{f' ({why})' if why else ''}: padding cannot be told from real tokens (give --pad-id)")
        return reason

    splittable = True

    def merge(self, first, second):
        merged = super().merge(first, second)
        merged.sources = first.sources | second.sources
        return merged

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.sources = set()  # how padding was told: "attention_mask", "pad_id"
        return state

    def feed(self, state, batch):
        s = state.settings
        batch = consistent(batch, [s.tokens_column, s.labels_column, s.mask_column])
        flat = batch.flat(s.tokens_column)
        if flat.values.size == 0:
            return
        runs = PadRuns(flat, s.pad_id, s.eos_id, s.bos_id) if s.pad_id is not None else None
        if _has(batch, s.mask_column):  # the same columns, so the same reading as real_positions
            real = real_positions(batch, flat, s)
            padding = padding_positions(batch, flat, s)
            per_row = flat.lengths - real_per_row(batch, flat, s)
            pads = int(per_row.sum())
            state.sources.add("attention_mask")
            self._mask_shape(state, batch, flat, real)
            if runs is not None:
                count, first = runs.count_in_padding(real_ranks(batch, flat, s))
                rows = np.flatnonzero(count)
                state.hit("attended-padding", batch, rows, first[rows] - flat.offsets[rows])
                state.count(**{"attended-padding_positions": int(count.sum())})
                self._hit_rows(state, batch, flat, np.greater(runs.non_pad, real), "masked-real-tokens")
        else:
            real = None
            padding = runs.padding
            pads = int(np.count_nonzero(padding))
            per_row = (runs.lead_end - flat.starts) + (flat.ends - runs.trail_start)
            state.sources.add("pad_id")
        state.count(slots=flat.values.size, padding=pads)
        _count_padding_per_row(state, per_row)
        if not _has(batch, s.labels_column):
            return
        labels = batch.flat(s.labels_column).values
        ignored = labels == s.ignore_index
        if real is not None and runs is not None:
            # mask 0 on a token that is not the pad id is a real token hidden from attention (masked-real-tokens),
            # not padding: its label is not a label "at padding"
            padding = padding & ~runs.non_pad
        if pads:
            trained_padding = np.greater(padding, ignored)  # padding whose label is trained
            if s.labels == "shifted":  # ... or whose target, the next position in the row, is padding
                target = np.greater(padding[1:], ignored[:-1])
                last = flat.ends[flat.lengths > 0] - 1
                target[last[last < target.size]] = False
                trained_padding[:-1] |= target
            self._hit_rows(state, batch, flat, trained_padding, "trained-padding")
        else:
            state.count(**{"trained-padding_positions": 0})
        if s.pad_id is not None and s.pad_id == s.eos_id and s.labels is not None:
            self._eos_targets(state, batch, flat, ignored, real, runs)

    def _mask_shape(self, state, batch, flat, real):
        """Rows whose mask is not one block of ones and one block of zeros, located for either padding side."""
        # A row's mask changes between real and padding at most once when it is one block of each; a row with
        # two changes or more is broken. A change to real breaks right padding, a change to padding left padding.
        # Changes are few (one per padded row), so they are found as flat indices and everything else is on them.
        change = np.flatnonzero(real[1:] != real[:-1]) + 1
        change = change[~flat.is_first[change]]
        to_real, to_pad = change[real[change]], change[~real[change]]
        changes = flat.count_positions(change)
        broken = changes >= 2
        for side, breaks in (("right", to_real), ("left", to_pad)):
            rows, offsets = flat.locate(breaks)
            first = np.ones(rows.size, dtype=bool)
            first[1:] = rows[1:] != rows[:-1]
            keep = first & broken[rows]
            state.hit(f"mask-shape:{side}", batch, rows[keep], offsets[keep])
        real_count = real_per_row(batch, flat, state.settings)
        padded = (real_count < flat.lengths) & (real_count > 0)
        starts_real = real[flat.offsets[:-1][padded]]
        state.count(right_padded=int(np.count_nonzero(starts_real)), left_padded=int(np.count_nonzero(~starts_real)))

    def _eos_targets(self, state, batch, flat, ignored, real, runs):
        """Real eos tokens whose label (the one that has the eos as its target) is the ignore index."""
        s = state.settings
        eos = flat.values == s.eos_id
        # with a mask: real = mask not 0, less pad ids read as padding (a mask of 1 there is attended padding)
        real_eos = eos & ~runs.padding & (real if real is not None else ~runs.undecided)
        if s.labels == "shifted":
            checked = real_eos & ~flat.is_first  # an eos at a row start is the target of the previous row
            label_ignored = _previous(flat, ignored)
        else:
            checked = real_eos
            label_ignored = ignored
        lost = np.flatnonzero(checked & label_ignored)
        rows, offsets = flat.locate(lost)
        state.hit("eos-never-trained", batch, rows, offsets)
        state.count(real_eos=int(np.count_nonzero(checked)))

    @staticmethod
    def _hit_rows(state, batch, flat, mask, kind):
        """Record one instance per affected row (offset of its first position) and count the positions."""
        rows, offsets = first_per_row(flat, mask)
        state.hit(kind, batch, rows, offsets)
        state.count(**{f"{kind}_positions": int(np.count_nonzero(mask))})

    # -- findings -------------------------------------------------------------------------------------------------
    def report(self, state):
        s = state.settings
        st = state.stats
        out = []
        told = " and ".join(sorted(state.sources))
        hits = state.hits.get("trained-padding")
        if hits:
            positions, pads = int(st["trained-padding_positions"]), int(st["padding"])
            target = " or, with shifted labels, whose target is padding" if s.labels == "shifted" else ""
            out.append(self.finding(
                state, "trained-padding",
                f"{hits.count:,} rows train on padding: {positions:,} labels are not the ignore index "
                f"{s.ignore_index} at positions that are padding{target} (padding told by {told}; the shard has "
                f"{pads:,} padding positions). The loss is spent predicting filler. Set labels to {s.ignore_index} "
                "wherever attention_mask is 0" + (" and at the last real position of a padded row"
                                                   if s.labels == "shifted" else "") + ". (Where these labels are "
                "the pad id, label-alignment, when it runs, reports the same rows as pad-label: one fix for both.)"
                + inferred_note(s, ("pad_id", "labels")),
                positions=positions, paddingPositions=pads, paddingFrom=told,
                labelConvention=s.labels or "unknown"))
        side_hits = self._side(state)
        if side_hits:
            side, hits, right, left = side_hits
            out.append(Finding.from_hits(
                self.id, self.level,
                f"{hits.count:,} rows whose attention_mask is not one block of ones and one block of zeros: real "
                f"tokens after padding, or holes inside the real tokens. The shard is {side}-padded (inferred "
                f"from the majority, heuristic: {right:,} padded rows start with real tokens, {left:,} with "
                f"padding); offset = the first position that breaks {PATTERN[side]}. "
                "Tokens hidden by a hole are trained on without context, and tokens after the padding attend "
                "across it. Build the mask from each row's real length.",
                state.uri, hits, kind="mask-shape", paddingSide=side, rightPaddedRows=right, leftPaddedRows=left))
        hits = state.hits.get("attended-padding")
        if hits:
            positions = int(st["attended-padding_positions"])
            out.append(self.finding(
                state, "attended-padding",
                f"{hits.count:,} rows where attention_mask is 1 on {positions:,} pad-id ({s.pad_id}) tokens of "
                "the padding run: real tokens attend to padding and the result depends on how much padding a row "
                "has. Set attention_mask to 0 on padding." + inferred_note(s, ("pad_id", "eos_id")),
                positions=positions, padId=s.pad_id))
        hits = state.hits.get("masked-real-tokens")
        if hits:
            positions = int(st["masked-real-tokens_positions"])
            out.append(self.finding(
                state, "masked-real-tokens",
                f"{hits.count:,} rows where attention_mask is 0 on {positions:,} tokens that are not the pad id "
                f"({s.pad_id}): real tokens hidden from attention (a mask cut shorter than the tokens, or taken "
                "from another row). Build the mask from each row's real length." + (
                    " Rows with a hole inside their real tokens are also in the mask-shape finding: one fix for "
                    "both." if side_hits else ""),
                positions=positions, padId=s.pad_id))
        hits = state.hits.get("eos-never-trained")
        if hits:
            real_eos = int(st["real_eos"])
            where = "the position before it" if s.labels == "shifted" else "its position"
            out.append(self.finding(
                state, "eos-never-trained",
                f"the pad id equals the eos id ({s.eos_id}), and {hits.count:,} of {real_eos:,} real eos tokens "
                f"({pct(hits.count, real_eos)}) have the ignore index {s.ignore_index} as their label ({s.labels} "
                f"labels: the label at {where}): the model never learns to end a document. Labels were likely "
                "ignored by token id (every label equal to the pad id). Ignore labels by attention mask or "
                "position, or give padding its own id." + inferred_note(s, ("pad_id", "eos_id", "labels")),
                eosId=s.eos_id, realEos=real_eos, share=share(hits.count, real_eos), labelConvention=s.labels))
        return out

    @staticmethod
    def _side(state):
        right, left = int(state.stats["right_padded"]), int(state.stats["left_padded"])
        side = "left" if left > right else "right"
        hits = state.hits.get(f"mask-shape:{side}")
        return (side, hits, right, left) if hits else None

    def corpus(self, states):
        slots = sum(int(st.stats["slots"]) for st in states)
        if not slots:
            return CorpusResult([], {})
        pads = sum(int(st.stats["padding"]) for st in states)
        return CorpusResult([], {"realTokenFraction": (slots - pads) / slots, "padTokenFraction": pads / slots,
                                 "paddingPerRow": _padding_per_row(states)})


#: Stats key of the rows whose padding falls in power-of-two bin k (:func:`corpuscle.kernels.histogram.pow2_bin`).
PAD_ROWS = "rows_padding_bin_{}"


def _count_padding_per_row(state, per_row) -> None:
    """Count the batch's rows by their padding (tokens), in power-of-two bins: a few counters per shard."""
    per_bin = np.bincount(pow2_bin(per_row), minlength=1)
    state.count(**{PAD_ROWS.format(k): int(n) for k, n in enumerate(per_bin.tolist()) if n})


def _padding_per_row(states) -> dict:
    """Rows by padding tokens over all checked shards (bin i: ``edges[i] <= padding < edges[i + 1]``): the
    histogram the HTML report plots; its counts add up to the rows checked."""
    counts = np.zeros(POW2_BINS, dtype=np.int64)
    for st in states:
        for k in range(POW2_BINS):
            counts[k] += int(st.stats.get(PAD_ROWS.format(k), 0))
    used = int(np.flatnonzero(counts).max()) + 1 if counts.any() else 1
    return {"unit": "tokens", "rows": int(counts.sum()), "edges": pow2_edges(used),
            "counts": counts[:used].tolist()}


def _has(batch, name) -> bool:
    return batch.has(name) and is_integer_list(batch.type_of(name))


RULES = [PaddingLoss]
