"""Progress: the engine reports every batch (rows, tokens, bytes of the file consumed) and every finished shard, from
this process and from the processes of a pool; the command line draws it on stderr when stderr is a terminal, and
never when it is a pipe or with --quiet.

The terminal is a real pseudo-terminal (stdlib ``pty``): ``python -m lint scan`` runs with its stderr on the
terminal's slave side, and the test reads what arrives on the master side. Byte counts are checked against
pyarrow's Parquet metadata and the sizes of the files on disk.
"""
from __future__ import annotations

import os
import re
import subprocess
import sys

import pyarrow.parquet as pq
import pytest
from corpuscle.engine.progress import Progress, TerminalProgress, _short
from corpuscle.engine.registry import registry
from corpuscle.engine.scan import run
from corpuscle.io.sources import discover
from corpuscle.settings import Settings

from tests.shards import REPO, pack, write

DOCS = [[10 + (i * 7) % 50, 11 + (i * 3) % 40, 12 + i % 30] for i in range(400)]
GROUPS = 5


def shard(path):
    """400 documents of 3 tokens + eos packed into 200 windows of 8 tokens, in GROUPS row groups of 40 rows."""
    return write(path, pack(DOCS, 8, eos=2), row_group_size=40)


class Recorder(Progress):
    """Keeps every event, in the order heard."""

    def __init__(self):
        self.events = []

    def start(self, shards):
        self.events.append(("start", tuple(s.uri for s in shards)))

    def batch(self, uri, rows, tokens, nbytes):
        self.events.append(("batch", uri, rows, tokens, nbytes))

    def shard_done(self, uri, rows, tokens):
        self.events.append(("done", uri, rows, tokens))

    def close(self):
        self.events.append(("close",))


def row_group_bytes(path) -> list[int]:
    """Compressed size of each row group, from the Parquet metadata (pyarrow)."""
    meta = pq.ParquetFile(path).metadata
    return [sum(meta.row_group(g).column(c).total_compressed_size for c in range(meta.row_group(g).num_columns))
            for g in range(meta.num_row_groups)]


@pytest.mark.parametrize("jobs", [1, 2])
def test_every_batch_and_every_shard_is_reported_from_this_process_and_from_a_pool(tmp_path, jobs):
    paths = [shard("d/a.parquet"), shard("d/b.parquet")]
    recorder = Recorder()
    rules = [registry()["missing-separator"]()]
    report = run(discover(["d"]), Settings(eos_id=2), rules, jobs=jobs, progress=recorder)
    events = recorder.events
    assert events[0] == ("start", ("d/a.parquet", "d/b.parquet")) and events[-1] == ("close",)
    for path in paths:
        mine = [e for e in events if e[0] in ("batch", "done") and e[1] == path]
        # One batch per row group of 40 rows x 8 tokens, then the end of the shard: per batch, not per shard.
        assert [e[2:4] for e in mine[:-1]] == [(40, 320)] * GROUPS
        assert mine[-1] == ("done", path, 200, 1600)
        assert [e[4] for e in mine[:-1]] == row_group_bytes(path)
    assert report.metrics["rows"] == 400


@pytest.mark.parametrize("name", ["t.jsonl", "t.jsonl.gz", "t.jsonl.zst"])
def test_json_lines_bytes_are_counted_as_stored(tmp_path, name):
    path = write(name, pack(DOCS, 8, eos=2))
    recorder = Recorder()
    run(discover([path]), Settings(eos_id=2), [registry()["missing-separator"]()], progress=recorder)
    batches = [e for e in recorder.events if e[0] == "batch"]
    # The whole file is read in one block here, so the bytes consumed are the file's size on disk (compressed for
    # .gz and .zst).
    assert sum(e[4] for e in batches) == os.path.getsize(path)
    assert sum(e[2] for e in batches) == 200 and sum(e[3] for e in batches) == 1600


def test_the_terminal_display_counts_shards_tokens_and_rate(tmp_path):
    out = tmp_path / "err.txt"
    with open(out, "w") as stream:
        display = TerminalProgress(stream)
        display.start(discover([shard("d/a.parquet"), shard("d/b.parquet")]))
        display.bar._is_atty = True  # draw as on a terminal into the file (the pty tests below use a real one)
        display.batch("d/a.parquet", 40, 320, 100)
        display.shard_done("d/a.parquet", 200, 1600)
        display.close()
    text = out.read_text()
    assert "shards 0/2 · 320 tokens" in text and "shards 1/2 · 320 tokens" in text
    assert re.search(r"tok/s", text)
    assert (_short(999), _short(41_200_000), _short(1_500), _short(2.5e9)) == ("999", "41.2M", "1.5k", "2.5G")


# -- on a terminal, in a pipe, and with --quiet ------------------------------------------------------------------

pty = pytest.importorskip("pty")


def scan_on(stderr_kind: str, *args) -> tuple[int, bytes, bytes]:
    """Run ``python -m lint scan ARGS`` with stderr on a pseudo-terminal ("pty") or a pipe ("pipe"); returns
    (exit status, stdout, what arrived on stderr)."""
    env = {**os.environ, "PYTHONPATH": str(REPO), "COLUMNS": "120"}
    command = [sys.executable, "-m", "lint", "scan", *args]
    if stderr_kind == "pipe":
        done = subprocess.run(command, capture_output=True, env=env, timeout=300)
        return done.returncode, done.stdout, done.stderr
    master, slave = pty.openpty()
    # stdout goes to a file: a pipe nobody reads while the terminal is being read could fill up and stall the scan.
    with open("stdout.txt", "wb") as out, subprocess.Popen(command, stdout=out, stderr=slave,
                                                           stdin=subprocess.DEVNULL, env=env) as proc:
        os.close(slave)
        seen = b""
        while True:
            try:
                chunk = os.read(master, 65536)
            except OSError:  # EIO: every holder of the slave side has closed it
                break
            if not chunk:
                break
            seen += chunk
        proc.wait(timeout=300)
    os.close(master)
    with open("stdout.txt", "rb") as out:
        return proc.returncode, out.read(), seen


def test_progress_appears_on_a_terminal_per_batch_from_the_pool(tmp_path):
    shard("d/a.parquet")
    shard("d/b.parquet")
    status, stdout, seen = scan_on("pty", "d", "--jobs", "2", "--eos-id", "2", "--vocab-size", "100")
    assert status == 0 and stdout.startswith(b"corpuscle ")
    frames = seen.decode().split("\r")
    assert any("shards 2/2 · 3.2k tokens" in f and "100%" in f for f in frames)
    # Frames drawn from batch events before any shard was done: progress travels per batch from the workers.
    early = [f for f in frames if "shards 0/2" in f and re.search(r"shards 0/2 · [1-9][0-9.k]* tokens", f)]
    assert early, frames
    assert "tok/s" in frames[-2] or "tok/s" in seen.decode()


def test_no_progress_in_a_pipe(tmp_path):
    shard("d/a.parquet")
    shard("d/b.parquet")
    status, stdout, stderr = scan_on("pipe", "d", "--jobs", "2", "--eos-id", "2", "--vocab-size", "100")
    assert (status, stderr) == (0, b"") and stdout.startswith(b"corpuscle ")


def test_no_progress_on_a_terminal_with_quiet(tmp_path):
    shard("d/a.parquet")
    status, stdout, seen = scan_on("pty", "d", "--jobs", "1", "--quiet", "--eos-id", "2", "--vocab-size", "100")
    assert (status, seen) == (0, b"") and stdout.startswith(b"corpuscle ")
