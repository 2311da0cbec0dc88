"""Records out of decoded text: plain text, JSON Lines, JSON and CSV.

Each reader takes an already decoded text stream (see :mod:`corpusprep.decode`)
and yields one :class:`Record` for every record it meets, kept or rejected,
plus a :class:`BlankLine` for every blank line that is not a record.

Decisions, in one place:

* **Plain text** (``.txt``, ``.md``, ``.rst``): the whole file is one document,
  text exactly as decoded (no newline translation; cleaning comes later).
* **JSON Lines**: lines end at ``\\n`` (a ``\\r`` before it is JSON whitespace).
  A line holding only spaces, tabs and ``\\r`` is blank: it is not a record and
  gives no ledger row, but is counted (``InputFile.blank_lines``). Record N is
  the N-th non-blank line; ``line`` is its physical line number.
* **JSON**: a top-level array gives one record per element, anything else one
  record (number 1); ``line`` is where the element starts. If the file does
  not parse as a whole, the caller rejects the file as a whole.
* **CSV**: the first non-blank row is the header; completely empty lines are
  blank (not records); ``line`` is the line where the row starts, also when a
  quoted field spans lines.
* JSON follows RFC 8259 strictly: ``NaN``/``Infinity`` are invalid. A string
  holding an unpaired surrogate escape (``"\\ud800"``) cannot be stored as
  UTF-8, so its record is rejected as ``undecodable``.
* Id and group values become strings (see :func:`label`); an empty string is
  treated as absent.
"""

from __future__ import annotations

import csv
import json
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import IO, Any

__all__ = [
    "BlankLine",
    "FieldNames",
    "JsonFileError",
    "Record",
    "csv_records",
    "json_records",
    "jsonl_records",
    "label",
    "record_from_object",
    "text_document",
]

_SURROGATE = re.compile("[\ud800-\udfff]")
_JSON_SPACE = re.compile(r"[ \t\n\r]*")
_BLANK_CHARS = " \t\r\n"


@dataclass(frozen=True, slots=True)
class FieldNames:
    """Which fields hold the text, the id and the group ("" = not configured)."""

    text: str
    id: str = ""
    group: str = ""


@dataclass(frozen=True, slots=True)
class Record:
    """One record met in a file."""

    number: int | None
    """N of ``SOURCE:N`` (1-based); None for a one-document file"""
    line: int | None
    """1-based line (or row) where the record starts; None for whole-file documents"""
    given_id: str | None = None
    group: str | None = None
    text: str | None = None
    reason: str | None = None
    """None when kept, else a ledger reason with optional detail"""


@dataclass(frozen=True, slots=True)
class BlankLine:
    """A blank line: counted, but not a record."""

    line: int


class LongNumber:
    """A JSON integer too long for Python's ``int`` conversion limit, kept as its digits.

    RFC 8259 §6 puts no bound on the length of a number, so such a record is
    valid JSON; it is not a string, and as an id it keeps its digits.
    """

    __slots__ = ("digits",)

    def __init__(self, digits: str) -> None:
        self.digits = digits

    def __str__(self) -> str:
        return self.digits


def _parse_int(digits: str) -> int | LongNumber:
    try:
        return int(digits)
    except ValueError:
        return LongNumber(digits)


class JsonFileError(ValueError):
    """A JSON file does not parse as a whole; the message says where."""


def label(value: Any) -> str | None:
    """An id or group value as a string, or None when absent.

    Strings pass unchanged (the empty string counts as absent), numbers go
    through ``str()``, booleans and nested values are written as compact JSON.

    >>> [label(v) for v in (None, "", "a", 7, 2.5, True, [1, "x"])]
    [None, None, 'a', '7', '2.5', 'true', '[1,"x"]']
    """
    if value is None:
        return None
    if isinstance(value, str):
        return value or None
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float | LongNumber):
        return str(value)
    return json.dumps(value, ensure_ascii=False, sort_keys=True, separators=(",", ":"), default=str)


def _surrogate_field(values: Mapping[str, str | None]) -> str:
    for name, value in values.items():
        if value is not None and _SURROGATE.search(value):
            return name
    return ""


def finish_record(
    *,
    number: int | None,
    line: int | None,
    text: str,
    given_id: str | None,
    group: str | None,
    names: FieldNames,
) -> Record:
    """A kept record, or an ``undecodable`` one if a value cannot be written as UTF-8."""
    bad = _surrogate_field({names.text: text, names.id: given_id, names.group: group})
    if bad:
        reason = f"undecodable: field {bad!r} holds an unpaired surrogate"
        return Record(number, line, given_id=None, group=None, text=None, reason=reason)
    return Record(number, line, given_id=given_id, group=group, text=text, reason=None)


def record_from_object(value: Any, *, number: int, line: int, names: FieldNames) -> Record:
    """The record a parsed JSON value gives.

    >>> record_from_object({"text": "hi", "id": 3}, number=1, line=1, names=FieldNames("text", "id"))
    Record(number=1, line=1, given_id='3', group=None, text='hi', reason=None)
    >>> record_from_object([1], number=2, line=5, names=FieldNames("text")).reason
    'not_an_object: found an array'

    An id or group nested too deeply to write back as JSON makes the record
    ``invalid_json: nesting too deep``, as a slightly deeper value would from the parser.
    """
    if not isinstance(value, dict):
        return Record(number, line, reason=f"not_an_object: found {_json_kind(value)}")
    try:
        given_id = label(value.get(names.id)) if names.id else None
        group = label(value.get(names.group)) if names.group else None
    except RecursionError:
        # The parser accepted the value a few stack frames higher up than json.dumps needs.
        return Record(number, line, reason="invalid_json: nesting too deep")
    if names.text not in value:
        return Record(number, line, given_id=given_id, group=group, reason="missing_text_field")
    text = value[names.text]
    if not isinstance(text, str):
        reason = f"text_not_string: found {_json_kind(text)}"
        return Record(number, line, given_id=given_id, group=group, reason=reason)
    return finish_record(number=number, line=line, text=text, given_id=given_id, group=group, names=names)


def _json_kind(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int | float | LongNumber):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "an array"
    return "an object"


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not valid JSON (RFC 8259)")


def _decoder() -> json.JSONDecoder:
    return json.JSONDecoder(parse_constant=_reject_constant, parse_int=_parse_int)


def _json_error(error: Exception, *, with_line: bool) -> str:
    if isinstance(error, RecursionError):
        return "nesting too deep"
    if isinstance(error, json.JSONDecodeError):
        where = f"line {error.lineno}, column {error.colno}" if with_line else f"column {error.colno}"
        # Python's json ends one message with "at" already: "Invalid control character at".
        return f"{error.msg.removesuffix(' at')} at {where}"
    return str(error)


def text_document(stream: IO[str], names: FieldNames) -> Iterator[Record]:
    """The whole stream as one document."""
    yield finish_record(number=None, line=None, text=stream.read(), given_id=None, group=None, names=names)


def jsonl_records(stream: IO[str], names: FieldNames) -> Iterator[Record | BlankLine]:
    """One record per non-blank line; ``stream`` must be opened with ``newline="\\n"``."""
    decoder = _decoder()
    number = 0
    for line_number, line in enumerate(stream, start=1):
        if not line.strip(_BLANK_CHARS):
            yield BlankLine(line_number)
            continue
        number += 1
        try:
            value = decoder.decode(line)
        except (ValueError, RecursionError) as error:
            yield Record(number, line_number, reason=f"invalid_json: {_json_error(error, with_line=False)}")
            continue
        yield record_from_object(value, number=number, line=line_number, names=names)


def json_records(stream: IO[str], names: FieldNames) -> list[Record]:
    """The records of a JSON file: one per element of a top-level array, else one.

    The whole file is parsed before any record is returned; a file that does
    not parse raises :class:`JsonFileError`.

    >>> import io
    >>> stream = io.StringIO('[\\n{"text": "a"},\\n {"text": "b"}]')
    >>> [record.line for record in json_records(stream, FieldNames("text"))]
    [2, 3]
    """
    document = stream.read()
    decoder = _decoder()
    try:
        return _parse_json_document(document, decoder, names)
    except (ValueError, RecursionError) as error:
        raise JsonFileError(_json_error(error, with_line=True)) from None


def _parse_json_document(document: str, decoder: json.JSONDecoder, names: FieldNames) -> list[Record]:
    position = _skip_space(document, 0)
    if position >= len(document):
        raise json.JSONDecodeError("Expecting value", document, position)
    if document[position] != "[":
        value, end = decoder.raw_decode(document, position)
        _expect_end(document, end)
        line = document.count("\n", 0, position) + 1
        return [record_from_object(value, number=1, line=line, names=names)]
    records: list[Record] = []
    line = document.count("\n", 0, position) + 1
    counted = position
    position = _skip_space(document, position + 1)
    if document.startswith("]", position):
        _expect_end(document, position + 1)
        return records
    while True:
        line += document.count("\n", counted, position)
        counted = position
        value, end = decoder.raw_decode(document, position)
        records.append(record_from_object(value, number=len(records) + 1, line=line, names=names))
        position = _skip_space(document, end)
        if document.startswith(",", position):
            position = _skip_space(document, position + 1)
            continue
        if document.startswith("]", position):
            _expect_end(document, position + 1)
            return records
        raise json.JSONDecodeError("Expecting ',' delimiter", document, position)


def _skip_space(document: str, position: int) -> int:
    match = _JSON_SPACE.match(document, position)
    return match.end() if match else position


def _expect_end(document: str, position: int) -> None:
    position = _skip_space(document, position)
    if position != len(document):
        raise json.JSONDecodeError("Extra data", document, position)


def csv_records(stream: IO[str], names: FieldNames, *, delimiter: str) -> Iterator[Record | BlankLine]:
    """One record per CSV row after the header; ``stream`` must be opened with ``newline=""``.

    The caller raises ``csv.field_size_limit`` to the file size limit first,
    so large fields are read whole.
    """
    reader = csv.reader(stream, delimiter=delimiter, strict=False)
    header: list[str] | None = None
    columns: dict[str, int] = {}
    number = 0
    start = 1
    for row in reader:
        if not row:
            yield BlankLine(start)
            start = reader.line_num + 1
            continue
        if header is None:
            header = row
            for index, name in enumerate(row):
                columns.setdefault(name, index)
            start = reader.line_num + 1
            continue
        number += 1
        yield _csv_record(row, header, columns, number=number, line=start, names=names)
        start = reader.line_num + 1


def _csv_record(
    row: list[str], header: list[str], columns: dict[str, int], *, number: int, line: int, names: FieldNames
) -> Record:
    if len(row) != len(header):
        reason = f"csv_column_count: expected {len(header)} fields, found {len(row)}"
        return Record(number, line, reason=reason)
    given_id = label(row[columns[names.id]]) if names.id and names.id in columns else None
    group = label(row[columns[names.group]]) if names.group and names.group in columns else None
    if names.text not in columns:
        return Record(number, line, given_id=given_id, group=group, reason="missing_text_field")
    text = row[columns[names.text]]
    return finish_record(number=number, line=line, text=text, given_id=given_id, group=group, names=names)
