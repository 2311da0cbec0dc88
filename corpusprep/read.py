"""The read stage: a raw input folder in, document batches and a list of input files out.

:func:`read_folder` walks the folder (see :mod:`corpusprep.walk` for the path,
glob and link rules), decides each file's encoding (:mod:`corpusprep.decode`),
and turns every record it meets into one row of a
:data:`corpusprep.schema.DOC_SCHEMA` batch, kept or rejected
(:mod:`corpusprep.formats`, :mod:`corpusprep.columnar`). Nothing is dropped:
the only records without a row are blank lines of JSON Lines and CSV files,
which are not records and are counted in :attr:`InputFile.blank_lines`.

Order: files in sorted order of their shown path (a plain string sort, the
same on every machine), rows in file order, batches of at most ``batch_rows``
rows that may hold rows of several files. Each file's :class:`InputFile` is
yielded once, **after** the batch holding its last row (right away for a file
without rows), so a consumer that has an ``InputFile`` has all its rows.

Formats by suffix (letter case ignored; a further ``.gz`` means gzip):
``.txt``, ``.text``, ``.md``, ``.markdown``, ``.rst`` are plain text (one
document per file); ``.jsonl``, ``.ndjson`` JSON Lines; ``.json`` JSON;
``.csv`` CSV; ``.parquet`` Parquet; a folder with ``state.json`` and
``dataset_info.json`` is a dataset written by HF ``datasets`` ``save_to_disk``.
A file that matches ``include`` with another suffix gives one
``unsupported_format`` row.
"""

from __future__ import annotations

import csv
import os
import sys
import tempfile
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import pyarrow as pa

from corpusprep.columnar import (
    TableError,
    hash_data_files,
    parquet_records,
    saved_dataset_files,
    saved_dataset_records,
)
from corpusprep.config import setting
from corpusprep.decode import StreamTooLarge, check_fallback_encoding, examine_file, open_binary, open_text
from corpusprep.errors import DefinitionError, InputError
from corpusprep.formats import (
    BlankLine,
    FieldNames,
    JsonFileError,
    Record,
    csv_records,
    json_records,
    jsonl_records,
    text_document,
)
from corpusprep.schema import DOC_SCHEMA, KEPT, REJECTED
from corpusprep.walk import Entry, glob_to_regex, list_entries

__all__ = [
    "FORMAT_BY_SUFFIX",
    "InputFile",
    "ReadConfig",
    "format_of",
    "input_entries",
    "read_entries",
    "read_folder",
]

FORMAT_BY_SUFFIX = {
    ".txt": "text",
    ".text": "text",
    ".md": "text",
    ".markdown": "text",
    ".rst": "text",
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
    ".json": "json",
    ".csv": "csv",
    ".parquet": "parquet",
}

_TEXT_FORMATS = ("text", "jsonl", "json", "csv")
_NEWLINE = {"text": "", "json": "", "csv": "", "jsonl": "\n"}
_CSV_FIELD_CEILING = 2**31 - 1  # fits a C long on every platform

_DEFAULT_INCLUDE = (
    "**/*.txt",
    "**/*.txt.gz",
    "**/*.md",
    "**/*.md.gz",
    "**/*.rst",
    "**/*.rst.gz",
    "**/*.jsonl",
    "**/*.jsonl.gz",
    "**/*.json",
    "**/*.json.gz",
    "**/*.csv",
    "**/*.csv.gz",
    "**/*.parquet",
    "**/*.parquet.gz",
    "**/",
)


@dataclass(frozen=True, slots=True, kw_only=True)
class ReadConfig:
    """Settings of the read stage."""

    include: tuple[str, ...] = setting(
        _DEFAULT_INCLUDE,
        "Glob patterns of the inputs, relative to the input folder: '*' stays within one folder, "
        "'**' spans any number of folders (none included), a pattern ending in '/' matches dataset "
        "folders written by HF datasets' save_to_disk. Matching is case-sensitive.",
    )
    exclude: tuple[str, ...] = setting(
        (), "Glob patterns (same rules as include) of paths to leave out even when include matches them."
    )
    fallback_encoding: str = setting(
        "cp1252",
        "Encoding tried when a file without a UTF-16/32 byte order mark is not valid UTF-8; "
        "must be ASCII-compatible; '' means none (such a file is rejected as undecodable).",
    )
    text_field: str = setting("text", "JSON key, CSV column or Parquet/dataset column holding the text.")
    id_field: str = setting("", "Key or column holding a record's own id, kept as given_id; '' for none.")
    group_field: str = setting(
        "", "Key or column naming a record's group (a group never straddles splits); '' for none."
    )
    csv_delimiter: str = setting(",", "The one character separating CSV fields.")
    max_file_bytes: int = setting(
        4 * 1024**3,
        "Largest accepted file, in bytes (4 GiB); for gzip files the decompressed size counts. "
        "Larger files are rejected as too_large. Plain text and JSON files are held in memory whole.",
        minimum=1,
    )
    max_rejected_fraction: float = setting(
        0.05,
        "Largest fraction of input records that may be rejected before the run fails.",
        minimum=0.0,
        maximum=1.0,
    )

    def __post_init__(self) -> None:
        for key in ("include", "exclude"):
            for index, pattern in enumerate(getattr(self, key)):
                try:
                    glob_to_regex(pattern)
                except ValueError as error:
                    raise DefinitionError(f"read.{key}[{index}] = {pattern!r}: {error}") from None
        if self.fallback_encoding:
            try:
                check_fallback_encoding(self.fallback_encoding)
            except ValueError as error:
                raise DefinitionError(
                    f"read.fallback_encoding = {self.fallback_encoding!r}: {error}"
                ) from None
        if not self.text_field:
            raise DefinitionError("read.text_field = '': name the key or column that holds the text")
        if len(self.csv_delimiter) != 1 or self.csv_delimiter in '"\r\n':
            raise DefinitionError(
                f"read.csv_delimiter = {self.csv_delimiter!r}: "
                "must be one character other than a quote or a newline"
            )


@dataclass(frozen=True, slots=True)
class InputFile:
    """One input as the manifest lists it."""

    path: str
    """shown path relative to the input folder, '/'-separated"""
    size: int
    """bytes on disk (a saved dataset: its data files); 0 when never opened"""
    xxh3_128: str
    """XXH3-128 of the bytes on disk (a saved dataset: of its data files, concatenated in order);
    "" when not read"""
    format: str
    """"text", "jsonl", "json", "csv", "parquet", "saved_dataset", or "" when not determined"""
    encoding: str
    """codec that decoded a text format ("utf-8", "utf-8-sig", "utf-16", "utf-32" or the fallback);
    "" for binary formats and files rejected before decoding"""
    records: int
    """rows this input produced (kept + rejected)"""
    rejected: int
    """rows of this input with status "rejected\""""
    blank_lines: int = 0
    """blank lines met (JSON Lines, CSV): not records, so no rows"""


def format_of(source: str) -> tuple[str, bool]:
    """The format a file name announces ("" if unknown), and whether it is gzip-compressed.

    >>> format_of("a/b.JSONL.gz"), format_of("notes.md"), format_of("x.tar.gz")
    (('jsonl', True), ('text', False), ('', True))
    """
    name = source.rsplit("/", 1)[-1].lower()
    gzipped = name.endswith(".gz")
    if gzipped:
        name = name[:-3]
    dot = name.rfind(".")
    suffix = name[dot:] if dot > 0 else ""
    return FORMAT_BY_SUFFIX.get(suffix, ""), gzipped


_Row = tuple[str, str, int | None, str | None, str | None, str | None, str, str | None]


def _record_row(source: str, record: Record) -> _Row:
    record_id = source if record.number is None else f"{source}:{record.number}"
    if record.reason is None:
        return (record_id, source, record.line, record.given_id, record.group, record.text, KEPT, None)
    return (record_id, source, record.line, record.given_id, record.group, None, REJECTED, record.reason)


def _whole_file_row(source: str, reason: str) -> _Row:
    return (f"{source}:-", source, None, None, None, None, REJECTED, reason)


def _batch(rows: list[_Row]) -> pa.RecordBatch:
    columns = [
        pa.array([row[index] for row in rows], type=field.type) for index, field in enumerate(DOC_SCHEMA)
    ]
    return pa.RecordBatch.from_arrays(columns, schema=DOC_SCHEMA)


def input_entries(folder: Path, config: ReadConfig) -> tuple[str, list[Entry]]:
    """The real path of ``folder`` and every input under it, in sorted order of the shown path.

    Raises :class:`corpusprep.errors.InputError` when the folder is missing,
    not a folder, or cannot be listed.
    """
    root = os.fspath(folder)
    if not os.path.exists(root):
        raise InputError(f"{root}: the input folder does not exist")
    if not os.path.isdir(root):
        raise InputError(f"{root}: the input path is not a folder")
    try:
        entries = list_entries(root, config.include, config.exclude)
    except OSError as error:
        raise InputError(f"{root}: the input folder cannot be listed ({error.strerror or error})") from None
    return os.path.realpath(root), entries


def read_entries(
    entries: Sequence[Entry], config: ReadConfig, root_real: str, *, batch_rows: int = 1024
) -> Iterator[pa.RecordBatch | InputFile]:
    """Document batches and :class:`InputFile` entries for ``entries`` (from :func:`input_entries`).

    Every input's :class:`InputFile` comes after the batch that holds its last row.
    Reading consecutive runs of the entries one by one gives the same rows, in
    the same order, as reading them all at once (only the cut into batches
    differs), which is how the first pass spreads the reading over workers.
    """
    if batch_rows < 1:
        raise ValueError(f"batch_rows = {batch_rows}: must be at least 1")
    rows: list[_Row] = []
    waiting: list[InputFile] = []
    for entry in entries:
        for item in _read_entry(entry, config, root_real, batch_rows):
            if isinstance(item, InputFile):
                if rows:
                    waiting.append(item)
                else:
                    yield item
                continue
            rows.append(item)
            if len(rows) >= batch_rows:
                yield _batch(rows)
                rows = []
                yield from waiting
                waiting = []
    if rows:
        yield _batch(rows)
    yield from waiting


def read_folder(
    folder: Path, config: ReadConfig, *, batch_rows: int = 1024
) -> Iterator[pa.RecordBatch | InputFile]:
    """Document batches and :class:`InputFile` entries for every input under ``folder``.

    Raises :class:`corpusprep.errors.InputError` when the folder is missing,
    not a folder, or cannot be listed.
    """
    if batch_rows < 1:
        raise ValueError(f"batch_rows = {batch_rows}: must be at least 1")
    root_real, entries = input_entries(folder, config)
    yield from read_entries(entries, config, root_real, batch_rows=batch_rows)


def _read_entry(
    entry: Entry, config: ReadConfig, root_real: str, batch_rows: int
) -> Iterator[_Row | InputFile]:
    """The rows of one input, then its :class:`InputFile`."""
    names = FieldNames(config.text_field, config.id_field, config.group_field)
    if entry.kind == "rejected":
        yield _whole_file_row(entry.source, entry.reason)
        yield InputFile(entry.source, 0, "", format_of(entry.source)[0], "", 1, 1)
        return
    if entry.kind == "saved_dataset":
        yield from _read_saved_dataset(entry, names, config, root_real)
        return
    file_format, gzipped = format_of(entry.source)
    fallback = check_fallback_encoding(config.fallback_encoding) if config.fallback_encoding else ""
    if file_format:
        verdict = examine_file(
            entry.path,
            gzipped=gzipped,
            limit=config.max_file_bytes,
            fallback=fallback,
            text=file_format in _TEXT_FORMATS,
        )
        rejection = verdict.rejection
    else:  # only hashed, whatever its size: no reader will open it
        verdict = examine_file(entry.path, gzipped=False, limit=sys.maxsize, fallback="", text=False)
        rejection = verdict.rejection or "unsupported_format: no reader for this file name's suffix"
    if rejection:
        yield _whole_file_row(entry.source, rejection)
        yield InputFile(entry.source, verdict.size, verdict.xxh3_128, file_format, "", 1, 1)
        return
    records = rejected = blanks = 0
    try:
        for item in _parse(entry.path, file_format, gzipped, verdict.encoding, names, config, batch_rows):
            if isinstance(item, BlankLine):
                blanks += 1
                continue
            records += 1
            rejected += item.reason is not None
            yield _record_row(entry.source, item)
    except JsonFileError as error:
        records, rejected = records + 1, rejected + 1
        yield _whole_file_row(entry.source, f"invalid_json: {error}")
    except TableError as error:
        records, rejected = records + 1, rejected + 1
        yield _whole_file_row(entry.source, str(error))
    except (OSError, EOFError, UnicodeDecodeError, StreamTooLarge, csv.Error) as error:
        # The first pass accepted the file, so it changed since, or a parser gave up.
        records, rejected = records + 1, rejected + 1
        yield _whole_file_row(
            entry.source, f"unreadable: reading stopped after {records - 1} records ({error})"
        )
    yield InputFile(
        entry.source, verdict.size, verdict.xxh3_128, file_format, verdict.encoding, records, rejected, blanks
    )


def _parse(
    path: str,
    file_format: str,
    gzipped: bool,
    encoding: str,
    names: FieldNames,
    config: ReadConfig,
    batch_rows: int,
) -> Iterator[Record | BlankLine]:
    limit = config.max_file_bytes
    if file_format == "parquet":
        if not gzipped:
            yield from parquet_records(path, names, batch_rows=batch_rows)
            return
        with tempfile.TemporaryFile() as unpacked:
            with open_binary(path, gzipped=True, limit=limit) as stream:
                while chunk := stream.read(1 << 20):
                    unpacked.write(chunk)
            unpacked.seek(0)
            yield from parquet_records(unpacked, names, batch_rows=batch_rows)
        return
    with open_text(
        path, gzipped=gzipped, limit=limit, encoding=encoding, newline=_NEWLINE[file_format]
    ) as text:
        if file_format == "text":
            yield from text_document(text, names)
        elif file_format == "jsonl":
            yield from jsonl_records(text, names)
        elif file_format == "json":
            yield from json_records(text, names)
        else:
            # csv's field limit is process-wide; it is only ever raised, never lowered.
            wanted = min(limit, _CSV_FIELD_CEILING)
            if csv.field_size_limit() < wanted:
                csv.field_size_limit(wanted)
            yield from csv_records(text, names, delimiter=config.csv_delimiter)


def _read_saved_dataset(
    entry: Entry, names: FieldNames, config: ReadConfig, root_real: str
) -> Iterator[_Row | InputFile]:
    size, digest = 0, ""
    records = rejected = 0
    try:
        paths = saved_dataset_files(entry.path, root_real)
        size, digest = hash_data_files(paths, config.max_file_bytes)
        for record in saved_dataset_records(paths, names):
            records += 1
            rejected += record.reason is not None
            yield _record_row(entry.source, record)
    except TableError as error:
        records, rejected = records + 1, rejected + 1
        yield _whole_file_row(entry.source, str(error))
    yield InputFile(entry.source, size, digest, "saved_dataset", "", records, rejected)
