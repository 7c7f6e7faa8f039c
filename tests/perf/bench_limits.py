"""Peak memory of the whole process tree (this command and its pool) for inputs built to exhaust it, and the time
to read one long JSON line of 4x the length of another (linear reading: about 4x).

    python tests/perf/bench_limits.py [--folder DIR] [--jobs 2]

Peak memory is the sum of the resident set sizes of the command and every process below it, sampled every 50 ms
from /proc (Linux); figures are ratios and sizes measured in one run on this machine.
"""
from __future__ import annotations

import argparse
import gzip
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

CORPUSCLE = os.path.join(os.path.dirname(sys.executable), "corpuscle")


def build(folder: str) -> dict[str, str]:
    cases = {}
    ids = pa.array(np.zeros(100_000_000, dtype=np.int64))
    path = os.path.join(folder, "long_row.parquet")
    pq.write_table(pa.table({"input_ids": pa.ListArray.from_arrays(pa.array([0, len(ids)], pa.int32()), ids)}),
                   path, compression="zstd")
    cases["one Parquet row of 100M ids"] = path
    del ids
    path = os.path.join(folder, "bomb.jsonl.gz")
    with gzip.open(path, "wb", compresslevel=9) as fh:
        fh.write(b'{"text": "')
        for _ in range(256):
            fh.write(b"a" * (1 << 20))
        fh.write(b'"}\n')
    cases["a .jsonl.gz line inflating to 256 MiB"] = path
    path = os.path.join(folder, "keys.jsonl")
    with open(path, "w") as fh:
        fh.writelines(json.dumps({f"k{i}": i}) + "\n" for i in range(60_000))
    cases["60,000 lines, a distinct key each"] = path
    path = os.path.join(folder, "deep.jsonl")
    with open(path, "w") as fh:
        fh.writelines(['{"a":' * 1000 + "1" + "}" * 1000 + "\n"] * 100)
    cases["100 lines of 1000-deep objects"] = path
    return cases


def peak(args: list[str]) -> tuple[int, float, int]:
    """(exit status, seconds, peak MiB of the process tree)."""
    started = time.perf_counter()
    process = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    top = 0
    while process.poll() is None:
        top = max(top, tree_rss(process.pid))
        time.sleep(0.05)
    return process.returncode, time.perf_counter() - started, top >> 20


def tree_rss(root: int) -> int:
    parent, rss = {}, {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat", "rb") as fh:
                    fields = fh.read().rsplit(b")", 1)[1].split()
                parent[int(entry)] = int(fields[1])
                rss[int(entry)] = int(fields[21]) * os.sysconf("SC_PAGE_SIZE")
            except (OSError, IndexError, ValueError):
                pass
    total, todo = 0, [root]
    while todo:
        pid = todo.pop()
        total += rss.get(pid, 0)
        todo += [child for child, up in parent.items() if up == pid]
    return total


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--folder", help="where to build the inputs (default: a temporary folder)")
    parser.add_argument("--jobs", type=int, default=2)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as scratch:
        folder = args.folder or scratch
        for name, path in build(folder).items():
            status, seconds, mib = peak([CORPUSCLE, "scan", path, "--jobs", str(args.jobs), "--quiet"])
            print(f"{name}: exit {status}, peak {mib} MiB, {seconds:.1f} s")
        config = os.path.join(folder, "limits.toml")
        with open(config, "w") as fh:
            fh.write(f"max_record_bytes = {1 << 30}\n")
        times = []
        for size in (16, 16 << 20, 64 << 20):  # 16 bytes: the command's start-up alone
            path = os.path.join(folder, f"line{size}.jsonl")
            with open(path, "wb") as fh:
                fh.write(b'{"note": "' + b"b" * size + b'"}\n')
            times.append(peak([CORPUSCLE, "scan", path, "--jobs", "1", "--quiet", "--only", "unreadable-record",
                               "--config", config])[1])
        start, short, long = times
        print(f"one JSON line of 64 MiB vs 16 MiB, less the start-up ({start:.2f} s): {long - start:.2f} s vs "
              f"{short - start:.2f} s, {(long - start) / (short - start):.1f}x (linear reading: about 4x)")


if __name__ == "__main__":
    main()
