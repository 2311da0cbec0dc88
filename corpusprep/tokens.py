"""Tokenizers: the interface every kind plugs into, and the byte tokenizer.

A tokenizer turns document texts into arrays of integer ids and back. Packing
(:mod:`corpusprep.pack`) adds the special tokens between documents, so
:meth:`Tokenizer.encode_batch` never adds them, and a special-token string
that happens to occur inside a document is tokenized like any other text:
a document containing ``"<eod>"`` must not produce the end-of-document id.

The byte tokenizer (kind ``"bytes"``) maps every UTF-8 byte to its value,
0..255, and gives the special tokens the ids 256 and up, in the fixed order
end_of_document, begin_of_document (when set), pad.

Saved tokenizer file
--------------------
:meth:`Tokenizer.save` writes a JSON file that HF ``tokenizers`` loads with
``tokenizers.Tokenizer.from_file`` and that gives the same ids as ours for any
text. For the byte kind it is a BPE model with no merges whose vocabulary maps
the 256 byte-level characters (``pre_tokenizers.ByteLevel.alphabet()``) to
their byte values, with a ByteLevel pre-tokenizer (no prefix space, no regex
split) and a ByteLevel decoder.

The special tokens are entries of the model vocabulary, *not* HF "added
tokens". HF cuts added tokens out of the raw text before tokenizing, so with
added tokens a document containing ``"<eod>"`` would get the end-of-document
id from HF but the bytes ``<``, ``e``, ``o``, ``d``, ``>`` from us; the switch
that turns this off (``encode_special_tokens``) is not stored in the file.
As vocabulary entries that no merge can build, the specials are never produced
from text, ``token_to_id("<eod>")`` still finds them, and decoding shows them as
their strings. The price: HF does not know they are special, so
``decode(..., skip_special_tokens=True)`` keeps them.

Special-token strings are therefore restricted to 2 or more printable ASCII
characters without spaces (``!`` to ``~``): the ByteLevel decoder maps exactly
these characters to themselves, so a special decodes to its own string, and a
string of two or more characters cannot collide with a one-character byte
entry of the vocabulary.
"""

from __future__ import annotations

import json
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Protocol, runtime_checkable

import numpy as np

from corpusprep.config import setting
from corpusprep.errors import DefinitionError, IntegrityError

__all__ = [
    "TOKENIZER_KINDS",
    "ByteTokenizer",
    "Tokenizer",
    "TokenizerConfig",
    "build_tokenizer",
    "byte_to_unicode",
    "check_special_token",
]

# Kinds that build_tokenizer can make; later kinds (characters, words, trained
# BPE, a user's file) are added here when they are implemented.
TOKENIZER_KINDS = ("bytes",)

# Roles of special tokens, in the order their ids are given.
_SPECIAL_ROLES = ("end_of_document", "begin_of_document", "pad")
_BYTE_VOCAB = 256


@dataclass(frozen=True, slots=True, kw_only=True)
class TokenizerConfig:
    """Settings of the tokenize stage (definition table ``[tokenizer]``)."""

    kind: str = setting(
        "bytes",
        "How text becomes ids. 'bytes': one id per UTF-8 byte (0..255), no unknown token.",
        choices=TOKENIZER_KINDS,
    )
    end_of_document: str = setting(
        "<eod>",
        "Token placed after every document when packing. Required; 2 or more printable ASCII "
        "characters without spaces.",
    )
    begin_of_document: str = setting(
        "",
        "Token placed before every document when packing; '' leaves it out. Same character rule.",
    )
    pad: str = setting(
        "<pad>",
        "Token that fills the last window of a split when pack.tail = 'pad'. Required; same character rule.",
    )

    def __post_init__(self) -> None:
        if self.kind not in TOKENIZER_KINDS:
            raise DefinitionError(
                f"tokenizer.kind = {self.kind!r}: unknown kind; choose one of "
                + ", ".join(repr(kind) for kind in TOKENIZER_KINDS)
            )
        seen: dict[str, str] = {}
        for role in _SPECIAL_ROLES:
            value = getattr(self, role)
            if role == "begin_of_document" and value == "":
                continue
            check_special_token(value, key=f"tokenizer.{role}")
            if value in seen:
                raise DefinitionError(
                    f"tokenizer.{role} = {value!r}: same string as tokenizer.{seen[value]}; "
                    "every special token needs its own string"
                )
            seen[value] = role

    def specials(self) -> dict[str, str]:
        """Role -> string of the special tokens that are switched on, in id order.

        >>> TokenizerConfig().specials()
        {'end_of_document': '<eod>', 'pad': '<pad>'}
        """
        return {role: getattr(self, role) for role in _SPECIAL_ROLES if getattr(self, role) != ""}


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
        values = np.asarray(ids)
        if values.size == 0:
            return ""
        if values.ndim != 1 or values.dtype.kind not in "iu":
            raise IntegrityError(
                f"token ids must be a 1-D array of integers, got {values.dtype} {values.shape}"
            )
        low, high = int(values.min()), int(values.max())
        if low < 0 or high >= self.vocab_size:
            raise IntegrityError(
                f"token id {low if low < 0 else high} is outside the vocabulary 0..{self.vocab_size - 1}"
            )
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


def build_tokenizer(config: TokenizerConfig) -> Tokenizer:
    """The tokenizer of ``config.kind``. Kinds that are trained will also take the train texts."""
    if config.kind == "bytes":
        return ByteTokenizer(config=config)
    raise DefinitionError(  # unreachable while TokenizerConfig validates kind; kept for new kinds
        f"tokenizer.kind = {config.kind!r}: unknown kind; choose one of {', '.join(TOKENIZER_KINDS)}"
    )


def write_text_atomically(path: Path, text: str) -> None:
    """Write UTF-8 ``text`` to ``path`` via ``.NAME.partial`` in the same folder, then rename."""
    partial = path.with_name(f".{path.name}.partial")
    with open(partial, "w", encoding="utf-8", newline="\n") as handle:
        handle.write(text)
    os.replace(partial, path)
