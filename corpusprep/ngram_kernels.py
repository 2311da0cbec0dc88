"""Compiled loops (numba) for the word n-gram hashes of :mod:`corpusprep.ngrams`.

The arithmetic is that of :mod:`corpusprep.ngrams` (see its docstring), done in one
pass over the bytes or token ids instead of a few dozen NumPy passes:

* a word's polynomial is built by Horner's rule, ``poly = poly * P + T[b]``, which is
  the same value modulo ``2^64`` as the prefix-sum form of the NumPy path;
* the n-gram polynomial ``sum_j w_j R^(n-1-j)`` is kept rolling over the last ``n``
  words: ``h = h * R + w_new - w_old * R^n`` (exact in the ring of integers modulo
  ``2^64``, so equal to the ``n`` multiply-adds of the NumPy path).

The NumPy functions stay the reference: the tests compare these kernels with them and
with the plain-Python scalar hashes. Every kernel is compiled on first use and cached
on disk beside the module (numba's ``cache=True``); all release the GIL.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, TypeVar, cast

import numba as nb
import numpy as np

__all__ = [
    "census",
    "distinct_index",
    "documents",
    "find_sorted",
    "hash_words",
    "normalise_tokens",
    "scan_tokens",
    "wide_runs",
    "word_hashes",
]

_P = np.uint64(0x9E3779B97F4A7C15)
_G = np.uint64(0xC2B2AE3D27D4EB4F)
_R = np.uint64(0x165667B19E3779F9)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_S30 = np.uint64(30)
_S27 = np.uint64(27)
_S31 = np.uint64(31)
_SIX = np.uint64(6)
_LOW6 = np.uint64(63)
_ONE = np.uint64(1)
_ZERO = np.uint64(0)

#: Codes of the per-id kind table of :func:`scan_tokens`.
WORD_BYTE, SEPARATOR, SPECIAL = 0, 1, 3

_Function = TypeVar("_Function", bound=Callable[..., Any])


def _jit(function: _Function) -> _Function:
    return cast(_Function, nb.njit(cache=True, nogil=True)(function))


def _inline(function: _Function) -> _Function:
    return cast(_Function, nb.njit(inline="always")(function))


@_inline
def _mix(z: np.uint64) -> np.uint64:  # SplitMix64 finaliser (Steele, Lea & Flood 2014)
    z = (z ^ (z >> _S30)) * _M1
    z = (z ^ (z >> _S27)) * _M2
    return z ^ (z >> _S31)


@_inline
def _maybe(bits: np.ndarray, shift: np.uint64, mask: np.uint64, value: np.uint64) -> bool:
    """Both probes of the two-probe bit filter are set (no false negatives)."""
    first = value >> shift
    second = value & mask
    if (bits[first >> _SIX] >> (first & _LOW6)) & _ONE == _ZERO:
        return False
    found: bool = (bits[second >> _SIX] >> (second & _LOW6)) & _ONE != _ZERO
    return found


@_inline
def _position(values: np.ndarray, value: np.uint64) -> int:
    """Index of ``value`` in the sorted ``values``, or -1."""
    low = 0
    high = values.size
    while low < high:
        middle = (low + high) >> 1
        if values[middle] < value:
            low = middle + 1
        else:
            high = middle
    if low < values.size and values[low] == value:
        return low
    return -1


@_jit
def census(tokens: np.ndarray, end_of_document: int) -> tuple[int, int]:
    """Count of end-of-document ids and of ids 128..255 (non-ASCII UTF-8 bytes)."""
    ends = 0
    wide = 0
    for i in range(tokens.size):
        value = tokens[i]
        ends += value == end_of_document
        wide += (value >= 128) & (value < 256)
    return ends, wide


@_jit
def documents(tokens: np.ndarray, kind: np.ndarray, end_of_document: int) -> tuple[np.ndarray, np.ndarray]:
    """Positions of the end-of-document ids, and per document the count of ids not :data:`SPECIAL`.

    A last run without an end-of-document id is a document too (it gets no position).
    Ids at or above the size of ``kind`` count as not special.
    """
    size = tokens.size
    table = kind.size
    count = 0
    for i in range(size):
        count += tokens[i] == end_of_document
    trailing = size > 0 and tokens[size - 1] != end_of_document
    ends = np.empty(count, dtype=np.int64)
    lengths = np.zeros(count + trailing, dtype=np.int64)
    document = 0
    counted = 0
    for i in range(size):
        value = tokens[i]
        if value < 0 or value >= table or kind[value] != SPECIAL:
            counted += 1
        if value == end_of_document:
            ends[document] = i
            lengths[document] = counted
            document += 1
            counted = 0
    if trailing:
        lengths[document] = counted
    return ends, lengths


@_jit
def normalise_tokens(
    tokens: np.ndarray, lower: np.ndarray, kind: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Per id: its lowercase byte (0x20 for ids at or above the table) and whether it separates words."""
    size = tokens.size
    table = lower.size
    data = np.empty(size, dtype=np.uint8)
    separator = np.empty(size, dtype=np.bool_)
    for i in range(size):
        value = tokens[i]
        if value >= 0 and value < table:
            data[i] = lower[value]
            separator[i] = kind[value] != WORD_BYTE
        else:
            data[i] = 0x20
            separator[i] = True
    return data, separator


@_jit
def word_hashes(data: np.ndarray, constants: np.ndarray) -> np.ndarray:
    """Word hashes of normalised bytes whose only separator is the space (0x20)."""
    out = np.empty((data.size + 1) // 2, dtype=np.uint64)
    count = 0
    poly = _ZERO
    length = 0
    for i in range(data.size + 1):
        byte = data[i] if i < data.size else 0x20
        if byte != 0x20:
            poly = poly * _P + constants[byte]
            length += 1
        elif length:
            out[count] = _mix(poly ^ (np.uint64(length) * _G))
            count += 1
            poly = _ZERO
            length = 0
    return out[:count].copy()


@_jit
def hash_words(
    data: np.ndarray, separator: np.ndarray, bounds: np.ndarray, constants: np.ndarray, ngram: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``starts, ends, word_document, hashes, first_word`` as :func:`corpusprep.ngrams.hash_normalised`.

    ``separator`` is the boolean mask over ``data``; ``bounds`` the sorted positions of
    document ends. The document of a word counts the bounds before its first byte.
    """
    size = data.size
    limit = (size + 1) // 2
    starts = np.empty(limit, dtype=np.int64)
    ends = np.empty(limit, dtype=np.int64)
    document = np.empty(limit, dtype=np.int64)
    hashes = np.empty(limit, dtype=np.uint64)
    first_word = np.empty(limit, dtype=np.int64)
    ring = np.zeros(ngram, dtype=np.uint64)
    rn = _ONE
    for _ in range(ngram):
        rn = rn * _R
    words = 0
    grams = 0
    slot = 0
    rolling = _ZERO
    run = 0
    last_document = -1
    bound = 0
    poly = _ZERO
    begin = 0
    for i in range(size + 1):
        inside = i < size and not separator[i]
        if inside:
            byte = data[i]
            if i == 0 or separator[i - 1]:
                begin = i
                poly = _ZERO
            poly = poly * _P + constants[byte]
            continue
        if i == 0 or separator[i - 1]:
            continue
        # a word ends at i - 1
        while bound < bounds.size and bounds[bound] < begin:
            bound += 1
        word = _mix(poly ^ (np.uint64(i - begin) * _G))
        starts[words] = begin
        ends[words] = i - 1
        document[words] = bound
        old = ring[slot]
        ring[slot] = word
        slot += 1
        if slot == ngram:
            slot = 0
        rolling = rolling * _R + word - old * rn
        if bound != last_document:
            last_document = bound
            run = 0
        run += 1
        if run >= ngram:
            hashes[grams] = _mix(rolling)
            first_word[grams] = words - ngram + 1
            grams += 1
        words += 1
    return (
        starts[:words].copy(),
        ends[:words].copy(),
        document[:words].copy(),
        hashes[:grams].copy(),
        first_word[:grams].copy(),
    )


@_jit
def scan_tokens(
    tokens: np.ndarray,
    lower: np.ndarray,
    kind: np.ndarray,
    end_of_document: int,
    run_begin: np.ndarray,
    run_end: np.ndarray,
    run_offsets: np.ndarray,
    run_words: np.ndarray,
    constants: np.ndarray,
    ngram: int,
    bits: np.ndarray,
    shift: np.uint64,
    mask: np.uint64,
    values: np.ndarray,
    first_train: np.ndarray,
    document_base: int,
    lengths: np.ndarray,
) -> None:
    """Hash every word n-gram of a run of documents and look it up in a sorted set.

    ``lower``/``kind`` map ids below their size to a lowercase byte and to
    :data:`WORD_BYTE`, :data:`SEPARATOR` or :data:`SPECIAL` (larger ids separate words
    and are counted, as ids that are not special). Runs ``run_begin[r]:run_end[r]`` (sorted, each beginning
    after a separator) are not read: their words are the precomputed hashes
    ``run_words[run_offsets[r]:run_offsets[r + 1]]``. For every n-gram found in
    ``values`` (``bits``, ``shift``, ``mask``: the bit filter), ``first_train`` of
    its index becomes the smallest document number holding it
    (``document_base`` + chunk-local document). ``lengths[k]`` receives the
    non-special token count of document ``k`` of the chunk.
    """
    size = tokens.size
    table = lower.size
    ring = np.zeros(ngram, dtype=np.uint64)
    rn = _ONE
    for _ in range(ngram):
        rn = rn * _R
    slot = 0
    rolling = _ZERO
    run = 0
    document = 0
    counted = 0
    poly = _ZERO
    length = 0
    next_run = 0
    pending = run_begin[0] if run_begin.size else -1
    i = 0
    while i <= size:
        injected = -1
        if i == pending:
            injected = next_run
            next_run += 1
            pending = run_begin[next_run] if next_run < run_begin.size else -1
            code = SEPARATOR
        elif i < size:
            value = tokens[i]
            code = kind[value] if value >= 0 and value < table else SEPARATOR
            if code == WORD_BYTE:
                poly = poly * _P + constants[lower[value]]
                length += 1
                counted += 1
                i += 1
                continue
            counted += code != SPECIAL
        else:
            code = SEPARATOR
        # words end here: the one being built, then those of an injected run
        first = 0
        last = 0
        if injected >= 0:
            first = run_offsets[injected]
            last = run_offsets[injected + 1]
        pushed = -1 if length else 0
        index = first + pushed
        while index < last:
            if index < first:
                word = _mix(poly ^ (np.uint64(length) * _G))
                poly = _ZERO
                length = 0
            else:
                word = run_words[index]
            index += 1
            old = ring[slot]
            ring[slot] = word
            slot += 1
            if slot == ngram:
                slot = 0
            rolling = rolling * _R + word - old * rn
            run += 1
            if run >= ngram:
                gram = _mix(rolling)
                if _maybe(bits, shift, mask, gram):
                    where = _position(values, gram)
                    if where >= 0:
                        seen = first_train[where]
                        here = document_base + document
                        if seen < 0 or here < seen:
                            first_train[where] = here
        if injected >= 0:
            counted += run_end[injected] - run_begin[injected]
            i = run_end[injected]
            continue
        if i < size and tokens[i] == end_of_document:
            lengths[document] = counted
            counted = 0
            document += 1
            run = 0
        elif i == size and document < lengths.size:
            lengths[document] = counted
        i += 1


@_jit
def distinct_index(values: np.ndarray, order: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The distinct values in ascending order, and the index in them of each value.

    ``order`` sorts ``values`` (``np.argsort``).
    """
    size = values.size
    distinct = np.empty(size, dtype=np.uint64)
    index = np.empty(size, dtype=np.int64)
    count = -1
    previous = _ZERO
    for k in range(size):
        at = order[k]
        value = values[at]
        if count < 0 or value != previous:
            count += 1
            distinct[count] = value
            previous = value
        index[at] = count
    return distinct[: count + 1].copy(), index


@_jit
def find_sorted(
    hashes: np.ndarray, bits: np.ndarray, shift: np.uint64, mask: np.uint64, values: np.ndarray
) -> np.ndarray:
    """Index in the sorted ``values`` of each hash, or -1 (bit filter first)."""
    out = np.full(hashes.size, -1, dtype=np.int64)
    if values.size == 0:
        return out
    for i in range(hashes.size):
        value = hashes[i]
        if _maybe(bits, shift, mask, value):
            out[i] = _position(values, value)
    return out


@_jit
def wide_runs(tokens: np.ndarray, space: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``begin, end`` of each maximal run between ``space`` ids that holds an id 128..255.

    ``space`` marks ids below its size that end a run (ASCII whitespace, specials);
    larger ids end runs too. Runs come sorted and disjoint.
    """
    size = tokens.size
    table = space.size
    begins = []
    ends = []
    i = 0
    while i < size:
        value = tokens[i]
        if value >= 128 and value < 256:
            begin = i
            while begin > 0:
                before = tokens[begin - 1]
                if before < 0 or before >= table or space[before]:
                    break
                begin -= 1
            end = i + 1
            while end < size:
                after = tokens[end]
                if after < 0 or after >= table or space[after]:
                    break
                end += 1
            begins.append(begin)
            ends.append(end)
            i = end
        else:
            i += 1
    out_begin = np.empty(len(begins), dtype=np.int64)
    out_end = np.empty(len(ends), dtype=np.int64)
    for k in range(len(begins)):
        out_begin[k] = begins[k]
        out_end[k] = ends[k]
    return out_begin, out_end
