"""Tokenizers: the interface every kind plugs into, its settings, and the byte tokenizer.

A tokenizer turns document texts into arrays of integer ids and back. Packing
(:mod:`corpusprep.pack`) adds the special tokens between documents, so
:meth:`Tokenizer.encode_batch` never adds them, and a special-token string
that happens to occur inside a document is tokenized like any other text:
a document containing ``"<eod>"`` must not produce the end-of-document id.

Kinds (``tokenizer.kind``)
--------------------------
``"bytes"``
    Every UTF-8 byte is its own id, 0..255; the special tokens get the ids
    256 and up, in the fixed order end_of_document, begin_of_document (when
    set), pad. Nothing is trained and nothing is unknown. (This module.)
``"characters"``, ``"words"``
    A vocabulary counted on the train split: the special tokens first (ids
    0, 1, ...: end_of_document, begin_of_document when set, pad, unknown),
    then the most frequent characters or words, by descending count, ties by
    code points. Anything else becomes the unknown token. (:mod:`corpusprep.vocab`.)
``"bpe"``
    Byte-level BPE trained on the train split with HF ``tokenizers``; nothing
    is unknown. (:mod:`corpusprep.bpe`.)
``"file"``
    An HF ``tokenizers`` JSON file the user brings, used as it is.
    (:mod:`corpusprep.bpe`.)

Trained kinds are fitted on the train split only: :func:`build_tokenizer`
takes ``train_texts``, a function returning a fresh iterator over the cleaned
texts of the train split's kept documents, and reads it once, as a stream (at
most ``tokenizer.sample_documents`` documents when that is set).

Saved tokenizer file
--------------------
:meth:`Tokenizer.save` writes a JSON file that HF ``tokenizers`` loads with
``tokenizers.Tokenizer.from_file`` and that gives the same ids as ours for any
text (for the file kind see :mod:`corpusprep.bpe`: two encode switches are
needed). For the byte kind it is a BPE model with no merges whose vocabulary
maps the 256 byte-level characters (``pre_tokenizers.ByteLevel.alphabet()``)
to their byte values, with a ByteLevel pre-tokenizer (no prefix space, no
regex split) and a ByteLevel decoder.

The special tokens of the kinds we make are entries of the model vocabulary,
*not* HF "added tokens". HF cuts added tokens out of the raw text before
tokenizing, so with added tokens a document containing ``"<eod>"`` would get
the end-of-document id from HF but the bytes ``<``, ``e``, ``o``, ``d``, ``>``
from us; the switch that turns this off (``encode_special_tokens``) is not
stored in the file. As vocabulary entries that nothing built from text can
equal, the specials are never produced from text, ``token_to_id("<eod>")``
still finds them, and decoding shows them as their strings. The price: HF does
not know they are special, so ``decode(..., skip_special_tokens=True)`` keeps
them.

Special-token strings are therefore restricted to 2 or more printable ASCII
characters without spaces (``!`` to ``~``): the ByteLevel decoder maps exactly
these characters to themselves, so a special decodes to its own string, and a
string of two or more characters cannot collide with a one-character entry
(a byte or a character). For the kinds that cut text into longer pieces
(``"words"``, ``"bpe"``) a special must also be cut into two or more pieces by
that kind's pre-tokenizer (``"<eod>"`` is ``<``, ``eod``, ``>``), so no word or
merge learnt from text can equal it; ``"EOD"`` or ``"--"`` are refused there.
"""

from __future__ import annotations

import dataclasses
import json
import os
from collections.abc import Callable, Iterator, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

import numpy as np

from corpusprep.config import setting
from corpusprep.errors import DefinitionError, IntegrityError

__all__ = [
    "TOKENIZER_KINDS",
    "TRAINED_KINDS",
    "ByteTokenizer",
    "TextSource",
    "Tokenizer",
    "TokenizerConfig",
    "build_tokenizer",
    "byte_to_unicode",
    "check_special_pieces",
    "check_special_token",
    "checked_ids",
    "tokenizer_from_state",
    "tokenizer_state",
    "write_text_atomically",
]

TOKENIZER_KINDS = ("bytes", "characters", "words", "bpe", "file")
#: Kinds whose vocabulary is fitted on the train split.
TRAINED_KINDS = ("characters", "words", "bpe")
#: Kinds with an unknown token (everything else maps every text to known ids).
_UNKNOWN_KINDS = ("characters", "words")

#: ``train_texts()``: a fresh iterator over the cleaned texts of the train split's kept documents.
TextSource = Callable[[], Iterator[str]]

# Roles of special tokens, in the order their ids are given.
_SPECIAL_ROLES = ("end_of_document", "begin_of_document", "pad", "unknown")
_BYTE_VOCAB = 256
_MAX_IDS = 2**32  # ids must fit in uint32 (pack.smallest_dtype)


@dataclass(frozen=True, slots=True, kw_only=True)
class TokenizerConfig:
    """Settings of the tokenize stage (definition table ``[tokenizer]``)."""

    kind: str = setting(
        "bytes",
        "How text becomes ids. 'bytes': one id per UTF-8 byte (0..255), no unknown token. "
        "'characters': one id per character of a vocabulary counted on the train split. "
        "'words': one id per word, punctuation mark or whitespace run of a vocabulary counted on the "
        "train split. 'bpe': byte-level BPE trained on the train split with HF tokenizers. "
        "'file': the HF tokenizers JSON file named by tokenizer.file.",
        choices=TOKENIZER_KINDS,
    )
    end_of_document: str = setting(
        "<eod>",
        "Token placed after every document when packing. Required; 2 or more printable ASCII "
        "characters without spaces. With kind 'file' it must be a special token of the file, or a "
        "vocabulary entry of it that text cannot produce.",
    )
    begin_of_document: str = setting(
        "",
        "Token placed before every document when packing; '' leaves it out. Same character rule; "
        "with kind 'file' the same rule as end_of_document.",
    )
    pad: str = setting(
        "<pad>",
        "Token that fills the last window of a split when pack.tail = 'pad'. Required; same character "
        "rule. With kind 'file' the same rule as end_of_document, except that a string the file does not "
        "have is added as one special token after the file's ids.",
    )
    unknown: str = setting(
        "<unk>",
        "Token for characters or words outside the vocabulary (kinds 'characters' and 'words'); "
        "same character rule.",
    )
    vocab_size: int = setting(
        8192,
        "Largest vocabulary, special tokens included (kinds 'characters', 'words', 'bpe'). For 'bpe' "
        "it also counts the 256 byte symbols; training stops earlier when no pair is left to merge.",
        minimum=1,
        maximum=_MAX_IDS,
    )
    min_count: int = setting(
        2,
        "Fewest occurrences in the train documents used for a character or word to enter the "
        "vocabulary, or for a pair to be merged (kind 'bpe', the HF trainer's min_frequency).",
        minimum=1,
    )
    sample_documents: int = setting(
        0,
        "Train on at most this many train-split documents, the first ones in ledger order "
        "(kinds 'characters', 'words', 'bpe'); 0 uses all of them.",
        minimum=0,
    )
    file: str = setting(
        "",
        "Path of an HF tokenizers JSON file (kind 'file' only). A relative path is resolved against "
        "the definition file's folder.",
    )

    def __post_init__(self) -> None:
        for item in dataclasses.fields(self):
            value = getattr(self, item.name)
            meta = item.metadata
            if isinstance(value, int) and not isinstance(value, bool):
                if meta["minimum"] is not None and value < meta["minimum"]:
                    raise DefinitionError(f"tokenizer.{item.name} = {value}: must be >= {meta['minimum']}")
                if meta["maximum"] is not None and value > meta["maximum"]:
                    raise DefinitionError(f"tokenizer.{item.name} = {value}: must be <= {meta['maximum']}")
        if self.kind not in TOKENIZER_KINDS:
            raise DefinitionError(
                f"tokenizer.kind = {self.kind!r}: unknown kind; choose one of "
                + ", ".join(repr(kind) for kind in TOKENIZER_KINDS)
            )
        seen: dict[str, str] = {}
        for role in _SPECIAL_ROLES:
            value = getattr(self, role)
            if (role == "begin_of_document" and value == "") or (
                role == "unknown" and self.kind not in _UNKNOWN_KINDS
            ):
                continue
            check_special_token(value, key=f"tokenizer.{role}")
            if value in seen:
                raise DefinitionError(
                    f"tokenizer.{role} = {value!r}: same string as tokenizer.{seen[value]}; "
                    "every special token needs its own string"
                )
            seen[value] = role
        if self.kind == "file" and self.file == "":
            raise DefinitionError(
                "tokenizer.file = '': kind 'file' needs the path of an HF tokenizers JSON file"
            )
        if self.kind != "file" and self.file != "":
            raise DefinitionError(
                f"tokenizer.file = {self.file!r}: only used with tokenizer.kind = 'file' "
                f"(the kind is {self.kind!r}); remove it or change the kind"
            )
        if self.kind in ("words", "bpe"):
            for role, value in self.specials().items():
                check_special_pieces(value, kind=self.kind, key=f"tokenizer.{role}")
        smallest = len(self.specials()) + (_BYTE_VOCAB if self.kind == "bpe" else 0)
        if self.kind in TRAINED_KINDS and self.vocab_size < smallest:
            what = "the 256 byte symbols and " if self.kind == "bpe" else ""
            raise DefinitionError(
                f"tokenizer.vocab_size = {self.vocab_size}: a {self.kind!r} vocabulary holds {what}"
                f"the {len(self.specials())} special tokens, so it must be at least {smallest}"
            )

    def specials(self) -> dict[str, str]:
        """Role -> string of the special tokens that are switched on, in id order.

        >>> TokenizerConfig().specials()
        {'end_of_document': '<eod>', 'pad': '<pad>'}
        >>> list(TokenizerConfig(kind="words").specials())
        ['end_of_document', 'pad', 'unknown']
        """
        return {
            role: getattr(self, role)
            for role in _SPECIAL_ROLES
            if getattr(self, role) != "" and (role != "unknown" or self.kind in _UNKNOWN_KINDS)
        }


def check_special_token(value: str, *, key: str) -> None:
    """Raise :class:`DefinitionError` naming ``key`` unless ``value`` is a usable special token.

    >>> check_special_token("<eod>", key="tokenizer.end_of_document")
    >>> check_special_token("<e od>", key="tokenizer.end_of_document")
    Traceback (most recent call last):
    ...
    corpusprep.errors.DefinitionError: tokenizer.end_of_document = '<e od>': ...
    """
    if value == "":
        raise DefinitionError(f"{key} = '': must not be empty")
    if len(value) < 2 or not all("!" <= char <= "~" for char in value):
        raise DefinitionError(
            f"{key} = {value!r}: a special token must be 2 or more printable ASCII characters "
            "without spaces ('!' to '~'), for example '<eod>'"
        )


def check_special_pieces(value: str, *, kind: str, key: str) -> None:
    """Raise :class:`DefinitionError` naming ``key`` if ``kind``'s pre-tokenizer keeps ``value`` whole.

    A string the pre-tokenizer keeps in one piece could be learnt from text
    as a word or a merge and would then share the special token's id.

    >>> check_special_pieces("<eod>", kind="words", key="tokenizer.end_of_document")
    >>> check_special_pieces("EOD", kind="words", key="tokenizer.end_of_document")
    Traceback (most recent call last):
    ...
    corpusprep.errors.DefinitionError: tokenizer.end_of_document = 'EOD': ...
    """
    from corpusprep.bpe import byte_level_pre_tokenizer
    from corpusprep.vocab import word_pre_tokenizer

    splitter = word_pre_tokenizer() if kind == "words" else byte_level_pre_tokenizer()
    if len(splitter.pre_tokenize_str(value)) < 2:
        raise DefinitionError(
            f"{key} = {value!r}: the {kind!r} pre-tokenizer keeps this string in one piece, so text "
            "could produce it; mix letters or digits with other characters, for example '<eod>'"
        )


def byte_to_unicode() -> tuple[str, ...]:
    """The byte-level character of each byte value 0..255 (GPT-2's ``bytes_to_unicode`` table).

    Printable Latin-1 bytes stand for themselves; the other 68 bytes are mapped,
    in increasing order, to U+0100 and up, so every byte has a visible character.
    The same table is ``tokenizers.pre_tokenizers.ByteLevel.alphabet()``.

    >>> table = byte_to_unicode()
    >>> table[ord("A")], table[ord(" ")], table[0], table[0xFF]
    ('A', 'Ġ', 'Ā', 'ÿ')
    """
    printable = [*range(0x21, 0x7F), *range(0xA1, 0xAD), *range(0xAE, 0x100)]
    chars: dict[int, str] = {byte: chr(byte) for byte in printable}
    extra = 0
    for byte in range(_BYTE_VOCAB):
        if byte not in chars:
            chars[byte] = chr(0x100 + extra)
            extra += 1
    return tuple(chars[byte] for byte in range(_BYTE_VOCAB))


@runtime_checkable
class Tokenizer(Protocol):
    """What every tokenizer kind provides.

    ``encode_batch`` returns one 1-D array of non-negative integer ids per text,
    without special tokens; the arrays may be read-only and of any unsigned
    integer dtype that holds the ids. Ids are ``0 .. vocab_size - 1``.
    """

    @property
    def kind(self) -> str: ...

    @property
    def vocab_size(self) -> int: ...

    def special_ids(self) -> dict[str, int]:
        """Role -> id of every special token, e.g. ``{"end_of_document": 256, "pad": 257}``."""
        ...

    def encode_batch(self, texts: Sequence[str]) -> list[np.ndarray]:
        """Ids of each text; special-token strings inside a text are ordinary text."""
        ...

    def decode(self, ids: Sequence[int] | np.ndarray) -> str:
        """Text of ``ids``; special tokens appear as their strings."""
        ...

    def save(self, path: Path) -> None:
        """Write an HF ``tokenizers`` JSON file that gives the same ids for any text."""
        ...

    def describe(self) -> dict[str, object]:
        """Kind, vocabulary size, special token strings and ids (for the manifest)."""
        ...


@dataclass(frozen=True, slots=True, kw_only=True)
class ByteTokenizer:
    """One id per UTF-8 byte (0..255); special tokens from 256 up in role order."""

    config: TokenizerConfig = field(default_factory=TokenizerConfig)

    @property
    def kind(self) -> str:
        return "bytes"

    @property
    def vocab_size(self) -> int:
        return _BYTE_VOCAB + len(self.config.specials())

    def special_ids(self) -> dict[str, int]:
        """Role -> id, in id order.

        >>> ByteTokenizer().special_ids()
        {'end_of_document': 256, 'pad': 257}
        """
        return {role: _BYTE_VOCAB + rank for rank, role in enumerate(self.config.specials())}

    def encode_batch(self, texts: Sequence[str]) -> list[np.ndarray]:
        """The UTF-8 bytes of each text as read-only ``uint8`` arrays.

        >>> [ids.tolist() for ids in ByteTokenizer().encode_batch(["é<eod>"])]
        [[195, 169, 60, 101, 111, 100, 62]]
        """
        return [np.frombuffer(text.encode("utf-8"), dtype=np.uint8) for text in texts]

    def decode(self, ids: Sequence[int] | np.ndarray) -> str:
        """Bytes back to text; specials become their strings; broken UTF-8 becomes U+FFFD.

        A window may start or end inside a multi-byte character, so invalid
        sequences are replaced rather than raised (each maximal invalid part
        becomes one U+FFFD, as HF's ByteLevel decoder does).

        >>> tok = ByteTokenizer()
        >>> tok.decode([104, 105, 256, 0xE6, 0x97])
        'hi<eod>�'
        """
        values = checked_ids(ids, self.vocab_size)
        if values.size == 0:
            return ""
        high = int(values.max())
        if high < _BYTE_VOCAB:
            return values.astype(np.uint8).tobytes().decode("utf-8", errors="replace")
        texts = {
            _BYTE_VOCAB + rank: text.encode("ascii")
            for rank, text in enumerate(self.config.specials().values())
        }
        pieces: list[bytes] = []
        special_at = np.flatnonzero(values >= _BYTE_VOCAB)
        start = 0
        for position in special_at.tolist():
            pieces.append(values[start:position].astype(np.uint8).tobytes())
            pieces.append(texts[int(values[position])])
            start = position + 1
        pieces.append(values[start:].astype(np.uint8).tobytes())
        return b"".join(pieces).decode("utf-8", errors="replace")

    def hf_json(self) -> str:
        """The HF ``tokenizers`` JSON text written by :meth:`save` (deterministic)."""
        vocab = {char: byte for byte, char in enumerate(byte_to_unicode())}
        for role, text in self.config.specials().items():
            vocab[text] = self.special_ids()[role]
        document: dict[str, object] = {
            "version": "1.0",
            "truncation": None,
            "padding": None,
            "added_tokens": [],
            "normalizer": None,
            "pre_tokenizer": {
                "type": "ByteLevel",
                "add_prefix_space": False,
                "trim_offsets": False,
                "use_regex": False,
            },
            "post_processor": None,
            "decoder": {
                "type": "ByteLevel",
                "add_prefix_space": False,
                "trim_offsets": False,
                "use_regex": False,
            },
            "model": {
                "type": "BPE",
                "dropout": None,
                "unk_token": None,
                "continuing_subword_prefix": None,
                "end_of_word_suffix": None,
                "fuse_unk": False,
                "byte_fallback": False,
                "ignore_merges": False,
                "vocab": vocab,
                "merges": [],
            },
        }
        return json.dumps(document, ensure_ascii=False, indent=2) + "\n"

    def save(self, path: Path) -> None:
        """Write :meth:`hf_json` to ``path`` through a temporary file and a rename."""
        write_text_atomically(path, self.hf_json())

    def describe(self) -> dict[str, object]:
        """For the manifest.

        >>> ByteTokenizer().describe()["special_tokens"]
        {'end_of_document': {'text': '<eod>', 'id': 256}, 'pad': {'text': '<pad>', 'id': 257}}
        """
        ids = self.special_ids()
        return {
            "kind": self.kind,
            "vocab_size": self.vocab_size,
            "special_tokens": {
                role: {"text": text, "id": ids[role]} for role, text in self.config.specials().items()
            },
        }


def build_tokenizer(
    config: TokenizerConfig, train_texts: TextSource | None = None, *, base: Path | None = None
) -> Tokenizer:
    """The tokenizer of ``config.kind``; trained kinds read ``train_texts()`` once, as a stream.

    ``train_texts`` must return a fresh iterator over the cleaned texts of the
    train split's kept documents, in a deterministic order (the pipeline uses
    ledger order); only the first ``config.sample_documents`` are read when
    that is set. Untrained kinds ignore it. A relative ``tokenizer.file`` is read from ``base``
    (the definition's folder) when given, else from the current directory.

    >>> build_tokenizer(TokenizerConfig(kind="characters", min_count=1), lambda: iter(["abba"])).vocab_size
    5
    """
    if config.kind == "bytes":
        return ByteTokenizer(config=config)
    if config.kind == "file":
        from corpusprep.bpe import load_tokenizer_file

        return load_tokenizer_file(config, base=base)
    if train_texts is None:
        raise IntegrityError(
            f"tokenizer.kind = {config.kind!r} is trained: build_tokenizer needs train_texts"
        )
    if config.kind == "characters":
        from corpusprep.vocab import train_characters

        return train_characters(config, train_texts)
    if config.kind == "words":
        from corpusprep.vocab import train_words

        return train_words(config, train_texts)
    from corpusprep.bpe import train_bpe

    return train_bpe(config, train_texts)


def checked_ids(ids: Sequence[int] | np.ndarray, vocab_size: int) -> np.ndarray:
    """``ids`` as a 1-D integer array; :class:`IntegrityError` if it is not one or an id is out of range.

    >>> checked_ids([3, 0], 4).tolist()
    [3, 0]
    """
    values = np.asarray(ids)
    if values.size == 0:
        return values.reshape(0).astype(np.int64)
    if values.ndim != 1 or values.dtype.kind not in "iu":
        raise IntegrityError(f"token ids must be a 1-D array of integers, got {values.dtype} {values.shape}")
    low, high = int(values.min()), int(values.max())
    if low < 0 or high >= vocab_size:
        raise IntegrityError(
            f"token id {low if low < 0 else high} is outside the vocabulary 0..{vocab_size - 1}"
        )
    return values


def write_text_atomically(path: Path, text: str) -> None:
    """Write UTF-8 ``text`` to ``path`` via ``.NAME.partial`` in the same folder, then rename."""
    partial = path.with_name(f".{path.name}.partial")
    with open(partial, "w", encoding="utf-8", newline="\n") as handle:
        handle.write(text)
    os.replace(partial, path)


def tokenizer_state(tokenizer: Tokenizer) -> dict[str, Any]:
    """A JSON-ready description from which :func:`tokenizer_from_state` rebuilds ``tokenizer``.

    Used by resume checkpoints, so a trained tokenizer is not trained again. Only
    the project's own kinds are described (no pickles: a tampered checkpoint can
    at worst fail to load, never run code).
    """
    from corpusprep.bpe import JsonTokenizer
    from corpusprep.vocab import CharacterTokenizer

    if isinstance(tokenizer, ByteTokenizer):
        return {"class": "bytes", "config": asdict(tokenizer.config)}
    if isinstance(tokenizer, CharacterTokenizer):
        return {
            "class": "characters",
            "config": asdict(tokenizer.config),
            "characters": tokenizer.characters,
            "facts_json": tokenizer.facts_json,
        }
    if isinstance(tokenizer, JsonTokenizer):
        return {
            "class": "json",
            "kind": tokenizer.kind,
            "json_text": tokenizer.json_text,
            "special_tokens": [list(pair) for pair in tokenizer.special_tokens],
            "encode_special_tokens": tokenizer.encode_special_tokens,
            "facts_json": tokenizer.facts_json,
        }
    raise IntegrityError(f"no checkpoint form for tokenizer {type(tokenizer).__name__}")


def tokenizer_from_state(state: dict[str, Any]) -> Tokenizer:
    """The tokenizer :func:`tokenizer_state` described."""
    from corpusprep.bpe import JsonTokenizer
    from corpusprep.vocab import CharacterTokenizer

    kind = state.get("class")
    if kind == "bytes":
        return ByteTokenizer(config=TokenizerConfig(**state["config"]))
    if kind == "characters":
        return CharacterTokenizer(
            config=TokenizerConfig(**state["config"]),
            characters=str(state["characters"]),
            facts_json=str(state["facts_json"]),
        )
    if kind == "json":
        return JsonTokenizer(
            kind=str(state["kind"]),
            json_text=str(state["json_text"]),
            special_tokens=tuple((str(role), str(text)) for role, text in state["special_tokens"]),
            encode_special_tokens=bool(state["encode_special_tokens"]),
            facts_json=str(state["facts_json"]),
        )
    raise IntegrityError(f"unknown tokenizer checkpoint class {kind!r}")
