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
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
import xxhash
from hypothesis import given, settings
from hypothesis import strategies as st

from corpusprep.audit_integrity import ShardFile
from corpusprep.audit_leakage import ngram_overlap
from corpusprep.ngrams import (
    NgramSet,
    StreamTables,
    byte_separators,
    complete_documents,
    hash_normalised,
    hash_normalised_compiled,
    hash_stream_chunk,
    hash_texts,
    hash_texts_python,
    id_bytes_of,
    ngram_hashes_scalar,
    normal_words,
    scan_chunk,
    warm_up,
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


# --------------------------------------------------------------------------- compiled fast paths
# Each compiled kernel (corpusprep.ngram_kernels) is held to the NumPy path and to the plain-Python
# reference (normal_words / ngram_hashes_scalar) on the same generated texts.
def _numpy_scan(
    tokens: np.ndarray, tables: StreamTables, n: int, members: NgramSet, first: np.ndarray, base: int
) -> np.ndarray:
    """What scan_chunk must do, written with hash_stream_chunk and np.searchsorted."""
    chunk = hash_stream_chunk(tokens, tables, n)
    position = members.find_reference(chunk.hashes)
    for index in np.flatnonzero(position >= 0).tolist():
        document = int(chunk.document[chunk.first_word[index]]) + base
        slot = int(position[index])
        if first[slot] < 0 or document < first[slot]:
            first[slot] = document
    return chunk.lengths


@settings(max_examples=150, deadline=None)
@given(texts=st.lists(TEXT, max_size=6), n=st.integers(1, 5))
def test_compiled_hashing_equals_numpy_and_scalar(texts: list[str], n: int) -> None:
    expected = [value for text in texts for value in ngram_hashes_scalar(text, n)]
    python = hash_texts_python(texts, n)
    assert python.hashes.tolist() == expected
    separator = python.data == ord(" ")
    assert np.array_equal(byte_separators(python.data), separator)
    boundary = np.zeros(python.data.size, dtype=bool)
    compiled = hash_normalised_compiled(python.data, boundary, n)
    reference = hash_normalised(python.data, separator, boundary, n)
    for left, right in zip(compiled, reference, strict=True):
        assert left.dtype == right.dtype and left.tolist() == right.tolist()
    fast = hash_texts(texts, n)
    assert fast.hashes.tolist() == expected
    assert fast.lengths.tolist() == [len(text) for text in texts]
    # the example text of each n-gram is its normalised words (brute force, independent rule)
    by_text = [
        tuple(words[i : i + n]) for words in map(brute_words, texts) for i in range(len(words) - n + 1)
    ]
    assert [tuple(fast.ngram_text(i).split(" ")) for i in range(fast.hashes.size)] == by_text


@settings(max_examples=100, deadline=None)
@given(
    data=st.binary(max_size=60).map(lambda raw: raw.replace(b"\x00", b" ")),
    cuts=st.lists(st.integers(0, 60), max_size=4),
    n=st.integers(1, 4),
)
def test_compiled_word_spans_equal_numpy(data: bytes, cuts: list[int], n: int) -> None:
    """Any bytes and document ends (not only those of real text): same spans and hashes."""
    values = np.frombuffer(data, dtype=np.uint8)
    separator = byte_separators(values)
    # ASCII whitespace and punctuation separate (Python's str.isspace and unicodedata), nothing else
    expected = [
        chr(b).isspace() or unicodedata.category(chr(b)).startswith("P") if b < 128 else False for b in data
    ]
    assert separator.tolist() == expected
    boundary = np.zeros(values.size, dtype=bool)
    for cut in cuts:
        if cut < values.size and separator[cut]:
            boundary[cut] = True
    compiled = hash_normalised_compiled(values, boundary, n)
    reference = hash_normalised(values, separator, boundary, n)
    assert [part.tolist() for part in compiled] == [part.tolist() for part in reference]


@settings(max_examples=120, deadline=None)
@given(
    train=st.lists(TEXT, max_size=6),
    evaluation=st.lists(TEXT, max_size=4),
    n=st.integers(1, 4),
    cut=st.integers(1, 400),
    base=st.integers(0, 5),
    tail=st.booleans(),
)
def test_scan_chunk_equals_hash_and_lookup(
    train: list[str], evaluation: list[str], n: int, cut: int, base: int, tail: bool
) -> None:
    # evaluation n-grams plus some of train's, so that hits and misses both occur
    shared = hash_texts(evaluation + train[:1], n).hashes
    members = NgramSet(shared)
    stream = stream_of(train)
    if tail and stream.size:
        stream = stream[:-1]  # a last document without its end id
    for tables in (TABLES, StreamTables(end_of_document=EOD, specials=frozenset({EOD}), byte_ids=True)):
        marks = members.new_marks()
        slow = np.full(members.values.size, -1, dtype=np.int64)
        fast_lengths = []
        slow_lengths = []
        offset = base
        for chunk in complete_documents([stream[i : i + cut] for i in range(0, stream.size, cut)], EOD):
            fast_lengths.append(scan_chunk(chunk, tables, n, members, marks, offset))
            slow_lengths.append(_numpy_scan(chunk, tables, n, members, slow, offset))
            offset += slow_lengths[-1].size
        fast = members.first_documents(marks)
        assert fast.tolist() == slow.tolist()
        assert [x.tolist() for x in fast_lengths] == [x.tolist() for x in slow_lengths]
    # brute force: an evaluation n-gram is found iff some train text holds it
    train_grams = set().union(*(brute_ngrams(text, n) for text in train)) if train else set()
    for text in evaluation:
        for gram, value in zip(
            [tuple(w[i : i + n]) for w in [brute_words(text)] for i in range(len(w) - n + 1)],
            hash_texts([text], n).hashes.tolist(),
            strict=True,
        ):
            slot = members.values.tolist().index(value)
            assert (fast[slot] >= 0) == (gram in train_grams)


@settings(max_examples=60, deadline=None)
@given(
    values=st.lists(st.integers(0, (1 << 64) - 1), max_size=300),
    repeats=st.lists(st.integers(0, 299), max_size=100),
    probes=st.lists(st.integers(0, (1 << 64) - 1), max_size=300),
    bits=st.integers(1, 16),
)
def test_hash_set_distinct_values_and_find(
    values: list[int], repeats: list[int], probes: list[int], bits: int
) -> None:
    hashes = values + [values[i % len(values)] for i in repeats] if values else []
    members = NgramSet(np.array(hashes, dtype=np.uint64), bits_per_value=bits)
    # reference: Python's dict keeps first-insertion order (language reference, dict)
    first_seen = list(dict.fromkeys(hashes))
    assert members.values.tolist() == first_seen
    assert members.index.tolist() == [first_seen.index(value) for value in hashes]
    needles = np.array(probes + hashes, dtype=np.uint64)
    expected = [first_seen.index(v) if v in set(hashes) else -1 for v in needles.tolist()]
    assert members.find(needles).tolist() == expected
    assert members.find_reference(needles).tolist() == expected
    # every table of marks starts unmarked and has the same slots
    assert members.first_documents(members.new_marks(), members.new_marks()).tolist() == [-1] * len(
        first_seen
    )


def test_warm_up_compiles_every_kernel() -> None:
    assert warm_up((np.uint16, np.uint32)) >= 0.0
    tables = StreamTables(end_of_document=EOD, specials=frozenset({EOD, PAD}), byte_ids=True)
    wide = np.array([*"Ünïcode DOCK".encode(), EOD], dtype=np.uint32)
    assert hash_stream_chunk(wide, tables, 1).hashes.tolist() == ngram_hashes_scalar("Ünïcode DOCK", 1)


# --------------------------------------------------------------------------- ids expanded to bytes
# Invented ferry-archive text (the project's demo scenario) with accents, CJK and punctuation.
FERRY = [
    "The Ferry to Dock B leaves at 06:40; the harbour-master's log says: DELAYED (fog).",
    "Été timetable — Straße des Hafens, pier 3… fares 2,50 € (港 terminal).",
    "Cooperative minutes: members voted to repaint the MV Larch; the vote was 14-3.",
]


@pytest.fixture(scope="module", params=["characters", "words", "bpe"])
def trained(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> tuple[Any, Any]:
    """Our tokenizer of one trained kind and the HF tokenizer loaded from its saved file."""
    from tokenizers import Tokenizer as HfTokenizer

    from corpusprep.tokens import TokenizerConfig, build_tokenizer

    size = 400 if request.param == "bpe" else 120
    ours = build_tokenizer(
        TokenizerConfig(kind=request.param, min_count=1, vocab_size=size), lambda: iter(FERRY * 3)
    )
    path = tmp_path_factory.mktemp("tokenizer") / "tokenizer.json"
    ours.save(path)
    return ours, HfTokenizer.from_file(str(path))


@settings(max_examples=40, deadline=None)
@given(texts=st.lists(st.one_of(TEXT, st.sampled_from(FERRY)), min_size=1, max_size=5), n=st.integers(1, 4))
def test_ids_expanded_to_bytes_equal_decoding(trained: tuple[Any, Any], texts: list[str], n: int) -> None:
    """For the trained kinds (Fuse and ByteLevel decoders) joining per-id bytes is decoding."""
    ours, hf = trained
    specials = frozenset(ours.special_ids().values())
    end = ours.special_ids()["end_of_document"]
    id_bytes = id_bytes_of(hf, specials)
    assert id_bytes is not None
    ids: list[int] = []
    for encoded in ours.encode_batch(texts):
        ids += [*encoded.tolist(), end]
    stream = np.array(ids, dtype=np.uint32)
    decoding = StreamTables(
        end_of_document=end,
        specials=specials,
        byte_ids=False,
        decode=lambda values: str(hf.decode(values, skip_special_tokens=False)),
    )
    expanding = StreamTables(
        end_of_document=end, specials=specials, byte_ids=False, decode=decoding.decode, id_bytes=id_bytes
    )
    slow, fast = hash_stream_chunk(stream, decoding, n), hash_stream_chunk(stream, expanding, n)
    assert fast.hashes.tolist() == slow.hashes.tolist()
    assert fast.lengths.tolist() == slow.lengths.tolist()
    assert [fast.ngram_text(i) for i in range(fast.hashes.size)] == [
        slow.ngram_text(i) for i in range(slow.hashes.size)
    ]
    members = NgramSet(hash_texts(texts[:1], n).hashes)
    marks_slow, marks_fast = members.new_marks(), members.new_marks()
    assert scan_chunk(stream, decoding, n, members, marks_slow, 3).tolist() == slow.lengths.tolist()
    assert scan_chunk(stream, expanding, n, members, marks_fast, 3).tolist() == slow.lengths.tolist()
    assert members.first_documents(marks_fast).tolist() == members.first_documents(marks_slow).tolist()


def test_a_decoder_that_is_not_concatenation_is_decoded_per_document() -> None:
    # HF WordPiece decoder joins with spaces and glues "##" pieces: not plain concatenation
    from tokenizers import Tokenizer as HfTokenizer
    from tokenizers import decoders, models

    hf = HfTokenizer(models.WordLevel({"<eod>": 0, "dock": 1, "##s": 2, "b": 3}, unk_token="<eod>"))
    hf.decoder = decoders.WordPiece()
    assert id_bytes_of(hf, frozenset({0})) is None
    hf.decoder = decoders.Fuse()
    table = id_bytes_of(hf, frozenset({0}))
    assert table is not None and table.flat.tobytes() == b"dock##sb"
