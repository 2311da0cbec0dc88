"""Speed and accuracy of near-duplicate detection, beside datasketch measured in the same run.

Run: ``.venv/bin/python bench/near_speed.py [--pages N] [--reference-docs N] [--path compiled|numpy]``.

The corpus is Python 3.11 documentation sources (Debian package python3.11-doc),
each page followed by perturbed copies with 0.5-8% of words edited by a seeded
editor. corpusprep is timed end to end (view + shingles + signatures, then
LSH + verification + clustering). datasketch (reference library) is timed from
the same shingle strings, already built, so its figures leave out shingling:
``MinHash(num_perm=permutations)`` with one ``update`` per shingle (its default
hash, SHA-1 based), the same with an XXH32 ``hashfunc``, and ``update_batch``;
then ``MinHashLSH(threshold, num_perm)`` insert + query. Accuracy of both is
counted on pairs against brute-force exact Jaccard (near, non-identical pairs).

corpusprep runs its compiled shingle and signature kernels (``--path compiled``, the default:
loaded before timing, the load printed apart as ``kernel_load_seconds``, which a pipeline
process pays once) or its NumPy path alone (``--path numpy``); the sample is also timed on the
NumPy path, and ``compiled_speedup`` is NumPy time / compiled time on it, in the same run.
"""

from __future__ import annotations

import argparse
import random
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from corpusprep import schema, shingles
from corpusprep.near import NearConfig, document_shingles, find_clusters, signature_batch
from corpusprep.shingles import shingle_strings

PYTHON_DOCS = Path("/usr/share/doc/python3.11-doc/html/_sources")


def edit_words(text: str, rate: float, rng: random.Random) -> str:
    """Replace, delete or insert a word at each word with probability ``rate`` (seeded)."""
    words = text.split(" ")
    vocabulary = [w for w in words if w] or ["x"]
    out: list[str] = []
    for word in words:
        if rng.random() >= rate:
            out.append(word)
            continue
        operation = rng.randrange(3)
        if operation == 0:
            out.append(rng.choice(vocabulary))
        elif operation == 2:
            out.extend([word, rng.choice(vocabulary)])
    return " ".join(out)


def perturbed_corpus(pages: list[str], copies: int, seed: int) -> list[str]:
    rng = random.Random(seed)
    texts = []
    for page in pages:
        texts.append(page)
        texts.extend(edit_words(page, rng.uniform(0.005, 0.08), rng) for _ in range(copies))
    return texts


def make_batch(texts: list[str]) -> pa.RecordBatch:
    rows = [
        {"record_id": f"d{i}", "source": f"d{i}", "line": None, "given_id": None, "group": None,
         "text": t, "status": schema.KEPT, "reason": None}
        for i, t in enumerate(texts)
    ]  # fmt: skip
    return pa.RecordBatch.from_pylist(rows, schema=schema.DOC_SCHEMA)


def all_pairs_jaccard(key_sets: list[np.ndarray]) -> np.ndarray:
    """Brute-force exact Jaccard of every pair, intersections counted key by key."""
    count = len(key_sets)
    owners = np.concatenate([np.full(k.size, i, dtype=np.int64) for i, k in enumerate(key_sets)])
    keys = np.concatenate(key_sets)
    order = np.lexsort((owners, keys))
    keys, owners = keys[order], owners[order]
    starts = np.flatnonzero(np.concatenate(([True], keys[1:] != keys[:-1])))
    lengths = np.diff(np.concatenate((starts, [keys.size])))
    rank = np.arange(keys.size) - np.repeat(starts, lengths)
    remaining = np.repeat(lengths, lengths) - rank
    common = np.zeros((count, count), dtype=np.int64)
    for offset in range(1, int(lengths.max())):
        members = np.flatnonzero(remaining > offset)
        np.add.at(common, (owners[members], owners[members + offset]), 1)
    common = common + common.T
    sizes = np.array([k.size for k in key_sets], dtype=np.int64)
    union = sizes[:, None] + sizes[None, :] - common
    return np.where(union > 0, common / np.maximum(union, 1), 0.0)


def accuracy(found: set[tuple[int, int]], exact: np.ndarray, threshold: float) -> dict[str, float]:
    rows, cols = np.nonzero(exact >= threshold)
    truth = {(int(i), int(j)) for i, j in zip(rows, cols, strict=True) if i < j and exact[i, j] < 1}
    near_found = {pair for pair in found if exact[pair] < 1}
    hits = len(truth & near_found)
    return {
        "true_pairs": len(truth),
        "found_pairs": len(near_found),
        "recall": hits / len(truth) if truth else 1.0,
        "precision": hits / len(near_found) if near_found else 1.0,
    }


def _ours(texts: list[str], config: NearConfig) -> tuple[dict[str, Any], set[tuple[int, int]]]:
    batch = make_batch(texts)
    start = time.perf_counter()
    signatures, _ = signature_batch(batch, config)
    signed = time.perf_counter()
    keys: list[np.ndarray] = []
    if config.verify == "exact":
        keys = [document_shingles(t, config) for t in texts]
    result = find_clusters(signatures, config, shingles_of=keys.__getitem__ if keys else None)
    done = time.perf_counter()
    seconds = done - start  # re-shingling for exact verification counts too
    timing = {"seconds": seconds, "signature_seconds": signed - start, "cluster_seconds": done - signed}
    return timing, {tuple(p) for p in result.pairs.tolist()}


def _datasketch(
    shingles: list[list[bytes]], config: NearConfig, hashfunc: Callable[[bytes], int] | None, batched: bool
) -> tuple[dict[str, Any], set[tuple[int, int]]]:
    from datasketch import MinHash, MinHashLSH

    start = time.perf_counter()
    sketches = []
    for items in shingles:
        sketch = (
            MinHash(num_perm=config.permutations)
            if hashfunc is None
            else MinHash(num_perm=config.permutations, hashfunc=hashfunc)
        )
        if batched:
            sketch.update_batch(items)
        else:
            for item in items:
                sketch.update(item)
        sketches.append(sketch)
    signed = time.perf_counter()
    index = MinHashLSH(threshold=config.threshold, num_perm=config.permutations)
    for number, sketch in enumerate(sketches):
        index.insert(number, sketch)
    found = set()
    for number, sketch in enumerate(sketches):
        for other in index.query(sketch):
            if other != number and sketches[number].jaccard(sketches[other]) >= config.threshold:
                found.add((min(number, other), max(number, other)))
    done = time.perf_counter()
    timing = {"seconds": done - start, "signature_seconds": signed - start, "cluster_seconds": done - signed}
    return timing, found


def measure(texts: list[str], config: NearConfig, *, reference_docs: int = 200) -> dict[str, Any]:
    """Throughput and pair accuracy of corpusprep and datasketch on ``texts``.

    corpusprep runs on all texts; datasketch on the first ``reference_docs`` (its
    per-shingle path is slow), and both are scored on that same sample against
    brute-force exact Jaccard.
    """
    import xxhash

    megabytes = sum(len(t.encode("utf-8")) for t in texts) / 1e6
    timing, _ = _ours(texts, config)
    report: dict[str, Any] = {
        "documents": len(texts),
        "megabytes": megabytes,
        "corpusprep": {
            **timing,
            "documents_per_second": len(texts) / timing["seconds"],
            "megabytes_per_second": megabytes / timing["seconds"],
        },
    }
    sample = texts[:reference_docs]
    sample_mb = sum(len(t.encode("utf-8")) for t in sample) / 1e6
    keys = [document_shingles(t, config) for t in sample]
    exact = all_pairs_jaccard(keys)
    sample_timing, sample_pairs = _ours(sample, config)
    report["sample_documents"] = len(sample)
    report["corpusprep_sample"] = {
        **sample_timing,
        "documents_per_second": len(sample) / sample_timing["seconds"],
        **accuracy(sample_pairs, exact, config.threshold),
    }
    previous = shingles.set_compiled_after(None)
    numpy_timing, numpy_pairs = _ours(sample, config)
    shingles.set_compiled_after(previous)
    report["corpusprep_numpy_sample"] = {
        **numpy_timing,
        "documents_per_second": len(sample) / numpy_timing["seconds"],
        "compiled_speedup": numpy_timing["seconds"] / sample_timing["seconds"],
        "same_pairs": numpy_pairs == sample_pairs,
    }
    strings = [
        [s.encode("utf-8") for s in sorted(set(shingle_strings(t, ngram=config.ngram)))] for t in sample
    ]
    variants: dict[str, tuple[Callable[[bytes], int] | None, bool]] = {
        "datasketch_default": (None, False),
        "datasketch_xxh32": (xxhash.xxh32_intdigest, False),
        "datasketch_update_batch": (None, True),
    }
    for name, (hashfunc, batched) in variants.items():
        reference_timing, reference_pairs = _datasketch(strings, config, hashfunc, batched)
        report[name] = {
            **reference_timing,
            "documents_per_second": len(sample) / reference_timing["seconds"],
            "megabytes_per_second": sample_mb / reference_timing["seconds"],
            "corpusprep_speedup": reference_timing["seconds"] / sample_timing["seconds"],
            **accuracy(reference_pairs, exact, config.threshold),
        }
    return report


def growth(pages: list[str], config: NearConfig, copies: int) -> dict[str, float]:
    """Time for a corpus and for one four times larger (4x the pages, same copies per page)."""
    quarter = pages[: len(pages) // 4]
    small = perturbed_corpus(quarter, copies, seed=1)
    large = perturbed_corpus(pages[: 4 * len(quarter)], copies, seed=1)
    small_seconds = _ours(small, config)[0]["seconds"]
    large_seconds = _ours(large, config)[0]["seconds"]
    small_mb = sum(len(t.encode()) for t in small) / 1e6
    large_mb = sum(len(t.encode()) for t in large) / 1e6
    return {
        "small_megabytes": small_mb,
        "large_megabytes": large_mb,
        "size_ratio": large_mb / small_mb,
        "time_ratio": large_seconds / small_seconds,
        "time_ratio_per_size_ratio": (large_seconds / small_seconds) / (large_mb / small_mb),
    }


def _print(title: str, values: dict[str, Any]) -> None:
    print(title)
    for key, value in values.items():
        if isinstance(value, dict):
            _print(f"  {key}:", value)
        else:
            print(f"    {key}: {value:.4g}" if isinstance(value, float) else f"    {key}: {value}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pages", type=int, default=120, help="documentation pages in the 1x corpus")
    parser.add_argument("--copies", type=int, default=3, help="perturbed copies per page")
    parser.add_argument("--reference-docs", type=int, default=200, help="documents datasketch is timed on")
    parser.add_argument("--permutations", type=int, default=NearConfig().permutations)
    parser.add_argument("--verify", choices=("signature", "exact"), default="exact")
    paths = ("compiled", "numpy")
    parser.add_argument("--path", choices=paths, default="compiled", help="compiled kernels or NumPy alone")
    args = parser.parse_args()
    if not PYTHON_DOCS.is_dir():
        raise SystemExit(f"{PYTHON_DOCS} not found: install the Debian package python3.11-doc")
    pages = [p.read_text(encoding="utf-8") for p in sorted(PYTHON_DOCS.rglob("*.txt"))]
    pages = [p for p in pages if len(p) >= 2000]
    config = NearConfig(permutations=args.permutations, verify=args.verify)
    texts = perturbed_corpus(pages[: args.pages], args.copies, seed=0)
    if args.path == "compiled":
        start = time.perf_counter()
        shingles.set_compiled_after(0)
        _ours(["Warm-up: a rose is a rose is a rose.", "東京は日本の首都です", "Ça, c'est ça."], config)
        loaded = time.perf_counter() - start
        print(f"kernel_load_seconds: {loaded:.3g} (numba import, cached kernels, first calls)")
    else:
        shingles.set_compiled_after(None)
    _print(f"near_speed (permutations={config.permutations}, verify={config.verify})", measure(
        texts, config, reference_docs=args.reference_docs
    ))  # fmt: skip
    _print("growth 1x -> 4x", growth(pages[: 4 * args.pages], config, args.copies))


if __name__ == "__main__":
    main()
