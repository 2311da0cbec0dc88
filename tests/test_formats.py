"""Each input format, with record counts and texts checked against outside readers.

References: HF ``datasets`` loaders (``load_dataset("json"|"csv"|"text"|"parquet")``,
``Dataset.save_to_disk``; REFERENCES §9), pyarrow, Python's json module, and
RFC 8259 for what is valid JSON. Small inputs are built inline; the expected
values come from those readers, or from the raw text where a line is asked for.
"""

from __future__ import annotations

import gzip
import json
import os
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

os.environ.setdefault("HF_HUB_OFFLINE", "1")  # read once at import time (REFERENCES §9)
os.environ.setdefault("HF_DATASETS_OFFLINE", "1")

from corpusprep.read import InputFile, ReadConfig, read_folder
from corpusprep.schema import DOC_SCHEMA, REASONS


def read_all(folder: Path, config: ReadConfig | None = None) -> tuple[list[dict[str, Any]], list[InputFile]]:
    rows: list[dict[str, Any]] = []
    files: list[InputFile] = []
    for item in read_folder(folder, config or ReadConfig()):
        if isinstance(item, InputFile):
            files.append(item)
        else:
            assert item.schema.equals(DOC_SCHEMA)
            rows.extend(item.to_pylist())
    return rows, files


def hf_rows(kind: str, path: Path, cache: Path, **options: Any) -> list[dict[str, Any]]:
    """Rows HF datasets' local loader gives for one file (offline, private cache)."""
    import datasets

    loaded = datasets.load_dataset(
        kind, data_files={"train": str(path)}, split="train", cache_dir=str(cache), **options
    )
    return list(loaded)


def write(folder: Path, name: str, data: str | bytes) -> Path:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(data, str):
        path.write_text(data, encoding="utf-8", newline="")
    else:
        path.write_bytes(data)
    return path


def line_of(raw: str, marker: str) -> int:
    """1-based line on which ``marker`` first appears in ``raw`` (the independent expectation)."""
    return raw.count("\n", 0, raw.index(marker)) + 1


# --- plain text -------------------------------------------------------------------------------


def test_text_files_are_one_document_each_like_hf_document_mode(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    texts = {"a.txt": "first\nsecond\n\nthird\n", "notes/b.md": "# Title\n\nbody", "c.rst": "x"}
    for name, text in texts.items():
        write(folder, name, text)
    rows, files = read_all(folder)
    for name in texts:
        reference = hf_rows("text", folder / name, tmp_path / "hf", sample_by="document")
        assert [row["text"] for row in rows if row["source"] == name] == [r["text"] for r in reference]
    assert {row["record_id"] for row in rows} == set(texts)  # SOURCE for one-document files
    assert all(row["line"] is None for row in rows)
    assert [info.format for info in files] == ["text"] * 3


def test_text_keeps_line_endings_as_decoded(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    write(folder, "crlf.txt", b"a\r\nb\rc\n")
    rows, _ = read_all(folder)
    assert rows[0]["text"] == "a\r\nb\rc\n"  # normalising newlines is the clean stage's job


# --- JSON Lines -------------------------------------------------------------------------------


def test_jsonl_counts_and_texts_match_hf_json_loader(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    records = [{"text": f"doc {n} ünïcode \U0001f600", "id": n, "tag": "x" * n} for n in range(25)]
    raw = "".join(json.dumps(record) + ("\n\n" if n % 7 == 0 else "\n") for n, record in enumerate(records))
    path = write(folder, "d.jsonl", raw)
    rows, files = read_all(folder, ReadConfig(id_field="id"))
    reference = hf_rows("json", path, tmp_path / "hf")
    assert len(rows) == len(reference)
    assert [row["text"] for row in rows] == [r["text"] for r in reference]
    assert [row["given_id"] for row in rows] == [str(r["id"]) for r in reference]
    assert [row["record_id"] for row in rows] == [f"d.jsonl:{n}" for n in range(1, 26)]
    blank = raw.split("\n")[:-1].count("")
    assert files[0].blank_lines == blank and blank > 0
    assert [row["line"] for row in rows] == [line_of(raw, json.dumps(r)) for r in records]


def test_jsonl_malformed_records_each_get_a_row_with_their_line(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    lines = [
        ('{"text": "fine"}', None),
        ("{not json", "invalid_json"),
        ('{"text": NaN}', "invalid_json"),  # RFC 8259 §6: NaN and Infinity are not permitted
        ('{"text": "x", "n": -Infinity}', "invalid_json"),
        ("[1, 2]", "not_an_object"),
        ('"just a string"', "not_an_object"),
        ('{"body": "no text key"}', "missing_text_field"),
        ('{"text": 12}', "text_not_string"),
        ('{"text": null}', "text_not_string"),
        ('{"text": "\\ud800 lone"}', "undecodable"),
        ('{"text": "ok"} trailing', "invalid_json"),
        ("1" * 5000, "not_an_object"),  # valid JSON: RFC 8259 §6 sets no length limit on numbers
        ('{"text": "' + "[" * 3 + '"}', None),
        ('{"text": "big id", "id": ' + "9" * 5000 + "}", None),
        ("[" * 100_000 + "]" * 100_000, "invalid_json"),
    ]
    raw = "\n".join(line for line, _ in lines) + "\n"
    write(folder, "bad.jsonl", raw)
    rows, files = read_all(folder)
    assert len(rows) == len(lines)
    for number, (row, (line, reason)) in enumerate(zip(rows, lines, strict=True), start=1):
        assert row["source"] == "bad.jsonl"
        assert row["line"] == number
        assert row["record_id"] == f"bad.jsonl:{number}"
        if reason is None:
            assert row["status"] == "kept"
            assert row["text"] == json.loads(line, parse_int=str)["text"]  # Python json as reference
        else:
            assert row["status"] == "rejected", line[:40]
            assert row["reason"].split(":")[0] == reason
            assert row["text"] is None
    assert files[0].records == len(lines)
    assert files[0].rejected == sum(reason is not None for _, reason in lines)


def test_surrogate_escape_is_not_utf8() -> None:
    value = json.loads('"\\ud800"')
    with pytest.raises(UnicodeEncodeError):  # RFC 3629 §3: surrogates must not be encoded
        value.encode("utf-8")


def test_ids_and_groups_become_strings(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    raw = (
        '{"text": "a", "id": 7, "g": "left"}\n'
        '{"text": "b", "id": "x-1", "g": true}\n'
        '{"text": "c", "g": ""}\n'
        '{"text": "d", "id": 2.5, "g": null}\n'
    )
    write(folder, "ids.jsonl", raw)
    rows, _ = read_all(folder, ReadConfig(id_field="id", group_field="g"))
    assert [row["given_id"] for row in rows] == ["7", "x-1", None, "2.5"]
    assert [row["group"] for row in rows] == ["left", "true", None, None]
    rows, _ = read_all(folder)
    assert all(row["given_id"] is None and row["group"] is None for row in rows)


def test_other_text_field(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    write(folder, "b.jsonl", '{"body": "x", "text": "not this"}\n')
    rows, _ = read_all(folder, ReadConfig(text_field="body"))
    assert rows[0]["text"] == "x"


# --- JSON -------------------------------------------------------------------------------------


def test_json_array_matches_hf_json_loader(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    records = [{"text": f"item {n}"} for n in range(5)]
    raw = "[\n" + ",\n".join("  " + json.dumps(record) for record in records) + "\n]\n"
    path = write(folder, "arr.json", raw)
    rows, files = read_all(folder)
    reference = hf_rows("json", path, tmp_path / "hf")
    assert [row["text"] for row in rows] == [r["text"] for r in reference]
    assert [row["line"] for row in rows] == [line_of(raw, json.dumps(r)) for r in records]
    assert [row["record_id"] for row in rows] == [f"arr.json:{n}" for n in range(1, 6)]
    assert files[0].format == "json"


def test_json_single_object_and_mixed_array(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    write(folder, "one.json", '\n{"text": "only"}')
    write(folder, "mixed.json", '[{"text": "a"}, 3, {"no": 1}, {"text": []}]')
    write(folder, "empty.json", "[ ]")
    rows, files = read_all(folder)
    by_id = {row["record_id"]: row for row in rows}
    assert by_id["one.json:1"]["text"] == "only" and by_id["one.json:1"]["line"] == 2
    assert [by_id[f"mixed.json:{n}"]["reason"] for n in range(1, 5)] == [
        None,
        "not_an_object: found a number",
        "missing_text_field",
        "text_not_string: found an array",
    ]
    empty = next(info for info in files if info.path == "empty.json")
    assert (empty.records, empty.rejected) == (0, 0)  # the documented zero-row case


@pytest.mark.parametrize("raw", ['[{"text": "a"},', '{"text": "a"} {"text": "b"}', "", '[{"text": "a"}]]'])
def test_json_file_that_does_not_parse_is_rejected_whole(tmp_path: Path, raw: str) -> None:
    with pytest.raises(ValueError):  # Python's json module (reference) refuses the whole document
        json.loads(raw)
    folder = tmp_path / "in"
    write(folder, "broken.json", raw)
    rows, _ = read_all(folder)
    assert len(rows) == 1
    assert rows[0]["record_id"] == "broken.json:-"
    assert rows[0]["line"] is None
    assert rows[0]["reason"].startswith("invalid_json: ")


# --- CSV --------------------------------------------------------------------------------------


def test_csv_counts_and_texts_match_hf_csv_loader(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    raw = (
        "id,text,extra\n"
        '1,"plain",a\n'
        '2,"with, comma",b\n'
        '3,"multi\nline\nfield",c\n'
        '4,"quote "" inside",d\n'
        "\n"
        "5,last,e\n"
    )
    path = write(folder, "t.csv", raw)
    rows, files = read_all(folder, ReadConfig(id_field="id"))
    reference = hf_rows("csv", path, tmp_path / "hf")
    assert [row["text"] for row in rows] == [r["text"] for r in reference]
    assert [row["given_id"] for row in rows] == [str(r["id"]) for r in reference]
    expected_lines = [line_of(raw, f"\n{n},") + 1 for n in range(1, 6)]
    assert [row["line"] for row in rows] == expected_lines
    assert files[0].blank_lines == 1


def test_csv_wrong_field_count_is_rejected_with_its_line(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    raw = 'text,id\nok,1\ntoo,many,fields\nshort\n"spans\ntwo",2,3\nfine,2\n'
    write(folder, "c.csv", raw)
    rows, _ = read_all(folder)
    assert [row["line"] for row in rows] == [2, 3, 4, 5, 7]
    assert [row["reason"] for row in rows] == [
        None,
        "csv_column_count: expected 2 fields, found 3",
        "csv_column_count: expected 2 fields, found 1",
        "csv_column_count: expected 2 fields, found 3",
        None,
    ]


def test_csv_missing_text_column_rejects_each_row(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    path = write(folder, "c.csv", "body,id\na,1\nb,2\n")
    rows, _ = read_all(folder)
    assert len(rows) == len(hf_rows("csv", path, tmp_path / "hf"))
    assert [row["reason"] for row in rows] == ["missing_text_field"] * 2


def test_csv_huge_field_and_other_delimiter(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    huge = "w" * (1 << 20)  # Python's csv default field limit is 131072 (csv docs, from memory)
    write(folder, "big.csv", f'text;n\n"{huge}";1\n')
    rows, _ = read_all(folder, ReadConfig(csv_delimiter=";"))
    assert rows[0]["text"] == huge


def test_csv_header_only_or_empty_gives_no_rows(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    write(folder, "h.csv", "text,id\n")
    write(folder, "e.csv", "")
    rows, files = read_all(folder)
    assert rows == []
    assert [(info.path, info.records) for info in files] == [("e.csv", 0), ("h.csv", 0)]


# --- Parquet ----------------------------------------------------------------------------------


def test_parquet_counts_and_texts_match_hf_parquet_loader(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    folder.mkdir()
    table = pa.table({"text": [f"row {n}" for n in range(2500)], "id": list(range(2500))})
    pq.write_table(table, folder / "p.parquet", row_group_size=700)
    rows, files = read_all(folder, ReadConfig(id_field="id"))
    reference = hf_rows("parquet", folder / "p.parquet", tmp_path / "hf")
    assert [row["text"] for row in rows] == [r["text"] for r in reference]
    assert [row["given_id"] for row in rows] == [str(r["id"]) for r in reference]
    assert [row["line"] for row in rows] == list(range(1, 2501))
    assert files[0].encoding == "" and files[0].format == "parquet"


def test_parquet_wrong_or_missing_text_column(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    folder.mkdir()
    pq.write_table(pa.table({"text": [1, 2, 3]}), folder / "ints.parquet")
    pq.write_table(pa.table({"body": ["a", "b"]}), folder / "none.parquet")
    pq.write_table(pa.table({"text": ["a", None]}), folder / "nulls.parquet")
    dictionary = pa.array(["x", "y", "x"]).dictionary_encode()
    pq.write_table(pa.table({"text": dictionary}), folder / "dict.parquet")
    rows, _ = read_all(folder)
    reasons: dict[str, list[str | None]] = {}
    for row in rows:
        reasons.setdefault(row["source"], []).append(row["reason"])
    for name in ("ints", "none", "nulls", "dict"):
        assert len(reasons[f"{name}.parquet"]) == pq.ParquetFile(folder / f"{name}.parquet").metadata.num_rows
    assert reasons["ints.parquet"] == ["text_not_string: found a column of type int64"] * 3
    assert reasons["none.parquet"] == ["missing_text_field"] * 2
    assert reasons["nulls.parquet"] == [None, "text_not_string: found null"]
    assert [row["text"] for row in rows if row["source"] == "dict.parquet"] == ["x", "y", "x"]


def test_parquet_gzip_and_not_parquet(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    folder.mkdir()
    sink = pa.BufferOutputStream()
    pq.write_table(pa.table({"text": ["g1", "g2"]}), sink)
    write(folder, "z.parquet.gz", gzip.compress(sink.getvalue().to_pybytes()))
    write(folder, "fake.parquet", b"this is not parquet")
    rows, _ = read_all(folder)
    assert [row["text"] for row in rows if row["source"] == "z.parquet.gz"] == ["g1", "g2"]
    fake = [row for row in rows if row["source"] == "fake.parquet"]
    assert len(fake) == 1 and fake[0]["record_id"] == "fake.parquet:-"
    assert fake[0]["reason"].startswith("unreadable")


# --- saved datasets ---------------------------------------------------------------------------


def test_saved_dataset_rows_in_order_like_hf(tmp_path: Path) -> None:
    import datasets

    folder = tmp_path / "in"
    dataset = datasets.Dataset.from_dict(
        {"text": [f"saved {n}" for n in range(30)], "grp": [n % 4 for n in range(30)]}
    )
    dataset.save_to_disk(str(folder / "ds"), num_shards=3)
    assert len(list((folder / "ds").glob("*.arrow"))) == 3
    rows, files = read_all(folder, ReadConfig(group_field="grp"))
    reference = datasets.load_from_disk(str(folder / "ds"))
    assert [row["text"] for row in rows] == reference["text"]
    assert [row["group"] for row in rows] == [str(g) for g in reference["grp"]]
    assert [row["record_id"] for row in rows] == [f"ds:{n}" for n in range(1, 31)]
    assert [(info.path, info.format, info.records) for info in files] == [("ds", "saved_dataset", 30)]
    # the folder's JSON metadata files are not read as records
    assert all(not row["source"].endswith(".json") for row in rows)


def test_saved_dataset_dictionary(tmp_path: Path) -> None:
    import datasets

    folder = tmp_path / "in"
    splits = datasets.DatasetDict(
        {
            "train": datasets.Dataset.from_dict({"text": ["t1", "t2"]}),
            "test": datasets.Dataset.from_dict({"text": ["e1"]}),
        }
    )
    splits.save_to_disk(str(folder / "dd"))
    rows, files = read_all(folder)
    assert [(row["source"], row["text"]) for row in rows] == [
        ("dd/test", "e1"),
        ("dd/train", "t1"),
        ("dd/train", "t2"),
    ]
    assert [info.path for info in files] == ["dd/test", "dd/train"]


def test_saved_dataset_listing_outside_its_folder_is_rejected(tmp_path: Path) -> None:
    import datasets

    folder = tmp_path / "in"
    datasets.Dataset.from_dict({"text": ["a"]}).save_to_disk(str(folder / "ds"))
    state_path = folder / "ds" / "state.json"
    state = json.loads(state_path.read_text())
    state["_data_files"] = [{"filename": "../../secret.arrow"}]
    state_path.write_text(json.dumps(state))
    rows, _ = read_all(folder)
    assert len(rows) == 1
    assert rows[0]["record_id"] == "ds:-"
    assert rows[0]["reason"].startswith("unsupported_format")


def test_reasons_are_known(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    write(folder, "a.jsonl", '{"x": 1}\nnope\n[]\n')
    write(folder, "b.csv", "text\n1,2\n")
    write(folder, "c.txt", b"\x00")
    rows, _ = read_all(folder)
    assert {row["reason"].split(":")[0] for row in rows} <= set(REASONS)


# --- gzip inside every text format, hashes ----------------------------------------------------


@pytest.mark.parametrize(
    ("name", "kind", "raw"),
    [
        ("g.jsonl.gz", "json", '{"text": "a"}\n\n{"text": "b"}\n'),
        ("g.json.gz", "json", '[{"text": "a"}, {"text": "b"}, {"text": "c"}]'),
        ("g.csv.gz", "csv", 'text,n\n"x\ny",1\nz,2\n'),
    ],
)
def test_gzip_text_formats_match_hf_loaders(tmp_path: Path, name: str, kind: str, raw: str) -> None:
    folder = tmp_path / "in"
    path = write(folder, name, gzip.compress(raw.encode("utf-8")))
    rows, files = read_all(folder)
    reference = hf_rows(kind, path, tmp_path / "hf")  # HF loaders decompress .gz themselves
    assert [row["text"] for row in rows] == [r["text"] for r in reference]
    assert files[0].format == name.split(".")[1]


def test_hashes_are_of_the_bytes_on_disk(tmp_path: Path) -> None:
    import datasets

    from corpusprep.hashing import hash_bytes, hash_file

    folder = tmp_path / "in"
    write(folder, "a.txt", "hash me")
    datasets.Dataset.from_dict({"text": ["p", "q", "r"]}).save_to_disk(str(folder / "ds"), num_shards=2)
    _, files = read_all(folder)
    by_path = {info.path: info for info in files}
    assert (by_path["a.txt"].size, by_path["a.txt"].xxh3_128) == hash_file(folder / "a.txt")
    state = json.loads((folder / "ds" / "state.json").read_text())
    data = b"".join((folder / "ds" / item["filename"]).read_bytes() for item in state["_data_files"])
    assert (by_path["ds"].size, by_path["ds"].xxh3_128) == (len(data), hash_bytes(data))


def test_input_folder_that_is_itself_a_saved_dataset(tmp_path: Path) -> None:
    import datasets

    datasets.Dataset.from_dict({"text": ["only", "two"]}).save_to_disk(str(tmp_path / "ds"))
    rows, files = read_all(tmp_path / "ds")
    assert [(row["record_id"], row["text"]) for row in rows] == [(".:1", "only"), (".:2", "two")]
    assert files[0].path == "."
    rows, files = read_all(tmp_path / "ds", ReadConfig(include=("**/*.json",)))
    assert (rows, files) == ([], [])  # no folder pattern: not read, and its metadata is no record file
