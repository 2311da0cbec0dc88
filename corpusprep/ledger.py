"""The document ledger: one Parquet row per input record, with its fate.

Columns (:data:`LEDGER_SCHEMA`): ``record_id``, ``source``, ``line``,
``given_id``, ``group``, ``status``, ``reason``, ``duplicate_of`` (record
id of the document this one copies, for exact and near copies),
``cluster`` (record id of the representative of its near-duplicate
cluster, when it is in one), ``similarity`` (estimated similarity of a near
copy to its representative), ``text_hash`` (XXH3-128 of the cleaned text,
32 hex characters), ``split`` and ``tokens`` (token count, before special
tokens) for kept documents.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from corpusprep.schema import KEPT

__all__ = ["LEDGER_FILE", "LEDGER_SCHEMA", "read_ledger", "write_ledger"]

LEDGER_FILE = "ledger.parquet"
#: Rows per Parquet row group: fixed, so the file's bytes depend on the rows alone, not on how
#: the run cut its work into batches (which differs with the staging of the inputs).
ROW_GROUP_ROWS = 1 << 16

_LEDGER_SCHEMA_FIELDS: list[pa.Field[Any]] = [
    pa.field("record_id", pa.string(), nullable=False),
    pa.field("source", pa.string(), nullable=False),
    pa.field("line", pa.int64()),
    pa.field("given_id", pa.string()),
    pa.field("group", pa.string()),
    pa.field("status", pa.string(), nullable=False),
    pa.field("reason", pa.string()),
    pa.field("duplicate_of", pa.string()),
    pa.field("cluster", pa.string()),
    pa.field("similarity", pa.float64()),
    pa.field("text_hash", pa.string()),
    pa.field("split", pa.string()),
    pa.field("tokens", pa.int64()),
]
LEDGER_SCHEMA = pa.schema(_LEDGER_SCHEMA_FIELDS)


def _record_ids(table: pa.Table, rows: np.ndarray) -> pa.ChunkedArray[Any]:
    """Record ids of ``rows`` (-1 gives null)."""
    valid = rows >= 0
    taken = table.column("record_id").take(np.where(valid, rows, 0))
    result: pa.ChunkedArray[Any] = pc.if_else(pa.array(valid), taken, pa.scalar(None, pa.string()))
    return result


def write_ledger(
    path: Path,
    documents: Path,
    *,
    status: Sequence[str],
    duplicate_of: np.ndarray,
    cluster_of: np.ndarray,
    similarity: np.ndarray,
    text_hashes: np.ndarray,
    split_of: Sequence[str | None],
    token_count: np.ndarray,
) -> None:
    """Write the ledger for the staged ``documents`` (an Arrow IPC file) and per-row results.

    The staged file is memory-mapped and read batch by batch; rows are written
    in row groups of :data:`ROW_GROUP_ROWS`, so memory stays bounded by one row
    group plus the per-row arrays.
    """
    temporary = path.with_name(f".{path.name}.tmp")
    with (
        pa.memory_map(str(documents)) as source,
        pq.ParquetWriter(temporary, LEDGER_SCHEMA, compression="zstd") as writer,
    ):
        reader = pa.ipc.open_file(source)
        table = reader.read_all()  # zero-copy view of the memory map, for record-id lookups
        pending: list[pa.Table] = []
        pending_rows = 0
        start = 0
        for index in range(reader.num_record_batches):
            batch = reader.get_batch(index)
            stop = start + batch.num_rows
            states = list(status[start:stop])
            kept = np.array([state == KEPT for state in states], dtype=bool)
            reasons = [
                reason if reason is not None or state == KEPT else state
                for reason, state in zip(batch.column("reason").to_pylist(), states, strict=True)
            ]
            hashes = [
                f"{hi:016x}{lo:016x}" if (hi or lo) else None for hi, lo in text_hashes[start:stop].tolist()
            ]
            tokens = token_count[start:stop]
            sims = similarity[start:stop]
            columns: dict[str, Any] = {
                "record_id": batch.column("record_id"),
                "source": batch.column("source"),
                "line": batch.column("line"),
                "given_id": batch.column("given_id"),
                "group": batch.column("group"),
                "status": pa.array(states, type=pa.string()),
                "reason": pa.array(reasons, type=pa.string()),
                "duplicate_of": _record_ids(table, duplicate_of[start:stop]),
                "cluster": _record_ids(table, cluster_of[start:stop]),
                "similarity": pa.array(sims, mask=np.isnan(sims), type=pa.float64()),
                "text_hash": pa.array(hashes, type=pa.string()),
                "split": pa.array(list(split_of[start:stop]), type=pa.string()),
                "tokens": pa.array(tokens, mask=~kept | (tokens < 0), type=pa.int64()),
            }
            pending.append(pa.Table.from_pydict(columns, schema=LEDGER_SCHEMA))
            pending_rows += batch.num_rows
            start = stop
            if pending_rows >= ROW_GROUP_ROWS:
                whole = pa.concat_tables(pending)
                cut = pending_rows - pending_rows % ROW_GROUP_ROWS
                writer.write_table(whole.slice(0, cut), row_group_size=ROW_GROUP_ROWS)
                pending, pending_rows = [whole.slice(cut)], pending_rows - cut
        if pending_rows:
            writer.write_table(pa.concat_tables(pending), row_group_size=ROW_GROUP_ROWS)
    temporary.replace(path)


def read_ledger(folder: Path) -> pa.Table:
    """Load ``folder/ledger.parquet``."""
    return pq.read_table(folder / LEDGER_FILE)
