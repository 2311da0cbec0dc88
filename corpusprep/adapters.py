"""Thin adapters from :class:`corpusprep.windows.SplitWindows` to PyTorch and HF ``datasets``.

Both libraries are imported only when an adapter is used. PyTorch is not a
dependency: install the CPU build with ``pip install torch==2.13.0``.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from corpusprep.windows import SplitWindows

__all__ = ["TorchWindows", "hf_dataset", "torch_dataset"]

_INT32_MAX = 2**31 - 1


class _IdsTooLarge(ValueError):
    """A token id does not fit the HF dataset's int32 columns."""


class TorchWindows:
    """A map-style dataset for ``torch.utils.data.DataLoader``: item ``i`` is ``(x, y)`` as int64 tensors.

    It pickles without its memory maps, so ``DataLoader(num_workers > 0)``
    reopens the shards in each worker.
    """

    def __init__(self, windows: SplitWindows) -> None:
        self.windows = windows

    def __len__(self) -> int:
        return len(self.windows)

    def __getitem__(self, index: int) -> tuple[Any, Any]:
        import torch

        window = np.asarray(self.windows.window(int(index)), dtype=np.int64)
        return torch.from_numpy(window[:-1].copy()), torch.from_numpy(window[1:].copy())


def torch_dataset(windows: SplitWindows) -> TorchWindows:
    """Wrap ``windows`` for PyTorch (fails with a clear message if PyTorch is missing)."""
    try:
        import torch  # noqa: F401
    except ImportError as error:
        raise ImportError("the PyTorch adapter needs torch: pip install torch==2.13.0 (CPU build)") from error
    return TorchWindows(windows)


def hf_dataset(windows: SplitWindows, *, rows_per_chunk: int = 4096, cache_dir: str | None = None) -> Any:
    """An HF ``datasets.Dataset`` with ``input_ids`` and ``labels`` (fixed-length int32 sequences).

    Rows are written through ``Dataset.from_generator`` chunk by chunk, so memory
    stays bounded; the data is copied into the HF cache (``cache_dir``). The
    cache entry is keyed by the shards' hashes as well as their paths, so a
    rewritten output is never answered from a stale cache.
    """
    import datasets

    length = windows.length
    features = datasets.Features(
        {
            "input_ids": datasets.Sequence(datasets.Value("int32"), length=length),
            "labels": datasets.Sequence(datasets.Value("int32"), length=length),
        }
    )

    def rows(chunk_size: int, shard_hashes: str) -> Iterator[dict[str, list[int]]]:
        # shard_hashes is not read: as a generator argument it enters the HF cache fingerprint.
        for start in range(0, len(windows), chunk_size):
            stored = windows.take(np.arange(start, min(start + chunk_size, len(windows))))
            if stored.dtype.itemsize == 4 and len(stored) and int(stored.max()) > _INT32_MAX:
                raise _IdsTooLarge(
                    f"{windows.folder}: split {windows.split!r} holds token id {int(stored.max())}, more "
                    f"than the int32 columns of the HF dataset hold ({_INT32_MAX}); read it with open_split"
                )
            block = stored.astype(np.int32)
            for window in block:
                yield {"input_ids": window[:-1].tolist(), "labels": window[1:].tolist()}

    try:
        return datasets.Dataset.from_generator(
            rows,
            gen_kwargs={"chunk_size": rows_per_chunk, "shard_hashes": " ".join(windows.shard_hashes)},
            features=features,
            cache_dir=cache_dir,
        )
    except datasets.exceptions.DatasetGenerationError as error:
        if isinstance(error.__cause__, _IdsTooLarge):
            raise error.__cause__ from None
        raise
