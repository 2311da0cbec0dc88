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
    "build_marks",
    "build_set",
    "census",
    "documents",
    "expand_ids",
    "find_marked",
    "hash_words",
    "normalise_tokens",
    "scan_tokens",
    "splice",
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
_TWELVE = np.uint64(12)

#: Marks of the table of :func:`build_marks`: a free slot, a value no document holds yet.
EMPTY = np.uint64(0xFFFFFFFFFFFFFFFF)
UNSEEN = np.uint64(0xFFFFFFFFFFFFFFFE)

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
def _maybe(bits: np.ndarray, shift: np.uint64, value: np.uint64) -> bool:
    """Both bits of ``value`` are set in its word of the blocked bit filter (no false negatives)."""
    pattern = (_ONE << (value & _LOW6)) | (_ONE << ((value >> _SIX) & _LOW6))
    found: bool = bits[value >> shift] & pattern == pattern
    return found


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
def normalise_tokens(tokens: np.ndarray, lower: np.ndarray) -> np.ndarray:
    """Per id its lowercase byte (0x20 for ids at or above the table)."""
    size = tokens.size
    table = lower.size
    data = np.empty(size, dtype=np.uint8)
    for i in range(size):
        value = tokens[i]
        data[i] = lower[value] if value >= 0 and value < table else 0x20
    return data


@_jit
def expand_ids(tokens: np.ndarray, offsets: np.ndarray, flat: np.ndarray, end_of_document: int) -> np.ndarray:
    """The bytes of each id (``flat[offsets[t]:offsets[t + 1]]``), end-of-document ids as 256.

    Ids must be below ``offsets.size - 1``.
    """
    total = 0
    for i in range(tokens.size):
        value = tokens[i]
        total += 1 if value == end_of_document else offsets[value + 1] - offsets[value]
    out = np.empty(total, dtype=np.uint16)
    at = 0
    for i in range(tokens.size):
        value = tokens[i]
        if value == end_of_document:
            out[at] = 256
            at += 1
            continue
        for k in range(offsets[value], offsets[value + 1]):
            out[at] = flat[k]
            at += 1
    return out


@_jit
def splice(
    data: np.ndarray,
    boundary: np.ndarray,
    begins: np.ndarray,
    ends: np.ndarray,
    pieces: np.ndarray,
    offsets: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """``data`` with each run ``begins[r]:ends[r]`` replaced by ``pieces[offsets[r]:offsets[r + 1]]``.

    Sorted, disjoint runs; ``boundary`` follows (False inside the pieces).
    """
    removed = 0
    for r in range(begins.size):
        removed += ends[r] - begins[r]
    size = data.size - removed + pieces.size
    out = np.empty(size, dtype=np.uint8)
    flags = np.empty(size, dtype=np.bool_)
    source = 0
    target = 0
    for r in range(begins.size + 1):
        stop = begins[r] if r < begins.size else data.size
        count = stop - source
        out[target : target + count] = data[source:stop]
        flags[target : target + count] = boundary[source:stop]
        target += count
        if r == begins.size:
            break
        first = offsets[r]
        count = offsets[r + 1] - first
        out[target : target + count] = pieces[first : first + count]
        flags[target : target + count] = False
        target += count
        source = ends[r]
    return out, flags


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


@_inline
def _roll(word: np.uint64, ring: np.ndarray, slot: int, rolling: np.uint64, rn: np.uint64) -> tuple[int, Any]:
    """Push a word hash into the ring of the last ``ring.size`` words; the new rolling polynomial."""
    old = ring[slot]
    ring[slot] = word
    slot += 1
    if slot == ring.size:
        slot = 0
    return slot, rolling * _R + word - old * rn


@_inline
def _home(value: np.uint64, slot_mask: int) -> int:
    return int(value >> _TWELVE) & slot_mask


@_inline
def _record(
    gram: np.uint64, bits: np.ndarray, shift: np.uint64, marks: np.ndarray, slot_mask: int, here: int
) -> None:
    """Lower the mark of ``gram`` in the table ``marks`` to ``here`` if it is there."""
    if not _maybe(bits, shift, gram):
        return
    slot = _home(gram, slot_mask)
    while True:
        state = marks[slot, 1]
        if state == EMPTY:
            return
        if marks[slot, 0] == gram:
            if np.uint64(here) < state:
                marks[slot, 1] = np.uint64(here)
            return
        slot = (slot + 1) & slot_mask


@_jit
def _insert_all(values: np.ndarray, count: int, slot_bits: int, slot_of: np.ndarray) -> np.ndarray:
    """A table of ``2^slot_bits`` rows holding ``values[:count]`` in order, mark = value's index."""
    slot_mask = (1 << slot_bits) - 1
    marks = np.empty((1 << slot_bits, 2), dtype=np.uint64)
    for row in range(1 << slot_bits):
        marks[row, 0] = _ZERO
        marks[row, 1] = EMPTY
    for j in range(count):
        value = values[j]
        slot = _home(value, slot_mask)
        while marks[slot, 1] != EMPTY:
            slot = (slot + 1) & slot_mask
        marks[slot, 0] = value
        marks[slot, 1] = np.uint64(j)
        slot_of[j] = slot
    return marks


@_jit
def build_marks(values: np.ndarray, slot_bits: int) -> tuple[np.ndarray, np.ndarray]:
    """An open-addressing table (linear probing) of distinct ``values``, and the slot of each.

    Row ``s`` of the table holds a value and its mark: :data:`EMPTY` for a free slot,
    :data:`UNSEEN` until a document number lowers it. A value's home slot is taken from
    bits 12 and up, which the bit filter does not use for tables below ``2^(64 - 12)``.
    """
    slot_of = np.empty(values.size, dtype=np.int64)
    marks = _insert_all(values, values.size, slot_bits, slot_of)
    for k in range(values.size):
        marks[slot_of[k], 1] = UNSEEN
    return marks, slot_of


@_jit
def hash_words(
    data: np.ndarray, terms: np.ndarray, bounds: np.ndarray, ngram: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``starts, ends, word_document, hashes, first_word`` as :func:`corpusprep.ngrams.hash_normalised`.

    ``terms[b]`` is the byte constant of byte ``b``, or 0 when ``b`` separates words;
    ``bounds`` are the sorted positions of document ends. The document of a word
    counts the bounds before its first byte.
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
    length = 0
    for i in range(size + 1):
        term = terms[data[i]] if i < size else _ZERO
        if term != _ZERO:
            poly = poly * _P + term
            length += 1
            continue
        if length == 0:
            continue
        begin = i - length
        while bound < bounds.size and bounds[bound] < begin:
            bound += 1
        slot, rolling = _roll(_mix(poly ^ (np.uint64(length) * _G)), ring, slot, rolling, rn)
        poly = _ZERO
        length = 0
        starts[words] = begin
        ends[words] = i - 1
        document[words] = bound
        if bound != last_document:
            last_document = bound
            run = 0
        run += 1
        if run >= ngram:
            hashes[grams] = _mix(rolling)
            first_word[grams] = words - ngram + 1
            grams += 1
        words += 1
    # views: the pages past the used part were never touched, so they hold no memory
    return starts[:words], ends[:words], document[:words], hashes[:grams], first_word[:grams]


@_jit
def scan_tokens(
    tokens: np.ndarray,
    terms: np.ndarray,
    kind: np.ndarray,
    end_of_document: int,
    run_begin: np.ndarray,
    run_end: np.ndarray,
    run_offsets: np.ndarray,
    run_words: np.ndarray,
    ngram: int,
    bits: np.ndarray,
    shift: np.uint64,
    marks: np.ndarray,
    slot_mask: int,
    document_base: int,
    lengths: np.ndarray,
) -> None:
    """Hash every word n-gram of a run of documents and look it up in a sorted set.

    ``terms`` maps each id below its size that is a word byte to the byte constant of
    its lowercase byte, and every other id to 0; ``kind`` maps ids to
    :data:`WORD_BYTE`, :data:`SEPARATOR` or :data:`SPECIAL` (larger ids separate words
    and count, as ids that are not special do). Runs ``run_begin[r]:run_end[r]``
    (sorted, each beginning after a separator or at 0) are not read: their words are
    the precomputed hashes ``run_words[run_offsets[r]:run_offsets[r + 1]]``. For every
    n-gram that passes the bit filter (``bits``, ``shift``) and is in the table
    ``marks`` (:func:`build_marks`), its mark becomes the smallest document number
    holding it (``document_base`` + chunk-local document). ``lengths[k]`` receives the
    count of ids that are not special in document ``k`` of the chunk.
    """
    size = tokens.size
    table = terms.size
    ring = np.zeros(ngram, dtype=np.uint64)
    rn = _ONE
    for _ in range(ngram):
        rn = rn * _R
    # n-grams wait in a small batch and are looked up together: the look-ups of a batch do not
    # depend on each other, so the processor overlaps their cache misses
    pending_grams = np.empty(_BATCH, dtype=np.uint64)
    pending_documents = np.empty(_BATCH, dtype=np.int64)
    pending = 0
    end_is_special = 0 <= end_of_document < table and kind[end_of_document] == SPECIAL
    slot = 0
    rolling = _ZERO
    run = 0
    document = 0
    document_start = 0
    specials = 0
    poly = _ZERO
    length = 0
    injected = 0
    i = 0
    while True:
        stop = run_begin[injected] if injected < run_begin.size else size
        while i < stop:
            value = tokens[i]
            term = terms[value] if value >= 0 and value < table else _ZERO
            i += 1
            if term != _ZERO:
                poly = poly * _P + term
                length += 1
                continue
            if length:
                slot, rolling = _roll(_mix(poly ^ (np.uint64(length) * _G)), ring, slot, rolling, rn)
                poly = _ZERO
                length = 0
                run += 1
                if run >= ngram:
                    pending_grams[pending] = _mix(rolling)
                    pending_documents[pending] = document_base + document
                    pending += 1
                    if pending == _BATCH:
                        _record_all(pending_grams, pending_documents, pending, bits, shift, marks, slot_mask)
                        pending = 0
            if value == end_of_document:
                lengths[document] = i - document_start - specials - end_is_special
                document += 1
                document_start = i
                specials = 0
                run = 0
            elif value >= 0 and value < table and kind[value] == SPECIAL:
                specials += 1
        if length:
            slot, rolling = _roll(_mix(poly ^ (np.uint64(length) * _G)), ring, slot, rolling, rn)
            poly = _ZERO
            length = 0
            run += 1
            if run >= ngram:
                pending_grams[pending] = _mix(rolling)
                pending_documents[pending] = document_base + document
                pending += 1
                if pending == _BATCH:
                    _record_all(pending_grams, pending_documents, pending, bits, shift, marks, slot_mask)
                    pending = 0
        if injected == run_begin.size:
            break
        for index in range(run_offsets[injected], run_offsets[injected + 1]):
            slot, rolling = _roll(run_words[index], ring, slot, rolling, rn)
            run += 1
            if run >= ngram:
                pending_grams[pending] = _mix(rolling)
                pending_documents[pending] = document_base + document
                pending += 1
                if pending == _BATCH:
                    _record_all(pending_grams, pending_documents, pending, bits, shift, marks, slot_mask)
                    pending = 0
        i = run_end[injected]
        injected += 1
    if document < lengths.size:
        lengths[document] = size - document_start - specials
    _record_all(pending_grams, pending_documents, pending, bits, shift, marks, slot_mask)


_BATCH = 1024


@_jit
def _record_all(
    grams: np.ndarray,
    documents: np.ndarray,
    count: int,
    bits: np.ndarray,
    shift: np.uint64,
    marks: np.ndarray,
    slot_mask: int,
) -> None:
    for k in range(count):
        _record(grams[k], bits, shift, marks, slot_mask, documents[k])


@_jit
def build_set(
    hashes: np.ndarray, slot_bits: int
) -> tuple[np.ndarray, int, np.ndarray, np.ndarray, np.ndarray]:
    """Distinct ``hashes`` in a table of marks that grows to stay at most 2/3 full.

    Returns ``marks, slot_bits, values, slot_of, index``: the table (as
    :func:`build_marks` builds it from ``values``, every mark :data:`UNSEEN`), its size,
    the distinct hashes in order of first occurrence, the slot of each, and for each
    hash its position in ``values``.
    """
    values = np.empty(hashes.size, dtype=np.uint64)
    slot_of = np.empty(hashes.size, dtype=np.int64)
    index = np.empty(hashes.size, dtype=np.int64)
    marks = _insert_all(values, 0, slot_bits, slot_of)
    slot_mask = (1 << slot_bits) - 1
    limit = (2 << slot_bits) // 3
    count = 0
    for j in range(hashes.size):
        value = hashes[j]
        slot = _home(value, slot_mask)
        while True:
            state = marks[slot, 1]
            if state == EMPTY:
                marks[slot, 0] = value
                marks[slot, 1] = np.uint64(count)
                values[count] = value
                slot_of[count] = slot
                index[j] = count
                count += 1
                if count > limit:
                    slot_bits += 1
                    slot_mask = (1 << slot_bits) - 1
                    limit = (2 << slot_bits) // 3
                    marks = _insert_all(values, count, slot_bits, slot_of)
                break
            if marks[slot, 0] == value:
                index[j] = np.int64(state)
                break
            slot = (slot + 1) & slot_mask
    for k in range(count):
        marks[slot_of[k], 1] = UNSEEN
    return marks, slot_bits, values[:count].copy(), slot_of[:count].copy(), index


@_jit
def find_marked(
    hashes: np.ndarray, bits: np.ndarray, shift: np.uint64, marks: np.ndarray, slot_mask: int
) -> np.ndarray:
    """Slot in the table ``marks`` of each hash, or -1 (bit filter first)."""
    out = np.full(hashes.size, -1, dtype=np.int64)
    for i in range(hashes.size):
        value = hashes[i]
        if not _maybe(bits, shift, value):
            continue
        slot = _home(value, slot_mask)
        while marks[slot, 1] != EMPTY:
            if marks[slot, 0] == value:
                out[i] = slot
                break
            slot = (slot + 1) & slot_mask
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
