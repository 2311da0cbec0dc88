"""Word n-grams of a token stream, hashed with NumPy, for the long-overlap leakage check.

Normalisation
-------------
Brown et al. 2020 ("Language Models are Few-Shot Learners", App. C; the rule
is quoted from memory, not checked against the paper here) count overlap in
13-grams of words after lowercasing, ignoring punctuation and splitting on
whitespace. Here that is, exactly:

1. :meth:`str.lower`;
2. every punctuation character (Unicode general category ``P*``) is replaced
   by a space, so it separates words (our reading of "ignored"; the same
   choice as the near-duplicate view of :mod:`corpusprep.shingles`);
3. :meth:`str.split` with no argument (Python's whitespace).

:func:`normal_words` is that rule in plain Python and the reference of every
fast path.

Hashes
------
Word and n-gram hashes are 64-bit and computed with wrapping ``uint64``
arithmetic so that a whole chunk of a token stream is hashed by a handful of
array operations, with no Python work per word:

* a word of UTF-8 bytes ``b_0 .. b_{m-1}`` first gets the polynomial
  ``sum_i T[b_i] * P^(m-1-i) mod 2^64``, where ``T`` holds 256 odd 64-bit
  constants (XXH3-64 of ``b"ngram-byte:<value>"``) and ``P`` is an odd
  constant. Because ``P`` is odd it has an inverse ``Q`` modulo ``2^64``, so the
  polynomial of bytes ``s..e`` of a chunk is ``P^e * (S[e] - S[s-1])`` with the
  prefix sums ``S[i] = sum_{j<=i} T[b_j] * Q^j`` (one ``cumsum``). The word hash
  is the SplitMix64 finaliser (Steele, Lea & Flood 2014) of the polynomial
  XOR ``m * G``;
* an n-gram of word hashes ``w_0 .. w_{n-1}`` gets the finaliser of
  ``sum_j w_j * R^(n-1-j) mod 2^64`` (``n`` multiply-adds over the word array).

Equal n-grams always get equal hashes, so no overlap is ever missed. Distinct
n-grams collide with probability about ``2^-64`` per pair for ordinary text;
polynomial hashing modulo ``2^64`` is known to be defeated by specially built
strings (Thue-Morse sequences; cited from memory), which is why the audit
shows every reported n-gram as text. :func:`ngram_hashes_scalar` computes the
same values with Python integers; the tests hold the two together.

Token streams
-------------
With the byte tokenizer the stream of a split is UTF-8 bytes, special ids
(256 and up) between documents. ASCII bytes are normalised by table look-up
(tables built from ``str.lower``, ``str.isspace`` and :mod:`unicodedata` for
the 128 ASCII characters, so they agree with the rule by construction); a run
of bytes between ASCII whitespace that holds a byte >= 128 is decoded and
normalised by :func:`normal_words`. A tokenizer whose decoding is the
concatenation of per-id bytes (:func:`id_bytes_of`: checked, not assumed) has
its ids expanded to bytes, which then take the same path; any other tokenizer
has every document decoded with its ``decode`` function and normalised in
Python.

Speed
-----
The hashing, the look-ups and the stream passes are compiled loops
(:mod:`corpusprep.ngram_kernels`, numba). The NumPy functions here
(:func:`hash_normalised`, :meth:`NgramSet.find_reference`) and the plain-Python
ones (:func:`normal_words`, :func:`ngram_hashes_scalar`) are their references in
the tests.
"""

from __future__ import annotations

import functools
import math
import time
import unicodedata
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import xxhash

from corpusprep import ngram_kernels as kernels
from corpusprep.shingles import punctuation_table

__all__ = [
    "DEFAULT_NGRAM",
    "HashedChunk",
    "IdBytes",
    "NgramSet",
    "StreamTables",
    "byte_separators",
    "complete_documents",
    "document_count",
    "hash_normalised",
    "hash_normalised_compiled",
    "hash_stream_chunk",
    "hash_texts",
    "hash_texts_python",
    "id_bytes_of",
    "ngram_hashes_scalar",
    "normal_text",
    "normal_words",
    "scan_chunk",
    "warm_up",
    "word_hash_scalar",
]

#: Brown et al. 2020, App. C (from memory): 13-grams.
DEFAULT_NGRAM = 13

_MASK = (1 << 64) - 1
_P = 0x9E3779B97F4A7C15  # odd: 2^64 / golden ratio
_Q = pow(_P, -1, 1 << 64)
_G = 0xC2B2AE3D27D4EB4F
_R = 0x165667B19E3779F9
_SPACE = 0x20


def normal_words(text: str) -> list[str]:
    """The words of ``text`` after lowercasing and ignoring punctuation (Brown et al. 2020, App. C).

    >>> normal_words("The Ferry's  timetable -- REVISED, again!")
    ['the', 'ferry', 's', 'timetable', 'revised', 'again']
    """
    return text.lower().translate(punctuation_table()).split()


def normal_text(text: str) -> str:
    """The normalised words of ``text`` joined by single spaces.

    >>> normal_text("  Dock B; (closed)\\n")
    'dock b closed'
    """
    return " ".join(normal_words(text))


# --------------------------------------------------------------------------- scalar reference
def _mix_int(value: int) -> int:
    value &= _MASK
    value = ((value ^ (value >> 30)) * 0xBF58476D1CE4E5B9) & _MASK
    value = ((value ^ (value >> 27)) * 0x94D049BB133111EB) & _MASK
    return value ^ (value >> 31)


@functools.cache
def _byte_constants() -> tuple[int, ...]:
    return tuple(xxhash.xxh3_64_intdigest(b"ngram-byte:%d" % value) | 1 for value in range(256))


@functools.cache
def _constants_array() -> np.ndarray:
    constants = np.array(_byte_constants(), dtype=np.uint64)
    constants.flags.writeable = False
    return constants


def word_hash_scalar(word: bytes) -> int:
    """Hash of one normalised word (its UTF-8 bytes), with Python integers."""
    constants = _byte_constants()
    poly = 0
    for byte in word:
        poly = (poly * _P + constants[byte]) & _MASK
    return _mix_int(poly ^ ((len(word) * _G) & _MASK))


def ngram_hashes_scalar(text: str, ngram: int = DEFAULT_NGRAM) -> list[int]:
    """Hashes of the word n-grams of ``text``, in order, with Python integers (the reference)."""
    words = [word_hash_scalar(word.encode("utf-8")) for word in normal_words(text)]
    out = []
    for start in range(len(words) - ngram + 1):
        poly = 0
        for value in words[start : start + ngram]:
            poly = (poly * _R + value) & _MASK
        out.append(_mix_int(poly))
    return out


# --------------------------------------------------------------------------- vectorised core
def _mix(values: np.ndarray) -> np.ndarray:
    z = values ^ (values >> np.uint64(30))
    z *= np.uint64(0xBF58476D1CE4E5B9)
    z ^= z >> np.uint64(27)
    z *= np.uint64(0x94D049BB133111EB)
    z ^= z >> np.uint64(31)
    mixed: np.ndarray = z
    return mixed


def _powers(base: int, count: int) -> np.ndarray:
    """``base^0 .. base^(count-1)`` modulo 2^64."""
    values = np.full(count, base, dtype=np.uint64)
    if count:
        values[0] = 1
    return np.cumprod(values, dtype=np.uint64, out=values)


@dataclass(frozen=True, slots=True, kw_only=True)
class HashedChunk:
    """The words and n-grams of a run of whole documents (one chunk of a stream).

    ``data`` holds the normalised bytes, ``starts``/``ends`` the first and last
    byte of each word, ``document`` the chunk-local document of each word;
    ``hashes[i]`` is the n-gram that begins at word ``first_word[i]``, inside
    document ``document[first_word[i]]``. ``documents`` counts the documents of
    the chunk (including those with no words) and ``lengths`` their token counts
    without special tokens.
    """

    data: np.ndarray
    starts: np.ndarray
    ends: np.ndarray
    document: np.ndarray
    hashes: np.ndarray
    first_word: np.ndarray
    documents: int
    lengths: np.ndarray
    ngram: int

    def ngram_text(self, index: int) -> str:
        """The normalised text of the ``index``-th n-gram of the chunk."""
        first = int(self.first_word[index])
        # Between the words of a chunk lie only separators: ASCII whitespace or punctuation, or the
        # space standing for a special id (bytes >= 128 only occur inside words), so the words of the
        # span are its pieces between ASCII separators.
        span = self.data[int(self.starts[first]) : int(self.ends[first + self.ngram - 1]) + 1].tobytes()
        return " ".join(span.translate(_ascii_separators_to_space()).decode("utf-8", "replace").split())


def hash_normalised(
    data: np.ndarray, separator: np.ndarray, boundary: np.ndarray, ngram: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Word spans and n-gram hashes of normalised bytes.

    ``data`` (uint8) are lowercase bytes; ``separator`` marks bytes between
    words; ``boundary`` marks document ends (they must also be separators).
    Returns ``starts, ends, word_document, hashes, first_word``; n-grams never
    cross a boundary.
    """
    if ngram < 1:
        raise ValueError(f"ngram = {ngram}: must be at least 1")
    size = data.size
    is_word = ~separator
    before = np.concatenate(([False], is_word[:-1])) if size else is_word
    after = np.concatenate((is_word[1:], [False])) if size else is_word
    starts = np.flatnonzero(is_word & ~before)
    ends = np.flatnonzero(is_word & ~after)
    word_document = np.searchsorted(np.flatnonzero(boundary), starts).astype(np.int64)
    if starts.size:
        terms = _constants_array()[data] * _powers(_Q, size)
        prefix = np.cumsum(terms, dtype=np.uint64)
        below = np.where(starts > 0, prefix[np.maximum(starts - 1, 0)], np.uint64(0))
        poly = (prefix[ends] - below) * _powers(_P, size)[ends]
        del terms, prefix
        lengths = (ends - starts + 1).astype(np.uint64)
        words = _mix(poly ^ (lengths * np.uint64(_G)))
    else:
        words = np.zeros(0, dtype=np.uint64)
    count = words.size - ngram + 1
    if count <= 0:
        empty = np.zeros(0, dtype=np.int64)
        return starts, ends, word_document, np.zeros(0, dtype=np.uint64), empty
    accumulated = words[:count].copy()
    factor = np.uint64(_R)
    for offset in range(1, ngram):
        accumulated *= factor
        accumulated += words[offset : offset + count]
    valid = word_document[:count] == word_document[ngram - 1 : ngram - 1 + count]
    first_word = np.flatnonzero(valid)
    return starts, ends, word_document, _mix(accumulated[first_word]), first_word


def hash_normalised_compiled(
    data: np.ndarray, boundary: np.ndarray, ngram: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`hash_normalised` with ``separator`` the ASCII separators and the space, in one compiled pass.

    That is the separator mask of every chunk built here: between words lie ASCII
    whitespace or punctuation (the table of :func:`_lookup`) or the space that stands
    for a special id, and bytes >= 128 occur only inside words.
    """
    if ngram < 1:
        raise ValueError(f"ngram = {ngram}: must be at least 1")
    data = np.ascontiguousarray(data, dtype=np.uint8)
    bounds = np.flatnonzero(boundary).astype(np.int64)
    result: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray] = kernels.hash_words(
        data, _byte_terms(), bounds, ngram
    )
    return result


@functools.cache
def _byte_terms() -> np.ndarray:
    """Per byte: its constant, or 0 when it separates words (ASCII whitespace and punctuation)."""
    terms = np.where(_lookup(256)[1], np.uint64(0), _constants_array()).astype(np.uint64)
    terms.flags.writeable = False
    return terms


def byte_separators(data: np.ndarray) -> np.ndarray:
    """The separator mask that :func:`hash_normalised_compiled` applies to ``data``."""
    separator: np.ndarray = _lookup(256)[1][np.asarray(data, dtype=np.uint8)]
    return separator


def _finish(data: np.ndarray, boundary: np.ndarray, lengths: np.ndarray, ngram: int) -> HashedChunk:
    starts, ends, document, hashes, first_word = hash_normalised_compiled(data, boundary, ngram)
    return HashedChunk(
        data=data,
        starts=starts,
        ends=ends,
        document=document,
        hashes=hashes,
        first_word=first_word,
        documents=int(lengths.size),
        lengths=lengths,
        ngram=ngram,
    )


_TEXT_END = 256


def hash_texts(texts: Sequence[str], ngram: int = DEFAULT_NGRAM) -> HashedChunk:
    """Words and n-grams of whole texts (each text one document); ``lengths`` counts characters.

    The texts go through the byte path of :func:`hash_stream_chunk` as UTF-8 bytes, each
    ended by a space that marks the document's end (so ASCII is normalised by table, the
    rest in Python); a space separates words and cuts runs as an end-of-document id does.
    """
    encoded = [text.encode("utf-8") for text in texts]
    stream = np.frombuffer(b" ".join(encoded) + b" " if encoded else b"", dtype=np.uint8)
    ends = np.cumsum([len(item) + 1 for item in encoded], dtype=np.int64) - 1
    lengths = np.array([len(text) for text in texts], dtype=np.int64)
    return _hash_byte_ids(stream, 256, ends, lengths, ngram)


def hash_texts_python(texts: Sequence[str], ngram: int = DEFAULT_NGRAM) -> HashedChunk:
    """:func:`hash_texts` with every text normalised by :func:`normal_words` (a reference path)."""
    data, boundary = _encode_normal([normal_text(text).encode("utf-8") for text in texts])
    lengths = np.array([len(text) for text in texts], dtype=np.int64)
    return _finish(data, boundary, lengths, ngram)


def _encode_normal(normal: list[bytes]) -> tuple[np.ndarray, np.ndarray]:
    """Normalised documents as one byte array, a space after each (a separator and a boundary)."""
    joined = b"".join(item + b" " for item in normal)
    data = np.frombuffer(joined, dtype=np.uint8)
    boundary = np.zeros(data.size, dtype=bool)
    if normal:
        boundary[np.cumsum([len(item) + 1 for item in normal]) - 1] = True
    return data, boundary


# --------------------------------------------------------------------------- token streams
@dataclass(frozen=True, slots=True, kw_only=True)
class IdBytes:
    """Per id the UTF-8 bytes it adds to a decoded text: ``flat[offsets[i]:offsets[i + 1]]``."""

    flat: np.ndarray
    offsets: np.ndarray


def _byte_level_chars() -> dict[str, int]:
    """The byte-level alphabet: the character standing for each byte (GPT-2's byte-to-unicode
    table, Radford et al. 2019, as HF ``tokenizers``' ByteLevel uses it; from memory, checked
    against ``pre_tokenizers.ByteLevel.alphabet()`` and the decoder in :func:`id_bytes_of`)."""
    kept = [*range(ord("!"), ord("~") + 1), *range(ord("¡"), ord("¬") + 1), *range(ord("®"), ord("ÿ") + 1)]
    chars = {byte: chr(byte) for byte in kept}
    extra = 0
    for byte in range(256):
        if byte not in chars:
            chars[byte] = chr(256 + extra)
            extra += 1
    return {char: byte for byte, char in chars.items()}


def id_bytes_of(tokenizer: Any, specials: frozenset[int], *, samples: int = 200) -> IdBytes | None:
    """Per-id bytes of an HF ``tokenizers`` tokenizer whose decoding is concatenation, else None.

    That holds for a Fuse decoder (the characters and words kinds: the text is the
    tokens' strings joined) and a ByteLevel decoder (the bpe kind, byte-level files: the
    text is the tokens' bytes joined, decoded as UTF-8 with U+FFFD for bad sequences).
    Anything else (another decoder, a normalizer-dependent decoder, added tokens that
    are not special) gives None, and documents are decoded one by one. The property is
    then checked, not assumed: every id alone, and ``samples`` seeded random id
    sequences, must decode exactly as the joined bytes do; any difference gives None.
    """
    import json

    config = json.loads(tokenizer.to_str())
    kind = (config.get("decoder") or {}).get("type")
    if kind not in ("ByteLevel", "Fuse"):
        return None
    if any(int(item["id"]) not in specials for item in config.get("added_tokens") or []):
        return None
    size = int(tokenizer.get_vocab_size(with_added_tokens=True))
    inverse = _byte_level_chars()
    if kind == "ByteLevel":
        from tokenizers import pre_tokenizers

        if set(pre_tokenizers.ByteLevel.alphabet()) != set(inverse):
            return None
    pieces: list[bytes] = []
    for value in range(size):
        token = tokenizer.id_to_token(value)
        if token is None:
            return None
        if value in specials:
            pieces.append(b"")
        elif kind == "ByteLevel":
            if any(char not in inverse for char in token):
                return None
            pieces.append(bytes(inverse[char] for char in token))
        else:
            pieces.append(token.encode("utf-8"))
    ordinary = [value for value in range(size) if value not in specials]
    rng = np.random.default_rng(0)
    sequences = [[value] for value in ordinary] + [
        rng.choice(ordinary, size=int(rng.integers(2, 65))).tolist()
        for _ in range(samples if ordinary else 0)
    ]
    decoded = tokenizer.decode_batch(sequences, skip_special_tokens=False)
    for sequence, text in zip(sequences, decoded, strict=True):
        if b"".join(pieces[value] for value in sequence).decode("utf-8", errors="replace") != text:
            return None
    offsets = np.cumsum([0, *map(len, pieces)], dtype=np.int64)
    return IdBytes(flat=np.frombuffer(b"".join(pieces), dtype=np.uint8).copy(), offsets=offsets)


_EXPANDED_END = 256


def _expanded(tokens: np.ndarray, tables: StreamTables) -> np.ndarray | None:
    """The ids of a chunk as bytes (:class:`IdBytes`), end-of-document ids as 256; None if not possible."""
    table = tables.id_bytes
    if table is None or tables.byte_ids:
        return None
    if tokens.size and (int(tokens.min()) < 0 or int(tokens.max()) >= table.offsets.size - 1):
        return None
    expanded: np.ndarray = kernels.expand_ids(tokens, table.offsets, table.flat, tables.end_of_document)
    return expanded


@dataclass(frozen=True, slots=True, kw_only=True)
class StreamTables:
    """How the ids of a split's token stream become normalised bytes.

    ``end_of_document`` ends a document; every id in ``specials`` (the end and
    begin of document and pad) separates words and is not text. With
    ``byte_ids`` true, ids 0..255 are UTF-8 bytes; otherwise ``decode`` turns
    the ids of one document (specials left out) into text, and ``id_bytes``, when
    given (:func:`id_bytes_of`), holds the bytes each id adds to that text, so that
    the ids are expanded to bytes and take the byte path.
    """

    end_of_document: int
    specials: frozenset[int]
    byte_ids: bool
    decode: Callable[[list[int]], str] | None = None
    id_bytes: IdBytes | None = None

    def lookup(self, size: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per id below ``size``: lowercase byte, separates words, ASCII whitespace or special."""
        return _lookup(size)


@functools.cache
def _ascii_separators_to_space() -> bytes:
    separator = _lookup(256)[1]
    return bytes(_SPACE if separator[value] and value < 128 else value for value in range(256))


@functools.lru_cache(maxsize=8)
def _lookup(size: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    lower = np.full(size, _SPACE, dtype=np.uint8)
    separator = np.ones(size, dtype=bool)
    space = np.ones(size, dtype=bool)
    for value in range(min(size, 128)):
        char = chr(value)
        lower[value] = ord(char.lower())
        separator[value] = char.isspace() or unicodedata.category(char).startswith("P")
        space[value] = char.isspace()
    for value in range(128, min(size, 256)):
        lower[value] = value
        separator[value] = False
        space[value] = False
    for table in (lower, separator, space):
        table.flags.writeable = False
    return lower, separator, space


def complete_documents(chunks: Iterable[np.ndarray], end_of_document: int) -> Iterator[np.ndarray]:
    """Re-cut stream chunks so that each ends just after an end-of-document id.

    The part after the last end-of-document id waits for the next chunk; the
    final remainder (a stream that does not end with one) is yielded last.
    Memory is one chunk plus the longest document.
    """
    carry: list[np.ndarray] = []  # pieces of the unfinished document, joined once it ends
    for chunk in chunks:
        chunk = np.asarray(chunk)
        ends = np.flatnonzero(chunk == end_of_document)
        if ends.size == 0:
            carry.append(chunk)
            continue
        cut = int(ends[-1]) + 1
        yield np.concatenate((*carry, chunk[:cut])) if carry else chunk[:cut]
        carry = [chunk[cut:]] if cut < chunk.size else []
    if carry:
        yield np.concatenate(carry)


def hash_stream_chunk(tokens: np.ndarray, tables: StreamTables, ngram: int) -> HashedChunk:
    """Words and n-grams of a run of documents of a token stream (see :func:`complete_documents`).

    Document ``k`` of the chunk is the ``k``-th run ended by the
    end-of-document id (a last run without one counts as a document too).
    """
    tokens = _contiguous_ids(tokens)
    if tokens.size and tokens[-1] != tables.end_of_document:
        tokens = np.concatenate((tokens, np.array([tables.end_of_document], dtype=tokens.dtype)))
    size = _table_size(tokens, tables)
    kind = _id_tables(size, tables.specials)[1]
    document_ends, lengths = kernels.documents(tokens, kind, tables.end_of_document)
    expanded = _expanded(tokens, tables)
    if expanded is not None:
        ends = np.flatnonzero(expanded == _EXPANDED_END)
        return _hash_byte_ids(expanded, _EXPANDED_END + 1, ends, lengths, ngram)
    if not tables.byte_ids:
        assert tables.decode is not None
        decode = tables.decode
        special_ids = np.array(sorted(tables.specials), dtype=np.int64)
        starts = np.concatenate(([0], document_ends[:-1] + 1)) if document_ends.size else document_ends
        texts = []
        for begin, end in zip(starts.tolist(), document_ends.tolist(), strict=True):
            ids = tokens[begin : end + 1]
            texts.append(decode(ids[~np.isin(ids, special_ids)].tolist()))
        data, boundary = _encode_normal([normal_text(text).encode("utf-8") for text in texts])
        return _finish(data, boundary, lengths, ngram)

    return _hash_byte_ids(tokens, size, document_ends, lengths, ngram)


def _hash_byte_ids(
    tokens: np.ndarray, size: int, document_ends: np.ndarray, lengths: np.ndarray, ngram: int
) -> HashedChunk:
    """The byte-tokenizer path of :func:`hash_stream_chunk`: ids 0..255 are UTF-8 bytes, ids up
    to ``size`` separate words; ``document_ends`` are the positions of the separators ending
    documents."""
    data = kernels.normalise_tokens(tokens, _lookup(size)[0])
    boundary = np.zeros(tokens.size, dtype=bool)
    boundary[document_ends] = True
    if not kernels.census(tokens, -1)[1]:
        return _finish(data, boundary, lengths, ngram)
    # A run of tokens between ASCII whitespace (or special ids) that holds a byte >= 128 is decoded
    # and normalised in Python. Cutting at ASCII whitespace changes nothing: it is never part of a
    # UTF-8 sequence, and it is neither cased nor case-ignorable, so str.lower (final sigma
    # included) and str.split give the same words as on the whole document.
    begins, ends = kernels.wide_runs(tokens, _lookup(size)[2])
    raw = (tokens if tokens.dtype == np.uint8 else tokens.astype(np.uint8)).tobytes()  # runs hold bytes only
    pieces = [
        normal_text(raw[begin:end].decode("utf-8", errors="replace")).encode("utf-8")
        for begin, end in zip(begins.tolist(), ends.tolist(), strict=True)
    ]
    offsets = np.cumsum([0, *map(len, pieces)], dtype=np.int64)
    replacement = np.frombuffer(b"".join(pieces), dtype=np.uint8)
    data, boundary = kernels.splice(data, boundary, begins, ends, replacement, offsets)
    return _finish(data, boundary, lengths, ngram)


# --------------------------------------------------------------------------- train scan
class NgramSet:
    """The distinct values of some n-gram hashes, behind a bit filter, in a table of marks.

    ``values`` are the distinct hashes in order of first occurrence and ``index[j]``
    the position in ``values`` of hash ``j`` (one pass through the table, no sort).

    The filter is blocked (Putze, Sanders & Singler 2007; from memory): a hash sets two
    bits, chosen by its low 12 bits, in the 64-bit word chosen by its top bits, about
    ``bits_per_value`` bits per value; so a hash that is not in the set passes with
    probability about ``(1 - exp(-2 / bits_per_value))^2`` and costs one cache line.
    Hashes that pass are looked up in an open-addressing table
    (:func:`corpusprep.ngram_kernels.build_set`, 1/3 to 2/3 full) whose rows also hold
    each value's mark: the first train document holding it.
    """

    def __init__(self, hashes: np.ndarray, *, bits_per_value: int = 16) -> None:
        hashes = np.ascontiguousarray(hashes, dtype=np.uint64)
        self._table, self.slot_bits, self.values, self.slot_of, self.index = kernels.build_set(
            hashes, _slot_bits(hashes.size // 4)
        )
        values = self.values
        width = min(34, max(12, math.ceil(math.log2(max(values.size, 1) * bits_per_value))))
        self.shift = np.uint64(64 - (width - 6))
        self.bits = np.zeros(1 << (width - 6), dtype=np.uint64)
        if values.size:
            low = values & np.uint64(63)
            high = (values >> np.uint64(6)) & np.uint64(63)
            pattern = (np.uint64(1) << low) | (np.uint64(1) << high)
            np.bitwise_or.at(self.bits, (values >> self.shift).astype(np.int64), pattern)
        self.slot_mask = (1 << self.slot_bits) - 1
        self._handed = False
        self._index_of_slot: np.ndarray | None = None

    def new_marks(self) -> np.ndarray:
        """A fresh table of marks (no document seen) for :func:`scan_chunk`; one per worker.

        Every table has the same keys in the same slots; only the marks differ.
        """
        if not self._handed:
            self._handed = True
            return self._table
        marks: np.ndarray = kernels.build_marks(self.values, self.slot_bits)[0]
        return marks

    def first_documents(self, *tables: np.ndarray) -> np.ndarray:
        """Per value: the smallest document number marked in any of ``tables``, or -1."""
        marks = np.full(self.values.size, kernels.UNSEEN, dtype=np.uint64)
        for table in tables:
            np.minimum(marks, table[self.slot_of, 1], out=marks)
        first = marks.astype(np.int64)
        first[marks >= kernels.UNSEEN] = -1
        return first

    def mark(self, table: np.ndarray, index: np.ndarray, documents: np.ndarray) -> None:
        """Lower the marks of values ``index`` to ``documents`` (each index once)."""
        rows = self.slot_of[index]
        table[rows, 1] = np.minimum(table[rows, 1], documents.astype(np.uint64))

    def find(self, hashes: np.ndarray) -> np.ndarray:
        """Index in ``values`` of each hash, or -1 (compiled: filter, then table)."""
        hashes = np.ascontiguousarray(hashes, dtype=np.uint64)
        slots = kernels.find_marked(hashes, self.bits, self.shift, self._table, self.slot_mask)
        if self._index_of_slot is None:
            self._index_of_slot = np.full(self.slot_mask + 1, -1, dtype=np.int64)
            self._index_of_slot[self.slot_of] = np.arange(self.values.size)
        found: np.ndarray = np.where(slots >= 0, self._index_of_slot[slots], -1)
        return found

    def find_reference(self, hashes: np.ndarray) -> np.ndarray:
        """:meth:`find` with a Python dict (the reference)."""
        where = {value: index for index, value in enumerate(self.values.tolist())}
        return np.array([where.get(value, -1) for value in np.asarray(hashes).tolist()], dtype=np.int64)


def _slot_bits(count: int) -> int:
    """Slots for ``count`` values: a power of two, 1/3 to 2/3 full."""
    return max(4, math.ceil(math.log2(max(count, 1) * 3 / 2)))


@functools.lru_cache(maxsize=8)
def _id_tables(size: int, specials: frozenset[int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per id below ``size``: its lowercase byte, its kind code and its byte constant (0 unless a word byte).

    The tables of :mod:`corpusprep.ngram_kernels`.
    """
    lower, separator, _ = _lookup(size)
    kind = np.where(separator, kernels.SEPARATOR, kernels.WORD_BYTE).astype(np.uint8)
    for value in specials:
        if 0 <= value < size:
            kind[value] = kernels.SPECIAL
    terms = np.where(kind == kernels.WORD_BYTE, _constants_array()[lower], np.uint64(0)).astype(np.uint64)
    for table in (kind, terms):
        table.flags.writeable = False
    return lower, kind, terms


def _contiguous_ids(tokens: np.ndarray) -> np.ndarray:
    tokens = np.asarray(tokens)
    if tokens.dtype.kind not in "ui":
        tokens = tokens.astype(np.int64)
    return np.ascontiguousarray(tokens)


def _table_size(tokens: np.ndarray, tables: StreamTables) -> int:
    top = max(255, tables.end_of_document, *tables.specials)
    if tokens.dtype.kind == "u" and tokens.dtype.itemsize <= 2:
        return max(1 << (8 * tokens.dtype.itemsize), top + 1)
    return max(int(tokens.max()) + 1 if tokens.size else 0, top + 1)


def document_count(tokens: np.ndarray, end_of_document: int) -> int:
    """Documents of a chunk as :func:`hash_stream_chunk` counts them (a last one without an end too)."""
    tokens = _contiguous_ids(tokens)
    ends = int(kernels.census(tokens, end_of_document)[0])
    return ends + int(bool(tokens.size) and int(tokens[-1]) != end_of_document)


def scan_chunk(
    tokens: np.ndarray,
    tables: StreamTables,
    ngram: int,
    members: NgramSet,
    marks: np.ndarray,
    document_base: int,
) -> np.ndarray:
    """Look every word n-gram of a run of documents up in ``members``; the documents' lengths.

    For each n-gram of ``members``, its mark in ``marks`` (:meth:`NgramSet.new_marks`)
    becomes the smallest document number that holds it (``document_base`` plus the
    chunk-local document, counted as in :func:`hash_stream_chunk`); read them with
    :meth:`NgramSet.first_documents`. Returns the token counts of the chunk's documents
    without special ids. The same result as hashing the chunk with
    :func:`hash_stream_chunk` and looking its hashes up; with the byte tokenizer it is
    one compiled pass
    (:func:`corpusprep.ngram_kernels.scan_tokens`).
    """
    if ngram < 1:
        raise ValueError(f"ngram = {ngram}: must be at least 1")
    tokens = _contiguous_ids(tokens)
    expanded = _expanded(tokens, tables)
    if expanded is not None:
        bytes_tables = StreamTables(
            end_of_document=_EXPANDED_END, specials=frozenset({_EXPANDED_END}), byte_ids=True
        )
        scan_chunk(expanded, bytes_tables, ngram, members, marks, document_base)
        kind = _id_tables(_table_size(tokens, tables), tables.specials)[1]
        return kernels.documents(tokens, kind, tables.end_of_document)[1]
    if not tables.byte_ids:
        chunk = hash_stream_chunk(tokens, tables, ngram)
        position = members.find(chunk.hashes)
        hit = np.flatnonzero(position >= 0)
        if hit.size:
            indices, first = np.unique(position[hit], return_index=True)
            members.mark(marks, indices, chunk.document[chunk.first_word[hit[first]]] + document_base)
        return chunk.lengths
    size = _table_size(tokens, tables)
    _, kind, terms = _id_tables(size, tables.specials)
    ends, wide = kernels.census(tokens, tables.end_of_document)
    documents = int(ends) + int(bool(tokens.size) and int(tokens[-1]) != tables.end_of_document)
    lengths = np.zeros(documents, dtype=np.int64)
    run_begin = run_end = np.zeros(0, dtype=np.int64)
    run_offsets = np.zeros(1, dtype=np.int64)
    run_words = np.zeros(0, dtype=np.uint64)
    if wide:
        # Runs between ASCII whitespace holding a byte >= 128 are normalised in Python, as in
        # hash_stream_chunk; the kernel takes their word hashes instead of reading them.
        run_begin, run_end = kernels.wide_runs(tokens, _lookup(size)[2])
        raw = (tokens if tokens.dtype == np.uint8 else tokens.astype(np.uint8)).tobytes()  # runs: bytes only
        words = [
            normal_words(raw[begin:end].decode("utf-8", errors="replace"))
            for begin, end in zip(run_begin.tolist(), run_end.tolist(), strict=True)
        ]
        run_offsets = np.cumsum([0, *map(len, words)], dtype=np.int64)
        joined = " ".join(word for run in words for word in run).encode("utf-8")
        run_words = kernels.word_hashes(np.frombuffer(joined, dtype=np.uint8), _constants_array())
    kernels.scan_tokens(
        tokens,
        terms,
        kind,
        tables.end_of_document,
        run_begin,
        run_end,
        run_offsets,
        run_words,
        ngram,
        members.bits,
        members.shift,
        marks,
        members.slot_mask,
        document_base,
        lengths,
    )
    return lengths


def warm_up(token_dtypes: Sequence[np.dtype[Any] | type] = (np.uint16,)) -> float:
    """Compile, or load from numba's disk cache, every kernel for these token dtypes; seconds taken.

    Runs each fast path once on a tiny input (a non-ASCII word included), so that the
    first real call pays no compilation.
    """
    started = time.perf_counter()
    chunk = hash_texts(["Ferry été dock", ""], 1)
    members = NgramSet(chunk.hashes)
    members.find(chunk.hashes)
    for dtype in token_dtypes:
        tokens = np.array([*"Été b".encode(), _TEXT_END], dtype=dtype)
        tables = StreamTables(end_of_document=_TEXT_END, specials=frozenset({_TEXT_END}), byte_ids=True)
        hash_stream_chunk(tokens, tables, 1)
        scan_chunk(tokens, tables, 1, members, members.new_marks(), 0)
        table = IdBytes(flat=np.frombuffer(b"ab", dtype=np.uint8).copy(), offsets=np.array([0, 1, 2, 2, 2]))
        expanding = StreamTables(
            end_of_document=2, specials=frozenset({2, 3}), byte_ids=False, id_bytes=table
        )
        ids = np.array([0, 1, 3, 2], dtype=dtype)
        hash_stream_chunk(ids, expanding, 1)
        scan_chunk(ids, expanding, 1, members, members.new_marks(), 0)
    return time.perf_counter() - started
