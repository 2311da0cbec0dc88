"""Counted vocabularies (kinds "characters" and "words"), checked against references outside the project.

- vocabularies against counts made here with ``collections.Counter`` on the same train texts;
- the word rule against a pure-Python splitter built on ``unicodedata`` general categories and the
  Unicode White_Space property (the 25 code points of PropList.txt, listed from memory below);
- the saved ``tokenizer.json`` against HF ``tokenizers`` loading it (ids and decoding);
- real text: Python docs and licence texts installed by Debian packages (skipped when absent).
"""

from __future__ import annotations

import pickle
import unicodedata
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from tokenizers import Tokenizer as HFTokenizer

from corpusprep.bpe import JsonTokenizer
from corpusprep.tokens import TokenizerConfig, build_tokenizer
from corpusprep.vocab import CharacterTokenizer, word_pre_tokenizer

PYTHON_DOCS = Path("/usr/share/doc/python3.11-doc/html/_sources")
COMMON_LICENCES = Path("/usr/share/common-licenses")

# Unicode White_Space (PropList.txt), from memory: 0009..000D, 0020, 0085, 00A0, 1680, 2000..200A,
# 2028, 2029, 202F, 205F, 3000. Python's str.isspace() differs (it adds U+001C..U+001F).
WHITE_SPACE = frozenset(
    [
        *map(chr, range(0x09, 0x0E)),
        *(" ", "\x85", "\xa0", "\u1680"),
        *map(chr, range(0x2000, 0x200B)),
        *("\u2028", "\u2029", "\u202f", "\u205f", "\u3000"),
    ]
)

# Handwritten texts of several scripts (Japanese, Russian, Greek, emoji, combining marks).
MULTILINGUAL = (
    "日本語のテキストです。東京と大阪。",
    "Русский текст: съешь же ещё этих мягких французских булок.",
    "Ελληνικά: ξεσκεπάζω την ψυχοφθόρα βδελυγμία.",
    "emoji 🤖🧪 flags 🇳🇿 and a family 👩‍👩‍👧",
    "combining e\u0301 and precomposed é, Devanagari हिन्दी, snake_case x²",
    "special strings inside text: <eod><pad><unk> <eod>",
)


def _is_word_char(char: str) -> bool:
    # Unicode general categories L*, M*, N*, Pc (Python's unicodedata, Unicode 14.0 in Python 3.11).
    category = unicodedata.category(char)
    return category[0] in "LMN" or category == "Pc"


def _kind(char: str) -> str:
    return "w" if _is_word_char(char) else "s" if char in WHITE_SPACE else "o"


def python_word_pieces(text: str) -> list[str]:
    """The word rule written independently: runs of word characters, runs of White_Space, single others."""
    pieces: list[str] = []
    kinds: list[str] = []
    for char in text:
        kind = _kind(char)
        if pieces and kind != "o" and kinds[-1] == kind:
            pieces[-1] += char
        else:
            pieces.append(char)
            kinds.append(kind)
    return pieces


def _assigned(text: str) -> bool:
    # Code points unassigned in Python's Unicode 14.0 may be assigned in HF's newer Oniguruma tables.
    return all(unicodedata.category(char) != "Cn" for char in text)


def _read(path: Path) -> str:
    return path.read_bytes().decode("utf-8", errors="replace")


@pytest.fixture(scope="module")
def real_texts() -> list[str]:
    paths = sorted(PYTHON_DOCS.glob("library/[a-f]*.rst.txt")) + sorted(PYTHON_DOCS.glob("howto/*.txt"))
    paths += sorted(p for p in COMMON_LICENCES.glob("*") if p.is_file())
    texts = [_read(path) for path in paths]
    if len(texts) < 40:
        pytest.skip("the Python documentation (python3.11-doc) and licence texts are not installed here")
    return [text for text in texts if _assigned(text)] + list(MULTILINGUAL)


def _source(texts: list[str]) -> Iterator[str]:
    return iter(texts)


# A text strategy rich in the characters tokenizers trip over.
TEXTS = st.lists(
    st.one_of(
        st.text(st.characters(blacklist_categories=("Cs", "Cn"))),
        st.sampled_from(["<eod>", "<pad>", "<unk>", "\r\n", "\n\n", "  ", "e\u0301", "𝄞", "_", "x²"]),
    ),
    max_size=12,
).map("".join)


# ------------------------------------------------------------------ characters


def test_character_vocabulary_equals_counter(real_texts: list[str]) -> None:
    train = real_texts[::2]
    config = TokenizerConfig(kind="characters", vocab_size=120, min_count=3)
    tokenizer = build_tokenizer(config, lambda: _source(train))
    assert isinstance(tokenizer, CharacterTokenizer)
    # Reference: collections.Counter over the same texts; order by descending count, ties by code point.
    counts = Counter("".join(train))
    expected = sorted((c for c, n in counts.items() if n >= 3), key=lambda c: (-counts[c], ord(c)))[:117]
    assert list(tokenizer.characters) == expected
    assert tokenizer.tokens()[:3] == ("<eod>", "<pad>", "<unk>")
    assert tokenizer.vocab_size == 3 + len(expected) <= 120
    training = tokenizer.describe()["training"]
    assert isinstance(training, dict)
    assert training["documents"] == len(train)
    assert training["occurrences"] == sum(counts.values())
    assert training["distinct"] == len(counts)
    assert training["covered"] == sum(counts[c] for c in expected)


def test_characters_min_count_and_cap() -> None:
    texts = ["aaab", "bbc", "ccd"]
    tokenizer = build_tokenizer(TokenizerConfig(kind="characters", min_count=2), lambda: _source(texts))
    assert isinstance(tokenizer, CharacterTokenizer)
    # Counter("aaabbbccccd"): a 3, b 3, c 3, d 1 -> d dropped; ties by code point.
    assert tokenizer.characters == "abc"
    capped = build_tokenizer(
        TokenizerConfig(kind="characters", min_count=1, vocab_size=5), lambda: _source(texts)
    )
    assert isinstance(capped, CharacterTokenizer)
    assert capped.characters == "ab"


def test_character_ids_and_unknowns(real_texts: list[str]) -> None:
    train = real_texts[:20]
    tokenizer = build_tokenizer(TokenizerConfig(kind="characters", min_count=1), lambda: _source(train))
    assert isinstance(tokenizer, CharacterTokenizer)
    known = set(tokenizer.characters)
    for text, ids in zip(real_texts, tokenizer.encode_batch(real_texts), strict=True):
        assert len(ids) == len(text)
        expected = "".join(c if c in known else "<unk>" for c in text)
        assert tokenizer.decode(ids) == expected
    for text in train:
        (ids,) = tokenizer.encode_batch([text])
        assert tokenizer.decode(ids) == text  # every train character is in the vocabulary


def test_empty_train_split_gives_only_specials() -> None:
    tokenizer = build_tokenizer(TokenizerConfig(kind="characters"), lambda: _source([]))
    assert tokenizer.vocab_size == 3
    (ids,) = tokenizer.encode_batch(["xyz"])
    assert ids.tolist() == [2, 2, 2]
    words = build_tokenizer(TokenizerConfig(kind="words"), lambda: _source([]))
    assert words.vocab_size == 3
    assert words.encode_batch(["a b"])[0].tolist() == [2, 2, 2]


@pytest.fixture(scope="module")
def characters(real_texts: list[str]) -> CharacterTokenizer:
    config = TokenizerConfig(kind="characters", begin_of_document="<bod>", min_count=1)
    tokenizer = build_tokenizer(config, lambda: _source([*real_texts[:30], "<eod><pad><bod><unk>"]))
    assert isinstance(tokenizer, CharacterTokenizer)
    return tokenizer


@pytest.fixture(scope="module")
def characters_hf(characters: CharacterTokenizer, tmp_path_factory: pytest.TempPathFactory) -> HFTokenizer:
    path = tmp_path_factory.mktemp("chars") / "tokenizer.json"
    characters.save(path)
    return HFTokenizer.from_file(str(path))


def test_character_file_gives_the_same_ids_on_real_text(
    characters: CharacterTokenizer, characters_hf: HFTokenizer, real_texts: list[str]
) -> None:
    texts = real_texts[::4] + list(MULTILINGUAL)  # HF's per-character split is slow; a quarter is plenty
    ours = characters.encode_batch(texts)
    theirs = characters_hf.encode_batch(texts)
    for ids, encoding in zip(ours, theirs, strict=True):
        assert ids.tolist() == encoding.ids
        assert characters.decode(ids) == characters_hf.decode(encoding.ids)


@settings(max_examples=200, deadline=None)
@given(text=TEXTS)
def test_character_file_gives_the_same_ids_on_any_text(
    characters: CharacterTokenizer, characters_hf: HFTokenizer, text: str
) -> None:
    (ids,) = characters.encode_batch([text])
    assert ids.tolist() == characters_hf.encode(text).ids
    specials = {characters.special_ids()[role] for role in ("end_of_document", "begin_of_document", "pad")}
    assert not specials & set(ids.tolist())  # special strings inside text are ordinary characters


@settings(max_examples=200, deadline=None)
@given(ids=st.lists(st.integers(min_value=0, max_value=60), max_size=30))
def test_character_decode_matches_hf(
    characters: CharacterTokenizer, characters_hf: HFTokenizer, ids: list[int]
) -> None:
    assert characters.decode(ids) == characters_hf.decode(ids, skip_special_tokens=False)


def test_character_tokenizer_pickles(characters: CharacterTokenizer, real_texts: list[str]) -> None:
    again = pickle.loads(pickle.dumps(characters))
    assert again == characters
    for first, second in zip(
        characters.encode_batch(real_texts), again.encode_batch(real_texts), strict=True
    ):
        assert np.array_equal(first, second)


# ------------------------------------------------------------------ words


@settings(max_examples=300, deadline=None)
@given(text=TEXTS)
def test_word_rule_matches_the_python_splitter(text: str) -> None:
    pieces = [piece for piece, _ in word_pre_tokenizer().pre_tokenize_str(text)]
    assert pieces == python_word_pieces(text)
    assert "".join(pieces) == text


def test_word_rule_examples() -> None:
    # Handwritten expectations of the documented rule.
    cases = {
        "Hello,  world!\n\n": ["Hello", ",", "  ", "world", "!", "\n\n"],
        "<eod>": ["<", "eod", ">"],
        "e\u0301t\u00e9 x_1²": ["e\u0301t\u00e9", " ", "x_1²"],
        "日本語。🤖🤖": ["日本語", "。", "🤖", "🤖"],
        "a\u00a0b\u3000c": ["a", "\u00a0", "b", "\u3000", "c"],
    }
    for text, expected in cases.items():
        assert python_word_pieces(text) == expected, text
        assert [p for p, _ in word_pre_tokenizer().pre_tokenize_str(text)] == expected, text


def test_word_vocabulary_equals_counter(real_texts: list[str]) -> None:
    train = real_texts[1::2]
    config = TokenizerConfig(kind="words", vocab_size=3000, min_count=2)
    tokenizer = build_tokenizer(config, lambda: _source(train))
    assert isinstance(tokenizer, JsonTokenizer)
    # Reference: Counter over the independent Python splitter; descending count, ties by code points.
    counts = Counter(piece for text in train for piece in python_word_pieces(text))
    expected = sorted((w for w, n in counts.items() if n >= 2), key=lambda w: (-counts[w], w))[:2997]
    hf = HFTokenizer.from_str(tokenizer.hf_json())
    vocab = hf.get_vocab()
    assert sorted(vocab, key=vocab.__getitem__) == ["<eod>", "<pad>", "<unk>", *expected]
    assert tokenizer.vocab_size == 3000
    training = tokenizer.describe()["training"]
    assert isinstance(training, dict)
    assert training["occurrences"] == sum(counts.values())
    assert training["covered"] == sum(counts[w] for w in expected)


def test_word_round_trip_and_unknowns(real_texts: list[str]) -> None:
    train = real_texts[:25]
    tokenizer = build_tokenizer(
        TokenizerConfig(kind="words", vocab_size=1 << 20, min_count=1), lambda: _source(train)
    )
    for text, ids in zip(train, tokenizer.encode_batch(train), strict=True):
        assert tokenizer.decode(ids) == text  # every piece of a train text is in the vocabulary
        assert len(ids) == len(python_word_pieces(text))
    small = build_tokenizer(TokenizerConfig(kind="words", vocab_size=200), lambda: _source(train))
    vocab = HFTokenizer.from_str(small.hf_json()).get_vocab()
    for text, ids in zip(real_texts, small.encode_batch(real_texts), strict=True):
        expected = "".join(p if p in vocab else "<unk>" for p in python_word_pieces(text))
        assert small.decode(ids) == expected


@pytest.fixture(scope="module")
def words(real_texts: list[str]) -> JsonTokenizer:
    config = TokenizerConfig(kind="words", begin_of_document="<bod>", vocab_size=5000, min_count=1)
    tokenizer = build_tokenizer(config, lambda: _source([*real_texts[:30], "<eod> <pad> <bod> <unk>"]))
    assert isinstance(tokenizer, JsonTokenizer)
    return tokenizer


@settings(max_examples=200, deadline=None)
@given(text=TEXTS)
def test_word_file_gives_the_same_ids_and_no_special_ids(
    words: JsonTokenizer, tmp_path_factory: pytest.TempPathFactory, text: str
) -> None:
    reference = HFTokenizer.from_str(words.hf_json())
    (ids,) = words.encode_batch([text])
    assert ids.tolist() == reference.encode(text).ids
    specials = {words.special_ids()[role] for role in ("end_of_document", "pad", "begin_of_document")}
    assert not specials & set(ids.tolist())


def test_word_tokenizer_pickles_and_saves_identically(
    words: JsonTokenizer, real_texts: list[str], tmp_path: Path
) -> None:
    again = pickle.loads(pickle.dumps(words))
    for first, second in zip(words.encode_batch(real_texts), again.encode_batch(real_texts), strict=True):
        assert np.array_equal(first, second)
    words.save(tmp_path / "a.json")
    again.save(tmp_path / "b.json")
    assert (tmp_path / "a.json").read_bytes() == (tmp_path / "b.json").read_bytes()
    loaded = HFTokenizer.from_file(str(tmp_path / "a.json"))
    assert loaded.token_to_id("<bod>") == words.special_ids()["begin_of_document"] == 1


# ------------------------------------------------------------------ fitted on train only


@pytest.mark.parametrize("kind", ["characters", "words"])
def test_text_only_outside_train_never_enters_the_vocabulary(kind: str, real_texts: list[str]) -> None:
    train = real_texts[:15]
    planted = "Ꙩꙮꙮ zyxwquorblat"  # U+A668, U+A66E: Cyrillic letters absent from the train texts
    assert not any(planted.split()[0][0] in text or "zyxwquorblat" in text for text in train)
    held_out = [f"validation text {planted} {planted}", f"test text {planted}"]
    calls: list[int] = []

    def train_texts() -> Iterator[str]:
        calls.append(1)
        return _source(train)

    tokenizer = build_tokenizer(TokenizerConfig(kind=kind, vocab_size=1 << 16, min_count=1), train_texts)
    assert calls == [1]  # read once, as a stream
    unknown = tokenizer.special_ids()["unknown"]
    for ids in tokenizer.encode_batch(held_out):
        decoded = tokenizer.decode(ids)
        assert "ꙮ" not in decoded and "Ꙩ" not in decoded
        if kind == "words":
            assert "zyxwquorblat" not in decoded
        assert unknown in ids.tolist()


def test_sample_documents_caps_the_training_texts(real_texts: list[str]) -> None:
    capped = build_tokenizer(
        TokenizerConfig(kind="words", sample_documents=5, min_count=1), lambda: _source(real_texts)
    )
    first_five = build_tokenizer(TokenizerConfig(kind="words", min_count=1), lambda: _source(real_texts[:5]))
    assert capped.hf_json() == first_five.hf_json()  # type: ignore[attr-defined]
    facts = capped.describe()["training"]
    assert isinstance(facts, dict)
    assert facts["documents"] == 5
    assert facts["sample_documents"] == 5
