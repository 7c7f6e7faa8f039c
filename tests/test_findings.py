"""Findings: capped hit lists with a true count, instances, fingerprints; and the atomic report writer."""
from __future__ import annotations

import hashlib
import os
import pickle

import numpy as np
import pytest
from corpuscle.findings import Finding, Hits, Level
from corpuscle.io.batch import Shard
from corpuscle.report import write_atomic
from corpuscle.rules.api import ShardState
from corpuscle.settings import Settings

# -- Hits ---------------------------------------------------------------------------------------------------


def test_hits_keep_the_first_cap_locations_and_count_them_all():
    hits = Hits(cap=5)
    hits.add(np.array([0, 1, 2]), np.array([10, 11, 12]))
    hits.add([3, 4, 5, 6], 7)  # one offset for every row
    hits.add(np.zeros(0, dtype=np.int64))
    assert hits.count == 7
    assert hits.rows.tolist() == [0, 1, 2, 3, 4]
    assert hits.offsets.tolist() == [10, 11, 12, 7, 7]
    assert hits.truncated is True
    hits.add([9])
    assert (hits.count, hits.rows.size) == (8, 5)


def test_hits_at_the_cap_are_not_truncated_and_missing_offsets_are_minus_one():
    hits = Hits(cap=3)
    hits.add([4, 8, 9])
    assert (hits.count, hits.rows.tolist(), hits.offsets.tolist(), hits.truncated) == (3, [4, 8, 9], [-1, -1, -1],
                                                                                       False)


def test_a_cap_of_zero_counts_without_keeping_locations():
    hits = Hits(cap=0)
    hits.add(np.arange(100))
    assert (hits.count, hits.rows.tolist(), hits.truncated, bool(hits)) == (100, [], True, True)


def test_empty_hits_are_false_and_a_negative_cap_is_refused():
    assert not Hits(cap=10)
    with pytest.raises(ValueError, match=r"^instance cap must be >= 0, got -1$"):
        Hits(cap=-1)


def test_hits_do_not_hold_the_caller_arrays():
    rows = np.array([1, 2, 3])
    hits = Hits(cap=10)
    hits.add(rows)
    rows[:] = 0
    assert hits.rows.tolist() == [1, 2, 3]


def test_shard_state_records_a_kind_only_once_it_has_a_hit():
    state = ShardState(Shard("s.jsonl", "s.jsonl", "jsonl"), Settings(instance_cap=2), cap=2)
    state.hit_at("gap", np.zeros(0, dtype=np.int64))
    assert "gap" not in state.hits  # a defect found zero times is not a finding
    state.hit_at("gap", [5, 6, 7], [1, 2, 3])
    state.hit_at("gap", [])
    assert (state.hits["gap"].count, state.hits["gap"].rows.tolist(), state.hits["gap"].truncated) == (3, [5, 6],
                                                                                                       True)
    state.count(rows=4)
    copy = pickle.loads(pickle.dumps(state))  # states travel between processes
    assert (copy.stats["rows"], copy.stats["never_set"], copy.hits["gap"].count) == (4, 0, 3)


# -- Finding ------------------------------------------------------------------------------------------------


def test_finding_from_hits_and_its_instances():
    hits = Hits(cap=2)
    hits.add([3, 5, 8], [-1, 4, 0])
    f = Finding.from_hits("label-alignment", Level.error, "msg", "a.parquet", hits, kind="shift-2", observedShift=2)
    assert (f.count, f.truncated, f.evidence) == (3, True, {"observedShift": 2})
    assert f.instances() == [{"row": 3}, {"row": 5, "offset": 4}]


def test_instances_of_a_finding_across_shards_carry_their_uri():
    f = Finding("exact-duplicate", Level.warning, "m", None, rows=np.array([0, 7]), offsets=np.array([-1, -1]),
                instance_uris=["a.jsonl", "b.jsonl"])
    assert f.instances() == [{"row": 0, "uri": "a.jsonl"}, {"row": 7, "uri": "b.jsonl"}]


def test_fingerprint_depends_on_rule_shard_and_kind_only():
    a = Finding("token-range", Level.error, "5 ids out of range", "s/a.parquet", kind="above-vocab", count=5)
    b = Finding("token-range", Level.warning, "9 ids out of range", "s/a.parquet", kind="above-vocab", count=9,
                rows=np.array([1]), offsets=np.array([2]))
    assert a.fingerprint == b.fingerprint
    # sha256 (FIPS 180-4, via hashlib) of the unit-separated key, first 32 hex digits.
    assert a.fingerprint == hashlib.sha256(b"token-range\x1fs/a.parquet\x1fabove-vocab").hexdigest()[:32]
    others = {Finding("token-range", Level.error, "", "s/b.parquet", kind="above-vocab").fingerprint,
              Finding("token-range", Level.error, "", "s/a.parquet", kind="negative").fingerprint,
              Finding("label-alignment", Level.error, "", "s/a.parquet", kind="above-vocab").fingerprint,
              Finding("token-range", Level.error, "", None, kind="above-vocab").fingerprint}
    assert len(others) == 4 and a.fingerprint not in others


def test_levels_are_ordered_and_parsed():
    assert Level.error > Level.warning > Level.note
    assert Level.parse("warning") is Level.warning
    with pytest.raises(ValueError, match=r"^unknown level 'fatal': use error, warning or note$"):
        Level.parse("fatal")


def test_findings_sort_most_severe_first():
    fs = [Finding("b-rule", Level.warning, "", "x"), Finding("a-rule", Level.note, "", "x"),
          Finding("z-rule", Level.error, "", "y"), Finding("z-rule", Level.error, "", "x", kind="k")]
    assert [(f.rule_id, f.uri) for f in sorted(fs, key=Finding.sort_key)] == [
        ("z-rule", "x"), ("z-rule", "y"), ("b-rule", "x"), ("a-rule", "x")]


# -- write_atomic -------------------------------------------------------------------------------------------


def test_write_atomic_writes_the_bytes_and_leaves_no_temporary_file(tmp_path):
    target = tmp_path / "out" / "report.sarif"
    write_atomic(str(target), b'{"version": "2.1.0"}')
    assert target.read_bytes() == b'{"version": "2.1.0"}'
    assert os.listdir(tmp_path / "out") == ["report.sarif"]


def test_write_atomic_replaces_the_file_rather_than_rewriting_it(tmp_path):
    target = tmp_path / "report.json"
    target.write_bytes(b"old report")
    with open(target, "rb") as reader:  # a reader of the old file keeps the whole old file (POSIX rename)
        old_inode = os.stat(target).st_ino
        write_atomic(str(target), b"new report")
        assert reader.read() == b"old report"
    assert target.read_bytes() == b"new report"
    assert os.stat(target).st_ino != old_inode
    assert os.listdir(tmp_path) == ["report.json"]


def test_an_interrupted_write_keeps_the_old_file_and_removes_the_temporary(tmp_path, monkeypatch):
    target = tmp_path / "report.json"
    target.write_bytes(b"old report")

    def interrupted(fd):
        raise KeyboardInterrupt

    monkeypatch.setattr(os, "fsync", interrupted)
    with pytest.raises(KeyboardInterrupt):
        write_atomic(str(target), b"half")
    assert target.read_bytes() == b"old report"
    assert os.listdir(tmp_path) == ["report.json"]


def test_write_atomic_onto_a_folder_fails_cleanly(tmp_path):
    (tmp_path / "taken").mkdir()
    with pytest.raises(OSError):
        write_atomic(str(tmp_path / "taken"), b"x")
    assert os.listdir(tmp_path) == ["taken"]


def test_the_report_gets_ordinary_file_permissions(tmp_path):
    old = os.umask(0o022)
    try:
        write_atomic(str(tmp_path / "r.json"), b"{}")
        with open(tmp_path / "plain.json", "wb"):
            pass
    finally:
        os.umask(old)
    # Same mode as a file made by open(): 0o666 less the umask (POSIX open(2)), not mkstemp's private 0o600.
    assert oct(os.stat(tmp_path / "r.json").st_mode & 0o777) == oct(os.stat(tmp_path / "plain.json").st_mode & 0o777)
    assert os.stat(tmp_path / "r.json").st_mode & 0o777 == 0o644
