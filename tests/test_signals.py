"""Signals end a scan cleanly: SIGTERM exits 143 and SIGINT 130 (128 + the signal number, as shells report it),
the pool's processes and the spill folders are gone, an older report is left as it was; after SIGKILL the pool's
processes end by themselves and the next run removes the spill folder left behind."""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tests.shards import validate_sarif

pytestmark = pytest.mark.skipif(not os.path.isdir("/proc") or os.name != "posix",
                                reason="needs POSIX signals and /proc to find the scan's processes")

#: The command as installed beside this Python (the virtual environment's script).
CORPUSCLE = [os.path.join(os.path.dirname(sys.executable), "corpuscle")]


def corpus(folder, shards=16, rows=12000, width=512):
    """Tokenized shards large enough that a scan with the duplicate rules takes a few seconds (with 6,000 rows a
    shard it took about 1.3 s, short enough that on a busy machine the signal could arrive after its end)."""
    rng = np.random.default_rng(7)
    folder.mkdir()
    for i in range(shards):
        values = pa.array(rng.integers(3, 30_000, size=rows * width, dtype=np.int64))
        offsets = pa.array(np.arange(rows + 1, dtype=np.int32) * width)
        pq.write_table(pa.table({"input_ids": pa.ListArray.from_arrays(offsets, values)}), folder / f"s{i}.parquet")
    return folder


def descendants(pid: int) -> set[int]:
    """Every live process below ``pid`` (from /proc: each process's parent is field 4 of its stat line)."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat", "rb") as fh:
                fields = fh.read().rsplit(b")", 1)[1].split()
        except OSError:
            continue
        if fields[0] != b"Z":
            children.setdefault(int(fields[1]), []).append(int(entry))
    out, todo = set(), [pid]
    while todo:
        for child in children.get(todo.pop(), []):
            out.add(child)
            todo.append(child)
    return out


def alive(pids: set[int]) -> set[int]:
    out = set()
    for pid in pids:
        try:
            with open(f"/proc/{pid}/stat", "rb") as fh:
                if fh.read().rsplit(b")", 1)[1].split()[0] != b"Z":
                    out.add(pid)
        except OSError:
            pass
    return out


def spills(tmp: str) -> list[str]:
    return sorted(name for name in os.listdir(tmp) if name.startswith("corpuscle-minhash-"))


def start(data, tmp, report):
    env = dict(os.environ, TMPDIR=str(tmp))
    return subprocess.Popen([*CORPUSCLE, "scan", str(data), "--jobs", "2", "--quiet", "--sarif", str(report)],
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


def wait_until(condition, seconds: float) -> bool:
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        if condition():
            return True
        time.sleep(0.05)
    return condition()


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    return corpus(tmp_path_factory.mktemp("signals") / "data")


@pytest.mark.parametrize("signum, status", [(signal.SIGTERM, 143), (signal.SIGINT, 130)], ids=["TERM", "INT"])
def test_a_signal_stops_the_pool_removes_spill_folders_and_leaves_the_older_report(data, tmp_path, signum, status):
    tmp = tmp_path / "tmp"
    tmp.mkdir()
    report = tmp_path / "old.sarif"
    for attempt in range(3):
        report.write_text('{"an": "older report"}')
        scan = start(data, tmp, report)
        # Signal once the scan is under way: the pool has started and the near-duplicate rule has spilled.
        assert wait_until(lambda: spills(str(tmp)) and len(descendants(scan.pid)) >= 2, 60), scan.stderr.read()
        family = descendants(scan.pid)
        scan.send_signal(signum)
        _, err = scan.communicate(timeout=60)
        # On a busy machine this process may see the scan under way only as it ends (it takes about 2 s), and the
        # signal then comes too late: a scan that ended normally is run again (a signal ignored every time fails).
        if scan.returncode != 0:
            break
    assert scan.returncode == status, err
    assert b"Traceback" not in err and b"interrupted" in err
    assert wait_until(lambda: not alive(family), 10), alive(family)
    assert spills(str(tmp)) == []
    assert report.read_text() == '{"an": "older report"}'
    assert [n for n in os.listdir(tmp_path) if n.startswith(".corpuscle-")] == []  # no temporary report left


def test_after_sigkill_the_pool_ends_itself_and_the_next_run_removes_the_spill_folder(data, tmp_path):
    tmp = tmp_path / "tmp"
    tmp.mkdir()
    scan = start(data, tmp, tmp_path / "r.sarif")
    assert wait_until(lambda: spills(str(tmp)) and len(descendants(scan.pid)) >= 2, 60), scan.stderr.read()
    family = descendants(scan.pid)
    scan.kill()
    scan.wait(timeout=10)
    # Pool processes watch the scan's process every second; the fork server ends when its parent does.
    assert wait_until(lambda: not alive(family), 15), alive(family)
    left = spills(str(tmp))
    assert left and all(f"-{scan.pid}-" in name for name in left)  # named after the dead scan's process
    small = tmp_path / "small"
    small.mkdir()
    (small / "a.jsonl").write_text('{"input_ids": [5, 6, 7, 2]}\n')
    env = dict(os.environ, TMPDIR=str(tmp))
    again = subprocess.run([*CORPUSCLE, "scan", str(small), "--jobs", "1", "--quiet"], env=env, capture_output=True)
    assert again.returncode in (0, 1), again.stderr
    assert spills(str(tmp)) == []


def test_a_ctrl_c_after_the_reports_are_written_ends_the_process_without_a_traceback(tmp_path):
    # The summary is being printed when SIGINT arrives (click.echo wrapped to send it): the report is complete, and
    # the process ends the default way for SIGINT (killed by the signal: the shell shows 130), printing neither a
    # traceback nor click's "Aborted!".
    shard = tmp_path / "a.jsonl"
    shard.write_text('{"input_ids": [5, 6, 7, 2]}\n{"input_ids": [5, 6, 7]}\n')
    report = tmp_path / "r.sarif"
    code = ("import os, signal, sys, click\n"
            "import corpuscle.cli as cli\n"
            "echo = click.echo\n"
            "def interrupting(message=None, *args, **kwargs):\n"
            "    if message and not kwargs.get('err'):\n"
            "        os.kill(os.getpid(), signal.SIGINT)\n"
            "    return echo(message, *args, **kwargs)\n"
            "cli.click.echo = interrupting\n"
            f"sys.argv = ['corpuscle', 'scan', {str(shard)!r}, '--jobs', '1', '--sarif', {str(report)!r}]\n"
            "cli.program()\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True)
    assert done.returncode == -signal.SIGINT, done.stderr
    assert b"Traceback" not in done.stderr and b"Aborted" not in done.stderr
    assert validate_sarif(json.loads(report.read_text()))["runs"][0]["invocations"][0]["executionSuccessful"]
