"""corpusprep.hashing against xxHash's published test vectors.

Sources (REFERENCES section 6): the xxHash self-test ``cli/xsum_sanity_check.c``
(Cyan4973/xxHash, XSUM_sanityCheck) for the sanity buffer and its vectors, and
the python-xxhash README for the big-endian ``digest``/``hexdigest`` convention.
If the project silently switched hash function, seed or byte order, these fail.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from corpusprep.hashing import hash_bytes, hash_file, hash_text, keyed_hash64, new_hasher

PRIME32 = 2654435761  # xxHash's PRIME32_1 (xsum_sanity_check.c)
PRIME64 = 11400714785074694797  # xxHash's PRIME64_1 (xsum_sanity_check.c)


def sanity_buffer(length: int = 2367) -> bytes:
    """The self-test buffer: byteGen = PRIME32; buf[i] = byteGen >> 56; byteGen *= PRIME64 mod 2**64."""
    generator = PRIME32
    data = bytearray()
    for _ in range(length):
        data.append(generator >> 56)
        generator = (generator * PRIME64) % (1 << 64)
    return bytes(data)


# XXH3-128, seed 0, written high 64 bits first, the big-endian hex of python-xxhash (REFERENCES 6).
# xsum_sanity_check.c stores each vector as a (low64, high64) pair (from memory).
XXH3_128_VECTORS = [
    (0, "99aa06d3014798d86001c324468d497f"),
    (1, "a6cd5e9392000f6ac44bdff4074eecdb"),
    (2367, "e89c0f6ff369b427cb37aeb9e5d361ed"),
]


@pytest.mark.parametrize(("length", "expected"), XXH3_128_VECTORS)
def test_xxh3_128_sanity_vectors(length: int, expected: str) -> None:
    data = sanity_buffer()[:length]
    assert hash_bytes(data) == expected
    assert len(hash_bytes(data)) == 32 and hash_bytes(data) == hash_bytes(data).lower()


def test_sanity_buffer_is_the_published_one() -> None:
    # XXH3-64 of buf[:1] is 0xC44BDFF4074EECDB (xsum_sanity_check.c), which is also the low half of the
    # XXH3-128 vector of buf[:1]; checking the first bytes guards the generator itself.
    import xxhash

    assert xxhash.xxh3_64_intdigest(sanity_buffer()[:1]) == 0xC44BDFF4074EECDB
    assert xxhash.xxh3_64_intdigest(sanity_buffer()[:195]) == 0xCD94217EE362EC3A
    assert xxhash.xxh3_64_intdigest(sanity_buffer()[:2367], seed=PRIME64) == 0xD2DB3415B942B42A


def test_hex_is_big_endian_digest() -> None:
    # python-xxhash README: digest() is big-endian since 0.3.0, so the hex of the empty XXH3-128
    # starts with the high 64 bits 0x99AA06D3014798D8.
    hasher = new_hasher()
    assert hasher.digest() == bytes.fromhex("99aa06d3014798d86001c324468d497f")
    assert hasher.digest()[:8] == (0x99AA06D3014798D8).to_bytes(8, "big")


def test_streaming_equals_one_shot() -> None:
    # python-xxhash README: streaming in pieces gives the one-shot value; 7-byte chunks as in REFERENCES 6.
    data = sanity_buffer()
    hasher = new_hasher()
    for start in range(0, len(data), 7):
        hasher.update(data[start : start + 7])
    assert hasher.hexdigest() == "e89c0f6ff369b427cb37aeb9e5d361ed"


def test_hash_file_reads_whole_file(tmp_path: Path) -> None:
    path = tmp_path / "buffer.bin"
    path.write_bytes(sanity_buffer())
    assert hash_file(path) == (2367, "e89c0f6ff369b427cb37aeb9e5d361ed")
    empty = tmp_path / "empty.bin"
    empty.write_bytes(b"")
    assert hash_file(empty) == (0, "99aa06d3014798d86001c324468d497f")


def test_hash_text_is_utf8_and_abc_vector() -> None:
    # XXH3-128(b"abc") = 0x06b05ab6733a618578af5f94892f3950 (REFERENCES 6, verified with python-xxhash).
    assert hash_text("abc") == "06b05ab6733a618578af5f94892f3950"
    assert hash_text("") == "99aa06d3014798d86001c324468d497f"
    assert hash_text("é") == hash_bytes(b"\xc3\xa9")  # RFC 3629: U+00E9 is C3 A9


@pytest.mark.parametrize(
    ("text", "seed", "expected"),
    [
        ("", 0, 0x2D06800538D394C2),  # xsum_sanity_check.c: XXH3_64 empty, seed 0
        ("", PRIME64, 0xA8A6B918B2F0364A),  # xsum_sanity_check.c: XXH3_64 empty, seed PRIME64
        ("a", 0, 0xE6C632B61E964E1F),  # REFERENCES 6, verified with python-xxhash
        ("abc", 0, 0x78AF5F94892F3950),  # REFERENCES 6; also the low half of XXH3-128("abc")
    ],
)
def test_keyed_hash64_vectors(text: str, seed: int, expected: int) -> None:
    assert keyed_hash64(text, seed) == expected
