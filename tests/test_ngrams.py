"""Word n-gram hashing and the n-gram overlap engine, against plain-Python references.

References used here:
- the normalisation rule of Brown et al. 2020, App. C (lowercase, punctuation ignored, split on
  whitespace), quoted from memory per REFERENCES §3.2 (not checked against the paper);
- brute force: sets of word tuples built with Python's str.lower, unicodedata and str.split;
- python-xxhash for the byte constants (XXH3-64, REFERENCES §6).
"""

from __future__ import annotations

import unicodedata
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
import xxhash
from hypothesis import given, settings
from hypothesis import strategies as st

from corpusprep.audit_integrity import ShardFile
from corpusprep.audit_leakage import ngram_overlap
from corpusprep.ngrams import (
    StreamTables,
    complete_documents,
    hash_stream_chunk,
    hash_texts,
    ngram_hashes_scalar,
    normal_words,
    word_hash_scalar,
)
from corpusprep.pack import PackConfig, pack_split

EOD, PAD = 256, 257
TABLES = StreamTables(end_of_document=EOD, specials=frozenset({EOD, PAD}), byte_ids=True)


def brute_words(text: str) -> list[str]:
    """Brown et al. 2020 App. C rule (from memory), written independently of the module."""
    out = []
    for char in text.lower():
        out.append(" " if unicodedata.category(char).startswith("P") else char)
    return "".join(out).split()


def brute_ngrams(text: str, n: int) -> set[tuple[str, ...]]:
    words = brute_words(text)
    return {tuple(words[i : i + n]) for i in range(len(words) - n + 1)}


def stream_of(texts: list[str]) -> np.ndarray:
    ids: list[int] = []
    for text in texts:
        ids += [*text.encode("utf-8"), EOD]
    return np.array(ids, dtype=np.uint16)


# Words from a small alphabet so that overlaps are common; some upper case, punctuation, accents,
# CJK, and Unicode spaces/punctuation that only the Python path sees.
WORD = st.sampled_from(["ferry", "Ferry", "DOCK", "b", "Straße", "été", "港", "x1", "—", "’s", "…", "a,b"])
SPACE = st.sampled_from([" ", "  ", "\n", "\t", "\u00a0", "\u2028", ", ", ". ", "\x1f"])
TEXT = st.lists(st.tuples(WORD, SPACE), max_size=40).map(lambda parts: "".join(w + s for w, s in parts))


def test_normalisation_follows_the_rule() -> None:
    # Brown et al. 2020 App. C (from memory): lowercase, punctuation ignored, split on whitespace.
    words = ["the", "ferry", "s", "dock", "closed", "see", "b"]
    assert normal_words("The FERRY'S dock—closed!  See: B.") == words
    # symbols (S*) are not punctuation and stay (unicodedata categories)
    assert normal_words("fare $5 + tax") == ["fare", "$5", "+", "tax"]


def test_byte_constants_are_xxh3_64() -> None:
    # python-xxhash (REFERENCES §6): XXH3-64 of b"ngram-byte:<value>", forced odd.
    from corpusprep.ngrams import _byte_constants

    assert _byte_constants()[0] == xxhash.xxh3_64_intdigest(b"ngram-byte:0") | 1
    assert _byte_constants()[255] == xxhash.xxh3_64_intdigest(b"ngram-byte:255") | 1


@settings(max_examples=150, deadline=None)
@given(texts=st.lists(TEXT, max_size=6), n=st.integers(1, 5))
def test_vectorised_hashes_equal_the_scalar_reference(texts: list[str], n: int) -> None:
    expected = [value for text in texts for value in ngram_hashes_scalar(text, n)]
    assert hash_texts(texts, n).hashes.tolist() == expected
    assert hash_stream_chunk(stream_of(texts), TABLES, n).hashes.tolist() == expected
    decoding = StreamTables(
        end_of_document=EOD,
        specials=frozenset({EOD, PAD}),
        byte_ids=False,
        decode=lambda ids: bytes(ids).decode("utf-8", "replace"),
    )
    assert hash_stream_chunk(stream_of(texts), decoding, n).hashes.tolist() == expected


@settings(max_examples=100, deadline=None)
@given(texts=st.lists(TEXT, max_size=6), cut=st.integers(1, 50))
def test_recut_chunks_keep_whole_documents(texts: list[str], cut: int) -> None:
    stream = stream_of(texts)
    pieces = [stream[i : i + cut] for i in range(0, stream.size, cut)]
    chunks = list(complete_documents(pieces, EOD))
    assert np.array_equal(np.concatenate(chunks) if chunks else stream[:0], stream)
    assert all(chunk[-1] == EOD for chunk in chunks)
    counts = [hash_stream_chunk(chunk, TABLES, 2).documents for chunk in chunks]
    assert sum(counts) == len(texts)


def test_ngram_text_and_owner() -> None:
    chunk = hash_texts(["One two, THREE", "four five six"], 2)
    assert [chunk.ngram_text(i) for i in range(chunk.hashes.size)] == [
        "one two",
        "two three",
        "four five",
        "five six",
    ]
    assert chunk.document[chunk.first_word].tolist() == [0, 0, 1, 1]


def test_word_hash_depends_on_every_byte() -> None:
    assert word_hash_scalar(b"ferry") != word_hash_scalar(b"ferrz")
    assert word_hash_scalar(b"ab") != word_hash_scalar(b"ba")


def _write_split(folder: Path, split: str, texts: list[str], length: int) -> list[ShardFile]:
    result = pack_split(
        split,
        (np.frombuffer(text.encode("utf-8"), dtype=np.uint8) for text in texts),
        config=PackConfig(length=length, windows_per_shard=3, tail="pad", seed=0),
        eod_id=EOD,
        pad_id=PAD,
        bod_id=None,
        dtype=np.dtype("<u2"),
        folder=folder,
    )
    return [ShardFile(path=folder / shard.file, rows=shard.shape[0]) for shard in result.shards]


@settings(max_examples=40, deadline=None)
@given(
    train=st.lists(TEXT.filter(str.strip), min_size=1, max_size=6),
    validation=st.lists(TEXT.filter(str.strip), min_size=1, max_size=5),
    n=st.integers(1, 4),
    length=st.integers(2, 17),
)
def test_overlap_equals_brute_force(
    tmp_path_factory: pytest.TempPathFactory, train: list[str], validation: list[str], n: int, length: int
) -> None:
    """Brute force: a validation document is flagged iff its word n-gram set meets train's."""
    folder = tmp_path_factory.mktemp("shards")
    shards = {
        "train": _write_split(folder, "train", train, length),
        "validation": _write_split(folder, "validation", validation, length),
    }
    names = [f"t{i}" for i in range(len(train))] + [f"v{i}" for i in range(len(validation))]
    ledger = pa.table(
        {
            "record_id": names,
            "tokens": [len(text.encode("utf-8")) for text in train + validation],
        }
    )
    packed = {
        "train": np.arange(len(train)),
        "validation": np.arange(len(train), len(train) + len(validation)),
    }
    result = ngram_overlap(
        shards=shards,
        packed=packed,
        ledger=ledger,
        tables=TABLES,
        ngram=n,
        pad_id=PAD,
        tail="pad",
        chunk_rows=1,  # one window per step: every document boundary case of the stream rebuild
    )
    assert [f for f in result.findings if f.kind == "stream_mismatch"] == []
    train_grams = set().union(*(brute_ngrams(text, n) for text in train))
    expected = {f"v{i}" for i, text in enumerate(validation) if brute_ngrams(text, n) & train_grams}
    flagged = {f.details["record_id"] for f in result.findings if f.kind == "shared_ngram"}
    assert flagged == expected
    figures = result.statistics["sides"]["validation"]
    assert figures["documents"] == len(validation)
    assert figures["fraction"] == pytest.approx(len(expected) / len(validation))
    for finding in result.findings:
        if finding.kind == "shared_ngram":
            words = tuple(finding.details["ngram_text"].split(" "))
            assert words in train_grams  # the example shown is a real shared n-gram
            assert words in brute_ngrams(validation[int(finding.details["record_id"][1:])], n)
