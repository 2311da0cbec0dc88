"""Tokenizers defined by an HF ``tokenizers`` JSON: trained byte-level BPE, a user's file, and words.

:class:`JsonTokenizer` wraps an HF tokenizer rebuilt from its JSON text; the
kinds ``"bpe"``, ``"file"`` and ``"words"`` (:mod:`corpusprep.vocab`) are
made of it. Its ids come from HF's ``encode_batch_fast`` with
``add_special_tokens=False``, the JSON it saves is the JSON it encodes with,
so the saved file gives the same ids by construction. It pickles as its JSON
text and settings, and is rebuilt in the receiving process.

HF ``encode_batch_fast`` runs on all cores of the process (Rayon threads).
The pipeline's worker processes are started with ``spawn``, so HF's
fork warning does not apply; with several workers each one still starts its
own threads. corpusprep leaves the environment alone: set
``TOKENIZERS_PARALLELISM=false`` (or ``RAYON_NUM_THREADS``) yourself when you
run many workers on few cores.

Trained BPE (kind ``"bpe"``)
----------------------------
Built as HF's "training from memory" guide describes (REFERENCES 8):
``models.BPE()``, ``pre_tokenizers.ByteLevel(add_prefix_space=False)``,
``decoders.ByteLevel()`` and ``trainers.BpeTrainer(vocab_size, min_frequency,
special_tokens, initial_alphabet=ByteLevel.alphabet())``, trained with
``train_from_iterator`` on batches of the train texts (a stream; HF keeps
only its word counts). The special tokens get the ids 0, 1, ... in role order.
The trainer makes them HF added tokens as well; they are removed from
``added_tokens`` afterwards and stay as vocabulary entries, so text
containing ``"<eod>"`` is cut by the ByteLevel pre-tokenizer into ``<``,
``eod``, ``>`` and never yields the special id (see :mod:`corpusprep.tokens`).
Everything else in the file is what HF trained.

A user's file (kind ``"file"``)
-------------------------------
``tokenizer.file`` names an HF ``tokenizers`` JSON file; a relative path is
resolved against the definition file's folder. It is used as it is, with these rules:

- ``tokenizer.end_of_document`` (and ``tokenizer.begin_of_document`` when set)
  must be a *special* added token of the file, or a vocabulary entry that text
  cannot produce (as in the files corpusprep writes): not built by a BPE merge,
  and not produced when the string is encoded alone or between other text;
- ``tokenizer.pad`` follows the same rule, except that a string the file does
  not have at all is added as one special token with the next free id;
- an ordinary (non-special) added token is always refused: HF matches it in
  any text;
- ids are made with ``add_special_tokens=False`` (no post-processor tokens)
  and ``encode_special_tokens=True`` (special-token strings inside a document
  are ordinary text), and the file's truncation and padding are switched off.

The saved ``tokenizer.json`` is the file as HF loads it, with truncation and
padding off and the pad token added when it was missing. Because
``encode_special_tokens`` is not stored in the file, a user of the saved file
gets our ids with ``tok.encode_special_tokens = True`` and
``tok.encode(text, add_special_tokens=False)``.
"""

from __future__ import annotations

import itertools
import json
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from corpusprep.errors import DefinitionError, IntegrityError
from corpusprep.hashing import hash_file
from corpusprep.tokens import TextSource, TokenizerConfig, checked_ids, write_text_atomically

__all__ = ["JsonTokenizer", "byte_level_pre_tokenizer", "load_tokenizer_file", "train_bpe"]

_TRAIN_BATCH = 256  # texts handed to HF's trainer at a time
_MAX_IDS = 2**32


def byte_level_pre_tokenizer() -> Any:
    """The pre-tokenizer of kind ``"bpe"``: HF ``ByteLevel(add_prefix_space=False)`` with its regex split.

    >>> [piece for piece, _ in byte_level_pre_tokenizer().pre_tokenize_str("a <eod>")]
    ['a', 'Ġ<', 'eod', '>']
    """
    from tokenizers import pre_tokenizers

    return pre_tokenizers.ByteLevel(add_prefix_space=False)


def _rebuild(fields: dict[str, Any]) -> JsonTokenizer:
    return JsonTokenizer(**fields)


@dataclass(frozen=True, slots=True, kw_only=True)
class JsonTokenizer:
    """A tokenizer that is an HF ``tokenizers`` JSON text plus how to encode with it."""

    kind: str
    json_text: str
    #: (role, text) of every special token, in role order; each text must be a token of the JSON.
    special_tokens: tuple[tuple[str, str], ...]
    #: HF's switch: special-token strings in the text are ordinary text (needed when they are added tokens).
    encode_special_tokens: bool = False
    #: Extra manifest facts (training, source file), as JSON text so the object stays immutable.
    facts_json: str = "{}"
    _hf: Any = field(init=False, repr=False, compare=False)
    _vocab_size: int = field(init=False, repr=False, compare=False)
    _special_ids: tuple[tuple[str, int], ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        from tokenizers import Tokenizer as HFTokenizer

        hf = HFTokenizer.from_str(self.json_text)
        hf.encode_special_tokens = self.encode_special_tokens
        vocab = hf.get_vocab(with_added_tokens=True)
        ids = []
        for role, text in self.special_tokens:
            token_id = hf.token_to_id(text)
            if token_id is None:
                raise IntegrityError(f"the {self.kind} tokenizer has no token {text!r} for {role}")
            ids.append((role, int(token_id)))
        object.__setattr__(self, "_hf", hf)
        object.__setattr__(self, "_vocab_size", max(vocab.values()) + 1 if vocab else 0)
        object.__setattr__(self, "_special_ids", tuple(ids))

    def __reduce__(self) -> tuple[Any, ...]:
        fields = {
            "kind": self.kind,
            "json_text": self.json_text,
            "special_tokens": self.special_tokens,
            "encode_special_tokens": self.encode_special_tokens,
            "facts_json": self.facts_json,
        }
        return (_rebuild, (fields,))

    @property
    def vocab_size(self) -> int:
        """One more than the largest id (HF vocabulary and added tokens)."""
        return self._vocab_size

    def special_ids(self) -> dict[str, int]:
        """Role -> id, in role order."""
        return dict(self._special_ids)

    def encode_batch(self, texts: Sequence[str]) -> list[np.ndarray]:
        """HF ``encode_batch_fast(texts, add_special_tokens=False)`` ids as ``uint32`` arrays."""
        if not texts:
            return []
        encodings = self._hf.encode_batch_fast(list(texts), add_special_tokens=False)
        return [np.array(encoding.ids, dtype=np.uint32) for encoding in encodings]

    def decode(self, ids: Sequence[int] | np.ndarray) -> str:
        """HF ``decode(ids, skip_special_tokens=False)``: special tokens appear as their strings."""
        values = checked_ids(ids, self.vocab_size)
        return str(self._hf.decode(values.tolist(), skip_special_tokens=False))

    def hf_json(self) -> str:
        """The JSON text written by :meth:`save`."""
        return self.json_text

    def save(self, path: Path) -> None:
        """Write the JSON text to ``path`` through a temporary file and a rename."""
        write_text_atomically(path, self.json_text)

    def describe(self) -> dict[str, object]:
        """Kind, vocabulary size, special tokens, and the facts of how it was made."""
        ids = self.special_ids()
        return {
            "kind": self.kind,
            "vocab_size": self.vocab_size,
            "special_tokens": {role: {"text": text, "id": ids[role]} for role, text in self.special_tokens},
            **json.loads(self.facts_json),
        }


def _pretty(json_text: str) -> str:
    """HF's JSON text indented, non-ASCII kept, with a final newline (deterministic)."""
    return json.dumps(json.loads(json_text), ensure_ascii=False, indent=2) + "\n"


def train_bpe(config: TokenizerConfig, train_texts: TextSource) -> JsonTokenizer:
    """Train byte-level BPE on the train texts (the first ``config.sample_documents`` when set)."""
    from tokenizers import Tokenizer as HFTokenizer
    from tokenizers import decoders, models, pre_tokenizers, trainers

    specials = config.specials()
    tokenizer = HFTokenizer(models.BPE())
    tokenizer.pre_tokenizer = byte_level_pre_tokenizer()
    tokenizer.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=config.vocab_size,
        min_frequency=config.min_count,
        special_tokens=list(specials.values()),
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    documents = [0]

    def batches() -> Iterator[list[str]]:
        texts = iter(train_texts())
        if config.sample_documents:
            texts = itertools.islice(texts, config.sample_documents)
        while batch := list(itertools.islice(texts, _TRAIN_BATCH)):
            documents[0] += len(batch)
            yield batch

    tokenizer.train_from_iterator(batches(), trainer=trainer)
    document = json.loads(tokenizer.to_str())
    vocab = document["model"]["vocab"]
    for expected, (role, text) in enumerate(specials.items()):
        if vocab.get(text) != expected:
            raise IntegrityError(
                f"HF's BPE trainer gave tokenizer.{role} = {text!r} the id {vocab.get(text)}"
            )
    document["added_tokens"] = []  # the specials stay vocabulary entries (module docstring)
    facts = {
        "training": {
            "documents": documents[0],
            "sample_documents": config.sample_documents,
            "vocab_size": config.vocab_size,
            "min_count": config.min_count,
            "merges": len(document["model"]["merges"]),
        }
    }
    return JsonTokenizer(
        kind="bpe",
        json_text=json.dumps(document, ensure_ascii=False, indent=2) + "\n",
        special_tokens=tuple(specials.items()),
        facts_json=json.dumps(facts),
    )


def load_tokenizer_file(config: TokenizerConfig, *, base: Path | None = None) -> JsonTokenizer:
    """The user's tokenizer file ``config.file`` under the rules of the module docstring.

    A relative ``config.file`` is read from ``base`` (the definition's folder) when given; the
    manifest records the path as written in the definition, plus the file's size and hash.
    """
    from tokenizers import AddedToken
    from tokenizers import Tokenizer as HFTokenizer

    shown = f"tokenizer.file = {config.file!r}"
    path = Path(config.file)
    if base is not None and not path.is_absolute():
        path = base / path
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise DefinitionError(f"{shown}: no such file ({path})") from None
    except (OSError, UnicodeDecodeError) as error:
        raise DefinitionError(f"{shown}: cannot read it: {error}") from None
    try:
        hf = HFTokenizer.from_str(text)
    except Exception as error:  # HF raises plain Exception for every parse problem
        raise DefinitionError(f"{shown}: not an HF tokenizers JSON file: {error}") from None
    hf.no_truncation()
    hf.no_padding()
    added = {token.content: bool(token.special) for _, token in sorted(hf.get_added_tokens_decoder().items())}
    special_strings = ", ".join(repr(content) for content, special in added.items() if special) or "none"
    built = _merge_results(json.loads(text).get("model") or {})
    roles = [role for role in ("end_of_document", "begin_of_document", "pad") if getattr(config, role)]
    pad_added = False
    for role in roles:
        value = getattr(config, role)
        where = f"tokenizer.{role} = {value!r}"
        choose = f"choose a special token of the file ({special_strings})" + (
            " or a string the file does not have" if role == "pad" else ""
        )
        if value in added:
            if not added[value]:
                raise DefinitionError(
                    f"{where}: an ordinary added token of {config.file}: text produces it; {choose}"
                )
        elif hf.token_to_id(value) is None:
            if role != "pad":
                raise DefinitionError(f"{where}: not a special token of {config.file}; {choose}")
            hf.add_special_tokens([AddedToken(value, special=True, normalized=False)])
            pad_added = True
        elif value in built:
            raise DefinitionError(
                f"{where}: an ordinary token of {config.file}'s vocabulary that its merges build from text; "
                + choose
            )
    ids = {role: hf.token_to_id(getattr(config, role)) for role in roles}
    for role in roles:
        others = [other for other in roles if other != role and ids[other] == ids[role]]
        if others:
            raise DefinitionError(
                f"tokenizer.{role} = {getattr(config, role)!r}: {config.file} gives it the id {ids[role]}, "
                f"the same as tokenizer.{others[0]}; every special token needs its own id"
            )
    vocab = hf.get_vocab(with_added_tokens=True)
    size = max(vocab.values()) + 1 if vocab else 0
    if size > _MAX_IDS:
        raise DefinitionError(f"{shown}: {size} ids do not fit in uint32 (at most {_MAX_IDS})")
    size_bytes, digest = hash_file(path)
    facts = {
        "source_file": {"path": config.file, "bytes": size_bytes, "xxh3_128": digest, "pad_added": pad_added},
        "encode": {"add_special_tokens": False, "encode_special_tokens": True},
    }
    tokenizer = JsonTokenizer(
        kind="file",
        json_text=_pretty(hf.to_str()),
        special_tokens=tuple((role, str(getattr(config, role))) for role in roles),
        encode_special_tokens=True,
        facts_json=json.dumps(facts),
    )
    for role, token_id in tokenizer.special_ids().items():
        value = getattr(config, role)
        probes = [value, f"a{value}b", f" {value} ", f"\n{value}\n"]
        if any(token_id in ids_.tolist() for ids_ in tokenizer.encode_batch(probes)):
            raise DefinitionError(
                f"tokenizer.{role} = {value!r}: {config.file} makes this token from plain text even with "
                "special-token strings treated as text, so document boundaries would be ambiguous; "
                "choose a special token of the file"
            )
    return tokenizer


def _merge_results(model: dict[str, Any]) -> set[str]:
    """Every token a BPE model's merges build (merges are "a b" strings or [a, b] pairs); empty otherwise."""
    if model.get("type") != "BPE":
        return set()
    pairs = (merge.split(" ", 1) if isinstance(merge, str) else merge for merge in model.get("merges") or [])
    return {"".join(pair) for pair in pairs}
