"""LSH banding: MMDS ch. 3 tables, the (bands, rows) choice, and candidate pairs against brute force."""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import numpy as np
import pytest
import xxhash

from corpusprep.lsh import band_keys, candidate_pairs, candidate_probability, choose_bands, weighted_error
from corpusprep.minhash import EMPTY_VALUE, MultiplyShift, signature_matrix
from corpusprep.shingles import exact_jaccard


def half_point(bands: int, rows: int) -> float:
    """The similarity where P(candidate) = 1/2, by bisection."""
    low, high = 0.0, 1.0
    for _ in range(100):
        middle = (low + high) / 2
        if float(candidate_probability(middle, bands, rows)) < 0.5:
            low = middle
        else:
            high = middle
    return (low + high) / 2


@pytest.mark.parametrize(
    ("similarity", "published"),
    [
        # MMDS §3.4.2, Example 3.11, Fig. 3.8 (b = 20, r = 5); also the CS246 slides (REFERENCES 1.2).
        (0.2, 0.006),
        (0.3, 0.047),
        (0.4, 0.186),
        (0.5, 0.470),
        (0.6, 0.802),
        (0.7, 0.975),
        (0.8, 0.9996),
    ],
)
def test_mmds_figure_3_8_table(similarity: float, published: float) -> None:
    assert float(candidate_probability(similarity, bands=20, rows=5)) == pytest.approx(published, abs=5e-4)


@pytest.mark.parametrize("similarity", [0.0, 0.05, 0.3, 0.5, 0.77, 0.99, 1.0])
@pytest.mark.parametrize(("bands", "rows"), [(20, 5), (1, 1), (450, 20), (7, 33)])
def test_matches_the_closed_form(similarity: float, bands: int, rows: int) -> None:
    # MMDS §3.4.2: P = 1 - (1 - s^r)^b (REFERENCES 1.1).
    closed = 1 - (1 - similarity**rows) ** bands
    assert float(candidate_probability(similarity, bands, rows)) == pytest.approx(closed, abs=1e-12)


def test_disjoint_documents_are_never_candidates() -> None:
    # REFERENCES §11: J = 0 gives P = 0 exactly for any bands and rows.
    for bands, rows in [(1, 1), (20, 5), (450, 20)]:
        assert float(candidate_probability(0.0, bands, rows)) == 0.0
        assert float(candidate_probability(1.0, bands, rows)) == 1.0


def test_vectorised_probability_equals_scalar() -> None:
    grid = np.linspace(0, 1, 101)
    vector = np.asarray(candidate_probability(grid, 20, 5))
    assert vector.tolist() == [float(candidate_probability(float(s), 20, 5)) for s in grid]


@pytest.mark.parametrize(
    ("rows", "bands", "approximation", "exact"),
    [
        # REFERENCES 1.3, computed by bisection there (MMDS §3.4.2 and Exercises 3.4.1/3.4.2 settings).
        (5, 20, 0.5493, 0.5087),
        (4, 16, 0.5000, 0.4538),
        (3, 10, 0.4642, 0.4061),
        (6, 20, 0.6070, 0.5694),
        (5, 50, 0.4573, 0.4244),
        (20, 450, 0.7368, 0.7234),
    ],
)
def test_threshold_approximation_lies_above_the_exact_half_point(
    rows: int, bands: int, approximation: float, exact: float
) -> None:
    estimate = (1 / bands) ** (1 / rows)  # MMDS §3.4.2: t ≈ (1/b)^(1/r)
    assert estimate == pytest.approx(approximation, abs=5e-5)
    assert half_point(bands, rows) == pytest.approx(exact, abs=5e-5)
    assert estimate > half_point(bands, rows)


def test_slope_in_the_middle_is_greater_than_three() -> None:
    # MMDS §3.4.2 (b = 20, r = 5): "rises by more than 0.6 ... slope in the middle is greater than 3".
    rise = float(candidate_probability(0.6, 20, 5)) - float(candidate_probability(0.4, 20, 5))
    assert rise > 0.6
    assert rise / 0.2 > 3


def test_450_bands_of_20_rows_are_never_swapped() -> None:
    # Lee et al. 2022 / Penedo et al. 2023 setting (REFERENCES 3.1, 3.3; computed there):
    # 450 bands of 20 rows give P(0.75) = 0.7605 and P(0.8) = 0.9946; 20 bands of 450 rows give ~0.
    assert float(candidate_probability(0.75, bands=450, rows=20)) == pytest.approx(0.7605, abs=5e-4)
    assert float(candidate_probability(0.8, bands=450, rows=20)) == pytest.approx(0.9946, abs=5e-4)
    assert float(candidate_probability(0.5, bands=450, rows=20)) < 0.001
    assert float(candidate_probability(0.8, bands=20, rows=450)) < 1e-30
    # The alternative 40 bands x 20 rows (REFERENCES 3.1): P(0.8) = 0.371, P(0.9) = 0.9944.
    assert float(candidate_probability(0.8, bands=40, rows=20)) == pytest.approx(0.371, abs=5e-4)
    assert float(candidate_probability(0.9, bands=40, rows=20)) == pytest.approx(0.9944, abs=5e-4)


@pytest.mark.parametrize(
    ("threshold", "expected"),
    # datasketch 2.0.0 MinHashLSH(threshold, num_perm=128) choices with equal weights (REFERENCES 1.5).
    [(0.5, (25, 5)), (0.7, (14, 9)), (0.8, (9, 13)), (0.9, (5, 25))],
)
def test_equal_weights_reproduce_the_reference_library_choice(
    threshold: float, expected: tuple[int, int]
) -> None:
    assert choose_bands(threshold, 128, 0.5, 0.5) == expected
    datasketch_lsh = pytest.importorskip("datasketch.lsh")
    assert datasketch_lsh.MinHashLSH(threshold=threshold, num_perm=128).b == expected[0]
    assert datasketch_lsh.MinHashLSH(threshold=threshold, num_perm=128).r == expected[1]


def test_choice_is_the_brute_force_minimum() -> None:
    threshold, permutations, weights = 0.8, 40, (0.05, 0.95)
    scored = [
        (weighted_error(threshold, b, r, *weights), b, r)
        for b in range(1, permutations + 1)
        for r in range(1, permutations // b + 1)
    ]
    best = min(scored)
    assert choose_bands(threshold, permutations, *weights) == (best[1], best[2])


def test_weighting_false_negatives_raises_recall_at_the_threshold() -> None:
    balanced = choose_bands(0.8, 256, 0.5, 0.5)
    recall_first = choose_bands(0.8, 256, 0.05, 0.95)
    assert float(candidate_probability(0.8, *recall_first)) > float(candidate_probability(0.8, *balanced))
    assert recall_first[0] * recall_first[1] <= 256


def test_bad_choice_arguments_are_refused() -> None:
    with pytest.raises(ValueError, match=r"threshold = 1\.3"):
        choose_bands(1.3, 128)
    with pytest.raises(ValueError, match="permutations"):
        choose_bands(0.5, 0)
    with pytest.raises(ValueError, match="bands = 0"):
        candidate_probability(0.5, 0, 5)


def brute_force_pairs(signatures: np.ndarray, bands: int, rows: int) -> set[tuple[int, int]]:
    """All pairs agreeing on every position of some band (MMDS §3.4.1), empty rows excluded."""
    found = set()
    nonempty = [i for i in range(signatures.shape[0]) if not np.all(signatures[i] == EMPTY_VALUE)]
    for i, j in itertools.combinations(nonempty, 2):
        for band in range(bands):
            part = slice(band * rows, (band + 1) * rows)
            if np.array_equal(signatures[i, part], signatures[j, part]):
                found.add((i, j))
                break
    return found


def planted_signatures(count: int, width: int, seed: int) -> np.ndarray:
    """Random small-valued signatures, so that bands often agree by chance."""
    rng = np.random.Generator(np.random.PCG64(seed))
    signatures = rng.integers(0, 3, size=(count, width)).astype(np.uint32)
    signatures[rng.integers(0, count, size=count // 10)] = EMPTY_VALUE
    return signatures


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_candidate_pairs_equal_brute_force(seed: int) -> None:
    signatures = planted_signatures(120, 12, seed)
    pairs = candidate_pairs(signatures, bands=4, rows=3, bucket_limit=1000)
    assert pairs.dtype == np.int64 and pairs.shape[1] == 2
    assert set(map(tuple, pairs.tolist())) == brute_force_pairs(signatures, 4, 3)
    assert np.all(pairs[:, 0] < pairs[:, 1])
    codes = pairs[:, 0] * 1000 + pairs[:, 1]
    assert np.all(np.diff(codes) > 0)  # sorted, distinct


def test_huge_runs_link_to_their_first_member_with_the_same_components() -> None:
    signatures = np.zeros((10, 4), dtype=np.uint32)
    signatures[:, 0] = [7, 7, 7, 7, 7, 7, 1, 2, 7, 3]  # band 0: run of 7 equal keys
    signatures[:, 1] = np.arange(10) + 100
    signatures[:, 2:] = (np.arange(20).reshape(10, 2) + 500).astype(np.uint32)
    limited = candidate_pairs(signatures, bands=2, rows=2, bucket_limit=1000)
    starred = candidate_pairs(signatures, bands=2, rows=1, bucket_limit=4)
    assert set(map(tuple, starred.tolist())) == {(0, j) for j in (1, 2, 3, 4, 5, 8)}
    full = candidate_pairs(signatures, bands=2, rows=1, bucket_limit=1000)
    assert len(full) == 7 * 6 // 2
    assert limited.size == 0  # band 0 of two rows differs everywhere (second column unique)


def test_empty_rows_are_never_candidates() -> None:
    signatures = np.full((5, 8), EMPTY_VALUE, dtype=np.uint32)
    signatures[2] = 4
    assert candidate_pairs(signatures, bands=4, rows=2).shape == (0, 2)


def test_memmap_store_gives_the_same_pairs(tmp_path: Path) -> None:
    signatures = planted_signatures(300, 12, 9)
    store = np.lib.format.open_memmap(
        tmp_path / "signatures.npy", mode="w+", dtype=np.uint32, shape=signatures.shape
    )
    store[:] = signatures
    store.flush()
    reopened = np.load(tmp_path / "signatures.npy", mmap_mode="r")
    expected = candidate_pairs(signatures, bands=4, rows=3)
    assert np.array_equal(candidate_pairs(reopened, bands=4, rows=3, chunk_rows=37), expected)


def test_band_keys_depend_on_the_band_index_and_values() -> None:
    block = np.array([[1, 2], [1, 2], [2, 1]], dtype=np.uint32)
    keys = band_keys(block, 0)
    assert keys[0] == keys[1] and keys[0] != keys[2]
    assert band_keys(block, 1)[0] != keys[0]


def test_too_many_rows_or_tiny_bucket_limit_are_refused() -> None:
    signatures = np.zeros((3, 8), dtype=np.uint32)
    with pytest.raises(ValueError, match="exceeds the signature length 8"):
        candidate_pairs(signatures, bands=3, rows=3)
    with pytest.raises(ValueError, match="bucket_limit"):
        candidate_pairs(signatures, bands=2, rows=2, bucket_limit=1)


def universe_pair(jaccard_numerator: int, union: int) -> tuple[np.ndarray, np.ndarray]:
    """Two key sets with |A ∩ B| = numerator and |A ∪ B| = union (keys hashed with XXH3-64)."""
    only = (union - jaccard_numerator) // 2
    values = [xxhash.xxh3_64_intdigest(str(v).encode()) for v in range(union)]
    shared = values[:jaccard_numerator]
    first = shared + values[jaccard_numerator : jaccard_numerator + only]
    second = shared + values[jaccard_numerator + only :]
    return np.array(first, dtype=np.uint64), np.array(second, dtype=np.uint64)


@pytest.mark.parametrize(("numerator", "union", "table"), [(60, 200, 0.0474943), (160, 200, 0.9996439)])
def test_empirical_candidate_rate_matches_the_table(numerator: int, union: int, table: float) -> None:
    # REFERENCES 1.2 test idea: fixed universes with J = 0.3 and 0.8, 100 positions in 20 bands
    # of 5 rows, many seeds; the candidate rate must match MMDS Fig. 3.8 within about 4 binomial sigma.
    trials = 1000
    first, second = universe_pair(numerator, union)
    assert exact_jaccard(first, second) == pytest.approx(numerator / union)
    rows = []
    for trial in range(trials):
        rows.append(signature_matrix([first, second], MultiplyShift(permutations=100, seed=trial)))
    # Row 2t and 2t+1 are the pair of trial t; rows of different trials use different hash functions.
    pairs = candidate_pairs(np.concatenate(rows), bands=20, rows=5)
    hits = int(np.count_nonzero((pairs[:, 0] % 2 == 0) & (pairs[:, 1] == pairs[:, 0] + 1)))
    sigma = math.sqrt(table * (1 - table) / trials)
    assert abs(hits / trials - table) <= 4 * sigma + 1 / trials
