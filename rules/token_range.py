"""Token ids the model's embedding table cannot look up: ids below 0, ids at or above vocab_size, and a storage
type too narrow for the vocabulary, in which ids have silently wrapped around."""
from __future__ import annotations

import numpy as np
from corpuscle.findings import Finding, Level
from corpuscle.rules.api import CorpusResult, Rule, ShardState, pct

#: A largest observed id within this share of the storage type's range below its maximum is reported as what
#: wrapped ids look like (a heuristic: wrapped ids spread over the whole range of the type).
NEAR_STORAGE_MAX = 0.01


def storage_max(dtype: np.dtype) -> int:
    """The largest id an integer storage type can hold (numpy's ``iinfo``)."""
    return int(np.iinfo(dtype).max)


class TokenRangeState(ShardState):
    """What token-range keeps of a shard besides its hits: the storage type and the extreme ids."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.storage: tuple[str, str] | None = None  # (Arrow type, numpy dtype) of the tokens, from the first batch
        self.min_id: int | None = None
        self.max_id: int | None = None
        self.max_at: tuple[int, int] = (-1, -1)  # (row, offset) of the first occurrence of the largest id


class TokenRange(Rule):
    """Every token id must lie in [0, vocab_size): an id outside it makes the embedding lookup fail, or on some
    kernels read another token's row without any error. Checks the tokens column: ids below 0 are always reported
    (no vocabulary has them; a null inside a token list is read as -1 and reported with them); ids at or above
    vocab_size only when vocab_size is set. When it is not set the rule still runs, and one note for the
    corpus names the largest id seen, the least vocabulary size the shards imply. With vocab_size set, a
    Parquet or Arrow column whose integer type cannot hold vocab_size - 1 (uint16 for a vocabulary of more than
    65,536 entries, int16, int8, uint8 likewise) is reported once per shard: ids past the type's maximum have
    wrapped around to small or negative ids, which are wrong tokens that look valid. JSON Lines has no storage
    type (integers are read as int64), so only the range is checked there."""

    id = "token-range"
    level = Level.error
    summary = "Token ids outside [0, vocab_size); an integer storage type too narrow for the vocabulary."
    kinds = {
        "negative": "negative token ids",
        "above-vocab": "token ids at or above vocab_size",
        "narrow-storage": "an integer storage type too narrow for the vocabulary",
        "vocab-unset": "shards whose vocab_size was not given (the upper bound is not checked)",
    }
    help = ("Re-tokenize with the tokenizer that matches the model, or set vocab_size to the size of the model's "
            "embedding table. Write the pad id (not -1 or -100) into input_ids; -100 belongs in labels only. Store "
            "token ids in a type that holds vocab_size - 1 (int32 or uint32 for vocabularies over 65,536); wrapped "
            "ids cannot be recovered, so re-tokenize the affected shards.")
    needs = {"tokens_column": "int-list"}
    State = TokenRangeState
    splittable = True

    def feed(self, state, batch):
        s = state.settings
        flat = batch.flat(s.tokens_column)
        values = flat.values
        if state.storage is None:
            value_type = batch.type_of(s.tokens_column).value_type
            state.storage = (str(value_type), np.dtype(value_type.to_pandas_dtype()).name)
        if values.size == 0:
            return
        lo, hi = values.min(), values.max()
        if state.min_id is None or lo < state.min_id:
            state.min_id = int(lo)
        if state.max_id is None or hi > state.max_id:
            at = int(np.argmax(values))
            state.max_id = int(hi)
            row, offset = flat.locate(np.array([at]))
            state.max_at = (int(batch.rows[row[0]]), int(offset[0]))
        if lo < 0:
            where = np.flatnonzero(values < 0)
            self._record(state, batch, flat, where, "negative")
            state.count(negative_ignore_index=int(np.count_nonzero(values[where] == s.ignore_index)))
        vocab = s.vocab_size
        if vocab is not None and hi >= vocab:
            where = np.flatnonzero(values >= values.dtype.type(vocab))
            self._record(state, batch, flat, where, "above-vocab")

    def merge(self, first, second):
        """Counters and hits as usual; the storage type of the first batch; the smallest and largest ids, the
        largest located at its first occurrence (in ``first`` on a tie)."""
        merged = super().merge(first, second)
        merged.storage = first.storage if first.storage is not None else second.storage
        lows = [x for x in (first.min_id, second.min_id) if x is not None]
        merged.min_id = min(lows) if lows else None
        if second.max_id is not None and (first.max_id is None or second.max_id > first.max_id):
            merged.max_id, merged.max_at = second.max_id, second.max_at
        return merged

    @staticmethod
    def _record(state, batch, flat, where, kind):
        rows, offsets = flat.locate(where)
        state.hit(kind, batch, rows, offsets)
        state.count(**{f"{kind}_rows": int(np.count_nonzero(np.diff(rows)) + 1)})

    def report(self, state):
        s = state.settings
        out = []
        seen = {"minId": state.min_id, "maxId": state.max_id}
        if s.vocab_size is not None:
            seen["vocabSize"] = s.vocab_size
        hits = state.hits.get("negative")
        if hits:
            rows = int(state.stats["negative_rows"])
            ignored = int(state.stats["negative_ignore_index"])
            hint = (f"; {ignored:,} of them are the ignore index {s.ignore_index}: labels or a padding sentinel "
                    "were written into input_ids" if ignored else "")
            out.append(self.finding(
                state, "negative",
                f"{hits.count:,} token ids below 0 in {rows:,} rows (smallest {state.min_id:,}){hint}. No "
                "vocabulary has negative ids: the embedding lookup fails or reads the wrong row. Write the pad id "
                f"into input_ids and keep {s.ignore_index} in labels only; re-tokenize rows that hold other "
                "negative ids.", rowsAffected=rows, ignoreIndexIds=ignored, **seen))
        hits = state.hits.get("above-vocab")
        if hits:
            rows = int(state.stats["above-vocab_rows"])
            out.append(self.finding(
                state, "above-vocab",
                f"{hits.count:,} token ids at or above vocab_size {s.vocab_size:,} in {rows:,} rows (largest "
                f"{state.max_id:,}, {state.max_id - s.vocab_size + 1:,} past the last valid id): the shard was "
                "tokenized with another vocabulary than the model's. Re-tokenize with the model's tokenizer, or "
                "set vocab_size to the size of the model's embedding table if it is larger.",
                rowsAffected=rows, **seen))
        narrow = self._narrow_storage(state)
        if narrow:
            out.append(narrow)
        return out

    def _narrow_storage(self, state) -> Finding | None:
        vocab = state.settings.vocab_size
        if vocab is None or state.storage is None:
            return None
        arrow_type, dtype = state.storage
        top = storage_max(np.dtype(dtype))
        if vocab - 1 <= top:
            return None
        evidence = {"storageType": arrow_type, "storageMax": top, "vocabSize": vocab}
        near = ""
        if state.max_id is not None:
            headroom = top - state.max_id
            evidence.update(maxId=state.max_id, nearStorageMax=bool(headroom <= NEAR_STORAGE_MAX * top))
            if evidence["nearStorageMax"]:
                near = (f" The largest id seen is {state.max_id:,}, {headroom:,} below the type's maximum, as "
                        "expected when ids wrapped (heuristic).")
        state.hit_at("narrow-storage", [state.max_at[0]] if state.max_id is not None else [0],
                  [state.max_at[1]] if state.max_id is not None else None)
        return self.finding(
            state, "narrow-storage",
            f"{state.settings.tokens_column!r} is stored as {arrow_type}, whose largest value {top:,} cannot hold "
            f"the ids of a vocabulary of {vocab:,}: every id above {top:,} has wrapped around to a smaller "
            f"{'or negative ' if np.iinfo(np.dtype(dtype)).min < 0 else ''}id, a wrong token that looks valid."
            f"{near} Store token ids as int32 or uint32 and re-tokenize; wrapped ids cannot be recovered.",
            **evidence)

    def corpus(self, states):
        unset = [st for st in states if st.settings.vocab_size is None and st.max_id is not None]
        if not unset:
            return CorpusResult([], {})
        cap = unset[0].cap
        widest = max(unset, key=lambda st: st.max_id)
        kept = unset[:cap]
        note = Finding(
            rule_id=self.id, level=Level.note, uri=None, kind="vocab-unset", count=len(unset),
            rows=np.array([st.max_at[0] for st in kept], dtype=np.int64),
            offsets=np.array([st.max_at[1] for st in kept], dtype=np.int64),
            instance_uris=[st.uri for st in kept], truncated=len(unset) > len(kept),
            message=(f"vocab_size is not set for {len(unset):,} of {len(states):,} shards "
                     f"({pct(len(unset), len(states))}): "
                     "their token ids were checked only for negative values, and their storage type not at all. "
                     f"The largest id seen is {widest.max_id:,} (row {widest.max_at[0]:,} @{widest.max_at[1]} of "
                     f"{widest.uri}), so the vocabulary has at least {widest.max_id + 1:,} entries. Give "
                     "--vocab-size with the size of the model's embedding table to check the upper bound "
                     "(instances: the largest id of each shard)."),
            evidence={"maxId": widest.max_id, "shards": len(unset)})
        return CorpusResult([note], {})


RULES = [TokenRange]
