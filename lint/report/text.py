"""The readable summary printed on stdout.

The default (:func:`render`) fits a CI log: a header and the numbering legend, a table of counts per rule, then one
line per finding (level, rule, where, what, in the unit of its count) each followed by one ``fix:`` line -- root
causes first, the same kind of finding in several shards merged into one line, at most the five largest clusters of
a rule's findings across shards -- then suppressions, the baseline, notes, and the verdict last.  ``--stats`` adds
the corpus figures and the token budget (always in SARIF and JSON).  ``long=True`` gives every finding's full prose
(``--format long``)."""
from __future__ import annotations

import re
import textwrap

from corpuscle.findings import Level
from corpuscle.report import units
from corpuscle.version import __version__

WIDTH = 100
SHOW_LOCATIONS = 6
MARK = {Level.error: "ERROR", Level.warning: "WARN ", Level.note: "NOTE "}


_num = units.number


def _wrap(text: str, indent: str) -> list[str]:
    # Never break inside a word or at its hyphens: rule ids, kinds and shard paths must stay copyable.
    return textwrap.wrap(text, WIDTH, initial_indent=indent, subsequent_indent=indent, break_long_words=False,
                         break_on_hyphens=False) or [indent]


def _locations(finding) -> str:
    shown = [units.where(finding, inst) for inst in finding.instances()[:SHOW_LOCATIONS]]
    more = finding.count - len(shown)
    return "; ".join(shown) + (f" (+{more:,} more)" if more > 0 else "")


#: Corpus figures with a section of their own instead of a line among the others.
SECTIONS = ("tokenBudget",)
#: Distributions drawn by the HTML report (report/html.py): bins and counts, not figures for a line of text.
PLOTTED = ("documentLengthHistogram", "paddingPerRow", "exactDuplicateClusterSizes", "nearDuplicateClusterSizes")


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
        if key in SECTIONS or key in PLOTTED:
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


def render_long(report, stats: bool = False) -> str:
    """Every finding in full prose, wrapped at 100 columns (``--format long``)."""
    m = report.metrics
    sample = m.get("sample") if isinstance(m.get("sample"), dict) else None
    head = "SAMPLE of " if sample else ""
    scanned = " scanned" if sample else ""
    out = [f"corpuscle {__version__}: {head}{m.get('shards', 0):,} shard(s), {m.get('rows', 0):,} rows, "
           f"{m.get('tokens', 0):,} tokens{scanned}, {m.get('seconds', 0):.2f} s", ""]
    out += _wrap(LEGEND, "") + [""]
    for f in report.findings:
        where = f.uri or "across shards"
        state = f" ({_state(f)})" if _state(f) else ""
        out.append(f"{MARK[f.level]} {f.rule_id} [{where}] {counted(f.count, units.unit(f))}{state}")
        out += _wrap(f.message, "      ")
        if f.explains:
            out += _wrap(f"cause of the next {len(f.explains)} finding(s): fix this first.", "      ")
        if f.caused_by:
            out += _wrap("same cause as the root-cause finding above it.", "      ")
        if f.count and f.rows.size:
            out += _wrap("at: " + _locations(f), "      ")
        if isinstance(f.evidence.get("sampleEstimate"), dict):
            out += _estimate_line(f.evidence["sampleEstimate"])
        out.append("")
    if not report.findings:
        out += ["No findings.", ""]
    if stats:
        out += _stats_lines(m)
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
    tail = _suppression_lines(report) + _baseline_line(report)
    if tail:
        out += [""] + tail
    out += _incomplete_lines(report) + ["", _verdict(report)]
    return "\n".join(out) + "\n"


def _incomplete_lines(report) -> list[str]:
    """What an incomplete scan (exit status 3) says before its verdict."""
    if not getattr(report, "incomplete", False):
        return []
    return ["", "The scan is incomplete: a rule or the engine raised (see the notes), so findings may be missing; "
                "exit 3."]


# -- the compact summary (the default) ---------------------------------------------------------------------------

LEGEND = ("Numbering: rows and offsets are 0-based — row = record index in its shard in file order (JSON Lines: the "
          "line index, blank lines included), token = token index in the row, char = character index in the text "
          "(SARIF region.startLine alone is 1-based).")
#: Widest a finding's line gets before its text is cut (the shard names are never cut; SARIF/JSON keep everything).
LINE = 240
#: Findings of one rule across shards (clusters) shown before the rest are summed up.
CLUSTERS = 5
#: Imperative first words that start the fix in a rule's message (when the finding has no ``fix`` of its own).
FIX_VERBS = {"add", "append", "accept", "check", "concatenate", "correct", "decode", "deduplicate", "drop", "emit",
             "filter", "fix", "give", "keep", "lower", "make", "mark", "move", "normalise", "normalize", "pack",
             "raise", "rebuild", "regenerate", "remove", "repair", "replace", "run", "set", "shift", "skip", "split",
             "store", "strip", "tokenize", "train", "truncate", "use", "write", "if"}


def counted(n: int, unit: str) -> str:
    """'1 row', '3 rows', '1 document boundary', '2 copies'."""
    if n == 1 and unit.endswith("ies"):
        unit = unit[:-3] + "y"
    elif n == 1 and unit.endswith("s") and not unit.endswith("ss"):
        unit = unit[:-1]
    return f"{n:,} {unit}"


def _state(f) -> str:
    parts = ["suppressed"] if f.suppression is not None else []
    if f.baseline_state is not None:
        parts.append(f.baseline_state)
        if f.baseline_state == "updated" and isinstance(f.evidence.get("baselineCount"), int):
            parts[-1] += f" from {f.evidence['baselineCount']:,}"
    if f.rule_level is not None:
        parts.append(f"set from {f.rule_level.name}")
    return ", ".join(parts)


def _stats_lines(m: dict) -> list[str]:
    out = ["", "Corpus figures"] + _metric_lines(m)
    if isinstance(m.get("tokenBudget"), dict):
        out += [""] + _budget_lines(m["tokenBudget"])
    return out


def _in_force(report) -> list:
    """The findings that stand in this run: not suppressed, not absent since the baseline."""
    return [f for f in report.findings if f.suppression is None and f.baseline_state != "absent"]


def _verdict(report) -> str:
    standing = _in_force(report)
    counts = {lvl: sum(1 for f in standing if f.level == lvl) for lvl in Level}
    fail_at = report.settings.fail_at if report.settings else "error"
    extra = []
    suppressed = sum(1 for f in report.findings if f.suppression is not None)
    if suppressed:
        extra.append(f"{suppressed} suppressed")
    if report.baseline is not None:
        gating = sum(1 for f in standing if f.gating)
        extra.append(f"{gating} new or updated since the baseline")
    more = f", {', '.join(extra)}" if extra else ""
    return (f"{counts[Level.error]} error(s), {counts[Level.warning]} warning(s), {counts[Level.note]} note(s){more}; "
            f"exit {report.exit_code} (fails at: {fail_at}). `corpuscle explain RULE` says how to fix each.")


_SENTENCE = re.compile(r"(?<=[.!?])\s+(?=[A-Z(])")


def _sentences(text: str) -> list[str]:
    return [s.strip() for s in _SENTENCE.split(text.strip()) if s.strip()]


def _drop_asides(text: str) -> str:
    """The text without its parenthesised asides (outermost pairs), spaces tidied."""
    out, depth = [], 0
    for i, ch in enumerate(text):
        if ch == "(" and (depth or i == 0 or text[i - 1].isspace()):  # "line(s)" is a word, not an aside
            depth += 1
        elif ch == ")" and depth:
            depth -= 1
        elif not depth:
            out.append(ch)
    return re.sub(r"\s+([,;:.])", r"\1", re.sub(r"\s{2,}", " ", "".join(out))).strip()


def split_message(finding, rule=None) -> tuple[str, str]:
    """A finding's message as (what is wrong, how to fix it): the first sentence without its asides, and the
    finding's own ``fix`` -- or the sentences of the message from the first that starts with an imperative verb
    (up to an aside in parentheses) -- or the first sentence of the rule's help."""
    sentences = _sentences(finding.message)
    what = _drop_asides(sentences[0]) if sentences else ""
    fix = finding.fix
    if not fix:
        for i, sentence in enumerate(sentences[1:], 1):
            first = re.split(r"[\s,]", sentence, maxsplit=1)[0].lower()
            if first in FIX_VERBS or first.startswith("re-"):
                rest = [s for s in sentences[i:] if not s.startswith("(")]
                fix = " ".join(rest[:2])
                break
    if not fix and rule is not None and rule.help:
        fix = _sentences(rule.help)[0]
    return what, fix or "see `corpuscle explain " + finding.rule_id + "`"


def _clip(text: str, room: int) -> str:
    room = max(room, 100)
    if len(text) <= room:
        return text
    cut = text[:room - 1].rsplit(" ", 1)[0].rstrip(",;:")
    return cut + " …"


def _short(uris: list, n: int = 3) -> str:
    """The first ``n`` shard names, and how many more."""
    return ", ".join(uris[:n]) + (f" +{len(uris) - n} more" if len(uris) > n else "")


def _finding_line(f, group: list, rules: dict, causes: dict[str, str], rule_of: dict[str, str]) -> list[str]:
    """The line of one finding (or of the same kind of finding in several shards) and its fix line; ``causes``:
    the rule id of each root-cause finding by fingerprint, ``rule_of``: the rule id of every finding shown."""
    what, fix = split_message(f, rules.get(f.rule_id))
    count = sum(g.count for g in group)
    if len(group) > 1:
        where = f"in {len(group)} shards ({_short([g.uri for g in group])})"
        what = f"in the first: {what}"
    else:
        where = f.uri or "across shards"
    first = f.instances()[:1]
    whole = units.unit(f) in ("shard", "shards", "file", "files")  # a finding about the whole shard: no location
    at = f" (first at {units.where(f, first[0])})" if first and len(group) == 1 and f.uri and not whole else ""
    state = f" [{_state(f)}]" if _state(f) else ""
    head = f"{MARK[f.level]} {f.rule_id}  {where}: {counted(count, units.unit(f))}{_estimate(f)}{at}{state}: "
    lines = [head + _clip(what, LINE - len(head))]
    lines += _largest_clusters(group)
    if f.caused_by and f.caused_by in causes:
        lines.append(f"      fix: same cause as the {causes[f.caused_by]} finding above: fix that first.")
    else:
        lines.append(f"      fix: {fix}")
    if f.explains:
        named = sorted({rule_of[e] for e in f.explains if e in rule_of})
        lines.append(f"      cause of: {len(f.explains)} finding(s) below ({', '.join(named)})")
    return lines


def _largest_clusters(group: list) -> list[str]:
    """For findings that list duplicate clusters in their evidence (``clusterList``): the largest few, one line each
    ("3 copies: row 0 = row 12 = row 24"), and how many more the SARIF/JSON report holds."""
    clusters = [(f, c) for f in group for c in f.evidence.get("clusterList") or () if isinstance(c, dict)]
    if not clusters:
        return []
    clusters.sort(key=lambda fc: -int(fc[1].get("members", 0)))
    lines = []
    for f, cluster in clusters[:CLUSTERS]:
        members = [cluster.get("kept") or {}] + list(cluster.get("others") or [])
        shards = {m.get("uri") for m in members}

        def place(member, f=f, shards=shards):
            where = f"row {member.get('row', 0):,}"
            if member.get("offset"):  # a document that starts inside its row (0: at the row's start)
                where += f", {units.offset_word(f)} {member['offset']:,}"
            named = len(shards) > 1 or f.uri is None or len(group) > 1  # the shard is not the line's own
            return f"{member['uri']} {where}" if named else where

        shown = " = ".join(place(m) for m in members[:3] if m)
        total = int(cluster.get("members", len(members)))
        more = f" (+{total - 3:,} more)" if total > 3 else ""
        lines.append(f"      {counted(total, 'copies')}: {shown}{more}")
    if len(clusters) > CLUSTERS:
        lines.append(f"      and {len(clusters) - CLUSTERS:,} more clusters, listed in the SARIF/JSON report")
    return lines


def _estimate(f) -> str:
    """A sampled scan's estimate for the finding, short: the share of rows with its 95% interval, or the count in
    all."""
    estimate = f.evidence.get("sampleEstimate")
    if not isinstance(estimate, dict):
        return ""
    if "share" in estimate:
        return (f" in the sample ({_pct(100 * estimate['share'])} of rows scanned, 95% CI "
                f"{_pct(100 * estimate['ci95Low'])} to {_pct(100 * estimate['ci95High'])})")
    if "estimatedCount" in estimate:
        return f" in the sample (about {_num(estimate['estimatedCount'])} in all, a ratio estimate)"
    return " in the sample"


def _table(findings: list) -> list[str]:
    """Counts per rule: findings, instances (in the rule's units), shards affected, worst level."""
    rows: dict[str, dict] = {}
    for f in findings:
        row = rows.setdefault(f.rule_id, {"level": f.level, "findings": 0, "count": 0, "shards": set(), "units": set()})
        row["level"] = max(row["level"], f.level)
        row["findings"] += 1
        row["count"] += f.count
        row["units"].add(units.unit(f))
        row["shards"] |= {f.uri} if f.uri else set(f.instance_uris or [])
    if not rows:
        return []
    width = max(len("rule"), *(len(r) for r in rows))
    out = [f"{'rule'.ljust(width)}  level    findings    count  shards  counted in"]
    for rule_id, row in rows.items():
        unit = ", ".join(sorted(row["units"]))
        out.append(f"{rule_id.ljust(width)}  {row['level'].name.ljust(7)}  {row['findings']:>8,}  {row['count']:>7,}  "
                   f"{len(row['shards']):>6,}  {unit}")
    return out


def _groups(findings: list) -> list[list]:
    """Findings to print: one group per finding, except the same rule, kind and level in several shards (merged)."""
    groups: list[list] = []
    index: dict[tuple, list] = {}
    for f in findings:
        if f.uri is None or f.caused_by or f.explains:
            groups.append([f])
            continue
        key = (f.rule_id, f.kind, f.level, f.baseline_state, f.rule_level)
        if key in index:
            index[key].append(f)
        else:
            index[key] = [f]
            groups.append(index[key])
    return groups


def _cluster_lines(rule_id: str, clusters: list, rules: dict) -> list[str]:
    """Many findings of one rule, each of its own kind (duplicate clusters, within or across shards): a headline,
    the largest few, the count of the rest, one fix line."""
    clusters = sorted(clusters, key=lambda f: -f.count)
    first = clusters[0]
    shards = {u for f in clusters for u in ([f.uri] if f.uri else f.instance_uris or [])}
    total = sum(f.count for f in clusters)
    unit = units.unit(first)
    level = max(f.level for f in clusters)
    state = f" [{_state(first)}]" if all(_state(f) == _state(first) for f in clusters) and _state(first) else ""
    where = f"in {len(shards)} shards" if len(shards) > 1 else f"in {next(iter(shards), 'no shard')}"
    out = [f"{MARK[level]} {rule_id}  {where}: {len(clusters):,} findings, {counted(total, unit)} in all{state}; "
           f"the {min(len(clusters), CLUSTERS)} largest:"]
    for f in clusters[:CLUSTERS]:
        places = " = ".join(units.where(f, inst) for inst in f.instances()[:3])
        if f.uri and len(shards) > 1:
            places = f"{f.uri} {places}"
        more = f" (+{f.count - 3:,} more)" if f.count > 3 else ""
        tag = f" [{_state(f)}]" if _state(f) and not state else ""
        out.append(f"      {counted(f.count, unit)}: {places}{more}{tag}")
    if len(clusters) > CLUSTERS:
        rest = clusters[CLUSTERS:]
        out.append(f"      and {len(rest):,} more findings ({counted(sum(f.count for f in rest), unit)}), listed in "
                   "the SARIF/JSON report")
    _, fix = split_message(first, rules.get(rule_id))
    out.append(f"      fix: {fix}")
    return out


def _note_lines(report) -> list[str]:
    out = []
    skipped: dict[tuple, list] = {}
    for n in report.notes:
        if n.level == Level.note and n.message.startswith("skipped"):
            skipped.setdefault((n.message[len("skipped: "):], n.rule_id), []).append(n.uri)
            continue
        prefix = f"[{n.rule_id}] " if n.rule_id else ""
        out.append(f"{n.level.name}: {prefix}{n.message}")
    by_reason: dict[tuple, list] = {}
    for (why, rule_id), uris in skipped.items():
        by_reason.setdefault((why, tuple(uris)), []).append(rule_id)
    for (why, uris), rule_ids in by_reason.items():
        where = uris[0] if len(uris) == 1 else f"{len(uris)} shards"
        out.append(f"skipped {', '.join(rule_ids)} in {where}: {why}")
    return out


def _baseline_line(report) -> list[str]:
    if report.baseline is None:
        return []
    states = {}
    for f in report.findings:
        states[f.baseline_state] = states.get(f.baseline_state, 0) + 1
    counts = ", ".join(f"{states.get(s, 0)} {s}" for s in ("new", "updated", "unchanged", "absent"))
    out = [f"Baseline {report.baseline['path']}: {counts} (only new and updated results count for the exit status)"]
    gone = [f for f in report.findings if f.baseline_state == "absent"]
    if gone:
        names = [f"{f.rule_id} in {f.uri or 'several shards'}" for f in gone[:CLUSTERS]]
        more = f" +{len(gone) - CLUSTERS} more" if len(gone) > CLUSTERS else ""
        out.append(f"  absent now (gone since the baseline): {', '.join(names)}{more}")
    return out


def _suppression_lines(report) -> list[str]:
    out = []
    from corpuscle.gate import describe_suppression

    for record in report.suppressions:
        if record["matched"]:
            out.append(f"SUPPRESSED {record['matched']} result(s) of {describe_suppression(record['entry'])}: "
                       f"{record['entry']['justification']}")
    return out


def render(report, stats: bool = False, long: bool = False) -> str:
    """The summary: compact (the default), or every finding's full prose with ``long``; the corpus figures and the
    token budget only with ``stats``."""
    if long:
        return render_long(report, stats)
    m = report.metrics
    sample = m.get("sample") if isinstance(m.get("sample"), dict) else None
    head = "SAMPLE of " if sample else ""
    scanned = " scanned" if sample else ""
    out = [f"corpuscle {__version__}: {head}{m.get('shards', 0):,} shard(s), {m.get('rows', 0):,} rows, "
           f"{m.get('tokens', 0):,} tokens{scanned}, {m.get('seconds', 0):.2f} s", LEGEND]
    standing = _in_force(report)
    rules = {rule.id: rule for rule in report.rules}
    rule_of = {f.fingerprint: f.rule_id for f in standing}
    if standing:
        out += [""] + _table(standing) + [""]
    else:
        out += ["", "No findings."]
    causes = {f.fingerprint: f.rule_id for f in standing if f.explains}
    groups = _groups(standing)
    # A rule with many findings of a kind each (duplicate clusters), or several across shards, gets one block.
    singles: dict[str, list] = {}
    for group in groups:
        f = group[0]
        if len(group) == 1 and not f.explains and not f.caused_by:
            singles.setdefault(f.rule_id, []).append(f)
    blocks = {rule_id for rule_id, found in singles.items()
              if len(found) > CLUSTERS or sum(1 for f in found if f.uri is None) > 1}
    shown = set()
    for group in groups:
        f = group[0]
        if f.rule_id in blocks and len(group) == 1 and any(f is g for g in singles[f.rule_id]):
            if f.rule_id not in shown:
                shown.add(f.rule_id)
                out += _cluster_lines(f.rule_id, singles[f.rule_id], rules)
            continue
        out += _finding_line(f, group, rules, causes, rule_of)
    tail = _suppression_lines(report) + _baseline_line(report) + _note_lines(report)
    if tail:
        out += [""] + tail
    if stats:
        out += _stats_lines(m)
    out += _incomplete_lines(report) + ["", _verdict(report)]
    return "\n".join(out) + "\n"
