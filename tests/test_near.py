"""Near-duplicate stage: settings, signature batches, the clustering barrier, accuracy on real text."""

from __future__ import annotations

import itertools
import math
import random
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from corpusprep import schema
from corpusprep.config import setting_docs
from corpusprep.errors import DefinitionError
from corpusprep.lsh import candidate_probability
from corpusprep.minhash import EMPTY_VALUE, MultiplyShift, signature_matrix
from corpusprep.near import (
    NearConfig,
    document_shingles,
    find_clusters,
    mark_near_copies,
    resolve_bands,
    signature_batch,
)
from corpusprep.shingles import exact_jaccard

LICENCES = Path(__file__).resolve().parent.parent / "fixtures" / "licences"
PYTHON_DOCS = Path("/usr/share/doc/python3.11-doc/html/_sources")


def licence(name: str) -> str:
    return (LICENCES / f"{name}.txt").read_text(encoding="utf-8")


def make_batch(texts: list[str | None], statuses: list[str] | None = None) -> pa.RecordBatch:
    statuses = statuses or [schema.KEPT if t is not None else schema.REJECTED for t in texts]
    rows = [
        {
            "record_id": f"doc{i}",
            "source": f"doc{i}.txt",
            "line": None,
            "given_id": None,
            "group": None,
            "text": text,
            "status": status,
            "reason": None if status == schema.KEPT else "invalid_json",
        }
        for i, (text, status) in enumerate(zip(texts, statuses, strict=True))
    ]
    return pa.RecordBatch.from_pylist(rows, schema=schema.DOC_SCHEMA)


def edit_words(text: str, rate: float, rng: random.Random) -> str:
    """Replace, delete or insert a word at each word with probability ``rate`` (seeded)."""
    words = text.split(" ")
    vocabulary = [w for w in words if w]
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


# ---------------------------------------------------------------- settings


def test_every_setting_is_documented_with_an_allowed_type() -> None:
    docs = setting_docs(NearConfig)
    assert [d.key for d in docs][:3] == ["enabled", "unit", "ngram"]
    for row in docs:
        assert row.doc, row.key
        assert row.type_name in ("bool", "int", "float", "str"), row.key


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"threshold": 1.3}, r"near\.threshold = 1\.3: must be between 0 and 1"),
        ({"unit": "syllable"}, r"near\.unit = 'syllable'"),
        ({"verify": "maybe"}, r"near\.verify = 'maybe'"),
        ({"action": "drop"}, r"near\.action = 'drop'"),
        (
            {"permutations": 128, "bands": 20, "rows": 7},
            r"20 \* 7 = 140: must not exceed near\.permutations = 128",
        ),
        ({"ngram": 0}, r"near\.ngram = 0"),
        ({"bucket_limit": 1}, r"near\.bucket_limit = 1"),
        ({"seed": -1}, r"near\.seed = -1"),
    ],
)
def test_bad_settings_name_the_key(changes: dict[str, object], message: str) -> None:
    with pytest.raises(DefinitionError, match=message):
        NearConfig(**changes)  # type: ignore[arg-type]


def test_config_is_frozen() -> None:
    config = NearConfig()
    with pytest.raises(AttributeError):
        config.threshold = 0.5  # type: ignore[misc]


def test_bands_and_rows_resolve_without_swapping() -> None:
    # Lee et al. 2022 setting (REFERENCES 3.1): 9000 permutations, 450 bands of 20 rows.
    bands, rows = resolve_bands(NearConfig(permutations=9000, bands=450, rows=20))
    assert (bands, rows) == (450, 20)
    assert float(candidate_probability(0.8, bands, rows)) > 0.99
    assert float(candidate_probability(0.5, bands, rows)) < 0.001
    assert resolve_bands(NearConfig(permutations=128, rows=8)) == (16, 8)
    chosen = resolve_bands(NearConfig())
    assert chosen[0] * chosen[1] <= NearConfig().permutations


# ---------------------------------------------------------------- signature batches


def test_signature_batch_rows_follow_the_batch() -> None:
    config = NearConfig(permutations=64)
    texts: list[str | None] = [
        licence("BSD"),
        None,
        "!!! ...",
        licence("LGPL-3"),
        "東京は日本の首都です",
        "kept",
    ]
    statuses = [schema.KEPT, schema.REJECTED, schema.KEPT, schema.KEPT, schema.KEPT, schema.EXACT_COPY]
    batch = make_batch(texts, statuses)
    before = batch.to_pylist()
    signatures, report = signature_batch(batch, config)
    assert batch.to_pylist() == before  # input not modified
    assert signatures.shape == (6, 64) and signatures.dtype == np.uint32
    empty = np.all(signatures == EMPTY_VALUE, axis=1)
    assert empty.tolist() == [False, True, True, False, False, True]
    assert report == {"signed": 3, "no_shingles": 1, "not_kept": 2, "word_unit": 3, "char_unit": 0}
    family = MultiplyShift(permutations=64, seed=0)
    assert np.array_equal(
        signatures[0], signature_matrix([document_shingles(licence("BSD"), config)], family)[0]
    )
    auto = NearConfig(permutations=64, unit="auto")
    assert signature_batch(batch, auto)[1]["char_unit"] == 1


def test_signatures_do_not_depend_on_how_documents_are_batched() -> None:
    # Any number of workers: the store is the same whether made from one batch or many.
    config = NearConfig(permutations=32)
    texts: list[str | None] = [
        licence(n) for n in ("GPL-2", "GPL-3", "LGPL-2.1", "LGPL-3", "Apache-2.0", "BSD")
    ]
    whole, _ = signature_batch(make_batch(texts), config)
    parts = [signature_batch(make_batch(texts[i : i + 2]), config)[0] for i in range(0, 6, 2)]
    assert np.array_equal(whole, np.concatenate(parts))


# ---------------------------------------------------------------- clustering barrier


def small_corpus() -> list[str | None]:
    base = licence("GPL-3")
    rng = random.Random(5)
    return [
        licence("BSD"),  # 0 singleton
        base,  # 1 representative of {1, 3, 6}
        "...",  # 2 empty view
        edit_words(base, 0.005, rng),  # 3 near copy of 1
        "!!!",  # 4 empty view
        None,  # 5 rejected
        edit_words(base, 0.004, rng),  # 6 near copy of 1
        licence("Apache-2.0"),  # 7 singleton
    ]


@pytest.mark.parametrize("verify", ["signature", "exact"])
def test_clusters_representatives_and_empty_documents(verify: str) -> None:
    config = NearConfig(verify=verify)
    texts = small_corpus()
    signatures, _ = signature_batch(make_batch(texts), config)
    keys = [document_shingles(t, config) if t else np.empty(0, np.uint64) for t in texts]
    result = find_clusters(signatures, config, shingles_of=lambda i: keys[i])
    assert result.cluster.tolist() == [0, 1, 2, 1, 4, 5, 1, 7]
    assert result.near_copy_of.tolist() == [-1, -1, -1, 1, -1, -1, 1, -1]
    assert np.isnan(result.similarity[[0, 1, 2, 4, 5, 7]]).all()
    for copy in (3, 6):
        exact = exact_jaccard(keys[1], keys[copy])
        if verify == "exact":
            assert result.similarity[copy] == exact
        else:
            tolerance = 4 * math.sqrt(exact * (1 - exact) / config.permutations)
            assert abs(result.similarity[copy] - exact) <= tolerance
    report = result.report
    assert report["clusters"] == 1 and report["documents_in_clusters"] == 3 and report["near_copies"] == 2
    assert report["cluster_sizes"] == {"3": 1}
    candidates = report["candidates"]
    assert report["verified"] == 3 and isinstance(candidates, int) and candidates >= 3
    assert set(map(tuple, result.pairs.tolist())) == {(1, 3), (1, 6), (3, 6)}


def test_empty_documents_are_never_near_copies_of_each_other() -> None:
    config = NearConfig()
    texts = ["...", "?!", "", "  -- "]
    signatures, _ = signature_batch(make_batch(texts), config)
    result = find_clusters(signatures, config, shingles_of=lambda i: document_shingles(texts[i], config))
    assert result.cluster.tolist() == [0, 1, 2, 3]
    assert result.report["candidates"] == 0


def components(count: int, pairs: np.ndarray) -> list[int]:
    """Brute-force connected components: smallest member of each, by repeated relabelling."""
    label = list(range(count))
    changed = True
    while changed:
        changed = False
        for left, right in pairs.tolist():
            low = min(label[left], label[right])
            if label[left] != low or label[right] != low:
                label[left] = label[right] = low
                changed = True
    return label


def test_clusters_are_connected_components_with_the_smallest_member_first() -> None:
    # Many planted families of identical signatures, interleaved in index order.
    rng = np.random.Generator(np.random.PCG64(4))
    family_of = rng.integers(0, 40, size=300)
    base = rng.integers(0, 2**31, size=(40, 64)).astype(np.uint32)
    signatures = base[family_of].copy()
    noise = rng.random(signatures.shape) < 0.05
    signatures[noise] = rng.integers(0, 2**31, size=int(noise.sum())).astype(np.uint32)
    config = NearConfig(permutations=64, threshold=0.8, verify="signature")  # planted signatures, no texts
    result = find_clusters(signatures, config)
    assert result.cluster.tolist() == components(300, result.pairs)
    for index in range(300):
        members = np.flatnonzero(result.cluster == result.cluster[index])
        assert result.cluster[index] == members.min()


def test_memmap_store_gives_the_same_result(tmp_path: Path) -> None:
    config = NearConfig(permutations=64)
    texts = small_corpus()
    signatures, _ = signature_batch(make_batch(texts), config)
    path = tmp_path / "signatures.npy"
    np.save(path, signatures)
    keys = [document_shingles(t or "", config) for t in texts]
    from_disk = find_clusters(np.load(path, mmap_mode="r"), config, shingles_of=keys.__getitem__)
    in_memory = find_clusters(signatures, config, shingles_of=keys.__getitem__)
    assert np.array_equal(from_disk.cluster, in_memory.cluster)
    assert np.array_equal(from_disk.similarity, in_memory.similarity, equal_nan=True)
    assert from_disk.report == in_memory.report


def test_barrier_refuses_mismatched_input() -> None:
    with pytest.raises(ValueError, match=r"near\.permutations = 256"):
        find_clusters(np.zeros((3, 64), np.uint32), NearConfig())
    with pytest.raises(ValueError, match="shingles_of"):
        find_clusters(np.zeros((3, 256), np.uint32), NearConfig(verify="exact"))


def test_mark_near_copies_removes_only_kept_copies() -> None:
    config = NearConfig()
    texts = small_corpus()
    batch = make_batch(texts)
    signatures, _ = signature_batch(batch, config)
    result = find_clusters(
        signatures, config, shingles_of=lambda i: document_shingles(texts[i] or "", config)
    )
    first_half, second_half = batch.slice(0, 4), batch.slice(4)
    marked_a, report_a = mark_near_copies(first_half, 0, result, config)
    marked_b, report_b = mark_near_copies(second_half, 4, result, config)
    statuses = marked_a.column("status").to_pylist() + marked_b.column("status").to_pylist()
    assert statuses == ["kept", "kept", "kept", "near_copy", "kept", "rejected", "near_copy", "kept"]
    assert marked_a.column("text")[3].as_py() is None and marked_a.column("reason")[3].as_py() == "near_copy"
    assert report_a["near_copy"] + report_b["near_copy"] == 2
    assert batch.column("status").to_pylist()[3] == "kept"  # input not modified
    kept_all, report = mark_near_copies(batch, 0, result, NearConfig(action="cluster"))
    assert kept_all.equals(batch) and report == {"near_copy": 0}


# ---------------------------------------------------------------- accuracy on real text


def all_pairs_jaccard(key_sets: list[np.ndarray]) -> np.ndarray:
    """Brute-force exact Jaccard of every pair: intersections counted key by key over all documents."""
    count = len(key_sets)
    owners = np.concatenate([np.full(k.size, i, dtype=np.int64) for i, k in enumerate(key_sets)])
    keys = np.concatenate(key_sets)
    order = np.lexsort((owners, keys))
    keys, owners = keys[order], owners[order]
    starts = np.flatnonzero(np.concatenate(([True], keys[1:] != keys[:-1])))
    lengths = np.diff(np.concatenate((starts, [keys.size])))
    common = np.zeros((count, count), dtype=np.int64)
    for offset in range(1, int(lengths.max())):
        # pairs (k-th, (k+offset)-th) member of every key shared by more than offset documents
        members = np.flatnonzero(
            np.repeat(lengths, lengths) - (np.arange(keys.size) - np.repeat(starts, lengths)) > offset
        )
        np.add.at(common, (owners[members], owners[members + offset]), 1)
    common = common + common.T
    sizes = np.array([k.size for k in key_sets], dtype=np.int64)
    union = sizes[:, None] + sizes[None, :] - common
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(union > 0, common / np.maximum(union, 1), 0.0)


def test_all_pairs_jaccard_equals_pairwise_exact_jaccard() -> None:
    config = NearConfig()
    names = ("GPL-2", "GPL-3", "LGPL-2.1", "LGPL-3", "Apache-2.0", "BSD")
    keys = [document_shingles(licence(n), config) for n in names] + [np.empty(0, np.uint64)]
    keys.append(keys[1])
    table = all_pairs_jaccard(keys)
    for i, j in itertools.combinations(range(len(keys)), 2):
        assert table[i, j] == pytest.approx(exact_jaccard(keys[i], keys[j]), abs=1e-12), (i, j)


def python_doc_pages(count: int) -> list[str]:
    pages = sorted((PYTHON_DOCS / "library").glob("*.rst.txt"))
    texts = [p.read_text(encoding="utf-8") for p in pages]
    return [t for t in texts if 4000 <= len(t) <= 60000][:count]


@pytest.mark.slow
@pytest.mark.skipif(
    not PYTHON_DOCS.is_dir(), reason="Python docs sources (Debian package python3.11-doc) absent"
)
def test_recall_and_precision_on_edited_python_docs() -> None:
    # Real text: Python 3.11 documentation sources (Debian python3.11-doc), ~100 pages, each with
    # three copies with 0.5-8% of words edited by a seeded editor. Truth: brute-force exact Jaccard
    # >= 0.8 over all pairs, identical shingle sets excluded (near, non-identical pairs only).
    pages = python_doc_pages(100)
    assert len(pages) >= 80
    rng = random.Random(20240611)
    texts: list[str | None] = []
    for page in pages:
        texts.append(page)
        texts.extend(edit_words(page, rng.uniform(0.005, 0.08), rng) for _ in range(3))
    config = NearConfig(verify="exact")
    keys = [document_shingles(t or "", config) for t in texts]
    signatures, _ = signature_batch(make_batch(texts), config)
    result = find_clusters(signatures, config, shingles_of=lambda i: keys[i])

    exact = all_pairs_jaccard(keys)
    truth = {
        (i, j)
        for i, j in zip(*np.nonzero(exact >= config.threshold), strict=True)
        if i < j and exact[i, j] < 1
    }
    found = {(i, j) for i, j in map(tuple, result.pairs.tolist()) if exact[i, j] < 1}
    assert len(truth) >= 60
    recall = len(truth & found) / len(truth)
    precision = len(truth & found) / len(found)
    assert recall >= 0.95, (recall, len(truth))
    assert precision >= 0.98, (precision, len(found))


def test_default_verification_is_exact() -> None:
    # Candidates are confirmed on exact Jaccard unless asked otherwise; the barrier then needs shingles_of.
    assert NearConfig().verify == "exact"
    with pytest.raises(ValueError, match="shingles_of"):
        find_clusters(np.zeros((2, 256), np.uint32), NearConfig())
