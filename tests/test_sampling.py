"""Sampled scans (``--sample FRACTION --seed N``): which units are read, that the choice is the same in every run
and for any number of jobs, what the report then claims, and the Wilson score interval it gives.

The units a scan must read are computed here from the documented rule (a unit is read when the BLAKE2b-64 hash of
"<seed>\\x1f<uri>\\x1f<unit>", read little-endian and divided by 2**64, is below the fraction) with hashlib directly,
not with the code under test. The interval is checked against Wilson's formula written out here in its other
published form and against values from the literature.
"""
from __future__ import annotations

import hashlib
import json
import math
import re
from statistics import NormalDist

import pytest
from click.testing import CliRunner
from corpuscle.cli import main
from corpuscle.engine.sampling import Sample, wilson_interval
from corpuscle.engine.scan import run
from corpuscle.findings import Level
from corpuscle.io.sources import LINE_BLOCK, discover
from corpuscle.rules.api import Rule
from corpuscle.settings import Settings

from tests.shards import sarif_validator, write

# -- a rule that shows which rows were read -----------------------------------------------------------------------


class RowsRead(Rule):
    """Test rule: one finding per shard listing every row it was fed (the instance cap is raised to hold them)."""

    id = "rows-read"
    level = Level.note
    summary = "rows fed"
    help = "none"
    needs = {"tokens_column": "int-list"}

    def feed(self, state, batch):
        state.hit_at("read", batch.rows)

    def report(self, state):
        return [self.finding(state, "read", "rows read")] if "read" in state.hits else []


class EveryTenth(Rule):
    """Test rule: a finding for the rows whose index is a multiple of 10 (a known share of 10% of any block)."""

    id = "every-tenth"
    level = Level.warning
    summary = "rows 0, 10, 20 ..."
    help = "none"
    needs = {"tokens_column": "int-list"}

    def feed(self, state, batch):
        state.hit_at("tenth", batch.rows[batch.rows % 10 == 0])

    def report(self, state):
        return [self.finding(state, "tenth", "every tenth row")] if "tenth" in state.hits else []


def rows_read(report) -> dict[str, list[int]]:
    return {f.uri: sorted(f.rows.tolist()) for f in report.findings if f.rule_id == "rows-read"}


def drawn(seed: int, uri: str, unit: int) -> float:
    """The documented draw, computed here with hashlib."""
    digest = hashlib.blake2b(f"{seed}\x1f{uri}\x1f{unit}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") / 2 ** 64


def kept_units(seed: int, uri: str, units: int, fraction: float) -> list[int]:
    return [u for u in range(units) if drawn(seed, uri, u) < fraction]


def scan_with(paths, rules, sample=None, jobs=1):
    shards = discover([str(p) for p in paths])
    return run(shards, Settings(instance_cap=1_000_000), rules, jobs=jobs, sample=sample)


GROUPS, GROUP_ROWS = 40, 10


def many_groups(path, offset=0):
    """A Parquet shard of GROUPS row groups of GROUP_ROWS rows; row r holds the tokens [r+offset, 5, 6, 2]."""
    rows = GROUPS * GROUP_ROWS
    return write(path, {"input_ids": [[r + offset, 5, 6, 2] for r in range(rows)]}, row_group_size=GROUP_ROWS)


# -- which units are read -------------------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", [0, 7])
def test_half_the_row_groups_are_read_the_same_ones_in_every_run_and_for_any_jobs(tmp_path, seed):
    paths = [many_groups(f"c/s{i}.parquet", 1000 * i) for i in range(3)]
    sample = Sample(0.5, seed)
    expected = {}
    for path in paths:
        uri = path  # the shards are given one by one, so each is reported as given
        groups = kept_units(seed, uri, GROUPS, 0.5)
        expected[uri] = [g * GROUP_ROWS + r for g in groups for r in range(GROUP_ROWS)]
    first = scan_with(paths, [RowsRead()], sample, jobs=1)
    again = scan_with(paths, [RowsRead()], sample, jobs=1)
    pooled = scan_with(paths, [RowsRead()], sample, jobs=2)
    assert rows_read(first) == rows_read(again) == rows_read(pooled) == expected
    # About half of the 120 row groups, and not all or none of any shard's (a check that the test means something).
    chosen = sum(len(v) for v in expected.values()) // GROUP_ROWS
    assert 40 <= chosen <= 80 and all(0 < len(v) < GROUPS * GROUP_ROWS for v in expected.values())
    figures = first.metrics["sample"]
    assert figures["units"] == 3 * GROUPS and figures["unitsScanned"] == chosen
    assert figures["rowsScanned"] == first.metrics["rows"] == chosen * GROUP_ROWS
    assert figures["rowsTotal"] == figures["estimatedRows"] == 3 * GROUPS * GROUP_ROWS  # Parquet metadata
    assert figures["tokensScanned"] == 4 * chosen * GROUP_ROWS
    assert figures["estimatedTokens"] == 4 * 3 * GROUPS * GROUP_ROWS  # 4 tokens a row, scaled by rows
    assert (figures["fraction"], figures["seed"]) == (0.5, seed)


def test_another_seed_reads_other_row_groups(tmp_path):
    path = many_groups("a.parquet")
    zero = rows_read(scan_with([path], [RowsRead()], Sample(0.5, 0)))
    one = rows_read(scan_with([path], [RowsRead()], Sample(0.5, 1)))
    assert zero != one


def test_arrow_record_batches_are_the_units(tmp_path):
    for name in ("a.arrow",):
        rows = 300
        path = write(name, {"input_ids": [[r, 2] for r in range(rows)]}, fmt="arrow", row_group_size=20)
        report = scan_with([path], [RowsRead()], Sample(0.3, 3))
        batches = kept_units(3, path, rows // 20, 0.3)
        assert rows_read(report) == {path: [b * 20 + r for b in batches for r in range(20)]}
        assert report.metrics["sample"]["rowsTotal"] == rows  # known from the stored batches


@pytest.mark.parametrize("name", ["lines.jsonl", "lines.jsonl.gz"])
def test_json_lines_blocks_of_lines_are_the_units(tmp_path, name):
    lines = 5 * LINE_BLOCK + 100  # six blocks, the last one short
    path = write(name, {"input_ids": [[r % 50 + 3, 2] for r in range(lines)]})
    report = scan_with([path], [RowsRead()], Sample(0.5, 2))
    blocks = kept_units(2, path, 6, 0.5)
    expected = [r for b in blocks for r in range(b * LINE_BLOCK, min(lines, (b + 1) * LINE_BLOCK))]
    assert rows_read(report).get(path, []) == expected
    figures = report.metrics["sample"]
    assert figures["rowsTotal"] is None  # JSON Lines has no row count without reading every line
    assert figures["estimatedRows"] == lines  # no blank lines: rows scanned x all lines / lines scanned


def test_a_json_lines_shard_whose_blocks_are_all_skipped_is_not_called_empty(tmp_path):
    path = write("small.jsonl", {"input_ids": [[3, 2]] * 10})  # one block
    seed = next(s for s in range(100) if drawn(s, path, 0) >= 0.5)  # a seed that skips it
    report = scan_with([path], [RowsRead()], Sample(0.5, seed))
    assert report.metrics["rows"] == 0 and rows_read(report) == {}
    from corpuscle.engine.registry import registry

    integrity = scan_with([path], [registry()["unreadable-shard"]()], Sample(0.5, seed))
    assert integrity.findings == []  # not "the file holds no JSON records"


def test_sample_one_is_a_full_scan(tmp_path):
    paths = [many_groups(f"c/s{i}.parquet", 1000 * i) for i in range(2)]
    full = scan_with(paths, [RowsRead()])
    one = scan_with(paths, [RowsRead()], Sample(1.0, 5))
    assert rows_read(one) == rows_read(full)
    assert "sample" not in one.metrics and one.metrics["rows"] == 2 * GROUPS * GROUP_ROWS


def test_sample_one_on_the_command_line_gives_the_sarif_of_a_full_scan(tmp_path):
    many_groups("c/s0.parquet")
    write("c/t.jsonl", {"input_ids": [[3, 4, 2], [5, 2], [3, 4, 2]]})
    runner = CliRunner()
    runner.invoke(main, ["scan", "c", "--jobs", "1", "--sarif", "full.sarif"])
    runner.invoke(main, ["scan", "c", "--jobs", "1", "--sample", "1", "--seed", "3", "--sarif", "one.sarif"])
    untimed = [re.sub(rb'"seconds": [0-9.e+-]+', b'"seconds": 0', open(p, "rb").read())
               for p in ("full.sarif", "one.sarif")]
    assert untimed[0] == untimed[1]


@pytest.mark.parametrize("value", ["0", "-0.5", "1.5", "half"])
def test_a_fraction_outside_0_to_1_is_a_usage_error(tmp_path, value):
    many_groups("a.parquet")
    result = CliRunner().invoke(main, ["scan", "a.parquet", "--sample", value])
    assert result.exit_code == 2 and "--sample" in result.output


def test_sample_arguments_are_validated_at_construction():
    for bad in (0, 1.5, -1, float("nan"), True, "0.5"):
        with pytest.raises(ValueError, match="fraction"):
            Sample(bad)
    with pytest.raises(ValueError, match="seed"):
        Sample(0.5, -1)


# -- what the report claims ---------------------------------------------------------------------------------------


def wilson_by_roots(x: int, n: int, z: float) -> tuple[float, float]:
    """Wilson (1927)'s interval as the two roots of (p̂ - p)² = z² p (1 - p) / n in p, written out as
    (2x + z² ± z sqrt(z² + 4x(n - x)/n)) / (2(n + z²)) -- the form given by Newcombe, Statistics in Medicine 17
    (1998) 857-872, method 3 (from memory)."""
    root = z * math.sqrt(z * z + 4 * x * (n - x) / n)
    return (2 * x + z * z - root) / (2 * (n + z * z)), (2 * x + z * z + root) / (2 * (n + z * z))


def test_the_wilson_interval_matches_the_published_formula_and_values():
    z = NormalDist().inv_cdf(0.975)  # the two-sided 95% normal quantile, 1.959964 (stdlib)
    assert z == pytest.approx(1.959964, abs=1e-6)
    for x, n in [(1, 2), (3, 10), (17, 400), (81, 263), (999, 1000), (5, 5)]:
        assert wilson_interval(x, n) == pytest.approx(wilson_by_roots(x, n, z), abs=1e-12)
    # 0 of n: the lower end is 0 and the upper z²/(n + z²) (the roots above with x = 0); for n = 10 that is 0.2775.
    assert wilson_interval(0, 10) == (0.0, pytest.approx(z * z / (10 + z * z), abs=1e-12))
    assert wilson_interval(0, 10)[1] == pytest.approx(0.2775, abs=5e-5)
    # Newcombe (1998), Table II, Wilson score method, 95% (from memory): 81/263 -> 0.2553 to 0.3662,
    # 15/148 -> 0.0624 to 0.1605, 0/20 -> 0 to 0.1611, 1/29 -> 0.0061 to 0.1718.
    for (x, n), (low, high) in {(81, 263): (0.2553, 0.3662), (15, 148): (0.0624, 0.1605),
                                (0, 20): (0.0, 0.1611), (1, 29): (0.0061, 0.1718)}.items():
        got = wilson_interval(x, n)
        assert got == (pytest.approx(low, abs=5e-5), pytest.approx(high, abs=5e-5))
    with pytest.raises(ValueError):
        wilson_interval(3, 2)


def test_each_finding_gets_a_sample_estimate_with_the_wilson_interval(tmp_path):
    path = many_groups("a.parquet")
    report = scan_with([path], [EveryTenth(), RowsRead()], Sample(0.5, 0))
    [finding] = [f for f in report.findings if f.rule_id == "every-tenth"]
    groups = kept_units(0, path, GROUPS, 0.5)
    scanned = len(groups) * GROUP_ROWS
    affected = len(groups)  # one row in ten: rows g*10 of each kept group
    assert finding.count == affected  # counts stay as observed in the sample
    estimate = finding.evidence["sampleEstimate"]
    low, high = wilson_by_roots(affected, scanned, NormalDist().inv_cdf(0.975))
    assert estimate["affectedRows"] == affected and estimate["rowsScanned"] == scanned
    assert estimate["basis"] == "rows"
    assert estimate["share"] == pytest.approx(0.1, abs=1e-6)
    assert estimate["ci95Low"] == pytest.approx(low, abs=1e-6)
    assert estimate["ci95High"] == pytest.approx(high, abs=1e-6)
    total = GROUPS * GROUP_ROWS
    assert estimate["estimatedRows"] == total and estimate["estimatedAffectedRows"] == total // 10
    assert estimate["estimatedAffectedRowsCi95"] == [round(low * total), round(high * total)]
    assert estimate["estimatedCount"] == round(affected * total / scanned)


def test_the_sarif_and_the_summary_say_it_is_a_sample(tmp_path):
    many_groups("c/s0.parquet")
    many_groups("c/s1.parquet", 1000)
    write("c/t.jsonl", {"input_ids": [[3, 4, 2]] * 3000})
    runner = CliRunner()
    args = ["scan", "c", "--sample", "0.5", "--seed", "4", "--vocab-size", "500"]
    one = runner.invoke(main, [*args, "--jobs", "1", "--sarif", "one.sarif"])
    two = runner.invoke(main, [*args, "--jobs", "2", "--sarif", "two.sarif"])
    assert one.exit_code == two.exit_code == 1  # ids 1000 and up are >= vocab_size 500 in s1
    untimed = [re.sub(rb'"seconds": [0-9.e+-]+', b'"seconds": 0', open(p, "rb").read())
               for p in ("one.sarif", "two.sarif")]
    assert untimed[0] == untimed[1]
    sarif = json.loads(untimed[0])
    validator = sarif_validator()
    validator.validate(sarif)  # the OASIS SARIF 2.1.0 schema (see tests/test_sarif.py)
    run_ = sarif["runs"][0]
    assert run_["properties"]["metrics"]["sample"]["fraction"] == 0.5
    estimates = [r["properties"]["sampleEstimate"] for r in run_["results"] if r["ruleId"] == "token-range"]
    assert estimates and all("rowsScanned" in e and "estimatedCount" in e for e in estimates)
    notes = [n["message"]["text"] for n in run_["invocations"][0]["toolExecutionNotifications"]]
    assert any(n.startswith("figures are estimates from a sample") for n in notes)
    assert one.output.startswith("corpuscle ") and "SAMPLE of 3 shard(s)" in one.output.splitlines()[0]
    assert "figures are estimates from a sample" in one.output
