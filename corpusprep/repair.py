"""Encoding repair with ftfy, and a fast path that gives ftfy's output without running all of it.

The clean stage asks ftfy for exactly one thing: :func:`ftfy.fix_text` with the
:class:`ftfy.TextFixerConfig` that :func:`corpusprep.clean.repair_settings` builds
from the stage settings. ftfy works line by line (a *segment* is a line with its
``\\n``; the settings set ``max_decode_length`` so high that lines are never cut),
and on each segment it loops until nothing changes::

    unescape_html -> fix_encoding -> fix_c1_controls -> fix_latin_ligatures
    -> fix_character_width -> uncurl_quotes -> fix_surrogates
    -> remove_terminal_escapes -> normalize

(``fix_line_breaks`` and ``remove_control_chars`` are switched off; the clean
stage has its own steps for those.) On real text ftfy runs at 2-3 MB/s, mostly
because it calls a dozen functions per line. :func:`repair_quickly` gives the
same result much faster. Why it is the same:

1. ``fix_encoding`` leaves a segment untouched when the segment is pure ASCII
   or when ``ftfy.badness.is_bad(segment)`` is false: that is the first test
   ftfy's own encoding step makes. :func:`needs_full_repair` applies exactly
   that test (ftfy's ``is_bad`` on each non-ASCII segment, sliced as ftfy
   slices it). ``unescape_html`` only changes text containing ``&``.
2. Every other step is the very ftfy function (or ``unicodedata.normalize``),
   and each one works the same on a whole block of lines as on each line by
   itself: they are character maps or regular expressions that never match
   across ``\\n``, and none of them makes or removes a ``\\n``. Normalization
   too, because ``\\n`` is a starter that composes with nothing (UAX #15), so
   normalizing lines one by one equals normalizing the document; the tests
   check this property.
3. So, while the test of point 1 holds at the start of every round, running
   ftfy's round on the whole block until nothing changes gives ftfy's result on
   every line. The test is repeated at the start of each round, on the current
   text, because a round can make new text look like mojibake.
4. When the test fails, only the lines that fail it go through ftfy itself
   (:func:`ftfy.fix_and_explain`); the rest still take the fast path.

Pure-ASCII text (most real text) needs none of the character maps, and
``unicodedata.is_normalized`` answers for the normalization step in C. The
tests compare :func:`repair_quickly` with :func:`repair_fully` (ftfy on every
line) on the Python documentation, Debian licence files in many languages,
mojibake made from them, and generated strings.
"""

from __future__ import annotations

import re
import unicodedata
from collections.abc import Callable
from types import MappingProxyType

import ftfy
from ftfy import fixes
from ftfy.badness import is_bad

__all__ = [
    "C1_IN_UTF8",
    "SURROGATE_IN_UTF8",
    "needs_full_repair",
    "repair_fully",
    "repair_quickly",
    "split_segments",
]

# ftfy's explanation steps -> the clean stage's counter names. Encoding steps
# ("encode", "decode", "transcode") all count as "fix_mojibake".
_APPLIED_STEP_COUNTER = MappingProxyType(
    {
        "unescape_html": "unescape_html",
        "decode_inconsistent_utf8": "fix_mojibake",
        "fix_c1_controls": "fix_mojibake",
        "fix_latin_ligatures": "fix_latin_ligatures",
        "fix_character_width": "fix_character_width",
        "uncurl_quotes": "uncurl_quotes",
        "fix_surrogates": "replace_surrogates",
        "remove_terminal_escapes": "remove_terminal_escapes",
        # Off in the clean stage's settings (it has its own steps); named as ftfy names them.
        "fix_line_breaks": "fix_line_breaks",
        "remove_control_chars": "remove_control_chars",
    }
)

Fixer = Callable[[str], str]

# Quick tests on the UTF-8 bytes; a literal first byte lets the regex engine skip ahead fast.
C1_IN_UTF8 = re.compile(b"\xc2[\x80-\x9f]")
SURROGATE_IN_UTF8 = re.compile(b"\xed[\xa0-\xbf]")


def split_segments(text: str) -> list[str]:
    r"""Cut ``text`` where :func:`ftfy.fix_text` cuts it: after every ``\n``.

    >>> split_segments("one\ntwo\n\nthree")
    ['one\n', 'two\n', '\n', 'three']
    >>> split_segments("")
    []
    """
    parts = text.split("\n")
    segments = [part + "\n" for part in parts[:-1]]
    if parts[-1]:
        segments.append(parts[-1])
    return segments


def needs_full_repair(text: str, settings: ftfy.TextFixerConfig) -> bool:
    """Whether some line of ``text`` could be changed by ftfy's HTML or encoding steps.

    False means: on every line, ``unescape_html`` (if enabled) finds no ``&``
    and ``fix_encoding`` (if enabled) returns the line as it is, because the
    line is ASCII or ftfy's ``is_bad`` is false on it (the line is given to
    ``is_bad`` with its ``\\n``, as ftfy gives it).

    >>> settings = ftfy.TextFixerConfig(unescape_html=False)
    >>> needs_full_repair("plain text\\nna\\u00efve caf\\u00e9\\n", settings)
    False
    >>> needs_full_repair("fine\\nsch\\u00c3\\u00b6n\\n", settings)
    True
    """
    if settings.unescape_html and "&" in text:
        return True
    if not settings.fix_encoding or text.isascii():
        return False
    lines = text.split("\n")
    last = len(lines) - 1
    for index, line in enumerate(lines):
        if not line.isascii() and is_bad(line + "\n" if index < last else line):
            return True
    return False


def _typography_fixers(settings: ftfy.TextFixerConfig) -> tuple[tuple[str, Fixer], ...]:
    """The optional ftfy steps between ``fix_c1_controls`` and ``fix_surrogates``, in ftfy's order."""
    chain: list[tuple[str, Fixer]] = []
    if settings.fix_latin_ligatures:
        chain.append(("fix_latin_ligatures", fixes.fix_latin_ligatures))
    if settings.fix_character_width:
        chain.append(("fix_character_width", fixes.fix_character_width))
    if settings.uncurl_quotes:
        chain.append(("uncurl_quotes", fixes.uncurl_quotes))
    return tuple(chain)


def _non_ascii_round(text: str, settings: ftfy.TextFixerConfig, changed: set[str]) -> str:
    """ftfy's steps from ``fix_c1_controls`` to ``fix_surrogates`` on non-ASCII text.

    A step is skipped only where it cannot change anything: C1 controls
    (U+0080..U+009F) are encoded in UTF-8 as C2 80..C2 9F, and surrogates
    (kept by ``surrogatepass``) as ED A0..ED BF and a continuation byte.
    """
    raw = text.encode("utf-8", "surrogatepass")
    current = text
    if settings.fix_c1_controls and C1_IN_UTF8.search(raw):
        fixed = fixes.fix_c1_controls(current)
        if fixed != current:
            changed.add("fix_mojibake")
            current = fixed
    for counter, fixer in _typography_fixers(settings):
        fixed = fixer(current)
        if fixed != current:
            changed.add(counter)
            current = fixed
    if settings.fix_surrogates and SURROGATE_IN_UTF8.search(raw):
        fixed = fixes.fix_surrogates(current)
        if fixed != current:
            changed.add("replace_surrogates")
            current = fixed
    return current


def _repair_block(
    block: str, settings: ftfy.TextFixerConfig, *, checked: bool = False
) -> tuple[str, set[str]] | None:
    """ftfy's result on every line of ``block``, or None if some line needs ftfy itself.

    ``checked`` says the caller has already found that no line of ``block`` needs
    full repair (:func:`needs_full_repair` is then skipped on the first round).
    """
    if settings.fix_line_breaks or settings.remove_control_chars:
        return None  # steps the clean stage does itself; the fast path does not model them
    form = settings.normalization
    changed: set[str] = set()
    current = block
    first = True
    while True:
        if not (first and checked) and needs_full_repair(current, settings):
            return None
        first = False
        start = current
        # Every step but the terminal-escape one changes only non-ASCII
        # characters, and ASCII text is already normalized in every form.
        if not current.isascii():
            current = _non_ascii_round(current, settings, changed)
        if settings.remove_terminal_escapes and "\x1b" in current:
            fixed = fixes.remove_terminal_escapes(current)
            if fixed != current:
                changed.add("remove_terminal_escapes")
                current = fixed
        if form is not None and not current.isascii() and not unicodedata.is_normalized(form, current):
            current = unicodedata.normalize(form, current)
            changed.add("normalization")
        if current == start:
            return current, changed


def _counters_of_plan(plan: list[ftfy.ExplanationStep] | None) -> set[str]:
    counters: set[str] = set()
    for action, parameter in plan or ():
        if action == "normalize":
            counters.add("normalization")
        elif action == "apply":
            counters.add(_APPLIED_STEP_COUNTER[parameter])
        else:  # "encode", "decode", "transcode": re-reading the bytes
            counters.add("fix_mojibake")
    return counters


def _repair_segment_fully(segment: str, settings: ftfy.TextFixerConfig) -> tuple[str, set[str]]:
    fixed, plan = ftfy.fix_and_explain(segment, settings._replace(explain=True))
    # ftfy's plan can list encoding steps that changed nothing (U+FFFD read back as U+FFFD, a C1
    # control that Windows-1252 leaves undefined), so an unchanged line counts no step.
    return fixed, _counters_of_plan(plan) if fixed != segment else set()


def repair_fully(text: str, settings: ftfy.TextFixerConfig) -> tuple[str, set[str]]:
    """ftfy on every line; the text equals ``ftfy.fix_text(text, settings)``.

    (With ``fix_encoding`` on, that holds when its four sub-settings are on, as
    in the clean stage: ftfy 6.3.1's ``fix_text`` ignores them, while the
    :func:`ftfy.fix_and_explain` used here honours them.)

    Also returns the counter names of the steps ftfy's explanation lists for the lines it changed.

    >>> settings = ftfy.TextFixerConfig(uncurl_quotes=False)
    >>> repair_fully("sch\\u00c3\\u00b6n\\n", settings)
    ('schön\\n', {'fix_mojibake'})
    """
    pieces = []
    changed: set[str] = set()
    for segment in split_segments(text):
        fixed, counters = _repair_segment_fully(segment, settings)
        pieces.append(fixed)
        changed |= counters
    return "".join(pieces), changed


def repair_quickly(text: str, settings: ftfy.TextFixerConfig) -> tuple[str, set[str]]:
    """The same result as :func:`repair_fully`, taking the fast path where it is safe.

    >>> settings = ftfy.TextFixerConfig(uncurl_quotes=False)
    >>> repair_quickly("K\\u212a \\u2018quoted\\u2019\\n", settings)
    ('KK ‘quoted’\\n', {'normalization'})
    """
    whole = _repair_block(text, settings)
    if whole is not None:
        return whole
    pieces: list[str] = []
    changed: set[str] = set()
    pending: list[str] = []  # consecutive lines that pass the test, repaired as one block

    def flush() -> None:
        if not pending:
            return
        block = _repair_block("".join(pending), settings, checked=True)
        if block is None:
            for segment in pending:
                fixed, counters = _repair_segment_fully(segment, settings)
                pieces.append(fixed)
                changed.update(counters)
        else:
            pieces.append(block[0])
            changed.update(block[1])
        pending.clear()

    html, encoding = settings.unescape_html, settings.fix_encoding
    for segment in split_segments(text):
        # needs_full_repair on one segment (one line, with its \n if it has one), inlined.
        if (html and "&" in segment) or (encoding and not segment.isascii() and is_bad(segment)):
            flush()
            fixed, counters = _repair_segment_fully(segment, settings)
            pieces.append(fixed)
            changed |= counters
        else:
            pending.append(segment)
    flush()
    return "".join(pieces), changed
