"""The reader of finished outputs (corpusprep.windows), checked against references outside it.

- window contents: ``numpy.load(path, mmap_mode="r", allow_pickle=False)`` of the shard row the
  manifest's shard list points to (NumPy's own ``.npy`` reader, found by a plain walk over the list);
- the one-token shift: ``x = w[:-1]``, ``y = w[1:]`` as the manifest's ``windows.input/target`` say;
- batches: properties (hypothesis) of the partition rule in the module docstring;
- shuffle order: a pure-Python SplitMix64 written from the reference C code (Vigna, ``splitmix64.c``,
  prng.di.unimi.it), pinned to its first published outputs from state 0, and run with
  ``numpy.random`` made unusable;
- integrity: shard bytes checked against XXH3-128 (python-xxhash) on open; manifest paths leaving
  the folder refused before any file is opened.

Outputs are built cheaply: random token ids written with ``corpusprep.shards.write_shard`` plus a
minimal ``manifest.json`` (only the keys the reader uses).
"""

from __future__ import annotations

import builtins
import json
import os
import pickle
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import xxhash
from hypothesis import given, settings
from hypothesis import strategies as st

from corpusprep.errors import IntegrityError
from corpusprep.shards import write_shard
from corpusprep.windows import SplitWindows, open_split, shuffle_order

MASK = (1 << 64) - 1
FAST = settings(max_examples=40, deadline=None)


# ---------------------------------------------------------------- building small outputs


def build_output(
    folder: Path,
    splits: dict[str, list[int]],
    *,
    length: int,
    dtype: str = "<u4",
    seed: int = 0,
    vocab: int | None = None,
) -> dict[str, np.ndarray]:
    """Write shards of random ids (``rows`` per shard) and a manifest; return each split's windows.

    With a ``<u4`` dtype column 0 of every window holds its index in the split, so a window can be
    recognised in a batch by its first input token.
    """
    rng = np.random.default_rng(seed)
    top = vocab if vocab is not None else int(np.iinfo(np.dtype(dtype)).max) + 1
    (folder / "shards").mkdir(parents=True, exist_ok=True)
    manifest_splits: dict[str, Any] = {}
    everything: dict[str, np.ndarray] = {}
    for split, shard_rows in splits.items():
        blocks, listed, start = [], [], 0
        for index, rows in enumerate(shard_rows):
            block = rng.integers(0, top, size=(rows, length + 1)).astype(dtype)
            if np.dtype(dtype).itemsize == 4:
                block[:, 0] = np.arange(start, start + rows)
            info = write_shard(folder / "shards", split=split, index=index, windows=block)
            listed.append(info.to_dict() | {"file": f"shards/{info.file}"})
            blocks.append(block)
            start += rows
        manifest_splits[split] = {"windows": start, "shards": listed}
        everything[split] = np.concatenate(blocks) if blocks else np.empty((0, length + 1), dtype)
    manifest = {
        "windows": {
            "length": length,
            "stored_length": length + 1,
            "stride": length,
            "dtype": np.dtype(dtype).str,
            "input": "window[:-1]",
            "target": "window[1:]",
        },
        "splits": manifest_splits,
    }
    (folder / "manifest.json").write_text(json.dumps(manifest, indent=2), encoding="utf-8")
    return everything


def reference_window(folder: Path, split: str, index: int) -> np.ndarray:
    """Window ``index`` of ``split`` read with NumPy from the shard list, walked in order."""
    manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    for shard in manifest["splits"][split]["shards"]:
        rows = shard["shape"][0]
        if index < rows:
            array = np.load(folder / shard["file"], mmap_mode="r", allow_pickle=False)
            return np.array(array[index])
        index -= rows
    raise IndexError(index)


@contextmanager
def built(splits: dict[str, list[int]], **options: Any) -> Iterator[tuple[Path, dict[str, np.ndarray]]]:
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name) / "out"
        yield folder, build_output(folder, splits, **options)


shard_lists = st.lists(st.integers(1, 9), min_size=1, max_size=5)


# ---------------------------------------------------------------- random access


@FAST
@given(
    rows=shard_lists,
    length=st.integers(1, 12),
    dtype=st.sampled_from(["|u1", "<u2", "<u4"]),
    seed=st.integers(0, 2**32 - 1),
)
def test_every_window_equals_the_numpy_memory_mapped_row(
    rows: list[int], length: int, dtype: str, seed: int
) -> None:
    # reference: numpy.load(mmap_mode="r") of the shard row found by walking the manifest's shard list
    with built({"train": rows, "test": [2]}, length=length, dtype=dtype, seed=seed) as (folder, _):
        windows = open_split(folder, "train")
        manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
        assert len(windows) == manifest["splits"]["train"]["windows"] == sum(rows)
        assert windows.length == length and windows.dtype == np.dtype(dtype)
        for index in range(len(windows)):
            expected = reference_window(folder, "train", index)
            window = windows.window(index)
            assert window.dtype == np.dtype(dtype) and window.shape == (length + 1,)
            assert np.array_equal(window, expected)
            x, y = windows[index]
            # the manifest's rule: input = window[:-1], target = window[1:]
            assert np.array_equal(x, expected[:-1]) and np.array_equal(y, expected[1:])
            assert np.array_equal(x[1:], y[:-1])
        with pytest.raises(IndexError):
            windows.window(len(windows))
        with pytest.raises(IndexError):
            windows.window(-1)


@FAST
@given(rows=shard_lists, picks=st.lists(st.integers(0, 10**6), max_size=30), seed=st.integers(0, 1000))
def test_take_returns_the_rows_asked_for_in_that_order(rows: list[int], picks: list[int], seed: int) -> None:
    # reference: numpy.load(mmap_mode="r") rows, one at a time; indices unsorted, repeated, across shards
    with built({"train": rows}, length=5, dtype="<u2", seed=seed) as (folder, _):
        windows = open_split(folder, "train")
        indices = np.array([pick % len(windows) for pick in picks], dtype=np.int64)
        taken = windows.take(indices)
        assert taken.shape == (len(indices), 6) and taken.dtype == np.dtype("<u2")
        for row, index in zip(taken, indices.tolist(), strict=True):
            assert np.array_equal(row, reference_window(folder, "train", index))
        with pytest.raises(IndexError):
            windows.take(np.array([len(windows)]))


def test_splits_are_read_from_their_own_shards(tmp_path: Path) -> None:
    # reference: the arrays written, per split
    written = build_output(tmp_path, {"train": [4, 3], "validation": [2], "test": [5]}, length=3)
    for split, array in written.items():
        windows = open_split(tmp_path, split)
        assert len(windows) == len(array)
        assert np.array_equal(windows.take(np.arange(len(windows))), array)
    with pytest.raises(KeyError, match="no split 'dev'; the manifest has train, validation, test"):
        open_split(tmp_path, "dev")


def test_a_pickled_reader_reopens_its_shards(tmp_path: Path) -> None:
    # reference: the arrays written; a reader sent to another process (pickle) reads the same windows
    written = build_output(tmp_path, {"train": [3, 4]}, length=4)
    windows = open_split(tmp_path, "train")
    windows.window(0)  # map a shard before pickling
    copy = pickle.loads(pickle.dumps(windows))
    assert isinstance(copy, SplitWindows) and len(copy) == 7
    assert np.array_equal(copy.take(np.arange(7)), written["train"])


# ---------------------------------------------------------------- shuffle order


def splitmix64(state: int) -> int:
    """One SplitMix64 output from ``state``, written from Vigna's splitmix64.c (pure Python)."""
    z = (state + 0x9E3779B97F4A7C15) & MASK
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & MASK
    return z ^ (z >> 31)


def reference_order(count: int, seed: int, epoch: int) -> list[int]:
    """The rule of the corpusprep.windows docstring, with Python integers only."""
    base = splitmix64((seed * 0x100000001B3 + epoch) & MASK)
    keys = [splitmix64((index + base) & MASK) for index in range(count)]
    return sorted(range(count), key=lambda index: (keys[index], index))


def test_the_splitmix64_reference_gives_the_published_outputs() -> None:
    # reference: splitmix64.c seeded with x = 0; next() returns these three values first
    state, outputs = 0, []
    for _ in range(3):
        outputs.append(splitmix64(state))
        state = (state + 0x9E3779B97F4A7C15) & MASK
    assert outputs == [0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4, 0x06C45D188009454F]


@settings(max_examples=200, deadline=None)
@given(count=st.integers(0, 300), seed=st.integers(-(2**70), 2**70), epoch=st.integers(0, 2**40))
def test_shuffle_order_equals_the_pure_python_splitmix64_rule(count: int, seed: int, epoch: int) -> None:
    # reference: reference_order above (pure Python SplitMix64, no NumPy)
    assert shuffle_order(count, seed, epoch).tolist() == reference_order(count, seed, epoch)


def test_shuffle_order_does_not_touch_numpy_random(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # reference: reference_order; the order must not come from (or depend on the state of) numpy.random
    build_output(tmp_path, {"train": [50, 30]}, length=2)  # built first: build_output uses default_rng
    np.random.seed(12345)
    before = shuffle_order(1000, 7, 3).tolist()

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("numpy.random was used")

    for name in (
        "default_rng",
        "permutation",
        "shuffle",
        "random",
        "randint",
        "seed",
        "Generator",
        "RandomState",
    ):
        monkeypatch.setattr(np.random, name, refuse)
    assert shuffle_order(1000, 7, 3).tolist() == before == reference_order(1000, 7, 3)
    windows = open_split(tmp_path, "train")
    firsts = [int(index) for x, _y in windows.batches(16, seed=7, epoch=3) for index in x[:, 0]]
    assert firsts == reference_order(80, 7, 3)


# ---------------------------------------------------------------- batches


def run_epoch(windows: SplitWindows, **options: Any) -> list[list[int]]:
    """Window indices (column 0) of every batch this rank yields, checking each batch's contents."""
    every = windows.take(np.arange(len(windows)))
    batches = []
    for x, y in windows.batches(**options):
        assert x.shape == y.shape and x.shape[1] == windows.length and len(x) > 0
        indices = x[:, 0].astype(np.int64)
        # reference: whole windows from the written arrays, shifted by one token
        assert np.array_equal(x, every[indices, :-1]) and np.array_equal(y, every[indices, 1:])
        batches.append(indices.tolist())
    return batches


epoch_settings = st.fixed_dictionaries(
    {
        "count": st.integers(1, 120),
        "batch_size": st.integers(1, 13),
        "world_size": st.integers(1, 5),
        "seed": st.integers(0, 2**64 - 1),
        "epoch": st.integers(0, 10**6),
        "drop_last": st.booleans(),
    }
)


@FAST
@given(case=epoch_settings, split_at=st.integers(1, 119))
def test_ranks_together_take_every_window_once_per_epoch(case: dict[str, Any], split_at: int) -> None:
    # reference: reference_order (pure Python) and the partition rule of the module docstring
    count, batch_size, world_size = case["count"], case["batch_size"], case["world_size"]
    rows = [count] if split_at >= count else [split_at, count - split_at]
    with built({"train": rows}, length=3, seed=case["seed"] % 1000) as (folder, _):
        windows = open_split(folder, "train")
        options = {k: case[k] for k in ("batch_size", "seed", "epoch", "world_size", "drop_last")}
        per_rank = [run_epoch(windows, rank=rank, **options) for rank in range(world_size)]
    per_step = batch_size * world_size
    steps = count // per_step if case["drop_last"] else -(-count // per_step)
    assert windows.steps_per_epoch(batch_size, world_size=world_size, drop_last=case["drop_last"]) == steps
    order = reference_order(count, case["seed"], case["epoch"])
    for rank, batches in enumerate(per_rank):
        expected = [order[s * per_step + rank * batch_size :][:batch_size] for s in range(steps)]
        assert batches == [batch for batch in expected if batch]  # an empty last block is skipped
    flat = [index for batches in per_rank for batch in batches for index in batch]
    sets = [{index for batch in batches for index in batch} for batches in per_rank]
    assert len(flat) == len(set(flat))  # no window twice in an epoch
    assert all(not (a & b) for i, a in enumerate(sets) for b in sets[i + 1 :])  # ranks disjoint
    if case["drop_last"]:
        # every rank runs the same number of full steps; only the incomplete tail is left out
        assert all(len(batches) == steps for batches in per_rank)
        assert all(len(batch) == batch_size for batches in per_rank for batch in batches)
        assert sorted(flat) == sorted(order[: steps * per_step])
    else:
        assert sorted(flat) == list(range(count))
        # without drop_last a rank whose block of the last step is empty runs one step fewer
        assert {len(batches) for batches in per_rank} <= {steps, steps - 1}


@FAST
@given(case=epoch_settings, start=st.integers(0, 40))
def test_resuming_at_a_step_gives_the_rest_of_the_epoch(case: dict[str, Any], start: int) -> None:
    # reference: the same epoch run from step 0 with the first `start` steps skipped
    with built({"train": [case["count"]]}, length=2) as (folder, _):
        windows = open_split(folder, "train")
        options = {k: case[k] for k in ("batch_size", "seed", "epoch", "world_size", "drop_last")}
        for rank in range(case["world_size"]):
            whole = run_epoch(windows, rank=rank, **options)
            assert run_epoch(windows, rank=rank, start_step=start, **options) == whole[start:]


@FAST
@given(
    count=st.integers(20, 200),
    seed=st.integers(0, 2**64 - 1),
    epochs=st.lists(st.integers(0, 99), min_size=2, max_size=2, unique=True),
)
def test_epochs_differ_and_each_is_reproducible(count: int, seed: int, epochs: list[int]) -> None:
    # reference: reference_order; two epochs agreeing would need 1 / 20! luck
    with built({"train": [count]}, length=1) as (folder, _):
        windows = open_split(folder, "train")
        first, second = (run_epoch(windows, batch_size=8, seed=seed, epoch=epoch) for epoch in epochs)
        again = run_epoch(open_split(folder, "train"), batch_size=8, seed=seed, epoch=epochs[0])
    assert first == again
    assert first != second
    assert [i for batch in first for i in batch] == reference_order(count, seed, epochs[0])


def test_without_shuffle_batches_follow_storage_order(tmp_path: Path) -> None:
    # reference: the arrays written, in order
    build_output(tmp_path, {"train": [5, 6]}, length=2)
    windows = open_split(tmp_path, "train")
    assert run_epoch(windows, batch_size=4, shuffle=False) == [[0, 1, 2, 3], [4, 5, 6, 7], [8, 9, 10]]
    assert run_epoch(windows, batch_size=4, shuffle=False, drop_last=True) == [[0, 1, 2, 3], [4, 5, 6, 7]]
    assert run_epoch(windows, batch_size=2, world_size=2, rank=1, shuffle=False) == [[2, 3], [6, 7], [10]]


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"batch_size": 0}, "batch_size = 0"),
        ({"batch_size": 2, "rank": 2, "world_size": 2}, "rank = 2, world_size = 2"),
        ({"batch_size": 2, "world_size": 0}, "world_size = 0"),
        ({"batch_size": 2, "start_step": -1}, "start_step = -1"),
    ],
)
def test_bad_batch_settings_are_refused(tmp_path: Path, options: dict[str, int], message: str) -> None:
    build_output(tmp_path, {"train": [3]}, length=2)
    with pytest.raises(ValueError, match=message):
        next(open_split(tmp_path, "train").batches(**options))


# ---------------------------------------------------------------- integrity


def _rewrite_manifest(folder: Path, change: Any) -> None:
    manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    change(manifest)
    (folder / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")


def test_a_flipped_byte_is_found_on_open_and_verify_false_skips_the_hash(tmp_path: Path) -> None:
    # reference: python-xxhash XXH3-128 of the damaged file differs from the manifest's
    written = build_output(tmp_path, {"train": [4, 4]}, length=6, dtype="<u2")
    shard = tmp_path / "shards" / "train-00001.npy"
    data = bytearray(shard.read_bytes())
    data[-1] ^= 0x01
    shard.write_bytes(bytes(data))
    listed = json.loads((tmp_path / "manifest.json").read_text())["splits"]["train"]["shards"][1]
    assert xxhash.xxh3_128_hexdigest(bytes(data)) != listed["xxh3_128"]
    with pytest.raises(IntegrityError, match=r"train-00001\.npy: xxh3_128 is"):
        open_split(tmp_path, "train")
    windows = open_split(tmp_path, "train", verify=False)
    last = windows.window(7)
    assert np.array_equal(last, np.load(shard, mmap_mode="r")[3])
    assert not np.array_equal(last, written["train"][7])  # the damage is what is read


def test_a_shortened_shard_or_edited_shape_is_refused_even_without_hashing(tmp_path: Path) -> None:
    build_output(tmp_path, {"train": [4, 4]}, length=6, dtype="<u2")
    shard = tmp_path / "shards" / "train-00000.npy"
    intact = shard.read_bytes()
    shard.write_bytes(intact[:-2])
    with pytest.raises(IntegrityError, match="truncated"):
        open_split(tmp_path, "train", verify=False)
    shard.write_bytes(intact)

    def more_rows(manifest: dict[str, Any]) -> None:
        manifest["splits"]["train"]["shards"][0]["shape"][0] = 5
        manifest["splits"]["train"]["windows"] = 9

    _rewrite_manifest(tmp_path, more_rows)
    with pytest.raises(IntegrityError, match=r"shape is \(4, 7\), the manifest says \(5, 7\)"):
        open_split(tmp_path, "train", verify=False)


def test_manifest_counts_and_dtype_must_agree_with_the_shards(tmp_path: Path) -> None:
    build_output(tmp_path, {"train": [4, 4]}, length=6, dtype="<u2")
    _rewrite_manifest(tmp_path, lambda manifest: manifest["splits"]["train"].update(windows=9))
    with pytest.raises(IntegrityError, match="9 windows in the manifest but its shards hold 8"):
        open_split(tmp_path, "train", verify=False)
    _rewrite_manifest(tmp_path, lambda manifest: manifest["splits"]["train"].update(windows=8))
    _rewrite_manifest(tmp_path, lambda manifest: manifest["windows"].update(dtype="<u4"))
    with pytest.raises(IntegrityError, match="windows are 7 tokens of <u4"):
        open_split(tmp_path, "train", verify=False)
    os.remove(tmp_path / "shards" / "train-00001.npy")
    _rewrite_manifest(tmp_path, lambda manifest: manifest["windows"].update(dtype="<u2"))
    with pytest.raises(IntegrityError, match="missing"):
        open_split(tmp_path, "train", verify=False)


@pytest.mark.parametrize("kind", ["parent", "absolute", "inner-parent", "backslash", "link"])
@pytest.mark.parametrize("verify", [True, False])
def test_a_shard_path_outside_the_output_is_refused_and_never_opened(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, kind: str, verify: bool
) -> None:
    # the outside file is a valid shard with the manifest's hash, so only the path check can refuse it
    folder = tmp_path / "out"
    build_output(folder, {"train": [3]}, length=4)
    outside = tmp_path / "outside.npy"
    outside.write_bytes((folder / "shards" / "train-00000.npy").read_bytes())
    files = {
        "parent": "../outside.npy",
        "absolute": str(outside),
        "inner-parent": "shards/../../outside.npy",
        "backslash": "shards\\..\\..\\outside.npy",
        "link": "shards/link.npy",
    }
    (folder / "shards" / "link.npy").symlink_to(outside)
    _rewrite_manifest(
        folder, lambda manifest: manifest["splits"]["train"]["shards"][0].update(file=files[kind])
    )
    opened: list[str] = []
    real_open, real_load = builtins.open, np.load

    def spy_open(file: Any, *args: Any, **kwargs: Any) -> Any:
        opened.append(os.path.realpath(file) if isinstance(file, str | Path) else repr(file))
        return real_open(file, *args, **kwargs)

    def spy_load(file: Any, *args: Any, **kwargs: Any) -> Any:
        opened.append(os.path.realpath(file))
        return real_load(file, *args, **kwargs)

    monkeypatch.setattr(builtins, "open", spy_open)
    monkeypatch.setattr(np, "load", spy_load)
    with pytest.raises(IntegrityError, match=r"leaves the output folder|leads outside the output folder"):
        open_split(folder, "train", verify=verify)
    monkeypatch.undo()
    assert opened, "the spy saw nothing (the manifest itself is opened)"
    assert str(outside.resolve()) not in opened
