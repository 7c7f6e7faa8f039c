"""Bounded memory: readers keep every batch to the token budget, and no rule keeps a batch alive after its turn (a
batch holds its Arrow buffers; one kept by a reference cycle lives until the cyclic garbage collector runs, so memory
would grow with the shard). Peak memory on large shards is measured by tests/perf/bench_memory.py."""
from __future__ import annotations

import gc
import weakref

import corpuscle.engine.scan as engine
import numpy as np
import pytest
from corpuscle.engine.registry import registry
from corpuscle.io.batch import is_integer_list
from corpuscle.io.sources import discover, open_shard
from corpuscle.settings import Settings

from tests.shards import pack, write

BUDGET = 1000


def tokens_of(batch) -> int:
    if not batch.has("input_ids") or not is_integer_list(batch.type_of("input_ids")):
        return 0
    return int(batch.flat("input_ids").values.size)


@pytest.mark.parametrize("name", ["w.parquet", "w.arrow"])
def test_parquet_and_arrow_batches_keep_to_the_token_budget(tmp_path, name):
    rows = [[3 + (r + t) % 90 for t in range(64)] for r in range(600)]  # 600 windows of 64 tokens
    path = write(name, {"input_ids": rows}, row_group_size=250)
    with open_shard(discover([path])[0], batch_tokens=BUDGET) as reader:
        sizes = [tokens_of(b) for b in reader]
    # 1000 // 64 = 15 windows a batch at most, within row groups (Parquet) or stored batches (Arrow) of 250.
    assert max(sizes) == 15 * 64 and sum(sizes) == 600 * 64
    assert len(sizes) == 2 * -(-250 // 15) + -(-100 // 15)  # 17 + 17 + 7: the last group holds 100 rows


@pytest.mark.parametrize("name", ["d.jsonl", "d.jsonl.gz"])
def test_json_lines_blocks_keep_to_the_token_budget(tmp_path, name):
    rng = np.random.default_rng(3)
    rows = [rng.integers(0, 10, size=int(n)).tolist() for n in rng.integers(1, 80, size=800)]
    path = write(name, {"input_ids": rows})
    with open_shard(discover([path])[0], batch_tokens=BUDGET) as reader:
        sizes = [tokens_of(b) for b in reader]
    # A token id in JSON takes two bytes at least ("7," or "7]"), so a block of 2 x budget bytes holds at most the
    # budget, plus the one line carried over from the block before.
    assert sum(sizes) == sum(len(r) for r in rows) and len(sizes) > 5
    assert max(sizes) <= BUDGET + max(len(r) for r in rows)


def _shards(tmp_path):
    docs = [[10 + (i * 7) % 50, 11 + (i * 3) % 40, 12 + i % 30] for i in range(300)]
    tokens = write("tok.parquet", pack(docs, 8, eos=2), row_group_size=20)
    text = write("text.jsonl", {"text": ["a note on bread", "soup of the day \ufffd", ""] * 100})
    return [tokens, text]


@pytest.mark.parametrize("rule_id", list(registry()))
def test_no_rule_keeps_a_batch_alive_after_the_shard(tmp_path, monkeypatch, rule_id):
    alive = []
    real_open = engine.open_shard

    class Watched:
        def __init__(self, reader):
            self.reader = reader
            self.consumed = 0

        def __enter__(self):
            self.reader.__enter__()
            return self

        def __exit__(self, *exc):
            return self.reader.__exit__(*exc)

        def __iter__(self):
            for batch in self.reader:
                alive.append(weakref.ref(batch))
                self.consumed = self.reader.consumed
                yield batch

    monkeypatch.setattr(engine, "open_shard", lambda *a, **k: Watched(real_open(*a, **k)))
    rule = registry()[rule_id]()
    settings = Settings(eos_id=2, vocab_size=100)
    gc.collect()
    gc.disable()  # only reference counting frees batches from here on
    try:
        for shard in discover(_shards(tmp_path)):
            engine.scan_shard(shard, settings, [rule])
        kept = sum(ref() is not None for ref in alive)
    finally:
        gc.enable()
        if hasattr(rule, "spill_folder"):
            rule.corpus([])  # removes the rule's temporary folder
    assert len(alive) == 9 and kept == 0  # 8 row groups of the token shard, 1 block of the text shard
