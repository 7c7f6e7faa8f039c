"""Benchmark: duplicate documents in a packed tokenized Parquet shard, against pyarrow just reading it.

    python tests/perf/bench_dedup.py [--tokens 50000000] [--seq-len 2048] [--duplicates 0.01] [--rules all|dedup]
                                     [--keep DIR]

Writes one shard of packed windows (input_ids, shifted labels, position_ids restarting at each document; int32
lists) of random documents (log-normal lengths, eos after each) with at least ``--tokens`` tokens, in which a share
``--duplicates`` of the documents are exact copies of earlier documents and the same share near copies (one token
in 200 changed, at least one), packed wherever they fall: at offsets unrelated to the windows, often running over two windows. Then
measures in this one run, ``--repeat`` times and alternating (the machine may be shared):
  (a) pyarrow reading the shard batch by batch with one thread (the scan's batch size), in a fresh process, timed
      around the read alone: the second, warm read of that process (the first is printed too; see bench_scan.py),
  (b) the whole scan command with ``--jobs 1`` (one core, one Arrow thread), ``--eos-id 2``, a drop list and a JSON
      report, from its start to its exit: all rules (``--rules all``, the default scan) or only near-duplicate and
      exact-duplicate (``--rules dedup``),
  (c) the ratio b / a of each run, their median and the highest,
  (d) the peak resident memory of the scanning process (VmHWM in /proc/self/status),
  (e) the planted near copies whose exact Jaccard similarity to their original (5-token shingles, Python sets) is
      at least 0.9, and how many of them the drop list names -- each at its first token (row, offset) -- with the
      original kept; the same for the exact copies.
The file is read once before timing so that both timings see a warm page cache.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

VOCAB, EOS = 50_000, 2
NEAR_SHARE = 200  # a near copy has one token in this many changed (at least one)
ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_scan import byte_compile, child_read, warm_page_cache, whole_scan  # noqa: E402  (the same measures)


def plant(tokens: int, duplicates: float, seed: int = 7):
    """The token stream of random documents with planted copies: ``(ids, starts, lengths, exact, near)`` where
    ``exact`` and ``near`` list ``(source, copy)`` document indices; every document ends in eos."""
    rng = np.random.default_rng(seed)
    lengths = np.clip(rng.lognormal(6.0, 1.0, size=tokens // 300 + 16).astype(np.int64), 8, 20_000)
    lengths = lengths[:int(np.searchsorted(np.cumsum(lengths), tokens)) + 1]
    count = len(lengths)
    chosen = rng.choice(np.arange(count // 10, count), size=2 * int(duplicates * count), replace=False)
    copies, nears = chosen[:len(chosen) // 2], chosen[len(chosen) // 2:]
    sources = {int(c): int(rng.integers(0, count // 10)) for c in chosen}  # an earlier document, never a copy
    for c, s in sources.items():
        lengths[c] = lengths[s]
    starts = np.concatenate(([0], np.cumsum(lengths)[:-1]))
    ids = rng.integers(3, VOCAB, size=int(lengths.sum()), dtype=np.int32)
    ids[starts + lengths - 1] = EOS
    for c in sorted(sources):
        s = sources[c]
        ids[starts[c]:starts[c] + lengths[c]] = ids[starts[s]:starts[s] + lengths[s]]
        if c in set(nears.tolist()):
            changes = min(max(1, int(lengths[c]) // NEAR_SHARE), lengths[c] - 1)
            where = starts[c] + rng.choice(lengths[c] - 1, size=changes, replace=False)
            ids[where] = rng.integers(VOCAB, 2 * VOCAB, size=len(where), dtype=np.int32)
    exact = [(sources[int(c)], int(c)) for c in copies]
    near = [(sources[int(c)], int(c)) for c in nears]
    return ids, starts, lengths, exact, near


def write_shard(path: str, ids: np.ndarray, starts: np.ndarray, seq_len: int, rows_per_group: int = 1024) -> int:
    total = len(ids) - len(ids) % seq_len  # whole windows only (the last document may be cut: it is not planted)
    positions = (np.arange(total) - np.repeat(starts, np.diff(np.append(starts, len(ids))))[:total]).astype(np.int32)
    labels = np.empty(total, dtype=np.int32)
    labels[:-1] = ids[1:total]
    labels[-1] = -100
    rows = total // seq_len
    labels.reshape(rows, seq_len)[:, -1] = -100
    list_type = pa.list_(pa.int32())
    schema = pa.schema([("input_ids", list_type), ("labels", list_type), ("position_ids", list_type)])
    with pq.ParquetWriter(path, schema) as writer:
        for r0 in range(0, rows, rows_per_group):
            r1 = min(rows, r0 + rows_per_group)
            offsets = pa.array(np.arange(0, (r1 - r0) * seq_len + 1, seq_len, dtype=np.int32))
            cols = [pa.ListArray.from_arrays(offsets, pa.array(a[r0 * seq_len:r1 * seq_len]))
                    for a in (ids, labels, positions)]
            writer.write_table(pa.table(cols, schema=schema))
    return rows


def shingle_set(doc: np.ndarray, n: int = 5) -> set:
    return {tuple(doc[i:i + n].tolist()) for i in range(len(doc) - n + 1)} if len(doc) >= n else {tuple(doc)}


def time_scan(path: str, rules: str, folder: str) -> tuple[float, float, int, dict]:
    """The whole scan command with ``--eos-id``, a drop list and a JSON report (for the figures): (wall, CPU,
    peak resident bytes, the duplicate rules' metrics)."""
    config = os.path.join(folder, "corpuscle.toml")
    with open(config, "w") as fh:
        fh.write("[rule.near-duplicate]\nmax_clusters = 1000000\n[rule.exact-duplicate]\nmax_clusters = 1000000\n")
    report = os.path.join(folder, "report.json")
    extra = ["--eos-id", str(EOS), "--config", config, "--drop-list", os.path.join(folder, "drop.jsonl"),
             "--json", report]
    if rules == "dedup":
        extra += ["--only", "near-duplicate,exact-duplicate"]
    wall, cpu, peak, _ = whole_scan(path, "all", tuple(extra))
    with open(report) as fh:
        metrics = json.load(fh)["metrics"]
    return wall, cpu, peak, {"near": metrics["nearDuplicates"], "exact": metrics["exactDuplicates"]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tokens", type=int, default=50_000_000)
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--duplicates", type=float, default=0.01, help="share of exact copies, and of near copies")
    parser.add_argument("--rules", choices=("all", "dedup"), default="all")
    parser.add_argument("--repeat", type=int, default=3, help="read and scan this many times each, alternating; "
                        "the fastest of each is compared")
    parser.add_argument("--keep", help="folder to write the shard into (kept); default: a temporary folder")
    args = parser.parse_args()
    folder = args.keep or tempfile.mkdtemp(prefix="corpuscle-bench-")
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(folder, "bench_dedup.parquet")
    ids, starts, lengths, exact, near = plant(args.tokens, args.duplicates)
    rows = write_shard(path, ids, starts, args.seq_len)
    tokens = rows * args.seq_len
    sys.path.insert(0, ROOT)
    from corpuscle.io.sources import DEFAULT_BATCH_TOKENS

    batch_rows = max(1, DEFAULT_BATCH_TOKENS // args.seq_len)
    warm_page_cache(path)
    byte_compile()
    drop_path = os.path.join(folder, "drop.jsonl")
    reads, scans, read_cpu, scan_cpu, firsts = [], [], [], [], []
    for _ in range(args.repeat):  # alternating, so that both see the same load of a shared machine
        first, _, wall, cpu = child_read(path, batch_rows)  # one thread, as the scan with --jobs 1 decodes
        reads.append(wall)
        read_cpu.append(cpu)
        firsts.append(first)
        scan_s, cpu, peak, figures = time_scan(path, args.rules, folder)
        scans.append(scan_s)
        scan_cpu.append(cpu)
    ratios = sorted(sc / rd for sc, rd in zip(scans, reads))
    read_s, scan_s = statistics.median(reads), statistics.median(scans)
    with open(drop_path) as fh:
        dropped = {(e["row"], e["offset"]): e for e in map(json.loads, fh)}
    inside = [(s, c) for s, c in exact + near if starts[c] + lengths[c] <= tokens]

    def found(pairs):
        hits = 0
        for s, c in pairs:
            entry = dropped.get(divmod(int(starts[c]), args.seq_len))
            if entry and (entry["kept"]["row"], entry["kept"]["offset"]) == divmod(int(starts[s]), args.seq_len):
                hits += 1
        return hits

    exact_in = [p for p in inside if p in set(exact)]
    strong = []
    for s, c in inside:
        if (s, c) in set(exact):
            continue
        a, b = shingle_set(ids[starts[s]:starts[s] + lengths[s]]), shingle_set(ids[starts[c]:starts[c] + lengths[c]])
        if len(a & b) / len(a | b) >= 0.9:
            strong.append((s, c))
    print(f"shard: {rows:,} windows x {args.seq_len} = {tokens:,} tokens, {len(starts):,} documents, "
          f"{os.path.getsize(path) / 1e6:,.0f} MB; planted {len(exact):,} exact and {len(near):,} near copies")
    what = "all rules (default scan)" if args.rules == "all" else "near-duplicate,exact-duplicate"
    print(f"    {args.repeat} alternating runs (warm reads {', '.join(f'{t:.2f}' for t in reads)} s, as the first read "
          f"of a process {', '.join(f'{t:.2f}' for t in firsts)} s; scan commands "
          f"{', '.join(f'{t:.2f}' for t in scans)} s)")
    print(f"(a) pyarrow read, one thread             : {read_s:8.2f} s  (median, warm)")
    print(f"(b) scan --jobs 1, {what:<22}: {scan_s:8.2f} s  (median, the whole command; "
          f"{tokens / scan_s / 1e6:,.1f} M tokens/s)")
    cpu = statistics.median(c / r for c, r in zip(scan_cpu, read_cpu))
    print(f"(c) ratio scan / read                    : {statistics.median(ratios):8.2f} x  (median of the runs; "
          f"highest {ratios[-1]:.2f}x; CPU time: median {cpu:.2f}x)")
    print(f"(d) peak memory of the scan              : {peak / 2**20:8.0f} MiB")
    print(f"(e) near copies with exact Jaccard >= 0.9: {len(strong):,}, in the drop list at their first token with "
          f"the original kept: {found(strong):,}; exact copies {len(exact_in):,}, found {found(exact_in):,}")
    near_figures = figures["near"]
    print(f"    near: {near_figures['clusters']:,} clusters, {near_figures['candidatePairs']:,} candidate / "
          f"{near_figures['verifiedPairs']:,} verified pairs, b x r = {near_figures['bands']} x "
          f"{near_figures['rowsPerBand']}, {near_figures['similarity']}")
    if not args.keep:
        os.remove(path)
        for name in ("drop.jsonl", "report.json", "corpuscle.toml"):
            os.remove(os.path.join(folder, name))
        os.rmdir(folder)


if __name__ == "__main__":
    main()
