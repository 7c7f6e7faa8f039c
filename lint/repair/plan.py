"""What a repair will do: where its outputs go, which inputs they must never touch, and which fixes each shard
gets from the findings of a scan.

The guard runs before anything is read: an output folder that is an input, holds one or lies inside one is
refused (a usage error), so a repair can never write over the shards it reads.
"""
from __future__ import annotations

import os

import numpy as np
from corpuscle.io.batch import Shard
from corpuscle.io.sources import discover, is_uri

#: Rules whose findings a repair can fix, in the order the fixes run.
FIXABLE = ("label-alignment", "padding-loss", "missing-separator", "token-range", "empty-document",
           "special-token-text", "encoding-error", "exact-duplicate", "near-duplicate")
#: Finding kinds of a fixable rule that its fix does not address (they are not expected to vanish).
NOT_ADDRESSED = {
    "label-alignment": {"nothing-trained"},
    "token-range": {"narrow-storage", "vocab-unset"},
    "encoding-error": {"invalid-utf8", "replacement-character"},
    "special-token-text": {"tokenizer-unreadable"},
}
REPACK = ("best-fit", "chunk")


class RepairUsage(Exception):
    """A repair that must not start (an output inside an input, an unknown fix, clashing names): exit 2."""


def addressed(rule_id: str, kind: str) -> bool:
    return kind not in NOT_ADDRESSED.get(rule_id, ())


def parse_fixes(text: str | None) -> tuple[str, ...] | None:
    """The ``--fix`` list as rule ids (None: every fixable rule)."""
    if text is None:
        return None
    ids = tuple(dict.fromkeys(part.strip() for part in text.split(",") if part.strip()))
    unknown = [i for i in ids if i not in FIXABLE]
    if unknown or not ids:
        raise RepairUsage(f"cannot fix {', '.join(unknown) or 'nothing'}: --fix takes rule ids among "
                          f"{', '.join(FIXABLE)}")
    return ids


def _static_base(given: str) -> str:
    """The part of a path before its first glob character: the folder a pattern searches."""
    if any(ch in given for ch in "*?[") and not os.path.exists(given):
        head = given[:min(given.index(ch) for ch in "*?[" if ch in given)]
        return os.path.dirname(head) or "."
    return given


def _inside(path: str, folder: str) -> bool:
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


def check_out(out: str, paths: list[str]) -> None:
    """Refuse an output folder that is an input path, contains one or lies inside one (before reading)."""
    if is_uri(out):
        raise RepairUsage(f"--out {out}: give a local folder for the repaired shards")
    target = os.path.realpath(out)
    for given in paths:
        if is_uri(given):
            if given.startswith("file://"):
                given = given[len("file://"):]
            else:
                continue
        source = os.path.realpath(_static_base(given))
        if _inside(target, source) or _inside(source, target):
            relation = ("is" if target == source else "lies inside" if _inside(target, source) else "contains")
            raise RepairUsage(f"--out {out} {relation} the input {given}: a repair never writes where it reads; "
                              "choose a folder outside every input")


def check_shards_outside(out: str, shards: list[Shard]) -> None:
    """After discovery: no shard (through links too) lies in the output folder."""
    target = os.path.realpath(out)
    for shard in shards:
        if not is_uri(shard.path) and _inside(os.path.realpath(shard.path), target):
            raise RepairUsage(f"--out {out} holds the input shard {shard.uri}: choose a folder outside every input")


def output_names(paths: list[str], shards: list[Shard]) -> dict[str, str]:
    """Each shard's file name relative to the output folder: its path below the folder (or pattern) it was found
    under, or its base name when it was given as a file.  Two shards with one name are a usage error."""
    names: dict[str, str] = {}
    for given in paths:
        try:
            found = discover([given])
        except Exception:  # noqa: BLE001 - the whole discovery already reported what is missing
            continue
        base = _static_base(given)
        for shard in found:
            if shard.path in names:
                continue
            if is_uri(given):
                root = given.split("?")[0].rstrip("/")
                rel = shard.uri[len(root) + 1:] if shard.uri.startswith(root + "/") else shard.uri.rsplit("/", 1)[-1]
            elif os.path.isdir(base) and (os.path.isdir(given) or base != given):
                rel = os.path.relpath(shard.path, base)
            else:
                rel = os.path.basename(shard.path)
            names[shard.path] = rel.replace(os.sep, "/")
    seen: dict[str, str] = {}
    for shard in shards:
        name = names.get(shard.path, os.path.basename(shard.path))
        if name in seen:
            raise RepairUsage(f"{seen[name]} and {shard.uri} would both be written as {name}: repair them into "
                              "different --out folders")
        seen[name] = shard.uri
        names[shard.path] = name
    return names


def plan_fixes(report, shards: list[Shard], requested: tuple[str, ...]) -> dict[str, dict]:
    """Per shard uri: the fixes the scan's findings call for (``fixes``), the finding kinds per rule (``kinds``),
    and the rows (``drop_rows``) and document
    starts (``drop_starts``, ``row << 32 | offset``) the drop list names in it."""
    found: dict[str, set] = {shard.uri: set() for shard in shards}
    kinds: dict[str, dict] = {shard.uri: {} for shard in shards}
    for finding in report.findings:
        if finding.rule_id not in requested or not addressed(finding.rule_id, finding.kind) or \
                finding.level.name == "note":  # a note is no defect to fix
            continue
        uris = [finding.uri] if finding.uri else list(finding.instance_uris or [])
        for uri in uris:
            if uri in found:
                found[uri].add(finding.rule_id)
                kinds[uri].setdefault(finding.rule_id, set()).add(finding.kind)
    # shards whose label convention differs from the corpus majority are rebuilt in the majority's convention
    # (unless the convention was configured for them per path: the finding is a note then)
    convention: dict[str, str] = {}
    for finding in report.findings:
        if finding.rule_id == "label-alignment" and finding.kind == "mixed-across-shards" and \
                finding.level.name != "note" and "label-alignment" in requested:
            majority = {1: "shifted", 0: "aligned"}.get(finding.evidence.get("majorityShift"))
            for uri in finding.instance_uris or []:
                if majority and uri in found:
                    convention[uri] = majority
    rows: dict[str, list] = {}
    starts: dict[str, list] = {}
    for entry in report.outputs.get("drop-list", []):
        uri = entry.get("uri")
        if uri not in found:
            continue
        if entry.get("offset") is not None and entry.get("unit") != "window":  # a document, named by its start
            starts.setdefault(uri, []).append((int(entry["row"]) << 32) | int(entry["offset"]))
        else:
            rows.setdefault(uri, []).append(int(entry["row"]))
    out = {}
    for shard in shards:
        uri = shard.uri
        wanted = [fix for fix in FIXABLE if fix in requested and fix in found[uri]]
        dup = [fix for fix in wanted if fix in ("exact-duplicate", "near-duplicate")]
        if dup and not (rows.get(uri) or starts.get(uri)):
            wanted = [fix for fix in wanted if fix not in dup]  # duplicates of this shard are kept copies
        out[uri] = {"fixes": tuple(wanted), "kinds": kinds[uri], "labels": convention.get(uri),
                    "drop_rows": np.unique(np.asarray(rows.get(uri, []), dtype=np.int64)),
                    "drop_starts": np.unique(np.asarray(starts.get(uri, []), dtype=np.int64))}
    return out


__all__ = ["FIXABLE", "REPACK", "RepairUsage", "addressed", "check_out", "check_shards_outside", "output_names",
           "parse_fixes", "plan_fixes"]
