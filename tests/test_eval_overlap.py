"""eval-overlap: evaluation items sharing a word n-gram with the training data, in text and in tokenized shards.

Outside truth: the overlap definition of Brown et al. 2020, "Language Models are Few-Shot Learners", Appendix C
(n-grams of words, ignoring punctuation, whitespace and casing; n = 13 at most -- from memory), computed here in plain
Python over word lists (str.lower and str.isalnum), independently of the code under test.
"""
from __future__ import annotations

import itertools
import json
import pickle
import random

import numpy as np
import pytest
from corpuscle import Settings, scan
from corpuscle.kernels import ngrams
from corpuscle.report import droplist, sarif

from tests.shards import findings, pack, validate_sarif, write
from tests.tiny_tokenizers import EOS, invented_words, sentences, train_bpe

RULE = "eval-overlap"
N = 13


def reference_words(text: str) -> list[str]:
    """Words as the cited appendix defines them: lowercase, punctuation and whitespace ignored -- here, maximal runs
    of characters for which Python's str.isalnum is true, after str.lower."""
    return ["".join(group) for alnum, group in itertools.groupby(text.lower(), key=str.isalnum) if alnum]


def word_starts(text: str) -> list[int]:
    """Character offset of each reference word in ``text``."""
    starts, previous = [], False
    for i, ch in enumerate(text):
        if ch.isalnum() and not previous:
            starts.append(i)
        previous = ch.isalnum()
    return starts


def grams(words: list[str], n: int) -> set[tuple]:
    return {tuple(words[i:i + n]) for i in range(len(words) - n + 1)}


# -- normalization --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("text, words", [
    # Worked examples of "ignoring all punctuation, whitespace and casing" (written for this test).
    ("The Gull's nest -- ON the CLIFF!", ["the", "gull", "s", "nest", "on", "the", "cliff"]),
    ("Don't stop-thinking, 42nd time.", ["don", "t", "stop", "thinking", "42nd", "time"]),
    ("tabs\tand\nnewlines   and__underscores", ["tabs", "and", "newlines", "and", "underscores"]),
    ("Ünïcode STRASSE über Æther", ["ünïcode", "strasse", "über", "æther"]),
    ("...", []),
    ("", []),
])
def test_words_follow_the_published_normalization(text, words):
    assert reference_words(text) == words
    assert ngrams.normalized_words(text) == words
    split = ngrams.split_words([text])
    got = [bytes(split.data[a:b]).decode() for a, b in zip(split.offsets[:-1].tolist(), split.offsets[1:].tolist())]
    assert got == words
    assert split.texts.tolist() == [0, len(words)]


def test_ngram_hashes_match_the_plain_python_definition():
    texts = ["Alpha beta, gamma delta epsilon.", "zeta", "Eta theta iota kappa"]
    words = ngrams.split_words(texts)
    starts = ngrams.ngram_starts(words, 3)
    expected = [(t, i) for t, text in enumerate(texts) for i in range(len(reference_words(text)) - 2)]
    assert len(starts) == len(expected) == 5  # 3 + 0 + 2 trigrams: none crosses a text's end
    hashes = ngrams.ngram_hashes(words, starts, 3).tolist()
    assert hashes == [ngrams.ngram_hash(reference_words(texts[t])[i:i + 3]) for t, i in expected]


def test_a_hash_match_is_only_counted_when_the_words_are_equal():
    a = ngrams.split_words(["one two three four", "one two three fore"])
    b = ngrams.split_words(["one two three four"])
    ok = ngrams.verify(a, np.array([0, 4]), b, np.array([0, 0]), 4)
    assert ok.tolist() == [True, False]


# -- an invented corpus with planted evaluation items ---------------------------------------------------------


def corpus():
    """Training documents, 23 evaluation items holding a verbatim span (>= 40 words) of a known document, and 30
    clean items that share no 8-word span with any document (checked here in plain Python)."""
    rng = random.Random(5)
    vocab = invented_words(2500, seed=3)
    docs = [" ".join(sentences(vocab, rng.randint(10, 16), seed=100 + d)) for d in range(60)]
    contaminated, sources = [], []
    for k in range(23):
        d = rng.randrange(len(docs))
        pieces = docs[d].split(" ")
        length = rng.randint(40, 60)
        start = rng.randrange(0, len(pieces) - length)
        span = " ".join(pieces[start:start + length])
        if k % 3 == 1:
            span = span.upper()  # casing is ignored
        if k % 3 == 2:
            span = span.replace(" ", "  ").replace(",", " ;")  # so are whitespace and punctuation
        lead = " ".join(sentences(vocab, 1, seed=900 + k))
        contaminated.append(f"Question {k}: {lead} {span} What follows?")
        sources.append(d)
    clean = [" ".join(sentences(vocab, 4, seed=5000 + k)) for k in range(30)]
    doc_grams = set().union(*(grams(reference_words(d), 8) for d in docs))
    assert all(not grams(reference_words(c), 8) & doc_grams for c in clean)  # no 8-word span shared
    assert all(len(reference_words(c)) >= N for c in clean)
    return docs, contaminated, sources, clean


@pytest.fixture(scope="module")
def planted():
    docs, contaminated, sources, clean = corpus()
    items = []
    for k in range(max(len(contaminated), len(clean))):  # interleaved: contaminated on even lines
        if k < len(contaminated):
            items.append(contaminated[k])
        if k < len(clean):
            items.append(clean[k])
    expected = {line for line, item in enumerate(items) if item in contaminated}
    assert len(expected) == 23
    # The outside truth: items sharing a 13-gram with a document, by plain Python over word lists.
    doc_grams = [grams(reference_words(d), N) for d in docs]
    truth = {line for line, item in enumerate(items)
             if any(grams(reference_words(item), N) & g for g in doc_grams)}
    assert truth == expected
    return docs, items, expected, doc_grams


def write_eval(path, items, blank_at=None):
    lines = [json.dumps({"id": k, "text": t}) for k, t in enumerate(items)]
    path.write_text("\n".join(lines) + "\n")
    return str(path)


def overlap(report):
    [found] = findings(report, RULE, "contaminated")
    return found


def test_text_corpus_reports_exactly_the_contaminated_items(tmp_path, planted):
    docs, items, expected, doc_grams = planted
    write(tmp_path / "train" / "a.jsonl", {"text": docs[:30]})
    write(tmp_path / "train" / "b.parquet", {"text": docs[30:]})
    ev = write_eval(tmp_path / "qa.jsonl", items)
    report = scan([str(tmp_path / "train")], Settings(eval=(ev,), only=(RULE,)), jobs=1)
    found = overlap(report)
    assert found.level.name == "error"
    assert set(found.rows.tolist()) == expected and found.count == 23
    assert [i["uri"] for i in found.instances()] == [ev] * 23
    ev_info = found.evidence
    assert ev_info["items"] == len(items) and ev_info["itemsChecked"] == len(items)
    assert ev_info["contaminatedShare"] == round(23 / len(items), 6)
    assert "neither proves nor excludes" in found.message
    # Every training location: the document the span came from, at the character offset of the first shared 13-gram.
    uris = {0: "a.jsonl", 1: "b.parquet"}
    for entry in ev_info["overlaps"]:
        item = items[entry["line"]]
        item_grams = grams(reference_words(item), N)
        truth = {d for d, g in enumerate(doc_grams) if g & item_grams}
        got = {(loc["uri"].split("/")[-1], loc["row"]) for loc in entry["locations"]}
        assert got == {(uris[d // 30], d % 30) for d in truth}
        assert entry["trainingRows"] == len(truth)
        for loc in entry["locations"]:
            d = (0 if loc["uri"].endswith("a.jsonl") else 30) + loc["row"]
            words = reference_words(docs[d])
            first = next(i for i in range(len(words)) if tuple(words[i:i + N]) in item_grams)
            assert loc["offset"] == word_starts(docs[d])[first]
    metrics = report.metrics["evalOverlap"]
    assert metrics["contaminatedItems"] == 23 and metrics["hashCollisions"] == 0
    # The drop list: every training document that shares a 13-gram with an item.
    dropped = {(e["uri"].split("/")[-1], e["row"]) for e in droplist.entries(report)}
    assert dropped == {(uris[d // 30], d % 30) for d, g in enumerate(doc_grams)
                       if any(g & grams(reference_words(items[line]), N) for line in expected)}
    validate_sarif(json.loads(sarif.render(report)))


def tokenized_shards(tmp_path, docs, tokenizer, seq_len=64):
    ids = [enc.ids for enc in tokenizer.encode_batch(docs, add_special_tokens=False)]
    half = len(ids) // 2
    write(tmp_path / "tok" / "a.parquet", pack(ids[:half], seq_len, eos=EOS))
    write(tmp_path / "tok" / "b.parquet", pack(ids[half:], seq_len, eos=EOS))
    return str(tmp_path / "tok")


def test_tokenized_and_packed_corpus_gives_the_same_items(tmp_path, planted):
    pytest.importorskip("tokenizers")
    docs, items, expected, _ = planted
    tokenizer = train_bpe(docs, 600)
    tokenizer.save(str(tmp_path / "tok.json"))
    folder = tokenized_shards(tmp_path, docs, tokenizer)
    ev = write_eval(tmp_path / "qa.jsonl", items)
    settings = Settings(eval=(ev,), only=(RULE,), tokenizer=str(tmp_path / "tok.json"), eos_id=EOS)
    report = scan([folder], settings, jobs=1)
    found = overlap(report)
    reported = set(found.rows.tolist())
    assert reported <= expected  # never a clean item
    assert len(reported) >= 20  # spans cut by a window boundary may be lost; in practice all 23 are found
    assert reported == expected
    # A location's token offset is where a shared 13-gram starts in that window.
    table = {}
    for shard in ("a", "b"):
        import pyarrow.parquet as pq

        table[shard] = pq.read_table(str(tmp_path / "tok" / f"{shard}.parquet")).column("input_ids").to_pylist()
    for entry in found.evidence["overlaps"]:
        item_grams = grams(reference_words(items[entry["line"]]), N)
        for loc in entry["locations"]:
            row = table[loc["uri"].split("/")[-1][0]][loc["row"]]
            tail = row[loc["offset"]:]
            tail = tail[:tail.index(EOS)] if EOS in tail else tail
            words = reference_words(tokenizer.decode(tail))
            assert tuple(words[:N]) in item_grams


def test_short_items_are_matched_whole_and_bad_records_are_findings(tmp_path, planted):
    docs, items, _, _ = planted
    write(tmp_path / "a.jsonl", {"text": docs})
    pieces = docs[0].split(" ")
    short = " ".join(pieces[3:13])  # 10 words copied verbatim: shorter than n, matched whole (Brown et al. 2020)
    shuffled = " ".join(pieces[13:23][::-1])  # 10 words of the document, not in a row
    tiny = " ".join(pieces[:5])  # 5 words: below min_words, not checked
    assert 8 <= len(reference_words(short)) < N and len(reference_words(tiny)) < 8
    ev = tmp_path / "qa.jsonl"
    ev.write_text("\n".join([json.dumps({"text": short}), "", "{broken", json.dumps({"question": "x"}),
                             json.dumps({"text": items[0]}), json.dumps({"text": shuffled}),
                             json.dumps({"text": tiny})]) + "\n")
    report = scan([str(tmp_path / "a.jsonl")], Settings(eval=(str(ev),), only=(RULE,)), jobs=1)
    found = overlap(report)
    assert found.rows.tolist() == [0, 4] and found.start_line == 1  # 0-based lines (the blank line 1 counted)
    assert found.evidence["itemsChecked"] == 3
    assert "1 item(s) shorter than 8 words were not checked" in found.message
    [loc] = found.evidence["overlaps"][0]["locations"]
    assert (loc["row"], loc["offset"]) == (0, word_starts(docs[0])[3])
    [bad] = findings(report, RULE, "unreadable-items")
    assert bad.level.name == "warning" and bad.rows.tolist() == [2, 3]
    assert report.metrics["evalOverlap"]["itemsTooShort"] == 1
    # min_words = 13: only n-grams, as many items as are long enough
    report = scan([str(tmp_path / "a.jsonl")], Settings(eval=(str(ev),), only=(RULE,), rule={RULE: {"min_words": 13}}),
                  jobs=1)
    assert overlap(report).rows.tolist() == [4]


def test_option_n_changes_the_span(tmp_path, planted):
    docs, _, _, _ = planted
    write(tmp_path / "a.jsonl", {"text": docs})
    words = docs[4].split(" ")
    item = "Intro " + " ".join(words[10:18]) + " outro"  # 8 words verbatim
    ev = write_eval(tmp_path / "qa.jsonl", [item])
    report = scan([str(tmp_path / "a.jsonl")], Settings(eval=(ev,), only=(RULE,)), jobs=1)
    assert not findings(report, RULE, "contaminated")
    report = scan([str(tmp_path / "a.jsonl")], Settings(eval=(ev,), only=(RULE,), rule={RULE: {"n": 8}}), jobs=1)
    assert overlap(report).rows.tolist() == [0]


def test_parallel_scan_and_pickled_rule_give_the_same_report(tmp_path, planted):
    docs, items, expected, _ = planted
    for k in range(4):
        write(tmp_path / "train" / f"s{k}.jsonl", {"text": docs[k * 15:(k + 1) * 15]})
    ev = write_eval(tmp_path / "qa.jsonl", items)
    settings = Settings(eval=(ev,), only=(RULE,))
    one = scan([str(tmp_path / "train")], settings, jobs=1)
    two = scan([str(tmp_path / "train")], settings, jobs=2)
    assert overlap(one).evidence == overlap(two).evidence
    assert droplist.entries(one) == droplist.entries(two)
    from corpuscle.engine.registry import registry

    rule = registry()[RULE]()
    assert len(pickle.dumps(rule)) < 2000  # the evaluation set stays out of the rule: loaded once per process
    # A shard's state keeps only the items it overlaps, whatever the size of the evaluation set.
    from corpuscle.engine.scan import scan_shard
    from corpuscle.io.sources import discover

    shard = discover([str(tmp_path / "train" / "s0.jsonl")])[0]
    state = scan_shard(shard, settings, [rule]).states[RULE]
    sources = {loc["row"] for e in overlap(one).evidence["overlaps"] for loc in e["locations"]
               if loc["uri"].endswith("s0.jsonl")}
    assert state.counts is None and len(state.hit_items) == sum(
        1 for e in overlap(one).evidence["overlaps"] if any(loc["uri"].endswith("s0.jsonl") for loc in e["locations"]))
    assert sorted(np.concatenate(state.rows).tolist()) == sorted(sources)
    assert len(pickle.dumps(state)) < 20_000


def test_without_eval_sets_the_rule_is_skipped_with_a_reason(tmp_path):
    write(tmp_path / "a.jsonl", {"text": ["one two three"]})
    report = scan([str(tmp_path / "a.jsonl")], Settings(only=(RULE,)), jobs=1)
    assert not report.findings
    assert [n.message for n in report.notes if n.rule_id == RULE] == [
        "skipped: no evaluation set given (--eval FILE, or eval = [...] in the settings file)"]


def test_cli_eval_is_repeatable_and_a_missing_file_is_a_usage_error(tmp_path, planted, monkeypatch):
    from click.testing import CliRunner
    from corpuscle.cli import main

    docs, items, expected, _ = planted
    monkeypatch.chdir(tmp_path)
    write(tmp_path / "a.jsonl", {"text": docs})
    write_eval(tmp_path / "one.jsonl", items[:10])
    write_eval(tmp_path / "two.jsonl", items[10:])
    result = CliRunner().invoke(main, ["scan", "a.jsonl", "--eval", "one.jsonl", "--eval", "two.jsonl", "--only", RULE,
                                       "--json", "r.json", "--jobs", "1"])
    assert result.exit_code == 1, result.output
    report = json.loads((tmp_path / "r.json").read_text())
    got = {(f["uri"], i["row"]) for f in report["findings"] if f["kind"] == "contaminated" for i in f["instances"]}
    assert got == {("one.jsonl", k) for k in expected if k < 10} | {("two.jsonl", k - 10) for k in expected if k >= 10}
    result = CliRunner().invoke(main, ["scan", "a.jsonl", "--eval", "nope.jsonl"])
    assert result.exit_code == 2 and "evaluation set nope.jsonl does not exist" in result.output
    (tmp_path / "corpuscle.toml").write_text('eval = ["one.jsonl"]\n')
    result = CliRunner().invoke(main, ["scan", "a.jsonl", "--only", RULE, "--json", "r.json", "--jobs", "1"])
    report = json.loads((tmp_path / "r.json").read_text())
    assert {f["uri"] for f in report["findings"]} == {"one.jsonl"}


def test_split_shards_and_a_dask_cluster_report_what_one_local_scan_reports(tmp_path, planted, monkeypatch):
    from corpuscle.engine import split
    from corpuscle.engine.registry import registry
    from corpuscle.engine.scan import run, select_rules
    from corpuscle.io import sources
    from corpuscle.io.sources import discover

    docs, items, expected, _ = planted
    write(tmp_path / "train" / "a.jsonl", {"text": docs[:40]})
    write(tmp_path / "train" / "b.parquet", {"text": docs[40:]}, row_group_size=4)
    ev = write_eval(tmp_path / "qa.jsonl", items)
    settings = Settings(eval=(ev,), only=(RULE,))
    paths = discover([str(tmp_path / "train")])
    whole = run(paths, settings, select_rules(settings, registry()), jobs=1)

    class SerialPair:  # says it has two processes, runs the parts here one after the other
        jobs = 2

        def map(self, fn, items):
            return map(fn, list(items))

    monkeypatch.setattr(split, "SPLIT_BYTES", 0)
    monkeypatch.setattr(sources, "DEFAULT_BATCH_BYTES", 2000)
    planned = []
    plan = split.plan
    monkeypatch.setattr(split, "plan", lambda *a, **k: planned.append(plan(*a, **k)) or planned[-1])
    parted = run(paths, settings, select_rules(settings, registry()), executor=SerialPair())
    assert any(p and len(p) > 1 for p in planned)  # the shards were scanned in parts
    assert overlap(parted).evidence == overlap(whole).evidence
    assert droplist.entries(parted) == droplist.entries(whole)
    assert set(overlap(whole).rows.tolist()) == expected

    pytest.importorskip("distributed", reason="the cluster extra is not installed: pip install '.[cluster]'")
    from corpuscle.engine.executors import DaskExecutor

    monkeypatch.undo()
    with DaskExecutor("local", jobs=2) as executor:
        on_cluster = run(paths, settings, select_rules(settings, registry()), executor=executor)
    assert overlap(on_cluster).evidence == overlap(whole).evidence
    assert droplist.entries(on_cluster) == droplist.entries(whole)


def test_ascii_and_unicode_texts_split_alike_in_any_mix():
    texts = ["Plain ASCII, words: 12ab!", None, "Ünïcode Grüße, ÆTHER", "", "--", "Mixed ASCII again; x_y"] * 3
    words = ngrams.split_words(texts)
    got = [[bytes(words.data[a:b]).decode() for a, b in zip(words.offsets[lo:hi].tolist(),
                                                             words.offsets[lo + 1:hi + 1].tolist())]
           for lo, hi in zip(words.texts[:-1].tolist(), words.texts[1:].tolist())]
    assert got == [reference_words(t or "") for t in texts]
    assert words.ids.tolist() == [ngrams.word_id(w) for t in texts for w in reference_words(t or "")]


def test_tokenized_evaluation_items_and_ids_a_tokenizer_cannot_decode(tmp_path, planted):
    import pyarrow as pa
    import pyarrow.parquet as pq

    pytest.importorskip("tokenizers")
    docs, items, expected, _ = planted
    tokenizer = train_bpe(docs, 600)
    tok = str(tmp_path / "tok.json")
    tokenizer.save(tok)
    ids = [enc.ids for enc in tokenizer.encode_batch(docs, add_special_tokens=False)]
    cols = pack(ids, 64, eos=EOS)
    for row in (0, 5, 9):  # ids no tokenizer can decode: negative, beyond its vocabulary, beyond 32 bits
        cols["input_ids"][row][30:33] = [-5, 700, 2 ** 40]
    pq.write_table(pa.table({"input_ids": pa.array(cols["input_ids"], pa.list_(pa.int64()))}),
                   str(tmp_path / "train.parquet"))
    # The evaluation set as token ids, each item between <s> and </s> (ids 1 and 2 of the tiny tokenizers).
    item_ids = [[1] + enc.ids + [EOS] for enc in tokenizer.encode_batch(items, add_special_tokens=False)]
    pq.write_table(pa.table({"input_ids": item_ids}), str(tmp_path / "qa.parquet"))
    report = scan([str(tmp_path / "train.parquet")],
                  Settings(eval=(str(tmp_path / "qa.parquet"),), only=(RULE,), tokenizer=tok, eos_id=EOS), jobs=1)
    assert not [n for n in report.notes if n.level.name == "error"]
    found = overlap(report)
    assert set(found.rows.tolist()) == expected
    assert found.start_line is None  # Parquet: record indices, no lines
    # Without --tokenizer a tokenized evaluation set cannot be read: a finding on that file, not a crash.
    write(tmp_path / "text.jsonl", {"text": docs})
    report = scan([str(tmp_path / "text.jsonl")], Settings(eval=(str(tmp_path / "qa.parquet"),), only=(RULE,)), jobs=1)
    [unusable] = findings(report, RULE, "unusable-eval-file")
    assert unusable.level.name == "error" and "give --tokenizer FILE" in unusable.message
