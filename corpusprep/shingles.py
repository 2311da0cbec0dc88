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

Shingle keys
------------
Each shingle is hashed to a ``uint64`` *key* from its units, with an explicit
``seed``:

* a word's *unit value* is XXH3-64 of its UTF-8 bytes under ``seed``
  (:func:`corpusprep.hashing.keyed_hash64`); a code point's unit value is the
  code point itself;
* a shingle of units u_1 .. u_m (m = ``ngram``, or fewer for a short view) has
  key h_m, where h_0 = XXH3-64 of ``b"shingle:<unit>:<m>"`` under ``seed``
  (``<unit>`` is ``word`` or ``char``) and h_j = mix64(h_{j-1} XOR u_j);
* mix64 is the finaliser of SplitMix64 (Steele, Lea & Flood 2014; constants
  from Vigna's reference code, cited from memory): z ^= z >> 30;
  z *= 0xBF58476D1CE4E5B9; z ^= z >> 27; z *= 0x94D049BB133111EB; z ^= z >> 31,
  all modulo 2^64. It is a bijection of 64-bit words with full avalanche.

So Python touches each word once (one XXH3 call) and the n-gram keys are
built with a few NumPy passes over the array of unit values, never one call
per shingle. :func:`shingle_keys_scalar` computes the same keys from the
strings of :func:`shingle_strings` with Python integers; the tests hold the
two equal. Two different shingles share a key only by a 64-bit coincidence.

A document's shingles are a **set** (Broder 1997, §2, "Option B"): a
shingle that occurs twice counts once. :func:`shingle_keys` returns the
sorted distinct keys; :func:`shingle_key_stream` returns every shingle's key
in order, repeats included, which is all a MinHash signature needs (the
minimum of a multiset is the minimum of its set).

The view is computed twice over: :func:`normalize_view` is the readable
definition (``str.translate`` with a table of every ``P*`` code point), and
:func:`view_words` the fast path (``bytes.translate`` for ASCII text, a NumPy
lookup over code points otherwise), tested equal on real text and on every
code point.

Compiled path
-------------
:func:`shingle_key_stream` (and :func:`shingle_keys`) run the numba loops of
:mod:`corpusprep.shingle_kernels` (view, XXH3-64 of the words, rolling keys, in
one pass each) once the process has shingled 8 Mi code points in total: below
that, importing numba (about 0.3-0.6 s) would cost more than it saves.
:func:`shingle_key_stream_numpy` is the NumPy path, kept as the reference; the
tests hold the two equal on arbitrary Unicode text. :func:`set_compiled_after`
moves the threshold (0: at once; None: never).
"""

from __future__ import annotations

import functools
import itertools
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
    "compiled_kernels",
    "exact_jaccard",
    "exact_jaccard_sorting",
    "is_mostly_unspaced",
    "normalize_view",
    "punctuation_table",
    "resolve_unit",
    "set_compiled_after",
    "shingle_key_stream",
    "shingle_key_stream_numpy",
    "shingle_keys",
    "shingle_keys_scalar",
    "shingle_strings",
    "sorted_distinct",
    "view_words",
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
def punctuation_table() -> Mapping[int, str]:
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
    return " ".join(text.casefold().translate(punctuation_table()).split())


@functools.cache
def _separator_table() -> np.ndarray:
    """Read-only boolean table over all code points: True for ``P*`` and for whitespace (``str.isspace``)."""
    table = np.zeros(sys.maxunicode + 1, dtype=bool)
    table[list(punctuation_table())] = True
    table[[code for code in range(0x3001) if chr(code).isspace()]] = True  # none lies above U+3000
    table.flags.writeable = False
    return table


@functools.cache
def _ascii_table() -> bytes:
    """``bytes.translate`` table: ASCII upper case to lower case, ASCII separators to a space."""
    separators = _separator_table()
    return bytes(
        0x20 if separators[code] else ord(chr(code).lower()) if code < 0x80 else code for code in range(256)
    )


def view_words(text: str) -> list[bytes]:
    """The words of :func:`normalize_view` ``(text)`` as UTF-8 bytes (fast path, same result).

    >>> view_words("  A rose, is -- A ROSE!")
    [b'a', b'rose', b'is', b'a', b'rose']
    >>> view_words("...!?")
    []
    """
    if text.isascii():
        # casefold is lower on ASCII; bytes.split() drops the empty pieces around spaces.
        return text.encode("ascii").translate(_ascii_table()).split()
    points = np.frombuffer(text.casefold().encode("utf-32-le"), dtype="<u4")
    spaced = np.where(_separator_table()[points], np.uint32(0x20), points).astype("<u4")
    # UTF-8 bytes of non-ASCII code points are all >= 0x80, so only the spaces split.
    return spaced.tobytes().decode("utf-32-le").encode("utf-8").split()


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


_MASK64 = (1 << 64) - 1
_MIX_FIRST = 0xBF58476D1CE4E5B9  # SplitMix64 finaliser multipliers (Vigna's reference code, from memory)
_MIX_SECOND = 0x94D049BB133111EB


def _start_key(unit: str, count: int, seed: int) -> int:
    """h_0 of a shingle of ``count`` units of kind ``unit``."""
    return xxhash.xxh3_64_intdigest(f"shingle:{unit}:{count}".encode("ascii"), seed=seed)


def _mix64_scalar(value: int) -> int:
    value ^= value >> 30
    value = (value * _MIX_FIRST) & _MASK64
    value ^= value >> 27
    value = (value * _MIX_SECOND) & _MASK64
    return value ^ (value >> 31)


def _mix64(values: np.ndarray) -> None:
    """SplitMix64's finaliser applied in place to a ``uint64`` array (wrapping arithmetic)."""
    values ^= values >> np.uint64(30)
    values *= np.uint64(_MIX_FIRST)
    values ^= values >> np.uint64(27)
    values *= np.uint64(_MIX_SECOND)
    values ^= values >> np.uint64(31)


def _unit_value_scalar(unit_text: str, unit: str, seed: int) -> int:
    return keyed_hash64(unit_text, seed) if unit == WORD else ord(unit_text)


def shingle_keys_scalar(text: str, *, unit: str = WORD, ngram: int = 5, seed: int = 0) -> np.ndarray:
    """Slow reference for :func:`shingle_keys`: the key definition applied to each string of
    :func:`shingle_strings` with Python integers."""
    strings = shingle_strings(text, unit=unit, ngram=ngram)
    if not strings:
        return np.empty(0, dtype=np.uint64)
    used = resolve_unit(normalize_view(text), unit)
    keys = set()
    for shingle in strings:
        units = shingle.split(" ") if used == WORD else list(shingle)
        key = _start_key(used, len(units), seed)
        for piece in units:
            key = _mix64_scalar(key ^ _unit_value_scalar(piece, used, seed))
        keys.add(key)
    return np.array(sorted(keys), dtype=np.uint64)


def _window_keys(values: np.ndarray, unit: str, ngram: int, seed: int) -> np.ndarray:
    """Keys of every window of ``ngram`` consecutive unit values (one key of all if fewer)."""
    count = values.size - ngram + 1
    if count <= 0:
        width, count = values.size, 1
    else:
        width = ngram
    keys = np.full(count, _start_key(unit, width, seed), dtype=np.uint64)
    for offset in range(width):
        keys ^= values[offset : offset + count]
        _mix64(keys)
    return keys


def shingle_key_stream(
    text: str, *, unit: str = WORD, ngram: int = 5, seed: int = 0
) -> tuple[np.ndarray, str]:
    """Every shingle's key in order of occurrence, repeats included, and the unit used.

    An empty view gives an empty array. ``np.unique`` of the keys is :func:`shingle_keys`.
    Runs the compiled kernels once the process has shingled enough text (see
    :func:`compiled_kernels`), else :func:`shingle_key_stream_numpy`; both give the same keys.
    """
    _check_ngram(ngram)
    if unit not in UNITS:
        raise ValueError(f"unit = {unit!r}: must be one of {', '.join(UNITS)}")
    kernels = compiled_kernels(len(text))
    if kernels is None:
        return shingle_key_stream_numpy(text, unit=unit, ngram=ngram, seed=seed)
    return _key_stream_compiled(kernels, text, unit, ngram, seed)


def shingle_key_stream_numpy(
    text: str, *, unit: str = WORD, ngram: int = 5, seed: int = 0
) -> tuple[np.ndarray, str]:
    """:func:`shingle_key_stream` by Python and NumPy alone (the reference of the compiled path)."""
    _check_ngram(ngram)
    if unit not in UNITS:
        raise ValueError(f"unit = {unit!r}: must be one of {', '.join(UNITS)}")
    words = view_words(text)
    if not words:
        return np.empty(0, dtype=np.uint64), WORD if unit == AUTO else unit
    used = unit
    view = ""
    if unit != WORD and not (unit == AUTO and text.isascii()):  # ASCII is never mostly unspaced
        view = b" ".join(words).decode("utf-8")
        used = resolve_unit(view, unit)
    elif unit == AUTO:
        used = WORD
    if used == WORD:
        digest = xxhash.xxh3_64_intdigest
        values = np.fromiter(map(digest, words, itertools.repeat(seed)), dtype=np.uint64, count=len(words))
    else:
        values = np.frombuffer(view.encode("utf-32-le"), dtype="<u4").astype(np.uint64)
    return _window_keys(values, used, ngram, seed), used


# Text (code points) a process shingles by NumPy before it loads the compiled kernels: importing
# numba and loading the cached kernels costs about 0.3-0.6 s, which pays off only on larger runs.
_compiled_after: int | None = 8 << 20
_text_seen = 0
_kernels: types.ModuleType | None = None


def compiled_kernels(amount: int = 0) -> types.ModuleType | None:
    """:mod:`corpusprep.shingle_kernels`, or None while it is not worth importing.

    ``amount`` is the size of the work about to be done, in code points of text (or the
    equivalent); the kernels are imported once the process has asked for at least
    :func:`set_compiled_after` of it in total, and used from then on.
    """
    global _text_seen, _kernels
    if _compiled_after is None:
        return None
    if _kernels is None:
        _text_seen += amount
        if _text_seen < _compiled_after:
            return None
        from corpusprep import shingle_kernels

        _kernels = shingle_kernels
    return _kernels


def set_compiled_after(amount: int | None) -> int | None:
    """Set how much work a process does by NumPy before it loads the kernels: 0 loads them at
    once, None never uses them. Return the previous setting. The results are the same either way."""
    global _compiled_after
    previous, _compiled_after = _compiled_after, amount
    return previous


@functools.cache
def _fold_tables(expands: int) -> tuple[np.ndarray, np.ndarray]:
    """:meth:`str.casefold` as tables over all code points, for ``shingle_kernels.folded_view``.

    ``fold[c]`` is the code point ``c`` casefolds to, or ``expands | r`` when it casefolds to
    several: row r of ``expansions`` is (count, code points..., 0 padding). Built 256 code points
    at a time (one ``casefold`` call each; a block that changes length is done point by point).
    """
    limit = sys.maxunicode + 1
    points = np.arange(limit, dtype="<u4")
    points[0xD800:0xE000] = 0x20  # surrogates cannot be decoded; they map to themselves below
    every = points.tobytes().decode("utf-32-le")
    fold = np.empty(limit, dtype=np.uint32)
    rows: list[list[int]] = []
    block = 256
    for begin in range(0, limit, block):
        folded = every[begin : begin + block].casefold()
        if len(folded) == block:
            fold[begin : begin + block] = np.frombuffer(folded.encode("utf-32-le"), dtype="<u4")
            continue
        for code in range(begin, begin + block):
            pieces = [ord(piece) for piece in chr(code).casefold()]
            if len(pieces) == 1:
                fold[code] = pieces[0]
            else:
                fold[code] = expands | len(rows)
                rows.append([len(pieces), *pieces])
    fold[0xD800:0xE000] = np.arange(0xD800, 0xE000, dtype=np.uint32)
    width = 1 + max((len(row) - 1 for row in rows), default=1)
    expansions = np.zeros((max(len(rows), 1), width), dtype=np.uint32)
    for number, row in enumerate(rows):
        expansions[number, : len(row)] = row
    fold.flags.writeable = False
    expansions.flags.writeable = False
    return fold, expansions


@functools.cache
def _range_bounds() -> tuple[np.ndarray, np.ndarray]:
    firsts = np.array([first for _name, first, _last in NO_SPACE_SCRIPTS], dtype=np.uint32)
    lasts = np.array([last for _name, _first, last in NO_SPACE_SCRIPTS], dtype=np.uint32)
    return firsts, lasts


def _key_stream_compiled(
    kernels: types.ModuleType, text: str, unit: str, ngram: int, seed: int
) -> tuple[np.ndarray, str]:
    """:func:`shingle_key_stream_numpy` by the kernels of :mod:`corpusprep.shingle_kernels`."""
    view: np.ndarray
    if text.isascii():
        # The bytes of the view with separator runs of any length (byte_word_values skips them).
        view = np.frombuffer(text.encode("ascii").translate(_ascii_table()), dtype=np.uint8)
        used = WORD if unit == AUTO else unit  # ASCII is never mostly unspaced
        if used == CHAR:
            view = kernels.view_points(view, _separator_table())
    else:
        points = np.frombuffer(text.encode("utf-32-le"), dtype="<u4")
        tables = (*_fold_tables(kernels.EXPANDS), _separator_table())
        used = unit
        if unit != CHAR:
            # The view in UTF-8, where the words are hashed in place, and what "auto" decides by.
            view, total, inside = kernels.folded_utf8(points, *tables, *_range_bounds())
            if unit == AUTO:
                used = CHAR if 2 * inside > total else WORD
        if used == CHAR:
            view = kernels.folded_view(points, *tables)
    if used == WORD:
        values, long_words = kernels.byte_word_values(view, np.uint64(seed), kernels.SECRET)
        for number, first, end in long_words.tolist():
            values[number] = xxhash.xxh3_64_intdigest(view[first:end].tobytes(), seed=seed)
    else:
        values = view.astype(np.uint64)
    if values.size == 0:
        return np.empty(0, dtype=np.uint64), WORD if unit == AUTO else unit
    width = min(ngram, values.size)
    keys: np.ndarray = kernels.window_keys(values, width, np.uint64(_start_key(used, width, seed)))
    return keys, used


def shingle_keys(text: str, *, unit: str = WORD, ngram: int = 5, seed: int = 0) -> np.ndarray:
    """Sorted distinct keys (``uint64``) of the shingles of ``text`` (see the module notes).

    >>> shingle_keys("", ngram=5).size
    0
    >>> fast = shingle_keys("A rose is a rose.", ngram=2)
    >>> bool(np.array_equal(fast, shingle_keys_scalar("a rose is a rose", ngram=2)))
    True
    """
    return sorted_distinct(shingle_key_stream(text, unit=unit, ngram=ngram, seed=seed)[0])


def sorted_distinct(values: np.ndarray) -> np.ndarray:
    """The distinct values in ascending order, by one sort.

    Same result as ``np.unique``; written out because NumPy 2's ``np.unique``
    hashes large integer arrays, which measured several times slower than a sort here.

    >>> sorted_distinct(np.array([3, 1, 3, 2], dtype=np.uint64)).tolist()
    [1, 2, 3]
    """
    ordered = np.sort(values)
    if ordered.size < 2:
        return ordered
    keep = np.empty(ordered.size, dtype=bool)
    keep[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=keep[1:])
    return ordered[keep]


def exact_jaccard(first: np.ndarray, second: np.ndarray) -> float:
    """Jaccard similarity |A ∩ B| / |A ∪ B| of two shingle-key sets.

    Inputs may hold repeats and be in any order (they are treated as sets).
    Two empty sets give 0.0: an empty document resembles nothing.
    ``uint64`` inputs that are already sorted and distinct (what :func:`shingle_keys`
    returns) are used as they are, and the intersection is counted by a binary search
    of the smaller set in the larger (:func:`exact_jaccard_sorting` is the same count by
    one sort of both sets, the reference).

    >>> exact_jaccard(np.array([1, 2, 3], dtype=np.uint64), np.array([2, 3, 4, 5], dtype=np.uint64))
    0.4
    """
    left = np.asarray(first)
    right = np.asarray(second)
    if left.dtype != np.uint64 or right.dtype != np.uint64 or left.ndim != 1 or right.ndim != 1:
        return exact_jaccard_sorting(left, right)
    left = _as_set(left)
    right = _as_set(right)
    if left.size == 0 and right.size == 0:
        return 0.0
    if left.size > right.size:
        left, right = right, left
    common = 0
    if left.size:
        at = np.searchsorted(right, left)
        np.minimum(at, right.size - 1, out=at)
        common = int(np.count_nonzero(right[at] == left))
    return common / (left.size + right.size - common)


def _as_set(keys: np.ndarray) -> np.ndarray:
    """``keys`` itself when it is ascending and distinct, else :func:`sorted_distinct` of it."""
    if keys.size < 2 or bool(np.all(keys[1:] > keys[:-1])):
        return keys
    return sorted_distinct(keys)


def exact_jaccard_sorting(first: np.ndarray, second: np.ndarray) -> float:
    """:func:`exact_jaccard` by sorting both sets together and counting adjacent equal keys."""
    left = sorted_distinct(first)
    right = sorted_distinct(second)
    if left.size == 0 and right.size == 0:
        return 0.0
    both = np.sort(np.concatenate([left, right]))
    common = int(np.count_nonzero(both[1:] == both[:-1]))
    return common / (left.size + right.size - common)
