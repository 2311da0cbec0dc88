"""Shingles and exact Jaccard, checked against Broder 1997 and brute force on real licence texts."""

from __future__ import annotations

import itertools
import sys
import unicodedata
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import xxhash
from hypothesis import given, settings
from hypothesis import strategies as st

from corpusprep import shingles
from corpusprep.hashing import keyed_hash64
from corpusprep.shingles import (
    CHAR,
    NO_SPACE_SCRIPTS,
    WORD,
    exact_jaccard,
    is_mostly_unspaced,
    normalize_view,
    resolve_unit,
    shingle_key_stream,
    shingle_keys,
    shingle_keys_scalar,
    shingle_strings,
    view_words,
)

LICENCES = Path(__file__).resolve().parent.parent / "fixtures" / "licences"
LICENCE_NAMES = ("GPL-2", "GPL-3", "LGPL-2.1", "LGPL-3", "Apache-2.0", "BSD")
PYTHON_DOCS = Path("/usr/share/doc/python3.11-doc/html/_sources")
MASK64 = (1 << 64) - 1


@pytest.fixture(autouse=True, params=["numpy", "compiled"])
def kernel_path(request: pytest.FixtureRequest) -> Iterator[str]:
    """Every test runs twice: by NumPy alone, and by the compiled kernels from the first call."""
    previous = shingles.set_compiled_after(None if request.param == "numpy" else 0)
    yield request.param
    shingles.set_compiled_after(previous)


def splitmix64_finaliser(value: int) -> int:
    """SplitMix64's output function, written out here independently of the module."""
    value = ((value ^ (value >> 30)) * 0xBF58476D1CE4E5B9) & MASK64
    value = ((value ^ (value >> 27)) * 0x94D049BB133111EB) & MASK64
    return value ^ (value >> 31)


def key_by_hand(words: list[str], seed: int) -> int:
    """The documented key of one word shingle, computed from the module docstring's formula."""
    key = xxhash.xxh3_64_intdigest(f"shingle:word:{len(words)}".encode(), seed=seed)
    for word in words:
        key = splitmix64_finaliser(key ^ keyed_hash64(word, seed))
    return key


# Broder 1997, §2: A = "a rose is a rose is a rose", B = "a rose is a flower which is a rose".
BRODER_A = "a rose is a rose is a rose"
BRODER_B = "a rose is a flower which is a rose"


def licence(name: str) -> str:
    return (LICENCES / f"{name}.txt").read_text(encoding="utf-8")


@pytest.mark.parametrize(
    ("width", "expected"),
    [
        (1, 0.6),  # Broder 1997 §2, Option B (set): 60%
        (2, 0.5),  # Broder 1997 §2, Option B: 50%
        (3, 3 / 7),  # Broder 1997 §2, Option B: 42.85%
        (4, 0.125),  # REFERENCES 2.2, computed (not printed in the paper): 1/8
    ],
)
def test_broder_rose_resemblance_uses_set_semantics(width: int, expected: float) -> None:
    first = shingle_keys(BRODER_A, ngram=width)
    second = shingle_keys(BRODER_B, ngram=width)
    assert exact_jaccard(first, second) == pytest.approx(expected, abs=1e-12)
    # The same value from the readable shingles as Python sets (brute force).
    set_a = set(shingle_strings(BRODER_A, ngram=width))
    set_b = set(shingle_strings(BRODER_B, ngram=width))
    assert len(set_a & set_b) / len(set_a | set_b) == pytest.approx(expected, abs=1e-12)


def test_broder_four_shingling_of_a_rose_is_a_set_of_three() -> None:
    # Broder 1997 §2: the 4-shingling of (a,rose,is,a,rose,is,a,rose) is
    # {(a,rose,is,a), (rose,is,a,rose), (is,a,rose,is)}.
    text = "a rose is a rose is a rose"
    assert set(shingle_strings(text, ngram=4)) == {"a rose is a", "rose is a rose", "is a rose is"}
    assert shingle_keys(text, ngram=4).size == 3


def test_view_casefolds_strips_punctuation_and_collapses_whitespace() -> None:
    assert normalize_view("Straße\u00a0—  DER  «Weg»!\n") == "strasse der weg"
    assert normalize_view("x = a+b;  # ok") == "x = a+b ok"
    assert normalize_view("\u3001\u3002!?") == ""


def test_view_keeps_symbols_and_marks() -> None:
    # "=" and "+" are Sm (symbols, kept); "#" and ";" are Po (punctuation, stripped).
    assert unicodedata.category("=") == "Sm" and unicodedata.category("#") == "Po"
    # Devanagari vowel signs are marks (Mc/Mn), part of the word.
    assert normalize_view("हिन्दी, भाषा") == "हिन्दी भाषा"


def test_no_punctuation_beyond_plane_one() -> None:
    # The punctuation table scans planes 0 and 1 only; this checks that claim for this Python's Unicode.
    beyond = [c for c in range(0x20000, sys.maxunicode + 1) if unicodedata.category(chr(c)).startswith("P")]
    assert beyond == []


def test_short_document_is_one_shingle_of_its_whole_view() -> None:
    assert shingle_strings("A Rose, is.", ngram=5) == ["a rose is"]
    assert shingle_keys("A Rose, is.", ngram=5).tolist() == [key_by_hand(["a", "rose", "is"], 0)]
    assert shingle_strings("ab", unit=CHAR, ngram=5) == ["ab"]


def test_empty_view_has_no_shingles() -> None:
    for text in ("", "   ", "!!! ... ???", "\u3002\u3001"):
        assert shingle_strings(text) == []
        assert shingle_keys(text).size == 0
    empty = np.empty(0, dtype=np.uint64)
    assert exact_jaccard(empty, empty) == 0.0  # an empty document resembles nothing, not even itself


def test_auto_unit_is_char_only_when_strictly_more_than_half_unspaced() -> None:
    assert resolve_unit(normalize_view("東京は日本の首都です。"), "auto") == CHAR
    assert resolve_unit(normalize_view("ภาษาไทยเขียนติดกัน"), "auto") == CHAR
    assert resolve_unit(normalize_view("한국어는 띄어쓰기를 합니다"), "auto") == WORD  # Hangul uses spaces
    assert resolve_unit(normalize_view("plain english words"), "auto") == WORD
    assert not is_mostly_unspaced("ab東京")  # exactly half: not more than half
    assert is_mostly_unspaced("a東京")
    assert not is_mostly_unspaced("")
    with pytest.raises(ValueError, match="unit"):
        resolve_unit("x", "syllable")


def test_no_space_script_ranges_are_ordered_and_disjoint() -> None:
    bounds = [(first, last) for _name, first, last in NO_SPACE_SCRIPTS]
    assert all(first <= last for first, last in bounds)
    assert all(a[1] < b[0] for a, b in itertools.pairwise(sorted(bounds)))


@pytest.mark.parametrize("name", LICENCE_NAMES)
@pytest.mark.parametrize("ngram", [1, 3, 5])
def test_fast_keys_equal_hashing_each_string_on_licences(name: str, ngram: int) -> None:
    text = licence(name)
    for unit in (WORD, CHAR):
        fast = shingle_keys(text, unit=unit, ngram=ngram, seed=11)
        slow = shingle_keys_scalar(text, unit=unit, ngram=ngram, seed=11)
        assert np.array_equal(fast, slow)


@settings(max_examples=200, deadline=None)
@given(
    text=st.text(
        alphabet=st.sampled_from("ab Z,.!\n\t\u00e9\u6771\u4eac\u0e01\U0001f600\u00a0-"), max_size=40
    ),
    ngram=st.integers(min_value=1, max_value=6),
    unit=st.sampled_from(["word", "char", "auto"]),
    seed=st.integers(min_value=0, max_value=2**64 - 1),
)
def test_fast_keys_equal_scalar_keys_property(text: str, ngram: int, unit: str, seed: int) -> None:
    assert np.array_equal(
        shingle_keys(text, unit=unit, ngram=ngram, seed=seed),
        shingle_keys_scalar(text, unit=unit, ngram=ngram, seed=seed),
    )


def test_keys_depend_on_the_seed_and_are_sorted_distinct() -> None:
    text = licence("BSD")
    first, second = shingle_keys(text, seed=0), shingle_keys(text, seed=1)
    assert first.size == second.size
    assert np.intersect1d(first, second).size == 0
    assert np.all(first[1:] > first[:-1])


@pytest.mark.parametrize("ngram", [1, 3, 5])
def test_exact_jaccard_on_keys_equals_brute_force_on_strings(ngram: int) -> None:
    # Brute force: Python sets of the shingle strings of real licence texts.
    for left, right in itertools.combinations(LICENCE_NAMES, 2):
        strings_l = set(shingle_strings(licence(left), ngram=ngram))
        strings_r = set(shingle_strings(licence(right), ngram=ngram))
        brute = len(strings_l & strings_r) / len(strings_l | strings_r)
        keys = exact_jaccard(
            shingle_keys(licence(left), ngram=ngram), shingle_keys(licence(right), ngram=ngram)
        )
        assert keys == pytest.approx(brute, abs=1e-12), (left, right)


def test_exact_jaccard_identity_and_disjoint() -> None:
    # REFERENCES §11: identical documents have J = 1, disjoint ones J = 0.
    keys = shingle_keys(licence("GPL-3"))
    assert exact_jaccard(keys, keys) == 1.0
    assert exact_jaccard(shingle_keys("alpha beta gamma"), shingle_keys("delta epsilon zeta")) == 0.0


def test_inputs_are_not_mutated() -> None:
    first = np.array([3, 1, 2, 2], dtype=np.uint64)
    second = np.array([2, 5], dtype=np.uint64)
    exact_jaccard(first, second)
    assert first.tolist() == [3, 1, 2, 2] and second.tolist() == [2, 5]


def test_bad_ngram_is_refused() -> None:
    with pytest.raises(ValueError, match="ngram = 0"):
        shingle_keys("a b c", ngram=0)


def test_splitmix64_finaliser_reproduces_the_published_sequence() -> None:
    # SplitMix64 (Steele, Lea & Flood 2014) seeded with 1234567: the state advances by
    # 0x9E3779B97F4A7C15 and each output is the finaliser of the state. The first five outputs,
    # as listed by the Rosetta Code task "Pseudo-random numbers/Splitmix64" (cited from memory).
    published = [
        6457827717110365317,
        3203168211198807973,
        9817491932198370423,
        4593380528125082431,
        16408922859458223821,
    ]
    state, outputs = 1234567, []
    for _ in published:
        state = (state + 0x9E3779B97F4A7C15) & MASK64
        outputs.append(splitmix64_finaliser(state))
    assert outputs == published
    # The module's vectorised finaliser is the same function (the keys below depend on it).
    values = np.array([(1234567 + (i + 1) * 0x9E3779B97F4A7C15) & MASK64 for i in range(5)], np.uint64)
    shingles._mix64(values)
    assert values.tolist() == published


def test_word_keys_follow_the_documented_formula() -> None:
    # Broder 1997 §2 sentence A, 4-shingles: three distinct shingles, each key by the formula.
    words = BRODER_A.split(" ")
    expected = sorted({key_by_hand(words[i : i + 4], 9) for i in range(len(words) - 3)})
    assert shingle_keys(BRODER_A, ngram=4, seed=9).tolist() == expected


def test_char_keys_follow_the_documented_formula() -> None:
    text = "東京です"
    expected = set()
    for start in range(len(text) - 1):
        key = xxhash.xxh3_64_intdigest(b"shingle:char:2", seed=4)
        for point in text[start : start + 2]:
            key = splitmix64_finaliser(key ^ ord(point))
        expected.add(key)
    assert shingle_keys(text, unit=CHAR, ngram=2, seed=4).tolist() == sorted(expected)


def test_key_stream_keeps_order_and_repeats() -> None:
    stream, used = shingle_key_stream(BRODER_A, ngram=2)
    assert used == WORD
    strings = shingle_strings(BRODER_A, ngram=2)
    assert stream.size == len(strings) == 7
    # equal strings give equal keys at the same places, different strings different keys
    for (i, a), (j, b) in itertools.combinations(enumerate(strings), 2):
        assert (stream[i] == stream[j]) == (a == b)
    assert np.array_equal(np.unique(stream), shingle_keys(BRODER_A, ngram=2))
    assert shingle_key_stream("東京は日本の首都です", unit="auto")[1] == CHAR
    assert shingle_key_stream("...", unit="auto")[0].size == 0


@pytest.mark.parametrize("name", LICENCE_NAMES)
def test_fast_view_equals_the_readable_view_on_licences(name: str) -> None:
    text = licence(name)
    assert b" ".join(view_words(text)).decode() == normalize_view(text)
    assert b" ".join(view_words(text + "é—")).decode() == normalize_view(text + "é—")


def test_fast_view_equals_the_readable_view_for_every_code_point() -> None:
    # Each code point (surrogates excluded) between two letters, upper and lower case alike.
    points = [chr(c) for c in range(sys.maxunicode + 1) if not 0xD800 <= c <= 0xDFFF]
    for begin in range(0, len(points), 4096):
        text = "".join(f"A{c}b " for c in points[begin : begin + 4096])
        assert b" ".join(view_words(text)).decode() == normalize_view(text), begin


@settings(max_examples=200, deadline=None)
@given(text=st.text(max_size=60))
def test_fast_view_equals_the_readable_view_property(text: str) -> None:
    assert b" ".join(view_words(text)).decode() == normalize_view(text)


def non_ascii_doc_pages(count: int) -> list[str]:
    pages = sorted(PYTHON_DOCS.rglob("*.txt"))
    texts = (p.read_text(encoding="utf-8") for p in pages)
    return list(itertools.islice((t for t in texts if not t.isascii()), count))


@pytest.mark.skipif(
    not PYTHON_DOCS.is_dir(), reason="Python docs sources (Debian package python3.11-doc) absent"
)
def test_fast_keys_equal_scalar_keys_on_non_ascii_python_docs() -> None:
    # Real text with non-ASCII characters: Python 3.11 documentation sources (Debian python3.11-doc).
    pages = non_ascii_doc_pages(6)
    assert len(pages) == 6
    for text in pages:
        for unit, ngram in ((WORD, 5), (CHAR, 3), ("auto", 5)):
            assert np.array_equal(
                shingle_keys(text, unit=unit, ngram=ngram, seed=3),
                shingle_keys_scalar(text, unit=unit, ngram=ngram, seed=3),
            )
