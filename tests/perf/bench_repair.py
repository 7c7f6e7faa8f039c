"""Benchmark: repairing a generated tokenized Parquet shard against scanning it.

    python tests/perf/bench_repair.py [--tokens 20000000] [--seq-len 2048] [--keep DIR]

Writes one shard of packed windows (input_ids, position_ids, labels shifted twice; int32 lists; the generator of
bench_scan.py) with at least ``--tokens`` tokens, then measures in this one run, each in a child process with
``jobs=1`` (one core, one Arrow thread):
  (a) a scan of it with label-alignment and missing-separator,
  (b) ``repair --fix label-alignment``: that scan, the rewrite, and the rescan of the copy,
  (c) ``repair --repack best-fit``: the same with every document laid out again,
and the ratios b / a and c / a, and the peak resident memory (VmHWM) of each process.
"""
from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_scan import EOS, write_shard  # noqa: E402

MEASURE = ("import sys, time; t=time.perf_counter(); {body}; "
           "print(time.perf_counter()-t, [int(l.split()[1]) for l in open('/proc/self/status') "
           "if l.startswith('VmHWM')][0])")


def shift_twice(path: str) -> None:
    """Rewrite the shard's labels as labels[t] = input_ids[t+2] (the last two ignored), row group by row group."""
    pf = pq.ParquetFile(path)
    tmp = path + ".tmp"
    with pq.ParquetWriter(tmp, pf.schema_arrow) as writer:
        for group in range(pf.metadata.num_row_groups):
            table = pf.read_row_group(group)
            ids = table.column("input_ids").combine_chunks()
            width = len(ids[0])
            values = ids.values.to_numpy().reshape(len(ids), width)
            labels = np.full_like(values, -100)
            labels[:, :-2] = values[:, 2:]
            array = pa.ListArray.from_arrays(ids.offsets, pa.array(labels.ravel()))
            writer.write_table(table.set_column(table.schema.get_field_index("labels"), "labels", array))
    os.replace(tmp, path)


def measure(body: str) -> tuple[float, int]:
    out = subprocess.run([sys.executable, "-c", MEASURE.format(body=body)], check=True, capture_output=True,
                         text=True).stdout.split()
    return float(out[-2]), int(out[-1]) * 1024


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tokens", type=int, default=20_000_000)
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--keep", help="folder to write the shard into (kept); default: a temporary folder")
    args = parser.parse_args()
    folder = args.keep or tempfile.mkdtemp(prefix="corpuscle-bench-")
    source = os.path.join(folder, "in")
    os.makedirs(source, exist_ok=True)
    path = os.path.join(source, "bench_windows.parquet")
    if not os.path.exists(path):
        write_shard(path, args.tokens, args.seq_len)
        shift_twice(path)
    rows = pq.ParquetFile(path).metadata.num_rows
    tokens = rows * args.seq_len
    settings = f"Settings(eos_id={EOS}, pad_id=0, seq_len={args.seq_len})"
    scan_s, scan_mem = measure(
        "from corpuscle import scan, Settings; from corpuscle.engine.scan import run, select_rules; "
        "from corpuscle.engine.registry import registry; from corpuscle.io.sources import discover; "
        f"s={settings}; rules=[registry()[r]() for r in ('label-alignment', 'missing-separator')]; "
        f"run(discover([{path!r}]), s, rules, jobs=1)")
    results = {}
    for name, extra in (("fix", "fixes=('label-alignment',)"), ("repack", "repack='best-fit'")):
        out = os.path.join(folder, f"out-{name}")
        shutil.rmtree(out, ignore_errors=True)
        results[name] = measure(
            f"from corpuscle import Settings; from corpuscle.repair import repair; "
            f"r=repair([{source!r}], {out!r}, {settings}, {extra}, jobs=1); assert r.exit_code == 0, r.still_found")
        shutil.rmtree(out, ignore_errors=True)
    print(f"shard: {rows:,} windows x {args.seq_len} = {tokens:,} tokens, {os.path.getsize(path) / 1e6:,.0f} MB, "
          "labels shifted twice")
    print(f"(a) scan (label-alignment, missing-separator) : {scan_s:7.2f} s, peak {scan_mem / 2**20:5.0f} MiB")
    for key, label in (("fix", "(b) repair --fix label-alignment"), ("repack", "(c) repair --repack best-fit")):
        seconds, peak = results[key]
        print(f"{label:46s}: {seconds:7.2f} s, peak {peak / 2**20:5.0f} MiB, {seconds / scan_s:5.2f} x the scan "
              f"({tokens / seconds / 1e6:,.1f} M tokens/s)")
    if not args.keep:
        shutil.rmtree(folder)


if __name__ == "__main__":
    main()
