"""The CI gate: what happens to the findings after the rules have reported, before the report is written.

* **Levels** (:func:`apply_levels`): ``[rule.<id>] level``, ``[paths."GLOB".rule.<id>] level`` and ``--level
  RULE=LEVEL`` set the level a rule's findings carry; ``off`` drops them.  The rule's default level stays what SARIF
  gives as ``defaultConfiguration``.
* **Suppressions** (:func:`apply_suppressions`): ``[[suppress]]`` entries with ``rule``, ``path`` (a glob), an
  optional ``kind`` (a glob) and a ``justification``; a matching finding stays in the report, marked suppressed, and
  does not count for the exit status.  An entry that matches nothing is reported as a stale note.
* **Root causes** (:func:`link_causes`): a finding whose evidence names what it ``explains`` (rule id and kind
  glob, in the same shard) is linked with those findings both ways and listed before them.
* **Baselines** (:func:`compare`): each finding is compared with the results of an earlier SARIF log by its
  partial fingerprint, and given a SARIF ``baselineState``.

None of this knows any particular rule.
"""
from __future__ import annotations

import fnmatch
import json
import uuid

import numpy as np
from corpuscle.findings import Finding, Level
from corpuscle.settings import Settings, path_matches, rule_level

FINGERPRINT = "corpuscleFinding/v1"


class BaselineError(Exception):
    """A baseline file that cannot be used: a usage error, exit status 2."""


# -- levels ------------------------------------------------------------------------------------------------------


def _shards_of(finding: Finding) -> list[str]:
    if finding.uri is not None:
        return [finding.uri]
    return list(dict.fromkeys(finding.instance_uris or []))


def level_in_force(settings: Settings, finding: Finding, default: Level, paths: dict[str, str]) -> Level | None:
    """The level ``finding`` carries under the settings, or None when its rule is off where it is.

    A finding the rule gives at its default level takes the level set; one the rule itself rates lower (a side note,
    a warning of an error rule) keeps its level, or drops to the level set when that is lower.  A finding that spans
    shards takes the highest level in force over its shards (off only when the rule is off in all of them)."""
    shards = _shards_of(finding) or [None]
    levels = []
    for uri in shards:
        name, _ = rule_level(settings, finding.rule_id, paths.get(uri, uri) if uri else None)
        if name == "off":
            continue
        if name is None:
            levels.append(finding.level)
            continue
        level = Level.parse(name)
        levels.append(level if finding.level >= default else min(finding.level, level))
    return max(levels) if levels else None


def apply_levels(findings: list[Finding], settings: Settings, defaults: dict[str, Level],
                 paths: dict[str, str]) -> list[Finding]:
    """The findings with the configured levels applied (``paths``: shard uri -> path, for the path tables)."""
    out = []
    for finding in findings:
        level = level_in_force(settings, finding, defaults.get(finding.rule_id, finding.level), paths)
        if level is None:
            continue
        if level != finding.level:
            finding.rule_level, finding.level = finding.level, level
        out.append(finding)
    return out


def apply(findings: list[Finding], settings: Settings, rules, shards) -> tuple[list[Finding], list[dict]]:
    """Levels, then suppressions, then root causes, on the findings of a finished scan (sorted most severe first,
    every root cause before what it explains); returns them with the suppression records (see
    :func:`apply_suppressions`)."""
    defaults = {rule.id: rule.level for rule in rules}
    paths = {shard.uri: shard.path for shard in shards}
    findings = apply_levels(findings, settings, defaults, paths)
    findings.sort(key=Finding.sort_key)
    used = apply_suppressions(findings, settings, paths)
    return link_causes(findings), used


# -- suppressions --------------------------------------------------------------------------------------------------


def suppression_matches(entry: dict, finding: Finding, paths: dict[str, str]) -> bool:
    if entry["rule"] != finding.rule_id:
        return False
    if "kind" in entry and not fnmatch.fnmatchcase(finding.kind, entry["kind"]):
        return False
    shards = _shards_of(finding)
    return bool(shards) and all(path_matches(entry["path"], paths.get(uri, uri)) for uri in shards)


def apply_suppressions(findings: list[Finding], settings: Settings, paths: dict[str, str]) -> list[dict]:
    """Mark the findings that a ``[[suppress]]`` entry matches (the first matching entry gives the justification);
    returns, per entry, ``{"entry": ..., "matched": n}``."""
    used = [{"entry": entry, "matched": 0} for entry in settings.suppress]
    for finding in findings:
        for record in used:
            if suppression_matches(record["entry"], finding, paths):
                finding.suppression = record["entry"]["justification"]
                record["matched"] += 1
                break
    return used


def describe_suppression(entry: dict) -> str:
    kind = f", kind {entry['kind']}" if "kind" in entry else ""
    return f"{entry['rule']} in {entry['path']}{kind}"


# -- root causes ---------------------------------------------------------------------------------------------------


def link_causes(findings: list[Finding]) -> list[Finding]:
    """Link each root-cause finding (evidence ``explains``: ``[[rule id, kind glob], ...]``) with the findings of
    the same shard it explains, both ways; returns the findings with every root cause just before the findings it
    explains (the others keep their order)."""
    roots = [f for f in findings if f.evidence.get("explains") and f.uri is not None]
    if not roots:
        return findings
    # (identity, not ==: findings hold numpy arrays)
    root_ids = {id(root) for root in roots}
    for root in roots:
        for other in findings:
            if id(other) in root_ids or other.uri != root.uri or other.caused_by is not None:
                continue
            if any(other.rule_id == rule_id and fnmatch.fnmatchcase(other.kind, kind)
                   for rule_id, kind in root.evidence["explains"]):
                other.caused_by = root.fingerprint
                root.explains.append(other.fingerprint)
    followers = {id(f) for f in findings if f.caused_by is not None}
    ordered = []
    for root in roots:
        ordered.append(root)
        ordered += [f for f in findings if f.caused_by == root.fingerprint]
    placed = {id(f) for f in ordered}
    return ordered + [f for f in findings if id(f) not in placed and id(f) not in followers]


# -- baselines -----------------------------------------------------------------------------------------------------


def load_baseline(path: str) -> dict:
    """An earlier SARIF log (``--baseline``): its first run's results and guid.  Raises :class:`BaselineError`."""
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except OSError as exc:
        raise BaselineError(f"cannot read the baseline {path}: {exc.strerror or exc}; give a SARIF file an earlier "
                            "scan wrote with --sarif") from None
    try:
        log = json.loads(data)
        run = log["runs"][0]
        results = run.get("results", [])
        assert isinstance(results, list)
    except (ValueError, KeyError, IndexError, TypeError, AssertionError):
        raise BaselineError(f"the baseline {path} is not a SARIF log with a run: give a file an earlier scan wrote "
                            "with --sarif") from None
    guid = (run.get("automationDetails") or {}).get("guid")
    if not isinstance(guid, str):
        # A log without a run guid (not written by corpuscle): name it by its content, the same every time.
        guid = str(uuid.uuid5(uuid.NAMESPACE_URL, "corpuscle-baseline:" + uuid.uuid5(
            uuid.NAMESPACE_OID, data.decode("utf-8", "replace")).hex))
    return {"path": path, "guid": guid, "results": [r for r in results if isinstance(r, dict)]}


def _instances_of(result: dict) -> list[tuple]:
    instances = (result.get("properties") or {}).get("instances") or []
    return [(i.get("uri"), i.get("row"), i.get("offset")) for i in instances if isinstance(i, dict)]


def _current_instances(finding: Finding) -> list[tuple]:
    return [(i.get("uri"), i["row"], i.get("offset")) for i in finding.instances()]


def _absent(result: dict) -> Finding:
    """A result of the baseline that is gone now, as a finding with the state ``absent``."""
    props = result.get("properties") or {}
    level = result.get("level", "warning")
    locations = result.get("locations") or []
    uri = None
    if len(locations) == 1 and not any("uri" in i for i in props.get("instances") or [] if isinstance(i, dict)):
        uri = ((locations[0].get("physicalLocation") or {}).get("artifactLocation") or {}).get("uri")
    instances = [i for i in props.get("instances") or [] if isinstance(i, dict) and "row" in i]
    finding = Finding(
        rule_id=str(result.get("ruleId", "")), level=Level.parse(level) if level in Level.__members__ else Level.note,
        message=str((result.get("message") or {}).get("text", "")), uri=uri, kind=str(props.get("kind", "")),
        count=int(props.get("count", len(instances)) or 0),
        rows=np.array([i["row"] for i in instances], dtype=np.int64),
        offsets=np.array([i.get("offset", -1) for i in instances], dtype=np.int64),
        instance_uris=[i.get("uri", "") for i in instances] if uri is None and instances else None,
        truncated=bool(props.get("instancesTruncated", False)))
    finding.pinned_fingerprint = (result.get("partialFingerprints") or {}).get(FINGERPRINT)
    finding.baseline_state = "absent"
    return finding


def compare(findings: list[Finding], baseline: dict) -> list[Finding]:
    """Give every finding its SARIF ``baselineState`` against ``baseline`` (from :func:`load_baseline`), and append
    the baseline's results that are gone as ``absent``.

    OASIS SARIF 2.1.0, section 3.27.24: ``new`` -- detected in this run, not in the baseline run; ``unchanged`` --
    in both, and not changed in a way the tool considers significant; ``updated`` -- in both, changed in a way the
    tool considers significant; ``absent`` -- in the baseline run, not in this one.  Results are matched by their
    partial fingerprint (rule, shard, kind); a change of the count or of the listed instances is significant."""
    old = {}
    for result in baseline["results"]:
        key = (result.get("partialFingerprints") or {}).get(FINGERPRINT)
        if isinstance(key, str) and result.get("baselineState") != "absent":
            old.setdefault(key, result)
    seen = set()
    for finding in findings:
        result = old.get(finding.fingerprint)
        if result is None:
            finding.baseline_state = "new"
            continue
        seen.add(finding.fingerprint)
        props = result.get("properties") or {}
        same = props.get("count") == finding.count and _instances_of(result) == _current_instances(finding)
        finding.baseline_state = "unchanged" if same else "updated"
        if not same:
            finding.evidence.setdefault("baselineCount", props.get("count"))
    gone = [_absent(result) for key, result in old.items() if key not in seen]
    return findings + gone
