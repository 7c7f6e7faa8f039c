"""Stale settings: a special token id or a vocabulary size given for the shards that the data contradicts.

One wrong fact makes several rules fire at once (every boundary "without eos", every separator "out of range"); this
rule names the fact, and its findings list the other findings of the same shard that rest on it (``explains``), so
the report can show the cause once, first, with the value the data suggests.
"""
from __future__ import annotations

import numpy as np
from corpuscle.findings import Finding, Level
from corpuscle.kernels.tokens import (
    padding_free,
    parallel_columns,
    position_restarts,
    real_per_row,
    real_positions,
    token_positions,
)
from corpuscle.rules.api import Rule, consistent, pct

#: Which findings of the same shard rest on each setting: (rule id, kind glob).
RESTS_ON = {
    "eos_id": [("missing-separator", "*"), ("document-attention", "*"), ("overlong-document", "cut"),
               ("padding-loss", "eos-never-trained")],
    "bos_id": [("missing-separator", "*"), ("document-attention", "*")],
    "pad_id": [("padding-loss", "*"), ("label-alignment", "pad-label"), ("truncation-waste", "*"),
               ("empty-document", "all-padding")],
    "vocab_size": [("token-range", "above-vocab"), ("label-alignment", "label-out-of-vocab"),
                   ("tokenizer-mismatch", "*")],
}
SPECIAL = ("eos_id", "bos_id", "pad_id")
#: A suggested value needs this share of the places where the separator (or padding) should stand, and this many.
AGREEMENT, MIN_PLACES = 0.9, 4
#: Distinct ids kept per shard for the most common id at those places (the top ones by count).
KEEP_IDS = 256


def _source(settings, key: str) -> str:
    """Where a given value came from, in words: 'config', 'flag', or 'given' (set in Python)."""
    source = settings.source(key)
    return source if source in ("config", "flag") else "given"


def _relevant(settings, key: str) -> bool:
    """Whether a special id is given (not inferred) and used as a separator or for padding."""
    if getattr(settings, key) is None or settings.source(key) == "inferred":
        return False
    if key == "eos_id":
        return settings.separator in ("eos-after", "both")
    if key == "bos_id":
        return settings.separator in ("bos-before", "both")
    return True


def _tally(ids: np.ndarray, counts: np.ndarray, more: np.ndarray, more_counts: np.ndarray | None = None):
    """Counts per distinct id (``ids``, ``counts``) with the ids ``more`` added (each ``more_counts`` times, default
    once); the KEEP_IDS most common are kept."""
    more_counts = np.ones(more.size) if more_counts is None else more_counts
    values, inverse = np.unique(np.concatenate([ids, more.astype(np.int64)]), return_inverse=True)
    total = np.bincount(inverse, weights=np.concatenate([counts, more_counts]), minlength=values.size)
    keep = np.argsort(-total, kind="stable")[:KEEP_IDS]
    return values[keep].astype(np.int64), total[keep]


class StaleSetting(Rule):
    """A special token id or vocabulary size given in the settings that the shard contradicts. A given eos_id
    (separator eos-after or both) or bos_id (bos-before or both) that never occurs in the shard makes every document
    boundary look unseparated; the rule looks at what stands where the separator should -- before every position_ids
    restart, and at the last real token of padded rows (of every row when the shard has no position_ids) for eos; at
    every restart, and at row starts whose position_ids say 0 (every row start without position_ids), for bos -- and suggests the id found at nearly all of those places (at least 90% of
    at least 4 places: a heuristic). A given pad_id that never occurs while the attention mask marks padding is
    reported the same way, with the id standing at the masked positions. A vocab_size at or below a special id that
    occurs in the data means vocab_size is stale (special tokens added after it was fixed); a special id at or above
    vocab_size that does not occur is itself stale (named in its unseen finding, or in a warning of its own that
    names both settings when the shard has no use for it). Each finding lists the findings of other rules in the same
    shard that rest on the stale value, so one fix is shown once."""

    id = "stale-setting"
    level = Level.error
    summary = "A given eos/bos/pad id that never occurs in a shard; a vocab_size below a special id in use."
    kinds = {
        "*_id-unseen": "a given special id (eos_id, bos_id or pad_id) that never occurs in the shard",
        "*_id-beyond-vocab": "a given special id at or above vocab_size that the shard never uses",
        "vocab_size-stale": "a vocab_size at or below a special id that occurs in the shard",
    }
    help = ("Correct the stale value in corpuscle.toml or on the command line: set the special id to the one the "
            "data uses (the suggested value, if it is the model's token), or raise vocab_size to the model's "
            "embedding size when special tokens were added after it was fixed; then scan again.")
    needs = {"tokens_column": "int-list"}
    splittable = True

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.places = {key: (np.zeros(0, dtype=np.int64), np.zeros(0)) for key in SPECIAL}
        state.occurs = {key: 0 for key in SPECIAL}
        state.above_other = 0  # ids >= vocab_size that are no special id
        return state

    def merge(self, first, second):
        merged = super().merge(first, second)
        merged.places = {key: _tally(*first.places[key], *second.places[key]) for key in SPECIAL}
        merged.occurs = {key: first.occurs[key] + second.occurs[key] for key in SPECIAL}
        merged.above_other = first.above_other + second.above_other
        return merged

    def feed(self, state, batch):
        s = state.settings
        batch = consistent(batch, parallel_columns(s))
        tokens = batch.flat(s.tokens_column)
        values = tokens.values
        state.count(tokens=int(values.size))
        specials = {key: getattr(s, key) for key in SPECIAL if getattr(s, key) is not None}
        for key, token_id in specials.items():  # the positions other rules look up too (shared per batch)
            state.occurs[key] += int(token_positions(batch, tokens, s, token_id).size)
        if s.vocab_size is not None:
            above = values >= s.vocab_size
            special_above = [i for i in set(specials.values()) if i >= s.vocab_size]
            if special_above:
                at = np.flatnonzero(np.isin(values, special_above))
                rows, offsets = tokens.locate(at)
                state.hit("vocab_size-stale", batch, rows, offsets)
                above &= ~np.isin(values, special_above)
            state.above_other += int(np.count_nonzero(above))
        # Where the separator (or padding) should stand matters only while the given id has not been seen.
        unseen = [key for key in SPECIAL if _relevant(s, key) and not state.occurs[key]]
        if not unseen:
            return
        free = padding_free(batch, tokens, s)
        restarts = position_restarts(batch, tokens, s)
        nonempty = tokens.lengths > 0
        for key in unseen:
            if key == "pad_id":
                if free or not batch.has(s.mask_column):
                    continue  # no padding, or padding told by pad_id alone: says nothing about pad_id
                places = np.flatnonzero(~real_positions(batch, tokens, s))
            elif key == "eos_id":
                # the last real token of padded rows (of every row without position_ids), and before each restart
                if free:
                    ends = tokens.ends[nonempty] - 1 if restarts is None else np.zeros(0, dtype=np.int64)
                else:
                    last = tokens.last_where(real_positions(batch, tokens, s))
                    padded = real_per_row(batch, tokens, s) < tokens.lengths
                    ends = last[(last >= 0) & (padded | (restarts is None))]
                places = np.union1d(restarts - 1, ends) if restarts is not None else ends
            else:
                starts = (tokens.starts[nonempty] if free
                          else tokens.first_where(real_positions(batch, tokens, s)))
                starts = starts[starts >= 0]
                if restarts is not None:  # a row start begins a document where its position_ids say 0
                    starts = starts[batch.flat(s.positions_column).values[starts] == 0]
                places = np.union1d(restarts, starts) if restarts is not None else starts
            ids, counts = state.places[key]
            state.places[key] = _tally(ids, counts, values[places])
            rows, offsets = tokens.locate(places)
            state.hit(f"{key}-unseen", batch, rows, offsets)

    def report(self, state):
        s = state.settings
        out = []
        for key in SPECIAL:
            hits = state.hits.get(f"{key}-unseen")
            if not _relevant(s, key) or state.occurs[key] or not state.stats["tokens"]:
                continue
            if hits:
                out.append(self._unseen(state, key, hits))
            elif key != "pad_id":  # pad_id: no padding, nothing wrong with an unused pad id
                out.append(self._unseen_nowhere(state, key))
        hits = state.hits.get("vocab_size-stale")
        if hits and s.vocab_size is not None:
            out.append(self._vocab(state, hits))
        reported = {f.evidence["setting"] for f in out}
        for key in SPECIAL:
            given = getattr(s, key)
            if (key not in reported and given is not None and s.source(key) != "inferred" and s.vocab_size is not None
                    and given >= s.vocab_size and not state.occurs[key] and state.stats["tokens"]):
                out.append(self._beyond_vocab(state, key))
        return out

    def _unseen(self, state, key, hits):
        s = state.settings
        given = getattr(s, key)
        ids, counts = state.places[key]
        places = hits.count
        where = {"eos_id": "where documents end (before each position_ids restart, at the last real token of padded "
                           "rows, or of every row when there is no position_ids column)",
                 "bos_id": "where documents start (at each position_ids restart, and at row starts whose position_ids say 0 or "
                           "when there is no position_ids column)",
                 "pad_id": f"at the {places:,} positions the attention mask marks as padding"}[key]
        top, top_count = (int(ids[0]), int(counts[0])) if ids.size else (None, 0)
        suggested = top if top is not None and places >= MIN_PLACES and top_count >= AGREEMENT * places else None
        if suggested is not None:
            found = (f"id {suggested:,} stands {where} at {top_count:,} of {places:,} places "
                     f"({pct(top_count, places)}), so {key} is probably {suggested:,} (a heuristic: the most common id "
                     "at those places)")
            fix = (f"Set {key} = {suggested} (corpuscle.toml, or --{key.replace('_', '-')} {suggested}) if that is the "
                   "model's token; the findings this one explains are then checked again.")
        else:
            most = f"; the most common is id {top:,} at {pct(top_count, places)}" if top is not None else ""
            found = f"no single id stands {where} ({places:,} places{most}), so no value is suggested"
            fix = (f"Set {key} to the id the model's tokenizer uses for it, or set separator (eos-after, bos-before, "
                   "both) in corpuscle.toml if the shards separate documents another way.")
        beyond = (f" It is also at or above vocab_size {s.vocab_size:,}, so it is {key} that is stale."
                  if s.vocab_size is not None and given >= s.vocab_size else "")
        message = (f"{key} = {given:,} ({_source(s, key)}) never occurs in this shard's {s.tokens_column}: {found}."
                   f"{beyond} Findings that rest on {key} in this shard share this cause. {fix}")
        finding = self.finding(state, f"{key}-unseen", message,
                               level=Level.warning if key == "pad_id" else None, setting=key, givenValue=given,
                               occurrences=0, places=places, suggestedValue=suggested,
                               mostCommonAtPlaces={str(int(i)): int(c) for i, c in zip(ids[:5], counts[:5])},
                               explains=[list(p) for p in RESTS_ON[key]])
        finding.fix = fix
        return finding

    def _unseen_nowhere(self, state, key):
        """A given separator id that never occurs in a shard that shows no document boundary at all."""
        s = state.settings
        fix = (f"Set {key} to the id the model's tokenizer uses for it (the shard shows no place where documents "
               "meet, so no value is suggested); if the rows really are windows cut from longer documents, each "
               "without an end, this is expected.")
        message = (f"{key} = {getattr(s, key):,} ({_source(s, key)}) never occurs in this shard's "
                   f"{int(state.stats['tokens']):,} tokens of {s.tokens_column}, and no position_ids "
                   f"restart or padded row shows where documents meet. Findings that rest on {key} in this shard share "
                   f"this cause. {fix}")
        finding = Finding(self.id, self.level, message, state.uri, kind=f"{key}-unseen", count=1,
                          rows=np.zeros(1, dtype=np.int64),
                          evidence=dict(setting=key, givenValue=getattr(s, key), occurrences=0, places=0,
                                        suggestedValue=None, explains=[list(p) for p in RESTS_ON[key]]))
        finding.offsets = np.full(1, -1, dtype=np.int64)
        finding.fix, finding.unit = fix, "shard"
        return finding

    def _beyond_vocab(self, state, key):
        """A given special id at or above vocab_size that the shard does not use: one of the two settings is stale."""
        s = state.settings
        given = getattr(s, key)
        fix = (f"Correct {key} to the tokenizer's id for it if that is below vocab_size; if the token was added to the "
               f"vocabulary later, raise vocab_size to at least {given + 1:,} (the model's embedding size).")
        message = (f"{key} = {given:,} ({_source(s, key)}) is at or above vocab_size = {s.vocab_size:,} "
                   f"({_source(s, 'vocab_size')}) and never occurs in this shard: the model has no embedding for it, "
                   f"so a trainer that pads or separates with it fails; {key} or vocab_size is stale. {fix}")
        finding = Finding(self.id, Level.warning, message, state.uri, kind=f"{key}-beyond-vocab", count=1,
                          rows=np.zeros(1, dtype=np.int64),
                          evidence=dict(setting=key, givenValue=given, vocabSize=s.vocab_size, occurrences=0))
        finding.offsets = np.full(1, -1, dtype=np.int64)
        finding.fix, finding.unit = fix, "shard"
        return finding

    def _vocab(self, state, hits):
        s = state.settings
        specials = {key: getattr(s, key) for key in SPECIAL if getattr(s, key) is not None}
        above = {key: i for key, i in specials.items() if i >= s.vocab_size and state.occurs[key]}
        largest = max(above.values())
        names = ", ".join(f"{key} = {i:,} ({state.occurs[key]:,} times)" for key, i in above.items())
        only = (" and every id at or above it in the shard is one of these special ids"
                if not state.above_other else
                f"; {state.above_other:,} other ids at or above it are no special id (see token-range)")
        fix = (f"Set vocab_size to at least {largest + 1:,} (the model's embedding size, which must cover the "
               "special tokens); the special ids and the tokenizer are consistent with the data.")
        message = (f"vocab_size = {s.vocab_size:,} ({_source(s, 'vocab_size')}) is stale: special ids at or above it "
                   f"occur in this shard ({names}){only}, so the special tokens were added after vocab_size was "
                   f"fixed; the tokenizer is not at fault. Findings that rest on vocab_size in this shard share this "
                   f"cause. {fix}")
        rests = [list(p) for p in RESTS_ON["vocab_size"] if p[0] != "token-range" or not state.above_other]
        finding = self.finding(state, "vocab_size-stale", message, setting="vocab_size", givenValue=s.vocab_size,
                               specialIdsAbove=above, otherIdsAbove=int(state.above_other),
                               suggestedValue=largest + 1, explains=rests)
        finding.fix = fix
        return finding


RULES = [StaleSetting]
