"""Tests of scanning on a Dask cluster (lint/executors.py DaskExecutor), of the keyed reduce that near-duplicate
search runs as a partitioned shuffle (lint/rule.py, rules/duplicates.py), and of shards named by URI
(lint/sources.py), and of progress reported per batch from the workers (DaskExecutor.relay).

A scan must give the same report wherever it runs: the cluster run is checked against the local run of the same
code in one process, and both against outside references -- exact copies against Python equality of the token
lists, near-duplicate clusters against datasketch's MinHashLSH (via the reference pipeline of test_duplicates.py),
file sizes against ``os.path.getsize`` (stdlib), progress counts against pyarrow's reading of the files.

The cluster is a ``distributed.LocalCluster`` of two worker processes, started once for the module. ``distributed``
is an optional dependency (``corpuscle[cluster]``, also in the ``test`` extra): outside CI a missing package skips
the cluster tests; in CI (``CI=true``) it fails them.
"""
from __future__ import annotations

import json
import os
import pickle
import re
import subprocess
import sys

import numpy as np
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner
from corpuscle import Settings
from corpuscle.cli import main
from corpuscle.engine import split
from corpuscle.engine.executors import ClusterUnavailable, DaskExecutor, LocalExecutor, TopicProgress
from corpuscle.engine.registry import registry
from corpuscle.engine.scan import run, select_rules
from corpuscle.io.sources import discover
from corpuscle.kernels.lsh import band_keys, candidate_pairs, partition_candidates, signature_digests

from tests.shards import findings, write
from tests.test_duplicates import clusters as clusters_in
from tests.test_duplicates import exact_clusters, jaccard, miss_probability, mutate, shingles_of
from tests.test_progress import Recorder, row_group_bytes

VOCAB = 50_000
LENGTH = 256
REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _distributed():
    """The distributed package: required in CI, else the test is skipped when it is missing."""
    if os.environ.get("CI") == "true":
        import distributed  # noqa: F401 - CI installs the test extra, which includes it: missing is a failure

        return distributed
    return pytest.importorskip("distributed", reason="the cluster extra is not installed: pip install '.[cluster]'")


@pytest.fixture(scope="module")
def cluster():
    _distributed()
    with DaskExecutor("local", jobs=2) as executor:
        yield executor


# -- the corpus -------------------------------------------------------------------------------------------------


def planted_corpus(rng) -> tuple[dict, list, list]:
    """Token windows in three shards with planted near copies (1 or 2 tokens changed: Jaccard >= 0.96) and exact
    copies, across shards and within one. Returns (shard -> windows, near pairs, exact copies as (copy, of))."""
    shards = {name: [rng.integers(0, VOCAB, LENGTH).tolist() for _ in range(size)]
              for name, size in (("a", 30), ("b", 30), ("c", 20))}
    near = [(("a", 0), ("b", 3), 1), (("a", 2), ("b", 10), 2), (("b", 12), ("c", 0), 1), (("c", 2), ("c", 9), 1)]
    for (src, i), (dst, j), changes in near:
        shards[dst][j] = mutate(rng, shards[src][i], changes, VOCAB)
    exact = [(("b", 7), ("a", 5)), (("b", 8), ("a", 5)), (("c", 4), ("a", 0)), (("c", 6), ("c", 1))]
    for (dst, j), (src, i) in exact:
        shards[dst][j] = list(shards[src][i])
    return shards, near, exact


URIS = {"a": "data/a.parquet", "b": "data/b.parquet", "c": "data/c.jsonl"}


def write_corpus(rng) -> tuple[dict, list, list]:
    """The planted corpus as two Parquet shards and a JSON Lines shard with one bad line at its end, plus a
    Parquet file whose bytes are not Parquet."""
    shards, near, exact = planted_corpus(rng)
    write(URIS["a"], {"input_ids": shards["a"]}, row_group_size=8)
    write(URIS["b"], {"input_ids": shards["b"]})
    write(URIS["c"], {"input_ids": shards["c"]})
    with open(URIS["c"], "ab") as fh:
        fh.write(b'{"input_ids": [1, 2,\n')  # line 20: not JSON
    with open("data/d.parquet", "wb") as fh:
        fh.write(b"PAR1" + bytes(range(256)) * 4 + b"PAR1")
    return shards, near, exact


def scan_with(executor, paths, **settings):
    settings = Settings(**settings)
    return run(discover(paths), settings, select_rules(settings, registry()), executor=executor)


def comparable(report, rename=lambda uri: uri) -> tuple:
    """Everything a run reports but its timing: findings with their evidence, corpus figures, notes, outputs."""
    def fix(value):
        if isinstance(value, str):
            return rename(value)
        if isinstance(value, dict):
            return {k: fix(v) for k, v in value.items()}
        if isinstance(value, list):
            return [fix(v) for v in value]
        return value

    # A finding over two shards names them by a digest of their uris in its kind: renamed uris, another digest.
    found = [(f.rule_id, re.sub(r"-between-[0-9a-f]{12}$", "-between", f.kind), fix(f.uri), f.count,
              fix(f.instances()), fix(f.evidence), fix(f.message)) for f in report.findings]
    found.sort(key=repr)  # (findings are ordered by kind, so by those digests too)
    metrics = {k: v for k, v in report.metrics.items() if k != "seconds"}
    notes = [(n.level, n.rule_id, fix(n.uri), fix(n.message)) for n in report.notes]
    return found, metrics, notes, fix(report.outputs)


def check_against_references(report, shards, near, exact) -> None:
    """The duplicate findings against Python equality and datasketch; the broken shards' findings."""
    window = {(URIS[name], row): w for name, rows in shards.items() for row, w in enumerate(rows)}
    # Exact copies: groups of equal token lists (Python equality, grouped with a dict).
    groups: dict[tuple, list] = {}
    for key, w in window.items():
        groups.setdefault(tuple(w), []).append(key)
    expected = {frozenset(g) for g in groups.values() if len(g) > 1}
    assert len(expected) == 3  # a.5 with b.7 and b.8; a.0 with c.4; c.1 with c.6
    assert {frozenset(c) for c in clusters_in(report, "exact-duplicate")} == expected
    # Near-duplicates: the clusters of the exact reference (Python sets, Jaccard >= 0.8) with the exact copies of
    # their members; every planted pair (Jaccard >= 0.96, missed with probability below 1%: banding probability,
    # MMDS section 3.4) inside one of them.
    clusters = {frozenset(c) for c in clusters_in(report, "near-duplicate")}
    reference = exact_clusters({key: (tuple(w), shingles_of(w)) for key, w in window.items()})
    first: dict = {}
    for key, w in window.items():
        first.setdefault(tuple(w), key)
    assert clusters == {frozenset(k for k in window if first[tuple(window[k])] in c) for c in reference}
    b, r = 8, 8  # datasketch's (b, r) for threshold 0.8, 64 permutations, weights (0.2, 0.8) (test_duplicates.py)
    pairs = [((URIS[s], i), (URIS[d], j)) for (s, i), (d, j), _ in near]
    assert sum(miss_probability(jaccard(window[x], window[y]), b, r) for x, y in pairs) < 0.01
    for x, y in pairs:
        assert any({x, y} <= c for c in clusters), (x, y)
    metrics = report.metrics["nearDuplicates"]
    assert metrics["clusters"] == len(reference) == 4
    assert metrics["duplicateWindows"] == sum(len(c) - 1 for c in reference) == 4
    # The bad line of the JSON Lines shard (line 20) and the file that is not Parquet.
    bad = findings(report, "unreadable-record")
    assert [(f.uri, [i["row"] for i in f.instances()]) for f in bad] == [(URIS["c"], [20])]
    broken = findings(report, "unreadable-shard")
    assert [f.uri for f in broken] == ["data/d.parquet"]


# -- the keyed reduce, in one process ---------------------------------------------------------------------------


def test_the_keyed_reduce_gives_the_same_report_for_any_number_of_partitions():
    rng = np.random.default_rng(21)
    shards, near, exact = write_corpus(rng)
    one = scan_with(LocalExecutor(1), ["data"])
    check_against_references(one, shards, near, exact)
    for parts in (2, 7):
        assert comparable(scan_with(LocalExecutor(1, partitions=parts), ["data"])) == comparable(one)


@pytest.mark.parametrize("max_bucket", [1024, 5])
def test_partition_candidates_add_up_to_candidate_pairs(max_bucket):
    # Reference: candidate_pairs on all keys at once (checked against datasketch's MinHashLSH in test_lsh.py).
    # Signatures: 300 bases, 2,000 windows drawn from them (floods of identical signatures), 5% of values changed.
    rng = np.random.default_rng(3)
    base = rng.integers(0, 2**32, (300, 64), dtype=np.uint64).astype(np.uint32)
    sig = base[rng.integers(0, 300, 2000)]
    changed = rng.random(sig.shape) < 0.05
    sig[changed] = rng.integers(0, 2**32, int(changed.sum()), dtype=np.uint64).astype(np.uint32)
    keys, digests = band_keys(sig, 16, 4), signature_digests(sig)
    for ids in (np.arange(len(sig)) * 3 + 7, rng.permutation(len(sig)) * 5):  # in id order, and not
        whole = candidate_pairs(keys, ids, digests=digests, max_bucket=max_bucket)
        assert len(whole.pairs) > 2000 and (whole.capped_buckets > 0) == (max_bucket == 5)
        for parts in (1, 2, 7):
            flat, window = keys.ravel(), np.repeat(np.arange(len(sig)), 16)  # one entry per (window, band)
            where = flat % np.uint64(parts)
            found = [partition_candidates(flat[where == p], ids[window[where == p]],
                                          digests=digests[window[where == p]], max_bucket=max_bucket)
                     for p in range(parts)]
            np.testing.assert_array_equal(np.unique(np.concatenate([f.pairs for f in found]), axis=0), whole.pairs)
            assert sum(f.capped_buckets for f in found) == whole.capped_buckets
            assert max(f.largest_bucket for f in found) == whole.largest_bucket


def test_a_keyed_rule_splits_its_state_and_leaves_it_unchanged(tmp_path):
    rng = np.random.default_rng(5)
    shards, _, _ = planted_corpus(rng)
    write("a.parquet", {"input_ids": shards["a"] + shards["a"][:3]})  # rows 30-32 copy rows 0-2 of the shard
    settings = Settings(only=("near-duplicate",))
    report_rules = select_rules(settings, registry())
    rule = report_rules[0]
    from corpuscle.engine.scan import scan_shard

    state = scan_shard(discover(["a.parquet"])[0], settings, report_rules).states[rule.id]
    slim, pieces = rule.partition(state, 3)
    assert len(pieces) == 3 and not hasattr(slim, "keys") and state.keys.shape == (33, 8)
    # Every band key of the 30 first copies lands in the partition of its value modulo 3, once; the 3 copies
    # within the shard are left out.
    entries = sorted((int(k), int(w)) for piece in pieces for k, w in zip(piece.keys, piece.window))
    assert entries == sorted((int(k), w) for w in range(30) for k in state.keys[w])
    for p, piece in enumerate(pieces):
        assert piece.windows == 33 and np.all(piece.keys % np.uint64(3) == p)
        np.testing.assert_array_equal(piece.digests, state.digests[piece.window])
    rule.corpus([state])  # removes the signature files


# -- on the cluster ---------------------------------------------------------------------------------------------


def test_a_cluster_scan_reports_what_a_local_scan_reports(cluster):
    rng = np.random.default_rng(21)
    shards, near, exact = write_corpus(rng)
    local = scan_with(LocalExecutor(1), ["data"])
    settings = Settings()
    rules = select_rules(settings, registry())
    spill = next(rule.spill_folder for rule in rules if rule.id == "near-duplicate")
    remote = run(discover(["data"]), settings, rules, executor=cluster)
    assert cluster.partitions == 2 and cluster.workers == 2  # a shuffle over 2 partitions, against 1 locally
    assert comparable(remote) == comparable(local)
    check_against_references(remote, shards, near, exact)
    assert not os.path.exists(spill)  # the signature files written by the workers are gone


def test_shards_split_over_the_workers_report_what_a_whole_local_scan_reports(cluster, monkeypatch):
    """Every shard in two parts on the workers (all rules: near-duplicate's parts enter the shuffle one by one)."""
    rng = np.random.default_rng(21)  # the corpus whose planted pairs check_against_references accepts
    shards, near, exact = write_corpus(rng)
    write(URIS["b"], {"input_ids": shards["b"]}, row_group_size=8)  # a and b can be cut between row groups
    # Rows are the duplicate rules' unit here: documents (the default) are not carried across parts.
    windows = {"near-duplicate": {"unit": "window"}, "exact-duplicate": {"unit": "window"}}
    local = scan_with(LocalExecutor(1), ["data"], rule=windows)
    monkeypatch.setattr(split, "SPLIT_BYTES", 0)  # the parts are planned here, so this reaches the scan
    planned, plan = [], split.plan
    monkeypatch.setattr(split, "plan", lambda *args, **kwargs: planned.append(plan(*args, **kwargs)) or planned[-1])
    settings = Settings(rule=windows)
    remote = run(discover(["data"]), settings, select_rules(settings, registry()), executor=cluster)
    # a and b in two parts each; c (JSON Lines in one read block) and d (not Parquet) are scanned whole
    assert [None if parts is None else len(parts) for parts in planned] == [2, 2, None, None]
    assert comparable(remote) == comparable(local)
    check_against_references(remote, shards, near, exact)


def test_per_path_settings_apply_on_workers_in_another_folder(cluster):
    # The workers started in the folder pytest was started in, not in this test's folder: relative paths and
    # [paths] patterns are resolved here before the work leaves.
    write_corpus(np.random.default_rng(21))
    settings = Settings().with_values({"paths": {"data/b.parquet": {"seq_len": 100}}}, "config")
    local = run(discover(["data"]), settings, select_rules(settings, registry()), executor=LocalExecutor(1))
    remote = run(discover(["data"]), settings, select_rules(settings, registry()), executor=cluster)
    assert comparable(remote) == comparable(local)
    # Only b.parquet has a 100-token window, so its 30 windows of 256 tokens are longer than the window.
    overlong = findings(remote, "overlong-document")
    assert [(f.uri, f.count) for f in overlong] == [("data/b.parquet", 30)]


def test_shards_named_by_file_uri_on_the_cluster(cluster):
    rng = np.random.default_rng(21)
    shards, near, exact = write_corpus(rng)
    root = "file://" + os.path.abspath("data")
    found = discover([root])
    # Sizes from pyarrow's file system equal the stdlib's; the shards come in the order of a local folder walk.
    assert [(s.uri, s.length) for s in found] == [(f"{root}/{name}", os.path.getsize(f"data/{name}"))
                                                 for name in ("a.parquet", "b.parquet", "c.jsonl", "d.parquet")]
    local = scan_with(LocalExecutor(1), ["data"])
    here = scan_with(LocalExecutor(1), [root])
    remote = scan_with(cluster, [root])

    def rename(uri):
        return uri.replace(root + "/", "data/")

    assert comparable(here, rename) == comparable(local)
    assert comparable(remote, rename) == comparable(local)
    check_against_references(local, shards, near, exact)


def test_the_cli_scans_on_a_running_scheduler(cluster):
    rng = np.random.default_rng(21)
    write_corpus(rng)
    address = cluster.client.scheduler.address
    runner = CliRunner()
    # The local cluster takes TLS clients with this run's certificate only: Dask's TLS settings give it to the
    # command's client, as they would for any scheduler that requires TLS (see the README).
    security = cluster.security
    tls = {"distributed.comm.require-encryption": True, "distributed.comm.tls.ca-file": security.tls_ca_file,
           "distributed.comm.tls.client.cert": security.tls_client_cert,
           "distributed.comm.tls.client.key": security.tls_client_key}
    import dask

    with dask.config.set(tls):
        there = runner.invoke(main, ["scan", "data", "--cluster", address, "--drop-list", "there.jsonl",
                                     "--json", "there.json", "-q"])
    here = runner.invoke(main, ["scan", "data", "--jobs", "1", "--drop-list", "here.jsonl", "--json", "here.json",
                                "-q"])
    assert there.exit_code == here.exit_code == 1, there.output  # unreadable shard and record: errors
    with open("there.jsonl") as a, open("here.jsonl") as b:
        dropped = a.read()
        assert dropped == b.read()
    assert len(dropped.splitlines()) == 8  # 4 exact copies, 4 near copies beyond each cluster's first
    with open("there.json") as a, open("here.json") as b:
        there_report, here_report = json.load(a), json.load(b)
    # unreadable-record, unreadable-shard, token-range (no vocab_size), 3 exact-duplicate groups, 4 near clusters
    assert len(there_report["findings"]) == 10 and there_report["findings"] == here_report["findings"]


# -- progress from the workers ----------------------------------------------------------------------------------


def progress_corpus(rng) -> list[str]:
    """Four Parquet shards of token windows of varied lengths in row groups of 7 rows: several batches each (a
    batch never spans row groups, and these are far below the read size), written with pyarrow."""
    paths = []
    for name, rows in (("a", 30), ("b", 22), ("c", 15), ("d", 40)):
        windows = [rng.integers(3, VOCAB, int(rng.integers(1, 60))).tolist() for _ in range(rows)]
        paths.append(write(f"data/{name}.parquet", {"input_ids": windows}, row_group_size=7))
    return paths


def parquet_rows_tokens(path) -> tuple[int, int]:
    """Rows and token ids of a shard as pyarrow reads them: the table's rows and the sum of its list lengths."""
    table = pq.read_table(path)
    return table.num_rows, int(pc.sum(pc.list_value_length(table.column("input_ids"))).as_py())


def batches_and_ends(events) -> tuple[dict, dict]:
    """Per shard: the (rows, tokens, bytes) of its batch events in order, and its shard_done events."""
    batches, ends = {}, {}
    for event in events:
        if event[0] == "batch":
            batches.setdefault(event[1], []).append(event[2:])
        elif event[0] == "done":
            ends.setdefault(event[1], []).append(event[2:])
    return batches, ends


def test_a_cluster_scan_reports_every_batch_from_the_workers(cluster):
    paths = progress_corpus(np.random.default_rng(8))
    recorder = Recorder()
    settings = Settings(only=("token-range",), vocab_size=VOCAB)
    report = run(discover(["data"]), settings, select_rules(settings, registry()), executor=cluster,
                 progress=recorder)
    events = recorder.events
    assert events[0] == ("start", tuple(paths)) and events[-1] == ("close",)
    batches, ends = batches_and_ends(events)
    assert set(batches) == set(ends) == set(paths)
    for path in paths:
        rows, tokens = parquet_rows_tokens(path)
        meta = pq.ParquetFile(path).metadata
        # One batch per row group (pyarrow's metadata), in file order: the events of one task arrive in order.
        assert [b[0] for b in batches[path]] == [meta.row_group(g).num_rows for g in range(meta.num_row_groups)]
        assert [b[2] for b in batches[path]] == row_group_bytes(path)
        assert (sum(b[0] for b in batches[path]), sum(b[1] for b in batches[path])) == (rows, tokens)
        assert ends[path] == [(rows, tokens)]  # exactly once: from the worker, not again here
    assert sum(len(b) for b in batches.values()) == 5 + 4 + 3 + 6 > len(paths)
    assert report.metrics["rows"] == 107


def test_a_shard_split_over_the_workers_reports_its_batches_and_ends_once(cluster, monkeypatch):
    # The parts are planned here (so the threshold set here applies) and scanned on the workers.
    monkeypatch.setattr(split, "SPLIT_BYTES", 0)
    planned, plan = [], split.plan
    monkeypatch.setattr(split, "plan", lambda *args, **kwargs: planned.append(plan(*args, **kwargs)) or planned[-1])
    paths = progress_corpus(np.random.default_rng(9))
    recorder = Recorder()
    settings = Settings(only=("token-range",), vocab_size=VOCAB)
    rules = select_rules(settings, registry())
    assert all(rule.splittable for rule in rules)
    run(discover(["data"]), settings, rules, executor=cluster, progress=recorder)
    assert [len(parts) for parts in planned] == [2, 2, 2, 2]  # every shard in two parts, one per worker
    batches, ends = batches_and_ends(recorder.events)
    for path in paths:
        rows, tokens = parquet_rows_tokens(path)
        meta = pq.ParquetFile(path).metadata
        # The parts' batches arrive part by part, each part in order; together they are the row groups.
        assert sorted(b[0] for b in batches[path]) == sorted(meta.row_group(g).num_rows
                                                             for g in range(meta.num_row_groups))
        assert (sum(b[0] for b in batches[path]), sum(b[1] for b in batches[path])) == (rows, tokens)
        assert ends[path] == [(rows, tokens)]  # from the engine, once for the parts joined


def _report_from_a_task(progress) -> str:
    progress.batch("data/x.parquet", 3, 12, 100)
    progress.shard_done("data/x.parquet", 3, 12)
    return type(progress).__name__


def test_the_cluster_stand_in_pickles_and_reaches_the_target_from_anywhere(cluster):
    recorder = Recorder()
    with cluster.relay(recorder) as stand_in, cluster.relay(Recorder()) as other:
        assert isinstance(stand_in, TopicProgress) and stand_in.topic != other.topic  # a topic per relay
        copy = pickle.loads(pickle.dumps(stand_in))
        assert copy.topic == stand_in.topic
        # Here, outside a worker: straight to the target, before the call returns.
        stand_in.batch("data/y.parquet", 2, 5, 40)
        assert recorder.events == [("batch", "data/y.parquet", 2, 5, 40)]
        copy.batch("data/y.parquet", 1, 1, 1)  # a copy made here has no relay: its event goes nowhere
        assert len(recorder.events) == 1
        # In a task on a worker (the stand-in pickled with the task): through the scheduler to this client.
        assert cluster.client.submit(_report_from_a_task, stand_in, pure=False).result() == "TopicProgress"
    # Leaving the relay waited for the worker's events.
    assert recorder.events == [("batch", "data/y.parquet", 2, 5, 40), ("batch", "data/x.parquet", 3, 12, 100),
                               ("done", "data/x.parquet", 3, 12)]
    stand_in.batch("data/y.parquet", 9, 9, 9)  # the relay is closed: dropped
    assert len(recorder.events) == 3


# -- usage errors -----------------------------------------------------------------------------------------------


def test_cluster_without_distributed_is_a_usage_error():
    write("a.parquet", {"input_ids": [[1, 2, 3]]})
    # In a child process where `import distributed` raises ImportError (this one may be running a cluster).
    code = "import sys; sys.modules['distributed'] = None; from corpuscle.cli import main; main()"
    result = subprocess.run([sys.executable, "-c", code, "scan", "a.parquet", "--cluster", "local"], text=True,
                            capture_output=True, env={**os.environ, "PYTHONPATH": REPO}, timeout=120)
    assert result.returncode == 2 and result.stdout == ""
    assert "needs the distributed package: pip install 'corpuscle[cluster]'" in result.stderr
    assert "Traceback" not in result.stderr


def test_an_unreachable_scheduler_is_a_usage_error():
    _distributed()
    with pytest.raises(ClusterUnavailable, match="cannot connect to the Dask scheduler at tcp://127.0.0.1:9"):
        DaskExecutor("tcp://127.0.0.1:9", timeout=1).__enter__()
    with pytest.raises(ValueError, match="scheduler address"):
        DaskExecutor(" ")
    with pytest.raises(ValueError, match="jobs must be"):
        DaskExecutor("local", jobs=0)


def _arrow_threads() -> int:
    import pyarrow

    return pyarrow.cpu_count()


def test_a_local_cluster_worker_decodes_with_one_arrow_thread(cluster):
    """Each worker of --cluster local runs one task at a time on one core, as a process of the local pool does."""
    assert sorted(cluster.client.run(_arrow_threads).values()) == [1, 1]


def test_packed_documents_on_the_cluster_report_what_a_local_scan_reports(cluster):
    """Duplicate documents packed at any offset of two shards (tests/test_duplicates.py packed_corpus): the
    workers carry the open document across batches as a local scan does, and the shuffle finds the same clusters."""
    from tests.shards import pack
    from tests.test_duplicates import packed_corpus

    docs, planted = packed_corpus(np.random.default_rng(17))
    for name in ("a", "b"):
        write(f"packed/{name}.parquet", {"input_ids": pack(docs[name], 97, eos=2, pad=0, positions=False)["input_ids"]},
              row_group_size=5)
    settings = dict(eos_id=2, pad_id=0, only=("near-duplicate", "exact-duplicate"))
    local = scan_with(LocalExecutor(1), ["packed"], **settings)
    remote = scan_with(cluster, ["packed"], **settings)
    assert comparable(remote) == comparable(local)
    assert len(clusters_in(local, "exact-duplicate")) == 25 and len(clusters_in(local, "near-duplicate")) >= 15
