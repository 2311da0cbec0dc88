"""MinHash signatures: MMDS Example 3.8, batch = scalar, estimator statistics, datasketch agreement."""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import xxhash
from hypothesis import given, settings
from hypothesis import strategies as st

from corpusprep import minhash, shingles
from corpusprep.minhash import (
    EMPTY_VALUE,
    MultiplyShift,
    empty_rows,
    fold_key,
    pair_similarity,
    signature_matrix,
    signature_scalar,
    signature_similarity,
)
from corpusprep.shingles import exact_jaccard, shingle_keys, shingle_strings

LICENCES = Path(__file__).resolve().parent.parent / "fixtures" / "licences"
LICENCE_NAMES = ("GPL-2", "GPL-3", "LGPL-2.1", "LGPL-3", "Apache-2.0", "BSD")


@pytest.fixture(autouse=True, params=["numpy", "compiled"])
def kernel_path(request: pytest.FixtureRequest) -> Iterator[str]:
    """Every test runs twice: by NumPy alone, and by the compiled kernels from the first call."""
    previous = shingles.set_compiled_after(None if request.param == "numpy" else 0)
    yield request.param
    shingles.set_compiled_after(previous)


def licence(name: str) -> str:
    return (LICENCES / f"{name}.txt").read_text(encoding="utf-8")


def hashed_integers(values: range | list[int]) -> np.ndarray:
    """Integers turned into shingle-like keys with XXH3-64, as the pipeline's keys are."""
    return np.array([xxhash.xxh3_64_intdigest(str(v).encode(), seed=0) for v in values], dtype=np.uint64)


class GivenFunctions:
    """Hash functions given as plain integer formulas (for worked examples)."""

    def __init__(self, *functions: object) -> None:
        self._functions = functions

    @property
    def permutations(self) -> int:
        return len(self._functions)

    @property
    def shift(self) -> int:
        return 0

    @property
    def value_dtype(self) -> np.dtype[np.unsignedinteger]:
        return np.dtype(np.uint64)

    def fill(self, keys: np.ndarray, out: np.ndarray) -> None:
        for column, function in enumerate(self._functions):
            out[column, :] = [function(int(x)) for x in keys.tolist()]  # type: ignore[operator]


def test_mmds_example_3_8_signature_matrix() -> None:
    # MMDS §3.3 Fig. 3.2 / Example 3.8 (REFERENCES 1.4): rows a..e = 0..4,
    # S1={a,d}, S2={c}, S3={b,d,e}, S4={a,c,d}; h1(x)=(x+1) mod 5, h2(x)=(3x+1) mod 5.
    sets = [np.array(s, dtype=np.uint64) for s in ([0, 3], [2], [1, 3, 4], [0, 2, 3])]
    functions = GivenFunctions(lambda x: (x + 1) % 5, lambda x: (3 * x + 1) % 5)
    signatures = signature_matrix(sets, functions)
    assert signatures.T.tolist() == [[1, 3, 0, 1], [0, 2, 0, 0]]
    # MMDS Example 3.8: estimated SIM(S1,S4) = 1 (true 2/3), SIM(S1,S3) = 1/2 (true 1/4).
    assert signature_similarity(signatures[0], signatures[3]) == 1.0
    assert signature_similarity(signatures[0], signatures[2]) == 0.5
    assert exact_jaccard(sets[0], sets[3]) == pytest.approx(2 / 3)
    assert exact_jaccard(sets[0], sets[2]) == pytest.approx(1 / 4)


def test_parameters_are_xxh3_digests_of_labels() -> None:
    family = MultiplyShift(permutations=3, seed=5)
    low = 0xFFFFFFFF
    assert int(family.multipliers[2]) == xxhash.xxh3_64_intdigest(b"minhash-multiplier:2", seed=5) & low | 1
    assert int(family.increments[0]) == xxhash.xxh3_64_intdigest(b"minhash-increment:0", seed=5) & low
    assert family.multipliers.dtype == np.uint32 and np.all(family.multipliers % 2 == 1)
    assert not family.multipliers.flags.writeable


def test_golden_signature_is_pinned() -> None:
    # Pinned from this implementation (not an outside value): any change here changes every output.
    # Re-pinned when the shingle keys became SplitMix64 chains and MinHash moved to uint32 arithmetic.
    keys = shingle_keys("a rose is a rose is a rose", ngram=2)
    assert keys.tolist() == [515343939109558218, 7211498049134543032, 11862180116706124844]
    family = MultiplyShift(permutations=8, seed=0)
    expected = [1209085178, 1843668099, 592545913, 1088740994, 1513109772, 2012780174, 653385250, 1047019767]
    assert signature_matrix([keys], family).tolist() == [expected]


@pytest.mark.parametrize("seed", [0, 1, 2**64 - 1])
def test_batch_equals_scalar_on_licences(seed: int) -> None:
    family = MultiplyShift(permutations=48, seed=seed)
    key_sets = [shingle_keys(licence(name), ngram=n) for name in LICENCE_NAMES for n in (1, 5)]
    key_sets.insert(3, np.empty(0, dtype=np.uint64))
    batch = signature_matrix(key_sets, family)
    for row, keys in zip(batch, key_sets, strict=True):
        assert row.tolist() == signature_scalar(keys.tolist(), family)


@settings(max_examples=100, deadline=None)
@given(
    sets=st.lists(st.lists(st.integers(min_value=0, max_value=2**64 - 1), max_size=30), max_size=8),
    seed=st.integers(min_value=0, max_value=2**64 - 1),
)
def test_batch_equals_scalar_property(sets: list[list[int]], seed: int) -> None:
    family = MultiplyShift(permutations=16, seed=seed)
    batch = signature_matrix([np.array(s, dtype=np.uint64) for s in sets], family)
    assert batch.shape == (len(sets), 16)
    assert batch.dtype == np.uint32
    for row, keys in zip(batch, sets, strict=True):
        assert row.tolist() == signature_scalar(keys, family)


def test_sets_spanning_many_blocks_equal_scalar() -> None:
    # Sets that cross the work blocks' boundaries in every way (block size from the module).
    family = MultiplyShift(permutations=128, seed=3)
    block = minhash._CHUNK_CELLS // 128
    sizes = [1, block + block // 2, 0, block - 1, 1, 2 * block + 1, 0, 5]
    start = 0
    key_sets = []
    for size in sizes:
        key_sets.append(hashed_integers(range(start, start + size)))
        start += size
    batch = signature_matrix(key_sets, family)
    for row, keys in zip(batch, key_sets, strict=True):
        assert row.tolist() == signature_scalar(keys.tolist(), family)
    # Each set alone gives the same row as inside the batch (no leakage between neighbours).
    for row, keys in zip(batch, key_sets, strict=True):
        assert np.array_equal(signature_matrix([keys], family)[0], row)


def test_empty_sets_get_the_reserved_row_and_others_never_do() -> None:
    family = MultiplyShift(permutations=32, seed=0)
    sets = [np.empty(0, dtype=np.uint64), hashed_integers([1]), np.empty(0, dtype=np.uint64)]
    signatures = signature_matrix(sets, family)
    assert empty_rows(signatures).tolist() == [True, False, True]
    assert np.all(signatures[1] < EMPTY_VALUE)
    assert signature_similarity(signatures[0], signatures[2]) == 0.0  # empty resembles nothing
    assert pair_similarity(signatures, np.array([0, 0]), np.array([2, 1])).tolist() == [0.0, 0.0]


def test_fold_key_and_input_not_mutated() -> None:
    keys = np.array([0xFFFFFFFF00000000, 0x123456789ABCDEF0], dtype=np.uint64)
    copy = keys.copy()
    assert fold_key(keys).tolist() == [0xFFFFFFFF, 0x12345678 ^ 0x9ABCDEF0]
    signature_matrix([keys], MultiplyShift(permutations=16, seed=0))
    assert np.array_equal(keys, copy)


def test_estimator_is_unbiased_with_binomial_standard_error() -> None:
    # REFERENCES 2.3 (Broder 1997; MMDS §3.3.3): E[estimate] = J, SE = sqrt(J(1-J)/k).
    # Sets with |A ∩ B| = 200 and |A ∪ B| = 400 (J = 0.5), k = 128, 300 seeds.
    permutations, seeds, jaccard = 128, 300, 0.5
    first = hashed_integers(range(0, 300))
    second = hashed_integers(range(100, 400))
    assert exact_jaccard(first, second) == jaccard
    estimates = []
    for seed in range(seeds):
        signatures = signature_matrix([first, second], MultiplyShift(permutations=permutations, seed=seed))
        estimates.append(signature_similarity(signatures[0], signatures[1]))
    standard_error = math.sqrt(jaccard * (1 - jaccard) / permutations)  # 0.0442 (REFERENCES 2.3)
    assert abs(float(np.mean(estimates)) - jaccard) < 3 * standard_error / math.sqrt(seeds)
    assert 0.8 * standard_error < float(np.std(estimates, ddof=1)) < 1.2 * standard_error


def binomial_tail(successes: int, trials: int, probability: float) -> float:
    """Two-sided exact binomial tail: P(X <= x) or P(X >= x), the smaller, for X ~ Bin(trials, p)."""
    mass = [
        math.comb(trials, x) * probability**x * (1 - probability) ** (trials - x) for x in range(trials + 1)
    ]
    return min(sum(mass[: successes + 1]), sum(mass[successes:]))


@pytest.mark.parametrize("ngram", [1, 3, 5])
def test_estimates_follow_the_binomial_law_on_licence_pairs(ngram: int) -> None:
    # Broder 1997 / MMDS §3.3.3 (REFERENCES 2.3): the number of equal positions is Bin(k, J) with J
    # the brute-force exact Jaccard of real licence texts. Each of the 15 pairs x 3 widths must lie
    # outside neither tail at level 1e-4 (family-wise about 0.5%, Bonferroni); the normal 3-SE rule
    # is too tight for 45 comparisons and too loose in the skewed tail of small J.
    permutations = 256
    family = MultiplyShift(permutations=permutations, seed=2024)
    keys = {name: shingle_keys(licence(name), ngram=ngram) for name in LICENCE_NAMES}
    signatures = dict(zip(LICENCE_NAMES, signature_matrix(list(keys.values()), family), strict=True))
    for left, right in itertools.combinations(LICENCE_NAMES, 2):
        exact = exact_jaccard(keys[left], keys[right])
        equal = int(np.count_nonzero(signatures[left] == signatures[right]))
        assert binomial_tail(equal, permutations, exact) > 1e-4 / 2, (left, right, exact, equal)


def test_agrees_with_datasketch_on_licence_pairs() -> None:
    # datasketch 2.0.0 MinHash (reference library) on the same shingle strings.
    datasketch = pytest.importorskip("datasketch")
    permutations = 128
    names = LICENCE_NAMES
    strings = {name: set(shingle_strings(licence(name), ngram=3)) for name in names}
    keys = {name: shingle_keys(licence(name), ngram=3) for name in names}
    family = MultiplyShift(permutations=permutations, seed=7)
    ours = dict(zip(names, signature_matrix([keys[n] for n in names], family), strict=True))
    theirs = {}
    for name in names:
        sketch = datasketch.MinHash(num_perm=permutations, seed=7)
        sketch.update_batch([s.encode("utf-8") for s in sorted(strings[name])])
        theirs[name] = sketch
    differences = []
    for left, right in itertools.combinations(names, 2):
        exact = exact_jaccard(keys[left], keys[right])
        mine = signature_similarity(ours[left], ours[right])
        reference = float(theirs[left].jaccard(theirs[right]))
        # Two independent estimates of the same J: their difference has SD sqrt(2 J(1-J)/k).
        spread = max(math.sqrt(2 * exact * (1 - exact) / permutations), 1 / permutations)
        assert abs(mine - reference) <= 4 * spread, (left, right, exact, mine, reference)
        differences.append(mine - reference)
    # No systematic offset between the two libraries over the 15 pairs.
    assert abs(float(np.mean(differences))) < 0.03


def test_bad_family_parameters_are_refused() -> None:
    with pytest.raises(ValueError, match="permutations = 0"):
        MultiplyShift(permutations=0, seed=0)
    with pytest.raises(ValueError, match="seed"):
        MultiplyShift(permutations=4, seed=-1)
    with pytest.raises(ValueError, match="cannot be compared"):
        signature_similarity(np.zeros(3, np.uint32), np.zeros(4, np.uint32))
