"""The PyTorch and HF ``datasets`` adapters, checked with the libraries themselves.

- PyTorch (``torch.utils.data.DataLoader`` with worker processes, fork and spawn): the multiset of
  ``(x, y)`` pairs it yields equals direct access to the reader, whose windows are in turn checked
  against ``numpy.load(mmap_mode="r")`` of the shards;
- HF ``datasets``: ``Dataset.from_generator`` output read back row by row and as Arrow; its features
  are fixed-length sequences, which HF stores as Arrow ``fixed_size_list<item: int32>[L]``
  (REFERENCES §9; checked with pyarrow's type predicates).

HF runs offline (tests/conftest.py sets HF_HUB_OFFLINE=1 before any HF import).
"""

from __future__ import annotations

import sys
from collections import Counter
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from corpusprep.windows import SplitWindows, open_split

sys.path.insert(0, str(Path(__file__).parent))
from test_windows import build_output

TORCH_MISSING = "PyTorch is not installed; install the CPU build with `pip install torch==2.13.0`"


@pytest.fixture
def output(tmp_path: Path) -> Path:
    folder = tmp_path / "out"
    build_output(folder, {"train": [7, 5, 9], "validation": [4]}, length=6, dtype="<u2", seed=3)
    return folder


def _pairs_from_numpy(folder: Path, split: str) -> Counter[tuple[tuple[int, ...], tuple[int, ...]]]:
    """(x, y) of every window, from numpy.load(mmap_mode="r") of the manifest's shards."""
    import json

    manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    pairs: Counter[tuple[tuple[int, ...], tuple[int, ...]]] = Counter()
    for shard in manifest["splits"][split]["shards"]:
        for window in np.load(folder / shard["file"], mmap_mode="r", allow_pickle=False).tolist():
            pairs[(tuple(window[:-1]), tuple(window[1:]))] += 1
    return pairs


def _pairs_direct(windows: SplitWindows) -> Counter[tuple[tuple[int, ...], tuple[int, ...]]]:
    return Counter(
        (tuple(x.tolist()), tuple(y.tolist())) for x, y in (windows[i] for i in range(len(windows)))
    )


# ---------------------------------------------------------------- PyTorch


@pytest.mark.parametrize("context", ["fork", pytest.param("spawn", marks=pytest.mark.slow)])
def test_a_torch_dataloader_with_two_workers_yields_every_window(output: Path, context: str) -> None:
    torch = pytest.importorskip("torch", reason=TORCH_MISSING)
    from torch.utils.data import DataLoader

    windows = open_split(output, "train")
    windows.window(0)  # a mapped shard in the parent must not stop the dataset from pickling
    direct = _pairs_direct(windows)
    assert direct == _pairs_from_numpy(output, "train")  # reference: NumPy memory map
    dataset = windows.as_torch_dataset()
    assert len(dataset) == len(windows) == 21
    loader = DataLoader(
        dataset,
        batch_size=4,
        shuffle=True,
        generator=torch.Generator().manual_seed(0),
        num_workers=2,
        multiprocessing_context=context,
    )
    seen: Counter[tuple[tuple[int, ...], tuple[int, ...]]] = Counter()
    for x, y in loader:
        assert x.dtype == torch.int64 and y.dtype == torch.int64
        assert x.shape[1] == y.shape[1] == 6
        assert torch.equal(x[:, 1:], y[:, :-1])  # the one-token shift survives collation
        seen.update((tuple(a), tuple(b)) for a, b in zip(x.tolist(), y.tolist(), strict=True))
    assert seen == direct


def test_torch_items_are_writable_copies(output: Path) -> None:
    torch = pytest.importorskip("torch", reason=TORCH_MISSING)
    windows = open_split(output, "validation")
    x, y = windows.as_torch_dataset()[2]
    stored = windows.window(2).copy()
    assert torch.equal(x, torch.from_numpy(stored[:-1].astype(np.int64)))
    assert torch.equal(y, torch.from_numpy(stored[1:].astype(np.int64)))
    x += 1  # a tensor that shared memory with the read-only map would fail or change the shard
    assert np.array_equal(windows.window(2), stored)


def test_the_torch_adapter_names_the_install_command(output: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "torch", None)  # makes `import torch` raise ImportError
    with pytest.raises(ImportError, match=r"pip install torch==2\.13\.0"):
        open_split(output, "train").as_torch_dataset()


# ---------------------------------------------------------------- HF datasets


def test_hf_dataset_rows_equal_the_windows(output: Path, tmp_path: Path) -> None:
    import datasets

    windows = open_split(output, "train")
    dataset = windows.as_hf_dataset(rows_per_chunk=4, cache_dir=str(tmp_path / "hf"))
    assert isinstance(dataset, datasets.Dataset)
    assert dataset.num_rows == len(windows) == 21
    for index, row in enumerate(dataset):
        x, y = windows[index]
        assert row["input_ids"] == x.tolist() and row["labels"] == y.tolist()
    # reference: NumPy memory map of the shards (as a multiset, order checked above)
    pairs = Counter(
        (tuple(a), tuple(b)) for a, b in zip(dataset["input_ids"], dataset["labels"], strict=True)
    )
    assert pairs == _pairs_from_numpy(output, "train")


def test_hf_features_are_fixed_length_int32_sequences(output: Path, tmp_path: Path) -> None:
    import datasets

    dataset = open_split(output, "validation").as_hf_dataset(cache_dir=str(tmp_path / "hf"))
    expected = datasets.Features(
        {
            "input_ids": datasets.Sequence(datasets.Value("int32"), length=6),
            "labels": datasets.Sequence(datasets.Value("int32"), length=6),
        }
    )
    assert dataset.features == expected
    # REFERENCES §9: Sequence(Value("int32"), length=L) is stored as fixed_size_list<item: int32>[L]
    schema = dataset.data.schema
    for column in ("input_ids", "labels"):
        kind = schema.field(column).type
        assert pa.types.is_fixed_size_list(kind) and kind.list_size == 6
        assert kind.value_type == pa.int32()
    table = dataset.data.table
    flat = table.column("input_ids").combine_chunks().flatten().to_numpy()
    assert np.array_equal(flat.reshape(-1, 6), open_split(output, "validation").take(np.arange(4))[:, :-1])


def test_a_rewritten_output_is_not_answered_from_the_hf_cache(tmp_path: Path) -> None:
    # same paths and shapes, new contents: the cache key must follow the shard hashes
    folder, cache = tmp_path / "out", str(tmp_path / "hf")
    first = build_output(folder, {"train": [5, 3]}, length=4, dtype="<u2", seed=1)
    dataset = open_split(folder, "train").as_hf_dataset(cache_dir=cache)
    assert np.array_equal(np.array(dataset["labels"]), first["train"][:, 1:])
    second = build_output(folder, {"train": [5, 3]}, length=4, dtype="<u2", seed=2)
    assert not np.array_equal(first["train"], second["train"])
    again = open_split(folder, "train").as_hf_dataset(cache_dir=cache)
    assert np.array_equal(np.array(again["labels"]), second["train"][:, 1:])


def test_ids_beyond_int32_are_refused_not_wrapped(tmp_path: Path) -> None:
    # uint32 shards may hold ids up to 2**32 - 1; the HF columns are int32
    folder = tmp_path / "out"
    written = build_output(folder, {"train": [3]}, length=2, dtype="<u4", vocab=2**32)
    assert int(written["train"].max()) > 2**31 - 1
    with pytest.raises(ValueError, match="more than the int32 columns"):
        open_split(folder, "train").as_hf_dataset(cache_dir=str(tmp_path / "hf"))
