"""The invented ferry archive: deterministic, and every planted defect is really there.

The archive is rebuilt into temporary folders by the generator's ``build``
function; ``fixtures/ferry_planted.json`` must match what the generator
returns, and each planted entry is checked against the bytes on disk with
Python's own codecs, ``json`` and ``csv`` as the reference.
"""

from __future__ import annotations

import csv
import importlib.util
import io
import itertools
import json
import os
import sys
from pathlib import Path
from types import ModuleType
from typing import Any

import pytest

from corpusprep.schema import REASONS, STATUSES

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
PLANTED_FILE = FIXTURES / "ferry_planted.json"
KINDS = {"rejected", "empty", "exact_copy", "fix", "encoding", "near_pair", "format"}
BOMS = {"utf-8-sig": b"\xef\xbb\xbf", "utf-16": (b"\xff\xfe", b"\xfe\xff")}


def _load_generator() -> ModuleType:
    spec = importlib.util.spec_from_file_location("make_ferry_archive", FIXTURES / "make_ferry_archive.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


generator = _load_generator()


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Any]]:
    target = tmp_path_factory.mktemp("ferry-a") / "ferry"
    return target, generator.build(target)


@pytest.fixture(scope="module")
def planted() -> dict[str, Any]:
    return json.loads(PLANTED_FILE.read_text(encoding="utf-8"))


def _tree(root: Path) -> dict[str, tuple[str, bytes]]:
    """Every entry under ``root``: files by content, links by where they point."""
    entries: dict[str, tuple[str, bytes]] = {}
    for folder, dirnames, filenames in os.walk(root):
        dirnames.sort()
        for name in sorted(filenames):
            path = Path(folder) / name
            key = path.relative_to(root).as_posix()
            if path.is_symlink():
                entries[key] = ("link", os.readlink(path).encode())
            else:
                entries[key] = ("file", path.read_bytes())
    return entries


def _text_of(root: Path, source: str, line: int | None) -> str:
    """The record's text read the plain way: BOM by codec, newlines unified, JSON line decoded."""
    data = (root / source).read_bytes()
    if source.endswith(".gz"):
        import gzip

        data = gzip.decompress(data)
    codec = "utf-16" if data[:2] in BOMS["utf-16"] else "utf-8-sig"
    text = data.decode(codec).replace("\r\n", "\n")
    if line is None:
        return text
    record = json.loads(text.split("\n")[line - 1])
    assert isinstance(record["text"], str)
    return str(record["text"])


def _entries(planted: dict[str, Any], kind: str) -> list[dict[str, Any]]:
    return [entry for entry in planted["planted"] if entry["kind"] == kind]


# --------------------------------------------------------------------------- determinism


def test_two_builds_are_byte_identical(built: tuple[Path, dict[str, Any]], tmp_path: Path) -> None:
    first_root, first_document = built
    second_root = tmp_path / "again"
    second_document = generator.build(second_root)
    first, second = _tree(first_root), _tree(second_root)
    assert sorted(first) == sorted(second)
    for key in first:
        assert first[key] == second[key], key
    assert generator.planted_json(first_document) == generator.planted_json(second_document)


def test_build_replaces_an_old_archive_but_not_a_foreign_folder(tmp_path: Path) -> None:
    target = tmp_path / "ferry"
    generator.build(target)
    (target / "notices" / "left-over.md").write_text("from an older run\n", encoding="utf-8")
    generator.build(target)
    assert not (target / "notices" / "left-over.md").exists()
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "thesis.txt").write_text("keep me\n", encoding="utf-8")
    with pytest.raises(SystemExit, match="refusing to delete"):
        generator.build(foreign)
    assert (foreign / "thesis.txt").exists()


def test_committed_planted_file_is_current(built: tuple[Path, dict[str, Any]]) -> None:
    _root, document = built
    assert PLANTED_FILE.read_text(encoding="utf-8") == generator.planted_json(document), (
        "fixtures/ferry_planted.json is stale: run python fixtures/make_ferry_archive.py fixtures/ferry"
    )


# --------------------------------------------------------------------------- the planted record


def test_planted_file_parses_as_documented(planted: dict[str, Any]) -> None:
    assert planted["format"] == generator.PLANTED_FORMAT
    assert planted["similarity"]["shingle_words"] == generator.SHINGLE_WORDS
    sources = {row["source"] for row in planted["files"]}
    assert len(sources) == len(planted["files"])
    records = {row["source"]: row["records"] for row in planted["files"]}
    assert planted["summary"]["records"] == sum(records.values())
    for entry in planted["planted"]:
        assert entry["kind"] in KINDS, entry
        assert entry["source"] in sources, entry
        line = entry["line"]
        assert line is None or 1 <= line <= records[entry["source"]] + 1, entry
        if "status" in entry:
            assert entry["status"] in STATUSES, entry
            assert entry["reason"] in REASONS, entry
        for other in ("copy_of_source", "other_source"):
            if other in entry:
                assert entry[other] in sources, entry


def test_every_named_file_exists(built: tuple[Path, dict[str, Any]], planted: dict[str, Any]) -> None:
    root, _document = built
    named = {row["source"] for row in planted["files"]}
    for entry in planted["planted"]:
        named.update(entry[key] for key in ("source", "copy_of_source", "other_source") if key in entry)
    for source in sorted(named):
        assert os.path.lexists(root / source), source
    assert set(_tree(root)) == {row["source"] for row in planted["files"]}


def test_archive_has_the_promised_variety(planted: dict[str, Any]) -> None:
    summary = planted["summary"]
    assert 400 <= summary["records"] <= 600
    assert {"txt", "md", "jsonl", "csv", "json", "txt.gz"} <= set(summary["by_format"])
    assert summary["by_format"]["json"]["files"] == 1
    assert summary["by_format"]["txt.gz"]["files"] == 1
    languages = set(summary["by_language"])
    assert len(languages) >= 4
    assert {"el", "ru", "ja"} & languages


# --------------------------------------------------------------------------- encodings


def test_cp1252_export_is_not_utf8(built: tuple[Path, dict[str, Any]], planted: dict[str, Any]) -> None:
    root, _document = built
    (entry,) = [e for e in _entries(planted, "encoding") if e["encoding"] == "cp1252"]
    data = (root / entry["source"]).read_bytes()
    with pytest.raises(UnicodeDecodeError):
        data.decode("utf-8", errors="strict")
    text = data.decode("cp1252", errors="strict")
    assert "Zoë" in text and "€" in text
    rows = list(csv.reader(io.StringIO(text, newline="")))
    assert all(len(row) == len(rows[0]) for row in rows)


def test_bom_files_start_with_their_mark(built: tuple[Path, dict[str, Any]], planted: dict[str, Any]) -> None:
    root, _document = built
    seen = set()
    for entry in _entries(planted, "encoding"):
        data = (root / entry["source"]).read_bytes()
        if entry["encoding"] == "utf-8-sig":
            assert data.startswith(b"\xef\xbb\xbf"), entry
            data.decode("utf-8", errors="strict")
        elif entry["encoding"] == "utf-16":
            assert data[:2] in (b"\xff\xfe", b"\xfe\xff"), entry
            assert b"\x00" in data
            assert "Белова" in data.decode("utf-16")
        seen.add(entry["encoding"])
    assert {"utf-8-sig", "utf-16", "cp1252"} <= seen


# --------------------------------------------------------------------------- rejections and empties


def test_rejected_records_fail_the_way_they_say(
    built: tuple[Path, dict[str, Any]], planted: dict[str, Any]
) -> None:
    root, _document = built
    reasons = set()
    for entry in _entries(planted, "rejected"):
        path, reason, line = root / entry["source"], entry["reason"], entry["line"]
        reasons.add(reason)
        if reason == "link_outside_input":
            assert path.is_symlink()
            assert not Path(os.path.realpath(path)).is_relative_to(os.path.realpath(root))
            continue
        data = path.read_bytes()
        if reason == "binary_file":
            assert b"\x00" in data and data[:2] not in BOMS["utf-16"]
            continue
        raw = data.decode("utf-8").split("\n")[line - 1]
        if reason == "csv_column_count":
            header = next(csv.reader([data.decode("utf-8").split("\n")[0]]))
            assert len(next(csv.reader([raw]))) != len(header), entry
        elif reason == "invalid_json":
            with pytest.raises(json.JSONDecodeError):
                json.loads(raw)
        elif reason == "not_an_object":
            assert not isinstance(json.loads(raw), dict)
        elif reason == "missing_text_field":
            assert "text" not in json.loads(raw)
        elif reason == "text_not_string":
            assert not isinstance(json.loads(raw)["text"], str)
        else:
            pytest.fail(f"no check for {reason}")
    assert {"invalid_json", "not_an_object", "missing_text_field", "text_not_string"} <= reasons
    assert {"csv_column_count", "binary_file"} <= reasons


def test_empty_documents_are_only_whitespace(
    built: tuple[Path, dict[str, Any]], planted: dict[str, Any]
) -> None:
    root, _document = built
    empties = _entries(planted, "empty")
    assert empties
    for entry in empties:
        assert entry["reason"] == "empty_after_clean"
        assert _text_of(root, entry["source"], entry["line"]).strip() == ""


# --------------------------------------------------------------------------- fixes


def test_planted_fixes_are_present(built: tuple[Path, dict[str, Any]], planted: dict[str, Any]) -> None:
    import ftfy

    root, _document = built
    fixes = set()
    for entry in _entries(planted, "fix"):
        data = (root / entry["source"]).read_bytes()
        text = data.decode("utf-8-sig")
        if entry["line"] is not None:
            text = json.loads(text.split("\n")[entry["line"] - 1])["text"]
        fix = entry["fix"]
        fixes.add(fix)
        if fix == "fix_mojibake":
            assert text != entry["expected_text"]
            assert "â€" in text or "Ã" in text
            assert ftfy.fix_encoding(text) == entry["expected_text"]
        elif fix == "invisible":
            assert "\u200b" in text and "\ufeff" in text
        elif fix == "unify_newlines":
            assert "\r\n" in text
        elif fix == "normalization":
            import unicodedata

            assert unicodedata.normalize("NFC", text) != text
        elif fix == "trim_trailing_whitespace":
            assert any(line != line.rstrip() for line in text.split("\n"))
        elif fix == "max_blank_lines":
            assert "\n\n\n\n" in text
        else:
            pytest.fail(f"no check for {fix}")
    assert {"fix_mojibake", "invisible", "unify_newlines", "normalization"} <= fixes


# --------------------------------------------------------------------------- copies


def _record_id(source: str, line: int | None) -> str:
    return source if line is None else f"{source}:{line}"


def test_exact_copies_equal_their_original_and_come_later(
    built: tuple[Path, dict[str, Any]], planted: dict[str, Any]
) -> None:
    root, _document = built
    copies = _entries(planted, "exact_copy")
    assert len(copies) >= 10
    for entry in copies:
        copy = _text_of(root, entry["source"], entry["line"])
        original = _text_of(root, entry["copy_of_source"], entry["copy_of_line"])
        assert copy == original, entry
        # the original must be first in every reasonable order: path, record id as text, line number
        first = (entry["copy_of_source"], entry["copy_of_line"] or 0)
        assert first < (entry["source"], entry["line"] or 0), entry
        assert _record_id(entry["copy_of_source"], entry["copy_of_line"]) < _record_id(
            entry["source"], entry["line"]
        )


def test_near_pairs_measure_as_recorded(built: tuple[Path, dict[str, Any]], planted: dict[str, Any]) -> None:
    root, _document = built
    pairs = _entries(planted, "near_pair")
    relations = {pair["relation"] for pair in pairs}
    assert relations == {"near", "borderline", "distinct"}
    for pair in pairs:
        first = _text_of(root, pair["source"], pair["line"])
        second = _text_of(root, pair["other_source"], pair["other_line"])
        score = generator.jaccard(first, second)
        assert score == pytest.approx(pair["jaccard"], abs=1e-4), pair
        low, high = generator.RELATION_BANDS[pair["relation"]]
        assert low <= score < high, pair


def test_no_unplanted_near_copies_among_bulletins(
    built: tuple[Path, dict[str, Any]], planted: dict[str, Any]
) -> None:
    """Bulletins share templates, yet two that were not planted as copies stay well apart."""
    root, _document = built
    keys: list[tuple[str, int | None]] = []
    for row in planted["files"]:
        if row["source"].startswith(("bulletins/", "forwarded/")) and row["format"] in ("txt", "jsonl"):
            if row["format"] == "jsonl":
                keys.extend((row["source"], line) for line in range(1, row["records"] + 1))
            else:
                keys.append((row["source"], None))
    # planted relations join documents into groups; pairs inside a group are expected to be similar
    group: dict[tuple[str, int | None], tuple[str, int | None]] = {}

    def find(key: tuple[str, int | None]) -> tuple[str, int | None]:
        while group.setdefault(key, key) != key:
            key = group[key]
        return key

    for entry in planted["planted"]:
        if entry["kind"] == "exact_copy":
            other = (entry["copy_of_source"], entry["copy_of_line"])
        elif entry["kind"] == "near_pair" and entry["relation"] != "distinct":
            other = (entry["other_source"], entry["other_line"])
        else:
            continue
        group[find((entry["source"], entry["line"]))] = find(other)
    shingled = {key: generator.shingles(_text_of(root, *key)) for key in keys}
    worst = 0.0
    for a, b in itertools.combinations(keys, 2):
        if find(a) == find(b):
            continue
        union = len(shingled[a] | shingled[b])
        worst = max(worst, len(shingled[a] & shingled[b]) / union)
    assert worst < 0.6


# --------------------------------------------------------------------------- against the real stages


def test_fix_names_are_clean_stage_counters(planted: dict[str, Any]) -> None:
    from corpusprep.clean import STEP_COUNTERS

    for entry in _entries(planted, "fix"):
        assert entry["fix"] in STEP_COUNTERS, entry


def test_read_and_clean_stages_meet_every_planted_item(
    built: tuple[Path, dict[str, Any]], planted: dict[str, Any]
) -> None:
    """The read stage rejects exactly the planted records and the clean stage counts the planted fixes."""
    from corpusprep.clean import CleanConfig, clean_batch
    from corpusprep.read import InputFile, ReadConfig, read_folder

    root, _document = built
    config = ReadConfig(include=("**/*",), id_field="id", group_field="thread")
    rows: list[dict[str, Any]] = []
    encodings: dict[str, str] = {}
    cleaned: dict[str, dict[str, Any]] = {}
    for item in read_folder(root, config):
        if isinstance(item, InputFile):
            encodings[item.path] = item.encoding
            continue
        rows.extend(item.to_pylist())
        batch, _report = clean_batch(item, CleanConfig())
        cleaned.update((row["record_id"], row) for row in batch.to_pylist())
    assert len(rows) == planted["summary"]["records"]
    rejected = {(row["source"], row["line"]): row["reason"].split(":")[0] for row in rows if row["reason"]}
    expected = {(e["source"], e["line"]): e["reason"] for e in _entries(planted, "rejected")}
    assert rejected == expected
    for entry in _entries(planted, "encoding"):
        assert encodings[entry["source"]] == entry["encoding"], entry
    for entry in _entries(planted, "empty"):
        assert cleaned[_record_id(entry["source"], entry["line"])]["status"] == "empty", entry
    for entry in _entries(planted, "fix"):
        if entry["fix"] == "fix_mojibake":
            assert cleaned[_record_id(entry["source"], entry["line"])]["text"] == entry["expected_text"]
