"""Reading a finished output's windows: the side a trainer sees.

>>> # windows = open_split("build/demo", "train")
>>> # for x, y in windows.batches(32, seed=0, epoch=0): ...

A split is a list of ``.npy`` shards of shape ``(windows, length + 1)``. The
reader memory-maps them (no shard is loaded whole), gives random access to
``(x, y)`` pairs (``x = w[:-1]``, ``y = w[1:]``), and yields shuffled batches
with rank/world-size partitioning that can resume from any step.

Shuffle order is a pure function of ``(seed, epoch)``: with all arithmetic
modulo 2**64 and ``splitmix64(x)`` one step of SplitMix64 from state ``x``
(add ``0x9E3779B97F4A7C15``, then the finaliser; Steele, Lea & Flood, "Fast
splittable pseudorandom number generators", OOPSLA 2014), the epoch gets
``base = splitmix64(seed * 0x100000001B3 + epoch)``, window ``index`` gets the
key ``splitmix64(index + base)``, and windows are taken in key order (equal
keys, which need a 64-bit collision, by index). Unlike ``numpy.random``
streams, which NumPy does not promise to keep across versions, this order
is the same on every machine and NumPy version, so a run resumes exactly.

Partitioning: step ``s`` of an epoch covers positions
``[s * batch_size * world_size, (s + 1) * batch_size * world_size)`` of the
shuffled order; rank ``r`` takes the ``r``-th block of ``batch_size`` of
them. Every window appears exactly once per epoch across all ranks; with
``drop_last`` the final incomplete step is skipped on every rank, so all
ranks run the same number of steps.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

import numpy as np

from corpusprep.errors import IntegrityError
from corpusprep.manifest import read_manifest
from corpusprep.shards import ShardInfo, read_shard

__all__ = ["SplitWindows", "open_split", "safe_member", "shuffle_order"]

_MASK = np.uint64(0xFFFFFFFFFFFFFFFF)


def safe_member(folder: Path, relative: str) -> Path:
    """``folder / relative`` if ``relative`` is a plain relative path inside ``folder``.

    Refuses absolute paths, ``..`` parts and links that lead outside, so a
    manifest cannot make the reader open files elsewhere.

    >>> safe_member(Path("/out"), "../etc/passwd")
    Traceback (most recent call last):
    ...
    corpusprep.errors.IntegrityError: manifest path '../etc/passwd' leaves the output folder; refused
    """
    pure = PurePosixPath(relative)
    if pure.is_absolute() or ".." in pure.parts or "\\" in relative or not pure.parts:
        raise IntegrityError(f"manifest path {relative!r} leaves the output folder; refused")
    path = folder / Path(*pure.parts)
    if path.exists() and not path.resolve().is_relative_to(folder.resolve()):
        raise IntegrityError(
            f"manifest path {relative!r} leads outside the output folder through a link; refused"
        )
    return path


def _splitmix64(values: np.ndarray) -> np.ndarray:
    with np.errstate(over="ignore"):
        z = values + np.uint64(0x9E3779B97F4A7C15)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))


def shuffle_order(count: int, seed: int, epoch: int) -> np.ndarray:
    """The shuffled order of ``count`` windows for ``(seed, epoch)``, stable across NumPy versions.

    >>> sorted(shuffle_order(5, 0, 0).tolist())
    [0, 1, 2, 3, 4]
    >>> shuffle_order(5, 0, 0).tolist() != shuffle_order(5, 0, 1).tolist()
    True
    """
    base = _splitmix64(np.array([(seed * 0x100000001B3 + epoch) & 0xFFFFFFFFFFFFFFFF], dtype=np.uint64))[0]
    with np.errstate(over="ignore"):
        keys = _splitmix64(np.arange(count, dtype=np.uint64) + base)
    return np.argsort(keys, kind="stable")


@dataclass(frozen=True, slots=True)
class _Shard:
    path: Path
    rows: int
    xxh3_128: str  # as the manifest lists it


class SplitWindows:
    """The windows of one split of an output folder. Create with :func:`open_split`."""

    def __init__(self, folder: Path, split: str, shards: list[_Shard], length: int, dtype: str) -> None:
        self.folder, self.split, self.length, self.dtype = folder, split, length, np.dtype(dtype)
        self._shards = shards
        self._starts = np.cumsum([0] + [shard.rows for shard in shards])
        self._maps: list[np.ndarray | None] = [None] * len(shards)

    def __len__(self) -> int:
        return int(self._starts[-1])

    @property
    def shard_hashes(self) -> tuple[str, ...]:
        """The manifest's XXH3-128 of each shard, in order: what identifies the content read."""
        return tuple(shard.xxh3_128 for shard in self._shards)

    def __getstate__(self) -> dict[str, Any]:
        # Memory maps are reopened in the receiving process (e.g. DataLoader workers).
        return {
            "folder": self.folder,
            "split": self.split,
            "length": self.length,
            "dtype": self.dtype.str,
            "shards": self._shards,
        }

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__init__(state["folder"], state["split"], state["shards"], state["length"], state["dtype"])  # type: ignore[misc]

    def _map(self, index: int) -> np.ndarray:
        array = self._maps[index]
        if array is None:
            # A plain ndarray over the memory map: indexing it skips np.memmap's per-result bookkeeping.
            array = np.asarray(np.load(self._shards[index].path, mmap_mode="r", allow_pickle=False))
            self._maps[index] = array
        return array

    def window(self, index: int) -> np.ndarray:
        """The stored window ``index`` (``length + 1`` tokens), as a read-only view."""
        if not 0 <= index < len(self):
            raise IndexError(f"window {index} out of range for {len(self)} windows of {self.split}")
        shard = int(np.searchsorted(self._starts, index, side="right") - 1)
        row: np.ndarray = self._map(shard)[index - self._starts[shard]]
        return row

    def __getitem__(self, index: int) -> tuple[np.ndarray, np.ndarray]:
        window = self.window(index)
        return window[:-1], window[1:]

    def take(self, indices: np.ndarray) -> np.ndarray:
        """Stored windows at ``indices`` as one new ``(len(indices), length + 1)`` array, in that order.

        Rows are gathered straight from each shard's memory map with one ``np.take``
        per shard touched; when all indices fall in one shard (always, for a
        one-shard split) that gather writes the result directly.
        """
        indices = np.asarray(indices, dtype=np.int64)
        if len(indices) == 0:
            return np.empty((0, self.length + 1), dtype=self.dtype)
        if indices.min() < 0 or indices.max() >= len(self):
            raise IndexError(f"window index out of range for {len(self)} windows of {self.split}")
        if len(self._shards) == 1:
            gathered: np.ndarray = np.take(self._map(0), indices, axis=0)
            return gathered
        shard_of = np.searchsorted(self._starts, indices, side="right") - 1
        first, last = int(shard_of.min()), int(shard_of.max())
        if first == last:
            gathered = np.take(self._map(first), indices - self._starts[first], axis=0)
            return gathered
        out = np.empty((len(indices), self.length + 1), dtype=self.dtype)
        for shard in range(first, last + 1):
            where = np.flatnonzero(shard_of == shard)
            if len(where):
                out[where] = np.take(self._map(shard), indices[where] - self._starts[shard], axis=0)
        return out

    def steps_per_epoch(self, batch_size: int, *, world_size: int = 1, drop_last: bool = False) -> int:
        """Number of steps every rank runs in one epoch."""
        per_step = batch_size * world_size
        return len(self) // per_step if drop_last else -(-len(self) // per_step)

    def batches(
        self,
        batch_size: int,
        *,
        seed: int = 0,
        epoch: int = 0,
        start_step: int = 0,
        rank: int = 0,
        world_size: int = 1,
        drop_last: bool = False,
        shuffle: bool = True,
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Yield ``(x, y)`` batches of this rank for one epoch, starting at ``start_step``.

        ``x`` and ``y`` are ``(batch, length)`` arrays of the shard dtype. Without
        ``drop_last`` the last step may give this rank a short or empty batch
        (an empty batch is skipped).
        """
        if batch_size < 1:
            raise ValueError(f"batch_size = {batch_size}: must be at least 1")
        if world_size < 1 or not 0 <= rank < world_size:
            raise ValueError(f"rank = {rank}, world_size = {world_size}: need 0 <= rank < world_size")
        if start_step < 0:
            raise ValueError(f"start_step = {start_step}: must be >= 0")
        order = shuffle_order(len(self), seed, epoch) if shuffle else np.arange(len(self))
        per_step = batch_size * world_size
        for step in range(
            start_step, self.steps_per_epoch(batch_size, world_size=world_size, drop_last=drop_last)
        ):
            begin = step * per_step + rank * batch_size
            chosen = order[begin : min(begin + batch_size, (step + 1) * per_step)]
            if len(chosen) == 0:
                continue
            windows = self.take(chosen)
            yield windows[:, :-1], windows[:, 1:]

    def as_torch_dataset(self) -> Any:
        """A ``torch.utils.data.Dataset`` of ``(x, y)`` int64 tensors (needs PyTorch installed)."""
        from corpusprep.adapters import torch_dataset

        return torch_dataset(self)

    def as_hf_dataset(self, *, rows_per_chunk: int = 4096, cache_dir: str | None = None) -> Any:
        """An HF ``datasets.Dataset`` with ``input_ids`` and ``labels`` columns (see :func:`hf_dataset`)."""
        from corpusprep.adapters import hf_dataset

        return hf_dataset(self, rows_per_chunk=rows_per_chunk, cache_dir=cache_dir)


def open_split(output: Path | str, split: str, *, verify: bool = True) -> SplitWindows:
    """Open the windows of ``split`` in a finished output folder.

    Every shard's ``.npy`` header (shape, dtype) and size are always checked
    against the manifest, and the shards' rows against the split's window
    count; this reads only the headers. With ``verify`` each shard's XXH3-128
    is checked too (one sequential read of each shard).
    """
    folder = Path(output)
    manifest = read_manifest(folder)
    splits = manifest.get("splits", {})
    if split not in splits:
        raise KeyError(f"{folder}: no split {split!r}; the manifest has {', '.join(splits) or 'none'}")
    windows = manifest["windows"]
    length, dtype = int(windows["length"]), str(windows["dtype"])
    shards = []
    for shard in splits[split]["shards"]:
        path = safe_member(folder, shard["file"])
        shape = (int(shard["shape"][0]), int(shard["shape"][1]))
        if shape[1] != length + 1 or shard["dtype"] != dtype:
            raise IntegrityError(
                f"{folder}: the manifest lists {shard['file']} with shape {list(shape)} and dtype "
                f"{shard['dtype']}, but its windows are {length + 1} tokens of {dtype}; "
                "the manifest was altered"
            )
        expected = ShardInfo(
            file=path.name,
            split=split,
            shape=shape,
            dtype=dtype,
            xxh3_128=str(shard["xxh3_128"]),
            bytes=int(shard["bytes"]),
        )
        try:
            read_shard(path, expected=expected, check_hash=verify)
        except FileNotFoundError:
            raise IntegrityError(f"{path}: shard listed in the manifest is missing") from None
        shards.append(_Shard(path, shape[0], expected.xxh3_128))
    listed = int(splits[split].get("windows", sum(shard.rows for shard in shards)))
    if listed != sum(shard.rows for shard in shards):
        raise IntegrityError(
            f"{folder}: split {split!r} has {listed} windows in the manifest but its shards hold "
            f"{sum(shard.rows for shard in shards)}; the manifest was altered"
        )
    return SplitWindows(folder, split, shards, length, dtype)
