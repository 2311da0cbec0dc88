"""The folder walk, links, names, order, batches and ledger totals of the read stage.

Expected orders come from Python's ``sorted`` on the path strings (code point
order); expected parses from Python's json and csv modules and codecs.
"""

from __future__ import annotations

import codecs
import csv
import io
import json
import os
import stat
from pathlib import Path
from typing import Any

import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from corpusprep.config import setting_docs
from corpusprep.errors import DefinitionError, InputError
from corpusprep.read import InputFile, ReadConfig, read_folder
from corpusprep.schema import DOC_SCHEMA, REASONS

TEXT = ReadConfig()


def read_all(
    folder: Path, config: ReadConfig = TEXT, batch_rows: int = 1024
) -> tuple[list[dict[str, Any]], list[InputFile]]:
    rows: list[dict[str, Any]] = []
    files: list[InputFile] = []
    for item in read_folder(folder, config, batch_rows=batch_rows):
        if isinstance(item, InputFile):
            files.append(item)
        else:
            rows.extend(item.to_pylist())
    return rows, files


def make(folder: Path, files: dict[str, str]) -> Path:
    for name, text in files.items():
        path = folder / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    return folder


# --- the folder itself ------------------------------------------------------------------------


def test_missing_folder_and_file_raise_input_error(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="does not exist"):
        list(read_folder(tmp_path / "nowhere", TEXT))
    (tmp_path / "file.txt").write_text("x")
    with pytest.raises(InputError, match="not a folder"):
        list(read_folder(tmp_path / "file.txt", TEXT))


def test_batch_rows_must_be_positive(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="batch_rows"):
        list(read_folder(tmp_path, TEXT, batch_rows=0))


# --- order, batches, totals -------------------------------------------------------------------


def test_files_come_in_sorted_path_order(tmp_path: Path) -> None:
    names = ["b.txt", "a/x.txt", "a-c/x.txt", "a.b/x.txt", "A.txt", "é.txt", "z/y/w.txt"]
    folder = make(tmp_path / "in", {name: name for name in names})
    _, files = read_all(folder)
    assert [info.path for info in files] == sorted(names)  # plain code point order of the paths


def test_batches_hold_at_most_batch_rows_and_input_files_follow_their_rows(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    make(
        folder,
        {f"f{n}.jsonl": "".join(json.dumps({"text": f"{n}-{k}"}) + "\n" for k in range(n)) for n in range(6)},
    )
    seen_sources: set[str] = set()
    rows: list[dict[str, Any]] = []
    files: list[InputFile] = []
    for item in read_folder(folder, TEXT, batch_rows=4):
        if isinstance(item, InputFile):
            # every row of this file has already been yielded
            assert sum(row["source"] == item.path for row in rows) == item.records
            files.append(item)
        else:
            assert isinstance(item, pa.RecordBatch)
            assert item.schema.equals(DOC_SCHEMA)
            assert 1 <= item.num_rows <= 4
            batch_rows = item.to_pylist()
            assert not any(row["source"] in {info.path for info in files} for row in batch_rows)
            seen_sources.update(row["source"] for row in batch_rows)
            rows.extend(batch_rows)
    assert [info.path for info in files] == [f"f{n}.jsonl" for n in range(6)]
    assert len(rows) == sum(range(6)) == sum(info.records for info in files)
    assert [row["text"] for row in rows] == [f"{n}-{k}" for n in range(6) for k in range(n)]
    assert len({row["record_id"] for row in rows}) == len(rows)


def test_rerun_is_identical(tmp_path: Path) -> None:
    folder = make(
        tmp_path / "in", {"a.txt": "one", "b/c.jsonl": '{"text": "x"}\nbad\n', "d.csv": "text\nq\n"}
    )
    first = [item for item in read_folder(folder, TEXT, batch_rows=2)]
    second = [item for item in read_folder(folder, TEXT, batch_rows=2)]
    assert len(first) == len(second)
    for one, two in zip(first, second, strict=True):
        if isinstance(one, pa.RecordBatch):
            assert isinstance(two, pa.RecordBatch) and one.equals(two)
        else:
            assert one == two


# --- globs ------------------------------------------------------------------------------------


def test_include_and_exclude(tmp_path: Path) -> None:
    folder = make(tmp_path / "in", {"keep/a.txt": "a", "keep/b.log": "b", "skip/c.txt": "c", "d.txt": "d"})
    _, files = read_all(folder, ReadConfig(include=("**/*.txt",), exclude=("skip/**",)))
    assert [info.path for info in files] == ["d.txt", "keep/a.txt"]
    _, files = read_all(folder, ReadConfig(include=("*.txt",)))
    assert [info.path for info in files] == ["d.txt"]  # '*' does not cross folders


def test_included_file_of_unknown_format_is_rejected(tmp_path: Path) -> None:
    folder = make(tmp_path / "in", {"x.log": "hello", "y.tar.gz": "z"})
    rows, files = read_all(folder, ReadConfig(include=("**/*.log", "**/*.gz")))
    assert [(row["record_id"], row["reason"].split(":")[0]) for row in rows] == [
        ("x.log:-", "unsupported_format"),
        ("y.tar.gz:-", "unsupported_format"),
    ]
    assert files[0].xxh3_128 != ""


@pytest.mark.parametrize("pattern", ["", "/abs/*.txt", "../*.txt", "a/./b"])
def test_bad_patterns_are_definition_errors(pattern: str) -> None:
    with pytest.raises(DefinitionError, match=r"read\.include\[0\]"):
        ReadConfig(include=(pattern,))


def test_other_settings_are_checked() -> None:
    with pytest.raises(DefinitionError, match=r"read\.csv_delimiter"):
        ReadConfig(csv_delimiter="::")
    with pytest.raises(DefinitionError, match=r"read\.text_field"):
        ReadConfig(text_field="")


def test_every_setting_is_documented() -> None:
    docs = setting_docs(ReadConfig)
    assert {doc.key for doc in docs} >= {"include", "exclude", "fallback_encoding", "max_file_bytes"}
    assert all(doc.doc for doc in docs)


# --- file names -------------------------------------------------------------------------------


def test_name_that_is_not_utf8_still_gives_a_row(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    folder.mkdir()
    raw_name = b"caf\xe9.txt"  # Latin-1 'café', not valid UTF-8
    with pytest.raises(UnicodeDecodeError):
        raw_name.decode("utf-8")
    try:
        with open(os.path.join(os.fsencode(folder), raw_name), "wb") as handle:
            handle.write(b"content")
    except OSError:
        pytest.skip("the file system refuses names that are not UTF-8")
    rows, files = read_all(folder)
    assert [row["source"] for row in rows] == ["caf\\xe9.txt"]
    assert rows[0]["text"] == "content"
    assert files[0].path == "caf\\xe9.txt"


def test_backslash_and_newline_in_names_are_escaped(tmp_path: Path) -> None:
    folder = make(tmp_path / "in", {"back\\slash.txt": "b", "new\nline.txt": "n"})
    rows, _ = read_all(folder)
    assert sorted(row["source"] for row in rows) == ["back\\\\slash.txt", "new\\x0aline.txt"]


# --- links and special files ------------------------------------------------------------------


def test_link_outside_is_rejected_and_never_read(tmp_path: Path) -> None:
    outside = make(tmp_path / "outside", {"secret.txt": "SECRET", "d/more.txt": "SECRET"})
    folder = make(tmp_path / "in", {"own.txt": "own"})
    (folder / "leak.txt").symlink_to(outside / "secret.txt")
    (folder / "leakdir").symlink_to(outside / "d")
    rows, files = read_all(folder)
    assert not any("SECRET" in (row["text"] or "") for row in rows)
    by_source = {row["source"]: row for row in rows}
    assert by_source["leak.txt"]["record_id"] == "leak.txt:-"
    assert by_source["leak.txt"]["reason"].startswith("link_outside_input")
    assert by_source["leakdir"]["reason"].startswith("link_outside_input")
    leak = next(info for info in files if info.path == "leak.txt")
    assert (leak.size, leak.xxh3_128) == (0, "")


def test_links_inside_read_each_file_once(tmp_path: Path) -> None:
    folder = make(tmp_path / "in", {"real/a.txt": "A", "data/raw.dat": "R"})
    (folder / "alias.txt").symlink_to(folder / "real" / "a.txt")  # target is itself an input
    (folder / "raw.txt").symlink_to(Path("data") / "raw.dat")  # target is not an input
    (folder / "raw2.txt").symlink_to(Path("data") / "raw.dat")  # second link to the same file
    (folder / "again").symlink_to(folder / "real")  # folder link inside: not descended
    (folder / "real" / "up").symlink_to(folder)  # leads back to an ancestor: a cycle
    rows, _ = read_all(folder)
    kept = sorted((row["source"], row["text"]) for row in rows if row["status"] == "kept")
    assert kept == [("raw.txt", "R"), ("real/a.txt", "A")]
    rejected = [(row["source"], row["reason"].split(":")[0]) for row in rows if row["status"] == "rejected"]
    assert rejected == [("real/up", "link_loop")]


def test_self_link_and_dangling_link(tmp_path: Path) -> None:
    folder = make(tmp_path / "in", {"ok.txt": "ok"})
    (folder / "loop.txt").symlink_to(folder / "loop.txt")
    (folder / "gone.txt").symlink_to(folder / "missing.txt")
    rows, _ = read_all(folder)
    reasons = {row["source"]: (row["reason"] or "").split(":")[0] for row in rows}
    assert reasons == {"ok.txt": "", "loop.txt": "link_loop", "gone.txt": "unreadable"}


def test_fifo_is_not_opened(tmp_path: Path) -> None:
    folder = make(tmp_path / "in", {"ok.txt": "ok"})
    os.mkfifo(folder / "pipe.txt")
    rows, _ = read_all(folder)  # would block forever if the FIFO were opened
    pipe = next(row for row in rows if row["source"] == "pipe.txt")
    assert pipe["reason"] == "unreadable: not a regular file"


@pytest.mark.skipif(os.geteuid() == 0, reason="root reads files whatever their permissions")
def test_file_without_read_permission_is_unreadable(tmp_path: Path) -> None:
    folder = make(tmp_path / "in", {"locked.txt": "x"})
    (folder / "locked.txt").chmod(0)
    try:
        rows, files = read_all(folder)
    finally:
        (folder / "locked.txt").chmod(stat.S_IRUSR | stat.S_IWUSR)
    assert rows[0]["reason"].startswith("unreadable")
    assert files[0].xxh3_128 == ""


def test_folder_that_cannot_be_listed_gives_a_row(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    folder = make(tmp_path / "in", {"a.txt": "a", "closed/b.txt": "b"})
    real_scandir = os.scandir
    closed = str(folder / "closed")

    def refusing_scandir(path: Any) -> Any:
        if os.fspath(path) == closed:
            raise PermissionError(13, "Permission denied", closed)
        return real_scandir(path)

    monkeypatch.setattr(os, "scandir", refusing_scandir)
    rows, files = read_all(folder)
    assert [(row["record_id"], row["status"]) for row in rows] == [
        ("a.txt", "kept"),
        ("closed:-", "rejected"),
    ]
    assert rows[1]["reason"].startswith("unreadable: cannot list folder")
    assert [info.path for info in files] == ["a.txt", "closed"]


# --- properties -------------------------------------------------------------------------------

# JSON values as RFC 8259 defines them: no NaN or Infinity (§6; those are covered in test_formats).
json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False) | st.text(),
    lambda children: (
        st.lists(children, max_size=3) | st.dictionaries(st.text(max_size=5), children, max_size=3)
    ),
    max_leaves=8,
)
# st.text() leaves out surrogates; the second kind holds only unpaired surrogates, which JSON can
# carry as \uXXXX escapes but UTF-8 cannot store (RFC 3629 §3).
texts = st.text() | st.text(alphabet=st.characters(min_codepoint=0xD800, max_codepoint=0xDFFF), min_size=1)
records = st.lists(
    st.one_of(st.fixed_dictionaries({"text": texts}, optional={"id": st.integers()}), json_values),
    max_size=12,
)


def _has_surrogate(value: Any) -> bool:
    return any(0xD800 <= ord(char) <= 0xDFFF for char in json.dumps(value, ensure_ascii=False))


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(values=records, ensure_ascii=st.booleans())
def test_jsonl_gives_one_row_per_line_and_texts_round_trip(
    tmp_path_factory: pytest.TempPathFactory, values: list[Any], ensure_ascii: bool
) -> None:
    folder = tmp_path_factory.mktemp("prop")
    lines = [json.dumps(value, ensure_ascii=ensure_ascii or _has_surrogate(value)) for value in values]
    (folder / "r.jsonl").write_text("".join(line + "\n" for line in lines), encoding="utf-8")
    rows, files = read_all(folder, batch_rows=5)
    assert len(rows) == len(values) == files[0].records
    for row, line, value in zip(rows, lines, values, strict=True):
        # Python's json module is the reference for what each line holds (it joins a pair of
        # surrogate escapes into one code point, RFC 8259 §7).
        parsed = json.loads(line)
        if isinstance(parsed, dict) and isinstance(parsed.get("text"), str):
            if _has_surrogate(parsed["text"]):
                assert row["reason"].startswith("undecodable")
            else:
                assert (row["status"], row["text"]) == ("kept", parsed["text"])
                if not _has_surrogate(value):
                    assert row["text"] == value["text"]  # the round trip
        else:
            assert row["status"] == "rejected"
            expected = "missing_text_field" if isinstance(value, dict) else "not_an_object"
            if isinstance(value, dict) and "text" in value:
                expected = "text_not_string"
            assert row["reason"].split(":")[0] == expected


def _only_blank(text: str) -> bool:
    return not text.strip(" \t\r\n")


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=200), suffix=st.sampled_from([".jsonl", ".csv", ".txt", ".json"]))
def test_arbitrary_bytes_never_raise(
    tmp_path_factory: pytest.TempPathFactory, data: bytes, suffix: str
) -> None:
    folder = tmp_path_factory.mktemp("bytes")
    (folder / f"f{suffix}").write_bytes(data)
    rows, files = read_all(folder, batch_rows=3)
    assert len(files) == 1
    info = files[0]
    assert info.records == len(rows) and info.rejected == sum(row["status"] == "rejected" for row in rows)
    for row in rows:
        assert row["source"] == f"f{suffix}"
        assert row["status"] in ("kept", "rejected")
        assert (row["reason"] is None) == (row["status"] == "kept")
        if row["reason"] is not None:
            assert row["reason"].split(":")[0] in REASONS
    if suffix == ".txt":
        assert len(rows) == 1
    if not rows:
        # the documented zero-row cases: JSON Lines of blank lines, CSV with at most a header,
        # a JSON empty array; checked on the text Python's codec gives for the chosen encoding
        text = codecs.decode(data, info.encoding)
        if suffix == ".jsonl":
            assert all(_only_blank(line) for line in text.split("\n"))
        elif suffix == ".csv":
            assert sum(1 for row in csv.reader(io.StringIO(text, newline="")) if row) <= 1
        else:
            assert json.loads(text) == []
