"""Shingles: the set of n-grams a document is compared by.

A document is first turned into its *view*: casefolded (:meth:`str.casefold`),
every punctuation character (Unicode general category ``P*``: ``Pc Pd Ps Pe
Pi Pf Po``) replaced by a space, and runs of whitespace (:meth:`str.split`)
collapsed to one space with none at either end. Symbols (``S*``), digits and
marks are kept. The view decides what "the same text" means for near-copy
detection: two documents that differ only in case, punctuation or spacing
have the same view.

The view is cut into overlapping n-grams of ``ngram`` units:

* ``"word"``: units are the space-separated words of the view; a shingle is
  ``ngram`` consecutive words joined by one space;
* ``"char"``: units are the code points of the view (spaces included); a
  shingle is ``ngram`` consecutive code points. Meant for scripts written
  without spaces between words;
* ``"auto"``: ``"char"`` when the document is *mostly unspaced*, else
  ``"word"`` (see :func:`is_mostly_unspaced`).

A view with fewer than ``ngram`` units gives exactly one shingle, the whole
view. An empty view (the text was only punctuation and whitespace) gives no
shingles at all; such a document has an empty signature and is never a near
copy of anything, not even of another empty one.

Each shingle is hashed to a ``uint64`` with XXH3-64 of its UTF-8 bytes and an
explicit seed (:func:`corpusprep.hashing.keyed_hash64`). A document's
shingles are a **set** (Broder 1997, §2, "Option B"): a shingle that occurs
twice counts once. :func:`shingle_keys` returns the sorted distinct keys.
"""

from __future__ import annotations

import functools
import sys
import types
import unicodedata
from collections.abc import Mapping

import numpy as np
import xxhash

from corpusprep.hashing import keyed_hash64

__all__ = [
    "AUTO",
    "CHAR",
    "NO_SPACE_SCRIPTS",
    "UNITS",
    "WORD",
    "exact_jaccard",
    "is_mostly_unspaced",
    "normalize_view",
    "resolve_unit",
    "shingle_keys",
    "shingle_keys_scalar",
    "shingle_strings",
]

WORD = "word"
CHAR = "char"
AUTO = "auto"
UNITS = (WORD, CHAR, AUTO)

# Blocks of scripts that are normally written without spaces between words,
# as (name, first code point, last code point), from the Unicode block chart.
# Korean (Hangul) is written with spaces and is deliberately not listed.
NO_SPACE_SCRIPTS: tuple[tuple[str, int, int], ...] = (
    ("Thai", 0x0E00, 0x0E7F),
    ("Lao", 0x0E80, 0x0EFF),
    ("Tibetan", 0x0F00, 0x0FFF),
    ("Myanmar", 0x1000, 0x109F),
    ("Khmer", 0x1780, 0x17FF),
    ("Khmer Symbols", 0x19E0, 0x19FF),
    ("Myanmar Extended-B", 0xA9E0, 0xA9FF),
    ("Myanmar Extended-A", 0xAA60, 0xAA7F),
    ("CJK Radicals Supplement .. Kangxi Radicals", 0x2E80, 0x2FDF),
    ("CJK Symbols and Punctuation .. Katakana", 0x3000, 0x30FF),
    ("Bopomofo .. Katakana Phonetic Extensions", 0x3100, 0x31FF),
    ("CJK Unified Ideographs Extension A", 0x3400, 0x4DBF),
    ("CJK Unified Ideographs", 0x4E00, 0x9FFF),
    ("CJK Compatibility Ideographs", 0xF900, 0xFAFF),
    ("Halfwidth Katakana", 0xFF65, 0xFF9F),
    ("Kana Supplement .. Small Kana Extension", 0x1B000, 0x1B16F),
    ("CJK Unified Ideographs Extensions B..F and supplements", 0x20000, 0x3134F),
)

# Unicode 14 (Python 3.11) has no punctuation beyond plane 1; a test checks it.
_PUNCTUATION_SCAN_END = 0x20000


@functools.cache
def _punctuation_table() -> Mapping[int, str]:
    """Read-only ``str.translate`` table mapping every ``P*`` code point to a space."""
    table = {
        code: " "
        for code in range(min(_PUNCTUATION_SCAN_END, sys.maxunicode + 1))
        if unicodedata.category(chr(code)).startswith("P")
    }
    return types.MappingProxyType(table)


def normalize_view(text: str) -> str:
    """The view of ``text`` that shingles are cut from.

    >>> normalize_view("  A rose,\\tis -- A ROSE!\\n")
    'a rose is a rose'
    >>> normalize_view("...!?")
    ''
    """
    return " ".join(text.casefold().translate(_punctuation_table()).split())


def is_mostly_unspaced(view: str) -> bool:
    """True when strictly more than half of the view's non-space code points
    lie in :data:`NO_SPACE_SCRIPTS`.

    Digits, Latin letters and symbols count in the denominator; spaces do not.
    An empty view is not mostly unspaced.

    >>> is_mostly_unspaced("東京は日本の首都です")
    True
    >>> is_mostly_unspaced("tokyo is the capital 東京")
    False
    """
    points = np.frombuffer(view.encode("utf-32-le"), dtype=np.uint32)
    points = points[points != 0x20]
    if points.size == 0:
        return False
    inside = np.zeros(points.size, dtype=bool)
    for _name, first, last in NO_SPACE_SCRIPTS:
        inside |= (points >= first) & (points <= last)
    return 2 * int(np.count_nonzero(inside)) > int(points.size)


def resolve_unit(view: str, unit: str) -> str:
    """The unit actually used for ``view``: ``unit`` itself, or the choice made by ``"auto"``."""
    if unit == AUTO:
        return CHAR if is_mostly_unspaced(view) else WORD
    if unit in (WORD, CHAR):
        return unit
    raise ValueError(f"unit = {unit!r}: must be one of {', '.join(UNITS)}")


def _check_ngram(ngram: int) -> None:
    if ngram < 1:
        raise ValueError(f"ngram = {ngram}: must be at least 1")


def shingle_strings(text: str, *, unit: str = WORD, ngram: int = 5) -> list[str]:
    """The shingles of ``text`` as strings, in order of occurrence, repeats included.

    This is the readable definition; :func:`shingle_keys` computes the hashed set
    faster and is tested equal to hashing these strings.

    >>> shingle_strings("A rose is a rose.", ngram=4)
    ['a rose is a', 'rose is a rose']
    >>> shingle_strings("A rose!", ngram=4)
    ['a rose']
    >>> shingle_strings("東京です", unit="char", ngram=2)
    ['東京', '京で', 'です']
    """
    _check_ngram(ngram)
    view = normalize_view(text)
    if not view:
        return []
    if resolve_unit(view, unit) == WORD:
        words = view.split(" ")
        if len(words) < ngram:
            return [view]
        return [" ".join(words[start : start + ngram]) for start in range(len(words) - ngram + 1)]
    if len(view) < ngram:
        return [view]
    return [view[start : start + ngram] for start in range(len(view) - ngram + 1)]


def shingle_keys_scalar(text: str, *, unit: str = WORD, ngram: int = 5, seed: int = 0) -> np.ndarray:
    """Slow reference for :func:`shingle_keys`: hash each string from :func:`shingle_strings`."""
    keys = {keyed_hash64(shingle, seed) for shingle in shingle_strings(text, unit=unit, ngram=ngram)}
    return np.array(sorted(keys), dtype=np.uint64)


def shingle_keys(text: str, *, unit: str = WORD, ngram: int = 5, seed: int = 0) -> np.ndarray:
    """Sorted distinct XXH3-64 keys (``uint64``) of the shingles of ``text``.

    The view is encoded to UTF-8 once; shingle boundaries are found with NumPy
    (spaces for words, UTF-8 lead bytes for code points) and each shingle's
    bytes are hashed in place, which gives the same keys as hashing the strings
    of :func:`shingle_strings` one by one.

    >>> shingle_keys("", ngram=5).size
    0
    >>> int(shingle_keys("Hi!", ngram=5)[0]) == keyed_hash64("hi", 0)
    True
    """
    _check_ngram(ngram)
    view = normalize_view(text)
    if not view:
        return np.empty(0, dtype=np.uint64)
    data = view.encode("utf-8")
    raw = np.frombuffer(data, dtype=np.uint8)
    if resolve_unit(view, unit) == WORD:
        spaces = np.flatnonzero(raw == 0x20)
        unit_starts = np.concatenate(([0], spaces + 1))
        unit_ends = np.concatenate((spaces, [len(data)]))
    else:
        # A code point starts at every byte that is not a continuation byte (10xxxxxx).
        unit_starts = np.flatnonzero((raw & 0xC0) != 0x80)
        unit_ends = np.concatenate((unit_starts[1:], [len(data)]))
    count = unit_starts.size - ngram + 1
    if count <= 0:
        return np.array([keyed_hash64(view, seed)], dtype=np.uint64)
    starts = unit_starts[:count].tolist()
    ends = unit_ends[ngram - 1 :].tolist()
    buffer = memoryview(data)
    digest = xxhash.xxh3_64_intdigest
    keys = np.fromiter(
        (digest(buffer[start:end], seed) for start, end in zip(starts, ends, strict=True)),
        dtype=np.uint64,
        count=count,
    )
    return np.unique(keys)


def exact_jaccard(first: np.ndarray, second: np.ndarray) -> float:
    """Jaccard similarity |A ∩ B| / |A ∪ B| of two shingle-key sets.

    Inputs may hold repeats and be in any order (they are treated as sets).
    Two empty sets give 0.0: an empty document resembles nothing.

    >>> exact_jaccard(np.array([1, 2, 3], dtype=np.uint64), np.array([2, 3, 4, 5], dtype=np.uint64))
    0.4
    """
    left = np.unique(first)
    right = np.unique(second)
    if left.size == 0 and right.size == 0:
        return 0.0
    common = np.intersect1d(left, right, assume_unique=True).size
    return common / (left.size + right.size - common)
