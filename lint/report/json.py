"""Plain JSON output: the findings, notes and corpus figures in a flat shape for scripts and dashboards."""
from __future__ import annotations

import orjson
from corpuscle.report import dump_json
from corpuscle.version import __version__


def to_dict(report) -> dict:
    return {
        "tool": "corpuscle",
        "version": __version__,
        "exitCode": report.exit_code,
        "shards": [{"uri": s.uri, "format": s.format, "bytes": s.length} for s in report.shards],
        "findings": [{
            "rule": f.rule_id,
            "level": f.level.name,
            "uri": f.uri,
            "kind": f.kind,
            "message": f.message,
            "count": f.count,
            "instances": f.instances(),
            "instancesTruncated": f.truncated,
            "evidence": f.evidence,
            "fingerprint": f.fingerprint,
            **({"ruleLevel": f.rule_level.name} if f.rule_level is not None else {}),
            **({"suppressed": {"justification": f.suppression}} if f.suppression is not None else {}),
            **({"baselineState": f.baseline_state} if f.baseline_state is not None else {}),
            **({"rootCause": f.caused_by} if f.caused_by else {}),
            **({"explains": list(f.explains)} if f.explains else {}),
        } for f in report.findings],
        "suppressions": [{**record["entry"], "matched": record["matched"]} for record in report.suppressions],
        **({"baseline": dict(report.baseline)} if report.baseline is not None else {}),
        "notes": [{"level": n.level.name, "rule": n.rule_id, "uri": n.uri, "message": n.message}
                  for n in report.notes],
        "metrics": report.metrics,
    }


def render(report) -> bytes:
    return dump_json(to_dict(report), orjson.OPT_INDENT_2)
