"""The readable summary printed on stdout: findings most severe first, each with its count, evidence, first
locations and fix; then the corpus figures, what was inferred or skipped, and the verdict."""
from __future__ import annotations

import re
import textwrap

from corpuscle.findings import Level
from corpuscle.version import __version__

WIDTH = 100
SHOW_LOCATIONS = 6
MARK = {Level.error: "ERROR", Level.warning: "WARN ", Level.note: "NOTE "}


def _num(value) -> str:
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


def _wrap(text: str, indent: str) -> list[str]:
    # Never break inside a word or at its hyphens: rule ids, kinds and shard paths must stay copyable.
    return textwrap.wrap(text, WIDTH, initial_indent=indent, subsequent_indent=indent, break_long_words=False,
                         break_on_hyphens=False) or [indent]


def _locations(finding) -> str:
    shown = []
    for inst in finding.instances()[:SHOW_LOCATIONS]:
        where = f"row {inst['row']}"
        if "offset" in inst:
            where += f" @{inst['offset']}"
        if "uri" in inst and finding.uri is None:
            where = f"{inst['uri']} {where}"
        shown.append(where)
    more = finding.count - len(shown)
    return ", ".join(shown) + (f" (+{more:,} more)" if more > 0 else "")


#: Corpus figures with a section of their own instead of a line among the others.
SECTIONS = ("tokenBudget",)


def _words(key: str) -> str:
    """camelCase key to words: 'bestFitDecreasing' -> 'best fit decreasing'."""
    return re.sub(r"(?<!^)(?=[A-Z])", " ", key).lower()


def _pct(value) -> str:
    return f"{value:.1f}%" if isinstance(value, (int, float)) else "?"


def _budget_lines(budget: dict) -> list[str]:
    """The token budget as built next to each layout the report gives, one line each."""
    seq_len = budget.get("seqLen")
    if isinstance(seq_len, list):
        window = "seq_len " + " / ".join(_num(s) for s in seq_len) if seq_len else "seq_len unknown"
    else:
        window = f"seq_len {_num(seq_len)}" if seq_len else "seq_len unknown"
    head = (f"Token budget ({budget.get('unit', 'tokens')}; {window}; {_num(budget.get('documents', 0))} documents, "
            f"{_num(budget.get('documentTokens', 0))} document tokens)")
    lines = [head, "  (saves: share of the as-built slots a layout would not need; negative when it needs more)"]
    built = budget.get("asBuilt") or {}
    layouts = budget.get("layouts") or {}
    rows = [("as built", built)] + [(str(entry.get("name") or _words(key)), entry) for key, entry in layouts.items()]
    width = max(len(name) for name, _ in rows)
    for name, entry in rows:
        text = (f"  {name.ljust(width)}  {_num(entry.get('windows', 0)):>11} windows  "
                f"{_num(entry.get('slots', 0)):>13} slots  padding {_pct(entry.get('paddingPct')):>6}")
        if entry is built:
            bound = "at least " if built.get("truncatedIsLowerBound") and built.get("truncated") else ""
            text += f"  truncated {bound}{_num(built.get('truncated', 0))} ({_pct(built.get('truncatedPct'))})"
        else:
            text += f"  dropped {_pct(entry.get('droppedPct')):>6}  saves {_pct(entry.get('slotsSavedPct'))}"
        lines.append(text)
    if "lowerBound" in budget:
        lines.append(f"  {'lower bound'.ljust(width)}  {_num(budget['lowerBound']):>11} windows (no layout that keeps "
                     "every token needs fewer)")
    return lines


def _metric_lines(metrics: dict) -> list[str]:
    lines = []
    for key, value in metrics.items():
        if key in SECTIONS:
            continue
        if isinstance(value, dict):
            inner = ", ".join(f"{k} {_num(v)}" for k, v in value.items())
            lines += _wrap(f"{key}: {inner}", "  ")
        else:
            lines.append(f"  {key}: {_num(value)}")
    return lines


def _estimate_line(estimate: dict) -> list[str]:
    if "share" not in estimate:
        text = f"sample: {_num(estimate['observedCount'])} instances in {_num(estimate['rowsScanned'])} rows scanned"
        if "estimatedCount" in estimate:
            text += f", about {_num(estimate['estimatedCount'])} in all (ratio estimate)"
        return _wrap(text, "      ")
    text = (f"sample: {_pct(100 * estimate['share'])} of {_num(estimate['rowsScanned'])} rows scanned (95% CI "
            f"{_pct(100 * estimate['ci95Low'])} to {_pct(100 * estimate['ci95High'])}, Wilson score)")
    if "estimatedAffectedRows" in estimate:
        low, high = estimate["estimatedAffectedRowsCi95"]
        text += (f", about {_num(estimate['estimatedAffectedRows'])} of {_num(estimate['estimatedRows'])} rows "
                 f"({_num(low)} to {_num(high)})")
    if estimate.get("basis") == "instances":
        text += "; counted by instances, an upper bound when a row holds several"
    return _wrap(text, "      ")


def render(report) -> str:
    m = report.metrics
    sample = m.get("sample") if isinstance(m.get("sample"), dict) else None
    head = "SAMPLE of " if sample else ""
    scanned = " scanned" if sample else ""
    out = [f"corpuscle {__version__}: {head}{m.get('shards', 0):,} shard(s), {m.get('rows', 0):,} rows, "
           f"{m.get('tokens', 0):,} tokens{scanned}, {m.get('seconds', 0):.2f} s", ""]
    for f in report.findings:
        where = f.uri or "across shards"
        out.append(f"{MARK[f.level]} {f.rule_id} [{where}] {f.count:,} instance(s)")
        out += _wrap(f.message, "      ")
        if f.count and f.rows.size:
            out += _wrap("at: " + _locations(f), "      ")
        if isinstance(f.evidence.get("sampleEstimate"), dict):
            out += _estimate_line(f.evidence["sampleEstimate"])
        out.append("")
    if not report.findings:
        out += ["No findings.", ""]
    out.append("Corpus figures")
    out += _metric_lines(m)
    if isinstance(m.get("tokenBudget"), dict):
        out += [""] + _budget_lines(m["tokenBudget"])
    notes = [n for n in report.notes if n.level != Level.note or not n.message.startswith("skipped")]
    skipped = [n for n in report.notes if n.level == Level.note and n.message.startswith("skipped")]
    if notes:
        out += ["", "Notes"]
        for n in notes:
            prefix = f"[{n.rule_id}] " if n.rule_id else ""
            out += _wrap(prefix + n.message, "  ")
    if skipped:
        # One line per reason and set of shards, naming every rule skipped for it.
        shards_of: dict[tuple, list] = {}
        for n in skipped:
            shards_of.setdefault((n.rule_id, n.message[len("skipped: "):]), []).append(n.uri)
        rules_of: dict[tuple, list] = {}
        for (rule_id, why), uris in shards_of.items():
            rules_of.setdefault((why, tuple(uris)), []).append(rule_id)
        out += ["", "Rules skipped"]
        for (why, uris), rule_ids in rules_of.items():
            where = uris[0] if len(uris) == 1 else f"{len(uris)} shards"
            out += _wrap(f"{', '.join(rule_ids)}: {why} ({where})", "  ")
    if getattr(report, "incomplete", False):
        out += ["", "The scan is incomplete: a rule or the engine raised (see Notes), so findings may be missing; "
                    "exit 3."]
    counts = {lvl: sum(1 for f in report.findings if f.level == lvl) for lvl in Level}
    fail_at = report.settings.fail_at if report.settings else "error"
    out += ["", f"{counts[Level.error]} error(s), {counts[Level.warning]} warning(s), {counts[Level.note]} note(s); "
                f"exit {report.exit_code} (fails at: {fail_at}). `corpuscle explain RULE` says how to fix each."]
    return "\n".join(out) + "\n"
