"""Finding shards and reading them as streams of :class:`~corpuscle.io.batch.Batch` with bounded memory.

Readers are context managers that yield batches; they never raise for bad data.  What they cannot read becomes a
:class:`Problem` attached to the batch it was met in (a bad JSON line, a cut-off last line, invalid UTF-8, a value
of the wrong type, a row group or a whole file that cannot be read), so the rules that own those findings see it
and the rest of the shard is still scanned.
"""
from __future__ import annotations

import dataclasses
import glob
import os
import re
import stat
import struct
import time
import zlib
from dataclasses import dataclass
from typing import Iterator

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.fs as pafs
import pyarrow.parquet as pq
import pyarrow.types as pat
from corpuscle.io.batch import Batch, Shard
from corpuscle.settings import glob_set_end

#: Lines per sampling unit of a JSON Lines shard (see :mod:`corpuscle.engine.sampling`).
LINE_BLOCK = 1024

#: File endings we read, and the format/compression each one means.
SUFFIXES = {
    ".jsonl": ("jsonl", None),
    ".jsonl.gz": ("jsonl", "gzip"),
    ".jsonl.zst": ("jsonl", "zstd"),
    ".parquet": ("parquet", None),
    ".arrow": ("arrow", None),
}
EXPECTED = ", ".join(SUFFIXES)

#: Default read size: tokens per batch for tokenized shards, bytes per batch for JSON Lines.
DEFAULT_BATCH_TOKENS = 2_000_000
DEFAULT_BATCH_BYTES = 16 << 20


class NoShardsFound(Exception):
    """No readable shard under the given paths (a usage error: exit status 2)."""


@dataclass(frozen=True)
class Problem:
    """Something a reader could not read as it should.

    ``kind`` is one of: ``bad-json`` (a line that is not JSON), ``not-object`` (a JSON value that is not an object),
    ``cut-off`` (the last line ends without a newline and does not parse), ``invalid-utf8`` (bytes replaced while
    reading), ``mistyped`` (a value whose type differs from the rest of its column; read as null), ``unreadable``
    (a file or part of one that cannot be read; ``row`` is where reading stopped), ``empty`` (no records),
    ``oversized`` (a record beyond a limit of :class:`Limits`: not scanned), ``too-deep`` and ``too-many-keys``
    (values of a JSON record dropped at a limit; the rest of the record is scanned).
    """

    kind: str
    row: int
    detail: str
    offset: int = -1
    column: str | None = None


@dataclass(frozen=True)
class Limits:
    """What one record may hold before it is reported (``oversized``, ``too-deep``, ``too-many-keys``) instead of
    scanned: they bound a scan's memory whatever the input (see :data:`corpuscle.settings.LIMITS`)."""

    max_record_bytes: int = 32 << 20
    max_row_tokens: int = 1 << 22
    max_keys: int = 256
    max_depth: int = 32

    @classmethod
    def of(cls, settings) -> "Limits":
        return cls(**{f.name: getattr(settings, f.name) for f in dataclasses.fields(cls)})


def shard_format(path: str) -> tuple[str, str | None] | None:
    lower = path.lower()
    for suffix in sorted(SUFFIXES, key=len, reverse=True):
        if lower.endswith(suffix):
            return SUFFIXES[suffix]
    return None


def _display(path: str, given: str, root: str | None) -> str:
    """The uri a shard is reported under: as given, relative to the working directory where possible."""
    if root is None:
        return given
    rel = os.path.relpath(path, root)
    joined = os.path.join(given, rel)
    return joined.replace(os.sep, "/")


_SCHEME = re.compile(r"^[A-Za-z][A-Za-z0-9+.-]+://")


def is_uri(path: str) -> bool:
    """Whether ``path`` is a URI with a scheme (``s3://bucket/data``, ``file:///srv/data``), not a local path."""
    return bool(_SCHEME.match(path))


def absolute(shard: Shard) -> Shard:
    """The shard with an absolute path (a URI stays as it is), for work that runs in another working directory."""
    if is_uri(shard.path) or os.path.isabs(shard.path):
        return shard
    return dataclasses.replace(shard, path=os.path.abspath(shard.path))


def _list_uri(given: str) -> list[tuple[str, str, int]] | None:
    """``(path, uri, size)`` of the files a URI names: the file itself, or every file under the folder
    (recursively, hidden names skipped, in the order a local folder is walked); None when nothing is there.

    The file system is pyarrow's for the URI's scheme (``FileSystem.from_uri``): local files (``file://``), S3,
    Google Cloud Storage, HDFS, as the installed pyarrow supports them, with their usual credentials."""
    try:
        fs, root = pafs.FileSystem.from_uri(given)
        info = fs.get_file_info(root)
        if info.type == pafs.FileType.NotFound:
            return None
        if info.type != pafs.FileType.Directory:
            return [(given, given, int(info.size or 0))]
        entries = fs.get_file_info(pafs.FileSelector(root, recursive=True))
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise NoShardsFound(f"cannot list {given} ({_describe(exc)}): check the URI, that pyarrow supports its "
                            "scheme, and the credentials for its file system") from None
    base, _, query = given.partition("?")
    base, prefix = base.rstrip("/"), root.rstrip("/") + "/"
    found = []
    for entry in entries:
        rel = entry.path[len(prefix):] if entry.path.startswith(prefix) else entry.base_name
        parts = rel.split("/")
        if entry.type != pafs.FileType.File or any(part.startswith(".") for part in parts):
            continue
        # os.walk's order: a folder's files (sorted) before its sub-folders (sorted).
        key = tuple((1, part) for part in parts[:-1]) + ((0, parts[-1]),)
        uri = f"{base}/{rel}"
        found.append((key, uri + (f"?{query}" if query else ""), uri, int(entry.size or 0)))
    return [(path, uri, size) for _, path, uri, size in sorted(found)]


def discover(paths: list[str]) -> list[Shard]:
    """Expand files, folders (recursively) and glob patterns into shards, in a stable sorted order per argument.

    A path with a scheme (``s3://``, ``gs://``, ``hdfs://``, ``file://``) is a file or folder on the file system
    pyarrow opens for it (no glob patterns there).  Raises :class:`NoShardsFound` with what was expected when
    nothing matches.
    """
    found: dict[str, Shard] = {}
    missing = []
    for given in paths:
        if is_uri(given):
            listed = _list_uri(given)
            if listed is None:
                missing.append(given)
            for path, uri, size in listed or ():
                fmt = shard_format(uri)
                if fmt is not None and path not in found:
                    found[path] = Shard(uri=uri, path=path, format=fmt[0], compression=fmt[1], length=size)
            continue
        if any(ch in given for ch in "*?[") and not os.path.exists(given):  # "part[1].jsonl" may be a name
            if "**" in given:  # glob.glob would follow a link to a parent folder round and round
                candidates = [(f, f) for f in _recursive_glob(given)]
            else:
                matches = sorted(glob.glob(given))
                candidates = [(m, m) for m in matches if os.path.isfile(m)]
                for m in matches:
                    if os.path.isdir(m):
                        candidates += [(f, _display(f, m, m)) for f in _walk(m)]
        elif os.path.isdir(given):
            candidates = [(f, _display(f, given, given)) for f in _walk(given)]
        elif os.path.exists(given):
            candidates = [(given, given)]
        else:
            missing.append(given)
            continue
        for path, uri in candidates:
            fmt = shard_format(path)
            real = os.path.realpath(path)
            if fmt is None or real in found:
                continue
            found[real] = Shard(uri=uri, path=path, format=fmt[0], compression=fmt[1], length=_size(path))
    if not found:
        where = ", ".join(paths)
        hint = f" ({', '.join(missing)} does not exist)" if missing else ""
        raise NoShardsFound(f"no shard found under {where}{hint}: expected {EXPECTED} files")
    return list(found.values())


def _size(path: str) -> int:
    """The file's size in bytes, or -1 (SARIF's "unknown") when it cannot even be looked at (a symbolic link
    loop, a broken link): its reader then reports why it cannot be read."""
    try:
        return os.path.getsize(path)
    except OSError:
        return -1


def _glob_regex(pattern: str) -> re.Pattern:
    """A regular expression for a glob pattern with ``**`` (any number of folders), ``*`` and ``?`` (within one
    name) and ``[...]`` sets, as glob.glob reads them."""
    out, i = [], 0
    parts = pattern.split("/")
    for n, part in enumerate(parts):
        if part == "**":
            out.append("(?:[^/]+/)*" if n < len(parts) - 1 else "(?:[^/]+(?:/[^/]+)*)?")
            continue
        i, piece = 0, []
        while i < len(part):
            ch = part[i]
            if ch == "*":
                piece.append("[^/]*")
            elif ch == "?":
                piece.append("[^/]")
            elif ch == "[" and glob_set_end(part, i) >= 0:
                j = glob_set_end(part, i)
                body = part[i + 1:j]
                body = "^" + body[1:] if body.startswith("!") else body
                piece.append("[" + body.replace("\\", "\\\\") + "]")
                i = j
            else:
                piece.append(re.escape(ch))
            i += 1
        out.append("".join(piece) + ("/" if n < len(parts) - 1 else ""))
    return re.compile("".join(out) + r"\Z")


def _recursive_glob(pattern: str) -> list[str]:
    """The files a ``**`` pattern names (and the files under the folders it names), sorted; symbolic links to
    folders are followed, but no real folder is walked twice, so a link to a parent folder ends the walk there."""
    norm = pattern.replace(os.sep, "/")
    parts = norm.split("/")
    fixed = []
    for part in parts:
        if any(ch in part for ch in "*?["):
            break
        fixed.append(part)
    base = "/".join(fixed) if fixed else "."
    if fixed == [""]:
        base = "/"
    if not os.path.isdir(base):
        return []
    rx = _glob_regex(norm if fixed else "./" + norm if not norm.startswith("./") else norm)
    seen, found = set(), []
    for root, dirs, files in os.walk(base, followlinks=True):
        try:
            real = os.stat(root)
        except OSError:
            dirs[:] = []
            continue
        if (real.st_dev, real.st_ino) in seen:
            dirs[:] = []
            continue
        seen.add((real.st_dev, real.st_ino))
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        rel_root = root.replace(os.sep, "/")
        inside = any(rx.match(rel_root[:k]) for k in _prefix_ends(rel_root, len(base)))
        for name in sorted(files):
            if name.startswith("."):
                continue
            path = f"{rel_root.rstrip('/')}/{name}" if rel_root != "/" else f"/{name}"
            if inside or rx.match(path):
                found.append(os.path.join(root, name) if fixed else os.path.relpath(os.path.join(root, name)))
    return found


def _prefix_ends(path: str, start: int) -> list[int]:
    """End positions of the folder prefixes of ``path`` from ``start`` on (each folder below the base and the path
    itself), for testing whether a folder the pattern names holds it."""
    ends = [k for k in range(start + 1, len(path)) if path[k] == "/"]
    return ends + [len(path)]


def _walk(folder: str) -> list[str]:
    out = []
    for root, dirs, files in os.walk(folder):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))  # hidden folders are skipped like hidden files
        out += [os.path.join(root, f) for f in sorted(files) if not f.startswith(".")]
    return out


def open_shard(shard: Shard, batch_tokens: int | None = None, tokens_column: str = "input_ids",
               batch_bytes: int | None = None, sample=None, part=None, limits: Limits | None = None) -> "ShardReader":
    """The reader for a shard's format, as a context manager yielding batches.

    ``sample`` (a :class:`corpuscle.engine.sampling.ShardSample`) makes the reader skip the storage units it does not keep;
    ``part`` (a :class:`corpuscle.engine.split.Part`) makes it read only that part of the shard.  Row indices stay those of
    the whole shard.  The read sizes default to :data:`DEFAULT_BATCH_TOKENS` and :data:`DEFAULT_BATCH_BYTES`.
    """
    batch_tokens = DEFAULT_BATCH_TOKENS if batch_tokens is None else batch_tokens
    batch_bytes = DEFAULT_BATCH_BYTES if batch_bytes is None else batch_bytes
    if shard.format == "parquet":
        reader = ParquetReader(shard, batch_tokens, tokens_column)
    elif shard.format == "arrow":
        reader = ArrowReader(shard, batch_tokens, tokens_column)
    else:
        # A token id written in JSON takes at least two bytes (a digit and a comma), so a block of 2 x batch_tokens
        # bytes holds at most batch_tokens ids: JSON Lines keeps to the token budget too.
        reader = JsonLinesReader(shard, min(batch_bytes, 2 * batch_tokens))
    reader.sample = sample
    reader.part = part
    reader.limits = limits or Limits()
    return reader


class ShardReader:
    """Base reader: a context manager whose iteration yields :class:`Batch` objects and never raises.

    ``consumed`` is how many bytes of the file the batches yielded so far stand for (for progress display; an
    estimate, see each reader), skipped parts of a sampled shard included.
    """

    sample = None
    part = None
    limits = Limits()
    consumed = 0
    #: Whether reading stopped early at a failure (an ``unreadable`` problem ends the batches).
    stopped = False

    def __init__(self, shard: Shard):
        self.shard = shard
        self._resources: list = []
        #: What the user should know about the shard that is no defect of it (e.g. no checksum to verify).
        self.notices: list[str] = []

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def close(self) -> None:
        for res in self._resources:
            try:
                res.close()
            except Exception:  # closing a broken file must not hide the finding about it
                pass
        self._resources.clear()

    def __iter__(self) -> Iterator[Batch]:
        special = _not_a_regular_file(self.shard.path)
        if special is not None:  # a FIFO or a device would block or never end: never opened
            self.stopped = True
            yield self._problem_batch(Problem("unreadable", 0, special))
            return
        if self.shard.length == 0:
            yield self._problem_batch(Problem("empty", 0, "the file is empty (0 bytes)"))
            return
        try:
            for batch in self._batches():
                yield self._bounded(batch)
        except Exception as exc:  # noqa: BLE001 - any failure to read becomes a finding, never a traceback
            self.stopped = True
            yield self._problem_batch(Problem("unreadable", self._row, _describe(exc)))

    def _bounded(self, batch: Batch) -> Batch:
        """The batch without its rows beyond the limits (``max_row_tokens`` values in a list column,
        ``max_record_bytes`` bytes in a text column), each reported as ``oversized``: no rule sees them, so no
        rule's scratch memory grows with them."""
        if not len(batch):
            return batch
        over = None
        for name in batch.column_names:
            kind = batch.type_of(name)
            if pat.is_list(kind) or pat.is_large_list(kind):
                sizes, limit, unit = pc.list_value_length(batch.column(name)), self.limits.max_row_tokens, "values"
            elif pat.is_fixed_size_list(kind):
                if kind.list_size <= self.limits.max_row_tokens:
                    continue
                sizes, limit, unit = pa.array(np.full(len(batch), kind.list_size)), self.limits.max_row_tokens, "values"
            elif pat.is_string(kind) or pat.is_large_string(kind) or pat.is_binary(kind) or pat.is_large_binary(kind):
                sizes, limit, unit = pc.binary_length(batch.column(name)), self.limits.max_record_bytes, "bytes"
            else:
                continue
            sizes = sizes.fill_null(0).to_numpy(zero_copy_only=False)
            bad = sizes > limit
            if not bad.any():
                continue
            over = bad if over is None else over | bad
            for i in np.flatnonzero(bad).tolist():
                batch.problems.append(Problem(
                    "oversized", int(batch.rows[i]), f"column {name!r} holds {int(sizes[i]):,} {unit} in this row, "
                    f"more than the limit of {limit:,} (max_row_tokens / max_record_bytes)", column=name))
        if over is None:
            return batch
        kept = batch.select(~over)
        kept.problems = batch.problems
        return kept

    _row = 0

    def _batches(self) -> Iterator[Batch]:
        raise NotImplementedError

    def _problem_batch(self, problem: Problem) -> Batch:
        batch = Batch(self.shard, pa.table({}), np.zeros(0, dtype=np.int64))
        batch.problems.append(problem)
        return batch


def _not_a_regular_file(path: str) -> str | None:
    """Why a local path is no file to read (a FIFO, a device, a socket, a folder), or None (a regular file, a URI,
    or a path that cannot be looked at: its reader says why)."""
    if is_uri(path):
        return None
    try:
        mode = os.stat(path).st_mode
    except OSError:
        return None
    if stat.S_ISREG(mode):
        return None
    what = ("a FIFO (named pipe)" if stat.S_ISFIFO(mode) else "a character device" if stat.S_ISCHR(mode) else
            "a block device" if stat.S_ISBLK(mode) else "a socket" if stat.S_ISSOCK(mode) else
            "a folder" if stat.S_ISDIR(mode) else "not a regular file")
    return f"{what}, not a regular file: not opened (reading it could block or never end)"


def local_path(path: str):
    """A local path as pyarrow can open it: the str, or its bytes when the name is not valid UTF-8 (surrogate
    escapes, as ``os.fsdecode`` gives such names)."""
    try:
        path.encode("utf-8")
        return path
    except UnicodeEncodeError:
        return os.fsencode(path)


def _open_input(uri: str):
    """A pyarrow input file for a URI, opened for random access (``open_input_file``): Parquet and Arrow IPC need
    it, and JSON Lines read it front to back but ask for its position (never decompressed here, whatever the name
    says: the reader does that)."""
    fs, where = pafs.FileSystem.from_uri(uri)
    return fs.open_input_file(where)


def _describe(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0].rstrip('.') if text else 'no detail'}"


def _rows_per_batch(avg_tokens: float, batch_tokens: int) -> int:
    return int(min(65_536, max(1, batch_tokens // max(1.0, avg_tokens))))


#: A row of a Parquet list column holding more than this many times ``max_row_tokens`` values is never decoded
#: (pyarrow decodes a row whole: about 22 bytes per int64 value while it does); one up to it is decoded in a batch
#: as small as can be, then dropped as oversized.  With the defaults: 16,777,216 values, about 350 MiB.
DECODE_FACTOR = 4


def _divisors_down(n: int, most: int) -> list[int]:
    """The divisors of ``n`` up to ``most``, largest first."""
    small, large = [], []
    d = 1
    while d * d <= n:
        if n % d == 0:
            small.append(d)
            large.append(n // d)
        d += 1
    return sorted({d for d in small + large if d <= most}, reverse=True)


class ParquetReader(ShardReader):
    """Streams a Parquet file row group by row group; a corrupt row group is reported and skipped."""

    def __init__(self, shard: Shard, batch_tokens: int, tokens_column: str):
        super().__init__(shard)
        self.batch_tokens = batch_tokens
        self.tokens_column = tokens_column

    def _avg_tokens(self, meta: pq.FileMetaData) -> float:
        if meta.num_rows == 0 or meta.num_row_groups == 0:
            return 1.0
        rg = meta.row_group(0)
        for i in range(rg.num_columns):
            col = rg.column(i)
            if col.path_in_schema.split(".")[0] == self.tokens_column:
                return col.num_values / max(1, rg.num_rows)
        return 1.0

    def _group_tokens(self, group_meta) -> float:
        """Values per row of the tokens column in this row group, on average (1 when it has none)."""
        for i in range(group_meta.num_columns):
            column = group_meta.column(i)
            if column.path_in_schema.split(".")[0] == self.tokens_column:
                return column.num_values / max(1, group_meta.num_rows)
        return 1.0

    def _widest_row(self, group_meta) -> tuple[str, int] | None:
        """``(column, values)`` when a column chunk of the row group holds more values than ``max_row_tokens`` in
        each of its rows on average (so at least one row is over the limit), else None: told by the metadata,
        before anything is decoded."""
        rows = max(1, group_meta.num_rows)
        for i in range(group_meta.num_columns):
            column = group_meta.column(i)
            if column.num_values > self.limits.max_row_tokens * rows:
                return column.path_in_schema.split(".")[0], int(column.num_values)
        return None

    def _list_values(self, meta, group_meta) -> int:
        """Values (entries) the row group's list columns hold, by the file's metadata."""
        return sum(int(group_meta.column(i).num_values) for i in range(group_meta.num_columns)
                   if meta.schema.column(i).max_repetition_level > 0)

    def _row_lengths(self, meta, group_meta) -> np.ndarray | None:
        """Entries per row of the row group summed over its list columns, read from the pages' repetition levels
        without decoding a value (:mod:`corpuscle.io.parquet_levels`); None when they cannot be read so."""
        from corpuscle.io.parquet_levels import row_lengths

        if getattr(self, "_levels_source", None) is None:
            path = self.shard.path
            self._levels_source = _open_input(path) if is_uri(path) else pa.OSFile(local_path(path), "rb")
            self._resources.append(self._levels_source)
        total = None
        for i in range(group_meta.num_columns):
            repetition = meta.schema.column(i).max_repetition_level
            if repetition < 1:
                continue
            lengths = row_lengths(self._levels_source, group_meta.column(i), repetition, group_meta.num_rows)
            if lengths is None:
                return None
            total = lengths if total is None else total + lengths
        return total

    def _plan_rows(self, lengths: np.ndarray, stop: int, whole: bool) -> int:
        """Rows per batch for the first ``stop`` rows of a row group of these lengths: the most (up to what the
        token budget gives on average) such that every batch holds at most ``batch_tokens`` values in rows within
        ``max_row_tokens`` and at most the decode bound in all; a divisor of ``stop`` unless ``whole`` (the
        rows from ``stop`` on are not decoded, so the last batch must end there)."""
        limit, bound = self.limits.max_row_tokens, DECODE_FACTOR * self.limits.max_row_tokens
        head = lengths[:stop]
        normal = np.where(head > limit, 0, head)
        first = _rows_per_batch(normal.sum() / max(1, stop), self.batch_tokens)
        if whole:
            candidates, b = [], first
            while b > 1:
                candidates.append(b)
                b //= 2
            candidates.append(1)
        else:
            candidates = _divisors_down(stop, first)
        for rows in candidates:
            if rows == 1:
                return 1
            pad = (-stop) % rows
            if (np.pad(normal, (0, pad)).reshape(-1, rows).sum(axis=1).max() <= self.batch_tokens
                    and np.pad(head, (0, pad)).reshape(-1, rows).sum(axis=1).max() <= bound):
                return rows
        return 1

    def _planned(self, pf, meta, group: int, start: int, lengths: np.ndarray, counted: int,
                 group_bytes: int) -> Iterator[Batch]:
        """A row group read by its rows' lengths (see :meth:`_plan_rows`): rows beyond the decode bound are never
        decoded, and since pyarrow cannot read a row group past a row it does not decode, the rows after the first
        of them are named as not checked; the rows before it are read in batches of bounded values (small batches
        joined up to the token budget), an oversized row that can be decoded in one as small as can be."""
        limit, bound = self.limits.max_row_tokens, DECODE_FACTOR * self.limits.max_row_tokens
        rows = len(lengths)
        beyond = np.flatnonzero(lengths > bound)
        stop = int(beyond[0]) if beyond.size else rows
        names = [meta.schema.column(i).path.split(".")[0] for i in range(meta.num_columns)
                 if meta.schema.column(i).max_repetition_level > 0]
        columns = ", ".join(dict.fromkeys(map(repr, names)))
        if stop:
            size = self._plan_rows(lengths, stop, whole=stop == rows)
            waiting: list = []
            waiting_values = 0
            first = self._row

            def joined():
                out = waiting[0]
                if len(waiting) > 1:  # small batches joined into one (a copy of at most the token budget)
                    table = pa.Table.from_batches(waiting).combine_chunks()
                    out = table.to_batches()[0] if table.num_rows else out
                return Batch(self.shard, out, np.arange(first, first + out.num_rows, dtype=np.int64))

            done = 0
            for rb in pf.iter_batches(batch_size=size, row_groups=[group]):
                values = int(lengths[done:done + rb.num_rows].sum())
                if waiting and waiting_values + values > self.batch_tokens:
                    yield joined()
                    waiting, waiting_values, first = [], 0, self._row
                waiting.append(rb)
                waiting_values += values
                done += rb.num_rows
                self._row += rb.num_rows
                self.consumed = counted + group_bytes * done // max(1, rows)
                if done >= stop:
                    break  # the next batch would decode a row beyond the bound
            if waiting:
                yield joined()
            if done < stop:
                yield self._problem_batch(Problem(
                    "unreadable", self._row, f"row group {group} holds {done:,} rows where its pages show "
                    f"{rows:,}: the row group is damaged"))
                return
        if stop < rows:
            end, at = start + rows - 1, start + stop
            problems = [Problem(
                "oversized", at, f"row {at:,} holds {int(lengths[stop]):,} values in list column(s) {columns}, more "
                f"than the limit of {limit:,} (max_row_tokens) and than the {bound:,} decoded at most (the memory "
                "bound): not decoded", column=names[0] if names else None)]
            if stop < rows - 1:  # the rows after it: named, since they cannot be read
                problems.append(Problem(
                    "unreadable", at + 1, f"rows {at + 1:,}-{end:,} of row group {group} were not checked: row "
                    f"{at:,} before them holds {int(lengths[stop]):,} values, beyond the {bound:,} decoded at most "
                    f"({DECODE_FACTOR} x max_row_tokens), and pyarrow cannot read a row group past a row it does "
                    "not decode (raise max_row_tokens to read them)"))
            for row in np.flatnonzero(lengths[stop + 1:] > limit).tolist():
                row += stop + 1
                problems.append(Problem(
                    "oversized", start + row, f"row {start + row:,} holds {int(lengths[row]):,} values in list "
                    f"column(s) {columns}, more than the limit of {limit:,} (max_row_tokens): not decoded",
                    column=names[0] if names else None))
            batch = self._problem_batch(problems[0])
            batch.problems.extend(problems[1:])
            self.consumed = counted + group_bytes
            yield batch

    def _batches(self) -> Iterator[Batch]:
        # Verify page checksums where the writer stored them: a flipped byte in an uncompressed page otherwise
        # decodes silently into wrong token ids.
        source = self.shard.path
        if is_uri(source):
            source = _open_input(source)
            self._resources.append(source)
        elif not isinstance(local_path(source), str):
            source = pa.OSFile(local_path(source), "rb")
            self._resources.append(source)
        try:
            pf = pq.ParquetFile(source, memory_map=False, page_checksum_verification=True)
        except TypeError:  # pyarrow < 15 has no page checksum verification
            pf = pq.ParquetFile(source, memory_map=False)
        self._resources.append(pf)
        meta = pf.metadata
        aborts = metadata_aborts(meta)
        if aborts is not None:
            yield self._problem_batch(Problem("unreadable", 0, aborts))
            return
        if meta.num_rows == 0:
            yield self._problem_batch(Problem("empty", 0, "the Parquet file holds no rows"))
            return
        start = 0
        for group in range(meta.num_row_groups):
            group_meta = meta.row_group(group)
            group_rows = group_meta.num_rows
            if self.part is not None and not self.part.lo <= group < self.part.hi:
                start += group_rows  # another part's row group
                continue
            # Bytes of the row group as stored: the compressed sizes of its column chunks (file metadata).
            group_bytes = sum(group_meta.column(i).total_compressed_size for i in range(group_meta.num_columns))
            counted = self.consumed
            self._row = start
            if self.sample is not None and not self.sample.keep(group, group_rows):
                self.consumed += group_bytes
                start += group_rows
                continue
            if self._list_values(meta, group_meta) > DECODE_FACTOR * self.limits.max_row_tokens:
                # More values than can be decoded at once: one row of them may be too, so the rows' lengths are
                # read first (from the pages' levels, no value decoded) and the batches planned by them.
                lengths = self._row_lengths(meta, group_meta)
                if lengths is not None:
                    try:
                        yield from self._planned(pf, meta, group, start, lengths, counted, group_bytes)
                    except Exception as exc:  # noqa: BLE001
                        yield self._problem_batch(Problem(
                            "unreadable", self._row,
                            f"row group {group} (rows {start}-{start + group_rows - 1}) cannot be read: "
                            f"{_describe(exc)}"))
                    start += group_rows
                    continue
            size = _rows_per_batch(self._group_tokens(group_meta), self.batch_tokens)
            widest = self._widest_row(group_meta)
            if widest is not None:  # decoding it would take memory in proportion to its rows, not the batch
                self.consumed += group_bytes
                yield self._problem_batch(Problem(
                    "oversized", start, f"row group {group} (rows {start:,}-{start + group_rows - 1:,}) holds "
                    f"{widest[1]:,} values of column {widest[0]!r} in {group_rows:,} row(s): more than the limit of "
                    f"{self.limits.max_row_tokens:,} per row (max_row_tokens); not read", column=widest[0]))
                start += group_rows
                continue
            try:
                for rb in pf.iter_batches(batch_size=size, row_groups=[group]):
                    rows = np.arange(self._row, self._row + rb.num_rows, dtype=np.int64)
                    self._row += rb.num_rows
                    self.consumed = counted + group_bytes * (self._row - start) // max(1, group_rows)
                    yield Batch(self.shard, rb, rows)
                if self._row - start != group_rows:
                    yield self._problem_batch(Problem(
                        "unreadable", self._row, f"row group {group} claims {group_rows:,} rows in the file's "
                        f"metadata but holds {self._row - start:,}: the footer or the row group is damaged"))
            except Exception as exc:  # noqa: BLE001
                yield self._problem_batch(Problem(
                    "unreadable", self._row,
                    f"row group {group} (rows {start}-{start + group_rows - 1}) cannot be read: {_describe(exc)}"))
            start += group_rows


class ArrowReader(ShardReader):
    """Streams an Arrow IPC file (random-access format) or stream, memory-mapped."""

    def __init__(self, shard: Shard, batch_tokens: int, tokens_column: str):
        super().__init__(shard)
        self.batch_tokens = batch_tokens
        self.tokens_column = tokens_column

    def _batches(self) -> Iterator[Batch]:
        path = self.shard.path
        source = _open_input(path) if is_uri(path) else pa.memory_map(local_path(path), "r")
        self._resources.append(source)
        magic = source.read(6)
        source.seek(0)
        if magic == b"ARROW1":
            reader = pa.ipc.open_file(source)
            units = range(reader.num_record_batches)
            if self.part is not None:
                units = range(self.part.lo, min(self.part.hi, reader.num_record_batches))
                self._row = self.part.first_row
            stored = (_read_or_error(reader, i) for i in units)
        else:
            stored = pa.ipc.open_stream(source)
        seen_any = False
        for index, rb in enumerate(stored, start=self.part.lo if self.part is not None else 0):
            seen_any = True
            if isinstance(rb, Exception):  # a record batch of the file that cannot be read: the others can
                yield self._problem_batch(Problem("unreadable", self._row, f"record batch {index} cannot be read: "
                                                  f"{_describe(rb)}; the rows after it are counted from here"))
                continue
            try:
                # The IPC readers check the layout, not the contents: list offsets out of range or decreasing would
                # make every later step read out of bounds (Arrow's full validation checks them).  Text is
                # validated as bytes: invalid UTF-8 in it is the encoding-error rule's finding, not a broken file.
                _as_bytes(rb).validate(full=True)
            except (pa.ArrowInvalid, pa.ArrowException) as exc:
                yield self._problem_batch(Problem(
                    "unreadable", self._row, f"record batch {index} ({rb.num_rows:,} rows from row {self._row:,}) "
                    f"is invalid: {_describe(exc)}"))
                self._row += max(0, rb.num_rows)
                continue
            # Bytes of the stored batch: its buffers (the file is memory-mapped), shared out over its pieces by rows.
            counted, first = self.consumed, self._row
            if self.sample is not None and not self.sample.keep(index, rb.num_rows):
                self._row += rb.num_rows
                self.consumed += rb.nbytes
                continue
            for piece in self._split(rb):
                rows = np.arange(self._row, self._row + piece.num_rows, dtype=np.int64)
                self._row += piece.num_rows
                self.consumed = counted + rb.nbytes * (self._row - first) // max(1, rb.num_rows)
                yield Batch(self.shard, piece, rows)
        if not seen_any:
            yield self._problem_batch(Problem("empty", 0, "the Arrow file holds no record batches"))

    def _split(self, rb: pa.RecordBatch):
        """Slice a stored batch (zero-copy) so that one batch stays near the token budget."""
        if rb.num_rows == 0:
            return
        avg = 1.0
        if self.tokens_column in rb.schema.names:
            col = rb.column(self.tokens_column)
            if hasattr(col, "offsets"):
                avg = (col.offsets[-1].as_py() - col.offsets[0].as_py()) / rb.num_rows
            elif pa.types.is_fixed_size_list(col.type):  # no offsets: every row holds list_size tokens
                avg = col.type.list_size
        size = _rows_per_batch(avg, self.batch_tokens)
        for start in range(0, rb.num_rows, size):
            yield rb.slice(start, size)


def _as_bytes(rb: pa.RecordBatch) -> pa.RecordBatch:
    """The batch with its top-level text columns viewed (zero-copy) as binary, whose validation skips UTF-8."""
    if not any(pat.is_string(f.type) or pat.is_large_string(f.type) for f in rb.schema):
        return rb
    columns = [c.view(pa.binary()) if pat.is_string(c.type) else c.view(pa.large_binary())
               if pat.is_large_string(c.type) else c for c in rb.columns]
    return pa.RecordBatch.from_arrays(columns, names=rb.schema.names)


#: How long the check of a Parquet footer's column metadata may take before it is given up (seconds).
METADATA_CHECK_SECONDS = 10.0


def metadata_aborts(meta) -> str | None:
    """Why the column metadata of a Parquet footer cannot be looked at, or None.

    pyarrow reads some damaged column metadata (level histograms that disagree with the schema, say) by throwing a
    C++ exception where none may pass, which ends the whole process (abort) instead of raising: no ``except`` can
    catch that.  So the metadata is first looked at in a forked copy of this process; if the copy dies, the shard
    is reported as unreadable and its metadata is never touched here.  (Where ``fork`` does not exist, or the copy
    takes longer than :data:`METADATA_CHECK_SECONDS`, the metadata is used unchecked.)"""
    if not hasattr(os, "fork") or meta.num_row_groups == 0:
        return None
    pid = os.fork()
    if pid == 0:  # the copy: touch every column chunk's metadata, then leave at once (no cleanup, no atexit)
        code = 0
        try:
            os.dup2(os.open(os.devnull, os.O_WRONLY), 2)  # pyarrow's last words are not for the user's terminal
            import faulthandler

            faulthandler.disable()  # nor a Python traceback of the abort (pytest, python -X faulthandler)
            for group in range(meta.num_row_groups):
                row_group = meta.row_group(group)
                for i in range(row_group.num_columns):
                    row_group.column(i).num_values
        except BaseException:  # noqa: BLE001 - an ordinary exception is the caller's to meet and report
            code = 0
        os._exit(code)
    deadline = time.monotonic() + METADATA_CHECK_SECONDS
    while True:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            break
        if time.monotonic() > deadline:
            os.kill(pid, 9)
            os.waitpid(pid, 0)
            return None
        time.sleep(0.001)
    if os.WIFSIGNALED(status):
        return (f"the column metadata in the Parquet footer is damaged: pyarrow aborts reading it (signal "
                f"{os.WTERMSIG(status)}), so nothing in the file is read")
    return None


def _read_or_error(reader, index: int):
    """Record batch ``index`` of an Arrow IPC file, or the exception reading it raised."""
    try:
        return reader.get_batch(index)
    except Exception as exc:  # noqa: BLE001 - one bad record batch must not end the file
        return exc


class JsonLinesReader(ShardReader):
    """Streams JSON Lines (plain, gzip or zstd) in blocks of about ``batch_bytes``, parsing lines with orjson.

    Row indices are 0-based line indices, blank lines included.  Each block's records become one Arrow table;
    a value whose type disagrees with the rest of its column is read as null and reported as ``mistyped``.
    """

    def __init__(self, shard: Shard, batch_bytes: int):
        super().__init__(shard)
        self.batch_bytes = batch_bytes

    def _open(self):
        path = self.shard.path
        raw = _open_input(path) if is_uri(path) else pa.OSFile(local_path(path), "rb")
        self._resources.append(raw)
        self._raw = raw  # its position is the bytes consumed as stored (compressed for .gz and .zst)
        if self.shard.compression == "gzip":
            return _Inflater(raw)  # checks each member's CRC-32; keeps what was decoded before damage
        if self.shard.compression:
            head = raw.read(6)
            raw.seek(0)
            if head[:4] == _ZSTD_MAGIC and len(head) > 4 and not head[4] & 0x04:
                self._unchecked = ("the zstd frame carries no content checksum (the writer left it out)")
            stream = pa.CompressedInputStream(raw, self.shard.compression)
            self._resources.append(stream)
            return _Pieces(stream, raw, self.shard.compression)
        return raw

    _unchecked = None

    def _batches(self) -> Iterator[Batch]:
        stream = self._open()
        if self._unchecked and self.part is None:
            self.notices.append(f"{self._unchecked}: a damaged byte inside it would decode silently into altered "
                                "records; write .zst shards with checksums (zstd's default, its -C option) to have "
                                "damage detected")
        limit = self.limits.max_record_bytes
        carry: list[bytes] = []  # the line not yet ended, in pieces (joined once, when it ends: linear time)
        carried = 0
        skipping = -1  # bytes of a line over the limit skipped so far (-1: not skipping)
        line_no = 0
        any_record = False
        pos, stop = 0, None
        if self.part is not None:  # bytes [lo, hi) of a plain file, starting at line first_row
            pos, stop, line_no = self.part.lo, self.part.hi, self.part.first_row
            self._row = line_no
            stream.seek(pos)
            self.consumed = pos
        first = pos == 0
        while True:
            # Blocks end at multiples of batch_bytes from the start of the file, also in a part that starts
            # elsewhere: a part's batches are then those of a whole-file read.
            size = self.batch_bytes - pos % self.batch_bytes
            if stop is not None:
                size = min(size, stop - pos)
                if size <= 0:
                    break
            chunk = stream.read(size)
            if not chunk:
                break
            pos += len(chunk)
            if first and chunk.startswith(b"\xef\xbb\xbf"):  # a UTF-8 byte-order mark is not part of the record
                chunk = chunk[3:]
            first = False
            cut = chunk.rfind(b"\n")
            if cut < 0:  # the line goes on
                if skipping >= 0:
                    skipping += len(chunk)
                else:
                    carry.append(chunk)
                    carried += len(chunk)
                    if carried > limit:  # stop holding it: skip to its end, then report it
                        skipping, carry, carried = carried, [], 0
                continue
            if skipping >= 0:  # the long line ends in this chunk
                end = chunk.find(b"\n")
                yield self._problem_batch(self._oversized(line_no, skipping + end))
                any_record = True
                line_no += 1
                self._row = line_no
                skipping = -1
                data, cut = chunk[end + 1:], cut - end - 1
            else:
                data = b"".join(carry) + chunk if carry else chunk
                cut += carried
            rest = data[cut + 1:]
            carry, carried = ([rest], len(rest)) if rest else ([], 0)
            if cut < 0:
                continue
            lines = data[:cut].split(b"\n")
            del data
            self.consumed = self._raw.tell()
            for batch in self._blocks(lines, line_no, last_cut_off=False):
                any_record |= len(batch) > 0
                yield batch
            line_no += len(lines)
            self._row = line_no  # a read failure from here on stops at the first line not yet read
        if skipping >= 0:
            yield self._problem_batch(self._oversized(line_no, skipping))
            any_record = True
        elif carried and any(piece.strip() for piece in carry):
            for batch in self._blocks([b"".join(carry)], line_no, last_cut_off=True):
                any_record |= len(batch) > 0
                yield batch
        if not any_record and not (self.sample is not None and self.sample.skipped_any) and self.part is None:
            yield self._problem_batch(Problem("empty", 0, "the file holds no JSON records"))

    def _oversized(self, line: int, size: int) -> Problem:
        return Problem("oversized", line, f"line {line + 1:,} holds {size:,} bytes (decompressed), more than the "
                                          f"limit of {self.limits.max_record_bytes:,} (max_record_bytes); not read")

    def _blocks(self, lines: list[bytes], first_line: int, last_cut_off: bool) -> Iterator[Batch]:
        """Parse ``lines`` (the first is line ``first_line``): all of them, or in a sampled scan only the runs of
        lines that lie in kept blocks of :data:`LINE_BLOCK` lines (one batch per run)."""
        if self.sample is None:
            yield self._parse(lines, first_line, last_cut_off)
            return
        end = first_line + len(lines)
        runs: list[list[int]] = []
        for block in range(first_line // LINE_BLOCK, (end - 1) // LINE_BLOCK + 1):
            if self.sample.keep(block):
                lo, hi = max(first_line, block * LINE_BLOCK), min(end, (block + 1) * LINE_BLOCK)
                if runs and runs[-1][1] == lo:
                    runs[-1][1] = hi
                else:
                    runs.append([lo, hi])
        self.sample.lines(len(lines), sum(hi - lo for lo, hi in runs))
        for lo, hi in runs:
            yield self._parse(lines[lo - first_line:hi - first_line], lo, last_cut_off)

    _keys: set | None = None

    def _parse(self, lines: list[bytes], first_line: int, last_cut_off: bool) -> Batch:
        records, rows, problems = [], [], []
        loads = orjson.loads
        limits = self.limits
        if self._keys is None:
            self._keys = set()
        keys = self._keys
        for i, line in enumerate(lines):
            row = first_line + i
            self._row = row
            if len(line) > limits.max_record_bytes:
                problems.append(self._oversized(row, len(line)))
                continue
            if not line.strip():
                continue
            try:
                value = loads(line)
            except orjson.JSONDecodeError as exc:
                value, problem = self._recover(line, row, exc, last_cut_off)
                problems.append(problem)
                if value is None:
                    continue
            if not isinstance(value, dict):
                problems.append(Problem("not-object", row, f"a JSON {type(value).__name__} where an object was expected"))
                continue
            # Nesting can only be deeper than max_depth when the line has that many brackets (a cheap count).
            if line.count(b"[") + line.count(b"{") >= limits.max_depth:
                value = _shallow(value, limits.max_depth, row, problems)
            if not keys.issuperset(value):
                value = _known_keys(value, keys, limits.max_keys, row, problems)
            records.append(value)
            rows.append(row)
        table = _to_table(records, rows, problems)
        batch = Batch(self.shard, table, np.asarray(rows, dtype=np.int64))
        batch.problems.extend(problems)
        return batch

    @staticmethod
    def _recover(line: bytes, row: int, exc: Exception, last: bool):
        """A line orjson rejects: invalid UTF-8 is replaced and the record kept; anything else is reported."""
        try:
            line.decode("utf-8")
        except UnicodeDecodeError as bad:
            fixed = line.decode("utf-8", errors="replace")
            problem = Problem("invalid-utf8", row, f"invalid UTF-8 byte(s) at byte {bad.start} of the line, "
                              "replaced by U+FFFD", offset=bad.start)
            try:
                return orjson.loads(fixed), problem
            except orjson.JSONDecodeError as exc2:
                exc = exc2
        kind = "cut-off" if last else "bad-json"
        detail = "the last line ends without a newline and is not complete JSON" if last else f"not JSON: {exc}"
        return None, Problem(kind, row, detail, offset=getattr(exc, "pos", -1))


_ZSTD_MAGIC = b"\x28\xb5\x2f\xfd"


class DamagedStream(Exception):
    """A compressed stream that cannot be decoded past a point: what came before it was read."""


class _Inflater:
    """A gzip file (RFC 1952) decoded with zlib as a stream of bytes (``read(n)``), member after member.

    Each member's header is read here, its deflate data inflated raw, and its CRC-32 and length (the trailer) are
    checked against what was decoded, so a damaged byte anywhere is noticed, at the latest at the end of its
    member.  When inflating fails, every byte decoded before the failure is returned first (the failing step is
    redone a byte at a time from a copy of the decoder), and the next ``read`` raises :class:`DamagedStream` with
    the position in the compressed file."""

    RAW_CHUNK = 1 << 16

    def __init__(self, raw):
        self.raw = raw
        self.pending = b""  # compressed bytes read but not yet used
        self.at = 0  # compressed bytes used so far
        self.inflate = None  # the current member's decoder, None between members
        self.crc = self.size = 0
        self.error: DamagedStream | None = None
        self.done = False

    def tell(self) -> int:
        return self.at

    def _more(self, n: int) -> bool:
        """At least ``n`` bytes pending (reading more as needed); False at the end of the file."""
        while len(self.pending) < n:
            data = self.raw.read(max(self.RAW_CHUNK, n - len(self.pending)))
            if not data:
                return False
            self.pending += data
        return True

    def _use(self, n: int) -> bytes:
        used, self.pending = self.pending[:n], self.pending[n:]
        self.at += n
        return used

    def _header(self) -> bool:
        """Read a member's header; False at a clean end of the file (nothing, or zero padding, left)."""
        if not self._more(1):
            self.done = True
            return False
        if not self.pending.strip(b"\x00"):
            while self._more(len(self.pending) + 1):
                if self.pending.strip(b"\x00"):
                    break
            else:
                self.done = True
                return False
        if not self._more(10) or self.pending[:3] != b"\x1f\x8b\x08":
            what = "not a gzip member" if self.at else "not a gzip file (no gzip header)"
            raise DamagedStream(f"bytes at byte {self.at:,} are {what}")
        flags = self.pending[3]
        at = 10
        if flags & 4:  # FEXTRA: a 2-byte length, then that many bytes
            if not self._more(at + 2):
                raise DamagedStream(f"the gzip header at byte {self.at:,} is cut off")
            at += 2 + int.from_bytes(self.pending[at:at + 2], "little")
        for flag in (8, 16):  # FNAME, FCOMMENT: zero-terminated
            if flags & flag:
                while True:
                    end = self.pending.find(b"\x00", at)
                    if end >= 0:
                        at = end + 1
                        break
                    if not self._more(len(self.pending) + 1) or len(self.pending) > (1 << 20):
                        raise DamagedStream(f"the gzip header at byte {self.at:,} is cut off or damaged")
        if flags & 2:  # FHCRC
            at += 2
        if not self._more(at):
            raise DamagedStream(f"the gzip header at byte {self.at:,} is cut off")
        self._use(at)
        self.inflate, self.crc, self.size = zlib.decompressobj(-zlib.MAX_WBITS), 0, 0
        return True

    def _trailer(self) -> None:
        """After a member's deflate data: its CRC-32 and length must match what was decoded."""
        start = self.at
        if not self._more(8):
            raise DamagedStream(f"the gzip stream ends early at byte {self.at + len(self.pending):,} (cut off "
                                "inside a trailer)")
        crc, size = struct.unpack("<II", self._use(8))
        self.inflate = None
        if crc != self.crc or size != self.size & 0xFFFFFFFF:
            raise DamagedStream(f"the gzip checksum (CRC-32) or length stored at byte {start:,} does not match the "
                                "data decoded before it: some of those records may be altered")

    def read(self, n: int) -> bytes:
        out, got = [], 0
        try:
            while got < n and not self.done:
                if self.error is not None:
                    break
                if self.inflate is None and not self._header():
                    break
                if not self.pending and not self._more(1):
                    raise DamagedStream(f"the gzip stream ends early at byte {self.at:,} (cut off): the rest of "
                                        "the file is missing")
                given, before = self.pending, self.inflate.copy()
                try:
                    piece = self.inflate.decompress(given, n - got)
                except zlib.error as exc:
                    piece, used = self._salvage(before, given, n - got)
                    self._count(piece, out)
                    got += len(piece)
                    raise DamagedStream(f"the gzip stream is damaged at about byte {self.at + used:,} of the "
                                        f"compressed file ({exc})") from None
                rest = self.inflate.unused_data if self.inflate.eof else self.inflate.unconsumed_tail
                self.at += len(given) - len(rest)
                self.pending = rest
                self._count(piece, out)
                got += len(piece)
                if self.inflate.eof:
                    self._trailer()
        except DamagedStream as exc:
            self.error = exc
        if not got and self.error is not None:
            raise self.error
        return b"".join(out)

    def _count(self, piece: bytes, out: list) -> None:
        self.crc = zlib.crc32(piece, self.crc)
        self.size += len(piece)
        out.append(piece)

    @staticmethod
    def _salvage(inflate, given: bytes, room: int) -> tuple[bytes, int]:
        """The bytes ``inflate`` (a copy from before the failing step) decodes from ``given`` before it fails, a byte
        at a time; and how many compressed bytes it took."""
        out, data, used = [], given, 0
        while room > 0 and data:
            try:
                piece = inflate.decompress(data, 1)
            except zlib.error:
                break
            tail = inflate.unconsumed_tail
            used += len(data) - len(tail)
            out.append(piece)
            room -= len(piece)
            if inflate.eof or (not piece and tail == data):
                break
            data = tail
        return b"".join(out), used


class _Pieces:
    """A pyarrow compressed input stream read in pieces of at most :attr:`PIECE` bytes, so that what was decoded
    before a failure is returned (the next read raises :class:`DamagedStream` with the compressed position)."""

    PIECE = 1 << 20

    def __init__(self, stream, raw, codec: str):
        self.stream, self.raw, self.codec = stream, raw, codec

    def read(self, n: int) -> bytes:
        out, got = [], 0
        while got < n:
            try:
                piece = self.stream.read(min(self.PIECE, n - got))
            except (OSError, pa.ArrowException) as exc:
                if out:  # give what came before; the next read fails again at the same place
                    self.stream = _Failing(exc)
                    break
                raise DamagedStream(f"the {self.codec} stream is damaged near byte {self.raw.tell():,} of the "
                                    f"compressed file ({_describe(exc)})") from None
            if not piece:
                break
            out.append(piece)
            got += len(piece)
        return b"".join(out)


class _Failing:
    def __init__(self, exc):
        self.exc = exc

    def read(self, n):
        raise self.exc


def _depth_over(value, limit: int) -> bool:
    """Whether a JSON value nests deeper than ``limit`` (lists and objects; iteratively, no recursion)."""
    stack = [(value, 1)]
    while stack:
        item, depth = stack.pop()
        if depth > limit:
            return True
        if isinstance(item, dict):
            stack.extend((v, depth + 1) for v in item.values() if isinstance(v, (dict, list)))
        elif isinstance(item, list):
            stack.extend((v, depth + 1) for v in item if isinstance(v, (dict, list)))
    return False


def _shallow(record: dict, limit: int, row: int, problems: list[Problem]) -> dict:
    """The record without the values nested deeper than ``limit`` (the record itself is level 1), reported."""
    deep = [key for key, value in record.items() if isinstance(value, (dict, list)) and _depth_over(value, limit - 1)]
    if not deep:
        return record
    problems.append(Problem("too-deep", row, f"the value of {', '.join(map(repr, deep[:3]))} nests deeper than "
                                             f"{limit} levels (max_depth); dropped", column=deep[0]))
    return {key: value for key, value in record.items() if key not in deep}


def _known_keys(record: dict, keys: set, limit: int, row: int, problems: list[Problem]) -> dict:
    """The record with keys new to the shard admitted while the shard has fewer than ``limit`` distinct keys, the
    rest dropped and reported."""
    dropped = []
    for key in record:
        if key in keys:
            continue
        if len(keys) < limit:
            keys.add(key)
        else:
            dropped.append(key)
    if not dropped:
        return record
    problems.append(Problem("too-many-keys", row, f"key(s) {', '.join(map(repr, dropped[:3]))} beyond the shard's "
                                                  f"{limit} distinct keys (max_keys); dropped", column=dropped[0]))
    return {key: value for key, value in record.items() if key not in dropped}


def _to_table(records: list[dict], rows: list[int], problems: list[Problem]) -> pa.Table:
    if not records:
        return pa.table({})
    # Column names from every record, not only the first (pa.Table.from_pylist takes them from the first row and
    # would silently drop a column that row lacks).
    names = list(dict.fromkeys(k for r in records for k in r))
    columns = {}
    for name in names:
        values = [r.get(name) for r in records]
        try:
            columns[name] = pa.array(values)
        except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError):
            columns[name] = _majority_array(name, values, rows, problems)
            continue
        kind = columns[name].type
        if (pat.is_list(kind) or pat.is_large_list(kind)) and (
                pat.is_floating(kind.value_type) or (pat.is_integer(kind.value_type)
                                                     and columns[name].values.null_count)):
            # One float among integer lists makes the whole column float, and every token rule would skip it; a
            # null inside one is no token id: when most rows are integer lists, the others are read as null and
            # named, row by row.
            columns[name] = _majority_array(name, values, rows, problems, only_if="list<int>")
    return pa.table(columns)


_SCALARS = {int: "int", float: "float", bool: "bool", str: "str", type(None): "null"}


def _shape(value) -> str:
    """A coarse type signature of a JSON value: what Arrow would need to hold it (inside a list, integers, floats
    and nulls are told apart: a list of token ids must hold integers only)."""
    if isinstance(value, list):
        inner = set()
        for kind in set(map(type, value)):
            if kind is list or kind is dict:
                inner |= {_shape(v) for v in value if type(v) is kind}
            else:
                inner.add(_SCALARS.get(kind, kind.__name__))
        return "list<" + ("|".join(sorted(inner)) or "null") + ">"
    if isinstance(value, bool):
        return "bool"
    if isinstance(value, (int, float)):
        return "number"
    return type(value).__name__ if value is not None else "null"


def _majority_array(name: str, values: list, rows: list[int], problems: list[Problem],
                    only_if: str | None = None) -> pa.Array:
    """Keep the values of the column's most common type; read the others as null and report them (with
    ``only_if``: only when that is the most common type; else the column as Arrow reads it)."""
    shapes = [_shape(v) for v in values]
    counts: dict[str, int] = {}
    for s in shapes:
        if s != "null":
            counts[s] = counts.get(s, 0) + 1
    keep = max(counts, key=counts.get)
    if only_if is not None and keep != only_if:
        return pa.array(values)
    cleaned = []
    for value, shape, row in zip(values, shapes, rows):
        if shape in (keep, "null"):
            cleaned.append(value)
        else:
            cleaned.append(None)
            problems.append(Problem("mistyped", row, f"column {name!r} holds {shape} here but {keep} in most rows",
                                    column=name))
    try:
        return pa.array(cleaned)
    except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError) as exc:
        for row in rows:
            problems.append(Problem("mistyped", row, f"column {name!r} cannot be read: {_describe(exc)}", column=name))
        return pa.nulls(len(values))
