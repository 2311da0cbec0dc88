"""Records out of columnar files: Parquet, and folders written by HF ``datasets`` ``save_to_disk``.

Both are read batch by batch with pyarrow, so memory follows the batch size.
Record N is the N-th row (1-based, counted across all data files of a saved
dataset), and ``line`` is the same row number.

Decisions:

* The text column must hold strings (``string``, ``large_string``, or a
  dictionary of strings). A column of another type is not cast: each row is
  rejected ``text_not_string`` (turning numbers or bytes into training text
  silently would be worse than saying so). A null text is ``text_not_string``.
* A missing text column rejects each row ``missing_text_field``.
* A string value that is not valid UTF-8 (Arrow does not always check)
  rejects its row ``undecodable``.
* Id and group values of any type become strings as in
  :func:`corpusprep.formats.label`.
* A saved dataset's data files are the ``_data_files`` that its ``state.json``
  lists, read in that order with the Arrow IPC stream reader; other files in
  the folder (caches, metadata) are not read. Each listed name must be a plain
  file name in the folder.
"""

from __future__ import annotations

import contextlib
import json
import os
from collections.abc import Iterable, Iterator
from typing import IO, Any

import pyarrow as pa
import pyarrow.parquet as pq
import xxhash

from corpusprep.formats import FieldNames, Record, finish_record, label

__all__ = [
    "TableError",
    "hash_data_files",
    "parquet_records",
    "saved_dataset_files",
    "saved_dataset_records",
]

_CHUNK = 1 << 20
_BAD_UTF8 = object()


class TableError(Exception):
    """A columnar file cannot be read (further); the message is a ledger reason with detail."""


def _is_text_type(data_type: pa.DataType) -> bool:
    if pa.types.is_dictionary(data_type):
        return _is_text_type(data_type.value_type)
    return bool(pa.types.is_string(data_type) or pa.types.is_large_string(data_type))


def _values(column: pa.Array[Any] | pa.ChunkedArray[Any]) -> list[Any]:
    """Python values of a column; invalid UTF-8 strings become a marker instead of raising."""
    try:
        return list(column.to_pylist())
    except UnicodeDecodeError:
        values = []
        for index in range(len(column)):
            try:
                values.append(column[index].as_py())
            except UnicodeDecodeError:
                values.append(_BAD_UTF8)
        return values


def _table_records(
    batches: Iterable[pa.RecordBatch], schema: pa.Schema, names: FieldNames, *, first_row: int
) -> Iterator[Record]:
    has_text = names.text in schema.names
    text_type = schema.field(names.text).type if has_text else None
    text_ok = text_type is not None and _is_text_type(text_type)
    row = first_row
    for batch in batches:
        count = batch.num_rows
        ids = _optional_column(batch, names.id, count)
        groups = _optional_column(batch, names.group, count)
        texts: list[Any] = _values(batch.column(names.text)) if text_ok else [None] * count
        for index in range(count):
            given_id, group = ids[index], groups[index]
            if _BAD_UTF8 in (given_id, group, texts[index]):
                yield Record(row, row, reason="undecodable: a string value is not valid UTF-8")
            elif not has_text:
                yield Record(row, row, label(given_id), label(group), reason="missing_text_field")
            elif not text_ok or not isinstance(texts[index], str):
                found = "null" if text_ok else f"a column of type {text_type}"
                yield Record(
                    row, row, label(given_id), label(group), reason=f"text_not_string: found {found}"
                )
            else:
                text: str = texts[index]
                yield finish_record(
                    number=row, line=row, text=text, given_id=label(given_id), group=label(group), names=names
                )
            row += 1


def _optional_column(batch: pa.RecordBatch, name: str, count: int) -> list[Any]:
    if name and name in batch.schema.names:
        return _values(batch.column(name))
    return [None] * count


def parquet_records(source: str | IO[bytes], names: FieldNames, *, batch_rows: int) -> Iterator[Record]:
    """Every row of a Parquet file as a record; raises :class:`TableError` when pyarrow cannot read it."""
    try:
        parquet = pq.ParquetFile(source)
    except (pa.ArrowException, OSError, ValueError) as error:
        raise TableError(f"unreadable: not a readable Parquet file ({error})") from None
    with contextlib.closing(parquet):
        schema = parquet.schema_arrow
        wanted = [name for name in (names.text, names.id, names.group) if name and name in schema.names]
        batches = parquet.iter_batches(batch_size=batch_rows, columns=list(dict.fromkeys(wanted)))
        yield from _guarded(_table_records(batches, schema, names, first_row=1), "Parquet")


def _guarded(records: Iterator[Record], what: str) -> Iterator[Record]:
    done = 0
    try:
        for record in records:
            yield record
            done += 1
    except (pa.ArrowException, OSError, ValueError) as error:
        raise TableError(f"unreadable: {what} read failed after {done} rows ({error})") from None


def saved_dataset_files(folder: str, root_real: str) -> list[str]:
    """The data files of a saved dataset folder, in the order its ``state.json`` lists them.

    Raises :class:`TableError` with a ledger reason when the listing is unusable.
    """
    state_path = os.path.join(folder, "state.json")
    try:
        with open(state_path, encoding="utf-8") as handle:
            state = json.load(handle)
    except OSError as error:
        raise TableError(f"unreadable: state.json ({error.strerror or error})") from None
    except (ValueError, RecursionError) as error:
        raise TableError(f"invalid_json: state.json: {error}") from None
    listed = state.get("_data_files") if isinstance(state, dict) else None
    if not isinstance(listed, list) or not all(
        isinstance(item, dict) and isinstance(item.get("filename"), str) for item in listed
    ):
        raise TableError("unsupported_format: state.json has no _data_files list of file name objects")
    paths = []
    for item in listed:
        name = item["filename"]
        if not name or "/" in name or "\\" in name or name in (".", ".."):
            raise TableError(f"unsupported_format: state.json lists {name!r}, not a file name in the folder")
        path = os.path.join(folder, name)
        real = os.path.realpath(path)
        if not real.startswith(root_real.rstrip(os.sep) + os.sep):
            raise TableError(f"link_outside_input: data file {name!r} leads outside the input folder")
        paths.append(real)
    return paths


def hash_data_files(paths: list[str], limit: int) -> tuple[int, str]:
    """Total size and XXH3-128 of the concatenated bytes of ``paths``.

    Raises :class:`TableError` when a file is larger than ``limit`` or cannot be read.
    """
    hasher = xxhash.xxh3_128()
    total = 0
    for path in paths:
        name = os.path.basename(path)
        try:
            size = os.stat(path).st_size
            if size > limit:
                raise TableError(f"too_large: data file {name!r} has {size} bytes, the limit is {limit}")
            with open(path, "rb") as handle:
                while chunk := handle.read(_CHUNK):
                    hasher.update(chunk)
                    total += len(chunk)
        except OSError as error:
            raise TableError(f"unreadable: data file {name!r} ({error.strerror or error})") from None
    return total, hasher.hexdigest()


def saved_dataset_records(paths: list[str], names: FieldNames) -> Iterator[Record]:
    """Every row of the data files, in order; raises :class:`TableError` when one cannot be read."""
    row = 1
    for path in paths:
        name = os.path.basename(path)
        records = _arrow_stream_records(path, names, first_row=row)
        for record in _guarded(records, f"Arrow file {name!r}"):
            yield record
            row += 1


def _arrow_stream_records(path: str, names: FieldNames, *, first_row: int) -> Iterator[Record]:
    with pa.memory_map(path, "r") as source, pa.ipc.open_stream(source) as reader:
        yield from _table_records(reader, reader.schema, names, first_row=first_row)
