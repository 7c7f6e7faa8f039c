"""Large shards scanned in parts (lint/split.py): the report must be the one a whole-shard scan gives.

Every check here compares a split scan with the plain ``jobs=1`` scan of the same files, report against report
(the JSON report, apart from the run time), so the expectation is computed by the code path that has its own tests
against outside references; the tests also check that the shard really was cut, and where.
"""
from __future__ import annotations

import json
import logging
import random
import re

import corpuscle.engine.split as split
import corpuscle.io.sources as sources
import numpy as np
import pyarrow.parquet as pq
import pytest
from corpuscle import Settings
from corpuscle.engine.executors import LocalExecutor
from corpuscle.engine.registry import registry
from corpuscle.engine.scan import run, select_rules
from corpuscle.io.sources import discover
from corpuscle.report.json import to_dict
from corpuscle.rules.api import Rule

from tests.shards import write

VOCAB = 500
EOS = 2
PAD = 0


def splittable_ids() -> tuple[str, ...]:
    return tuple(rule_id for rule_id, cls in registry().items() if cls.splittable)


class SerialPair:
    """An executor that says it has two processes but runs the work here, one item after the other: the parts of a
    split shard are then read in this process, where the tests' smaller read sizes apply."""

    jobs = 2

    def map(self, fn, items):
        return map(fn, list(items))


@pytest.fixture
def cut(monkeypatch):
    """Split every shard (threshold 0), read small batches and blocks, and record the parts of each split."""
    monkeypatch.setattr(split, "SPLIT_BYTES", 0)
    monkeypatch.setattr(sources, "DEFAULT_BATCH_TOKENS", 300)
    monkeypatch.setattr(sources, "DEFAULT_BATCH_BYTES", 700)
    planned = []
    plan = split.plan

    def recording(*args, **kwargs):
        parts = plan(*args, **kwargs)
        planned.append(parts)
        return parts

    monkeypatch.setattr(split, "plan", recording)
    return planned


def report(paths, executor=None, jobs=1, **settings) -> dict:
    settings.setdefault("only", splittable_ids())
    s = Settings(**settings)
    out = to_dict(run(discover([str(p) for p in paths]), s, select_rules(s, registry()), jobs=jobs,
                      executor=executor))
    out["metrics"].pop("seconds")
    return json.loads(json.dumps(out, default=str))


def windows(rng: random.Random, rows: int, seq_len: int = 24) -> dict:
    """Packed windows of random documents ending in eos, with shifted labels, an attention mask and position ids;
    the last row is padded."""
    stream, positions = [], []
    while len(stream) < rows * seq_len:
        doc = [rng.randrange(3, VOCAB) for _ in range(rng.randrange(1, 40))] + [EOS]
        stream += doc
        positions += list(range(len(doc)))
    ids = [stream[i * seq_len:(i + 1) * seq_len] for i in range(rows)]
    pos = [positions[i * seq_len:(i + 1) * seq_len] for i in range(rows)]
    ids[-1][-5:] = [PAD] * 5
    pos[-1][-5:] = [0] * 5
    mask = [[1] * seq_len for _ in range(rows)]
    mask[-1][-5:] = [0] * 5
    # the last label of a row: ignored, the next row's first token (a stream continued), or a wrong token
    labels = [row[1:] + [rng.choice([-100, ids[i + 1][0] if i + 1 < rows else -100, 9])]
              for i, row in enumerate(ids)]
    labels[-1][-6:] = [-100] * 6
    return {"input_ids": ids, "labels": labels, "attention_mask": mask, "position_ids": pos}


def plant(rng: random.Random, cols: dict, near: list[int]) -> None:
    """Defects in and around the rows ``near`` (the rows next to the cuts): a missing eos at a document boundary,
    a doubled eos running over the row start, ids out of range, a labels column of the wrong length, an empty row,
    a padded row whose last document has no eos."""
    ids, labels, pos = cols["input_ids"], cols["labels"], cols["position_ids"]
    rows = len(ids)
    for centre in near:
        for row in {max(0, min(rows - 2, centre + d)) for d in (-1, 0, 1)}:
            what = rng.randrange(7)
            if len(ids[row]) < 2 or len(ids[row + 1]) < 2:
                continue  # emptied already
            if what == 0:  # missing eos before a position restart
                starts = [t for t in range(1, len(ids[row])) if pos[row][t] == 0]
                if starts:
                    ids[row][starts[0] - 1] = 7
            elif what == 1:  # doubled eos: the last token of a row and the first of the next are eos
                ids[row][-1] = EOS
                ids[row + 1][0] = EOS
                ids[row][-2] = EOS
            elif what == 2:
                ids[row][rng.randrange(len(ids[row]))] = VOCAB + rng.randrange(50)
            elif what == 3:
                ids[row][rng.randrange(len(ids[row]))] = -rng.randrange(1, 4)
            elif what == 4:
                labels[row] = labels[row][:-3]
            elif what == 5:
                ids[row], labels[row] = [], []
                cols["attention_mask"][row], pos[row] = [], []
            else:  # labels shifted by two in this row
                labels[row] = ids[row][2:] + [-100, -100]


def boundaries(sizes: list[int]) -> list[int]:
    out, total = [], 0
    for n in sizes[:-1]:
        total += n
        out.append(total)
    return out


@pytest.mark.parametrize("seed", range(12))
def test_split_parquet_and_arrow_match_whole_scan(tmp_path, cut, seed):
    rng = random.Random(seed)
    rows, group = rng.randrange(60, 160), rng.randrange(8, 30)
    cols = windows(rng, rows)
    cuts = boundaries([group] * (rows // group + 1))[:6]
    plant(rng, cols, cuts)
    for row in (c + 1 for c in cuts if c + 1 < rows - 1):  # exact copies of row 1 after each unit boundary
        for values in cols.values():
            values[row] = list(values[1])
    fmt = ["parquet", "arrow"][seed % 2]
    path = write(tmp_path / f"shard.{fmt}", cols, row_group_size=group)
    cap = [10_000, 3][seed % 3 == 0]
    whole = report([path], vocab_size=VOCAB, instance_cap=cap)
    parted = report([path], SerialPair(), vocab_size=VOCAB, instance_cap=cap)
    assert parted == whole
    # the shard was cut into two parts at a unit boundary
    assert len(cut) == 1 and cut[0] is not None and len(cut[0]) == 2
    assert cut[0][1].first_row % group == 0 and 0 < cut[0][1].first_row < rows


def test_parquet_part_rows_follow_row_groups(tmp_path, cut):
    rng = random.Random(5)
    path = write(tmp_path / "a.parquet", windows(rng, 100), row_group_size=10)
    report([path], SerialPair(), vocab_size=VOCAB)
    parts = cut[0]
    assert [(p.lo, p.hi, p.first_row) for p in parts] == [(0, 5, 0), (5, 10, 50)]
    # the row groups as pyarrow reads them from the file metadata (reference library)
    meta = pq.ParquetFile(path).metadata
    assert sum(meta.row_group(g).num_rows for g in range(parts[1].lo)) == parts[1].first_row


def jsonl_lines(rng: random.Random, rows: int) -> list[bytes]:
    """Lines of tokenized records with text, some blank, some not JSON, one with a mistyped input_ids, texts with
    control characters, special-token strings and nothing but spaces."""
    cols = windows(rng, rows, seq_len=12)
    plant(rng, cols, [rows // 3, rows // 2, 2 * rows // 3])
    for row in range(rows // 4, rows - 1, rows // 4):  # exact copies of row 2 spread over the file
        for values in cols.values():
            values[row] = list(values[2])
    out = []
    for i in range(rows):
        record = {k: v[i] for k, v in cols.items()}
        record["text"] = rng.choice(["a plain line", "tea\x07time", "  ", "", "x <|endoftext|> y", "caf\u00e9"])
        if rng.random() < 0.05:
            record["input_ids"] = "not a list"
        line = json.dumps(record).encode()
        if rng.random() < 0.05:
            line = line[: len(line) // 2]  # a bad JSON line
        if rng.random() < 0.04:
            line = b""
        out.append(line)
    return out


@pytest.mark.parametrize("seed", range(10))
def test_split_jsonl_matches_whole_scan(tmp_path, cut, seed):
    rng = random.Random(100 + seed)
    lines = jsonl_lines(rng, rng.randrange(80, 200))
    data = b"\n".join(lines) + (b"\n" if seed % 3 else b"")  # some files end in a cut-off line
    if seed % 4 == 0:
        data = b"\xef\xbb\xbf" + data
    path = tmp_path / "shard.jsonl"
    path.write_bytes(data)
    whole = report([path], vocab_size=VOCAB)
    parted = report([path], SerialPair(), vocab_size=VOCAB)
    assert parted == whole
    parts = cut[0]
    assert parts is not None and len(parts) == 2
    # each part starts right after a newline, at the line index counted by the standard library
    lo = parts[1].lo
    assert data[lo - 1:lo] == b"\n"
    assert parts[1].first_row == data[:lo].count(b"\n")


def test_split_on_a_process_pool_matches_whole_scan(tmp_path, monkeypatch, caplog):
    """Real processes (the read sizes are the defaults there): a Parquet shard of several row groups."""
    monkeypatch.setattr(split, "SPLIT_BYTES", 0)
    rng = random.Random(9)
    cols = windows(rng, 400)
    plant(rng, cols, [99, 100, 199, 200, 300])
    path = write(tmp_path / "big.parquet", cols, row_group_size=50)
    whole = report([path], vocab_size=VOCAB)
    with caplog.at_level(logging.DEBUG, logger="corpuscle.engine.scan"):
        parted = report([path], LocalExecutor(2), vocab_size=VOCAB)
    assert parted == whole
    said = [re.search(r"in 2 parts starting at rows 0, (\d+)$", r.getMessage()) for r in caplog.records]
    starts = [int(m.group(1)) for m in said if m]
    assert len(starts) == 1 and starts[0] % 50 == 0 and 0 < starts[0] < 400  # at a row group boundary


class RowCount(Rule):
    """A rule that does not say it can join parts (as a plugin might): it only counts rows."""

    id = "row-count"
    needs = {"tokens_column": "int-list"}

    def feed(self, state, batch):
        state.count(rows=len(batch))


def test_not_split_when_a_rule_cannot_join_parts(tmp_path, cut, caplog):
    path = write(tmp_path / "a.parquet", windows(random.Random(1), 60), row_group_size=10)
    s = Settings(vocab_size=VOCAB, only=("token-range",))
    with caplog.at_level(logging.DEBUG, logger="corpuscle.engine.scan"):
        result = run(discover([path]), s, select_rules(s, registry()) + [RowCount()], executor=SerialPair())
    assert cut == []  # never planned
    assert any("row-count" in r.getMessage() and "whole" in r.getMessage() for r in caplog.records)
    assert result.metrics["rows"] == 60


def test_parts_that_cannot_be_joined_exactly_are_scanned_whole(tmp_path, cut, caplog):
    """label-alignment keeps the first 16 distinct negative label values: a second part with many others cannot say
    how often the first part's values occur in it, so the shard is scanned again whole."""
    cols = windows(random.Random(4), 80)
    for row in range(80):
        cols["labels"][row][3] = -1 - (row % 3) if row < 20 else -10 - row
    path = write(tmp_path / "a.parquet", cols, row_group_size=10)
    whole = report([path], vocab_size=VOCAB)
    with caplog.at_level(logging.DEBUG, logger="corpuscle.engine.scan"):
        parted = report([path], SerialPair(), vocab_size=VOCAB)
    assert parted == whole
    assert len(cut[0]) == 2
    again = [r.getMessage() for r in caplog.records if "cannot join the parts exactly" in r.getMessage()]
    assert len(again) == 1 and "label-alignment" in again[0]  # only that rule is scanned again
    assert any(f["rule"] == "label-alignment" and f["kind"] == "negative-label" for f in whole["findings"])


def test_not_split_compressed_jsonl_or_arrow_stream(tmp_path, cut):
    cols = windows(random.Random(2), 60)
    gz = write(tmp_path / "a.jsonl.gz", cols)
    stream = write(tmp_path / "b.arrow", cols, fmt="arrows", row_group_size=10)
    whole = report([gz, stream], vocab_size=VOCAB)
    assert report([gz, stream], SerialPair(), vocab_size=VOCAB) == whole
    assert cut == [None, None]


def test_small_shards_are_not_split(tmp_path, monkeypatch):
    monkeypatch.setattr(split, "SPLIT_BYTES", 1 << 30)
    path = write(tmp_path / "a.parquet", windows(random.Random(3), 60), row_group_size=10)
    shard = discover([path])[0]
    assert split.plan(shard, Settings(), 2) is None
    assert split.plan(shard, Settings(), 2, threshold=0) is not None
    assert split.plan(shard, Settings(), 1, threshold=0) is None


def test_hits_extend_keeps_the_first_locations_and_the_true_count():
    from corpuscle.findings import Hits

    whole, first, second = Hits(4), Hits(4), Hits(4)
    for hits, rows in ((first, [1, 2, 3]), (second, [7, 8]), (second, [9])):
        hits.add(rows, np.array(rows) * 10)
    for rows in ([1, 2, 3], [7, 8], [9]):
        whole.add(rows, np.array(rows) * 10)
    first.extend(second)
    assert (first.count, first.rows.tolist(), first.offsets.tolist(), first.truncated) == \
        (whole.count, whole.rows.tolist(), whole.offsets.tolist(), whole.truncated) == (6, [1, 2, 3, 7], [10, 20, 30, 70], True)


# -- documents that run across the cuts ---------------------------------------------------------------------------

class SerialParts(SerialPair):
    """Like SerialPair, with ``jobs`` parts per shard."""

    def __init__(self, jobs: int):
        self.jobs = jobs


def long_documents(rng: random.Random, rows: int, arrangement: str, seq_len: int = 16) -> dict:
    """Rows of documents of very mixed lengths (some longer than several parts), stored as ``arrangement``:
    ``positions`` (packed, position_ids restart per document; some documents cut at a row end, the next row then
    starting a new one), ``separators`` (packed, eos after each document, some rows padded after an eos) or
    ``one-per-row`` (each row one document, padded, or full without eos: cut), plus a text column."""
    ids, pos = [], []
    row, row_pos = [], []
    while len(ids) < rows:
        if arrangement == "one-per-row":
            n = rng.choice([rng.randrange(1, seq_len), seq_len + rng.randrange(0, 40)])
            doc = [rng.randrange(3, VOCAB) for _ in range(min(n, seq_len))]
            if n < seq_len:
                doc = doc + [EOS] + [PAD] * (seq_len - n - 1)
            ids.append(doc)
            continue
        n = rng.choice([rng.randrange(1, 12), rng.randrange(12, 80), rng.randrange(80, 400)]) if ids else 5
        doc = [rng.randrange(3, VOCAB) for _ in range(n)] + [EOS]
        for t, token in enumerate(doc):
            row.append(token)
            row_pos.append(t)
            if len(row) == seq_len:
                ids.append(row)
                pos.append(row_pos)
                row, row_pos = [], []
                if arrangement == "positions" and t < len(doc) - 1 and rng.random() < 0.1:
                    break  # cut at the window: the rest of the document is not in the shard
        if arrangement == "separators" and row and len(ids) > 2 and rng.random() < 0.1:  # a padded row
            ids.append(row + [PAD] * (seq_len - len(row)))
            row, row_pos = [], []
    ids = ids[:rows]
    ids[-1] = ids[-1][:-3] + [PAD] * 3  # the last row padded
    cols = {"input_ids": ids}
    if arrangement == "positions":
        cols["position_ids"] = pos[:rows]
    cols["text"] = [" ".join(f"w{t % 50}" for t in r[:rng.randrange(0, len(r) + 1)]) for r in ids]
    return cols


@pytest.mark.parametrize("arrangement", ["positions", "separators", "one-per-row"])
@pytest.mark.parametrize("seed", range(6))
def test_documents_across_cuts_match_whole_scan(tmp_path, cut, arrangement, seed):
    """overlong-document and truncation-waste join the document open at each cut (also one that runs through
    whole parts) and the documents cut at the window; the text lengths of the same rows are joined too."""
    rng = random.Random(1000 + seed)
    rows, group = rng.randrange(60, 140), rng.randrange(2, 7) if arrangement != "separators" else 12
    cols = long_documents(rng, rows, arrangement)  # (separators: inferred from an eos inside a row)
    fmt = ["parquet", "arrow"][seed % 2]
    path = write(tmp_path / f"shard.{fmt}", cols, row_group_size=group)
    only = ("overlong-document", "truncation-waste", "empty-document")
    cap = [10_000, 2][seed % 2]
    settings = dict(vocab_size=VOCAB, eos_id=EOS, pad_id=PAD, seq_len=16, only=only, instance_cap=cap,
                    rule={"truncation-waste": {"max_waste": 0.0}})
    whole = report([path], **settings)
    parts = 2 + seed % 4
    parted = report([path], SerialParts(parts), **settings)
    assert parted == whole
    assert cut[0] is not None and len(cut[0]) == parts
    kinds = {(f["rule"], f["kind"]): f for f in whole["findings"]}
    assert ("truncation-waste", "budget") in kinds
    # packed documents run over several windows; a row holding one document never does, but may be cut
    kind = "cut" if arrangement == "one-per-row" else "longer-than-window"
    assert kinds["overlong-document", kind]["evidence"]["arrangement"] == {
        "positions": "position-restarts"}.get(arrangement, arrangement)
    if arrangement == "positions":
        assert ("overlong-document", "cut") in kinds
    # text lengths (UTF-8 bytes) of the same shard, read from the text column
    text = report([path], SerialParts(parts), vocab_size=VOCAB, tokens_column="absent", only=only)
    assert text == report([path], vocab_size=VOCAB, tokens_column="absent", only=only)
    assert text["metrics"]["documentBytes"]["documents"] == sum(1 for t in cols["text"] if t)


def test_near_duplicates_across_cuts_match_whole_scan(tmp_path, cut):
    """Near copies (the last of 64 tokens changed: 59 of 61 5-token shingles shared, Jaccard 0.97) and exact copies of rows in other parts: the band keys of each part go
    into the shuffle on their own, with the window ids a whole-shard scan gives."""
    rng = random.Random(77)
    ids = [[rng.randrange(3, VOCAB) for _ in range(64)] for _ in range(90)]
    for src, dst in [(1, 40), (1, 85), (30, 31), (50, 88), (12, 61)]:
        ids[dst] = list(ids[src])
        if dst != 85:
            ids[dst][63] = ids[src][63] % (VOCAB - 3) + 3 if ids[src][63] + 1 >= VOCAB else ids[src][63] + 1
    path = write(tmp_path / "a.parquet", {"input_ids": ids}, row_group_size=10)
    # Rows are the unit here: documents (the default) are not carried across the parts of a split shard.
    settings = dict(vocab_size=VOCAB, only=("near-duplicate", "exact-duplicate"),
                    rule={"near-duplicate": {"unit": "window"}, "exact-duplicate": {"unit": "window"}})
    whole = report([path], **settings)
    assert report([path], SerialParts(3), **settings) == whole
    assert len(cut[0]) == 3
    near = [f for f in whole["findings"] if f["rule"] == "near-duplicate"]
    # the clusters list their members, row 85 (an exact copy of row 1) too
    assert sorted(sorted([c["kept"]["row"]] + [o["row"] for o in c["others"]]) for f in near
                  for c in f["evidence"]["clusterList"]) == [[1, 40, 85], [12, 61], [30, 31], [50, 88]]


def test_a_part_that_stopped_ends_the_shard_but_keyed_rules_keep_every_part(tmp_path, cut):
    """A part whose reader stopped at a failure ends the shard, as a whole scan would (later parts are left out);
    but near-duplicate gave the later parts' band keys to the shuffle already, so its state joins every part."""
    from corpuscle.engine.scan import merge_parts, scan_shard

    path = write(tmp_path / "a.parquet", {"input_ids": [[i % 7 + 3] * 30 for i in range(40)]}, row_group_size=10)
    shard = discover([path])[0]
    s = Settings(vocab_size=VOCAB, only=("near-duplicate", "token-range"), rule={"near-duplicate": {"unit": "window"}})
    rules = select_rules(s, registry())
    parts = split.plan(shard, s, 2)
    results = [scan_shard(shard, s, rules, part=part) for part in parts]
    results[0].part["stopped"] = True
    merged, unjoined = merge_parts(results, rules)
    assert unjoined == []
    assert merged.rows == parts[1].first_row  # the rows of the first part only
    assert len(merged.states["near-duplicate"].rows) == 40  # every window of both parts
    assert merged.tokens == results[0].tokens == 30 * parts[1].first_row


@pytest.mark.parametrize("damage", ["row group", "truncated"])
def test_a_damaged_shard_split_in_parts_reports_what_a_whole_scan_does(tmp_path, cut, damage):
    """A flipped byte in the data of a middle row group (page checksums on, so the reader sees it), or a file cut
    off in its middle: the split scan gives the whole scan's report."""
    cols = windows(random.Random(21), 120)
    table = __import__("pyarrow").table(cols)
    path = tmp_path / "a.parquet"
    pq.write_table(table, path, row_group_size=10, write_page_checksum=True)
    data = bytearray(path.read_bytes())
    if damage == "row group":
        chunk = pq.ParquetFile(path).metadata.row_group(7).column(0)
        assert chunk.total_compressed_size > 200
        data[chunk.data_page_offset + 200] ^= 0xFF  # inside the page's data, past its header
    else:
        data = data[: len(data) // 2]
    path.write_bytes(bytes(data))
    whole = report([path], vocab_size=VOCAB)
    parted = report([path], SerialParts(3), vocab_size=VOCAB)
    assert parted == whole
    unreadable = [f for f in whole["findings"] if f["rule"] == "unreadable-shard"]
    assert len(unreadable) == 1
    if damage == "row group":  # the other row groups are still scanned
        assert unreadable[0]["instances"] == [{"row": 70}] and whole["metrics"]["rows"] == 110


def test_every_part_reads_documents_as_the_shards_first_records_say(tmp_path, cut, caplog):
    """Packed rows whose first row group has eos inside rows (separators), and a document of 600 tokens running
    through the rows where the second part starts: that part's own first batch has no eos inside a row and alone
    would look like one document per row. The parts read the shard as its first records say, and join without a
    second scan."""
    stream = []
    for n in [5, 7, 3, 9, 600, 11, 4, 200, 6]:
        stream += [3 + (i * 7 + n) % 400 for i in range(n)] + [EOS]
    stream += [5] * (-len(stream) % 16)
    rows = [stream[i:i + 16] for i in range(0, len(stream), 16)]
    path = write(tmp_path / "a.parquet", {"input_ids": rows}, row_group_size=4)
    settings = dict(vocab_size=VOCAB, eos_id=EOS, seq_len=16, only=("overlong-document", "truncation-waste"),
                    rule={"truncation-waste": {"max_waste": 0.0}})
    whole = report([path], **settings)
    with caplog.at_level(logging.DEBUG, logger="corpuscle.engine.scan"):
        parted = report([path], SerialParts(2), **settings)
    assert parted == whole
    start = cut[0][1].first_row
    assert 0 < start < len(rows) and all(EOS not in row[:-1] for row in rows[start:start + 4])  # mid-document
    assert not [r for r in caplog.records if "cannot join" in r.getMessage()]
    [overlong] = [f for f in whole["findings"] if f["kind"] == "longer-than-window"]
    assert overlong["evidence"]["arrangement"] == "separators" and overlong["evidence"]["overlong"] == 2
