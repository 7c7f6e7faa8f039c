"""Scanning one large shard in parts, so that a single big file also keeps every core busy.

A shard larger than :data:`SPLIT_BYTES` is cut into about as many contiguous *parts* as there are processes, along
the units its reader already reads one by one: the row groups of a Parquet file, the record batches of an Arrow
IPC file, or byte ranges of a plain (uncompressed) JSON Lines file cut right after a newline.  Each part is read
in its own process and gives one state per rule; the rules' ``merge`` joins the states of consecutive parts into
what a scan of the whole shard gives.  Compressed JSON Lines and Arrow IPC streams cannot be entered in the middle,
and are scanned whole.

The cuts keep the batches a reader yields exactly as in a whole-shard scan: Parquet and Arrow batches never span
two units, and a JSON Lines part reads its bytes in the same blocks as a whole-file read (the first block of a part
ends where the whole-file read's block ends), and is cut where a whole-file read cuts a block.  So every rule sees
the same batches, with the same shard-absolute row indices, and only what a rule carries from one batch to the
next needs stitching at a cut.  The facts inferred from the shard's first records are inferred once, before the
parts are read, and given to every part.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field

import pyarrow as pa
import pyarrow.parquet as pq
from corpuscle.engine.infer import infer_from_batch
from corpuscle.io.batch import Shard, enough_first_records, first_records
from corpuscle.io.sources import Limits, _open_input, is_uri, local_path, metadata_aborts, open_shard
from corpuscle.rules.api import inferred_by
from corpuscle.settings import Settings

log = logging.getLogger(__name__)

#: Shards larger than this many bytes are scanned in parts when several processes are at hand.
SPLIT_BYTES = 256 << 20

#: Bytes read at a time while counting lines before a JSON Lines cut, or looking back for a newline.
COUNT_BYTES = 8 << 20


@dataclass(frozen=True)
class Part:
    """One contiguous part of a shard: units ``[lo, hi)`` (row groups, record batches, or for JSON Lines byte
    offsets), whose first row is ``first_row`` of the shard; ``facts`` are the shard's settings with the values
    inferred from its first records, and ``inferred`` what each rule inferred from them (``Rule.infer``), by rule
    id."""

    index: int
    count: int
    lo: int
    hi: int
    first_row: int
    facts: Settings
    inferred: dict = field(default_factory=dict)


def splittable_format(shard: Shard) -> bool:
    """Whether the shard's format can be read from a unit in its middle."""
    if shard.format == "parquet":
        return True
    if shard.format == "arrow":
        return not is_uri(shard.path)
    return shard.format == "jsonl" and shard.compression is None


def plan(shard: Shard, settings: Settings, parts: int, threshold: int | None = None,
         rules: tuple = ()) -> list[Part] | None:
    """The parts to scan ``shard`` in, or None to scan it whole (small, not splittable, a single unit, no records,
    or anything unexpected while looking: the whole-shard scan then reports it).  What ``rules`` infer from the
    shard's first records goes with every part."""
    threshold = SPLIT_BYTES if threshold is None else threshold
    if parts < 2 or shard.length <= threshold or not splittable_format(shard):
        return None
    try:
        cuts = _cuts(shard, parts)
        if cuts is None or len(cuts) < 2:
            return None
        first = first_facts(shard, settings, rules)
    except Exception as exc:  # noqa: BLE001 - a shard we cannot look into is scanned whole, and reported there
        log.debug("scanning %s whole: %s", shard.uri, exc)
        return None
    if first is None:
        return None
    facts, inferred = first
    return [Part(i, len(cuts), lo, hi, row, facts, inferred) for i, (lo, hi, row) in enumerate(cuts)]


def first_facts(shard: Shard, settings: Settings, rules: tuple = ()) -> tuple[Settings, dict] | None:
    """The shard's settings with the unset facts inferred from its first records, and what each of ``rules``
    infers from them (:func:`corpuscle.rules.api.inferred_by`), as a whole-shard scan infers them; None when the shard holds
    no records."""
    facts = settings.for_path(shard.path)
    batches = []
    with open_shard(shard, tokens_column=facts.tokens_column, limits=Limits.of(facts)) as reader:
        for batch in reader:
            batches.append(batch)
            if enough_first_records(batches, facts.tokens_column):
                break
    sample = first_records(batches)
    if sample is None:
        return None
    facts = infer_from_batch(facts, sample)
    return facts, inferred_by(rules, sample, facts)


def _balanced(sizes: list[int], parts: int) -> list[int]:
    """Indices where to cut a sequence of units of ``sizes`` into about ``parts`` runs of similar total size."""
    total = sum(sizes) or 1
    cuts, running, target = [0], 0, 1
    for i, size in enumerate(sizes[:-1]):
        running += size
        if running * parts >= target * total:
            cuts.append(i + 1)
            while running * parts >= target * total:
                target += 1
    return cuts + [len(sizes)]


def _unit_cuts(rows: list[int], sizes: list[int], parts: int) -> list[tuple[int, int, int]] | None:
    if len(rows) < 2:
        return None
    bounds = _balanced(sizes, parts)
    starts = [0]
    for n in rows:
        starts.append(starts[-1] + n)
    return [(lo, hi, starts[lo]) for lo, hi in zip(bounds, bounds[1:]) if hi > lo]


def _cuts(shard: Shard, parts: int) -> list[tuple[int, int, int]] | None:
    if shard.format == "parquet":
        source = _open_input(shard.path) if is_uri(shard.path) else shard.path
        try:
            meta = pq.ParquetFile(source, memory_map=False).metadata
        finally:
            if not isinstance(source, str):
                source.close()
        if metadata_aborts(meta) is not None:  # the whole scan reports it
            return None
        groups = [meta.row_group(g) for g in range(meta.num_row_groups)]
        return _unit_cuts([g.num_rows for g in groups],
                          [sum(g.column(i).total_compressed_size for i in range(g.num_columns)) for g in groups],
                          parts)
    if shard.format == "arrow":
        with pa.memory_map(local_path(shard.path), "r") as source:
            if source.read(6) != b"ARROW1":
                return None  # a stream: no index of its batches
            source.seek(0)
            reader = pa.ipc.open_file(source)
            stored = [reader.get_batch(i) for i in range(reader.num_record_batches)]
            return _unit_cuts([b.num_rows for b in stored], [b.nbytes for b in stored], parts)
    return _line_cuts(shard, parts)


def _line_cuts(shard: Shard, parts: int) -> list[tuple[int, int, int]] | None:
    """Byte ranges of a plain JSON Lines file, each starting right after a newline where a whole-file read ends a
    block (the last newline before a multiple of the reader's block size), and the line index each starts at."""
    block = open_shard(shard).batch_bytes
    length = shard.length
    source = _open_input(shard.path) if is_uri(shard.path) else pa.OSFile(local_path(shard.path), "rb")
    with source:
        cuts = [0]
        for i in range(1, parts):
            m = max(1, round(i * length / parts / block))
            if m * block >= length:
                break
            at = _last_newline(source, m * block)
            if at is not None and at + 1 > cuts[-1]:
                cuts.append(at + 1)
        if len(cuts) < 2:
            return None
        # line index of each cut: the newlines before it, counted in chunks
        lines, counted, pos = [0], 0, 0
        source.seek(0)
        for cut in cuts[1:]:
            while pos < cut:
                data = source.read(min(COUNT_BYTES, cut - pos))
                if not data:
                    return None
                counted += data.count(b"\n")
                pos += len(data)
            lines.append(counted)
    ends = cuts[1:] + [length]
    return [(lo, hi, row) for lo, hi, row in zip(cuts, ends, lines)]


def _last_newline(source, end: int) -> int | None:
    """Offset of the last newline before byte ``end``, or None."""
    hi = end
    while hi > 0:
        lo = max(0, hi - COUNT_BYTES)
        source.seek(lo)
        data = source.read(hi - lo)
        at = data.rfind(b"\n")
        if at >= 0:
            return lo + at
        hi = lo
    return None


def workers(executor) -> int:
    """How many processes ``executor`` runs work in."""
    jobs = getattr(executor, "jobs", None)
    if jobs is None:
        try:
            jobs = executor.workers
        except Exception:  # noqa: BLE001 - an executor that cannot say gets whole shards
            jobs = 1
    return int(jobs or 1)


def describe(parts: list[Part]) -> str:
    return f"{len(parts)} parts starting at rows {', '.join(str(p.first_row) for p in parts)}"


