"""How many values each row of a Parquet row group holds in its list columns, read from the pages' repetition
levels without decoding a single value.

pyarrow decodes a row of a list column whole: a row of 50M ids takes over a GiB while it is decoded, whatever the
batch size, and a row group cannot be read from its middle.  So before a large row group is decoded, its rows'
lengths are read here: each page header (Thrift compact protocol), and of each data page only its repetition
levels (RLE / bit-packed hybrid), a row starting at every level 0 (Parquet format: "Nested Encoding",
"Data Pages").  The memory this takes is one page at a time and eight bytes per row.

:func:`row_lengths` returns None for what it does not read (a codec pyarrow cannot decompress, levels written in the
deprecated BIT_PACKED encoding, a damaged or implausible page): the caller then decodes as before.
"""
from __future__ import annotations

import zlib

import numpy as np
import pyarrow as pa

#: The most rows of a row group whose lengths are read (eight bytes each); larger row groups are decoded as before.
MAX_ROWS = 1 << 24
#: The largest page (compressed or not) read for its levels; a larger page stops the reading (None).
MAX_PAGE_BYTES = 256 << 20

#: Parquet's compression codecs by the name pyarrow's metadata gives them, as pyarrow's codecs name them.
_CODECS = {"SNAPPY": "snappy", "GZIP": "gzip", "BROTLI": "brotli", "ZSTD": "zstd", "LZ4_RAW": "lz4_raw",
           "LZ4": "lz4_raw"}  # (pyarrow names LZ4_RAW "LZ4"; the older Hadoop framing fails to decode: None)


class _Unread(Exception):
    """Something in the column chunk this reader does not read: the caller decodes as before."""


# -- Thrift compact protocol (the encoding of Parquet's page headers) ---------------------------------------------

def _varint(data: bytes, at: int) -> tuple[int, int]:
    value = shift = 0
    while True:
        if at >= len(data) or shift > 63:
            raise _Unread("a varint runs past the header")
        byte = data[at]
        at += 1
        value |= (byte & 0x7F) << shift
        if not byte & 0x80:
            return value, at
        shift += 7


def _zigzag(value: int) -> int:
    return (value >> 1) ^ -(value & 1)


def _value(data: bytes, at: int, kind: int, depth: int):
    """One value of compact type ``kind`` at ``at``: (value, next position); structs as {field id: value}."""
    if kind in (1, 2):  # boolean inside a struct: the type is the value
        return kind == 1, at
    if kind == 3:
        if at >= len(data):
            raise _Unread("cut off")
        return data[at], at + 1
    if kind in (4, 5, 6):
        raw, at = _varint(data, at)
        return _zigzag(raw), at
    if kind == 7:
        return None, at + 8
    if kind == 8:
        size, at = _varint(data, at)
        return None, at + size
    if kind in (9, 10):
        if at >= len(data):
            raise _Unread("cut off")
        head = data[at]
        at += 1
        size, inner = head >> 4, head & 0x0F
        if size == 15:
            size, at = _varint(data, at)
        for _ in range(size):
            if inner in (1, 2):  # booleans in a list take a byte each
                at += 1
            else:
                _, at = _value(data, at, inner, depth + 1)
        return None, at
    if kind == 11:
        size, at = _varint(data, at)
        if size:
            types = data[at]
            at += 1
            for _ in range(size):
                _, at = _value(data, at, types >> 4, depth + 1)
                _, at = _value(data, at, types & 0x0F, depth + 1)
        return None, at
    if kind == 12:
        return _struct(data, at, depth + 1)
    raise _Unread(f"unknown Thrift type {kind}")


def _struct(data: bytes, at: int, depth: int = 0) -> tuple[dict, int]:
    if depth > 16:
        raise _Unread("header nested too deep")
    fields, last = {}, 0
    while True:
        if at >= len(data):
            raise _Unread("cut off")
        head = data[at]
        at += 1
        if head == 0:
            return fields, at
        delta, kind = head >> 4, head & 0x0F
        if delta:
            field = last + delta
        else:
            raw, at = _varint(data, at)
            field = _zigzag(raw)
        fields[field], at = _value(data, at, kind, depth)
        last = field


# -- repetition levels ----------------------------------------------------------------------------------------------

def _row_starts(data: bytes, count: int, width: int, first: int) -> np.ndarray:
    """Positions (``first`` + index) of the level-0 entries among the first ``count`` levels of an RLE / bit-packed
    hybrid run sequence of bit width ``width``."""
    out, few, at, done = [], [], 0, 0
    size, mask = (width + 7) // 8, (1 << width) - 1
    while done < count:
        header, at = _varint(data, at)
        if header & 1:  # bit-packed: (header >> 1) groups of 8 values, ``width`` bits each, least significant first
            groups = header >> 1
            end = at + groups * width
            if end > len(data) or groups == 0:
                raise _Unread("a bit-packed run runs past the page")
            take = min(groups * 8, count - done)
            if groups <= 8:  # short runs (a row start among continuations) are most runs: plain integers
                packed = int.from_bytes(data[at:end], "little")
                base = first + done
                few += [base + k for k in range(take) if not (packed >> (k * width)) & mask]
            else:
                bits = np.unpackbits(np.frombuffer(data, np.uint8, groups * width, at), bitorder="little")
                values = bits.reshape(-1, width) @ (1 << np.arange(width, dtype=np.int64)) if width > 1 else bits
                out.append(np.flatnonzero(values[:take] == 0) + (first + done))
            done += take
            at = end
        else:  # RLE: (header >> 1) copies of one value
            run = header >> 1
            if at + size > len(data) or run == 0:
                raise _Unread("an RLE run runs past the page")
            value = int.from_bytes(data[at:at + size], "little")
            at += size
            take = min(run, count - done)
            if value == 0:
                if take > MAX_ROWS:  # more rows than any row group read here: a damaged or hostile run
                    raise _Unread("an RLE run of more row starts than a row group holds")
                if take <= 8:
                    few += range(first + done, first + done + take)
                else:
                    out.append(np.arange(first + done, first + done + take, dtype=np.int64))
            done += take
    if few:
        out.append(np.asarray(few, dtype=np.int64))
    return np.sort(np.concatenate(out)) if len(out) > 1 else out[0] if out else np.zeros(0, np.int64)


def _snappy_prefix(data: bytes, want: int) -> bytes:
    """The first ``want`` bytes (or all) of a raw Snappy block (Snappy's format description: a varint length, then
    literals and back-references), decoded no further than needed."""
    _, at = _varint(data, 0)
    out = bytearray()
    while len(out) < want and at < len(data):
        tag = data[at]
        at += 1
        kind = tag & 3
        if kind == 0:  # literal
            length = tag >> 2
            if length >= 60:
                extra = length - 59
                length = int.from_bytes(data[at:at + extra], "little")
                at += extra
            length += 1
            out += data[at:at + length]
            at += length
            continue
        if kind == 1:
            length, offset = ((tag >> 2) & 7) + 4, ((tag >> 5) << 8) | data[at]
            at += 1
        elif kind == 2:
            length, offset = (tag >> 2) + 1, int.from_bytes(data[at:at + 2], "little")
            at += 2
        else:
            length, offset = (tag >> 2) + 1, int.from_bytes(data[at:at + 4], "little")
            at += 4
        if not 0 < offset <= len(out):
            raise _Unread("a Snappy back-reference points before the data")
        piece = bytes(out[-offset:])
        out += (piece * (length // offset + 1))[:length]
    return bytes(out[:want])


def _prefix(body: bytes, codec: str | None, raw_size: int, want: int) -> bytes:
    """At least the first ``want`` bytes of a compressed page (all of it when shorter), decompressing as little as
    the codec allows: Snappy by hand, gzip with zlib, zstd and Brotli as streams; the others whole."""
    if codec is None:
        return body[:want]
    if codec == "snappy":
        return _snappy_prefix(body, want)
    if codec == "gzip":
        return zlib.decompressobj(47).decompress(body, want)  # 47: gzip or zlib header, as the data says
    if codec in ("zstd", "brotli"):
        with pa.CompressedInputStream(pa.BufferReader(body), codec) as stream:
            return stream.read(want)
    return pa.Codec(codec).decompress(body, raw_size).to_pybytes()[:want]


def _levels_v1(body: bytes, codec: str | None, raw_size: int, count: int, width: int, first: int) -> np.ndarray:
    """Row starts of a DATA_PAGE (v1): the repetition levels come first in the (decompressed) page, a 4-byte
    length then the RLE hybrid runs; only that much of the page is decompressed."""
    head = _prefix(body, codec, raw_size, 4)
    if len(head) < 4:
        raise _Unread("page cut off")
    size = int.from_bytes(head[:4], "little")
    if size > raw_size - 4:
        raise _Unread("repetition levels run past the page")
    page = _prefix(body, codec, raw_size, 4 + size)
    if len(page) < 4 + size:
        raise _Unread("page cut off")
    return _row_starts(page[4:4 + size], count, width, first)


def row_lengths(source, column_meta, max_repetition: int, rows: int) -> np.ndarray | None:
    """Entries per row (values, nulls and empty lists counting one each) of a list column's chunk: ``source`` a
    pyarrow random-access file, ``column_meta`` the chunk's ``ColumnChunkMetaData``, ``rows`` the row group's rows;
    None when the chunk holds something this reader does not read (see the module notes)."""
    if rows > MAX_ROWS or max_repetition < 1:
        return None
    compression = str(column_meta.compression).upper()
    codec = None
    if compression != "UNCOMPRESSED":
        if compression not in _CODECS or not pa.Codec.is_available(_CODECS[compression]):
            return None
        codec = _CODECS[compression]
    width = int(max_repetition).bit_length()
    total = int(column_meta.num_values)
    start = column_meta.data_page_offset
    if column_meta.has_dictionary_page and 0 < (column_meta.dictionary_page_offset or 0) < start:
        start = column_meta.dictionary_page_offset
    end = start + int(column_meta.total_compressed_size)
    starts, seen, found, at = [], 0, 0, start
    try:
        while seen < total and at < end:
            source.seek(at)
            head = source.read(min(64 << 10, end - at))
            header, used = _struct(head, 0)
            kind, raw_size, stored = header.get(1), header.get(2, -1), header.get(3, -1)
            if not (0 <= stored <= MAX_PAGE_BYTES and 0 <= raw_size <= MAX_PAGE_BYTES):
                return None
            at += used
            if kind in (0, 3):
                source.seek(at)
                body = source.read(stored)
                if len(body) != stored:
                    return None
                if kind == 0:
                    info = header.get(5) or {}
                    count = info.get(1, -1)
                    if count < 0 or info.get(4, 3) != 3:  # levels not RLE (BIT_PACKED is deprecated): not read
                        return None
                    starts.append(_levels_v1(body, codec, raw_size, count, width, seen))
                else:  # DATA_PAGE_V2: the levels are stored uncompressed before the values
                    info = header.get(8) or {}
                    count, size = info.get(1, -1), info.get(6, -1)
                    if count < 0 or not 0 <= size <= len(body):
                        return None
                    starts.append(_row_starts(body[:size], count, width, seen))
                seen += count
                found += starts[-1].size
                if found > rows:  # more rows than the metadata says: the damage is pyarrow's to report
                    return None
            at += stored
    except (_Unread, pa.ArrowException, OSError, ValueError, IndexError, zlib.error):
        return None
    firsts = np.concatenate(starts) if starts else np.zeros(0, np.int64)
    if seen != total or firsts.size != rows or (rows and firsts[0] != 0):
        return None  # the pages do not add up to what the metadata says: pyarrow's decoding reports the damage
    return np.diff(np.append(firsts, seen))
