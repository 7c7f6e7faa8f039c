"""A tokenized shard checked against the tokenizer the model will be trained with (``--tokenizer FILE``).

Ids in range, labels right and separators present say nothing about *which* tokenizer made the ids: a shard
tokenized with another tokenizer of the same size passes every structural rule, and the model learns noise. Three
checks, each needing only the shard and the tokenizer file:

Vocabulary and special ids
    ``vocab_size`` (when given) against the tokenizer's size with its added tokens: smaller is an error (the
    tokenizer makes ids the model has no embedding for); larger is a note (an embedding matrix padded to a round
    size is common practice). ``eos_id`` / ``bos_id`` / ``pad_id`` (given or inferred) must be special tokens of
    the tokenizer; an id that is an ordinary token there is an error when given, a warning when inferred.

Ids the tokenizer never produces
    Ids with no token in the tokenizer (beyond its size, or holes in its vocabulary): added tokens the model does
    not know, ids from another vocabulary (an error). Special tokens of the tokenizer other than ``eos_id``,
    ``bos_id`` and ``pad_id``: encoding text never makes them, so they were inserted by a template or belong to
    another setup (a warning). Both with their locations.

Round trip
    A sample of rows -- the first ``first_rows`` rows of the shard and every row whose index hashes to 0 modulo
    ``every`` (a fixed choice per row, so a shard scanned in parts samples the same rows) -- is cut into segments
    at special tokens (:func:`corpuscle.kernels.decode.segments`) and each segment is decoded with the tokenizer.
    Away from the cut edges of the window -- the decoded text from its first to its last whitespace, since a window
    may cut a word at either end -- the text is encoded again (no special tokens added), and the ids it gives are
    looked for among the segment's own ids (bags of ids: counts per id). A segment tokenized with this tokenizer
    holds them all, since the inner text starts at a word boundary as its tokens there did; a segment made with
    another tokenizer decodes to text that this one encodes otherwise. The *mismatch rate* is the share of sampled
    segments with ids the shard does not have (the share of ids is reported beside it: another tokenizer often
    changes only a few ids of each segment, but of nearly every one). The tokenizer's own rate is measured on the
    same text: its own ids for the whole decoded text in place of the shard's. The rule reports an error when the
    rate exceeds that baseline by more than ``tolerance`` (default 0.1), with a few decoded excerpts of mismatching
    spans. A heuristic: segments without two whitespace characters (text without spaces) are not compared, and a
    tokenizer whose every id sequence is canonical (a word-level vocabulary) cannot be told from another of the
    same size by a round trip.
"""
from __future__ import annotations

import itertools
import re

import numpy as np
from corpuscle.findings import Finding, Level
from corpuscle.kernels.decode import decode_spans, segments, special_ids
from corpuscle.kernels.minhash import mix64
from corpuscle.rules.api import CorpusResult, Rule, ShardState, pct

_SPECIAL_KEYS = ("eos_id", "bos_id", "pad_id")
_EXAMPLES = 3
_EXCERPT = 30  # characters of decoded text on each side of a mismatch
_WHITESPACE = re.compile(r"\s")


def _tokenizer(settings):
    from corpuscle.kernels.tokenize import load_tokenizer  # the tokenizers library is an optional dependency

    return load_tokenizer(settings.tokenizer)


class _Facts:
    """What the rule needs of a tokenizer, computed once per process and tokenizer."""

    _cache: dict = {}

    def __init__(self, tokenizer):
        self.size = tokenizer.get_vocab_size(with_added_tokens=True)
        vocab = tokenizer.get_vocab(with_added_tokens=True)
        top = max(max(vocab.values(), default=-1) + 1, self.size)
        self.known = np.zeros(top, dtype=bool)
        self.known[np.fromiter(vocab.values(), dtype=np.int64, count=len(vocab))] = True
        self.specials = special_ids(tokenizer)

    @classmethod
    def of(cls, tokenizer) -> "_Facts":
        key = id(tokenizer)
        if key not in cls._cache:
            cls._cache[key] = cls(tokenizer)
        return cls._cache[key]


class TokenizerState(ShardState):
    def __init__(self, shard, settings, cap, kinds=()):
        super().__init__(shard, settings, cap, kinds)
        self.examples: list[dict] = []  # the first mismatching spans, by row


class TokenizerMismatch(Rule):
    """A tokenized shard that was not made with the given tokenizer (--tokenizer FILE), or whose facts disagree
    with it: vocab_size smaller than the tokenizer's size, eos_id / bos_id / pad_id that are not special tokens of
    it, ids it never produces (added tokens the model does not know, another vocabulary). A round trip on a
    sample of rows (decode, encode again, compare away from the window's cut edges) measures how many tokens come
    back different, against the tokenizer's own rate on the same text: a shard tokenized with another tokenizer of
    the same size passes every structural check, and the model learns noise. The round trip is a heuristic: it
    cannot tell apart two word-level vocabularies of the same size."""

    id = "tokenizer-mismatch"
    level = Level.error
    summary = "A shard not tokenized with the given tokenizer; special ids and vocabulary size that disagree with it."
    help = ("Tokenize the shards with the tokenizer the model is trained with (the file given with --tokenizer), or "
            "give the tokenizer the shards were made with. Set vocab_size, eos_id, bos_id and pad_id to that "
            "tokenizer's values. Options: every and first_rows (rows sampled for the round trip), tolerance "
            "(mismatch rate above the tokenizer's own rate that is an error).")
    kinds = {
        "round-trip": "the sampled rows do not survive decode and encode again with the tokenizer",
        "vocab-size-*": "vocab_size smaller (error) or larger (note) than the tokenizer's size",
        "special-*": "eos_id, bos_id or pad_id that is not a special token of the tokenizer (key after the dash)",
        "unknown-id": "token ids that have no token in the tokenizer",
        "other-special": "special tokens of the tokenizer other than eos, bos and padding (never made from text)",
    }
    needs = {"tokens_column": "int-list"}
    options = {"every": 256, "first_rows": 16, "tolerance": 0.1}
    State = TokenizerState
    splittable = True

    def __init__(self, **options):
        super().__init__(**options)
        for key in ("every", "first_rows"):
            value = self.opts[key]
            if isinstance(value, bool) or not isinstance(value, int) or value < (1 if key == "every" else 0):
                raise ValueError(f"rule {self.id}: {key} must be a whole number >= {1 if key == 'every' else 0}, "
                                 f"got {value!r}")
        tol = self.opts["tolerance"]
        if isinstance(tol, bool) or not isinstance(tol, (int, float)) or not 0 <= tol <= 1:
            raise ValueError(f"rule {self.id}: tolerance must be a share in [0, 1], got {tol!r}")

    def missing(self, batch, settings):
        if settings.tokenizer is None:
            return "no tokenizer given (--tokenizer FILE)"
        return super().missing(batch, settings)

    def feed(self, state, batch):
        settings = state.settings
        tokenizer = _tokenizer(settings)
        facts = _Facts.of(tokenizer)
        flat = batch.flat(settings.tokens_column)
        values = flat.values
        # Ids the tokenizer never produces.
        inside = (values >= 0) & (values < len(facts.known))
        unknown = ~inside
        unknown[inside] = ~facts.known[values[inside]]
        if unknown.any():
            rows, offsets = flat.locate(np.flatnonzero(unknown))
            state.hit("unknown-id", batch, rows, offsets)
            state.count(unknownIds=int(unknown.sum()))
        # Special tokens other than the separators and padding: encoding text never produces them.
        others = np.setdiff1d(facts.specials, [getattr(settings, k) for k in _SPECIAL_KEYS
                                               if getattr(settings, k) is not None])
        if len(others):
            special = np.isin(values, others)
            if special.any():
                rows, offsets = flat.locate(np.flatnonzero(special))
                state.hit("other-special", batch, rows, offsets)
                found, counts = np.unique(values[special], return_counts=True)
                state.count(**{f"special:{int(i)}": int(c) for i, c in zip(found.tolist(), counts.tolist())})
        # The round trip on the sampled rows.
        rows = batch.rows
        hashed = mix64(rows.astype(np.uint64) ^ np.uint64(0x5EED))
        sampled = np.flatnonzero((rows < self.opts["first_rows"]) | (hashed % np.uint64(self.opts["every"]) == 0))
        if len(sampled) == 0:
            return
        stop = set(facts.specials.tolist()) | {getattr(settings, k) for k in _SPECIAL_KEYS if getattr(settings, k)
                                               is not None}
        stop |= set(np.flatnonzero(~facts.known).tolist())
        lo, hi, seg_row = segments(values, flat.offsets, np.array(sorted(stop), dtype=np.int64), len(facts.known))
        take = np.isin(seg_row, sampled)
        lo, hi, seg_row = lo[take], hi[take], seg_row[take]
        if len(lo) == 0:
            return
        texts = decode_spans(tokenizer, values, lo, hi)
        # Away from the cut edges: the text from the first to the last whitespace (a window may cut a word at
        # either end), which starts at a word boundary as the shard's own tokens there do.
        inner = [_inner(text) for text in texts]
        keep = np.array([len(t.strip()) > 0 for t in inner], dtype=bool)
        if not keep.any():
            return
        idx = np.flatnonzero(keep)
        lo, hi, seg_row = lo[idx], hi[idx], seg_row[idx]
        inner = [inner[k] for k in idx.tolist()]
        texts = [texts[k] for k in idx.tolist()]
        encoded = tokenizer.encode_batch(inner, add_special_tokens=False)
        again = [e.ids for e in encoded]
        originals = [values[a:b].tolist() for a, b in zip(lo.tolist(), hi.tolist())]
        compared, missed = _bag_mismatch(again, originals)
        # The tokenizer's own rate on the same text: its own ids for the whole decoded text against those of the
        # inner text, the same comparison with the shard's ids replaced by the tokenizer's.
        canonical = [e.ids for e in tokenizer.encode_batch(texts, add_special_tokens=False)]
        base_compared, base_missed = _bag_mismatch(again, canonical)
        state.count(segments=len(lo), compared=int(compared.sum()), mismatched=int(missed.sum()),
                    segmentsMismatched=int((missed > 0).sum()), baselineSegmentsMismatched=int((base_missed > 0).sum()),
                    baselineCompared=int(base_compared.sum()), baselineMismatched=int(base_missed.sum()))
        bad = np.flatnonzero(missed > 0)
        for k in bad[:max(0, _EXAMPLES - len(state.examples))].tolist():
            state.examples.append(_example(tokenizer, originals[k], encoded[k], inner[k],
                                           int(batch.rows[seg_row[k]]), int(lo[k] - flat.offsets[seg_row[k]])))
        if len(bad):
            local = seg_row[bad]
            state.hit("round-trip", batch, local, lo[bad] - flat.offsets[local])

    def merge(self, first, second):
        merged = super().merge(first, second)
        merged.examples = (first.examples + second.examples)[:_EXAMPLES]
        return merged

    def report(self, state):
        settings = state.settings
        if settings.tokenizer is None or not getattr(state, "fed", False):  # skipped on this shard (see the notes)
            return []
        tokenizer = _tokenizer(settings)
        facts = _Facts.of(tokenizer)
        out = []
        size = facts.size
        if "unknown-id" in state.hits:
            hits = state.hits["unknown-id"]
            message = (f"{hits.count:,} token(s) have an id with no token in the tokenizer {settings.tokenizer} "
                       f"({size:,} tokens): ids it never produces, e.g. added tokens the model does not know or ids "
                       "of another vocabulary. Tokenize with this tokenizer, or add those tokens to it and to the "
                       "model.")
            out.append(self.finding(state, "unknown-id", message, tokenizerSize=size))
        if "other-special" in state.hits:
            counts = {int(k.split(":")[1]): int(v) for k, v in state.stats.items() if k.startswith("special:")}
            listed = ", ".join(f"{tokenizer.id_to_token(i)!r} (id {i}) {c:,}x" for i, c in sorted(counts.items()))
            hits = state.hits["other-special"]
            message = (f"{hits.count:,} token(s) are special tokens of {settings.tokenizer} other than eos_id, bos_id "
                       f"and pad_id: {listed}. Encoding text never produces them: they were inserted by a template, "
                       "or they are the separator of another setup (check eos_id / bos_id / pad_id). If they are "
                       "meant to be there, ignore this or set the level of tokenizer-mismatch to note for these "
                       "shards.")
            out.append(self.finding(state, "other-special", message, Level.warning,
                                    specialTokens=[{"id": i, "token": tokenizer.id_to_token(i), "count": c}
                                                   for i, c in sorted(counts.items())]))
        stats = state.stats
        segments_ = stats.get("segments", 0)
        if segments_:
            rate = stats["segmentsMismatched"] / segments_
            baseline = stats["baselineSegmentsMismatched"] / segments_
            evidence = {"segments": int(segments_), "segmentsMismatched": int(stats["segmentsMismatched"]),
                        "mismatchRate": round(rate, 6), "baselineRate": round(baseline, 6),
                        "comparedTokens": int(stats["compared"]), "mismatchedTokens": int(stats["mismatched"]),
                        "tokenMismatchRate": round(stats["mismatched"] / max(1, stats["compared"]), 6),
                        "tolerance": self.opts["tolerance"], "examples": state.examples,
                        "method": "decode, encode the text between the first and last whitespace again, look for "
                                  "its ids among the segment's ids (heuristic)"}
            if rate > baseline + self.opts["tolerance"] and "round-trip" in state.hits:
                shown = "; ".join(f"row {e['row']}: {e['text']!r} gives {e['roundTripToken']!r}, which the shard "
                                  "does not have there" for e in state.examples[:2])
                message = (f"The shard does not look tokenized with {settings.tokenizer}: of {int(segments_):,} "
                           "sampled document segments decoded and encoded again, "
                           f"{pct(stats['segmentsMismatched'], segments_)} "
                           f"come back with other ids ({pct(stats['mismatched'], stats['compared'])} of "
                           f"{int(stats['compared']):,} tokens), where the tokenizer's own ids for the same text "
                           f"disagree for {pct(stats['baselineSegmentsMismatched'], segments_)} of them (tolerance "
                           f"{self.opts['tolerance']:g}). This is a heuristic. Mismatching spans: {shown}. Re-tokenize "
                           "the shard with this tokenizer, or give the tokenizer it was made with.")
                out.append(self.finding(state, "round-trip", message, **evidence))
        return out

    def corpus(self, states):
        """The settings against the tokenizer: one finding per disagreement, listing every shard it applies to
        (the facts may differ per folder), instead of one per shard."""
        groups: dict[tuple, dict] = {}
        for state in states:
            settings = state.settings
            if settings.tokenizer is None or not getattr(state, "fed", False):
                continue
            for kind, level, message, evidence in self._fact_checks(settings):
                group = groups.setdefault((kind, message), {"level": level, "evidence": evidence, "uris": []})
                group["uris"].append(state.uri)
        findings = []
        cap = states[0].cap if states else 0
        for (kind, message), group in groups.items():
            uris = group["uris"]
            where = f" ({len(uris):,} shards)" if len(uris) > 1 else ""
            findings.append(Finding(self.id, group["level"], message + where, uris[0] if len(uris) == 1 else None,
                                    kind=kind, count=len(uris), instance_uris=uris[:cap],
                                    truncated=len(uris) > cap, evidence={**group["evidence"], "shards": len(uris)}))
        return CorpusResult(findings, {})

    @staticmethod
    def _fact_checks(settings) -> list[tuple]:
        """``(kind, level, message, evidence)`` of every disagreement between the shard's facts (vocab_size,
        eos_id, bos_id, pad_id) and the tokenizer."""
        tokenizer = _tokenizer(settings)
        facts = _Facts.of(tokenizer)
        size = facts.size
        out = []
        if settings.vocab_size is not None and settings.vocab_size != size:
            smaller = settings.vocab_size < size
            message = (f"vocab_size is {settings.vocab_size:,} but the tokenizer {settings.tokenizer} has "
                       f"{size:,} tokens (with its added tokens). ")
            message += ("It makes ids the model has no embedding for: set vocab_size to at least the tokenizer's "
                        "size, or give the tokenizer the model was built for." if smaller else
                        "Padding the embedding matrix to a round size is common practice; if that is not the "
                        "intent, set vocab_size to the tokenizer's size.")
            out.append(("vocab-size-smaller" if smaller else "vocab-size-larger",
                        Level.error if smaller else Level.note, message,
                        {"vocabSize": settings.vocab_size, "tokenizerSize": size}))
        specials = {int(i): tokenizer.id_to_token(int(i)) for i in facts.specials.tolist()}
        for key in _SPECIAL_KEYS:
            value = getattr(settings, key)
            if value is None or value in specials:
                continue
            token = tokenizer.id_to_token(int(value)) if 0 <= value < 1 << 32 else None
            what = f"the ordinary token {token!r}" if token is not None else "no token at all"
            guessed = settings.source(key) == "inferred"
            listed = ", ".join(f"{t!r} = {i}" for i, t in specials.items()) or "none"
            message = (f"{key} = {value} ({'inferred, a heuristic' if guessed else settings.source(key)}) is {what} "
                       f"in the tokenizer {settings.tokenizer}, not one of its special tokens ({listed}). Set "
                       f"{key} to the id of the tokenizer's special token, or give the tokenizer the shard was made "
                       "with.")
            out.append((f"special-{key.removesuffix('_id')}", Level.warning if guessed else Level.error, message,
                        {"setting": key, "value": int(value), "token": token,
                         "specialTokens": [{"id": i, "token": t} for i, t in specials.items()]}))
        return out


def _inner(text: str) -> str:
    """``text`` from its first to its last whitespace character (the first and last words left out, as a window
    may have cut them); empty when it has fewer than two whitespace-separated parts."""
    first = _WHITESPACE.search(text)
    if first is None:
        return ""
    last = max(text.rfind(c) for c in " \t\n\r\u3000\xa0")
    return text[first.start():last] if last > first.start() else ""


def _bag_mismatch(again: list, originals: list) -> tuple[np.ndarray, np.ndarray]:
    """Per segment: how many ids the round trip gave (``again``) and how many of them the shard's ids of that segment
    (``originals``) do not hold, comparing bags of ids (counts per id)."""
    count = len(originals)
    la = np.fromiter(map(len, again), dtype=np.int64, count=count)
    lb = np.fromiter(map(len, originals), dtype=np.int64, count=count)
    if la.sum() == 0:
        return la, np.zeros(count, np.int64)
    seg_a = np.repeat(np.arange(count, dtype=np.int64), la)
    seg_b = np.repeat(np.arange(count, dtype=np.int64), lb)
    ids_a = np.fromiter(itertools.chain.from_iterable(again), dtype=np.int64, count=int(la.sum()))
    ids_b = np.fromiter(itertools.chain.from_iterable(originals), dtype=np.int64, count=int(lb.sum()))
    shift = np.int64(1 << 32)
    keys_a, count_a = np.unique(seg_a * shift + ids_a, return_counts=True)
    keys_b, count_b = np.unique(seg_b * shift + ids_b, return_counts=True)
    common, ia, ib = np.intersect1d(keys_a, keys_b, assume_unique=True, return_indices=True)
    kept = np.bincount(common // shift, weights=np.minimum(count_a[ia], count_b[ib]), minlength=count)
    return la, la - kept.astype(np.int64)


def _example(tokenizer, original: list, encoded, inner: str, row: int, offset: int) -> dict:
    """The first id of the round trip that the shard's segment does not hold: a decoded excerpt of the text around
    it, and the token."""
    held = set(original)
    k = next((i for i, t in enumerate(encoded.ids) if t not in held), 0)
    start, end = encoded.offsets[k] if encoded.offsets else (0, 0)
    text = inner[max(0, start - _EXCERPT):end + _EXCERPT].strip()
    return {"row": row, "segmentOffset": offset, "text": text, "roundTripToken": tokenizer.id_to_token(encoded.ids[k]),
            "roundTripId": int(encoded.ids[k]), "inShardSegment": False}


RULES = [TokenizerMismatch]
