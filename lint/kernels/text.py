"""The text column of a batch as valid UTF-8, shared by every rule that reads document text."""
from __future__ import annotations

from dataclasses import dataclass, field

import pyarrow as pa
import pyarrow.types as pat
from corpuscle.io.batch import Batch, is_text


@dataclass
class DocumentText:
    """The text column of one batch, safe for Arrow's UTF-8 kernels.

    ``array`` is None when the column holds nothing but nulls (Arrow type ``null``). ``invalid`` lists the rows
    whose stored bytes were not UTF-8 as ``(batch-local row, byte offset in the value, character offset)`` of the
    first bad byte; those values are repaired in ``array``.
    """

    array: pa.Array | None
    rows: int
    invalid: list[tuple[int, int, int]] = field(default_factory=list)

    @property
    def nulls(self) -> int:
        return self.rows if self.array is None else self.array.null_count


def has_text(batch: Batch, settings) -> bool:
    """Whether the batch has the text column as strings, or as all-null values (Arrow type ``null``)."""
    name = settings.text_column
    return batch.has(name) and (is_text(batch.type_of(name)) or pat.is_null(batch.type_of(name)))


def document_text(batch: Batch, settings) -> DocumentText:
    """The batch's text column (see :class:`DocumentText`), computed once per batch for every rule that reads text."""
    return batch.memo(("document-text", settings.text_column), lambda: _document_text(batch, settings.text_column))


def _document_text(batch: Batch, name: str) -> DocumentText:
    array = batch.column(name)
    if pat.is_null(array.type):
        return DocumentText(None, len(array))
    if batch.shard.line_based:
        # The JSON Lines reader decodes every line (replacing invalid bytes and reporting them): valid already.
        return DocumentText(array, len(array))
    return _validated(array)


def _validated(array: pa.Array) -> DocumentText:
    """Arrow's full validation checks that every value is UTF-8; a batch that fails is repaired row by row."""
    try:
        array.validate(full=True)
        return DocumentText(array, len(array))
    except pa.ArrowInvalid:
        pass
    binary = pa.large_binary() if pat.is_large_string(array.type) else pa.binary()
    values, invalid = [], []
    for i, raw in enumerate(array.view(binary).to_pylist()):  # only a batch known to hold invalid bytes
        if raw is None:
            values.append(None)
            continue
        try:
            values.append(raw.decode("utf-8"))
        except UnicodeDecodeError as bad:
            values.append(raw.decode("utf-8", errors="replace"))
            invalid.append((i, bad.start, len(raw[:bad.start].decode("utf-8"))))
    return DocumentText(pa.array(values, type=array.type), len(array), invalid)
