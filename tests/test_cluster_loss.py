"""A task that fails for good on a Dask cluster loses that shard's findings only (lint/engine/executors.py
DaskExecutor, lint/engine/scan.py): the scan is reported incomplete (exit status 3, SARIF ``executionSuccessful``
false with the error in ``toolExecutionNotifications``) and the other shards' findings are those of a scan without
the lost shard.

The loss is real: a rule kills the worker process scanning one shard (``os._exit``), and the scheduler is told to
give a task up at its first worker death (``distributed.scheduler.allowed-failures = 0``: Dask's setting, so the
task fails with ``KilledWorker`` at once instead of being retried on the restarted worker).  The cluster is a
``distributed.LocalCluster`` with TLS, as ``--cluster local`` starts it.
"""
from __future__ import annotations

import os

import pytest
from corpuscle import Settings
from corpuscle.engine.executors import DaskExecutor, LocalExecutor
from corpuscle.engine.registry import registry
from corpuscle.engine.scan import run, select_rules
from corpuscle.findings import Level
from corpuscle.io.sources import discover
from corpuscle.report import sarif
from corpuscle.rules.api import Rule

from tests.shards import validate_sarif, write
from tests.test_cluster import _distributed, comparable

#: The shard whose scan kills its worker.
DOOMED = "doomed.parquet"


class KillsItsWorker(Rule):
    """Ends the worker process that scans the doomed shard (a stand-in for a worker lost to the out-of-memory
    killer or a crash in native code); anywhere else, and for the other shards, it does nothing."""

    id = "kills-its-worker"
    level = Level.note
    summary = "Test rule: ends the Dask worker that scans one shard."
    kinds = {"never": "never reported"}

    def begin(self, shard, settings):
        if shard.uri.endswith(DOOMED):
            try:
                from distributed import get_worker

                get_worker()
            except (ImportError, ValueError):  # not on a worker: never end the test's own process
                pass
            else:
                os._exit(13)
        return super().begin(shard, settings)

    def feed(self, state, batch):
        pass

    def report(self, state):
        return []


def corpus() -> list[str]:
    """Two good shards with findings of a per-shard rule (ids beyond the vocabulary), of a keyed rule across them
    (an exact copy), and the doomed shard, which would have findings too."""
    window = list(range(3, 40))
    write("data/a.parquet", {"input_ids": [window, [5, 6, 900, 3], list(range(50, 90))]})
    write("data/b.parquet", {"input_ids": [[7, 8, 3], window, [901, 2, 3]]})
    write(f"data/{DOOMED}", {"input_ids": [[902, 3], window]})
    return ["data/a.parquet", "data/b.parquet", f"data/{DOOMED}"]


@pytest.fixture(scope="module")
def fragile_cluster():
    _distributed()
    import dask

    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        with DaskExecutor("local", jobs=2) as executor:
            yield executor


@pytest.mark.parametrize("only", [(), ("token-range", "kills-its-worker")], ids=["shuffle", "map"])
def test_a_shard_whose_worker_dies_is_given_up_and_the_others_are_kept(fragile_cluster, only):
    a, b, doomed = corpus()
    settings = Settings(vocab_size=800, only=only)
    rules = select_rules(settings, {**registry(), KillsItsWorker.id: KillsItsWorker})
    assert any(rule.keyed for rule in rules) == (not only)  # all rules: the keyed shuffle; two rules: a plain map
    report = run(discover([a, b, doomed]), settings, rules, executor=fragile_cluster)
    without = run(discover([a, b]), settings, rules, executor=LocalExecutor(1))

    assert report.exit_code == 3
    lost = [n for n in report.notes if n.internal]
    assert len(lost) == 1 and lost[0].uri.endswith(DOOMED) and "KilledWorker" in lost[0].message
    # The good shards' findings and figures exactly as in a scan without the lost shard (its rows count as 0).
    found, metrics, notes, outputs = comparable(report, rename=lambda uri: uri.replace(os.getcwd() + "/", ""))
    found_without, metrics_without, notes_without, outputs_without = comparable(without)
    assert found == found_without and outputs == outputs_without
    assert {k: v for k, v in metrics.items() if k not in ("shards", "bytes")} == \
           {k: v for k, v in metrics_without.items() if k not in ("shards", "bytes")}
    assert metrics["shards"] == 3 and metrics["rows"] == 6
    # ids 900 and 901 beyond vocab_size 800: one each in a (row 1) and b (row 2); none from the lost shard
    assert {(f[2], f[3]) for f in found if f[:2] == ("token-range", "above-vocab")} == {(a, 1), (b, 1)}
    if not only:  # the copy of `window` across a and b
        assert [(f[0], f[1]) for f in found if f[0] == "exact-duplicate"] == [("exact-duplicate", "copies-between")]
    # SARIF 2.1.0 §3.20.14: executionSuccessful false; the error is a toolExecutionNotification (§3.20.21).
    log = validate_sarif(__import__("json").loads(sarif.render(report)))
    invocation = log["runs"][0]["invocations"][0]
    assert invocation["executionSuccessful"] is False
    assert any("KilledWorker" in n["message"]["text"] for n in invocation["toolExecutionNotifications"])
