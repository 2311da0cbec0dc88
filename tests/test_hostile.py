"""Hostile inputs end to end: every file gets its documented ledger outcome, and nothing raises.

The folder comes from ``fixtures/make_hostile_inputs.py`` (its docstring lists what is in it);
its expected-outcome record says, per file, which ledger rows must appear. References:

- RFC 3629 (UTF-8) for the invalid byte sequences, checked with Python's strict ``utf-8`` codec;
- RFC 8259 (JSON) for what parses, checked with Python's ``json`` module: ``RecursionError`` on
  nesting deeper than the interpreter's recursion limit, ``ValueError`` otherwise;
- Python's ``gzip`` module for the bomb's decompressed size;
- pyarrow's Parquet reader for the ledger and the non-string text columns.
"""

from __future__ import annotations

import gzip
import json
import os
import stat
import subprocess
import sys
from collections import Counter
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from corpusprep.definition import parse_definition
from corpusprep.errors import TooManyRejectedError
from corpusprep.pipeline import run_pipeline
from corpusprep.read import ReadConfig, read_folder
from corpusprep.schema import REASONS, STATUSES

ROOT = Path(__file__).parent.parent
sys.path.insert(0, str(ROOT / "fixtures"))
import make_hostile_inputs  # noqa: E402

BIG_LINE_BYTES = 5_000_000


def _can_open(path: Path) -> bool:
    try:
        with open(path, "rb"):
            return True
    except PermissionError:
        return False


@pytest.fixture(scope="module")
def hostile(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Any]]:
    folder = tmp_path_factory.mktemp("hostile") / "in"
    record = make_hostile_inputs.build(folder, big_line_bytes=BIG_LINE_BYTES)
    return folder, record


def _expected_files(folder: Path, record: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """The record's files, with the alternative outcome where its condition holds here."""
    files = dict(record["files"])
    locked = folder / "special" / "locked.txt"
    if _can_open(locked):
        files["special/locked.txt"] = record["alternatives"]["special/locked.txt"]
    return files


def _definition_text(settings: dict[str, Any], **overrides: Any) -> str:
    values = {key.removeprefix("read."): value for key, value in settings.items()}
    values.update(overrides)
    lines = ["[read]"] + [f"{key} = {json.dumps(value)}" for key, value in values.items()]
    return "\n".join(lines) + "\n"


@pytest.fixture(scope="module")
def hostile_run(
    hostile: tuple[Path, dict[str, Any]], tmp_path_factory: pytest.TempPathFactory
) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    folder, record = hostile
    output = tmp_path_factory.mktemp("hostile-run") / "out"
    definition = parse_definition(_definition_text(record["settings"])).with_folders(
        input=folder, output=output
    )
    result = run_pipeline(definition, workers=1)
    ledger = pq.read_table(output / "ledger.parquet").to_pylist()
    return ledger, result.manifest


def _check_rows(rows: list[dict[str, Any]], expected: list[dict[str, Any]], source: str) -> None:
    got = [(row["record_id"], row["status"], (row["reason"] or "").split(":")[0] or None) for row in rows]
    wanted = [(row["record_id"], row["status"], row["reason"]) for row in expected]
    assert got == wanted, source
    for row, want in zip(rows, expected, strict=True):
        assert want.get("detail", "") in (row["reason"] or ""), (source, row["reason"])


# --- the folder itself ----------------------------------------------------------------------


def test_builder_is_deterministic_and_its_cli_writes_the_record_outside(tmp_path: Path) -> None:
    def tree(folder: Path) -> dict[bytes, tuple[int, bytes]]:
        entries = {}
        for directory, folders, files in os.walk(os.fsencode(folder)):
            for name in folders + files:
                path = os.path.join(directory, name)
                info = os.lstat(path)
                if stat.S_ISLNK(info.st_mode):
                    content = os.readlink(path)
                elif stat.S_ISREG(info.st_mode):
                    os.chmod(path, info.st_mode | stat.S_IRUSR)
                    with open(path, "rb") as handle:
                        content = handle.read()
                    os.chmod(path, info.st_mode)
                else:
                    content = b""
                entries[os.path.relpath(path, os.fsencode(folder))] = (stat.S_IFMT(info.st_mode), content)
        return entries

    first = make_hostile_inputs.build(tmp_path / "a", big_line_bytes=4096)
    command = [sys.executable, str(ROOT / "fixtures" / "make_hostile_inputs.py"), str(tmp_path / "b")]
    done = subprocess.run([*command, "--big-line-bytes", "4096"], capture_output=True, text=True, check=False)
    assert done.returncode == 0, done.stderr
    second = json.loads((tmp_path / "b.expected.json").read_text(encoding="utf-8"))
    assert first == second
    assert tree(tmp_path / "a") == tree(tmp_path / "b")
    # rebuilding over a previous build (mode-000 file, FIFO, odd names) starts from scratch
    assert make_hostile_inputs.build(tmp_path / "a", big_line_bytes=4096) == first
    assert tree(tmp_path / "a") == tree(tmp_path / "b")


def test_the_folder_holds_what_the_record_says(hostile: tuple[Path, dict[str, Any]]) -> None:
    folder, record = hostile
    # RFC 3629: each sequence is refused by Python's strict UTF-8 decoder
    for stem, sequence, _rule in make_hostile_inputs.INVALID_UTF8:
        data = (folder / "utf8" / f"{stem}.txt").read_bytes()
        assert bytes.fromhex(sequence) in data
        with pytest.raises(UnicodeDecodeError):
            data.decode("utf-8")
    # the one-line files have exactly big_line_bytes bytes and one line
    for name in ("special/big-line.txt", "json/big-line.jsonl", "csv/huge-field.csv"):
        data = (folder / name).read_bytes()
        assert len(data) == BIG_LINE_BYTES
        assert data.rstrip(b"\r\n").count(b"\n") == (1 if name.endswith(".csv") else 0)
    # Python's json raises RecursionError on the deep file (RFC 8259 §9 lets a parser limit depth)
    with pytest.raises(RecursionError):
        json.loads((folder / "json" / "deep.json").read_text(encoding="ascii"))
    # Python's gzip: the bomb is small on disk and decompresses past the limit
    limit = record["settings"]["read.max_file_bytes"]
    bomb = folder / "bomb" / "bomb.txt.gz"
    assert bomb.stat().st_size < limit // 100
    with gzip.open(bomb, "rb") as stream:
        assert len(stream.read(limit + 1)) == limit + 1
    # pyarrow: the text columns that are not strings
    for name, kind in (("int-text", pa.int64()), ("binary-text", pa.binary())):
        assert pq.read_schema(folder / "parquet" / f"{name}.parquet").field("text").type == kind
    assert stat.S_IMODE(os.stat(folder / "special" / "locked.txt").st_mode) == 0
    assert stat.S_ISFIFO(os.stat(folder / "special" / "fifo.txt").st_mode)
    assert os.path.exists(os.path.join(os.fsencode(folder), b"names", b"caf\xe9-\xff.txt"))


# --- the run --------------------------------------------------------------------------------


@pytest.mark.slow
def test_every_file_gets_its_expected_rows(
    hostile: tuple[Path, dict[str, Any]], hostile_run: tuple[list[dict[str, Any]], dict[str, Any]]
) -> None:
    folder, record = hostile
    ledger, manifest = hostile_run
    expected = _expected_files(folder, record)
    by_source: dict[str, list[dict[str, Any]]] = {}
    for row in ledger:
        by_source.setdefault(row["source"], []).append(row)
    assert set(by_source) <= set(expected), set(by_source) - set(expected)
    for source, info in expected.items():
        _check_rows(by_source.get(source, []), info["rows"], source)
    # every input is in the manifest with its row count; the link to a file inside is not an input
    listed = {item["path"]: item for item in manifest["inputs"]["files"]}
    assert set(listed) == set(expected) - {"links/also-real.txt"}
    for source, item in listed.items():
        assert item["records"] == len(expected[source]["rows"]), source
        assert item["rejected"] == sum(row["status"] == "rejected" for row in expected[source]["rows"])


@pytest.mark.slow
def test_ledger_sum_holds(hostile_run: tuple[list[dict[str, Any]], dict[str, Any]]) -> None:
    ledger, manifest = hostile_run
    statuses = Counter(row["status"] for row in ledger)
    totals = manifest["ledger"]
    assert set(statuses) <= set(STATUSES)
    assert len(ledger) == totals["read"] == manifest["stages"]["read"]["records"]
    assert totals["read"] == totals["kept"] + totals["removed"] + totals["rejected"]
    assert totals["kept"] == statuses["kept"] and totals["rejected"] == statuses["rejected"]
    assert len({row["record_id"] for row in ledger}) == len(ledger)
    for row in ledger:
        assert (row["reason"] is None) == (row["status"] == "kept")
        if row["reason"] is not None:
            assert row["reason"].split(":")[0] in REASONS
        assert (row["split"] is not None) == (row["status"] == "kept")
    reasons = Counter(row["reason"].split(":")[0] for row in ledger if row["status"] == "rejected")
    assert manifest["stages"]["read"]["rejected_by_reason"] == dict(sorted(reasons.items()))


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "corpusprep", *args], capture_output=True, text=True, check=False, cwd=ROOT
    )


@pytest.mark.slow
def test_cli_run_exits_0_without_a_traceback(hostile: tuple[Path, dict[str, Any]], tmp_path: Path) -> None:
    folder, record = hostile
    pipeline = tmp_path / "hostile.toml"
    pipeline.write_text(_definition_text(record["settings"]), encoding="utf-8")
    done = _cli("run", str(pipeline), "--input", str(folder), "--output", str(tmp_path / "out"), "--quiet")
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    ledger = pq.read_table(tmp_path / "out" / "ledger.parquet")
    assert ledger.num_rows == sum(len(info["rows"]) for info in _expected_files(folder, record).values())


@pytest.mark.slow
def test_default_rejected_fraction_fails_with_one_paragraph(
    hostile: tuple[Path, dict[str, Any]], tmp_path: Path
) -> None:
    folder, record = hostile
    settings = dict(record["settings"])
    del settings["read.max_rejected_fraction"]  # the default, 0.05
    definition = parse_definition(_definition_text(settings)).with_folders(
        input=folder, output=tmp_path / "a"
    )
    with pytest.raises(TooManyRejectedError, match=r"read\.max_rejected_fraction = 0\.05"):
        run_pipeline(definition)
    assert not (tmp_path / "a").exists()
    pipeline = tmp_path / "default.toml"
    pipeline.write_text(_definition_text(settings), encoding="utf-8")
    done = _cli("run", str(pipeline), "--input", str(folder), "--output", str(tmp_path / "b"), "--quiet")
    assert done.returncode == 1
    assert "Traceback" not in done.stderr
    message = done.stderr.strip()
    assert message.startswith("corpusprep: error: ") and "\n\n" not in message
    rows = sum(len(info["rows"]) for info in _expected_files(folder, record).values())
    rejected = sum(
        row["status"] == "rejected"
        for info in _expected_files(folder, record).values()
        for row in info["rows"]
    )
    assert f"{rejected} of {rows} input records were rejected" in message
    assert "raise read.max_rejected_fraction" in message
    assert not (tmp_path / "b").exists()


def test_cli_input_folder_missing_or_not_a_folder(tmp_path: Path) -> None:
    pipeline = tmp_path / "p.toml"
    pipeline.write_text("[read]\n", encoding="utf-8")
    (tmp_path / "plain.txt").write_text("not a folder\n", encoding="utf-8")
    for given in (tmp_path / "missing", tmp_path / "plain.txt"):
        done = _cli("run", str(pipeline), "--input", str(given), "--output", str(tmp_path / "out"), "--quiet")
        assert done.returncode == 1, done.stderr
        assert "Traceback" not in done.stderr
        message = done.stderr.strip()
        assert message == f"corpusprep: error: {given}: the input folder does not exist or is not a folder"
        assert not (tmp_path / "out").exists()


def test_cli_input_folder_that_cannot_be_listed(tmp_path: Path) -> None:
    folder = tmp_path / "closed"
    folder.mkdir()
    (folder / "a.txt").write_text("one short document\n", encoding="utf-8")
    pipeline = tmp_path / "p.toml"
    pipeline.write_text("[read]\n", encoding="utf-8")
    os.chmod(folder, 0)
    try:
        try:
            os.listdir(folder)
            listable = True  # root (CAP_DAC_OVERRIDE) lists it anyway: the run goes through
        except PermissionError:
            listable = False
        done = _cli(
            "run", str(pipeline), "--input", str(folder), "--output", str(tmp_path / "out"), "--quiet"
        )
    finally:
        os.chmod(folder, stat.S_IRWXU)
    assert "Traceback" not in done.stderr
    if listable:
        assert done.returncode == 0, done.stderr
    else:
        assert done.returncode == 1
        assert done.stderr.strip().startswith(
            f"corpusprep: error: {folder}: the input folder cannot be listed"
        )


# --- JSON nesting at the edge of the recursion limit ----------------------------------------


def test_nesting_near_the_recursion_limit_never_raises(tmp_path: Path) -> None:
    # Python's json: depth 100 parses; beyond the recursion limit it raises RecursionError.
    limit = sys.getrecursionlimit()
    # Every depth up to past the limit: where the parser gives up depends on how deep the reader's
    # own stack is, and a value the parser accepts must still not fail later (json.dumps of an id).
    depths = [*range(1, limit + 6), 5 * limit]
    for depth in (100, 5 * limit):
        value = "[" * depth + "]" * depth
        if depth < limit:
            assert json.loads(value) is not None
        else:
            with pytest.raises(RecursionError):
                json.loads(value)
    lines = []
    for depth in depths:
        nested = "[" * depth + "]" * depth
        lines.append('{"text": "t", "id": ' + nested + ', "group": "g"}')
        lines.append('{"text": "t", "group": ' + '{"a":' * depth + "1" + "}" * depth + "}")
    (tmp_path / "edge.jsonl").write_text("\n".join(lines) + "\n", encoding="utf-8")
    (tmp_path / "edge.json").write_text("[" + ",\n".join(lines) + "]", encoding="utf-8")
    config = ReadConfig(id_field="id", group_field="group")
    rows = []
    for item in read_folder(tmp_path, config):
        if isinstance(item, pa.RecordBatch):
            rows.extend(item.to_pylist())
    jsonl = [row for row in rows if row["source"] == "edge.jsonl"]
    assert len(jsonl) == len(lines)
    for index, row in enumerate(jsonl):
        depth = depths[index // 2]
        assert (row["status"], row["reason"]) in (
            ("kept", None),
            ("rejected", "invalid_json: nesting too deep"),
        )
        if depth <= 100:
            assert row["status"] == "kept"
        if depth >= limit:
            assert row["status"] == "rejected"
    # a JSON file holding a value too deep for the parser is rejected as a whole
    assert [(row["record_id"], row["reason"]) for row in rows if row["source"] == "edge.json"] == [
        ("edge.json:-", "invalid_json: nesting too deep")
    ]
