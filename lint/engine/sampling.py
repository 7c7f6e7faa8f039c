"""Sampling: scan a reproducible random subset of every shard, and say what the figures then mean.

A sampled scan (``--sample FRACTION``) reads only some of each shard's storage units and skips the rest without
decoding them:

* Parquet: row groups;
* Arrow IPC: the record batches as stored in the file or stream;
* JSON Lines: blocks of :data:`LINE_BLOCK` consecutive lines (blank lines included; the file is still read and
  decompressed to find the line breaks, but the lines of a skipped block are not parsed).

Unit ``i`` of the shard reported as ``uri`` is scanned when ``u(seed, uri, i) < fraction``, where ``u`` is a
BLAKE2b hash of the seed, the uri and the unit index mapped to ``[0, 1)``. The choice depends on nothing else, so
the same units are scanned in every run with the same seed and for any ``--jobs``; each unit is kept with
probability ``fraction``, independently of the others (so the fraction actually scanned varies a little around the
one asked for, and the report gives the one achieved).

What the report claims from a sample (see :func:`corpus_figures` and :func:`finding_estimate`):

* the counts of findings and the corpus figures the rules compute are those *observed in the sample*, never
  scaled;
* ``metrics.sample`` gives the fraction asked for, the units and rows scanned, the rows in total where the file
  metadata says (Parquet, Arrow), and estimated totals of rows and tokens (rows scanned times the ratio of all
  rows -- or, for JSON Lines, all lines -- to those scanned);
* each finding gets ``sampleEstimate``: the share of the scanned rows it affects with a 95% Wilson score interval,
  and that share applied to the estimated rows of its scope.

The interval treats the scanned rows as independent draws. Units are sampled whole, so rows of one unit are
correlated: when a defect clusters in some row groups (one bad writer, one bad day), the true uncertainty is wider
than the interval says.
"""
from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass
from statistics import NormalDist

import numpy as np

#: The standard normal quantile for a two-sided 95% interval, z = 1.959964 (stdlib ``statistics.NormalDist``).
Z95 = NormalDist().inv_cdf(0.975)

#: What a sampling unit is called, by shard format.
UNIT_NAMES = {"parquet": "row group", "arrow": "record batch", "jsonl": "line block"}


@dataclass(frozen=True)
class Sample:
    """The sampling asked for: the probability ``fraction`` in (0, 1] that a unit is scanned, and the ``seed``."""

    fraction: float
    seed: int = 0

    def __post_init__(self):
        f = self.fraction
        if isinstance(f, bool) or not isinstance(f, (int, float)) or not (0 < f <= 1) or math.isnan(f):
            raise ValueError(f"the sample fraction must be a number in (0, 1], got {f!r}; hint: 0.1 scans about a "
                             "tenth of every shard, 1 scans everything")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or self.seed < 0:
            raise ValueError(f"the sample seed must be a whole number >= 0, got {self.seed!r}")

    @property
    def full(self) -> bool:
        """True when every unit is scanned (fraction 1): the scan is not a sample at all."""
        return self.fraction >= 1

    def for_shard(self, uri: str, fmt: str) -> "ShardSample":
        return ShardSample(self, uri, fmt)


def unit_draw(seed: int, uri: str, unit: int) -> float:
    """The uniform number in ``[0, 1)`` that decides whether unit ``unit`` of shard ``uri`` is scanned: the first
    8 bytes (little-endian) of ``BLAKE2b-64("<seed>\\x1f<uri>\\x1f<unit>")`` divided by 2**64."""
    digest = hashlib.blake2b(f"{seed}\x1f{uri}\x1f{unit}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") / 2.0 ** 64


class ShardSample:
    """The sampling of one shard: decides unit by unit and counts what was kept, for the report.

    Readers call :meth:`keep` once per unit in file order (asking again about the same unit returns the first
    answer and counts nothing), and :meth:`lines` for JSON Lines.
    """

    def __init__(self, sample: Sample, uri: str, fmt: str):
        self.sample = sample
        self.uri = uri
        self.unit_name = UNIT_NAMES.get(fmt, "unit")
        self.units = 0
        self.units_scanned = 0
        self.rows_total: int | None = 0 if fmt in ("parquet", "arrow") else None
        self.lines_total = 0
        self.lines_scanned = 0
        self._last: tuple[int, bool] | None = None

    def keep(self, unit: int, rows: int | None = None) -> bool:
        """Whether unit ``unit`` (0-based, in file order) is scanned; ``rows`` is how many rows it holds."""
        if self._last is not None and self._last[0] == unit:
            return self._last[1]
        kept = unit_draw(self.sample.seed, self.uri, unit) < self.sample.fraction
        self._last = (unit, kept)
        self.units += 1
        self.units_scanned += kept
        if rows is not None and self.rows_total is not None:
            self.rows_total += rows
        return kept

    def lines(self, total: int, scanned: int) -> None:
        """Count ``total`` lines read, of which ``scanned`` were in kept blocks (JSON Lines)."""
        self.lines_total += total
        self.lines_scanned += scanned

    @property
    def skipped_any(self) -> bool:
        return self.units_scanned < self.units

    def summary(self) -> dict:
        """What the engine keeps of the sampling of a shard (plain values: it travels between processes)."""
        return {"fraction": self.sample.fraction, "seed": self.sample.seed, "unit": self.unit_name,
                "units": self.units, "unitsScanned": self.units_scanned, "rowsTotal": self.rows_total,
                "linesTotal": self.lines_total, "linesScanned": self.lines_scanned}


def wilson_interval(successes: int, n: int, z: float = Z95) -> tuple[float, float]:
    """The Wilson score interval for a binomial proportion ``successes / n`` at the normal quantile ``z``.

    Formula from E. B. Wilson, "Probable inference, the law of succession, and statistical inference", Journal of
    the American Statistical Association 22 (158), 209-212 (1927); in the form

        centre = (p + z²/2n) / (1 + z²/n),   half-width = z / (1 + z²/n) * sqrt(p(1 - p)/n + z²/4n²),   p = x/n.

    Unlike the normal-approximation (Wald) interval it stays inside [0, 1] and is not empty when ``successes`` is
    0 or ``n``. ``n`` must be >= 1 and ``0 <= successes <= n``.
    """
    if n < 1 or not 0 <= successes <= n:
        raise ValueError(f"need 0 <= successes <= n and n >= 1, got successes={successes}, n={n}")
    p = successes / n
    z2 = z * z
    denominator = 1 + z2 / n
    centre = (p + z2 / (2 * n)) / denominator
    half = z / denominator * math.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    low = 0.0 if successes == 0 else max(0.0, centre - half)  # exact ends: no rounding residue at 0 and n
    high = 1.0 if successes == n else min(1.0, centre + half)
    return low, high


# -- what the report says -----------------------------------------------------------------------------------------


def _estimated_rows(results) -> float | None:
    """Estimated rows of the shards of ``results`` (all sampled): exact for Parquet and Arrow (metadata), and for
    JSON Lines the rows scanned times all lines over the lines scanned; None when it cannot be estimated."""
    known = sum(r.sample["rowsTotal"] for r in results if r.sample["rowsTotal"] is not None)
    by_line = [r for r in results if r.sample["rowsTotal"] is None]
    if not by_line:
        return float(known)
    lines_scanned = sum(r.sample["linesScanned"] for r in by_line)
    if lines_scanned == 0:
        return None
    rows = sum(r.rows for r in by_line)
    return known + rows * sum(r.sample["linesTotal"] for r in by_line) / lines_scanned


def corpus_figures(results) -> dict | None:
    """``metrics.sample`` for a sampled scan (None when no shard was sampled)."""
    sampled = [r for r in results if getattr(r, "sample", None)]
    if not sampled:
        return None
    first = sampled[0].sample
    rows = sum(r.rows for r in sampled)
    tokens = sum(r.tokens for r in sampled)
    known = all(r.sample["rowsTotal"] is not None for r in sampled)
    estimated = _estimated_rows(sampled)
    figures = {
        "fraction": first["fraction"],
        "seed": first["seed"],
        "units": sum(r.sample["units"] for r in sampled),
        "unitsScanned": sum(r.sample["unitsScanned"] for r in sampled),
        "rowsScanned": rows,
        "rowsTotal": sum(r.sample["rowsTotal"] for r in sampled) if known else None,
        "estimatedRows": round(estimated) if estimated is not None else None,
        "rowFraction": round(rows / estimated, 6) if estimated else None,
        "tokensScanned": tokens,
        "estimatedTokens": round(tokens * estimated / rows) if estimated is not None and rows else None,
    }
    return figures


def _affected_rows(finding) -> tuple[int, str]:
    """Rows the finding affects and how that number was found: ``"rows"`` (distinct rows among its complete list
    of instances) or ``"instances"`` (its count, when the list was cut: an upper bound when a row can hold several
    instances)."""
    if finding.truncated or finding.rows.size < finding.count:
        return int(finding.count), "instances"
    if finding.instance_uris is not None:
        return len(set(zip(finding.instance_uris, finding.rows.tolist()))), "rows"
    return int(np.unique(finding.rows).size), "rows"


def finding_estimate(finding, results) -> dict | None:
    """``sampleEstimate`` of one finding of a sampled scan, or None when it has no rows to estimate from.

    The scope is the finding's shard, or every shard for a finding across shards. ``estimatedCount`` scales the
    observed count by the estimated rows of the scope over the rows scanned (a ratio estimate). The share of rows
    affected, with its Wilson interval, is given when the affected rows are known or bounded by the rows scanned.
    """
    scope = [r for r in results if getattr(r, "sample", None) and (finding.uri is None or r.shard.uri == finding.uri)]
    scanned = sum(r.rows for r in scope)
    if not scope or scanned == 0 or finding.count == 0 or finding.rows.size == 0:
        return None
    estimated = _estimated_rows(scope)
    out: dict = {"observedCount": int(finding.count), "rowsScanned": scanned}
    if estimated is not None:
        out["estimatedRows"] = round(estimated)
        out["estimatedCount"] = round(finding.count * estimated / scanned)
    affected, basis = _affected_rows(finding)
    if affected > scanned:  # instances within rows, more of them than rows: no share of rows to give
        out["basis"] = "instances (more than the rows scanned: the share of rows affected is unknown)"
        return out
    low, high = wilson_interval(affected, scanned)
    out.update({
        "affectedRows": affected,
        "share": round(affected / scanned, 6),
        "ci95Low": round(low, 6),
        "ci95High": round(high, 6),
        "basis": basis,
        "interval": "Wilson score, 95% (assumes independent rows; units are sampled whole, so it may be too "
                    "narrow when the defect clusters)",
    })
    if estimated is not None:
        out["estimatedAffectedRows"] = round(affected / scanned * estimated)
        out["estimatedAffectedRowsCi95"] = [round(low * estimated), round(high * estimated)]
    return out
