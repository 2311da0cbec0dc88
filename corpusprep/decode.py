"""From bytes on disk to text: gzip streams, byte order marks, and the encoding decision.

The encoding is decided once per file, never per line, so that a file has one
encoding and :class:`corpusprep.read.InputFile` can record it. The decision is
made by a first streaming pass over the (decompressed) bytes, before any
record of the file is emitted; a second pass then decodes and parses. Memory
stays bounded by the chunk size in the first pass, whatever the file size.

Policy (first match wins):

1. A byte order mark declares the encoding. UTF-32 marks are checked before
   UTF-16 ones, because the UTF-32 LE mark ``FF FE 00 00`` begins with the
   UTF-16 LE mark ``FF FE`` (the order Python's ``utf-32`` codec also uses).
   A file whose declared encoding fails to decode is *undecodable*; the
   fallback is not tried, since the mark is a statement about the file.
2. Without a UTF-16/32 mark, a NUL byte anywhere makes the file *binary_file*
   (text in UTF-8 or a legacy single-byte encoding never needs NUL).
3. Strict UTF-8 (the UTF-8 mark, if present, is stripped: codec ``utf-8-sig``).
4. The fallback encoding, strictly, when step 3 fails and a fallback is set.
5. Otherwise the file is *undecodable*; the detail names the first bad byte's
   line and offset.

A decompressed stream longer than the byte limit stops the first pass at the
limit (*too_large*), so a gzip bomb costs at most one chunk of memory.
"""

from __future__ import annotations

import codecs
import contextlib
import gzip
import io
import os
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from typing import IO, Protocol

import xxhash

__all__ = [
    "BYTE_ORDER_MARKS",
    "StreamTooLarge",
    "Verdict",
    "check_fallback_encoding",
    "detect_bom",
    "examine_file",
    "open_binary",
    "open_text",
]

CHUNK_BYTES = 1 << 20

# (mark, codec that decodes the file and strips the mark), in the order they are checked.
# Source: Unicode Standard §23.8 / RFC 3629 §6 for the UTF-8 mark; checking UTF-32 LE before
# UTF-16 LE is common practice (Python's codecs module does it in its ``utf-32`` decoder).
BYTE_ORDER_MARKS: tuple[tuple[bytes, str], ...] = (
    (codecs.BOM_UTF32_LE, "utf-32"),
    (codecs.BOM_UTF32_BE, "utf-32"),
    (codecs.BOM_UTF8, "utf-8-sig"),
    (codecs.BOM_UTF16_LE, "utf-16"),
    (codecs.BOM_UTF16_BE, "utf-16"),
)

_WIDE_CODECS = ("utf-16", "utf-32")


class StreamTooLarge(Exception):
    """Raised by a limited stream when more bytes than allowed were read."""

    def __init__(self, limit: int) -> None:
        super().__init__(f"more than {limit} bytes")
        self.limit = limit


def detect_bom(prefix: bytes) -> str:
    """The codec a byte order mark at the start of ``prefix`` declares, or "" for none.

    >>> detect_bom(b"\\xff\\xfe\\x00\\x00a\\x00\\x00\\x00")
    'utf-32'
    >>> detect_bom(b"\\xff\\xfea\\x00")
    'utf-16'
    >>> detect_bom(b"\\xef\\xbb\\xbfabc")
    'utf-8-sig'
    >>> detect_bom(b"abc")
    ''
    """
    for mark, codec in BYTE_ORDER_MARKS:
        if prefix.startswith(mark):
            return codec
    return ""


def check_fallback_encoding(name: str) -> str:
    """The canonical codec name of a fallback encoding, or raise ``ValueError`` saying why not.

    The fallback must be a text encoding that Python knows and that encodes
    ASCII as itself (line and field separators are ASCII in every format read).

    >>> check_fallback_encoding("windows-1252")
    'cp1252'
    >>> check_fallback_encoding("rot13")
    Traceback (most recent call last):
    ...
    ValueError: 'rot13' is not a text encoding
    """
    try:
        codec = codecs.lookup(name)
        b"a".decode(codec.name)
    except LookupError:
        known = "not a text encoding" if _is_codec(name) else "not an encoding Python knows"
        raise ValueError(f"{name!r} is {known}") from None
    ascii_sample = "\t\n\r ,\"'{}[]:az09"
    try:
        same = ascii_sample.encode(codec.name) == ascii_sample.encode("ascii")
    except UnicodeError:
        same = False
    if not same:
        raise ValueError(f"{name!r} does not encode ASCII as ASCII; pick an ASCII-compatible encoding")
    return codec.name


def _is_codec(name: str) -> bool:
    try:
        codecs.lookup(name)
    except LookupError:
        return False
    return True


@dataclass(frozen=True, slots=True)
class Verdict:
    """What the first pass learned about one file."""

    size: int
    """bytes on disk"""
    xxh3_128: str
    """XXH3-128 of the bytes on disk; "" when the file could not be read"""
    encoding: str
    """codec that decodes the file ("" when rejected or not a text format)"""
    rejection: str
    """"" when the file is usable, else a ledger reason with detail"""


class _Readable(Protocol):
    def read(self, size: int = -1, /) -> bytes: ...


class _Tap(io.RawIOBase):
    """A readable wrapper that hashes what passes through and may enforce a byte limit."""

    def __init__(self, inner: _Readable, *, hasher: xxhash.xxh3_128 | None, limit: int | None) -> None:
        super().__init__()
        self._inner = inner
        self._hasher = hasher
        self._limit = limit
        self.count = 0

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: memoryview) -> int:  # type: ignore[override]
        wanted = len(buffer)
        if self._limit is not None:
            wanted = min(wanted, self._limit + 1 - self.count)
        data = self._inner.read(max(wanted, 1))
        if self._hasher is not None:
            self._hasher.update(data)
        self.count += len(data)
        if self._limit is not None and self.count > self._limit:
            raise StreamTooLarge(self._limit)
        buffer[: len(data)] = data
        return len(data)


@contextlib.contextmanager
def open_binary(path: str, *, gzipped: bool, limit: int) -> Iterator[IO[bytes]]:
    """The file's content as a binary stream (decompressed if ``gzipped``).

    Reading more than ``limit`` bytes of content raises :class:`StreamTooLarge`.
    """
    with open(path, "rb") as raw:
        if gzipped:
            with gzip.GzipFile(fileobj=raw, mode="rb") as unpacked:
                tap = _Tap(unpacked, hasher=None, limit=limit)
                with io.BufferedReader(tap, CHUNK_BYTES) as stream:
                    yield stream
        else:
            tap = _Tap(raw, hasher=None, limit=limit)
            with io.BufferedReader(tap, CHUNK_BYTES) as stream:
                yield stream


@contextlib.contextmanager
def open_text(path: str, *, gzipped: bool, limit: int, encoding: str, newline: str) -> Iterator[IO[str]]:
    """The file's content decoded strictly with ``encoding`` (``newline`` as for :func:`open`)."""
    with (
        open_binary(path, gzipped=gzipped, limit=limit) as stream,
        io.TextIOWrapper(stream, encoding=encoding, errors="strict", newline=newline) as text,
    ):
        yield text


@dataclass(frozen=True, slots=True)
class _Probe:
    codec: str  # codec that decoded every byte ("" if none did)
    rejection: str  # "" or a reason with detail
    utf8_error: str  # where strict UTF-8 failed, when it did


def _probe(stream: IO[bytes], limit: int) -> _Probe:
    """Read the whole content once: limit, NUL bytes and strict decoding by mark or UTF-8."""
    first = stream.read(CHUNK_BYTES)
    codec = detect_bom(first) or "utf-8"
    wide = codec in _WIDE_CODECS
    decoder: codecs.IncrementalDecoder | None = codecs.getincrementaldecoder(codec)(errors="strict")
    consumed = 0
    newlines = 0
    error = ""
    chunk = first
    while True:
        if not wide and b"\x00" in chunk:
            offset = consumed + chunk.index(b"\x00")
            return _Probe("", f"binary_file: NUL byte at byte offset {offset}", "")
        if decoder is not None:
            pending = len(decoder.getstate()[0])
            try:
                decoder.decode(chunk, final=not chunk)
            except UnicodeDecodeError as failure:
                offset = consumed - pending + failure.start
                line = newlines + chunk[: max(failure.start - pending, 0)].count(b"\n") + 1
                where = f"byte 0x{failure.object[failure.start]:02X} at line {line}, byte offset {offset}"
                if wide:
                    reason = f"undecodable: not valid {codec} ({failure.reason} at offset {offset})"
                    return _Probe("", reason, "")
                error = where
                decoder = None
        if not chunk:
            break
        consumed += len(chunk)
        newlines += chunk.count(b"\n")
        chunk = stream.read(CHUNK_BYTES)
    if error:
        return _Probe("", "", error)
    return _Probe(codec, "", "")


def _decodes_with(path: str, *, gzipped: bool, limit: int, codec: str) -> str:
    """ "" if the whole content decodes strictly with ``codec``, else where it fails."""
    decoder = codecs.getincrementaldecoder(codec)(errors="strict")
    consumed = 0
    with open_binary(path, gzipped=gzipped, limit=limit) as stream:
        while True:
            chunk = stream.read(CHUNK_BYTES)
            pending = len(decoder.getstate()[0])
            try:
                decoder.decode(chunk, final=not chunk)
            except UnicodeDecodeError as failure:
                offset = consumed - pending + failure.start
                return f"byte 0x{failure.object[failure.start]:02X} at byte offset {offset}"
            if not chunk:
                return ""
            consumed += len(chunk)


def _drain(stream: IO[bytes]) -> None:
    while stream.read(CHUNK_BYTES):
        pass


def examine_file(path: str, *, gzipped: bool, limit: int, fallback: str, text: bool) -> Verdict:
    """Size and hash of the bytes on disk and, for text formats, the encoding that decodes them.

    ``limit`` bounds the content size (decompressed when ``gzipped``); ``fallback``
    is a canonical codec name or "" for none. With ``text=False`` only the
    size, hash and limit are checked (the content is binary, e.g. Parquet).
    """
    hasher = xxhash.xxh3_128()
    size = 0
    try:
        size = os.stat(path).st_size
        with open(path, "rb") as raw:
            tap = _Tap(raw, hasher=hasher, limit=None)
            with io.BufferedReader(tap, CHUNK_BYTES) as hashed:
                probe = _first_pass(hashed, gzipped=gzipped, limit=limit, size=size, text=text)
                _drain(hashed)
    except OSError as error:
        return Verdict(size=size, xxh3_128="", encoding="", rejection=f"unreadable: {_os_message(error)}")
    digest = hasher.hexdigest()
    if probe.rejection or not text:
        return Verdict(size=size, xxh3_128=digest, encoding="", rejection=probe.rejection)
    if probe.codec:
        return Verdict(size=size, xxh3_128=digest, encoding=probe.codec, rejection="")
    if not fallback:
        reason = f"undecodable: not UTF-8 ({probe.utf8_error}); no fallback encoding is set"
        return Verdict(size=size, xxh3_128=digest, encoding="", rejection=reason)
    try:
        failure = _decodes_with(path, gzipped=gzipped, limit=limit, codec=fallback)
    except (OSError, EOFError, zlib.error, StreamTooLarge) as error:
        return Verdict(size=size, xxh3_128=digest, encoding="", rejection=f"unreadable: {error}")
    if failure:
        reason = f"undecodable: not UTF-8 ({probe.utf8_error}) nor {fallback} ({failure})"
        return Verdict(size=size, xxh3_128=digest, encoding="", rejection=reason)
    return Verdict(size=size, xxh3_128=digest, encoding=fallback, rejection="")


def _first_pass(hashed: IO[bytes], *, gzipped: bool, limit: int, size: int, text: bool) -> _Probe:
    if not gzipped and size > limit:
        return _Probe("", f"too_large: {size} bytes, the limit is {limit}", "")
    try:
        if gzipped:
            with gzip.GzipFile(fileobj=hashed, mode="rb") as unpacked:
                tap = _Tap(unpacked, hasher=None, limit=limit)
                with io.BufferedReader(tap, CHUNK_BYTES) as stream:
                    if text:
                        return _probe(stream, limit)
                    _drain(stream)
                    return _Probe("", "", "")
        if text:
            return _probe(hashed, limit)
        return _Probe("", "", "")
    except StreamTooLarge:
        return _Probe("", f"too_large: decompressed content exceeds the limit of {limit} bytes", "")
    except (EOFError, zlib.error, gzip.BadGzipFile) as error:
        return _Probe("", f"unreadable: not a complete gzip stream ({error})", "")


def _os_message(error: OSError) -> str:
    return error.strerror or str(error)
