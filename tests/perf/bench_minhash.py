"""Benchmark: MinHash signatures per second for 2,048-token windows.

Run by hand (pytest does not collect it):

    python tests/perf/bench_minhash.py [--windows 1024] [--reference-windows 48]

Compares, in one run on the same machine:

* ours: ``shingle_hashes`` + ``signatures`` over a batch of windows;
* datasketch 2.0.0 ``MinHash(scheme="affine32").update_batch`` with
  ``shingle_hash`` as its Python-level ``hashfunc`` (the shingle tuples are
  built before the clock starts);
* datasketch again with the shingle hashes computed beforehand and ``int`` as
  its ``hashfunc``, which isolates its numpy part.

Each figure is the best of three rounds. The reference windows are checked to
give bit-identical signatures before anything is printed.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from datasketch import MinHash

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from corpuscle.kernels.minhash import shingle_hash, shingle_hashes, signatures  # noqa: E402

WINDOW = 2048
N = 5
NUM_PERM = 128
SEED = 1


def best_of(rounds: int, work) -> float:
    best = float("inf")
    for _ in range(rounds):
        start = time.perf_counter()
        work()
        best = min(best, time.perf_counter() - start)
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--windows", type=int, default=1024, help="windows for our batch path")
    parser.add_argument("--reference-windows", type=int, default=48, help="windows for datasketch")
    args = parser.parse_args()

    rng = np.random.default_rng(0)
    values = rng.integers(0, 50_000, args.windows * WINDOW, dtype=np.int32)
    offsets = np.arange(args.windows + 1, dtype=np.int64) * WINDOW

    def ours():
        return signatures(*shingle_hashes(values, offsets, N), num_perm=NUM_PERM, seed=SEED)

    reference_windows = [values[i * WINDOW : (i + 1) * WINDOW].tolist() for i in range(args.reference_windows)]
    shingles = [[tuple(w[i : i + N]) for i in range(WINDOW - N + 1)] for w in reference_windows]
    prehashed = [[shingle_hash(s) for s in window] for window in shingles]

    def datasketch(batches, hashfunc):
        out = []
        for batch in batches:
            sketch = MinHash(num_perm=NUM_PERM, seed=SEED, hashfunc=hashfunc, scheme="affine32")
            sketch.update_batch(batch)
            out.append(sketch.hashvalues)
        return out

    result = ours()
    reference = datasketch(shingles, shingle_hash)
    if not np.array_equal(result[: args.reference_windows], np.array(reference)):
        raise SystemExit("signatures differ from datasketch: fix that before measuring speed")

    ours_rate = args.windows / best_of(3, ours)
    full_rate = args.reference_windows / best_of(3, lambda: datasketch(shingles, shingle_hash))
    numpy_rate = args.reference_windows / best_of(3, lambda: datasketch(prehashed, int))

    print(f"windows of {WINDOW} tokens, {N}-token shingles, num_perm={NUM_PERM}, seed={SEED}")
    print(f"ours (shingle_hashes + signatures):         {ours_rate:10.0f} windows/s")
    print(f"datasketch update_batch, hashfunc in Python: {full_rate:10.0f} windows/s")
    print(f"datasketch update_batch, hashes precomputed: {numpy_rate:10.0f} windows/s")
    print(f"ratio vs datasketch with its hashfunc:       {ours_rate / full_rate:10.1f}x")
    print(f"ratio vs datasketch's numpy part alone:      {ours_rate / numpy_rate:10.1f}x")


if __name__ == "__main__":
    main()
