"""The global steps as tasks of an engine: exact-duplicate partitions, LSH bands, pair checks.

A global step needs every document at once, but its work splits by key:

* **exact duplicates**: the documents are partitioned by their 128-bit key
  (``key[0] mod P``); equal keys fall in the same partition, so the first
  occurrence found inside a partition (rows kept in corpus order) is the
  first occurrence in the whole corpus. Each partition is one task;
* **LSH band buckets**: the bands of the signature store are independent; each
  task computes the candidate pairs of a few bands (:func:`corpusprep.lsh.band_codes`)
  and the driver merges them with ``np.unique``;
* **pair checks**: the candidate pairs, cut in chunks, get their signature
  estimates and (``near.verify = "exact"``) their exact Jaccard similarity in
  tasks.

Tasks run through a :data:`corpusprep.pool.Mapper`, so the same code runs
inline, on the local process pool, or on a Dask cluster. Results are put
together by position and key, never by arrival, so the output bytes do not
depend on the engine or the number of workers (the tests compare them).

What travels: the key partitions and the pair chunks go in the task's
arguments; the signature store and the staged documents are read by the tasks
from the run's work folder (``.OUTPUT.partial/.work``), by path. A remote
cluster therefore needs that folder on storage every worker mounts at the same
path; a task that cannot see it fails with a message saying so.

What stays on the driver: the per-document arrays of the pipeline (statuses,
keys, split codes: some tens of bytes a document), the candidate and verified
pairs (16 bytes a pair), and the union-find over the verified pairs, which is
linear in documents plus pairs. That bounds the driver at roughly 100 bytes a
document plus 16 a pair: 10^8 documents need about 10 GB there. Distributed
connected components would lift the pair bound; this version does not need it
at the corpus sizes measured (see the README's cluster section).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa

from corpusprep.exact import first_occurrences
from corpusprep.lsh import band_codes, check_banding, codes_to_pairs, nonempty_rows
from corpusprep.minhash import pair_similarity
from corpusprep.near import NearConfig, document_shingles, exact_similarity
from corpusprep.pool import Mapper, visible_path

__all__ = [
    "MappedPairWork",
    "SignatureStore",
    "first_occurrences_mapped",
    "visible_path",
]

#: Rows of one exact-duplicate partition task (about 16 bytes each travel).
EXACT_PARTITION_ROWS = 1 << 20
#: Pairs in one pair-check task.
PAIRS_PER_TASK = 1 << 17
#: Exact-Jaccard pairs in one task. Each pair may re-shingle two documents (milliseconds each for
#: long ones), so tasks are kept small enough for the workers to share the step evenly.
EXACT_PAIRS_PER_TASK = 1 << 9
#: Band tasks per map: enough to keep every worker busy, few enough that each reads the store rarely.
BAND_TASKS = 8


@dataclass(frozen=True, slots=True)
class SignatureStore:
    """A ``(documents, permutations)`` signature file in the work folder, opened by path in each task."""

    path: str
    dtype: str
    documents: int
    permutations: int

    def open(self) -> np.ndarray:
        if self.documents == 0:
            return np.zeros((0, self.permutations), dtype=self.dtype)
        return np.memmap(
            visible_path(self.path), dtype=self.dtype, mode="r", shape=(self.documents, self.permutations)
        )


# --------------------------------------------------------------------------- exact duplicates
def _exact_partition(item: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Task: for rows (ascending) and their keys, the row each one copies, or -1."""
    rows, keys = item
    first = first_occurrences(keys, np.ones(rows.size, dtype=bool))
    return np.where(first >= 0, rows[np.maximum(first, 0)], -1)


def first_occurrences_mapped(
    keys: np.ndarray, candidates: np.ndarray, mapper: Mapper, *, partition_rows: int | None = None
) -> np.ndarray:
    """:func:`corpusprep.exact.first_occurrences`, with the key partitions run through ``mapper``.

    The result is the same array for any ``partition_rows`` (default
    :data:`EXACT_PARTITION_ROWS`) and any engine.
    """
    partition_rows = partition_rows or EXACT_PARTITION_ROWS
    result = np.full(len(keys), -1, dtype=np.int64)
    rows = np.flatnonzero(candidates)
    if rows.size == 0:
        return result
    partitions = max(1, math.ceil(rows.size / partition_rows))
    bucket = (keys[rows, 0] % np.uint64(partitions)).astype(np.int64)
    order = np.argsort(bucket, kind="stable")  # stable: rows stay ascending inside a partition
    bounds = np.searchsorted(bucket[order], np.arange(partitions + 1))
    parts = [rows[order[bounds[p] : bounds[p + 1]]] for p in range(partitions)]
    tasks = ((part, np.ascontiguousarray(keys[part])) for part in parts)
    for part, copied in zip(parts, mapper(_exact_partition, tasks), strict=True):
        result[part] = copied
    return result


# --------------------------------------------------------------------------- LSH bands and pairs
def _band_task(item: tuple[SignatureStore, list[int], int, int]) -> np.ndarray:
    """Task: the sorted distinct pair codes of some bands of the store."""
    store, bands, rows, bucket_limit = item
    signatures = store.open()
    nonempty = nonempty_rows(signatures)
    found = [band_codes(signatures, band, rows, nonempty, bucket_limit=bucket_limit) for band in bands]
    return np.unique(np.concatenate(found)) if found else np.empty(0, dtype=np.uint64)


def _estimate_task(item: tuple[SignatureStore, np.ndarray]) -> np.ndarray:
    """Task: signature estimates of a chunk of pairs."""
    store, pairs = item
    return pair_similarity(store.open(), pairs[:, 0], pairs[:, 1])


def _exact_task(item: tuple[str, NearConfig, np.ndarray]) -> np.ndarray:
    """Task: exact Jaccard of a chunk of pairs given as rows of the staged documents file."""
    documents, config, pairs = item
    with pa.memory_map(str(visible_path(documents))) as source:
        texts = pa.ipc.open_file(source).read_all().column("text")

        def shingles_of(row: int) -> np.ndarray:
            return document_shingles(texts[row].as_py() or "", config)

        return exact_similarity(pairs, shingles_of)


def _chunks(pairs: np.ndarray, size: int) -> list[np.ndarray]:
    return [np.ascontiguousarray(pairs[begin : begin + size]) for begin in range(0, len(pairs), size)]


@dataclass(frozen=True, slots=True)
class MappedPairWork:
    """A :class:`corpusprep.near.PairWork` whose work runs as ``mapper`` tasks.

    ``rows[i]`` is the row of signature ``i`` in the staged documents file
    ``documents`` (both in the work folder). The task sizes default to the
    module's :data:`BAND_TASKS`, :data:`PAIRS_PER_TASK` and
    :data:`EXACT_PAIRS_PER_TASK`, read when the work is done.
    """

    mapper: Mapper
    store: SignatureStore
    documents: str
    rows: np.ndarray
    config: NearConfig
    band_tasks: int | None = None
    pairs_per_task: int | None = None
    exact_pairs_per_task: int | None = None

    def candidates(self, bands: int, rows: int, bucket_limit: int) -> np.ndarray:
        check_banding((self.store.documents, self.store.permutations), bands, rows, bucket_limit)
        tasks_count = min(self.band_tasks or BAND_TASKS, bands)
        groups = [list(range(index, bands, tasks_count)) for index in range(tasks_count)]
        tasks = ((self.store, group, rows, bucket_limit) for group in groups)
        found = list(self.mapper(_band_task, tasks))
        return codes_to_pairs(np.unique(np.concatenate(found)) if found else np.empty(0, dtype=np.uint64))

    def _map(self, task: Callable[[Any], np.ndarray], items: list[Any]) -> np.ndarray:
        results = list(self.mapper(task, items))
        return np.concatenate(results) if results else np.empty(0, dtype=np.float64)

    def estimates(self, pairs: np.ndarray) -> np.ndarray:
        items = [(self.store, chunk) for chunk in _chunks(pairs, self.pairs_per_task or PAIRS_PER_TASK)]
        return self._map(_estimate_task, items)

    def exact(self, pairs: np.ndarray) -> np.ndarray:
        """Exact Jaccard of each pair; pairs that share a first document go to the same task.

        A task shingles each document it meets once (:func:`corpusprep.near.exact_similarity`
        keeps a cache), so the pairs are sorted by their first document and cut only
        where it changes, keeping a cluster's representative with its members; the
        results are put back in the order of ``pairs``.
        """
        if not len(pairs):
            return np.empty(0, dtype=np.float64)
        order = np.lexsort((pairs[:, 1], pairs[:, 0]))
        staged = self.rows[pairs[order]]
        size = self.exact_pairs_per_task or EXACT_PAIRS_PER_TASK
        new_first = np.flatnonzero(np.diff(staged[:, 0])) + 1  # where the first document changes
        cuts, last = [], 0
        for cut in new_first.tolist():
            if cut - last >= size:
                cuts.append(cut)
                last = cut
        bounds = [0, *cuts, len(staged)]
        items = [(self.documents, self.config, staged[a:b]) for a, b in itertools.pairwise(bounds)]
        out = np.empty(len(pairs), dtype=np.float64)
        out[order] = self._map(_exact_task, items)
        return out
