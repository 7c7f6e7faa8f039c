"""SARIF 2.1.0 (OASIS) output: one run, the rules in ``tool.driver.rules``, each shard an artifact, each finding a
result whose ``properties`` carry the count, the instances (row, offset) and the rule's evidence."""
from __future__ import annotations

import hashlib
import uuid
from urllib.parse import quote

import orjson
from corpuscle.findings import Finding
from corpuscle.report import dump_json
from corpuscle.version import __version__

SCHEMA_URI = "https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/sarif-schema-2.1.0.json"
INFORMATION_URI = "https://pypi.org/project/corpuscle/"


def artifact_uri(uri: str) -> str:
    """The shard's uri as given, percent-encoded where a URI reference needs it (spaces, '%', '#', '?'); the bytes
    of a name that is not valid UTF-8 (surrogate escapes) are percent-encoded as they are on disk (RFC 3986 §2.1)."""
    return quote(uri.encode("utf-8", "surrogateescape"), safe="/:@!$&'()*+,;=-._~")


def _rule_entry(rule) -> dict:
    options = ", ".join(f"{k} (default {v!r})" for k, v in rule.options.items())
    return {
        "id": rule.id,
        "name": "".join(part.capitalize() for part in rule.id.split("-")),
        "shortDescription": {"text": rule.summary},
        "fullDescription": {"text": rule.description},
        "help": {"text": rule.help + (f" Options: {options}." if options else "")},
        "defaultConfiguration": {"level": rule.level.name},
    }


def _location(finding: Finding, artifact_index: dict[str, int]) -> list[dict]:
    uris = [finding.uri] if finding.uri else list(dict.fromkeys(finding.instance_uris or []))[:10]
    locations = []
    for uri in uris:
        physical: dict = {"artifactLocation": {"uri": artifact_uri(uri)}}
        if uri in artifact_index:
            physical["artifactLocation"]["index"] = artifact_index[uri]
        if finding.start_line is not None and uri == finding.uri:
            physical["region"] = {"startLine": finding.start_line}
        locations.append({"physicalLocation": physical})
    return locations


def _message(finding: Finding) -> str:
    """The finding's message; where the result has a region, what its line is in the 0-based row numbering."""
    if finding.start_line is None or not finding.uri:
        return finding.message
    row = finding.start_line - 1
    return (f"{finding.message} First affected record: row {row:,} (0-based, as in properties.instances) = "
            f"line {finding.start_line:,} of the file (1-based, region.startLine).")


def _result(finding: Finding, rule_index: dict[str, int], artifact_index: dict[str, int]) -> dict:
    properties = {"count": finding.count, "kind": finding.kind, "instances": finding.instances()}
    if finding.truncated:
        properties["instancesTruncated"] = True
    properties.update(finding.evidence)
    if finding.rule_level is not None:
        properties["ruleLevel"] = finding.rule_level.name  # the level the rule gave before a configured one
    if finding.caused_by:
        properties["rootCause"] = finding.caused_by  # the partial fingerprint of the result naming the cause
    if finding.explains:
        properties["explains"] = list(finding.explains)
    result = {
        "ruleId": finding.rule_id,
        "level": finding.level.name,
        "message": {"text": _message(finding)},
        "locations": _location(finding, artifact_index),
        "partialFingerprints": {"corpuscleFinding/v1": finding.fingerprint},
        "properties": properties,
    }
    if finding.rule_id in rule_index:
        result["ruleIndex"] = rule_index[finding.rule_id]
    if finding.suppression is not None:
        result["suppressions"] = [{"kind": "external", "justification": finding.suppression}]
    if finding.baseline_state is not None:
        result["baselineState"] = finding.baseline_state
    return result


def _overrides(report, rule_index: dict[str, int]) -> list[dict]:
    """SARIF ruleConfigurationOverrides: the levels set for a whole run (``[rule.<id>] level``, ``--level``) of the
    rules that ran; levels set per path show only in the results' levels."""
    from corpuscle.settings import rule_level

    out = []
    for rule in report.rules:
        level, _ = rule_level(report.settings, rule.id) if report.settings else (None, "")
        if level not in (None, "off") and level != rule.level.name:
            out.append({"descriptor": {"id": rule.id, "index": rule_index[rule.id]},
                        "configuration": {"level": level}})
    return out


def _notification(note) -> dict:
    out = {"level": note.level.name, "message": {"text": note.message}}
    if note.rule_id:
        out["associatedRule"] = {"id": note.rule_id}
    if note.uri:
        out["locations"] = [{"physicalLocation": {"artifactLocation": {"uri": artifact_uri(note.uri)}}}]
    return out


def run_guid(report) -> str:
    """The run's ``automationDetails.guid`` (which a later run's ``baselineGuid`` names): a name-based UUID of what
    the run scanned and found, so that the same scan of the same data writes the same report byte for byte."""
    digest = hashlib.sha256(__version__.encode())
    for shard in report.shards:
        digest.update(f"\x1e{shard.uri}\x1f{shard.length}".encode("utf-8", "surrogateescape"))
    for f in report.findings:
        digest.update(f"\x1e{f.fingerprint}\x1f{f.level.name}\x1f{f.count}\x1f{f.baseline_state}".encode())
        digest.update(f.rows.tobytes() + f.offsets.tobytes())
    return str(uuid.uuid5(uuid.NAMESPACE_URL, "corpuscle-run:" + digest.hexdigest()))


def to_sarif(report) -> dict:
    rule_index = {rule.id: i for i, rule in enumerate(report.rules)}
    artifact_index = {shard.uri: i for i, shard in enumerate(report.shards)}
    # A finding of a rule not selected (cannot happen for built-ins) still needs its id in the driver.
    invocation = {
        "executionSuccessful": not report.incomplete,
        "toolExecutionNotifications": [_notification(n) for n in report.notes],
    }
    overrides = _overrides(report, rule_index)
    if overrides:
        invocation["ruleConfigurationOverrides"] = overrides
    run = {
        "tool": {"driver": {
            "name": "corpuscle",
            "version": __version__,
            "informationUri": INFORMATION_URI,
            "rules": [_rule_entry(rule) for rule in report.rules],
        }},
        "artifacts": [{"location": {"uri": artifact_uri(s.uri)}, "length": s.length} for s in report.shards],
        "invocations": [invocation],
        "automationDetails": {"guid": run_guid(report)},
        "results": [_result(f, rule_index, artifact_index) for f in report.findings],
        "properties": {"metrics": report.metrics},
    }
    if report.baseline is not None:
        run["baselineGuid"] = report.baseline["guid"]
    return {"$schema": SCHEMA_URI, "version": "2.1.0", "runs": [run]}


def render(report) -> bytes:
    return dump_json(to_sarif(report), orjson.OPT_INDENT_2)
