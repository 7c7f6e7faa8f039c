"""One shard, repaired: read it batch by batch, apply the fixes planned for it, write the copy.

:func:`rewrite_shard` is picklable work for one shard (it runs in this process or a pool process, like a scan of
one shard): it infers the shard's facts from its first records exactly as a scan does, then streams every batch
through the row fixes (labels, padding, dropped rows, text) or, with a repack, through a
:class:`~corpuscle.repair.repack.DocumentStream` into a packer, and hands the result to a writer of the input's
format.  What it changed is counted per fix; the token budget (slots, real tokens, padding) before and after.
"""
from __future__ import annotations

import traceback
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
from corpuscle.engine.infer import infer_from_batch
from corpuscle.io.batch import Batch, Flat, Shard, enough_first_records, first_records, is_integer_list, is_text
from corpuscle.io.sources import open_shard
from corpuscle.kernels.documents import ONE_PER_ROW, POSITIONS, SEPARATORS, infer_arrangement
from corpuscle.kernels.packing import compare_layouts
from corpuscle.kernels.tokens import real_positions
from corpuscle.repair import fixes as fx
from corpuscle.repair.repack import (
    LENGTHS,
    BestFitPacker,
    ChunkPacker,
    Documents,
    DocumentStream,
    length_column,
    window_table,
)
from corpuscle.repair.write import InputLayout, NullWriter, ShardWriter, copy_atomic
from corpuscle.settings import Settings

DUPLICATES = ("exact-duplicate", "near-duplicate")
#: Rows or documents listed per fix in repair.json before the list is cut.
LISTED = 1000


@dataclass
class ShardJob:
    shard: Shard
    out_path: str
    name: str  # the output's path relative to the output folder
    settings: Settings
    fixes: tuple[str, ...]
    repack: str | None = None
    drop_rows: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    drop_starts: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))  # row << 32 | offset
    dry_run: bool = False
    special_strings: tuple[str, ...] = ()
    allowed_controls: str = "\t\n\r"
    kinds: dict = field(default_factory=dict)  # rule id -> finding kinds the scan found in the shard
    labels: str | None = None  # the corpus majority's convention, for a shard that breaks it


@dataclass
class Budget:
    rows: int = 0
    slots: int = 0
    real: int = 0
    unit: str = "tokens"

    def as_dict(self) -> dict:
        return {"rows": self.rows, "slots": self.slots, "realTokens": self.real, "padding": self.slots - self.real,
                "unit": self.unit}


@dataclass
class FixCount:
    rows_changed: int = 0
    rows_dropped: int = 0
    documents_dropped: int = 0
    tokens_added: int = 0
    tokens_removed: int = 0
    positions_changed: int = 0
    listed: list = field(default_factory=list)  # rows (or [row, offset] of documents) dropped, up to LISTED
    listed_as: str = "dropped"  # or "removedPerRow": [row, how many strings or characters were removed]

    def as_dict(self) -> dict:
        out = {"rowsChanged": self.rows_changed, "rowsDropped": self.rows_dropped,
               "tokensAdded": self.tokens_added, "tokensRemoved": self.tokens_removed}
        if self.documents_dropped:
            out["documentsDropped"] = self.documents_dropped
        if self.positions_changed:
            out["positionsChanged"] = self.positions_changed
        if self.listed:
            out[self.listed_as] = self.listed
        return out

    def list(self, items) -> None:
        room = LISTED - len(self.listed)
        if room > 0:
            self.listed += list(items)[:room]


@dataclass
class ShardOutcome:
    uri: str
    name: str
    fixes: dict = field(default_factory=dict)  # fix id -> FixCount
    unfixable: dict = field(default_factory=dict)  # fix id -> why
    before: Budget = field(default_factory=Budget)
    after: Budget = field(default_factory=Budget)
    repack: dict | None = None
    facts: dict = field(default_factory=dict)
    unreadable: list = field(default_factory=list)  # records or parts that could not be read (not copied)
    error: str | None = None
    written: bool = False
    copied: bool = False  # written byte for byte (nothing to fix)
    notes: list = field(default_factory=list)  # what the user should know about this shard's copy

    def count(self, fix: str) -> FixCount:
        return self.fixes.setdefault(fix, FixCount())


def rewrite_shard(job: ShardJob) -> ShardOutcome:
    """Repair one shard; never raises: a failure is the outcome's ``error`` (and nothing is left behind)."""
    outcome = ShardOutcome(job.shard.uri, job.name)
    writer = None
    try:
        try:
            layout = InputLayout(job.shard)
        except Exception as exc:  # noqa: BLE001 - a shard that cannot be opened is reported, not repaired
            outcome.error = (f"the shard cannot be opened ({type(exc).__name__}: {str(exc).splitlines()[0]}): "
                             "its copy is not written; restore it from its source, then repair again")
            return outcome
        untouched = not job.fixes and job.repack is None  # read to count, then copied byte for byte
        writer = NullWriter() if job.dry_run or untouched else ShardWriter(job.shard, job.out_path, layout)
        _Rewrite(job, outcome, layout, writer).run()
        if outcome.error is None:
            writer.commit()
            if untouched and not job.dry_run:
                copy_atomic(job.shard, job.out_path)
                outcome.copied = True
            outcome.written = not job.dry_run
        else:
            writer.abort()
    except Exception as exc:  # noqa: BLE001 - one shard's failure is reported, the others go on
        outcome.error = f"{type(exc).__name__}: {exc} ({traceback.extract_tb(exc.__traceback__)[-1].name})"
        if writer is not None:
            writer.abort()
    except BaseException:  # interrupted: leave no temporary file behind
        if writer is not None:
            writer.abort()
        raise
    return outcome


class _Rewrite:
    def __init__(self, job: ShardJob, outcome: ShardOutcome, layout: InputLayout, writer):
        self.job, self.out, self.layout, self.writer = job, outcome, layout, writer
        self.facts = job.settings.for_path(job.shard.path)
        self.fixes = list(job.fixes)
        self.arrangement = None
        self.stream = self.packer = None
        self.invalid_utf8: list[int] = []

    # -- reading ----------------------------------------------------------------------------------------------
    def run(self) -> None:
        job = self.job
        with open_shard(job.shard, tokens_column=self.facts.tokens_column) as reader:
            held = None  # each batch is fixed once the next one is read: its last row's label may continue there
            for batch in self._started(reader):
                if held is not None:
                    self._batch(held, self._first_token(batch))
                held = batch
            if held is not None:
                self._batch(held, None)
            if reader.stopped:
                self.out.error = ("the shard cannot be read to its end (see unreadable); its copy is not written: "
                                  "restore it from its source, then repair again")
        if self.out.error is None:
            self._close()

    def _started(self, reader):
        """The reader's batches, after the shard's facts are inferred from its first records."""
        pending: list[Batch] = []
        started = False
        for batch in reader:
            if started:
                yield batch
                continue
            pending.append(batch)
            if enough_first_records(pending, self.facts.tokens_column):
                self._start(pending)
                started = True
                yield from pending
                pending = []
        if not started:
            self._start(pending)
            yield from pending

    def _first_token(self, batch: Batch) -> int | None:
        """The first token of a batch's first record (None when it has none)."""
        s = self.facts
        if not (len(batch) and batch.has(s.tokens_column) and is_integer_list(batch.type_of(s.tokens_column))):
            return None
        tokens = batch.flat(s.tokens_column)
        return int(tokens.values[0]) if tokens.lengths[0] > 0 else None

    def _start(self, batches: list[Batch]) -> None:
        """Facts from the shard's first records (as a scan infers them), then which fixes can run here."""
        sample = first_records(batches)
        self.first_schema = sample.table.schema if sample is not None else None
        if sample is not None:
            self.facts = infer_from_batch(self.facts, sample)
        s = self.facts
        self.tokenized = sample is not None and sample.has(s.tokens_column) and is_integer_list(
            sample.type_of(s.tokens_column))
        self.text = sample is not None and sample.has(s.text_column) and is_text(sample.type_of(s.text_column))
        if self.tokenized:
            self.arrangement, why = infer_arrangement(sample, s)
            lengths = length_column(sample, s)
            if lengths is not None:
                self.arrangement, why = LENGTHS, f"the {lengths[0]!r} column says where each document is"
            self.out.facts["arrangement"] = {"value": self.arrangement, "why": why}
        for key in ("eos_id", "bos_id", "pad_id", "seq_len", "labels", "vocab_size", "separator"):
            value = getattr(s, key)
            if value is not None:
                self.out.facts[key] = {"value": value, "source": s.source(key)}
        self.expected = 0 if s.labels == "aligned" else 1
        if s.labels is None and self.tokenized:
            self.out.facts["labels"] = {"value": "shifted", "source": "assumed: not set, not inferable"}
        if self.job.labels is not None and "label-alignment" in self.fixes:
            self.expected = 0 if self.job.labels == "aligned" else 1
            self.out.facts["labels"] = {"value": self.job.labels, "source": "the corpus majority (the shard "
                                        f"followed {s.labels or 'no convention'})"}
        self._decide()
        if self.job.repack and self.tokenized and self.out.error is None:
            self.template = self.layout.schema if self.layout.schema is not None else sample.table.schema
            self._start_repack()

    def _decide(self) -> None:
        """Drop the fixes this shard cannot take, each with why (``unfixable`` in repair.json)."""
        s, job = self.facts, self.job
        packed = self.arrangement in (POSITIONS, SEPARATORS, LENGTHS)
        keep = []
        for fix in self.fixes:
            why = None
            if fix in ("label-alignment", "padding-loss", "token-range", "missing-separator") and not self.tokenized:
                why = f"the shard has no token column {s.tokens_column!r}"
            elif fix == "label-alignment" and job.repack is None and not self._has_list(s.labels_column):
                why = f"the shard has no labels column {s.labels_column!r}"
            elif fix == "padding-loss" and s.pad_id is None and not self._has_list(s.mask_column):
                why = "padding cannot be told from real tokens: no attention mask and no pad id (give --pad-id)"
            elif fix == "missing-separator":
                why = self._separator_why()
            elif fix in DUPLICATES and packed and job.repack is None:
                why = ("rows of this shard are packed windows: dropping one would cut the documents it shares "
                       "with its neighbours; repair with --repack best-fit (or chunk) to drop whole documents")
            elif fix == "empty-document" and packed and job.repack is None and \
                    "zero-length-document" in job.kinds.get(fix, ()):
                # rows without a real token are dropped; an empty document inside a packed row needs a repack
                self.out.unfixable["empty-document zero-length-document"] = (
                    "an empty document inside a packed row (two separators in a row) can only be left out by "
                    "laying the documents out again: repair with --repack best-fit (or chunk)")
            elif fix in ("special-token-text", "encoding-error") and not self.text:
                why = f"the shard has no text column {s.text_column!r}"
            elif fix in ("special-token-text", "encoding-error") and self.tokenized:
                why = (f"the shard holds token ids ({s.tokens_column!r}) beside its text: changing the text would "
                       "leave the ids behind; clean the text at the source and tokenize it again")
            if why:
                self.out.unfixable[fix] = why
            else:
                keep.append(fix)
            if fix == "token-range" and not why and packed and job.repack is None:
                self.out.notes.append("rows with ids out of range are dropped whole from packed windows, "
                                          "cutting the documents they share with the rows beside them; with "
                                          "--repack only the documents holding such ids are dropped")
        if job.repack and not self.tokenized:
            self.out.notes.append("repack not applied: the shard holds raw text, not token windows")
        elif job.repack and self.tokenized and self._separator_why(for_repack=True):
            self.out.unfixable["repack"] = ("the documents are not known, so they cannot be laid out again: "
                                            + self._separator_why(for_repack=True))
        elif job.repack and s.seq_len is None:
            self.out.unfixable["repack"] = "the window length is not known: give --seq-len"
        elif job.repack and s.pad_id is None and (s.eos_id is None or not self._has_list(s.mask_column)):
            self.out.unfixable["repack"] = ("the pad id is not known and no attention mask would hide padding "
                                            "written with another id: give --pad-id")
        if "repack" in self.out.unfixable:
            self.out.error = f"cannot repack: {self.out.unfixable['repack']}"
        self.fixes = keep

    def _separator_why(self, for_repack: bool = False) -> str | None:
        """Why the missing separators of this shard cannot be put back, or None when they can: where position_ids
        restart, a document is known without its separator; a padded row that holds one document ends it at the
        padding; a doubled separator is one too many.  Elsewhere a missing separator leaves no trace."""
        s = self.facts
        found = set(self.job.kinds.get("missing-separator", ()))
        doubled = {"doubled-eos", "doubled-bos"}
        repairable = {POSITIONS: found, LENGTHS: found, ONE_PER_ROW: {"unterminated-row"} | doubled,
                      SEPARATORS: doubled}.get(self.arrangement, set())
        if not found <= repairable:
            unknown = ", ".join(sorted(found - repairable))
            return (f"{unknown}: the documents of this shard are told apart only by their separators (no "
                    "position_ids restarting at 0, rows that are not one document each), so where one is missing "
                    "the boundary is unknown; rebuild the shard from its documents with the separator added")
        if for_repack:
            return None
        if self.job.repack is None:
            return ("inserting a separator moves every later token of the window: repair with --repack chunk "
                    "(or best-fit), which lays the documents out again with one separator each")
        if (s.separator in ("eos-after", "both") and s.eos_id is None) or \
                (s.separator in ("bos-before", "both") and s.bos_id is None):
            return "the separator id is not known: give --eos-id (or --bos-id)"
        return None

    def _has_list(self, name: str) -> bool:
        """Whether the shard has an integer list column ``name`` (as its schema, or its first records, say)."""
        schema = self.layout.schema if self.layout.schema is not None else self.first_schema
        return schema is not None and name in schema.names and is_integer_list(schema.field(name).type)

    # -- batches ----------------------------------------------------------------------------------------------
    def _batch(self, batch: Batch, next_first: int | None = None) -> None:
        if self.out.error is not None:  # the shard is not written: nothing more to do
            return
        for problem in batch.problems:
            if problem.kind == "invalid-utf8":  # kept, as read: not guessed at
                self.invalid_utf8.append(problem.row)
                continue
            if len(self.out.unreadable) < LISTED:
                self.out.unreadable.append({"row": problem.row, "kind": problem.kind, "detail": problem.detail})
        if not len(batch):
            return
        self._count_budget(self.out.before, batch)
        if self.stream is not None:
            self._repack_batch(batch)
            return
        table = self._fix_rows(batch, next_first)
        self._count_budget(self.out.after, Batch(batch.shard, table, np.arange(table.num_rows)))
        self.writer.write(table)

    def _count_budget(self, budget: Budget, batch: Batch) -> None:
        s = self.facts
        budget.rows += len(batch)
        if batch.has(s.tokens_column) and is_integer_list(batch.type_of(s.tokens_column)):
            tokens = batch.flat(s.tokens_column)
            budget.slots += tokens.values.size
            budget.real += int(np.count_nonzero(real_positions(batch, tokens, s)))
        elif batch.has(s.text_column) and is_text(batch.type_of(s.text_column)):
            import pyarrow.compute as pc

            size = int(pc.sum(pc.binary_length(batch.column(s.text_column))).as_py() or 0)
            budget.slots += size
            budget.real += size
            budget.unit = "utf-8 bytes"

    def _fix_rows(self, batch: Batch, next_first: int | None = None) -> pa.Table:
        s, job = self.facts, self.job
        table = batch.table if isinstance(batch.table, pa.Table) else pa.Table.from_batches([batch.table])
        keep = np.ones(len(batch), dtype=bool)
        if self.tokenized and batch.has(s.tokens_column) and is_integer_list(batch.type_of(s.tokens_column)):
            table, keep = self._token_fixes(batch, table, keep, next_first)
        if self.text and batch.has(s.text_column) and is_text(batch.type_of(s.text_column)):
            table, keep = self._text_fixes(batch, table, keep)
        dups = [f for f in self.fixes if f in DUPLICATES]
        if dups and (job.drop_rows.size or job.drop_starts.size):
            # rows hold one document each here (packed shards drop documents only with a repack): a document
            # named by where it starts names its row
            named = np.union1d(job.drop_rows, job.drop_starts >> 32)
            drop = keep & np.isin(batch.rows, named)
            self._dropped(",".join(dups), batch, drop)
            keep &= ~drop
        return table if keep.all() else table.filter(pa.array(keep))

    def _dropped(self, fix: str, batch: Batch, drop: np.ndarray) -> None:
        if not drop.any():
            return
        count = self.out.count(fix)
        count.rows_dropped += int(np.count_nonzero(drop))
        s = self.facts
        if batch.has(s.tokens_column) and is_integer_list(batch.type_of(s.tokens_column)):
            tokens = batch.flat(s.tokens_column)
            real = real_positions(batch, tokens, s)
            count.tokens_removed += int(tokens.row_counts(real)[drop].sum())
        count.list(batch.rows[drop].tolist())

    def _token_fixes(self, batch: Batch, table: pa.Table, keep: np.ndarray, next_first: int | None = None):
        s = self.facts
        tokens = batch.flat(s.tokens_column)
        has_labels = self._parallel(batch, s.labels_column, tokens)
        has_mask = self._parallel(batch, s.mask_column, tokens)
        real = real_positions(batch, tokens, s)
        if "padding-loss" in self.fixes:
            if s.pad_id is not None:
                real = fx.real_from_ids(tokens, s.pad_id, s.eos_id, s.bos_id)
            elif has_mask:
                real = fx.real_from_mask(tokens, batch.flat(s.mask_column).values)
            if has_mask:
                old = batch.flat(s.mask_column)
                new = fx.consistent_mask(old.values, real)
                self._changed("padding-loss", old, new)
                table = _replace(table, s.mask_column, batch.column(s.mask_column), new, old.offsets)
        if has_labels and ("label-alignment" in self.fixes or "padding-loss" in self.fixes):
            labels_flat = batch.flat(s.labels_column)
            labels = labels_flat.values
            if "padding-loss" in self.fixes:
                new = fx.labels_off_padding(tokens, labels_flat.values, real, self.expected == 1, s.ignore_index)
                if s.pad_id is not None and s.pad_id == s.eos_id:
                    new = fx.train_real_eos(tokens, new, real, s.eos_id, self.expected == 1, s.ignore_index)
                self._changed("padding-loss", labels_flat, new)
                labels_flat = Flat(new, labels_flat.offsets)
            if "label-alignment" in self.fixes:
                following = np.full(tokens.lengths.size, -1, dtype=np.int64)  # first token of the next record
                filled = tokens.lengths[1:] > 0
                following[:-1][filled] = tokens.values[tokens.starts[1:][filled]]
                following[-1] = -1 if next_first is None else next_first
                new = fx.realign_labels(tokens, labels_flat.values, real, self.expected, s.ignore_index, s.pad_id,
                                        s.vocab_size, following, self._separator_ids())
                self._changed("label-alignment", labels_flat, new)
                labels_flat = Flat(new, labels_flat.offsets)
            if labels_flat.values is not labels:
                table = _replace(table, s.labels_column, batch.column(s.labels_column), labels_flat.values,
                                 labels_flat.offsets)
        if "token-range" in self.fixes:
            bad = keep & fx.rows_with(tokens, fx.out_of_range(tokens.values, s.vocab_size))
            self._dropped("token-range", batch, bad)
            keep &= ~bad
        if "empty-document" in self.fixes:
            empty = keep & (tokens.row_counts(real) == 0)
            self._dropped("empty-document", batch, empty)
            keep &= ~empty
        return table, keep

    def _text_fixes(self, batch: Batch, table: pa.Table, keep: np.ndarray):
        s = self.facts
        column = batch.column(s.text_column)
        for fix, strip in (("special-token-text", lambda a: fx.strip_strings(a, self.job.special_strings)),
                           ("encoding-error", lambda a: fx.strip_controls(a, self.job.allowed_controls))):
            if fix not in self.fixes:
                continue
            column, removed = strip(column)
            count = self.out.count(fix)
            count.listed_as = "removedPerRow"
            changed = removed > 0
            count.rows_changed += int(np.count_nonzero(changed))
            count.positions_changed += int(removed.sum())
            first = np.flatnonzero(changed)[:max(0, LISTED - len(count.listed))]
            count.list([[int(r), int(n)] for r, n in zip(batch.rows[first], removed[first])])
        if "empty-document" in self.fixes and not self.tokenized:
            empty = keep & fx.blank_text(column)
            self._dropped("empty-document", batch, empty)
            keep &= ~empty
        if column is not batch.column(s.text_column):
            index = table.schema.get_field_index(s.text_column)
            table = table.set_column(index, table.schema.field(index), column.cast(table.schema.field(index).type))
        return table, keep

    def _changed(self, fix: str, old: Flat, new: np.ndarray) -> None:
        diff = old.values != new
        count = self.out.count(fix)
        count.positions_changed += int(np.count_nonzero(diff))
        count.rows_changed += int(np.count_nonzero(old.row_counts(diff)))

    def _separator_ids(self) -> tuple:
        return tuple(i for i in (self.facts.eos_id, self.facts.bos_id) if i is not None)

    @staticmethod
    def _parallel(batch: Batch, name: str, tokens: Flat) -> bool:
        return (batch.has(name) and is_integer_list(batch.type_of(name))
                and np.array_equal(batch.flat(name).lengths, tokens.lengths))

    # -- repack -----------------------------------------------------------------------------------------------
    def _start_repack(self) -> None:
        s, job = self.facts, self.job
        pad = s.pad_id if s.pad_id is not None else s.eos_id
        self.pad_used = pad
        packer = BestFitPacker if job.repack == "best-fit" else ChunkPacker
        self.packer = packer(s, s.seq_len, pad)
        self.stream = DocumentStream(s, self.arrangement, drop=self._drop_documents, untrained_of=self._untrained,
                                     cap=LISTED)
        self.windows = 0
        self.labels_shift = None
        if s.positions_column not in self.template.names:
            self.out.notes.append(
                f"the shard has no {s.positions_column!r} column, so the repacked windows hold several documents "
                "with nothing but their separators between them: mask attention at the separators in the "
                "trainer, or add position_ids")
        if s.labels_column in self.template.names:
            self.labels_shift = self.expected == 1

    def _untrained(self, batch: Batch, tokens: Flat, real: np.ndarray | None) -> np.ndarray | None:
        s = self.facts
        if not self._parallel(batch, s.labels_column, tokens):
            return None
        real = real if real is not None else np.ones(tokens.values.size, dtype=bool)
        labels = batch.flat(s.labels_column).values
        markers = fx.ignore_markers(labels, real, s.ignore_index, s.pad_id, s.vocab_size, tokens, self.expected,
                                    self._separator_ids())
        ignored = markers | (labels == s.ignore_index)
        shifts = fx.row_shifts(tokens, labels, ignored, s.ignore_index, self.expected)
        return fx.untrained_targets(tokens, ignored, real, shifts)

    def _drop_documents(self, docs: Documents, first_rows, last_rows, start_rows, start_offsets) -> dict:
        s, job = self.facts, self.job
        out = {}
        lengths = docs.lengths
        if "token-range" in self.fixes and docs.values.size:
            bad = fx.out_of_range(docs.values, s.vocab_size)
            counts = np.zeros(docs.count, dtype=np.int64)
            some = lengths > 0
            if some.any():
                counts[some] = np.add.reduceat(bad, docs.offsets[:-1][some])
            out["token-range"] = counts > 0
        if "empty-document" in self.fixes:
            out["empty-document"] = lengths == 0
        dups = [f for f in self.fixes if f in DUPLICATES]
        if dups:
            hit = np.zeros(docs.count, dtype=bool)
            if job.drop_rows.size:
                rows = job.drop_rows
                hit |= np.searchsorted(rows, last_rows, side="right") > np.searchsorted(rows, first_rows, side="left")
            if job.drop_starts.size:
                hit |= np.isin((start_rows << 32) | start_offsets, job.drop_starts)
            out[",".join(dups)] = hit
        return out

    def _repack_batch(self, batch: Batch) -> None:
        self._windows(self.packer.add(self.stream.feed(batch)))

    def _windows(self, windows) -> None:
        if windows is None or windows.count == 0:
            return
        s = self.facts
        table = window_table(windows, self.template, s, s.seq_len, self.labels_shift)
        self.windows += windows.count
        self.out.after.rows += windows.count
        self.out.after.slots += windows.count * s.seq_len
        self.out.after.real += int(windows.fill.sum())
        self.writer.write(table)

    def _close(self) -> None:
        if self.invalid_utf8:
            rows = self.invalid_utf8
            self.out.unfixable["encoding-error invalid-utf8"] = (
                f"{len(rows):,} record(s) hold bytes that are not UTF-8 (rows {', '.join(map(str, rows[:20]))}"
                f"{' ...' if len(rows) > 20 else ''}): what they meant cannot be known, so they are not guessed "
                "at; " + ("the copy holds them byte for byte" if not self.job.fixes and self.job.repack is None else
                          "the copy holds them as they were read, each bad byte as U+FFFD") +
                ". Decode them from the source with the right encoding, or drop them")
        if self.stream is None:
            return
        self._windows(self.packer.add(self.stream.close()))
        self._windows(self.packer.close())
        counts = self.stream.counts
        for reason, documents in counts.documents.items():
            count = self.out.count(reason)
            count.documents_dropped += documents
            count.tokens_removed += counts.tokens[reason]
            count.list(counts.listed.get(reason, []))
        before = self.out.before
        self.out.repack = {
            "layout": self.job.repack, "seqLen": self.facts.seq_len, "padId": self.pad_used,
            "windowsBefore": before.rows, "windowsAfter": self.windows,
            "separatorsStripped": counts.separators_stripped,
            "documentsWithoutSeparator": counts.documents_without_separator,
        }
        for fix in ("label-alignment", "padding-loss"):  # every window's labels and mask are built anew
            if fix in self.fixes:
                self.out.count(fix).rows_changed = self.windows
        if "missing-separator" in self.fixes:
            count = self.out.count("missing-separator")
            count.tokens_added += counts.documents_without_separator
            count.rows_changed = self.windows
        self.out.repack["separatorsAdded"] = self.packer.separators_added
        if counts.last_unterminated:
            self.out.notes.append(
                "the shard's last document ends without eos: it may go on in the next shard (a stream cut into "
                "shards); the repack ends it with eos like every other document, so check the next shard's start")
        # what the layouts of kernels.packing need for the same documents, all at once (no buffers)
        lengths = self.packer.lengths
        layouts = compare_layouts(lengths.sizes, self.facts.seq_len, lengths.counts)
        self.out.repack["layouts"] = {
            "onePerWindow": layouts.one_per_window.windows, "concatChunk": layouts.concat_chunk.windows,
            "bestFitDecreasing": layouts.best_fit_decreasing.windows, "lowerBound": layouts.lower_bound}


def _replace(table: pa.Table, name: str, original, values: np.ndarray, offsets: np.ndarray) -> pa.Table:
    """``table`` with list column ``name`` holding ``values`` in the rows of ``original`` (same offsets, nulls and
    type)."""
    type_ = original.type
    flat = pa.array(values).cast(type_.value_type)
    validity = original.is_null() if original.null_count else None
    if pa.types.is_fixed_size_list(type_):
        array = pa.FixedSizeListArray.from_arrays(flat, type_.list_size, mask=validity)
    elif pa.types.is_large_list(type_):
        array = pa.LargeListArray.from_arrays(pa.array(offsets, pa.int64()), flat, mask=validity)
    else:
        array = pa.ListArray.from_arrays(pa.array(offsets, pa.int32()), flat, type=type_, mask=validity)
    index = table.schema.get_field_index(name)
    return table.set_column(index, table.schema.field(index), array)

