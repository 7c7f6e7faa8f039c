"""The rule API: what a rule declares and the calls the engine makes.

**The minimum** (all a rule needs; see the plugin example in the README):

* class attributes: ``id``, ``level``, ``summary`` (one line), ``help`` (how to fix), the class docstring (what is
  checked and why it matters for training), ``needs`` (the columns it reads, by settings key and kind),
  ``options`` (defaults of its ``[rule.<id>]`` options) and ``kinds`` (every kind of finding it reports, with what
  it means: kinds are part of the SARIF fingerprints, so renaming one is a visible change);
* ``feed(state, batch)`` for every batch that has the columns: numpy over ``batch.flat(name).values`` /
  ``.offsets``; record locations with ``state.hit(kind, batch, rows, offsets)`` (rows local to ``batch``, made
  shard rows by the state) and figures with ``state.count(name=amount)``;
* ``report(state)`` once per shard: findings from the hits (``self.finding(state, kind, message)``).

States travel between processes, so they must pickle; keep them small (counters, capped
:class:`~corpuscle.findings.Hits`).  A rule that keeps fields of its own names a :class:`ShardState` subclass as
``State`` (typed fields, set in its ``__init__``) instead of setting attributes on the state in ``begin``.

**Extensions**, each opt-in:

* ``begin(shard, settings)`` / ``end(state)``: set up a state, shrink it before it travels;
* ``corpus(states)``: findings that span shards and corpus figures, as a :class:`CorpusResult`;
* ``requires``, ``needs_any``, ``outputs``, ``infer``: settings that must be known, any-one-column rules, extra
  outputs (the drop list), what a rule infers once per shard;
* ``splittable`` and ``merge(first, second)``: join the states of the parts of a large shard split between
  processes (``state.continued`` / ``state.continues`` say whether parts come before or after); raise
  :class:`Unmergeable` when two parts cannot be joined exactly.

**The keyed shuffle** (rules whose cross-shard step groups entries by a key, like the band keys of near-duplicate
search) sets ``keyed`` and runs that step as a partitioned shuffle, so that no single process holds the entries of
the whole corpus:

* ``partition(state, parts)`` -- map side, run where the shard's state is: split the keyed entries into ``parts``
  pieces by a hash of the key and return ``(state without them, pieces)``;
* ``reduce_partition(pieces)`` -- reduce side, run once per partition: the pieces of that partition from every
  shard (in shard order, one per state ``corpus`` will get; a shard scanned in parts gives one piece per part, in
  order, and the parts' slimmed states are joined with ``merge``) become a small *partial* result;
* ``corpus(states, partials)`` -- the partials of all partitions (in partition order) with the slimmed states.

The engine runs these same functions in this process for a local scan and as tasks on a cluster (the pieces stay
on the workers; only the partials travel).  The findings must not depend on the number of partitions.
"""
from __future__ import annotations

import copy
from collections import defaultdict
from fnmatch import fnmatchcase
from typing import NamedTuple

import numpy as np
from corpuscle.findings import Finding, Hits, Level
from corpuscle.io.batch import Batch, Shard, is_integer_list, is_text

#: Column kinds a rule can ask for; each is checked against the Arrow type before a batch is fed.
COLUMN_KINDS = {
    "int-list": is_integer_list,
    "text": is_text,
}


class Unmergeable(Exception):
    """Raised by ``Rule.merge`` when the states of two parts cannot say exactly what one scan of both would have
    gathered (e.g. a bounded list that filled up differently); the engine then scans the shard whole."""


def check_kind(kind: str, declared) -> None:
    """Raise when ``kind`` matches none of a rule's declared kinds (``*`` in a declared kind matches any text)."""
    if declared and not any(fnmatchcase(kind, pattern) for pattern in declared):
        raise ValueError(f"finding kind {kind!r} is not declared in the rule's kinds ({', '.join(declared)})")


class CorpusResult(NamedTuple):
    """What ``Rule.corpus`` returns: findings that span shards, corpus figures (merged into the report's
    metrics), and named extra outputs, each a list (e.g. ``{"drop-list": [...]}``, names listed in ``outputs``)."""

    findings: list
    metrics: dict
    outputs: dict = {}


class ShardState:
    """What a rule has gathered about one shard: counters, capped hit lists, and any extra fields it sets.

    When a large shard is scanned in parts (see ``Rule.splittable``), the engine sets ``continued`` on the state
    of every part but the first (its first rows may finish something the previous part left open) and
    ``continues`` on every part but the last (what is open at its end goes on in the next part), and ``inferred``,
    before the first batch; a whole-shard scan leaves them False and None.
    """

    continued = False
    continues = False
    #: What the rule inferred from the shard's first records (:meth:`Rule.infer`) when this is a part of a split
    #: shard; None otherwise (the rule then infers from the first batch it is fed).
    inferred = None

    def __init__(self, shard: Shard, settings, cap: int, kinds=()):
        self.shard = shard
        self.settings = settings
        self.cap = cap
        self.kinds = tuple(kinds)  # the rule's declared kinds (patterns); empty: not checked
        self.stats: dict[str, float] = defaultdict(int)
        self.hits: dict[str, Hits] = {}

    @property
    def uri(self) -> str:
        return self.shard.uri

    def hit(self, kind: str, batch: Batch, rows, offsets=None) -> Hits:
        """Record locations of one kind of defect: ``rows`` are local to ``batch`` (0 .. len(batch) - 1, the batch
        the rule computed them on, e.g. the one :func:`consistent` returned), ``offsets`` token (or character)
        offsets within those rows, or None when the rule cannot say."""
        return self.hit_at(kind, batch.rows[np.asarray(rows, dtype=np.int64)], offsets)

    def hit_at(self, kind: str, rows, offsets=None) -> Hits:
        """Record locations given as shard rows (0-based record indices in file order), for locations found
        outside ``feed`` (at the end of a shard, when joining parts) or carried by the reader.

        A kind appears in ``hits`` only once it has at least one location, so a rule that reports every kind in
        ``hits`` never reports a defect found zero times."""
        hits = self.hits.get(kind)
        if hits is None:
            check_kind(kind, self.kinds)
            hits = Hits(self.cap)
            hits.add(rows, offsets)
            if hits:
                self.hits[kind] = hits
            return hits
        hits.add(rows, offsets)
        return hits

    def count(self, **amounts) -> None:
        for key, value in amounts.items():
            self.stats[key] += value

    def __getstate__(self):
        state = dict(self.__dict__)
        state["stats"] = dict(self.stats)
        return state

    def __setstate__(self, state):
        stats = state.pop("stats")
        self.__dict__.update(state)
        self.stats = defaultdict(int, stats)


class Rule:
    """Base class of all rules.  Subclasses set the class attributes and override ``feed`` and ``report``.

    * ``id``, ``level``, ``summary`` (one line), ``help`` (how to fix), and the class docstring (what is checked
      and why it matters) make the rule's documentation (``corpuscle explain``, SARIF ``rules[]``).
    * ``needs`` maps settings keys of columns to their kind, e.g. ``{"tokens_column": "int-list"}``; a batch
      without them is not fed to the rule, and a shard none of whose batches had them gets a "skipped" note.
    * ``requires`` names settings that must be known (given or inferred), e.g. ``("vocab_size",)``.
    * ``options`` maps option names to defaults, set per rule in the config file under ``[rule.<id>]``.
    * ``outputs`` names the extra outputs ``corpus`` may return (e.g. ``("drop-list",)``), so that a front end
      can tell "no rule that makes it ran" from "nothing in it".
    """

    id: str = ""
    level: Level = Level.warning
    summary: str = ""
    help: str = ""
    #: Every kind of finding the rule reports: kind -> what it means (``*`` matches any text, for kinds that carry
    #: a column name or a token name).  Part of the fingerprints; the state refuses an undeclared kind.
    kinds: dict[str, str] = {}
    #: The class of the rule's per-shard state (a :class:`ShardState` subclass with typed fields of its own).
    State: type = None
    needs: dict[str, str] = {}
    needs_any: bool = False  # True: one of the ``needs`` columns suffices (the rule's own ``missing`` decides)
    requires: tuple[str, ...] = ()
    options: dict[str, object] = {}
    outputs: tuple[str, ...] = ()
    #: Whether ``corpus`` takes the partials of a keyed reduce (``partition`` / ``reduce_partition``, see the
    #: module notes); the engine then calls ``corpus(states, partials)``.
    keyed: bool = False
    #: Whether a large shard may be scanned in parts (contiguous row groups or record batches, each read by its own
    #: process) whose states ``merge`` joins into the state a whole-shard scan gives.  The engine splits a shard
    #: only when every selected rule sets it.  A rule that carries something from one row to the next reads
    #: ``state.continued`` / ``state.continues`` (see :class:`ShardState`) and joins the open ends in ``merge``;
    #: when it cannot join two parts exactly it raises :class:`Unmergeable`, and the engine scans the shard again
    #: whole for that rule alone.  A ``keyed`` rule's parts go into the shuffle one by one (the reduce gets one
    #: piece per part, in order), so its ``merge`` must always succeed.
    splittable: bool = False

    def __init__(self, **options):
        unknown = set(options) - set(self.options)
        if unknown:
            known = ", ".join(self.options) or "none"
            raise ValueError(f"rule {self.id}: unknown option(s) {', '.join(sorted(unknown))} (known: {known})")
        self.opts = {**self.options, **options}

    @property
    def description(self) -> str:
        return " ".join((type(self).__doc__ or self.summary).split())

    # -- what the engine calls ----------------------------------------------------------------------------
    def missing(self, batch: Batch, settings) -> str | None:
        """Why this batch cannot be fed to the rule, or None when it can."""
        for key in self.requires:
            if getattr(settings, key) is None:
                return f"{key} is not set and could not be inferred (give --{key.replace('_', '-')})"
        for key, kind in self.needs.items():
            name = getattr(settings, key)
            if not batch.has(name):
                return f"no {name!r} column"
            if not COLUMN_KINDS[kind](batch.type_of(name)):
                return f"column {name!r} is {batch.type_of(name)}, not {kind}"
        return None

    def infer(self, batch: Batch, settings) -> object | None:
        """What the rule infers once per shard from its first batch (a heuristic such as how documents are arranged
        in rows), or None.  A shard scanned in parts has it computed from the shard's first records and given to
        every part as ``state.inferred``, so that all parts decide alike; a rule that infers from its first batch
        uses ``state.inferred`` when it is set.  Must not keep the batch."""
        return None

    def begin(self, shard: Shard, settings) -> ShardState:
        return (self.State or ShardState)(shard, settings, settings.instance_cap, tuple(self.kinds))

    def feed(self, state: ShardState, batch: Batch) -> None:
        raise NotImplementedError

    def end(self, state: ShardState) -> ShardState:
        """Called once per shard after its last batch; may shrink the state before it travels."""
        return state

    def report(self, state: ShardState) -> list[Finding]:
        """Findings of one shard."""
        return []

    def corpus(self, states: list[ShardState]) -> CorpusResult:
        """Findings that span shards, figures for the whole corpus and named outputs (default: none), as a
        :class:`CorpusResult`; the engine collects the outputs into ``Report.outputs``.  A ``keyed`` rule's
        ``corpus`` also takes ``partials`` (one per partition), and computes them in this process with
        :meth:`keyed_reduce` when called without them."""
        return CorpusResult([], {})

    def merge(self, first: ShardState, second: ShardState) -> ShardState:
        """The state of one shard from the states of two consecutive parts of it (``second``'s rows follow
        ``first``'s), both after ``end``; the result must equal what a scan of both parts in one go gives.

        The default suits a state made of counters and hit lists only: the counters add up and the hits of each
        kind are concatenated in order, up to the cap (kinds in the order they were first met).  A rule with other
        fields, or with anything carried from one row to the next, overrides it (and may extend this one)."""
        merged = copy.copy(first)
        merged.stats = defaultdict(int, first.stats)
        for key, value in second.stats.items():
            merged.stats[key] += value
        merged.hits = {}
        for kind, hits in first.hits.items():
            merged.hits[kind] = copy.deepcopy(hits)
        for kind, hits in second.hits.items():
            if kind in merged.hits:
                merged.hits[kind].extend(hits)
            else:
                merged.hits[kind] = copy.deepcopy(hits)
        return merged

    # -- the keyed reduce (only for rules that set ``keyed``) -------------------------------------------------
    def partition(self, state: ShardState, parts: int) -> tuple[ShardState, list]:
        """Map side: ``(state without its keyed entries, [piece for partition 0 .. parts - 1])``, entries assigned
        to a partition by a hash of their key.  Runs where the state is; must not change ``state`` in place."""
        raise NotImplementedError(f"rule {self.id} sets keyed but does not implement partition")

    def reduce_partition(self, pieces: list) -> object:
        """Reduce side: one partition's pieces from every shard, in shard order, to a small picklable partial."""
        raise NotImplementedError(f"rule {self.id} sets keyed but does not implement reduce_partition")

    def keyed_reduce(self, states: list[ShardState], parts: int = 1) -> tuple[list[ShardState], list]:
        """Partition and reduce in this process: ``(slimmed states, partials)``, what ``corpus`` is given."""
        split = [self.partition(state, parts) for state in states]
        partials = [self.reduce_partition([pieces[p] for _, pieces in split]) for p in range(parts)]
        return [state for state, _ in split], partials

    # -- helpers for subclasses ---------------------------------------------------------------------------
    def finding(self, state: ShardState, kind: str, message: str, level: Level | None = None,
                **evidence) -> Finding:
        """A finding of this rule from the hits of ``kind`` recorded in ``state``."""
        check_kind(kind, tuple(self.kinds))
        return Finding.from_hits(self.id, level or self.level, message, state.uri, state.hits[kind], kind=kind,
                                 **evidence)


def share(part, whole) -> float:
    return float(part) / float(whole) if whole else 0.0


def pct(part, whole) -> str:
    """A share as a short percentage for messages: '12.5%', '<0.1%', '100%'."""
    if not whole:
        return "0%"
    value = 100.0 * part / whole
    if 0 < value < 0.1:
        return "<0.1%"
    if value == 100 or value >= 99.95 and part == whole:
        return "100%"
    return f"{value:.1f}%".replace(".0%", "%")


def consistent(batch: Batch, names: list[str]) -> Batch:
    """The rows in which every named integer-list column present has the same length as the first one.

    Rules comparing parallel columns (input_ids with labels, attention_mask, position_ids) run on these rows only;
    ``schema-mismatch`` reports the others.
    """
    present = tuple(n for n in names if batch.has(n) and is_integer_list(batch.type_of(n)))
    if len(present) < 2:
        return batch

    def restrict() -> Batch | None:
        lengths = [batch.flat(n).lengths for n in present]
        same = np.logical_and.reduce([lengths[0] == other for other in lengths[1:]])
        return None if same.all() else batch.select(same)

    # Rules asking for the same columns get the same batch back, and with it the facts already computed on it.
    # (None stands for the batch itself: a batch holding itself would live until the cycle collector runs, and
    # with it the Arrow memory of every batch read in between.)
    narrowed = batch.memo(("consistent",) + present, restrict)
    return batch if narrowed is None else narrowed


def inferred_by(rules, sample: Batch, settings) -> dict:
    """What each rule infers (:meth:`Rule.infer`) from a shard's first records, by rule id; rules that infer
    nothing, or cannot (the records lack their columns, or the rule fails), are left out and infer for themselves
    from the first batch they are fed."""
    out = {}
    for rule in rules:
        try:
            value = rule.infer(sample, settings) if rule.missing(sample, settings) is None else None
        except Exception:  # noqa: BLE001 - a rule bug here must not stop the scan
            value = None
        if value is not None:
            out[rule.id] = value
    return out
