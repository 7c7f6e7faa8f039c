"""Benchmark: eval-overlap with an evaluation set of 100k items against a text corpus.

    python tests/perf/bench_eval_overlap.py [--items 100000] [--item-words 60] [--docs 20000] [--doc-words 400]
                                            [--tokenized] [--keep DIR]

Writes an evaluation set (JSON Lines, ``--items`` items of about ``--item-words`` invented words) and a training
corpus (one Parquet file of ``--docs`` documents of about ``--doc-words`` words; 1% of the documents hold a
verbatim 40-word span of an item). Then measures in this one run, each in a child process (``--jobs 1``; scan times
are the report's own ``metrics.seconds``, without the interpreter's start):
  (a) building the evaluation set alone: reading, hashing and sorting its n-grams (the rule's begin on one shard),
      with the peak resident memory of that process (VmHWM) and the set's own size;
  (b) a scan with ``--only empty-document`` (reads the text, a trivial rule): the cost of reading;
  (c) a scan with ``--only eval-overlap --eval FILE``: the whole rule, building the set included;
  (a') a scan of a one-document shard with eval-overlap: the set's build as a scan does it;
  (d) the ratios c / b and (c - a') / b: what the comparison adds per byte of training text once the set is built;
  (e) with ``--tokenized``: the same corpus tokenized and packed, scanned with ``--tokenizer`` (rows decoded).
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def vocabulary(count: int, seed: int = 1) -> np.ndarray:
    """Invented words of 2 to 4 syllables (letters only)."""
    rng = np.random.default_rng(seed)
    onsets = np.array(list("bdfgklmnprstvz"))
    vowels = np.array(list("aeiou"))
    words = set()
    while len(words) < count:
        k = int(rng.integers(2, 5))
        words.add("".join(o + v for o, v in zip(rng.choice(onsets, k), rng.choice(vowels, k))))
    return np.array(sorted(words))


def texts(vocab: np.ndarray, count: int, words: int, rng) -> list[str]:
    lengths = rng.integers(words // 2, words * 3 // 2 + 1, count)
    flat = vocab[rng.integers(0, len(vocab), int(lengths.sum()))]
    cuts = np.cumsum(lengths)[:-1]
    return [" ".join(part) + "." for part in np.split(flat, cuts)]


def peak_kib() -> int:
    with open("/proc/self/status") as fh:
        return next(int(line.split()[1]) for line in fh if line.startswith("VmHWM"))


def rss_kib() -> int:
    with open("/proc/self/status") as fh:
        return next(int(line.split()[1]) for line in fh if line.startswith("VmRSS"))


def child_build(eval_path: str) -> None:
    """In a child process: build the evaluation set as the rule does, print seconds, peak memory and set size."""
    from corpuscle.rules.eval_overlap import load_eval_sets

    before = rss_kib()
    started = time.perf_counter()
    sets = load_eval_sets((eval_path,), 13, "text", "input_ids", None)
    seconds = time.perf_counter() - started
    print(json.dumps({"seconds": seconds, "peakKiB": peak_kib(), "beforeKiB": before, "setBytes": sets.grams.nbytes,
                      "ngrams": len(sets.grams), "items": sets.items}))


def timed_scan(args: list[str], folder: str) -> float:
    """Seconds the scan itself took (the report's ``metrics.seconds``: without the interpreter's start)."""
    report = os.path.join(folder, "report.json")
    args = [*args, "--json", report]
    code = "import sys; from corpuscle.cli import main; sys.exit(main())"
    done = subprocess.run([sys.executable, "-c", code, "scan", *args, "--jobs", "1", "--quiet", "--fail-at",
                           "never"], capture_output=True, text=True)
    if done.returncode != 0 or "corpuscle" not in done.stdout:
        raise SystemExit(done.stderr or done.stdout)
    with open(report) as fh:
        return float(json.load(fh)["metrics"]["seconds"])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--items", type=int, default=100_000)
    parser.add_argument("--item-words", type=int, default=60)
    parser.add_argument("--docs", type=int, default=20_000)
    parser.add_argument("--doc-words", type=int, default=400)
    parser.add_argument("--tokenized", action="store_true",
                        help="also tokenize the corpus with a byte-level BPE tokenizer of 4,096 tokens trained here "
                             "(needs the tokenizers library), pack it into 2,048-token windows and scan that")
    parser.add_argument("--keep", help="folder to write the files to (kept); default a temporary folder")
    parser.add_argument("--child-build", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child_build:
        child_build(args.child_build)
        return
    folder = args.keep or tempfile.mkdtemp(prefix="bench-eval-")
    os.makedirs(folder, exist_ok=True)
    rng = np.random.default_rng(7)
    vocab = vocabulary(20_000)
    items = texts(vocab, args.items, args.item_words, rng)
    docs = texts(vocab, args.docs, args.doc_words, rng)
    planted = rng.choice(args.docs, args.docs // 100, replace=False)
    for d in planted.tolist():  # a verbatim 40-word span of an item in the middle of the document
        span = " ".join(items[d % len(items)].split(" ")[:40])
        words = docs[d].split(" ")
        docs[d] = " ".join(words[:len(words) // 2] + [span] + words[len(words) // 2:])
    eval_path = os.path.join(folder, "eval.jsonl")
    with open(eval_path, "w") as fh:
        fh.writelines(json.dumps({"text": t}) + "\n" for t in items)
    shard = os.path.join(folder, "train.parquet")
    pq.write_table(pa.table({"text": docs}), shard, row_group_size=2000)
    mb = os.path.getsize(shard) / 2 ** 20
    words = sum(len(d.split(" ")) for d in docs)
    print(f"evaluation set: {args.items:,} items, {os.path.getsize(eval_path) / 2 ** 20:.1f} MiB; training: "
          f"{args.docs:,} documents, {words:,} words, {mb:.1f} MiB Parquet; {len(planted):,} documents hold an item")

    built = subprocess.run([sys.executable, __file__, "--child-build", eval_path], capture_output=True, text=True)
    if built.returncode != 0:
        raise SystemExit(built.stderr)
    build = json.loads(built.stdout)
    print(f"(a) evaluation set built in {build['seconds']:.2f} s: {build['ngrams']:,} 13-grams, set "
          f"{build['setBytes'] / 2 ** 20:.0f} MiB, peak memory of the process {build['peakKiB'] / 1024:.0f} MiB "
          f"({build['beforeKiB'] / 1024:.0f} MiB before reading the set)")
    tiny = os.path.join(folder, "one.parquet")
    pq.write_table(pa.table({"text": docs[:1]}), tiny)
    timed_scan([shard, "--only", "empty-document"], folder)  # warm the page cache
    alone = timed_scan([tiny, "--only", "eval-overlap", "--eval", eval_path], folder)
    read = timed_scan([shard, "--only", "empty-document"], folder)
    full = timed_scan([shard, "--only", "eval-overlap", "--eval", eval_path], folder)
    print(f"(a') a scan of a one-document shard with eval-overlap (the set's build inside a scan): {alone:.2f} s")
    print(f"(b) scan reading the text (--only empty-document): {read:.2f} s")
    print(f"(c) scan with eval-overlap: {full:.2f} s")
    past = full - alone
    print(f"(d) c / b = {full / read:.2f}x; past the build (c - a') {past:.2f} s: "
          + (f"{past / read:.2f}x the read, {words / past / 1e6:.1f}M training words/s" if past > 0 else
             "too noisy to say (run again)"))
    if args.tokenized:
        tokenized(folder, docs, eval_path, words, alone, full)


def tokenized(folder: str, docs: list[str], eval_path: str, words: int, build: float, text_scan: float) -> None:
    """(e) the same corpus tokenized and packed, scanned with --tokenizer (its rows decoded to words)."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers

    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    tok.train_from_iterator(docs[:2000], trainers.BpeTrainer(vocab_size=4096, special_tokens=["<pad>", "<s>", "</s>"],
                                                             show_progress=False))
    tok_path = os.path.join(folder, "tokenizer.json")
    tok.save(tok_path)
    flat = np.concatenate([np.append(np.asarray(e.ids, dtype=np.int32), np.int32(2))
                           for e in tok.encode_batch(docs, add_special_tokens=False)])
    windows = len(flat) // 2048
    offsets = pa.array(np.arange(0, windows * 2048 + 1, 2048, dtype=np.int32))
    shard = os.path.join(folder, "train_tokens.parquet")
    pq.write_table(pa.table({"input_ids": pa.ListArray.from_arrays(offsets, pa.array(flat[:windows * 2048]))}),
                   shard, row_group_size=256)
    seconds = timed_scan([shard, "--only", "eval-overlap", "--eval", eval_path, "--tokenizer", tok_path,
                          "--eos-id", "2"], folder)
    past, text_past = seconds - build, text_scan - build
    print(f"(e) the corpus tokenized ({len(flat):,} tokens in {windows:,} windows of 2,048), scanned with "
          f"--tokenizer: {seconds:.2f} s" + (f", {words / past / 1e6:.1f}M words/s past the set's build, "
                                              f"{past / text_past:.2f}x the text scan past the build"
                                              if past > 0 and text_past > 0 else ""))


if __name__ == "__main__":
    main()
