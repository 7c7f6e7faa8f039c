"""Benchmark: a scan on a Dask LocalCluster against the same scan on the local process pool.

    python tests/perf/bench_cluster.py [--tokens 40000000] [--shards 8] [--seq-len 2048] [--workers 2]
                                       [--duplicates 0.02] [--only RULE,...] [--keep DIR]

Needs the cluster extra (pip install '.[cluster]'). Writes ``--shards`` Parquet shards of windows of random token
ids (input_ids, int32 lists; ``--tokens`` tokens in all) in which a share ``--duplicates`` of the windows are
exact copies of windows of earlier shards and the same share near copies (10 tokens changed: Jaccard similarity
about 0.95 over 5-token shingles), so that the keyed reduce of near-duplicate has clusters across shards. Then
measures, one run each, all rules (or ``--only``):
  (a) the local pool: ``run(..., executor=LocalExecutor(--workers))``, the pool's start included;
  (b) a Dask ``LocalCluster`` of ``--workers`` processes: the scan, with the cluster already started (its start
      is printed apart);
  (c) the ratio b / a;
and checks that both give the same findings and figures. The shards are read once before timing so that both
timings see a warm page cache.
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

VOCAB = 50_000
NEAR_CHANGES = 10
ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def write_corpus(folder: str, tokens: int, shards: int, seq_len: int, duplicates: float, seed: int = 7) -> list:
    """Shards of random windows with planted exact and near copies of windows of earlier shards; returns their
    paths."""
    rng = np.random.default_rng(seed)
    rows = max(1, -(-tokens // (seq_len * shards)))
    schema = pa.schema([("input_ids", pa.list_(pa.int32()))])
    earlier = None
    paths = []
    for s in range(shards):
        ids = rng.integers(3, VOCAB, size=(rows, seq_len), dtype=np.int32)
        if earlier is not None:
            planted = rng.choice(rows, size=min(rows, 2 * int(duplicates * rows)), replace=False)
            copies, nears = planted[: len(planted) // 2], planted[len(planted) // 2:]
            ids[copies] = earlier[rng.integers(0, len(earlier), len(copies))]
            ids[nears] = earlier[rng.integers(0, len(earlier), len(nears))]
            changed = rng.integers(0, seq_len, size=(len(nears), NEAR_CHANGES))
            ids[nears[:, None], changed] = rng.integers(VOCAB, 2 * VOCAB, size=changed.shape, dtype=np.int32)
        offsets = pa.array(np.arange(0, rows * seq_len + 1, seq_len, dtype=np.int32))
        path = os.path.join(folder, f"part-{s:03d}.parquet")
        pq.write_table(pa.table([pa.ListArray.from_arrays(offsets, pa.array(ids.ravel()))], schema=schema), path,
                       row_group_size=1024)
        paths.append(path)
        earlier = ids
    return paths


def comparable(report) -> tuple:
    found = [(f.rule_id, f.kind, f.uri, f.count, f.instances(), f.evidence) for f in report.findings]
    return found, {k: v for k, v in report.metrics.items() if k != "seconds"}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tokens", type=int, default=40_000_000)
    parser.add_argument("--shards", type=int, default=8)
    parser.add_argument("--seq-len", type=int, default=2048)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--duplicates", type=float, default=0.02, help="share of exact copies, and of near copies")
    parser.add_argument("--only", default="", help="comma-separated rule ids (default: all rules)")
    parser.add_argument("--keep", help="folder to write the shards into (kept); default: a temporary folder")
    args = parser.parse_args()
    sys.path.insert(0, ROOT)
    from corpuscle import Settings
    from corpuscle.engine.executors import DaskExecutor, LocalExecutor
    from corpuscle.engine.registry import registry
    from corpuscle.engine.scan import run, select_rules
    from corpuscle.io.sources import discover

    folder = args.keep or tempfile.mkdtemp(prefix="corpuscle-bench-")
    os.makedirs(folder, exist_ok=True)
    paths = write_corpus(folder, args.tokens, args.shards, args.seq_len, args.duplicates)
    for path in paths:  # warm the page cache
        pq.read_table(path)
    settings = Settings(only=tuple(r for r in args.only.split(",") if r))
    shards = discover(paths)

    started = time.perf_counter()
    local = run(shards, settings, select_rules(settings, registry()), executor=LocalExecutor(args.workers))
    local_s = time.perf_counter() - started

    started = time.perf_counter()
    with DaskExecutor("local", jobs=args.workers) as cluster:
        up_s = time.perf_counter() - started
        started = time.perf_counter()
        remote = run(shards, settings, select_rules(settings, registry()), executor=cluster)
        cluster_s = time.perf_counter() - started
        where = cluster.describe()

    tokens = local.metrics["tokens"]
    near = local.metrics.get("nearDuplicates", {})
    print(f"corpus: {len(shards)} shards, {local.metrics['rows']:,} windows, {tokens:,} tokens, "
          f"{sum(s.length for s in shards) / 1e6:,.0f} MB; near-duplicate clusters {near.get('clusters', '-')}, "
          f"exact-duplicate groups {local.metrics.get('exactDuplicates', {}).get('groups', '-')}")
    print(f"{f'(a) local pool, {args.workers} processes':<36}: {local_s:8.2f} s  ({tokens / local_s / 1e6:,.1f} M tokens/s)")
    print(f"{f'(b) Dask LocalCluster, {args.workers} workers':<36}: {cluster_s:8.2f} s  "
          f"({tokens / cluster_s / 1e6:,.1f} M tokens/s; {where}, started in {up_s:.2f} s)")
    print(f"{'(c) ratio cluster / pool':<36}: {cluster_s / local_s:8.2f} x")
    print(f"{'    same findings and figures':<36}: {'yes' if comparable(local) == comparable(remote) else 'NO'}")
    if not args.keep:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
