"""Findings are data: one defect of one kind, aggregated over every place it occurs.

A defect that hits a million rows is one :class:`Finding` with a count, the evidence in numbers, the fix, and the
affected locations (all of them up to a cap, then a flag that the list was cut).  Rules collect locations with a
:class:`Hits` accumulator while they stream batches; it keeps memory bounded by the cap however large the shard.
"""
from __future__ import annotations

import enum
import hashlib
from dataclasses import dataclass, field

import numpy as np

#: How many instances a finding lists before it says the list was cut (settable as ``instance_cap``).
DEFAULT_INSTANCE_CAP = 10_000


class Level(enum.IntEnum):
    """How serious a finding is; ordered so that ``Level.error > Level.warning``."""

    note = 1
    warning = 2
    error = 3

    @classmethod
    def parse(cls, name: str) -> "Level":
        try:
            return cls[name]
        except KeyError:
            raise ValueError(f"unknown level {name!r}: use error, warning or note") from None


class Hits:
    """Locations of one kind of defect within one shard: a true count plus the first ``cap`` (row, offset) pairs.

    ``add`` takes whole numpy arrays (one call per batch); offsets of -1 mean "the rule cannot say".
    """

    __slots__ = ("count", "cap", "_rows", "_offsets", "_kept")

    def __init__(self, cap: int = DEFAULT_INSTANCE_CAP):
        if cap < 0:
            raise ValueError(f"instance cap must be >= 0, got {cap}")
        self.count = 0
        self.cap = cap
        self._rows: list[np.ndarray] = []
        self._offsets: list[np.ndarray] = []
        self._kept = 0

    def add(self, rows, offsets=None) -> None:
        rows = np.asarray(rows, dtype=np.int64).ravel()
        if rows.size == 0:
            return
        self.count += int(rows.size)
        room = self.cap - self._kept
        if room <= 0:
            return
        if offsets is None:
            offsets = np.full(rows.size, -1, dtype=np.int64)
        else:
            offsets = np.broadcast_to(np.asarray(offsets, dtype=np.int64), rows.shape)
        self._rows.append(rows[:room].copy())
        self._offsets.append(offsets[:room].copy())
        self._kept += min(room, rows.size)

    def extend(self, later: "Hits") -> None:
        """Append the locations of ``later``, which come after these in the shard (the next part of a split
        scan): the true counts add up, and the stored locations are these, then ``later``'s, up to the cap."""
        room = self.cap - self._kept
        if room > 0 and later._kept:
            rows, offsets = later.rows[:room], later.offsets[:room]
            self._rows.append(rows)
            self._offsets.append(offsets)
            self._kept += int(rows.size)
        self.count += later.count

    @property
    def rows(self) -> np.ndarray:
        return np.concatenate(self._rows) if self._rows else np.zeros(0, dtype=np.int64)

    @property
    def offsets(self) -> np.ndarray:
        return np.concatenate(self._offsets) if self._offsets else np.zeros(0, dtype=np.int64)

    @property
    def kept(self) -> int:
        """How many locations are stored (at most ``cap``)."""
        return self._kept

    @property
    def truncated(self) -> bool:
        return self.count > self._kept

    def __bool__(self) -> bool:
        return self.count > 0


@dataclass
class Finding:
    """One defect of one kind in one shard (or across shards when ``uri`` is None and instances carry uris).

    ``kind`` names the variant of the rule's defect (e.g. ``shift-2``); with ``rule_id`` and ``uri`` it makes
    the fingerprint that stays stable across runs, so a CI baseline can recognise a known finding.
    """

    rule_id: str
    level: Level
    message: str
    uri: str | None
    kind: str = ""
    count: int = 1
    rows: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    offsets: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    instance_uris: list[str] | None = None
    truncated: bool = False
    evidence: dict = field(default_factory=dict)
    start_line: int | None = None  # 1-based line of the first affected record, for line-based shards
    # -- set after the rules have reported (corpuscle.gate): the CI gate's view of the finding ----------------
    #: How to fix it in one line, when the rule says so apart from the message (else the summary finds it there).
    fix: str = ""
    #: What ``count`` counts ("rows", "document boundaries"), when the rule says so (else the summary's table).
    unit: str = ""
    #: The level the rule gave it before a configured level applied (None: no configured level changed it).
    rule_level: Level | None = None
    #: The justification of the ``[[suppress]]`` entry that matched it (None: not suppressed).
    suppression: str | None = None
    #: SARIF baselineState against ``--baseline`` (new, unchanged, updated, absent), or None without a baseline.
    baseline_state: str | None = None
    #: Fingerprint of the finding that names this one's root cause, and those of the findings a root cause explains.
    caused_by: str | None = None
    explains: list[str] = field(default_factory=list)
    #: The fingerprint read from a baseline (an absent result keeps the one it was stored with).
    pinned_fingerprint: str | None = None

    @classmethod
    def from_hits(cls, rule_id: str, level: Level, message: str, uri: str, hits: Hits, kind: str = "",
                  **evidence) -> "Finding":
        return cls(rule_id=rule_id, level=level, message=message, uri=uri, kind=kind, count=hits.count,
                   rows=hits.rows, offsets=hits.offsets, truncated=hits.truncated, evidence=evidence)

    @property
    def fingerprint(self) -> str:
        if self.pinned_fingerprint:
            return self.pinned_fingerprint
        key = "\x1f".join([self.rule_id, self.uri or "*", self.kind])
        # A file name that is not valid UTF-8 arrives with surrogate escapes (os.fsdecode): hash its bytes.
        return hashlib.sha256(key.encode("utf-8", "surrogateescape")).hexdigest()[:32]

    def instances(self) -> list[dict]:
        out = []
        for i, (row, offset) in enumerate(zip(self.rows.tolist(), self.offsets.tolist())):
            inst = {"row": row}
            if offset >= 0:
                inst["offset"] = offset
            if self.instance_uris is not None:
                inst["uri"] = self.instance_uris[i]
            out.append(inst)
        return out

    @property
    def gating(self) -> bool:
        """Whether the finding counts for the exit status: not suppressed, and with a baseline only when it is new
        or updated (unchanged and absent results do not count)."""
        return self.suppression is None and self.baseline_state in (None, "new", "updated")

    def sort_key(self):
        return (-int(self.level), self.rule_id, self.uri or "", self.kind)
