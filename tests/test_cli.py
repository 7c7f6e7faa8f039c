"""The command line: exit status (0 clean, 1 a finding at or above --fail-at, 2 a usage problem), rule selection,
the `rules` and `explain` commands, report files written atomically, stdout/stderr discipline, and parallel scans
giving the same findings as serial ones.

Exit status 2 for usage errors is click's convention (click.UsageError.exit_code) and the CLI contract here.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest
from click.testing import CliRunner
from corpuscle import __version__
from corpuscle.cli import main
from corpuscle.engine.registry import registry

from tests.shards import REPO, pack, write

# -- shards -------------------------------------------------------------------------------------------------

#: 40 documents of 3 tokens, each closed by eos 2, packed two to a window of 8: no padding, no cut document,
#: shifted labels with the last one ignored, positions restarting at every document.
DOCS = [[10 + (i * 7) % 50, 11 + (i * 3) % 40, 12 + i % 30] for i in range(40)]


def clean(path):
    return write(path, pack(DOCS, 8, eos=2))


def broken_jsonl(path):
    """Five lines: records 0, 2 and 4 are fine, line 1 is not JSON, line 3 holds a string where ids belong."""
    lines = ['{"input_ids": [10, 11, 12, 2]}', '{"input_ids": [10, 11', '{"input_ids": [13, 14, 2]}',
             '{"input_ids": "15 16 2"}', '{"input_ids": [17, 18, 2]}']
    os.makedirs(os.path.dirname(str(path)) or ".", exist_ok=True)
    with open(path, "w") as fh:
        fh.write("\n".join(lines) + "\n")
    return str(path)


def invoke(*args):
    result = CliRunner().invoke(main, [str(a) for a in args])
    # A user mistake or bad data never shows a traceback: the only exception allowed is the exit itself.
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exc_info
    assert "Traceback" not in result.output
    return result


INTEGRITY = "schema-mismatch,unreadable-record,unreadable-shard"


# -- exit status --------------------------------------------------------------------------------------------


def test_a_clean_shard_exits_0_with_the_summary_on_stdout_and_nothing_on_stderr(tmp_path):
    clean("a.parquet")
    result = invoke("scan", "a.parquet", "--vocab-size", 100, "--jobs", 1)
    assert result.exit_code == 0, result.output
    assert result.stderr == ""
    lines = result.stdout.splitlines()
    assert lines[0].startswith(f"corpuscle {__version__}: 1 shard(s), 20 rows, 160 tokens, ")
    assert "No findings." in lines
    assert lines[-1] == ("0 error(s), 0 warning(s), 0 note(s); exit 0 (fails at: error). `corpuscle explain RULE` "
                         "says how to fix each.")


def test_an_error_finding_exits_1(tmp_path):
    broken_jsonl("bad.jsonl")
    result = invoke("scan", "bad.jsonl", "--only", "unreadable-record", "--jobs", 1)
    assert result.exit_code == 1
    assert result.stderr == ""
    assert "ERROR unreadable-record  bad.jsonl: 1 line (first at row 1, char 21): " in result.stdout
    assert result.stdout.splitlines()[-1].startswith("1 error(s), 0 warning(s), 0 note(s); exit 1 (fails at: error)")
    assert invoke("scan", "bad.jsonl", "--jobs", 1).exit_code == 1  # with every rule, too


def test_a_corrupt_shard_is_a_finding_not_a_usage_error(tmp_path):
    with open("noise.parquet", "wb") as fh:
        fh.write(b"PAR1 and nothing that makes a footer")
    result = invoke("scan", "noise.parquet", "--jobs", 1)
    assert result.exit_code == 1
    assert "ERROR unreadable-shard  noise.parquet: 1 file: " in result.stdout


def test_a_folder_of_every_kind_of_bad_shard_is_scanned_without_a_traceback(tmp_path):
    import gzip

    os.makedirs("bad")
    open("bad/empty.parquet", "wb").close()
    with open("bad/noise.jsonl", "wb") as fh:
        fh.write(bytes(range(256)) * 8)  # binary noise: invalid UTF-8, no JSON
    with open("bad/cut.jsonl.gz", "wb") as fh:
        fh.write(gzip.compress(b'{"input_ids": [1, 2, 3]}\n' * 500)[:-30])
    write("bad/t.arrow", {"input_ids": [[1, 2, 3]] * 50})
    data = open("bad/t.arrow", "rb").read()
    with open("bad/t.arrow", "wb") as fh:
        fh.write(data[: len(data) // 2])
    with open("bad/mixed.jsonl", "wb") as fh:
        fh.write(b'{"input_ids": [1, 2]}\n{"input_ids": [1.5, "x"]}\n{"labels": 7}\n{"input_ids": []}\n')
    result = invoke("scan", "bad", "--json", "r.json", "--jobs", 1)
    assert result.exit_code == 1
    assert result.stderr == ""
    found = {(f["rule"], f["uri"]) for f in json.loads((tmp_path / "r.json").read_text())["findings"]}
    assert {("unreadable-shard", "bad/empty.parquet"), ("unreadable-shard", "bad/cut.jsonl.gz"),
            ("unreadable-shard", "bad/t.arrow"), ("unreadable-record", "bad/noise.jsonl"),
            ("schema-mismatch", "bad/mixed.jsonl")} <= found


@pytest.mark.parametrize("setup,args,message", [
    (lambda: os.makedirs("empty"), ["scan", "empty"],
     "Error: no shard found under empty: expected .jsonl, .jsonl.gz, .jsonl.zst, .parquet, .arrow files\n"),
    (lambda: clean("a.parquet"), ["scan", "a.parquet", "--only", "no-such-rule"], None),
    (lambda: clean("a.parquet"), ["scan", "a.parquet", "--skip", "schema-mismatch,nope"], None),
    (lambda: clean("a.parquet"), ["scan", "a.parquet", "--labels", "both"], None),
    (lambda: clean("a.parquet"), ["scan", "a.parquet", "--fail-at", "always"], None),
    (lambda: clean("a.parquet"), ["scan", "a.parquet", "--seq-len", "-3"], None),
    (lambda: clean("a.parquet"), ["scan", "a.parquet", "--jobs", "0"], None),
    (lambda: clean("a.parquet"), ["scan", "a.parquet", "--config", "missing.toml"],
     "Error: config file missing.toml does not exist\n"),
    (lambda: clean("a.parquet"), ["explain", "no-such-rule"],
     "Error: unknown rule 'no-such-rule'; `corpuscle rules` lists them\n"),
    (lambda: clean("a.parquet"), ["scan"], None),
])
def test_usage_problems_exit_2_with_a_message_and_no_traceback(tmp_path, setup, args, message):
    setup()
    result = invoke(*args)
    assert result.exit_code == 2
    assert result.stdout == ""
    assert "Error:" in result.stderr
    if message:
        assert result.stderr == message
    if "--only" in args or "--skip" in args:
        bad = args[-1].split(",")[-1]
        assert result.stderr.startswith(f"Error: unknown rule {bad!r}; `corpuscle rules` lists them: ")


@pytest.mark.parametrize("config,message", [
    ("eos_id = = 1\n", "Error: cannot read config file ./corpuscle.toml: "),
    ("seqlen = 8\n", "Error: unknown setting(s) seqlen: known are "),
    ('labels = "sideways"\n', "Error: labels must be one of shifted, aligned, got 'sideways'\n"),
    ("seq_len = -8\n", "Error: seq_len must be a positive integer, got -8\n"),
    ('[paths."data/*"]\nfail_at = "note"\n', "Error: [paths.'data/*'] may only set shard facts ("),
    ("only = 5\n", 'Error: only takes rule ids, e.g. only = ["label-alignment"], got 5\n'),
    ("[rule.no-such-rule]\nx = 1\n", "Error: unknown rule 'no-such-rule'"),
    ("[rule.schema-mismatch]\nbogus = 1\n", "Error: rule schema-mismatch: unknown option(s) bogus (known: none)\n"),
])
def test_a_bad_config_file_exits_2(tmp_path, config, message):
    clean("a.parquet")
    (tmp_path / "corpuscle.toml").write_text(config)
    result = invoke("scan", "a.parquet", "--jobs", 1)
    assert result.exit_code == 2
    assert result.stderr.startswith(message)


def test_fail_at_sets_the_level_that_fails_the_run(tmp_path):
    (tmp_path / "empty.jsonl").write_bytes(b"")  # unreadable-shard reports an empty file as a warning
    broken_jsonl("bad.jsonl")  # unreadable-record reports a bad line as an error
    only = ["--only", "unreadable-shard", "--jobs", 1]
    assert invoke("scan", "empty.jsonl", *only).exit_code == 0
    assert invoke("scan", "empty.jsonl", *only, "--fail-at", "warning").exit_code == 1
    assert invoke("scan", "empty.jsonl", *only, "--fail-at", "note").exit_code == 1
    assert invoke("scan", "empty.jsonl", *only, "--fail-at", "error").exit_code == 0
    result = invoke("scan", "bad.jsonl", "--only", "unreadable-record", "--fail-at", "never", "--jobs", 1)
    assert result.exit_code == 0
    assert result.stdout.splitlines()[-1].startswith("1 error(s), 0 warning(s), 0 note(s); exit 0 (fails at: never)")


def test_fail_at_from_the_config_file_and_the_flag_over_it(tmp_path):
    (tmp_path / "empty.jsonl").write_bytes(b"")
    (tmp_path / "corpuscle.toml").write_text('fail_at = "warning"\nonly = ["unreadable-shard"]\n')
    assert invoke("scan", "empty.jsonl", "--jobs", 1).exit_code == 1
    assert invoke("scan", "empty.jsonl", "--jobs", 1, "--fail-at", "error").exit_code == 0


def test_only_and_skip_choose_the_rules(tmp_path):
    broken_jsonl("bad.jsonl")
    (tmp_path / "empty.jsonl").write_bytes(b"")
    result = invoke("scan", "bad.jsonl", "empty.jsonl", "--only", "unreadable-shard,unreadable-record",
                    "--json", "r.json", "--sarif", "r.sarif", "--jobs", 1)
    report = json.loads((tmp_path / "r.json").read_text())
    assert sorted((f["rule"], f["uri"], f["kind"]) for f in report["findings"]) == [
        ("unreadable-record", "bad.jsonl", "bad-json"), ("unreadable-shard", "empty.jsonl", "empty")]
    sarif = json.loads((tmp_path / "r.sarif").read_text())
    assert [r["id"] for r in sarif["runs"][0]["tool"]["driver"]["rules"]] == ["unreadable-record", "unreadable-shard"]
    assert result.exit_code == 1

    invoke("scan", "bad.jsonl", "empty.jsonl", "--skip", "unreadable-record,schema-mismatch", "--json", "r.json",
           "--sarif", "r.sarif", "--jobs", 1)
    report = json.loads((tmp_path / "r.json").read_text())
    assert {f["rule"] for f in report["findings"]}.isdisjoint({"unreadable-record", "schema-mismatch"})
    assert ("unreadable-shard", "empty.jsonl") in {(f["rule"], f["uri"]) for f in report["findings"]}
    ran = [r["id"] for r in json.loads((tmp_path / "r.sarif").read_text())["runs"][0]["tool"]["driver"]["rules"]]
    assert ran == [i for i in registry() if i not in ("unreadable-record", "schema-mismatch")]


# -- rules, explain -----------------------------------------------------------------------------------------


def test_rules_lists_every_registered_rule_with_its_level_and_summary():
    result = invoke("rules")
    assert result.exit_code == 0
    available = registry()
    lines = result.stdout.splitlines()
    assert [line.split()[0] for line in lines] == list(available)
    for line, (rule_id, cls) in zip(lines, available.items()):
        assert line.split()[1] == cls.level.name
        assert line.endswith(cls.summary)
    assert {"schema-mismatch", "unreadable-record", "unreadable-shard"} <= set(available)


def test_explain_prints_what_a_rule_checks_and_how_to_fix_it():
    available = registry()
    rule_id = "label-alignment" if "label-alignment" in available else "schema-mismatch"
    rule = available[rule_id]()
    result = invoke("explain", rule_id)
    assert result.exit_code == 0
    out = result.stdout
    assert out.startswith(f"{rule_id} (default level: {rule.level.name})\n\n")
    assert "What it checks and why it matters" in out and "How to fix" in out
    flat = " ".join(out.split())
    assert " ".join(rule.help.split()) in flat
    assert " ".join(rule.description.split()) in flat
    for name, default in rule.options.items():
        assert f"  {name} = {default!r}\n" in out


# -- report files -------------------------------------------------------------------------------------------


def test_sarif_and_json_are_written_and_nothing_else_is_left_behind(tmp_path):
    clean("data/a.parquet")
    broken_jsonl("data/bad.jsonl")
    os.makedirs("out")
    result = invoke("scan", "data", "--sarif", "out/r.sarif", "--json", "out/r.json", "--jobs", 1)
    assert result.exit_code == 1
    assert sorted(os.listdir("out")) == ["r.json", "r.sarif"]
    assert sorted(os.listdir("data")) == ["a.parquet", "bad.jsonl"]  # inputs untouched, no stray files
    report = json.loads((tmp_path / "out" / "r.json").read_text())
    sarif = json.loads((tmp_path / "out" / "r.sarif").read_text())
    assert report["exitCode"] == 1
    assert [s["uri"] for s in report["shards"]] == ["data/a.parquet", "data/bad.jsonl"]
    assert [a["location"]["uri"] for a in sarif["runs"][0]["artifacts"]] == ["data/a.parquet", "data/bad.jsonl"]
    assert len(sarif["runs"][0]["results"]) == len(report["findings"]) > 0
    # The same findings in the text summary: one line per finding, each followed by one fix line (no finding of
    # the same kind in two shards here, so nothing is merged).
    lines = result.stdout.splitlines()
    heads = [i for i, line in enumerate(lines) if line.split(" ")[0] in ("ERROR", "WARN", "NOTE")]
    assert len(heads) == len(report["findings"])
    for i, nxt in zip(heads, heads[1:] + [len(lines)]):  # (duplicate findings list their largest clusters first)
        assert sum(1 for line in lines[i + 1:nxt] if line.startswith("      fix: ")) == 1
    # --format long: one headline per finding, then its full message
    long = invoke("scan", "data", "--format", "long", "--jobs", 1)
    heads = [line for line in long.stdout.splitlines() if line.split(" ")[0] in ("ERROR", "WARN", "NOTE")]
    assert len(heads) == len(report["findings"])


def test_the_summary_never_breaks_a_word_or_a_rule_id(tmp_path):
    name = "a-shard-with-a-rather-long-hyphenated-name-" + "x" * 80 + ".jsonl"
    broken_jsonl(name)
    with open(name, "a") as fh:
        fh.write("[1, 2]\n")  # line 5: not an object
    compact = invoke("scan", name, "--jobs", 1)
    mentions = [line for line in compact.stdout.splitlines() if "a-shard-with" in line]
    assert mentions and all(name in line for line in mentions)  # the long shard name is never cut
    result = invoke("scan", name, "--json", "r.json", "--jobs", 1, "--format", "long")
    words = set(result.stdout.split())
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["findings"]
    for f in report["findings"]:
        assert set(f["message"].split()) <= words, f["message"]
    mentions = [line for line in result.stdout.splitlines() if "a-shard-with" in line]
    assert mentions and all(name in line for line in mentions)  # the long shard name is never cut


def test_a_report_path_that_cannot_be_written_exits_2(tmp_path):
    clean("a.parquet")
    (tmp_path / "blocker").write_text("a file where a folder is needed")
    result = invoke("scan", "a.parquet", "--json", "blocker/r.json", "--jobs", 1)
    assert result.exit_code == 2
    assert result.stderr.startswith("Error: cannot write blocker/r.json: ")


# -- parallel scans -----------------------------------------------------------------------------------------


def _findings(path):
    report = json.loads(open(path).read())
    return report["findings"], {k: v for k, v in report["metrics"].items() if k != "seconds"}


def test_two_jobs_give_the_same_findings_as_one(tmp_path):
    broken_jsonl("s/one.jsonl")
    cols = pack(DOCS, 8, eos=2)
    cols["labels"][3] = cols["labels"][3][:5]  # a labels list shorter than its input_ids
    write("s/two.parquet", cols)
    serial = invoke("scan", "s", "--json", "serial.json", "--jobs", 1)
    parallel = invoke("scan", "s", "--json", "parallel.json", "--jobs", 2)
    assert serial.exit_code == parallel.exit_code == 1
    found_1, metrics_1 = _findings("serial.json")
    found_2, metrics_2 = _findings("parallel.json")
    assert found_1 == found_2
    assert metrics_1 == metrics_2
    assert {(f["rule"], f["uri"], f["kind"]) for f in found_1} >= {
        ("unreadable-record", "s/one.jsonl", "bad-json"), ("schema-mismatch", "s/one.jsonl", "mistyped"),
        ("schema-mismatch", "s/two.parquet", "length:labels")}


# -- a real process -----------------------------------------------------------------------------------------


def test_python_dash_m_lint_in_a_real_process(tmp_path):
    clean("a.parquet")
    broken_jsonl("bad.jsonl")
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    ok = subprocess.run([sys.executable, "-m", "lint", "scan", "a.parquet", "--vocab-size", "100", "--jobs", "1"],
                        capture_output=True, text=True, env=env, timeout=300)
    assert (ok.returncode, ok.stderr) == (0, "")  # stderr is a pipe here, not a terminal: no progress
    assert "No findings." in ok.stdout
    bad = subprocess.run([sys.executable, "-m", "lint", "scan", "bad.jsonl", "a.parquet", "--jobs", "1",
                          "--sarif", "r.sarif"], capture_output=True, text=True, env=env, timeout=300)
    assert (bad.returncode, bad.stderr) == (1, "")
    assert json.loads((tmp_path / "r.sarif").read_text())["version"] == "2.1.0"
    usage = subprocess.run([sys.executable, "-m", "lint", "scan", "nowhere"], capture_output=True, text=True,
                           env=env, timeout=300)
    assert usage.returncode == 2 and usage.stdout == ""
    assert usage.stderr == ("Error: no shard found under nowhere (nowhere does not exist): expected .jsonl, "
                            ".jsonl.gz, .jsonl.zst, .parquet, .arrow files\n")


def test_explain_says_when_any_one_of_the_columns_suffices():
    out = CliRunner().invoke(main, ["explain", "near-duplicate"]).output
    assert "Columns needed (any one of them): tokens_column (int-list), text_column (text)" in out
    out = CliRunner().invoke(main, ["explain", "label-alignment"]).output
    assert "Columns needed: tokens_column (int-list), labels_column (int-list)" in out
