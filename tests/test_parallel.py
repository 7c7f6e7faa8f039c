"""A scan in a pool of processes writes the same SARIF, byte for byte, as a scan in one process: only the timing
(``metrics.seconds``, the one figure that measures time) may differ. The corpus mixes formats and defects, and
shares windows across shards so that the cross-shard reduce (duplicates) is exercised too."""
from __future__ import annotations

import json
import re

import pytest
from click.testing import CliRunner
from corpuscle.cli import main

from tests.shards import pack, write

DOCS = [[10 + (i * 7) % 50, 11 + (i * 3) % 40, 12 + i % 30, 13 + i % 11] for i in range(120)]
TIMING = re.compile(rb'"seconds": [0-9.eE+-]+')


def corpus():
    cols = pack(DOCS, 16, eos=2)
    write("c/a.parquet", cols, row_group_size=7)
    shifted = pack(DOCS[16:] + DOCS[:16], 16, eos=2)  # 16 documents = 5 whole windows
    shifted["labels"][4] = shifted["input_ids"][4]  # one row with aligned labels among shifted ones
    write("c/b.arrow", shifted, row_group_size=9)
    write("c/sub/c.jsonl", pack(DOCS[::2], 16, eos=None))  # no separators at all
    write("c/sub/d.jsonl.gz", {"text": ["a note on bread", "a note on bread", "", "soup \ufffd of the day"] * 5})
    with open("c/sub/e.jsonl", "w") as fh:
        fh.write('{"input_ids": [3, 4, 2]}\n{"input_ids": [3, 4\n')


def test_one_job_and_two_jobs_write_the_same_sarif_apart_from_timing(tmp_path):
    corpus()
    runner = CliRunner()
    logs = []
    for jobs in (1, 2):
        result = runner.invoke(main, ["scan", "c", "--jobs", str(jobs), "--vocab-size", "64", "--eos-id", "2", "--sarif",
                                      f"jobs{jobs}.sarif", "--drop-list", f"drop{jobs}.jsonl"])
        assert result.exit_code == 1, result.output
        logs.append(open(f"jobs{jobs}.sarif", "rb").read())
    assert all(len(TIMING.findall(log)) == 1 for log in logs)  # the one timing figure, replaced below
    untimed = [TIMING.sub(b'"seconds": 0', log) for log in logs]
    assert untimed[0] == untimed[1]
    assert open("drop1.jsonl", "rb").read() == open("drop2.jsonl", "rb").read()
    results = json.loads(untimed[0])["runs"][0]["results"]
    rules = {r["ruleId"] for r in results}
    # The corpus does hold defects of several families, cross-shard ones included.
    assert {"exact-duplicate", "missing-separator", "unreadable-record", "label-alignment"} <= rules
    assert any(r["ruleId"] == "exact-duplicate" and "uri" in r["properties"]["instances"][0] for r in results)


def _arrow_threads(_item) -> int:
    import pyarrow

    return pyarrow.cpu_count()


def test_jobs_is_the_number_of_cores_arrow_may_decode_with():
    """--jobs 1 scans in this process with one Arrow thread (not Arrow's pool on every core), and gives the pool
    back as it was; a pool process decodes with one thread too."""
    import pyarrow
    from corpuscle.engine.executors import LocalExecutor

    before = pyarrow.cpu_count()
    pyarrow.set_cpu_count(2)
    try:
        assert list(LocalExecutor(1).map(_arrow_threads, [1, 2])) == [1, 1]
        assert pyarrow.cpu_count() == 2
        assert list(LocalExecutor(2).map(_arrow_threads, [1, 2])) == [1, 1]
        assert list(LocalExecutor(2).map(_arrow_threads, [1])) == [2]  # one item, here: up to two threads
    finally:
        pyarrow.set_cpu_count(before)


def _where(item):
    import os
    import time

    time.sleep(0.2)  # long enough for the pool to take the first item before this process reaches it
    return item, os.getpid()


def _fails_on_three(item):
    import time

    time.sleep(0.2)
    if item == 3:
        raise ValueError("item three")
    return item


def test_two_jobs_are_this_process_and_one_pool_process_sharing_the_items():
    """The pool takes items from the front and this process from the back (so it works while the pool starts);
    the results come back in item order, and an error in either place reaches the caller."""
    import os

    from corpuscle.engine.executors import LocalExecutor

    out = list(LocalExecutor(2).map(_where, range(6)))
    assert [item for item, _ in out] == list(range(6))
    pids = [pid for _, pid in out]
    assert pids[0] != os.getpid() and pids[-1] == os.getpid()  # the first item in the pool, the last here
    assert len(set(pids)) == 2
    for items in ([0, 1, 2, 3], [3, 0, 1, 2]):  # item three done here (last), then in the pool (first)
        with pytest.raises(ValueError, match="item three"):
            list(LocalExecutor(2).map(_fails_on_three, items))


def test_items_a_broken_pool_cannot_take_are_done_here(monkeypatch):
    """A pool that refuses work (a process died: BrokenProcessPool) loses no item: this process does them."""
    import os
    from concurrent.futures import ProcessPoolExecutor
    from concurrent.futures.process import BrokenProcessPool

    import corpuscle.engine.executors as executors

    class Broken(ProcessPoolExecutor):
        def submit(self, *args, **kwargs):
            raise BrokenProcessPool("a process of the pool died")

    monkeypatch.setattr(executors, "ProcessPoolExecutor", Broken)
    out = list(executors.LocalExecutor(2).map(_where, range(4)))
    assert out == [(i, os.getpid()) for i in range(4)]
