"""The near-duplicate stage: settings, the per-batch signature step, and the clustering barrier.

Flow: :func:`signature_batch` (per batch, any worker) turns the kept texts of a
batch into MinHash signatures; the caller stacks them in document order (an
in-memory array or a ``np.memmap`` spilled to disk) and calls the barrier
:func:`find_clusters` once. :func:`mark_near_copies` then applies the result to
a batch when ``action = "remove"``.

Document order and indices
--------------------------
Row i of the signature store is document i, in the pipeline's deterministic
order. :func:`signature_batch` returns one row per batch row, so the store's
row numbers are the ledger's row numbers. Rows whose status is not ``kept``
and kept documents whose view is empty (see :mod:`corpusprep.shingles`) get
an empty signature (all :data:`~corpusprep.minhash.EMPTY_VALUE`): they take
part in no band, are never candidates, and stay singletons.

Verification
------------
Every candidate pair from :func:`corpusprep.lsh.candidate_pairs` is checked
(``"exact"`` is the default: on edited Python docs it finds every true pair,
where signature-only checks miss those whose estimate falls just below t):

* ``verify = "signature"``: the fraction of equal signature positions must be
  >= ``threshold``;
* ``verify = "exact"``: the exact Jaccard similarity of the two shingle sets,
  given by the ``shingles_of(i)`` callable, must be >= ``threshold``. Only the
  uncertain candidates are checked exactly: a pair whose signature estimate is
  more than 4 standard errors, 4 * sqrt(t (1 - t) / permutations), below the
  threshold t is rejected, and one more than 4 standard errors above it is
  accepted, without loading shingles (the binomial model puts the chance of
  either mistake for a pair at the threshold near 3e-5). Near copies of a
  corpus with many copies are mostly far above the threshold, so this keeps
  the re-shingling cost to the borderline pairs.

Clusters
--------
The clusters are the connected components of the verified pairs, found by a
union-find with path compression and union by size. Each cluster's
representative is its smallest index, the first document in the order, so the
result does not depend on the order in which pairs are joined.

Per document: ``cluster`` (index of its representative; its own index for
singletons), ``near_copy_of`` (the representative, or -1 for representatives
and singletons) and ``similarity``: the similarity **to the representative**
(signature estimate, or exact Jaccard when ``verify = "exact"``), NaN where
``near_copy_of`` is -1. Through a chain of verified pairs a member can be less
similar to its representative than ``threshold``; the value says so honestly.
"""

from __future__ import annotations

import dataclasses
import math
from collections import OrderedDict
from collections.abc import Callable
from typing import Protocol

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from corpusprep import schema
from corpusprep.config import setting
from corpusprep.errors import DefinitionError
from corpusprep.lsh import candidate_pairs, choose_bands
from corpusprep.minhash import MultiplyShift, pair_similarity, signature_matrix
from corpusprep.shingles import CHAR, UNITS, exact_jaccard, shingle_key_stream, shingle_keys

__all__ = [
    "ACTIONS",
    "VERIFY_MODES",
    "NearConfig",
    "NearResult",
    "PairWork",
    "document_shingles",
    "exact_similarity",
    "find_clusters",
    "mark_near_copies",
    "resolve_bands",
    "signature_batch",
]

VERIFY_MODES = ("signature", "exact")
ACTIONS = ("remove", "cluster")
_SEED_LIMIT = (1 << 64) - 1


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class NearConfig:
    """Settings of the near-duplicate stage (definition table ``[near]``)."""

    enabled: bool = setting(
        True, "Find near-duplicate clusters. The split always uses clusters when enabled."
    )
    unit: str = setting(
        "word",
        "Shingle unit: 'word' n-grams, 'char' n-grams (scripts without spaces), or 'auto' "
        "(characters for documents whose non-space characters are more than half Han, Kana, Thai, "
        "Lao, Khmer, Myanmar or Tibetan).",
        choices=UNITS,
    )
    ngram: int = setting(5, "Units per shingle.", minimum=1, maximum=64)
    permutations: int = setting(
        256,
        "MinHash hash functions (signature length). The estimate's standard error is "
        "sqrt(J(1-J)/permutations): 0.025 at J=0.8 with 256.",
        minimum=16,
        maximum=16384,
    )
    threshold: float = setting(
        0.8,
        "Jaccard similarity at or above which two documents are near copies.",
        minimum=0.0,
        maximum=1.0,
        exclusive_minimum=True,
        exclusive_maximum=True,
    )
    bands: int = setting(0, "LSH bands; 0 = chosen from threshold and permutations.", minimum=0)
    rows: int = setting(
        0, "Signature positions per LSH band; 0 = chosen from threshold and permutations.", minimum=0
    )
    false_positive_weight: float = setting(
        0.05, "Weight of the false-positive area when bands and rows are chosen.", minimum=0.0
    )
    false_negative_weight: float = setting(
        0.95, "Weight of the false-negative area when bands and rows are chosen.", minimum=0.0
    )
    bucket_limit: int = setting(
        64, "Documents sharing one band value beyond which each is paired only with the first.", minimum=2
    )
    verify: str = setting(
        "exact",
        "How candidates are confirmed: 'exact' (exact Jaccard of the shingle sets >= threshold) or "
        "'signature' (MinHash estimate >= threshold; no second look at the texts, lower recall).",
        choices=VERIFY_MODES,
    )
    action: str = setting(
        "remove",
        "'remove' marks every cluster member but the first as near_copy; 'cluster' keeps them all "
        "(clusters still keep copies on one side of the split).",
        choices=ACTIONS,
    )
    seed: int = setting(
        0, "Seed of the shingle hash (XXH3-64) and of the MinHash functions.", minimum=0, maximum=_SEED_LIMIT
    )

    def __post_init__(self) -> None:
        problems = []
        if self.unit not in UNITS:
            problems.append(f"near.unit = {self.unit!r}: must be one of {', '.join(map(repr, UNITS))}")
        if self.verify not in VERIFY_MODES:
            problems.append(
                f"near.verify = {self.verify!r}: must be one of {', '.join(map(repr, VERIFY_MODES))}"
            )
        if self.action not in ACTIONS:
            problems.append(f"near.action = {self.action!r}: must be one of {', '.join(map(repr, ACTIONS))}")
        if not 1 <= self.ngram <= 64:
            problems.append(f"near.ngram = {self.ngram}: must be between 1 and 64")
        if not 16 <= self.permutations <= 16384:
            problems.append(f"near.permutations = {self.permutations}: must be between 16 and 16384")
        if not 0.0 < self.threshold < 1.0:
            problems.append(f"near.threshold = {self.threshold}: must be between 0 and 1 (exclusive)")
        if self.bands < 0 or self.rows < 0:
            problems.append(f"near.bands = {self.bands}, near.rows = {self.rows}: must not be negative")
        elif self.bands * self.rows > self.permutations:
            problems.append(
                f"near.bands * near.rows = {self.bands} * {self.rows} = {self.bands * self.rows}: "
                f"must not exceed near.permutations = {self.permutations}"
            )
        elif self.bands > self.permutations or self.rows > self.permutations:
            problems.append(
                f"near.bands and near.rows must not exceed near.permutations = {self.permutations}"
            )
        if self.false_positive_weight < 0 or self.false_negative_weight < 0:
            problems.append("near.false_positive_weight and near.false_negative_weight must not be negative")
        elif self.false_positive_weight + self.false_negative_weight == 0:
            problems.append("near.false_positive_weight and near.false_negative_weight must not both be 0")
        if self.bucket_limit < 2:
            problems.append(f"near.bucket_limit = {self.bucket_limit}: must be at least 2")
        if not 0 <= self.seed <= _SEED_LIMIT:
            problems.append(f"near.seed = {self.seed}: must be between 0 and 2^64 - 1")
        if problems:
            raise DefinitionError("; ".join(problems))


def resolve_bands(config: NearConfig) -> tuple[int, int]:
    """The (bands, rows) used: both given, one given (the other = permutations // it), or chosen.

    >>> resolve_bands(NearConfig(permutations=9000, bands=450, rows=20))
    (450, 20)
    >>> resolve_bands(NearConfig(permutations=128, bands=16))
    (16, 8)
    """
    if config.bands and config.rows:
        return config.bands, config.rows
    if config.bands:
        return config.bands, config.permutations // config.bands
    if config.rows:
        return config.permutations // config.rows, config.rows
    return choose_bands(
        config.threshold, config.permutations, config.false_positive_weight, config.false_negative_weight
    )


def document_shingles(text: str, config: NearConfig) -> np.ndarray:
    """Sorted distinct shingle keys of one text under ``config`` (what ``shingles_of`` should return)."""
    return shingle_keys(text, unit=config.unit, ngram=config.ngram, seed=config.seed)


def signature_batch(batch: pa.RecordBatch, config: NearConfig) -> tuple[np.ndarray, dict[str, int]]:
    """MinHash signatures of a document batch: shape (batch.num_rows, permutations), ``uint32``.

    One row per batch row, in batch order. Rows not ``kept``, and kept rows
    whose view is empty, get an empty signature. Report counters:
    ``signed`` (kept rows with at least one shingle), ``no_shingles`` (kept
    rows with an empty view), ``not_kept`` (other statuses), ``word_unit`` and
    ``char_unit`` (signed rows by the unit used). The batch is not modified.
    """
    texts = batch.column("text").to_pylist()
    statuses = batch.column("status").to_pylist()
    key_sets: list[np.ndarray] = []
    report = {"signed": 0, "no_shingles": 0, "not_kept": 0, "word_unit": 0, "char_unit": 0}
    empty = np.empty(0, dtype=np.uint64)
    for text, status in zip(texts, statuses, strict=True):
        if status != schema.KEPT or text is None:
            report["not_kept"] += 1
            key_sets.append(empty)
            continue
        # Every shingle's key, repeats included: a signature is the same for a multiset and its set.
        keys, used = shingle_key_stream(text, unit=config.unit, ngram=config.ngram, seed=config.seed)
        key_sets.append(keys)
        if keys.size == 0:
            report["no_shingles"] += 1
            continue
        report["signed"] += 1
        report["char_unit" if used == CHAR else "word_unit"] += 1
    functions = MultiplyShift(permutations=config.permutations, seed=config.seed)
    return signature_matrix(key_sets, functions), report


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class NearResult:
    """What the clustering barrier found, per document index and in total."""

    cluster: np.ndarray  # int64: index of the representative (own index for singletons)
    near_copy_of: np.ndarray  # int64: representative, or -1
    similarity: np.ndarray  # float64: similarity to the representative, NaN where near_copy_of is -1
    pairs: np.ndarray  # int64 (m, 2): the verified pairs, i < j, sorted
    report: dict[str, int | dict[str, int]]


class _UnionFind:
    """Disjoint sets over 0..n-1: path compression (halving), union by size, smallest member kept."""

    __slots__ = ("_parent", "_size", "_smallest")

    def __init__(self, count: int) -> None:
        self._parent = list(range(count))
        self._size = [1] * count
        self._smallest = list(range(count))

    def find(self, item: int) -> int:
        parent = self._parent
        while parent[item] != item:
            parent[item] = parent[parent[item]]
            item = parent[item]
        return item

    def union(self, first: int, second: int) -> None:
        root_a, root_b = self.find(first), self.find(second)
        if root_a == root_b:
            return
        if self._size[root_a] < self._size[root_b]:
            root_a, root_b = root_b, root_a
        self._parent[root_b] = root_a
        self._size[root_a] += self._size[root_b]
        self._smallest[root_a] = min(self._smallest[root_a], self._smallest[root_b])

    def representatives(self) -> np.ndarray:
        return np.array(
            [self._smallest[self.find(item)] for item in range(len(self._parent))], dtype=np.int64
        )


_SHINGLE_CACHE_DOCUMENTS = 2048


def exact_similarity(pairs: np.ndarray, shingles_of: Callable[[int], np.ndarray]) -> np.ndarray:
    """Exact Jaccard of each pair.

    Shingle sets are kept in a small least-recently-used cache (at most
    2048 documents), so a document in many pairs is shingled once, not once per pair.
    """
    out = np.empty(pairs.shape[0], dtype=np.float64)
    cache: OrderedDict[int, np.ndarray] = OrderedDict()

    def keys_of(index: int) -> np.ndarray:
        found = cache.get(index)
        if found is None:
            found = np.asarray(shingles_of(index), dtype=np.uint64)
            cache[index] = found
            if len(cache) > _SHINGLE_CACHE_DOCUMENTS:
                cache.popitem(last=False)
        else:
            cache.move_to_end(index)
        return found

    for position, (left, right) in enumerate(pairs.tolist()):
        out[position] = exact_jaccard(keys_of(left), keys_of(right))
    return out


class PairWork(Protocol):
    """Where the pair work of :func:`find_clusters` runs: candidates and similarities of pairs.

    Each method must give exactly what the in-process default gives
    (:func:`corpusprep.lsh.candidate_pairs`, :func:`corpusprep.minhash.pair_similarity`
    and the exact Jaccard of shingle sets), whatever it runs on;
    :mod:`corpusprep.barriers` spreads them over an engine's workers.
    """

    def candidates(self, bands: int, rows: int, bucket_limit: int) -> np.ndarray:
        """Candidate pairs (m, 2), ``i < j``, sorted, distinct."""
        ...

    def estimates(self, pairs: np.ndarray) -> np.ndarray:
        """Signature estimate of each pair."""
        ...

    def exact(self, pairs: np.ndarray) -> np.ndarray:
        """Exact Jaccard similarity of the shingle sets of each pair."""
        ...


@dataclasses.dataclass(frozen=True, slots=True)
class _InlineWork:
    signatures: np.ndarray
    shingles_of: Callable[[int], np.ndarray] | None

    def candidates(self, bands: int, rows: int, bucket_limit: int) -> np.ndarray:
        return candidate_pairs(self.signatures, bands, rows, bucket_limit=bucket_limit)

    def estimates(self, pairs: np.ndarray) -> np.ndarray:
        return pair_similarity(self.signatures, pairs[:, 0], pairs[:, 1])

    def exact(self, pairs: np.ndarray) -> np.ndarray:
        assert self.shingles_of is not None
        return exact_similarity(pairs, self.shingles_of)


def find_clusters(
    signatures: np.ndarray,
    config: NearConfig,
    *,
    shingles_of: Callable[[int], np.ndarray] | None = None,
    work: PairWork | None = None,
) -> NearResult:
    """The clustering barrier: candidates, verification, union-find, per-document result.

    ``signatures`` is the (documents, permutations) ``uint32`` store (array or
    ``np.memmap``); it is read band by band and pair by pair, never copied
    whole. ``shingles_of(i)`` must be given when ``verify = "exact"``, unless
    ``work`` is given: then the candidates and similarities come from it (for
    instance from an engine's workers), and only the union-find and the
    per-document result are computed here.
    """
    if signatures.ndim != 2 or signatures.shape[1] != config.permutations:
        raise ValueError(
            f"signatures of shape {signatures.shape} do not match near.permutations = {config.permutations}"
        )
    if config.verify == "exact" and shingles_of is None and work is None:
        raise ValueError("near.verify = 'exact' needs shingles_of, the shingle keys of document i")
    count = signatures.shape[0]
    bands, rows = resolve_bands(config)
    work = work or _InlineWork(signatures, shingles_of)
    candidates = work.candidates(bands, rows, config.bucket_limit)
    estimate = work.estimates(candidates)
    if config.verify == "signature":
        verified = candidates[estimate >= config.threshold]
    else:
        margin = 4.0 * math.sqrt(config.threshold * (1.0 - config.threshold) / config.permutations)
        sure = estimate >= config.threshold + margin
        unsure = candidates[(estimate >= config.threshold - margin) & ~sure]
        checked = unsure[work.exact(unsure) >= config.threshold]
        verified = np.concatenate([candidates[sure], checked]) if checked.size else candidates[sure]
        verified = verified[np.lexsort((verified[:, 1], verified[:, 0]))] if verified.size else verified

    sets = _UnionFind(count)
    for left, right in verified.tolist():
        sets.union(left, right)
    cluster = sets.representatives() if count else np.empty(0, dtype=np.int64)
    indices = np.arange(count, dtype=np.int64)
    copies = cluster != indices
    near_copy_of = np.where(copies, cluster, -1).astype(np.int64)
    similarity = np.full(count, np.nan, dtype=np.float64)
    copy_index = indices[copies]
    to_representative = np.stack([cluster[copies], copy_index], axis=1)
    if config.verify == "signature":
        similarity[copy_index] = work.estimates(to_representative)
    elif copy_index.size:
        similarity[copy_index] = work.exact(to_representative)

    sizes = np.bincount(cluster, minlength=count) if count else np.empty(0, dtype=np.int64)
    grouped = sizes[sizes >= 2]
    histogram_sizes, histogram_counts = np.unique(grouped, return_counts=True)
    report: dict[str, int | dict[str, int]] = {
        "permutations": config.permutations,
        "bands": bands,
        "rows": rows,
        "candidates": int(candidates.shape[0]),
        "verified": int(verified.shape[0]),
        "clusters": int(grouped.size),
        "documents_in_clusters": int(grouped.sum()),
        "near_copies": int(copies.sum()),
        "cluster_sizes": {
            str(int(s)): int(c) for s, c in zip(histogram_sizes, histogram_counts, strict=True)
        },
    }
    return NearResult(
        cluster=cluster, near_copy_of=near_copy_of, similarity=similarity, pairs=verified, report=report
    )


def mark_near_copies(
    batch: pa.RecordBatch, first_index: int, result: NearResult, config: NearConfig
) -> tuple[pa.RecordBatch, dict[str, int]]:
    """Apply the barrier's result to a batch whose row 0 is document ``first_index``.

    With ``action = "remove"``, kept rows that are near copies get status and
    reason ``near_copy`` and a null text; with ``"cluster"`` the batch is
    returned unchanged. Report: ``near_copy`` (rows marked). A new batch is
    returned; the input is not modified.
    """
    stop = first_index + batch.num_rows
    if first_index < 0 or stop > result.near_copy_of.size:
        raise ValueError(
            f"rows {first_index}..{stop - 1} lie outside the {result.near_copy_of.size} documents"
        )
    if config.action == "cluster" or batch.num_rows == 0:
        return batch, {"near_copy": 0}
    kept = [status == schema.KEPT for status in batch.column("status").to_pylist()]
    copies = result.near_copy_of[first_index:stop].tolist()
    flags = [is_kept and copy_of >= 0 for is_kept, copy_of in zip(kept, copies, strict=True)]
    marked = pa.array(flags, type=pa.bool_())
    columns = {name: batch.column(name) for name in batch.schema.names}
    columns["status"] = pc.if_else(marked, pa.scalar(schema.NEAR_COPY), columns["status"])
    columns["reason"] = pc.if_else(marked, pa.scalar(schema.NEAR_COPY), columns["reason"])
    columns["text"] = pc.if_else(marked, pa.scalar(None, type=pa.large_string()), columns["text"])
    out = pa.RecordBatch.from_arrays([columns[name] for name in batch.schema.names], schema=batch.schema)
    return out, {"near_copy": sum(flags)}
