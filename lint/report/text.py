"""The readable summary printed on stdout: findings most severe first, each with its count, evidence, first
locations and fix; then the corpus figures, what was inferred or skipped, and the verdict."""
from __future__ import annotations

import textwrap

from .. import __version__
from ..findings import Level

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


def _metric_lines(metrics: dict) -> list[str]:
    lines = []
    for key, value in metrics.items():
        if isinstance(value, dict):
            inner = ", ".join(f"{k} {_num(v)}" for k, v in value.items())
            lines += _wrap(f"{key}: {inner}", "  ")
        else:
            lines.append(f"  {key}: {_num(value)}")
    return lines


def render(report) -> str:
    m = report.metrics
    out = [f"corpuscle {__version__}: {m.get('shards', 0):,} shard(s), {m.get('rows', 0):,} rows, "
           f"{m.get('tokens', 0):,} tokens, {m.get('seconds', 0):.2f} s", ""]
    for f in report.findings:
        where = f.uri or "across shards"
        out.append(f"{MARK[f.level]} {f.rule_id} [{where}] {f.count:,} instance(s)")
        out += _wrap(f.message, "      ")
        if f.count and f.rows.size:
            out += _wrap("at: " + _locations(f), "      ")
        out.append("")
    if not report.findings:
        out += ["No findings.", ""]
    out.append("Corpus figures")
    out += _metric_lines(m)
    notes = [n for n in report.notes if n.level != Level.note or not n.message.startswith("skipped")]
    skipped = [n for n in report.notes if n.level == Level.note and n.message.startswith("skipped")]
    if notes:
        out += ["", "Notes"]
        for n in notes:
            prefix = f"[{n.rule_id}] " if n.rule_id else ""
            out += _wrap(prefix + n.message, "  ")
    if skipped:
        by_rule: dict[str, list] = {}
        for n in skipped:
            by_rule.setdefault(f"{n.rule_id}: {n.message[len('skipped: '):]}", []).append(n.uri)
        out += ["", "Rules skipped"]
        for what, uris in by_rule.items():
            where = uris[0] if len(uris) == 1 else f"{len(uris)} shards"
            out += _wrap(f"{what} ({where})", "  ")
    counts = {lvl: sum(1 for f in report.findings if f.level == lvl) for lvl in Level}
    fail_at = report.settings.fail_at if report.settings else "error"
    out += ["", f"{counts[Level.error]} error(s), {counts[Level.warning]} warning(s), {counts[Level.note]} note(s); "
                f"exit {report.exit_code} (fails at: {fail_at}). `corpuscle explain RULE` says how to fix each."]
    return "\n".join(out) + "\n"
