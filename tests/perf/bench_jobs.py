"""Benchmark: tokens per second of one scan with ``--jobs 1`` and with ``--jobs 2`` on the same corpus, and the
speed-up.

    python tests/perf/bench_jobs.py [--shards 8] [--tokens 40000000] [--seq-len 2048] [--only RULES] [--keep DIR]

Writes ``--shards`` Parquet shards of packed windows (as tests/perf/bench_scan.py does, each with its own seed) of
``--tokens`` tokens each, reads them once to warm the page cache, then runs ``python -m lint scan`` on the folder
once with each number of jobs (all rules unless ``--only`` is given) and prints the wall-clock time of each run
(the whole command: start-up, scan, the cross-shard reduce and the report), the tokens per second and the ratio.
On a machine with two free cores the target is a speed-up of at least 1.6x. It then measures what a second process
can add on this machine at all (a CPU-bound numpy kernel run by one process, then by two at once), since on a
shared machine the second core is not always free.

The default corpus (8 shards of 40M tokens, 1.7 GB) takes about 20 s with one job: the command's start-up (about
0.5 s of imports) and the pool's start are the same for any corpus, and on a corpus scanned in 5 s (8 shards of
10M tokens) they keep the speed-up near 1.5x; on real corpora they are negligible.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile

import pyarrow.parquet as pq

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_scan import REPO, VOCAB, run_cli, write_shard  # noqa: E402


def timed_scan(folder: str, jobs: int, only: str | None) -> tuple[float, int]:
    """Wall-clock seconds of ``python -m lint scan folder --jobs N`` and the tokens it scanned."""
    out = os.path.join(folder, f"report-{jobs}.json")
    command = [sys.executable, "-m", "lint", "scan", folder, "--jobs", str(jobs), "--quiet",
               "--vocab-size", str(VOCAB), "--json", out]
    if only:
        command += ["--only", only]
    _, seconds = run_cli(command)
    with open(out) as fh:
        tokens = json.load(fh)["metrics"]["tokens"]
    os.remove(out)
    return seconds, tokens


#: A CPU-bound numpy kernel (MinHash signatures of random shingles, the heaviest step of a scan), run by one
#: process and then by two at once: how much a second process can add on this machine right now.
KERNEL = ("import time, numpy as np; from corpuscle.kernels.minhash import signatures; "
          "h = np.random.default_rng(1).integers(0, 2**32, 4_000_000, dtype=np.uint32); "
          "o = np.arange(0, 4_000_001, 2000); t = time.perf_counter(); signatures(h, o); signatures(h, o); "
          "print(time.perf_counter() - t)")


def machine_ceiling() -> float:
    """Throughput of two processes running the kernel at once over one process running it alone."""
    env = {**os.environ, "PYTHONPATH": REPO + os.pathsep + os.environ.get("PYTHONPATH", "")}
    command = [sys.executable, "-c", KERNEL]
    alone = float(subprocess.run(command, env=env, capture_output=True, text=True, check=True).stdout)
    pair = [subprocess.Popen(command, env=env, stdout=subprocess.PIPE, text=True) for _ in range(2)]
    together = max(float(p.communicate()[0]) for p in pair)
    return 2 * alone / together


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shards", type=int, default=8)
    parser.add_argument("--tokens", type=int, default=40_000_000, help="tokens per shard")
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--only", help="rules to run (comma-separated ids); default: all")
    parser.add_argument("--keep", help="folder to write the corpus into (kept); default: a temporary folder")
    args = parser.parse_args()
    folder = args.keep or tempfile.mkdtemp(prefix="corpuscle-bench-jobs-")
    os.makedirs(folder, exist_ok=True)
    try:
        for i in range(args.shards):
            path = os.path.join(folder, f"shard-{i:03d}.parquet")
            if not os.path.exists(path):
                write_shard(path, args.tokens, args.seq_len, seed=100 + i)
        for name in sorted(os.listdir(folder)):  # warm the page cache
            for _ in pq.ParquetFile(os.path.join(folder, name)).iter_batches(batch_size=4096):
                pass
        size = sum(os.path.getsize(os.path.join(folder, n)) for n in os.listdir(folder))
        one_s, tokens = timed_scan(folder, 1, args.only)
        two_s, tokens_2 = timed_scan(folder, 2, args.only)
        assert tokens == tokens_2, (tokens, tokens_2)
        print(f"corpus: {args.shards} shards, {tokens:,} tokens, {size / 1e6:,.0f} MB; rules: {args.only or 'all'}; "
              f"{os.cpu_count()} cores")
        print(f"--jobs 1 : {one_s:7.2f} s  {tokens / one_s / 1e6:6.1f} M tokens/s")
        print(f"--jobs 2 : {two_s:7.2f} s  {tokens / two_s / 1e6:6.1f} M tokens/s")
        print(f"speed-up : {one_s / two_s:7.2f} x")
        ceiling = machine_ceiling()
        print(f"machine  : {ceiling:7.2f} x  (two processes of a CPU-bound numpy kernel vs one, measured now; the "
              f"scan reaches {one_s / two_s / ceiling:.0%} of it)")
    finally:
        if not args.keep:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
