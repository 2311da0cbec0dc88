"""Compiled loops (numba) for the shingle keys of :mod:`corpusprep.shingles` and the
MinHash signatures of :mod:`corpusprep.minhash`.

The results are those of the NumPy paths of both modules, which stay the reference
(the tests hold the two equal on arbitrary Unicode text); these loops do in one pass
what the NumPy paths do in many:

* :func:`view_points`: the view's code points (separators to one space, none at either
  end) from the casefolded code points and the separator table; :func:`folded_view` the
  same from the code points before casefolding (:meth:`str.casefold` by table), and
  :func:`folded_utf8` the same in UTF-8 bytes, counting the code points "auto" decides by;
* :func:`byte_word_values`: each word's XXH3-64 under the seed, hashed where it lies in the
  view's UTF-8 bytes. XXH3-64 is written out here for inputs up to 240 bytes (its short and
  medium paths, no secret derivation needed); a longer word is listed for the caller to hash
  with the ``xxhash`` library;
* :func:`window_keys`: the rolling shingle keys h_j = mix64(h_{j-1} XOR u_j);
* :func:`signatures`: per key set, the minimum of ``(a_i * fold(x) + b_i) mod 2^32``,
  one fused pass (multiply, add, minimum) per key over a signature row kept in cache.

Every kernel is compiled on first use and cached on disk beside the module (numba's
``cache=True``); all release the GIL. Importing this module imports numba (about 0.3 s),
so :mod:`corpusprep.shingles` imports it only once a process has seen enough text.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, TypeVar, cast

import numba as nb
import numpy as np

__all__ = [
    "EXPANDS",
    "LONGEST_WORD",
    "SECRET",
    "byte_word_values",
    "folded_utf8",
    "folded_view",
    "signatures",
    "view_points",
    "window_keys",
    "xxh3_64",
]

#: XXH3's default secret (``XXH3_kSecret``, 192 bytes, from the xxHash reference source
#: ``xxhash.h``); the short and medium paths read only its first 136 bytes. The tests check
#: :func:`xxh3_64` against the ``xxhash`` library at every length up to :data:`LONGEST_WORD`.
SECRET = np.frombuffer(
    bytes.fromhex(
        "b8fe6c3923a44bbe7c01812cf721ad1cded46de9839097db7240a4a4b7b3671f"
        "cb79e64eccc0e578825ad07dccff7221b8084674f743248ee03590e6813a264c"
        "3c2852bb91c300cb88d0658b1b532ea371644897a20df94e3819ef46a9deacd8"
        "a8fa763fe39c343ff9dcbbc7c70b4f1d8a51e04bcdb45931c89f7ec9d9787364"
        "eac5ac8334d3ebc3c581a0fffa1363eb170ddd51b7f0da49d316552629d4689e"
        "2b16be587d47a1fc8ff8b8d17ad031ce45cb3a8f95160428afd7fbcabb4b407e"
    ),
    dtype=np.uint8,
)
#: Longest input :func:`xxh3_64` hashes (XXH3's ``XXH3_MIDSIZE_MAX``); longer words are left to the caller.
LONGEST_WORD = 240

_Function = TypeVar("_Function", bound=Callable[..., Any])


def _jit(function: _Function) -> _Function:
    return cast(_Function, nb.njit(cache=True, nogil=True)(function))


def _inline(function: _Function) -> _Function:
    return cast(_Function, nb.njit(inline="always")(function))


# XXH3 constants (xxhash.h: XXH_PRIME64_1..3, XXH_PRIME_MX1, XXH_PRIME_MX2).
_P64_1 = np.uint64(0x9E3779B185EBCA87)
_P64_2 = np.uint64(0xC2B2AE3D27D4EB4F)
_P64_3 = np.uint64(0x165667B19E3779F9)
_MX1 = np.uint64(0x165667919E3779F9)
_MX2 = np.uint64(0x9FB21C651E98DF25)
_LOW32 = np.uint64(0xFFFFFFFF)
_U8 = np.uint64(8)
_U16 = np.uint64(16)
_U24 = np.uint64(24)
_U32 = np.uint64(32)
# SplitMix64 finaliser (Steele, Lea & Flood 2014; constants from Vigna's reference code, from memory).
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_S30 = np.uint64(30)
_S27 = np.uint64(27)
_S31 = np.uint64(31)


@_inline
def _read64(data: np.ndarray, at: int) -> np.uint64:
    value = np.uint64(0)
    for k in range(8):
        value |= np.uint64(data[at + k]) << np.uint64(8 * k)
    return value


@_inline
def _read32(data: np.ndarray, at: int) -> np.uint64:
    value = np.uint64(0)
    for k in range(4):
        value |= np.uint64(data[at + k]) << np.uint64(8 * k)
    return value


@_inline
def _rotl(value: np.uint64, bits: int) -> np.uint64:
    return (value << np.uint64(bits)) | (value >> np.uint64(64 - bits))


@_inline
def _swap64(value: np.uint64) -> np.uint64:
    out = np.uint64(0)
    for k in range(8):
        out = (out << _U8) | ((value >> np.uint64(8 * k)) & np.uint64(0xFF))
    return out


@_inline
def _swap32(value: np.uint64) -> np.uint64:
    out = np.uint64(0)
    for k in range(4):
        out = (out << _U8) | ((value >> np.uint64(8 * k)) & np.uint64(0xFF))
    return out


@_inline
def _fold128(left: np.uint64, right: np.uint64) -> np.uint64:
    """Low XOR high 64 bits of the 128-bit product (xxhash.h ``XXH_mult64to128``, portable form)."""
    left_low, left_high = left & _LOW32, left >> _U32
    right_low, right_high = right & _LOW32, right >> _U32
    low_low = left_low * right_low
    high_low = left_high * right_low
    low_high = left_low * right_high
    high_high = left_high * right_high
    cross = (low_low >> _U32) + (high_low & _LOW32) + low_high
    upper = (high_low >> _U32) + (cross >> _U32) + high_high
    lower = (cross << _U32) | (low_low & _LOW32)
    return lower ^ upper


@_inline
def _xxh64_avalanche(value: np.uint64) -> np.uint64:
    value ^= value >> np.uint64(33)
    value *= _P64_2
    value ^= value >> np.uint64(29)
    value *= _P64_3
    return value ^ (value >> _U32)


@_inline
def _avalanche(value: np.uint64) -> np.uint64:
    value ^= value >> np.uint64(37)
    value *= _MX1
    return value ^ (value >> _U32)


@_inline
def _mix16(data: np.ndarray, at: int, secret: np.ndarray, where: int, seed: np.uint64) -> np.uint64:
    low = _read64(data, at) ^ (_read64(secret, where) + seed)
    high = _read64(data, at + 8) ^ (_read64(secret, where + 8) - seed)
    return _fold128(low, high)


@_jit
def xxh3_64(data: np.ndarray, start: int, length: int, seed: np.uint64, secret: np.ndarray) -> np.uint64:
    """XXH3-64 of ``data[start:start + length]`` (``uint8``) under ``seed``; ``length`` at most 240.

    The short (0-16 bytes) and medium (17-240 bytes) paths of XXH3 (xxhash.h, v0.8), which use
    the default secret with the seed added, whatever the seed.
    """
    size = np.uint64(length)
    if length == 0:
        return _xxh64_avalanche(seed ^ (_read64(secret, 56) ^ _read64(secret, 64)))
    if length <= 3:
        first = np.uint64(data[start])
        middle = np.uint64(data[start + (length >> 1)])
        last = np.uint64(data[start + length - 1])
        combined = (first << _U16) | (middle << _U24) | last | (size << _U8)
        flip = (_read32(secret, 0) ^ _read32(secret, 4)) + seed
        return _xxh64_avalanche(combined ^ flip)
    if length <= 8:
        keyed_seed = seed ^ (_swap32(seed & _LOW32) << _U32)
        first = _read32(data, start)
        last = _read32(data, start + length - 4)
        flip = (_read64(secret, 8) ^ _read64(secret, 16)) - keyed_seed
        value = (last + (first << _U32)) ^ flip
        value ^= _rotl(value, 49) ^ _rotl(value, 24)
        value *= _MX2
        value ^= (value >> np.uint64(35)) + size
        value *= _MX2
        return value ^ (value >> np.uint64(28))
    if length <= 16:
        flip_low = (_read64(secret, 24) ^ _read64(secret, 32)) + seed
        flip_high = (_read64(secret, 40) ^ _read64(secret, 48)) - seed
        low = _read64(data, start) ^ flip_low
        high = _read64(data, start + length - 8) ^ flip_high
        return _avalanche(size + _swap64(low) + high + _fold128(low, high))
    acc = size * _P64_1
    if length <= 128:
        # xxhash.h adds the pairs from the innermost out; the sum modulo 2^64 is the same in any order.
        for k in range((length - 1) // 32 + 1):
            acc += _mix16(data, start + 16 * k, secret, 32 * k, seed)
            acc += _mix16(data, start + length - 16 * (k + 1), secret, 32 * k + 16, seed)
        return _avalanche(acc)
    for k in range(8):
        acc += _mix16(data, start + 16 * k, secret, 16 * k, seed)
    acc = _avalanche(acc)
    for k in range(8, length // 16):
        acc += _mix16(data, start + 16 * k, secret, 16 * (k - 8) + 3, seed)  # XXH3_MIDSIZE_STARTOFFSET
    acc += _mix16(data, start + length - 16, secret, 136 - 17, seed)  # SECRET_SIZE_MIN - LASTOFFSET
    return _avalanche(acc)


@_jit
def view_points(points: np.ndarray, separators: np.ndarray) -> np.ndarray:
    """The view's code points (``uint32``): every separator run becomes one space, none at the ends.

    ``separators`` is a boolean table over all code points (True for ``P*`` and whitespace).
    """
    out = np.empty(points.size, dtype=np.uint32)
    size = 0
    pending = False
    for i in range(points.size):
        point = points[i]
        if separators[point]:
            pending = size > 0
            continue
        if pending:
            out[size] = 0x20
            size += 1
            pending = False
        out[size] = point
        size += 1
    return out[:size]


_SLACK = 64
#: Mark of a code point whose casefolding is more than one code point (see :func:`folded_view`).
EXPANDS = np.uint32(0x80000000)


@_jit
def folded_view(
    points: np.ndarray, fold: np.ndarray, expansions: np.ndarray, separators: np.ndarray
) -> np.ndarray:
    """:func:`view_points` of the casefolded ``points``, casefolding code point by code point.

    ``fold[c]`` is the one code point ``c`` casefolds to, or :data:`EXPANDS` ORed with a row of
    ``expansions``: (count, first, second, third) code points. ``str.casefold`` maps each code
    point on its own (full case folding, no context), so this is the view of the casefolded text.
    """
    out = np.empty(points.size + _SLACK, dtype=np.uint32)
    size = _fold_into(points, fold, expansions, separators, out, _SLACK)
    if size < 0:  # casefolding lengthened the text by more than the slack: room for the worst case
        out = np.empty(3 * points.size, dtype=np.uint32)
        size = _fold_into(points, fold, expansions, separators, out, -1)
    return out[:size]


@_inline
def _fold_into(
    points: np.ndarray,
    fold: np.ndarray,
    expansions: np.ndarray,
    separators: np.ndarray,
    out: np.ndarray,
    slack: int,
) -> int:
    """Write the folded view into ``out``; -1 once the expansions pass ``slack`` extra points (-1: no limit).

    At most one code point (a space and a point after a silent separator) is written per code
    point read, plus the extra points of expansions: so ``points.size + slack`` is enough room.
    """
    size = 0
    extra = 0
    pending = False
    for i in range(points.size):
        folded = fold[points[i]]
        expands = (folded & EXPANDS) != 0
        row = np.int64(folded ^ EXPANDS) if expands else np.int64(0)
        count = np.int64(expansions[row, 0]) if expands else np.int64(1)
        if expands:
            extra += int(count) - 1
            if slack >= 0 and extra > slack:
                return -1
        for k in range(count):
            point = expansions[row, k + 1] if expands else folded
            if separators[point]:
                pending = size > 0
                continue
            if pending:
                out[size] = 0x20
                size += 1
                pending = False
            out[size] = point
            size += 1
    return size


@_jit
def folded_utf8(
    points: np.ndarray,
    fold: np.ndarray,
    expansions: np.ndarray,
    separators: np.ndarray,
    firsts: np.ndarray,
    lasts: np.ndarray,
) -> tuple[np.ndarray, int, int]:
    """:func:`folded_view` in UTF-8 bytes, with the count of its non-space code points and of
    those inside one of the ranges ``firsts[r]..lasts[r]``."""
    out = np.empty(4 * (points.size + _SLACK), dtype=np.uint8)
    size, total, inside = _fold_utf8_into(points, fold, expansions, separators, firsts, lasts, out, _SLACK)
    if size < 0:
        out = np.empty(4 * 3 * points.size, dtype=np.uint8)
        size, total, inside = _fold_utf8_into(points, fold, expansions, separators, firsts, lasts, out, -1)
    return out[:size], total, inside


@_inline
def _fold_utf8_into(
    points: np.ndarray,
    fold: np.ndarray,
    expansions: np.ndarray,
    separators: np.ndarray,
    firsts: np.ndarray,
    lasts: np.ndarray,
    out: np.ndarray,
    slack: int,
) -> tuple[int, int, int]:
    """:func:`_fold_into` in UTF-8 (at most 4 bytes per code point of room)."""
    size = 0
    extra = 0
    pending = False
    total = 0
    inside = 0
    lowest = firsts.min() if firsts.size else np.uint32(0xFFFFFFFF)
    for i in range(points.size):
        folded = fold[points[i]]
        expands = (folded & EXPANDS) != 0
        row = np.int64(folded ^ EXPANDS) if expands else np.int64(0)
        count = np.int64(expansions[row, 0]) if expands else np.int64(1)
        if expands:
            extra += int(count) - 1
            if slack >= 0 and extra > slack:
                return -1, 0, 0
        for k in range(count):
            point = expansions[row, k + 1] if expands else folded
            if separators[point]:
                pending = size > 0
                continue
            if pending:
                out[size] = 0x20
                size += 1
                pending = False
            total += 1
            if point >= lowest:
                for r in range(firsts.size):
                    if firsts[r] <= point <= lasts[r]:
                        inside += 1
                        break
            size = _utf8(np.uint32(point), out, size)
    return size, total, inside


@_inline
def _utf8(point: np.uint32, out: np.ndarray, at: int) -> int:
    """Write the UTF-8 bytes of one code point at ``out[at:]``; return the new end."""
    if point < 0x80:
        out[at] = point
        return at + 1
    if point < 0x800:
        out[at] = 0xC0 | (point >> 6)
        out[at + 1] = 0x80 | (point & 0x3F)
        return at + 2
    if point < 0x10000:
        out[at] = 0xE0 | (point >> 12)
        out[at + 1] = 0x80 | ((point >> 6) & 0x3F)
        out[at + 2] = 0x80 | (point & 0x3F)
        return at + 3
    out[at] = 0xF0 | (point >> 18)
    out[at + 1] = 0x80 | ((point >> 12) & 0x3F)
    out[at + 2] = 0x80 | ((point >> 6) & 0x3F)
    out[at + 3] = 0x80 | (point & 0x3F)
    return at + 4


@_jit
def byte_word_values(view: np.ndarray, seed: np.uint64, secret: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """XXH3-64 under ``seed`` of each space-separated word of a view in UTF-8 bytes (``uint8``).

    Any run of 0x20 separates words and empty pieces are dropped, as ``bytes.split`` does on a
    text whose only whitespace is the space. Returns the values and, as rows ``(word number,
    first byte, end byte)``, the words longer than :data:`LONGEST_WORD` bytes, whose value is
    left as 0 for the caller to fill.
    """
    size = view.size
    values = np.empty(size // 2 + 1, dtype=np.uint64)
    long_words = np.empty((size // (LONGEST_WORD + 1) + 1, 3), dtype=np.int64)
    longs = 0
    count = 0
    i = 0
    while i < size:
        if view[i] == 0x20:
            i += 1
            continue
        first = i
        while i < size and view[i] != 0x20:
            i += 1
        if i - first <= LONGEST_WORD:
            values[count] = xxh3_64(view, first, i - first, seed, secret)
        else:
            values[count] = 0
            long_words[longs, 0] = count
            long_words[longs, 1] = first
            long_words[longs, 2] = i
            longs += 1
        count += 1
    return values[:count], long_words[:longs]


@_jit
def window_keys(values: np.ndarray, width: int, start_key: np.uint64) -> np.ndarray:
    """Key of each window of ``width`` consecutive values: h = start_key, then h = mix64(h ^ u) per value.

    Windows are done 512 at a time, one unit offset after the other, so that the inner loop runs
    over independent keys (vectorised where the machine has 64-bit vector multiplies).
    """
    count = values.size - width + 1
    keys = np.empty(max(count, 0), dtype=np.uint64)
    for begin in range(0, count, 512):
        size = min(512, count - begin)
        block = keys[begin : begin + size]
        block[:] = start_key
        for offset in range(width):
            units = values[begin + offset : begin + offset + size]
            for j in range(size):
                z = block[j] ^ units[j]
                z = (z ^ (z >> _S30)) * _M1
                z = (z ^ (z >> _S27)) * _M2
                block[j] = z ^ (z >> _S31)
    return keys


@_jit
def signatures(
    keys: np.ndarray, offsets: np.ndarray, multipliers: np.ndarray, increments: np.ndarray
) -> np.ndarray:
    """Rows ``r``: per function i, the minimum over ``keys[offsets[r]:offsets[r + 1]]`` of
    ``(multipliers[i] * fold(x) + increments[i]) mod 2^32`` (``uint32``).

    ``fold(x)`` is the XOR of the halves of the 64-bit key. A row with no keys is left at
    ``2^32 - 1``; the caller applies the cap and the empty rows.
    """
    rows = offsets.size - 1
    width = multipliers.size
    out = np.full((rows, width), np.uint32(0xFFFFFFFF), dtype=np.uint32)
    for row in range(rows):
        minima = out[row]
        for k in range(offsets[row], offsets[row + 1]):
            key = keys[k]
            folded = np.uint32((key ^ (key >> _U32)) & _LOW32)
            for i in range(width):
                value = np.uint32(multipliers[i] * folded + increments[i])
                if value < minima[i]:
                    minima[i] = value
    return out
