"""The encoding decision of the read stage, checked against RFC 3629 and Python's own codecs.

Expected texts come from Python's codecs module decoding the same bytes;
the invalid UTF-8 sequences and boundary encodings are those of RFC 3629 §3
as listed in REFERENCES.md §5.1 (verified there with Python's strict codec).
"""

from __future__ import annotations

import codecs
import gzip
import tracemalloc
from pathlib import Path
from typing import Any

import pytest

from corpusprep.decode import check_fallback_encoding, detect_bom
from corpusprep.errors import DefinitionError
from corpusprep.read import InputFile, ReadConfig, read_folder


def read_all(folder: Path, config: ReadConfig | None = None) -> tuple[list[dict[str, Any]], list[InputFile]]:
    rows: list[dict[str, Any]] = []
    files: list[InputFile] = []
    for item in read_folder(folder, config or ReadConfig()):
        if isinstance(item, InputFile):
            files.append(item)
        else:
            rows.extend(item.to_pylist())
    return rows, files


def read_one(
    tmp_path: Path, name: str, data: bytes, config: ReadConfig | None = None
) -> tuple[dict[str, Any], InputFile]:
    folder = tmp_path / "in"
    folder.mkdir()
    (folder / name).write_bytes(data)
    rows, files = read_all(folder, config)
    assert len(rows) == 1 and len(files) == 1
    return rows[0], files[0]


# --- byte order marks -------------------------------------------------------------------------


def test_utf8_bom_is_stripped(tmp_path: Path) -> None:
    data = b"\xef\xbb\xbfabc"
    # REFERENCES §5.1 (Python codecs): utf-8 keeps U+FEFF, utf-8-sig strips it.
    assert data.decode("utf-8") == "\ufeffabc"
    assert data.decode("utf-8-sig") == "abc"
    row, info = read_one(tmp_path, "bom.txt", data)
    assert row["text"] == "abc"
    assert info.encoding == "utf-8-sig"


@pytest.mark.parametrize(
    ("codec", "mark"),
    [
        ("utf-16-le", codecs.BOM_UTF16_LE),
        ("utf-16-be", codecs.BOM_UTF16_BE),
        ("utf-32-le", codecs.BOM_UTF32_LE),
        ("utf-32-be", codecs.BOM_UTF32_BE),
    ],
)
def test_utf16_and_utf32_by_byte_order_mark(tmp_path: Path, codec: str, mark: bytes) -> None:
    text = "Grüße, 日本語, \U0001d11e\n"
    data = mark + text.encode(codec)
    family = codec[:6]
    # Python's codecs (reference): the BOM-reading codec gives back the text without the mark.
    assert data.decode(family) == text
    row, info = read_one(tmp_path, "wide.txt", data)
    assert row["status"] == "kept"
    assert row["text"] == text
    assert info.encoding == family


def test_utf32_le_mark_wins_over_utf16_le_mark(tmp_path: Path) -> None:
    # FF FE 00 00 is both the UTF-32 LE mark and UTF-16 LE mark + U+0000; Python's utf-32
    # decoder (reference) reads it as UTF-32 LE, and so must we (common practice).
    data = codecs.BOM_UTF32_LE + "a".encode("utf-32-le")
    assert data.startswith(codecs.BOM_UTF16_LE)
    assert data.decode("utf-32") == "a"
    assert detect_bom(data) == "utf-32"
    row, info = read_one(tmp_path, "w.txt", data)
    assert (row["text"], info.encoding) == ("a", "utf-32")


def test_truncated_utf16_is_undecodable_without_fallback(tmp_path: Path) -> None:
    data = codecs.BOM_UTF16_LE + "ab".encode("utf-16-le") + b"\x00"  # odd length
    with pytest.raises(UnicodeDecodeError):  # Python's utf-16 codec (reference) refuses it
        data.decode("utf-16")
    row, info = read_one(tmp_path, "odd.txt", data)
    assert row["status"] == "rejected"
    assert row["reason"].startswith("undecodable")
    assert row["record_id"] == "odd.txt:-"
    assert info.encoding == ""


def test_nul_byte_without_wide_mark_is_binary(tmp_path: Path) -> None:
    row, info = read_one(tmp_path, "b.txt", b"abc\x00def")
    assert row["status"] == "rejected"
    assert row["reason"].startswith("binary_file")
    assert row["line"] is None and row["text"] is None
    assert info.rejected == 1


def test_nul_byte_after_utf8_mark_is_binary(tmp_path: Path) -> None:
    row, _ = read_one(tmp_path, "b.txt", codecs.BOM_UTF8 + b"a\x00")
    assert row["reason"].startswith("binary_file")


# --- RFC 3629 ---------------------------------------------------------------------------------

# RFC 3629 §3 / REFERENCES §5.1: each sequence is rejected by a strict UTF-8 decoder.
INVALID_UTF8 = [
    "C0 80",
    "C1 BF",
    "E0 80 80",
    "ED A0 80",
    "ED BF BF",
    "F4 90 80 80",
    "F5 80 80 80",
    "FE",
    "FF",
    "80",
    "C2",
    "E2 82",
    "F8 88 80 80 80",
]


def _expected_fallback(data: bytes, fallback: str) -> str | None:
    """What Python's own codec makes of ``data`` (None if it refuses)."""
    try:
        return data.decode(fallback)
    except UnicodeDecodeError:
        return None


@pytest.mark.parametrize("sequence", INVALID_UTF8)
def test_invalid_utf8_uses_the_fallback_or_is_undecodable(tmp_path: Path, sequence: str) -> None:
    data = b"before " + bytes.fromhex(sequence) + b" after"
    with pytest.raises(UnicodeDecodeError):  # RFC 3629 §3, Python's strict utf-8 codec
        data.decode("utf-8")
    expected = _expected_fallback(data, "cp1252")
    row, info = read_one(tmp_path, "x.txt", data)
    if expected is None:
        assert row["status"] == "rejected"
        assert row["reason"].startswith("undecodable")
        assert "cp1252" in row["reason"]
    else:
        assert row["status"] == "kept"
        assert row["text"] == expected
        assert info.encoding == "cp1252"


def test_both_fallback_outcomes_occur_in_the_rfc_list() -> None:
    # Guards the parametrised test above: with cp1252 some sequences decode and one (F4 90 80 80,
    # byte 0x90 is undefined in cp1252 per Python's codec) does not, so both branches run.
    outcomes = {_expected_fallback(bytes.fromhex(sequence), "cp1252") is None for sequence in INVALID_UTF8}
    assert outcomes == {True, False}


@pytest.mark.parametrize("byte", [0x81, 0x8D, 0x8F, 0x90, 0x9D])
def test_bytes_undefined_in_cp1252_make_the_file_undecodable(tmp_path: Path, byte: int) -> None:
    data = b"ok " + bytes([byte]) + b"\n"
    with pytest.raises(UnicodeDecodeError):  # lone continuation byte: not UTF-8 (RFC 3629 §3)
        data.decode("utf-8")
    with pytest.raises(UnicodeDecodeError):  # Python's cp1252 codec leaves this byte undefined
        data.decode("cp1252")
    row, info = read_one(tmp_path, "x.txt", data)
    assert row["status"] == "rejected"
    assert row["reason"].startswith("undecodable")
    assert f"0x{byte:02X}" in row["reason"]
    assert "line 1" in row["reason"]
    assert info.encoding == ""


@pytest.mark.parametrize("sequence", INVALID_UTF8)
def test_latin1_fallback_decodes_every_byte(tmp_path: Path, sequence: str) -> None:
    data = bytes.fromhex(sequence)
    config = ReadConfig(fallback_encoding="latin-1")
    row, info = read_one(tmp_path, "x.txt", data, config)
    # Python's latin-1 codec (ISO 8859-1) maps every byte to U+0000..U+00FF.
    assert row["text"] == data.decode("latin-1")
    assert info.encoding == codecs.lookup("latin-1").name


@pytest.mark.parametrize("sequence", INVALID_UTF8)
def test_without_fallback_invalid_utf8_is_undecodable(tmp_path: Path, sequence: str) -> None:
    row, _ = read_one(tmp_path, "x.txt", bytes.fromhex(sequence), ReadConfig(fallback_encoding=""))
    assert row["status"] == "rejected"
    assert row["reason"].startswith("undecodable")
    assert "no fallback" in row["reason"]


# RFC 3629 §3 byte lengths; the exact encodings were computed in REFERENCES §5.1.
BOUNDARIES = [
    (0x007F, "7F"),
    (0x0080, "C2 80"),
    (0x07FF, "DF BF"),
    (0x0800, "E0 A0 80"),
    (0xFFFF, "EF BF BF"),
    (0x10000, "F0 90 80 80"),
    (0x10FFFF, "F4 8F BF BF"),
]


@pytest.mark.parametrize(("code_point", "encoded"), BOUNDARIES)
def test_boundary_code_points_round_trip(tmp_path: Path, code_point: int, encoded: str) -> None:
    data = bytes.fromhex(encoded)
    expected_length = (
        1 if code_point < 0x80 else 2 if code_point < 0x800 else 3 if code_point < 0x10000 else 4
    )
    assert len(data) == expected_length  # RFC 3629 §3 table
    assert chr(code_point).encode("utf-8") == data
    row, info = read_one(tmp_path, "cp.txt", data)
    assert row["text"] == chr(code_point)
    assert len(row["text"].encode("utf-8")) == expected_length
    assert info.encoding == "utf-8"


def test_rfc3629_section7_examples(tmp_path: Path) -> None:
    # RFC 3629 §7 examples as given in REFERENCES §5.1 (attribution recalled there, encodings verified).
    examples = {
        "a.txt": ("41 E2 89 A2 CE 91 2E", "A≢Α."),
        "b.txt": ("ED 95 9C EA B5 AD EC 96 B4", "한국어"),
        "c.txt": ("E6 97 A5 E6 9C AC E8 AA 9E", "日本語"),
        "d.txt": ("EF BB BF F0 A3 8E B4", "\U000233b4"),
    }
    folder = tmp_path / "in"
    folder.mkdir()
    for name, (encoded, _) in examples.items():
        (folder / name).write_bytes(bytes.fromhex(encoded))
    rows, _ = read_all(folder)
    assert {row["source"]: row["text"] for row in rows} == {
        name: text for name, (_, text) in examples.items()
    }


def test_encoding_is_decided_per_file_not_per_line(tmp_path: Path) -> None:
    # One cp1252 line makes the whole JSON Lines file cp1252: the UTF-8 line is then read as
    # cp1252 too (Python's codec gives the expected mojibake, which cleaning may repair later).
    utf8_line = '{"text": "café"}\n'.encode()
    legacy_line = '{"text": "naïve"}\n'.encode("cp1252")
    data = utf8_line + legacy_line
    rows, files = read_all(_folder_with(tmp_path, "m.jsonl", data))
    assert files[0].encoding == "cp1252"
    assert [row["text"] for row in rows] == ["café".encode().decode("cp1252"), "naïve"]


def _folder_with(tmp_path: Path, name: str, data: bytes) -> Path:
    folder = tmp_path / "in"
    folder.mkdir(exist_ok=True)
    (folder / name).write_bytes(data)
    return folder


# --- gzip and size limits ---------------------------------------------------------------------


def test_gzip_file_is_decompressed_and_hashed_as_stored(tmp_path: Path) -> None:
    from corpusprep.hashing import hash_bytes

    packed = gzip.compress('{"text": "zipped"}\n'.encode("utf-16"))  # gzip holding UTF-16 with a BOM
    row, info = read_one(tmp_path, "z.jsonl.gz", packed)
    assert row["text"] == "zipped"
    assert info.encoding == "utf-16"
    assert info.format == "jsonl"
    assert info.size == len(packed)
    assert info.xxh3_128 == hash_bytes(packed)


def _write_gzip_of(path: Path, chunk: bytes, repeats: int) -> None:
    with gzip.open(path, "wb", compresslevel=9) as handle:
        for _ in range(repeats):
            handle.write(chunk)


def test_gzip_bomb_is_too_large_and_memory_stays_bounded(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    folder.mkdir()
    expanded = 64 * (1 << 20)  # 64 MiB of content in a file of some 64 KiB
    _write_gzip_of(folder / "bomb.txt.gz", b"a" * (1 << 20), 64)
    assert (folder / "bomb.txt.gz").stat().st_size < expanded // 100
    config = ReadConfig(max_file_bytes=1 << 20)
    tracemalloc.start()
    try:
        rows, files = read_all(folder, config)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert rows[0]["status"] == "rejected"
    assert rows[0]["reason"].startswith("too_large")
    assert files[0].xxh3_128 != ""
    assert peak < expanded // 8  # a few chunks, never the expanded content


def test_gzip_within_the_limit_is_read(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    folder.mkdir()
    _write_gzip_of(folder / "ok.txt.gz", b"b" * 1000, 3)
    rows, _ = read_all(folder, ReadConfig(max_file_bytes=3000))
    assert rows[0]["text"] == "b" * 3000
    rows, _ = read_all(folder, ReadConfig(max_file_bytes=2999))
    assert rows[0]["reason"].startswith("too_large")


def test_plain_file_over_the_limit_is_too_large(tmp_path: Path) -> None:
    row, info = read_one(tmp_path, "big.txt", b"x" * 101, ReadConfig(max_file_bytes=100))
    assert row["reason"].startswith("too_large")
    assert info.size == 101


@pytest.mark.parametrize("data", [b"not gzip at all", gzip.compress(b"hello world" * 100)[:-12]])
def test_broken_gzip_is_unreadable(tmp_path: Path, data: bytes) -> None:
    row, _ = read_one(tmp_path, "bad.txt.gz", data)
    assert row["status"] == "rejected"
    assert row["reason"].startswith("unreadable")
    assert row["record_id"] == "bad.txt.gz:-"


# --- the fallback setting ---------------------------------------------------------------------


def test_fallback_names_are_checked() -> None:
    assert check_fallback_encoding("windows-1252") == "cp1252"  # Python's codec registry alias
    for bad in ("no-such-codec", "rot13", "utf-16", "cp037"):
        with pytest.raises(DefinitionError, match=r"read\.fallback_encoding"):
            ReadConfig(fallback_encoding=bad)
    ReadConfig(fallback_encoding="")  # no fallback at all
