"""Tests of the clean stage against outside references.

References used, named beside each check:
* the Unicode conformance file NormalizationTest.txt 15.0 (Debian package unicode-data),
  REFERENCES.md 4.2-4.4;
* ftfy's documented input/output pairs, REFERENCES.md 5.2, and ftfy itself (ftfy.fix_text with the
  stage's settings) as the reference output of the repair step;
* Python's unicodedata (14.0 on 3.11) and str methods (isspace, rstrip, splitlines) as reference libraries;
* real text: the Python documentation sources and Debian licence files installed on this machine.
"""

from __future__ import annotations

import bz2
import dataclasses
import json
import re
import sys
import unicodedata
from functools import cache
from pathlib import Path
from typing import Any

import ftfy
import ftfy.bad_codecs  # registers the sloppy-windows-1252 codec
import pyarrow as pa
import pytest
from ftfy import chardata
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from corpusprep.clean import (
    CLEAN_COUNTERS,
    STEP_COUNTERS,
    CleanConfig,
    clean_batch,
    clean_text,
    limit_blank_lines,
    reference_clean_text,
    remove_controls,
    remove_invisible,
    repair_settings,
    trim_trailing_whitespace,
    unify_newlines,
)
from corpusprep.config import setting_docs
from corpusprep.repair import repair_fully, repair_quickly, split_segments
from corpusprep.schema import DOC_SCHEMA, EMPTY, KEPT, REASONS, REJECTED

CASES = Path(__file__).parent / "cases"
NORMALIZATION_TEST = Path("/usr/share/unicode/NormalizationTest.txt.bz2")
PYTHON_DOCS = Path("/usr/share/doc/python3.11-doc/html/_sources")
DEFAULT = CleanConfig()
# Only the normalization step: for the conformance file.
ONLY = {"fix_mojibake": False, "remove_terminal_escapes": False, "unify_newlines": False}
ONLY |= {
    "remove_controls": False,
    "invisible": "keep",
    "trim_trailing_whitespace": False,
    "max_blank_lines": -1,
}


def _cases(name: str) -> list[dict[str, Any]]:
    cases: list[dict[str, Any]] = json.loads((CASES / name).read_text(encoding="utf-8"))["cases"]
    return cases


def _config(overrides: dict[str, Any]) -> CleanConfig:
    return dataclasses.replace(DEFAULT, **overrides)


@cache
def _python_docs() -> tuple[str, ...]:
    if not PYTHON_DOCS.is_dir():
        pytest.skip("the Python documentation sources are missing (Debian package python3.11-doc)")
    return tuple(path.read_text(encoding="utf-8") for path in sorted(PYTHON_DOCS.rglob("*.rst.txt")))


@cache
def _licence_lines() -> tuple[str, ...]:
    """Non-ASCII lines of the Debian licence files: real text in many languages and scripts."""
    lines = []
    for path in sorted(Path("/usr/share/doc").glob("*/copyright")):
        try:
            text = path.read_text(encoding="utf-8")
        except (UnicodeDecodeError, OSError):
            continue
        lines.extend(line for line in text.split("\n") if not line.isascii())
    if not lines:
        pytest.skip("no non-ASCII /usr/share/doc/*/copyright files on this machine")
    return tuple(dict.fromkeys(lines))  # unique, first-seen order


@cache
def _licence_files() -> tuple[str, ...]:
    """Whole non-ASCII Debian licence files, about 0.8 MB of them in path order."""
    files, size = [], 0
    for path in sorted(Path("/usr/share/doc").glob("*/copyright")):
        try:
            text = path.read_text(encoding="utf-8")
        except (UnicodeDecodeError, OSError):
            continue
        if not text.isascii() and size < 800_000:
            files.append(text)
            size += len(text)
    return tuple(files)


def _mojibake(text: str, layers: int = 1) -> str:
    # REFERENCES 5.2: make mojibake with ftfy's sloppy-windows-1252 codec, not cp1252 (which loses 0x9D).
    for _ in range(layers):
        text = text.encode("utf-8").decode("sloppy-windows-1252")
    return text


# --- settings and report names -------------------------------------------------------------------------


def test_config_is_frozen_and_documented() -> None:
    assert dataclasses.fields(CleanConfig)
    for row in setting_docs(CleanConfig):
        assert row.doc, row.key
        assert row.type_name in {"bool", "int", "float", "str", "tuple[str, ...]"}, row
    with pytest.raises(dataclasses.FrozenInstanceError):
        DEFAULT.normalization = "NFKC"  # type: ignore[misc]


def test_every_step_counter_is_a_setting_except_surrogates() -> None:
    # STYLE 3: the definition key, the field and the report counter are the same string.
    fields = {field.name for field in dataclasses.fields(CleanConfig)}
    assert set(STEP_COUNTERS) - fields == {"replace_surrogates"}
    assert fields <= set(STEP_COUNTERS)
    assert "empty_after_clean" in REASONS and "empty_after_clean" in CLEAN_COUNTERS


def test_repair_settings_keep_typography_and_never_cut_lines() -> None:
    fixer = repair_settings(DEFAULT)
    assert (fixer.uncurl_quotes, fixer.fix_character_width, fixer.fix_latin_ligatures) == (
        False,
        False,
        False,
    )
    assert fixer.unescape_html is False and fixer.fix_encoding and fixer.normalization == "NFC"
    assert fixer.max_decode_length == sys.maxsize
    assert repair_settings(_config({"normalization": "none"})).normalization is None


# --- Unicode normalization (REFERENCES 4) ---------------------------------------------------------------


def _conformance_lines() -> list[list[str]]:
    if not NORMALIZATION_TEST.exists():
        pytest.skip(f"{NORMALIZATION_TEST} is missing: install the Debian package unicode-data")
    rows = []
    with bz2.open(NORMALIZATION_TEST, "rt", encoding="utf-8") as handle:
        for line in handle:
            data = line.split("#", 1)[0].strip()
            if not data or data.startswith("@"):
                continue
            columns = ["".join(chr(int(code, 16)) for code in field.split()) for field in data.split(";")[:5]]
            # REFERENCES 4.3: the file is Unicode 15.0, Python 3.11's unicodedata is 14.0; skip lines with
            # code points unassigned in the runtime's database.
            if any(unicodedata.category(char) == "Cn" for char in "".join(columns)):
                continue
            rows.append(columns)
    return rows


def test_normalization_conformance_file() -> None:
    rows = _conformance_lines()
    # REFERENCES 4.3 (verified by computation there): 18,992 lines remain after skipping "Cn" lines.
    if unicodedata.unidata_version == "14.0.0":
        assert len(rows) == 18_992
    nfc, nfkc, none = (
        _config(ONLY),
        _config(ONLY | {"normalization": "NFKC"}),
        _config(ONLY | {"normalization": "none"}),
    )
    failures = []
    for c1, c2, c3, c4, c5 in rows:
        # REFERENCES 4.2 invariants: c2 == toNFC(c1..c3), c4 == toNFC(c4, c5); c4 == toNFKC(c1..c5).
        if [clean_text(x, nfc)[0] for x in (c1, c2, c3, c4, c5)] != [c2, c2, c2, c4, c4]:
            failures.append(("NFC", c1))
        if [clean_text(x, nfkc)[0] for x in (c1, c2, c3, c4, c5)] != [c4] * 5:
            failures.append(("NFKC", c1))
        if clean_text(c1, none)[0] != c1:
            failures.append(("none", c1))
    assert failures == []


@pytest.mark.parametrize("case", _cases("clean_normalization.json"), ids=lambda case: case["label"])
def test_normalization_examples(case: dict[str, Any]) -> None:
    assert clean_text(case["input"], _config(case["settings"]))[0] == case["expected"], case["source"]


def test_whole_document_is_normalized_not_pieces() -> None:
    # REFERENCES 4.4: NFC("A") + NFC("\u030A") != NFC("A\u030A"); the cleaner normalizes whole documents.
    pieces = clean_text("A", DEFAULT)[0] + clean_text("\u030a", DEFAULT)[0]
    assert clean_text("A\u030a", DEFAULT)[0] == unicodedata.normalize("NFC", "A\u030a") == "\u00c5" != pieces


@settings(max_examples=300, derandomize=True, database=None, deadline=None)
@given(
    st.text(
        alphabet=st.sampled_from("aAeEo\n \u0301\u0308\u0323\u030a\u0345\u1100\u1161\u11a8\u212b\u1e9b"),
        max_size=40,
    )
)
def test_line_by_line_normalization_equals_whole(text: str) -> None:
    # ftfy normalizes each line; unicodedata on the whole text is the reference.
    for form in ("NFC", "NFKC"):
        by_line = "".join(unicodedata.normalize(form, segment) for segment in split_segments(text))
        assert by_line == unicodedata.normalize(form, text)


def test_no_code_point_normalizes_to_a_newline() -> None:
    # The fast path relies on no step making or removing "\n"; unicodedata is the reference.
    for code in range(0x110000):
        if 0xD800 <= code <= 0xDFFF or code == 0x0A:
            continue
        char = chr(code)
        assert "\n" not in unicodedata.normalize("NFKC", char), hex(code)
        assert "\n" not in unicodedata.normalize("NFC", char), hex(code)


def test_ftfy_maps_touch_only_non_ascii_and_make_no_newline() -> None:
    # The fast path skips these ftfy steps on ASCII text; ftfy's own tables are the reference.
    for table in (chardata.LIGATURES, chardata.WIDTH_MAP):
        assert min(table) > 0x7F
        assert not any("\n" in (value if isinstance(value, str) else chr(value)) for value in table.values())
    for pattern in (chardata.SINGLE_QUOTE_RE, chardata.DOUBLE_QUOTE_RE, chardata.C1_CONTROL_RE):
        assert not any(pattern.search(chr(code)) for code in range(0x80))


# --- ftfy's documented pairs (REFERENCES 5.2) ----------------------------------------------------------


@pytest.mark.parametrize("case", _cases("clean_ftfy_pairs.json"), ids=lambda case: case["label"])
def test_ftfy_documented_pairs(case: dict[str, Any]) -> None:
    assert clean_text(case["input"], _config(case["settings"]))[0] == case["expected"], case["source"]


@pytest.mark.parametrize("case", _cases("clean_ftfy_pairs.json"), ids=lambda case: case["label"])
def test_default_settings_give_ftfys_own_output(case: dict[str, Any]) -> None:
    # Reference: ftfy.fix_text with the equivalent ftfy settings (none of these inputs has controls,
    # trailing spaces or blank lines, so the stage's own steps do nothing).
    expected = ftfy.fix_text(case["input"], repair_settings(DEFAULT))
    assert clean_text(case["input"], DEFAULT)[0] == expected


def test_mona_lisa_default_keeps_the_curly_apostrophe() -> None:
    # REFERENCES 5.2's Mona Lisa input is three layers of sloppy-windows-1252 mojibake of U+2019
    # (checked here with the codec); with uncurl_quotes off the repair gives the U+2019 back.
    documented = _cases("clean_ftfy_pairs.json")[1]["input"]
    assert _mojibake("The Mona Lisa doesn\u2019t have eyebrows.", layers=3) == documented
    cleaned, counts = clean_text(documented, DEFAULT)
    assert cleaned == "The Mona Lisa doesn\u2019t have eyebrows."
    assert counts["fix_mojibake"] == 1 and counts["uncurl_quotes"] == 0
    assert clean_text(cleaned, DEFAULT)[0] == cleaned  # REFERENCES 5.2: fix_text is idempotent on this case


@pytest.mark.parametrize("case", _cases("clean_typography.json"), ids=lambda case: case["label"])
def test_typography_is_left_alone(case: dict[str, Any]) -> None:
    assert clean_text(case["input"], DEFAULT) == (case["expected"], dict.fromkeys(STEP_COUNTERS, 0))
    if case["ftfy_default_step"]:
        # ftfy's own defaults rewrite it (so the guard means something), in the named step.
        assert ftfy.fix_text(case["input"]) != case["input"]
        _fixed, plan = ftfy.fix_and_explain(case["input"])
        assert ("apply", case["ftfy_default_step"]) in [tuple(step) for step in plan or ()]


def test_c1_control_next_line_is_read_as_windows_1252() -> None:
    # Reference: Python's cp1252 codec; U+0085 is byte 0x85 read as Latin-1.
    assert clean_text("wait\x85 what", DEFAULT)[0] == "wait" + b"\x85".decode("cp1252") + " what"
    assert clean_text("wait\x85 what", _config({"fix_mojibake": False}))[0] == "wait what"


def test_ascii_python_docs_pass_through_the_repair() -> None:
    # Reference: ftfy itself leaves every ASCII document of the Python docs unchanged.
    settings_ = repair_settings(DEFAULT)
    ascii_docs = [doc for doc in _python_docs() if doc.isascii()]
    assert len(ascii_docs) > 100
    for doc in ascii_docs:
        assert ftfy.fix_text(doc, settings_) == doc
        assert repair_quickly(doc, settings_) == (doc, set())


# --- the stage's own steps -----------------------------------------------------------------------------


def test_controls_removed_are_exactly_cc_but_tab_and_newline() -> None:
    # Reference: unicodedata.category == "Cc".
    every = "".join(chr(code) for code in range(0x3000) if not 0xD800 <= code <= 0xDFFF)
    kept = "".join(char for char in every if unicodedata.category(char) != "Cc" or char in "\t\n")
    assert remove_controls(every) == kept
    assert remove_controls(every, keep_carriage_return=True) == "".join(
        char for char in every if unicodedata.category(char) != "Cc" or char in "\t\n\r"
    )


def test_invisible_characters_are_format_characters_and_joiners_stay() -> None:
    # Reference: unicodedata.category == "Cf" for every removed character.
    removed = [chr(code) for code in range(0x10000) if remove_invisible(chr(code)) == ""]
    assert removed and all(unicodedata.category(char) == "Cf" for char in removed)
    for kept in ("\u200c", "\u200d", "\u200e", "\u200f", "\u180e", "\ufe0f", "\u034f"):
        assert remove_invisible(kept) == kept, unicodedata.name(kept, hex(ord(kept)))
    assert clean_text("\ufeffbyte order mark", DEFAULT)[0] == "byte order mark"
    assert clean_text("zero\u200bwidth", _config({"invisible": "keep"}))[0] == "zero\u200bwidth"


_LINE_TEXT = st.text(
    alphabet=st.sampled_from("ab \t\n\r\u00a0\u3000\u2028\u2029\x0b\x0c\x85\x1f"), max_size=60
)


@settings(max_examples=400, derandomize=True, database=None, deadline=None)
@given(_LINE_TEXT)
def test_unify_newlines_matches_splitlines(text: str) -> None:
    # Reference: str.splitlines treats \r\n, \r, U+2028, U+2029 (and others) as line boundaries.
    text = text.replace("\x0b", "").replace("\x0c", "").replace("\x85", "").replace("\x1f", "")
    unified = unify_newlines(text)
    assert unified.split("\n")[: len(text.splitlines())] == text.splitlines()
    assert not set(unified) & {"\r", "\u2028", "\u2029"}


@cache
def _spaces_but_line_ends() -> str:
    return "".join(chr(code) for code in range(0x110000) if chr(code).isspace() and chr(code) not in "\r\n")


@settings(max_examples=400, derandomize=True, database=None, deadline=None)
@given(_LINE_TEXT)
def test_trim_trailing_whitespace_matches_rstrip(text: str) -> None:
    # Reference: str.rstrip / str.isspace; lines end at \n or \r, which are kept.
    spaces = _spaces_but_line_ends()
    pieces = re.split(r"([\r\n])", text)
    expected = "".join(piece if piece in ("\r", "\n") else piece.rstrip(spaces) for piece in pieces)
    assert trim_trailing_whitespace(text) == expected


def _limit_blank_lines_by_lines(text: str, maximum: int) -> str:
    """A line-by-line restatement of the rule, to compare the regular expressions with."""
    parts = text.split("\n")
    lines = [part + "\n" for part in parts[:-1]] + ([parts[-1]] if parts[-1] else [])
    kept, run = [], 0
    for line in lines:
        blank = line.strip() == ""
        run = run + 1 if blank else 0
        if not blank or run <= maximum:
            kept.append(line)
    return "".join(kept)


@settings(max_examples=400, derandomize=True, database=None, deadline=None)
@given(st.text(alphabet=st.sampled_from("a \t\n\u3000"), max_size=40), st.integers(min_value=-1, max_value=3))
def test_limit_blank_lines_rule(text: str, maximum: int) -> None:
    expected = text if maximum < 0 else _limit_blank_lines_by_lines(text, maximum)
    assert limit_blank_lines(text, maximum) == expected


def test_surrogates_become_characters_or_replacement() -> None:
    # ftfy.fixes.fix_surrogates docstring (6.3.1): a high+low pair is the character it encodes
    # (U+D83D U+DCA9 = U+1F4A9 by the UTF-16 formula), a lone or reversed one becomes U+FFFD.
    assert clean_text("\ud83d\udca9", DEFAULT) == ("\U0001f4a9", clean_text("\ud83d\udca9", DEFAULT)[1])
    cleaned, counts = clean_text("x\udca9\ud83dy\ud800", DEFAULT)
    assert cleaned == "x\ufffd\ufffdy\ufffd" and counts["replace_surrogates"] == 1
    cleaned.encode("utf-8")


# --- fast path == ftfy on every line ---------------------------------------------------------------------


def _assert_fast_equals_slow(texts: list[str], config: CleanConfig) -> None:
    for text in texts:
        assert clean_text(text, config) == reference_clean_text(text, config), text[:200]


@pytest.mark.slow
def test_fast_path_equals_ftfy_on_python_docs() -> None:
    docs = list(_python_docs())
    settings_ = repair_settings(DEFAULT)
    for doc in docs:
        # The reference repair is ftfy.fix_text itself, and the fast repair gives the same.
        fixed = ftfy.fix_text(doc, settings_)
        assert repair_fully(doc, settings_)[0] == fixed
        assert repair_quickly(doc, settings_) == repair_fully(doc, settings_)
    _assert_fast_equals_slow(docs, DEFAULT)


@pytest.mark.slow
def test_fast_path_equals_ftfy_on_real_multilingual_text_and_its_mojibake() -> None:
    lines = list(_licence_lines())[:4000]
    docs = ["\n".join(lines[start : start + 40]) + "\n" for start in range(0, len(lines), 40)]
    docs += list(_licence_files())
    damaged = [_mojibake(doc) for doc in docs[::4]] + [_mojibake(doc, layers=2) for doc in docs[1::8]]
    mixed = ["\n".join(line if index % 3 else _mojibake(line) for index, line in enumerate(lines[:600]))]
    settings_ = repair_settings(DEFAULT)
    for text in docs + damaged + mixed:
        assert repair_quickly(text, settings_) == repair_fully(text, settings_)
        assert repair_fully(text, settings_)[0] == ftfy.fix_text(text, settings_)
    _assert_fast_equals_slow(docs + damaged + mixed, DEFAULT)
    everything = {
        "unescape_html": True,
        "uncurl_quotes": True,
        "fix_character_width": True,
        "normalization": "NFKC",
    }
    _assert_fast_equals_slow(docs[:20] + damaged[:10], _config(everything | {"fix_latin_ligatures": True}))


_TRICKY = (
    "aAz09 .,;:!?'\"&#<>;\n\r\t\x1b[m\x00\x0b\x1a\x7f\x80\x81\x85\x8d\x90\x93\x9d\xa0\xad"
    "ÃÂâ€œ™šžŸ¢£©®°±²³´µ·»¼½¾¿ÀÉàáéêöüçœŒ×ØÙ∂√≈‚Ä"
    "\u0301\u0308\u0323\u030a\u0345\u1100\u1161\u212a\u212b\ufb01\uff21\uff01\u3000\u3001"
    "\u200b\u200c\u200d\u2060\ufeff\u2028\u2029\u2018\u2019\u201c\u201d"
    "вЂГРСβΓΟāงéЯ中文\U0001f468\ud800\udc00\ud83d\udca9"
)
# Pieces whose combination makes new mojibake only after a step has run: NFC composes A + U+0303 into
# U+00C3, removing a terminal escape or a control joins U+00C3 to U+00A9, NFKC turns U+FF21 into "A".
_PIECES = (
    "\u00c3",
    "\u00a9",
    "\u00b6",
    "\u00c2",
    "\u00a0",
    "A\u0303",
    "A",
    "\uff21",
    "\u0303",
    "\x1b[0m",
    "\x1b[1m",
    "\x00",
    "\u200b",
    "\u00ad",
    "\ufeff",
    " ",
    "\t",
    "\n",
    "\r\n",
    "\r",
    "sch",
    "n",
    "\u00e9",
    "\u00e2\u20ac",
    "\u2122",
    "\x9d",
    "\x85",
    "&amp;",
    "&EACUTE;",
    "&#10;",
    "\uff06amp;",
    "\ufb01",
    "\u2019",
    "\ud83d",
    "\udca9",
)
_TEXTS = st.one_of(
    st.lists(st.sampled_from(_PIECES), max_size=12).map("".join),
    st.text(alphabet=st.sampled_from(_TRICKY), max_size=50),
    st.text(max_size=30).map(_mojibake),
    st.lists(st.sampled_from(["caf\u00e9", "na\u00efve", "\u2014", "\u201cq\u201d", "\u00e9"]), max_size=6)
    .map(" \n".join)
    .map(_mojibake),
    st.text(st.characters(exclude_categories=()), max_size=30),
)
_CONFIGS = st.builds(
    CleanConfig,
    fix_mojibake=st.booleans(),
    unescape_html=st.booleans(),
    remove_terminal_escapes=st.booleans(),
    fix_latin_ligatures=st.booleans(),
    fix_character_width=st.booleans(),
    uncurl_quotes=st.booleans(),
    normalization=st.sampled_from(["NFC", "NFKC", "none"]),
    unify_newlines=st.booleans(),
    remove_controls=st.booleans(),
    invisible=st.sampled_from(["remove", "keep"]),
    trim_trailing_whitespace=st.booleans(),
    max_blank_lines=st.integers(min_value=-1, max_value=3),
)


@settings(
    max_examples=1500,
    derandomize=True,
    database=None,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
@given(_TEXTS)
def test_default_fast_equals_slow_idempotent_and_utf8(text: str) -> None:
    cleaned, counts = clean_text(text, DEFAULT)
    assert (cleaned, counts) == reference_clean_text(text, DEFAULT)
    assert clean_text(cleaned, DEFAULT) == (cleaned, dict.fromkeys(STEP_COUNTERS, 0))
    cleaned.encode("utf-8")
    assert set(counts) == set(STEP_COUNTERS) and set(counts.values()) <= {0, 1}


@settings(
    max_examples=1500,
    derandomize=True,
    database=None,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
@given(_TEXTS, _CONFIGS)
def test_any_settings_fast_equals_slow_and_idempotent(text: str, config: CleanConfig) -> None:
    cleaned, counts = clean_text(text, config)
    assert (cleaned, counts) == reference_clean_text(text, config)
    assert clean_text(cleaned, config)[0] == cleaned
    cleaned.encode("utf-8")
    fixer = repair_settings(config)
    assert repair_quickly(text, fixer) == repair_fully(text, fixer)
    assert repair_fully(text, fixer)[0] == ftfy.fix_text(text, fixer)


_FIXER_SETTINGS = st.builds(
    ftfy.TextFixerConfig,
    unescape_html=st.booleans(),
    remove_terminal_escapes=st.booleans(),
    fix_encoding=st.booleans(),
    restore_byte_a0=st.booleans(),
    replace_lossy_sequences=st.booleans(),
    decode_inconsistent_utf8=st.booleans(),
    fix_c1_controls=st.booleans(),
    fix_latin_ligatures=st.booleans(),
    fix_character_width=st.booleans(),
    uncurl_quotes=st.booleans(),
    fix_line_breaks=st.booleans(),
    fix_surrogates=st.booleans(),
    remove_control_chars=st.booleans(),
    normalization=st.sampled_from(["NFC", "NFKC", "NFD", "NFKD", None]),
    max_decode_length=st.just(sys.maxsize),
    explain=st.just(False),
).map(
    # ftfy 6.3.1's fix_text (explain off) runs fix_encoding with ftfy's default sub-settings, whatever
    # the given ones; fix_and_explain uses the given ones. They agree when the sub-settings are on.
    lambda fixer: (
        fixer._replace(
            restore_byte_a0=True,
            replace_lossy_sequences=True,
            decode_inconsistent_utf8=True,
            fix_c1_controls=True,
        )
        if fixer.fix_encoding
        else fixer
    )
)


@settings(max_examples=1500, derandomize=True, database=None, deadline=None)
@given(_TEXTS, _FIXER_SETTINGS)
def test_fast_repair_equals_ftfy_for_any_ftfy_settings(text: str, fixer: ftfy.TextFixerConfig) -> None:
    # Reference: ftfy.fix_text itself, with any combination of its boolean settings.
    assert repair_fully(text, fixer)[0] == ftfy.fix_text(text, fixer)
    assert repair_quickly(text, fixer) == repair_fully(text, fixer)


# --- batches -------------------------------------------------------------------------------------------


def _batch(rows: list[dict[str, Any]]) -> pa.RecordBatch:
    base = {
        "record_id": "",
        "source": "a.jsonl",
        "line": None,
        "given_id": None,
        "group": None,
        "reason": None,
    }
    return pa.RecordBatch.from_pylist([base | row for row in rows], schema=DOC_SCHEMA)


def test_clean_batch() -> None:
    rows = [
        {"record_id": "a.jsonl:1", "text": "sch\u00c3\u00b6n  \r\n", "status": KEPT},
        {"record_id": "a.jsonl:2", "text": None, "status": REJECTED, "reason": "invalid_json: x"},
        {"record_id": "a.jsonl:3", "text": " \u200b\t\r\n\x00\n", "status": KEPT},
        {"record_id": "a.jsonl:4", "text": "plain\n", "status": KEPT, "group": "g"},
        {
            "record_id": "a.jsonl:5",
            "text": "ignored \u00c3\u00b6",
            "status": "exact_copy",
            "reason": "exact_copy",
        },
    ]
    batch = _batch(rows)
    before = batch.to_pylist()
    cleaned, counts = clean_batch(batch, DEFAULT)
    assert batch.to_pylist() == before  # input untouched
    assert cleaned.schema.equals(DOC_SCHEMA) and cleaned.num_rows == len(rows)
    out = cleaned.to_pylist()
    assert [row["record_id"] for row in out] == [row["record_id"] for row in rows]
    assert out[0]["text"] == clean_text(rows[0]["text"], DEFAULT)[0] == "sch\u00f6n\n"
    assert out[1] == before[1] and out[4] == before[4]
    assert (out[2]["status"], out[2]["reason"], out[2]["text"]) == (EMPTY, "empty_after_clean", None)
    assert out[3] == before[3]
    expected = dict.fromkeys(CLEAN_COUNTERS, 0) | {"documents": 3, "empty_after_clean": 1}
    for row in (rows[0], rows[2], rows[3]):
        for counter, value in clean_text(row["text"], DEFAULT)[1].items():
            expected[counter] += value
    assert counts == expected
    assert counts["fix_mojibake"] == 1 and counts["unify_newlines"] == 2


def test_clean_batch_refuses_a_kept_row_without_text() -> None:
    with pytest.raises(RuntimeError, match=r"a\.jsonl:1"):
        clean_batch(_batch([{"record_id": "a.jsonl:1", "text": None, "status": KEPT}]), DEFAULT)
