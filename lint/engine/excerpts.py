"""Decoded excerpts for token-level findings, when a tokenizer is given (``--tokenizer``).

A finding that points at token offsets (a missing separator, a doubled eos, an out-of-range id) says where, in
numbers; with a tokenizer the report can also show the text there. After the rules have reported, for each finding
of a rule that reads the token column (``needs`` holds ``tokens_column`` as an integer list) whose first instance
has a token offset, the shard row of that instance is read again and a short decoded context around the offset is
added: ``evidence["decodedExcerpt"]`` = ``{"row", "offset", "text"}`` (the token itself in brackets, at most
:data:`CONTEXT_CHARS` characters of decoded text on each side) and a sentence at the end of the message. The
fingerprint (rule, shard, kind) is untouched. At most :data:`MAX_FINDINGS` findings get one; the rows they need are
read in one pass per shard, stopping after the last of them. Anything that fails here (a shard that no longer
reads, a tokenizer that cannot decode an id) leaves the finding as it was.
"""
from __future__ import annotations

import itertools
import logging

import numpy as np

log = logging.getLogger(__name__)

#: Findings that get an excerpt, at most (each may cost a read of its shard up to the row).
MAX_FINDINGS = 100
#: Decoded characters shown on each side of the token.
CONTEXT_CHARS = 48
#: Tokens decoded on each side of the token (before cutting to CONTEXT_CHARS).
CONTEXT_TOKENS = 12


def _token_rules(rules) -> set[str]:
    return {rule.id for rule in rules if rule.needs.get("tokens_column") == "int-list" and not rule.needs_any}


def attach(findings: list, results: list, rules, settings) -> None:
    """Add a decoded excerpt to the token-level findings (see the module notes); changes ``findings`` in place."""
    if settings is None or getattr(settings, "tokenizer", None) is None:
        return
    wanted = _token_rules(rules)
    by_uri = {result.shard.uri: result for result in results}
    chosen = []
    for finding in findings:
        if finding.rule_id not in wanted or finding.uri not in by_uri or not finding.rows.size:
            continue
        if int(finding.offsets[0]) < 0 or "decodedExcerpt" in finding.evidence:
            continue
        chosen.append(finding)
        if len(chosen) >= MAX_FINDINGS:
            break
    if not chosen:
        return
    try:
        from corpuscle.kernels.tokenize import load_tokenizer

        tokenizer = load_tokenizer(settings.tokenizer)
    except Exception:  # noqa: BLE001 - no excerpt rather than no report
        return
    from corpuscle.kernels.decode import excerpt

    per_shard: dict[str, list] = {}
    for finding in chosen:
        per_shard.setdefault(finding.uri, []).append(finding)
    for uri, group in per_shard.items():
        result = by_uri[uri]
        try:
            rows = _read_rows(result.shard, result.settings.tokens_column, {int(f.rows[0]) for f in group})
        except Exception as exc:  # noqa: BLE001
            log.debug("no excerpts for %s: %s", uri, exc)
            continue
        for finding in group:
            ids = rows.get(int(finding.rows[0]))
            at = int(finding.offsets[0])
            if ids is None or not 0 <= at < len(ids):
                continue
            try:
                text = excerpt(tokenizer, ids, at, CONTEXT_TOKENS, CONTEXT_TOKENS, CONTEXT_CHARS)
            except Exception:  # noqa: BLE001
                continue
            finding.evidence["decodedExcerpt"] = {"row": int(finding.rows[0]), "offset": at, "text": text}
            finding.message = f"{finding.message} Decoded at row {int(finding.rows[0]):,} @{at}: {text!r}."


def _read_rows(shard, tokens_column: str, wanted: set[int]) -> dict[int, list[int]]:
    """The token ids of the ``wanted`` rows of a shard: for Parquet, from the row groups that hold them (the file's
    metadata says which); otherwise reading the shard in order up to the last of them."""
    from corpuscle.io.batch import is_integer_list
    from corpuscle.io.sources import is_uri, open_shard

    if shard.format == "parquet":
        import pyarrow.parquet as pq
        from corpuscle.io.sources import _open_input

        source = _open_input(shard.path) if is_uri(shard.path) else shard.path
        parquet = pq.ParquetFile(source, memory_map=False)
        meta = parquet.metadata
        ends = np.cumsum([meta.row_group(g).num_rows for g in range(meta.num_row_groups)])
        out = {}
        for group, rows in itertools.groupby(sorted(wanted), key=lambda r: int(np.searchsorted(ends, r, "right"))):
            if group >= meta.num_row_groups:
                continue
            column = parquet.read_row_group(group, columns=[tokens_column]).column(0)
            first = int(ends[group - 1]) if group else 0
            for row in rows:
                out[row] = column[row - first].as_py()
        return out

    out: dict[int, list[int]] = {}
    last = max(wanted)
    targets = np.array(sorted(wanted), dtype=np.int64)
    with open_shard(shard, tokens_column=tokens_column) as reader:
        for batch in reader:
            if len(batch) and batch.has(tokens_column) and is_integer_list(batch.type_of(tokens_column)):
                local = np.flatnonzero(np.isin(batch.rows, targets))
                if len(local):
                    flat = batch.flat(tokens_column)
                    for i in local.tolist():
                        out[int(batch.rows[i])] = flat.values[flat.offsets[i]:flat.offsets[i + 1]].tolist()
            if len(batch) and int(batch.rows[-1]) >= last:
                break
    return out
