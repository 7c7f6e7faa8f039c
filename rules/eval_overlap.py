"""Evaluation items that leaked into the training data: word n-grams shared with a training document.

What counts as overlap
    The method of Brown et al. 2020, *Language Models are Few-Shot Learners*, Appendix C: an evaluation item is
    flagged when it shares an n-gram of words with a training document, with ``n = 13`` by default (``[rule.
    eval-overlap] n``), after lowercasing and splitting on non-alphanumeric characters (see
    :mod:`corpuscle.kernels.ngrams` for the exact normalization). As in that method, an item shorter than ``n``
    words is flagged when all of its words appear in a training document in a row, down to ``min_words`` words
    (default 8, the lower bound the paper uses against spurious matches -- from memory); shorter items are not
    checked and are counted as such. This is a published heuristic: a shared 13-gram is neither proof of
    contamination (a common phrase, a quotation both copied) nor its absence proof of a clean benchmark (a
    paraphrase, a translation, a re-tokenized copy), and the findings say so.

Evaluation sets (``--eval FILE``, repeatable; ``eval = [...]`` in the settings file)
    JSON Lines (``.jsonl``, ``.jsonl.gz``, ``.jsonl.zst``), Parquet or Arrow files with one item per record: its
    text in the field ``text_field`` (default ``text``), or its token ids in ``tokens_field`` (default
    ``input_ids``, decoded with ``--tokenizer``). An item is located by the file as given and its 0-based record
    index (for JSON Lines the 0-based line, blank lines included). The items' n-grams are hashed into a sorted
    array (:class:`corpuscle.kernels.ngrams.NgramSet`) built once per process and cached by the files' paths,
    sizes and modification times, so every shard a process scans shares it, and the rule itself stays small when
    it travels to worker processes or a cluster (workers read the evaluation files themselves: give paths they
    all see).

Training shards
    Documents of a text column are split into words directly. A tokenized shard (no text column) needs
    ``--tokenizer``: its rows are cut into segments at special tokens (the tokenizer's special tokens and the
    ``eos_id`` / ``bos_id`` / ``pad_id`` given or inferred) and each segment is *decoded* to text and compared as
    words. We decode rather than tokenize the evaluation items because only words keep the published definition
    (lowercasing and punctuation cannot be undone on token ids) and give the same answer on a text corpus and on
    the same corpus tokenized -- except for a span cut by a window boundary: segments never join across rows, so
    an overlap survives a cut only when one side still holds ``n`` whole words (a verbatim span of ``2n + 1`` words
    or more always does: a cut splits at most one word). Every hash match is verified word by word before it counts.

What is reported
    Per evaluation file, one finding listing the contaminated items (instances: the file and the item's record
    index), the share of the set contaminated, and for each item the training rows that overlap it (shard, row, and
    offset of the first shared n-gram: the character offset in a text document, the token offset in a row of
    token ids), ``max_locations`` per item, counted in full. The drop list (``--drop-list``) receives every training
    row that shares an n-gram with an evaluation item.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
import pyarrow as pa
from corpuscle.findings import Finding, Level
from corpuscle.io.batch import Shard, is_integer_list, is_text
from corpuscle.io.sources import open_shard, shard_format
from corpuscle.kernels import ngrams
from corpuscle.kernels.decode import decode_spans, first_token_of_word, id_limit, segments, special_ids
from corpuscle.kernels.text import document_text
from corpuscle.rules.api import CorpusResult, Rule, ShardState, pct

DROP_LIST = "drop-list"
METHOD = ("word n-gram overlap after lowercasing and splitting on non-alphanumeric characters (Brown et al. 2020, "
          "Language Models are Few-Shot Learners, Appendix C): a heuristic that neither proves nor excludes "
          "contamination")


class EvalSetError(Exception):
    """An evaluation file that cannot be used at all (reported as a finding on that file)."""


@dataclass
class EvalFile:
    """One evaluation file: its uri as given, the record index of each item that has words, the global index of
    its first item, and what could not be read."""

    uri: str
    lines: np.ndarray
    first: int
    items_read: int = 0
    short: int = 0
    problems: list = field(default_factory=list)  # (record index or -1, why)
    error: str | None = None
    line_based: bool = True


@dataclass
class EvalSets:
    """All evaluation files of a scan as one n-gram set; item ``i`` (global) is ``files[f].lines[i - first]``."""

    files: list[EvalFile]
    grams: ngrams.NgramSet
    item_file: np.ndarray  # index into files of each global item
    item_line: np.ndarray  # record index of each global item in its file
    checked: np.ndarray  # bool per global item: long enough to be checked (min_words)
    #: Items shorter than n words (but of min_words or more) are matched whole: their words as one k-gram, by k.
    whole: dict = field(default_factory=dict)

    def tables(self):
        """``(k, NgramSet)`` for every span length looked up: n first, then the lengths of the short items."""
        return [(self.grams.n, self.grams)] + sorted(self.whole.items())

    @property
    def items(self) -> int:
        return len(self.item_line)


def _file_key(path: str) -> tuple:
    real = os.path.realpath(path)
    try:
        stat = os.stat(real)
        return path, real, stat.st_size, stat.st_mtime_ns
    except OSError:
        return path, real, -1, -1


def load_eval_sets(paths, n: int, text_field: str, tokens_field: str, tokenizer: str | None,
                   min_words: int | None = None) -> EvalSets:
    """The evaluation sets named by ``paths``, read once per process (cached by path, size and modification time of
    each file and of the tokenizer, and by the options)."""
    tok_key = _file_key(tokenizer) if tokenizer else None
    min_words = n if min_words is None else min(n, min_words)
    return _load(tuple(_file_key(p) for p in paths), n, text_field, tokens_field, tok_key, min_words)


@lru_cache(maxsize=2)
def _load(keys, n, text_field, tokens_field, tok_key, min_words) -> EvalSets:
    texts, files, first = [], [], 0  # texts: one Arrow array per file
    tokenizer = tok_key[0] if tok_key else None
    for key in keys:
        file = EvalFile(key[0], np.zeros(0, np.int64), first)
        try:
            lines, items = _read_items(file, text_field, tokens_field, tokenizer)
        except EvalSetError as exc:
            file.error = str(exc)
            lines, items = [], pa.array([], type=pa.large_string())
        file.lines = np.asarray(lines, dtype=np.int64)
        file.items_read = len(items)
        texts.append(items)
        first += len(items)
        files.append(file)
    joined = pa.concat_arrays(texts) if texts else pa.array([], type=pa.large_string())
    del texts
    words = ngrams.split_words_chunked(joined)
    del joined
    counts = np.diff(words.texts)
    whole = {}
    for k in np.unique(counts[(counts >= min_words) & (counts < n)]).tolist():  # short items, matched whole
        whole[k] = ngrams.NgramSet(words, k, starts=words.texts[:-1][counts == k])
    grams = ngrams.NgramSet(words, n)
    item_file = np.repeat(np.arange(len(files)), [f.items_read for f in files])
    item_line = np.concatenate([f.lines for f in files]) if files else np.zeros(0, np.int64)
    checked = counts >= min_words
    for f_index, file in enumerate(files):
        file.short = int((~checked[item_file == f_index]).sum())
    return EvalSets(files, grams, item_file, item_line, checked, whole)


def _read_items(file: EvalFile, text_field: str, tokens_field: str, tokenizer: str | None):
    """``(record indices, texts)`` of the file's items; problems of single records go to ``file.problems``."""
    fmt = shard_format(file.uri)
    if fmt is None:
        raise EvalSetError("is not a JSON Lines, Parquet or Arrow file (by its name): give an evaluation set as .jsonl, "
                           ".jsonl.gz, .jsonl.zst, .parquet or .arrow")
    size = _file_key(file.uri)[2]
    shard = Shard(uri=file.uri, path=file.uri, format=fmt[0], compression=fmt[1], length=size)
    file.line_based = shard.line_based
    lines, texts = [], []
    fields_seen = False
    with open_shard(shard, tokens_column=tokens_field) as reader:
        for batch in reader:
            for problem in batch.problems:
                if problem.kind in ("unreadable", "empty"):
                    raise EvalSetError(f"cannot be read: {problem.detail}")
                if problem.kind not in ("invalid-utf8",):
                    file.problems.append((int(problem.row), f"{problem.kind}: {problem.detail}"))
            if not len(batch):
                continue
            if batch.has(text_field) and is_text(batch.type_of(text_field)):
                fields_seen = True
                column = batch.column(text_field)
                valid = np.asarray(column.is_valid(), dtype=bool)
                texts.append(column.filter(pa.array(valid)).cast(pa.large_string()))
                lines.append(batch.rows[valid])
                for row in batch.rows[~valid].tolist():
                    file.problems.append((row, f"no {text_field!r} text"))
            elif batch.has(tokens_field) and is_integer_list(batch.type_of(tokens_field)):
                fields_seen = True
                if tokenizer is None:
                    raise EvalSetError(f"holds token ids ({tokens_field!r}) and no text: give --tokenizer FILE to "
                                       "decode them")
                from corpuscle.kernels.tokenize import load_tokenizer

                flat = batch.flat(tokens_field)
                loaded = load_tokenizer(tokenizer)
                lo, hi, row = segments(flat.values, flat.offsets, special_ids(loaded), id_limit(loaded))
                pieces = decode_spans(loaded, flat.values, lo, hi)  # an item's pieces between special tokens
                decoded = [""] * len(batch)
                for r, piece in zip(row.tolist(), pieces):  # one entry per piece, joined by a space
                    decoded[r] = f"{decoded[r]} {piece}" if decoded[r] else piece
                texts.append(pa.array(decoded, type=pa.large_string()))
                lines.append(batch.rows)
            else:
                for row in batch.rows.tolist():
                    file.problems.append((row, f"no {text_field!r} text and no {tokens_field!r} token ids"))
    if not fields_seen:
        raise EvalSetError(f"has no item with a {text_field!r} text field or {tokens_field!r} token ids: set "
                           "text_field (or tokens_field) under [rule.eval-overlap] to the field that holds the items")
    lines = np.concatenate(lines) if lines else np.zeros(0, np.int64)
    return lines, pa.concat_arrays(texts) if texts else pa.array([], type=pa.large_string())


class EvalOverlapState(ShardState):
    def __init__(self, shard, settings, cap, kinds=()):
        super().__init__(shard, settings, cap, kinds)
        self.items = 0
        # While the shard is fed (from the first overlap on): per evaluation item, the training rows that overlap it
        # (in full) and the locations kept; at the end only the items with overlaps are kept (``hit_items`` and
        # ``hit_counts``), so that a state stays small however large the evaluation set.
        self.counts: np.ndarray | None = None
        self.stored: np.ndarray | None = None
        self.hit_items = np.zeros(0, np.int64)
        self.hit_counts = np.zeros(0, np.int64)
        self.located: list[np.ndarray] = []  # (item, row, offset) rows, at most max_locations per item
        self.rows: list[np.ndarray] = []  # contaminated training rows (for the drop list)


class EvalOverlap(Rule):
    """Evaluation items that share an n-gram of words (13 by default) with a training document, after lowercasing
    and splitting on non-alphanumeric characters: the contamination check of Brown et al. 2020 (Language Models
    are Few-Shot Learners, Appendix C). Evaluation text in the training data inflates every benchmark number
    measured on it. Runs when evaluation sets are given (--eval FILE, repeatable, or eval = [...] in the settings
    file): JSON Lines, Parquet or Arrow with a text field per item, or token ids decoded with --tokenizer. Text
    shards are compared directly; tokenized shards are decoded with --tokenizer (segments between special tokens)
    and compared as words, so an overlap cut by a window boundary is found when one side still holds n words.
    Items shorter than n words are matched whole, down to min_words (8) words. Every hash match is verified word by
    word. N-gram overlap is a published heuristic: it neither proves nor excludes contamination."""

    id = "eval-overlap"
    level = Level.error
    summary = "Evaluation items that share a word n-gram (13 by default) with the training data (--eval)."
    help = ("Drop the training documents that contain evaluation text (`--drop-list FILE` writes one JSON line "
            "{\"uri\", \"row\"} per contaminated training row) and rebuild the shards, or report the benchmark on "
            "its items that are not listed. Check a few listed overlaps by eye first: a shared n-gram can be a "
            "common phrase or a quotation. Options: n (words per n-gram), min_words (shorter items are not "
            "checked; items of min_words to n - 1 words are matched whole), text_field / tokens_field (where the "
            "items are), max_locations (training rows listed per item).")
    kinds = {
        "contaminated": "evaluation items of one file that share an n-gram with the training data",
        "unreadable-items": "records of an evaluation file that hold no item (bad line, no text field)",
        "unusable-eval-file": "an evaluation file that cannot be read as a set of items",
    }
    needs = {"text_column": "text", "tokens_column": "int-list"}
    needs_any = True
    options = {"n": 13, "min_words": 8, "text_field": "text", "tokens_field": "input_ids", "max_locations": 20}
    outputs = (DROP_LIST,)
    State = EvalOverlapState
    splittable = True

    def __init__(self, **options):
        super().__init__(**options)
        n = self.opts["n"]
        if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= 64:
            raise ValueError(f"rule {self.id}: n must be a whole number of words from 1 to 64, got {n!r}; hint: 13 "
                             "is the published default, 8 its lower bound")
        for key in ("text_field", "tokens_field"):
            if not isinstance(self.opts[key], str) or not self.opts[key]:
                raise ValueError(f"rule {self.id}: {key} must be a field name, got {self.opts[key]!r}")
        low = self.opts["min_words"]
        if isinstance(low, bool) or not isinstance(low, int) or not 1 <= low:
            raise ValueError(f"rule {self.id}: min_words must be a whole number >= 1, got {low!r}; hint: 8, the "
                             "published lower bound")
        cap = self.opts["max_locations"]
        if isinstance(cap, bool) or not isinstance(cap, int) or cap < 0:
            raise ValueError(f"rule {self.id}: max_locations must be a whole number >= 0, got {cap!r}")

    # -- which batches ----------------------------------------------------------------------------------------
    def missing(self, batch, settings):
        if not getattr(settings, "eval", ()):
            return "no evaluation set given (--eval FILE, or eval = [...] in the settings file)"
        if batch.has(settings.text_column) and is_text(batch.type_of(settings.text_column)):
            return None
        if batch.has(settings.tokens_column) and is_integer_list(batch.type_of(settings.tokens_column)):
            if settings.tokenizer is None:
                return ("a tokenized shard is compared with the evaluation sets as text: give --tokenizer FILE to "
                        "decode it")
            return None
        return (f"neither a text column {settings.text_column!r} nor a token column {settings.tokens_column!r} "
                "(integer lists)")

    def _sets(self, settings) -> EvalSets:
        return load_eval_sets(tuple(dict.fromkeys(settings.eval)), self.opts["n"], self.opts["text_field"],
                              self.opts["tokens_field"], settings.tokenizer, self.opts["min_words"])

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        if getattr(settings, "eval", ()):
            state.items = self._sets(settings).items
        return state

    # -- the scan ---------------------------------------------------------------------------------------------
    def feed(self, state, batch):
        settings = state.settings
        sets = self._sets(settings)
        if sets.items == 0:
            return
        n = sets.grams.n
        if batch.has(settings.text_column) and is_text(batch.type_of(settings.text_column)):
            text = document_text(batch, settings)
            if text.array is None:
                return
            words = ngrams.split_words(text.array)
            text_row = np.arange(len(batch), dtype=np.int64)
            spans = None
        else:
            from corpuscle.kernels.tokenize import load_tokenizer

            tokenizer = load_tokenizer(settings.tokenizer)
            flat = batch.flat(settings.tokens_column)
            stop = set(special_ids(tokenizer).tolist())
            stop |= {v for v in (settings.eos_id, settings.bos_id, settings.pad_id) if v is not None}
            lo, hi, text_row = segments(flat.values, flat.offsets, np.array(sorted(stop), dtype=np.int64),
                                        id_limit(tokenizer))
            words = ngrams.split_words(decode_spans(tokenizer, flat.values, lo, hi))
            spans = (tokenizer, flat, lo, hi, text_row)
        found_train, found_eval = [], []
        for k, table in sets.tables():
            starts = ngrams.ngram_starts(words, k)
            which, eval_start = table.lookup(ngrams.ngram_hashes(words, starts, k))
            if k == n:
                state.count(ngrams=len(starts))
            state.count(candidates=len(which))
            if len(which) == 0:
                continue
            train_start = starts[which].astype(np.int64)
            good = ngrams.verify(words, train_start, table.words, eval_start, k)
            state.count(verified=int(good.sum()), collisions=int((~good).sum()))
            found_train.append(train_start[good])
            found_eval.append(eval_start[good])
        if not found_train:
            return
        train_start, eval_start = np.concatenate(found_train), np.concatenate(found_eval)
        if len(train_start) == 0:
            return
        text = np.searchsorted(words.texts, train_start, side="right") - 1
        row = text_row[text]
        item = sets.grams.text_of(eval_start)
        # One entry per (row, item): the first shared n-gram of the row.
        order = np.lexsort((train_start, item, row))
        row, item, text, train_start = row[order], item[order], text[order], train_start[order]
        first = np.ones(len(row), dtype=bool)
        first[1:] = (row[1:] != row[:-1]) | (item[1:] != item[:-1])
        row, item, text, train_start = row[first], item[first], text[first], train_start[first]
        if state.counts is None:
            state.counts = np.zeros(state.items, np.int64)
            state.stored = np.zeros(state.items, np.int64)
        np.add.at(state.counts, item, 1)
        state.rows.append(batch.rows[np.unique(row)])
        # Locations kept: the first rows of each item, up to max_locations per item in the shard.
        by_item = np.lexsort((row, item))
        grouped = item[by_item]
        begins = np.flatnonzero(np.r_[True, grouped[1:] != grouped[:-1]])
        rank = np.arange(len(grouped)) - np.repeat(begins, np.diff(np.r_[begins, len(grouped)]))
        keep = by_item[rank < (self.opts["max_locations"] - state.stored[grouped])]
        if len(keep) == 0:
            return
        np.add.at(state.stored, item[keep], 1)
        word_in_text = train_start[keep] - words.texts[text[keep]]
        offsets = self._offsets(batch, settings, text[keep], word_in_text, spans)
        state.located.append(np.stack([item[keep], batch.rows[row[keep]], offsets], axis=1))

    @staticmethod
    def _offsets(batch, settings, texts, word_in_text, spans) -> np.ndarray:
        """The offset of each kept overlap's first word: the character offset in a document, or the token offset in
        a row of token ids (a few decodes per location, for the kept locations only)."""
        out = np.full(len(texts), -1, dtype=np.int64)
        if spans is None:
            column = document_text(batch, settings).array
            for k, (t, w) in enumerate(zip(texts.tolist(), word_in_text.tolist())):
                out[k] = ngrams.word_char_offset(column[t].as_py() or "", w)
            return out
        tokenizer, flat, lo, hi, seg_row = spans
        for k, (t, w) in enumerate(zip(texts.tolist(), word_in_text.tolist())):
            ids = flat.values[int(lo[t]):int(hi[t])].tolist()
            at = first_token_of_word(tokenizer, ids, w, lambda s: len(ngrams.normalized_words(s)))
            if at >= 0:
                out[k] = int(lo[t]) - int(flat.offsets[seg_row[t]]) + at
        return out

    def end(self, state):
        if state.counts is not None:
            state.hit_items = np.flatnonzero(state.counts)
            state.hit_counts = state.counts[state.hit_items]
        state.counts = state.stored = None
        state.located = [np.concatenate(state.located)] if state.located else []
        state.rows = [np.unique(np.concatenate(state.rows))] if state.rows else []
        return state

    def merge(self, first, second):
        merged = super().merge(first, second)
        items = np.concatenate([first.hit_items, second.hit_items])
        merged.hit_items, where = np.unique(items, return_inverse=True)
        merged.hit_counts = np.bincount(where, weights=np.concatenate([first.hit_counts, second.hit_counts]),
                                        minlength=len(merged.hit_items)).astype(np.int64)
        located = [a for a in (first.located + second.located)]
        merged.located = [_capped(np.concatenate(located), self.opts["max_locations"])] if located else []
        merged.rows = [np.concatenate(first.rows + second.rows)] if (first.rows or second.rows) else []
        return merged

    # -- the report -------------------------------------------------------------------------------------------
    def corpus(self, states):
        states = [s for s in states if getattr(s.settings, "eval", ())]
        if not states:
            return CorpusResult([], {})
        sets = self._sets(states[0].settings)
        cap = states[0].cap
        counts = np.zeros(sets.items, np.int64)
        located, uris = [], []
        drop = []
        for s_index, state in enumerate(states):
            np.add.at(counts, state.hit_items, state.hit_counts)
            if state.located:
                located.append(np.concatenate(
                    [state.located[0], np.full((len(state.located[0]), 1), s_index, np.int64)], axis=1))
            for rows in state.rows:
                drop += [{"uri": state.uri, "row": r} for r in rows.tolist()]
            uris.append(state.uri)
        table = np.concatenate(located) if located else np.zeros((0, 4), np.int64)
        table = table[np.lexsort((table[:, 1], table[:, 3], table[:, 0]))]  # by item, then shard, then row
        findings = []
        for f_index, file in enumerate(sets.files):
            findings += self._file_findings(sets, f_index, file, counts, table, uris, cap)
        hits = counts > 0
        totals = {key: int(sum(s.stats.get(key, 0) for s in states))
                  for key in ("ngrams", "candidates", "verified", "collisions")}
        metrics = {"evalOverlap": {
            "n": sets.grams.n, "minWords": min(sets.grams.n, self.opts["min_words"]), "files": len(sets.files),
            "items": sets.items,
            "itemsChecked": int(sets.checked.sum()), "itemsTooShort": int((~sets.checked).sum()),
            "contaminatedItems": int(hits.sum()),
            "contaminatedShare": round(float(hits.sum()) / max(1, int(sets.checked.sum())), 6),
            "evalNgrams": sum(len(t) for _, t in sets.tables()),
            "evalSetBytes": sets.grams.nbytes + sum(t.hashes.nbytes + t.starts.nbytes + t.filter.nbytes
                                                    for _, t in sets.whole.items()),
            "trainingNgrams": totals["ngrams"], "hashMatches": totals["candidates"],
            "verifiedMatches": totals["verified"], "hashCollisions": totals["collisions"],
            "contaminatedTrainingRows": len(drop), "method": "heuristic (n-gram overlap)",
        }}
        return CorpusResult(findings, metrics, {DROP_LIST: drop})

    def _file_findings(self, sets, f_index, file, counts, table, uris, cap) -> list[Finding]:
        out = []
        n = sets.grams.n
        if file.error:
            out.append(Finding(self.id, Level.error, f"evaluation file {file.uri} {file.error}.", file.uri,
                               kind="unusable-eval-file", count=1, evidence={"evalFile": file.uri}))
            return out
        if file.problems:
            rows = np.array([r for r, _ in file.problems if r >= 0], dtype=np.int64)
            shown = rows[:cap]
            out.append(Finding(
                self.id, Level.warning,
                f"{len(file.problems):,} record(s) of evaluation file {file.uri} hold no item and were not checked "
                f"(first: {file.problems[0][1]}). Fix those records, or set text_field / tokens_field under "
                "[rule.eval-overlap].", file.uri, kind="unreadable-items", count=len(file.problems), rows=shown,
                offsets=np.full(len(shown), -1, np.int64), instance_uris=[file.uri] * len(shown),
                truncated=len(rows) > len(shown), evidence={"evalFile": file.uri},
                start_line=int(shown[0]) + 1 if file.line_based and len(shown) else None))
        lo, hi = file.first, file.first + file.items_read
        items = np.arange(lo, hi)[counts[lo:hi] > 0]
        checked = int(sets.checked[lo:hi].sum())
        if len(items) == 0:
            return out
        lines = sets.item_line[items]
        listed = items[:cap]
        t_item = table[:, 0]
        overlaps = []
        for item in listed.tolist():
            a, b = np.searchsorted(t_item, [item, item + 1])
            where = [{"uri": uris[int(s)], "row": int(r), **({"offset": int(o)} if o >= 0 else {})}
                     for _, r, o, s in table[a:b].tolist()]
            shown = where[:self.opts["max_locations"]]
            overlaps.append({"line": int(sets.item_line[item]), "trainingRows": int(counts[item]),
                             "locations": shown, "locationsTruncated": int(counts[item]) > len(shown)})
        example = overlaps[0]
        place = ""
        if example["locations"]:
            loc = example["locations"][0]
            at = f" at offset {loc['offset']:,}" if "offset" in loc else ""
            place = f" (e.g. record {example['line']:,} overlaps {loc['uri']} row {loc['row']:,}{at})"
        low = min(n, self.opts["min_words"])
        short = f"; {file.short:,} item(s) shorter than {low} words were not checked" if file.short else ""
        whole = f" (or, for items of {low} to {n - 1} words, all of their words in a row)" if low < n else ""
        message = (f"{len(items):,} of {checked:,} checked evaluation items of {file.uri} ({pct(len(items), checked)}) "
                   f"share a {n}-word n-gram with the training data{whole}{place}{short}. Method: {METHOD}. Drop the "
                   "contaminated training rows (--drop-list FILE lists them) or report the benchmark without these "
                   "items.")
        out.append(Finding(
            self.id, self.level, message, file.uri, kind="contaminated", count=int(len(items)),
            rows=lines[:cap].astype(np.int64), offsets=np.full(len(listed), -1, np.int64),
            instance_uris=[file.uri] * len(listed), truncated=len(items) > len(listed),
            start_line=int(lines.min()) + 1 if file.line_based else None,
            evidence={"evalFile": file.uri, "n": n, "items": int(hi - lo), "itemsChecked": checked,
                      "contaminatedItems": int(len(items)), "contaminatedShare": round(len(items) / max(1, checked), 6),
                      "method": METHOD, "overlaps": overlaps}))
        return out


def _capped(table: np.ndarray, cap: int) -> np.ndarray:
    """The rows of an (item, row, offset) table, at most ``cap`` per item (the first in the table's order)."""
    if len(table) == 0:
        return table
    order = np.argsort(table[:, 0], kind="stable")
    grouped = table[order, 0]
    begins = np.flatnonzero(np.r_[True, grouped[1:] != grouped[:-1]])
    rank = np.arange(len(grouped)) - np.repeat(begins, np.diff(np.r_[begins, len(grouped)]))
    return table[np.sort(order[rank < cap])]


RULES = [EvalOverlap]
