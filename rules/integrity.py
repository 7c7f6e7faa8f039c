"""Whether a shard can be read as a training shard at all: unreadable files, unreadable records, columns that are
missing, of the wrong type, or of different lengths where they must run in parallel."""
from __future__ import annotations

import numpy as np
from corpuscle.findings import Level
from corpuscle.io.batch import is_integer_list, is_text
from corpuscle.rules.api import Rule

RECORD_PROBLEMS = {
    "bad-json": "line(s) that are not valid JSON",
    "not-object": "line(s) holding a JSON value that is not an object",
    "cut-off": "last line cut off mid-record (the file ends without a newline inside a record)",
    "oversized": "record(s) larger than a limit (max_record_bytes, max_row_tokens)",
    "too-deep": "record(s) with values nested deeper than max_depth (those values were dropped)",
    "too-many-keys": "record(s) with keys beyond the shard's max_keys distinct keys (those keys were dropped)",
}


NOT_SCANNED = ("these records are not scanned and a loader will fail or skip them. Repair or drop them and "
               "re-export the shard.")
#: What a record beyond a limit means (corpuscle.settings.LIMITS): a limit keeps the scan's memory bounded.
LIMIT_CONSEQUENCE = {
    "oversized": "these records are not scanned (a record this large is almost always a writer's bug: a "
                 "document never cut into windows, a join gone wrong). Fix or drop them, or raise the limit.",
    "too-deep": "the rest of each record is scanned. Training records are flat; fix the writer, or raise max_depth.",
    "too-many-keys": "the rest of each record is scanned. A key per record (ids written as keys) is a writer's bug; "
                     "fix it, or raise max_keys.",
}


def _problems(state, batch, kinds) -> None:
    for problem in batch.problems:
        if problem.kind in kinds:
            state.hit_at(problem.kind, [problem.row], [problem.offset])
            state.details.setdefault(problem.kind, problem.detail)


class _ProblemRule(Rule):
    """Shared by the rules that turn reader problems into findings."""

    kinds: dict[str, str] = {}

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.details = {}
        return state

    def feed(self, state, batch):
        _problems(state, batch, self.kinds)

    splittable = True

    def merge(self, first, second):
        merged = super().merge(first, second)
        merged.details = {**second.details, **first.details}  # the first detail met of each kind
        return merged


class UnreadableRecord(_ProblemRule):
    """A record that cannot be parsed is a record the pipeline either crashes on or silently drops. Checks each
    JSON Lines line: it must be one JSON object; a last line without its newline that does not parse was cut off
    while the file was written (a job killed mid-write, a disk that filled up)."""

    id = "unreadable-record"
    level = Level.error
    summary = "Records that cannot be parsed: bad JSON lines, non-object values, a cut-off last line."
    help = ("Re-export the shard from its source; for a cut-off last line, rerun the writer that was interrupted "
            "and write through a temporary file renamed at the end. Drop or repair the listed lines.")
    kinds = RECORD_PROBLEMS

    def report(self, state):
        return [self.finding(state, kind, f"{hits.count:,} {RECORD_PROBLEMS[kind]} (first: {state.details[kind]}); "
                                          f"{LIMIT_CONSEQUENCE.get(kind, NOT_SCANNED)}")
                for kind, hits in state.hits.items()]


class UnreadableShard(Rule):
    """A file that cannot be opened or read to its end (corrupt Parquet footer, truncated compression stream, a
    row group that fails to decode) or that holds no records at all. The rest of the corpus is still scanned."""

    id = "unreadable-shard"
    level = Level.error
    summary = "Files that cannot be opened or read to the end, or that hold no records."
    kinds = {
        "unreadable": "a file that cannot be opened or read to its end",
        "empty": "a file that holds no records",
    }
    help = ("Re-copy or re-write the file (check its size and checksum against the source); an empty file "
            "usually means a writer that failed before writing anything: rerun it or remove the file.")

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.problems = []
        return state

    def feed(self, state, batch):
        state.problems += [p for p in batch.problems if p.kind in ("unreadable", "empty")]

    splittable = True

    def merge(self, first, second):
        merged = super().merge(first, second)
        merged.problems = first.problems + second.problems
        return merged

    def report(self, state):
        out = []
        for p in state.problems:
            state.hit_at(p.kind, [p.row])
            if p.kind == "empty":
                msg = f"{p.detail}: nothing to train on. Remove the file or rerun the writer that produced it."
                out.append(self.finding(state, p.kind, msg, level=Level.warning))

            else:
                scanned = f"rows before row {p.row:,} were scanned" if p.row else "nothing in it could be read"
                msg = f"cannot read the shard: {p.detail}. {scanned.capitalize()}; re-copy or re-write the file."
                out.append(self.finding(state, p.kind, msg))
            state.hits.pop(p.kind)
        return out


class SchemaMismatch(Rule):
    """Columns a training loader expects must exist and have the right type, and parallel columns (input_ids,
    labels, attention_mask, position_ids) must have the same length in every row: a loader that zips them
    silently truncates to the shorter one, misaligning every label after the gap."""

    id = "schema-mismatch"
    level = Level.error
    summary = "Missing or mistyped columns; parallel token columns of different lengths in a row."
    kinds = {
        "type:*": "a column (named after the colon) whose Arrow type is not what the rules read",
        "length:*": "rows where a parallel column (named after the colon) differs in length from the tokens",
        "mistyped": "records whose values do not fit the column's type",
        "no-content": "a shard with none of the columns the rules read",
    }
    help = ("Point corpuscle at the right columns (text_column, tokens_column, labels_column, mask_column, "
            "positions_column) or fix the writer so that token columns are lists of integers and every parallel "
            "column has one entry per token.")

    PARALLEL = ("labels_column", "mask_column", "positions_column")
    splittable = True

    def merge(self, first, second):
        merged = super().merge(first, second)
        merged.columns = first.columns | second.columns
        merged.types = {**second.types, **first.types}  # the first type met of each column
        merged.details = {**second.details, **first.details}
        return merged

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.columns = set()
        state.types = {}
        state.details = {}
        return state

    def feed(self, state, batch):
        s = state.settings
        _problems(state, batch, ("mistyped",))
        state.columns.update(batch.column_names)
        if not len(batch):
            return
        state.count(rows=len(batch))
        tok = s.tokens_column
        for key in ("tokens_column",) + self.PARALLEL:
            name = getattr(s, key)
            if batch.has(name) and not is_integer_list(batch.type_of(name)) and str(batch.type_of(name)) != "null":
                state.types.setdefault(name, str(batch.type_of(name)))
                state.hit_at(f"type:{name}", batch.rows)
        if batch.has(s.text_column) and not is_text(batch.type_of(s.text_column)) \
                and str(batch.type_of(s.text_column)) != "null":
            state.types.setdefault(s.text_column, str(batch.type_of(s.text_column)))
            state.hit_at(f"type:{s.text_column}", batch.rows)
        if not (batch.has(tok) and is_integer_list(batch.type_of(tok))):
            return
        lengths = batch.flat(tok).lengths
        for key in self.PARALLEL:
            name = getattr(s, key)
            if batch.has(name) and is_integer_list(batch.type_of(name)):
                other = batch.flat(name).lengths
                bad = np.flatnonzero(other != lengths)
                state.hit(f"length:{name}", batch, bad, np.minimum(other, lengths)[bad])

    def report(self, state):
        s = state.settings
        out = []
        if state.stats["rows"] and s.tokens_column not in state.columns and s.text_column not in state.columns:
            state.hit_at("no-content", [0])
            cols = ", ".join(sorted(state.columns)) or "none"
            out.append(self.finding(state, "no-content",
                                    f"neither a token column {s.tokens_column!r} nor a text column "
                                    f"{s.text_column!r} (columns: {cols}); nothing in this shard was checked. "
                                    "Set tokens_column or text_column to the right names.", columns=sorted(state.columns)))
        for kind, hits in state.hits.items():
            what, name = kind.split(":", 1) if ":" in kind else (kind, "")
            if what == "type":
                wanted, fix = (("a string column of document text", "Write text as UTF-8 strings")
                               if name == s.text_column else
                               ("a list of integer token ids", "Write token columns as lists of integers"))
                out.append(self.finding(state, kind, f"column {name!r} is {state.types[name]} in {hits.count:,} "
                                        f"rows, not {wanted}; rules that need it skipped those rows. {fix}.",
                                        column=name, observedType=state.types[name]))
            elif what == "length":
                out.append(self.finding(state, kind, f"{hits.count:,} rows where {name!r} and "
                                        f"{s.tokens_column!r} have different lengths (offset = where the shorter "
                                        "one ends); a loader that zips them misaligns or drops tokens. Write one "
                                        f"{name} entry per token.", column=name))
            elif what == "mistyped":
                out.append(self.finding(state, kind, f"{hits.count:,} values of a type that differs from the "
                                        f"rest of their column (first: {state.details['mistyped']}); they were "
                                        "read as null. Fix the writer so every row has the same types."))
        return out


RULES = [SchemaMismatch, UnreadableRecord, UnreadableShard]
