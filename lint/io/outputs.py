"""Checks of the output paths of a scan, made before any shard is read: a report must never overwrite an input, must
not land where the next scan would read it as a shard, and must be writable -- or the run stops at once with a
one-line usage error instead of after the whole scan.
"""
from __future__ import annotations

import fnmatch
import os
import tempfile

from corpuscle.io.batch import Shard
from corpuscle.io.sources import is_uri, shard_format


class OutputProblem(Exception):
    """An output path that cannot or must not be written (a usage error: exit status 2)."""


def check_outputs(outputs: dict[str, str], given: list[str], shards: list[Shard]) -> None:
    """Raise :class:`OutputProblem` for the first output path (``{"--sarif": path, ...}``) that is an input shard,
    lies where a scan of ``given`` (the paths as given) would read it as a shard, is given twice, or cannot be
    written (a folder, a path under a file, a folder without write permission)."""
    inputs = {os.path.realpath(shard.path) for shard in shards if not is_uri(shard.path)}
    seen: dict[str, str] = {}
    for flag, path in outputs.items():
        if not path:
            continue
        real = os.path.realpath(path)
        if real in seen:
            raise OutputProblem(f"{flag} {path} is also the path of {seen[real]}: give each report its own file")
        seen[real] = flag
        if real in inputs:
            raise OutputProblem(f"{flag} {path} is one of the input shards: corpuscle never writes its inputs; "
                                "write the report to another path")
        folder = _scanned_folder(real, given)
        if folder is not None:
            raise OutputProblem(f"{flag} {path} lies inside the scanned {folder} and would be read as a shard by the "
                                "next scan: write it outside, or give it an ending corpuscle does not scan (e.g. .json)")
        writable(flag, path)


def _scanned_folder(real: str, given: list[str]) -> str | None:
    """The scanned folder or glob (as given) under which a file at ``real`` would be found as a shard, or None."""
    if shard_format(real) is None:
        return None
    for arg in given:
        if is_uri(arg):
            continue
        if any(ch in arg for ch in "*?[") and not os.path.exists(arg):
            pattern = os.path.abspath(arg)
            if fnmatch.fnmatch(os.path.abspath(real), pattern) or fnmatch.fnmatch(real, pattern) \
                    or _under_match(real, pattern):
                return f"paths matching {arg}"
        elif os.path.isdir(arg):
            root = os.path.realpath(arg)
            if real.startswith(root.rstrip(os.sep) + os.sep):
                hidden = any(part.startswith(".") for part in os.path.relpath(real, root).split(os.sep))
                if not hidden:  # hidden files and folders are not scanned
                    return f"folder {arg}"
    return None


def _under_match(real: str, pattern: str) -> bool:
    """Whether a folder that ``pattern`` matches holds ``real`` (a glob naming folders scans them whole)."""
    folder = os.path.dirname(real)
    while folder and folder != os.path.dirname(folder):
        if fnmatch.fnmatch(folder, pattern):
            return True
        folder = os.path.dirname(folder)
    return False


def writable(flag: str, path: str) -> None:
    """Raise :class:`OutputProblem` unless ``path`` can be written (as :func:`corpuscle.report.write_atomic`
    does: a temporary file in its folder, renamed; missing folders created)."""
    if os.path.isdir(path):
        raise OutputProblem(f"{flag} {path} is a folder: give the path of a file")
    folder = os.path.dirname(os.path.abspath(path))
    existing = folder
    while not os.path.exists(existing):
        existing = os.path.dirname(existing)
    if not os.path.isdir(existing):
        raise OutputProblem(f"cannot write {path}: {existing} is a file, not a folder; choose another path")
    if existing != folder:  # the missing folders will be made: the nearest existing one must take them
        if not os.access(existing, os.W_OK | os.X_OK):
            raise OutputProblem(f"cannot write {path} ({flag}): no permission to create folders in {existing}; "
                                "choose a writable path")
        return
    try:
        fd, probe = tempfile.mkstemp(prefix=".corpuscle-probe-", suffix=".tmp", dir=folder)
    except OSError as exc:
        raise OutputProblem(f"cannot write {path} ({flag}): the folder {folder} is not writable "
                            f"({exc.strerror or exc}); choose a writable path") from None
    os.close(fd)
    os.unlink(probe)


def check_work_folders(rules) -> None:
    """Raise :class:`OutputProblem` when a folder a rule writes to during the scan (the MinHash signature files of
    near-duplicate: ``signature_folder``, or the system temporary folder) cannot be written: said before scanning,
    not as the rule's failure after it."""
    for rule in rules:
        folder = getattr(rule, "spill_folder", None)
        if not isinstance(folder, str):
            continue
        try:
            writable(f"[rule.{rule.id}] signature_folder", os.path.join(os.path.dirname(folder), "probe"))
        except OutputProblem as exc:
            raise OutputProblem(f"{exc} (set signature_folder under [rule.{rule.id}] or TMPDIR to a writable "
                                "folder)") from None
