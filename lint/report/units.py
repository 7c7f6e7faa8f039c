"""What a finding's count counts, and what its offsets index, for the one-line summary ("44 rows", "row 3, token 20").

A rule can say it on the finding (``Finding.unit``); otherwise this table of the built-in rules' kinds answers,
first match wins (rule id, kind glob); anything else counts "instances".
"""
from __future__ import annotations

import fnmatch

UNITS: dict[str, list[tuple[str, str]]] = {
    "schema-mismatch": [("mistyped", "values"), ("*", "rows")],
    "unreadable-record": [("*", "lines")],
    "unreadable-shard": [("*", "files")],
    "missing-separator": [("boundary-no-*", "document boundaries"), ("doubled-*", "doubled separators"),
                          ("*", "rows")],
    "document-attention": [("*", "rows")],
    "token-range": [("narrow-storage", "columns"), ("vocab-unset", "shards"), ("*", "token ids")],
    "padding-loss": [("*", "rows")],
    "label-alignment": [("mixed-across-shards", "shards"), ("*", "rows")],
    "special-token-text": [("*", "documents")],
    "encoding-error": [("invalid-utf8", "records"), ("*", "documents")],
    "empty-document": [("empty-row", "rows"), ("all-padding", "rows"), ("*", "documents")],
    "overlong-document": [("*", "documents")],
    "truncation-waste": [("*", "rows")],
    "near-duplicate": [("*", "copies")],
    "exact-duplicate": [("*", "copies")],
    "eval-overlap": [("*", "items")],
    "tokenizer-mismatch": [("*", "shards")],
    "stale-setting": [("eos_id-*", "document ends"), ("bos_id-*", "document starts"),
                      ("pad_id-*", "padding positions"), ("*", "token ids")],
}

#: Rules whose offsets index characters of the text (or of the line), not tokens.
CHARACTER_OFFSETS = {"special-token-text", "encoding-error", "unreadable-record"}


def unit(finding) -> str:
    if getattr(finding, "unit", ""):
        return finding.unit
    for pattern, name in UNITS.get(finding.rule_id, ()):
        if fnmatch.fnmatchcase(finding.kind, pattern):
            return name
    return "instances"


def offset_word(finding) -> str:
    """'token', or 'char' where the offset is a character offset in the text (or the line)."""
    meaning = str(finding.evidence.get("offsetMeaning", ""))
    if "character" in meaning or finding.rule_id in CHARACTER_OFFSETS:
        return "char"
    return "token"


def where(finding, instance: dict) -> str:
    """One location in words: 'row 3, token 20' (both 0-based), with the shard first for a finding across shards."""
    text = f"row {instance['row']:,}"
    if "offset" in instance:
        text += f", {offset_word(finding)} {instance['offset']:,}"
    if "uri" in instance and finding.uri is None:
        text = f"{instance['uri']} {text}"
    return text


def number(value, float_format: str = ".4g") -> str:
    """A figure for a line of text: ints with thousands separators, floats to four significant digits, a figure of
    figures as (key value, ...), lists as [a, b]; not Python's repr."""
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return format(value, float_format)
    if isinstance(value, dict):
        return "(" + ", ".join(f"{k} {number(v, float_format)}" for k, v in value.items()) + ")"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(number(v, float_format) for v in value) + "]"
    return str(value)
