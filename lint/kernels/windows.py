"""The windows of a batch: every non-empty row of the tokens column (token windows) or every non-empty document of
the text column (text, as its stored UTF-8 bytes), with its shard row, length and content hash."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow.compute as pc
import pyarrow.types as pat
from corpuscle.io.batch import Batch, is_integer_list, is_text
from corpuscle.kernels.hashing import content_hashes

TOKENS, TEXT, DOCUMENTS = 0, 1, 2
"""Unit domains: rows of a token column (windows), documents of a text column, documents of a token column (as the
document reading finds them, see :mod:`corpuscle.kernels.units`)."""


@dataclass
class Windows:
    """The non-empty windows of one batch: batch-local index, shard row, length (tokens or UTF-8 bytes), content
    hash and domain of each; ``domain`` says whether they are token rows or text documents. Rows and lengths are
    uint32 when they fit (always, but in shards of over 2**32 rows or windows of over 2**32 tokens or bytes).
    ``offsets`` is the offset of each unit's first token within its row (0 for rows and text documents)."""

    domain: int
    local: np.ndarray
    rows: np.ndarray
    lengths: np.ndarray
    content: np.ndarray
    domains: np.ndarray
    offsets: np.ndarray = None

    def __post_init__(self):
        if self.offsets is None:
            self.offsets = np.zeros(len(self.rows), dtype=np.uint32)


def window_domain(batch: Batch, settings) -> int | None:
    """TOKENS when the batch has the tokens column as integer lists, else TEXT when it has the text column as
    strings, else None. A shard with both columns is compared by its token windows (what the model trains on)."""
    tok, text = settings.tokens_column, settings.text_column
    if batch.has(tok) and is_integer_list(batch.type_of(tok)):
        return TOKENS
    if batch.has(text) and is_text(batch.type_of(text)):
        return TEXT
    return None


def batch_windows(batch: Batch, settings) -> Windows:
    """The windows of a batch (computed once per batch for both rules of this module)."""
    return batch.memo(("windows", settings.tokens_column, settings.text_column), lambda: _windows(batch, settings))


def _windows(batch: Batch, settings) -> Windows:
    domain = window_domain(batch, settings)
    if domain == TOKENS:
        flat = batch.flat(settings.tokens_column)
        values, offsets = flat.values, flat.offsets
        lengths = flat.lengths
    else:
        # The UTF-8 bytes of the documents, straight from the Arrow string buffer (as stored, not repaired).
        array = batch.column(settings.text_column)
        width = np.int64 if pat.is_large_string(array.type) else np.int32
        buffers = array.buffers()
        if len(array) == 0 or buffers[1] is None:
            return Windows(TEXT, np.zeros(0, np.int64), np.zeros(0, np.uint32), np.zeros(0, np.uint32),
                           np.zeros((0, 2), np.uint64), np.zeros(0, np.uint8))
        offsets = np.frombuffer(buffers[1], dtype=width)[array.offset:array.offset + len(array) + 1].astype(np.int64)
        values = np.frombuffer(buffers[2], dtype=np.uint8) if buffers[2] is not None else np.zeros(0, np.uint8)
        lengths = np.diff(offsets)
        if array.null_count:
            lengths[~pc.is_valid(array).to_numpy(zero_copy_only=False)] = 0  # Arrow allows bytes under a null
    local = np.flatnonzero(lengths > 0)
    content = content_hashes(values, offsets[local], offsets[local + 1], domain)
    return Windows(domain, local, narrow(batch.rows[local]), narrow(lengths[local]), content,
                   np.full(len(local), domain, dtype=np.uint8))


def narrow(values: np.ndarray) -> np.ndarray:
    """Non-negative integers as uint32 when they all fit, else as they are."""
    if len(values) == 0 or int(values.max()) <= 0xFFFF_FFFF:
        return values.astype(np.uint32)
    return values
