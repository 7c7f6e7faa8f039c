"""The drop list: the copies a deduplicating rule says to remove, as JSON Lines.

One line per copy to drop, in scan order (shard order, then row, then offset)::

    {"uri": "<shard as reported>", "row": R, "offset": T, "length": L, "unit": "document" | "window",
     "rule": "exact-duplicate" | "near-duplicate", "cluster": "<cluster id>",
     "kept": {"uri": ..., "row": ..., "offset": ...}, "reason": "<why this copy goes and that one stays>"}

``row`` is the 0-based record index (for JSON Lines shards the 0-based line index, blank lines included, as
everywhere in corpuscle); ``offset`` the 0-based token offset of the copy's first token within that row (0 for
whole rows and text documents) and ``length`` its length in tokens (UTF-8 bytes for text), so a document packed
inside rows -- possibly running on into the next rows -- is cut out exactly. ``cluster`` names the group of copies
(the content hash of the copy kept) and ``kept`` the copy that stays. Rules give their lists under the output name
``drop-list``; a copy named by several rules (an exact copy inside a near-duplicate cluster) is written once, with
the first rule's entry. An empty list is an empty file.
"""
from __future__ import annotations

from corpuscle.report import dump_json

NAME = "drop-list"


def entries(report) -> list[dict]:
    """The report's drop list without repeats, in scan order."""
    order = {shard.uri: i for i, shard in enumerate(report.shards)}
    unique: dict = {}
    for entry in report.outputs.get(NAME, []):
        key = (entry["uri"], int(entry["row"]), int(entry.get("offset", 0)))
        unique.setdefault(key, entry)
    ranked = sorted(unique, key=lambda k: (order.get(k[0], len(order)), k[0], k[1], k[2]))
    return [{"uri": uri, "row": row, **{k: v for k, v in unique[(uri, row, offset)].items()
                                        if k not in ("uri", "row")}} for uri, row, offset in ranked]


def render(report) -> bytes:
    return b"".join(dump_json(e) + b"\n" for e in entries(report))
