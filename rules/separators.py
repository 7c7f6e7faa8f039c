"""Document separators: every document in a packed stream must be marked off from the next one.

A training shard marks where one document ends and the next begins with a separator token: ``eos`` after each
document (``separator = "eos-after"``, the default), ``bos`` before each (``"bos-before"``), or both.
"""
from __future__ import annotations

import numpy as np
from corpuscle.findings import Finding, Level
from corpuscle.kernels.documents import length_column, length_column_problems
from corpuscle.kernels.tokens import (
    inferred_note,
    missing_ids,
    padding_free,
    parallel_columns,
    position_restarts,
    real_per_row,
    real_ranks,
    real_token_positions,
)
from corpuscle.rules.api import Rule, consistent, pct, share

#: The special-token settings each separator convention depends on.
SEPARATOR_IDS = {"eos-after": ("eos_id",), "bos-before": ("bos_id",), "both": ("eos_id", "bos_id")}

#: Default of ``tokens_per_separator``: a shard of packed windows with fewer separators than one per this many
#: tokens is reported as glued together (heuristic; documents of a web or book corpus are far shorter).
TOKENS_PER_SEPARATOR = 100_000

#: A shard is taken as packed windows (and checked for glued documents) when at most this share of its rows, or
#: one row, is padded: a packer pads only its last window, a shard of one padded document per row pads most rows.
PACKED_PADDED_SHARE = 0.01


# -- the rule -------------------------------------------------------------------------------------------------

class MissingSeparator(Rule):
    """Documents packed into a window must be separated, or the model learns to continue one document with the
    next and never learns where a document ends (and, at inference, never stops). Five checks, under the shard's
    separator convention (eos-after, bos-before or both).

    (1) Boundaries: with position_ids, every document start after the first in a row (position_ids restart at 0
    inside the row) must follow an eos (eos-after), begin with a bos (bos-before), or both; each boundary
    without it is an instance, offset = the document's first token.

    (2) Padded rows (attention_mask zeros, or a trailing run of pad_id): under eos-after and both, the last real
    token must be eos, since nothing follows the document; offset = the last real token.

    (3) Glued documents (a heuristic, reported as such): in a shard of packed windows without any position
    restart, the full rows of exactly seq_len tokens must hold at least one separator per tokens_per_separator
    tokens; instances = the windows without any separator. A shard counts as packed when at most one row, or 1%
    of its rows, is padded (a packer pads only its last window; a shard that pads most rows holds one document
    per row, whose ends check 2 covers).

    (4) Doubled separators: eos eos or bos bos next to each other among real tokens (a tokenizer and a template
    both adding one); offset = the second. When pad_id equals eos_id, trailing eos padding is padding, not a
    doubled separator (the attention mask decides when present).

    (5) Document-length columns (``doc_lengths``: the lengths of the documents packed in each row;
    ``cu_seqlens``: their cumulative offsets, from 0 to the row's real length), when present: each row's lengths
    must be non-negative (offsets monotonic, starting at 0) and add up to the row's real tokens
    (``lengths-mismatch``, offset = where the first disagreement is), and every document start they give inside a
    row must be marked by the separator (``lengths-vs-separators``, offset = the start).

    Needs eos_id (eos-after), bos_id (bos-before) or both (both), given or inferred; otherwise the shard is
    skipped with a note. A known bos_id is also checked for doubling under eos-after.
    """

    id = "missing-separator"
    level = Level.error
    summary = ("Document boundaries without the separator; shards with no separators at all; doubled separators; "
               "document-length columns that contradict the row or its separators.")
    kinds = {
        "boundary-no-eos": "document starts inside a row not preceded by eos",
        "boundary-no-bos": "document starts inside a row that do not begin with bos",
        "unterminated-row": "padded rows whose last real token is not eos",
        "no-eos": "packed windows with no eos at all",
        "no-bos": "packed windows with no bos at all",
        "doubled-eos": "eos directly followed by another eos",
        "doubled-bos": "bos directly followed by another bos",
        "lengths-mismatch": "rows whose document-length column does not describe the row (negative, not "
                            "monotonic, or not adding up to the row's real length)",
        "lengths-vs-separators": "document starts given by the document-length column that the separator does "
                                 "not mark",
    }
    help = ("Append eos after every document (or prepend bos, per your convention) before packing, exactly once: "
            "check that the tokenizer's add_eos/add_bos setting and the packing step agree, so that neither both "
            "nor none of them add it. If the shard uses another convention, set separator = \"eos-after\", "
            "\"bos-before\" or \"both\". Option tokens_per_separator (default 100,000): a shard of packed windows "
            "with fewer separators than one per this many tokens is reported as glued (heuristic).")
    needs = {"tokens_column": "int-list"}
    options = {"tokens_per_separator": TOKENS_PER_SEPARATOR}
    splittable = True  # counters and hits within rows only: the default merge

    def __init__(self, **options):
        super().__init__(**options)
        n = self.opts["tokens_per_separator"]
        if isinstance(n, bool) or not isinstance(n, int) or n < 1:
            raise ValueError(f"rule {self.id}: tokens_per_separator must be a whole number >= 1, got {n!r} "
                             "(hint: 100000 reports a shard with fewer than one separator per 100,000 tokens)")

    def missing(self, batch, settings):
        return missing_ids(settings, SEPARATOR_IDS[settings.separator]) or super().missing(batch, settings)

    def feed(self, state, batch):
        s = state.settings
        batch = consistent(batch, parallel_columns(s))
        tokens = batch.flat(s.tokens_column)
        values = tokens.values
        free = padding_free(batch, tokens, s)
        want_eos = s.separator in ("eos-after", "both")
        want_bos = s.separator in ("bos-before", "both")
        real_count = real_per_row(batch, tokens, s)
        state.count(rows=tokens.lengths.size, tokens=int(real_count.sum()))
        eos_at = real_token_positions(batch, tokens, s, s.eos_id)  # real separators, as sorted flat indices
        bos_at = real_token_positions(batch, tokens, s, s.bos_id)
        state.count(eos=eos_at.size, bos=bos_at.size)

        # document boundaries marked by position_ids
        starts = position_restarts(batch, tokens, s)
        if starts is not None:
            state.count(boundaries=starts.size)
            if want_eos:
                bad = starts[values[starts - 1] != s.eos_id]
                rows, offsets = tokens.locate(bad)
                state.hit("boundary-no-eos", batch, rows, offsets)
            if want_bos:
                bad = starts[values[starts] != s.bos_id]
                rows, offsets = tokens.locate(bad)
                state.hit("boundary-no-bos", batch, rows, offsets)

        # padded rows: the last document ends before the row does, so it must end with eos
        padded = (real_count < tokens.lengths) & (real_count > 0)
        state.count(padded_rows=int(np.count_nonzero(padded)))
        if want_eos and not free:
            rows = np.flatnonzero(padded)
            if rows.size:  # the last real token of each padded row
                ranks = real_ranks(batch, tokens, s)
                last = ranks.select(ranks.rank(tokens.starts[rows]) + real_count[rows])
                bad = values[last] != s.eos_id
                rows, last = rows[bad], last[bad]
                state.hit("unterminated-row", batch, rows, last - tokens.offsets[rows])

        # packed windows (full rows of seq_len tokens): are there separators at all?
        if s.seq_len is not None:
            window = (tokens.lengths == s.seq_len) & (real_count == tokens.lengths)
            windows = int(np.count_nonzero(window))
            state.count(windows=windows, window_tokens=windows * s.seq_len)
            for name, at, wanted in (("eos", eos_at, want_eos), ("bos", bos_at, want_bos)):
                if wanted:
                    per_row = tokens.count_positions(at)
                    state.count(**{f"window_{name}": int(per_row[window].sum())})
                    state.hit(f"no-{name}", batch, np.flatnonzero(window & (per_row == 0)))

        # doubled separators among real tokens (offset = the second of the pair, which starts no row)
        doubled_bos = s.bos_id is not None and s.bos_id != s.eos_id
        for name, at, check in (("eos", eos_at, s.eos_id is not None), ("bos", bos_at, doubled_bos)):
            if check and not (s.separator == "both" and s.bos_id == s.eos_id):
                second = at[1:][np.diff(at) == 1]
                rows, offsets = tokens.locate(second)
                inside = offsets > 0
                state.hit(f"doubled-{name}", batch, rows[inside], offsets[inside])

        # a document-length column (doc_lengths / cu_seqlens) must describe the row and agree with the separators
        found = length_column(batch, s)
        if found is not None:
            state.length_column = found[1]
            problems = length_column_problems(batch, tokens, s)
            state.count(length_rows=tokens.lengths.size)
            for kind, (rows, offsets) in problems.items():
                state.hit(kind, batch, rows, offsets)

    def report(self, state):
        s, st, out = state.settings, state.stats, []
        ids = {"eos": s.eos_id, "bos": s.bos_id}
        fix = {"eos": "Append eos after every document before packing; check that the tokenizer's add_eos setting "
                      "and the packing step agree.",
               "bos": "Prepend bos to every document before packing; check that the tokenizer's add_bos setting "
                      "and the packing step agree."}
        hits = state.hits
        for name, verb in (("eos", "are not preceded by eos"), ("bos", "do not begin with bos")):
            kind = f"boundary-no-{name}"
            if hits.get(kind):
                n, total = hits[kind].count, st["boundaries"]
                out.append(self.finding(
                    state, kind,
                    f"{n:,} of {total:,} document boundaries ({pct(n, total)}) {verb} (id {ids[name]}) under "
                    f"separator = {s.separator}: one document runs into the next and the model never learns where "
                    f"a document ends. {fix[name]}" + inferred_note(s, (f"{name}_id", "pad_id")),
                    boundaries=int(total), missing=n, share=share(n, total), separator=s.separator,
                    separatorId=ids[name]))
        if hits.get("unterminated-row"):
            n, total = hits["unterminated-row"].count, st["padded_rows"]
            out.append(self.finding(
                state, "unterminated-row",
                f"{n:,} of {total:,} padded rows ({pct(n, total)}) end their last document without eos (id "
                f"{s.eos_id}) although the row is not full (offset = the last real token): the document stops, but "
                f"the model is never shown its end. {fix['eos']}" + inferred_note(s, ("eos_id", "pad_id")),
                paddedRows=int(total), missing=n, share=share(n, total), separator=s.separator, separatorId=s.eos_id))
        if not st["boundaries"] and st["padded_rows"] <= max(1, int(st["rows"] * PACKED_PADDED_SHARE)):
            out += self._glued(state, ids, fix)
        for name in ("eos", "bos"):
            kind = f"doubled-{name}"
            if hits.get(kind):
                n, total = hits[kind].count, st[name]
                out.append(self.finding(
                    state, kind,
                    f"{n:,} pairs of adjacent {name} tokens (id {ids[name]}; offset = the second of each pair; "
                    f"{pct(n, total)} of {total:,} real {name} tokens): usually the tokenizer and a template or "
                    f"the packing step both add it, which trains the model on empty documents. Let exactly one step "
                    f"add the separator." + inferred_note(s, (f"{name}_id", "pad_id")),
                    doubled=n, separatorCount=int(total), separatorId=ids[name]))
        column = getattr(state, "length_column", None) or "document-length"
        if hits.get("lengths-mismatch"):
            n, total = hits["lengths-mismatch"].count, st["length_rows"]
            out.append(self.finding(
                state, "lengths-mismatch",
                f"{n:,} of {total:,} rows ({pct(n, total)}) have a {column} column that does not describe the "
                f"row: a negative length, offsets that do not start at 0 or go down, or lengths that do not add up "
                f"to the row's real tokens (offset = where the first disagreement is). A variable-length attention "
                f"kernel given these lengths attends across documents or over padding. Write the column from the "
                f"same step that packs the tokens, after truncation.",
                rows=n, lengthRows=int(total), column=column))
        if hits.get("lengths-vs-separators"):
            n = hits["lengths-vs-separators"].count
            what = "not preceded by eos" if s.separator == "eos-after" else \
                "not a bos" if s.separator == "bos-before" else "not an eos followed by bos"
            sep_id = s.bos_id if s.separator == "bos-before" else s.eos_id
            out.append(self.finding(
                state, "lengths-vs-separators",
                f"{n:,} document starts that the {column} column gives inside rows are {what} (id {sep_id}) under "
                f"separator = {s.separator} (offset = the start): the lengths and the tokens disagree on where "
                f"documents meet, so one of them is off. Rebuild the column from the packed tokens, or fix the "
                f"separators." + inferred_note(s, ("eos_id", "bos_id", "pad_id")),
                boundaries=n, column=column, separator=s.separator, separatorId=sep_id))
        return out

    def _glued(self, state, ids, fix) -> list[Finding]:
        """Shards of packed windows with (almost) no separator: heuristic, reported as such."""
        s, st, out = state.settings, state.stats, []
        per = self.opts["tokens_per_separator"]
        tokens = st["window_tokens"]
        for name in ("eos", "bos"):
            kind = f"no-{name}"
            if kind not in state.hits or not tokens:
                continue
            seen = st[f"window_{name}"]
            if seen * per >= tokens:
                continue
            found = "no" if not seen else f"only {seen:,}"
            out.append(self.finding(
                state, kind,
                f"{found} {name} (id {ids[name]}) in {tokens:,} tokens of {st['windows']:,} packed windows of "
                f"{s.seq_len:,} tokens (heuristic: fewer than one per {per:,} tokens; {state.hits[kind].count:,} "
                f"windows hold none, listed): documents appear glued together with nothing to mark where one ends. "
                f"{fix[name]} If each row is instead one long document cut at seq_len, or the windows really hold "
                "single long documents, raise tokens_per_separator; if the shard marks documents with bos instead, "
                "give --separator bos-before (or both) and --bos-id." + inferred_note(s, (f"{name}_id",)),
                windows=int(st["windows"]), windowTokens=int(tokens), separatorCount=int(seen),
                tokensPerSeparator=per, separatorId=ids[name], heuristic=True))
        return out


RULES = [MissingSeparator]
