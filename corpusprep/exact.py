"""Exact deduplication: one key per document, the first occurrence survives.

The per-batch part (:func:`exact_keys`) computes a 128-bit key of each kept
document; the barrier (:func:`first_occurrences`) finds, for every key, the
first document in the deterministic corpus order. Keys are kept as two
``uint64`` columns so the barrier is a vectorised stable sort, not a Python
dictionary: 16 bytes per document.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import xxhash

from corpusprep.config import setting

__all__ = ["ExactConfig", "exact_key_text", "exact_keys", "first_occurrences"]

_SPACE_RUN = re.compile(r"\s+")


@dataclass(frozen=True, slots=True, kw_only=True)
class ExactConfig:
    """Settings of the exact-duplicate stage (definition table ``[exact]``)."""

    enabled: bool = setting(True, "Remove documents whose key equals an earlier document's key.")
    key: str = setting(
        "text",
        "What is compared: `text` = the cleaned text byte for byte; `normalized` = the cleaned "
        "text casefolded with every whitespace run collapsed to one space and the ends stripped.",
        choices=("text", "normalized"),
    )


def exact_key_text(text: str, key: str) -> str:
    """The string whose hash is the document's exact key.

    >>> exact_key_text("Ferry  Bulletin\\n", "normalized")
    'ferry bulletin'
    >>> exact_key_text("Ferry  Bulletin\\n", "text")
    'Ferry  Bulletin\\n'
    """
    if key == "normalized":
        return _SPACE_RUN.sub(" ", text.casefold()).strip()
    return text


def exact_keys(texts: list[str | None], config: ExactConfig) -> np.ndarray:
    """XXH3-128 keys of ``texts`` as an ``(n, 2)`` uint64 array (high, low words).

    Rows for ``None`` (documents not kept) are zero; callers mask them out.
    """
    keys = np.zeros((len(texts), 2), dtype=np.uint64)
    for row, text in enumerate(texts):
        if text is None:
            continue
        value = xxhash.xxh3_128_intdigest(exact_key_text(text, config.key).encode("utf-8"))
        keys[row, 0] = value >> 64
        keys[row, 1] = value & 0xFFFFFFFFFFFFFFFF
    return keys


def first_occurrences(keys: np.ndarray, candidates: np.ndarray) -> np.ndarray:
    """For each row, the row index of the first candidate row with the same key.

    ``keys`` is ``(n, 2)`` uint64; ``candidates`` a boolean mask of the rows
    that take part. Returns an int64 array: ``-1`` for rows that are not
    candidates or that are the first of their key, else the index of the
    earlier row they copy. Order is the row order (the corpus order).

    >>> k = np.array([[1, 1], [2, 2], [1, 1], [3, 3], [2, 2]], dtype=np.uint64)
    >>> first_occurrences(k, np.array([True, True, True, False, True])).tolist()
    [-1, -1, 0, -1, 1]
    """
    result = np.full(len(keys), -1, dtype=np.int64)
    rows = np.flatnonzero(candidates)
    if rows.size == 0:
        return result
    sub = keys[rows]
    # lexsort is stable: equal keys keep their row order, so the first of a run is the first occurrence.
    order = np.lexsort((sub[:, 1], sub[:, 0]))
    sorted_keys = sub[order]
    starts = np.ones(len(order), dtype=bool)
    starts[1:] = np.any(sorted_keys[1:] != sorted_keys[:-1], axis=1)
    run_first = np.maximum.accumulate(np.where(starts, np.arange(len(order)), 0))
    first_rows = rows[order[run_first]]
    copies = ~starts
    result[rows[order[copies]]] = first_rows[copies]
    return result
