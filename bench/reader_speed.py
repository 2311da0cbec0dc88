"""Reader speed: shuffled batches from SplitWindows.batches beside plain NumPy memory-mapped slices.

Builds one split of random token ids (default 20,000 windows of 1,025 ``<u2`` tokens, about 41 MB)
with ``corpusprep.shards.write_shard`` in a temporary folder, then measures in the same run, on the
same shards, with the page cache warm:

- ``reader``: ``SplitWindows.batches(32, seed=0, epoch=0)`` over one epoch (shuffled);
- ``numpy_sequential``: ``np.array(shard[i : i + 32])`` for consecutive batches of the memory map;
- ``numpy_random``: ``shard[indices]`` (fancy indexing) with a random permutation cut into batches.

Every figure is windows per second, best of ``--repeats`` epochs. The target is a reader at least
0.5x as fast as NumPy's random fancy indexing. The contents are also checked: the reader's
batches must equal the NumPy rows of the windows it says it took (``reference``).

    .venv/bin/python bench/reader_speed.py [--windows 20000] [--length 1024] [--shards 1]
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from corpusprep.shards import write_shard
from corpusprep.windows import SplitWindows, open_split, shuffle_order

TARGET = 0.5


def build(folder: Path, *, windows: int, length: int, shards: int, seed: int = 0) -> None:
    """Write ``windows`` random windows of ``length + 1`` uint16 ids in ``shards`` shards, plus a manifest."""
    rng = np.random.default_rng(seed)
    (folder / "shards").mkdir(parents=True)
    bounds = np.linspace(0, windows, shards + 1).astype(int)
    listed = []
    for index in range(shards):
        block = rng.integers(0, 50_000, size=(bounds[index + 1] - bounds[index], length + 1), dtype=np.uint16)
        info = write_shard(folder / "shards", split="train", index=index, windows=block)
        listed.append(info.to_dict() | {"file": f"shards/{info.file}"})
    manifest = {
        "windows": {"length": length, "stored_length": length + 1, "dtype": "<u2"},
        "splits": {"train": {"windows": windows, "shards": listed}},
    }
    (folder / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")


def _best(runs: dict[str, Callable[[], int]], repeats: int) -> dict[str, float]:
    """Windows per second of each run (which returns the windows it delivered), best of ``repeats``.

    The runs take turns within each repeat, so a busy machine slows them alike.
    """
    best = dict.fromkeys(runs, 0.0)
    for _ in range(repeats):
        for label, run in runs.items():
            start = time.perf_counter()
            delivered = run()
            best[label] = max(best[label], delivered / (time.perf_counter() - start))
    return best


def _check(reader: SplitWindows, maps: list[np.ndarray], batch_size: int) -> None:
    """The reader's shuffled batches equal the NumPy rows of the windows its documented order names."""
    order = shuffle_order(len(reader), 0, 0)
    whole = np.concatenate([np.asarray(array) for array in maps])
    for step, (x, y) in enumerate(reader.batches(batch_size, seed=0, epoch=0)):
        rows = whole[order[step * batch_size : (step + 1) * batch_size]]
        if not (np.array_equal(x, rows[:, :-1]) and np.array_equal(y, rows[:, 1:])):
            raise AssertionError(f"reader batch {step} differs from the NumPy rows")


def measure(
    *, windows: int = 20_000, length: int = 1024, batch_size: int = 32, shards: int = 1, repeats: int = 5
) -> dict[str, Any]:
    """Build the shards, measure the three readers and return the figures (windows per second)."""
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name) / "out"
        build(folder, windows=windows, length=length, shards=shards)
        reader = open_split(folder, "train")  # verifies the hashes: one read of every shard, warms the cache
        manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
        maps = [
            np.load(folder / shard["file"], mmap_mode="r", allow_pickle=False)
            for shard in manifest["splits"]["train"]["shards"]
        ]
        _check(reader, maps, batch_size)

        def run_reader() -> int:
            delivered = 0
            for x, y in reader.batches(batch_size, seed=0, epoch=0):
                delivered += len(x) + 0 * int(y[0, 0])  # touch the target so nothing is left lazy
            return delivered

        def run_sequential() -> int:
            delivered = 0
            for array in maps:
                for start in range(0, len(array), batch_size):
                    rows = np.array(array[start : start + batch_size])
                    x, y = rows[:, :-1], rows[:, 1:]
                    delivered += len(x) + 0 * int(y[0, 0])
            return delivered

        permutation = np.random.default_rng(1).permutation(windows)  # same access pattern as a shuffle
        starts = np.cumsum([0] + [len(array) for array in maps])

        def run_random() -> int:
            delivered = 0
            for begin in range(0, windows, batch_size):
                chosen = permutation[begin : begin + batch_size]
                if len(maps) == 1:
                    rows = maps[0][chosen]
                else:
                    shard_of = np.searchsorted(starts, chosen, side="right") - 1
                    rows = np.empty((len(chosen), length + 1), dtype=np.uint16)
                    for shard in np.unique(shard_of).tolist():
                        where = shard_of == shard
                        rows[where] = maps[shard][chosen[where] - starts[shard]]
                x, y = rows[:, :-1], rows[:, 1:]
                delivered += len(x) + 0 * int(y[0, 0])
            return delivered

        figures = _best(
            {"reader": run_reader, "numpy_sequential": run_sequential, "numpy_random": run_random}, repeats
        )
    return {
        "windows": windows,
        "stored_length": length + 1,
        "batch_size": batch_size,
        "shards": shards,
        "windows_per_second": figures,
        "reader_vs_numpy_random": figures["reader"] / figures["numpy_random"],
        "reader_vs_numpy_sequential": figures["reader"] / figures["numpy_sequential"],
        "target": TARGET,
        "reference": "reader batches equal the NumPy memory-mapped rows",
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else None)
    parser.add_argument("--windows", type=int, default=20_000, help="windows in the split (default 20000)")
    parser.add_argument("--length", type=int, default=1024, help="tokens per input window (default 1024)")
    parser.add_argument("--batch-size", type=int, default=32, help="windows per batch (default 32)")
    parser.add_argument("--shards", type=int, default=1, help="shard files the split is cut into (default 1)")
    parser.add_argument("--repeats", type=int, default=5, help="epochs per reader; the best counts")
    arguments = parser.parse_args(argv)
    result = measure(
        windows=arguments.windows,
        length=arguments.length,
        batch_size=arguments.batch_size,
        shards=arguments.shards,
        repeats=arguments.repeats,
    )
    for label, value in result["windows_per_second"].items():
        print(f"{label:<17} {value:>12,.0f} windows/s")
    ratio = result["reader_vs_numpy_random"]
    verdict = "meets" if ratio >= TARGET else "MISSES"
    print(f"reader / numpy random = {ratio:.2f}x ({verdict} the {TARGET}x target); ", end="")
    print(f"reader / numpy sequential = {result['reader_vs_numpy_sequential']:.2f}x")
    return 0 if ratio >= TARGET else 1


if __name__ == "__main__":
    sys.exit(main())
