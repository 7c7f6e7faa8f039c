"""Reporters: one module per output format.  They read a :class:`corpuscle.engine.scan.Report` and know nothing of readers."""
from __future__ import annotations

import contextlib
import os
import tempfile

import orjson


@contextlib.contextmanager
def atomic_file(path: str):
    """A binary file to write ``path`` through: a temporary file in the same folder, synced and renamed into place
    when the block ends, removed when it fails, so an interrupted run never leaves a half-written file behind."""
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".corpuscle-", suffix=".tmp", dir=folder)
    try:
        os.chmod(tmp, 0o666 & ~umask())  # mkstemp makes the file private (0600); an output is an ordinary file
        with os.fdopen(fd, "wb") as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def write_atomic(path: str, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically (see :func:`atomic_file`)."""
    with atomic_file(path) as fh:
        fh.write(data)


def umask() -> int:
    """The process's file-creation mask (read by setting and restoring it)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def printable(text: str) -> str:
    """``text`` with the bytes of a file name that is not valid UTF-8 (surrogate escapes, as ``os.fsdecode`` gives
    them) written as ``\\xNN``: every report is valid UTF-8 whatever the names of the shards."""
    try:
        text.encode("utf-8")
        return text
    except UnicodeEncodeError:
        return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def _printable_values(value):
    if isinstance(value, str):
        return printable(value)
    if isinstance(value, dict):
        return {printable(k) if isinstance(k, str) else k: _printable_values(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_printable_values(v) for v in value]
    return value


def dump_json(document, option: int = 0) -> bytes:
    """``orjson.dumps(document)``; strings that are not valid UTF-8 (file names) are made printable first."""
    option |= orjson.OPT_SERIALIZE_NUMPY
    try:
        return orjson.dumps(document, option=option)
    except orjson.JSONEncodeError:
        return orjson.dumps(_printable_values(document), option=option)
