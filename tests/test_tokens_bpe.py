"""Trained byte-level BPE and the user's tokenizer file, checked against HF ``tokenizers`` used directly.

The reference is HF ``tokenizers`` trained here with the settings of its "training from memory"
guide (REFERENCES 8): ``models.BPE()``, ``pre_tokenizers.ByteLevel(add_prefix_space=False)``,
``decoders.ByteLevel()``, ``trainers.BpeTrainer(vocab_size, min_frequency, special_tokens,
initial_alphabet=ByteLevel.alphabet())`` and ``train_from_iterator`` on the same texts. Real text:
Python docs and licence texts installed by Debian packages (skipped when absent).
"""

from __future__ import annotations

import json
import pickle
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from tokenizers import AddedToken, decoders, models, pre_tokenizers, processors, trainers
from tokenizers import Tokenizer as HFTokenizer

from corpusprep.bpe import JsonTokenizer
from corpusprep.errors import DefinitionError
from corpusprep.tokens import TokenizerConfig, build_tokenizer

PYTHON_DOCS = Path("/usr/share/doc/python3.11-doc/html/_sources")
LICENCE_FOLDER = Path("/usr/share/doc")

# Handwritten texts of several scripts (Japanese, Russian, Greek, emoji, controls).
MULTILINGUAL = (
    "日本語のテキストです。東京と大阪、そして京都。",
    "Русский текст: съешь же ещё этих мягких французских булок.",
    "Ελληνικά: ξεσκεπάζω την ψυχοφθόρα βδελυγμία.",
    "emoji 🤖🧪 flags 🇳🇿 family 👩‍👩‍👧 music 𝄞",
    "controls \x00\x01\x1f\x7f, tabs \t, lines \r\n, separator \u2028, bom \ufeff, nbsp \xa0.",
    "special strings inside text: <eod><pad><bod> <eod> <|endoftext|>",
)

TEXTS = st.lists(
    st.one_of(
        st.text(st.characters(blacklist_categories=("Cs",))),
        st.sampled_from(
            ["<eod>", "<pad>", "<bod>", "<|endoftext|>", " <eod>", "\x00", "𝄞", "\r\n", "Ġ", "Ā"]
        ),
    ),
    max_size=12,
).map("".join)


@pytest.fixture(scope="module")
def real_texts() -> list[str]:
    paths = sorted(PYTHON_DOCS.glob("library/[a-c]*.rst.txt")) + sorted(PYTHON_DOCS.glob("howto/[a-l]*.txt"))
    paths += sorted(LICENCE_FOLDER.glob("*/copyright"))[:60]
    texts = [path.read_bytes().decode("utf-8", errors="replace") for path in paths]
    if len(texts) < 40:
        pytest.skip("the Python documentation (python3.11-doc) and licence texts are not installed here")
    return texts + list(MULTILINGUAL)


def _reference_bpe(
    texts: list[str], *, vocab_size: int, min_frequency: int, specials: list[str]
) -> HFTokenizer:
    """HF tokenizers trained directly with the guide's settings (REFERENCES 8)."""
    tokenizer = HFTokenizer(models.BPE())
    tokenizer.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tokenizer.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=vocab_size,
        min_frequency=min_frequency,
        special_tokens=specials,
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    tokenizer.train_from_iterator(texts, trainer=trainer, length=len(texts))
    return tokenizer


@pytest.fixture(scope="module")
def train(real_texts: list[str]) -> list[str]:
    return real_texts[::2]


@pytest.fixture(scope="module")
def bpe(train: list[str]) -> JsonTokenizer:
    config = TokenizerConfig(kind="bpe", begin_of_document="<bod>", vocab_size=3000, min_count=2)
    tokenizer = build_tokenizer(config, lambda: iter(train))
    assert isinstance(tokenizer, JsonTokenizer)
    return tokenizer


@pytest.fixture(scope="module")
def reference(train: list[str]) -> HFTokenizer:
    reference = _reference_bpe(train, vocab_size=3000, min_frequency=2, specials=["<eod>", "<bod>", "<pad>"])
    # The reference keeps the specials as HF added tokens; with this switch HF treats their strings in
    # the text as text, which is our rule (corpusprep.tokens docstring).
    reference.encode_special_tokens = True
    return reference


@pytest.fixture(scope="module")
def saved(bpe: JsonTokenizer, tmp_path_factory: pytest.TempPathFactory) -> HFTokenizer:
    path = tmp_path_factory.mktemp("bpe") / "tokenizer.json"
    bpe.save(path)
    return HFTokenizer.from_file(str(path))


def test_trained_model_equals_hf_trained_directly(bpe: JsonTokenizer, reference: HFTokenizer) -> None:
    ours = json.loads(bpe.hf_json())
    theirs = json.loads(reference.to_str())
    assert ours["model"] == theirs["model"]  # same vocabulary and merges, in the same order
    assert ours["pre_tokenizer"] == theirs["pre_tokenizer"]
    assert ours["decoder"] == theirs["decoder"]
    assert ours["added_tokens"] == []
    assert [token["content"] for token in theirs["added_tokens"]] == ["<eod>", "<bod>", "<pad>"]
    assert bpe.special_ids() == {"end_of_document": 0, "begin_of_document": 1, "pad": 2}
    assert bpe.vocab_size == reference.get_vocab_size() == 3000


def test_same_ids_as_hf_on_real_text(
    bpe: JsonTokenizer, reference: HFTokenizer, saved: HFTokenizer, real_texts: list[str]
) -> None:
    ours = bpe.encode_batch(real_texts)
    theirs = reference.encode_batch(real_texts, add_special_tokens=False)
    loaded = saved.encode_batch(real_texts)
    for text, ids, encoding, again in zip(real_texts, ours, theirs, loaded, strict=True):
        assert ids.tolist() == encoding.ids == again.ids, text[:60]


def test_round_trip_on_real_multilingual_text(
    bpe: JsonTokenizer, saved: HFTokenizer, real_texts: list[str]
) -> None:
    assert any(max(text) > "\u3000" for text in real_texts)
    for text, ids in zip(real_texts, bpe.encode_batch(real_texts), strict=True):
        assert bpe.decode(ids) == text
        assert saved.decode(ids.tolist()) == text


@settings(max_examples=300, deadline=None)
@given(text=TEXTS)
def test_same_ids_and_round_trip_on_any_text(
    bpe: JsonTokenizer, reference: HFTokenizer, saved: HFTokenizer, text: str
) -> None:
    (ids,) = bpe.encode_batch([text])
    assert ids.tolist() == reference.encode(text, add_special_tokens=False).ids == saved.encode(text).ids
    assert bpe.decode(ids) == text
    assert not {0, 1, 2} & set(ids.tolist())  # "<eod>" in a text is text, never the special id


@settings(max_examples=200, deadline=None)
@given(ids=st.lists(st.integers(min_value=0, max_value=2999), max_size=30))
def test_decode_of_any_ids_matches_hf(bpe: JsonTokenizer, saved: HFTokenizer, ids: list[int]) -> None:
    assert bpe.decode(ids) == saved.decode(ids, skip_special_tokens=False)
    assert bpe.decode(np.array(ids, dtype=np.uint16)) == saved.decode(ids, skip_special_tokens=False)


def test_specials_decode_as_their_strings(bpe: JsonTokenizer, saved: HFTokenizer) -> None:
    (hello,) = bpe.encode_batch(["hello"])
    ids = [1, *hello.tolist(), 0, 2]
    assert bpe.decode(ids) == "<bod>hello<eod><pad>" == saved.decode(ids)
    for role, token_id in bpe.special_ids().items():
        assert saved.id_to_token(token_id) == bpe.describe()["special_tokens"][role]["text"]  # type: ignore[index]


def test_text_only_outside_train_is_byte_pieces(train: list[str]) -> None:
    planted = "ꙮꙮꙮ Ꙩ"  # U+A66E, U+A668: never in the train texts
    assert not any("ꙮ" in text or "Ꙩ" in text for text in train)
    tokenizer = build_tokenizer(TokenizerConfig(kind="bpe", vocab_size=3000), lambda: iter(train))
    (ids,) = tokenizer.encode_batch([planted])
    vocab = HFTokenizer.from_str(tokenizer.hf_json()).get_vocab()  # type: ignore[attr-defined]
    single_bytes = {token for token in vocab if len(token) == 1}
    tokens = [HFTokenizer.from_str(tokenizer.hf_json()).id_to_token(i) for i in ids.tolist()]  # type: ignore[attr-defined]
    # 3 x 3 UTF-8 bytes, the space byte as its own token, 3 bytes: no merge was learnt for them.
    assert len(tokens) == 13 and set(tokens) <= single_bytes


def test_training_is_deterministic_and_pickles(
    bpe: JsonTokenizer, train: list[str], real_texts: list[str]
) -> None:
    config = TokenizerConfig(kind="bpe", begin_of_document="<bod>", vocab_size=3000, min_count=2)
    again = build_tokenizer(config, lambda: iter(train))
    assert again.hf_json() == bpe.hf_json()  # type: ignore[attr-defined]
    copy = pickle.loads(pickle.dumps(bpe))
    for first, second in zip(
        bpe.encode_batch(real_texts[:20]), copy.encode_batch(real_texts[:20]), strict=True
    ):
        assert np.array_equal(first, second)


def test_describe_has_the_training_facts(bpe: JsonTokenizer, train: list[str]) -> None:
    description = bpe.describe()
    assert description["kind"] == "bpe"
    assert description["vocab_size"] == 3000
    assert description["training"] == {
        "documents": len(train),
        "sample_documents": 0,
        "vocab_size": 3000,
        "min_count": 2,
        "merges": len(json.loads(bpe.hf_json())["model"]["merges"]),
    }
    json.dumps(description)


def test_sample_documents_and_min_count_are_the_trainer_settings(real_texts: list[str]) -> None:
    config = TokenizerConfig(kind="bpe", vocab_size=1000, min_count=5, sample_documents=7)
    ours = build_tokenizer(config, lambda: iter(real_texts))
    reference = _reference_bpe(real_texts[:7], vocab_size=1000, min_frequency=5, specials=["<eod>", "<pad>"])
    assert json.loads(ours.hf_json())["model"] == json.loads(reference.to_str())["model"]  # type: ignore[attr-defined]
    assert ours.describe()["training"]["documents"] == 7  # type: ignore[index]


# ------------------------------------------------------------------ the user's file


def _users_file(folder: Path, train: list[str], *, truncate: bool = False) -> Path:
    """A tokenizer as a user might bring it: GPT-2-like specials as added tokens, a post-processor."""
    tokenizer = _reference_bpe(
        train[:30], vocab_size=800, min_frequency=2, specials=["<|endoftext|>", "[PAD]"]
    )
    tokenizer.add_tokens([AddedToken("ordinary-added", special=False)])
    tokenizer.post_processor = processors.TemplateProcessing(
        single="<|endoftext|> $A", special_tokens=[("<|endoftext|>", 0)]
    )
    if truncate:
        tokenizer.enable_truncation(max_length=4)
    path = folder / "users-tokenizer.json"
    tokenizer.save(str(path))
    return path


def _file_config(path: Path, **settings_: str) -> TokenizerConfig:
    values = {"end_of_document": "<|endoftext|>", "pad": "[PAD]", **settings_}
    return TokenizerConfig(kind="file", file=str(path), **values)


def test_file_gives_the_ids_of_hf_with_special_strings_as_text(
    tmp_path: Path, train: list[str], real_texts: list[str]
) -> None:
    path = _users_file(tmp_path, train, truncate=True)
    tokenizer = build_tokenizer(_file_config(path))
    direct = HFTokenizer.from_file(str(path))
    direct.no_truncation()
    direct.encode_special_tokens = True
    texts = [*real_texts[:40], "a<|endoftext|>b [PAD] ordinary-added"]
    for ids, encoding in zip(
        tokenizer.encode_batch(texts), direct.encode_batch(texts, add_special_tokens=False), strict=True
    ):
        assert ids.tolist() == encoding.ids
        assert len(ids) > 4 or not ids.size  # the file's truncation is switched off
    assert tokenizer.special_ids() == {"end_of_document": 0, "pad": 1}
    (planted,) = tokenizer.encode_batch(["x<|endoftext|>y"])
    assert 0 not in planted.tolist()
    # The saved file gives the same ids with the two documented switches.
    tokenizer.save(tmp_path / "tokenizer.json")
    saved = HFTokenizer.from_file(str(tmp_path / "tokenizer.json"))
    saved.encode_special_tokens = True
    for ids, encoding in zip(
        tokenizer.encode_batch(texts), saved.encode_batch(texts, add_special_tokens=False), strict=True
    ):
        assert ids.tolist() == encoding.ids
    facts = tokenizer.describe()
    assert facts["source_file"]["pad_added"] is False  # type: ignore[index]
    assert facts["encode"] == {"add_special_tokens": False, "encode_special_tokens": True}


def test_file_without_the_pad_gets_one_added_special(tmp_path: Path, train: list[str]) -> None:
    path = _users_file(tmp_path, train)
    size = HFTokenizer.from_file(str(path)).get_vocab_size(with_added_tokens=True)
    tokenizer = build_tokenizer(_file_config(path, pad="<pad>"))
    assert tokenizer.special_ids()["pad"] == size
    assert tokenizer.vocab_size == size + 1
    assert tokenizer.describe()["source_file"]["pad_added"] is True  # type: ignore[index]
    (ids,) = tokenizer.encode_batch(["<pad>"])
    assert size not in ids.tolist()


@pytest.mark.parametrize(
    ("settings_", "key", "words"),
    [
        ({"end_of_document": "<eod>"}, "tokenizer.end_of_document", "not a special token"),
        ({"begin_of_document": "<bod>"}, "tokenizer.begin_of_document", "not a special token"),
        ({"pad": "ordinary-added"}, "tokenizer.pad", "ordinary added token"),
    ],
)
def test_file_errors_name_the_key(
    tmp_path: Path, train: list[str], settings_: dict[str, str], key: str, words: str
) -> None:
    path = _users_file(tmp_path, train)
    with pytest.raises(DefinitionError, match=f"^{key} = .*{words}"):
        build_tokenizer(_file_config(path, **settings_))


def test_file_pad_that_text_can_produce_is_refused(tmp_path: Path, train: list[str]) -> None:
    path = _users_file(tmp_path, train)
    vocab = HFTokenizer.from_file(str(path)).get_vocab(with_added_tokens=False)
    ordinary = min(token for token in vocab if len(token) >= 2 and all("!" <= c <= "~" for c in token))
    with pytest.raises(DefinitionError, match=r"^tokenizer.pad = .*ordinary token of .*vocabulary"):
        build_tokenizer(_file_config(path, pad=ordinary))


def test_missing_or_corrupt_file_names_the_key(tmp_path: Path) -> None:
    with pytest.raises(DefinitionError, match=r"^tokenizer.file = .*no such file"):
        build_tokenizer(_file_config(tmp_path / "absent.json"))
    (tmp_path / "broken.json").write_text('{"version": "1.0", "model": ', encoding="utf-8")
    with pytest.raises(DefinitionError, match=r"^tokenizer.file = .*not an HF tokenizers JSON"):
        build_tokenizer(_file_config(tmp_path / "broken.json"))
    (tmp_path / "binary.json").write_bytes(b"\xff\xfe\x00")
    with pytest.raises(DefinitionError, match=r"^tokenizer.file = .*cannot read"):
        build_tokenizer(_file_config(tmp_path / "binary.json"))
    huge = {"version": "1.0", "model": {"type": "WordLevel", "vocab": {"a": 2**32}, "unk_token": "a"}}
    (tmp_path / "huge.json").write_text(json.dumps(huge), encoding="utf-8")
    with pytest.raises(DefinitionError, match=r"^tokenizer.file = "):  # ids beyond uint32 do not load
        build_tokenizer(_file_config(tmp_path / "huge.json"))


def test_file_whose_specials_clash(tmp_path: Path) -> None:
    # Two vocabulary entries on one id; a pre-tokenizer that cuts "<end>" into "<", "end", ">" so
    # that text cannot produce either: the roles would still be indistinguishable, so it is refused.
    document = {
        "version": "1.0",
        "pre_tokenizer": {"type": "Whitespace"},
        "model": {
            "type": "WordLevel",
            "vocab": {"a": 0, "<unk>": 1, "<end>": 2, "<fill>": 2},
            "unk_token": "<unk>",
        },
    }
    path = tmp_path / "clash.json"
    path.write_text(json.dumps(document), encoding="utf-8")
    config = TokenizerConfig(kind="file", file=str(path), end_of_document="<end>", pad="<fill>")
    with pytest.raises(
        DefinitionError, match=r"^tokenizer.end_of_document = '<end>': .*same as tokenizer.pad"
    ):
        build_tokenizer(config)


def test_file_whose_vocabulary_makes_the_special_from_text(tmp_path: Path) -> None:
    # A word-level file without a pre-tokenizer: the whole text "<end>" is looked up and found.
    document = {
        "version": "1.0",
        "model": {"type": "WordLevel", "vocab": {"a": 0, "<unk>": 1, "<end>": 2}, "unk_token": "<unk>"},
    }
    path = tmp_path / "whole.json"
    path.write_text(json.dumps(document), encoding="utf-8")
    config = TokenizerConfig(kind="file", file=str(path), end_of_document="<end>", pad="<fill>")
    with pytest.raises(DefinitionError, match=r"^tokenizer.end_of_document = '<end>': .*from plain text"):
        build_tokenizer(config)


def test_a_corpusprep_tokenizer_file_can_be_brought_back(
    tmp_path: Path, bpe: JsonTokenizer, real_texts: list[str]
) -> None:
    # Our own files keep the specials as vocabulary entries that text cannot produce.
    bpe.save(tmp_path / "ours.json")
    config = TokenizerConfig(kind="file", file=str(tmp_path / "ours.json"), begin_of_document="<bod>")
    brought = build_tokenizer(config)
    assert brought.special_ids() == bpe.special_ids()
    assert brought.vocab_size == bpe.vocab_size
    for first, second in zip(bpe.encode_batch(real_texts), brought.encode_batch(real_texts), strict=True):
        assert np.array_equal(first, second)
