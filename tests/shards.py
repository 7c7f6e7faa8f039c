"""Small shards for tests: built in memory from plain Python lists, written in any supported format.

Only the test data is invented; every expectation in the tests is computed from these lists independently of the
code under test (plain Python over the same lists) or taken from a named outside source.
"""
from __future__ import annotations

import gzip
import json
import os
import pathlib

import pyarrow as pa
import pyarrow.parquet as pq
from corpuscle import Settings, scan

REPO = pathlib.Path(__file__).resolve().parent.parent
#: The OASIS SARIF 2.1.0 JSON schema (draft-04), kept in the repository (see tests/data/README.md).
SARIF_SCHEMA = REPO / "tests" / "data" / "sarif-schema-2.1.0.json"


def sarif_validator():
    """A validator for the OASIS SARIF 2.1.0 schema, with format checks (the schema declares draft-04)."""
    import jsonschema

    schema = json.loads(SARIF_SCHEMA.read_text())
    cls = jsonschema.validators.validator_for(schema)
    assert cls is jsonschema.Draft4Validator
    return cls(schema, format_checker=cls.FORMAT_CHECKER)


def validate_sarif(log: dict) -> dict:
    """``log`` after checking it against the OASIS SARIF 2.1.0 schema; fails with the first few errors."""
    errors = sorted(sarif_validator().iter_errors(log), key=lambda e: list(e.absolute_path))
    assert not errors, "\n".join(f"{list(e.absolute_path)}: {e.message}" for e in errors[:5])
    return log


def write(path, columns: dict, fmt: str | None = None, row_group_size: int | None = None) -> str:
    """Write ``columns`` (name -> list of values) as .parquet, .arrow (IPC file), .arrows (IPC stream, saved as
    .arrow), .jsonl, .jsonl.gz or .jsonl.zst, chosen by ``fmt`` or by the file name."""
    path = str(path)
    fmt = fmt or next(s for s in ("jsonl.gz", "jsonl.zst", "jsonl", "parquet", "arrow") if path.endswith(s))
    os.makedirs(os.path.dirname(path) or ".", exist_ok=True)
    if fmt.startswith("jsonl"):
        names = list(columns)
        rows = [dict(zip(names, values)) for values in zip(*columns.values())]
        data = b"".join(json.dumps(r).encode() + b"\n" for r in rows)
        if fmt == "jsonl.gz":
            data = gzip.compress(data)
        elif fmt == "jsonl.zst":
            with pa.CompressedOutputStream(path, "zstd") as out:
                out.write(data)
            return path
        with open(path, "wb") as fh:
            fh.write(data)
        return path
    table = pa.table(columns)
    if fmt == "parquet":
        pq.write_table(table, path, row_group_size=row_group_size)
    elif fmt == "arrow":
        with pa.ipc.new_file(path, table.schema) as w:
            w.write_table(table, max_chunksize=row_group_size)
    elif fmt == "arrows":
        with pa.OSFile(path, "wb") as sink, pa.ipc.new_stream(sink, table.schema) as w:
            w.write_table(table, max_chunksize=row_group_size)
    return path


def run(paths, **settings):
    """Scan ``paths`` in this process with the given settings; returns the report."""
    if not isinstance(paths, (list, tuple)):
        paths = [paths]
    return scan([str(p) for p in paths], Settings(**settings), jobs=1)


def findings(report, rule_id, kind=None):
    return [f for f in report.findings if f.rule_id == rule_id and (kind is None or f.kind == kind)]


def locations(finding) -> list[tuple[int, int]]:
    return list(zip(finding.rows.tolist(), finding.offsets.tolist()))


def pack(documents: list[list[int]], seq_len: int, eos: int | None = None, pad: int = 0,
         positions: bool = True):
    """Concatenate documents (each followed by ``eos`` when given) and cut into windows of ``seq_len``.

    Returns columns input_ids, labels (shifted: labels[t] = input_ids[t+1], last = -100) and, when ``positions``,
    position_ids restarting at 0 at every document start. The last window is padded with ``pad`` (label -100).
    """
    stream, pos = [], []
    for doc in documents:
        doc = list(doc) + ([eos] if eos is not None else [])
        stream += doc
        pos += list(range(len(doc)))
    ids, labels, positions_col = [], [], []
    for start in range(0, len(stream), seq_len):
        window = stream[start:start + seq_len]
        wpos = pos[start:start + seq_len]
        fill = seq_len - len(window)
        label = window[1:] + [-100]
        ids.append(window + [pad] * fill)
        labels.append(label + [-100] * fill)
        positions_col.append(wpos + list(range(len(wpos), len(wpos) + fill)))
    cols = {"input_ids": ids, "labels": labels}
    if positions:
        cols["position_ids"] = positions_col
    return cols
