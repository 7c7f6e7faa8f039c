"""Settings: precedence (defaults < inferred < config file < flags), where each value came from, per-path tables,
validation messages, and the facts inferred from a shard's first batch with their evidence.

Every expected inferred value and share is counted in the test from the lists it builds.  The config format is
TOML 1.0 as read by the stdlib ``tomllib``; the label conventions are common practice (shifted: labels[t] =
input_ids[t+1]; aligned: labels equal input_ids and the loss shifts).
"""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from corpuscle.engine.infer import infer_from_batch
from corpuscle.engine.registry import registry
from corpuscle.engine.scan import scan_shard
from corpuscle.io.batch import Batch, Shard
from corpuscle.io.sources import discover
from corpuscle.settings import FACTS, OPTIONS, Settings, SettingsError, build, load_config

from tests.shards import pack, run, write


def batch_of(columns: dict) -> Batch:
    table = pa.table(columns)
    return Batch(Shard(uri="mem", path="mem", format="parquet"), table, np.arange(table.num_rows))


def infer(columns: dict, **given) -> Settings:
    return infer_from_batch(build(flags=given), batch_of(columns))


# -- defaults, precedence, origin ---------------------------------------------------------------------------


def test_defaults_and_their_origin():
    s = Settings()
    assert (s.text_column, s.tokens_column, s.labels_column, s.mask_column, s.positions_column) == (
        "text", "input_ids", "labels", "attention_mask", "position_ids")
    assert (s.eos_id, s.bos_id, s.pad_id, s.vocab_size, s.seq_len, s.labels, s.tokenizer) == (None,) * 7
    assert s.ignore_index == -100  # common practice: PyTorch CrossEntropyLoss ignore_index default
    assert (s.separator, s.fail_at, s.instance_cap) == ("eos-after", "error", 10_000)
    assert {s.source(k) for k in FACTS + OPTIONS} == {"default"}


def test_flags_beat_the_config_file_which_beats_defaults():
    s = build({"eos_id": 3, "seq_len": 512, "labels": "aligned"}, {"eos_id": 5, "pad_id": None, "vocab_size": 100})
    assert (s.eos_id, s.seq_len, s.labels, s.vocab_size, s.pad_id) == (5, 512, "aligned", 100, None)
    assert [s.source(k) for k in ("eos_id", "seq_len", "labels", "vocab_size", "pad_id")] == [
        "flag", "config", "config", "flag", "default"]


def test_inferred_values_fill_only_what_is_unset(tmp_path):
    cols = pack([[10 + i, 11 + i, 12 + i] for i in range(8)], seq_len=8, eos=2)  # 32 tokens: 4 full windows
    path = write(tmp_path / "p.parquet", cols)
    [shard] = discover([path])
    # Nothing given: seq_len, eos_id and labels come from the data.
    facts = scan_shard(shard, build(), []).settings
    assert (facts.seq_len, facts.eos_id, facts.labels) == (8, 2, "shifted")
    assert {facts.source(k) for k in ("seq_len", "eos_id", "labels")} == {"inferred"}
    # The config file and flags win over the data, and are not marked as inferred.
    facts = scan_shard(shard, build({"seq_len": 16}, {"eos_id": 7, "labels": "aligned"}), []).settings
    assert (facts.seq_len, facts.eos_id, facts.labels) == (16, 7, "aligned")
    assert [facts.source(k) for k in ("seq_len", "eos_id", "labels")] == ["config", "flag", "flag"]
    assert set(facts.evidence) == set()


def test_inferred_values_are_reported_as_heuristic_notes(tmp_path):
    cols = pack([[10 + i, 11 + i, 12 + i] for i in range(8)], seq_len=8, eos=2)
    write("p.parquet", cols)
    report = run("p.parquet", only=("schema-mismatch",))
    texts = sorted(n.message for n in report.notes if n.rule_id is None)
    # 8 documents of 4 tokens in 4 windows of 8: the second document of each window restarts the positions.
    assert sum(1 for row in cols["position_ids"] for t, p in enumerate(row) if p == 0 and t > 0) == 4
    assert texts == [
        "eos_id = 2 inferred (heuristic) in p.parquet: id before 100% of 4 position restarts in the first 4 rows",
        "labels = shifted inferred (heuristic) in p.parquet: labels equal input_ids shifted by 1 at 100.0% of "
        "trained positions in the first 4 rows",
        "seq_len = 8 inferred (heuristic) in p.parquet: most common row length (100% of the first 4 rows)",
    ]


def test_facts_are_inferred_from_the_first_records_over_small_first_batches(tmp_path):
    """Row groups of 2 rows: one row group alone is too little to infer from (seq_len needs 4 rows agreeing), so
    the first batches are gathered up to FIRST_ROWS rows or FIRST_TOKENS tokens, here the whole shard; the
    document arrangement comes from the same records."""
    docs = [[10 + i] * (3 + i % 5) for i in range(24)]
    cols = pack(docs, seq_len=8, eos=2, positions=False)
    rows = len(cols["input_ids"])
    assert rows > 8 and all(len(r) == 8 for r in cols["input_ids"])
    write("p.parquet", cols, row_group_size=2)
    report = run("p.parquet", only=("overlong-document",), eos_id=2)
    texts = sorted(n.message for n in report.notes if n.rule_id is None)
    assert f"seq_len = 8 inferred (heuristic) in p.parquet: most common row length (100% of the first {rows} rows)" \
        in texts
    assert report.findings == []  # no document is longer than 8 tokens, none is cut
    [shard] = discover(["p.parquet"])
    result = scan_shard(shard, build({}, {"eos_id": 2, "pad_id": 0}), [registry()["overlong-document"]()])
    state = result.states["overlong-document"]
    assert state.arrangement == "separators" and f"of the first {rows} rows" in state.why
    assert state.tally.lengths.documents == 24  # each ended by its eos (the padding after the last is no document)


# -- the config file ----------------------------------------------------------------------------------------


def test_corpuscle_toml_in_the_working_directory(tmp_path):
    (tmp_path / "corpuscle.toml").write_text('eos_id = 2\nseq_len = 2048\nlabels = "shifted"\n'
                                             '[rule.schema-mismatch]\n')
    config, where = load_config()
    assert where.endswith("corpuscle.toml")
    assert config == {"eos_id": 2, "seq_len": 2048, "labels": "shifted", "rule": {"schema-mismatch": {}}}
    s = build(config)
    assert (s.eos_id, s.source("eos_id"), s.rule) == (2, "config", {"schema-mismatch": {}})


def test_tool_corpuscle_in_pyproject(tmp_path):
    (tmp_path / "pyproject.toml").write_text('[project]\nname = "x"\n[tool.corpuscle]\npad_id = 0\nonly = "a,b"\n')
    config, where = load_config()
    assert (config, where.endswith("pyproject.toml")) == ({"pad_id": 0, "only": "a,b"}, True)
    assert build(config).only == ("a", "b")


def test_corpuscle_toml_wins_over_pyproject_and_a_pyproject_without_our_table_is_ignored(tmp_path):
    (tmp_path / "pyproject.toml").write_text('[project]\nname = "x"\n')
    assert load_config() == ({}, None)
    (tmp_path / "pyproject.toml").write_text('[tool.corpuscle]\neos_id = 9\n')
    (tmp_path / "corpuscle.toml").write_text("eos_id = 1\n")
    assert load_config()[0] == {"eos_id": 1}


def test_an_explicit_config_file(tmp_path):
    (tmp_path / "other.toml").write_text("vocab_size = 32000\n")
    assert load_config("other.toml") == ({"vocab_size": 32000}, "other.toml")
    with pytest.raises(SettingsError, match=r"^config file missing\.toml does not exist$"):
        load_config("missing.toml")
    (tmp_path / "broken.toml").write_text("eos_id = = 2\n")
    with pytest.raises(SettingsError, match=r"^cannot read config file broken\.toml: "):
        load_config("broken.toml")


# -- per-path tables ----------------------------------------------------------------------------------------

TABLES = {"eos_id": 2, "paths": {"web/*": {"eos_id": 3, "seq_len": 1024}, "code": {"eos_id": 4},
                                 "code/python/*": {"bos_id": 1}}}


def test_per_path_tables_give_facts_to_matching_shards():
    s = build(TABLES)
    web = s.for_path("web/part-0.parquet")
    assert (web.eos_id, web.seq_len, web.source("eos_id")) == (3, 1024, "config")
    deep = s.for_path("code/python/a.jsonl")  # "code" matches the folder; both tables apply, in file order
    assert (deep.eos_id, deep.bos_id, deep.seq_len) == (4, 1, None)
    other = s.for_path("books/b.parquet")
    assert (other.eos_id, other.seq_len) == (2, None)
    assert s.for_path("./web/part-0.parquet").eos_id == 3  # "./web/..." is the same path as "web/..."
    assert s.for_path("codebase/x.parquet").eos_id == 2  # a folder name is not a prefix of another name


def test_flags_beat_per_path_tables():
    s = build(TABLES, {"eos_id": 7})
    assert (s.for_path("web/a.parquet").eos_id, s.for_path("web/a.parquet").seq_len) == (7, 1024)
    assert s.for_path("web/a.parquet").source("eos_id") == "flag"


def test_per_path_tables_through_the_engine(tmp_path):
    cols = pack([[10, 11, 12]] * 8, seq_len=8, eos=2)
    write(tmp_path / "web" / "a.parquet", cols)
    write(tmp_path / "books" / "b.parquet", cols)
    settings = build({"paths": {"web": {"eos_id": 3}}})
    eos = {sh.uri: scan_shard(sh, settings, []).settings.eos_id for sh in discover(["web", "books"])}
    assert eos == {"web/a.parquet": 3, "books/b.parquet": 2}  # 2 inferred from the data where nothing was given


# -- validation ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("values,message", [
    ({"labels": "both"}, "labels must be one of shifted, aligned, got 'both'"),
    ({"seq_len": -4}, "seq_len must be a positive integer, got -4"),
    ({"vocab_size": 0}, "vocab_size must be a positive integer, got 0"),
    ({"eos_id": "2"}, "eos_id must be an integer token id, got '2'"),
    ({"separator": "eos"}, "separator must be one of eos-after, bos-before, both, got 'eos'"),
    ({"fail_at": "sometimes"}, "fail_at must be one of error, warning, note, never, got 'sometimes'"),
    ({"instance_cap": -1}, "instance_cap must be a whole number >= 0, got -1"),
    ({"rule": {"near-duplicate": 0.8}}, "rule options go in tables, e.g. [rule.near-duplicate] threshold = 0.8"),
    ({"paths": {"web/*": {"fail_at": "note"}}},
     "[paths.'web/*'] may only set shard facts (" + ", ".join(FACTS) + "), not fail_at"),
    ({"paths": {"web/*": {"seq_len": 0}}}, "[paths.'web/*']: seq_len must be a positive integer, got 0"),
    ({"paths": {"web/*": 3}}, 'per-path facts go in tables, e.g. [paths."data/web/*"] eos_id = 2'),
    ({"ignore_index": "-100"}, "ignore_index must be an integer label value, got '-100'"),
    ({"tokens_column": 5}, "tokens_column must be a column name (a string), got 5"),
    ({"only": 5}, 'only takes rule ids, e.g. only = ["label-alignment"], got 5'),
    ({"skip": [1]}, 'only and skip take rule ids, e.g. only = ["label-alignment"]'),
    ({"instance_cap": True}, "instance_cap must be a whole number >= 0, got True"),
    ({"tokenizer": 3}, "tokenizer must be the path of a tokenizer JSON file, got 3"),
])
def test_bad_values_are_rejected_when_read_with_a_message(values, message):
    with pytest.raises(SettingsError) as err:
        build(values)
    assert str(err.value) == message


def test_an_unknown_key_names_the_known_ones():
    with pytest.raises(SettingsError) as err:
        build({"eos": 2, "seqlen": 8})
    assert str(err.value) == "unknown setting(s) eos, seqlen: known are " + ", ".join(FACTS + OPTIONS)


# -- inference from the first batch -------------------------------------------------------------------------


def test_seq_len_is_the_most_common_row_length():
    s = infer({"input_ids": [[1] * 8, [1] * 8, [1] * 8, [1] * 8, [1] * 5]})
    assert (s.seq_len, s.source("seq_len")) == (8, "inferred")
    assert s.evidence["seq_len"] == "most common row length (80% of the first 5 rows)"


@pytest.mark.parametrize("rows", [
    [[1] * 8, [1] * 8, [1] * 5, [1] * 5, [1] * 6],  # the most common length covers 40% of rows: below half
    [[1] * 8, [1] * 8, [1] * 8],  # fewer than four rows
])
def test_no_seq_len_from_weak_evidence(rows):
    s = infer({"input_ids": rows})
    assert (s.seq_len, s.source("seq_len"), "seq_len" in s.evidence) == (None, "default", False)


def test_pad_id_is_the_id_under_attention_mask_zero():
    ids = [[5, 6, 7, 2, 0, 0], [8, 2, 0, 0, 0, 0], [9, 9, 9, 9, 9, 2], [4, 3, 2, 0, 0, 0]]
    mask = [[int(t != 0) for t in row] for row in ids]
    masked = sum(row.count(0) for row in mask)
    assert masked == 9
    s = infer({"input_ids": ids, "attention_mask": mask})
    assert (s.pad_id, s.source("pad_id")) == (0, "inferred")
    assert s.evidence["pad_id"] == "id under attention_mask 0 at 100% of 9 masked positions in the first 4 rows"
    # The last real token of every row (the one before the masked tail) is 2: eos.
    assert (s.eos_id, s.evidence["eos_id"]) == (2, "last real token of 100% of the first 4 rows")


def test_no_pad_id_when_masked_positions_disagree():
    ids = [[5, 0, 0], [5, 1, 1], [5, 3, 3], [5, 0, 0]]
    mask = [[1, 0, 0]] * 4
    s = infer({"input_ids": ids, "attention_mask": mask})  # 0 under only 4 of 8 masked positions
    assert s.pad_id is None and "pad_id" not in s.evidence


def test_eos_and_bos_from_position_restarts():
    docs = [[1, 10 + i, 20 + i] for i in range(10)]  # every document opens with bos 1 and is closed by eos 2
    cols = pack(docs, seq_len=8, eos=2)
    restarts = [(r, t) for r, row in enumerate(cols["position_ids"]) for t, p in enumerate(row) if p == 0 and t > 0]
    assert len(restarts) == 5 and all(cols["input_ids"][r][t - 1] == 2 for r, t in restarts)
    s = infer(cols)
    # bos is inferred only when no eos is found: an id at every document start may be a content word (issue 10)
    assert (s.eos_id, s.bos_id) == (2, None)
    assert s.evidence["eos_id"] == "id before 100% of 5 position restarts in the first 5 rows"
    s = infer(cols, separator="both")  # the convention asks for bos: the id at every restart, found nowhere else
    assert (s.eos_id, s.bos_id) == (2, 1)
    assert s.evidence["bos_id"] == ("id at 100% of 5 position restarts in the first 5 rows, and 100% of its "
                                    "occurrences are there")


def test_eos_from_the_last_real_token_of_padded_rows_with_a_known_pad_id():
    ids = [[5, 6, 2, 0, 0], [7, 2, 0, 0, 0], [8, 9, 9, 2, 0], [3, 2, 0, 0, 0], [4, 4, 4, 4, 2]]
    s = infer({"input_ids": ids}, pad_id=0)  # no attention mask: the trailing pad ids are not real tokens
    assert (s.eos_id, s.evidence["eos_id"]) == (2, "last real token of 100% of 4 padded rows in the first 5 rows")
    assert infer({"input_ids": ids}).eos_id is None  # unknown pad: the last tokens are 0 (4 rows) and 2: 80%


def test_bos_from_the_first_token_when_documents_open_with_bos():
    ids = [[1, 5, 6, 2], [1, 7, 2, 3], [1, 8, 8, 2], [1, 9, 2, 4], [1, 3, 3, 2]]
    # No eos: 3 of 5 rows (60%) end in 2, under the 90% bar. bos 1 opens every row and occurs nowhere else, so the
    # convention is inferred as bos-before (issue 10), each with its evidence.
    s = infer({"input_ids": ids})
    assert (s.eos_id, s.bos_id, s.separator) == (None, 1, "bos-before")
    assert s.source("separator") == "inferred" and "no eos was found" in s.evidence["separator"]
    assert "agree at 60% at most" in s.undecided["eos_id"]
    s = infer({"input_ids": ids}, separator="bos-before")
    assert (s.bos_id, s.evidence["bos_id"]) == (1, "id at 100% of 5 rows (their first real token) in the first 5 "
                                                   "rows, and 100% of its occurrences are there")
    # An id that opens every row but also occurs inside them is a content word, not a bos.
    words = [[7, 5, 6, 7], [7, 8, 9, 3], [7, 8, 8, 4], [7, 9, 5, 4], [7, 3, 3, 5]]
    s = infer({"input_ids": words})
    assert (s.bos_id, s.separator) == (None, "eos-after") and "83% of its occurrences" in s.undecided["bos_id"]


def test_no_eos_when_fewer_than_nine_in_ten_rows_agree():
    ids = [[5, 2], [6, 2], [7, 2], [8, 2], [9, 2], [5, 2], [6, 2], [7, 2], [8, 3], [9, 4]]  # 80% end in 2
    s = infer({"input_ids": ids})
    assert s.eos_id is None and "eos_id" not in s.evidence


def test_shifted_labels_are_recognised():
    ids = [[11, 12, 13, 14, 2], [21, 22, 23, 2, 31], [41, 42, 43, 44, 45], [51, 52, 2, 61, 62]]
    labels = [row[1:] + [-100] for row in ids]
    s = infer({"input_ids": ids, "labels": labels})
    assert (s.labels, s.source("labels")) == ("shifted", "inferred")
    assert s.evidence["labels"] == ("labels equal input_ids shifted by 1 at 100.0% of trained positions in the "
                                    "first 4 rows")


def test_aligned_labels_are_recognised_with_their_share():
    ids = [[11, 12, 13, 14, 2], [21, 22, 23, 2, 31], [41, 42, 43, 44, 45], [51, 52, 2, 61, 62]]
    labels = [list(row) for row in ids]
    labels[3][4] = 99  # one of 20 trained positions disagrees: 95% agreement
    s = infer({"input_ids": ids, "labels": labels})
    assert s.labels == "aligned"
    assert s.evidence["labels"] == ("labels equal input_ids shifted by 0 at 95.0% of trained positions in the "
                                    "first 4 rows")


@pytest.mark.parametrize("labels", [
    [[7, 8, 9, 10, 11], [1, 2, 3, 4, 5], [6, 6, 6, 6, 6], [3, 1, 4, 1, 5]],  # neither shift explains them
    [[-100] * 5] * 4,  # nothing trained: no evidence at all
    [[12, 13, 14, 2, -100], [21, 22, 23, 2, 31], [41, 42, 43, 44, 45], [51, 52, 2, 61, 62]],  # half and half
])
def test_no_label_convention_from_weak_evidence(labels):
    ids = [[11, 12, 13, 14, 2], [21, 22, 23, 2, 31], [41, 42, 43, 44, 45], [51, 52, 2, 61, 62]]
    s = infer({"input_ids": ids, "labels": labels})
    assert s.labels is None and "labels" not in s.evidence


def test_no_label_convention_when_both_shifts_explain_the_labels():
    ids = [[7] * 6] * 5  # runs of one id: labels equal input_ids under shift 0 and shift 1 alike
    labels = [[7] * 5 + [-100]] * 5
    assert infer({"input_ids": ids, "labels": labels}).labels is None


def test_inference_needs_a_tokenized_shard():
    s = infer({"text": ["a", "b", "c", "d", "e"]})
    assert (s.seq_len, s.eos_id, s.pad_id, s.labels, s.evidence) == (None, None, None, None, {})
