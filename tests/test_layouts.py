"""The layout matrix (tests/layouts.py): every layout pipelines write, clean and with one planted defect, scanned
with the shard's facts and with none.

Expectations come from the layouts' own construction (plain Python over the token lists) and from numpy: document
lengths as the shard stores them, their quantiles with ``numpy.percentile`` (default method, linear), padding and
rows cut at the window.  Token counts of text documents come from the ``tokenizers`` library (the tokenizer is
trained here on invented sentences).
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner
from corpuscle import Settings, scan
from corpuscle.cli import main
from corpuscle.findings import Level
from corpuscle.report import sarif

from tests import layouts as L
from tests.shards import findings, locations, validate_sarif, write

NAMES = ["chunk-positions-window", "chunk-positions-document", "chunk-positions-carry", "chunk-no-positions",
         "chunk-bos-before", "chunk-bos-eos", "chunk-doc_lengths", "chunk-cu_seqlens", "chunk-labels-shifted",
         "chunk-labels-shifted-boundary", "chunk-labels-aligned", "chunk-labels-aligned-boundary",
         "best-fit-positions-zero", "best-fit-positions-count", "one-per-row-right", "one-per-row-left",
         "one-per-row-right-no-mask", "one-per-row-left-no-mask", "one-per-row-pad-is-eos", "one-per-row-pad-is-eos-no-mask", "variable-rows",
         "chunk-positions-window-labels-shifted-boundary", "chunk-no-positions-labels-aligned-boundary",
         "chunk-bos-eos-no-positions", "chunk-bos-before-no-positions", "chunk-doc_lengths-positions",
         "chunk-uint16", "chunk-int32", "chunk-int64", "chunk-large_list", "chunk-fixed_size_list", "text-bytes",
         "text-tokenizer"]

#: Clean shards whose documents the data alone cannot tell apart: every row is a full, unpadded window and
#: nothing (no eos found, no position restart inside a row, no length column) marks a boundary. Without facts the
#: length rules must say so and skip, not guess.
UNDECIDED_WITHOUT_FACTS = {"chunk-positions-window", "chunk-no-positions", "one-per-row-pad-is-eos-no-mask",
                           "chunk-positions-window-labels-shifted-boundary",
                           "chunk-no-positions-labels-aligned-boundary", "chunk-bos-eos-no-positions",
                           "chunk-bos-before-no-positions"}


@pytest.fixture(scope="module")
def matrix(tmp_path_factory):
    folder = tmp_path_factory.mktemp("layouts")
    built, tokenizer = L.matrix(str(folder))
    assert [lay.name for lay in built] == NAMES
    return {lay.name: lay for lay in built}, folder


def _facts(lay, run):
    if run == "facts":
        return dict(lay.facts)
    return {"tokenizer": lay.facts["tokenizer"]} if "tokenizer" in lay.facts else {}


def _scan(lay, folder, run):
    path = lay.write(str(folder / f"{lay.name}.parquet"))
    return scan([path], Settings(**_facts(lay, run)), jobs=1)


def _rows_with_several_documents(lay) -> int:
    """Rows of a packed unpadded layout holding a boundary inside: an eos that a token follows (eos-after, both)
    or a bos after the row's first token (bos-before, both), counted with numpy."""
    ids = np.asarray(lay.columns["input_ids"] if isinstance(lay.columns["input_ids"], list)
                     else lay.columns["input_ids"].to_pylist())
    separator = lay.facts.get("separator", "eos-after")
    inside = np.zeros(len(ids), dtype=bool)
    if separator != "bos-before":
        inside |= (ids[:, :-1] == L.EOS).any(axis=1)
    if separator != "eos-after":
        inside |= (ids[:, 1:] == L.BOS).any(axis=1)
    return int(np.count_nonzero(inside))


@pytest.mark.parametrize("run", ["facts", "no-facts"])
@pytest.mark.parametrize("name", NAMES)
def test_clean_layout_has_no_error_no_contradicted_warning_and_exact_figures(matrix, name, run):
    layouts, folder = matrix
    lay = layouts[name]
    report = _scan(lay, folder, run)
    errors = [(f.rule_id, f.kind, f.message) for f in report.findings if f.level >= Level.error]
    assert errors == []
    warnings = {f"{f.rule_id}:{f.kind}": f for f in report.findings if f.level == Level.warning}
    assert set(warnings) <= set(lay.allowed), set(warnings) - set(lay.allowed)

    undecided = run == "no-facts" and name in UNDECIDED_WITHOUT_FACTS
    lengths = np.asarray(lay.doc_lengths)
    if run == "no-facts" and name == "one-per-row-pad-is-eos-no-mask":
        # pad id = eos id without a mask: most rows end in a run of 2, but the ids before it vary, so whether the
        # run starts with the eos (or the shard has no eos) cannot be told from the ids: neither is inferred, and
        # the checks that need them say why they were skipped.
        notes = " ".join(n.message for n in report.notes)
        assert "may be the eos id as well" in notes and "eos_id is not set and could not be inferred" in notes
    if undecided:
        skipped = [n.message for n in report.notes if n.rule_id == "overlong-document"]
        assert skipped and "could not be decided" in skipped[0]
        assert "documentTokens" not in report.metrics
        return

    # figures against numpy
    key = "documentBytes" if lay.unit == "bytes" else "documentTokens"
    figures = report.metrics[key]
    expected = {"documents": lengths.size, "max": int(lengths.max())}
    expected.update({f"p{p}": float(np.percentile(lengths, p)) for p in (50, 90, 99)})  # numpy's default method
    assert {k: figures[k] for k in expected} == expected
    if lay.slots:
        built = report.metrics["tokenBudget"]["asBuilt"]
        padding = lay.padding
        cut = len(lay.cut_rows)
        assert (built["slots"], built["padding"], built["truncated"]) == (lay.slots, padding, cut)

    # each warning's claim, checked against the layout
    over = warnings.get("overlong-document:longer-than-window")
    window_known = run == "facts" or not name.startswith("text")  # a text shard has no rows to infer it from
    expected_over = int(np.count_nonzero(lengths > L.WINDOW)) if lay.unit == "tokens" and window_known else 0
    assert (over.count if over else 0) == expected_over
    cut = warnings.get("overlong-document:cut")
    assert (sorted(cut.rows.tolist()) if cut else []) == (lay.cut_rows if built_cut(lay, run) else [])
    if cut:
        assert set(cut.offsets.tolist()) == {0} and "each row holds one document" in cut.message
    crossing = warnings.get("document-attention:crossing")
    if crossing:
        assert crossing.count == _rows_with_several_documents(lay)
    waste = warnings.get("truncation-waste:budget")
    if waste:
        assert waste.evidence["asBuilt"]["padding"] == report.metrics["tokenBudget"]["asBuilt"]["padding"]


def built_cut(lay, run) -> bool:
    """Whether the scan can see the cut rows: one document per row (and the eos known, given or inferred)."""
    return not lay.packed


#: Planted defects that need a fact the data cannot give (token-range needs vocab_size), or a separator the data
#: leaves undecided (see UNDECIDED_WITHOUT_FACTS): without facts they are skipped with a note instead.
NEEDS_FACTS = {"one-per-row-pad-is-eos-no-mask"} | UNDECIDED_WITHOUT_FACTS


@pytest.mark.parametrize("run", ["facts", "no-facts"])
@pytest.mark.parametrize("name", NAMES)
def test_planted_defect_is_found_at_its_row_and_offset(matrix, name, run):
    layouts, folder = matrix
    bad = L.defective(layouts[name])
    rule, kind, row, offset = bad.defect
    report = _scan(bad, folder, run)
    if run == "no-facts" and name in NEEDS_FACTS:
        assert not findings(report, rule, kind)
        if rule == "token-range":  # the upper bound is not checked, and the report says so
            assert findings(report, "token-range", "vocab-unset")
        else:
            assert any(n.rule_id == rule and "skipped" in n.message for n in report.notes)
        return
    found = findings(report, rule, kind)
    assert len(found) == 1 and locations(found[0]) == [(row, offset)]
    if run == "no-facts" and kind in ("boundary-no-eos", "boundary-no-bos", "unterminated-row", "doubled-eos",
                                      "doubled-bos", "lengths-vs-separators"):
        # the separator id was inferred, and the finding says that it rests on it
        assert "inferred from the data (heuristic)" in found[0].message
    # nothing else at error level but the defect (and label-alignment's view of the same padded label)
    others = {(f.rule_id, f.kind) for f in report.findings if f.level >= Level.error} - {(rule, kind)}
    assert others <= {("label-alignment", "pad-label")}


def test_packed_windows_with_restarting_positions_report_long_documents_and_no_cut(matrix):
    """Done-when of issue 10: position_ids restarting at each window (and document) in concatenate-and-chunk."""
    layouts, folder = matrix
    lay = layouts["chunk-positions-document"]
    for run in ("facts", "no-facts"):
        report = _scan(lay, folder, run)
        assert findings(report, "overlong-document", "cut") == []
        (long,) = findings(report, "overlong-document", "longer-than-window")
        lengths = np.asarray(lay.doc_lengths)
        assert long.count == int(np.count_nonzero(lengths > L.WINDOW)) == 14
        assert long.evidence["lengthQuantiles"]["max"] == int(lengths.max()) > 2 * L.WINDOW
        assert long.evidence["arrangement"] == "separators"


def test_a_few_rows_that_disagree_do_not_change_how_the_shard_is_read(matrix, tmp_path):
    """Issue 10 item 5: one document per row, pad id = eos id; two rows attend to their padding (mask 1 over it).
    The shard is still read as one document per row: the cut rows stay cut, no document is longer than the window,
    and the two rows are reported for what they are."""
    layouts, _ = matrix
    lay = layouts["one-per-row-pad-is-eos"]
    cols = {k: [list(r) for r in v] for k, v in lay.columns.items()}
    bent = [r for r, m in enumerate(cols["attention_mask"]) if sum(m) < L.WINDOW - 3][3:5]
    for r in bent:
        cols["attention_mask"][r] = [1] * L.WINDOW
    path = write(tmp_path / "bent.parquet", cols)
    report = scan([path], Settings(**lay.facts), jobs=1)
    assert findings(report, "overlong-document", "longer-than-window") == []
    (cut,) = findings(report, "overlong-document", "cut")
    assert sorted(cut.rows.tolist()) == lay.cut_rows
    (attended,) = findings(report, "padding-loss", "attended-padding")
    assert sorted(attended.rows.tolist()) == bent
    assert findings(report, "document-attention") == []


def _lengths_shard(tmp_path, column, values):
    ids = [[5, 6, L.EOS, 7, 8, 9, L.EOS, 4], [5, L.EOS, 6, 7, 8, L.EOS, 9, 4], [5, 6, 7, L.EOS, 8, 9, 4, L.EOS]]
    return write(tmp_path / f"{column}.parquet", {"input_ids": ids, column: values})


@pytest.mark.parametrize("column,values,kind,expected", [
    # per-row lengths: a negative length (offset: where that piece starts), a sum short of the row (offset: the sum)
    ("doc_lengths", [[3, 4, 1], [2, -1, 7], [4, 3]], "lengths-mismatch", [(1, 2), (2, 7)]),
    # cumulative offsets: not starting at 0, going down (offset: the value before the drop), ending past the row
    ("cu_seqlens", [[1, 3, 8], [0, 6, 2, 8], [0, 4, 9]], "lengths-mismatch", [(0, 0), (1, 6), (2, 8)]),
    # an offset past the row, then a drop: located at the row's end (offsets stay inside the row)
    ("cu_seqlens", [[0, 99, 8], [0, 2, 6, 8], [0, 4, 8]], "lengths-mismatch", [(0, 8)]),
    # a boundary one token late: no eos before it (offset: the boundary the column gives)
    ("cu_seqlens", [[0, 3, 7, 8], [0, 3, 6, 8], [0, 4, 8]], "lengths-vs-separators", [(1, 3)]),
])
def test_length_columns_that_contradict_the_tokens(tmp_path, column, values, kind, expected):
    path = _lengths_shard(tmp_path, column, values)
    report = scan([path], Settings(eos_id=L.EOS, seq_len=8), jobs=1)
    (f,) = findings(report, "missing-separator", kind)
    assert locations(f) == expected
    assert f.level == Level.error and f.count == len(expected)
    other = "lengths-vs-separators" if kind == "lengths-mismatch" else "lengths-mismatch"
    assert findings(report, "missing-separator", other) == []


def test_length_columns_define_documents_and_stop_attention(tmp_path):
    path = _lengths_shard(tmp_path, "doc_lengths", [[3, 4, 1], [2, 4, 2], [4, 4]])
    report = scan([path], Settings(eos_id=L.EOS, seq_len=8), jobs=1)
    assert findings(report, "document-attention") == []
    assert [f for f in report.findings if f.level >= Level.warning] == []
    # documents: 3, 4, then 1 + 2 (the first row ends mid-document), 4, 2 + 4, 4
    assert report.metrics["documentTokens"]["documents"] == 6
    assert report.metrics["documentTokens"]["max"] == 6


def test_separator_and_columns_from_the_command_line(matrix, tmp_path):
    """--separator, --bos-id and the column flags reach the rules: a bos-before shard whose token column has
    another name scans clean; the same shard under the default separator says what to change."""
    layouts, _ = matrix
    lay = layouts["chunk-bos-before"]
    cols = {("tokens" if k == "input_ids" else "pos" if k == "position_ids" else k): v
            for k, v in lay.columns.items()}
    path = write(tmp_path / "renamed.parquet", cols)
    out = tmp_path / "r.json"
    runner = CliRunner()
    res = runner.invoke(main, ["scan", path, "--separator", "bos-before", "--bos-id", str(L.BOS), "--tokens-column",
                               "tokens", "--positions-column", "pos", "--seq-len", str(L.WINDOW), "--json", str(out),
                               "--quiet", "--jobs", "1"])
    assert res.exit_code == 0, res.output
    data = json.loads(out.read_text())
    assert [(f["rule"], f["kind"]) for f in data["findings"] if f["level"] != "note"] == [
        ("overlong-document", "longer-than-window")]  # the 14 long documents, nothing else
    assert data["metrics"]["documentTokens"]["documents"] == len(lay.doc_lengths)
    # A bos-before shard scanned as eos-after (an eos id given, the default separator): glued documents, and the
    # message names the setting to change.
    res = runner.invoke(main, ["scan", path, "--bos-id", str(L.BOS), "--eos-id", str(L.EOS), "--tokens-column",
                               "tokens", "--seq-len", str(L.WINDOW), "--quiet", "--jobs", "1", "--json", str(out)])
    assert res.exit_code == 1
    (glued,) = [f for f in json.loads(out.read_text())["findings"] if f["kind"] == "no-eos"]
    assert "--separator bos-before" in glued["message"]
    for flag in ("--labels-column", "--mask-column", "--text-column", "--doc-lengths-column", "--cu-seqlens-column",
                 "--ignore-index"):
        assert flag in runner.invoke(main, ["scan", "--help"]).output


def test_masked_real_tokens_are_not_called_labels_at_padding(tmp_path):
    """Issue 10 item 6: a mask of 0 over real tokens (not the pad id) is reported as masked real tokens; their
    labels are not "labels at positions that are padding"."""
    ids = [[5, 6, 7, L.EOS, 0, 0], [8, 9, 10, 11, L.EOS, 0], [4, 5, L.EOS, 0, 0, 0], [6, 6, 7, 8, 9, L.EOS]]
    mask = [[int(t != 0) for t in row] for row in ids]
    mask[1][1] = mask[1][2] = 0  # two real tokens hidden
    labels = [[v if m else L.IGNORE for v, m in zip(row[1:] + [L.IGNORE], mrow[1:] + [0])]
              for row, mrow in zip(ids, mask)]
    labels[1][1] = 10  # trained although its token is masked (it is real: id 9, not the pad id)
    path = write(tmp_path / "masked.parquet", {"input_ids": ids, "attention_mask": mask, "labels": labels})
    report = scan([path], Settings(eos_id=L.EOS, pad_id=0, labels="shifted", seq_len=6), jobs=1)
    (hidden,) = findings(report, "padding-loss", "masked-real-tokens")
    assert locations(hidden) == [(1, 1)] and hidden.evidence["positions"] == 2
    assert findings(report, "padding-loss", "trained-padding") == []


@pytest.mark.parametrize("name", ["chunk-positions-document", "chunk-positions-carry", "chunk-no-positions",
                                  "chunk-bos-eos"])
def test_packed_stream_measured_across_shards(matrix, tmp_path, name):
    """A packed stream written as three consecutive shards reads as the one shard does: documents that run from
    one shard into the next count once, whole (figures equal to the numpy ones of the single shard)."""
    layouts, _ = matrix
    lay = layouts[name]
    ids = lay.columns["input_ids"]
    cuts = [19, 37]  # row indices where the stream is cut into shards (each inside a long document or not)
    paths = []
    for k, (lo, hi) in enumerate(zip([0] + cuts, cuts + [len(ids)])):
        paths.append(write(tmp_path / f"part-{k}.parquet", {c: v[lo:hi] for c, v in lay.columns.items()}))
    report = scan(paths, Settings(**lay.facts), jobs=1)
    lengths = np.asarray(lay.doc_lengths)
    figures = report.metrics["documentTokens"]
    expected = {"documents": lengths.size, "max": int(lengths.max())}
    expected.update({f"p{p}": float(np.percentile(lengths, p)) for p in (50, 90, 99)})
    assert {k: figures[k] for k in expected} == expected
    assert report.metrics["tokenBudget"]["documents"] == lengths.size
    assert not [f for f in report.findings if f.level >= Level.error]
    # long documents: the per-shard findings count the pieces over the window, the corpus finding the documents
    # over it only when joined; none is cut
    assert findings(report, "overlong-document", "cut") == []


def test_document_longer_than_the_window_only_across_two_shards(matrix, tmp_path):
    """The 66-token document (65 words and its eos) cut by a shard boundary into two pieces that each fit the
    window: reported once, across the shards, at its start in the first shard."""
    layouts, _ = matrix
    lay = layouts["chunk-positions-document"]
    lengths = np.asarray(lay.doc_lengths)
    doc = int(np.flatnonzero(lengths == L.WINDOW + 2)[0])
    start = int(lengths[:doc].sum())
    cut = start // L.WINDOW + 1  # the first row boundary inside the document
    assert 0 < cut * L.WINDOW - start <= L.WINDOW and start + lengths[doc] - cut * L.WINDOW <= L.WINDOW
    ids = lay.columns["input_ids"]
    paths = [write(tmp_path / f"s{k}.parquet", {c: v[lo:hi] for c, v in lay.columns.items()})
             for k, (lo, hi) in enumerate([(0, cut), (cut, len(ids))])]
    report = scan(paths, Settings(**lay.facts), jobs=1)
    (across,) = findings(report, "overlong-document", "across-shards")
    assert across.count == 1 and across.evidence["lengths"] == [L.WINDOW + 2]
    assert across.instances() == [{"row": start // L.WINDOW, "offset": start % L.WINDOW, "uri": paths[0]}]
    assert report.metrics["documentTokens"]["documents"] == lengths.size
    log = validate_sarif(json.loads(sarif.render(report)))  # the OASIS SARIF 2.1.0 schema (tests/data)
    (result,) = [r for r in log["runs"][0]["results"] if r["ruleId"] == "overlong-document"
                 and r["properties"]["instances"][0].get("uri")]
    assert result["properties"]["count"] == 1


def test_length_column_names_are_settings(tmp_path):
    from corpuscle.settings import SettingsError

    with pytest.raises(SettingsError, match="cu_seqlens_column must be a column name"):
        Settings(cu_seqlens_column="")
    ids = [[5, 6, L.EOS, 7, 8, 9, L.EOS, 4], [5, L.EOS, 6, 7, 8, L.EOS, 9, 4]]
    path = write(tmp_path / "offsets.parquet", {"input_ids": ids, "offsets": [[0, 3, 7, 8], [0, 3, 6, 8]]})
    out = tmp_path / "r.json"
    res = CliRunner().invoke(main, ["scan", path, "--cu-seqlens-column", "offsets", "--eos-id", str(L.EOS),
                                    "--seq-len", "8", "--json", str(out), "--quiet", "--jobs", "1"])
    assert res.exit_code == 1, res.output  # row 1: the boundary at 3 follows no eos
    (f,) = [f for f in json.loads(out.read_text())["findings"] if f["kind"] == "lengths-vs-separators"]
    assert f["instances"] == [{"row": 1, "offset": 3}] and f["evidence"]["column"] == "offsets"
