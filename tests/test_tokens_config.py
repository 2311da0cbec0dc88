"""Settings of the tokenize stage: every refusal names its key, directly and through a definition file."""

from __future__ import annotations

import pytest

from corpusprep.config import setting_docs
from corpusprep.definition import parse_definition
from corpusprep.errors import DefinitionError, IntegrityError
from corpusprep.tokens import TOKENIZER_KINDS, TokenizerConfig, build_tokenizer


@pytest.mark.parametrize(
    ("settings_", "key", "words"),
    [
        ({"kind": "bpe", "vocab_size": 257}, "tokenizer.vocab_size", "at least 258"),
        ({"kind": "bpe", "vocab_size": 258, "begin_of_document": "<bod>"}, "tokenizer.vocab_size", "259"),
        ({"kind": "words", "vocab_size": 2}, "tokenizer.vocab_size", "at least 3"),
        ({"kind": "characters", "vocab_size": 2}, "tokenizer.vocab_size", "at least 3"),
        ({"vocab_size": 2**32 + 1}, "tokenizer.vocab_size", "<= 4294967296"),
        ({"vocab_size": 0}, "tokenizer.vocab_size", ">= 1"),
        ({"min_count": 0}, "tokenizer.min_count", ">= 1"),
        ({"sample_documents": -1}, "tokenizer.sample_documents", ">= 0"),
        ({"kind": "file"}, "tokenizer.file", "needs the path"),
        ({"file": "tok.json"}, "tokenizer.file", "only used with tokenizer.kind = 'file'"),
        ({"kind": "words", "unknown": "<pad>"}, "tokenizer.unknown", "same string as tokenizer.pad"),
        ({"kind": "characters", "unknown": "?"}, "tokenizer.unknown", "2 or more"),
        ({"kind": "words", "end_of_document": "EOD"}, "tokenizer.end_of_document", "one piece"),
        ({"kind": "words", "pad": "pad_1"}, "tokenizer.pad", "one piece"),
        ({"kind": "bpe", "pad": "--"}, "tokenizer.pad", "one piece"),
        ({"kind": "bpe", "end_of_document": "'s"}, "tokenizer.end_of_document", "one piece"),
        ({"kind": "bpe", "begin_of_document": "BOD"}, "tokenizer.begin_of_document", "one piece"),
    ],
)
def test_bad_settings_name_the_key(settings_: dict[str, object], key: str, words: str) -> None:
    with pytest.raises(DefinitionError, match=f"^{key} = .*{words}"):
        TokenizerConfig(**settings_)  # type: ignore[arg-type]


def test_settings_that_other_kinds_allow() -> None:
    # "EOD" is one piece only for the kinds that cut text into pieces longer than a character.
    for kind in ("bytes", "characters"):
        TokenizerConfig(kind=kind, end_of_document="EOD")
    # The unknown token is checked only where it is used.
    TokenizerConfig(kind="bytes", unknown="<pad>")
    TokenizerConfig(kind="bpe", vocab_size=258)


def test_definition_errors_carry_file_and_line() -> None:
    text = '[tokenizer]\nkind = "bpe"\nvocab_size = 100\n'
    with pytest.raises(DefinitionError, match=r"^demo.toml:\d+: tokenizer.vocab_size = 100: .*at least 258"):
        parse_definition(text, source="demo.toml")
    with pytest.raises(DefinitionError, match=r"^demo.toml:2: unknown key tokenizer.vocab; valid keys"):
        parse_definition("[tokenizer]\nvocab = 3\n", source="demo.toml")
    with pytest.raises(DefinitionError, match=r"^demo.toml:2: tokenizer.min_count = 0: must be >= 1"):
        parse_definition("[tokenizer]\nmin_count = 0\n", source="demo.toml")


def test_every_setting_is_documented() -> None:
    rows = setting_docs(TokenizerConfig)
    assert {row.key for row in rows} == {
        "kind", "end_of_document", "begin_of_document", "pad", "unknown",
        "vocab_size", "min_count", "sample_documents", "file",
    }  # fmt: skip
    for row in rows:
        assert len(row.doc) > 30, row.key
    kind_doc = next(row.doc for row in rows if row.key == "kind")
    for kind in TOKENIZER_KINDS:
        assert f"'{kind}'" in kind_doc


@pytest.mark.parametrize("kind", ["characters", "words", "bpe"])
def test_trained_kinds_need_the_train_texts(kind: str) -> None:
    with pytest.raises(IntegrityError, match="needs train_texts"):
        build_tokenizer(TokenizerConfig(kind=kind))


def test_specials_in_id_order() -> None:
    assert TokenizerConfig(kind="characters", begin_of_document="<bod>").specials() == {
        "end_of_document": "<eod>",
        "begin_of_document": "<bod>",
        "pad": "<pad>",
        "unknown": "<unk>",
    }
    assert "unknown" not in TokenizerConfig(kind="bpe").specials()
