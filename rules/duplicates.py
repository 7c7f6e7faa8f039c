"""Duplicate documents (or windows) across the whole scan: exact copies and near-duplicates.

A duplicate is content the model sees more than once per epoch: it is weighted as if it were several examples,
it is memorised more readily, and it spends budget that unseen text would have used. Two rules look for it:

* ``exact-duplicate``: units whose content is identical;
* ``near-duplicate``: units whose shingle sets have a Jaccard similarity at or above a threshold: candidates found
  with MinHash and locality-sensitive hashing (:mod:`corpuscle.kernels.minhash`, :mod:`corpuscle.kernels.lsh`),
  a heuristic search, then verified against the exact Jaccard similarity of the stored shingle hashes.

Units (the ``unit`` option)
    ``"document"`` (the default): in a tokenized shard, the documents of the document reading
    (:mod:`corpuscle.kernels.documents`: separators, position restarts, one per row), over the real tokens, carried
    across rows and batches by :class:`corpuscle.kernels.units.DocumentStream` and located by their first token
    (row, offset) and length. ``"window"``: every row of the tokens column as stored, padding included. In a text
    shard (no tokens column) every document of the text column (``text_column``), either way. Empty units -- no
    tokens, or null or empty text -- are left to ``empty-document``; a document with bytes but no words
    (punctuation only) has no shingles and takes part in ``exact-duplicate`` only. The code below calls every unit
    a "window" (its arrays and ids predate documents).

Content hash (``exact-duplicate``, and ``near-duplicate`` to fold exact copies)
    Token documents: :func:`corpuscle.kernels.hashing.document_hashes` (two polynomial lanes over the ids, from
    running sums over the whole batch). Rows and text documents: the 128-bit multilinear content hash of
    :func:`corpuscle.kernels.hashing.content_hashes` (its module notes give the family and its collision
    probability).

Near-duplicates
    Each unit's shingles (``n`` consecutive tokens, or ``n`` consecutive words after lowercasing; a unit shorter
    than ``n`` is one shingle; token documents are shingled with the multilinear family,
    :func:`~corpuscle.kernels.minhash.multilinear_shingle_hashes`) are stored for the verification
    (:class:`~corpuscle.kernels.spill.ShingleSpill`, 4 bytes per shingle), and a consistent sample of them
    (:func:`~corpuscle.kernels.minhash.sample_shingles`: one in ``shingle_sample``, at least :data:`SAMPLE_LEAST`
    a unit) gets a MinHash signature of ``num_perm`` values, cut into ``b`` bands of ``r`` values with
    ``(b, r) = optimal_bands(threshold, num_perm, RECALL_WEIGHTS)`` (datasketch's default weights when
    ``verify = false``). The ``b`` band keys
    and a signature digest of every window are made from each block of signatures and go to a temporary ``.npy``
    file per shard (:class:`BandSpill`), which the state holds as memory maps once the shard is read; the
    signatures themselves go to a file of their own (:class:`SignatureSpill`) only with ``verify = false``, whose
    estimates read them back. Every window has a global id in scan order (the shard's offset plus its index
    within the shard). The band keys are grouped by key in a partitioned shuffle (the rule is ``keyed``, see
    :mod:`corpuscle.rules.api`): ``partition`` splits a shard's keys by key modulo the number of partitions, and
    ``reduce_partition`` groups one partition's keys from all shards
    (:func:`corpuscle.kernels.lsh.partition_candidates`) into candidate pairs. Locally this runs in one process; on
    a cluster the keys stay on the workers and only the candidate pairs come back. The reduce step (``corpus``)
    folds exact copies into their first copy (a pair is kept when both ends are first copies), counts each pair
    once -- a pair of near copies shares most of its bands, found in several partitions -- and verifies it once:
    by the exact Jaccard similarity of the two shingle sets (the shingle hashes read back from the shards' files a
    chunk of pairs at a time, :func:`corpuscle.kernels.lsh.exact_jaccard`), or, with ``verify = false``, by the
    estimate from their signatures (:func:`read_rows`). It then joins the pairs at or above the threshold into
    clusters (:func:`corpuscle.kernels.lsh.clusters`). The result is the same for any number of partitions.

Clusters, the keep policy and the findings
    A near-duplicate cluster holds at least two *distinct* contents; its members are all their units, exact copies
    included (counted as ``exactCopies``), so that running either rule alone and dropping its list removes what it
    reports. Each cluster keeps one member by the keep policy (:mod:`corpuscle.kernels.keep`: ``prefer`` globs,
    then ``keep`` first or longest, then scan order; ``protect`` globs are never dropped); the drop list names
    every other member with its cluster, the kept copy and why. The findings are one per rule and shard, shard
    pair or "across shards" (:func:`_cluster_findings`), the largest clusters first.

Temporary files
    The files of a scan (band keys, shingle hashes, signatures) live in one folder per scan,
    ``corpuscle-minhash-<host>-<pid>-<random>`` under the option ``signature_folder`` or, when it is empty (the
    default), the system temporary folder (``TMPDIR``) of the process that starts the scan; created at the first
    window and removed at the end of ``corpus()`` -- also when it fails -- and, should the scan be interrupted, when
    the process exits. The folder's path travels with the rule: a shard's band file is written by the worker that
    scans it and read by the worker that reduces a partition, its shingle (or signature) file read by the process
    that starts the scan, which verifies the candidates; so on a cluster of several machines ``signature_folder``
    must be a folder that every worker (and the process that starts the scan, which removes it) mounts at the same
    path. A local process pool or a single-machine cluster needs nothing. The band files take 8 bytes per band and
    window, the shingle files 4 bytes per shingle (verified, the default), the signature files 4 bytes per
    permutation and window (``verify = false``). The entries of the shuffle (window, band key, digest; 24 bytes
    each) are picked from them partition by partition; handed over in memory up to ``memory_limit_mb`` (default
    1024) megabytes, past it they go to ``.npy`` files in the same folder and are read back by memory map (see
    :meth:`NearDuplicate._spill`).

Memory
    What a scan holds grows with the number of units only by what the corpus-wide steps need of each unit:
    the row (4 bytes while rows fit in 32 bits), the offset (4), the length (4), the domain (1) and the content
    hash (16) -- 29 bytes per unit, held once when both rules run (they share the arrays of each batch, see
    :func:`corpuscle.kernels.bands.joined`); and the open document's tokens while it is open.
    The band keys and digests stay on disk; the reduce reads them a block or a partition at a time (a partition's
    entries are 24 bytes per band key that falls into it, about ``24 * b / partitions`` bytes per window), and the
    grouping of exact copies (:class:`ScanWindows`) adds about 30 bytes per window while it runs. Everything else
    (shingle hashes, signatures of a batch, signature blocks read back, finer partitions of the reduce) is bounded
    by the constants below, whatever the size of a shard.
"""
from __future__ import annotations

import copy
import os
import shutil
import tempfile
import weakref

import numpy as np
import pyarrow.compute as pc
from corpuscle.findings import Finding, Level
from corpuscle.kernels.bands import BandPiece, NearPartial, ScanWindows, ShardBands
from corpuscle.kernels.bands import band_file as _band_file  # noqa: F401 (tests reach it here)
from corpuscle.kernels.bands import first_copies as _first_copies
from corpuscle.kernels.bands import joined as _joined
from corpuscle.kernels.bands import ranges as _ranges
from corpuscle.kernels.documents import infer_arrangement
from corpuscle.kernels.hashing import hex_digest
from corpuscle.kernels.histogram import histogram, log_edges
from corpuscle.kernels.keep import KeepPolicy
from corpuscle.kernels.lsh import (
    DEFAULT_MAX_BUCKET,
    Candidates,
    band_keys_and_digests,
    clusters,
    estimated_jaccard,
    exact_jaccard,
    optimal_bands,
    partition_candidates,
    unique_sets,
)
from corpuscle.kernels.minhash import (
    MinHashSettings,
    sample_shingles,
    sampled_shingle_hashes,
    shingle_hashes,
    signatures,
    word_shingle_hashes,
)
from corpuscle.kernels.order import lexorder
from corpuscle.kernels.spill import (
    BandSpill,
    ShingleEndsSpill,
    ShingleSpill,
    SignatureSpill,
    read_rows,
    read_shingle_sets,
    run_folder,
)
from corpuscle.kernels.text import document_text
from corpuscle.kernels.units import DocumentStream, Units
from corpuscle.kernels.windows import DOCUMENTS, TOKENS, Windows, batch_windows, window_domain
from corpuscle.rules.api import CorpusResult, Rule, share

DROP_LIST = "drop-list"
"""Name of the extra output both rules give: ``[{"uri": ..., "row": ...}, ...]``, the windows to drop."""

DEFAULT_MAX_CLUSTERS = 1000
#: One shingle in this many goes into a MinHash signature (see corpuscle.kernels.minhash.sample_shingles) ...
DEFAULT_SHINGLE_SAMPLE = 16
#: ... and at least this many of each unit (all of a shorter one).
SAMPLE_LEAST = 48
#: optimal_bands weights (false positives, false negatives) when candidates are verified exactly.
RECALL_WEIGHTS = (0.2, 0.8)
#: MinHash permutations per unit. The signatures serve only the search for candidates, which are then verified
#: exactly: 64 permutations (b x r = 8 x 8 at threshold 0.8) make a pair of Jaccard similarity 0.9 a candidate
#: with probability 1 - (1 - 0.9**8)**8 = 0.989 (0.994 with 128 permutations, 12 x 10) and one of 0.8 with 0.77
#: (0.74), at half the cost of 128; the price is more candidates below the threshold to verify (0.031 of the pairs
#: at 0.5 against 0.012). With ``verify = false`` the estimate's standard error is sqrt(s * (1 - s) / 64): 0.05 at
#: s = 0.8; raise num_perm for a finer estimate.
DEFAULT_NUM_PERM = 64

# Windows per step of the MinHash signatures in feed (bounds the signature matrix of a batch).
_SIGNATURE_WINDOWS = 8192
# Tokens (or text bytes) shingled per step in feed (bounds the scratch memory of the shingle hashes to ~10 MiB).
_SHINGLE_VALUES = 1 << 18
# Candidate pairs verified per step in corpus (bounds the signatures read back at once).
_VERIFY_PAIRS = 1 << 15
# Candidate pairs verified exactly per step (bounds the shingle sets read back at once: ~1,000 shingles a unit).
_EXACT_PAIRS = 1 << 11
# Band-key entries grouped into buckets per step of a partition's reduce (bounds its scratch memory, ~14 MiB).
_REDUCE_ENTRIES = 1 << 17


def _unit(domain: int) -> tuple[str, str]:
    """(what a unit is called, what its length counts) for messages."""
    if domain == DOCUMENTS:
        return "documents", "tokens"
    return ("windows", "tokens") if domain == TOKENS else ("documents", "UTF-8 bytes")


def _size_evidence(domain: int, total: int, redundant: int) -> dict:
    if domain in (TOKENS, DOCUMENTS):
        return {"tokens": total, "redundantTokens": redundant}
    return {"textBytes": total, "redundantTextBytes": redundant}


def _fractions(scan: ScanWindows, duplicates: np.ndarray) -> dict:
    """Counts and shares of duplicate windows, tokens and text bytes among all windows of the scan."""
    whole, dup = scan.sizes(), scan.sizes(duplicates)
    return {
        "windows": scan.count, "duplicateWindows": int(len(duplicates)),
        "windowFraction": share(len(duplicates), scan.count),
        "tokens": whole["tokens"], "duplicateTokens": dup["tokens"],
        "tokenFraction": share(dup["tokens"], whole["tokens"]),
        "textBytes": whole["textBytes"], "duplicateTextBytes": dup["textBytes"],
        "textByteFraction": share(dup["textBytes"], whole["textBytes"]),
    }


def _check_int(rule_id: str, name: str, value, minimum: int, hint: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise ValueError(f"rule {rule_id}: {name} must be an integer >= {minimum}, got {value!r}; hint: {hint}")
    return value


# -- clusters: keep policy, drop list and compact findings ------------------------------------------------------

#: Clusters whose members a finding's message lists (the largest first); the others are in its evidence.
TOP_CLUSTERS = 5
#: Members of one listed cluster named in the message; evidence lists up to MEMBERS_LISTED of each cluster.
MEMBERS_SHOWN = 4
MEMBERS_LISTED = 100


def _cluster_findings(rule, scan: ScanWindows, members: np.ndarray, labels: np.ndarray, cap: int, describe):
    """``(findings, drop-list entries, dropped ids)`` of the clusters ``labels`` of units ``members``.

    The keep policy of ``rule`` picks each cluster's kept member; every other member is dropped unless it is
    protected. Clusters are grouped by the shards their members lie in -- one shard, a pair of shards, or more
    ("across shards") -- and each group is one finding: the number of clusters, duplicate units and tokens, the
    largest clusters first in the message (members named), all clusters (up to ``max_clusters``) in the evidence,
    and every member (up to the instance cap) as its instances."""
    if len(members) == 0:
        return [], [], np.zeros(0, dtype=np.int64)
    members = np.asarray(members, dtype=np.int64)
    labels = np.asarray(labels, dtype=np.int64)
    uris = [st.uri for st in scan.states]
    shard = scan.shard_of(members)
    choice = rule.policy.choose(labels, members, shard, scan.lengths[members], uris)
    dropped_at = np.flatnonzero(choice.drop)
    dropped = members[dropped_at]
    kept = members[choice.kept_of]
    # The drop list: each dropped member with its cluster, the kept copy and why.
    entries = []
    for i, m, k in zip(dropped_at.tolist(), dropped.tolist(), kept[dropped_at].tolist()):
        what, unit = _unit(int(scan.domains[m]))
        entry = scan.location(m)
        kept_at = scan.location(k)
        entry.update(unit=what[:-1], rule=rule.id, cluster=hex_digest(scan.content[k]),
                     kept={"uri": kept_at["uri"], "row": kept_at["row"], "offset": kept_at["offset"]},
                     reason=rule.policy.reason(int(choice.rank[i]), int(choice.rank[choice.kept_of[i]]),
                                               int(scan.lengths[m]), int(scan.lengths[k]), unit))
        entries.append(entry)
    # Clusters by their shards: (lowest shard, highest shard, number of distinct shards).
    order = np.lexsort((members, labels))
    members, labels, shard, kept = members[order], labels[order], shard[order], kept[order]
    drop_sorted = choice.drop[order]
    starts = np.flatnonzero(np.r_[True, labels[1:] != labels[:-1]])
    sizes = np.diff(np.append(starts, len(labels)))
    low = np.minimum.reduceat(shard, starts)
    high = np.maximum.reduceat(shard, starts)
    pair_of = np.unique(np.column_stack((np.repeat(np.arange(len(starts)), sizes), shard)), axis=0)
    spread = np.bincount(pair_of[:, 0], minlength=len(starts))
    across = spread > 2
    low, high = np.where(across, -1, low), np.where(across, -1, high)
    drops = np.add.reduceat(drop_sorted.astype(np.int64), starts)
    drop_tokens = np.add.reduceat(np.where(drop_sorted, scan.lengths[members].astype(np.int64), 0), starts)
    findings = []
    groups = np.unique(np.column_stack((low, high)), axis=0)
    for lo, hi in groups.tolist():
        which = np.flatnonzero((low == lo) & (high == hi))
        # Largest clusters first (members), then the one whose first member comes first.
        which = which[np.lexsort((members[starts[which]], -sizes[which]))]
        what, unit = _unit(int(scan.domains[members[starts[which[0]]]]))
        findings.append(_group_finding(rule, scan, which, starts, sizes, members, kept, drops, drop_tokens,
                                       (lo, hi), cap, describe, what, unit))
    return findings, entries, dropped


def _group_finding(rule, scan, which, starts, sizes, members, kept, drops, drop_tokens, shards, cap, describe,
                   what, unit) -> Finding:
    lo, hi = shards
    uris = [st.uri for st in scan.states]
    named = not (lo >= 0 and lo == hi)  # within one shard, the finding names it once
    listed = which[:rule._max_clusters()]
    cluster_list = []
    lines = []
    for rank, c in enumerate(which[:max(len(listed), TOP_CLUSTERS)].tolist()):
        ids = members[starts[c]:starts[c] + sizes[c]]
        keeper = int(kept[starts[c]])
        extra = describe(ids)
        cluster = {"cluster": hex_digest(scan.content[keeper]), "members": int(sizes[c]),
                   "dropped": int(drops[c]), "droppedTokens" if unit == "tokens" else "droppedBytes":
                       int(drop_tokens[c]), "kept": scan.location(keeper),
                   "others": [scan.location(m) for m in ids[:MEMBERS_LISTED + 1].tolist() if m != keeper][
                       :MEMBERS_LISTED], **extra}
        if sizes[c] - 1 > MEMBERS_LISTED:
            cluster["othersTruncated"] = True
        if rank < len(listed):
            cluster_list.append(cluster)
        if rank < TOP_CLUSTERS:
            others = [scan.where(m, named) for m in ids.tolist() if m != keeper]
            shown = ", ".join(others[:MEMBERS_SHOWN]) + (f" and {len(others) - MEMBERS_SHOWN:,} more"
                                                         if len(others) > MEMBERS_SHOWN else "")
            similarity = f", {extra['summary']}" if "summary" in extra else ""
            lines.append(f"({rank + 1}) {int(sizes[c]):,} {what}{similarity}: keep {scan.where(keeper, named)} "
                         f"({int(scan.lengths[keeper]):,} {unit}); drop {shown}.")
    for cluster in cluster_list:
        cluster.pop("summary", None)
    if lo < 0:
        place = "across three or more shards"
        kind = f"{rule.cluster_kind}-across"
    elif lo == hi:
        place = f"within {uris[lo]}"
        kind = rule.cluster_kind
    else:
        place = f"between {uris[lo]} and {uris[hi]}"
        kind = f"{rule.cluster_kind}-between-{_shard_set_digest([uris[lo], uris[hi]])}"
    n_drop, n_tokens = int(drops[which].sum()), int(drop_tokens[which].sum())
    member_ids = members[_ragged(starts[which], sizes[which])]
    domain = int(scan.domains[members[starts[which[0]]]])
    message = (f"{len(which):,} cluster(s) of {rule.cluster_noun} {what} {place}: {n_drop:,} duplicate {what} "
               f"({n_tokens:,} {unit}) to drop, {int(sizes[which].sum()):,} {what} in all. "
               f"{rule.method_note(domain)} Largest first: " + " ".join(lines))
    if len(which) > TOP_CLUSTERS:
        listed_note = "all of them" if len(listed) == len(which) else \
            f"the first {len(listed):,}; max_clusters under [rule.{rule.id}] lists more"
        message += (f" {len(which) - TOP_CLUSTERS:,} more cluster(s) are in the SARIF/JSON evidence "
                    f"(clusterList: {listed_note}) and all in the drop list.")
    message += " --drop-list FILE writes each copy to drop with its cluster, the copy kept and why."
    finding = scan.group_finding(rule, member_ids, kind, message, cap, clusters=int(len(which)),
                                 duplicates=n_drop, **{"duplicateTokens" if unit == "tokens" else
                                                       "duplicateBytes": n_tokens},
                                 unit=what[:-1], clusterList=cluster_list,
                                 clustersTruncated=bool(len(listed) < len(which)),
                                 **rule.evidence())
    if lo >= 0 and lo == hi:
        finding.uri = uris[lo]
    return finding


def _ragged(starts: np.ndarray, sizes: np.ndarray) -> np.ndarray:
    """The positions ``starts[i] .. starts[i] + sizes[i] - 1`` of every range, back to back."""
    sizes = np.asarray(sizes, dtype=np.int64)
    first = np.cumsum(sizes) - sizes
    return np.arange(int(sizes.sum()), dtype=np.int64) + np.repeat(np.asarray(starts, dtype=np.int64) - first, sizes)


def _over_limit(states) -> dict:
    """Documents compared by their first tokens only, and how the documents of token shards were read."""
    out = {}
    over = sum(int(st.stats.get("documentsOverLimit", 0)) for st in states)
    if over:
        out["documentsOverLimit"] = over
    reading: dict = {}
    for st in states:
        found = getattr(st, "reading", None)
        if found:
            entry = reading.setdefault(found[0], {"shards": 0, "why": found[1]})
            entry["shards"] += 1
    if reading:
        out["documentReading"] = reading  # arrangement -> shards read so, and the reason of the first
    return out


def _shard_set_digest(uris: list[str]) -> str:
    import hashlib

    return hashlib.sha256("\x1f".join(uris).encode()).hexdigest()[:12]


# -- the rules --------------------------------------------------------------------------------------------------


UNITS = ("document", "window")

#: Options both rules take: the unit compared in token shards and the keep policy (see corpuscle.kernels.keep).
COMMON_OPTIONS = {"unit": "document", "keep": "first", "prefer": [], "protect": []}


class _DuplicateRule(Rule):
    """Shared by both rules: the units of a batch (documents or windows) and the per-shard arrays of them."""

    needs = {"tokens_column": "int-list", "text_column": "text"}  # either of them: see missing()
    needs_any = True
    outputs = (DROP_LIST,)

    def __init__(self, **options):
        super().__init__(**options)
        unit = self.opts["unit"]
        if unit not in UNITS:
            raise ValueError(f"rule {self.id}: unit must be \"document\" or \"window\", got {unit!r}; hint: "
                             "\"document\" compares the documents packed in token rows, \"window\" whole rows")
        self.policy = KeepPolicy.from_options(self.id, self.opts)
        # Documents open at a cut would have to be carried between the parts of a split shard: in document mode a
        # large shard is scanned whole by one process (window mode joins parts, see merge).
        self.splittable = unit == "window"

    def missing(self, batch, settings):
        """Either column is enough: token rows when the shard has them, documents otherwise."""
        if window_domain(batch, settings) is not None:
            return None
        return (f"neither a token column {settings.tokens_column!r} (integer lists) nor a text column "
                f"{settings.text_column!r} (strings); one of them is needed")

    def infer(self, batch, settings):
        if self.opts["unit"] != "document" or window_domain(batch, settings) != TOKENS or not len(batch):
            return None
        return infer_arrangement(batch, settings)

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.parts = {"rows": [], "offsets": [], "lengths": [], "domains": [], "content": []}
        state.stream = None
        state.arrangement = None
        return state

    def _units(self, state, batch) -> "tuple[Windows, Units | None]":
        """The units of a batch: its windows (rows or text documents), or the token documents complete after it
        (with their tokens, for shingles)."""
        settings = state.settings
        if self.opts["unit"] == "window" or window_domain(batch, settings) != TOKENS:
            return batch_windows(batch, settings), None
        if state.stream is None:
            state.stream = DocumentStream()
            state.arrangement, state.reading = state.inferred or infer_arrangement(batch, settings)
        units, windows = state.stream.add(batch, settings, state.arrangement)
        return windows, units

    def _closing(self, state) -> "tuple[Windows, Units] | None":
        """The document open at the end of the shard, as units."""
        stream = state.__dict__.pop("stream", None)
        arrangement = state.__dict__.pop("arrangement", None)
        # How the documents were read (a heuristic when inferred), for the corpus figures.
        state.reading = (arrangement, state.__dict__.pop("reading", "")) if arrangement else None
        if stream is None:
            return None
        units, windows = stream.close()
        state.count(documentsOverLimit=stream.over_limit)
        return (windows, units) if len(units) else None

    def _keep(self, state, windows: Windows, select: np.ndarray | None = None) -> None:
        """Keep the rows, offsets, lengths, domains and content hashes of the batch's units (or of ``select`` of
        them). When all of them are kept, the batch's own arrays are kept: both rules of this module hold the same
        arrays then, and :meth:`end` joins them into arrays the two states share (see :func:`_joined`)."""
        names = ("rows", "offsets", "lengths", "content", "domains")
        if select is not None and len(select) < len(windows.local):
            for name in names:
                state.parts[name].append(getattr(windows, name)[select])
            return
        for name in names:
            state.parts[name].append(getattr(windows, name))

    def end(self, state):
        parts = state.__dict__.pop("parts")
        # One array at a time, each list let go as soon as it is joined: the end of a shard briefly holds one
        # array twice, not the whole state. The arrays may be shared with the other rule's state: they are never
        # changed in place.
        state.rows = _joined(parts.pop("rows"), np.zeros(0, np.uint32))
        state.offsets = _joined(parts.pop("offsets"), np.zeros(0, np.uint32))
        state.lengths = _joined(parts.pop("lengths"), np.zeros(0, np.uint32))
        state.domains = _joined(parts.pop("domains"), np.zeros(0, np.uint8))
        state.content = _joined(parts.pop("content"), np.zeros((0, 2), np.uint64))
        return state

    #: By default (unit = "document") a large shard is scanned whole; with unit = "window" it may be split (set per
    #: instance in __init__).
    splittable = False

    def merge(self, first, second):
        """The windows of both parts, ``first``'s then ``second``'s (one window per row: nothing spans a cut; only
        window mode splits). ``near-duplicate`` joins its parts after the shuffle has taken their band keys (each
        part's piece gives its windows the ids that follow on from the previous part's), so only the window tables
        are joined here."""
        merged = super().merge(first, second)
        for name in ("rows", "offsets", "lengths", "domains", "content"):
            setattr(merged, name, np.concatenate([getattr(first, name), getattr(second, name)]))
        if hasattr(first, "spill_files"):  # near-duplicate: each part's own files, in window order
            merged.spill_files = first.spill_files + second.spill_files
        return merged

    def _max_clusters(self) -> int:
        return _check_int(self.id, "max_clusters", self.opts["max_clusters"], 0,
                          f"clusters listed with their members in each finding; the default is {DEFAULT_MAX_CLUSTERS}")

    def _clusters_result(self, scan: "ScanWindows", members: np.ndarray, labels: np.ndarray, cap: int,
                         describe) -> tuple[list, list, np.ndarray]:
        """Findings (one per shard, shard pair, or across shards), drop-list entries and the dropped ids of the
        clusters given as ``members`` (unit ids) with their cluster ``labels``; ``describe(label, ids)`` gives
        evidence of one cluster (e.g. its similarity)."""
        return _cluster_findings(self, scan, members, labels, cap, describe)


def cluster_sizes(sizes) -> dict:
    """Clusters by their size in windows (documents for text) as their findings count them (near-duplicate: the
    distinct contents; their exact copies are exact-duplicate's), on log-spaced bins from 2 (bin i holds
    ``edges[i] <= size < edges[i + 1]``; one bin per size up to 8): what the HTML report plots, a few dozen
    numbers however many clusters there are."""
    sizes = np.sort(np.asarray(sizes, dtype=np.int64))
    edges = log_edges(int(sizes[-1]) if sizes.size else 2, per_octave=4, start=2)
    distinct, counts = np.unique(sizes, return_counts=True)
    return {"clusters": int(sizes.size), "windows": int(sizes.sum()), "largest": int(sizes[-1]) if sizes.size else 0,
            "edges": edges.tolist(), "counts": histogram(distinct, counts, edges).tolist()}


class ExactDuplicate(_DuplicateRule):
    """Documents (or windows) whose content is identical, within a shard or across shards. Every extra copy is
    trained on once more per epoch: it weights that content as several examples, makes verbatim memorisation more
    likely, and spends tokens that new text would have used; copies that straddle a train/validation split also
    inflate evaluation. In token shards the unit is the document as the document reading finds it (separators,
    position restarts, one per row; spanning rows, batches and shards), located by its first token (row, offset)
    and its length; with unit = "window" it is the whole row. Content is compared by a 128-bit hash of the token
    ids, or of a text document's UTF-8 bytes exactly as stored (no normalization); see the module notes of
    rules/duplicates.py for its collision figures. Empty units are left to empty-document."""

    id = "exact-duplicate"
    level = Level.warning
    summary = "Identical documents (or windows): the same token ids or the same bytes, within or across shards."
    kinds = {
        "copies": "the groups of identical documents or windows within one shard",
        "copies-between-*": "the groups of identical documents or windows spread over two shards (digest of both)",
        "copies-across": "the groups of identical documents or windows spread over three or more shards",
    }
    help = ("Keep one copy of each group and drop the others: `corpuscle scan ... --drop-list FILE` writes one "
            "JSON line per copy to drop (uri, row, offset, length, the group, the copy kept and why). Choose the "
            "copy to keep with keep = \"first\" | \"longest\", prefer = [path globs, best first] and protect = "
            "[path globs never dropped] under [rule.exact-duplicate]. Deduplicate before packing and tokenizing, and "
            "across every shard that goes into one run.")
    options = {"max_clusters": DEFAULT_MAX_CLUSTERS, **COMMON_OPTIONS}
    cluster_kind = "copies"
    cluster_noun = "identical"

    def __init__(self, **options):
        super().__init__(**options)
        self._max_clusters()

    def method_note(self, domain: int) -> str:
        what = "text bytes" if domain == 1 else "token ids"
        return f"Compared by a 128-bit content hash of the {what}."

    def evidence(self) -> dict:
        return {"method": "128-bit content hash"}

    def feed(self, state, batch):
        windows, _ = self._units(state, batch)
        self._keep(state, windows)

    def end(self, state):
        closing = self._closing(state)
        if closing is not None:
            self._keep(state, closing[0])
        return super().end(state)

    def corpus(self, states):
        scan = ScanWindows(states)
        cap = states[0].cap if states else 0
        sizes, starts = scan.group_sizes, scan.group_starts
        repeated = np.flatnonzero(sizes >= 2)
        members = scan.order[_ragged(starts[repeated], sizes[repeated])].astype(np.int64)
        labels = np.repeat(repeated, sizes[repeated])

        def describe(ids):
            return {"contentHash": hex_digest(scan.content[ids[0]])}

        findings, entries, dropped = self._clusters_result(scan, members, labels, cap, describe)
        metrics = {"exactDuplicates": {"groups": int(len(repeated)), "unit": self.opts["unit"],
                                       "dropped": int(len(dropped)), **_fractions(scan, dropped),
                                       **_over_limit(states)},
                   "exactDuplicateClusterSizes": cluster_sizes(sizes[repeated])}
        return CorpusResult(findings, metrics, {DROP_LIST: entries})


class NearDuplicate(_DuplicateRule):
    """Documents (or windows) that are near-duplicates: their sets of n-token shingles (or n-word shingles after
    lowercasing, in text) have a Jaccard similarity at or above the threshold. Near copies -- the same page with a
    different header, a boilerplate licence, a document re-tokenized after a small edit -- act like exact copies in
    training: repeated content, more memorisation, less new text per token. In token shards the unit is the
    document as the document reading finds it (located by its first token: row, offset, and its length); with
    unit = "window" the whole row. Candidates are found with MinHash signatures (of a consistent sample of the
    shingles, see shingle_sample) and locality-sensitive hashing (b bands of r values) -- a heuristic search, so a
    pair close to the threshold can be missed -- and every candidate pair is then verified against the exact
    Jaccard similarity of the two full shingle sets (computed from the stored 32-bit shingle hashes): what is
    reported is exact. With verify = false the MinHash estimate is reported instead, and says so. Exact copies
    are reported by exact-duplicate; a cluster here has at least two different contents."""

    id = "near-duplicate"
    level = Level.warning
    summary = ("Documents (or windows) whose Jaccard similarity of shingles is at or above the threshold (MinHash "
               "LSH candidates, verified exactly).")
    kinds = {
        "clusters": "the clusters of near-duplicate documents or windows within one shard",
        "clusters-between-*": "the clusters spread over two shards (digest of both)",
        "clusters-across": "the clusters spread over three or more shards",
    }
    help = ("Keep one member of each cluster and drop the others: `corpuscle scan ... --drop-list FILE` writes one "
            "JSON line per copy to drop (uri, row, offset, length, the cluster, the copy kept and why). Choose the "
            "copy to keep with keep = \"first\" | \"longest\", prefer = [path globs, best first] and protect = "
            "[path globs never dropped] under [rule.near-duplicate]. Near-deduplicate the documents before packing. "
            "If the listed documents are meant to be alike (shared templates), raise threshold.")
    options = {"threshold": 0.8, "num_perm": DEFAULT_NUM_PERM, "seed": 1, "n": 5,
               "max_clusters": DEFAULT_MAX_CLUSTERS, "max_bucket": DEFAULT_MAX_BUCKET, "signature_folder": "",
               "memory_limit_mb": 1024,
               "verify": True, "shingle_sample": DEFAULT_SHINGLE_SAMPLE, **COMMON_OPTIONS}
    keyed = True  # the band keys are grouped by a partitioned shuffle (partition / reduce_partition)
    cluster_kind = "clusters"
    cluster_noun = "near-duplicate"

    def __init__(self, **options):
        super().__init__(**options)
        threshold = self.opts["threshold"]
        if isinstance(threshold, bool) or not isinstance(threshold, (int, float)) or not 0 < threshold <= 1:
            raise ValueError(f"rule {self.id}: threshold must be a number in (0, 1], got {threshold!r}; hint: 0.8 "
                             "finds near copies, 0.5 also loosely related windows")
        try:
            self.minhash = MinHashSettings(num_perm=self.opts["num_perm"], n=self.opts["n"], seed=self.opts["seed"])
        except (TypeError, ValueError) as exc:
            raise ValueError(f"rule {self.id}: {exc}") from None
        self._max_clusters()
        _check_int(self.id, "max_bucket", self.opts["max_bucket"], 1,
                   f"windows per LSH bucket paired in full; the default is {DEFAULT_MAX_BUCKET}")
        _check_int(self.id, "memory_limit_mb", self.opts["memory_limit_mb"], 0,
                   "megabytes of band keys held in memory before they go to disk; the default is 1024")
        if not isinstance(self.opts["verify"], bool):
            raise ValueError(f"rule {self.id}: verify must be true or false, got {self.opts['verify']!r}; hint: "
                             "true checks every candidate pair against its exact Jaccard similarity")
        _check_int(self.id, "shingle_sample", self.opts["shingle_sample"], 1,
                   f"MinHash takes one shingle in this many (and at least {SAMPLE_LEAST} per unit); 1 takes all")
        self.verify = self.opts["verify"]
        self.sample = self.opts["shingle_sample"]
        self.threshold = float(threshold)
        # Verified candidates cost only their verification: the bands lean towards recall (false negatives weigh
        # 0.8, false positives 0.2); unverified, the balance of datasketch's default (0.5, 0.5).
        weights = RECALL_WEIGHTS if self.verify else (0.5, 0.5)
        self.bands, self.rows_per_band = optimal_bands(self.threshold, self.minhash.num_perm, weights)
        folder = self.opts["signature_folder"]
        if not isinstance(folder, str):
            raise ValueError(f"rule {self.id}: signature_folder must be a folder path (a string), got {folder!r}; "
                             "hint: leave it empty for the system temporary folder, or give a folder every worker "
                             "of a cluster mounts at the same path")
        # One folder per scan for the signature files: the path travels with the rule to worker processes.
        # Named after this process, so that a later scan removes it if this one is killed (see run_folder).
        self.spill_folder = run_folder(folder or tempfile.gettempdir(), "corpuscle-minhash")
        weakref.finalize(self, shutil.rmtree, self.spill_folder, True)  # an interrupted scan leaves nothing

    def begin(self, shard, settings):
        state = super().begin(shard, settings)
        state.spill = None  # signatures, kept only for the estimate when verify is off
        state.band_spill = None
        state.shingle_spill = None
        return state

    def feed(self, state, batch):
        windows, units = self._units(state, batch)
        if units is not None:
            self._sign_units(state, windows, units)
            return
        n = self.minhash.n
        if windows.domain == TOKENS:
            flat = batch.flat(state.settings.tokens_column)
            sizes = flat.offsets

            def shingled_hashes(w0, w1):
                return self._sampled(*shingle_hashes(flat.values, flat.offsets[w0:w1 + 1], n))
        else:
            text = document_text(batch, state.settings)
            if text.array is None:
                return
            sizes = np.zeros(len(text.array) + 1, dtype=np.int64)
            np.cumsum(pc.binary_length(text.array).fill_null(0).to_numpy(zero_copy_only=False), out=sizes[1:])

            def shingled_hashes(w0, w1):
                return self._sampled(*word_shingle_hashes(text.array.slice(w0, w1 - w0), n))
        self._sign(state, windows, sizes, shingled_hashes)

    def _sign_units(self, state, windows: Windows, units: Units) -> None:
        n = self.minhash.n

        def shingled_hashes(w0, w1):
            return sampled_shingle_hashes(units.words, units.bounds[w0:w1 + 1], n, self.sample, SAMPLE_LEAST)

        self._sign(state, windows, units.bounds, shingled_hashes)

    def _sampled(self, hashes: np.ndarray, offsets: np.ndarray) -> tuple:
        """Shingle hashes with the sample MinHash takes of them: ``(hashes, offsets, sampled, sample_offsets)``."""
        return (hashes, offsets) + sample_shingles(hashes, offsets, self.sample, SAMPLE_LEAST)

    def _sign(self, state, windows: Windows, sizes: np.ndarray, shingled_hashes) -> None:
        """Shingle the batch's units a range at a time (at least one unit, at most about _SHINGLE_VALUES tokens or
        text bytes otherwise: their scratch memory is some 40 bytes per token), store the shingle hashes of those
        with at least one shingle (for the exact verification) and their MinHash signatures (of the sample), and
        keep their rows, offsets, lengths and hashes."""
        shingled = []  # units with at least one shingle, by range
        for w0, w1 in _ranges(sizes, _SHINGLE_VALUES):
            hashes, offsets, sampled, sample_offsets = shingled_hashes(w0, w1)
            local = np.flatnonzero(offsets[1:] > offsets[:-1])
            if len(local) == 0:
                continue
            if state.band_spill is None:
                state.band_spill = BandSpill(self.spill_folder, self.bands + 1)
                if self.verify:
                    state.shingle_spill = (ShingleSpill(self.spill_folder), ShingleEndsSpill(self.spill_folder))
                else:
                    state.spill = SignatureSpill(self.spill_folder, self.minhash.num_perm)
            if self.verify:
                first, last = int(offsets[local[0]]), int(offsets[local[-1] + 1])
                state.shingle_spill[0].append(hashes[first:last].reshape(-1, 1))
                state.shingle_spill[1].append_counts(np.diff(offsets)[local])
            for lo in range(0, len(local), _SIGNATURE_WINDOWS):
                chosen = local[lo:lo + _SIGNATURE_WINDOWS]
                first, last = int(chosen[0]), int(chosen[-1])
                block = signatures(sampled, sample_offsets[first:last + 2], self.minhash.num_perm,
                                   self.minhash.seed)[chosen - first]
                if state.spill is not None:
                    state.spill.append(block)
                state.band_spill.append(np.column_stack(band_keys_and_digests(block, self.bands,
                                                                              self.rows_per_band)))
            shingled.append(local + w0)
            del hashes, offsets, sampled, sample_offsets
        if shingled:
            # Shingled units are non-empty, so each is one of ``windows``.
            self._keep(state, windows, np.searchsorted(windows.local, np.concatenate(shingled)))

    def end(self, state):
        """The shard's band keys and signature digests, as memory maps of its band file once the shard is read.

        They are made from each block of signatures as it is made, and wanted only by the reduce, so they go to a
        file of their own (:class:`BandSpill`) and the state holds read-only memory maps of it (``keys`` and
        ``digests``), which take no memory until read: :class:`ShardBands` reads the file itself, block by block,
        rather than the maps. Held in memory, they would be most of what a shard's state holds (8 bytes per band and
        window, of about 100). The signatures themselves are kept (in a file of their own) only when ``verify`` is
        off: the estimate of a candidate pair's similarity reads them back; verified, nothing needs them."""
        closing = self._closing(state)
        if closing is not None:
            self._sign_units(state, *closing)
        state = super().end(state)
        spill = state.__dict__.pop("spill")
        bands = state.__dict__.pop("band_spill")
        shingle_spill = state.__dict__.pop("shingle_spill", None)
        state.shingles_paths = tuple(f.close() for f in shingle_spill) if shingle_spill else None
        state.signatures_path = spill.close() if spill is not None else None
        # The files the verification reads, with the count of windows they cover (a shard scanned in parts has
        # one entry per part once its states are merged).
        state.spill_files = [(len(state.rows), state.shingles_paths, state.signatures_path)]
        path = bands.close() if bands is not None else None
        if path is None or bands.windows == 0:
            state.keys = np.zeros((0, self.bands), dtype=np.uint64)
            state.digests = np.zeros(0, dtype=np.uint64)
            return state
        stored = np.load(path, mmap_mode="r")
        state.keys, state.digests = stored[:, :self.bands], stored[:, self.bands]
        return state

    # -- the reduce step -------------------------------------------------------------------------------------------

    def partition(self, state, parts):
        """Map side of the shuffle: the band keys of the shard's windows, by partition (key modulo ``parts``; the
        keys are mixed hashes, so the low bits spread evenly). A window whose content already appeared earlier in
        the same shard is left out: it is an exact copy, never a first copy, and the result does not need it. The
        pieces are views of the state's band keys (see :class:`BandPiece`): nothing is copied here."""
        slim = copy.copy(state)
        del slim.keys, slim.digests
        source = ShardBands(state.keys, state.digests, _first_copies(state.content), parts)
        count = len(state.rows)
        return slim, self._spill([BandPiece(count, source=source, part=p) for p in range(parts)])

    def _spill(self, pieces: list) -> list:
        """Bound the band keys held for the reduce (``memory_limit_mb``).

        Pieces are kept as they are while the entries of the pieces made by this process add up to at most
        ``memory_limit_mb`` megabytes at 24 bytes an entry (what they weigh once picked, in the reduce or on their
        way to another process; until then they are views of the shard's band keys). In a local scan that is every
        piece of the scan: this process splits every shard's state. Past it, each piece's entries are written with
        ``np.save`` to ``.npy`` files in the scan's temporary folder (the one of the signature files, removed with
        it), one piece at a time, and replaced by read-only memory maps of those files, which ``reduce_partition``
        reads back. The findings are the same either way.
        """
        size = sum(piece.nbytes for piece in pieces)
        held = getattr(self, "_held_bytes", 0) + size
        if held <= self.opts["memory_limit_mb"] * 2 ** 20:
            self._held_bytes = held
            return pieces
        os.makedirs(self.spill_folder, mode=0o700, exist_ok=True)
        out = []
        for piece in pieces:
            mapped = []
            for name, values in zip(("window", "keys", "digests"), piece.entries()):
                if values.size == 0:  # an empty file cannot be memory-mapped; nothing to hold anyway
                    mapped.append(values)
                    continue
                fd, path = tempfile.mkstemp(prefix=f"band-{name}-", suffix=".npy", dir=self.spill_folder)
                with os.fdopen(fd, "wb") as fh:
                    np.save(fh, values)
                mapped.append(np.load(path, mmap_mode="r"))
            out.append(BandPiece(piece.windows, entries=tuple(mapped)))
        return out

    def reduce_partition(self, pieces):
        """Reduce side: the candidate pairs of the partition's buckets (global window ids in scan order). They are
        verified in ``corpus``, once all partitions are in: a pair of near copies shares most of its bands, which
        fall into several partitions, and would otherwise be verified once in each."""
        offsets = np.zeros(len(pieces) + 1, dtype=np.int64)
        np.cumsum([piece.windows for piece in pieces], out=offsets[1:])
        # The entries of all pieces, each piece picked and copied into place in turn.
        total = sum(piece.count for piece in pieces)
        keys, ids, digests = np.empty(total, np.uint64), np.empty(total, np.int64), np.empty(total, np.uint64)
        at = 0
        for s, piece in enumerate(pieces):
            window, piece_keys, piece_digests = piece.entries()
            end = at + len(window)
            np.add(window, offsets[s], out=ids[at:end])
            keys[at:end], digests[at:end] = piece_keys, piece_digests
            at = end
            del window, piece_keys, piece_digests
        found = self._bucket_candidates(keys, ids, digests)
        del keys, ids, digests
        return NearPartial(found.pairs, found.capped_buckets, found.largest_bucket)

    def _verify_exact(self, pairs: np.ndarray, offsets: np.ndarray, paths: list) -> np.ndarray:
        """The exact Jaccard similarity of each pair's shingle sets (of their 32-bit shingle hashes), read back
        from the shingle files of their shards a chunk of pairs at a time; see
        :func:`corpuscle.kernels.lsh.exact_jaccard`."""
        similarity = np.empty(len(pairs), dtype=np.float64)
        for lo in range(0, len(pairs), _EXACT_PAIRS):
            chunk = pairs[lo:lo + _EXACT_PAIRS]
            needed, where = np.unique(chunk, return_inverse=True)
            where = where.reshape(chunk.shape)
            shard = np.searchsorted(offsets, needed, side="right") - 1
            cuts = np.flatnonzero(np.diff(shard)) + 1
            hashes, counts = [], []
            for a, b in zip(np.concatenate(([0], cuts)).tolist(), np.concatenate((cuts, [len(needed)])).tolist()):
                s = int(shard[a])
                found, found_offsets = read_shingle_sets(*paths[s], needed[a:b] - offsets[s])
                hashes.append(found)
                counts.append(np.diff(found_offsets))
            counts = np.concatenate(counts)
            set_offsets = np.zeros(len(counts) + 1, dtype=np.int64)
            np.cumsum(counts, out=set_offsets[1:])
            values, set_offsets = unique_sets(np.concatenate(hashes), set_offsets)
            similarity[lo:lo + len(chunk)] = exact_jaccard(values, set_offsets, where)
        return similarity

    def _bucket_candidates(self, keys: np.ndarray, ids: np.ndarray, digests: np.ndarray) -> Candidates:
        """:func:`corpuscle.kernels.lsh.partition_candidates` of a partition's entries, in finer partitions of at most about
        :data:`_REDUCE_ENTRIES` entries each when it has more: its scratch memory is several times that of the
        entries it is given, so it is given a bounded share at a time.

        The finer partitions split by other bits of the key (bits 32 and up modulo their number; the keys are
        mixed hashes, so these spread evenly too): each bucket still lies wholly in one of them, and windows with
        identical signatures share all their keys, so the union of their pairs is the partition's pair set (the
        reasoning of :func:`~corpuscle.kernels.lsh.partition_candidates`), made unique here; capped buckets add up and the
        largest bucket is the largest of any."""
        max_bucket = self.opts["max_bucket"]
        finer = -(-len(keys) // _REDUCE_ENTRIES)
        if finer <= 1:
            return partition_candidates(keys, ids, digests=digests, max_bucket=max_bucket)
        which = ((keys >> np.uint64(32)) % np.uint64(finer)).astype(np.min_scalar_type(finer - 1))
        found, capped, largest = [], 0, 0
        for q in range(finer):
            mask = which == q
            part = partition_candidates(keys[mask], ids[mask], digests=digests[mask], max_bucket=max_bucket)
            found.append(part.pairs)
            capped += part.capped_buckets
            largest = max(largest, part.largest_bucket)
            del mask, part
        pairs = np.concatenate(found)
        del found
        pairs = pairs[lexorder((pairs[:, 1], pairs[:, 0]))]
        once = np.ones(len(pairs), dtype=bool)
        once[1:] = np.any(pairs[1:] != pairs[:-1], axis=1)
        return Candidates(pairs[once], capped, largest)

    def corpus(self, states, partials=None):
        try:
            if partials is None:
                states, partials = self.keyed_reduce(states)
            return self._corpus(states, partials)
        finally:
            shutil.rmtree(self.spill_folder, ignore_errors=True)
            self._held_bytes = 0

    def _corpus(self, states, partials):
        scan = ScanWindows(states)
        cap = states[0].cap if states else 0
        ids = np.arange(scan.count)
        first = scan.first_copy == ids
        distinct = np.flatnonzero(first)
        found = self._candidates(partials, first)
        pairs = found.pairs
        pairs = pairs[scan.domains[pairs[:, 0]] == scan.domains[pairs[:, 1]]]  # a document never pairs a window
        similarity = self._similarity(pairs, scan)
        kept = similarity >= self.threshold
        pairs, similarity = pairs[kept], similarity[kept]

        label = np.full(scan.count, -1, dtype=np.int64)
        label[distinct] = clusters(pairs, distinct)
        label = label[scan.first_copy]  # an exact copy belongs to its first copy's cluster
        members_per = np.bincount(label[distinct], minlength=scan.count)  # distinct contents per cluster
        in_cluster = np.flatnonzero(members_per[label] >= 2)
        # Verified pairs by cluster, for the lowest and mean similarity of each.
        pair_label = label[pairs[:, 0]]
        by_pair = np.argsort(pair_label, kind="stable")
        pair_label, pair_similarity = pair_label[by_pair], similarity[by_pair]
        measure = "exact Jaccard" if self.verify else "estimated Jaccard (MinHash, heuristic)"

        def describe(group):
            head = int(label[group[0]])
            lo, hi = np.searchsorted(pair_label, head), np.searchsorted(pair_label, head, side="right")
            sims = pair_similarity[lo:hi]
            distinct_here = int(np.count_nonzero(scan.first_copy[group] == group))
            lowest, mean = float(sims.min()), float(sims.mean())
            return {"distinct": distinct_here, "exactCopies": int(len(group) - distinct_here),
                    "similarityMin": round(lowest, 4), "similarityMean": round(mean, 4),
                    "verifiedPairs": int(len(sims)),
                    "summary": f"{measure} {lowest:.2f} at the lowest over {len(sims):,} pair(s)"}

        findings, entries, dropped = self._clusters_result(scan, in_cluster, label[in_cluster], cap, describe)
        heads = np.unique(label[in_cluster])
        metrics = {"nearDuplicates": {
            "threshold": self.threshold, "bands": self.bands, "rowsPerBand": self.rows_per_band,
            "numPerm": self.minhash.num_perm, "shingleSize": self.minhash.n, "clusters": int(len(heads)),
            "unit": self.opts["unit"], "similarity": measure, "shingleSample": self.sample,
            "dropped": int(len(dropped)), **_fractions(scan, dropped[scan.first_copy[dropped] == dropped]),
            "candidatePairs": int(len(found.pairs)), "verifiedPairs": int(len(pairs)),
            "cappedBuckets": found.capped_buckets, "largestBucket": found.largest_bucket, **_over_limit(states),
        }, "nearDuplicateClusterSizes": cluster_sizes(members_per[heads])}
        return CorpusResult(findings, metrics, {DROP_LIST: entries})

    def method_note(self, domain: int) -> str:
        shingle = "word" if domain == 1 else "token"
        if self.verify:
            return (f"Similarity is the exact Jaccard similarity of their {self.minhash.n}-{shingle} "
                    f"shingle sets (every candidate verified; threshold {self.threshold:g}); the candidates come "
                    f"from MinHash LSH ({self.minhash.num_perm} permutations, b x r = {self.bands} x "
                    f"{self.rows_per_band}), a heuristic search that can miss a pair near the threshold.")
        return (f"Similarity is an estimate (MinHash with {self.minhash.num_perm} permutations of a sample of the "
                f"{self.minhash.n}-{shingle} shingles, LSH b x r = {self.bands} x {self.rows_per_band}, "
                f"threshold {self.threshold:g}): a heuristic, not verified (verify = false).")

    def evidence(self) -> dict:
        return {"threshold": self.threshold, "bands": self.bands, "rowsPerBand": self.rows_per_band,
                "numPerm": self.minhash.num_perm, "shingleSize": self.minhash.n,
                "method": "exact Jaccard of shingle sets (verified MinHash LSH candidates)" if self.verify else
                "MinHash LSH estimate (heuristic)"}

    @staticmethod
    def _candidates(partials: list, first: np.ndarray) -> Candidates:
        """The candidate pairs of all partitions between first copies (an exact copy pairs through its first
        copy), each pair once, sorted: what candidate_pairs gives on all the keys at once."""
        pairs = np.concatenate([p.pairs for p in partials]) if partials else np.zeros((0, 2), np.int64)
        pairs = pairs[first[pairs[:, 0]] & first[pairs[:, 1]]]
        pairs = pairs[lexorder((pairs[:, 1], pairs[:, 0]))]
        once = np.ones(len(pairs), dtype=bool)
        once[1:] = np.any(pairs[1:] != pairs[:-1], axis=1)
        capped = sum(p.capped_buckets for p in partials)
        largest = max((p.largest_bucket for p in partials), default=0)
        return Candidates(pairs[once], capped, largest)

    def _similarity(self, pairs: np.ndarray, scan: ScanWindows) -> np.ndarray:
        """Each pair's exact Jaccard similarity from the shards' shingle files, or with ``verify = false`` its
        MinHash estimate from their signature files (both in the scan's folder, which the process that starts the
        scan mounts too)."""
        files = [entry for st in scan.states for entry in st.spill_files]
        offsets = np.zeros(len(files) + 1, dtype=np.int64)
        np.cumsum([count for count, _, _ in files], out=offsets[1:])
        if self.verify and all(shingles for count, shingles, _ in files if count):
            return self._verify_exact(pairs, offsets, [shingles for _, shingles, _ in files])
        return self._verify(pairs, offsets, [signatures for _, _, signatures in files])

    def _verify(self, pairs: np.ndarray, offsets: np.ndarray, paths: list) -> np.ndarray:
        """Estimated Jaccard similarity of each pair, reading the signatures of a chunk of pairs at a time from the
        signature file of each window's shard (shard ``s`` holds the ids ``offsets[s]`` to ``offsets[s + 1] - 1``)."""
        similarity = np.empty(len(pairs), dtype=np.float64)
        for lo in range(0, len(pairs), _VERIFY_PAIRS):
            chunk = pairs[lo:lo + _VERIFY_PAIRS]
            needed, where = np.unique(chunk, return_inverse=True)
            where = where.reshape(chunk.shape)
            block = np.empty((len(needed), self.minhash.num_perm), dtype=np.uint32)
            shard = np.searchsorted(offsets, needed, side="right") - 1
            cuts = np.flatnonzero(np.diff(shard)) + 1
            for a, b in zip(np.concatenate(([0], cuts)).tolist(), np.concatenate((cuts, [len(needed)])).tolist()):
                s = int(shard[a])
                block[a:b] = read_rows(paths[s], needed[a:b] - offsets[s])
            similarity[lo:lo + len(chunk)] = estimated_jaccard(block[where[:, 0]], block[where[:, 1]])
        return similarity


RULES = [NearDuplicate, ExactDuplicate]
