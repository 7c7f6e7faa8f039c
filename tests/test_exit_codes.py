"""Exit codes a CI job can act on: 0 clean, 1 findings at or above --fail-at, 2 usage error, 3 the scan is
incomplete (a rule or the engine raised), with SARIF ``invocations[0].executionSuccessful: false`` and the error in
``toolExecutionNotifications``, every other rule's findings unchanged."""
from __future__ import annotations

import json
import random
from importlib.metadata import EntryPoint

import corpuscle.engine.registry as registry
import corpuscle.engine.split as split
import numpy as np
import pytest
from click.testing import CliRunner
from corpuscle.cli import main
from corpuscle.findings import Level
from corpuscle.rules.api import Rule

from tests.shards import pack, validate_sarif, write

HOOKS = ("begin", "feed", "end", "report", "corpus", "merge")


class Fragile(Rule):
    """A plugin rule for the test: notes rows longer than 3 tokens, and raises in the hook named by ``hook``."""

    id = "test-fragile"
    level = Level.note
    summary = "Raises in one hook."
    help = "Nothing to fix."
    needs = {"tokens_column": "int-list"}
    options = {"hook": ""}
    splittable = True

    def _maybe(self, hook):
        if self.opts["hook"] == hook:
            raise RuntimeError(f"planted failure in {hook}")

    def begin(self, shard, settings):
        self._maybe("begin")
        return super().begin(shard, settings)

    def feed(self, state, batch):
        self._maybe("feed")
        rows = np.flatnonzero(batch.flat(state.settings.tokens_column).lengths > 3)
        state.hit("long", batch, rows)

    def end(self, state):
        self._maybe("end")
        return state

    def report(self, state):
        self._maybe("report")
        return [self.finding(state, "long", "long rows")] if state.hits else []

    def corpus(self, states):
        self._maybe("corpus")
        return [], {}

    def merge(self, first, second):
        self._maybe("merge")
        return super().merge(first, second)


@pytest.fixture
def plugin(monkeypatch):
    ep = EntryPoint(name="fragile", value="tests.test_exit_codes:Fragile", group=registry.ENTRY_POINT_GROUP)
    monkeypatch.setattr(registry, "entry_points", lambda group: [ep] if group == registry.ENTRY_POINT_GROUP else [])


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    """Three shards with defects of the built-in rules (a missing separator, ids beyond the vocabulary, copies)."""
    folder = tmp_path_factory.mktemp("corpus")
    rng = random.Random(4)
    docs = [[rng.randrange(3, 90) for _ in range(rng.randrange(5, 40))] for _ in range(60)]
    cols = pack(docs, 32, eos=2)
    cols["input_ids"][3][5] = 500  # beyond vocab_size 100
    write(folder / "a.parquet", cols, row_group_size=7)
    write(folder / "b.jsonl", pack(docs[:30], 32, eos=None))  # no separators at all
    write(folder / "c.arrow", pack(docs[10:50], 32, eos=2))
    return folder


def scan(folder, tmp_path, *args):
    sarif = tmp_path / "r.sarif"
    result = CliRunner().invoke(main, ["scan", str(folder), "--eos-id", "2", "--vocab-size", "100", "--sarif",
                                       str(sarif), "--quiet", *map(str, args)])
    assert "Traceback" not in result.output
    return result, validate_sarif(json.loads(sarif.read_text()))


def others(log: dict) -> list:
    """Every result but the plugin's, without timings."""
    return sorted(json.dumps(r, sort_keys=True) for r in log["runs"][0]["results"] if r["ruleId"] != "test-fragile")


@pytest.mark.parametrize("jobs", [1, 2])
@pytest.mark.parametrize("hook", HOOKS)
def test_a_rule_that_raises_makes_the_scan_incomplete_exit_3_with_the_others_findings_intact(
        plugin, corpus, tmp_path, monkeypatch, hook, jobs):
    base = ""
    if hook == "merge":  # merge is called only for a shard scanned in parts: split every shard that can be
        if jobs == 1:
            pytest.skip("one process never scans a shard in parts, so merge is never called")
        monkeypatch.setattr(split, "SPLIT_BYTES", 0)
        # documents as the duplicate unit cannot be joined across parts (a shard is then scanned whole): windows
        base = '[rule.exact-duplicate]\nunit = "window"\n[rule.near-duplicate]\nunit = "window"\n'
    (tmp_path / "base.toml").write_text(base)
    baseline, clean = scan(corpus, tmp_path, "--jobs", jobs, "--config", tmp_path / "base.toml")
    assert baseline.exit_code == 1  # error findings of the built-in rules, nothing raised
    assert clean["runs"][0]["invocations"][0]["executionSuccessful"] is True
    config = tmp_path / "fragile.toml"
    config.write_text(f'{base}[rule.test-fragile]\nhook = "{hook}"\n')
    result, log = scan(corpus, tmp_path, "--jobs", jobs, "--config", config)
    assert result.exit_code == 3, result.output
    invocation = log["runs"][0]["invocations"][0]
    assert invocation["executionSuccessful"] is False
    errors = [n for n in invocation["toolExecutionNotifications"] if n["level"] == "error"]
    assert errors and all(n["associatedRule"]["id"] == "test-fragile" for n in errors)
    assert all(f"planted failure in {hook}" in n["message"]["text"] for n in errors)
    assert others(log) == others(clean)


def test_no_finding_exits_0_and_findings_exit_1_and_never_fails_nothing(tmp_path):
    write(tmp_path / "ok.jsonl", {"text": ["Knead the dough for ten minutes.", "Rest it overnight."]})
    write(tmp_path / "bad.jsonl", {"text": ["Fold the butter in.", "Fold the butter in."]})  # exact copy: warning
    runner = CliRunner()
    assert runner.invoke(main, ["scan", str(tmp_path / "ok.jsonl"), "--jobs", "1"]).exit_code == 0
    assert runner.invoke(main, ["scan", str(tmp_path / "bad.jsonl"), "--jobs", "1"]).exit_code == 0
    assert runner.invoke(main, ["scan", str(tmp_path / "bad.jsonl"), "--jobs", "1", "--fail-at", "warning"]).exit_code == 1
    assert runner.invoke(main, ["scan", str(tmp_path / "bad.jsonl"), "--jobs", "1", "--fail-at", "never"]).exit_code == 0


def test_an_engine_failure_on_one_shard_exits_3_and_the_other_shards_are_reported(tmp_path, monkeypatch):
    import corpuscle.engine.scan as engine

    write(tmp_path / "a.jsonl", {"text": ["Salt the water.", "Salt the water."]})
    write(tmp_path / "b.jsonl", {"text": ["Toast the seeds.", "Toast the seeds."]})
    real = engine.open_shard

    def flaky(shard, **kwargs):
        if shard.uri.endswith("a.jsonl"):
            raise MemoryError("planted")
        return real(shard, **kwargs)

    monkeypatch.setattr(engine, "open_shard", flaky)
    out = tmp_path / "r.json"
    result = CliRunner().invoke(main, ["scan", str(tmp_path), "--jobs", "1", "--json", str(out)])
    assert result.exit_code == 3, result.output
    report = json.loads(out.read_text())
    assert report["exitCode"] == 3
    assert [f["uri"].rsplit("/", 1)[-1] for f in report["findings"] if f["rule"] == "exact-duplicate"] == ["b.jsonl"]
    (note,) = [n for n in report["notes"] if n["level"] == "error"]
    assert "MemoryError: planted" in note["message"] and note["uri"].endswith("a.jsonl")


def test_a_pool_process_that_dies_has_its_shard_redone_here(tmp_path, monkeypatch):
    """A pool process killed mid-item (BrokenProcessPool) loses nothing: the item is done in this process."""
    import os

    import corpuscle.engine.executors as executors

    out = list(executors.LocalExecutor(2).map(_die_in_pool, [(os.getpid(), i) for i in range(4)]))
    assert out == [i * 10 for i in range(4)]


def _die_in_pool(item):
    import os

    parent, i = item
    if os.getpid() != parent:
        os._exit(9)  # the pool process dies as if killed
    return i * 10
