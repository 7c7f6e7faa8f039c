"""The drop list: the windows a deduplicating rule says to remove, as JSON Lines.

One line per window, ``{"uri": "<shard as reported>", "row": <0-based record index>}`` (for JSON Lines shards the
row is the 0-based line index, blank lines included, as everywhere in corpuscle), in scan order: shard order, then
row. Rules give their lists under the output name ``drop-list``; a window named by several rules (an exact copy
inside a near-duplicate cluster) is written once. An empty list is an empty file.
"""
from __future__ import annotations

from corpuscle.report import dump_json

NAME = "drop-list"


def entries(report) -> list[dict]:
    """The report's drop list without repeats, in scan order."""
    order = {shard.uri: i for i, shard in enumerate(report.shards)}
    unique = {(e["uri"], int(e["row"])) for e in report.outputs.get(NAME, [])}
    ranked = sorted(unique, key=lambda e: (order.get(e[0], len(order)), e[0], e[1]))
    return [{"uri": uri, "row": row} for uri, row in ranked]


def render(report) -> bytes:
    return b"".join(dump_json(e) + b"\n" for e in entries(report))
