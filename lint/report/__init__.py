"""Reporters: one module per output format.  They read a :class:`corpuscle.engine.scan.Report` and know nothing of readers."""
from __future__ import annotations

import os
import tempfile


def write_atomic(path: str, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same folder and a rename, so an interrupted run
    never leaves a half-written report behind."""
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".corpuscle-", suffix=".tmp", dir=folder)
    try:
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes the file private (0600); a report is an ordinary file
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def _umask() -> int:
    """The process's file-creation mask (read by setting and restoring it)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask
