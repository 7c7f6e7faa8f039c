"""Document lengths against the context window, and what the shard's layout spends its token budget on.

Both rules read the shard's documents the same way (:mod:`corpuscle.kernels.documents`: position restarts, separators, one
document per row, or raw text counted with a tokenizer or in UTF-8 bytes) and keep their lengths as a histogram,
so a shard's state stays small however many documents it holds.
"""
from __future__ import annotations

import copy

import numpy as np
from corpuscle.findings import Finding, Level
from corpuscle.io.batch import is_integer_list, is_text
from corpuscle.kernels.documents import (
    ONE_PER_ROW,
    QUANTILE_METHOD,
    QUANTILES,
    TEXT,
    DocumentTally,
    LengthHistogram,
    documents_of,
    infer_arrangement,
    stitch_shards,
    stitched_lengths,
    undecided,
)
from corpuscle.kernels.histogram import histogram, log_edges
from corpuscle.kernels.packing import AsBuilt, compare_layouts, savings
from corpuscle.kernels.tokens import inferred_note
from corpuscle.rules.api import CorpusResult, Rule, Unmergeable, consistent, pct, share

#: Names of the three layouts in reports (camelCase keys) and in messages.
LAYOUT_KEYS = {"one_per_window": "oneDocumentPerWindow", "concat_chunk": "concatenateAndChunk",
               "best_fit_decreasing": "bestFitDecreasing"}
LAYOUT_WORDS = {"one_per_window": "one document per window", "concat_chunk": "concatenate-and-chunk",
                "best_fit_decreasing": "best-fit decreasing"}


def _tokenized(batch, settings) -> bool:
    return batch.has(settings.tokens_column) and is_integer_list(batch.type_of(settings.tokens_column))


def _textual(batch, settings) -> bool:
    return batch.has(settings.text_column) and is_text(batch.type_of(settings.text_column))


def length_summary(lengths: LengthHistogram) -> dict:
    """Documents, mean, quantiles and max of a length histogram, as plain numbers for reports."""
    n = lengths.documents
    out = {"documents": n, "mean": round(lengths.tokens / n, 2) if n else 0.0}
    out.update(lengths.quantiles())
    out["max"] = lengths.max
    return out


class _DocumentRule(Rule):
    """Shared by the length rules: feeds every batch's documents to a :class:`~corpuscle.kernels.documents.DocumentTally`.

    A large shard may be scanned in parts: a part that continues an earlier one holds its first rows aside (they
    finish the document the earlier part left open), a part that others follow keeps its last document open, and
    ``merge`` stitches the two into one document.  Every part reads the documents as arranged in the shard's first
    batch (``infer``); should two parts still differ, they cannot be joined exactly and the shard is scanned whole
    for the rule."""

    splittable = True

    def missing(self, batch, settings):
        if _tokenized(batch, settings):
            why = undecided(batch, settings)
            if why:
                return f"how documents sit in the rows could not be decided ({why}): give --eos-id (or --bos-id " \
                       "with --separator bos-before), or the position_ids or document-length columns"
            return None
        if _textual(batch, settings):
            return None
        return f"no {settings.tokens_column!r} token column and no {settings.text_column!r} text column"

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.arrangement = None
        state.why = ""
        state.tally = DocumentTally(settings.seq_len, **self._callbacks(state))
        return state

    def _callbacks(self, state) -> dict:
        return {}

    def feed(self, state, batch):
        s = state.settings
        if not len(batch):
            return
        if state.arrangement is None:
            state.arrangement, state.why = state.inferred or infer_arrangement(batch, s)
            self._lead(state)
        if state.arrangement != TEXT:
            if not _tokenized(batch, s):
                return
            batch = consistent(batch, [s.tokens_column, s.mask_column, s.positions_column])
        elif not _textual(batch, s):
            return
        state.tally.add(documents_of(batch, s, state.arrangement))

    def infer(self, batch, settings):
        """How documents sit in the shard's rows, from its first batch (see :func:`corpuscle.kernels.documents.infer_arrangement`):
        every part of a split shard reads its documents the same way."""
        return infer_arrangement(batch, settings) if len(batch) else None

    @staticmethod
    def _lead(state) -> None:
        """In a part that continues an earlier one, hold the first rows aside (before the first batch)."""
        if state.continued and state.tally.lead is None and not state.tally.rows:
            state.tally.expect_lead()

    def end(self, state):
        self._lead(state)  # also a part none of whose batches reached the rule
        if state.continues:
            state.tally.pause()
        else:
            state.tally.close()
        return state

    def merge(self, first, second):
        if first.arrangement and second.arrangement and first.arrangement != second.arrangement:
            raise Unmergeable(f"{self.id}: the parts look {first.arrangement} and {second.arrangement}")
        first = copy.copy(first)
        first.hits = copy.deepcopy(first.hits)
        tally = first.tally.joined(second.tally, **self._callbacks(first))  # the stitched document's hits
        merged = super().merge(first, second)
        merged.tally = tally
        merged.arrangement, merged.why = (first.arrangement, first.why) if first.arrangement else \
            (second.arrangement, second.why)
        return merged


class OverlongDocument(_DocumentRule):
    """Documents longer than the context window (``seq_len``) never reach the model whole. A pipeline either
    cuts them at the window, losing every token past it, or splits them, so that each continuation window starts
    mid-document without the context its tokens depend on; either way, the longer the document, the less of it is
    learned as written. Checks every document's length in tokens against ``seq_len``: documents joined across rows
    by their position_ids or separators, one document per row, or raw text counted with ``--tokenizer``
    (raw text counted in UTF-8 bytes cannot be compared with a window of tokens; the rule is skipped with a note).
    In rows that hold their window full, end without eos and are followed by a row that begins a new document (one
    document per row, or a bos or position restart at the next row's start), the document was cut at the window:
    those are reported separately, with the row where each cut document starts; in a packed stream a row start
    that nothing marks continues the document, which is then longer than the window, not cut. Consecutive shards
    of one packed stream are read like consecutive rows: documents longer than the window only when the end of one
    shard and the start of the next are joined are reported across shards (kind across-shards). Each instance
    is the start of an offending document (row, token offset; character offset 0 for raw text). Length quantiles
    use linear interpolation between the closest ranks (numpy.percentile's default)."""

    id = "overlong-document"
    level = Level.warning
    summary = "Documents longer than the context window (cut or split); rows cut at the window."
    kinds = {
        "longer-than-window": "documents longer than the context window",
        "cut": "documents cut at the window and not continued",
        "across-shards": "documents that run from one shard into the next and are longer than the window together",
    }
    help = ("Split long documents at natural boundaries (sections, paragraphs) before tokenizing, so that each "
            "piece fits the window; or pack them into full windows plus a remainder (best-fit decreasing) instead "
            "of cutting them; or train with a longer seq_len if the model supports it. For cut rows, rebuild the "
            "shard from the source documents without truncating at the window, or give every continuation its own "
            "row that follows the first.")

    def missing(self, batch, settings):
        reason = super().missing(batch, settings)
        if reason:
            return reason
        if not _tokenized(batch, settings) and settings.tokenizer is None:
            return ("text lengths are UTF-8 bytes, which cannot be compared with a window of tokens: give "
                    "--tokenizer FILE (and --seq-len N) to count tokens")
        if settings.seq_len is None:
            return "seq_len is not set and could not be inferred (give --seq-len)"
        return None

    def corpus(self, states):
        """Documents of a packed stream that run from one shard into the next and are longer than the window only
        together (each piece was measured in its own shard)."""
        tallies = [st.tally for st in states]
        over = []
        for st in stitch_shards(tallies):
            seq_len = tallies[st.before].seq_len
            pieces = [st.pieces[0], st.pieces[1]] + [tallies[k].opening[0] for k in range(st.before + 1, st.after)]
            if seq_len is not None and st.length > seq_len and max(pieces) <= seq_len:
                over.append(st)
        if not over:
            return CorpusResult([], {})
        seq_len = tallies[over[0].before].seq_len
        n = len(over)
        message = (f"{n:,} documents run from the end of one shard into the start of the next (no eos and no "
                   f"padding ends the first shard's last document, and the next shard's first tokens start no "
                   f"document) and are longer than the {seq_len:,}-token window together, though each piece fits "
                   f"(longest {max(st.length for st in over):,} tokens; location = where each starts). Each "
                   f"continuation window starts mid-document without its context; if the shards are not one "
                   f"stream, end every shard's last document with eos.")
        finding = Finding(rule_id=self.id, level=self.level, message=message, uri=None, kind="across-shards",
                          count=n, rows=np.asarray([st.row for st in over], dtype=np.int64),
                          offsets=np.asarray([st.offset for st in over], dtype=np.int64),
                          instance_uris=[states[st.before].uri for st in over],
                          evidence={"documents": n, "seqLen": seq_len,
                                    "lengths": [st.length for st in over][:100]})
        return CorpusResult([finding], {})

    def _callbacks(self, state):
        return {"on_overlong": lambda rows, offs: state.hit_at("longer-than-window", rows, offs),
                "on_cut": lambda rows, offs: state.hit_at("cut", rows, offs)}

    def report(self, state):
        s, t, out = state.settings, state.tally, []
        lengths = t.lengths
        documents, tokens = lengths.documents, lengths.tokens
        summary = length_summary(lengths)
        figures = ", ".join(f"{k} {summary[k]:,.6g}" for k in [f"p{p}" for p in QUANTILES] + ["max"])
        common = dict(documents=documents, documentTokens=tokens, seqLen=s.seq_len, unit=t.unit,
                      lengthQuantiles={k: summary[k] for k in summary if k.startswith("p") or k == "max"},
                      quantileMethod=QUANTILE_METHOD, arrangement=state.arrangement, arrangementWhy=state.why)
        if state.hits.get("longer-than-window"):
            n = t.overlong
            if state.arrangement == TEXT:
                fate = ("A training job cuts them at the window (the tokens past it are lost) or splits them "
                        "(each continuation window starts mid-document, without its context)")
            elif state.arrangement == ONE_PER_ROW:
                fate = ("These rows are longer than the window: the loader cuts them (the tokens past the window "
                        "are lost) or splits them (the continuation starts mid-document, without its context)")
            else:
                fate = ("They are split over several windows: each continuation window starts mid-document, "
                        "without the context its tokens depend on")
            out.append(self.finding(
                state, "longer-than-window",
                f"{n:,} of {documents:,} documents ({pct(n, documents)}) are longer than the {s.seq_len:,}-token "
                f"window; they hold {pct(t.overlong_tokens, tokens)} of the {tokens:,} document tokens, "
                f"{t.beyond_window:,} of them past the first window. {fate}. Document lengths ({t.unit}): "
                f"{figures}. Split long documents at natural boundaries before tokenizing, or train with a longer "
                f"window." + inferred_note(s, ("seq_len", "eos_id", "bos_id", "pad_id")),
                overlong=n, documentShare=share(n, documents), tokenShare=share(t.overlong_tokens, tokens),
                overlongTokens=t.overlong_tokens, tokensBeyondWindow=t.beyond_window, **common))
        if state.hits.get("cut"):
            n = t.cut
            shows = ("each row holds one document" if state.arrangement == ONE_PER_ROW
                     else "the next row begins a new document")
            out.append(self.finding(
                state, "cut",
                f"{n:,} of {documents:,} documents ({pct(n, documents)}) fill their {s.seq_len:,}-token window and "
                f"end without eos (id {s.eos_id}), and {shows}: they were cut at the window, and the rest of each "
                f"(at least {n:,} tokens in all, a lower bound) is not in the shard; if the pipeline put the rest "
                f"in another row, that row starts mid-document without its context. Rebuild the shard without "
                f"truncating documents at the window (split them at natural boundaries, or pack them)."
                + inferred_note(s, ("eos_id", "seq_len", "pad_id")),
                cut=n, documentShare=share(n, documents), **common))
        return out


class TruncationWaste(_DocumentRule):
    """Every window a training job reads costs the same compute, whether it holds document tokens or padding;
    tokens cut off at the window are never trained on at all. Counts the shard's token budget as built — slots
    (every position of every row), real tokens, padding, and tokens lost to truncation where the shard shows them
    (at least one per document cut at its window) — and, from the lengths of its documents, what three layouts
    would make of the same documents at the same seq_len: one document per window (cut and padded),
    concatenate-and-chunk (no padding but one partial window, documents split at window edges) and best-fit
    decreasing packing (documents kept whole up to the window, little padding). Warns when more than
    ``max_waste`` of the slots are padding or truncation. The corpus figures (``tokenBudget`` in the report's
    metrics) add the layouts up over all shards with the same seq_len, and the lengths of all documents
    (``documentTokens``, or ``documentBytes`` for raw text counted without a tokenizer)."""

    id = "truncation-waste"
    level = Level.warning
    summary = "Share of the token budget lost to padding and truncation; what packing would save."
    kinds = {
        "budget": "the share of the token budget lost to padding and truncation",
    }
    help = ("Pack documents instead of padding each to the window: best-fit decreasing keeps documents whole and "
            "wastes little; concatenate-and-chunk wastes least but splits documents at window edges (use "
            "position_ids that restart per document and a document-aware attention mask). Do not truncate "
            "documents at the window: split long ones into window-sized pieces. Option max_waste (default 0.10): "
            "the share of slots spent on padding and truncation above which the rule warns.")
    options = {"max_waste": 0.10}

    def __init__(self, **options):
        super().__init__(**options)
        value = self.opts["max_waste"]
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 <= value <= 1:
            raise ValueError(f"rule {self.id}: max_waste must be a share between 0 and 1, got {value!r} "
                             "(hint: 0.1 warns when more than 10% of the slots are padding or truncation)")

    def report(self, state):
        s, t = state.settings, state.tally
        if t.unit != "tokens" or state.arrangement == TEXT or not t.slots:
            return []
        if share(t.slots - t.real_tokens + t.cut, t.slots) <= self.opts["max_waste"]:
            return []  # (the layouts, the costly part, are computed only for a finding)
        budget = shard_budget(t, s.seq_len)
        built = budget["asBuilt"]
        n = t.padded_rows + t.cut
        message = (f"{'at least ' if t.cut else ''}{pct(built['padding'] + built['truncated'], built['slots'])} "
                   f"of this shard's "
                   f"{built['slots']:,} token slots ({t.rows:,} rows) train on nothing (max_waste "
                   f"{self.opts['max_waste']:.0%}): {built['padding']:,} slots of padding "
                   f"({pct(built['padding'], built['slots'])}, in {t.padded_rows:,} rows)")
        if t.cut:
            message += (f" and at least {built['truncated']:,} tokens lost to truncation ({t.cut:,} documents cut "
                        f"at the window; the tokens past it are not in the shard, so this is a lower bound)")
        message += "."
        layouts = budget.get("layouts")
        if layouts:
            parts = []
            for name, key in LAYOUT_KEYS.items():
                lay = layouts[key]
                parts.append(f"{LAYOUT_WORDS[name]} {lay['windows']:,} windows (padding "
                             f"{lay['paddingPct']:.1f}%, dropped {lay['droppedPct']:.1f}%, saves "
                             f"{lay['slotsSavedPct']:.1f}% of the slots)")
            best = layouts["bestFitDecreasing"]
            message += (f" The same {budget['documents']:,} documents at seq_len {s.seq_len:,}: "
                        + "; ".join(parts) + f"; no layout needs fewer than {budget['lowerBound']:,} windows. "
                        f"Pack the documents (best-fit decreasing saves {best['slotsSavedPct']:.1f}% of the slots "
                        f"and keeps documents whole up to the window).")
        else:
            message += " Give --seq-len to see what packing would save. Pack documents instead of padding them."
        if t.cut:
            message += " Do not truncate documents at the window."
        message += inferred_note(s, ("pad_id", "seq_len", "eos_id"))
        return [Finding(rule_id=self.id, level=self.level, message=message, uri=state.uri, kind="budget",
                        count=n, evidence=budget)]

    def corpus(self, states):
        metrics: dict = {}
        by_unit: dict[str, list] = {}
        tallies = [st.tally for st in states]
        stitched = stitch_shards(tallies)  # documents of a packed stream that run from one shard into the next
        for i, st in enumerate(states):
            if st.tally.unit:
                by_unit.setdefault(st.tally.unit, []).append(i)
        for unit, key in (("tokens", "documentTokens"), ("bytes", "documentBytes")):
            if unit in by_unit:
                metrics[key] = {"unit": unit, **length_summary(stitched_lengths(tallies, stitched, by_unit[unit]))}
                if unit == "tokens" and stitched:
                    metrics[key]["documentsAcrossShards"] = len(stitched)
        histograms = {unit: length_histogram(states, by_unit[unit], unit, stitched)
                      for unit in ("tokens", "bytes") if unit in by_unit}
        if histograms:
            metrics["documentLengthHistogram"] = histograms
        token_states = [st for st in states
                        if st.tally.unit == "tokens" and st.arrangement != TEXT and st.tally.slots]
        if token_states:
            metrics["tokenBudget"] = corpus_budget([st.tally for st in token_states],
                                                   [st.settings.seq_len for st in token_states], stitched=True)
        return CorpusResult([], metrics)


def length_histogram(all_states, members: list[int], unit: str, stitched=()) -> dict:
    """The document lengths of the states at ``members`` (one unit) on log-spaced bins
    (:mod:`corpuscle.kernels.histogram`; bin i holds ``edges[i] <= length < edges[i + 1]``), with ``seq_len + 1`` an
    edge for every window in force, and, for tokens, how many documents are longer than their shard's window: what
    the report plots. Documents that run from one shard into the next (``stitched``) count once, whole, as in the
    corpus figures."""
    states = [all_states[i] for i in members]
    inside = [st for st in stitched if st.before in members and st.after in members]
    pieces = [[*st.pieces, *(all_states[k].tally.opening[0] for k in range(st.before + 1, st.after))]
              for st in inside]
    windows = sorted({st.settings.seq_len for st in states if st.settings.seq_len is not None})
    marks = [w + 1 for w in windows] if unit == "tokens" else []
    longest = max([st.tally.lengths.max for st in states] + [st.length for st in inside])
    edges = log_edges(longest, per_octave=2, marks=marks)
    # Binned shard by shard and added up: no merge of the shards' histograms (slow for many shards); the pieces of
    # a stitched document leave their bins and the whole document enters its own.
    counts = sum((histogram(st.tally.lengths.sizes, st.tally.lengths.counts, edges) for st in states),
                 np.zeros(len(edges) - 1, dtype=np.int64))
    if inside:
        split = np.sort(np.asarray([n for chain in pieces for n in chain], dtype=np.int64))
        whole = np.sort(np.asarray([st.length for st in inside], dtype=np.int64))
        counts = counts - histogram(split, np.ones(split.size, np.int64), edges)
        counts = counts + histogram(whole, np.ones(whole.size, np.int64), edges)
    documents = int(counts.sum())
    out = {"unit": unit, "documents": documents, "edges": edges.tolist(), "counts": counts.tolist()}
    if marks:
        out["seqLen"] = windows
        beyond = sum(int(st.tally.lengths.counts[st.tally.lengths.sizes > st.settings.seq_len].sum())
                     for st in states if st.settings.seq_len is not None)
        for st, chain in zip(inside, pieces):
            seq_len = all_states[st.before].settings.seq_len
            if seq_len is not None:
                beyond += int(st.length > seq_len) - sum(int(n > seq_len) for n in chain)
        out["longerThanWindow"] = beyond
        out["longerThanWindowFraction"] = share(beyond, documents)
    return out


# -- token budget figures ----------------------------------------------------------------------------------------

def _as_built(slots: int, real: int, truncated: int, rows: int) -> dict:
    padding = slots - real
    return {"windows": rows, "slots": slots, "realTokens": real, "padding": padding, "truncated": truncated,
            "truncatedIsLowerBound": True, "paddingPct": 100.0 * share(padding, slots),
            # a share of a lower bound would read like a measurement: given only when nothing was cut
            "truncatedPct": None if truncated else 0.0,
            "wastedFraction": share(padding + truncated, slots)}


def _layout_figures(layouts, built: AsBuilt) -> dict:
    saved = savings(built, layouts)
    out = {}
    for layout in layouts:
        out[LAYOUT_KEYS[layout.name]] = {
            "name": LAYOUT_WORDS[layout.name], "windows": layout.windows, "slots": layout.slots, "padding": layout.padding, "dropped": layout.dropped,
            "paddingPct": layout.padding_pct, "droppedPct": layout.dropped_pct,
            "slotsSavedPct": saved[layout.name].slots_saved_pct,
            "tokensRecovered": saved[layout.name].tokens_recovered,
        }
    return out


def shard_budget(tally: DocumentTally, seq_len: int | None) -> dict:
    """The token budget of one shard as built and, when ``seq_len`` is known, under the three layouts."""
    built = _as_built(tally.slots, tally.real_tokens, tally.cut, tally.rows)
    out = {"unit": "tokens", "seqLen": seq_len, "documents": tally.lengths.documents,
           "documentTokens": tally.lengths.tokens, "asBuilt": built,
           "realTokenFraction": share(tally.real_tokens, tally.slots),
           "padTokenFraction": share(tally.slots - tally.real_tokens, tally.slots),
           "truncatedTokenFraction": share(tally.cut, tally.real_tokens + tally.cut)}
    if seq_len is not None:
        layouts = compare_layouts(tally.lengths.sizes, seq_len, tally.lengths.counts)
        out["layouts"] = _layout_figures(
            layouts, AsBuilt(tally.slots, tally.real_tokens, tally.slots - tally.real_tokens, tally.cut))
        out["lowerBound"] = layouts.lower_bound
    return out


def corpus_budget(tallies: list[DocumentTally], seq_lens: list[int | None], stitched: bool = False) -> dict:
    """The token budget over many shards: as built, summed; the layouts of all documents packed together, per
    seq_len (shards with different windows are packed separately and the windows added up).  With ``stitched``,
    documents that run from one of the (consecutive) shards into the next count once, whole."""
    joined = stitch_shards(tallies) if stitched else []
    slots = sum(t.slots for t in tallies)
    real = sum(t.real_tokens for t in tallies)
    truncated = sum(t.cut for t in tallies)
    rows = sum(t.rows for t in tallies)
    merged = stitched_lengths(tallies, joined)
    known = sorted({s for s in seq_lens if s is not None})
    out = {"unit": "tokens", "seqLen": known[0] if len(known) == 1 else known, "shards": len(tallies),
           "documents": merged.documents, "documentTokens": merged.tokens,
           "asBuilt": _as_built(slots, real, truncated, rows),
           "realTokenFraction": share(real, slots), "padTokenFraction": share(slots - real, slots),
           "truncatedTokenFraction": share(truncated, real + truncated)}
    # The layouts cover the shards whose seq_len is known; as built is compared over the same shards.
    with_window = [(t, s) for t, s in zip(tallies, seq_lens) if s is not None]
    if not with_window:
        return out
    totals = {key: {"name": LAYOUT_WORDS[name], **dict.fromkeys(("windows", "slots", "padding", "dropped"), 0)}
              for name, key in LAYOUT_KEYS.items()}
    lower = 0
    for seq_len in known:
        group = stitched_lengths(tallies, joined, [i for i, s in enumerate(seq_lens) if s == seq_len])
        layouts = compare_layouts(group.sizes, seq_len, group.counts)
        lower += layouts.lower_bound
        for layout in layouts:
            entry = totals[LAYOUT_KEYS[layout.name]]
            for field in ("windows", "slots", "padding", "dropped"):
                entry[field] += getattr(layout, field)
    b_slots = sum(t.slots for t, _ in with_window)
    b_truncated = sum(t.cut for t, _ in with_window)
    document_tokens = sum(t.lengths.tokens for t, _ in with_window)
    for entry in totals.values():
        entry["paddingPct"] = 100.0 * share(entry["padding"], entry["slots"])
        entry["droppedPct"] = 100.0 * share(entry["dropped"], document_tokens)
        entry["slotsSavedPct"] = 100.0 * share(b_slots - entry["slots"], b_slots)
        entry["tokensRecovered"] = b_truncated - entry["dropped"]
    out["layouts"] = totals
    out["lowerBound"] = lower
    return out


RULES = [OverlongDocument, TruncationWaste]
