"""The CI gate: baselines, rule levels, suppressions, and the exit status each gives.

Outside sources:
* OASIS Static Analysis Results Interchange Format (SARIF) Version 2.1.0, errata01, section 3.27.24 (result
  ``baselineState``): "new" -- the result was detected in the current run but not in the baseline run;
  "unchanged" -- detected in both runs and not changed in a way the tool considers significant; "updated" --
  detected in both runs and changed in a way the tool considers significant; "absent" -- detected in the baseline
  run but not in the current run (paraphrased from the specification text).
* The OASIS SARIF 2.1.0 JSON schema in tests/data, which every log written here is validated against, and whose
  descriptions say: ``run.baselineGuid`` is "the 'guid' property of a previous SARIF 'run' that comprises the
  baseline" (a run's guid is ``run.automationDetails.guid``); a suppression's ``kind`` is "inSource" or "external"
  ("where the suppression is persisted": ours live in the settings file); ``region.startLine`` has minimum 1.
  ``invocation.ruleConfigurationOverrides`` carries the levels set for a run (section numbers other than 3.27.24
  are not cited: from memory only).
"""
from __future__ import annotations

import json
import os

from click.testing import CliRunner
from corpuscle.cli import main

from tests.shards import validate_sarif

GOOD = '{"input_ids": [10, 11, 12, 2]}'
BAD = '{"input_ids": [10, 11'  # not JSON: an unreadable-record finding (kind bad-json), an error


def lines_file(path, lines):
    os.makedirs(os.path.dirname(path) or ".", exist_ok=True)
    with open(path, "w") as fh:
        fh.write("\n".join(lines) + "\n")


def scan(*args):
    result = CliRunner().invoke(main, ["scan", *map(str, args), "--jobs", "1"])
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exc_info
    assert "Traceback" not in result.output
    return result


def sarif_of(path) -> dict:
    return validate_sarif(json.loads(open(path).read()))


def results_by_shard(log) -> dict:
    """{shard uri: (baselineState, count)} of the results of one run."""
    out = {}
    for r in log["runs"][0]["results"]:
        uri = r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"]
        out[uri] = (r.get("baselineState"), r["properties"]["count"])
    return out


# -- baselines ---------------------------------------------------------------------------------------------------

ONLY = ("--only", "unreadable-record")


def corpus():
    """Three shards: a.jsonl and b.jsonl hold one line that is not JSON each, clean.jsonl none."""
    lines_file("c/a.jsonl", [GOOD, BAD, GOOD])
    lines_file("c/b.jsonl", [BAD, GOOD])
    lines_file("c/clean.jsonl", [GOOD, GOOD])


def baseline():
    corpus()
    first = scan("c", *ONLY, "--sarif", "base.sarif")
    assert first.exit_code == 1
    base = sarif_of("base.sarif")
    assert results_by_shard(base) == {"c/a.jsonl": (None, 1), "c/b.jsonl": (None, 1)}
    return base


def against_baseline():
    result = scan("c", *ONLY, "--baseline", "base.sarif", "--sarif", "now.sarif", "--json", "now.json")
    log = sarif_of("now.sarif")
    base = json.loads(open("base.sarif").read())
    # section 3.14.6: baselineGuid is the guid of the baseline run
    assert log["runs"][0]["baselineGuid"] == base["runs"][0]["automationDetails"]["guid"]
    return result, log


def test_nothing_changed_every_result_is_unchanged_and_the_run_exits_0(tmp_path):
    baseline()
    result, log = against_baseline()
    # 3.27.24 "unchanged": detected in both runs, no significant change (same fingerprint, count and instances)
    assert results_by_shard(log) == {"c/a.jsonl": ("unchanged", 1), "c/b.jsonl": ("unchanged", 1)}
    assert result.exit_code == 0
    assert "Baseline base.sarif: 0 new, 0 updated, 2 unchanged, 0 absent" in result.stdout
    assert result.stdout.splitlines()[-1].startswith(
        "2 error(s), 0 warning(s), 0 note(s), 0 new or updated since the baseline; exit 0 (fails at: error)")


def test_a_new_shard_with_a_defect_is_new_and_exits_1(tmp_path):
    baseline()
    lines_file("c/new.jsonl", [GOOD, GOOD, BAD])
    result, log = against_baseline()
    # 3.27.24 "new": detected in this run, not in the baseline run
    assert results_by_shard(log) == {"c/a.jsonl": ("unchanged", 1), "c/b.jsonl": ("unchanged", 1),
                                     "c/new.jsonl": ("new", 1)}
    assert result.exit_code == 1
    assert "ERROR unreadable-record  c/new.jsonl: 1 line (first at row 2, char 21) [new]: " in result.stdout


def test_a_defect_that_grew_is_updated_and_exits_1(tmp_path):
    baseline()
    lines_file("c/a.jsonl", [GOOD, BAD, GOOD, BAD, BAD])  # 1 -> 3 bad lines
    result, log = against_baseline()
    # 3.27.24 "updated": in both runs, changed in a way the tool considers significant (count 1 -> 3)
    assert results_by_shard(log) == {"c/a.jsonl": ("updated", 3), "c/b.jsonl": ("unchanged", 1)}
    updated = [r for r in log["runs"][0]["results"] if r["baselineState"] == "updated"][0]
    assert updated["properties"]["baselineCount"] == 1
    assert [i["row"] for i in updated["properties"]["instances"]] == [1, 3, 4]
    assert result.exit_code == 1
    assert "[updated from 1]" in result.stdout


def test_a_moved_defect_with_the_same_count_is_updated(tmp_path):
    baseline()
    lines_file("c/a.jsonl", [GOOD, GOOD, BAD])  # still one bad line, now at row 2 instead of row 1
    result, log = against_baseline()
    assert results_by_shard(log)["c/a.jsonl"] == ("updated", 1)
    assert result.exit_code == 1


def test_a_removed_shard_leaves_its_results_absent_and_exits_0(tmp_path):
    base = baseline()
    os.remove("c/b.jsonl")
    result, log = against_baseline()
    # 3.27.24 "absent": detected in the baseline run, not in this one -- included in the log with that state
    assert results_by_shard(log) == {"c/a.jsonl": ("unchanged", 1), "c/b.jsonl": ("absent", 1)}
    absent = [r for r in log["runs"][0]["results"] if r["baselineState"] == "absent"][0]
    old = [r for r in base["runs"][0]["results"]
           if r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"] == "c/b.jsonl"][0]
    assert absent["partialFingerprints"] == old["partialFingerprints"]
    assert absent["ruleId"] == "unreadable-record" and absent["properties"]["instances"] == [{"row": 0, "offset": 21}]
    assert result.exit_code == 0
    assert "absent now (gone since the baseline): unreadable-record in c/b.jsonl" in result.stdout
    report = json.loads(open("now.json").read())
    assert [f["baselineState"] for f in report["findings"]] == ["unchanged", "absent"]
    assert report["exitCode"] == 0


def test_a_refreshed_baseline_starts_from_the_new_state(tmp_path):
    baseline()
    lines_file("c/new.jsonl", [BAD])
    assert scan("c", *ONLY, "--baseline", "base.sarif").exit_code == 1
    # refresh: write the baseline anew from a scan (README: Usage, baselines), then the same data passes
    scan("c", *ONLY, "--sarif", "base.sarif")
    result, log = against_baseline()
    assert result.exit_code == 0
    assert {state for state, _ in results_by_shard(log).values()} == {"unchanged"}


def test_an_unusable_baseline_is_a_usage_error(tmp_path):
    corpus()
    result = scan("c", "--baseline", "missing.sarif")
    assert result.exit_code == 2 and result.stdout == ""
    assert result.stderr.startswith("Error: cannot read the baseline missing.sarif: ")
    open("junk.sarif", "w").write("not json")
    result = scan("c", "--baseline", "junk.sarif")
    assert result.exit_code == 2
    assert result.stderr == ("Error: the baseline junk.sarif is not a SARIF log with a run: give a file an earlier "
                             "scan wrote with --sarif\n")


# -- levels ------------------------------------------------------------------------------------------------------


def level_corpus():
    lines_file("legacy/bad.jsonl", [GOOD, BAD])
    lines_file("fresh/bad.jsonl", [BAD, GOOD])
    open("fresh/empty.jsonl", "w").close()  # unreadable-shard reports an empty file as a warning


def config(text):
    open("corpuscle.toml", "w").write(text)


def levels_of(log) -> dict:
    return {(r["ruleId"], r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"]): r["level"]
            for r in log["runs"][0]["results"]}


RULES = ("--only", "unreadable-record,unreadable-shard")


def test_a_rule_level_from_the_config_file_sets_the_results_level_and_the_exit_status(tmp_path):
    level_corpus()
    assert scan("legacy", "fresh", *RULES).exit_code == 1
    config('[rule.unreadable-record]\nlevel = "warning"\n')
    result = scan("legacy", "fresh", *RULES, "--sarif", "r.sarif")
    assert result.exit_code == 0
    log = sarif_of("r.sarif")
    assert levels_of(log) == {("unreadable-record", "legacy/bad.jsonl"): "warning",
                              ("unreadable-record", "fresh/bad.jsonl"): "warning",
                              ("unreadable-shard", "fresh/empty.jsonl"): "warning"}
    driver = log["runs"][0]["tool"]["driver"]["rules"]
    # the rule's default stays in defaultConfiguration; the run's override is a ruleConfigurationOverride (3.20.5)
    assert [r["defaultConfiguration"]["level"] for r in driver] == ["error", "error"]
    assert log["runs"][0]["invocations"][0]["ruleConfigurationOverrides"] == [
        {"descriptor": {"id": "unreadable-record", "index": 0}, "configuration": {"level": "warning"}}]
    assert {r["properties"].get("ruleLevel") for r in log["runs"][0]["results"]} == {"error", None}
    # --level beats the file
    assert scan("legacy", "fresh", *RULES, "--level", "unreadable-record=error").exit_code == 1
    assert scan("legacy", "fresh", *RULES, "--fail-at", "warning").exit_code == 1


def test_a_finding_the_rule_rates_below_its_default_keeps_its_level_or_drops_to_a_lower_one(tmp_path):
    level_corpus()
    scan("fresh/empty.jsonl", "--only", "unreadable-shard", "--level", "unreadable-shard=error", "--sarif", "r.sarif")
    assert levels_of(sarif_of("r.sarif")) == {("unreadable-shard", "fresh/empty.jsonl"): "warning"}
    scan("fresh/empty.jsonl", "--only", "unreadable-shard", "--level", "unreadable-shard=note", "--sarif", "r.sarif")
    assert levels_of(sarif_of("r.sarif")) == {("unreadable-shard", "fresh/empty.jsonl"): "note"}


def test_off_does_not_run_the_rule(tmp_path):
    level_corpus()
    config('[rule.unreadable-record]\nlevel = "off"\n')
    result = scan("legacy", "fresh", *RULES, "--sarif", "r.sarif")
    log = sarif_of("r.sarif")
    assert levels_of(log) == {("unreadable-shard", "fresh/empty.jsonl"): "warning"}
    assert [r["id"] for r in log["runs"][0]["tool"]["driver"]["rules"]] == ["unreadable-shard"]
    assert result.exit_code == 0
    assert scan("legacy", "fresh", *RULES, "--level", "unreadable-record=off").exit_code == 0


def test_levels_per_path(tmp_path):
    level_corpus()
    config('[paths."legacy"]\nrule.unreadable-record.level = "note"\n')
    result = scan("legacy", "fresh", *RULES, "--sarif", "r.sarif")
    assert levels_of(sarif_of("r.sarif")) == {("unreadable-record", "legacy/bad.jsonl"): "note",
                                              ("unreadable-record", "fresh/bad.jsonl"): "error",
                                              ("unreadable-shard", "fresh/empty.jsonl"): "warning"}
    assert result.exit_code == 1
    assert "NOTE  unreadable-record  legacy/bad.jsonl: 1 line (first at row 1, char 21) [set from error]: " in \
        result.stdout
    config('[paths."legacy/*"]\nrule.unreadable-record.level = "off"\n[paths."fresh/*"]\n'
           'rule.unreadable-record.level = "warning"\n')
    result = scan("legacy", "fresh", *RULES, "--sarif", "r.sarif")
    assert levels_of(sarif_of("r.sarif")) == {("unreadable-record", "fresh/bad.jsonl"): "warning",
                                              ("unreadable-shard", "fresh/empty.jsonl"): "warning"}
    assert result.exit_code == 0
    # off for the whole run, on again for one folder: the rule runs, and only that folder's results stay
    config('[rule.unreadable-record]\nlevel = "off"\n[paths."fresh/*"]\nrule.unreadable-record.level = "error"\n')
    scan("legacy", "fresh", *RULES, "--sarif", "r.sarif")
    assert levels_of(sarif_of("r.sarif")) == {("unreadable-record", "fresh/bad.jsonl"): "error",
                                              ("unreadable-shard", "fresh/empty.jsonl"): "warning"}


def test_bad_levels_are_usage_errors(tmp_path):
    level_corpus()
    for text, message in [
        ('[rule.unreadable-record]\nlevel = "fatal"\n',
         "Error: [rule.unreadable-record] level must be one of error, warning, note, off, got 'fatal'\n"),
        ('[paths."legacy/*".rule.unreadable-record]\nthreshold = 1\n',
         'Error: [paths."legacy/*".rule.unreadable-record] may only set level (error, warning, note or off), '
         "not threshold\n"),
        ('[paths."legacy/*".rule.no-such-rule]\nlevel = "off"\n', "Error: unknown rule 'no-such-rule'"),
    ]:
        config(text)
        result = scan("legacy")
        assert result.exit_code == 2 and result.stderr.startswith(message), result.stderr
    os.remove("corpuscle.toml")
    result = scan("legacy", "--level", "unreadable-record")
    assert result.exit_code == 2 and result.stderr.startswith("Error: --level takes RULE=LEVEL")


# -- suppressions ------------------------------------------------------------------------------------------------


def test_a_matching_suppression_stays_in_sarif_does_not_count_and_shows_in_one_line(tmp_path):
    level_corpus()
    config('[[suppress]]\nrule = "unreadable-record"\npath = "legacy/*"\n'
           'justification = "legacy export, rebuilt next quarter"\n')
    result = scan("legacy", "fresh/bad.jsonl", "--only", "unreadable-record", "--sarif", "r.sarif")
    log = sarif_of("r.sarif")
    by_uri = {r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"]: r for r in log["runs"][0]["results"]}
    assert by_uri["legacy/bad.jsonl"]["suppressions"] == [
        {"kind": "external", "justification": "legacy export, rebuilt next quarter"}]
    assert "suppressions" not in by_uri["fresh/bad.jsonl"]
    assert result.exit_code == 1  # fresh/bad.jsonl still counts
    assert "SUPPRESSED 1 result(s) of unreadable-record in legacy/*: legacy export, rebuilt next quarter" in \
        result.stdout.splitlines()
    assert not [line for line in result.stdout.splitlines() if line.startswith("ERROR") and "legacy/" in line]
    assert scan("legacy", "--only", "unreadable-record").exit_code == 0  # only suppressed findings: exit 0
    assert result.stdout.splitlines()[-1].startswith("1 error(s), 0 warning(s), 0 note(s), 1 suppressed; exit 1")


def test_a_suppression_matching_nothing_is_a_stale_note(tmp_path):
    level_corpus()
    config('[[suppress]]\nrule = "unreadable-record"\npath = "legacy/*"\nkind = "cut-off"\n'
           'justification = "the exporter cuts the last line"\n')
    result = scan("legacy", "--only", "unreadable-record", "--sarif", "r.sarif")
    assert result.exit_code == 1  # the bad-json finding is not of kind cut-off: not suppressed
    log = sarif_of("r.sarif")
    assert "suppressions" not in log["runs"][0]["results"][0]
    notes = [n for n in log["runs"][0]["invocations"][0]["toolExecutionNotifications"]
             if n["message"]["text"].startswith("stale suppression")]
    assert [(n["level"], n["associatedRule"]["id"], n["message"]["text"]) for n in notes] == [
        ("note", "unreadable-record", "stale suppression: [[suppress]] unreadable-record in legacy/*, kind cut-off "
                                      "matched no finding in this run; remove it if the defect is gone")]
    assert ("note: [unreadable-record] stale suppression: [[suppress]] unreadable-record in legacy/*, kind cut-off "
            "matched no finding in this run; remove it if the defect is gone") in result.stdout.splitlines()
    config('[[suppress]]\nrule = "unreadable-record"\npath = "legacy/*"\nkind = "bad-*"\njustification = "known"\n')
    assert scan("legacy", "--only", "unreadable-record").exit_code == 0  # a kind glob that matches


def test_a_suppression_needs_a_justification(tmp_path):
    level_corpus()
    config('[[suppress]]\nrule = "unreadable-record"\npath = "legacy/*"\n')
    result = scan("legacy")
    assert result.exit_code == 2
    assert result.stderr == ("Error: [[suppress]] entry 1 needs justification = a reason, in words: every "
                             "suppression says why it is accepted\n")
    config('[[suppress]]\nrule = "nope"\npath = "legacy/*"\njustification = "x"\n')
    assert scan("legacy").stderr.startswith("Error: unknown rule 'nope'")


# -- the Python API reads what the command line reads --------------------------------------------------------------


def test_the_python_api_reads_the_same_config_and_writes_the_same_reports(tmp_path):
    from corpuscle import load_settings
    from corpuscle import scan as api_scan

    level_corpus()
    config('only = ["unreadable-record"]\n[rule.unreadable-record]\nlevel = "warning"\n')
    report = api_scan(["legacy", "fresh"])  # corpuscle.toml in the working directory, as the CLI reads it
    assert [(f.uri, f.level.name) for f in report.findings] == [("fresh/bad.jsonl", "warning"),
                                                                ("legacy/bad.jsonl", "warning")]
    assert report.exit_code == 0
    open("strict.toml", "w").write('only = ["unreadable-record"]\n[[suppress]]\nrule = "unreadable-record"\n'
                                   'path = "legacy/*"\njustification = "known"\n')
    report = api_scan(["legacy", "fresh"], config="strict.toml")
    assert [(f.uri, f.level.name, f.suppression) for f in report.findings] == [
        ("fresh/bad.jsonl", "error", None), ("legacy/bad.jsonl", "error", "known")]
    assert report.exit_code == 1
    settings = load_settings(config="strict.toml", eos_id=2)
    assert (settings.eos_id, settings.only, len(settings.suppress)) == (2, ("unreadable-record",), 1)

    report.write_sarif("api.sarif")
    report.write_json("api.json")
    shown = report.write_text("api.txt")
    assert open("api.txt").read() == shown and shown.splitlines()[-1].startswith("1 error(s), 0 warning(s)")
    assert "Corpus figures" in report.write_text(stats=True) and "Corpus figures" not in shown
    validate_sarif(json.loads(open("api.sarif").read()))
    scan("legacy", "fresh", "--config", "strict.toml", "--sarif", "cli.sarif", "--json", "cli.json")
    api, cli = json.loads(open("api.sarif").read()), json.loads(open("cli.sarif").read())
    assert api["runs"][0]["results"] == cli["runs"][0]["results"]
    assert json.loads(open("api.json").read())["findings"] == json.loads(open("cli.json").read())["findings"]
    again = api_scan(["legacy", "fresh"], config="strict.toml", baseline="cli.sarif")
    assert [f.baseline_state for f in again.findings] == ["unchanged", "unchanged"] and again.exit_code == 0


# -- one numbering -------------------------------------------------------------------------------------------------


def test_rows_and_offsets_are_0_based_and_sarif_says_which_line_is_meant(tmp_path):
    lines_file("n.jsonl", [GOOD, "", BAD])  # the bad record is line index 2 (blank lines count): line 3 of the file
    result = scan("n.jsonl", "--only", "unreadable-record", "--sarif", "r.sarif")
    [r] = sarif_of("r.sarif")["runs"][0]["results"]
    assert r["properties"]["instances"] == [{"row": 2, "offset": 21}]
    assert r["locations"][0]["physicalLocation"]["region"] == {"startLine": 3}  # 1-based (schema: minimum 1)
    assert r["message"]["text"].endswith("First affected record: row 2 (0-based, as in properties.instances) = "
                                         "line 3 of the file (1-based, region.startLine).")
    assert "ERROR unreadable-record  n.jsonl: 1 line (first at row 2, char 21): " in result.stdout


# -- many findings of one rule -----------------------------------------------------------------------------------


def test_many_duplicate_clusters_in_one_shard_take_one_line_with_the_five_largest(tmp_path):
    from tests.shards import write

    words = ["kettle", "harbour", "lantern", "pebble", "orchard", "meadow", "thimble", "compass", "saddle",
             "ribbon", "anchor", "teapot"]
    notes = [f"an invented note about the {w} and the {w}'s long afternoon by the quay, number {i}"
             for i, w in enumerate(words)]
    texts = notes + notes + notes[:1]  # 12 pairs of copies, the first note three times
    write("dups.jsonl", {"text": texts})
    result = scan("dups.jsonl", "--only", "exact-duplicate", "--json", "r.json")
    (found,) = json.loads(open("r.json").read())["findings"]
    assert found["count"] == 25
    assert sorted(c["members"] for c in found["evidence"]["clusterList"]) == [2] * 11 + [3]
    lines = result.stdout.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("WARN  exact-duplicate  dups.jsonl: 25 copies"))
    assert lines[start + 1] == "      3 copies: row 0 = row 12 = row 24"
    assert [lines[start + k] for k in range(2, 6)] == [f"      2 copies: row {r} = row {r + 12}" for r in (1, 2, 3, 4)]
    assert lines[start + 6] == "      and 7 more clusters, listed in the SARIF/JSON report"
    assert lines[start + 7].startswith("      fix: ")
    assert sum(1 for line in lines if line.startswith("WARN")) == 1


def test_a_finding_across_shards_is_suppressed_when_every_shard_matches_and_takes_the_highest_level(tmp_path):
    from tests.shards import write

    notes = [f"an invented note on the {w} that the ferry carried across the bay at noon" for w in
             ("lantern", "teapot", "anchor")]
    write("mirror/m.jsonl", {"text": notes})
    write("main/t.jsonl", {"text": notes})
    args = ("mirror", "main", "--only", "exact-duplicate", "--fail-at", "warning", "--sarif", "r.sarif")
    config('[[suppress]]\nrule = "exact-duplicate"\npath = "mirror/*"\njustification = "mirror only"\n')
    result = scan(*args)
    log = sarif_of("r.sarif")
    # one finding for the three clusters between the two shards
    assert len(log["runs"][0]["results"]) == 1 and not any("suppressions" in r for r in log["runs"][0]["results"])
    assert result.exit_code == 1  # the finding also lists main/t.jsonl, which the entry does not match
    assert any(n["message"]["text"].startswith("stale suppression")
               for n in log["runs"][0]["invocations"][0]["toolExecutionNotifications"])
    config('[[suppress]]\nrule = "exact-duplicate"\npath = "m*"\njustification = "both folders are mirrors"\n')
    result = scan(*args)
    assert [len(r.get("suppressions", [])) for r in sarif_of("r.sarif")["runs"][0]["results"]] == [1]
    assert result.exit_code == 0
    # levels: off in one folder, warning in the other -> the clusters stay, at the highest level in force
    config('[paths."mirror"]\nrule.exact-duplicate.level = "off"\n[paths."main"]\nrule.exact-duplicate.level = '
           '"note"\n')
    scan(*args)
    assert {r["level"] for r in sarif_of("r.sarif")["runs"][0]["results"]} == {"note"}
    config('[paths."mirror"]\nrule.exact-duplicate.level = "off"\n[paths."main"]\nrule.exact-duplicate.level = '
           '"off"\n')
    scan(*args)
    assert sarif_of("r.sarif")["runs"][0]["results"] == []
