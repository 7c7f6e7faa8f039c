"""Benchmark: a full scan of a generated tokenized Parquet shard against pyarrow just reading it.

    python tests/perf/bench_scan.py [--tokens 50000000] [--seq-len 2048] [--rules token|all] [--keep DIR]

Writes one shard of packed windows (input_ids, shifted labels, position_ids; int32 lists) with at least
``--tokens`` tokens, then measures in this one run:
  (a) pyarrow reading the shard batch by batch (all columns, same batch size as the scan, one thread),
  (b) ``corpuscle scan`` of it with the token-structure rules (``--rules all``: every rule, the default scan, the
      duplicate rules comparing the shard's documents), in a child process (``--jobs 1``: one core, one Arrow
      thread),
  (c) the ratio b / a,
  (d) the peak resident memory of the scanning process.
The file is read once before timing so that both timings see a warm page cache.
"""
from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

RULES = "label-alignment,missing-separator,document-attention,token-range,padding-loss,schema-mismatch," \
        "unreadable-record,unreadable-shard"
EOS, VOCAB = 2, 50_000


def write_shard(path: str, tokens: int, seq_len: int, rows_per_group: int = 1024, seed: int = 7) -> int:
    """Packed windows of random documents (log-normal lengths), eos after each; returns rows written."""
    rng = np.random.default_rng(seed)
    rows = -(-tokens // seq_len)
    list_type = pa.list_(pa.int32())
    schema = pa.schema([("input_ids", list_type), ("labels", list_type), ("position_ids", list_type)])
    with pq.ParquetWriter(path, schema) as writer:
        for start in range(0, rows, rows_per_group):
            n = min(rows_per_group, rows - start)
            total = n * seq_len
            ids = rng.integers(3, VOCAB, size=total, dtype=np.int32)
            lengths = np.clip(rng.lognormal(6.0, 1.0, size=total // 50 + 2).astype(np.int64), 8, 20_000)
            ends = np.cumsum(lengths)
            ends = ends[ends < total]
            ids[ends - 1] = EOS
            starts = np.concatenate([[0], ends])
            pos = np.arange(total, dtype=np.int64) - np.repeat(starts, np.diff(np.concatenate([starts, [total]])))
            positions = pos.astype(np.int32).reshape(n, seq_len)
            labels = np.empty_like(ids)
            labels[:-1] = ids[1:]
            labels = labels.reshape(n, seq_len)
            labels[:, -1] = -100
            offsets = pa.array(np.arange(0, total + 1, seq_len, dtype=np.int32))
            cols = [pa.ListArray.from_arrays(offsets, pa.array(a.ravel())) for a in (ids, labels, positions)]
            writer.write_table(pa.table(cols, schema=schema))
    return rows


REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def run_cli(command: list[str]) -> tuple[subprocess.CompletedProcess, float]:
    """Run a scan command in a child process with this checkout first on the path; its result and wall-clock
    seconds. Exits with the child's stderr when the scan itself failed (exit status other than 0 or 1)."""
    env = {**os.environ, "PYTHONPATH": REPO + os.pathsep + os.environ.get("PYTHONPATH", "")}
    started = time.perf_counter()
    done = subprocess.run(command, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    seconds = time.perf_counter() - started
    if done.returncode not in (0, 1):
        raise SystemExit(f"the scan failed (exit {done.returncode}): {done.stderr}")
    return done, seconds


def time_read(path: str, batch_size: int, use_threads: bool = True) -> float:
    started = time.perf_counter()
    pf = pq.ParquetFile(path)
    for _ in pf.iter_batches(batch_size=batch_size, use_threads=use_threads):
        pass
    return time.perf_counter() - started


def time_scan(path: str, rules: str = "token") -> tuple[float, float, int]:
    chosen = "()" if rules == "all" else f"tuple(r for r in {RULES!r}.split(',') if r in registry())"
    code = ("import sys, time; from corpuscle import scan, Settings; from corpuscle.engine.registry import registry; "
            f"only={chosen}; "
            f"t=time.perf_counter(); r=scan([{path!r}], Settings(only=only, vocab_size={VOCAB}), jobs=1); "
            "print(time.perf_counter()-t, [int(l.split()[1]) for l in open('/proc/self/status') if l.startswith('VmHWM')][0], len(r.findings))")
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True).stdout.split()
    return float(out[0]), int(out[1]) * 1024, int(out[2])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tokens", type=int, default=50_000_000)
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--rules", choices=("token", "all"), default="token",
                        help="token: the token-structure rules (default); all: every rule, the default scan")
    parser.add_argument("--keep", help="folder to write the shard into (kept); default: a temporary folder")
    args = parser.parse_args()
    folder = args.keep or tempfile.mkdtemp(prefix="corpuscle-bench-")
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(folder, "bench_windows.parquet")
    if not os.path.exists(path):
        rows = write_shard(path, args.tokens, args.seq_len)
    else:
        rows = pq.ParquetFile(path).metadata.num_rows
    tokens = rows * args.seq_len
    from corpuscle.io.sources import DEFAULT_BATCH_TOKENS

    batch_rows = max(1, DEFAULT_BATCH_TOKENS // args.seq_len)
    time_read(path, batch_rows)  # warm the page cache
    read_s = time_read(path, batch_rows, use_threads=False)  # one thread, as the scan with --jobs 1 decodes
    scan_s, peak, found = time_scan(path, args.rules)
    print(f"shard: {rows:,} windows x {args.seq_len} = {tokens:,} tokens, {os.path.getsize(path) / 1e6:,.0f} MB")
    print(f"(a) pyarrow read, one thread     : {read_s:8.2f} s")
    print(f"(b) corpuscle scan (--jobs 1)    : {scan_s:8.2f} s  ({tokens / scan_s / 1e6:,.1f} M tokens/s, {found} findings)")
    print(f"(c) ratio scan / read            : {scan_s / read_s:8.2f} x")
    print(f"(d) peak memory of the scan      : {peak / 2**20:8.0f} MiB")
    if not args.keep:
        os.remove(path)
        os.rmdir(folder)


if __name__ == "__main__":
    main()
