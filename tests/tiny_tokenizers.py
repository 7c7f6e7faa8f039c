"""Tiny tokenizers trained in the tests (the ``tokenizers`` library, an optional dependency) on invented text.

Byte-level BPE with three special tokens at fixed ids (``<pad>`` = 0, ``<s>`` = 1, ``</s>`` = 2) and a fixed
vocabulary size, so that two tokenizers trained on different text have the same size and the same special ids.
"""
from __future__ import annotations

import random

PAD, BOS, EOS = 0, 1, 2
SPECIALS = ["<pad>", "<s>", "</s>"]

ONSETS = ["b", "d", "f", "g", "k", "l", "m", "n", "p", "r", "s", "t", "v", "z", "br", "st", "tr", "pl", "gr", "sk"]
VOWELS = ["a", "e", "i", "o", "u", "ai", "ou", "ea"]
CODAS = ["", "", "n", "r", "s", "l", "m", "th", "ck", "nd"]


def invented_words(count: int, seed: int) -> list[str]:
    """``count`` distinct invented words of one to three syllables."""
    rng = random.Random(seed)
    words: set[str] = set()
    while len(words) < count:
        words.add("".join(rng.choice(ONSETS) + rng.choice(VOWELS) + rng.choice(CODAS)
                          for _ in range(rng.randint(1, 3))))
    return sorted(words)


def sentences(words: list[str], count: int, seed: int, length=(6, 14)) -> list[str]:
    """Invented sentences: random words, a capital first letter, a comma now and then, a full stop."""
    rng = random.Random(seed)
    out = []
    for _ in range(count):
        chosen = [rng.choice(words) for _ in range(rng.randint(*length))]
        if len(chosen) > 4 and rng.random() < 0.3:
            chosen[2] += ","
        out.append(" ".join(chosen).capitalize() + ".")
    return out


def train_bpe(texts: list[str], vocab_size: int):
    """A byte-level BPE tokenizer of exactly ``vocab_size`` tokens trained on ``texts``."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers

    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(vocab_size=vocab_size, special_tokens=SPECIALS,
                                  initial_alphabet=pre_tokenizers.ByteLevel.alphabet(), show_progress=False)
    tok.train_from_iterator(texts, trainer)
    assert tok.get_vocab_size() == vocab_size, "the training text is too small for this vocabulary size"
    assert [tok.token_to_id(t) for t in SPECIALS] == [PAD, BOS, EOS]
    return tok


def train_other(kind: str, texts: list[str], vocab_size: int):
    """A tokenizer of another family with the same special ids (``<pad>`` 0, ``<s>`` 1, ``</s>`` 2, then ``<unk>``):
    ``"unigram"`` (Metaspace pre-tokenizer and decoder, NFKC normalizer) or ``"wordpiece"`` (lowercasing BERT-style
    normalizer and pre-tokenizer, WordPiece decoder)."""
    from tokenizers import Tokenizer, decoders, models, normalizers, pre_tokenizers, trainers

    specials = SPECIALS + ["<unk>"]
    if kind == "unigram":
        tok = Tokenizer(models.Unigram())
        tok.normalizer = normalizers.NFKC()
        tok.pre_tokenizer = pre_tokenizers.Metaspace()
        tok.decoder = decoders.Metaspace()
        trainer = trainers.UnigramTrainer(vocab_size=vocab_size, special_tokens=specials, unk_token="<unk>",
                                          show_progress=False)
    else:
        tok = Tokenizer(models.WordPiece(unk_token="<unk>"))
        tok.normalizer = normalizers.BertNormalizer(lowercase=True)
        tok.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
        tok.decoder = decoders.WordPiece()
        trainer = trainers.WordPieceTrainer(vocab_size=vocab_size, special_tokens=specials, show_progress=False)
    tok.train_from_iterator(texts, trainer)
    assert [tok.token_to_id(t) for t in SPECIALS] == [PAD, BOS, EOS]
    return tok
