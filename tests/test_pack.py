"""Packing: the one-token shift, the token accounting, shard bounds, determinism, dtypes.

The window rule (window k = stream[k*L : k*L + L + 1], x = w[:-1], y = w[1:]) is the
design's definition (DESIGN.md, pack; REFERENCES 11 "Shifted windows", common practice
for next-token training). The expected windows here are cut from a stream built with
plain Python lists, not with corpusprep code.
"""

from __future__ import annotations

import tempfile
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import xxhash
from hypothesis import given, settings
from hypothesis import strategies as st

from corpusprep.errors import DefinitionError, IntegrityError
from corpusprep.pack import PackConfig, PackResult, document_order, pack_split, smallest_dtype
from corpusprep.shards import read_shard

EOD, PAD, BOD = 256, 257, 258
DTYPE = np.dtype("<u2")


def reference_stream(documents: list[list[int]], bod: bool) -> list[int]:
    stream: list[int] = []
    for ids in documents:
        stream += ([BOD] if bod else []) + ids + [EOD]
    return stream


def pack(
    documents: list[list[int]], folder: Path, *, bod: bool = False, split: str = "train", **settings_: object
) -> tuple[PackResult, np.ndarray]:
    config = PackConfig(**settings_)
    arrays = (np.array(ids, dtype=np.uint8) for ids in documents)
    result = pack_split(
        split,
        arrays,
        config=config,
        eod_id=EOD,
        pad_id=PAD,
        bod_id=BOD if bod else None,
        dtype=DTYPE,
        folder=folder,
    )
    loaded = [np.asarray(read_shard(folder / shard.file, expected=shard)) for shard in result.shards]
    windows = np.concatenate(loaded) if loaded else np.zeros((0, config.length + 1), dtype=DTYPE)
    return result, windows


DOCUMENTS = st.lists(st.lists(st.integers(min_value=0, max_value=255), max_size=30), max_size=12)


@settings(max_examples=250, deadline=None)
@given(
    documents=DOCUMENTS,
    length=st.integers(min_value=1, max_value=9),
    per_shard=st.integers(min_value=1, max_value=4),
    tail=st.sampled_from(["drop", "pad"]),
    bod=st.booleans(),
)
def test_shift_and_accounting(
    documents: list[list[int]], length: int, per_shard: int, tail: str, bod: bool
) -> None:
    stream = reference_stream(documents, bod)
    with tempfile.TemporaryDirectory() as folder:
        result, windows = pack(
            documents, Path(folder), bod=bod, length=length, windows_per_shard=per_shard, tail=tail
        )
    count = len(windows)
    assert result.windows == count
    assert result.documents == len(documents)
    assert result.tokens == len(stream)
    assert windows.shape[1:] == (length + 1,)

    # Full windows are exactly the definition's slices of the stream.
    full = max(0, (len(stream) - 1) // length)
    for k in range(full):
        assert windows[k].tolist() == stream[k * length : k * length + length + 1]
    # The one-token shift inside a window, and the one-token overlap between windows.
    inputs, targets = windows[:, :-1], windows[:, 1:]
    np.testing.assert_array_equal(targets[:, :-1], inputs[:, 1:])
    np.testing.assert_array_equal(windows[:-1, -1], windows[1:, 0])
    # Windows minus overlaps give back the stream prefix (drop) or the stream plus pads (pad).
    joined = windows[0].tolist() + windows[1:, 1:].ravel().tolist() if count else []
    # Every stored token after the first is a target exactly once.
    assert result.targets == count * length == targets.size == (len(joined) - 1 if count else 0)

    if tail == "drop":
        assert count == full
        assert joined == stream[: len(joined)]
        assert result.pad_tokens == 0
        assert result.dropped_tokens == len(stream) - len(joined)
        assert result.dropped_tokens <= length
    else:
        assert count == full + (1 if len(stream) > (full * length + 1 if full else 0) else 0)
        assert joined == stream + [PAD] * result.pad_tokens
        assert result.dropped_tokens == 0
        assert result.pad_tokens <= length
    # The accounting identity of corpusprep.pack, derived from the window rule above.
    assert result.tokens + result.pad_tokens == count * length + min(count, 1) + result.dropped_tokens


@settings(max_examples=60, deadline=None)
@given(documents=DOCUMENTS, length=st.integers(1, 6), per_shard=st.integers(1, 5))
def test_shard_bound_and_names(documents: list[list[int]], length: int, per_shard: int) -> None:
    with tempfile.TemporaryDirectory() as folder:
        result, _ = pack(
            documents, Path(folder), length=length, windows_per_shard=per_shard, split="validation"
        )
        files = sorted(path.name for path in Path(folder).iterdir())
    assert files == [f"validation-{index:05d}.npy" for index in range(len(result.shards))]
    assert [shard.file for shard in result.shards] == files
    rows = [shard.shape[0] for shard in result.shards]
    assert all(0 < count <= per_shard for count in rows)
    assert all(count == per_shard for count in rows[:-1])
    assert all(shard.split == "validation" and shard.dtype == "<u2" for shard in result.shards)


def test_shard_size_does_not_change_the_windows(tmp_path: Path) -> None:
    rng = np.random.default_rng(7)
    documents = [rng.integers(0, 256, size=int(size)).tolist() for size in rng.integers(0, 200, size=40)]
    seen = []
    for per_shard in (1, 3, 10, 1000):
        folder = tmp_path / str(per_shard)
        folder.mkdir()
        result, windows = pack(documents, folder, length=16, windows_per_shard=per_shard, tail="pad")
        seen.append((windows.tobytes(), result.tokens, result.windows, result.pad_tokens))
    assert len(set(seen)) == 1


def test_rerun_gives_identical_bytes(tmp_path: Path) -> None:
    rng = np.random.default_rng(11)
    documents = [rng.integers(0, 256, size=int(size)).tolist() for size in rng.integers(0, 90, size=30)]
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    first, _ = pack(documents, tmp_path / "a", length=8, windows_per_shard=5, bod=True)
    second, _ = pack(documents, tmp_path / "b", length=8, windows_per_shard=5, bod=True)
    assert first == second
    assert len(first.shards) > 2
    for shard in first.shards:
        assert (tmp_path / "a" / shard.file).read_bytes() == (tmp_path / "b" / shard.file).read_bytes()


def test_empty_split_writes_nothing(tmp_path: Path) -> None:
    result, _ = pack([], tmp_path, length=4, tail="pad")
    assert (result.shards, result.windows, result.tokens, result.documents) == ((), 0, 0, 0)
    assert list(tmp_path.iterdir()) == []


def test_short_split(tmp_path: Path) -> None:
    # Stream [1, 2, EOD] is shorter than one window of length 4 + 1.
    dropped, _ = pack([[1, 2]], tmp_path, length=4, tail="drop")
    assert (dropped.windows, dropped.dropped_tokens, dropped.shards) == (0, 3, ())
    padded, windows = pack([[1, 2]], tmp_path, length=4, tail="pad")
    assert windows.tolist() == [[1, 2, EOD, PAD, PAD]]
    assert (padded.windows, padded.pad_tokens, padded.dropped_tokens) == (1, 2, 0)


def test_exact_fit_needs_no_pad(tmp_path: Path) -> None:
    # The stream [1, 2, 3, EOD, 4, 5, 6, 7, EOD] has 9 = 2 * 4 + 1 tokens: two windows, nothing left over.
    result, windows = pack([[1, 2, 3], [4, 5, 6, 7]], tmp_path, length=4, tail="pad", windows_per_shard=2)
    assert windows.tolist() == [[1, 2, 3, EOD, 4], [4, 5, 6, 7, EOD]]
    assert (result.pad_tokens, result.dropped_tokens, len(result.shards)) == (0, 0, 1)


def test_streams_with_memory_of_one_shard(tmp_path: Path) -> None:
    """Shards appear on disk while documents are still being consumed: the split is never held whole."""
    produced = 0

    def documents() -> Iterator[np.ndarray]:
        nonlocal produced
        for index in range(400):
            if index == 300:
                # 300 documents of 99 ids + EOD = 30000 tokens, windows of 10, 100 per shard.
                assert len(list(tmp_path.iterdir())) >= 29
            produced += 1
            yield np.full(99, index % 256, dtype=np.uint8)

    result = pack_split(
        "train",
        documents(),
        config=PackConfig(length=10, windows_per_shard=100),
        eod_id=EOD,
        pad_id=PAD,
        bod_id=None,
        dtype=DTYPE,
        folder=tmp_path,
    )
    assert produced == 400
    assert result.windows == (400 * 100 - 1) // 10


def test_long_document_spans_many_shards(tmp_path: Path) -> None:
    ids = list(range(256)) * 20
    result, windows = pack([ids], tmp_path, length=7, windows_per_shard=3)
    stream = [*ids, EOD]
    assert windows[0].tolist() == stream[:8]
    assert result.windows == (len(stream) - 1) // 7
    assert len(result.shards) == -(-result.windows // 3)


def test_inputs_are_not_modified(tmp_path: Path) -> None:
    documents = [np.arange(50, dtype=np.uint16), np.arange(7, dtype=np.int64)]
    copies = [document.copy() for document in documents]
    for document in documents:
        document.flags.writeable = False
    pack_split(
        "train",
        documents,
        config=PackConfig(length=5, tail="pad"),
        eod_id=EOD,
        pad_id=PAD,
        bod_id=BOD,
        dtype=DTYPE,
        folder=tmp_path,
    )
    for document, copy in zip(documents, copies, strict=True):
        np.testing.assert_array_equal(document, copy)


def test_ids_that_do_not_fit_are_refused(tmp_path: Path) -> None:
    config = PackConfig(length=4)
    with pytest.raises(IntegrityError, match="70000"):
        pack_split(
            "train",
            [np.array([1, 70000], dtype=np.int64)],
            config=config,
            eod_id=EOD,
            pad_id=PAD,
            bod_id=None,
            dtype=DTYPE,
            folder=tmp_path,
        )
    with pytest.raises(IntegrityError, match="eod_id 256"):
        pack_split(
            "train",
            [],
            config=config,
            eod_id=256,
            pad_id=1,
            bod_id=None,
            dtype=np.dtype("u1"),
            folder=tmp_path,
        )


@pytest.mark.parametrize(
    ("vocab_size", "expected"),
    [
        # The largest id is vocab_size - 1; the limits are np.iinfo(uint8/16/32).max,
        # that is 2**8 - 1, 2**16 - 1 and 2**32 - 1.
        (1, "|u1"),
        (255, "|u1"),
        (256, "|u1"),
        (257, "<u2"),
        (65535, "<u2"),
        (65536, "<u2"),
        (65537, "<u4"),
        (2**32, "<u4"),
    ],
)
def test_smallest_dtype(vocab_size: int, expected: str) -> None:
    dtype = smallest_dtype(vocab_size)
    assert dtype.str == expected
    assert np.iinfo(dtype).max >= vocab_size - 1
    assert dtype == dtype.newbyteorder("<")  # little-endian whatever the machine


@pytest.mark.parametrize("vocab_size", [0, 2**32 + 1])
def test_smallest_dtype_refuses(vocab_size: int) -> None:
    with pytest.raises(DefinitionError):
        smallest_dtype(vocab_size)


def test_document_order_is_the_documented_key_sort() -> None:
    # Reference: the documented rule, computed with python-xxhash directly (XXH3-64 of f"{split}:{index}").
    for split, seed, count in [("train", 0, 50), ("test", 12345, 17), ("validation", 2**64 - 1, 5)]:
        keys = [xxhash.xxh3_64_intdigest(f"{split}:{index}".encode(), seed=seed) for index in range(count)]
        expected = sorted(range(count), key=lambda index: (keys[index], index))
        assert document_order(count, seed, split).tolist() == expected
    assert document_order(0, 0, "train").tolist() == []
    assert document_order(50, 0, "train").tolist() != document_order(50, 1, "train").tolist()
    assert document_order(50, 0, "train").tolist() != document_order(50, 0, "test").tolist()


@pytest.mark.parametrize(
    ("settings_", "key"),
    [
        ({"length": 0}, "pack.length"),
        ({"windows_per_shard": 0}, "pack.windows_per_shard"),
        ({"tail": "keep"}, "pack.tail"),
        ({"seed": -1}, "pack.seed"),
    ],
)
def test_bad_settings_name_the_key(settings_: dict[str, object], key: str) -> None:
    with pytest.raises(DefinitionError, match=f"^{key} = "):
        PackConfig(**settings_)
