"""Counting the tokens of raw-text documents with a tokenizer file.

A text shard holds documents, not windows; to compare its documents with the context window (``seq_len``) their
lengths must be in the window's unit, tokens.  ``--tokenizer FILE`` (setting ``tokenizer``) names a tokenizer saved
as one JSON file by the ``tokenizers`` library, an optional dependency (``pip install 'corpuscle[tokenizers]'``).
Without it, text lengths are UTF-8 byte counts, and every figure derived from them says "bytes".

How tokens are counted:

* **No special tokens.**  Documents are encoded with ``add_special_tokens=False``: the count is the document's own
  content.  Separators (eos after, bos before) are added by the packing step, one per document, so they belong to
  the layout, not to the document; a document of exactly ``seq_len`` tokens leaves no room for its separator.
* **No truncation, no padding.**  A tokenizer file may carry a truncation length or a padding rule from training
  time; both are switched off on the loaded tokenizer, otherwise every long document would count as the truncation
  length and overlong documents could not be seen.
* **In batches.**  Documents are encoded with the library's batch encoder (its own threads do the work), in groups
  of about :data:`ENCODE_BYTES` bytes of text so that the encodings of one group stay small in memory.
* **Cached per process.**  A tokenizer file is read once per process (keyed by its path, size and modification
  time), so the per-shard workers of a parallel scan each load it once.
"""
from __future__ import annotations

import os
from functools import lru_cache

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from corpuscle.errors import SettingsError

#: What to install when the ``tokenizers`` library is missing.
INSTALL_HINT = "pip install 'corpuscle[tokenizers]'"

#: Text bytes encoded per call of the batch encoder (bounds the memory the encodings of one call take).
ENCODE_BYTES = 4 << 20


class TokenizerError(SettingsError):
    """A tokenizer that cannot be used: library missing, file missing or unreadable (a usage error, exit 2)."""


def _library():
    try:
        import tokenizers  # optional dependency, imported only when a tokenizer is asked for
    except ImportError:
        raise TokenizerError("counting tokens of text shards needs the 'tokenizers' library, which is not "
                             f"installed: {INSTALL_HINT} (or drop --tokenizer to count text lengths in UTF-8 "
                             "bytes)") from None
    return tokenizers


def _file_key(path: str) -> tuple[str, int, int]:
    real = os.path.realpath(path)
    try:
        stat = os.stat(real)
    except OSError:
        raise TokenizerError(f"tokenizer file {path} does not exist: give the path of a tokenizer saved as JSON "
                             "(e.g. tokenizer.json)") from None
    if not os.path.isfile(real):
        raise TokenizerError(f"tokenizer {path} is not a file: give the path of the tokenizer's JSON file")
    return real, stat.st_size, stat.st_mtime_ns


@lru_cache(maxsize=8)
def _load(real: str, size: int, mtime_ns: int):
    tokenizers = _library()
    try:
        tokenizer = tokenizers.Tokenizer.from_file(real)
    except Exception as exc:  # noqa: BLE001 - the library raises plain Exceptions for bad files
        first = (str(exc).strip().splitlines() or ["no detail"])[0]
        raise TokenizerError(f"cannot load tokenizer {real}: {first}. Give a tokenizer saved as one JSON file by "
                             "the tokenizers library (Tokenizer.save)") from None
    tokenizer.no_truncation()
    tokenizer.no_padding()
    return tokenizer


def load_tokenizer(path: str):
    """The tokenizer saved at ``path`` (a ``tokenizers.Tokenizer``), truncation and padding off; cached per process.

    Raises :class:`TokenizerError` (a :class:`~corpuscle.settings.SettingsError`) when the library is not installed or
    the file cannot be read as a tokenizer.
    """
    return _load(*_file_key(path))


def check_tokenizer(path: str) -> None:
    """Fail early, as a usage error, when ``path`` cannot be used to count tokens."""
    load_tokenizer(path)


def _as_strings(texts) -> pa.Array:
    if isinstance(texts, pa.ChunkedArray):
        texts = texts.combine_chunks()
    if not isinstance(texts, pa.Array):
        texts = pa.array(texts, type=pa.large_string())
    return texts


def count_tokens(texts, tokenizer) -> np.ndarray:
    """Tokens per document (int64), with the batch encoder and without special tokens.

    ``texts`` is an Arrow string array (or a list of str); a null document counts 0 tokens.  ``tokenizer`` is a
    loaded tokenizer or the path of a tokenizer file.
    """
    if isinstance(tokenizer, (str, os.PathLike)):
        tokenizer = load_tokenizer(os.fspath(tokenizer))
    texts = _as_strings(texts)
    n = len(texts)
    out = np.zeros(n, dtype=np.int64)
    if n == 0:
        return out
    if texts.null_count:
        texts = pc.fill_null(texts, "")
    # Group documents so that one call of the batch encoder sees about ENCODE_BYTES of text.
    size = np.cumsum(pc.binary_length(texts).to_numpy(zero_copy_only=False).astype(np.int64))
    cuts = np.searchsorted(size, np.arange(ENCODE_BYTES, int(size[-1]) + ENCODE_BYTES, ENCODE_BYTES), "right")
    bounds = np.unique(np.concatenate([[0], np.minimum(cuts, n), [n]]))
    encode = getattr(tokenizer, "encode_batch_fast", tokenizer.encode_batch)
    for lo, hi in zip(bounds[:-1].tolist(), bounds[1:].tolist()):  # one call per group of documents
        encodings = encode(texts.slice(lo, hi - lo).to_pylist(), add_special_tokens=False)
        out[lo:hi] = np.fromiter(map(len, encodings), dtype=np.int64, count=hi - lo)
    return out


def text_lengths(texts, tokenizer: str | None = None) -> tuple[np.ndarray, np.ndarray, str]:
    """Length of every non-null document of a text column: ``(lengths, present, unit)``.

    ``present`` marks the rows that hold a document (not null); ``lengths`` has one entry per such row.  With a
    ``tokenizer`` (path) the unit is ``"tokens"``, otherwise ``"bytes"`` (UTF-8 bytes, ``pyarrow.compute
    .binary_length``).
    """
    texts = _as_strings(texts)
    present = np.ones(len(texts), dtype=bool) if not texts.null_count else \
        texts.is_valid().to_numpy(zero_copy_only=False)
    if tokenizer is None:
        lengths = pc.fill_null(pc.binary_length(texts), 0).to_numpy(zero_copy_only=False)
        return np.asarray(lengths, dtype=np.int64)[present], present, "bytes"
    if texts.null_count:
        texts = texts.filter(pa.array(present))
    return count_tokens(texts, tokenizer), present, "tokens"
