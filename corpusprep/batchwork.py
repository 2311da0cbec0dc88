"""Per-batch work of the pipeline's two passes; these functions run in worker processes.

Each takes a batch (and frozen settings) and returns a new value; nothing is kept
between calls, so the same batches give the same results on any engine and any
number of workers.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from corpusprep.clean import CleanConfig, clean_batch
from corpusprep.exact import ExactConfig, exact_keys
from corpusprep.near import NearConfig, signature_batch
from corpusprep.schema import KEPT
from corpusprep.tokens import Tokenizer

__all__ = ["PreparedBatch", "bounded_slices", "encode_texts", "hex_pair", "prepare_batch"]


@dataclass(slots=True)
class PreparedBatch:
    """One batch after the first pass: cleaned rows plus per-row fixed-width data."""

    batch: pa.RecordBatch
    text_hashes: np.ndarray  # (rows, 2) uint64, zero for rows not kept
    exact_keys: np.ndarray  # (rows, 2) uint64
    signatures: np.ndarray | None  # (rows, permutations), rows not kept are zero
    counts: dict[str, Counter[str]] = field(default_factory=dict)


def prepare_batch(
    batch: pa.RecordBatch, clean: CleanConfig, exact: ExactConfig, near: NearConfig
) -> PreparedBatch:
    """First-pass work on one batch (runs in a worker process)."""
    cleaned, clean_counts = clean_batch(batch, clean)
    status = cleaned.column("status").to_pylist()
    texts = [
        text if state == KEPT else None
        for text, state in zip(cleaned.column("text").to_pylist(), status, strict=True)
    ]
    text_hashes = exact_keys(texts, ExactConfig(key="text"))
    keys = text_hashes if exact.key == "text" else exact_keys(texts, exact)
    signatures = None
    near_counts: dict[str, int] = {}
    if near.enabled:
        signatures, near_counts = signature_batch(cleaned, near)
    return PreparedBatch(
        batch=cleaned,
        text_hashes=text_hashes,
        exact_keys=keys,
        signatures=signatures,
        counts={"clean": Counter(clean_counts), "near": Counter(near_counts)},
    )


def bounded_slices(batch: pa.RecordBatch, limit: int) -> Iterator[pa.RecordBatch]:
    """Cut ``batch`` into consecutive slices holding at most ``limit`` bytes of text each.

    A slice always holds at least one row. The cut depends only on the batch, so
    the work is spread over workers the same way whatever their number.
    """
    text: Any = batch.column("text")
    measured: Any = pc.binary_length(text)
    lengths = np.asarray(pc.fill_null(measured, 0))
    start, total = 0, 0
    for row, length in enumerate(lengths.tolist()):
        if row > start and total + length > limit:
            yield batch.slice(start, row - start)
            start, total = row, 0
        total += length
    if start < batch.num_rows:
        yield batch.slice(start, batch.num_rows - start)


def encode_texts(tokenizer: Tokenizer, texts: list[str]) -> list[np.ndarray]:
    """Token ids of ``texts`` (second pass)."""
    return tokenizer.encode_batch(texts)


def hex_pair(pair: np.ndarray) -> str:
    """A (high, low) uint64 pair as 32 hex characters.

    >>> hex_pair(np.array([1, 255], dtype=np.uint64))
    '000000000000000100000000000000ff'
    """
    return f"{int(pair[0]):016x}{int(pair[1]):016x}"
