"""Benchmark: the duplicate rules on a generated tokenized Parquet shard against pyarrow just reading it.

    python tests/perf/bench_dedup.py [--tokens 50000000] [--seq-len 2048] [--duplicates 0.02] [--keep DIR]

Writes one shard of windows of random token ids (input_ids, int32 lists; at least ``--tokens`` tokens) in which a
share ``--duplicates`` of the windows are exact copies of earlier ones and the same share near copies (an earlier
window with 10 tokens changed: Jaccard similarity about 0.95 over 5-token shingles), so that the reduce step has
clusters to verify. Then measures in this one run:
  (a) pyarrow reading the shard batch by batch (same batch size as the scan),
  (b) a scan with ``--only near-duplicate,exact-duplicate`` in a child process (``--jobs 1``), reduce step included,
  (c) the ratio b / a,
  (d) the peak resident memory of the scanning process (VmHWM in /proc/self/status: unlike ru_maxrss it
      does not carry the parent's peak across exec).
The file is read once before timing so that both timings see a warm page cache.
"""
from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

VOCAB = 50_000
NEAR_CHANGES = 10
ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_scan import time_read  # noqa: E402  (the same batch-by-batch read as the scan benchmark)


def write_shard(path: str, tokens: int, seq_len: int, duplicates: float, rows_per_group: int = 1024,
                seed: int = 7) -> tuple[int, int, int]:
    """Random windows with planted exact and near copies of earlier windows; returns (rows, exact, near)."""
    rng = np.random.default_rng(seed)
    rows = -(-tokens // seq_len)
    schema = pa.schema([("input_ids", pa.list_(pa.int32()))])
    previous = None
    exact = near = 0
    with pq.ParquetWriter(path, schema) as writer:
        for start in range(0, rows, rows_per_group):
            n = min(rows_per_group, rows - start)
            ids = rng.integers(3, VOCAB, size=(n, seq_len), dtype=np.int32)
            if start == 0:
                previous = ids.copy()  # the first row group copies its own (unchanged) windows
            planted = rng.choice(n, size=2 * int(duplicates * n), replace=False)
            copies, nears = planted[: len(planted) // 2], planted[len(planted) // 2:]
            ids[copies] = previous[rng.integers(0, len(previous), len(copies))]
            ids[nears] = previous[rng.integers(0, len(previous), len(nears))]
            changed = rng.integers(0, seq_len, size=(len(nears), NEAR_CHANGES))
            ids[nears[:, None], changed] = rng.integers(VOCAB, 2 * VOCAB, size=changed.shape, dtype=np.int32)
            exact, near = exact + len(copies), near + len(nears)
            offsets = pa.array(np.arange(0, n * seq_len + 1, seq_len, dtype=np.int32))
            writer.write_table(pa.table([pa.ListArray.from_arrays(offsets, pa.array(ids.ravel()))], schema=schema))
            previous = ids
    return rows, exact, near


def time_scan(path: str) -> tuple[float, int, dict, dict]:
    # Imports (and the rule registry) are loaded before the clock starts, as in bench_scan.py.
    code = ("import sys, time, json; from lint import scan, Settings; from rules import registry; "
            "registry(); t=time.perf_counter(); "
            f"r=scan([{path!r}], Settings(only=('near-duplicate', 'exact-duplicate')), jobs=1); "
            "s=time.perf_counter()-t; "
            "print(json.dumps([s, [int(l.split()[1]) for l in open('/proc/self/status') if l.startswith('VmHWM')][0], "
            "r.metrics['nearDuplicates'], r.metrics['exactDuplicates']]))")
    import json

    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True, cwd=ROOT).stdout
    seconds, peak, near, exact = json.loads(out.strip().splitlines()[-1])
    return seconds, peak * 1024, near, exact


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tokens", type=int, default=50_000_000)
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--duplicates", type=float, default=0.02, help="share of exact copies, and of near copies")
    parser.add_argument("--keep", help="folder to write the shard into (kept); default: a temporary folder")
    args = parser.parse_args()
    folder = args.keep or tempfile.mkdtemp(prefix="corpuscle-bench-")
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(folder, "bench_dedup.parquet")
    rows, exact, near = write_shard(path, args.tokens, args.seq_len, args.duplicates)
    tokens = rows * args.seq_len
    sys.path.insert(0, ROOT)
    from corpuscle.io.sources import DEFAULT_BATCH_TOKENS

    batch_rows = max(1, DEFAULT_BATCH_TOKENS // args.seq_len)
    time_read(path, batch_rows)  # warm the page cache
    read_s = time_read(path, batch_rows, use_threads=False)  # one thread, as the scan with --jobs 1 decodes
    scan_s, peak, near_figures, exact_figures = time_scan(path)
    print(f"shard: {rows:,} windows x {args.seq_len} = {tokens:,} tokens, {os.path.getsize(path) / 1e6:,.0f} MB; "
          f"planted {exact:,} exact and {near:,} near copies (a few fewer survive: a copy of a window that was itself "
          "overwritten by a later plant copies nothing)")
    print(f"(a) pyarrow read, one thread             : {read_s:8.2f} s")
    print(f"(b) scan near-duplicate,exact-duplicate  : {scan_s:8.2f} s  ({tokens / scan_s / 1e6:,.1f} M tokens/s)")
    print(f"(c) ratio scan / read                    : {scan_s / read_s:8.2f} x")
    print(f"(d) peak memory of the scan              : {peak / 2**20:8.0f} MiB")
    print(f"    near: {near_figures['clusters']:,} clusters, {near_figures['duplicateWindows']:,} windows, "
          f"{near_figures['candidatePairs']:,} candidate / {near_figures['verifiedPairs']:,} verified pairs, "
          f"b x r = {near_figures['bands']} x {near_figures['rowsPerBand']}")
    print(f"    exact: {exact_figures['groups']:,} groups, {exact_figures['duplicateWindows']:,} extra copies")
    if not args.keep:
        os.remove(path)
        os.rmdir(folder)


if __name__ == "__main__":
    main()
