"""A matrix of shard layouts as real pipelines write them, each clean and with one planted defect.

Documents are invented sentences over an invented vocabulary, tokenized with a small word-level tokenizer trained
here with the ``tokenizers`` library.  Every layout is built from the same documents by plain Python over lists
(nothing from corpuscle), and carries the truth a scan must reproduce: the documents as the shard stores them
(their lengths), the padding, the rows cut at the window, and, for the defective copy, the rule, kind, row and
offset of the planted defect.

    python -m tests.layouts OUT_DIR     # write every layout (clean and defective) as Parquet, to look at

Special ids (the tokenizer's special tokens, trained first): pad 0, bos 1, eos 2, unk 3.  Every document begins
with the same content word, so that a word at every document start is never taken for a bos.
"""
from __future__ import annotations

import dataclasses
import json
import os
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

PAD, BOS, EOS, UNK = 0, 1, 2, 3
SPECIALS = ["<pad>", "<s>", "</s>", "<unk>"]
WINDOW = 64
IGNORE = -100
FIRST_WORD = "valdor"  # starts every document
VOCAB = 0  # the trained tokenizer's vocabulary size (set by matrix)


# -- invented text and a tokenizer trained on it ----------------------------------------------------------------

def invented_words(rng, n=300) -> list[str]:
    """Pronounceable invented words made of random syllables (no natural-language text)."""
    onsets, vowels, codas = "bdfgklmnprstvz", "aeiou", ["", "n", "r", "s", "l", "m"]
    words = set()
    while len(words) < n:
        k = int(rng.integers(1, 4))
        words.add("".join(onsets[rng.integers(len(onsets))] + vowels[rng.integers(len(vowels))]
                          + codas[rng.integers(len(codas))] for _ in range(k)))
    words.discard(FIRST_WORD)
    return sorted(words)


def invented_documents(n_docs=90, seed=11) -> list[str]:
    """Documents of invented sentences; lengths log-normal around 30 words, a few longer than two windows."""
    rng = np.random.default_rng(seed)
    words = invented_words(rng)
    lengths = np.clip(rng.lognormal(3.3, 0.7, n_docs).astype(int), 3, 3 * WINDOW)
    lengths[[5, 17, 40]] = [150, 2 * WINDOW + 7, WINDOW + 1]  # long ones, whatever the draw
    docs = []
    for n in lengths:
        body = [words[i] for i in rng.integers(0, len(words), int(n) - 1)]
        if len(body) > 4 and rng.random() < 0.5:  # the opening word also occurs inside documents, as words do
            body[int(rng.integers(2, len(body)))] = FIRST_WORD
        docs.append(" ".join([FIRST_WORD] + body))
    return docs


def train_tokenizer(docs: list[str]):
    """A word-level tokenizer trained on ``docs`` with the special tokens first (ids 0..3)."""
    from tokenizers import Tokenizer, models, pre_tokenizers, trainers

    tok = Tokenizer(models.WordLevel(unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    tok.train_from_iterator(docs, trainers.WordLevelTrainer(special_tokens=SPECIALS))
    assert [tok.token_to_id(t) for t in SPECIALS] == [PAD, BOS, EOS, UNK]
    return tok


# -- a layout -----------------------------------------------------------------------------------------------------

@dataclasses.dataclass
class Layout:
    name: str
    columns: dict                 # column name -> list of rows (or a pyarrow array)
    facts: dict                   # the settings that describe the shard
    doc_lengths: list[int]        # every document as stored (tokens, or UTF-8 bytes / tokens of text)
    slots: int = 0                # every position of every token row
    padding: int = 0              # positions that are padding
    cut_rows: list[int] = dataclasses.field(default_factory=list)  # rows whose document was cut at the window
    packed: bool = True           # documents run across rows
    defect: tuple | None = None   # (rule id, kind, row, offset) of the planted defect
    allowed: frozenset = frozenset()  # warning kinds ("rule:kind") the data supports on the clean shard
    unit: str = "tokens"

    def write(self, path: str) -> str:
        table = pa.table(self.columns)
        pq.write_table(table, path, row_group_size=37)  # several batches: documents cross batch edges
        return path


def _stream(docs_ids, bos: bool, eos: bool) -> tuple[list[int], list[int], list[int]]:
    """The documents one after another: token stream, position within its document, and document lengths."""
    stream, pos, lengths = [], [], []
    for ids in docs_ids:
        doc = ([BOS] if bos else []) + list(ids) + ([EOS] if eos else [])
        stream += doc
        pos += list(range(len(doc)))
        lengths.append(len(doc))
    return stream, pos, lengths


def _stored_lengths(lengths: list[int], kept: int) -> list[int]:
    """Document lengths of a stream cut to its first ``kept`` tokens (the last one maybe partly)."""
    out, total = [], 0
    for n in lengths:
        if total >= kept:
            break
        out.append(min(n, kept - total))
        total += n
    return out


def shifted(ids: list[int]) -> list[int]:
    return ids[1:] + [IGNORE]


def chunked(docs_ids, positions: str | None, bos=False, eos=True, labels: str | None = None,
            boundary_ignored=False, lengths_column: str | None = None) -> Layout:
    """Concatenate-and-chunk: documents one after another, cut into full windows (the remainder is dropped).

    ``positions``: None (no column), ``"window"`` (0..W-1 in every window), ``"document"`` (restart at every
    document start and every window start) or ``"carry"`` (restart at document starts only, running on across
    windows).  ``labels``: None, ``"shifted"`` or ``"aligned"``; ``boundary_ignored`` puts the ignore index where
    the target would be the next document's first token.  ``lengths_column``: ``"doc_lengths"`` or
    ``"cu_seqlens"`` (the pieces of documents in each window)."""
    stream, pos, lengths = _stream(docs_ids, bos, eos)
    rows = len(stream) // WINDOW
    kept = rows * WINDOW
    stream, pos = stream[:kept], pos[:kept]
    doc_start = [p == 0 for p in pos]
    ids = [stream[r * WINDOW:(r + 1) * WINDOW] for r in range(rows)]
    cols = {"input_ids": ids}
    if positions == "window":
        cols["position_ids"] = [list(range(WINDOW)) for _ in range(rows)]
    elif positions == "carry":
        cols["position_ids"] = [pos[r * WINDOW:(r + 1) * WINDOW] for r in range(rows)]
    elif positions == "document":
        out = []
        for r in range(rows):
            p, row = 0, []
            for t in range(r * WINDOW, (r + 1) * WINDOW):
                p = 0 if (doc_start[t] or t == r * WINDOW) else p + 1
                row.append(p)
            out.append(row)
        cols["position_ids"] = out
    if labels:
        lab = []
        for r in range(rows):
            base = r * WINDOW
            if labels == "shifted":
                row = shifted(ids[r])
                if boundary_ignored:  # the target is the next document's first token
                    row = [IGNORE if t + 1 < WINDOW and doc_start[base + t + 1] else v for t, v in enumerate(row)]
            else:
                row = list(ids[r])
                if boundary_ignored:
                    row = [IGNORE if doc_start[base + t] else v for t, v in enumerate(row)]
            lab.append(row)
        cols["labels"] = lab
    if lengths_column:
        pieces = []
        for r in range(rows):
            starts = [t - r * WINDOW for t in range(r * WINDOW, (r + 1) * WINDOW) if doc_start[t] or t == r * WINDOW]
            bounds = starts + [WINDOW]
            pieces.append([b - a for a, b in zip(bounds, bounds[1:])])
        if lengths_column == "doc_lengths":
            cols["doc_lengths"] = pieces
        else:
            cols["cu_seqlens"] = [list(np.cumsum([0] + p).tolist()) for p in pieces]
    stored = _stored_lengths(lengths, kept)
    allowed = {"overlong-document:longer-than-window"} if max(stored) > WINDOW else set()
    if positions in (None, "window") and not lengths_column:
        allowed.add("document-attention:crossing")
    facts = {"eos_id": EOS if eos else None, "bos_id": BOS if bos else None, "seq_len": WINDOW,
             "separator": "both" if bos and eos else "bos-before" if bos else "eos-after"}
    if labels:
        facts["labels"] = labels
    return Layout("", cols, {k: v for k, v in facts.items() if v is not None}, stored, slots=kept,
                  allowed=frozenset(allowed))


def best_fit(docs_ids, pad_positions: str) -> Layout:
    """Best-fit decreasing packing of the documents that fit a window (each with eos), padded with PAD, attention
    mask, shifted labels with the ignore index on padding and at each row's last real token; position_ids
    restart per document and are 0 on padding (``"zero"``) or count on through it (``"count"``)."""
    docs = sorted(([*ids, EOS] for ids in docs_ids if len(ids) + 1 <= WINDOW), key=len, reverse=True)
    bins: list[list[list[int]]] = []
    room: list[int] = []
    for doc in docs:
        fits = [i for i, r in enumerate(room) if r >= len(doc)]
        if fits:
            i = min(fits, key=lambda j: room[j])
            bins[i].append(doc)
            room[i] -= len(doc)
        else:
            bins.append([doc])
            room.append(WINDOW - len(doc))
    ids, mask, labels, positions, lengths = [], [], [], [], []
    for docs_in in bins:
        row = [t for d in docs_in for t in d]
        n = len(row)
        pos = [p for d in docs_in for p in range(len(d))]
        fill = WINDOW - n
        ids.append(row + [PAD] * fill)
        mask.append([1] * n + [0] * fill)
        labels.append(row[1:] + [IGNORE] * (fill + 1))
        positions.append(pos + ([0] * fill if pad_positions == "zero" else list(range(pos[-1] + 1, pos[-1] + 1 + fill))))
        lengths += [len(d) for d in docs_in]
    padding = sum(WINDOW - sum(m) for m in mask)
    cols = {"input_ids": ids, "attention_mask": mask, "labels": labels, "position_ids": positions}
    return Layout("", cols, {"eos_id": EOS, "pad_id": PAD, "seq_len": WINDOW, "labels": "shifted"}, lengths,
                  slots=WINDOW * len(ids), padding=padding, packed=False,
                  allowed=frozenset({"truncation-waste:budget"} if padding / (WINDOW * len(ids)) > 0.1 else ()))


def one_per_row(docs_ids, side="right", mask=True, pad=PAD, labels=False) -> Layout:
    """One document per row with eos, padded to the window on ``side``; longer ones cut at the window (no eos)."""
    ids, masks, lab, lengths, cut = [], [], [], [], []
    for r, doc in enumerate(docs_ids):
        doc = [*doc, EOS]
        if len(doc) > WINDOW:
            doc = doc[:WINDOW]
            cut.append(r)
        fill = WINDOW - len(doc)
        row = doc + [pad] * fill if side == "right" else [pad] * fill + doc
        m = [1] * len(doc) + [0] * fill if side == "right" else [0] * fill + [1] * len(doc)
        ids.append(row)
        masks.append(m)
        lab.append([v if here and after else IGNORE for v, here, after in zip(shifted(row), m, m[1:] + [0])])
        lengths.append(len(doc))
    cols = {"input_ids": ids}
    if mask:
        cols["attention_mask"] = masks
    if labels:
        cols["labels"] = lab
    slots = WINDOW * len(ids)
    padding = slots - sum(lengths)
    facts = {"eos_id": EOS, "pad_id": pad, "seq_len": WINDOW}
    if labels:
        facts["labels"] = "shifted"
    allowed = {"truncation-waste:budget", "overlong-document:cut"}
    return Layout("", cols, facts, lengths, slots=slots, padding=padding, cut_rows=cut, packed=False,
                  allowed=frozenset(allowed))


def variable_rows(docs_ids) -> Layout:
    """One document (with eos) per row, rows as long as their documents (no padding), none over the window."""
    rows = [[*d, EOS] for d in docs_ids if len(d) + 1 <= WINDOW]
    return Layout("", {"input_ids": rows}, {"eos_id": EOS, "seq_len": WINDOW}, [len(r) for r in rows],
                  slots=sum(len(r) for r in rows), packed=False)


def typed(layout: Layout, kind: str) -> Layout:
    """The same layout with input_ids stored as ``kind``: uint16, int32, int64, large_list or fixed_size_list."""
    rows = layout.columns["input_ids"]
    if kind in ("uint16", "int32", "int64"):
        arr = pa.array(rows, type=pa.list_(getattr(pa, kind)()))
    elif kind == "large_list":
        arr = pa.array(rows, type=pa.large_list(pa.int32()))
    else:
        arr = pa.array(rows, type=pa.list_(pa.int32(), WINDOW))
    cols = dict(layout.columns)
    cols["input_ids"] = arr
    return dataclasses.replace(layout, columns=cols)


def text_layout(docs: list[str], tokenizer_path: str | None) -> Layout:
    """Raw text, one document per row."""
    if tokenizer_path is None:
        lengths, unit = [len(d.encode()) for d in docs], "bytes"
        facts = {}
    else:
        from tokenizers import Tokenizer

        tok = Tokenizer.from_file(tokenizer_path)
        lengths = [len(tok.encode(d, add_special_tokens=False).ids) for d in docs]
        unit, facts = "tokens", {"tokenizer": tokenizer_path, "seq_len": WINDOW}
    allowed = {"overlong-document:longer-than-window"} if unit == "tokens" and max(lengths) > WINDOW else set()
    return Layout("", {"text": list(docs)}, facts, lengths, packed=False, unit=unit, allowed=frozenset(allowed))


# -- planted defects ----------------------------------------------------------------------------------------------

def _copy_columns(layout: Layout) -> dict:
    return {k: (v if isinstance(v, pa.Array) else [list(r) if isinstance(r, list) else r for r in v])
            for k, v in layout.columns.items()}


def inner_document_start(layout: Layout, skip=3) -> tuple[int, int]:
    """A (row, offset) inside a window where a document starts after an eos (not at a row start)."""
    ids = layout.columns["input_ids"]
    found = [(r, t) for r, row in enumerate(ids) for t in range(1, len(row)) if row[t - 1] == EOS]
    return found[skip]


def plant(layout: Layout, tokenizer=None) -> Layout:
    """The defective copy of ``layout``: one defect at a known row and offset (see each branch)."""
    cols = _copy_columns(layout)
    name = layout.name
    if name.startswith("text"):
        texts = cols["text"]
        r = 7
        off = texts[r].index(" ") + 1
        texts[r] = texts[r][:off] + "\ufffd" + texts[r][off:]
        defect = ("encoding-error", "replacement-character", r, off)
    elif "doc_lengths" in cols:  # a length column that contradicts the tokens: sum != the row's real length
        r = 9
        cols["doc_lengths"][r][-1] += 1
        defect = ("missing-separator", "lengths-mismatch", r, WINDOW)
    elif "cu_seqlens" in cols:  # a boundary moved one token: it no longer follows an eos
        r = [i for i, c in enumerate(cols["cu_seqlens"]) if len(c) > 3][2]
        cols["cu_seqlens"][r][1] += 1
        defect = ("missing-separator", "lengths-vs-separators", r, cols["cu_seqlens"][r][1])
    elif name.startswith("best-fit"):  # a label trained on padding
        ids = cols["input_ids"]
        r = next(i for i, m in enumerate(cols["attention_mask"]) if sum(m) < WINDOW - 2 and i > 4)
        t = sum(cols["attention_mask"][r]) + 1
        cols["labels"][r][t] = ids[r][t]
        defect = ("padding-loss", "trained-padding", r, t)
    elif name.startswith("one-per-row") and "attention_mask" in cols:  # the last real token is not eos
        ids, mask = cols["input_ids"], cols["attention_mask"]
        r = next(i for i, m in enumerate(mask) if 0 < sum(m) < WINDOW - 2 and i > 6)
        t = max(i for i, v in enumerate(mask[r]) if v)
        ids[r][t] = 5
        if "labels" in cols and t > 0:
            cols["labels"][r][t - 1] = 5
        defect = ("missing-separator", "unterminated-row", r, t)
    elif name.startswith("one-per-row-pad-is-eos"):  # a token id outside the vocabulary (a doubled eos would be
        ids = cols["input_ids"]                         # indistinguishable from padding here)
        r, t = 12, 5
        ids[r][t] = VOCAB
        defect = ("token-range", "above-vocab", r, t)
    elif name.startswith("one-per-row") or name.startswith("variable"):  # a doubled eos at a row's end
        ids = cols["input_ids"]
        r = 12
        t = max(i for i, v in enumerate(ids[r]) if v == EOS and (i == 0 or ids[r][i - 1] != EOS))
        ids[r][t - 1] = EOS
        if "labels" in cols and cols["labels"][r][t - 2] != IGNORE:  # labels still follow the tokens
            cols["labels"][r][t - 2] = EOS
        defect = ("missing-separator", "doubled-eos", r, t)
    elif "position_ids" in cols and name.startswith("chunk") and "window" not in name:
        # a missing separator: the eos before an inner document start becomes a content token
        ids = cols["input_ids"]
        sep = EOS if layout.facts.get("separator", "eos-after") != "bos-before" else BOS
        if sep == EOS:
            r, t = inner_document_start(layout)
            ids[r][t - 1] = 5
            if "labels" in cols:
                lab = cols["labels"][r]
                if layout.facts.get("labels") == "aligned":
                    lab[t - 1] = 5 if lab[t - 1] != IGNORE else IGNORE
                elif t >= 2 and lab[t - 2] != IGNORE:
                    lab[t - 2] = 5
            defect = ("missing-separator", "boundary-no-eos", r, t)
        else:
            found = [(r, t) for r, row in enumerate(ids) for t in range(1, len(row)) if row[t] == BOS]
            r, t = found[3]
            ids[r][t] = 5
            defect = ("missing-separator", "boundary-no-bos", r, t)
    else:  # packed without per-document positions: a doubled separator inside a window
        ids = cols["input_ids"]
        sep = BOS if layout.facts.get("separator") == "bos-before" else EOS
        found = [(r, t) for r, row in enumerate(ids) for t in range(2, len(row) - 1) if row[t] == sep]
        r, t = found[4]
        if sep == EOS:
            ids[r][t + 1] = EOS
            t += 1
        else:
            ids[r][t - 1] = BOS
        defect = ("missing-separator", f"doubled-{'eos' if sep == EOS else 'bos'}", r, t)
        if "labels" in cols:
            cols["labels"][r] = shifted(ids[r]) if layout.facts.get("labels") == "shifted" else list(ids[r])
    if isinstance(layout.columns.get("input_ids"), pa.Array):
        cols["input_ids"] = pa.array(cols["input_ids"].to_pylist() if isinstance(cols["input_ids"], pa.Array)
                                     else cols["input_ids"], type=layout.columns["input_ids"].type)
    return dataclasses.replace(layout, name=name + "+defect", columns=cols, defect=defect)


def _typed_plant(layout: Layout) -> Layout:
    """For typed copies: plant on plain lists, then store the tokens in the layout's type again."""
    plain = dataclasses.replace(layout, columns={**layout.columns,
                                                 "input_ids": layout.columns["input_ids"].to_pylist()})
    bad = plant(plain)
    cols = dict(bad.columns)
    cols["input_ids"] = pa.array(cols["input_ids"], type=layout.columns["input_ids"].type)
    return dataclasses.replace(bad, columns=cols)


# -- the matrix ---------------------------------------------------------------------------------------------------

def matrix(tmpdir: str) -> tuple[list[Layout], str]:
    """Every layout of the matrix (clean ones), and the path of the tokenizer file written into ``tmpdir``."""
    docs = invented_documents()
    tok = train_tokenizer(docs)
    tok_path = os.path.join(tmpdir, "tokenizer.json")
    tok.save(tok_path)
    ids = [tok.encode(d, add_special_tokens=False).ids for d in docs]
    assert all(UNK not in d and PAD not in d and EOS not in d and BOS not in d for d in ids)
    global VOCAB
    VOCAB = tok.get_vocab_size()
    out: dict[str, Layout] = {}
    out["chunk-positions-window"] = chunked(ids, "window")
    out["chunk-positions-document"] = chunked(ids, "document")
    out["chunk-positions-carry"] = chunked(ids, "carry")
    out["chunk-no-positions"] = chunked(ids, None)
    out["chunk-bos-before"] = chunked(ids, "document", bos=True, eos=False)
    out["chunk-bos-eos"] = chunked(ids, "document", bos=True, eos=True)
    out["chunk-doc_lengths"] = chunked(ids, None, lengths_column="doc_lengths")
    out["chunk-cu_seqlens"] = chunked(ids, None, lengths_column="cu_seqlens")
    out["chunk-labels-shifted"] = chunked(ids, "document", labels="shifted")
    out["chunk-labels-shifted-boundary"] = chunked(ids, "document", labels="shifted", boundary_ignored=True)
    out["chunk-labels-aligned"] = chunked(ids, "document", labels="aligned")
    out["chunk-labels-aligned-boundary"] = chunked(ids, "document", labels="aligned", boundary_ignored=True)
    out["best-fit-positions-zero"] = best_fit(ids, "zero")
    out["best-fit-positions-count"] = best_fit(ids, "count")
    out["one-per-row-right"] = one_per_row(ids, "right", labels=True)
    out["one-per-row-left"] = one_per_row(ids, "left", labels=True)
    out["one-per-row-right-no-mask"] = one_per_row(ids, "right", mask=False, labels=True)
    out["one-per-row-left-no-mask"] = one_per_row(ids, "left", mask=False, labels=True)
    out["one-per-row-pad-is-eos"] = one_per_row(ids, "right", pad=EOS, labels=True)
    out["one-per-row-pad-is-eos-no-mask"] = one_per_row(ids, "right", mask=False, pad=EOS, labels=True)
    out["variable-rows"] = variable_rows(ids)
    out["chunk-positions-window-labels-shifted-boundary"] = chunked(ids, "window", labels="shifted",
                                                                    boundary_ignored=True)
    out["chunk-no-positions-labels-aligned-boundary"] = chunked(ids, None, labels="aligned", boundary_ignored=True)
    out["chunk-bos-eos-no-positions"] = chunked(ids, None, bos=True, eos=True)
    out["chunk-bos-before-no-positions"] = chunked(ids, None, bos=True, eos=False)
    out["chunk-doc_lengths-positions"] = chunked(ids, "document", lengths_column="doc_lengths")
    for kind in ("uint16", "int32", "int64", "large_list", "fixed_size_list"):
        out[f"chunk-{kind}"] = typed(out["chunk-positions-document"], kind)
    out["text-bytes"] = text_layout(docs, None)
    out["text-tokenizer"] = text_layout(docs, tok_path)
    layouts = []
    for name, layout in out.items():
        facts = dict(layout.facts)
        if not name.startswith("text"):
            facts["vocab_size"] = VOCAB
        layouts.append(dataclasses.replace(layout, name=name, facts=facts))
    return layouts, tok_path


def defective(layout: Layout) -> Layout:
    if isinstance(layout.columns.get("input_ids"), pa.Array):
        return _typed_plant(layout)
    return plant(layout)


if __name__ == "__main__":
    import tempfile

    folder = sys.argv[1] if len(sys.argv) > 1 else tempfile.mkdtemp(prefix="layouts-")
    os.makedirs(folder, exist_ok=True)
    layouts, _ = matrix(folder)
    for lay in layouts:
        bad = defective(lay)
        lay.write(os.path.join(folder, f"{lay.name}.parquet"))
        bad.write(os.path.join(folder, f"{bad.name}.parquet"))
        print(json.dumps({"name": lay.name, "facts": lay.facts, "documents": len(lay.doc_lengths),
                          "defect": bad.defect}))
    print(folder)
