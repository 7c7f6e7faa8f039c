"""Tests for rules/text.py (special-token-text, encoding-error, empty-document).

The shards hold invented sentences. Every expected row and offset is computed here from the planted texts with the
standard library, independently of the rules' Arrow/numpy code: character offsets with ``str.find`` and
``str.count``, decoding of invalid bytes with ``bytes.decode(errors="replace")`` and ``json.loads``, whitespace
with ``str.isspace``, control characters with ``unicodedata.category``.
"""
from __future__ import annotations

import json
import unicodedata

import pyarrow as pa
import pytest
from corpuscle import Level
from corpuscle.report import sarif
from corpuscle.rules.text import C0, C1, COMMON_SPECIAL_STRINGS, DEL, EmptyDocument, EncodingError, SpecialTokenText

from tests.shards import findings, locations, pack, run, validate_sarif, write

TEXT_RULES = ("special-token-text", "encoding-error", "empty-document")

# Control characters per the Unicode Standard (section 23.1 "Control Codes" of version 15.0; section number from
# memory): the C0 set is U+0000..U+001F and the C1 set U+0080..U+009F; U+007F DELETE is also general category Cc.
# The sets are checked below against the Unicode Character Database as Python's unicodedata ships it.
UNICODE_C0 = set(range(0x00, 0x20))
UNICODE_C1 = set(range(0x80, 0xA0))
ORDINARY = "\t\n\r"  # tab, line feed, carriage return: text, not defects


def is_reported_control(ch: str) -> bool:
    """Reference for control-character: general category Cc (stdlib unicodedata), less tab/LF/CR."""
    return unicodedata.category(ch) == "Cc" and ch not in ORDINARY


# -- the planted JSON Lines shard ---------------------------------------------------------------------------------

def line(text, **extra) -> bytes:
    return json.dumps({"text": text, **extra}).encode()


LINES = [
    line("The ferry to Quillon Island leaves at dawn whenever the tide allows it."),            # 0 clean
    line("Mira wrote <|endoftext|> twice in her log <|endoftext|> and once </s> at the end."),  # 1 special x3
    line("Caf\u00e9 owners in Brantwick serve na\u00efve pastries \u2014 all day long."),       # 2 clean non-ASCII
    line("\u00dcber die Br\u00fccke [SEP] kam der B\u00e4cker mit Brot [CLS]"),  # 3 special after non-ASCII
    b'{"text": "The miller\xe2\x80 sold \xff flour to the abbey"}',                               # 4 bad bytes in text
    b'{"text": "A clean note about herons nesting by the weir.", "source": "scan\xfe42"}',      # 5 bad bytes elsewhere
    line("Ledger entr\u00e9e \ufffd\ufffd for the orchard on the north slope"),                  # 6 U+FFFD x2
    line("Gl\u00f6ckchen\u0007 rang, then \u00e9t\u00e9\u0085 and DEL\u007f, tab\there,\nnewline\r ok"),  # 7 x3
    line(""),                                                                                   # 8 empty
    line("  \t\n\u3000 "),                                                                      # 9 whitespace only
    line(None),                                                                                 # 10 null
    b"",                                                                                        # 11 blank line
    b'{"title": "Untitled notes from the lighthouse keeper"}',                                  # 12 no text field
    line("Seven gulls argued over a single herring by the old stone pier."),                   # 13 clean
    line("<s>Rowan\u0000 keeps bees behind the chapel</s>"),                                    # 14 special x2 + NUL
]


def write_lines(path, lines) -> str:
    """A JSON Lines shard written byte for byte (so invalid UTF-8 can be planted)."""
    path.write_bytes(b"\n".join(lines) + b"\n")
    return str(path)


def decoded_texts(lines) -> dict[int, str | None]:
    """Row -> text as a reader must see it: each line decoded with invalid bytes replaced (stdlib), then JSON."""
    out = {}
    for row, raw in enumerate(lines):
        if raw.strip():
            out[row] = json.loads(raw.decode("utf-8", errors="replace")).get("text")
    return out


def invalid_lines(lines) -> dict[int, int]:
    """Row -> byte offset in the line of its first invalid byte (stdlib UnicodeDecodeError.start)."""
    out = {}
    for row, raw in enumerate(lines):
        try:
            raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            out[row] = exc.start
    return out


def first_special(text, strings=COMMON_SPECIAL_STRINGS):
    hits = [text.find(s) for s in strings if s in text]
    return min(hits) if hits else -1


def special_counts(texts, strings=COMMON_SPECIAL_STRINGS):
    """Non-overlapping occurrences per string (str.count); none of the strings contains another here."""
    counts = {}
    for text in texts:
        for s in strings:
            if text and text.count(s):
                counts[s] = counts.get(s, 0) + text.count(s)
    return counts


def planted_kinds(report, uri):
    return sorted((f.rule_id, f.kind) for f in report.findings if f.uri == uri)


# -- the text shard: every planted defect, exact rows and offsets, nothing else ----------------------------------

@pytest.fixture
def jsonl_report(tmp_path):
    path = write_lines(tmp_path / "notes.jsonl", LINES)
    return path, run(path)


def test_text_shard_yields_exactly_the_planted_findings(jsonl_report):
    path, report = jsonl_report
    assert planted_kinds(report, path) == [
        ("empty-document", "empty-text"), ("empty-document", "whitespace-text"),
        ("encoding-error", "control-character"), ("encoding-error", "invalid-utf8"),
        ("encoding-error", "replacement-character"), ("special-token-text", "special-token-string")]
    assert all(f.level == Level.warning for f in report.findings)


def test_special_token_strings_rows_offsets_and_counts(jsonl_report):
    path, report = jsonl_report
    texts = decoded_texts(LINES)
    expected = [(row, first_special(t)) for row, t in texts.items() if t and first_special(t) >= 0]
    assert expected == [(1, 11), (3, 16), (14, 0)]  # the planted ones; row 3 in characters (bytes: 18)
    (f,) = findings(report, "special-token-text")
    assert locations(f) == expected
    assert f.count == 3 and f.evidence["documents"] == 3
    counts = special_counts(texts.values())
    assert f.evidence["strings"] == counts == {"<|endoftext|>": 2, "</s>": 2, "[SEP]": 1, "[CLS]": 1, "<s>": 1}
    assert f.evidence["occurrences"] == sum(counts.values()) == 7
    per_doc = [sum(texts[r].count(s) for s in COMMON_SPECIAL_STRINGS) for r, _ in expected]
    assert f.evidence["occurrencesPerInstance"] == per_doc == [3, 2, 2]
    assert set(f.evidence["stringSources"].values()) == {"option"}
    non_null = sum(1 for t in texts.values() if t is not None)
    assert f.evidence["totalDocuments"] == non_null == 12
    assert "3 of 12 documents with text" in f.message and "7 occurrence(s)" in f.message


def test_invalid_utf8_located_in_text_or_by_byte_offset(jsonl_report):
    path, report = jsonl_report
    texts, bad = decoded_texts(LINES), invalid_lines(LINES)
    assert sorted(bad) == [4, 5]
    (f,) = findings(report, "encoding-error", "invalid-utf8")
    # row 4: the first U+FFFD of the decoded text; row 5: the bad byte is in another field -> no offset
    assert texts[4].find("\ufffd") == 10 and "\ufffd" not in texts[5]
    assert locations(f) == [(4, 10), (5, -1)]
    assert f.instances() == [{"row": 4, "offset": 10}, {"row": 5}]
    assert f.evidence["byteOffsets"] == [{"row": 5, "byteOffset": bad[5]}]
    assert bad[5] == LINES[5].index(b"\xfe")
    assert f.evidence["replacementsInText"] == texts[4].count("\ufffd") == 2  # "\xe2\x80" and "\xff"
    assert f.evidence["occurrencesPerInstance"] == [2, 0]
    assert f.count == 2


def test_replacement_characters_already_in_text(jsonl_report):
    path, report = jsonl_report
    texts, bad = decoded_texts(LINES), invalid_lines(LINES)
    expected = [(r, t.find("\ufffd")) for r, t in texts.items() if t and "\ufffd" in t and r not in bad]
    assert expected == [(6, 14)]
    (f,) = findings(report, "encoding-error", "replacement-character")
    assert locations(f) == expected
    assert f.evidence["occurrences"] == texts[6].count("\ufffd") == 2


def test_control_characters_rows_offsets_and_code_points(jsonl_report):
    path, report = jsonl_report
    texts = decoded_texts(LINES)
    expected, per_code = [], {}
    for row, t in texts.items():
        where = [i for i, ch in enumerate(t or "") if is_reported_control(ch)]
        if where:
            expected.append((row, where[0]))
        for i in where:
            key = f"U+{ord(t[i]):04X}"
            per_code[key] = per_code.get(key, 0) + 1
    assert expected == [(7, 9), (14, 8)]
    (f,) = findings(report, "encoding-error", "control-character")
    assert locations(f) == expected
    assert f.evidence["codePoints"] == per_code == {"U+0000": 1, "U+0007": 1, "U+007F": 1, "U+0085": 1}
    assert f.evidence["classes"] == {"C0": 2, "C1": 1, "DEL": 1}
    assert f.evidence["occurrences"] == 4 and f.evidence["occurrencesPerInstance"] == [3, 1]
    assert f.evidence["allowedControls"] == ["U+0009", "U+000A", "U+000D"]


def test_empty_null_missing_and_whitespace_documents(jsonl_report):
    path, report = jsonl_report
    texts = decoded_texts(LINES)
    empty = [r for r, t in texts.items() if t is None or t == ""]
    blank = [r for r, t in texts.items() if t and t.isspace()]
    assert empty == [8, 10, 12] and blank == [9]  # 12 has no text field; 11 is a blank line, not a record
    (f,) = findings(report, "empty-document", "empty-text")
    assert locations(f) == [(r, -1) for r in empty]
    assert f.evidence["nullText"] == 2 and f.evidence["emptyText"] == 1
    assert f.evidence["totalDocuments"] == len(texts) == 14
    assert "null counts as empty" in f.message
    (w,) = findings(report, "empty-document", "whitespace-text")
    assert locations(w) == [(r, -1) for r in blank]


def test_text_shard_sarif_is_valid_and_carries_the_evidence(jsonl_report):
    path, report = jsonl_report
    log = validate_sarif(json.loads(sarif.render(report)))  # OASIS SARIF 2.1.0 schema (draft-04)
    (result,) = [r for r in log["runs"][0]["results"] if r["ruleId"] == "special-token-text"]
    assert result["properties"]["instances"] == [{"row": 1, "offset": 11}, {"row": 3, "offset": 16},
                                                 {"row": 14, "offset": 0}]
    assert result["locations"][0]["physicalLocation"]["region"]["startLine"] == 2  # 1-based line of row 1


# -- the same checks on Parquet and Arrow shards ---------------------------------------------------------------

PARQUET_TEXTS = [
    "Nine lanterns hung from the bakery awning in Tollmere.",
    "The keeper's log ends with [MASK] and then <|im_end|> before the storm.",
    "",
    None,
    "H\u00e9ron\u001b[0m counts rose after the flood \u0091quoted\u0092 in the parish notes.",
    "Plain sentence about quince jam and copper pans.",
    "Orchard ledger (\u00c5land) \ufffd smudged beyond reading.",
    " \n ",
    "Wheat prices in \u00c5lby fell after the fair.",
]
BAD_VALUE = "Bad bytes: Gr\u00fc\u00df ".encode() + b"\xc3\x28" + " end".encode()  # a lead byte without its follower


def text_array(texts, bad_row=None):
    """A string array; ``bad_row`` holds bytes that are not UTF-8 (viewed as string without validation)."""
    raw = [t.encode() if t is not None else None for t in texts]
    if bad_row is not None:
        raw[bad_row] = BAD_VALUE
    return pa.array(raw, type=pa.binary()).view(pa.string())


@pytest.mark.parametrize("name", ["plain.parquet", "plain.arrow"])
def test_parquet_and_arrow_text_shards(tmp_path, name):
    bad_row = 5
    texts = list(PARQUET_TEXTS)
    path = write(tmp_path / name, {"text": text_array(texts, bad_row)}, row_group_size=3)  # 3 batches
    report = run(path)
    assert planted_kinds(report, path) == [
        ("empty-document", "empty-text"), ("empty-document", "whitespace-text"),
        ("encoding-error", "control-character"), ("encoding-error", "invalid-utf8"),
        ("encoding-error", "replacement-character"), ("special-token-text", "special-token-string")]
    texts[bad_row] = BAD_VALUE.decode("utf-8", errors="replace")  # what the rules read (stdlib decoding)

    (f,) = findings(report, "special-token-text")
    assert locations(f) == [(r, first_special(t)) for r, t in enumerate(texts) if t and first_special(t) >= 0] \
        == [(1, 27)]
    assert f.evidence["strings"] == special_counts(texts) == {"[MASK]": 1, "<|im_end|>": 1}

    (f,) = findings(report, "encoding-error", "invalid-utf8")
    bad_start = BAD_VALUE.index(b"\xc3\x28")
    assert locations(f) == [(bad_row, len(BAD_VALUE[:bad_start].decode()))] == [(5, 16)]
    assert texts[bad_row].find("\ufffd") == 16 and f.evidence["byteOffsets"] == []

    (f,) = findings(report, "encoding-error", "replacement-character")
    assert locations(f) == [(r, t.find("\ufffd")) for r, t in enumerate(texts) if t and "\ufffd" in t
                            and r != bad_row] == [(6, 23)]

    (f,) = findings(report, "encoding-error", "control-character")
    controls = [(r, i) for r, t in enumerate(texts) for i, ch in enumerate(t or "") if is_reported_control(ch)]
    assert controls == [(4, 5), (4, 38), (4, 45)]
    assert locations(f) == [(4, 5)]
    assert f.evidence["codePoints"] == {"U+001B": 1, "U+0091": 1, "U+0092": 1}
    assert f.evidence["occurrencesPerInstance"] == [3]

    (f,) = findings(report, "empty-document", "empty-text")
    assert [r for r, _ in locations(f)] == [r for r, t in enumerate(texts) if not t] == [2, 3]
    assert f.evidence["nullText"] == 1
    (f,) = findings(report, "empty-document", "whitespace-text")
    assert [r for r, _ in locations(f)] == [r for r, t in enumerate(texts) if t and t.isspace()] == [7]


def test_large_string_column_and_sliced_batches_agree_with_str_find(tmp_path):
    """Offsets come from the Arrow buffers: a large_string column read in batches of 2 rows must give the same."""
    texts = [f"Entry {i}: the tide \u00e9bb {'</s>' if i % 3 == 0 else ''}\u0002 rose" for i in range(10)]
    path = write(tmp_path / "large.parquet", {"text": pa.array(texts, type=pa.large_string())}, row_group_size=2)
    report = run(path, only=TEXT_RULES)
    (f,) = findings(report, "special-token-text")
    assert locations(f) == [(i, t.find("</s>")) for i, t in enumerate(texts) if "</s>" in t]
    (f,) = findings(report, "encoding-error", "control-character")
    assert locations(f) == [(i, t.find("\u0002")) for i, t in enumerate(texts)]


def test_all_control_characters_classified_as_the_unicode_standard_says(tmp_path):
    """Every code point U+0000..U+00FF once: the C0, DEL and C1 counts equal the Unicode sets (stdlib check)."""
    cc = {cp for cp in range(0x110000) if unicodedata.category(chr(cp)) == "Cc"}
    assert cc == UNICODE_C0 | {0x7F} | UNICODE_C1  # stdlib unicodedata agrees with the standard's sets
    assert set(C0) == UNICODE_C0 and set(C1) == UNICODE_C1 and DEL == 0x7F
    every = "".join(chr(cp) for cp in range(0x100)) + "\u2028\ufeff\u200b"  # non-Cc formats/separators: not reported
    path = write(tmp_path / "all.jsonl", {"text": ["Reed beds by the mill. " + every]})
    report = run(path, only=("encoding-error",))
    (f,) = findings(report, "encoding-error", "control-character")
    expected = {f"U+{cp:04X}": 1 for cp in sorted(cc) if chr(cp) not in ORDINARY}
    assert f.evidence["codePoints"] == expected and len(expected) == 62
    assert f.evidence["classes"] == {"C0": 32 - 3, "C1": 32, "DEL": 1}
    assert locations(f) == [(0, len("Reed beds by the mill. "))]


def test_allowed_controls_option(tmp_path):
    path = write(tmp_path / "ff.jsonl", {"text": ["Page one of the almanac.\fPage two.", "Bell\u0007 tower"]})
    report = run(path, only=("encoding-error",), rule={"encoding-error": {"allowed_controls": "\t\n\r\f"}})
    (f,) = findings(report, "encoding-error", "control-character")
    assert locations(f) == [(1, 4)]
    assert f.evidence["allowedControls"] == ["U+0009", "U+000A", "U+000C", "U+000D"]
    report = run(path, only=("encoding-error",))
    (f,) = findings(report, "encoding-error", "control-character")
    assert locations(f) == [(0, 24), (1, 4)]


def test_invalid_utf8_in_a_tokenized_jsonl_shard_without_text(tmp_path):
    lines = [b'{"input_ids": [5, 6, 7, 2]}', b'{"input_ids": [8, 9, 2], "origin": "m\xe9moire"}']
    path = write_lines(tmp_path / "tok.jsonl", lines)
    report = run(path, only=("encoding-error",))
    (f,) = findings(report, "encoding-error", "invalid-utf8")
    assert locations(f) == [(1, -1)]
    assert f.evidence["byteOffsets"] == [{"row": 1, "byteOffset": lines[1].index(b"\xe9")}]


# -- special-token strings from a tokenizer file -----------------------------------------------------------------

def test_special_tokens_from_a_tokenizer_file(tmp_path):
    tokenizers = pytest.importorskip("tokenizers")  # reference library writes the tokenizer JSON
    tok = tokenizers.Tokenizer(tokenizers.models.WordLevel({"[UNK]": 0, "dough": 1}, unk_token="[UNK]"))
    tok.add_special_tokens(["<|recipe_end|>", "<|chef|>"])
    tok.add_tokens(["zucchini"])  # an added token that is not special: not searched
    tok_path = tmp_path / "tokenizer.json"
    tok.save(str(tok_path))
    specials = [t["content"] for t in json.loads(tok_path.read_text())["added_tokens"] if t["special"]]
    assert specials == ["<|recipe_end|>", "<|chef|>"]

    texts = ["Knead the dough <|chef|> until smooth <|recipe_end|>", "zucchini bread with </s> walnuts",
             "No markers in this recipe for rye.", "<|chef|><|chef|> says rest it overnight"]
    path = write(tmp_path / "recipes.jsonl", {"text": texts})
    report = run(path, tokenizer=str(tok_path), only=("special-token-text",))
    (f,) = findings(report, "special-token-text")
    strings = specials + list(COMMON_SPECIAL_STRINGS)
    assert locations(f) == [(r, first_special(t, strings)) for r, t in enumerate(texts)
                            if first_special(t, strings) >= 0] == [(0, 16), (1, 20), (3, 0)]
    assert f.evidence["strings"] == special_counts(texts, strings) == {"<|chef|>": 3, "<|recipe_end|>": 1, "</s>": 1}
    assert f.evidence["stringSources"] == {"<|chef|>": "tokenizer", "<|recipe_end|>": "tokenizer", "</s>": "option"}
    assert f.evidence["tokenizer"] == str(tok_path)

    # only the tokenizer's strings: strings = []
    report = run(path, tokenizer=str(tok_path), only=("special-token-text",),
                 rule={"special-token-text": {"strings": []}})
    (f,) = findings(report, "special-token-text")
    assert locations(f) == [(0, 16), (3, 0)] and f.evidence["stringsSearched"] == 2


def scan_directly(rule, path, settings):
    """Run one rule over one shard by the rule contract (begin, feed, end, report, corpus), settings as given."""
    from corpuscle.io.sources import discover, open_shard

    (shard,) = discover([str(path)])
    state = rule.begin(shard, settings)
    with open_shard(shard) as reader:
        for batch in reader:
            if rule.missing(batch, settings) is None:
                rule.feed(state, batch)
    state = rule.end(state)
    found = rule.corpus([state]).findings
    return rule.report(state) + found


def test_unusable_tokenizer_file_is_a_finding_and_the_option_strings_still_run(tmp_path):
    """Settings reject a missing tokenizer file up front (a usage error); should one still reach the rule (a file
    removed or replaced mid-run), the rule says so once and searches the option strings."""
    from corpuscle import Settings

    path = write(tmp_path / "t.jsonl", {"text": ["Salt the broth </s> lightly.", "Nothing here."]})
    (tmp_path / "vocab.json").write_text('{"version": "1.0", "vocab": {"salt": 0}}')  # JSON, not a tokenizer
    for name, why in (("nowhere.json", "cannot open the tokenizer file"), ("vocab.json", "no \"added_tokens\" list")):
        settings = Settings()
        settings.tokenizer = str(tmp_path / name)  # bypasses the up-front check on purpose
        found = scan_directly(SpecialTokenText(), path, settings)
        assert sorted(f.kind for f in found) == ["special-token-string", "tokenizer-unreadable"]
        (err,) = [f for f in found if f.kind == "tokenizer-unreadable"]
        assert err.uri is None and why in err.message and "Point tokenizer at" in err.message
        (f,) = [f for f in found if f.kind == "special-token-string"]
        assert locations(f) == [(0, "Salt the broth </s> lightly.".find("</s>"))] == [(0, 15)]


def test_longest_string_wins_and_matching_is_case_sensitive(tmp_path):
    texts = ["<s><s></s>", "<S> and [sep] are not the same", "<|endoftext|><|endoftext|>x"]
    path = write(tmp_path / "c.jsonl", {"text": texts})
    report = run(path, only=("special-token-text",), rule={"special-token-text": {"strings": ["<s>", "</s>",
                                                                                                "<|endoftext|>"]}})
    (f,) = findings(report, "special-token-text")
    assert locations(f) == [(0, 0), (2, 0)]
    assert f.evidence["strings"] == {"<s>": 2, "</s>": 1, "<|endoftext|>": 2}
    assert f.evidence["occurrencesPerInstance"] == [3, 2]


def test_option_validation_gives_a_hint():
    with pytest.raises(ValueError, match="strings must be a list of non-blank strings.*hint"):
        SpecialTokenText(strings="</s>")
    with pytest.raises(ValueError, match="non-blank"):
        SpecialTokenText(strings=["</s>", "  "])
    with pytest.raises(ValueError, match="allowed_controls must be a string of control characters.*hint"):
        EncodingError(allowed_controls="\tA")
    assert EncodingError(allowed_controls="\r\n\t").opts["allowed_controls"] == "\t\n\r"


def test_instance_cap_keeps_counts_and_cuts_the_list(tmp_path):
    texts = [f"Note {i}: the bell\u0007 rang {i} times" for i in range(7)]
    path = write(tmp_path / "cap.jsonl", {"text": texts})
    report = run(path, only=("encoding-error",), instance_cap=3)
    (f,) = findings(report, "encoding-error", "control-character")
    assert f.count == 7 and f.truncated
    assert locations(f) == [(i, texts[i].find("\u0007")) for i in range(3)]
    assert len(f.evidence["occurrencesPerInstance"]) == 3 and f.evidence["occurrences"] == 7


def test_clean_text_shard_gives_no_text_finding(tmp_path):
    texts = ["Moss grows on the north wall of the granary.", "Tab\tseparated\tnotes\nand lines\r\n.",
             "A recipe for \u00e9clairs, \u00bd cup of cream, 2\u00b0C overnight.", "\u65e5\u672c\u306e\u6843"]
    for name in ("clean.jsonl", "clean.parquet"):
        path = write(tmp_path / name, {"text": texts})
        report = run(path, only=TEXT_RULES)
        assert report.findings == []


# -- tokenized shards: rows with no real tokens, zero-length packed documents ------------------------------------

PAD, BOS, EOS, SEQ = 0, 1, 2, 8


def with_mask(cols):
    """attention_mask: 0 on the padding that pack() appends to the last window (label -100 after the stream)."""
    stream_len = sum(1 for row in cols["input_ids"] for _ in row) - cols["input_ids"][-1].count(PAD)
    mask, seen = [], 0
    for row in cols["input_ids"]:
        mask.append([1 if seen + i < stream_len else 0 for i in range(len(row))])
        seen += len(row)
    return {**cols, "attention_mask": mask}


def zero_length_eos(cols):
    """Plain Python: (row, i) where position_ids restart at an eos right after an eos, both real."""
    out = []
    for r, (ids, pos, mask) in enumerate(zip(cols["input_ids"], cols["position_ids"], cols["attention_mask"])):
        out += [(r, i) for i in range(1, len(ids))
                if pos[i] == 0 and ids[i] == EOS and ids[i - 1] == EOS and mask[i] and mask[i - 1]]
    return out


def test_tokenized_empty_rows_all_padding_and_zero_length_documents(tmp_path):
    docs = [[11, 12, 13], [], [14, 15, 16, 17], [], [], [18, 19], [21, 22, 23, 24, 25, 26], [], [31, 32]]
    cols = with_mask(pack(docs, SEQ, eos=EOS, pad=PAD))
    # where the planted empty documents land in the packed stream: the eos of each, by stream index
    stream, empties = [], []
    for d in docs:
        if not d:
            empties.append(len(stream))
        stream += d + [EOS]
    planted = [(i // SEQ, i % SEQ) for i in empties]
    assert planted == [(0, 4), (1, 2), (1, 3), (2, 6)]
    assert zero_length_eos(cols) == planted  # none at a row start here
    # one empty row and one all-padding row appended
    for name, empty, padded in (("input_ids", [], [PAD] * SEQ), ("labels", [], [-100] * SEQ),
                                ("position_ids", [], list(range(SEQ))), ("attention_mask", [], [0] * SEQ)):
        cols[name] = cols[name] + [empty, padded]
    n = len(cols["input_ids"])
    path = write(tmp_path / "packed.parquet", cols, row_group_size=2)
    report = run(path, eos_id=EOS, pad_id=PAD)
    by_kind = {f.kind: f for f in findings(report, "empty-document")}
    assert sorted(by_kind) == ["all-padding", "empty-row", "zero-length-document"]
    assert locations(by_kind["empty-row"]) == [(n - 2, -1)]
    assert locations(by_kind["all-padding"]) == [(n - 1, -1)]
    assert by_kind["all-padding"].evidence["paddingFrom"] == "attention_mask"
    assert by_kind["all-padding"].evidence["totalRows"] == n
    f = by_kind["zero-length-document"]
    assert locations(f) == planted and f.count == 4
    assert f.evidence["separator"] == "eos-after" and f.evidence["separatorId"] == EOS


def test_zero_length_document_at_a_row_start_is_not_counted(tmp_path):
    # 7 tokens + eos fill row 0; the empty document's eos is the first token of row 1 (its previous eos is in row 0)
    docs = [[11, 12, 13, 14, 15, 16, 17], [], [21, 22]]
    cols = with_mask(pack(docs, SEQ, eos=EOS, pad=PAD))
    assert cols["input_ids"][1][0] == EOS and cols["position_ids"][1][0] == 0
    assert zero_length_eos(cols) == []
    report = run(write(tmp_path / "edge.parquet", cols), eos_id=EOS, pad_id=PAD)
    assert findings(report, "empty-document") == []


def test_all_padding_by_pad_id_and_trailing_pad_eos_is_not_a_document(tmp_path):
    """No mask; pad_id equals eos_id and padding carries position_ids 0: a trailing eos run is padding."""
    ids = [[11, 12, EOS, EOS, 13, EOS, EOS, EOS],   # 3: a real zero-length document (pos 0); 6, 7: padding
           [EOS] * SEQ,                              # all padding (every id is pad_id)
           [14, 15, 16, EOS, 17, 18, 19, EOS]]
    pos = [[0, 1, 2, 0, 0, 1, 0, 0], [0] * SEQ, [0, 1, 2, 3, 0, 1, 2, 3]]
    path = write(tmp_path / "nomask.parquet", {"input_ids": ids, "position_ids": pos})
    report = run(path, eos_id=EOS, pad_id=EOS)
    by_kind = {f.kind: f for f in findings(report, "empty-document")}
    assert sorted(by_kind) == ["all-padding", "zero-length-document"]
    assert locations(by_kind["zero-length-document"]) == [(0, 3)]
    assert locations(by_kind["all-padding"]) == [(1, -1)]
    assert by_kind["all-padding"].evidence["paddingFrom"] == "pad_id"


@pytest.mark.parametrize("separator, ids, pos, expected", [
    # bos-before: a bos at a document start directly followed by another document start with bos
    ("bos-before", [BOS, 11, 12, BOS, BOS, 13, 14, BOS], [0, 1, 2, 0, 0, 1, 2, 0], [(0, 3)]),
    # both: bos at a document start directly followed by eos
    ("both", [BOS, 11, EOS, BOS, EOS, BOS, 12, EOS], [0, 1, 2, 0, 1, 0, 1, 2], [(0, 3)]),
])
def test_zero_length_document_under_other_separator_conventions(tmp_path, separator, ids, pos, expected):
    path = write(tmp_path / "sep.parquet", {"input_ids": [ids], "position_ids": [pos]})
    report = run(path, eos_id=EOS, bos_id=BOS, separator=separator)
    (f,) = findings(report, "empty-document", "zero-length-document")
    assert locations(f) == expected and f.evidence["separator"] == separator


def test_empty_document_needs_either_column():
    rule = EmptyDocument()
    from corpuscle import Settings
    from corpuscle.io.batch import Batch, Shard

    shard = Shard("x.parquet", "x.parquet", "parquet")
    settings = Settings()
    tokens_only = Batch(shard, pa.table({"input_ids": [[1, 2]]}), [0])
    text_only = Batch(shard, pa.table({"text": ["a"]}), [0])
    null_text = Batch(shard, pa.table({"text": pa.nulls(2)}), [0, 1])
    neither = Batch(shard, pa.table({"title": ["a"]}), [0])
    assert rule.missing(tokens_only, settings) is None
    assert rule.missing(text_only, settings) is None
    assert rule.missing(null_text, settings) is None
    assert "neither a text column 'text'" in rule.missing(neither, settings)
