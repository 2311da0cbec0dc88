"""The leakage half of the audit: does anything of validation or test also sit in train?

Checks on the output alone (each only when the files it reads passed the
integrity checks):

``shared_text_hash``
    kept documents in two splits with the same ledger ``text_hash`` (XXH3-128
    of the cleaned text);
``group_across_splits`` / ``cluster_across_splits``
    a ledger ``group`` or near-duplicate ``cluster`` with kept members in two
    splits;
``near_copy_across_splits``
    MinHash near copies found afresh: the rows of ``signatures.npy`` (one per
    kept ledger row, in ledger order) go through LSH with the run's bands and
    rows (:func:`corpusprep.lsh.candidate_pairs`); a candidate pair of two
    splits whose signature estimate is >= ``near.threshold`` is a finding;
``shared_ngram``
    a validation or test document sharing at least one word n-gram (13 by
    default, Brown et al. 2020 App. C, from memory) with train; see
    :mod:`corpusprep.ngrams`. The token stream of each split is rebuilt from
    its shards; the evaluation side's distinct n-gram hashes are held in a hash
    table behind a bit filter (:class:`corpusprep.ngrams.NgramSet`), and train is
    streamed through memory-mapped shards in chunks, so memory follows the
    evaluation side, not train.

Against an outside evaluation set (``against_*`` kinds): each item is cleaned
with the output's clean settings, then compared with train by exact text hash,
by MinHash near copy (same settings, LSH query against the train signatures,
verified by signature estimate) and by shared n-gram.

A ``stream_mismatch`` (damage) is reported when the documents found in a
split's token stream do not have the token counts the ledger gives, in the
packing order of :func:`corpusprep.pack.document_order`.
"""

from __future__ import annotations

import queue
import time
from collections import defaultdict, deque
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa

from corpusprep.audit_integrity import DAMAGE, LEAKAGE, OVERLAP, Finding, ShardFile
from corpusprep.lsh import band_keys, candidate_pairs
from corpusprep.minhash import EMPTY_VALUE, pair_similarity
from corpusprep.ngrams import (
    HashedChunk,
    NgramSet,
    StreamTables,
    complete_documents,
    document_count,
    hash_stream_chunk,
    hash_texts,
    scan_chunk,
)
from corpusprep.pack import document_order
from corpusprep.schema import KEPT

__all__ = [
    "EVALUATION_SPLITS",
    "NgramResult",
    "kept_rows",
    "near_across_splits",
    "ngram_overlap",
    "packed_rows",
    "query_near",
    "shared_keys",
    "split_stream",
]

EVALUATION_SPLITS = ("validation", "test")
Progress = Callable[[str, int, "int | None"], None]


def _leak(kind: str, message: str, **details: Any) -> Finding:
    return Finding(kind=kind, severity=LEAKAGE, message=message, details=details)


def kept_rows(ledger: pa.Table) -> np.ndarray:
    """Ledger row numbers of the kept documents, in ledger order."""
    status = np.asarray(ledger.column("status").to_pylist(), dtype=object)
    return np.flatnonzero(status == KEPT)


def shared_keys(ledger: pa.Table, column: str, kind: str) -> list[Finding]:
    """Values of ``column`` held by kept documents of two or more splits."""
    splits: dict[str, set[str]] = defaultdict(set)
    members: dict[str, list[dict[str, str]]] = defaultdict(list)
    rows = ledger.select(["record_id", "status", "split", column]).to_pylist()
    for row in rows:
        value = row[column]
        if row["status"] != KEPT or value is None:
            continue
        splits[value].add(row["split"])
        members[value].append({"record_id": row["record_id"], "split": row["split"]})
    found = []
    for value in sorted(splits):
        if len(splits[value]) > 1:
            names = ", ".join(sorted(splits[value]))
            found.append(
                _leak(
                    kind,
                    f"{column} {value!r} has kept documents in {names}",
                    key=value,
                    documents=members[value],
                )
            )
    return found


def near_across_splits(
    signatures: np.ndarray, ledger: pa.Table, *, bands: int, rows: int, threshold: float, bucket_limit: int
) -> tuple[list[Finding], dict[str, int]]:
    """Near copies between splits among the kept documents, found afresh by LSH on their signatures."""
    kept = kept_rows(ledger)
    split_of = np.asarray(ledger.column("split").to_pylist(), dtype=object)[kept]
    record_of = np.asarray(ledger.column("record_id").to_pylist(), dtype=object)[kept]
    pairs = candidate_pairs(signatures, bands, rows, bucket_limit=bucket_limit)
    across = pairs[split_of[pairs[:, 0]] != split_of[pairs[:, 1]]] if pairs.size else pairs
    similarity = pair_similarity(signatures, across[:, 0], across[:, 1])
    verified = np.flatnonzero(similarity >= threshold)
    found = [
        _leak(
            "near_copy_across_splits",
            f"{record_of[left]} ({split_of[left]}) and {record_of[right]} ({split_of[right]}) are near "
            f"copies (signature estimate {similarity[index]:.3f} >= {threshold})",
            documents=[
                {"record_id": record_of[left], "split": split_of[left]},
                {"record_id": record_of[right], "split": split_of[right]},
            ],
            similarity=float(similarity[index]),
        )
        for index in verified.tolist()
        for left, right in [across[index].tolist()]
    ]
    return found, {"candidates": len(pairs), "across_splits": len(across), "verified": len(found)}


def query_near(
    train: np.ndarray,
    queries: np.ndarray,
    *,
    bands: int,
    rows: int,
    threshold: float,
    chunk_rows: int = 65536,
) -> list[tuple[int, int, float]]:
    """``(train_row, query_row, estimate)`` for query signatures near a train signature store.

    Each band's keys (:func:`corpusprep.lsh.band_keys`) of the queries are
    sorted once; the train store (may be a ``np.memmap``) is read in chunks
    and looked up with ``np.searchsorted``. Candidates are verified by the
    signature estimate; empty signatures take part in nothing.
    """
    live = np.flatnonzero(~np.all(queries == EMPTY_VALUE, axis=1))
    codes: list[np.ndarray] = []
    for band in range(bands):
        columns = slice(band * rows, (band + 1) * rows)
        query_keys = band_keys(queries[live, columns], band)
        order = np.argsort(query_keys, kind="stable")
        sorted_keys = query_keys[order]
        for begin in range(0, train.shape[0], chunk_rows):
            block = np.asarray(train[begin : begin + chunk_rows])
            nonempty = np.flatnonzero(~np.all(block == EMPTY_VALUE, axis=1))
            keys = band_keys(block[nonempty][:, columns], band)
            low = np.searchsorted(sorted_keys, keys, side="left")
            high = np.searchsorted(sorted_keys, keys, side="right")
            counts = high - low
            if not counts.any():
                continue
            train_rows = np.repeat(nonempty + begin, counts)
            offsets = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
            query_rows = live[order[np.repeat(low, counts) + offsets]]
            codes.append((train_rows.astype(np.uint64) << np.uint64(32)) | query_rows.astype(np.uint64))
    if not codes:
        return []
    unique = np.unique(np.concatenate(codes))
    train_rows = (unique >> np.uint64(32)).astype(np.int64)
    query_rows = (unique & np.uint64(0xFFFFFFFF)).astype(np.int64)
    equal = np.count_nonzero(np.asarray(train[train_rows]) == queries[query_rows], axis=1)
    estimate = equal / train.shape[1]
    keep = np.flatnonzero(estimate >= threshold)
    return [(int(train_rows[i]), int(query_rows[i]), float(estimate[i])) for i in keep.tolist()]


# --------------------------------------------------------------------------- token streams
def split_stream(shards: Sequence[ShardFile], *, pad_id: int, chunk_rows: int) -> Iterator[np.ndarray]:
    """The token stream of a split, rebuilt from its shards chunk by chunk.

    Consecutive windows share one token (window ``k`` is
    ``stream[k*L : k*L + L + 1]``), so the stream is the first window followed
    by every window without its first token. Pad ids at the very end (the
    padded last window) are not part of the stream.
    """
    last_shard = len(shards) - 1
    for number, shard in enumerate(shards):
        array = np.load(shard.path, mmap_mode="r", allow_pickle=False)
        for begin in range(0, shard.rows, chunk_rows):
            block = np.asarray(array[begin : begin + chunk_rows])
            tokens = block[:, 1:].ravel()
            if number == 0 and begin == 0:
                tokens = np.concatenate((block[0, :1], tokens))
            if number == last_shard and begin + chunk_rows >= shard.rows:
                real = np.flatnonzero(tokens != pad_id)
                tokens = tokens[: int(real[-1]) + 1] if real.size else tokens[:0]
            yield tokens
        del array


def packed_rows(ledger: pa.Table, split: str, seed: int) -> np.ndarray:
    """Ledger rows of the documents of ``split`` in packing order (stream position -> ledger row)."""
    status = np.asarray(ledger.column("status").to_pylist(), dtype=object)
    names = np.asarray(ledger.column("split").to_pylist(), dtype=object)
    rows = np.flatnonzero((status == KEPT) & (names == split))
    ordered: np.ndarray = rows[document_order(len(rows), seed, split)]
    return ordered


class _TrainScan:
    """Chunks of the train stream looked up in ``members`` by ``workers`` threads, lengths in order.

    Iterating yields the document lengths of each chunk in stream order; then
    :meth:`first_train` gives, per evaluation n-gram, the first train document that
    holds it (-1: none). At most ``2 * workers`` chunks are in flight.
    """

    def __init__(
        self, chunks: Iterator[np.ndarray], tables: StreamTables, ngram: int, members: NgramSet, workers: int
    ) -> None:
        self.chunks, self.tables, self.ngram, self.members, self.workers = (
            chunks,
            tables,
            ngram,
            members,
            workers,
        )
        self.tables_free: queue.SimpleQueue[np.ndarray] = queue.SimpleQueue()
        self.tables_all = [members.new_marks() for _ in range(workers)]
        for table in self.tables_all:
            self.tables_free.put(table)

    def _one(self, tokens: np.ndarray, base: int) -> np.ndarray:
        table = self.tables_free.get()
        try:
            return scan_chunk(tokens, self.tables, self.ngram, self.members, table, base)
        finally:
            self.tables_free.put(table)

    def __iter__(self) -> Iterator[np.ndarray]:
        if self.workers == 1:
            base = 0
            for tokens in self.chunks:
                lengths = self._one(tokens, base)
                base += lengths.size
                yield lengths
            return
        end = self.tables.end_of_document
        with ThreadPoolExecutor(max_workers=self.workers, thread_name_prefix="ngram-scan") as pool:
            pending: deque[Future[np.ndarray]] = deque()
            base = 0
            for tokens in self.chunks:
                pending.append(pool.submit(self._one, tokens, base))
                base += document_count(tokens, end)
                while len(pending) >= 2 * self.workers:
                    yield pending.popleft().result()
            while pending:
                yield pending.popleft().result()

    def first_train(self) -> np.ndarray:
        return self.members.first_documents(*self.tables_all)


def _runs(values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Value, first index and length of each run of equal values (``np.unique`` of a sorted array).

    >>> [part.tolist() for part in _runs(np.array([4, 4, 7, 9, 9, 9]))]
    [[4, 7, 9], [0, 2, 3], [2, 1, 3]]
    """
    if not values.size:
        empty = np.zeros(0, dtype=np.int64)
        return values[:0], empty, empty
    starts = np.flatnonzero(np.concatenate(([True], values[1:] != values[:-1])))
    return values[starts], starts, np.diff(np.append(starts, values.size))


@dataclass(frozen=True, slots=True, kw_only=True)
class _Side:
    """One evaluation source: a split of the output, or the outside items."""

    name: str
    kind: str
    record_ids: list[str]


@dataclass(frozen=True, slots=True, kw_only=True)
class NgramResult:
    """Findings and statistics of the n-gram check."""

    findings: list[Finding]
    statistics: dict[str, Any]


class _Scan:
    """The stream tables and settings shared by every pass of :func:`ngram_overlap`."""

    def __init__(self, tables: StreamTables, ngram: int, pad_id: int, chunk_rows: int) -> None:
        self.tables, self.ngram, self.pad_id, self.chunk_rows = tables, ngram, pad_id, chunk_rows

    def documents(self, shards: Sequence[ShardFile]) -> Iterator[np.ndarray]:
        stream = split_stream(shards, pad_id=self.pad_id, chunk_rows=self.chunk_rows)
        yield from complete_documents(stream, self.tables.end_of_document)

    def chunks(self, shards: Sequence[ShardFile]) -> Iterator[HashedChunk]:
        for tokens in self.documents(shards):
            yield hash_stream_chunk(tokens, self.tables, self.ngram)


def _stream_findings(
    split: str, lengths: np.ndarray, expected: np.ndarray, record_ids: list[str], tail: str
) -> list[Finding]:
    partial_allowed = tail == "drop"
    if lengths.size == expected.size and np.array_equal(lengths, expected):
        return []
    if partial_allowed and 0 < lengths.size <= expected.size:
        head = lengths.size - 1
        if np.array_equal(lengths[:head], expected[:head]) and lengths[head] <= expected[head]:
            return []
    common = min(lengths.size, expected.size)
    differ = np.flatnonzero(lengths[:common] != expected[:common])
    where = int(differ[0]) if differ.size else common
    record = record_ids[where] if where < len(record_ids) else None
    return [
        Finding(
            kind="stream_mismatch",
            severity=DAMAGE,
            message=(
                f"split {split}: the shards hold {lengths.size} documents, the ledger {expected.size}; "
                f"first difference at packed document {where} (ledger record {record})"
            ),
            details={
                "split": split,
                "position": where,
                "record_id": record,
                "expected": int(expected[where]) if where < expected.size else None,
                "found": int(lengths[where]) if where < lengths.size else None,
            },
        )
    ]


def ngram_overlap(
    *,
    shards: dict[str, list[ShardFile]],
    packed: dict[str, np.ndarray],
    ledger: pa.Table,
    tables: StreamTables,
    ngram: int,
    pad_id: int,
    tail: str,
    against: Sequence[tuple[str, str]] = (),
    chunk_rows: int = 4096,
    train_total: int | None = None,
    progress: Progress | None = None,
    contaminated_at: float = 0.0,
    workers: int = 1,
) -> NgramResult:
    """Long n-gram overlap of validation, test and the outside items with train.

    ``shards`` maps each split to its verified shards, ``packed`` each split to
    its ledger rows in packing order, ``against`` holds ``(item_id, cleaned
    text)`` pairs; ``train_total`` (train tokens, for the progress bar) may be None.
    Also checks each split's documents against the ledger's
    token counts (``stream_mismatch``).

    A validation or test document sharing n-grams with train is *contaminated*
    (severity leakage) when at least ``contaminated_at`` of its n-gram positions
    occur in train, else the finding is an *overlap* note (reported, not
    failing). ``contaminated_at = 0`` makes any shared n-gram contamination,
    the rule of Brown et al. 2020, App. C (from memory). Outside items
    (``against``) always follow that rule: any shared n-gram is leakage.
    """
    report = progress or (lambda stage, done, total: None)
    scan = _Scan(tables, ngram, pad_id, chunk_rows)
    record_ids = np.asarray(ledger.column("record_id").to_pylist(), dtype=object)
    ledger_tokens = np.asarray([value or 0 for value in ledger.column("tokens").to_pylist()], dtype=np.int64)
    findings: list[Finding] = []
    sides = [
        _Side(name=split, kind="shared_ngram", record_ids=record_ids[packed[split]].tolist())
        for split in EVALUATION_SPLITS
        if split in shards
    ]
    if against:
        sides.append(_Side(name="against", kind="against_ngram", record_ids=[item for item, _ in against]))

    def side_chunks(side: _Side) -> Iterator[HashedChunk]:
        if side.name == "against":
            for begin in range(0, len(against), 1024):
                yield hash_texts([text for _, text in against[begin : begin + 1024]], ngram)
        else:
            yield from scan.chunks(shards[side.name])

    # Pass 1: the evaluation side's distinct n-gram hashes, and the stream check of those splits.
    clock = [time.perf_counter()]
    held: dict[str, list[HashedChunk]] = {}  # the evaluation side is kept for pass 3
    for side in sides:
        held[side.name] = list(side_chunks(side))
        if side.name != "against":
            lengths = [chunk.lengths for chunk in held[side.name]]
            found = np.concatenate(lengths) if lengths else np.zeros(0, np.int64)
            findings += _stream_findings(
                side.name, found, ledger_tokens[packed[side.name]], side.record_ids, tail
            )
    every = [chunk.hashes for side in sides for chunk in held[side.name]]
    members = NgramSet(np.concatenate(every) if every else np.zeros(0, np.uint64))
    where = members.index

    # Pass 2: stream train; remember the first train document holding each evaluation n-gram.
    clock.append(time.perf_counter())
    train_documents = 0
    train_tokens = 0
    train_lengths = []
    scanned = _TrainScan(scan.documents(shards.get("train", [])), tables, ngram, members, workers)
    for counts in scanned:
        train_documents += counts.size
        train_tokens += int(counts.sum())
        train_lengths.append(counts)
        report("n-grams", train_tokens, train_total)
    first_train = scanned.first_train()
    if "train" in shards:
        found = np.concatenate(train_lengths) if train_lengths else np.zeros(0, np.int64)
        train_ids = record_ids[packed["train"]].tolist()
        findings += _stream_findings("train", found, ledger_tokens[packed["train"]], train_ids, tail)
    train_record = record_ids[packed["train"]].tolist() if "train" in packed else []

    # Pass 3: which evaluation documents hold a matched n-gram; one example n-gram each.
    clock.append(time.perf_counter())
    statistics: dict[str, Any] = {
        "ngram": ngram,
        "train_documents": train_documents,
        "train_tokens": train_tokens,
        "evaluation_distinct_ngrams": int(members.values.size),
        "matched_distinct_ngrams": int(np.count_nonzero(first_train >= 0)),
        "contaminated_at": contaminated_at,
        "sides": {},
    }
    offset = 0
    for side in sides:
        documents = tested = flagged = contaminated_documents = 0
        for chunk in held.pop(side.name):
            train_of = first_train[where[offset : offset + chunk.hashes.size]]
            offset += chunk.hashes.size
            owner = chunk.document[chunk.first_word]
            tested += int(np.count_nonzero(np.diff(owner)) + 1) if owner.size else 0
            matched = np.flatnonzero(train_of >= 0)  # owner is non-decreasing: n-grams come in word order
            all_owners, _, all_counts = _runs(owner)
            positions = dict(zip(all_owners.tolist(), all_counts.tolist(), strict=True))
            owners, starts, counts = _runs(owner[matched])
            examples = matched[starts]
            for document, example, train_document, count in zip(
                owners.tolist(), examples.tolist(), train_of[examples].tolist(), counts.tolist(), strict=True
            ):
                fraction = count / positions[document]
                contaminated = side.name == "against" or fraction >= contaminated_at
                record = side.record_ids[documents + document]
                text = chunk.ngram_text(example)
                findings.append(
                    Finding(
                        kind=side.kind,
                        severity=LEAKAGE if contaminated else OVERLAP,
                        message=f"{record} ({side.name}) shares {count} {ngram}-gram(s) with train "
                        f"({fraction:.0%} of its {ngram}-grams), e.g. {text!r} "
                        f"(also in {train_record[train_document]})",
                        details={
                            "split": side.name,
                            "record_id": record,
                            "shared_ngrams": int(count),
                            "shared_fraction": round(fraction, 4),
                            "contaminated": contaminated,
                            "ngram_text": text,
                            "train_record_id": train_record[train_document],
                        },
                    )
                )
                flagged += 1
                contaminated_documents += int(contaminated)
            documents += chunk.documents
        statistics["sides"][side.name] = {
            "documents": documents,
            "documents_with_ngrams": tested,
            "documents_sharing_ngrams": flagged,
            "fraction": flagged / documents if documents else 0.0,
            "documents_contaminated": contaminated_documents,
            "fraction_contaminated": contaminated_documents / documents if documents else 0.0,
        }
    clock.append(time.perf_counter())
    statistics["pass_seconds"] = {
        name: round(end - start, 3)
        for name, start, end in zip(("evaluation", "train", "flagging"), clock, clock[1:], strict=False)
    }
    return NgramResult(findings=findings, statistics=statistics)
