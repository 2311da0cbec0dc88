"""The document batch that flows between stages, and the fates a record can have.

Every record the reader meets becomes one row, and rows are never dropped
between stages: a stage that removes a document sets its ``status`` and
``reason`` and clears its ``text``. So the ledger has one row per input
record and the sum ``read = kept + removed + rejected`` can be checked.

Columns of a document batch (:data:`DOC_SCHEMA`):

``record_id``
    unique, stable name of the record: ``SOURCE`` for a one-document file,
    ``SOURCE:N`` for the N-th record (1-based) of a multi-record file, and
    ``SOURCE:-`` for a file rejected as a whole.
``source``
    path of the file relative to the input folder, ``/``-separated.
``line``
    1-based line where the record starts (text formats), or 1-based row
    number (Parquet, saved datasets); null when not applicable.
``given_id``
    the value of the definition's id field, if any.
``group``
    the value of the definition's group field, if any (documents of one group
    always share a split).
``text``
    the document text; null once the record is rejected or removed.
``status``
    one of :data:`STATUSES`.
``reason``
    null for kept documents; otherwise a short machine-readable reason, e.g.
    ``invalid_json``; a colon may add detail: ``invalid_json: Expecting value``.
"""

from __future__ import annotations

from typing import Any

import pyarrow as pa

__all__ = [
    "DOC_SCHEMA",
    "EMPTY",
    "EXACT_COPY",
    "KEPT",
    "NEAR_COPY",
    "REASONS",
    "REJECTED",
    "REMOVED_STATUSES",
    "STATUSES",
    "empty_batch",
]

KEPT = "kept"
REJECTED = "rejected"
EMPTY = "empty"
EXACT_COPY = "exact_copy"
NEAR_COPY = "near_copy"

STATUSES = (KEPT, REJECTED, EMPTY, EXACT_COPY, NEAR_COPY)
REMOVED_STATUSES = (EMPTY, EXACT_COPY, NEAR_COPY)

# Reasons, the first word of ``reason`` (detail may follow after ": ").
# Reader rejections (status "rejected"):
#   binary_file          NUL bytes in a file not marked as UTF-16/32 by its BOM
#   undecodable          neither UTF-8 nor the fallback encoding decodes the bytes
#   unreadable           the file could not be read: refused by the operating system, not a regular
#                        file, a damaged gzip stream, not valid Parquet/Arrow, reading stopped mid-file
#   too_large            the file or decompressed stream exceeds the definition's limit
#   unsupported_format   the file matched the include globs but no reader knows its format
#   link_outside_input   a symbolic link that leads outside the input folder (not followed)
#   link_loop            a symbolic link cycle
#   invalid_json         a JSON line or JSON file that does not parse
#   not_an_object        a JSON record that is not an object
#   missing_text_field   the record has no text field (or column)
#   text_not_string      the text field is not a string
#   csv_column_count     a CSV row whose number of fields differs from the header's
# Removals:
#   empty_after_clean    status "empty": nothing but whitespace left after cleaning
#   exact_copy           status "exact_copy": same exact key as an earlier document
#   near_copy            status "near_copy": in a near-duplicate cluster, not its representative
REASONS = (
    "binary_file",
    "undecodable",
    "unreadable",
    "too_large",
    "unsupported_format",
    "link_outside_input",
    "link_loop",
    "invalid_json",
    "not_an_object",
    "missing_text_field",
    "text_not_string",
    "csv_column_count",
    "empty_after_clean",
    "exact_copy",
    "near_copy",
)

_DOC_SCHEMA_FIELDS: list[pa.Field[Any]] = [
    pa.field("record_id", pa.string(), nullable=False),
    pa.field("source", pa.string(), nullable=False),
    pa.field("line", pa.int64()),
    pa.field("given_id", pa.string()),
    pa.field("group", pa.string()),
    pa.field("text", pa.large_string()),
    pa.field("status", pa.string(), nullable=False),
    pa.field("reason", pa.string()),
]
DOC_SCHEMA = pa.schema(_DOC_SCHEMA_FIELDS)


def empty_batch() -> pa.RecordBatch:
    """A document batch with no rows."""
    return pa.RecordBatch.from_pylist([], schema=DOC_SCHEMA)
