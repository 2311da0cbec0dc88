"""The global steps cut into engine tasks give exactly what the one-piece functions give.

References named beside the checks:

- :func:`corpusprep.exact.first_occurrences`, itself checked in ``tests/test_exact.py`` against
  a plain dictionary of first rows;
- :func:`corpusprep.lsh.candidate_pairs` and :func:`corpusprep.minhash.pair_similarity`, checked
  in ``tests/test_lsh.py`` against brute-force band comparison and in ``tests/test_minhash.py``
  against datasketch;
- :func:`corpusprep.pack.pack_split`, checked in ``tests/test_pack.py`` against the definition
  of shifted next-token windows (every stream token but the first is a target once);
- Python's ``map``: a mapper that runs the tasks in reverse and then restores input order stands
  for an engine whose workers answer in any order.

Hypothesis draws the inputs; the task sizes are forced small so that every input is cut into
many tasks.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from corpusprep.barriers import MappedPairWork, SignatureStore, first_occurrences_mapped
from corpusprep.errors import IntegrityError
from corpusprep.exact import first_occurrences
from corpusprep.lsh import candidate_pairs
from corpusprep.minhash import EMPTY_VALUE, pair_similarity
from corpusprep.near import NearConfig, document_shingles, exact_similarity
from corpusprep.pack import PackConfig, pack_split, pack_split_mapped
from corpusprep.schema import DOC_SCHEMA


class _Recorder:
    """A mapper that runs every task (in reverse order, results put back in input order) and counts them."""

    def __init__(self) -> None:
        self.tasks: dict[str, int] = {}

    def __call__(self, function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        listed = list(items)
        name = getattr(function, "__name__", "?")
        self.tasks[name] = self.tasks.get(name, 0) + len(listed)
        results = [function(item) for item in reversed(listed)]
        return iter(reversed(results))


# ---------------------------------------------------------------------------- exact duplicates


@settings(max_examples=60, deadline=None)
@given(
    keys=st.lists(st.integers(0, 5), min_size=0, max_size=60),
    mask=st.lists(st.booleans(), min_size=60, max_size=60),
    partition_rows=st.integers(1, 8),
)
def test_exact_partitions_find_the_same_first_occurrences(
    keys: list[int], mask: list[bool], partition_rows: int
) -> None:
    # Few distinct values, so most rows are copies; the second half of the key varies with the first.
    table = np.array([[value * 7919, value] for value in keys], dtype=np.uint64).reshape(-1, 2)
    candidates = np.array(mask[: len(keys)], dtype=bool)
    mapper = _Recorder()
    found = first_occurrences_mapped(table, candidates, mapper, partition_rows=partition_rows)
    assert found.tolist() == first_occurrences(table, candidates).tolist()
    if candidates.sum() > partition_rows:
        assert mapper.tasks["_exact_partition"] > 1


# ---------------------------------------------------------------------------- LSH and pair checks


def _store(tmp_path: Path, signatures: np.ndarray) -> SignatureStore:
    path = tmp_path / "signatures.raw"
    path.write_bytes(np.ascontiguousarray(signatures).tobytes())
    return SignatureStore(str(path), signatures.dtype.str, signatures.shape[0], signatures.shape[1])


def _staged_documents(tmp_path: Path, texts: list[str | None]) -> Path:
    """A staged-documents file with only the text column filled in (the tasks read nothing else)."""
    columns = {
        field.name: pa.array(
            [text for text in texts] if field.name == "text" else [None] * len(texts), field.type
        )
        for field in DOC_SCHEMA
    }
    path = tmp_path / "documents.arrow"
    with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, DOC_SCHEMA) as writer:
        table = pa.table(columns, schema=DOC_SCHEMA)
        for batch in table.to_batches(max_chunksize=3):
            writer.write_batch(batch)
    return path


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    data=st.lists(st.lists(st.integers(0, 3), min_size=16, max_size=16), min_size=0, max_size=40),
    empty=st.sets(st.integers(0, 39)),
    band_tasks=st.integers(1, 5),
    bucket_limit=st.integers(2, 4),
)
def test_band_tasks_find_the_same_candidates_and_estimates(
    tmp_path: Path, data: list[list[int]], empty: set[int], band_tasks: int, bucket_limit: int
) -> None:
    signatures = np.array(data, dtype=np.uint32).reshape(-1, 16)
    for row in empty:
        if row < len(signatures):
            signatures[row] = EMPTY_VALUE
    config = NearConfig(permutations=16, bands=8, rows=2, threshold=0.5, verify="signature")
    work = MappedPairWork(
        _Recorder(), _store(tmp_path, signatures), documents="", rows=np.arange(len(signatures)),
        config=config, band_tasks=band_tasks, pairs_per_task=3,
    )  # fmt: skip
    expected = candidate_pairs(signatures, 8, 2, bucket_limit=bucket_limit)
    found = work.candidates(8, 2, bucket_limit)
    assert found.tolist() == expected.tolist()
    assert (
        work.estimates(found).tolist() == pair_similarity(signatures, expected[:, 0], expected[:, 1]).tolist()
    )


def test_exact_pair_tasks_read_the_staged_texts_by_row(tmp_path: Path) -> None:
    # Rows 1, 3 and 4 of the staged file are the signed documents 0, 1 and 2.
    texts = [
        None,
        "the ferry leaves the north pier at seven every morning",
        "rejected line",
        "the ferry leaves the north pier at eight every morning",
        "timetables are posted at the harbour office",
    ]
    config = NearConfig(unit="word", ngram=2, threshold=0.5)
    rows = np.array([1, 3, 4])
    staged = str(_staged_documents(tmp_path, texts))
    work = MappedPairWork(
        _Recorder(), SignatureStore("", "<u4", 0, config.permutations), documents=staged, rows=rows,
        config=config, exact_pairs_per_task=1,
    )  # fmt: skip
    pairs = np.array([[0, 1], [0, 2], [1, 2]])
    expected = exact_similarity(pairs, lambda i: document_shingles(texts[int(rows[i])] or "", config))
    assert work.exact(pairs).tolist() == expected.tolist()
    assert work.exact(np.zeros((0, 2), dtype=np.int64)).tolist() == []


def test_a_task_that_cannot_see_the_work_folder_says_so(tmp_path: Path) -> None:
    store = SignatureStore(str(tmp_path / "elsewhere" / "signatures.raw"), "<u4", 3, 8)
    with pytest.raises(IntegrityError, match="every worker mounts at the same path"):
        store.open()


# ---------------------------------------------------------------------------- packing


def _files(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    lengths=st.lists(st.integers(0, 30), min_size=0, max_size=25),
    length=st.integers(1, 9),
    windows_per_shard=st.integers(1, 5),
    tail=st.sampled_from(["drop", "pad"]),
    bod=st.booleans(),
    starts=st.booleans(),
    seed=st.integers(0, 3),
)
def test_shard_tasks_write_the_same_files_as_the_streaming_packer(
    tmp_path_factory: pytest.TempPathFactory,
    lengths: list[int],
    length: int,
    windows_per_shard: int,
    tail: str,
    bod: bool,
    starts: bool,
    seed: int,
) -> None:
    from corpusprep.pack import document_order, write_document_starts

    work = tmp_path_factory.mktemp("pack")
    rng = np.random.default_rng(seed)
    ids = rng.integers(0, 250, size=sum(lengths), dtype=np.uint16)
    raw = work / "tokens.raw"
    raw.write_bytes(ids.tobytes())
    offsets = (
        np.concatenate(([0], np.cumsum(lengths)[:-1])).astype(np.int64) if lengths else np.zeros(0, np.int64)
    )
    counts = np.array(lengths, dtype=np.int64)
    config = PackConfig(length=length, windows_per_shard=windows_per_shard, tail=tail, document_starts=starts)
    order = document_order(len(lengths), seed, "train")
    specials = {"eod_id": 256, "pad_id": 257, "bod_id": 258 if bod else None}
    one, many = work / "one", work / "many"
    one.mkdir()
    many.mkdir()
    expected = pack_split(
        "train", (ids[offsets[i] : offsets[i] + counts[i]] for i in order.tolist()), config=config,
        dtype=np.dtype("<u2"), folder=one, **specials,
    )  # fmt: skip
    expected_starts = (
        write_document_starts(one, [s.file for s in expected.shards], length=length, eod_id=256)
        if starts
        else {}
    )
    found, found_starts = pack_split_mapped(
        "train", raw, offsets, counts, order, config=config, dtype=np.dtype("<u2"), folder=many,
        mapper=_Recorder(), **specials,
    )  # fmt: skip
    assert found == expected
    assert found_starts == expected_starts
    assert _files(many) == _files(one)


def test_a_shard_task_that_cannot_see_the_shard_folder_says_so(tmp_path: Path) -> None:
    raw = tmp_path / "tokens.raw"
    raw.write_bytes(np.arange(40, dtype=np.uint16).tobytes())
    with pytest.raises(IntegrityError, match="cannot see the output's shard folder"):
        pack_split_mapped(
            "train", raw, np.array([0]), np.array([40]), np.array([0]), config=PackConfig(length=4),
            eod_id=256, pad_id=257, bod_id=None, dtype=np.dtype("<u2"), folder=tmp_path / "missing",
            mapper=_Recorder(),
        )  # fmt: skip


def test_a_first_pass_task_that_cannot_see_the_work_folder_says_so(tmp_path: Path) -> None:
    from corpusprep.batchwork import StageTask, stage_inputs
    from corpusprep.clean import CleanConfig
    from corpusprep.exact import ExactConfig
    from corpusprep.read import ReadConfig

    task = StageTask(
        index=0, entries=(), root_real=str(tmp_path), read=ReadConfig(), clean=CleanConfig(),
        exact=ExactConfig(), near=NearConfig(), folder=str(tmp_path / "not-mounted"), batch_rows=16,
        batch_text_bytes=1 << 20,
    )  # fmt: skip
    with pytest.raises(IntegrityError, match="every worker mounts at the same path"):
        stage_inputs(task)
