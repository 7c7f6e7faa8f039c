"""The HTML report: one self-contained page (inline CSS and inline SVG; no script, no font, no image, no link to
anything outside it) that opens from disk or from a CI artifact store with no network.

It shows the verdict; the findings per rule and level with each rule's fix and the first locations of each
finding (shard, 0-based row, 0-based token offset); the distributions the rules measured, drawn from the report's
corpus figures (document lengths against the window, the token budget of the shard as built and of three layouts,
padding per row, the label shift per row, duplicate clusters by size); findings per shard and rule as a heat
table; the inferred facts with their evidence, the settings in force, the version and the run's timing.

Everything drawn is an aggregate the rules already computed, and every long list is cut at a cap, so the page
stays small for a corpus of many thousands of shards.
"""
from __future__ import annotations

import math
from html import escape

from corpuscle.findings import Level
from corpuscle.report import svg, units
from corpuscle.settings import FACTS
from corpuscle.version import __version__

#: Findings listed per rule, and in all, before the table says how many more there are.
FINDINGS_PER_RULE = 50
FINDINGS_SHOWN = 500
#: Locations shown per finding (as the text summary).
LOCATIONS_SHOWN = 6
#: Shards given a row of their own in the heat table (those with the most instances); the rest share one row.
HEAT_SHARDS = 200
#: Largest duplicate clusters listed under their plot.
CLUSTERS_LISTED = 10
#: The note the engine writes for an inferred fact (corpuscle.engine.scan._inferred_notes).
INFERRED = " inferred (heuristic) in "

#: Facts the engine infers from the data when they are not given (corpuscle.engine.infer).
INFERABLE = ("eos_id", "bos_id", "pad_id", "seq_len", "labels")

LEVEL_WORD = {Level.error: "error", Level.warning: "warning", Level.note: "note"}

CSS = """
:root{--fg:#1d2330;--muted:#5b6475;--line:#d5d9e2;--bg:#fff;--panel:#f6f7fa;--error:#c62828;--warning:#b26a00;
--note:#2f6fb3;--ok:#2e7d32;--bar:#4a78b5;--over:#c62828;--pad:#b9bfcb;--lost:#c62828;--exact:#4a78b5;--near:#8e6bbf}
*{box-sizing:border-box}
body{font:14px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:var(--fg);background:var(--bg);
margin:0 auto;max-width:1120px;padding:16px 24px 48px}
h1{font-size:22px;margin:8px 0 4px}h2{font-size:18px;margin:28px 0 8px;border-bottom:1px solid var(--line);
padding-bottom:4px}h3{font-size:15px;margin:12px 0 4px}
.meta{color:var(--muted);margin:0 0 12px}
.verdict{padding:12px 16px;border-radius:6px;font-size:16px;font-weight:600;margin:12px 0;color:#fff}
.verdict.fail{background:var(--error)}.verdict.pass{background:var(--ok)}
.verdict .detail{font-weight:400;font-size:14px;display:block;margin-top:2px}
.sample{background:#fff4d6;border:1px solid #e7c55c;padding:8px 12px;border-radius:6px}
table{border-collapse:collapse;width:100%;margin:6px 0 12px;font-size:13px}
th,td{border-bottom:1px solid var(--line);padding:4px 6px;text-align:left;vertical-align:top}
th{background:var(--panel);font-weight:600}
td.num,th.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap;padding-right:12px}
tr.rule td{background:var(--panel);border-top:2px solid var(--line)}
.lvl{display:inline-block;padding:0 6px;border-radius:3px;color:#fff;font-size:12px;font-weight:600}
.lvl.error{background:var(--error)}.lvl.warning{background:var(--warning)}.lvl.note{background:var(--note)}
.fix{color:var(--muted)}
code,.loc{font-family:ui-monospace,SFMono-Regular,Menlo,Consolas,monospace;font-size:12px}
.loc{white-space:nowrap}td.loc{white-space:normal;overflow-wrap:anywhere}
table.findings{table-layout:fixed}figure .loc,table.findings .loc{white-space:normal;overflow-wrap:anywhere}
table.heat{width:auto;min-width:50%}
.more{color:var(--muted);font-style:italic}
.plots{display:grid;grid-template-columns:repeat(auto-fill,minmax(520px,1fr));gap:16px}
figure{margin:0;padding:10px;border:1px solid var(--line);border-radius:6px;background:var(--bg)}
figure h3{margin:0 0 4px}
figure.missing{color:var(--muted)}
figcaption{color:var(--muted);font-size:13px;margin-top:4px}
svg.plot{width:100%;height:auto;display:block}
svg.plot text{fill:var(--fg);font-size:12px;font-family:inherit}
svg.plot text.x-label,svg.plot text.y-label{font-size:13px;fill:var(--muted)}
svg.plot text.value{font-size:12px}
svg.plot text.mark-label{fill:var(--over);font-weight:600}
svg.plot .axis{stroke:var(--fg);stroke-width:1}
svg.plot .grid{stroke:var(--line);stroke-width:1}
svg.plot .tickmark{stroke:var(--fg)}
svg.plot .mark{stroke:var(--over);stroke-width:1.5;stroke-dasharray:4 3}
svg.plot .bar{fill:var(--bar)}svg.plot .bar.over{fill:var(--over)}
svg.plot .real{fill:var(--bar)}svg.plot .padding{fill:var(--pad)}svg.plot .lost{fill:var(--lost)}
svg.plot .exact{fill:var(--exact)}svg.plot .near{fill:var(--near)}
svg.plot .swatch.exact{fill:var(--exact)}svg.plot .swatch.near{fill:var(--near)}
svg.plot .swatch.real{fill:var(--bar)}svg.plot .swatch.padding{fill:var(--pad)}svg.plot .swatch.lost{fill:var(--lost)}
svg.plot .bar.odd{fill:var(--over)}
table.heat td.cell{text-align:right;font-variant-numeric:tabular-nums;min-width:44px}
table.heat th.rot{writing-mode:vertical-rl;transform:rotate(180deg);white-space:nowrap;font-weight:500;
padding:6px 2px;vertical-align:bottom}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:2px 12px}dl.facts dt{font-weight:600}
dl.facts dd{margin:0}
"""


def _num(value) -> str:
    return units.number(value, ",.4g")  # floats with thousands separators on the page


def _pct(part, whole) -> str:
    return f"{100 * part / whole:.1f}%" if whole else "0%"


def _level(level: Level) -> str:
    word = LEVEL_WORD[level]
    return f'<span class="lvl {word}">{word}</span>'


# -- verdict and findings ---------------------------------------------------------------------------------------

def _verdict(report) -> str:
    counts = {lvl: sum(1 for f in report.findings if f.level == lvl) for lvl in Level}
    fail_at = report.settings.fail_at if report.settings else "error"
    failed = report.exit_code != 0
    word = "FAIL" if failed else "PASS"
    detail = (f"{counts[Level.error]:,} error(s), {counts[Level.warning]:,} warning(s), {counts[Level.note]:,} "
              f"note(s); exit {report.exit_code} (fails at: {escape(fail_at)})")
    return (f'<div class="verdict {"fail" if failed else "pass"}" id="verdict">{word}'
            f'<span class="detail">{detail}</span></div>')


def _locations(finding) -> str:
    shown = []
    for instance in finding.instances()[:LOCATIONS_SHOWN]:
        where = units.where(finding, instance)  # "row 3, token 20", as the text summary writes it
        shown.append(f'<span class="loc">{escape(where)}</span>')
    more = finding.count - len(shown)
    text = "; ".join(shown)
    if more > 0 and shown:
        text += f' <span class="more">(+{more:,} more)</span>'
    return text or '<span class="more">whole shard</span>'


def _findings(report) -> str:
    if not report.findings:
        return '<p id="no-findings">No findings.</p>'
    rules = {rule.id: rule for rule in report.rules}
    by_rule: dict[str, list] = {}
    for f in report.findings:  # most severe first, as sorted by the engine
        by_rule.setdefault(f.rule_id, []).append(f)
    body, shown = [], 0
    for rule_id, found in by_rule.items():
        rule = rules.get(rule_id)
        levels = sorted({f.level for f in found}, reverse=True)
        instances = sum(f.count for f in found)
        summary = escape(rule.summary) if rule else ""
        fix = f'<div class="fix"><b>Fix:</b> {escape(rule.help)}</div>' if rule else ""
        body.append(f'<tbody data-rule="{escape(rule_id)}"><tr class="rule"><td colspan="5"><b><code>'
                    f'{escape(rule_id)}</code></b> {" ".join(_level(lvl) for lvl in levels)} '
                    f'{len(found):,} finding(s), {instances:,} instance(s). {summary}{fix}</td></tr>')
        room = max(0, min(FINDINGS_PER_RULE, FINDINGS_SHOWN - shown))
        for f in found[:room]:
            body.append(f'<tr class="finding"><td>{_level(f.level)}</td><td class="loc">{escape(f.uri or "across shards")}'
                        f'</td><td class="num">{f.count:,}</td><td>{escape(f.message)}</td>'
                        f'<td>{_locations(f)}</td></tr>')
        shown += min(room, len(found))
        if len(found) > room:
            rest = found[room:]
            body.append(f'<tr><td colspan="5" class="more">{len(rest):,} more finding(s) of {escape(rule_id)} '
                        f'({sum(f.count for f in rest):,} instances) are not listed here: the SARIF and JSON '
                        'reports (--sarif, --json) list every one.</td></tr>')
        body.append("</tbody>")
    cols = ('<colgroup><col style="width:72px"><col style="width:19%"><col style="width:88px"><col>'
            '<col style="width:25%"></colgroup>')
    head = cols + ('<thead><tr><th>level</th><th>shard</th><th class="num">instances</th><th>what is wrong</th>'
            '<th>first locations (row, token or character offset; both 0-based)</th></tr></thead>')
    return f'<table id="findings" class="findings">{head}{"".join(body)}</table>'


# -- plots --------------------------------------------------------------------------------------------------------

def _figure(title: str, chart: str, caption: str, extra: str = "") -> str:
    return f'<figure class="chart"><h3>{escape(title)}</h3>{chart}<figcaption>{caption}</figcaption>{extra}</figure>'


def _missing(title: str, why: str) -> str:
    return f'<figure class="missing"><h3>{escape(title)}</h3><p>Not drawn: {escape(why)}</p></figure>'


def _length_plots(metrics: dict) -> list[str]:
    histograms = metrics.get("documentLengthHistogram")
    if not isinstance(histograms, dict) or not histograms:
        return [_missing("Document lengths", "no document lengths were measured (the truncation-waste rule did "
                                             "not run on any shard)")]
    out = []
    for unit, h in histograms.items():
        windows = h.get("seqLen") or []
        marks = {w + 1: f"seq_len {w:,}" for w in windows}  # the edge between "fits" and "longer than the window"
        title = f"Document lengths ({unit})"
        chart = svg.log_histogram(title, f"document length ({unit}, log scale; bins [low, high))", "documents",
                                  f"plot-lengths-{unit}", h["edges"], h["counts"], unit, marks,
                                  highlight_from=windows[0] + 1 if len(windows) == 1 else None)
        documents = h["documents"]
        if "longerThanWindow" in h:
            beyond = h["longerThanWindow"]
            where = ("red, right of the dashed line at seq_len" if len(windows) == 1 else
                     "each compared with its own shard's window; dashed lines at seq_len")
            reading = (f"{beyond:,} of {documents:,} documents ({_pct(beyond, documents)}) are longer than their "
                       f"window ({where} {' / '.join(f'{w:,}' for w in windows)}): those are cut or split. ")
        else:
            reading = (f"{documents:,} documents" + ("; raw text counted in UTF-8 bytes, which cannot be compared "
                                                      "with a window of tokens (give --tokenizer). " if unit == "bytes"
                                                      else "; no seq_len known, so no window is marked. "))
        out.append(_figure(title, chart, escape(reading) + "Each bar covers a range of lengths about 1.4x wide "
                           "(two per doubling); a bar far left of the window means short documents that waste "
                           "a padded window or need packing."))
    return out


def _budget_plot(metrics: dict) -> str:
    title = "Token budget"
    budget = metrics.get("tokenBudget")
    if not isinstance(budget, dict) or not budget.get("asBuilt"):
        return _missing(title, "no tokenized shard was measured (the truncation-waste rule did not run on one)")
    built = budget["asBuilt"]
    rows = [("as built", [("real", built["realTokens"], f"as built: {built['realTokens']:,} real tokens"),
                          ("padding", built["padding"], f"as built: {built['padding']:,} padding"),
                          ("lost", built["truncated"], f"as built: at least {built['truncated']:,} tokens lost to "
                                                       "truncation (not in the shard)")])]
    for entry in (budget.get("layouts") or {}).values():
        name = str(entry.get("name", ""))
        real = entry["slots"] - entry["padding"]
        rows.append((name, [("real", real, f"{name}: {real:,} real tokens"),
                            ("padding", entry["padding"], f"{name}: {entry['padding']:,} padding"),
                            ("lost", entry["dropped"], f"{name}: {entry['dropped']:,} tokens dropped")]))
    seq_len = budget.get("seqLen")
    window = (" / ".join(f"{s:,}" for s in seq_len) if isinstance(seq_len, list) else f"{seq_len:,}") \
        if seq_len else "unknown"
    chart = svg.stacked_rows(title, "token slots (windows x seq_len), plus tokens lost", "layout", "plot-budget",
                             rows, [("real", "real tokens"), ("padding", "padding"),
                                    ("lost", "lost (truncated or dropped)")])
    reading = (f"seq_len {window}; {budget.get('documents', 0):,} documents, {budget.get('documentTokens', 0):,} "
               f"document tokens. As built, {_pct(built['padding'] + built['truncated'], built['slots'])} of the "
               f"{built['slots']:,} slots train on nothing. A shorter bar is fewer windows of compute for the same "
               "documents; red is tokens never trained on.")
    if not budget.get("layouts"):
        reading += " The three layouts need a known seq_len (give --seq-len)."
    return _figure(title, chart, escape(reading))


def _padding_plot(metrics: dict) -> str:
    title = "Padding per row"
    h = metrics.get("paddingPerRow")
    if not isinstance(h, dict) or not h.get("rows"):
        return _missing(title, "no shard was checked for padding (padding-loss needs an attention mask or pad_id)")
    padded = h["rows"] - (h["counts"][0] if h["counts"] else 0)
    if not padded:
        return _missing(title, f"none of the {h['rows']:,} rows checked holds padding")
    chart = svg.log_histogram(title, "padding tokens in the row (log scale; bins [low, high))", "rows",
                              "plot-padding", h["edges"], h["counts"], "padding tokens")
    reading = (f"{padded:,} of {h['rows']:,} rows ({_pct(padded, h['rows'])}) hold padding; the bar at 0 is rows "
               "without any. Bins double in width. Mass far right means rows mostly padding: pack documents instead.")
    return _figure(title, chart, escape(reading))


def _shift_plot(metrics: dict, report) -> str:
    title = "Label shift per row"
    shifts = metrics.get("labelShiftRows")
    if not isinstance(shifts, dict) or not shifts:
        return _missing(title, "no labels were measured (no labels column, or label-alignment did not run)")
    keys = sorted(shifts, key=int)
    labels = [k if k.startswith(("+", "-")) else f"+{k}" for k in keys]
    values = [int(shifts[k]) for k in keys]
    expected = {"shifted": 1, "aligned": 0}
    given = report.settings.labels if report.settings else None
    conventional = {expected[given]} if given in expected else {0, 1}
    classes = ["" if int(k) in conventional else "odd" for k in keys]
    chart = svg.bars(title, "label shift k (labels[t] = input_ids[t + k])", "rows", "plot-shift", labels, values,
                     "rows", classes)
    reading = ("+1: labels are input_ids shifted by one (the model predicts the next token); +0: labels equal "
               "input_ids (the trainer shifts them). Each shard should have one bar; red bars are shifts no "
               "convention uses, a bug in how labels were built.")
    return _figure(title, chart, escape(reading))


def _duplicate_plot(metrics: dict, report) -> str:
    title = "Duplicate clusters by size"
    sizes = {name: metrics.get(key) for name, key in (("exact", "exactDuplicateClusterSizes"),
                                                     ("near", "nearDuplicateClusterSizes"))}
    sizes = {k: v for k, v in sizes.items() if isinstance(v, dict)}
    if not sizes:
        return _missing(title, "the duplicate rules did not run")
    if not any(v["clusters"] for v in sizes.values()):
        return _missing(title, "no exact or near-duplicate cluster was found")
    drawn = {name: h for name, h in sizes.items() if h["clusters"]}
    edges = max((h["edges"] for h in drawn.values()), key=len)  # both rules bin on the same edges
    labels = [f"{a:,}" if b == a + 1 else f"{a:,}-{b - 1:,}" for a, b in zip(edges[:-1], edges[1:])]
    series = [(f"{name} duplicates", name, h["counts"] + [0] * (len(labels) - len(h["counts"])))
              for name, h in drawn.items()]
    chart = svg.grouped_bars(title, "cluster size (windows, or documents of raw text, per cluster)", "clusters",
                             "plot-clusters", labels, series, "clusters")
    clusters = [f for f in report.findings if f.rule_id in ("exact-duplicate", "near-duplicate") and f.uri is None
                and f.instance_uris is not None]
    clusters.sort(key=lambda f: -f.count)
    listed = "".join(
        f'<tr><td><code>{escape(f.rule_id)}</code></td><td class="num">{f.count:,}</td><td>{_locations(f)}</td></tr>'
        for f in clusters[:CLUSTERS_LISTED])
    table = (f'<table class="clusters"><thead><tr><th>rule</th><th class="num">copies</th><th>where (first '
             f'{LOCATIONS_SHOWN}; rows 0-based)</th></tr></thead><tbody>{listed}</tbody></table>' if listed else "")
    summary = "; ".join(f"{name}: {h['clusters']:,} clusters of {h['windows']:,} windows, the largest "
                        f"{h['largest']:,}" for name, h in sizes.items())
    reading = (f"{summary}. Each cluster keeps one copy and the rest are trained on again every epoch; a few large "
               f"clusters usually mean boilerplate. The {min(len(clusters), CLUSTERS_LISTED)} largest are listed.")
    return _figure(title, chart, escape(reading), table)


def _plots(report) -> str:
    m = report.metrics
    figures = _length_plots(m) + [_budget_plot(m), _padding_plot(m), _shift_plot(m, report),
                                  _duplicate_plot(m, report)]
    return f'<div class="plots">{"".join(figures)}</div>'


# -- heat table ---------------------------------------------------------------------------------------------------

def _heat(report) -> str:
    if not report.findings:
        return "<p>No findings, so nothing to tabulate.</p>"
    rule_ids = list(dict.fromkeys(f.rule_id for f in report.findings))
    per_shard: dict[str, dict[str, int]] = {}
    worst: dict[tuple, Level] = {}
    for f in report.findings:
        where = f.uri if f.uri is not None else ""
        cells = per_shard.setdefault(where, {})
        cells[f.rule_id] = cells.get(f.rule_id, 0) + f.count
        worst[(where, f.rule_id)] = max(worst.get((where, f.rule_id), f.level), f.level)
    order = sorted(per_shard, key=lambda u: (u != "", -sum(per_shard[u].values()), u))
    shown, rest = order[:HEAT_SHARDS], order[HEAT_SHARDS:]
    peak = max(v for cells in per_shard.values() for v in cells.values())
    colours = {Level.error: (198, 40, 40), Level.warning: (178, 106, 0), Level.note: (47, 111, 179)}

    def cell(count: int, level: Level | None) -> str:
        if not count:
            return '<td class="cell"></td>'
        r, g, b = colours[level or Level.note]
        alpha = 0.15 + 0.75 * math.log1p(count) / math.log1p(peak)
        ink = "#fff" if alpha > 0.55 else "inherit"
        return (f'<td class="cell" style="background:rgba({r},{g},{b},{alpha:.2f});color:{ink}" '
                f'data-value="{count}">{count:,}</td>')

    head = "".join(f'<th class="rot"><code>{escape(r)}</code></th>' for r in rule_ids)
    rows = []
    for uri in shown:
        cells = per_shard[uri]
        rows.append(f'<tr><td class="loc">{escape(uri or "across shards")}</td>'
                    + "".join(cell(cells.get(r, 0), worst.get((uri, r))) for r in rule_ids) + "</tr>")
    if rest:
        total = {r: sum(per_shard[u].get(r, 0) for u in rest) for r in rule_ids}
        levels = {r: max((worst[(u, r)] for u in rest if (u, r) in worst), default=None) for r in rule_ids}
        rows.append(f'<tr><td class="more">{len(rest):,} other shards (fewer instances), added up</td>'
                    + "".join(cell(total[r], levels[r]) for r in rule_ids) + "</tr>")
    clean = len(report.shards) - sum(1 for u in per_shard if u)
    note = (f"<p>{clean:,} of {len(report.shards):,} shards have no finding of their own. Cells count instances; the "
            "colour is the most severe level in the cell, darker for more instances (log scale).</p>")
    return (f'<table class="heat" id="heat"><thead><tr><th>shard</th>{head}</tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table>{note}')


# -- facts, settings, notes ------------------------------------------------------------------------------------

def _facts(report) -> str:
    inferred, other, skipped = [], [], []
    for n in report.notes:
        if n.rule_id is None and INFERRED in n.message:
            inferred.append(n)
        elif n.level == Level.note and n.message.startswith("skipped"):
            skipped.append(n)
        else:
            other.append(n)
    out = []
    if inferred:
        rows = []
        for n in inferred:
            fact, rest = n.message.split(INFERRED, 1)
            where, _, why = rest.partition(": ")
            rows.append(f"<tr><td><code>{escape(fact)}</code></td><td>{escape(why)}</td><td>{escape(where)}</td></tr>")
        out.append('<h3>Inferred facts (heuristics; a value you give always wins)</h3><table id="inferred"><thead><tr>'
                   f'<th>fact</th><th>evidence</th><th>shards</th></tr></thead><tbody>{"".join(rows)}</tbody></table>')
    else:
        out.append("<p>No fact was inferred from the data.</p>")
    if other:
        items = "".join(f"<li>{_level(n.level)} {'<code>' + escape(n.rule_id) + '</code> ' if n.rule_id else ''}"
                        f"{escape(n.message)}{' (' + escape(n.uri) + ')' if n.uri and n.rule_id else ''}</li>"
                        for n in other[:FINDINGS_SHOWN])
        more = f"<li class=\"more\">{len(other) - FINDINGS_SHOWN:,} more notes</li>" if len(other) > FINDINGS_SHOWN else ""
        out.append(f"<h3>Notes</h3><ul>{items}{more}</ul>")
    if skipped:
        groups: dict[tuple, list] = {}
        for n in skipped:
            groups.setdefault((n.message[len("skipped: "):], n.rule_id), []).append(n.uri)
        by_reason: dict[tuple, list] = {}
        for (why, rule_id), uris in groups.items():
            by_reason.setdefault((why, len(uris), uris[0]), []).append(rule_id)
        rows = "".join(f"<tr><td>{escape(', '.join(ids))}</td><td>{escape(why)}</td><td>"
                       f"{escape(first) if count == 1 else f'{count:,} shards (first {escape(first)})'}</td></tr>"
                       for (why, count, first), ids in by_reason.items())
        out.append(f'<h3>Rules skipped</h3><table><thead><tr><th>rules</th><th>why</th><th>where</th></tr></thead>'
                   f"<tbody>{rows}</tbody></table>")
    return "".join(out)


def _settings(report) -> str:
    s = report.settings
    if s is None:
        return "<p>No settings recorded.</p>"
    rows = []
    for key in FACTS + ("only", "skip", "fail_at", "instance_cap"):
        value = getattr(s, key)
        if value is None or value == ():
            why = " (inferred per shard where the data shows it)" if key in INFERABLE else ""
            shown = f'<span class="more">not set{why}</span>'
        else:
            shown = f"<code>{escape(', '.join(value) if isinstance(value, tuple) else str(value))}</code>"
        rows.append(f"<tr><td><code>{key}</code></td><td>{shown}</td><td>{escape(s.source(key))}</td></tr>")
    for rule_id, options in s.rule.items():
        rows.append(f"<tr><td><code>[rule.{escape(rule_id)}]</code></td><td><code>"
                    f"{escape(', '.join(f'{k} = {v!r}' for k, v in options.items()))}</code></td><td>config</td></tr>")
    rules = ", ".join(rule.id for rule in report.rules)
    return (f'<table id="settings"><thead><tr><th>setting</th><th>value</th><th>from</th></tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table><p>Rules run: <code>{escape(rules)}</code></p>')


def _run(report) -> str:
    m = report.metrics
    seconds = float(m.get("seconds", 0) or 0)
    rate = lambda n: f"{n / seconds:,.0f}/s" if seconds > 0 else "n/a"  # noqa: E731
    items = [("tool", f"corpuscle {__version__}"), ("shards", _num(m.get("shards", 0))),
             ("rows", f"{_num(m.get('rows', 0))} ({rate(m.get('rows', 0))})"),
             ("tokens", f"{_num(m.get('tokens', 0))} ({rate(m.get('tokens', 0))})"),
             ("bytes", _num(m.get("bytes", 0))), ("time", f"{seconds:.2f} s (the whole scan)")]
    return '<dl class="facts" id="run">' + "".join(f"<dt>{k}</dt><dd>{escape(v)}</dd>" for k, v in items) + "</dl>"


def render(report) -> bytes:
    m = report.metrics
    sample = m.get("sample") if isinstance(m.get("sample"), dict) else None
    banner = ""
    if sample:
        banner = (f'<p class="sample">A SAMPLE (fraction {sample.get("fraction", 0):g}, seed {sample.get("seed", 0)}): '
                  "counts are as observed in the sample and figures are estimates (see the notes).</p>")
    head = (f"corpuscle {__version__}: {m.get('shards', 0):,} shard(s), {m.get('rows', 0):,} rows, "
            f"{m.get('tokens', 0):,} tokens, {float(m.get('seconds', 0) or 0):.2f} s")
    page = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>corpuscle report: {report.exit_code and 'FAIL' or 'PASS'}</title>",
        f"<style>{CSS}</style></head><body>",
        f"<h1>corpuscle report</h1><p class=\"meta\">{escape(head)}</p>",
        banner,
        _verdict(report),
        '<nav class="meta">Sections: <a href="#findings-section">findings</a> · <a href="#plots">distributions</a> · '
        '<a href="#heat-section">per shard and rule</a> · <a href="#facts">inferred, skipped, noted</a> · '
        '<a href="#settings-section">settings</a> · <a href="#run-section">run</a></nav>',
        '<h2 id="findings-section">Findings by rule and level</h2>',
        "<p>Rows and offsets are 0-based: row = the record's index in the shard in file order (for JSON Lines the "
        "line index), token = the token index in that row, char = the character offset for rules on raw text.</p>",
        _findings(report),
        '<h2 id="plots">Distributions</h2>',
        "<p>Drawn from the report's corpus figures (the same numbers as in the JSON and SARIF metrics).</p>",
        _plots(report),
        '<h2 id="heat-section">Findings per shard and rule</h2>',
        _heat(report),
        '<h2 id="facts">What was inferred, skipped and noted</h2>',
        _facts(report),
        '<h2 id="settings-section">Settings in force</h2>',
        _settings(report),
        '<h2 id="run-section">Run</h2>',
        _run(report),
        "</body></html>",
    ]
    return "\n".join(page).encode("utf-8")
