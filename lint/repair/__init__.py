"""Repair: from a scan's fix list to corrected copies of the shards.

``repair(paths, out, settings)`` scans the shards with the fixable rules, plans per shard the fixes their findings
call for, writes a corrected copy of every shard under ``out`` (same relative name, format, compression and
schema; row groups sized like the input's), writes ``out/repair.json`` (what changed, per shard and fix; the
token budget before and after), then scans the copies again with the same settings and says whether the fixed
rules are clean.  Inputs are never written: an ``out`` that is, contains or lies inside an input is refused
before anything is read.  With ``dry_run`` every shard is processed the same way, but nothing is written.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field

import orjson
from corpuscle.engine.executors import LocalExecutor
from corpuscle.engine.registry import registry
from corpuscle.engine.scan import Report, run
from corpuscle.io.sources import discover
from corpuscle.repair.plan import (
    FIXABLE,
    REPACK,
    RepairUsage,
    addressed,
    check_out,
    check_shards_outside,
    output_names,
    parse_fixes,
    plan_fixes,
)
from corpuscle.repair.rewrite import DUPLICATES, ShardJob, ShardOutcome, rewrite_shard
from corpuscle.report import write_atomic
from corpuscle.settings import FACTS, Settings
from corpuscle.version import __version__

REPORT_NAME = "repair.json"

__all__ = ["FIXABLE", "REPACK", "RepairResult", "RepairUsage", "parse_fixes", "repair"]


@dataclass
class RepairResult:
    out: str
    dry_run: bool
    repack: str | None
    outcomes: list[ShardOutcome]
    scan: Report
    rescan: Report | None = None
    still_found: list[dict] = field(default_factory=list)
    incomplete: list[str] = field(default_factory=list)

    @property
    def exit_code(self) -> int:
        """3 when a shard could not be repaired or the rescan did not complete, 1 when the rescan still finds
        what a fix should have removed, 0 otherwise."""
        if self.incomplete or any(o.error for o in self.outcomes):
            return 3
        return 1 if self.still_found else 0

    def as_json(self) -> dict:
        shards = []
        for o in self.outcomes:
            entry = {"uri": o.uri, "output": o.name, "written": o.written, "copiedByteForByte": o.copied,
                     "facts": o.facts,
                     "fixes": {fix: count.as_dict() for fix, count in o.fixes.items()},
                     "unfixable": o.unfixable, "notes": o.notes,
                     "budget": {"before": o.before.as_dict(), "after": o.after.as_dict()}}
            if o.repack is not None:
                entry["repack"] = o.repack
            if o.unreadable:
                entry["unreadable"] = o.unreadable
            if o.error:
                entry["error"] = o.error
            shards.append(entry)
        out = {"tool": "corpuscle", "version": __version__, "out": self.out, "dryRun": self.dry_run,
               "repack": self.repack, "shards": shards}
        if self.rescan is not None:
            out["rescan"] = {"clean": not self.still_found and not self.incomplete, "stillFound": self.still_found,
                             "incomplete": self.incomplete}
        return out


def repair(paths: list[str] | str, out: str, settings: Settings | None = None, fixes: tuple[str, ...] | None = None,
           repack: str | None = None, dry_run: bool = False, jobs: int = 1) -> RepairResult:
    """Repair the shards under ``paths`` into ``out`` (see the module docstring).  ``fixes``: rule ids to fix
    (None: every fixable rule the scan finds); ``repack``: ``best-fit`` or ``chunk`` to lay the documents into new
    windows.  Raises :class:`RepairUsage` (and what :func:`corpuscle.io.sources.discover` and the settings raise)
    for usage problems, before any shard is read."""
    if isinstance(paths, (str, os.PathLike)):
        paths = [os.fspath(paths)]
    paths = [os.fspath(p) for p in paths]
    settings = settings or Settings()
    if repack is not None and repack not in REPACK:
        raise RepairUsage(f"--repack takes {' or '.join(REPACK)}, got {repack!r}")
    check_out(out, paths)
    requested = tuple(fixes) if fixes is not None else FIXABLE
    for fix in requested:
        if fix not in FIXABLE:
            raise RepairUsage(f"cannot fix {fix}: fixable are {', '.join(FIXABLE)}")
    shards = discover(paths)
    check_shards_outside(out, shards)
    names = output_names(paths, shards)
    available = registry()
    # a repack needs to know where documents are: the separator rule says whether a shard shows them
    scanned = requested + (("missing-separator",) if repack and "missing-separator" not in requested else ())
    rules = [available[fix](**settings.options_for(fix)) for fix in scanned if fix in available]
    executor = LocalExecutor(jobs)
    report = run(shards, settings, rules, jobs=jobs, executor=executor)
    planned = plan_fixes(report, shards, scanned)
    if scanned != requested:
        for plan in planned.values():
            plan["fixes"] = tuple(fix for fix in plan["fixes"] if fix in requested)
    special = tuple(settings.options_for("special-token-text").get(
        "strings", available["special-token-text"].options.get("strings", ())
        if "special-token-text" in available else ()))
    controls = settings.options_for("encoding-error").get("allowed_controls", "\t\n\r")
    work = []
    for shard in shards:
        plan = planned[shard.uri]
        work.append(ShardJob(shard, os.path.join(out, names[shard.path]), names[shard.path], settings,
                             plan["fixes"], repack, plan["drop_rows"], plan["drop_starts"], dry_run, special,
                             controls, plan["kinds"], plan["labels"]))
    outcomes = list(executor.map(rewrite_shard, work))
    result = RepairResult(out, dry_run, repack, outcomes, report)
    if dry_run:
        return result
    _rescan(result, work, settings, available, jobs)
    write_atomic(os.path.join(out, REPORT_NAME), orjson.dumps(result.as_json(), option=orjson.OPT_INDENT_2))
    return result


def _rescan(result: RepairResult, work: list[ShardJob], settings: Settings, available: dict, jobs: int) -> None:
    """Scan the written copies with the same settings (each copy with the facts its input had per path) and note
    what the fixes applied to it should have removed but is still there."""
    written = [(job, o) for job, o in zip(work, result.outcomes) if o.written]
    if not written:
        return
    fixed = {job.out_path: ({fix for fix in o.fixes if fix in FIXABLE} | set(job.fixes)) - set(o.unfixable)
             for job, o in written}
    if any(o.repack for _, o in written):
        for job, o in written:
            if o.repack and "missing-separator" not in o.unfixable:
                fixed[job.out_path].add("missing-separator")
    rule_ids = sorted({fix for fixes in fixed.values() for fix in fixes if fix in available},
                      key=FIXABLE.index)
    tables = dict(settings.path_tables)
    for job, _ in written:
        facts = settings.for_path(job.shard.path)
        values = {key: getattr(facts, key) for key in FACTS if getattr(facts, key) != getattr(settings, key)}
        if values:
            tables[os.path.abspath(job.out_path)] = values
    rescan_settings = settings.with_values({}, "config")
    rescan_settings.path_tables = tables
    rules = [available[rule_id](**settings.options_for(rule_id)) for rule_id in rule_ids]
    shards = discover([job.out_path for job, _ in written])
    report = run(shards, rescan_settings, rules, jobs=jobs)
    result.rescan = report
    by_path = {os.path.abspath(o_job.out_path): (o_job, o) for o_job, o in written}
    uri_fixes, uri_left = {}, {}
    for shard in shards:
        job, outcome = by_path.get(os.path.abspath(shard.path), (None, None))
        if job is not None:
            uri_fixes[shard.uri] = fixed[job.out_path]
            uri_left[shard.uri] = set(outcome.unfixable)  # "rule" or "rule kind" said to be unfixable
    for finding in report.findings:
        if not addressed(finding.rule_id, finding.kind) or finding.level.name == "note":
            continue
        if finding.uri and f"{finding.rule_id} {finding.kind}" in uri_left.get(finding.uri, ()):
            continue
        uris = [finding.uri] if finding.uri else list(finding.instance_uris or [])
        hit = [uri for uri in uris if finding.rule_id in uri_fixes.get(uri, ())
               or (finding.rule_id in DUPLICATES and any(d in uri_fixes.get(uri, ()) for d in DUPLICATES))]
        if hit:
            result.still_found.append({"uri": hit[0], "rule": finding.rule_id, "kind": finding.kind,
                                       "count": finding.count, "message": finding.message})
    result.incomplete = [f"{note.rule_id} on {note.uri or 'the corpus'}: {note.message}" for note in report.notes
                         if note.level.name == "error" and note.rule_id in rule_ids]


#: Shards described one by one in the summary before the rest are only counted (repair.json has them all).
SUMMARY_SHARDS = 20


def summary(result: RepairResult) -> str:
    """The short text summary for stdout: what changed in the shards that changed (the first
    :data:`SUMMARY_SHARDS`), how many were copied as they were, the token budget before and after, the rescan."""
    lines = []
    head = "repair plan (dry run: nothing written)" if result.dry_run else f"repaired into {result.out}"
    lines.append(f"{head}: {len(result.outcomes)} shard(s)" + (f", repack {result.repack}" if result.repack else ""))
    eventful = [o for o in result.outcomes
                if o.fixes or o.repack or o.unfixable or o.error or o.unreadable or o.notes]
    for o in eventful[:SUMMARY_SHARDS]:
        lines += _shard_lines(o)
    if len(eventful) > SUMMARY_SHARDS:
        lines.append(f"... and {len(eventful) - SUMMARY_SHARDS:,} more shard(s) with changes (see {REPORT_NAME})")
    untouched = len(result.outcomes) - len(eventful)
    if untouched:
        copied = "would be copied" if result.dry_run else "copied byte for byte"
        lines.append(f"{untouched:,} shard(s) with nothing to fix: {copied}")
    for unit in dict.fromkeys(o.before.unit for o in result.outcomes):
        mine = [o for o in result.outcomes if o.before.unit == unit and not o.error]
        b = [sum(getattr(o.before, k) for o in mine) for k in ("slots", "real")]
        a = [sum(getattr(o.after, k) for o in mine) for k in ("slots", "real")]
        lines.append(f"budget ({unit}): {b[0]:,} slots, {b[1]:,} real, {b[0] - b[1]:,} padding -> {a[0]:,} slots, "
                     f"{a[1]:,} real, {a[0] - a[1]:,} padding")
    if result.rescan is not None:
        if result.still_found:
            lines.append(f"rescan: {len(result.still_found)} finding(s) the fixes should have removed are still "
                         "there:")
            lines += [f"  {f['rule']} ({f['kind']}) in {f['uri']}: {f['count']:,}" for f in result.still_found]
        else:
            lines.append("rescan: the fixed rules are clean on the repaired shards")
        lines += [f"rescan incomplete: {why}" for why in result.incomplete]
        lines.append(f"details: {os.path.join(result.out, REPORT_NAME)}. Decode a few repaired windows and read them "
                     "before training on them.")
    return "\n".join(lines) + "\n"


def _shard_lines(o: ShardOutcome) -> list[str]:
    lines = [f"{o.uri} -> {o.name}"]
    guessed = [f"{key} = {value['value']} ({value['source']})" for key, value in o.facts.items()
               if isinstance(value, dict) and str(value.get("source", "")).startswith(("inferred", "assumed"))]
    if guessed:
        lines.append(f"  facts inferred from the data (heuristic): {'; '.join(guessed)}")
    for fix, c in o.fixes.items():
        parts = [f"{n:,} {what}" for n, what in (
            (c.rows_changed, "rows changed"), (c.positions_changed, "positions changed"),
            (c.rows_dropped, "rows dropped"), (c.documents_dropped, "documents dropped"),
            (c.tokens_added, "tokens added"), (c.tokens_removed, "tokens removed")) if n]
        estimate = (" (near-duplicates are MinHash estimates, verified by a similarity threshold: heuristic)"
                    if "near-duplicate" in fix and (c.rows_dropped or c.documents_dropped) else "")
        lines.append(f"  {fix}: {', '.join(parts) or 'nothing changed'}{estimate}")
    if o.repack:
        r = o.repack
        lay = r.get("layouts", {})
        bound = (f" (best-fit decreasing over all documents at once: {lay['bestFitDecreasing']:,}; no layout "
                 f"fewer than {lay['lowerBound']:,})" if lay else "")
        lines.append(f"  repack {r['layout']}: {r['windowsBefore']:,} -> {r['windowsAfter']:,} windows of "
                     f"{r['seqLen']:,}{bound}, {r['separatorsAdded']:,} separators written")
    lines += [f"  note: {note}" for note in o.notes]
    for fix, why in o.unfixable.items():
        lines.append(f"  cannot fix {fix}: {why}")
    if not o.error:
        b, a = o.before, o.after
        lines.append(f"  budget ({b.unit}): {b.slots:,} slots, {b.real:,} real -> {a.slots:,} slots, {a.real:,} real")
    if o.unreadable:
        kept = "copied as they are with the rest, byte for byte" if o.copied else "not copied"
        lines.append(f"  {len(o.unreadable):,} unreadable record(s) or part(s): {kept} (listed in {REPORT_NAME})")
    if o.error:
        lines.append(f"  NOT REPAIRED: {o.error}")
    return lines
