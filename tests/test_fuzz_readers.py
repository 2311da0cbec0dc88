"""Property tests of the readers: any bytes, any table, never a traceback, counts as the references say.

Each format's reader is compared with the library that defines the format for Python:

- text formats: the encoding decision (``corpusprep.decode``'s policy) replayed with Python's
  ``codecs`` (strict UTF-8 per RFC 3629, the byte order marks of the Unicode Standard §23.8);
- JSON Lines and JSON: Python's ``json`` (RFC 8259; NaN/Infinity refused per §6, numbers of any
  length accepted per §6), one record per non-blank line / per top-level array element;
- CSV: Python's ``csv.reader`` (RFC 4180 framing; blank lines are not records, first row is the
  header);
- Parquet: pyarrow's own reader of the written table.

Cleaning is not repeated here: ``tests/test_clean.py`` already checks on any ``str`` (lone
surrogates included, ``st.characters(exclude_categories=())``) that ``clean_text`` does not raise,
is idempotent and returns UTF-8 (``test_default_fast_equals_slow_idempotent_and_utf8``,
``test_any_settings_fast_equals_slow_and_idempotent``, 1500 examples each).

Budgets are fixed (``max_examples``), examples derandomized, no example database.
"""

from __future__ import annotations

import codecs
import csv
import io
import json
import tempfile
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from corpusprep.read import InputFile, ReadConfig, read_folder
from corpusprep.schema import REASONS, STATUSES

FUZZ = settings(
    max_examples=200,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow],
)
# Unicode Standard §23.8 byte order marks, UTF-32 before UTF-16 (Python's utf-32 codec order).
_WIDE_MARKS = (codecs.BOM_UTF32_LE, codecs.BOM_UTF32_BE, codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)
_BLANK = " \t\r"


def _read(
    name: str, data: bytes, config: ReadConfig, *, batch_rows: int = 3
) -> tuple[list[dict[str, Any]], InputFile]:
    with tempfile.TemporaryDirectory() as folder:
        (Path(folder) / name).write_bytes(data)
        rows: list[dict[str, Any]] = []
        files: list[InputFile] = []
        for item in read_folder(Path(folder), config, batch_rows=batch_rows):
            if isinstance(item, InputFile):
                files.append(item)
            else:
                rows.extend(item.to_pylist())
    assert len(files) == 1
    return rows, files[0]


def _check_rows(rows: list[dict[str, Any]], info: InputFile, name: str) -> None:
    for row in rows:  # shown by pytest --hypothesis-show-statistics: which outcomes were reached
        event(f"{name}: {row['status'] if row['status'] != 'rejected' else row['reason'].split(':')[0]}")
    assert info.records == len(rows)
    assert info.rejected == sum(row["status"] == "rejected" for row in rows)
    assert len({row["record_id"] for row in rows}) == len(rows)
    for row in rows:
        assert row["source"] == name
        assert row["status"] in STATUSES
        assert (row["reason"] is None) == (row["status"] == "kept")
        assert (row["text"] is None) == (row["status"] != "kept")
        if row["reason"] is not None:
            assert row["reason"].split(":")[0] in REASONS


def _reference_text(data: bytes, fallback: str) -> tuple[str, str] | str:
    """(codec, text) as the documented policy decides with Python's codecs, or the rejection reason."""
    for mark in _WIDE_MARKS:
        if data.startswith(mark):
            codec = "utf-32" if len(mark) == 4 else "utf-16"
            try:
                return codec, data.decode(codec)
            except UnicodeDecodeError:
                return "undecodable"
    if b"\x00" in data:
        return "binary_file"
    try:
        return "utf-8-sig", data.decode("utf-8-sig")  # strict UTF-8, RFC 3629; mark stripped
    except UnicodeDecodeError:
        pass
    if fallback:
        try:
            return fallback, data.decode(fallback)
        except UnicodeDecodeError:
            pass
    return "undecodable"


def _decoded_or_rejected(
    rows: list[dict[str, Any]], info: InputFile, data: bytes, fallback: str, name: str
) -> str | None:
    """The text the reader worked on, or None after checking the whole-file rejection."""
    expected = _reference_text(data, fallback)
    if isinstance(expected, str):
        assert [(row["record_id"], row["reason"].split(":")[0]) for row in rows] == [(f"{name}:-", expected)]
        return None
    codec, text = expected
    # the fallback is recorded under its canonical codecs.lookup name (ReadConfig's documentation)
    shown = "utf-8" if codec == "utf-8-sig" and not data.startswith(codecs.BOM_UTF8) else codec
    assert info.encoding == (shown if shown.startswith("utf") else codecs.lookup(shown).name)
    return text


# Bytes that hit the interesting paths more often than uniform bytes do: JSON-ish and CSV-ish
# pieces, line ends, quotes, escapes, marks, invalid UTF-8, NUL, and whitespace that JSON does not
# count as whitespace (form feed, vertical tab, NEL, LINE SEPARATOR).
_PIECES = st.sampled_from(
    [
        b"{",
        b"}",
        b"[",
        b"]",
        b",",
        b":",
        b'"',
        b'"text"',
        b'"id"',
        b'{"text": "a"}',
        b'{"text": 1}',
        b'"\\ud800"',
        b'"\\u00e9"',
        b"NaN",
        b"1e999",
        b"9" * 5000,
        b"\n",
        b"\r\n",
        b"\r",
        b" ",
        b"\t",
        b"text,id",
        b"\xef\xbb\xbf",
        b"\xff\xfe",
        b"\xfe\xff",
        b"\xc3\xa9",
        b"\xe9",
        b"\x81",
        b"\xed\xa0\x80",
        b"\x00",
        b"\x0c",
        b"\x0b",
        b"\x1c",
        b"\xc2\x85",
        b"\xe2\x80\xa8",
        b"word",
    ]
)
_BYTES = st.one_of(st.binary(max_size=300), st.lists(_PIECES, max_size=40).map(b"".join))

# Well-formed records too, so that kept rows are common: JSON values written by json.dumps
# (surrogates included; ensure_ascii escapes them), some lines cut or left blank.
_JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=8),
    lambda children: (
        st.lists(children, max_size=3) | st.dictionaries(st.text(max_size=4), children, max_size=3)
    ),
    max_leaves=6,
)
_TEXTS = st.text(max_size=12) | st.text(st.characters(exclude_categories=()), max_size=4)
_RECORDS = st.one_of(
    st.fixed_dictionaries({"text": _TEXTS}, optional={"id": _JSON_VALUES}),
    st.fixed_dictionaries({"text": _JSON_VALUES}),
    _JSON_VALUES,
)


@st.composite
def _json_lines(draw: st.DrawFn) -> bytes:
    lines = []
    for value in draw(st.lists(_RECORDS, max_size=8)):
        line = json.dumps(value)  # NaN/Infinity written as Python's json writes them: not RFC 8259
        if draw(st.integers(0, 9)) == 0:
            line = line[: len(line) // 2]
        lines.append(line + draw(st.sampled_from(["", "\r", " "])))
        if draw(st.integers(0, 5)) == 0:
            # blank per RFC 8259 §2 whitespace, or not blank although str.strip() would remove it
            lines.append(draw(st.sampled_from(["", " ", "\t\r", "\x0c", "\u2028", "\x85"])))
    end = draw(st.sampled_from(["", "\n"]))
    return ("\n".join(lines) + end).encode("utf-8", "surrogatepass")


@st.composite
def _json_documents(draw: st.DrawFn) -> bytes:
    values = draw(st.lists(_RECORDS, max_size=6))
    indent = draw(st.sampled_from([None, 1]))
    document = json.dumps(values if draw(st.booleans()) else values[0] if values else {}, indent=indent)
    return document.encode("utf-8")


_FALLBACK = st.sampled_from(["", "cp1252", "latin-1"])


@FUZZ
@given(data=_BYTES, fallback=_FALLBACK)
def test_plain_text_is_one_document_decoded_as_codecs_does(data: bytes, fallback: str) -> None:
    name = "f.txt"
    rows, info = _read(name, data, ReadConfig(fallback_encoding=fallback))
    _check_rows(rows, info, name)
    assert len(rows) == 1
    text = _decoded_or_rejected(rows, info, data, fallback, name)
    if text is not None:
        assert (rows[0]["record_id"], rows[0]["status"], rows[0]["text"]) == (name, "kept", text)


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name}: not JSON (RFC 8259 §6)")


class _Digits:
    """An integer longer than ``sys.get_int_max_str_digits()``: still a number (RFC 8259 §6)."""


def _int_or_digits(digits: str) -> int | _Digits:
    try:
        return int(digits)
    except ValueError:
        return _Digits()


def _reference_json(text: str) -> Any:
    """Python's json with RFC 8259 §6 rules: NaN/Infinity refused, numbers of any length kept."""
    return json.loads(text, parse_constant=_reject_constant, parse_int=_int_or_digits)


def _json_outcome(value: Any) -> str:
    if not isinstance(value, dict):
        return "not_an_object"
    if "text" not in value:
        return "missing_text_field"
    if not isinstance(value["text"], str):
        return "text_not_string"
    if any(0xD800 <= ord(char) <= 0xDFFF for char in value["text"]):
        return "undecodable"  # RFC 3629 §3: surrogates cannot be stored as UTF-8
    return "kept"


def _outcome(row: dict[str, Any]) -> str:
    return "kept" if row["status"] == "kept" else row["reason"].split(":")[0]


@FUZZ
@given(data=st.one_of(_BYTES, _json_lines()), fallback=_FALLBACK)
def test_jsonl_rows_are_the_non_blank_lines_parsed_by_json(data: bytes, fallback: str) -> None:
    name = "f.jsonl"
    rows, info = _read(name, data, ReadConfig(fallback_encoding=fallback))
    _check_rows(rows, info, name)
    text = _decoded_or_rejected(rows, info, data, fallback, name)
    if text is None:
        return
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    numbered = [(number, line) for number, line in enumerate(lines, start=1) if line.strip(_BLANK)]
    assert info.blank_lines == len(lines) - len(numbered)
    assert len(rows) == len(numbered)
    for index, (row, (number, line)) in enumerate(zip(rows, numbered, strict=True), start=1):
        assert (row["record_id"], row["line"]) == (f"{name}:{index}", number)
        try:
            value = _reference_json(line)
        except (ValueError, RecursionError):
            assert _outcome(row) == "invalid_json"
            continue
        assert _outcome(row) == _json_outcome(value)
        if row["status"] == "kept":
            assert row["text"] == value["text"]


@FUZZ
@given(data=st.one_of(_BYTES, _json_documents()), fallback=_FALLBACK)
def test_json_rows_are_the_top_level_elements_parsed_by_json(data: bytes, fallback: str) -> None:
    name = "f.json"
    rows, info = _read(name, data, ReadConfig(fallback_encoding=fallback))
    _check_rows(rows, info, name)
    text = _decoded_or_rejected(rows, info, data, fallback, name)
    if text is None:
        return
    try:
        value = _reference_json(text)
    except (ValueError, RecursionError):
        assert [(row["record_id"], _outcome(row)) for row in rows] == [(f"{name}:-", "invalid_json")]
        return
    values = value if isinstance(value, list) else [value]
    assert [row["record_id"] for row in rows] == [f"{name}:{n}" for n in range(1, len(values) + 1)]
    assert [_outcome(row) for row in rows] == [_json_outcome(item) for item in values]
    for row, item in zip(rows, values, strict=True):
        if row["status"] == "kept":
            assert row["text"] == item["text"]


_CSV_PIECES = st.sampled_from(
    [b"a", b"text", b"id", b",", b";", b'"', b'""', b"\n", b"\r\n", b"\r", b" ", b"\xe9", b"\xc3\xa9", b"x y"]
)


_FIELDS = st.text(st.sampled_from('ab ,;\t"\r\né\u2028'), max_size=6)


@st.composite
def _csv_files(draw: st.DrawFn) -> bytes:
    """Files written by Python's csv.writer (RFC 4180 quoting), a text column usually present."""
    header = draw(st.lists(st.sampled_from(["text", "id", "x", ""]), min_size=1, max_size=3))
    rows = draw(st.lists(st.lists(_FIELDS, min_size=len(header) - 1, max_size=len(header) + 1), max_size=6))
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator=draw(st.sampled_from(["\r\n", "\n"])))
    writer.writerow(header)
    writer.writerows(rows)
    return out.getvalue().encode("utf-8")


@FUZZ
@given(
    data=st.one_of(_BYTES, st.lists(_CSV_PIECES, max_size=60).map(b"".join), _csv_files()),
    fallback=_FALLBACK,
    delimiter=st.sampled_from([",", ";", "\t"]),
)
def test_csv_rows_are_csv_reader_rows_after_the_header(data: bytes, fallback: str, delimiter: str) -> None:
    name = "f.csv"
    rows, info = _read(name, data, ReadConfig(fallback_encoding=fallback, csv_delimiter=delimiter))
    _check_rows(rows, info, name)
    text = _decoded_or_rejected(rows, info, data, fallback, name)
    if text is None:
        return
    try:
        parsed = list(csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=False))
    except csv.Error:
        # not parseable by the reference: the reader must still give rows, not raise
        assert rows and rows[-1]["reason"].startswith("unreadable")
        return
    records = [row for row in parsed if row]
    assert info.blank_lines == len(parsed) - len(records)
    body = records[1:]
    assert len(rows) == len(body)
    if not records:
        return
    header = records[0]
    for index, (row, fields) in enumerate(zip(rows, body, strict=True), start=1):
        assert row["record_id"] == f"{name}:{index}"
        if len(fields) != len(header):
            assert _outcome(row) == "csv_column_count"
        elif "text" not in header:
            assert _outcome(row) == "missing_text_field"
        else:
            assert (row["status"], row["text"]) == ("kept", fields[header.index("text")])


# --- Parquet ------------------------------------------------------------------------------------

_TEXT_TYPES = {
    "string": (pa.string(), st.text(max_size=20)),
    "large_string": (pa.large_string(), st.text(max_size=20)),
    "dictionary": (pa.dictionary(pa.int32(), pa.string()), st.sampled_from(["a", "b", "", "é"])),
    "int64": (pa.int64(), st.integers(min_value=-(2**63), max_value=2**63 - 1)),
    "float64": (pa.float64(), st.floats(allow_nan=True)),
    "bool": (pa.bool_(), st.booleans()),
    "binary": (pa.binary(), st.binary(max_size=10)),
    "list": (pa.list_(pa.string()), st.lists(st.text(max_size=3), max_size=3)),
}


@st.composite
def _tables(draw: st.DrawFn) -> tuple[pa.Table, str]:
    count = draw(st.integers(min_value=0, max_value=12))
    kind = draw(st.sampled_from(["string", "large_string", "dictionary", *sorted(_TEXT_TYPES)]))
    arrow_type, values = _TEXT_TYPES[kind]
    column_name = draw(st.sampled_from(["text", "text", "text", "body"]))
    cells = draw(st.lists(st.one_of(values, values, values, st.none()), min_size=count, max_size=count))
    if kind == "dictionary":
        column = pa.array(cells, pa.string()).dictionary_encode()
    else:
        column = pa.array(cells, arrow_type)
    ids = pa.array(draw(st.lists(st.none() | st.integers(0, 99), min_size=count, max_size=count)), pa.int64())
    return pa.table({column_name: column, "id": ids}), kind


@settings(FUZZ, max_examples=120)
@given(table_and_kind=_tables(), batch_rows=st.integers(min_value=1, max_value=5))
def test_parquet_rows_are_pyarrows_rows(table_and_kind: tuple[pa.Table, str], batch_rows: int) -> None:
    table, kind = table_and_kind
    sink = io.BytesIO()
    pq.write_table(table, sink)
    data = sink.getvalue()
    name = "f.parquet"
    reference = pq.read_table(io.BytesIO(data))  # pyarrow reads back what it wrote
    rows, info = _read(name, data, ReadConfig(id_field="id"), batch_rows=batch_rows)
    _check_rows(rows, info, name)
    assert len(rows) == reference.num_rows
    is_text = kind in ("string", "large_string", "dictionary")
    texts = reference.column("text").to_pylist() if "text" in reference.column_names else None
    ids = reference.column("id").to_pylist()
    for index, row in enumerate(rows):
        assert (row["record_id"], row["line"]) == (f"{name}:{index + 1}", index + 1)
        if texts is None:
            assert _outcome(row) == "missing_text_field"
        elif not is_text or texts[index] is None:
            assert _outcome(row) == "text_not_string"
        else:
            assert (row["status"], row["text"]) == ("kept", texts[index])
            assert row["given_id"] == (None if ids[index] is None else str(ids[index]))
