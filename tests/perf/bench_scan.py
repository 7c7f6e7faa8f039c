"""Benchmark: the whole scan command on a generated tokenized Parquet shard against pyarrow just reading it.

    python tests/perf/bench_scan.py [--tokens 50000000] [--seq-len 2048] [--rules token|all] [--repeat 5] [--keep DIR]

Writes one shard of packed windows (input_ids, shifted labels, position_ids; int32 lists) with at least
``--tokens`` tokens, then measures, ``--repeat`` times and alternating so that both see the same load of a shared
machine:
  (a) pyarrow reading the shard batch by batch with one thread (all columns, the scan's batch size), in a fresh
      process, timed around the read alone (the process's start and imports left out): twice, and the second read is
      the one compared (pyarrow's memory pool is warm then: the lowest cost of decoding the shard; the first read of
      a process is printed too);
  (b) the whole command ``python -m corpuscle scan --jobs 1 --vocab-size 50000 SHARD`` (one core, one Arrow thread),
      timed from its start to its exit: interpreter start, imports (of byte-compiled modules, as pip installs
      them), scan, reduce and the summary included. With
      ``--rules all`` every rule runs (the default scan: the duplicate rules compare the shard's documents); with
      ``--rules token`` only the token-structure rules;
  (c) the ratio b / a of each pair (the whole command against the warm read alone: the strict comparison), their
      median and the highest, and the same for CPU time (user + system, what each
      process itself used: less sensitive to the other processes of a shared machine than the wall clock);
  (d) the peak resident memory of the scanning process.
The file is read once before timing so that every timing sees a warm page cache.
"""
from __future__ import annotations

import argparse
import os
import statistics
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


def child_read(path: str, batch_size: int) -> tuple[float, float, float, float]:
    """(wall, CPU) seconds of a one-thread read of the shard in a fresh process, timed around the read alone: the
    first read of the process (what a one-off read job costs) and a second one right after it (warm: pyarrow's
    memory pool already holds the pages it needs, the lowest cost of decoding the shard)."""
    code = ("import resource, time, pyarrow.parquet as pq\n"
            "def cpu():\n    r = resource.getrusage(resource.RUSAGE_SELF)\n    return r.ru_utime + r.ru_stime\n"
            "out = []\n"
            "for _ in range(2):\n"
            "    c = cpu(); t = time.perf_counter()\n"
            f"    for _ in pq.ParquetFile({path!r}).iter_batches(batch_size={batch_size}, use_threads=False):\n"
            "        pass\n"
            "    out += [time.perf_counter() - t, cpu() - c]\n"
            "print(*out)")
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True).stdout.split()
    return tuple(float(x) for x in out)


def warm_page_cache(path: str) -> None:
    """Read the file's bytes once (not decoded: this process stays small, and a child it starts does not inherit
    pages that would count in its peak memory)."""
    with open(path, "rb") as fh:
        while fh.read(1 << 24):
            pass


#: Runs ``python -m corpuscle`` with the given arguments and, at exit, writes the process's peak resident memory
#: (VmHWM: counted from the exec, so nothing of the benchmark's own memory) to stderr.
_CLI = ("import atexit, runpy, sys\n"
        "def peak():\n"
        "    with open('/proc/self/status') as fh:\n"
        "        sys.stderr.write('VmHWM ' + [l.split()[1] for l in fh if l.startswith('VmHWM')][0] + '\\n')\n"
        "atexit.register(peak)\n"
        "sys.argv = ['corpuscle', *sys.argv[1:]]\n"
        "runpy.run_module('corpuscle', run_name='__main__', alter_sys=True)\n")


def whole_scan(path: str, rules: str, extra: tuple = ()) -> tuple[float, float, int, int]:
    """(wall, CPU seconds, peak resident bytes, exit status) of the whole scan command, start to exit:
    ``python -m corpuscle scan --jobs 1 --vocab-size 50000 [extra] SHARD``."""
    command = [sys.executable, "-c", _CLI, "scan", "--jobs", "1", "--vocab-size", str(VOCAB), *extra, path]
    if rules == "token":
        command[-1:-1] = ["--only", RULES]
    env = {**os.environ, "PYTHONPATH": REPO + os.pathsep + os.environ.get("PYTHONPATH", "")}
    env.pop("PYTHONDONTWRITEBYTECODE", None)  # byte-compiled modules are used, as in an installed package
    started = time.perf_counter()
    child = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(child.pid, 0)
    wall = time.perf_counter() - started
    code = os.waitstatus_to_exitcode(status)
    err = child.stderr.read().decode(errors="replace")
    child.stderr.close()
    if code not in (0, 1):
        raise SystemExit(f"the scan failed (exit {code}): {err}")
    peak = [int(line.split()[1]) * 1024 for line in err.splitlines() if line.startswith("VmHWM ")]
    return wall, usage.ru_utime + usage.ru_stime, peak[-1] if peak else 0, code


def byte_compile() -> None:
    """Byte-compile the package once, as pip does when it installs it (a checkout run with PYTHONDONTWRITEBYTECODE
    would otherwise compile every module at every start: about 0.1 s)."""
    subprocess.run([sys.executable, "-m", "compileall", "-q", os.path.join(REPO, "lint"), os.path.join(REPO, "rules")],
                   check=True, stdout=subprocess.DEVNULL)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tokens", type=int, default=50_000_000)
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--rules", choices=("token", "all"), default="token",
                        help="token: the token-structure rules (default); all: every rule, the default scan")
    parser.add_argument("--repeat", type=int, default=5, help="read and scan this many times each, alternating")
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
    sys.path.insert(0, REPO)
    from corpuscle.io.sources import DEFAULT_BATCH_TOKENS

    batch_rows = max(1, DEFAULT_BATCH_TOKENS // args.seq_len)
    warm_page_cache(path)
    byte_compile()
    runs = []
    for _ in range(args.repeat):
        first_wall, first_cpu, read_wall, read_cpu = child_read(path, batch_rows)
        scan_wall, scan_cpu, peak, _ = whole_scan(path, args.rules)
        runs.append((read_wall, read_cpu, scan_wall, scan_cpu, peak, first_wall))
    print(f"shard: {rows:,} windows x {args.seq_len} = {tokens:,} tokens, {os.path.getsize(path) / 1e6:,.0f} MB; "
          f"rules: {args.rules}")
    for i, (rw, rc, sw, sc, _, fw) in enumerate(runs, 1):
        print(f"  run {i}: read {rw:.2f} s warm (CPU {rc:.2f}; {fw:.2f} s as the first read of its process), "
              f"scan command {sw:.2f} s (CPU {sc:.2f}): {sw / rw:.2f}x (CPU {sc / rc:.2f}x; {sw / fw:.2f}x the "
              "first read)")
    wall = sorted(r[2] / r[0] for r in runs)
    cpu = sorted(r[3] / r[1] for r in runs)
    first = sorted(r[2] / r[5] for r in runs)
    scan_s = statistics.median(r[2] for r in runs)
    print(f"(a) pyarrow read, one thread     : {statistics.median(r[0] for r in runs):8.2f} s  (median, warm; as the "
          f"first read of a process {statistics.median(r[5] for r in runs):.2f} s)")
    print(f"(b) whole scan command, --jobs 1 : {scan_s:8.2f} s  (median; {tokens / scan_s / 1e6:,.1f} M tokens/s)")
    print(f"(c) ratio scan / warm read       : {statistics.median(wall):8.2f} x  (median; highest {wall[-1]:.2f}x; "
          f"CPU time: median {statistics.median(cpu):.2f}x, highest {cpu[-1]:.2f}x; against the first read: median "
          f"{statistics.median(first):.2f}x)")
    print(f"(d) peak memory of the scan      : {max(r[4] for r in runs) / 2**20:8.0f} MiB")
    if not args.keep:
        os.remove(path)
        os.rmdir(folder)


if __name__ == "__main__":
    main()
