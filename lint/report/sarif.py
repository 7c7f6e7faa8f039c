"""SARIF 2.1.0 (OASIS) output: one run, the rules in ``tool.driver.rules``, each shard an artifact, each finding a
result whose ``properties`` carry the count, the instances (row, offset) and the rule's evidence."""
from __future__ import annotations

from urllib.parse import quote

import orjson
from corpuscle.report import dump_json
from corpuscle.findings import Finding
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


def _result(finding: Finding, rule_index: dict[str, int], artifact_index: dict[str, int]) -> dict:
    properties = {"count": finding.count, "instances": finding.instances()}
    if finding.truncated:
        properties["instancesTruncated"] = True
    properties.update(finding.evidence)
    result = {
        "ruleId": finding.rule_id,
        "level": finding.level.name,
        "message": {"text": finding.message},
        "locations": _location(finding, artifact_index),
        "partialFingerprints": {"corpuscleFinding/v1": finding.fingerprint},
        "properties": properties,
    }
    if finding.rule_id in rule_index:
        result["ruleIndex"] = rule_index[finding.rule_id]
    return result


def _notification(note) -> dict:
    out = {"level": note.level.name, "message": {"text": note.message}}
    if note.rule_id:
        out["associatedRule"] = {"id": note.rule_id}
    if note.uri:
        out["locations"] = [{"physicalLocation": {"artifactLocation": {"uri": artifact_uri(note.uri)}}}]
    return out


def to_sarif(report) -> dict:
    rule_index = {rule.id: i for i, rule in enumerate(report.rules)}
    artifact_index = {shard.uri: i for i, shard in enumerate(report.shards)}
    # A finding of a rule not selected (cannot happen for built-ins) still needs its id in the driver.
    run = {
        "tool": {"driver": {
            "name": "corpuscle",
            "version": __version__,
            "informationUri": INFORMATION_URI,
            "rules": [_rule_entry(rule) for rule in report.rules],
        }},
        "artifacts": [{"location": {"uri": artifact_uri(s.uri)}, "length": s.length} for s in report.shards],
        "invocations": [{
            "executionSuccessful": not report.incomplete,
            "toolExecutionNotifications": [_notification(n) for n in report.notes],
        }],
        "results": [_result(f, rule_index, artifact_index) for f in report.findings],
        "properties": {"metrics": report.metrics},
    }
    return {"$schema": SCHEMA_URI, "version": "2.1.0", "runs": [run]}


def render(report) -> bytes:
    return dump_json(to_sarif(report), orjson.OPT_INDENT_2)
