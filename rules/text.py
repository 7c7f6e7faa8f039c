"""The text of documents: special-token strings written into it, bytes and characters that are not text, and
documents with nothing in them.

These rules read the text column of a text shard (``text_column``, default ``text``); ``empty-document`` also reads
the token column of a tokenized shard. A location is ``(row, offset)``: for text, ``offset`` is the 0-based
character offset in the document's text, counted in Unicode code points (as Python indexes a ``str``); for token
rows, the 0-based token index in the row.

Every check is a whole-batch pass: Arrow compute kernels (``match_substring_regex``, ``utf8_is_space``,
``binary_length``) or numpy over the Arrow string buffer. Python touches only the documents that matched, to turn
a match into an exact character offset and to count which string or character it was.

Text in a Parquet or Arrow shard is checked to be valid UTF-8 first (Arrow's own validation); a batch holding
invalid bytes is repaired (each bad sequence read as U+FFFD, as the JSON Lines reader does) before the kernels
see it, and the bad rows are reported by ``encoding-error``.
"""
from __future__ import annotations

import functools
import os
import string
from collections import Counter

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.types as pat
import regex
from corpuscle.findings import Finding, Level
from corpuscle.io.batch import is_integer_list, is_text
from corpuscle.kernels.text import DocumentText, document_text, has_text
from corpuscle.rules.api import CorpusResult, Rule, consistent, pct, share


def _true_rows(mask: pa.Array) -> np.ndarray:
    """Batch-local rows where a boolean Arrow array is true (null counts as false)."""
    return np.flatnonzero(mask.fill_null(False).to_numpy(zero_copy_only=False))


def _keep(kept: list, values, cap: int) -> None:
    """Extend ``kept`` with ``values`` up to ``cap`` items (per-instance evidence stays O(cap))."""
    room = cap - len(kept)
    if room > 0:
        kept.extend(list(values)[:room])


# -- special-token-text -----------------------------------------------------------------------------------------

#: Spellings of special tokens that many tokenizers use (common practice: end-of-text, sentence start and end,
#: padding, unknown, classifier/separator/mask markers, chat-turn markers).
COMMON_SPECIAL_STRINGS = ("<|endoftext|>", "</s>", "<s>", "<pad>", "<unk>", "[CLS]", "[SEP]", "[PAD]", "[MASK]",
                          "<|im_start|>", "<|im_end|>")


def tokenizer_special_strings(path: str) -> tuple[tuple[str, ...], str | None]:
    """The ``content`` of every ``added_tokens`` entry marked ``"special": true`` in a tokenizer JSON file.

    Returns the strings and None, or no strings and why the file could not be used. Whitespace-only strings are
    left out: they would match nearly every document.
    """
    try:
        stat = os.stat(path)
    except OSError as exc:
        return (), f"cannot open the tokenizer file {path}: {exc.strerror or exc}"
    return _read_tokenizer(path, stat.st_mtime_ns, stat.st_size)


@functools.lru_cache(maxsize=16)
def _read_tokenizer(path: str, mtime_ns: int, size: int) -> tuple[tuple[str, ...], str | None]:
    try:
        with open(path, "rb") as fh:
            data = orjson.loads(fh.read())
    except OSError as exc:
        return (), f"cannot read the tokenizer file {path}: {exc.strerror or exc}"
    except orjson.JSONDecodeError as exc:
        return (), f"the tokenizer file {path} is not JSON ({exc})"
    added = data.get("added_tokens") if isinstance(data, dict) else None
    if not isinstance(added, list):
        return (), f"the tokenizer file {path} has no \"added_tokens\" list (is it a tokenizer JSON file?)"
    found = [entry.get("content") for entry in added if isinstance(entry, dict) and entry.get("special") is True]
    return tuple(dict.fromkeys(s for s in found if isinstance(s, str) and s.strip())), None


def _re2_literal(text: str) -> str:
    """A literal for Arrow's RE2 patterns: ASCII punctuation escaped, everything else as is."""
    return "".join("\\" + ch if ch in string.punctuation else ch for ch in text)


@functools.lru_cache(maxsize=64)
def special_patterns(strings: tuple[str, ...]) -> tuple[str, "regex.Pattern"]:
    """One alternation of all strings, longest first (so the longest string wins where several start at the same
    place), for Arrow's RE2 (the whole-batch filter) and for the ``regex`` package (offsets in the matches)."""
    ordered = sorted(strings, key=lambda s: (-len(s), s))
    return "|".join(map(_re2_literal, ordered)), regex.compile("|".join(map(regex.escape, ordered)))


#: The first-byte prefilter of special-token-text is used when the strings begin with at most this many distinct
#: bytes and those bytes occur fewer times than this share of the documents (so in fewer documents); otherwise
#: RE2 reads every document.
PREFILTER_BYTES = 4
PREFILTER_SHARE = 0.5


def _candidate_rows(array: pa.Array, strings: tuple[str, ...]) -> np.ndarray | None:
    """Batch-local rows holding a byte that some string begins with (a numpy pass far cheaper than RE2 over all
    the text), or None when that would not narrow the search: RE2 then reads every document."""
    first = sorted({s.encode("utf-8")[0] for s in strings})
    if len(first) > PREFILTER_BYTES:
        return None
    offsets, view = string_buffers(array)
    mask = view == first[0]
    for byte in first[1:]:
        mask |= view == byte
    if np.count_nonzero(mask) > PREFILTER_SHARE * len(array):  # more candidate bytes than that: stop early
        return None
    rows = np.unique(np.searchsorted(offsets, np.flatnonzero(mask), side="right") - 1)
    return None if rows.size > PREFILTER_SHARE * len(array) else rows


def _validate_strings(rule_id: str, value) -> list[str]:
    if isinstance(value, str) or not isinstance(value, (list, tuple)) \
            or not all(isinstance(s, str) and s.strip() for s in value):
        raise ValueError(f"rule {rule_id}: strings must be a list of non-blank strings, got {value!r} "
                         "(hint: strings = [\"<|endoftext|>\", \"</s>\"]; [] searches only the tokenizer's)")
    return list(dict.fromkeys(value))


class SpecialTokenText(Rule):
    """The literal spelling of a special token (``<|endoftext|>``, ``</s>``, ``[SEP]`` ...) inside a document's
    text. A tokenizer that parses special tokens in text maps each one to the control token, planting a false
    document boundary, turn marker or padding token in the middle of a document: the model learns that documents
    end or restart where they do not, and a chat template can be spoofed from data.

    The strings searched are the special tokens of the tokenizer file when ``tokenizer`` is set (its
    ``added_tokens`` entries with ``"special": true``) plus the option ``strings`` (default: widespread generic
    spellings, common practice). Matching is literal, case-sensitive and non-overlapping; where several strings
    start at the same place the longest one counts. One finding per shard: count = documents holding a string,
    instance offset = 0-based character offset of the document's first occurrence; the evidence gives
    occurrences in total, per string and per listed instance."""

    id = "special-token-text"
    level = Level.warning
    summary = "Special-token strings written inside document text."
    kinds = {
        "special-token-string": "special-token strings inside document text",
        "tokenizer-unreadable": "a tokenizer file whose special tokens cannot be read",
    }
    help = ("Remove these strings from the text in the data-prep step, or tokenize text with special-token parsing "
            "turned off so that they stay ordinary text. Option strings: the literal strings searched besides the "
            "tokenizer's special tokens (default: common generic spellings); '<s>' also matches the HTML "
            "strike-through tag, so drop it from the list for raw HTML corpora whose tokenizer has no '<s>'.")
    needs = {"text_column": "text"}
    options = {"strings": list(COMMON_SPECIAL_STRINGS)}
    KIND = "special-token-string"

    def __init__(self, **options):
        super().__init__(**options)
        self.opts["strings"] = _validate_strings(self.id, self.opts["strings"])

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        from_tokenizer, state.tokenizer_error = (), None
        if settings.tokenizer:
            from_tokenizer, state.tokenizer_error = tokenizer_special_strings(settings.tokenizer)
        state.sources = {}
        for s in from_tokenizer:
            state.sources[s] = "tokenizer"
        for s in self.opts["strings"]:
            state.sources[s] = "tokenizer+option" if s in state.sources else "option"
        state.strings = tuple(state.sources)
        state.per_string = Counter()
        state.per_instance = []  # occurrences in each listed instance's document
        return state

    splittable = True

    def merge(self, first, second):
        merged = super().merge(first, second)
        merged.per_string = Counter(first.per_string)
        merged.per_string.update(second.per_string)  # strings in the order first met, as in one scan
        merged.per_instance = list(first.per_instance)
        _keep(merged.per_instance, second.per_instance, first.cap)
        return merged

    def feed(self, state, batch):
        text = document_text(batch, state.settings)
        state.count(documents=text.rows - text.nulls)
        if text.array is None or not state.strings:
            return
        re2, pattern = special_patterns(state.strings)
        local = _candidate_rows(text.array, state.strings)
        if local is None:
            local = _true_rows(pc.match_substring_regex(text.array, re2))
        elif local.size:
            local = local[_true_rows(pc.match_substring_regex(text.array.take(pa.array(local)), re2))]
        if not local.size:
            return
        rows, firsts, counts = [], [], []
        for row, doc in zip(local.tolist(), text.array.take(pa.array(local)).to_pylist()):
            found = pattern.findall(doc)
            if found:  # the regex package decides; RE2 only picked the documents to look at
                rows.append(row)
                firsts.append(pattern.search(doc).start())
                counts.append(len(found))
                state.per_string.update(found)
        state.hit(self.KIND, batch, np.asarray(rows, dtype=np.int64), firsts)
        state.count(occurrences=sum(counts))
        _keep(state.per_instance, counts, state.cap)

    def report(self, state):
        hits = state.hits.get(self.KIND)
        if not hits:
            return []
        docs, total, occ = hits.count, state.stats["documents"], state.stats["occurrences"]
        ranked = state.per_string.most_common()
        listed = ", ".join(f"{s!r} x{n:,}" for s, n in ranked[:8]) + (", ..." if len(ranked) > 8 else "")
        where = "the tokenizer's special tokens and the generic spellings" if state.settings.tokenizer \
            else "generic special-token spellings (common practice; set tokenizer to add your tokenizer's own)"
        return [self.finding(
            state, self.KIND,
            f"{docs:,} of {total:,} documents with text ({pct(docs, total)}) contain {occ:,} occurrence(s) of "
            f"special-token strings as plain text ({listed}; searched: {where}; offset = first occurrence, in "
            "characters). A tokenizer that parses special tokens in text turns each into a control token and plants "
            "a false boundary inside the document. Remove them before tokenizing, or tokenize with special-token "
            "parsing turned off.",
            documents=docs, totalDocuments=int(total), share=share(docs, total), occurrences=int(occ),
            strings=dict(ranked), stringSources={s: state.sources[s] for s, _ in ranked},
            occurrencesPerInstance=list(state.per_instance),
            offsetMeaning="0-based character offset of the first occurrence in the document",
            matching="literal, case-sensitive, non-overlapping, longest string first",
            stringsSearched=len(state.strings),
            **({"tokenizer": state.settings.tokenizer} if state.settings.tokenizer else {}))]

    def corpus(self, states):
        errors = dict.fromkeys(s.tokenizer_error for s in states if getattr(s, "tokenizer_error", None))
        return CorpusResult([Finding(self.id, Level.warning, f"{error}: only the option strings were searched for special-token "
                        "text. Point tokenizer at a tokenizer JSON file (with an \"added_tokens\" list) or unset it.",
                        None, kind="tokenizer-unreadable", count=1, evidence={"error": error})
                for error in errors], {})


# -- encoding-error -----------------------------------------------------------------------------------------------

#: Control characters as the Unicode Standard names them (section 23.1 "Control Codes" of Unicode 15.0, citation
#: from memory): C0 = U+0000..U+001F, C1 = U+0080..U+009F; U+007F DELETE is also a control character (general
#: category Cc in the Unicode Character Database, which tests/test_text.py checks against Python's unicodedata).
#: Tab, line feed and carriage return are ordinary text.
C0 = range(0x00, 0x20)
DEL = 0x7F
C1 = range(0x80, 0xA0)
ALLOWED_CONTROLS = "\t\n\r"


def control_class(code_point: int) -> str:
    return "C0" if code_point in C0 else "C1" if code_point in C1 else "DEL"


def _code_point_name(code_point: int) -> str:
    return f"U+{code_point:04X}"


def string_buffers(array: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """A string array's value offsets (int64, rebased to start at 0) and its UTF-8 bytes as a uint8 view."""
    if len(array) == 0:
        return np.zeros(1, dtype=np.int64), np.zeros(0, dtype=np.uint8)
    width = np.int64 if pat.is_large_string(array.type) else np.int32
    stored = np.frombuffer(array.buffers()[1], dtype=width)[array.offset:array.offset + len(array) + 1]
    origin = int(stored[0])
    offsets = stored.astype(np.int64) - origin
    data = array.buffers()[2]
    view = np.frombuffer(data, dtype=np.uint8)[origin:origin + int(offsets[-1])] if data is not None \
        else np.zeros(0, dtype=np.uint8)
    return offsets, view


def byte_scan(array: pa.Array, disallowed: np.ndarray):
    """Control characters and U+FFFD in a (valid UTF-8) string array, from its data buffer.

    In UTF-8, C0 controls and DEL are the single bytes 0x00-0x1F and 0x7F, C1 controls are 0xC2 followed by
    0x80-0x9F, U+FFFD is EF BF BD; none of these bytes occurs inside another character's encoding. One pass finds
    the candidate bytes. Returns, as flat byte positions from the first value's start, the controls (with their
    code points) and the U+FFFD, plus the value offsets and bytes (see :func:`string_buffers`).
    """
    offsets, view = string_buffers(array)
    candidate = view < 0x20
    candidate |= view == 0x7F
    candidate |= view == 0xC2
    candidate |= view == 0xEF
    pos = np.flatnonzero(candidate)
    last = max(view.size - 1, 0)
    lead = view[pos]
    after = view[np.minimum(pos + 1, last)]
    code = np.where(lead == 0xC2, after, lead)  # the code point of a one- or two-byte candidate
    control = disallowed[code]
    fffd = (lead == 0xEF) & (after == 0xBF) & (view[np.minimum(pos + 2, last)] == 0xBD)
    return pos[control], code[control], pos[fffd], offsets, view


def _per_row(positions: np.ndarray, offsets: np.ndarray, valid: np.ndarray | None):
    """Rows holding byte positions (sorted), with how many each and the first one's byte offset in the row."""
    rows = np.searchsorted(offsets, positions, side="right") - 1
    if valid is not None:
        keep = valid[rows]
        rows, positions = rows[keep], positions[keep]
    rows, first, counts = np.unique(rows, return_index=True, return_counts=True)
    return rows, positions[first] - offsets[rows], counts


def _char_offsets(view: np.ndarray, offsets: np.ndarray, rows: np.ndarray, byte_offsets: np.ndarray) -> list[int]:
    """Byte offsets within rows as character offsets: the UTF-8 lead bytes before them (matching rows only)."""
    out = []
    for row, b in zip(rows.tolist(), byte_offsets.tolist()):
        start = int(offsets[row])
        out.append(int(np.count_nonzero((view[start:start + b] & 0xC0) != 0x80)))
    return out


def _validate_allowed(rule_id: str, value) -> str:
    controls = set(C0) | {DEL} | set(C1)
    if not isinstance(value, str) or any(ord(ch) not in controls for ch in value):
        raise ValueError(f"rule {rule_id}: allowed_controls must be a string of control characters "
                         f"(U+0000-U+001F, U+007F, U+0080-U+009F), got {value!r} (hint: \"\\t\\n\\r\\f\" also "
                         "allows form feed)")
    return "".join(sorted(set(value)))


class EncodingError(Rule):
    """Bytes and characters that are not text: invalid UTF-8, U+FFFD replacement characters, control characters.

    * ``invalid-utf8``: a JSON Lines line holding bytes that are not UTF-8 (the reader replaces each bad sequence
      with U+FFFD and still reads the record), or a Parquet/Arrow text value that is not UTF-8 (repaired the same
      way). Offset = the character offset of the first U+FFFD in the document's text; when the bad bytes lie
      outside the text field of a JSON line, the instance has no offset and ``byteOffsets`` gives the byte offset
      of the first bad byte in the line. Count = lines (documents).
    * ``replacement-character``: U+FFFD already in the text, the trace of an earlier decoding step that met bytes
      it could not read; the original characters are lost. Rows with invalid bytes are reported above instead.
    * ``control-character``: C0 (U+0000-U+001F), DEL (U+007F) and C1 (U+0080-U+009F) control characters other
      than tab, line feed and carriage return (option ``allowed_controls``), usually left by binary data,
      terminal escape sequences or a Latin-1/Windows-1252 mix-up; they become rare tokens or byte-fallback
      tokens the model learns to emit.

    One finding per kind per shard: count = documents, instance offset = first occurrence in the document
    (0-based characters); the evidence gives occurrences in total and per listed instance, and for controls the
    count per code point. A JSON Lines shard with invalid bytes but no text column is still checked for them.
    """

    id = "encoding-error"
    level = Level.warning
    summary = "Invalid UTF-8, U+FFFD replacement characters and control characters in document text."
    kinds = {
        "invalid-utf8": "documents whose bytes are not valid UTF-8",
        "replacement-character": "documents holding U+FFFD",
        "control-character": "documents holding control characters",
    }
    help = ("Find the step that decoded the source with the wrong encoding or with errors='replace' and decode "
            "it as what it is (check for Latin-1/Windows-1252 and for binary files in the crawl); drop documents "
            "that are mostly replacement or control characters; strip stray controls with a normalisation step. "
            "Option allowed_controls (default tab, line feed, carriage return): control characters that are text "
            "in this corpus, e.g. \"\\t\\n\\r\\f\" to allow form feeds.")
    needs = {"text_column": "text"}
    options = {"allowed_controls": ALLOWED_CONTROLS}
    KINDS = ("invalid-utf8", "replacement-character", "control-character")

    def __init__(self, **options):
        super().__init__(**options)
        self.opts["allowed_controls"] = _validate_allowed(self.id, self.opts["allowed_controls"])
        self.disallowed = np.zeros(256, dtype=bool)
        self.disallowed[[*C0, DEL, *C1]] = True
        self.disallowed[[ord(ch) for ch in self.opts["allowed_controls"]]] = False

    def missing(self, batch, settings):
        """Fed when the text column is there, or when the reader met invalid UTF-8 in the batch's lines."""
        if any(p.kind == "invalid-utf8" for p in batch.problems):
            return None
        return super().missing(batch, settings)

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.per_instance = {kind: [] for kind in self.KINDS}
        state.byte_offsets = []  # invalid bytes outside the text field: {"row", "byteOffset"} in the line
        state.code_points = np.zeros(0xA0, dtype=np.int64)
        return state

    splittable = True

    def merge(self, first, second):
        merged = super().merge(first, second)
        merged.per_instance = {}
        for kind, kept in first.per_instance.items():
            merged.per_instance[kind] = list(kept)
            _keep(merged.per_instance[kind], second.per_instance.get(kind, ()), first.cap)
        merged.byte_offsets = list(first.byte_offsets)
        _keep(merged.byte_offsets, second.byte_offsets, first.cap)
        merged.code_points = first.code_points + second.code_points
        return merged

    def feed(self, state, batch):
        text = document_text(batch, state.settings) if batch.has(state.settings.text_column) and \
            is_text(batch.type_of(state.settings.text_column)) else None
        if text is not None:
            state.count(documents=text.rows - text.nulls)
        bad_rows = self._invalid_bytes(state, batch, text)
        if text is None or text.array is None:
            return
        controls, code_points, fffd, offsets, view = byte_scan(text.array, self.disallowed)
        valid = None if not text.array.null_count else text.array.is_valid().to_numpy(zero_copy_only=False)
        for kind, positions in (("replacement-character", fffd), ("control-character", controls)):
            rows, first, counts = _per_row(positions, offsets, valid)
            if kind == "replacement-character" and bad_rows.size:
                keep = ~np.isin(rows, bad_rows)
                rows, first, counts = rows[keep], first[keep], counts[keep]
            if not rows.size:
                continue
            state.hit(kind, batch, rows, _char_offsets(view, offsets, rows, first))
            state.count(**{f"{kind}-occurrences": int(counts.sum())})
            _keep(state.per_instance[kind], counts.tolist(), state.cap)
        if controls.size:
            if valid is not None:
                code_points = code_points[valid[np.searchsorted(offsets, controls, side="right") - 1]]
            state.code_points += np.bincount(code_points, minlength=0xA0)[:0xA0]

    def _invalid_bytes(self, state, batch, text: DocumentText | None) -> np.ndarray:
        """Record the rows with invalid bytes: Parquet/Arrow values repaired by :func:`document_text` (exact
        offsets) and JSON Lines lines the reader repaired (the first U+FFFD of the text, else the byte offset in
        the line as evidence). Returns their batch-local rows."""
        docs = text.array if text is not None else None
        rows, offsets, replaced, local = [], [], [], []
        for i, _, char in (text.invalid if text is not None else ()):
            rows.append(int(batch.rows[i]))
            offsets.append(char)
            replaced.append(docs[i].as_py().count("\ufffd"))
            local.append(i)
        for p in batch.problems:
            if p.kind != "invalid-utf8":
                continue
            i = int(np.searchsorted(batch.rows, p.row))
            read = i < batch.rows.size and batch.rows[i] == p.row  # the record was kept (it always is)
            value = docs[i].as_py() if docs is not None and read else None
            char = value.find("\ufffd") if value else -1
            if char < 0:
                _keep(state.byte_offsets, [{"row": int(p.row), "byteOffset": int(p.offset)}], state.cap)
            rows.append(int(p.row))
            offsets.append(char)
            replaced.append(value.count("\ufffd") if value else 0)
            if read:
                local.append(i)
        if rows:
            state.hit_at("invalid-utf8", rows, offsets)
            state.count(replaced=sum(replaced))
            _keep(state.per_instance["invalid-utf8"], replaced, state.cap)
        return np.asarray(local, dtype=np.int64)

    def report(self, state):
        out, st = [], state.stats
        total = int(st["documents"])
        base = dict(offsetMeaning="0-based character offset of the first occurrence in the document")
        hits = state.hits.get("invalid-utf8")
        if hits:
            n, outside = hits.count, len(state.byte_offsets)
            note = (f"; in {outside:,} line(s) the bad bytes lie outside the text field: no offset, see byteOffsets "
                    "for the byte offset in the line") if outside else ""
            out.append(self.finding(
                state, "invalid-utf8",
                f"{n:,} record(s) hold bytes that are not UTF-8 (read with each bad sequence replaced by U+FFFD: "
                f"{int(st['replaced']):,} in their text; offset = first U+FFFD in the text{note}). The original "
                "characters are lost and the replacement character is trained on. Re-decode the source with its real "
                "encoding, or drop these records.",
                documents=n, totalDocuments=total, share=share(n, total), replacementsInText=int(st["replaced"]),
                occurrencesPerInstance=list(state.per_instance["invalid-utf8"]), byteOffsets=list(state.byte_offsets),
                **base))
        hits = state.hits.get("replacement-character")
        if hits:
            n, occ = hits.count, int(st["replacement-character-occurrences"])
            out.append(self.finding(
                state, "replacement-character",
                f"{n:,} of {total:,} documents with text ({pct(n, total)}) contain {occ:,} U+FFFD replacement "
                "character(s) (offset = the first): an earlier step decoded bytes it could not read and the original "
                "text is lost. Re-decode the source with its real encoding, or drop documents where they are "
                "frequent.",
                documents=n, totalDocuments=total, share=share(n, total), occurrences=occ,
                occurrencesPerInstance=list(state.per_instance["replacement-character"]), **base))
        hits = state.hits.get("control-character")
        if hits:
            n, occ = hits.count, int(st["control-character-occurrences"])
            seen = {int(cp): int(c) for cp, c in enumerate(state.code_points.tolist()) if c}
            by_class = Counter()
            for cp, c in seen.items():
                by_class[control_class(cp)] += c
            ranked = sorted(seen.items(), key=lambda item: -item[1])[:8]
            listed = ", ".join(f"{_code_point_name(cp)} x{c:,}" for cp, c in ranked)
            allowed = ", ".join(map(_code_point_name, map(ord, self.opts["allowed_controls"]))) or "none"
            out.append(self.finding(
                state, "control-character",
                f"{n:,} of {total:,} documents with text ({pct(n, total)}) contain {occ:,} control character(s) "
                f"other than {allowed} ({listed}; offset = the first). They come from binary data, terminal escapes "
                "or a Latin-1/Windows-1252 mix-up and become rare tokens the model learns to emit. Strip them in a "
                "normalisation step, or allow them with allowed_controls.",
                documents=n, totalDocuments=total, share=share(n, total), occurrences=occ,
                occurrencesPerInstance=list(state.per_instance["control-character"]),
                codePoints={_code_point_name(cp): c for cp, c in sorted(seen.items())},
                classes=dict(sorted(by_class.items())),
                allowedControls=[_code_point_name(ord(ch)) for ch in self.opts["allowed_controls"]], **base))
        return out


# -- empty-document -----------------------------------------------------------------------------------------------

#: Per separator convention: the zero-length document the rule looks for (see EmptyDocument).
ZERO_LENGTH_FORMS = {
    "eos-after": "eos at a document start (position_ids 0) right after another eos",
    "bos-before": "bos at a document start directly followed by another document start with bos",
    "both": "bos at a document start (position_ids 0) directly followed by eos",
}


class EmptyDocument(Rule):
    """Documents with nothing in them. An empty document costs a slot in every epoch and, once tokenized, is a bare
    separator (eos right after eos) that teaches the model to end a document as soon as it starts.

    On text (the ``text_column``):

    * ``empty-text``: text that is empty or null (a null or missing text field counts as empty; the evidence
      says how many were null);
    * ``whitespace-text``: text of whitespace only (Unicode White_Space, as pyarrow's ``utf8_is_space``).

    On tokenized rows (the ``tokens_column``; offsets are token indices):

    * ``empty-row``: rows whose input_ids are empty or null;
    * ``all-padding``: rows with tokens but none real: attention_mask 0 everywhere, or, without a mask, every id
      equal to pad_id;
    * ``zero-length-document`` (needs position_ids and the separator ids): a document of separators only where
      position_ids mark documents. Under ``eos-after``: an eos at position_ids 0 whose previous token in the row
      is also an eos (offset = the second eos; a row's first token is not checked, its previous eos is in another
      row); under ``bos-before``: a bos at position_ids 0 followed directly by another document start with bos
      (offset = the first); under ``both``: a bos at position_ids 0 followed directly by eos (offset = the bos).
      Masked-out positions, and a trailing run of pad_id when there is no mask, are not documents.
      ``missing-separator`` reports doubled separators anywhere; this reports the ones that position_ids declare
      to be a document.

    Runs on a batch that has either a text column or a token column (the base rule's ``needs`` means "all of",
    so :meth:`missing` is overridden to mean "either").
    """

    id = "empty-document"
    level = Level.warning
    summary = "Empty or whitespace-only documents; token rows with no real tokens; zero-length packed documents."
    kinds = {
        "empty-text": "empty or null text",
        "whitespace-text": "text of whitespace only",
        "empty-row": "token rows with no tokens",
        "all-padding": "token rows with no real token",
        "zero-length-document": "zero-length documents inside packed rows (two separators in a row)",
    }
    help = ("Filter documents whose text is empty after stripping whitespace before tokenizing, and drop rows with "
            "no real tokens before packing; a zero-length packed document usually means empty strings reached the "
            "tokenizer (which then emits a bare separator): filter them upstream.")
    needs = {"text_column": "text", "tokens_column": "int-list"}  # either of them: see missing()
    needs_any = True

    def missing(self, batch, settings):
        """Either column is enough: a text shard gets the text checks, a tokenized shard the token checks."""
        tok = settings.tokens_column
        if has_text(batch, settings) or (batch.has(tok) and is_integer_list(batch.type_of(tok))):
            return None
        return (f"neither a text column {settings.text_column!r} (strings) nor a token column {tok!r} (integer "
                "lists); one of them is needed")

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.padding_from = None
        return state

    splittable = True

    def merge(self, first, second):
        merged = super().merge(first, second)
        # each batch sets it, so the last part that set it decides, as in one scan
        merged.padding_from = second.padding_from if second.padding_from is not None else first.padding_from
        return merged

    def feed(self, state, batch):
        s = state.settings
        if has_text(batch, s):
            self._text(state, batch)
        if batch.has(s.tokens_column) and is_integer_list(batch.type_of(s.tokens_column)):
            self._tokens(state, batch)

    def _text(self, state, batch):
        text = document_text(batch, state.settings)
        state.count(documents=text.rows)
        if text.array is None:
            state.hit_at("empty-text", batch.rows)
            state.count(null_text=text.rows)
            return
        array = text.array
        null = array.is_null().to_numpy(zero_copy_only=False)
        empty = null | (pc.binary_length(array).fill_null(0).to_numpy(zero_copy_only=False) == 0)
        state.count(null_text=int(null.sum()))
        state.hit("empty-text", batch, np.flatnonzero(empty))
        state.hit("whitespace-text", batch, _true_rows(pc.utf8_is_space(array)))

    def _tokens(self, state, batch):
        s = state.settings
        state.count(rows=len(batch))
        state.hit("empty-row", batch, np.flatnonzero(batch.flat(s.tokens_column).lengths == 0))
        batch = consistent(batch, [s.tokens_column, s.mask_column, s.positions_column])
        tokens = batch.flat(s.tokens_column)
        values = tokens.values
        real = None
        if batch.has(s.mask_column) and is_integer_list(batch.type_of(s.mask_column)):
            real = batch.flat(s.mask_column).values != 0
            state.padding_from = "attention_mask"
        elif s.pad_id is not None:
            state.padding_from = "pad_id"
        if real is not None or s.pad_id is not None:
            counted = real if real is not None else values != s.pad_id
            all_padding = (tokens.row_counts(counted) == 0) & (tokens.lengths > 0)
            state.hit("all-padding", batch, np.flatnonzero(all_padding))
        if batch.has(s.positions_column) and is_integer_list(batch.type_of(s.positions_column)):
            self._zero_length(state, batch, tokens, batch.flat(s.positions_column).values, real)

    def _zero_length(self, state, batch, tokens, positions, real):
        """Zero-length documents where position_ids mark documents (see the class docstring)."""
        s, v = state.settings, tokens.values
        eos, bos = s.eos_id, s.bos_id
        need = {"eos-after": (eos,), "bos-before": (bos,), "both": (bos, eos)}[s.separator]
        if v.size < 2 or any(i is None for i in need):
            return
        # pair j = positions (j, j + 1) within one row; only the pairs whose first token is the separator are
        # looked at further (one pass over the tokens, then the few candidates).
        j = np.flatnonzero(v[:-1] == (eos if s.separator == "eos-after" else bos))
        inner = tokens.starts[(tokens.starts > 0) & (tokens.starts < v.size)]
        pair = np.ones(len(j), dtype=bool)
        if len(inner):  # (last of a row, first of the next) is no pair
            pair = inner[np.minimum(np.searchsorted(inner, j + 1), len(inner) - 1)] != j + 1
        if real is not None:
            pair &= real[j] & real[j + 1]
        if s.separator == "eos-after":
            pair &= (v[j + 1] == eos) & (positions[j + 1] == 0)
            at, sep = j[pair] + 1, eos
        elif s.separator == "bos-before":
            pair &= (positions[j] == 0) & (v[j + 1] == bos) & (positions[j + 1] == 0)
            at, sep = j[pair], bos
        else:
            pair &= (positions[j] == 0) & (v[j + 1] == eos) & (positions[j + 1] == 1)
            at, sep = j[pair], bos
        if at.size and real is None and s.pad_id == sep:
            # Without a mask, a trailing run of pad ids is padding, not documents (pad_id equal to the separator).
            rows = tokens.rows_at(at)
            not_pad = np.cumsum(np.concatenate(([0], v != s.pad_id)))
            at = at[not_pad[tokens.ends[rows]] - not_pad[at] > 0]
        rows, offsets = tokens.locate(at)
        state.hit("zero-length-document", batch, rows, offsets)

    def report(self, state):
        out, st, s = [], state.stats, state.settings
        docs, rows = int(st["documents"]), int(st["rows"])
        hits = state.hits
        if hits.get("empty-text"):
            n, nulls = hits["empty-text"].count, int(st["null_text"])
            out.append(self.finding(
                state, "empty-text",
                f"{n:,} of {docs:,} documents ({pct(n, docs)}) have no text: {n - nulls:,} empty string(s) and "
                f"{nulls:,} null or missing {s.text_column!r} field(s) (null counts as empty). An empty document "
                "tokenizes to a bare separator. Drop them before tokenizing.",
                documents=n, totalDocuments=docs, share=share(n, docs), emptyText=n - nulls, nullText=nulls))
        if hits.get("whitespace-text"):
            n = hits["whitespace-text"].count
            out.append(self.finding(
                state, "whitespace-text",
                f"{n:,} of {docs:,} documents ({pct(n, docs)}) hold only whitespace: nothing to learn but a "
                "whitespace token before the separator. Drop documents that are empty after stripping whitespace.",
                documents=n, totalDocuments=docs, share=share(n, docs)))
        if hits.get("empty-row"):
            n = hits["empty-row"].count
            out.append(self.finding(
                state, "empty-row",
                f"{n:,} of {rows:,} rows ({pct(n, rows)}) have no tokens at all (empty or null "
                f"{s.tokens_column!r}); a loader either fails on them or yields an empty batch entry. Drop them "
                "when writing the shard.", rows=n, totalRows=rows, share=share(n, rows)))
        if hits.get("all-padding"):
            n = hits["all-padding"].count
            how = "attention_mask is 0 everywhere" if state.padding_from == "attention_mask" \
                else f"every id is pad_id {s.pad_id}"
            out.append(self.finding(
                state, "all-padding",
                f"{n:,} of {rows:,} rows ({pct(n, rows)}) hold only padding ({how}): a full window of compute "
                "with nothing trained on. Drop them before packing or batching.",
                rows=n, totalRows=rows, share=share(n, rows), paddingFrom=state.padding_from))
        if hits.get("zero-length-document"):
            n = hits["zero-length-document"].count
            ids = {"eos-after": s.eos_id, "bos-before": s.bos_id, "both": s.bos_id}
            out.append(self.finding(
                state, "zero-length-document",
                f"{n:,} zero-length documents in packed rows ({ZERO_LENGTH_FORMS[s.separator]}; offset = that "
                "token): empty strings reached the tokenizer and became bare separators, which trains the model to "
                "end a document as soon as it starts. Filter empty documents before tokenizing.",
                documents=n, separator=s.separator, separatorId=ids[s.separator], eosId=s.eos_id, bosId=s.bos_id))
        return out


RULES = [SpecialTokenText, EncodingError, EmptyDocument]
