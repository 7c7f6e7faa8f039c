"""The rule registry: built-in families plus third-party rules from the entry-point group corpuscle.rules."""
from __future__ import annotations

from importlib.metadata import EntryPoint

import corpuscle.engine.registry as rules
import numpy as np
import pytest
from corpuscle.findings import Level
from corpuscle.rules.api import Rule

from tests.shards import findings, locations, run, write


class LongRows(Rule):
    """A plugin rule for the test: rows with more than ``limit`` tokens."""

    id = "test-long-rows"
    level = Level.note
    summary = "Rows longer than a limit."
    help = "Shorten them."
    needs = {"tokens_column": "int-list"}
    options = {"limit": 3}

    def feed(self, state, batch):
        flat = batch.flat(state.settings.tokens_column)
        rows = np.flatnonzero(flat.lengths > self.opts["limit"])
        state.hit("long", batch, rows, np.full(rows.size, self.opts["limit"]))

    def report(self, state):
        return [self.finding(state, "long", "long rows")] if state.hits else []


def _entry_points(target):
    # importlib.metadata.EntryPoint (stdlib) is what the registry iterates; the value names this test module.
    ep = EntryPoint(name="long-rows", value=target, group=rules.ENTRY_POINT_GROUP)
    return lambda group: [ep] if group == rules.ENTRY_POINT_GROUP else []


def test_a_plugin_rule_is_registered_and_runs(tmp_path, monkeypatch):
    monkeypatch.setattr(rules, "entry_points", _entry_points("tests.test_registry:LongRows"))
    assert "test-long-rows" in rules.registry()
    path = write(tmp_path / "a.parquet", {"input_ids": [[1, 2], [1, 2, 3, 4, 5], [7, 7, 7, 7]]})
    report = run(path, only=("test-long-rows",), rule={"test-long-rows": {"limit": 3}})
    (f,) = findings(report, "test-long-rows")
    assert (f.count, locations(f)) == (2, [(1, 3), (2, 3)])


def test_a_plugin_module_with_a_rules_list_is_registered(monkeypatch):
    monkeypatch.setattr(rules, "entry_points", _entry_points("tests.test_registry"))  # its RULES list, below
    assert "test-long-rows" in rules.registry()


def test_a_plugin_cannot_replace_a_built_in_rule(monkeypatch):
    class Impostor(LongRows):
        id = "label-alignment"

    monkeypatch.setattr(rules, "entry_points", lambda group: [type("EP", (), {"name": "x", "load": lambda self: Impostor})()])
    with pytest.raises(rules.PluginError, match="reuses the rule id 'label-alignment'"):
        rules.registry()


def test_a_broken_plugin_is_a_usage_error(monkeypatch):
    monkeypatch.setattr(rules, "entry_points", _entry_points("no_such_module_for_corpuscle:Rule"))
    with pytest.raises(rules.PluginError, match="rule plugin 'long-rows' cannot be loaded"):
        rules.registry()


RULES = [LongRows]
