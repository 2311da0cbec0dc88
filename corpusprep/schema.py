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

import pyarrow as pa

__all__ = [
    "DOC_SCHEMA",
    "STATUSES",
    "KEPT",
    "REJECTED",
    "EMPTY",
    "EXACT_COPY",
    "NEAR_COPY",
    "REMOVED_STATUSES",
    "empty_batch",
]

KEPT = "kept"
REJECTED = "rejected"
EMPTY = "empty"
EXACT_COPY = "exact_copy"
NEAR_COPY = "near_copy"

STATUSES = (KEPT, REJECTED, EMPTY, EXACT_COPY, NEAR_COPY)
REMOVED_STATUSES = (EMPTY, EXACT_COPY, NEAR_COPY)

DOC_SCHEMA = pa.schema(
    [
        pa.field("record_id", pa.string(), nullable=False),
        pa.field("source", pa.string(), nullable=False),
        pa.field("line", pa.int64()),
        pa.field("given_id", pa.string()),
        pa.field("group", pa.string()),
        pa.field("text", pa.large_string()),
        pa.field("status", pa.string(), nullable=False),
        pa.field("reason", pa.string()),
    ]
)


def empty_batch() -> pa.RecordBatch:
    """A document batch with no rows."""
    return pa.RecordBatch.from_pylist([], schema=DOC_SCHEMA)
