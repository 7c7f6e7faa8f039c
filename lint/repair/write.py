"""Writers for repaired shards: the input's format, compression and schema, row groups sized like the input's,
written to a temporary file in the output folder and renamed into place only when the shard is complete.

A writer takes Arrow tables in row order and keeps at most one row group (Parquet) or record batch (Arrow IPC) of
rows waiting, so a repair holds no more of a shard than reading it did.  ``NullWriter`` counts and writes nothing
(``--dry-run``).
"""
from __future__ import annotations

import os
import tempfile

import orjson
import pyarrow as pa
import pyarrow.parquet as pq
from corpuscle.io.batch import Shard
from corpuscle.io.sources import _open_input, is_uri
from corpuscle.report import atomic_file, umask

#: Rows per output unit when the input does not say (an empty input, a JSON Lines shard).
DEFAULT_UNIT_ROWS = 1024


class InputLayout:
    """What a writer copies from the input: its schema, its rows per row group or record batch, its Parquet
    compression codec, and whether an Arrow IPC input is a file or a stream."""

    def __init__(self, shard: Shard):
        self.schema: pa.Schema | None = None
        self.unit_rows = DEFAULT_UNIT_ROWS
        self.codec: str | None = None
        self.ipc_stream = False
        source = _open_input(shard.path) if is_uri(shard.path) else shard.path
        if shard.format == "parquet":
            with pq.ParquetFile(source) as parquet:
                meta = parquet.metadata
            self.schema = meta.schema.to_arrow_schema()
            if meta.num_row_groups:
                self.unit_rows = max(1, meta.row_group(0).num_rows)
                if meta.row_group(0).num_columns:
                    self.codec = meta.row_group(0).column(0).compression.lower()
        elif shard.format == "arrow":
            with (pa.memory_map(source, "r") if isinstance(source, str) else source) as handle:
                self.ipc_stream = handle.read(6) != b"ARROW1"
                handle.seek(0)
                if self.ipc_stream:
                    reader = pa.ipc.open_stream(handle)
                    self.schema = reader.schema
                    first = next(iter(reader), None)
                else:
                    reader = pa.ipc.open_file(handle)
                    self.schema = reader.schema
                    first = reader.get_batch(0) if reader.num_record_batches else None
                if first is not None and first.num_rows:
                    self.unit_rows = first.num_rows


class _Buffered:
    """Collects tables and hands them on in units of ``unit_rows`` rows."""

    def __init__(self, unit_rows: int):
        self.unit_rows = max(1, unit_rows)
        self._waiting: list[pa.Table] = []
        self._rows = 0
        self.rows_written = 0

    def write(self, table: pa.Table) -> None:
        if table.num_rows == 0:
            return
        self._waiting.append(table)
        self._rows += table.num_rows
        while self._rows >= self.unit_rows:
            joined = pa.concat_tables(self._waiting)
            self._emit(joined.slice(0, self.unit_rows))
            rest = joined.slice(self.unit_rows)
            self._waiting, self._rows = ([rest] if rest.num_rows else []), rest.num_rows

    def flush(self) -> None:
        if self._rows:
            self._emit(pa.concat_tables(self._waiting))
        self._waiting, self._rows = [], 0

    def _emit(self, table: pa.Table) -> None:
        self.rows_written += table.num_rows
        self._unit(table)

    def _unit(self, table: pa.Table) -> None:
        raise NotImplementedError


class ShardWriter(_Buffered):
    """Writes one repaired shard at ``path`` in the input's format; ``commit`` renames it into place, ``abort``
    removes the temporary file.  Tables are cast to the input's schema before they are written."""

    def __init__(self, shard: Shard, path: str, layout: InputLayout, schema: pa.Schema | None = None):
        super().__init__(layout.unit_rows)
        self.shard, self.path, self.layout = shard, path, layout
        self.schema = layout.schema if layout.schema is not None else schema
        folder = os.path.dirname(os.path.abspath(path))
        os.makedirs(folder, exist_ok=True)
        fd, self.tmp = tempfile.mkstemp(prefix=".corpuscle-", suffix=".tmp", dir=folder)
        os.close(fd)
        self._sink = None
        self._writer = None

    def _open(self, schema: pa.Schema) -> None:
        fmt = self.shard.format
        if fmt == "parquet":
            self._writer = pq.ParquetWriter(self.tmp, schema, compression=self.layout.codec or "snappy")
        elif fmt == "arrow":
            self._sink = pa.OSFile(self.tmp, "wb")
            opener = pa.ipc.new_stream if self.layout.ipc_stream else pa.ipc.new_file
            self._writer = opener(self._sink, schema)
        else:
            self._sink = (pa.CompressedOutputStream(self.tmp, self.shard.compression) if self.shard.compression
                          else pa.OSFile(self.tmp, "wb"))

    def _unit(self, table: pa.Table) -> None:
        if self.schema is not None and self.shard.format != "jsonl":
            table = table.cast(self.schema)
        if self._sink is None and self._writer is None:
            self._open(table.schema)
        if self.shard.format == "parquet":
            self._writer.write_table(table, row_group_size=table.num_rows)
        elif self.shard.format == "arrow":
            self._writer.write_table(table, max_chunksize=table.num_rows)
        else:
            dumps = orjson.dumps
            self._sink.write(b"".join(dumps(record) + b"\n" for record in table.to_pylist()))

    def commit(self) -> None:
        self.flush()
        if self._sink is None and self._writer is None and self.schema is not None:
            self._open(self.schema)  # no rows left: an empty shard of the same schema
        if self._writer is not None:
            self._writer.close()
        if self._sink is not None:
            self._sink.close()
        fd = os.open(self.tmp, os.O_RDONLY)
        try:
            os.fsync(fd)  # on disk before it takes the shard's name
        finally:
            os.close(fd)
        os.chmod(self.tmp, 0o666 & ~umask())
        os.replace(self.tmp, self.path)

    def abort(self) -> None:
        for handle in (self._writer, self._sink):
            try:
                if handle is not None:
                    handle.close()
            except Exception:  # noqa: BLE001 - the temporary file goes anyway
                pass
        try:
            os.unlink(self.tmp)
        except OSError:
            pass


class NullWriter(_Buffered):
    """Counts what would be written (``--dry-run``)."""

    def __init__(self, *_args, **_kwargs):
        super().__init__(1 << 62)

    def _unit(self, table):
        pass

    def write(self, table: pa.Table) -> None:
        self.rows_written += table.num_rows

    def commit(self) -> None:
        pass

    def abort(self) -> None:
        pass


def copy_atomic(shard: Shard, path: str) -> None:
    """Copy a shard byte for byte to ``path`` (temporary file in the same folder, synced, then renamed)."""
    with atomic_file(path) as out:
        source = _open_input(shard.path) if is_uri(shard.path) else open(shard.path, "rb")
        with source:
            while chunk := source.read(1 << 22):
                out.write(chunk)
