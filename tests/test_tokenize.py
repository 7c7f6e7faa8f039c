"""Tests for corpuscle.kernels.tokenize: token counts of raw text, checked against the tokenizers library's own encoder.

Every tokenizer here is built in memory from invented sentences (WordLevel from a word list, BPE trained on the
sentences) and saved as JSON in the test's folder; nothing is downloaded. The reference for every count is the
library's single-document ``Tokenizer.encode(text, add_special_tokens=False)``; byte counts are checked against
Python's ``len(text.encode("utf-8"))`` (the stdlib).
"""
from __future__ import annotations

import sys

import numpy as np
import pyarrow as pa
import pytest
from click.testing import CliRunner

tokenizers = pytest.importorskip("tokenizers")

from corpuscle.kernels import tokenize  # noqa: E402
from corpuscle.kernels.tokenize import TokenizerError, count_tokens, load_tokenizer, text_lengths  # noqa: E402
from corpuscle.settings import Settings, SettingsError  # noqa: E402

SENTENCES = [
    "the lighthouse keeper counted seven gulls before breakfast",
    "a quiet orchard kept its pears until the first frost",
    "seven gulls and a heron argued over the harbour wall",
    "breakfast in the orchard was pears, bread and strong tea",
    "the heron left before the keeper finished his tea",
    "",
    "gulls gulls gulls",
    "an unknown zeppelin drifted over the quiet harbour",
    "tea kettle whistles; the keeper counts the frost on every pane",
]


@pytest.fixture(autouse=True)
def _fresh_cache():
    tokenize._load.cache_clear()
    yield
    tokenize._load.cache_clear()


def word_level(path, special=True):
    """A whitespace WordLevel tokenizer over the words of SENTENCES (minus 'zeppelin', so [UNK] occurs), with a
    template that adds [BOS] and [EOS] around every document when special tokens are asked for."""
    from tokenizers import Tokenizer, models, pre_tokenizers, processors

    words = sorted({w for s in SENTENCES for w in s.replace(",", " ").replace(";", " ").split()} - {"zeppelin"})
    vocab = {"[UNK]": 0, "[BOS]": 1, "[EOS]": 2, ",": 3, ";": 4}
    vocab.update({w: i + 5 for i, w in enumerate(words)})
    tok = Tokenizer(models.WordLevel(vocab, unk_token="[UNK]"))
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    if special:
        tok.post_processor = processors.TemplateProcessing(single="[BOS] $A [EOS]",
                                                           special_tokens=[("[BOS]", 1), ("[EOS]", 2)])
    tok.save(str(path))
    return str(path)


def bpe(path, vocab_size=120):
    """A byte-level BPE trained in memory on SENTENCES."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers

    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(vocab_size=vocab_size, special_tokens=["<eos>"],
                                  initial_alphabet=pre_tokenizers.ByteLevel.alphabet(), show_progress=False)
    tok.train_from_iterator(SENTENCES, trainer=trainer)
    tok.save(str(path))
    return str(path)


def reference(path, texts):
    """Tokens per document by the library's single-document encoder, without special tokens."""
    tok = tokenizers.Tokenizer.from_file(path)
    return [len(tok.encode(t, add_special_tokens=False).ids) for t in texts]


@pytest.mark.parametrize("build", [word_level, bpe])
def test_counts_equal_single_document_encode(tmp_path, build):
    path = build(tmp_path / "tok.json")
    texts = SENTENCES * 3 + ["the keeper 🙂 counts frost — naïve café"]
    counts = count_tokens(pa.array(texts), path)
    assert counts.dtype == np.int64
    assert counts.tolist() == reference(path, texts)
    assert counts.sum() > 0


def test_special_tokens_are_not_counted(tmp_path):
    path = word_level(tmp_path / "tok.json")
    counts = count_tokens(SENTENCES, path)
    tok = tokenizers.Tokenizer.from_file(path)
    with_special = [len(tok.encode(t).ids) for t in SENTENCES]  # the template adds [BOS] and [EOS]
    assert [c + 2 for c in counts.tolist()] == with_special
    assert counts.tolist() == reference(path, SENTENCES)


def test_truncation_and_padding_in_the_file_are_switched_off(tmp_path):
    path = word_level(tmp_path / "tok.json")
    tok = tokenizers.Tokenizer.from_file(path)
    tok.enable_truncation(max_length=3)
    tok.enable_padding(length=40)
    tok.save(path)
    counts = count_tokens(SENTENCES, path)
    assert counts.tolist() == [len(s.replace(",", " ,").replace(";", " ;").split()) for s in SENTENCES]
    assert counts.max() > 3  # not cut at the file's truncation length, not padded to 40


def test_groups_of_documents_give_the_same_counts(tmp_path, monkeypatch):
    path = bpe(tmp_path / "tok.json")
    texts = [s * (i % 4 + 1) for i, s in enumerate(SENTENCES * 5)]
    whole = count_tokens(texts, path).tolist()
    monkeypatch.setattr(tokenize, "ENCODE_BYTES", 100)  # many encoder calls of a few documents each
    assert count_tokens(texts, path).tolist() == whole == reference(path, texts)


def test_tokenizer_is_loaded_once_per_process(tmp_path):
    path = word_level(tmp_path / "tok.json")
    assert load_tokenizer(path) is load_tokenizer(path)
    assert tokenize._load.cache_info().misses == 1


def test_nulls_are_not_documents(tmp_path):
    path = word_level(tmp_path / "tok.json")
    texts = pa.array(["seven gulls", None, "the quiet harbour wall", None])
    lengths, present, unit = text_lengths(texts, path)
    assert unit == "tokens"
    assert present.tolist() == [True, False, True, False]
    assert lengths.tolist() == reference(path, ["seven gulls", "the quiet harbour wall"]) == [2, 4]
    assert count_tokens(texts, path).tolist() == [2, 0, 4, 0]


def test_without_tokenizer_lengths_are_utf8_bytes():
    texts = ["plain", "naïve café", "🙂🙂", None, ""]
    lengths, present, unit = text_lengths(pa.array(texts))
    assert unit == "bytes"
    # stdlib: the UTF-8 encoding of each string
    assert lengths.tolist() == [len(t.encode("utf-8")) for t in texts if t is not None] == [5, 12, 8, 0]
    assert present.tolist() == [True, True, True, False, True]


# -- usage problems ----------------------------------------------------------------------------------------------

def test_missing_library_is_a_usage_error_with_install_hint(tmp_path, monkeypatch):
    path = word_level(tmp_path / "tok.json")
    monkeypatch.setitem(sys.modules, "tokenizers", None)  # makes `import tokenizers` raise ImportError
    with pytest.raises(TokenizerError, match=r"pip install 'corpuscle\[tokenizers\]'"):
        load_tokenizer(path)
    with pytest.raises(SettingsError, match="corpuscle\\[tokenizers\\]"):
        Settings(tokenizer=path)


def test_missing_library_exits_2_from_the_command_line(tmp_path, monkeypatch):
    from corpuscle.cli import main

    from tests.shards import write

    path = word_level(tmp_path / "tok.json")
    shard = write(tmp_path / "notes.jsonl", {"text": ["seven gulls"]})
    monkeypatch.setitem(sys.modules, "tokenizers", None)
    result = CliRunner().invoke(main, ["scan", shard, "--tokenizer", path, "-q"])
    assert result.exit_code == 2
    assert "pip install 'corpuscle[tokenizers]'" in result.output
    assert "Traceback" not in result.output


@pytest.mark.parametrize("content, problem", [(None, "does not exist"), ("{not json", "cannot load tokenizer")])
def test_unusable_tokenizer_file_is_a_usage_error(tmp_path, content, problem):
    from corpuscle.cli import main

    from tests.shards import write

    path = tmp_path / "tok.json"
    if content is not None:
        path.write_text(content)
    with pytest.raises(SettingsError, match=problem):
        Settings(tokenizer=str(path))
    shard = write(tmp_path / "notes.jsonl", {"text": ["seven gulls"]})
    result = CliRunner().invoke(main, ["scan", shard, "--tokenizer", str(path), "-q"])
    assert result.exit_code == 2
    assert problem in result.output
