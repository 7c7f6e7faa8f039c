"""near-duplicate's ``memory_limit_mb``: past the limit, the band keys waiting for the reduce go to ``.npy`` files and
are read back by memory map, and the findings and the drop list are the same as with everything in memory."""
from __future__ import annotations

import os

import numpy as np
import pytest
from corpuscle.engine.scan import scan_shard
from corpuscle.io.sources import discover
from corpuscle.rules.duplicates import NearDuplicate
from corpuscle.settings import Settings

from tests.shards import run, write

WINDOW = 64


def corpus() -> list[str]:
    """Three shards of 60 random windows each; windows 5, 17 and 33 of shard 0 come back in shard 1 and 2 with the
    last token changed (Jaccard similarity of 5-token shingles 59/61, far above 0.8), window 40 of shard 1 twice."""
    rng = np.random.default_rng(11)
    shards = [rng.integers(3, 30_000, size=(60, WINDOW)).tolist() for _ in range(3)]
    for i, j in ((5, 7), (17, 20), (33, 50)):
        shards[1][j] = shards[0][i][:-1] + [2]
        shards[2][j] = shards[0][i][:-1] + [1]
    shards[2][3] = shards[1][40][:-1] + [1]
    return [write(f"c/s{k}.parquet", {"input_ids": rows}, row_group_size=16) for k, rows in enumerate(shards)]


def summary(report):
    found = [(f.rule_id, f.kind, f.count, f.message, f.instances()) for f in report.findings]
    return found, report.outputs.get("drop-list"), report.metrics["nearDuplicates"]


def test_spilled_band_keys_give_the_same_findings(tmp_path):
    paths = corpus()
    held = run(paths, only=("near-duplicate",))
    spilled = run(paths, only=("near-duplicate",), rule={"near-duplicate": {"memory_limit_mb": 0}})
    assert summary(held) == summary(spilled)
    found = [f for f in held.findings if f.rule_id == "near-duplicate"]
    # The three triples (over all three shards: one finding) and the pair built above (between shards 1 and 2).
    assert sorted(c["members"] for f in found for c in f.evidence["clusterList"]) == [2, 3, 3, 3]
    assert sorted(f.kind.split("-")[1] for f in found) == ["across", "between"]


@pytest.mark.parametrize("parts", [1, 3])
def test_past_the_limit_the_pieces_are_memory_maps_of_files_in_the_scan_folder(tmp_path, parts):
    paths = corpus()
    settings = Settings()
    spilling, holding = NearDuplicate(memory_limit_mb=0), NearDuplicate()
    try:
        for path in paths:
            shard = discover([path])[0]
            state_a = scan_shard(shard, settings, [spilling]).states["near-duplicate"]
            state_b = scan_shard(shard, settings, [holding]).states["near-duplicate"]
            _, mapped = spilling.partition(state_a, parts)
            _, kept = holding.partition(state_b, parts)
            for a, b in zip(mapped, kept):
                for name in ("window", "keys", "digests"):
                    on_disk, in_memory = getattr(a, name), getattr(b, name)
                    assert np.array_equal(on_disk, in_memory)
                    assert not isinstance(in_memory, np.memmap)
                    if on_disk.size:
                        assert isinstance(on_disk, np.memmap)
                        assert os.path.dirname(on_disk.filename) == spilling.spill_folder
        assert holding._held_bytes == sum(60 * holding.bands * (8 + 8 + 8) for _ in paths)  # 3 x 8-byte arrays
    finally:
        spilling.corpus([])  # removes the scan's folder
        holding.corpus([])
    assert not os.path.exists(spilling.spill_folder)


def test_the_limit_is_checked_at_construction():
    with pytest.raises(ValueError, match="memory_limit_mb must be an integer >= 0"):
        NearDuplicate(memory_limit_mb=-1)
    with pytest.raises(ValueError, match="memory_limit_mb"):
        NearDuplicate(memory_limit_mb="1 GB")
