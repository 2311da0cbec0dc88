"""The byte tokenizer, checked against RFC 3629 (UTF-8) and HF ``tokenizers`` as a reference library."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from tokenizers import Tokenizer as HFTokenizer
from tokenizers import pre_tokenizers

from corpusprep.errors import DefinitionError, IntegrityError
from corpusprep.tokens import (
    ByteTokenizer,
    Tokenizer,
    TokenizerConfig,
    build_tokenizer,
    byte_to_unicode,
)

PYTHON_DOCS = Path("/usr/share/doc/python3.11-doc/html/_sources")
LICENCE_FOLDER = Path("/usr/share/doc")

# Texts of several scripts; the expected bytes are not taken from here but from RFC 3629 below.
MULTILINGUAL = (
    "Grüße aus Köln, naïve café",
    "Ελληνικά και Русский язык",
    "日本語のテキスト、한국어, 中文",
    "עברית ועربية",
    "हिन्दी देवनागरी",
    "emoji 🤖🧪 and music 𝄞 and flags 🇳🇿",
    "controls \x00\x01\x1f\x7f and \t tabs \r\n lines \u2028 sep \ufeff bom",
    "special strings inside text: <eod><pad><bod> <eod>",
)

# A text strategy that often contains the special strings and the characters tokenizers trip over.
TEXTS = st.lists(
    st.one_of(
        st.text(),
        st.sampled_from(["<eod>", "<pad>", "<bod>", "\x00", "𝄞", "\U0010ffff", "\r\n", " ", "Ġ", "Ā"]),
    ),
    max_size=12,
).map("".join)


@pytest.fixture(scope="module")
def with_bod() -> ByteTokenizer:
    return ByteTokenizer(config=TokenizerConfig(begin_of_document="<bod>"))


@pytest.fixture(scope="module")
def reference(tmp_path_factory: pytest.TempPathFactory, with_bod: ByteTokenizer) -> HFTokenizer:
    """The saved file, loaded by HF tokenizers."""
    path = tmp_path_factory.mktemp("tok") / "tokenizer.json"
    with_bod.save(path)
    return HFTokenizer.from_file(str(path))


def test_rfc3629_boundary_bytes() -> None:
    # Source: RFC 3629 section 3 (byte lengths and bit layout); encodings as listed in REFERENCES 5.1.
    cases = {
        "\u007f": [0x7F],
        "\u0080": [0xC2, 0x80],
        "\u07ff": [0xDF, 0xBF],
        "\u0800": [0xE0, 0xA0, 0x80],
        "\uffff": [0xEF, 0xBF, 0xBF],
        "\U00010000": [0xF0, 0x90, 0x80, 0x80],
        "\U0010ffff": [0xF4, 0x8F, 0xBF, 0xBF],
        # RFC 3629 section 7 examples (the section number is recalled, REFERENCES 5.1).
        "A≢Α.": [0x41, 0xE2, 0x89, 0xA2, 0xCE, 0x91, 0x2E],
        "한국어": [0xED, 0x95, 0x9C, 0xEA, 0xB5, 0xAD, 0xEC, 0x96, 0xB4],
        "日本語": [0xE6, 0x97, 0xA5, 0xE6, 0x9C, 0xAC, 0xE8, 0xAA, 0x9E],
        "\ufeff\U000233b4": [0xEF, 0xBB, 0xBF, 0xF0, 0xA3, 0x8E, 0xB4],
    }
    tokenizer = ByteTokenizer()
    encoded = tokenizer.encode_batch(list(cases))
    for (text, expected), ids in zip(cases.items(), encoded, strict=True):
        assert ids.tolist() == expected, text
        assert ids.dtype == np.uint8
        assert tokenizer.decode(ids) == text


def test_lone_surrogate_is_refused() -> None:
    # RFC 3629 section 3: surrogates U+D800..DFFF must not be encoded.
    with pytest.raises(UnicodeEncodeError):
        ByteTokenizer().encode_batch(["a\ud800b"])


def test_special_ids_and_vocab_size() -> None:
    plain = ByteTokenizer()
    assert plain.special_ids() == {"end_of_document": 256, "pad": 257}
    assert plain.vocab_size == 258
    full = ByteTokenizer(config=TokenizerConfig(begin_of_document="<bod>", end_of_document="<end>"))
    assert full.special_ids() == {"end_of_document": 256, "begin_of_document": 257, "pad": 258}
    assert full.vocab_size == 259
    assert isinstance(full, Tokenizer)
    assert isinstance(build_tokenizer(TokenizerConfig()), ByteTokenizer)


def test_special_strings_in_text_stay_bytes(with_bod: ByteTokenizer) -> None:
    (ids,) = with_bod.encode_batch(["a<eod>b<bod><pad>"])
    assert ids.max() < 256
    assert ids.tolist() == list(b"a<eod>b<bod><pad>")


def test_alphabet_is_hf_byte_level_alphabet() -> None:
    # Reference: tokenizers.pre_tokenizers.ByteLevel.alphabet() (REFERENCES 8: it has 256 symbols).
    table = byte_to_unicode()
    assert len(set(table)) == 256
    assert set(table) == set(pre_tokenizers.ByteLevel.alphabet())


def test_saved_file_is_hf_canonical(with_bod: ByteTokenizer, reference: HFTokenizer) -> None:
    # HF re-serialises the loaded file to the same JSON: nothing in our file was ignored or defaulted.
    assert json.loads(reference.to_str()) == json.loads(with_bod.hf_json())
    assert reference.get_vocab_size() == with_bod.vocab_size
    for role, token_id in with_bod.special_ids().items():
        text = with_bod.config.specials()[role]
        assert reference.token_to_id(text) == token_id
        assert reference.id_to_token(token_id) == text


def test_save_is_byte_identical(tmp_path: Path, with_bod: ByteTokenizer) -> None:
    first, second = tmp_path / "a.json", tmp_path / "b.json"
    with_bod.save(first)
    ByteTokenizer(config=TokenizerConfig(begin_of_document="<bod>")).save(second)
    assert first.read_bytes() == second.read_bytes()
    assert not list(tmp_path.glob(".*partial"))


def _real_texts() -> list[str]:
    paths = sorted(PYTHON_DOCS.glob("library/[a-d]*.rst.txt")) + sorted(PYTHON_DOCS.glob("howto/unicode*"))
    paths += sorted(LICENCE_FOLDER.glob("*/copyright"))[:80]
    texts = []
    for path in paths:
        data = path.read_bytes()
        texts.append(data.decode("utf-8", errors="replace"))
    return texts


def test_same_ids_as_hf_on_real_text(with_bod: ByteTokenizer, reference: HFTokenizer) -> None:
    texts = _real_texts() + list(MULTILINGUAL)
    if len(texts) < 20:
        pytest.skip("the Python documentation and licence texts are not installed here")
    assert any(max(text) > "\u3000" for text in texts), "no text beyond the basic planes was found"
    ours = with_bod.encode_batch(texts)
    theirs = reference.encode_batch(texts)
    for text, ids, encoding in zip(texts, ours, theirs, strict=True):
        assert ids.tolist() == encoding.ids, text[:80]
        assert reference.decode(encoding.ids) == text
        assert with_bod.decode(ids) == text


@settings(max_examples=300, deadline=None)
@given(text=TEXTS)
def test_same_ids_as_hf_on_any_text(with_bod: ByteTokenizer, reference: HFTokenizer, text: str) -> None:
    (ids,) = with_bod.encode_batch([text])
    assert ids.tolist() == reference.encode(text).ids
    assert with_bod.decode(ids) == text
    assert reference.decode(ids.tolist()) == text


@settings(max_examples=300, deadline=None)
@given(ids=st.lists(st.integers(min_value=0, max_value=258), max_size=40))
def test_decode_of_any_ids_matches_hf(
    with_bod: ByteTokenizer, reference: HFTokenizer, ids: list[int]
) -> None:
    # Random ids include broken UTF-8 (windows cut inside characters) and specials; HF's
    # ByteLevel decoder is the reference for how they are shown.
    assert with_bod.decode(ids) == reference.decode(ids)
    assert with_bod.decode(np.array(ids, dtype=np.uint16)) == reference.decode(ids)


def test_decode_rejects_ids_outside_vocabulary() -> None:
    with pytest.raises(IntegrityError, match="258"):
        ByteTokenizer().decode([1, 258])
    with pytest.raises(IntegrityError, match="-1"):
        ByteTokenizer().decode([-1])


@pytest.mark.parametrize(
    ("settings_", "key"),
    [
        ({"end_of_document": ""}, "tokenizer.end_of_document"),
        ({"pad": ""}, "tokenizer.pad"),
        ({"pad": "<eod>"}, "tokenizer.pad"),
        ({"begin_of_document": "<eod>"}, "tokenizer.begin_of_document"),
        ({"begin_of_document": "<pad>"}, "tokenizer.pad"),
        ({"end_of_document": "<e o d>"}, "tokenizer.end_of_document"),
        ({"end_of_document": "x"}, "tokenizer.end_of_document"),
        ({"end_of_document": "<fin\x00>"}, "tokenizer.end_of_document"),
        ({"pad": "<päd>"}, "tokenizer.pad"),
        ({"kind": "morphemes"}, "tokenizer.kind"),
    ],
)
def test_bad_settings_name_the_key(settings_: dict[str, str], key: str) -> None:
    with pytest.raises(DefinitionError, match=f"^{key} = "):
        TokenizerConfig(**settings_)


def test_describe() -> None:
    tokenizer = ByteTokenizer(config=TokenizerConfig(begin_of_document="<bod>"))
    description = tokenizer.describe()
    assert description["kind"] == "bytes"
    assert description["vocab_size"] == 259
    assert description["special_tokens"] == {
        "end_of_document": {"text": "<eod>", "id": 256},
        "begin_of_document": {"text": "<bod>", "id": 257},
        "pad": {"text": "<pad>", "id": 258},
    }
    json.dumps(description)  # the manifest must be able to hold it
