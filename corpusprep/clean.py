"""The clean stage: repair encoding damage, normalize, remove controls and invisible characters, tidy lines.

One round of cleaning runs these steps in this order; the counter of each step
in the report has the name of its setting:

1. ``unify_newlines`` - ``\\r\\n``, ``\\r``, U+2028 and U+2029 become ``\\n``
   (first, so that ftfy sees real lines).
2. ftfy (:func:`ftfy.fix_text` with :func:`repair_settings`): ``fix_mojibake``,
   ``unescape_html``, ``fix_latin_ligatures``, ``fix_character_width``,
   ``uncurl_quotes``, ``remove_terminal_escapes``, ``normalization``, and the
   always-on ``replace_surrogates`` (UTF-16 surrogate pairs become the
   character they encode, lone surrogates become U+FFFD, since later stages
   write UTF-8). ftfy normalizes line by line, which equals normalizing the
   whole document because ``\\n`` composes with nothing (UAX #15); the tests
   check it.
3. ``remove_controls``, 4. ``invisible``, 5. ``trim_trailing_whitespace``,
   6. ``max_blank_lines``.

Removing a character can join two others into something the earlier steps
would change (``e``, a control, U+0301 is NFC; without the control it is not).
So rounds repeat until one round changes nothing (at most 8 rounds): the
result is a fixed point, and cleaning is idempotent.

Counts: for each step, 1 if the step changed the document in any round, else
0, so the stage report says in how many documents each step changed something.
For the ftfy steps, on a line ftfy has to look at closely, "changed" means
listed in ftfy's explanation of a line it changed.

The defaults repair encoding damage without rewriting legitimate typography:
curly quotes, full-width CJK punctuation, ligatures and HTML entities stay as
they are. (ftfy's own defaults change all of those.)
"""

from __future__ import annotations

import re
import sys
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import ftfy
import pyarrow as pa

from corpusprep.config import setting
from corpusprep.errors import IntegrityError
from corpusprep.repair import C1_IN_UTF8, repair_fully, repair_quickly
from corpusprep.schema import DOC_SCHEMA, EMPTY, KEPT

__all__ = [
    "CLEAN_COUNTERS",
    "STEP_COUNTERS",
    "CleanConfig",
    "clean_batch",
    "clean_text",
    "limit_blank_lines",
    "reference_clean_text",
    "remove_controls",
    "remove_invisible",
    "repair_settings",
    "trim_trailing_whitespace",
    "unify_newlines",
]

#: Counter names of the steps, in the order they run; each is also a setting
#: name, except ``replace_surrogates`` (always on).
STEP_COUNTERS = (
    "unify_newlines",
    "fix_mojibake",
    "unescape_html",
    "fix_latin_ligatures",
    "fix_character_width",
    "uncurl_quotes",
    "replace_surrogates",
    "remove_terminal_escapes",
    "normalization",
    "remove_controls",
    "invisible",
    "trim_trailing_whitespace",
    "max_blank_lines",
)
#: Every counter of the stage report (:func:`clean_batch`).
CLEAN_COUNTERS = ("documents", "empty_after_clean", *STEP_COUNTERS)

EMPTY_AFTER_CLEAN = "empty_after_clean"
_MAX_ROUNDS = 8


@dataclass(frozen=True, slots=True, kw_only=True)
class CleanConfig:
    """Settings of the clean stage (definition table ``[clean]``)."""

    fix_mojibake: bool = setting(
        True,
        "Repair text that was decoded with the wrong encoding (ftfy's encoding fixes: UTF-8 read as "
        "Latin-1, Windows-1252 and other single-byte encodings, spaces that replaced byte A0, and C1 "
        "controls read as their Windows-1252 characters).",
    )
    unescape_html: bool = setting(
        False,
        "Replace HTML entities such as `&amp;` and `&EACUTE;` by their characters. Off: entities in "
        "plain text are usually meant literally (code, markup samples).",
    )
    remove_terminal_escapes: bool = setting(
        True, "Remove terminal colour and cursor sequences (ESC [ ... letter)."
    )
    fix_latin_ligatures: bool = setting(
        False, "Split Latin ligatures such as U+FB01 into their letters. Off: legitimate typography."
    )
    fix_character_width: bool = setting(
        False,
        "Replace full-width Latin letters and half-width katakana by their usual widths. Off: it also "
        "rewrites the ideographic space and full-width punctuation in Chinese and Japanese text.",
    )
    uncurl_quotes: bool = setting(
        False, "Replace curly quotation marks by straight ones. Off: legitimate typography."
    )
    normalization: str = setting(
        "NFC",
        "Unicode normalization of the whole document: `NFC` (canonical), `NFKC` (also folds "
        "compatibility characters: the fi ligature, superscripts, full-width forms), `none`.",
        choices=("NFC", "NFKC", "none"),
    )
    unify_newlines: bool = setting(
        True,
        "Turn `\\r\\n`, `\\r`, U+2028 LINE SEPARATOR and U+2029 PARAGRAPH SEPARATOR into `\\n`. U+0085 is "
        "not among them: it is almost always a damaged `…` (fix_mojibake repairs it), otherwise a control.",
    )
    remove_controls: bool = setting(
        True,
        "Remove C0 and C1 control characters (and DEL) except tab and newline; carriage return is also "
        "kept when unify_newlines is off.",
    )
    invisible: str = setting(
        "remove",
        "Invisible format characters: `remove` deletes U+200B ZERO WIDTH SPACE, U+2060 WORD JOINER, "
        "U+FEFF (byte order mark), U+00AD SOFT HYPHEN and the deprecated U+206A..U+206F; `keep` leaves "
        "them. Zero width joiner and non-joiner, direction marks and variation selectors are always "
        "kept: they change spelling in Persian, conjuncts in Indic scripts and emoji sequences.",
        choices=("remove", "keep"),
    )
    trim_trailing_whitespace: bool = setting(
        True, "Remove whitespace (str.isspace) at the end of every line and of the document."
    )
    max_blank_lines: int = setting(
        2,
        "Longest run of blank (empty or whitespace-only) lines kept; longer runs keep their first lines. "
        "0 removes every blank line; -1 keeps all.",
        minimum=-1,
    )


def repair_settings(config: CleanConfig) -> ftfy.TextFixerConfig:
    """The ftfy settings the clean stage uses (its newline and control steps are its own)."""
    form: Literal["NFC", "NFKC"] | None = None
    if config.normalization == "NFC":
        form = "NFC"
    elif config.normalization == "NFKC":
        form = "NFKC"
    return ftfy.TextFixerConfig(
        unescape_html=config.unescape_html,
        remove_terminal_escapes=config.remove_terminal_escapes,
        fix_encoding=config.fix_mojibake,
        restore_byte_a0=config.fix_mojibake,
        replace_lossy_sequences=config.fix_mojibake,
        decode_inconsistent_utf8=config.fix_mojibake,
        fix_c1_controls=config.fix_mojibake,
        fix_latin_ligatures=config.fix_latin_ligatures,
        fix_character_width=config.fix_character_width,
        uncurl_quotes=config.uncurl_quotes,
        fix_line_breaks=False,
        fix_surrogates=True,
        remove_control_chars=False,
        normalization=form,
        # ftfy cuts lines longer than this at arbitrary points; that would
        # normalize pieces of a line, so lines are never cut.
        max_decode_length=sys.maxsize,
        explain=False,
    )


# --- the stage's own steps -------------------------------------------------

_CONTROLS = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f]")
_CONTROLS_BUT_CR = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]")
_C0_BYTES = bytes([*range(0x00, 0x09), *range(0x0B, 0x20), 0x7F])
_C0_BYTES_BUT_CR = bytes([*range(0x00, 0x09), 0x0B, 0x0C, *range(0x0E, 0x20), 0x7F])
_INVISIBLE_CHARS = "\u00ad\u200b\u2060\u206a\u206b\u206c\u206d\u206e\u206f\ufeff"
_INVISIBLE = re.compile(f"[{_INVISIBLE_CHARS}]")
# A run of whitespace other than \r and \n, starting at the run's first
# character (so each run is tried once), that ends a line or the text.
_TRAILING_SPACE = re.compile(r"(?<![^\S\r\n])[^\S\r\n]++(?=[\r\n]|\Z)")


def unify_newlines(text: str) -> str:
    r"""Turn ``\r\n``, ``\r``, U+2028 and U+2029 into ``\n``.

    >>> unify_newlines("a\r\nb\rc\u2028d\u2029e\x85f")
    'a\nb\nc\nd\ne\x85f'
    """
    if "\r" in text:
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    if not text.isascii():
        text = text.replace("\u2028", "\n").replace("\u2029", "\n")
    return text


def remove_controls(text: str, *, keep_carriage_return: bool = False) -> str:
    r"""Remove C0 and C1 controls and DEL, except ``\t`` and ``\n`` (and ``\r`` if asked).

    >>> remove_controls("a\x00b\tc\x1bd\x7fe\x9ff\ng")
    'ab\tcdef\ng'
    >>> remove_controls("a\r\nb", keep_carriage_return=True)
    'a\r\nb'
    """
    # Quick test first: in UTF-8, C0 controls and DEL are single bytes that
    # occur nowhere else, and C1 controls have lead byte C2.
    raw = text.encode("utf-8", "surrogatepass")
    deleted = _C0_BYTES_BUT_CR if keep_carriage_return else _C0_BYTES
    if len(raw.translate(None, deleted)) == len(raw) and not C1_IN_UTF8.search(raw):
        return text
    pattern = _CONTROLS_BUT_CR if keep_carriage_return else _CONTROLS
    return pattern.sub("", text)


def remove_invisible(text: str) -> str:
    """Remove zero width space, word joiner, U+FEFF, soft hyphen and U+206A..U+206F.

    Zero width joiner (U+200D) and non-joiner (U+200C) stay.

    >>> remove_invisible("\\ufeffzero\\u200bwidth co\\u00adoperate")
    'zerowidth cooperate'
    >>> remove_invisible("\\u0645\\u06cc\\u200c\\u062e\\u0648\\u0627\\u0647\\u0645") == (
    ...     "\\u0645\\u06cc\\u200c\\u062e\\u0648\\u0627\\u0647\\u0645")
    True
    """
    if text.isascii() or not any(char in text for char in _INVISIBLE_CHARS):
        return text
    return _INVISIBLE.sub("", text)


def trim_trailing_whitespace(text: str) -> str:
    r"""Remove whitespace at the end of each line; ``\n`` and ``\r`` end lines and are kept.

    >>> trim_trailing_whitespace("a  \nb\t\u00a0\r\nc \u3000")
    'a\nb\r\nc'
    """
    if "\r" in text:
        return _TRAILING_SPACE.sub("", text)
    # Without \r, str.rstrip strips exactly the characters of the pattern.
    return "\n".join([line.rstrip() for line in text.split("\n")])


def limit_blank_lines(text: str, maximum: int) -> str:
    r"""Keep at most the first ``maximum`` lines of every run of blank lines (``-1``: keep all).

    A blank line is empty or holds only whitespace; lines end at ``\n``, and a
    last line without ``\n`` counts too.

    >>> limit_blank_lines("a\n\n\n\n\nb\n", 2)
    'a\n\n\nb\n'
    >>> limit_blank_lines("a\n\n \nb", 0)
    'a\nb'
    """
    if maximum < 0:
        return text
    kept = rf"(?:[^\S\n]*\n){{{maximum}}}"
    text = re.sub(f"(?m)^({kept})(?:[^\\S\\n]*\\n)+", r"\1", text)
    return re.sub(f"(?m)^({kept})[^\\S\\n]+\\Z", r"\1", text)


# --- the whole stage ---------------------------------------------------------

Repair = Callable[[str, ftfy.TextFixerConfig], tuple[str, set[str]]]


def _apply(counter: str, fixer: Callable[[str], str], text: str, changed: set[str]) -> str:
    fixed = fixer(text)
    if fixed != text:
        changed.add(counter)
    return fixed


def _may_have_long_blank_run(text: str, maximum: int, *, trimmed: bool) -> bool:
    """False only if no run of blank lines is longer than ``maximum``.

    On trimmed text without ``\\r`` blank lines are empty, so a run of ``maximum + 1`` of them
    is that many ``\\n`` at the start or ``maximum + 2`` anywhere.
    """
    if not trimmed or "\r" in text:
        return True
    return text.startswith("\n" * (maximum + 1)) or "\n" * (maximum + 2) in text


def _clean(text: str, config: CleanConfig, repair: Repair) -> tuple[str, dict[str, int]]:
    settings = repair_settings(config)
    keep_cr = not config.unify_newlines
    changed: set[str] = set()
    current = text
    for _round in range(_MAX_ROUNDS):
        start = current
        if config.unify_newlines:
            current = _apply("unify_newlines", unify_newlines, current, changed)
        current, repaired = repair(current, settings)
        changed |= repaired
        if config.remove_controls:
            current = _apply(
                "remove_controls",
                lambda part: remove_controls(part, keep_carriage_return=keep_cr),
                current,
                changed,
            )
        if config.invisible == "remove" and not current.isascii():
            current = _apply("invisible", remove_invisible, current, changed)
        if config.trim_trailing_whitespace:
            current = _apply("trim_trailing_whitespace", trim_trailing_whitespace, current, changed)
        if config.max_blank_lines >= 0 and _may_have_long_blank_run(
            current, config.max_blank_lines, trimmed=config.trim_trailing_whitespace
        ):
            current = _apply(
                "max_blank_lines",
                lambda part: limit_blank_lines(part, config.max_blank_lines),
                current,
                changed,
            )
        if current == start:
            break
    return current, {counter: int(counter in changed) for counter in STEP_COUNTERS}


def clean_text(text: str, config: CleanConfig) -> tuple[str, dict[str, int]]:
    """Clean one document; returns the text and, per step, 1 if it changed the text.

    Accepts any ``str``, lone surrogates included; the result encodes to UTF-8.

    >>> clean_text("Caf\\u00c3\\u00a9 \\u201cau lait\\u201d  \\r\\n", CleanConfig())[0]
    'Café “au lait”\\n'
    """
    return _clean(text, config, repair_quickly)


def reference_clean_text(text: str, config: CleanConfig) -> tuple[str, dict[str, int]]:
    """:func:`clean_text` with ftfy run on every line: the slow path the fast one must equal."""
    return _clean(text, config, repair_fully)


def clean_batch(batch: pa.RecordBatch, config: CleanConfig) -> tuple[pa.RecordBatch, dict[str, int]]:
    """Clean the text of the kept rows of a document batch (:data:`corpusprep.schema.DOC_SCHEMA`).

    Other rows are copied as they are. A document with nothing but whitespace
    left gets status ``empty``, reason ``empty_after_clean`` and no text. The
    result has the same schema, rows and order; the counts are summed over
    the cleaned documents (``documents``) and include ``empty_after_clean``.
    """
    if not batch.schema.equals(DOC_SCHEMA):
        raise IntegrityError(f"clean_batch: the batch schema is not DOC_SCHEMA:\n{batch.schema}")
    texts = batch.column("text").to_pylist()
    statuses = [str(status) for status in batch.column("status").to_pylist()]
    reasons = batch.column("reason").to_pylist()
    record_ids = batch.column("record_id").to_pylist()
    counts = dict.fromkeys(CLEAN_COUNTERS, 0)
    new_texts: list[str | None] = []
    new_statuses: list[str] = []
    new_reasons: list[str | None] = []
    for record_id, text, status, reason in zip(record_ids, texts, statuses, reasons, strict=True):
        if status != KEPT:
            new_texts.append(text)
            new_statuses.append(status)
            new_reasons.append(reason)
            continue
        if text is None:
            raise IntegrityError(f"clean_batch: record {record_id} is kept but has no text")
        cleaned, steps = clean_text(text, config)
        counts["documents"] += 1
        for counter, value in steps.items():
            counts[counter] += value
        if cleaned.strip() == "":
            counts[EMPTY_AFTER_CLEAN] += 1
            new_texts.append(None)
            new_statuses.append(EMPTY)
            new_reasons.append(EMPTY_AFTER_CLEAN)
        else:
            new_texts.append(cleaned)
            new_statuses.append(status)
            new_reasons.append(reason)
    columns = {
        "text": pa.array(new_texts, type=pa.large_string()),
        "status": pa.array(new_statuses, type=pa.string()),
        "reason": pa.array(new_reasons, type=pa.string()),
    }
    arrays = [columns.get(name, batch.column(name)) for name in DOC_SCHEMA.names]
    return pa.RecordBatch.from_arrays(arrays, schema=DOC_SCHEMA), counts
