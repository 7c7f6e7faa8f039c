"""Benchmark: one large Parquet shard scanned with ``jobs=1`` (whole) and with ``jobs=2`` (split in two parts by
row group, see lint/split.py), the wall-clock time of each and the speed-up; the two reports must agree.

    python tests/perf/bench_split.py [--tokens 40000000] [--seq-len 2048] [--rows-per-group 1024] [--keep DIR]

The shard is written as tests/perf/bench_scan.py writes one (packed windows, many row groups) and read once to
warm the page cache.  The scans run every rule (each can join the parts of a shard) with the split threshold lowered
to 0, so the shard is split whatever its size.  Both scans keep to their number of cores: ``jobs=1`` decodes with one
Arrow thread, and each of the two processes of ``jobs=2`` with one.
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
sys.path.insert(0, REPO)
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import corpuscle.engine.split as split  # noqa: E402
from bench_scan import VOCAB, write_shard  # noqa: E402
from corpuscle import Settings  # noqa: E402
from corpuscle.engine.registry import registry  # noqa: E402
from corpuscle.engine.scan import run, select_rules  # noqa: E402
from corpuscle.io.sources import discover  # noqa: E402
from corpuscle.report.json import to_dict  # noqa: E402


def timed(path: str, jobs: int) -> tuple[float, dict]:
    # The duplicate rules compare windows: in their default document mode they cannot join parts, and a shard is
    # then read whole by one process (see the README's "Scaling out").
    settings = Settings(vocab_size=VOCAB, rule={"exact-duplicate": {"unit": "window"},
                                                "near-duplicate": {"unit": "window"}})
    shards = discover([path])
    started = time.perf_counter()
    report = run(shards, settings, select_rules(settings, registry()), jobs=jobs)
    seconds = time.perf_counter() - started
    out = to_dict(report)
    out["metrics"].pop("seconds")
    return seconds, out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tokens", type=int, default=40_000_000)
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--rows-per-group", type=int, default=1024)
    parser.add_argument("--keep", help="folder to write the shard into (kept); default: a temporary folder")
    args = parser.parse_args()
    folder = args.keep or tempfile.mkdtemp(prefix="corpuscle-bench-split-")
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(folder, "large.parquet")
    try:
        if not os.path.exists(path):
            write_shard(path, args.tokens, args.seq_len, args.rows_per_group)
        with open(path, "rb") as fh:  # warm the page cache
            while fh.read(64 << 20):
                pass
        split.SPLIT_BYTES = 0
        one, whole = timed(path, 1)
        two, parted = timed(path, 2)
        same = "identical" if whole == parted else "DIFFERENT"
        tokens = whole["metrics"]["tokens"]
        print(f"one shard, {tokens:,} tokens, {os.path.getsize(path) / 2**20:.0f} MiB: jobs=1 {one:.2f} s, "
              f"jobs=2 (split) {two:.2f} s, speed-up {one / two:.2f}x; reports {same}")
    finally:
        if not args.keep:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
