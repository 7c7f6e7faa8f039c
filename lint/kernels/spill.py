"""Spill files: arrays of one shard appended batch by batch to an ordinary NumPy ``.npy`` file, and read back a
block of rows at a time, so that what a scan holds in memory does not grow with the shard."""
from __future__ import annotations

import os
import re
import shutil
import socket
import struct
import tempfile
import uuid
import zlib

import numpy as np

# Rows of a signature or band file read back at once (8 MiB of signatures at num_perm 128): a block is one memory
# map in read_rows (the file's pages that a read touches count as the process's memory while they are mapped) and
# one buffer in npy_blocks.
_VERIFY_BLOCK_ROWS = 1 << 14


class SignatureSpill:
    """The MinHash signatures of one shard, appended batch by batch to a NumPy ``.npy`` file.

    A ``.npy`` file states its shape in a header before the data, but the number of windows of a shard is known
    only at its end. So the header is reserved as a fixed :attr:`HEADER_BYTES` bytes when the file is opened,
    each batch's signatures are appended as little-endian uint32 rows, and :meth:`close` writes the header (NPY
    format version 1.0: magic, version, header length, the dictionary padded with spaces and ended by a newline,
    128 bytes in all, a multiple of 64 as the format asks). The result is an ordinary ``.npy`` file, read back
    with ``np.load(path, mmap_mode="r")``. Only the path travels in the rule's state.
    """

    HEADER_BYTES = 128
    DTYPE = "<u4"
    PREFIX = "signatures-"
    WHAT = "MinHash signatures"

    def __init__(self, folder: str, num_perm: int):
        try:
            os.makedirs(folder, mode=0o700, exist_ok=True)
            fd, self.path = tempfile.mkstemp(prefix=self.PREFIX, suffix=".npy", dir=folder)
        except OSError as exc:
            raise OSError(f"cannot write {self.WHAT} under {folder} ({exc.strerror or exc}); set TMPDIR to a "
                          f"writable folder with room for {np.dtype(self.DTYPE).itemsize * num_perm} bytes per "
                          "window") from None
        self.num_perm = num_perm
        self.windows = 0
        self._file = os.fdopen(fd, "wb")
        self._file.write(bytes(self.HEADER_BYTES))

    def append(self, rows: np.ndarray) -> None:
        rows = np.ascontiguousarray(rows, dtype=self.DTYPE)
        if rows.ndim != 2 or rows.shape[1] != self.num_perm:
            raise ValueError(f"{self.WHAT} must have shape (windows, {self.num_perm}), got {rows.shape}")
        self._file.write(rows.data)
        self.windows += len(rows)

    def close(self) -> str:
        """Write the header and close the file; returns its path."""
        header = {"descr": self.DTYPE, "fortran_order": False, "shape": (self.windows, self.num_perm)}
        text = repr(header).encode("latin1")
        text = text.ljust(self.HEADER_BYTES - 10 - 1) + b"\n"
        self._file.seek(0)
        self._file.write(b"\x93NUMPY\x01\x00" + struct.pack("<H", len(text)) + text)
        self._file.close()
        return self.path


class BandSpill(SignatureSpill):
    """The band keys and the signature digest of every window of one shard, in a ``.npy`` file of the same make:
    uint64 rows of ``bands + 1`` values, the digest last (see :meth:`NearDuplicate.end`)."""

    DTYPE = "<u8"
    PREFIX = "bands-"
    WHAT = "LSH band keys"


def npy_layout(path: str) -> tuple[tuple, np.dtype, int]:
    """``(shape, dtype, offset of the data)`` of the 2-D C-order array in the ``.npy`` file ``path`` (NPY format
    1.0 or 2.0, read with NumPy's own header parser)."""
    with open(path, "rb") as fh:
        version = np.lib.format.read_magic(fh)
        if version == (1, 0):
            shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh)
        elif version == (2, 0):
            shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh)
        else:
            raise ValueError(f"{path}: .npy format version {version} is not supported; expected 1.0 or 2.0")
        start = fh.tell()
    if len(shape) != 2 or fortran:
        raise ValueError(f"{path}: expected a 2-D array in C order, got shape {shape}")
    return shape, dtype, start


def read_rows(path: str, rows: np.ndarray) -> np.ndarray:
    """Rows ``rows`` (sorted, distinct) of the 2-D array in the ``.npy`` file ``path``, as :func:`np.load` gives
    them.

    The file is memory-mapped one block of :data:`_VERIFY_BLOCK_ROWS` rows at a time, and only where rows are asked
    for: pages of a file that a process has mapped count in its resident memory while the map lasts, so one map of
    the whole file would make the scan's peak memory grow with the shard (up to the size of its signature file);
    block by block it grows by one block at most. The loop runs once per block that holds asked-for rows."""
    shape, dtype, start = npy_layout(path)
    rows = np.asarray(rows, dtype=np.int64)
    out = np.empty((len(rows), shape[1]), dtype=dtype)
    if len(rows) == 0 or shape[1] == 0:
        return out
    if rows[0] < 0 or rows[-1] >= shape[0]:
        raise IndexError(f"{path}: rows {int(rows[0])} to {int(rows[-1])} asked for, the file has {shape[0]}")
    blocks = rows // _VERIFY_BLOCK_ROWS
    cuts = np.flatnonzero(blocks[1:] != blocks[:-1]) + 1
    row_bytes = shape[1] * dtype.itemsize
    for a, b in zip([0, *cuts.tolist()], [*cuts.tolist(), len(rows)]):
        first, last = int(rows[a]), int(rows[b - 1])
        mapped = np.memmap(path, dtype=dtype, mode="r", offset=start + first * row_bytes,
                           shape=(last - first + 1, shape[1]))
        out[a:b] = mapped[rows[a:b] - first]
        del mapped
    return out


def npy_blocks(path: str):
    """The rows of the 2-D array in the ``.npy`` file ``path`` in order, :data:`_VERIFY_BLOCK_ROWS` at a time:
    ``(index of the first row, block)``, read into one buffer that the next block overwrites."""
    shape, dtype, start = npy_layout(path)
    buffer = np.empty((min(shape[0], _VERIFY_BLOCK_ROWS), shape[1]), dtype=dtype)
    with open(path, "rb") as fh:
        fh.seek(start)
        for lo in range(0, shape[0], _VERIFY_BLOCK_ROWS):
            block = buffer[:min(_VERIFY_BLOCK_ROWS, shape[0] - lo)]
            if fh.readinto(block.data) != block.nbytes:
                raise OSError(f"{path} ends before its {shape[0]} rows; it was cut or changed during the scan")
            yield lo, block


class ShingleSpill(SignatureSpill):
    """The shingle hashes of every unit of one shard, back to back in unit order (uint32, one column), for the
    exact verification of candidate pairs; :class:`ShingleEndsSpill` holds where each unit's hashes end."""

    DTYPE = "<u4"
    PREFIX = "shingles-"
    WHAT = "shingle hashes"

    def __init__(self, folder: str):
        super().__init__(folder, 1)


class ShingleEndsSpill(SignatureSpill):
    """Per unit of one shard, the end of its shingle hashes in the :class:`ShingleSpill` file (uint64, one
    column: the running count)."""

    DTYPE = "<u8"
    PREFIX = "shingle-ends-"
    WHAT = "shingle offsets"

    def __init__(self, folder: str):
        super().__init__(folder, 1)
        self.total = 0

    def append_counts(self, counts: np.ndarray) -> None:
        ends = self.total + np.cumsum(np.asarray(counts, dtype=np.uint64))
        if len(ends):
            self.total = int(ends[-1])
        self.append(ends.reshape(-1, 1))


def read_shingle_sets(shingles: str, ends: str, units: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The shingle hashes of the given units (sorted, distinct indices within the shard) from a shard's
    :class:`ShingleSpill` and :class:`ShingleEndsSpill` files: ``(hashes, offsets)``, unit by unit in the order
    given. The ranges are gathered with one fancy index into a memory map of the file, let go at once."""
    units = np.asarray(units, dtype=np.int64)
    if len(units) == 0:
        return np.zeros(0, dtype=np.uint32), np.zeros(1, dtype=np.int64)
    before = np.unique(np.concatenate([units, units[units > 0] - 1]))
    found = read_rows(ends, before)[:, 0].astype(np.int64)
    end = found[np.searchsorted(before, units)]
    start = np.zeros(len(units), dtype=np.int64)
    has = units > 0
    start[has] = found[np.searchsorted(before, units[has] - 1)]
    size = end - start
    offsets = np.zeros(len(units) + 1, dtype=np.int64)
    np.cumsum(size, out=offsets[1:])
    shape, dtype, header = npy_layout(shingles)
    if offsets[-1] == 0:
        return np.zeros(0, dtype=np.uint32), offsets
    position = np.arange(int(offsets[-1])) + np.repeat(start - offsets[:-1], size)
    mapped = np.memmap(shingles, dtype=dtype, mode="r", offset=header, shape=(shape[0],))
    hashes = np.asarray(mapped[position], dtype=np.uint32)
    del mapped
    return hashes, offsets


def _host_tag() -> str:
    """8 hex digits naming this machine (a hash of its host name): a pid means something only on its machine."""
    return f"{zlib.crc32(socket.gethostname().encode('utf-8', 'surrogateescape')):08x}"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


def run_folder(parent: str, prefix: str) -> str:
    """A new folder path under ``parent`` for one scan's temporary files (not created here), named
    ``<prefix>-<host>-<pid>-<random>`` after the process that runs the scan; folders of the same naming left by
    scans of this machine whose process is gone (killed by SIGKILL, say) are removed first."""
    remove_orphans(parent, prefix)
    return os.path.join(parent, f"{prefix}-{_host_tag()}-{os.getpid()}-{uuid.uuid4().hex}")


def remove_orphans(parent: str, prefix: str) -> list[str]:
    """Remove the folders under ``parent`` that :func:`run_folder` named for a process of this machine that no
    longer runs; returns their paths."""
    pattern = re.compile(re.escape(prefix) + r"-([0-9a-f]{8})-(\d+)-[0-9a-f]{32}\Z")
    host, removed = _host_tag(), []
    try:
        names = os.listdir(parent)
    except OSError:
        return removed
    for name in names:
        match = pattern.match(name)
        if match and match.group(1) == host and not _pid_alive(int(match.group(2))):
            shutil.rmtree(os.path.join(parent, name), ignore_errors=True)
            removed.append(os.path.join(parent, name))
    return removed
