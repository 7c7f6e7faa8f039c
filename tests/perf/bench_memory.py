"""Benchmark: the peak memory of a scan does not grow with the size of the shard.

    python tests/perf/bench_memory.py [--sizes-mb 1024,4096] [--seq-len 2048] [--only RULES] [--keep DIR]

For each size, writes one tokenized Parquet shard of packed windows (as tests/perf/bench_scan.py does) of about that
many megabytes, scans it with the whole command ``python -m corpuscle scan --jobs 1 --quiet SHARD`` (all rules
unless ``--only`` is given; :func:`bench_scan.whole_scan`) and reads the peak resident memory of that child
process (``VmHWM`` from its ``/proc/self/status``, read as it exits: unlike ``ru_maxrss`` it does not carry over
the peak of the process that started it). The reader reads a batch of about ``DEFAULT_BATCH_TOKENS`` tokens at a
time, so both peaks should be about equal; what grows with the shard is the per-unit state of the duplicate rules
(29 bytes per document kept, more while the corpus-wide steps run; shingle hashes and band keys on disk); the last line gives the growth between the smallest and the largest shard in
bytes per window. The shards are deleted afterwards unless ``--keep`` is given.
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile

import pyarrow.parquet as pq

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_scan import whole_scan, write_shard  # noqa: E402

#: Bytes per token of a shard written by bench_scan.write_shard (three int32 columns, snappy): measured once on a
#: 10M-token shard, used only to aim at the size asked for.
BYTES_PER_TOKEN = 5.4


def peak_of_scan(path: str, only: str | None) -> tuple[int, float]:
    """Peak resident memory in bytes of the process scanning ``path``, and its wall-clock seconds."""
    extra = ("--quiet",) + (("--only", only) if only else ())
    seconds, _, peak, _ = whole_scan(path, "all", extra)
    if not peak:
        raise SystemExit("the scan reported no peak memory")
    return peak, seconds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes-mb", default="1024,4096", help="shard sizes to write, in MB (comma-separated)")
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--only", help="rules to run (comma-separated ids); default: all")
    parser.add_argument("--keep", help="folder to write the shards into (kept); default: a temporary folder")
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes_mb.split(",")]
    folder = args.keep or tempfile.mkdtemp(prefix="corpuscle-bench-memory-")
    os.makedirs(folder, exist_ok=True)
    free = shutil.disk_usage(folder).free
    if sum(sizes) * 1e6 * 1.1 > free:
        raise SystemExit(f"not enough room under {folder}: {sum(sizes):,} MB asked, {free / 1e6:,.0f} MB free; "
                         "give smaller --sizes-mb")
    try:
        lines, measured = [], []
        for size in sizes:
            path = os.path.join(folder, f"shard-{size}mb.parquet")
            if not os.path.exists(path):
                write_shard(path, int(size * 1e6 / BYTES_PER_TOKEN), args.seq_len)
            meta = pq.ParquetFile(path).metadata
            tokens = meta.num_rows * args.seq_len
            peak, seconds = peak_of_scan(path, args.only)
            lines.append(f"{os.path.getsize(path) / 1e6:8,.0f} MB  {tokens / 1e6:7,.0f} M tokens  "
                         f"{meta.num_rows:9,} windows  peak {peak / 2**20:7,.0f} MiB  ({seconds:.1f} s)")
            measured.append((meta.num_rows, peak))
            if not args.keep:
                os.remove(path)
        print(f"scan with --jobs 1, rules: {args.only or 'all'}")
        print("\n".join(lines))
        (few, low), (many, high) = min(measured), max(measured)
        if many > few:
            # What the peak gained per window the larger shard has more (the per-window state, and noise: the peak
            # of one run varies by some MiB with the allocators' timing).
            print(f"growth: {(high - low) / 2**20:+,.0f} MiB for {many - few:,} more windows, "
                  f"{(high - low) / (many - few):+,.0f} bytes per window")
    finally:
        if not args.keep:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
