"""tokenizer-mismatch: a shard checked against the tokenizer file given with --tokenizer.

Outside truth: the ``tokenizers`` library itself (two byte-level BPE tokenizers trained here on different invented
text, same vocabulary size and special ids); the shard is made with one of them by the library's own encoder.
"""
from __future__ import annotations

import json

import pytest
from corpuscle import Settings, scan
from corpuscle.report import json as json_report
from corpuscle.report import sarif

from tests.shards import findings, pack, validate_sarif, write

pytest.importorskip("tokenizers")
from tests.tiny_tokenizers import BOS, EOS, PAD, invented_words, sentences, train_bpe  # noqa: E402

RULE = "tokenizer-mismatch"
SIZE = 600


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    """A corpus tokenized with tokenizer A, and the files of A and of B (same size and special ids, trained on
    other text)."""
    folder = tmp_path_factory.mktemp("tok")
    words_a, words_b = invented_words(1500, seed=21), invented_words(1500, seed=22)
    text_a = sentences(words_a, 3000, seed=1)
    text_b = sentences(words_b, 3000, seed=2)
    a, b = train_bpe(text_a, SIZE), train_bpe(text_b, SIZE)
    assert a.get_vocab_size() == b.get_vocab_size() == SIZE
    assert a.get_vocab() != b.get_vocab()
    a.save(str(folder / "a.json"))
    b.save(str(folder / "b.json"))
    docs = [" ".join(sentences(words_a, 8, seed=100 + d)) for d in range(80)]
    ids = [e.ids for e in a.encode_batch(docs, add_special_tokens=False)]
    shard = write(folder / "shard.parquet", pack(ids, 128, eos=EOS, pad=PAD))
    # The same documents tokenized with B.
    ids_b = [e.ids for e in b.encode_batch(docs, add_special_tokens=False)]
    write(folder / "shard_b.parquet", pack(ids_b, 128, eos=EOS, pad=PAD))
    return folder, shard, ids


def run(shard, tokenizer, **facts):
    return scan([shard], Settings(only=(RULE,), tokenizer=tokenizer, **facts), jobs=1)


def test_the_right_tokenizer_is_clean_and_the_wrong_one_is_reported(made):
    folder, shard, _ = made
    right = run(shard, str(folder / "a.json"), eos_id=EOS, pad_id=PAD, bos_id=BOS, vocab_size=SIZE)
    assert findings(right, RULE) == []
    wrong = run(shard, str(folder / "b.json"), eos_id=EOS, pad_id=PAD, bos_id=BOS, vocab_size=SIZE)
    [found] = findings(wrong, RULE)
    assert (found.kind, found.level.name) == ("round-trip", "error")
    evidence = found.evidence
    assert evidence["mismatchRate"] > evidence["baselineRate"] + 0.1 and evidence["baselineRate"] == 0.0
    assert evidence["segments"] > 0 and evidence["comparedTokens"] > 0
    assert 1 <= len(evidence["examples"]) <= 3
    assert all(len(e["text"]) <= 80 and e["roundTripToken"] for e in evidence["examples"])
    assert "heuristic" in found.message
    validate_sarif(json.loads(sarif.render(wrong)))
    # The same corpus tokenized with B: clean with B, reported with A.
    other = str(folder / "shard_b.parquet")
    assert findings(run(other, str(folder / "b.json"), eos_id=EOS, pad_id=PAD, vocab_size=SIZE), RULE) == []
    assert [f.kind for f in findings(run(other, str(folder / "a.json"), eos_id=EOS, pad_id=PAD, vocab_size=SIZE),
                                     RULE)] == ["round-trip"]


def test_vocab_size_and_special_ids_against_the_tokenizer(made):
    folder, shard, _ = made
    tok = str(folder / "a.json")
    report = run(shard, tok, eos_id=EOS, vocab_size=SIZE - 88)
    [small] = findings(report, RULE, "vocab-size-smaller")
    assert small.level.name == "error" and small.evidence["tokenizerSize"] == SIZE
    report = run(shard, tok, eos_id=EOS, vocab_size=640)
    [large] = findings(report, RULE, "vocab-size-larger")
    assert large.level.name == "note"
    # An eos id that is an ordinary token of the tokenizer (given: an error).
    report = run(shard, tok, eos_id=7, vocab_size=SIZE)
    [special] = findings(report, RULE, "special-eos")
    assert special.level.name == "error" and special.evidence["specialTokens"] == [
        {"id": 0, "token": "<pad>"}, {"id": 1, "token": "<s>"}, {"id": 2, "token": "</s>"}]
    validate_sarif(json.loads(sarif.render(report)))
    json.loads(json_report.render(report))


def test_ids_the_tokenizer_never_produces(tmp_path, made):
    folder, _, ids = made
    rows = pack(ids[:5], 64, eos=EOS, pad=PAD)
    rows["input_ids"][1][10] = SIZE + 5  # beyond the tokenizer
    rows["input_ids"][3][0] = SIZE + 40
    shard = write(tmp_path / "s.parquet", rows)
    report = run(shard, str(folder / "a.json"), eos_id=EOS, pad_id=PAD)
    [unknown] = findings(report, RULE, "unknown-id")
    assert unknown.count == 2
    assert list(zip(unknown.rows.tolist(), unknown.offsets.tolist())) == [(1, 10), (3, 0)]


def test_without_a_tokenizer_the_rule_is_skipped(made):
    _, shard, _ = made
    report = scan([shard], Settings(only=(RULE,)), jobs=1)
    assert [n.message for n in report.notes if n.rule_id == RULE] == ["skipped: no tokenizer given (--tokenizer FILE)"]


# -- decoded excerpts of token-level findings -------------------------------------------------------------------


def test_token_level_findings_get_a_decoded_excerpt_outside_the_fingerprint(tmp_path, made):
    from tokenizers import Tokenizer

    folder, _, ids = made
    tok_path = str(folder / "a.json")
    tok = Tokenizer.from_file(tok_path)
    cols = pack(ids[:6], 64, eos=EOS, pad=PAD)
    cols["input_ids"][2][20] = 900  # out of range for vocab_size 600
    cols["labels"][2][19] = 900
    row = cols["input_ids"][2]
    # The context as the tokenizers library decodes it: 12 tokens each side, at most 48 characters each side.
    expected = (tok.decode(row[8:20], skip_special_tokens=False)[-48:] + "[<id 900>]" +
                tok.decode(row[21:33], skip_special_tokens=False)[:48])
    settings = dict(only=("token-range",), eos_id=EOS, pad_id=PAD, vocab_size=SIZE)
    for name in ("s.parquet", "s.jsonl"):  # a row group read by the metadata; lines read up to the row
        shard = write(tmp_path / name, cols, row_group_size=2)
        plain = scan([shard], Settings(**settings), jobs=1)
        decoded = scan([shard], Settings(tokenizer=tok_path, **settings), jobs=1)
        [before], [after] = findings(plain, "token-range"), findings(decoded, "token-range")
        assert "decodedExcerpt" not in before.evidence
        assert after.evidence["decodedExcerpt"] == {"row": 2, "offset": 20, "text": expected}
        assert after.message.endswith(f"Decoded at row 2 @20: {expected!r}.")
        assert after.fingerprint == before.fingerprint
    results = validate_sarif(json.loads(sarif.render(decoded)))["runs"][0]["results"]
    fingerprints = [r["partialFingerprints"] for r in results]
    assert fingerprints == [r["partialFingerprints"] for r in sarif.to_sarif(plain)["runs"][0]["results"]]


def test_a_shard_scanned_in_parts_samples_the_same_rows(tmp_path, made, monkeypatch):
    from corpuscle.engine import split
    from corpuscle.engine.registry import registry
    from corpuscle.engine.scan import run as run_rules
    from corpuscle.engine.scan import select_rules
    from corpuscle.io import sources
    from corpuscle.io.sources import discover

    folder, _, ids = made
    shard = write(tmp_path / "s.parquet", pack(ids, 128, eos=EOS, pad=PAD), row_group_size=16)
    settings = Settings(only=(RULE,), tokenizer=str(folder / "b.json"), eos_id=EOS, pad_id=PAD)
    whole = run_rules(discover([shard]), settings, select_rules(settings, registry()), jobs=1)

    class SerialPair:
        jobs = 2

        def map(self, fn, items):
            return map(fn, list(items))

    monkeypatch.setattr(split, "SPLIT_BYTES", 0)
    monkeypatch.setattr(sources, "DEFAULT_BATCH_TOKENS", 2000)
    planned = []
    plan = split.plan
    monkeypatch.setattr(split, "plan", lambda *a, **k: planned.append(plan(*a, **k)) or planned[-1])
    parted = run_rules(discover([shard]), settings, select_rules(settings, registry()), executor=SerialPair())
    assert planned and planned[0] and len(planned[0]) > 1
    [a], [b] = findings(whole, RULE), findings(parted, RULE)
    assert (a.kind, a.count, a.evidence, a.rows.tolist(), a.offsets.tolist()) == \
        (b.kind, b.count, b.evidence, b.rows.tolist(), b.offsets.tolist())


def test_a_setting_that_disagrees_is_one_finding_for_all_its_shards(tmp_path, made):
    folder, _, ids = made
    for k in range(3):
        write(tmp_path / f"s{k}.parquet", pack(ids[k * 10:(k + 1) * 10], 128, eos=EOS, pad=PAD))
    report = scan([str(tmp_path)], Settings(only=(RULE,), tokenizer=str(folder / "a.json"), eos_id=EOS,
                                            vocab_size=SIZE - 88), jobs=1)
    [small] = findings(report, RULE, "vocab-size-smaller")
    assert small.uri is None and small.count == 3 and len(small.instance_uris) == 3
    assert small.evidence["shards"] == 3
    validate_sarif(json.loads(sarif.render(report)))


@pytest.mark.parametrize("kind", ["unigram", "wordpiece"])
def test_other_tokenizer_families_are_clean_with_their_own_shards(tmp_path, kind):
    """Windows cut words at both ends; the comparison away from those edges finds nothing for the right tokenizer
    (Metaspace adds a prefix to a cut word, WordPiece lowercases), and the wrong one is still found."""
    from tests.tiny_tokenizers import train_other

    words = invented_words(1500, seed=31)
    tok = train_other(kind, sentences(words, 3000, seed=4), 700)
    tok.save(str(tmp_path / "tok.json"))
    docs = [" ".join(sentences(words, 8, seed=300 + d)) for d in range(80)]
    ids = [e.ids for e in tok.encode_batch(docs, add_special_tokens=False)]
    shard = write(tmp_path / "s.parquet", pack(ids, 96, eos=EOS, pad=PAD))
    assert findings(run(shard, str(tmp_path / "tok.json"), eos_id=EOS, pad_id=PAD), RULE) == []
    other = train_other(kind, sentences(invented_words(1500, seed=32), 3000, seed=5), 700)
    other.save(str(tmp_path / "other.json"))
    assert "round-trip" in [f.kind for f in findings(run(shard, str(tmp_path / "other.json"), eos_id=EOS,
                                                         pad_id=PAD), RULE)]


def test_special_tokens_other_than_the_separators_are_a_warning(tmp_path, made):
    folder, _, ids = made
    rows = pack(ids[:5], 64, eos=EOS, pad=PAD)
    rows["input_ids"][2][7] = BOS  # <s> inside a row, while the settings name only eos and pad
    rows["input_ids"][4][0] = BOS
    shard = write(tmp_path / "s.parquet", rows)
    report = run(shard, str(folder / "a.json"), eos_id=EOS, pad_id=PAD)
    [other] = findings(report, RULE, "other-special")
    assert other.level.name == "warning" and other.count == 2
    assert list(zip(other.rows.tolist(), other.offsets.tolist())) == [(2, 7), (4, 0)]
    assert other.evidence["specialTokens"] == [{"id": BOS, "token": "<s>", "count": 2}]
    # Named as bos_id, the same tokens are expected.
    assert findings(run(shard, str(folder / "a.json"), eos_id=EOS, pad_id=PAD, bos_id=BOS), RULE, "other-special") == []
