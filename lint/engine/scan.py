"""The engine: run rules over shards (map), merge their states (reduce), and finish them into a report.

One shard is the unit of work.  ``scan_shard`` reads one shard batch by batch, infers the facts the settings
leave open from its first batch, and feeds every batch to each rule that can use it; the result is small and
picklable, so the same function runs in this process or in a pool of processes (``jobs``).  ``scan`` collects the
results in shard order, so the report is the same for any number of jobs.  The engine knows no particular rule.
"""
from __future__ import annotations

import contextlib
import copy
import dataclasses
import functools
import logging
import os
import time
from dataclasses import dataclass, field
from typing import Iterable

from corpuscle import gate
from corpuscle.engine import excerpts, split
from corpuscle.engine.executors import LocalExecutor, shuffle_here
from corpuscle.engine.infer import infer_from_batch
from corpuscle.engine.progress import Progress
from corpuscle.engine.sampling import Sample, corpus_figures, finding_estimate
from corpuscle.engine.split import Part
from corpuscle.engine.split import workers as split_workers
from corpuscle.findings import Finding, Level
from corpuscle.io.batch import Shard, enough_first_records, first_records, is_integer_list
from corpuscle.io.sources import Limits, absolute, discover, open_shard
from corpuscle.rules.api import CorpusResult, Rule, ShardState, Unmergeable, check_kind, inferred_by
from corpuscle.settings import Settings, SettingsError, level_rule_ids, load_settings, rule_off

log = logging.getLogger(__name__)

#: Exit status of a scan that is incomplete: a rule or the engine raised (see :attr:`Report.incomplete`).
EXIT_INCOMPLETE = 3


@dataclass
class Note:
    """Something the user should know about the run that is not a finding (a skipped rule, an inferred value)."""

    level: Level
    message: str
    rule_id: str | None = None
    uri: str | None = None
    #: An internal error (a rule or the engine raised): the scan is incomplete (exit status 3).
    internal: bool = False


@dataclass
class ShardResult:
    shard: Shard
    states: dict[str, ShardState]
    skipped: dict[str, str]
    crashed: dict[str, str]
    settings: Settings
    rows: int = 0
    tokens: int = 0
    seconds: float = 0.0
    #: How the shard was sampled (:meth:`corpuscle.engine.sampling.ShardSample.summary`), or None for a full scan.
    sample: dict | None = None
    #: For one part of a split shard, what joining the parts needs (see :func:`merge_parts`); None otherwise.
    part: dict | None = None
    #: Internal errors of the engine on this shard (not of one rule): the shard's scan is incomplete.
    errors: list = field(default_factory=list)
    #: What the reader says the user should know that is no defect (e.g. a compressed stream without checksum).
    notices: list = field(default_factory=list)


@dataclass
class Report:
    """Everything a reporter needs; reporters know nothing of readers."""

    findings: list[Finding]
    shards: list[Shard]
    rules: list[Rule]
    metrics: dict
    notes: list[Note] = field(default_factory=list)
    settings: Settings | None = None
    #: Extra outputs of the rules' ``corpus`` step by name (e.g. ``"drop-list"``); when several rules give the same
    #: name, their lists are concatenated in rule order (entries may repeat; the writer of each output decides).
    outputs: dict[str, list] = field(default_factory=dict)
    #: The ``[[suppress]]`` entries and how many findings each matched: ``[{"entry": {...}, "matched": n}]``.
    suppressions: list[dict] = field(default_factory=list)
    #: The baseline compared with (``--baseline``): ``{"path", "guid"}``, or None.
    baseline: dict | None = None

    def worst(self) -> Level | None:
        return max((f.level for f in self.findings if f.baseline_state != "absent"), default=None)

    @property
    def incomplete(self) -> bool:
        """Whether a rule or the engine raised: some findings may be missing (exit status 3)."""
        return any(note.internal for note in self.notes)

    @property
    def exit_code(self) -> int:
        """3 when the scan is incomplete (an internal error); else 0 when no finding is at or above ``fail_at``, 1
        when one is.  Suppressed findings do not count, and with a baseline only new and updated ones do."""
        if self.incomplete:
            return EXIT_INCOMPLETE
        threshold = self.settings.fail_level if self.settings else Level.error
        if threshold is None:
            return 0
        return int(any(f.level >= threshold for f in self.findings if f.gating))

    def compare(self, baseline: "str | dict") -> "Report":
        """Compare with an earlier SARIF log (a path, or :func:`corpuscle.gate.load_baseline`'s result): every
        finding gets its SARIF ``baselineState``, and the earlier results that are gone are added as ``absent``."""
        baseline = gate.load_baseline(baseline) if isinstance(baseline, str) else baseline
        self.findings = gate.compare(self.findings, baseline)
        self.baseline = {"path": baseline["path"], "guid": baseline["guid"]}
        return self

    # -- writing the report (each file atomically) ---------------------------------------------------------------
    def write_sarif(self, path: str) -> None:
        """Write the SARIF 2.1.0 log to ``path``."""
        from corpuscle.report import sarif, write_atomic

        write_atomic(path, sarif.render(self))

    def write_json(self, path: str) -> None:
        """Write the plain JSON report to ``path``."""
        from corpuscle.report import json as json_report
        from corpuscle.report import write_atomic

        write_atomic(path, json_report.render(self))

    def write_text(self, path: str | None = None, stats: bool = False, long: bool = False) -> str:
        """The text summary (``long``: the full prose of every finding; ``stats``: with the corpus figures and the
        token budget); written to ``path`` when given, and returned."""
        from corpuscle.report import text, write_atomic

        out = text.render(self, stats=stats, long=long)
        if path is not None:
            write_atomic(path, out.encode())
        return out


def select_rules(settings: Settings, available: dict[str, type[Rule]]) -> list[Rule]:
    """Instantiate the rules to run: all, less ``skip``, or only ``only``; options from the settings."""
    for name in settings.only + settings.skip + tuple(settings.rule) + tuple(sorted(level_rule_ids(settings))):
        if name not in available:
            raise SettingsError(f"unknown rule {name!r}; `corpuscle rules` lists them: {', '.join(available)}")
    ids = [i for i in available if (not settings.only or i in settings.only) and i not in settings.skip
           and not rule_off(settings, i)]
    rules = []
    for rule_id in ids:
        try:
            rules.append(available[rule_id](**settings.options_for(rule_id)))
        except (TypeError, ValueError) as exc:
            raise SettingsError(str(exc)) from None
    return rules


def scan_shard(shard: Shard, settings: Settings, rules: list[Rule], progress=None, sample=None,
               part: Part | None = None) -> ShardResult:
    """Read one shard and feed its batches to the rules (see :func:`_scan_shard`); never raises: an internal error
    of the engine becomes the result's ``errors`` (the scan is then incomplete, exit status 3)."""
    started = time.perf_counter()
    try:
        return _scan_shard(shard, settings, rules, progress, sample, part)
    except Exception as exc:  # noqa: BLE001 - one shard's failure must not lose the other shards' findings
        log.debug("internal error scanning %s", shard.uri, exc_info=True)
        facts = part.facts if part is not None else settings
        joining = {"skipped": {}, "stopped": True, "fed": set()} if part is not None else None
        return ShardResult(shard, {}, {}, {}, facts, 0, 0, time.perf_counter() - started, None, joining,
                           [f"{type(exc).__name__}: {exc}"])


def _scan_shard(shard: Shard, settings: Settings, rules: list[Rule], progress=None, sample=None,
                part: Part | None = None) -> ShardResult:
    """Read one shard and feed its batches to the rules; never raises for bad data.

    ``progress`` (a :class:`corpuscle.engine.progress.Progress`, or None) hears of every batch and of the end of the shard;
    ``sample`` (a :class:`corpuscle.engine.sampling.Sample`, or None) makes the reader scan only the units it keeps; ``part``
    (a :class:`corpuscle.engine.split.Part`) scans only that part of the shard, with the facts the part carries.
    """
    started = time.perf_counter()
    facts = settings.for_path(shard.path) if part is None else part.facts
    sampling = sample.for_shard(shard.uri, shard.format) if sample is not None and not sample.full else None
    states: dict[str, ShardState] = {}
    skipped: dict[str, str] = {}
    crashed: dict[str, str] = {}
    errors: list[str] = []
    counted = {"rows": 0, "tokens": 0}

    def feed(batch) -> None:
        counted["rows"] += len(batch)
        if batch.has(facts.tokens_column) and is_integer_list(batch.type_of(facts.tokens_column)):
            counted["tokens"] += int(batch.flat(facts.tokens_column).values.size)
        for rule in rules:
            if rule.id in crashed:
                continue
            reason = rule.missing(batch, facts)
            if reason is not None:
                if len(batch):
                    skipped.setdefault(rule.id, reason)
                continue
            try:
                rule.feed(states[rule.id], batch)
            except Exception as exc:  # noqa: BLE001 - a rule bug must not lose the other rules' findings
                crashed[rule.id] = f"{type(exc).__name__}: {exc}"
            states[rule.id].fed = True

    def begin(inferred: dict) -> dict[str, ShardState]:
        out = {}
        for rule in rules:
            try:
                out[rule.id] = rule.begin(shard, facts)
            except Exception as exc:  # noqa: BLE001 - a rule bug must not lose the other rules' findings
                crashed[rule.id] = f"{type(exc).__name__}: {exc}"
        for rule_id, state in out.items():
            state.inferred = inferred.get(rule_id)
            if part is not None:
                state.continued, state.continues = part.index > 0, part.index < part.count - 1
        return out

    # Batches read before the facts are known: the first records (enough to infer from) and read problems.
    pending: list = []
    if part is not None:  # the facts were inferred from the shard's first records before the parts were read
        states = begin(part.inferred)
    with open_shard(shard, tokens_column=facts.tokens_column, sample=sampling, part=part,
                    limits=Limits.of(facts)) as reader:
        # rows, tokens and bytes consumed already reported to ``progress``
        told = (0, 0, part.lo if part is not None and shard.format == "jsonl" else 0)

        def fed(batch, consumed: int) -> None:
            """Feed a batch, then tell ``progress`` what it added (``consumed``: the reader's position after it)."""
            nonlocal told
            feed(batch)
            if progress is not None:
                now = (counted["rows"], counted["tokens"], consumed)
                progress.batch(shard.uri, *(n - t for n, t in zip(now, told)))
                told = now

        def start() -> None:
            nonlocal facts, states, pending
            sample = first_records([batch for batch, _ in pending])
            if sample is not None:  # unset facts, from the first records of the shard
                try:
                    facts = infer_from_batch(facts, sample)
                except Exception as exc:  # noqa: BLE001 - scan with the facts as given; the scan is incomplete
                    errors.append(f"inferring the shard's facts failed ({type(exc).__name__}: {exc})")
            states = begin(inferred_by(rules, sample, facts) if sample is not None else {})
            del sample
            waiting, pending = pending, []
            for batch, consumed in waiting:
                fed(batch, consumed)

        for batch in reader:
            if states:
                fed(batch, reader.consumed)
                continue
            pending.append((batch, reader.consumed))
            if enough_first_records([waiting for waiting, _ in pending], facts.tokens_column):
                start()
        if not states:
            start()
    rows, tokens = counted["rows"], counted["tokens"]
    joining = None
    if part is not None:
        joining = {"skipped": dict(skipped), "stopped": reader.stopped,
                   "fed": {rule_id for rule_id, state in states.items() if getattr(state, "fed", False)}}
    final = {}
    for rule in rules:
        state = states.get(rule.id)
        if state is None or rule.id in crashed:
            continue
        if getattr(state, "fed", False):
            skipped.pop(rule.id, None)
        try:
            final[rule.id] = rule.end(state)
        except Exception as exc:  # noqa: BLE001
            crashed[rule.id] = f"{type(exc).__name__}: {exc}"
    if progress is not None and part is None:
        progress.shard_done(shard.uri, rows, tokens)
    return ShardResult(shard, final, skipped, crashed, facts, rows, tokens, time.perf_counter() - started,
                       sampling.summary() if sampling is not None else None, joining, errors,
                       list(reader.notices))


def merge_parts(results: list[ShardResult], rules: list[Rule]) -> tuple[ShardResult, list[Rule]]:
    """One shard's result from the results of its parts, in order: what a scan of the whole shard gives; and the
    rules that could not join their parts exactly (``Unmergeable``), whose states are left out: the caller scans
    the shard whole for them.

    Each rule's states are joined pairwise with its ``merge``, left to right.  A part whose reader stopped at a
    failure ends the shard there, as it would in one scan: the later parts are left out -- except for ``keyed``
    rules: every part with a state gave its entries to the shuffle already, so exactly those states are joined
    (the ids of the entries follow them), and a part where the rule failed is reported as such."""
    kept = []
    for result in results:
        kept.append(result)
        if result.part["stopped"]:
            break
    crashed: dict[str, str] = {}
    reasons: dict[str, str] = {}
    fed: set[str] = set()
    for result in kept:
        for rule_id, why in result.crashed.items():
            crashed.setdefault(rule_id, why)
        for rule_id, why in result.part["skipped"].items():
            reasons.setdefault(rule_id, why)
        fed |= result.part["fed"]
    states, unjoined = {}, []
    for rule in rules:
        if rule.keyed:  # every part that has a state gave pieces to the shuffle: join exactly those
            joined = [result for result in results if rule.id in result.states]
            for result in results:
                if rule.id in result.crashed:
                    crashed.setdefault(rule.id, result.crashed[rule.id])
            if not joined:
                continue
        elif rule.id in crashed:
            continue
        else:
            joined = kept
        try:
            state = joined[0].states[rule.id]
            for result in joined[1:]:
                state = rule.merge(state, result.states[rule.id])
        except Unmergeable as exc:
            if rule.keyed:  # its parts' pieces are in the shuffle already: it must join them
                crashed[rule.id] = f"Unmergeable: {exc} (a keyed rule must join the parts of a shard)"
            else:
                log.debug("%s: %s cannot join the parts exactly (%s)", kept[0].shard.uri, rule.id, exc)
                unjoined.append(rule)
            continue
        except Exception as exc:  # noqa: BLE001 - a rule bug must not lose the other rules' findings
            crashed[rule.id] = f"{type(exc).__name__}: {exc}"
            continue
        states[rule.id] = state
    skipped = {rule_id: why for rule_id, why in reasons.items() if rule_id in crashed or rule_id not in fed}
    merged = dataclasses.replace(kept[0], states=states, skipped=skipped, crashed=crashed,
                                 rows=sum(r.rows for r in kept), tokens=sum(r.tokens for r in kept),
                                 seconds=sum(r.seconds for r in results), part=None,
                                 errors=[why for r in results for why in r.errors])
    return merged, unjoined


def rescan(result: ShardResult, settings: Settings, rules: list[Rule], sample=None) -> ShardResult:
    """``result`` with the states of ``rules`` from a scan of the whole shard (after parts that these rules could
    not join, or parts in which no records were read); the other rules' states are kept.  When the parts read no
    records, the whole scan's counts and findings of the reader replace theirs."""
    if not rules:
        return result
    whole = scan_shard(result.shard, settings, rules, None, sample)
    ids = {rule.id for rule in rules}

    def others(table: dict) -> dict:
        return {key: value for key, value in table.items() if key not in ids}

    base = result if result.rows else dataclasses.replace(whole, seconds=result.seconds)
    return dataclasses.replace(base, states={**others(result.states), **whole.states},
                               skipped={**others(result.skipped), **whole.skipped},
                               crashed={**others(result.crashed), **whole.crashed},
                               seconds=result.seconds + whole.seconds, errors=result.errors + whole.errors)


def _scan_args(args):
    return scan_shard(*args)


def _lost_scan(args, exc: Exception) -> ShardResult:
    """The result standing in for a scan task that failed for good where it ran (``args`` as :func:`_scan_args`
    takes them): no states, the error as the shard's internal error (the scan is incomplete, exit status 3)."""
    shard, settings, part = args[0], args[1], args[5]
    facts = part.facts if part is not None else settings.for_path(shard.path)
    joining = {"skipped": {}, "stopped": True, "fed": set()} if part is not None else None
    why = f"{type(exc).__name__}: {exc}".strip()
    return ShardResult(shard, {}, {}, {}, facts, 0, 0, 0.0, None, joining,
                       [f"its task failed where it ran and was given up ({why}); the worker may have died (out of "
                        "memory, killed)"])


def run(shards: list[Shard], settings: Settings, rules: list[Rule], jobs: int = 1,
        progress: Progress | None = None, executor=None, sample: Sample | None = None) -> Report:
    """Scan shards with ``executor`` (default: a :class:`LocalExecutor` of ``jobs`` processes), then merge and
    finish every rule in this process.

    ``progress`` hears of every batch: an executor that has a ``relay(progress)`` context manager gives the stand-in
    that reaches it from where the work runs (the scans there report each batch and each whole shard; the end of a
    shard scanned in parts is reported here, through the stand-in); with any other executor it hears only of
    finished shards, here.
    ``sample`` scans a reproducible random subset of every shard (see :mod:`corpuscle.engine.sampling`).
    """
    started = time.perf_counter()
    executor = executor or LocalExecutor(jobs)
    results: list[ShardResult] = []
    relay = getattr(executor, "relay", None) if progress is not None else None
    if progress is not None:
        progress.start(shards)
    try:
        with relay(progress) if relay is not None else contextlib.nullcontext() as reporter:
            moved = getattr(executor, "absolute_paths", False)  # the work runs in another working directory
            items, groups = [], []
            for shard in shards:
                where = _elsewhere(shard, settings) if moved else (shard, settings)
                parts = _parts(*where, rules, executor, sample)
                groups.append(len(parts or [None]))
                items += [(*where, rules, reporter, sample, part) for part in parts or [None]]
            scanned, partials = _map(executor, items, [rule for rule in rules if rule.keyed])
            scanned = iter(scanned)
            for count in groups:
                if count == 1:
                    result = next(scanned)
                else:
                    result, unjoined = merge_parts([next(scanned) for _ in range(count)], rules)
                    if not result.rows:  # no records in any part: the whole scan says what is wrong with it
                        unjoined = [rule for rule in rules if not rule.keyed]  # (keyed: in the shuffle already)
                    result = rescan(result, _settings_of(items, result), unjoined, sample)
                results.append(result)
                if progress is not None and (reporter is None or count > 1):
                    # Through the stand-in when there is one, so the target hears one caller at a time.
                    (progress if reporter is None else reporter).shard_done(result.shard.uri, result.rows,
                                                                            result.tokens)
            reduced = partials()
    finally:
        if progress is not None:
            progress.close()
    return finish(results, settings, rules, time.perf_counter() - started, reduced)


def _parts(shard: Shard, settings: Settings, rules: list[Rule], executor, sample) -> list[Part] | None:
    """The parts to scan a large shard in with the executor's processes (see :mod:`corpuscle.engine.split`), or None."""
    processes = split_workers(executor)
    if processes < 2 or (sample is not None and not sample.full) or shard.length <= split.SPLIT_BYTES:
        return None
    if not all(rule.splittable for rule in rules):
        held = ", ".join(rule.id for rule in rules if not rule.splittable)
        log.debug("%s is scanned whole: rule(s) %s cannot join parts of a shard", shard.uri, held)
        return None
    try:
        parts = split.plan(shard, settings, processes, rules=tuple(rules))
    except Exception:  # noqa: BLE001 - a shard that cannot be planned is scanned whole (which reports why)
        log.debug("%s cannot be split", shard.uri, exc_info=True)
        return None
    if parts is not None:
        log.debug("%s is scanned in %s", shard.uri, split.describe(parts))
    return parts


def _settings_of(items: list, result: ShardResult) -> Settings:
    """The settings the items of ``result``'s shard were scanned with."""
    return next(item[1] for item in items if item[0] is result.shard or item[0] == result.shard)


def _elsewhere(shard: Shard, settings: Settings) -> tuple[Shard, Settings]:
    """A shard and its settings for work in another working directory (a cluster's workers): an absolute path, and
    the ``[paths]`` tables matched here, where relative paths and patterns mean what the user meant."""
    facts = copy.copy(settings.for_path(shard.path))
    facts.path_tables = {}
    return absolute(shard), facts


def _map(executor, items: list, keyed: list[Rule]):
    """Scan the items with ``executor``: ``(results in item order, a function giving, after the last result, the
    partials of the keyed rules by rule id)``.  With keyed rules the scan is a keyed shuffle (see
    :mod:`corpuscle.engine.executors`): on the executor when it can run one, else in this process."""
    # An executor that can give up on one item (a cluster: a task whose worker died too often) takes a stand-in
    # for it: the shard's scan is then reported incomplete and the other shards' results are kept.
    lost = {"failed": _lost_scan} if getattr(executor, "gives_up_per_item", False) else {}
    if not keyed:
        return executor.map(_scan_args, items, **lost), dict
    split, reduce = functools.partial(_split, keyed), functools.partial(_reduce, keyed)
    if hasattr(executor, "map_shuffle"):
        scanned, gather = executor.map_shuffle(_scan_args, items, split, reduce, **lost)
    else:
        scanned, gather = shuffle_here(executor.map(_scan_args, items), split, reduce, 1)

    def partials() -> dict[str, list]:
        per_partition = gather()
        return {rule.id: [partial[rule.id] for partial in per_partition] for rule in keyed}

    return scanned, partials


@dataclass
class _Failed:
    """A partition whose reduce failed for a rule: why."""

    why: str


def _split(rules: list[Rule], result: ShardResult, parts: int) -> tuple[ShardResult, list[dict]]:
    """Map side of the keyed reduce, run where the shard's result is: every keyed rule's state is split into
    ``parts`` pieces (``{rule id: piece}`` per partition); the result keeps the slimmed states."""
    states, crashed = dict(result.states), dict(result.crashed)
    pieces: list[dict] = [{} for _ in range(parts)]
    for rule in rules:
        if rule.id not in states:
            continue
        try:
            state, parted = rule.partition(states[rule.id], parts)
            if len(parted) != parts:
                raise ValueError(f"partition gave {len(parted)} pieces for {parts} partitions")
        except Exception as exc:  # noqa: BLE001 - a rule bug must not lose the other rules' findings
            del states[rule.id]
            crashed[rule.id] = f"{type(exc).__name__}: {exc}"
            continue
        states[rule.id] = state
        for piece, part in zip(pieces, parted):
            piece[rule.id] = part
    return dataclasses.replace(result, states=states, crashed=crashed), pieces


def _reduce(rules: list[Rule], pieces: list[dict]) -> dict:
    """Reduce side of the keyed reduce, once per partition: each keyed rule's pieces from every shard (in shard
    order) to its partial, or a :class:`_Failed`."""
    out = {}
    for rule in rules:
        mine = [piece[rule.id] for piece in pieces if rule.id in piece]
        try:
            out[rule.id] = rule.reduce_partition(mine)
        except Exception as exc:  # noqa: BLE001
            out[rule.id] = _Failed(f"{type(exc).__name__}: {exc}")
    return out


def finish(results: list[ShardResult], settings: Settings, rules: list[Rule], seconds: float,
           partials: dict[str, list] | None = None) -> Report:
    """The reduce step: per-shard findings, cross-shard findings, notes and corpus figures.

    ``partials`` holds, by rule id, the partials of a keyed rule's reduce (one per partition); a keyed rule without
    them computes them in this process."""
    findings: list[Finding] = []
    notes: list[Note] = []
    outputs: dict[str, list] = {}
    metrics: dict = {
        "shards": len(results),
        "rows": sum(r.rows for r in results),
        "tokens": sum(r.tokens for r in results),
        "bytes": sum(max(r.shard.length, 0) for r in results),
        "seconds": round(seconds, 3),
    }
    sampled = corpus_figures(results)
    if sampled is not None:
        metrics["sample"] = sampled
    for rule in rules:
        states = [r.states[rule.id] for r in results if rule.id in r.states]
        for result in results:
            state = result.states.get(rule.id)
            if state is None:
                continue
            found = _guard(rule, notes, result.shard.uri, lambda: _declared(rule, rule.report(state))) or []
            for f in found:
                if f.start_line is None and result.shard.line_based and f.uri == result.shard.uri and f.rows.size:
                    f.start_line = int(f.rows.min()) + 1
            findings += found
        parts = (partials or {}).get(rule.id)
        failed = [p.why for p in parts or () if isinstance(p, _Failed)]
        if failed:
            notes.append(Note(Level.error, f"rule failed while reducing across shards ({failed[0]}); its findings "
                                           "that span shards and its corpus figures are missing", rule.id,
                              internal=True))
            corpus = None
        else:
            corpus = _guard(rule, notes, None,
                            lambda: rule.corpus(states) if parts is None else rule.corpus(states, parts))
        if corpus:
            corpus = CorpusResult(*corpus)
            corpus = corpus._replace(findings=_guard(rule, notes, None, lambda: _declared(rule, corpus.findings)) or [])
            findings += corpus.findings
            metrics.update(corpus.metrics)
            for name, items in corpus.outputs.items():
                outputs.setdefault(name, []).extend(items)
    for result in results:
        for rule_id, why in result.crashed.items():
            notes.append(Note(Level.error, f"rule stopped on this shard after an internal error ({why}); "
                                           "its findings for the shard are incomplete", rule_id, result.shard.uri,
                              internal=True))
        for notice in result.notices:
            notes.append(Note(Level.note, notice, None, result.shard.uri))
        for why in result.errors:
            notes.append(Note(Level.error, f"the scan of this shard stopped after an internal error ({why}); its "
                                           "findings are incomplete", None, result.shard.uri, internal=True))
        for rule_id, why in result.skipped.items():
            notes.append(Note(Level.note, f"skipped: {why}", rule_id, result.shard.uri))
    notes += _inferred_notes(results)
    if sampled is not None:
        for f in findings:
            estimate = finding_estimate(f, results)
            if estimate is not None:
                f.evidence["sampleEstimate"] = estimate
        notes.append(Note(Level.note, _sample_note(sampled)))
    excerpts.attach(findings, results, rules, settings)  # decoded text at token-level findings (--tokenizer)
    findings.sort(key=Finding.sort_key)
    findings, suppressions = gate.apply(findings, settings, rules, [r.shard for r in results])
    for record in suppressions:
        if not record["matched"]:
            entry = gate.describe_suppression(record["entry"])
            notes.append(Note(Level.note, f"stale suppression: [[suppress]] {entry} matched no finding in this run; "
                                          "remove it if the defect is gone", record["entry"]["rule"]))
    return Report(findings, [r.shard for r in results], rules, metrics, notes, settings, outputs, suppressions)


def _sample_note(sampled: dict) -> str:
    rows = f"{sampled['rowsScanned']:,} rows"
    if sampled["estimatedRows"]:
        rows += f" of about {sampled['estimatedRows']:,} ({100 * sampled['rowFraction']:.1f}%)"
    tokens = f"{sampled['tokensScanned']:,} tokens"
    if sampled["estimatedTokens"]:
        tokens += f" of about {sampled['estimatedTokens']:,}"
    return (f"figures are estimates from a sample (fraction {sampled['fraction']:g}, seed {sampled['seed']}): "
            f"{sampled['unitsScanned']:,} of {sampled['units']:,} units (row groups, record batches, blocks of "
            f"lines) scanned, {rows}, {tokens}. Counts of findings and the corpus figures are as observed in the "
            "sample; each finding's sample estimate gives the share of rows affected with a 95% Wilson score "
            "interval, which assumes independent rows (less certain when a defect clusters in some units).")


def _declared(rule: Rule, findings: list[Finding]) -> list[Finding]:
    """The findings, after checking that each one's kind is among the rule's declared ``kinds``."""
    for finding in findings:
        check_kind(finding.kind, tuple(rule.kinds))
    return findings


def _guard(rule: Rule, notes: list[Note], uri: str | None, call):
    try:
        return call()
    except Exception as exc:  # noqa: BLE001
        notes.append(Note(Level.error, f"rule failed while reporting ({type(exc).__name__}: {exc})", rule.id, uri,
                          internal=True))
        return None


def _inferred_notes(results: list[ShardResult]) -> list[Note]:
    """One note per inferred fact and value, naming how many shards it was inferred in and the evidence."""
    seen: dict[tuple, list[ShardResult]] = {}
    for result in results:
        for key, why in result.settings.evidence.items():
            seen.setdefault((key, getattr(result.settings, key)), []).append(result)
    notes = []
    for (key, value), where in seen.items():
        first = where[0]
        shards = first.shard.uri if len(where) == 1 else f"{len(where)} shards (first {first.shard.uri})"
        notes.append(Note(Level.note, f"{key} = {value} inferred (heuristic) in {shards}: "
                                      f"{first.settings.evidence[key]}", None, first.shard.uri))
    return notes


def scan(paths: Iterable[str] | str, settings: Settings | None = None, jobs: int = 1,
         progress=None, sample: Sample | None = None, *, config: str | None = None,
         baseline: str | None = None) -> Report:
    """Public entry point for a data-prep job: find shards under ``paths``, run all selected rules, return the report.

    Without ``settings``, the settings are read as the command line reads them: the file ``config``, else
    ``corpuscle.toml`` or ``[tool.corpuscle]`` in ``pyproject.toml`` in the working directory (see
    :func:`corpuscle.load_settings`).  ``baseline`` is an earlier SARIF log to compare with (``--baseline``).
    Raises :class:`corpuscle.io.sources.NoShardsFound`, :class:`corpuscle.settings.SettingsError` or
    :class:`corpuscle.gate.BaselineError` for usage problems.
    """
    from corpuscle.engine.registry import registry

    if isinstance(paths, (str, os.PathLike)):
        paths = [os.fspath(paths)]
    if settings is not None and config is not None:
        raise SettingsError("give settings or config, not both: load_settings(config=..., **facts) reads the file "
                            "and takes facts")
    settings = settings if settings is not None else load_settings(config)
    rules = select_rules(settings, registry())
    shards = discover(list(paths))
    old = gate.load_baseline(baseline) if baseline is not None else None
    report = run(shards, settings, rules, jobs=jobs, progress=progress, sample=sample)
    return report.compare(old) if old is not None else report
