"""Attention across documents: packed rows whose documents can see each other under the causal mask."""
from __future__ import annotations

import numpy as np
from corpuscle.findings import Level
from corpuscle.kernels.documents import length_column
from corpuscle.kernels.tokens import (
    inferred_note,
    inner_starts,
    missing_ids,
    padding_free,
    parallel_columns,
    position_restarts,
    real_ranks,
    real_token_positions,
    token_positions,
)
from corpuscle.rules.api import Rule, consistent, pct, share


class DocumentAttention(Rule):
    """A packed row that holds several documents is trained under one causal mask unless the training setup
    stops attention at document boundaries. With plain causal attention every token of the second document
    attends to the whole first one: the model learns to condition on unrelated text, and what a document's first
    tokens predict depends on whatever was packed before it. The usual sign that a pipeline is document-aware is a
    position_ids column that restarts at 0 at every document start (a document-aware attention mask is built from
    it); this rule reports shards whose packed rows hold more than one document but have no such restarts.

    A row holds more than one document when a separator lies inside it rather than at its last real token:
    eos followed by another real token (separator = eos-after), bos after the row's first real token
    (bos-before), either (both). A row is affected when it holds several documents and the shard has
    no position_ids column, or the row's position_ids never restart (0..L-1 in every row). Padded rows holding one
    document each, rows whose position_ids restart, shards with a document-length column (``doc_lengths`` or
    ``cu_seqlens``: variable-length attention kernels stop attention at those edges), a doubled eos at a row's end
    (an empty document, which missing-separator reports) and text shards give no finding. One finding per shard;
    instances are the affected rows, offset = the first inner separator.

    This is a warning about the training setup, not a defect of the data: whether attention across documents is
    acceptable is a modelling choice that some training setups make on purpose. Needs eos_id or bos_id per the
    separator convention, given or inferred; otherwise the shard is skipped with a note.
    """

    id = "document-attention"
    level = Level.warning
    summary = "Packed rows holding several documents with nothing that stops attention crossing them."
    kinds = {
        "crossing": "packed rows that hold several documents with no per-document position restarts",
    }
    help = ("Emit position_ids that restart at 0 at every document start and train with a document-aware "
            "attention mask built from them (or from the separators), so that no token attends to another "
            "document; or, if cross-document attention is what you want, accept it knowingly and skip this rule "
            "(--skip document-attention).")
    needs = {"tokens_column": "int-list"}
    splittable = True  # counters and hits of single rows only: the default merge

    def missing(self, batch, settings):
        if settings.separator == "both":
            keys = () if settings.eos_id is not None or settings.bos_id is not None else ("eos_id",)
        else:
            keys = ("bos_id",) if settings.separator == "bos-before" else ("eos_id",)
        return missing_ids(settings, keys) or super().missing(batch, settings)

    def feed(self, state, batch):
        s = state.settings
        batch = consistent(batch, parallel_columns(s))
        tokens = batch.flat(s.tokens_column)
        # inner separators (another document follows in the row) and the documents they start, as sorted flat
        # indices: a packed window holds a few documents, so these lists are short
        separators, starts = [], []
        if s.separator in ("eos-after", "both") and s.eos_id is not None:
            after = token_positions(batch, tokens, s, s.eos_id) + 1
            after = inner_starts(batch, tokens, s, after[after < tokens.values.size])
            after = after[tokens.values[after] != s.eos_id]  # a doubled eos starts no document
            starts.append(after)
            separators.append(after - 1)
        if s.separator in ("bos-before", "both") and s.bos_id is not None:
            at_bos = real_token_positions(batch, tokens, s, s.bos_id)
            rows = tokens.rows_at(at_bos)
            if padding_free(batch, tokens, s):
                first = tokens.starts[rows]
            else:  # the row's first real token (the row holds one: this bos)
                ranks = real_ranks(batch, tokens, s)
                first = ranks.select(ranks.rank(tokens.starts[rows]) + 1)
            at_bos = at_bos[at_bos != first]  # not the row's first real token
            starts.append(at_bos)
            separators.append(at_bos)
        start = _union(starts)
        separator = _union(separators)
        documents = tokens.count_positions(start) + 1
        packed = documents > 1

        restarts = position_restarts(batch, tokens, s)
        if length_column(batch, s) is not None:  # document lengths per row: the kernel stops attention there
            affected = np.zeros_like(packed)
            state.count(rows_with_lengths=int(packed.sum()))
        elif restarts is None:
            affected = packed
            state.count(rows_without_positions=int(packed.sum()))
        else:
            restarted = tokens.count_positions(restarts) > 0
            affected = packed & ~restarted
        rows = np.flatnonzero(affected)
        first_separator = tokens.first_of(separator, rows) - tokens.offsets[rows]
        state.count(rows=tokens.lengths.size, packed_rows=int(packed.sum()), affected_rows=rows.size,
                    affected_documents=int(documents[rows].sum()))
        state.hit("crossing", batch, rows, first_separator)

    def report(self, state):
        st = state.stats
        hits = state.hits.get("crossing")
        if not hits:
            return []
        n, rows = hits.count, st["rows"]
        mean_docs = st["affected_documents"] / n
        cause = ("the shard has no position_ids column" if st["rows_without_positions"] == n
                 else "their position_ids never restart at a document start"
                 if not st["rows_without_positions"] else
                 "position_ids are missing or never restart at a document start")
        return [self.finding(
            state, "crossing",
            f"{n:,} of {rows:,} rows ({pct(n, rows)}) hold several documents (mean {mean_docs:.2f} per affected row) "
            f"and {cause}: under a plain causal mask each document attends to the ones packed before it "
            "(offset = the first inner separator). If that is not intended, emit position_ids restarting per "
            "document and use a document-aware attention mask; if it is, skip this rule."
            + inferred_note(state.settings, ("eos_id", "bos_id", "pad_id")),
            rowsAffected=n, rows=int(rows), share=share(n, rows), meanDocumentsPerAffectedRow=mean_docs,
            packedRows=int(st["packed_rows"]), separator=state.settings.separator)]


def _union(parts: list[np.ndarray]) -> np.ndarray:
    """Sorted distinct flat indices of all parts."""
    if not parts:
        return np.zeros(0, dtype=np.int64)
    return parts[0] if len(parts) == 1 else np.union1d(parts[0], parts[1])


RULES = [DocumentAttention]
