"""Exact-duplicate barrier checked against a plain dictionary pass (the textbook first-occurrence rule)."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from corpusprep.exact import ExactConfig, exact_key_text, exact_keys, first_occurrences


def _brute_force(texts: list[str | None]) -> list[int]:
    first: dict[str, int] = {}
    result = []
    for row, text in enumerate(texts):
        if text is None:
            result.append(-1)
            continue
        earlier = first.setdefault(text, row)
        result.append(-1 if earlier == row else earlier)
    return result


@given(st.lists(st.one_of(st.none(), st.sampled_from(["a", "b", "c", "A", "a "]), st.text(max_size=3))))
def test_first_occurrence_equals_dictionary_pass(texts: list[str | None]) -> None:
    keys = exact_keys(texts, ExactConfig())
    mask = np.array([text is not None for text in texts], dtype=bool)
    assert first_occurrences(keys, mask).tolist() == _brute_force(texts)


@given(st.lists(st.text(alphabet=" \tAaBb\n", max_size=6), max_size=30))
def test_normalized_key_matches_casefold_and_collapsed_space(texts: list[str]) -> None:
    # Python's str.casefold (Unicode default case folding, Unicode §3.13) and str.split() are the reference.
    config = ExactConfig(key="normalized")
    reference = [" ".join(text.casefold().split()) for text in texts]
    keys = exact_keys(list(texts), config)
    got = first_occurrences(keys, np.ones(len(texts), dtype=bool)).tolist()
    assert got == _brute_force(list(reference))
    assert [exact_key_text(text, "normalized") for text in texts] == reference


def test_key_is_xxh3_128_of_utf8() -> None:
    # xxHash published value (python-xxhash README, REFERENCES §6):
    # XXH3_128(b"abc") = 0x06b05ab6733a618578af5f94892f3950.
    keys = exact_keys(["abc"], ExactConfig())
    assert (int(keys[0, 0]) << 64 | int(keys[0, 1])) == 0x06B05AB6733A618578AF5F94892F3950
