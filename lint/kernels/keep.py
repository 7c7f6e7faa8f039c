"""Which copy of a duplicate cluster to keep, and why the others go.

A cluster (identical or near-identical units: documents or windows) keeps one member and drops the others. The
policy, in order of precedence:

1. ``prefer``: an ordered list of path globs (``fnmatch`` syntax, matched against the shard as reported, e.g.
   ``"crawl/original/*"`` before ``"crawl/mirror-*/*"``): a member under an earlier glob wins over one under a
   later glob, and any matched member over an unmatched one;
2. ``keep``: ``"first"`` (the first in scan order: shard order, then row and offset) or ``"longest"`` (the most
   tokens or bytes; ties go to the first);
3. scan order breaks the remaining ties.

Members under a ``protect`` glob are never dropped (a cluster may then keep more than one copy). All of it is
whole-array work over the members of all clusters: one ``lexsort``.
"""
from __future__ import annotations

from dataclasses import dataclass
from fnmatch import fnmatchcase

import numpy as np

KEEP_CHOICES = ("first", "longest")


@dataclass(frozen=True)
class KeepPolicy:
    keep: str = "first"
    prefer: tuple = ()
    protect: tuple = ()

    @classmethod
    def from_options(cls, rule_id: str, opts: dict) -> "KeepPolicy":
        keep = opts.get("keep", "first")
        if keep not in KEEP_CHOICES:
            raise ValueError(f"rule {rule_id}: keep must be one of {', '.join(KEEP_CHOICES)}, got {keep!r}; hint: "
                             "\"first\" keeps the first copy in scan order, \"longest\" the copy with the most tokens")
        globs = {}
        for name in ("prefer", "protect"):
            value = opts.get(name, [])
            if isinstance(value, str):
                value = [value]
            if not isinstance(value, (list, tuple)) or not all(isinstance(v, str) and v for v in value):
                raise ValueError(f"rule {rule_id}: {name} must be a list of path globs, got {value!r}; hint: "
                                 f"{name} = [\"site/*\", \"archive/*\"]")
            globs[name] = tuple(value)
        return cls(keep, globs["prefer"], globs["protect"])

    def shard_facts(self, uris: list[str]) -> tuple[np.ndarray, np.ndarray]:
        """Per shard: the index of the first ``prefer`` glob it matches (``len(prefer)`` when none) and whether a
        ``protect`` glob matches it."""
        rank = np.array([next((i for i, g in enumerate(self.prefer) if fnmatchcase(u, g)), len(self.prefer))
                         for u in uris], dtype=np.int64)
        protected = np.array([any(fnmatchcase(u, g) for g in self.protect) for u in uris], dtype=bool)
        return rank, protected

    def choose(self, labels: np.ndarray, ids: np.ndarray, shard: np.ndarray, lengths: np.ndarray,
               uris: list[str]) -> "Choice":
        """The kept member of each cluster: ``labels`` (cluster of each member), ``ids`` (scan order), ``shard``
        (position of each member's shard in ``uris``) and ``lengths`` of the members, aligned."""
        rank, protected = self.shard_facts(uris)
        member_rank = rank[shard] if len(rank) else np.zeros(len(ids), dtype=np.int64)
        size = -lengths.astype(np.int64) if self.keep == "longest" else np.zeros(len(ids), dtype=np.int64)
        order = np.lexsort((ids, size, member_rank, labels))
        sorted_labels = labels[order]
        head = np.ones(len(order), dtype=bool)
        head[1:] = sorted_labels[1:] != sorted_labels[:-1]
        keeper_pos = order[np.flatnonzero(head)]  # one per cluster, clusters in label order
        cluster_index = np.cumsum(head) - 1
        kept_of = np.empty(len(ids), dtype=np.int64)
        kept_of[order] = keeper_pos[cluster_index]
        is_keeper = np.zeros(len(ids), dtype=bool)
        is_keeper[keeper_pos] = True
        guarded = protected[shard] if len(protected) else np.zeros(len(ids), dtype=bool)
        drop = ~is_keeper & ~guarded
        return Choice(self, kept_of, drop, guarded & ~is_keeper, member_rank)

    def reason(self, member_rank: int, kept_rank: int, length: int, kept_length: int, unit: str) -> str:
        """Why a member is dropped in favour of the kept one (for the drop list)."""
        if kept_rank < member_rank:
            where = f"under {self.prefer[member_rank]!r}, later in prefer" if member_rank < len(self.prefer) \
                else "under no preferred path"
            return f"the kept copy is under the preferred path {self.prefer[kept_rank]!r}; this one is {where}"
        if self.keep == "longest" and kept_length > length:
            return f"keep = longest: the kept copy has {kept_length:,} {unit}, this one {length:,}"
        if self.keep == "longest":
            return "keep = longest: as long as the kept copy, which comes first in scan order"
        return "keep = first: the kept copy comes first in scan order"


@dataclass
class Choice:
    """What :meth:`KeepPolicy.choose` decided, per member: the position of its cluster's kept member
    (``kept_of``), whether it is dropped (``drop``) or kept only because it is protected (``protected``), and its
    preference rank."""

    policy: KeepPolicy
    kept_of: np.ndarray
    drop: np.ndarray
    protected: np.ndarray
    rank: np.ndarray
