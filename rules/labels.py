"""Labels: whether the labels column teaches the model what the pipeline means it to learn.

A causal language model learns to predict token t+1 from the tokens up to t. Where that shift happens is a
convention of the pipeline: under ``shifted`` the data holds ``labels[t] = input_ids[t+1]`` and the model uses
labels as they are; under ``aligned`` the data holds ``labels == input_ids`` and the model or its loss shifts. A
shard written under one convention and trained under the other still trains — on the wrong target — so nothing
fails and the loss curve looks almost normal.
"""
from __future__ import annotations

import copy
from collections import defaultdict

import numpy as np
from corpuscle.findings import Finding, Level
from corpuscle.io.batch import Batch, Flat
from corpuscle.kernels.shift import PREFERENCE, SHIFTS, best_shift, first_mismatch, shift_matches
from corpuscle.kernels.tokens import inner_starts, padding_free, padding_positions, position_restarts, token_positions
from corpuscle.rules.api import CorpusResult, Rule, Unmergeable, consistent, pct, share

#: Label shift each convention expects in the data.
CONVENTION_SHIFT = {"shifted": 1, "aligned": 0}
CONVENTION_NAME = {1: "shifted", 0: "aligned"}

#: How many distinct negative label values a shard state remembers (for the message; the counts stay exact).
VALUES_KEPT = 16


def shift_kind(shift: int) -> str:
    """The finding kind of rows whose labels follow ``shift``: ``shift+2``, ``shift+0``, ``shift-1``."""
    return f"shift{shift:+d}"


def expected_shift(settings) -> tuple[int, str]:
    """The label shift the shard should show, and where that expectation comes from: ``given`` (config or
    flag), ``inferred`` (from the shard's first rows) or ``assumed`` (unset and not inferable: ``shifted``)."""
    if settings.labels is None:
        return 1, "assumed"
    return CONVENTION_SHIFT[settings.labels], "inferred" if settings.source("labels") == "inferred" else "given"


def document_starts(batch: Batch, tokens: Flat, settings) -> tuple[np.ndarray, str | None]:
    """Flat indices of documents that start inside a row (not at its first position) between two real tokens,
    and what marked them: ``position_ids`` restarting at 0; else the token after ``eos_id``; else ``bos_id``
    under a ``bos-before`` separator. ``(empty, None)`` when nothing marks documents."""
    restarts = position_restarts(batch, tokens, settings)
    if restarts is not None:
        return restarts, "position_ids"
    if settings.eos_id is not None and settings.separator in ("eos-after", "both"):
        after = token_positions(batch, tokens, settings, settings.eos_id) + 1
        return inner_starts(batch, tokens, settings, after[after < tokens.values.size]), "eos_id"
    if settings.bos_id is not None and settings.separator in ("bos-before", "both"):
        at_bos = token_positions(batch, tokens, settings, settings.bos_id)
        return inner_starts(batch, tokens, settings, at_bos), "bos_id"
    return np.zeros(0, dtype=np.int64), None


def label_values(values: np.ndarray, ignore_index: int) -> np.ndarray:
    """The flat labels as they are when their integer type holds ``ignore_index`` (int32 labels stay int32:
    comparing them costs half of comparing an int64 copy), else as an int64 copy."""
    if values.dtype.kind == "i":
        bound = 1 << (8 * values.dtype.itemsize - 1)  # the type holds [-bound, bound)
        if -bound <= ignore_index < bound:
            return values
    return values.astype(np.int64)


def first_per_row(tokens: Flat, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    """Batch-local rows having ``mask`` somewhere, the position of its first occurrence in each, and how many
    positions have it in all."""
    rows, offsets = tokens.first_in_row(mask)
    return rows, offsets, int(np.count_nonzero(mask))


def ahead(observed: int, expected: int) -> str:
    """What a model trained under the expected convention learns from labels with the observed shift."""
    steps = observed - expected + 1  # how far ahead of position t the target of position t lies
    if steps == 0:
        return "the model learns to copy the token it is given"
    if steps < 0:
        return f"the model learns to repeat the token {-steps} position(s) back, which it has already seen"
    return f"the model learns to predict the token {steps} positions ahead instead of the next one"


def diagnosis(observed: int, expected: int) -> str:
    """The likely cause, in the pipeline's terms, of labels with the observed shift."""
    if observed == expected + 1:
        if expected == 1:
            return "labels are shifted twice — once in preprocessing and once in the model or collator"
        return "labels are already shifted in the data, and the model shifts them once more"
    if observed == 0 and expected == 1:
        return "labels are not shifted at all: the data follows the aligned convention"
    if observed < 0:
        return "labels are shifted the wrong way (the label of a position is the token before it)"
    if observed > expected:
        return f"labels are shifted {observed - expected} times too often"
    return f"labels are shifted {observed} time(s) where {expected} was expected"


class LabelAlignment(Rule):
    """A labels column that does not say what the model should predict trains it on the wrong target without any
    error: the loss goes down, the model learns to copy its input or to guess two tokens ahead. Six checks,
    row by row with flat numpy comparisons, per shard and across shards.

    (1) Label shift: for every row, the shift k in -1..3 that best explains labels[t] == input_ids[t+k] over the
    row's trained positions, and the share of them it explains (its agreement; ties go to the expected shift).
    The expected shift is 1 under labels = shifted and 0 under aligned; when the setting is neither given nor
    inferable, shifted is assumed and every message says so. Rows whose best shift differs from the expected one
    are reported per observed shift (kinds shift+2, shift+0, shift-1 ...; offset = first label that breaks the
    expected shift). Rows whose best shift explains less than min_agreement of their labels follow no shift
    (no-shift; offset as above).

    (2) Mixed conventions: a shard holding both aligned (shift 0) and shifted (shift 1) rows, the smaller group
    at least mixed_share of the rows with a clear shift (mixed-in-shard; the smaller group is listed, offset =
    first label breaking the larger group's shift); shards whose most common shift differs from the corpus's
    (mixed-across-shards; only a note when per-path settings give each of those shards the convention it shows).

    (3) Last label under shifted (warning): nothing follows a row's last token, so its label must be the ignore
    index. Checked in rows that otherwise follow shift 1 (other rows are reported already) and only when the last
    position is not padding (that is padding-loss's). A last label equal to the first token of the next record is
    accepted: chunking pipelines that continue one token stream across windows write it on purpose, and in a
    shard that does so, the last row is taken to continue into the next shard. The common error is a shift that
    wraps around (a roll), which the message counts.

    (4) Ignore markers: label values that are neither a token id nor the ignore index — negative values
    (negative-label, typically -1 used to mark ignored positions), values >= vocab_size when it is known
    (label-out-of-vocab), and the pad id as the label of padding positions (pad-label; padding = attention_mask
    0, else the run of pad_id after a row's last real token). This rule reports the value convention (ignored
    positions marked with the wrong value, so the loss trains on them); padding-loss reports which positions are
    trained on padding, whatever their value. Marker positions are left out of the shift measurement.

    (5) Nothing to train on (warning): rows in which every label is the ignore index; their per-row mean loss is
    0/0 (nothing-trained, row only).

    (6) Corpus figures, labelSupervision: trainedFraction is the share of label positions the loss trains on
    (label != ignore index); crossDocumentFraction is, over the documentStarts inside rows (position_ids
    restarting at 0 between two real tokens; without them the token after an eos, or a bos under bos-before),
    the share whose first token is a target taught from the previous document: the label that predicts it (at
    the position before the start under shifted, at the start itself under aligned) is trained and names a
    token. Concatenated pretraining often trains across boundaries on purpose, so this is a figure, not a
    finding. labelShiftRows counts rows per observed shift. Per-row shifts are heuristic measurements, and the
    messages give the agreement they rest on.
    """

    id = "label-alignment"
    level = Level.error
    summary = ("Labels vs input_ids: label shift observed vs expected, mixed conventions, label values that are "
               "neither a token id nor the ignore index, rows with nothing to train on.")
    kinds = {
        "shift*": "rows whose labels follow input_ids shifted by the number after 'shift'",
        "no-shift": "rows whose labels follow no single shift",
        "last-label": "rows whose last label is trained on although nothing follows it",
        "negative-label": "negative label values other than the ignore index",
        "label-out-of-vocab": "label values at or above vocab_size",
        "pad-label": "labels equal to the pad id at padded positions",
        "nothing-trained": "rows with no position to train on",
        "mixed-in-shard": "rows of one shard following different label conventions",
        "mixed-across-shards": "shards following different label conventions",
    }
    help = ("Shift labels exactly once: either write labels[t] = input_ids[t+1] with the last label set to "
            "ignore_index (labels = 'shifted') and let the model use them as they are, or write labels = input_ids "
            "(labels = 'aligned') and let the model shift — never both, never neither. Set `labels` in the config "
            "to the convention your trainer expects. Mark every ignored label with ignore_index (-100 by default), "
            "never with -1 or the pad id. Re-run shards whose convention differs from the rest through the same "
            "preprocessing, and drop rows with no trained label.")
    needs = {"tokens_column": "int-list", "labels_column": "int-list"}
    options = {"min_agreement": 0.9, "mixed_share": 0.05}

    def __init__(self, **options):
        super().__init__(**options)
        for name in self.options:
            value = self.opts[name]
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value <= 1:
                raise ValueError(f"rule {self.id}: option {name} must be a share in (0, 1], got {value!r} "
                                 f"(e.g. [rule.{self.id}] {name} = {self.options[name]})")

    # -- per shard ----------------------------------------------------------------------------------------
    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.expected, state.source = expected_shift(settings)
        state.negative_values = {}  # value -> positions, for the message (bounded by VALUES_KEPT)
        state.max_label = None
        state.tail = None  # (row, offset, last label, first token) of the last row fed, when its last label is
        #                    trained: whether the next record continues it is known only with the next batch
        state.basis = None
        state.head = None  # first token of the first row that met the check of last labels: a previous part's
        #                    tail is continued by it or not (see merge)
        return state

    def feed(self, state, batch):
        s = state.settings
        batch = consistent(batch, [s.tokens_column, s.labels_column, s.mask_column, s.positions_column])
        if not len(batch):
            return
        tokens = batch.flat(s.tokens_column)
        labels = label_values(batch.flat(s.labels_column).values, s.ignore_index)
        trained = labels != s.ignore_index
        trained_rows = tokens.row_counts(trained)
        padding = None if padding_free(batch, tokens, s) else padding_positions(batch, tokens, s)
        state.count(rows=len(batch), positions=labels.size, trained=int(trained_rows.sum()))
        markers = self._markers(state, batch, tokens, labels, trained, padding)
        if markers is None:  # the common case: every trained label names a token
            teaching, teaching_rows, shifted = trained, trained_rows, labels
        else:
            teaching = trained & ~markers  # labels that name a token
            teaching_rows = tokens.row_counts(teaching)
            shifted = np.where(markers, s.ignore_index, labels)
        follows = self._shift(state, batch, tokens, shifted, teaching, teaching_rows)
        if state.expected == 1:
            self._last_label(state, batch, tokens, labels, teaching, padding, follows)
        empty = np.flatnonzero((trained_rows == 0) & (tokens.lengths > 0))
        state.hit("nothing-trained", batch, empty)
        starts, basis = document_starts(batch, tokens, s)
        state.basis = state.basis or basis
        state.count(document_starts=starts.size,
                    cross_document=int(np.count_nonzero(teaching[starts - state.expected])))

    def _markers(self, state, batch, tokens, labels, trained, padding) -> np.ndarray | None:
        """Record label values that are neither a token id nor ignore_index; return where they are (None when
        there are none). Each kind is first detected with one cheap pass; masks are built only when it occurs."""
        s = state.settings
        markers = None
        low, high = (int(labels.min()), int(labels.max())) if labels.size else (0, -1)
        negatives = 0
        if low < 0:
            negatives = int(np.count_nonzero(labels < 0))
            if s.ignore_index < 0:  # the ignored positions are negative too
                negatives -= labels.size - int(np.count_nonzero(trained))
        if negatives:
            negative = trained & (labels < 0)
            rows, offsets, n = first_per_row(tokens, negative)
            state.hit("negative-label", batch, rows, offsets)
            values, counts = np.unique(labels[negative], return_counts=True)
            for value, count in zip(values.tolist(), counts.tolist()):
                if value in state.negative_values or len(state.negative_values) < VALUES_KEPT:
                    state.negative_values[value] = state.negative_values.get(value, 0) + count
            state.count(negative_positions=n)
            markers = negative
        if s.vocab_size is not None and high >= s.vocab_size:
            beyond = trained & (labels >= s.vocab_size)
            rows, offsets, n = first_per_row(tokens, beyond)
            state.hit("label-out-of-vocab", batch, rows, offsets)
            if n:
                state.count(out_of_vocab_positions=n)
                state.max_label = max(state.max_label or 0, int(labels[beyond].max()))
                markers = beyond if markers is None else markers | beyond
        if s.pad_id is not None and s.pad_id != s.ignore_index:
            n = 0
            if padding is not None:
                pad_marked = trained & padding & (labels == s.pad_id)
                rows, offsets, n = first_per_row(tokens, pad_marked)
                state.hit("pad-label", batch, rows, offsets)
                if n:
                    markers = pad_marked if markers is None else markers | pad_marked
            state.count(pad_label_positions=n)
        return markers

    def _shift(self, state, batch, tokens, labels, trained, trained_rows) -> np.ndarray:
        """Best shift and agreement per row; hits per observed shift (offset: first label breaking the shift the
        row is compared with — the expected one, or for shift 0/1 rows the other convention). Returns which rows
        follow the expected shift. ``trained`` is ``labels != ignore_index``, ``trained_rows`` its row counts."""
        s, expected = state.settings, state.expected
        # Rows whose every trained label follows the expected shift are settled by one comparison; only the
        # others (none in a clean shard) are measured against every shift.
        m0, c0 = shift_matches(tokens, labels, s.ignore_index, (expected,), trained, trained_rows)
        perfect = (c0[0] > 0) & (m0[0] == c0[0])
        settled = np.flatnonzero(perfect)
        state.hit(shift_kind(expected), batch, settled, self._other_break(state, tokens, labels, settled))
        state.count(measured=int(settled.size), **{f"matched{expected:+d}": int(m0[0, settled].sum()),
                                                   f"compared{expected:+d}": int(c0[0, settled].sum())})
        follows = perfect.copy()
        rest = np.flatnonzero(~perfect)
        if rest.size:
            sub, source = tokens.take(rest)
            follows[rest] = self._measure(state, batch.rows[rest], sub, labels[source])
        return follows

    def _other_break(self, state, tokens, labels, rows) -> np.ndarray:
        """Offsets of the first label breaking the other convention (0 vs 1) in the rows the hit list will keep
        (at most ``instance_cap`` per shard, so a clean shard pays for this only until the list is full); -1 for
        rows past the cap or when the expected shift is neither 0 nor 1."""
        offsets = np.full(rows.size, -1, dtype=np.int64)
        hits = state.hits.get(shift_kind(state.expected))
        room = state.cap - (hits.kept if hits else 0)
        keep = rows[:max(room, 0)]
        if keep.size and state.expected in (0, 1):
            offsets[:keep.size] = first_mismatch(tokens, labels, state.settings.ignore_index, 1 - state.expected,
                                                 rows=keep)
        return offsets

    def _measure(self, state, rows_in_shard, tokens, labels) -> np.ndarray:
        """Best shift of each given row against every shift in SHIFTS; records hits; says which rows follow the
        expected shift."""
        s, expected = state.settings, state.expected
        matches, comparable = shift_matches(tokens, labels, s.ignore_index, SHIFTS)
        best, agreement, measured = best_shift(matches, comparable, SHIFTS, prefer=expected)
        steady = measured & (agreement >= self.opts["min_agreement"])
        breaks = {k: first_mismatch(tokens, labels, s.ignore_index, k) for k in (0, 1)}
        reference = np.where((best == 0) | (best == 1), 1 - best, expected)
        offsets = np.where(reference == 1, breaks[1], breaks[0])
        state.count(measured=int(measured.sum()))
        for i, k in enumerate(SHIFTS):
            rows = np.flatnonzero(steady & (best == k))
            if rows.size:
                state.hit_at(shift_kind(k), rows_in_shard[rows], offsets[rows])
                state.count(**{f"matched{k:+d}": int(matches[i, rows].sum()),
                               f"compared{k:+d}": int(comparable[i, rows].sum())})
        loose = np.flatnonzero(measured & ~steady)
        state.hit_at("no-shift", rows_in_shard[loose], breaks[expected][loose])
        state.count(loose_agreement=float(agreement[loose].sum()))
        return steady & (best == expected)

    def _last_label(self, state, batch, tokens, labels, teaching, padding, follows) -> None:
        """Rows that follow the shifted convention but whose last label is trained (and names a token, and is not
        padding; ``padding`` None: there is none), unless it is the next record's first token (rows with another
        shift are reported for that already)."""
        rows = np.flatnonzero(tokens.lengths > 0)
        if not rows.size:
            return
        last = tokens.offsets[rows + 1] - 1
        last_label = labels[last]
        first_token = tokens.values[tokens.offsets[rows]]
        if state.head is None:
            state.head = int(first_token[0])
        if state.tail is not None:  # the last row of the previous batch, continued or not by this one
            row, offset, label, own_first = state.tail
            if label == first_token[0]:
                state.count(continued=1)
            else:
                state.hit_at("last-label", [row], [offset])
                state.count(wraps=int(label == own_first))
            state.tail = None
        trained_last = teaching[last] & follows[rows]
        if padding is not None:
            trained_last &= ~padding[last]
        continued = np.zeros(rows.size, dtype=bool)
        continued[:-1] = last_label[:-1] == first_token[1:]
        if trained_last[-1]:
            state.tail = (int(batch.rows[rows[-1]]), int(tokens.lengths[rows[-1]] - 1), int(last_label[-1]),
                          int(first_token[-1]))
        trained_last[-1] = False
        bad = trained_last & ~continued
        state.count(continued=int((trained_last & continued).sum()),
                    wraps=int((bad & (last_label == first_token)).sum()))
        state.hit("last-label", batch, rows[bad], tokens.lengths[rows[bad]] - 1)

    @staticmethod
    def _settle(state) -> None:
        """The last row of the shard, when its last label is trained: nothing follows it in the shard."""
        if getattr(state, "tail", None) is not None:
            row, offset, label, own_first = state.tail
            if state.stats["continued"]:
                state.count(continued=1)  # the shard continues its stream: presumed to go on in the next shard
            else:
                state.hit_at("last-label", [row], [offset])
                state.count(wraps=int(label == own_first))
            state.tail = None

    # The last row's tail is settled when the shard is reported, not in ``end``: a part of a split shard does not
    # know yet whether the next part continues it.
    splittable = True

    def merge(self, first, second):
        """Counters and hits as usual, after ``first``'s last row is checked against ``second``'s first row as one
        scan checks it; the first label values met, up to VALUES_KEPT (a state that cannot say exactly which
        values one scan would have kept raises :class:`corpuscle.rules.api.Unmergeable`)."""
        head = copy.copy(first)
        head.stats = defaultdict(int, first.stats)
        head.hits = {kind: copy.deepcopy(hits) for kind, hits in first.hits.items()}
        if first.tail is not None and second.head is not None:
            row, offset, label, own_first = first.tail
            if label == second.head:
                head.count(continued=1)
            else:
                head.hit_at("last-label", [row], [offset])
                head.count(wraps=int(label == own_first))
            head.tail = None
        merged = super().merge(head, second)
        merged.tail = second.tail if second.head is not None else head.tail
        merged.head = first.head if first.head is not None else second.head
        values = dict(first.negative_values)
        if len(second.negative_values) >= VALUES_KEPT and set(values) - set(second.negative_values):
            raise Unmergeable("more distinct negative label values than are kept")
        for value, count in second.negative_values.items():
            if value in values or len(values) < VALUES_KEPT:
                values[value] = values.get(value, 0) + count
        merged.negative_values = values
        highs = [x for x in (first.max_label, second.max_label) if x is not None]
        merged.max_label = max(highs) if highs else None
        merged.basis = first.basis or second.basis
        return merged

    # -- findings -----------------------------------------------------------------------------------------
    def report(self, state):
        self._settle(state)
        s, st, expected = state.settings, state.stats, state.expected
        convention = self._convention(state)
        measured = st["measured"]
        out = []
        for k in SHIFTS:
            hits = state.hits.get(shift_kind(k))
            if k == expected or not hits:
                continue
            agreement = share(st[f"matched{k:+d}"], st[f"compared{k:+d}"])
            other = CONVENTION_NAME.get(k)
            switch = (f" If your trainer does expect labels shifted by {k}, set labels = '{other}' instead."
                      if other else "")
            out.append(self.finding(
                state, shift_kind(k),
                f"labels equal input_ids shifted by {k} in {pct(hits.count, measured)} of {measured:,} rows "
                f"with trained labels ({hits.count:,} rows; the shift explains {agreement:.1%} of their trained "
                f"labels); expected {expected} "
                f"{convention}: {diagnosis(k, expected)}, so {ahead(k, expected)}. Offset = first label that is "
                f"not input_ids shifted by {expected}. {self._fix(expected)}{switch}",
                observedShift=k, expectedShift=expected, agreement=round(agreement, 6), rows=hits.count,
                convention=CONVENTION_NAME[expected], conventionSource=state.source))
        out += self._mixed_in_shard(state, convention)
        loose = state.hits.get("no-shift")
        if loose:
            mean = st["loose_agreement"] / loose.count
            threshold = self.opts["min_agreement"]
            out.append(self.finding(
                state, "no-shift",
                f"{loose.count:,} of {measured:,} rows follow no label shift: the best of shifts -1..3 explains on "
                f"average only {mean:.1%} of their trained labels (min_agreement {threshold:.0%}); offset = first "
                f"label that is not input_ids shifted by {expected} {convention}. Labels taken from another row, "
                "rows reordered in one column but not the other, or labels tokenized differently from input_ids "
                "do this: rebuild labels from input_ids in the same pass that writes them.",
                expectedShift=expected, agreement=round(mean, 6), rows=loose.count, minAgreement=threshold))
        out += self._value_findings(state)
        last = state.hits.get("last-label")
        if last:
            wraps = st["wraps"]
            wrap_note = (f" {wraps:,} of them equal the row's own first token, the mark of a shift that wraps "
                         "around (a roll) instead of dropping the last label." if wraps else "")
            out.append(self.finding(
                state, "last-label",
                f"{last.count:,} rows have a trained last label under the shifted convention {convention}: "
                "nothing follows a window's last token, so that label teaches a token the model cannot "
                f"see coming.{wrap_note} Set the last label of every row to ignore_index ({s.ignore_index}). "
                "(A last label equal to the next record's first token is accepted as a continued stream.)",
                level=Level.warning, rows=last.count, wrapsAround=wraps, continued=st["continued"]))
        empty = state.hits.get("nothing-trained")
        if empty:
            out.append(self.finding(
                state, "nothing-trained",
                f"{empty.count:,} of {st['rows']:,} rows have every label equal to ignore_index ({s.ignore_index}): "
                "they cost a forward pass and teach nothing, and a per-row mean loss over them is 0/0 (NaN). "
                "Drop these rows, or check the masking step that ignored all of their labels.",
                level=Level.warning, rows=empty.count))
        return out

    def _convention(self, state) -> str:
        name = CONVENTION_NAME[state.expected]
        if state.source == "assumed":
            return (f"(labels is not set and could not be inferred from the data, so '{name}' is assumed; set "
                    "labels = 'shifted' or 'aligned')")
        if state.source == "inferred":
            return f"(labels = '{name}', inferred from the shard's first rows)"
        return f"(labels = '{name}')"

    @staticmethod
    def _fix(expected: int) -> str:
        if expected == 1:
            return ("Write labels[t] = input_ids[t+1] with the last label = ignore_index, shifting once: in "
                    "preprocessing or in the model or collator, not both.")
        return "Write labels = input_ids and let the model or loss do the one shift."

    def _mixed_in_shard(self, state, convention) -> list[Finding]:
        aligned, shifted = state.hits.get(shift_kind(0)), state.hits.get(shift_kind(1))
        if not aligned or not shifted:
            return []
        steady = sum(h.count for kind, h in state.hits.items() if kind.startswith("shift"))
        if min(aligned.count, shifted.count) < self.opts["mixed_share"] * steady:
            return []
        if aligned.count != shifted.count:
            minority = 0 if aligned.count < shifted.count else 1
        else:
            minority = 1 - state.expected
        hits = aligned if minority == 0 else shifted
        message = (f"the shard mixes both label conventions: {shifted.count:,} rows are shifted (shift 1) and "
                   f"{aligned.count:,} rows are aligned (shift 0), out of {steady:,} rows with a clear shift — "
                   "rows from two preprocessing paths were written into one shard, and one trainer convention "
                   f"is wrong for one group whatever you choose {convention}. Listed: the "
                   f"{CONVENTION_NAME[minority]} rows (offset = first label breaking shift {1 - minority}); "
                   "re-run them through the same preprocessing as the rest.")
        return [Finding.from_hits(self.id, self.level, message, state.uri, hits, kind="mixed-in-shard",
                                  rowsShifted=shifted.count, rowsAligned=aligned.count, minorityShift=minority,
                                  expectedShift=state.expected, share=round(share(hits.count, steady), 6))]

    def _value_findings(self, state) -> list[Finding]:
        s, st = state.settings, state.stats
        out = []
        negative = state.hits.get("negative-label")
        if negative:
            values = state.negative_values
            common = max(values, key=values.get)
            out.append(self.finding(
                state, "negative-label",
                f"ignored positions are marked with {common} instead of ignore_index {s.ignore_index}: "
                f"{st['negative_positions']:,} negative labels in {negative.count:,} rows (values: "
                f"{', '.join(str(v) for v in sorted(values))}). The loss does not ignore them: it trains on them "
                f"or fails with a target out of range. Mark ignored labels with {s.ignore_index}, or set "
                f"ignore_index = {common} if your loss really ignores {common}.",
                value=common, values=sorted(values), positions=st["negative_positions"],
                ignoreIndex=s.ignore_index, rows=negative.count))
        beyond = state.hits.get("label-out-of-vocab")
        if beyond:
            out.append(self.finding(
                state, "label-out-of-vocab",
                f"{st['out_of_vocab_positions']:,} labels in {beyond.count:,} rows are >= vocab_size "
                f"{s.vocab_size} (largest {state.max_label}): no output logit exists for them, so the loss fails "
                "or trains on a marker value. Rebuild labels with the tokenizer that wrote input_ids, mark "
                f"ignored labels with {s.ignore_index}, or correct vocab_size.",
                positions=st["out_of_vocab_positions"], maxLabel=state.max_label, vocabSize=s.vocab_size,
                rows=beyond.count))
        pad = state.hits.get("pad-label")
        if pad:
            inferred = " (pad_id inferred)" if s.source("pad_id") == "inferred" else ""
            out.append(self.finding(
                state, "pad-label",
                f"ignored positions are marked with the pad id {s.pad_id}{inferred} instead of ignore_index "
                f"{s.ignore_index}: {st['pad_label_positions']:,} padding positions in {pad.count:,} rows carry "
                f"label {s.pad_id}, so the loss will train on them and teach the model to emit padding. Set "
                f"labels at padding to {s.ignore_index}. (padding-loss, when it runs, reports the same rows as "
                "trained padding: one fix for both.)",
                padId=s.pad_id, positions=st["pad_label_positions"], ignoreIndex=s.ignore_index, rows=pad.count))
        return out

    # -- across shards ------------------------------------------------------------------------------------
    def corpus(self, states):
        findings = []
        dominant = {}  # index of state -> (shift, rows with it)
        rows_by_shift: dict[int, int] = {}
        for i, st in enumerate(states):
            counts = {k: st.hits[shift_kind(k)].count for k in SHIFTS if st.hits.get(shift_kind(k))}
            for k, n in counts.items():
                rows_by_shift[k] = rows_by_shift.get(k, 0) + n
            if counts:
                top = max(counts.values())
                dominant[i] = min((k for k, n in counts.items() if n == top),
                                  key=lambda k: (k != st.expected, PREFERENCE.index(k)))
        # A shard whose rows mostly break its own expected convention is reported on its own (shift+k); the
        # comparison across shards is between conventions that shards follow consistently.
        consistent = {i: k for i, k in dominant.items() if k == states[i].expected}
        if len(set(consistent.values())) > 1:
            findings.append(self._mixed_across(states, consistent))
        positions = sum(st.stats["positions"] for st in states)
        starts = sum(st.stats["document_starts"] for st in states)
        figures = {"positions": positions, "trainedFraction": round(share(
            sum(st.stats["trained"] for st in states), positions), 6)}
        if starts:
            figures["documentStarts"] = starts
            figures["crossDocumentFraction"] = round(share(
                sum(st.stats["cross_document"] for st in states), starts), 6)
            figures["documentStartsFrom"] = ", ".join(sorted({st.basis for st in states if st.basis}))
        metrics = {"labelSupervision": figures} if states else {}
        if rows_by_shift:
            metrics["labelShiftRows"] = {f"{k:+d}": n for k, n in sorted(rows_by_shift.items())}
        return CorpusResult(findings, metrics)

    def _mixed_across(self, states, dominant) -> Finding:
        rows_per = {}
        shards_per = {}
        for i, k in dominant.items():
            rows_per[k] = rows_per.get(k, 0) + states[i].hits[shift_kind(k)].count
            shards_per[k] = shards_per.get(k, 0) + 1
        given = {st.expected for st in states if st.source == "given"}
        majority = max(rows_per, key=lambda k: (rows_per[k], k in given, -PREFERENCE.index(k)))
        odd = [i for i, k in dominant.items() if k != majority]
        cap = states[0].cap
        kept = odd[:cap]
        groups = "; ".join(f"{shards_per[k]:,} shard(s) mostly shift {k} ({rows_per[k]:,} rows)"
                           for k in sorted(shards_per, key=PREFERENCE.index))
        # The shards that differ from the majority follow a convention given for them (per path): as configured.
        declared = all(states[i].source == "given" for i in odd)
        if declared:
            level = Level.note
            message = (f"shards follow different label conventions, as configured per path: {groups}. Train each "
                       "group with the convention it was checked against; one trainer setting for all of them "
                       f"trains the {len(odd):,} listed shard(s) (row = first row with the shard's own shift) on "
                       "the wrong target.")
        else:
            level = self.level
            inferred = any(states[i].source == "inferred" for i in odd)
            why = (" Each shard's convention was inferred on its own, so each looked consistent by itself."
                   if inferred else "")
            message = (f"shards disagree on the label shift: {groups}. The corpus majority is shift {majority}; "
                       f"the {len(odd):,} listed shard(s) (row = first row with the shard's own shift) would train "
                       f"on the wrong target under the majority's convention.{why} Re-run them through the same "
                       "preprocessing as the rest, and set `labels` in the config so every shard is checked "
                       "against one convention (or per path, if the groups are trained separately).")
        return Finding(
            rule_id=self.id, level=level, message=message, uri=None, kind="mixed-across-shards",
            count=len(odd), rows=np.array([states[i].hits[shift_kind(dominant[i])].rows[0] for i in kept],
                                          dtype=np.int64),
            offsets=np.full(len(kept), -1, dtype=np.int64), instance_uris=[states[i].uri for i in kept],
            truncated=len(odd) > len(kept),
            evidence={"majorityShift": majority, "shardsByShift": {f"{k:+d}": n for k, n in shards_per.items()},
                      "rowsByShift": {f"{k:+d}": n for k, n in rows_per.items()}})


RULES = [LabelAlignment]
