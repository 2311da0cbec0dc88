"""The project's hash functions, pinned in one place.

* content hashes (documents, files, shards): XXH3-128, seed 0, written as
  32-character lowercase hex of the big-endian digest (python-xxhash's
  ``hexdigest``);
* keyed 64-bit hashes (split assignment, shingles): XXH3-64 with an explicit
  seed, as an unsigned integer.

xxHash is not cryptographic: these hashes detect accidents and tampering by
tools, not by an adversary who can forge collisions.
"""

from __future__ import annotations

from pathlib import Path

import xxhash

__all__ = ["hash_bytes", "hash_file", "hash_text", "keyed_hash64", "new_hasher"]

_CHUNK = 1 << 20


def hash_bytes(data: bytes | bytearray | memoryview) -> str:
    """XXH3-128 of ``data`` as 32 lowercase hex characters.

    >>> hash_bytes(b"abc")
    '06b05ab6733a618578af5f94892f3950'
    """
    return xxhash.xxh3_128_hexdigest(data)


def hash_text(text: str) -> str:
    """XXH3-128 of the UTF-8 encoding of ``text`` (surrogates are not allowed)."""
    return xxhash.xxh3_128_hexdigest(text.encode("utf-8"))


def new_hasher() -> xxhash.xxh3_128:
    """A streaming XXH3-128 hasher (same value as :func:`hash_bytes` on the whole input)."""
    return xxhash.xxh3_128()


def hash_file(path: Path) -> tuple[int, str]:
    """Size in bytes and XXH3-128 of a file, read in 1 MiB chunks."""
    hasher = xxhash.xxh3_128()
    size = 0
    with open(path, "rb") as handle:
        while chunk := handle.read(_CHUNK):
            hasher.update(chunk)
            size += len(chunk)
    return size, hasher.hexdigest()


def keyed_hash64(text: str, seed: int) -> int:
    """XXH3-64 of the UTF-8 encoding of ``text`` with ``seed``, as an unsigned int.

    >>> keyed_hash64("", 0) == 0x2D06800538D394C2
    True
    """
    return xxhash.xxh3_64_intdigest(text.encode("utf-8"), seed=seed)
