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
        } for f in report.findings],
        "notes": [{"level": n.level.name, "rule": n.rule_id, "uri": n.uri, "message": n.message}
                  for n in report.notes],
        "metrics": report.metrics,
    }


def render(report) -> bytes:
    return dump_json(to_dict(report), orjson.OPT_INDENT_2)
