"""The compiled shingle and signature kernels, checked against the xxhash library, against the
NumPy paths they replace (kept as references), and against exact-integer signatures."""

from __future__ import annotations

import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import xxhash
from hypothesis import given, settings
from hypothesis import strategies as st

from corpusprep import shingle_kernels as kernels
from corpusprep import shingles
from corpusprep.minhash import MultiplyShift, signature_matrix, signature_matrix_numpy, signature_scalar
from corpusprep.shingles import (
    AUTO,
    CHAR,
    UNITS,
    WORD,
    exact_jaccard,
    exact_jaccard_sorting,
    normalize_view,
    shingle_key_stream,
    shingle_key_stream_numpy,
    shingle_keys_scalar,
)

ROOT = Path(__file__).resolve().parent.parent
LICENCES = ROOT / "fixtures" / "licences"
SEEDS = st.integers(min_value=0, max_value=2**64 - 1)


@pytest.fixture(autouse=True)
def compiled_at_once() -> Iterator[None]:
    """Every test here runs the compiled path from the first call."""
    previous = shingles.set_compiled_after(0)
    yield
    shingles.set_compiled_after(previous)


def assert_same_stream(text: str, unit: str, ngram: int, seed: int) -> None:
    fast_keys, fast_unit = shingle_key_stream(text, unit=unit, ngram=ngram, seed=seed)
    slow_keys, slow_unit = shingle_key_stream_numpy(text, unit=unit, ngram=ngram, seed=seed)
    assert fast_unit == slow_unit
    assert fast_keys.dtype == np.uint64
    np.testing.assert_array_equal(fast_keys, slow_keys)


# --- XXH3-64 against the xxhash library (reference implementation of XXH3) -------------------


@pytest.mark.parametrize("seed", [0, 1, 0x9E3779B97F4A7C15, 2**64 - 1])
def test_xxh3_equals_the_library_at_every_length(seed: int) -> None:
    # Each length 0..240 crosses one of XXH3's paths (0, 1-3, 4-8, 9-16, 17-128, 129-240).
    rng = np.random.default_rng(seed % 1000)
    data = rng.integers(0, 256, size=300, dtype=np.uint8)
    for length in range(kernels.LONGEST_WORD + 1):
        for start in (0, 7):
            expected = xxhash.xxh3_64_intdigest(data[start : start + length].tobytes(), seed=seed)
            assert int(kernels.xxh3_64(data, start, length, np.uint64(seed), kernels.SECRET)) == expected


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=kernels.LONGEST_WORD), SEEDS)
def test_xxh3_equals_the_library_property(data: bytes, seed: int) -> None:
    array = np.frombuffer(data, dtype=np.uint8)
    got = int(kernels.xxh3_64(array, 0, len(data), np.uint64(seed), kernels.SECRET))
    assert got == xxhash.xxh3_64_intdigest(data, seed=seed)


# --- shingle keys: compiled path == NumPy reference ------------------------------------------

MIXED = st.text(
    alphabet=st.sampled_from(
        list("abcXYZ019 \t\n.,;!?-—«»“”・、。")
        + list("東京日本首都です")
        + list("カタカナ")
        + list("ภาษาไทย")
        + list("éüßİſﬁΣσς")
        + ["\u00a0", "\u3000", "\u2028", "\x1c", "\x85", "\u0301", "😀", "\U00020000"]
    ),
    max_size=200,
)


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=300), st.sampled_from(UNITS), st.integers(1, 8), SEEDS)
def test_stream_equals_reference_on_arbitrary_unicode(text: str, unit: str, ngram: int, seed: int) -> None:
    assert_same_stream(text, unit, ngram, seed)


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet=st.characters(max_codepoint=127), max_size=300), st.sampled_from(UNITS),
       st.integers(1, 8), SEEDS)  # fmt: skip
def test_stream_equals_reference_on_ascii(text: str, unit: str, ngram: int, seed: int) -> None:
    assert_same_stream(text, unit, ngram, seed)


@settings(max_examples=300, deadline=None)
@given(MIXED, st.sampled_from(UNITS), st.integers(1, 6), SEEDS)
def test_stream_equals_reference_on_mixed_scripts(text: str, unit: str, ngram: int, seed: int) -> None:
    assert_same_stream(text, unit, ngram, seed)


@settings(max_examples=150, deadline=None)
@given(
    st.lists(
        st.tuples(st.sampled_from(["a", "Z", "é", "東", "😀", "ß"]), st.integers(1, 400)),
        min_size=1,
        max_size=4,
    ),
    st.sampled_from(UNITS),
    st.integers(1, 3),
    SEEDS,
)
def test_stream_equals_reference_on_very_long_words(
    runs: list[tuple[str, int]], unit: str, ngram: int, seed: int
) -> None:
    # Words of up to 1600 UTF-8 bytes: past the 240 bytes the kernel hashes itself.
    text = " ".join(letter * count for letter, count in runs)
    assert_same_stream(text, unit, ngram, seed)


@pytest.mark.parametrize("unit", UNITS)
def test_words_around_the_longest_hashed_length(unit: str) -> None:
    # 240 and 241 bytes in UTF-8 from letters of 1, 2, 3 and 4 bytes ("ſ" casefolds to "s").
    for letter, width in (("a", 1), ("é", 2), ("東", 3), ("😀", 4), ("ſ", 1)):
        for size in range(kernels.LONGEST_WORD - 5, kernels.LONGEST_WORD + 6):
            count = -(-size // width)
            text = f"x {letter * count} y, {letter * (count + 1)}!"
            assert_same_stream(text, unit, 2, 3)


@pytest.mark.parametrize("unit", UNITS)
def test_texts_that_casefolding_lengthens_a_lot(unit: str) -> None:
    # "ß" casefolds to "ss", "ΐ" to three code points, "ﬃ" to "ffi" (Unicode CaseFolding.txt, status F):
    # past the kernel's first guess of the room needed.
    for text in ("ß" * 1000, "ΐ " * 500, "Straße ﬃ ΐ. " * 300, "ß" + "ΐ" * 70 + " 東京" * 3):
        assert_same_stream(text, unit, 3, 1)


@pytest.mark.parametrize("text", ["", " ", "...!?", " \t\n\u3000", "—«»", "a", "東"])
@pytest.mark.parametrize("unit", UNITS)
def test_empty_and_tiny_views(text: str, unit: str) -> None:
    for ngram in (1, 5):
        assert_same_stream(text, unit, ngram, 0)


def test_auto_picks_the_same_unit_as_the_reference() -> None:
    assert shingle_key_stream("東京は日本の首都です", unit=AUTO)[1] == CHAR
    assert shingle_key_stream("東京 is the capital of Japan", unit=AUTO)[1] == WORD
    assert shingle_key_stream("...", unit=AUTO)[1] == WORD


def test_every_code_point_gives_the_readable_view() -> None:
    # The compiled view (casefolding by table, or after str.casefold) equals normalize_view
    # (str.casefold + the P* table) on every code point, each between two words.
    separators = shingles._separator_table()
    fold, expansions = shingles._fold_tables(kernels.EXPANDS)
    for begin in range(0, sys.maxunicode + 1, 0x8000):
        end = min(begin + 0x8000, sys.maxunicode + 1)
        points = [p for p in range(begin, end) if not 0xD800 <= p <= 0xDFFF]  # no lone surrogates
        text = " x ".join(chr(p) for p in points)
        expected = normalize_view(text)
        raw = np.frombuffer(text.encode("utf-32-le"), dtype="<u4")
        view = kernels.folded_view(raw, fold, expansions, separators)
        assert view.tobytes().decode("utf-32-le") == expected, hex(begin)
        folded = np.frombuffer(text.casefold().encode("utf-32-le"), dtype="<u4")
        view = kernels.view_points(folded, separators)
        assert view.tobytes().decode("utf-32-le") == expected, hex(begin)


def test_fold_tables_are_str_casefold_on_every_code_point() -> None:
    fold, expansions = shingles._fold_tables(kernels.EXPANDS)
    for code in range(sys.maxunicode + 1):
        value = int(fold[code])
        if value & kernels.EXPANDS:
            row = expansions[value ^ kernels.EXPANDS]
            got = "".join(map(chr, row[1 : 1 + row[0]]))
        else:
            got = chr(value)
        assert got == chr(code).casefold(), hex(code)


@pytest.mark.parametrize("name", ["GPL-3", "Apache-2.0", "BSD"])
@pytest.mark.parametrize("unit", UNITS)
def test_keys_equal_the_scalar_definition_on_licences(name: str, unit: str) -> None:
    # Real text against the plain-Python definition of the keys (not the NumPy path).
    text = (LICENCES / f"{name}.txt").read_text(encoding="utf-8")
    for ngram in (1, 5):
        fast = shingles.shingle_keys(text, unit=unit, ngram=ngram, seed=11)
        np.testing.assert_array_equal(fast, shingle_keys_scalar(text, unit=unit, ngram=ngram, seed=11))


def test_no_path_refuses_what_the_other_accepts() -> None:
    with pytest.raises(ValueError, match="ngram"):
        shingle_key_stream("a b", ngram=0)
    with pytest.raises(ValueError, match="unit"):
        shingle_key_stream("a b", unit="letters")


# --- exact Jaccard: binary search == one sort == Python sets ---------------------------------


@settings(max_examples=300, deadline=None)
@given(
    st.lists(st.integers(0, 40) | st.integers(0, 2**64 - 1), max_size=60),
    st.lists(st.integers(0, 40) | st.integers(0, 2**64 - 1), max_size=60),
    st.booleans(),
)
def test_exact_jaccard_equals_sets_and_the_sorting_count(
    first: list[int], second: list[int], as_sets: bool
) -> None:
    left = np.array(sorted(set(first)) if as_sets else first, dtype=np.uint64)
    right = np.array(sorted(set(second)) if as_sets else second, dtype=np.uint64)
    got = exact_jaccard(left, right)
    assert got == exact_jaccard_sorting(left, right)
    # The definition on Python sets (Broder 1997, resemblance r(A, B) = |A ∩ B| / |A ∪ B|).
    union = set(first) | set(second)
    assert got == (len(set(first) & set(second)) / len(union) if union else 0.0)


# --- signatures: compiled == NumPy == exact integers ------------------------------------------


@settings(max_examples=150, deadline=None)
@given(
    st.lists(st.lists(st.integers(0, 2**64 - 1), max_size=40), max_size=12),
    st.integers(1, 300),
    SEEDS,
)
def test_signatures_equal_numpy_and_scalar(sets: list[list[int]], permutations: int, seed: int) -> None:
    functions = MultiplyShift(permutations=permutations, seed=seed)
    key_sets = [np.array(keys, dtype=np.uint64) for keys in sets]
    fast = signature_matrix(key_sets, functions)
    assert fast.dtype == np.uint32
    assert fast.shape == (len(sets), permutations)
    np.testing.assert_array_equal(fast, signature_matrix_numpy(key_sets, functions))
    for row, keys in zip(fast.tolist(), sets, strict=True):
        assert row == signature_scalar(keys, functions)


def test_signatures_of_licence_shingles_equal_numpy() -> None:
    functions = MultiplyShift(permutations=256, seed=5)
    texts = [path.read_text(encoding="utf-8") for path in sorted(LICENCES.glob("*.txt"))]
    key_sets = [shingle_key_stream(text, unit=WORD, ngram=5, seed=5)[0] for text in texts]
    key_sets.append(np.empty(0, dtype=np.uint64))
    np.testing.assert_array_equal(
        signature_matrix(key_sets, functions), signature_matrix_numpy(key_sets, functions)
    )


def test_kernels_are_not_imported_for_a_small_run() -> None:
    # A process that shingles and signs a little text never imports numba; past the threshold it does.
    code = (
        "import sys\n"
        "from corpusprep.near import NearConfig, document_shingles\n"
        "from corpusprep import shingles\n"
        "config = NearConfig()\n"
        "document_shingles('A rose is a rose is a rose. ' * 100, config)\n"
        "print('numba' in sys.modules)\n"
        "shingles.set_compiled_after(1000)\n"
        "document_shingles('A rose is a rose is a rose. ' * 100, config)\n"
        "print('numba' in sys.modules)\n"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=True, timeout=120
    )
    assert result.stdout.split() == ["False", "True"]


def test_never_keeps_the_numpy_path() -> None:
    shingles.set_compiled_after(None)
    assert shingles.compiled_kernels(10**12) is None
