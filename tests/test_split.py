"""Split assignment: stability, ratios within binomial tolerance, components against a brute-force search."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xxhash
from hypothesis import given
from hypothesis import strategies as st

from corpusprep.errors import DefinitionError
from corpusprep.split import SPLITS, SplitConfig, assign_splits, components, split_of


def test_split_is_xxh3_64_fraction_of_the_key() -> None:
    # The rule, recomputed with the reference library directly: fraction = XXH3_64(key, seed) / 2**64.
    config = SplitConfig(train=0.8, validation=0.1, test=0.1, seed=7)
    for key in (f"h:{i}" for i in range(200)):
        fraction = xxhash.xxh3_64_intdigest(key.encode(), seed=7) / 2**64
        expected = "train" if fraction < 0.8 else "validation" if fraction < 0.9 else "test"
        assert split_of(key, config) == expected


def test_ratios_within_binomial_tolerance() -> None:
    # Common practice: a hash-based assignment is a Bernoulli trial per key, so the count of n keys
    # in a split of fraction p has standard deviation sqrt(n p (1-p)); 4 sigma bounds a false failure.
    config = SplitConfig(train=0.7, validation=0.2, test=0.1)
    n = 20_000
    counts = dict.fromkeys(SPLITS, 0)
    for i in range(n):
        counts[split_of(f"k{i}", config)] += 1
    for name, p in (("train", 0.7), ("validation", 0.2), ("test", 0.1)):
        assert abs(counts[name] - n * p) < 4 * math.sqrt(n * p * (1 - p))


@given(
    st.lists(st.text(max_size=8), min_size=1, max_size=40, unique=True),
    st.lists(st.text(max_size=8), max_size=40),
)
def test_adding_documents_moves_nobody(existing: list[str], added: list[str]) -> None:
    config = SplitConfig()
    before = {key: split_of(key, config) for key in existing}
    keys = existing + [key for key in added if key not in before]
    after = assign_splits(keys, np.arange(len(keys)), config)
    assert after[: len(existing)] == [before[key] for key in existing]


def _brute_components(count: int, pairs: list[tuple[int, int]]) -> list[int]:
    # Reference: repeated relaxation of the minimum label over edges until nothing changes.
    label = list(range(count))
    changed = True
    while changed:
        changed = False
        for a, b in pairs:
            low = min(label[a], label[b])
            if label[a] != low or label[b] != low:
                label[a] = label[b] = low
                changed = True
    return label


@given(
    st.integers(1, 30).flatmap(
        lambda n: st.tuples(
            st.just(n), st.lists(st.tuples(st.integers(0, n - 1), st.integers(0, n - 1)), max_size=40)
        )
    )
)
def test_components_equal_brute_force(case: tuple[int, list[tuple[int, int]]]) -> None:
    count, pairs = case
    edges = [
        (np.array([a for a, _ in pairs], dtype=np.int64), np.array([b for _, b in pairs], dtype=np.int64))
    ]
    assert components(count, edges).tolist() == _brute_components(count, pairs)


def test_a_component_never_straddles_splits() -> None:
    keys = [f"h:{i}" for i in range(300)]
    component_of = np.array([i // 3 for i in range(300)])  # components of three documents
    splits = assign_splits(keys, component_of, SplitConfig(train=0.34, validation=0.33, test=0.33))
    for comp in range(100):
        assert len({splits[3 * comp], splits[3 * comp + 1], splits[3 * comp + 2]}) == 1


def test_fractions_must_add_up_to_one() -> None:
    with pytest.raises(DefinitionError, match="add up to 1"):
        SplitConfig(train=0.9, validation=0.2, test=0.0)
