"""Counted vocabularies: the ``"characters"`` and ``"words"`` tokenizer kinds.

Both count their units on the train split's documents (the first
``tokenizer.sample_documents`` when set), keep the units seen at least
``tokenizer.min_count`` times, most frequent first, ties by code points
(Python's ``str`` order), up to ``tokenizer.vocab_size`` ids in all. Ids:
the special tokens first (end_of_document, begin_of_document when set, pad,
unknown), then the units in that order. A unit outside the vocabulary gets the
unknown id, so decoding shows it as the unknown string (``"<unk>"``).

Characters
    A unit is one Unicode code point. Encoding is a NumPy lookup of the code
    points; the saved JSON is an HF ``WordLevel`` model whose pre-tokenizer
    cuts text into single code points (``Split`` on ``(?m:.)``, "isolated";
    ``(?m:`` makes the dot match newlines in HF's Oniguruma syntax) with a
    ``Fuse`` decoder, which gives the same ids.

Words
    A unit is one piece of :data:`WORD_PATTERN`: a maximal run of word
    characters (Unicode general categories L, M, N and Pc: letters, marks,
    digits and other numbers, connectors such as ``_``), a maximal run of
    whitespace (Unicode White_Space), or one other character (punctuation,
    symbols, emoji, controls). The pieces cover the text, so decoding
    concatenates them back: ``decode(encode(text)) == text`` whenever every
    piece is in the vocabulary. What is lost is only what falls outside it:
    a rare word, punctuation mark or whitespace run (say ``"\\n\\n\\n   "``)
    decodes as ``"<unk>"``. Nothing is normalised: case, whitespace and
    Unicode forms are kept as the clean stage left them. The tokenizer is an
    HF ``WordLevel`` model with that ``Split`` pre-tokenizer and a ``Fuse``
    decoder (:class:`corpusprep.bpe.JsonTokenizer`), used for encoding too.

Counting keeps one counter entry per distinct unit seen; memory grows with the
train split's distinct words, not its size (``tokenizer.sample_documents``
caps it).
"""

from __future__ import annotations

import itertools
import json
from collections import Counter
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from corpusprep.bpe import JsonTokenizer
from corpusprep.tokens import TextSource, TokenizerConfig, checked_ids, write_text_atomically

__all__ = [
    "CHARACTER_PATTERN",
    "WORD_PATTERN",
    "CharacterTokenizer",
    "choose_units",
    "train_characters",
    "train_words",
    "word_pre_tokenizer",
]

_WORD = r"\p{L}\p{M}\p{N}\p{Pc}"
#: Oniguruma (HF ``tokenizers.Regex``) pattern of a word piece; ``\s`` is Unicode White_Space there.
WORD_PATTERN = rf"[{_WORD}]+|\s+|[^{_WORD}\s]"
#: One code point, newlines included.
CHARACTER_PATTERN = r"(?m:.)"


def word_pre_tokenizer() -> Any:
    """HF ``Split`` pre-tokenizer on :data:`WORD_PATTERN`, pieces kept ("isolated").

    >>> [piece for piece, _ in word_pre_tokenizer().pre_tokenize_str("Grüße,  x_1²!")]
    ['Grüße', ',', '  ', 'x_1²', '!']
    """
    from tokenizers import Regex, pre_tokenizers

    return pre_tokenizers.Split(Regex(WORD_PATTERN), behavior="isolated")


def _sample(config: TokenizerConfig, train_texts: TextSource) -> Iterator[str]:
    texts = iter(train_texts())
    return itertools.islice(texts, config.sample_documents) if config.sample_documents else texts


def choose_units(counts: Counter[str], *, slots: int, min_count: int) -> list[str]:
    """Units with ``count >= min_count``, by descending count then code points, at most ``slots``.

    >>> choose_units(Counter("abracadabra"), slots=3, min_count=2)
    ['a', 'b', 'r']
    """
    kept = [unit for unit, count in counts.items() if count >= min_count]
    kept.sort(key=lambda unit: (-counts[unit], unit))
    return kept[: max(slots, 0)]


def _facts(documents: int, counts: Counter[str], units: Sequence[str], config: TokenizerConfig) -> str:
    return json.dumps(
        {
            "training": {
                "documents": documents,
                "sample_documents": config.sample_documents,
                "vocab_size": config.vocab_size,
                "min_count": config.min_count,
                "distinct": len(counts),
                "occurrences": sum(counts.values()),
                "covered": sum(counts[unit] for unit in units),
            }
        }
    )


def _word_level_json(vocab: dict[str, int], unknown: str, pattern: str) -> str:
    from tokenizers import Regex, decoders, models, pre_tokenizers
    from tokenizers import Tokenizer as HFTokenizer

    tokenizer = HFTokenizer(models.WordLevel(vocab, unk_token=unknown))
    tokenizer.pre_tokenizer = pre_tokenizers.Split(Regex(pattern), behavior="isolated")
    tokenizer.decoder = decoders.Fuse()
    return json.dumps(json.loads(tokenizer.to_str()), ensure_ascii=False, indent=2) + "\n"


def _rebuild_characters(config: TokenizerConfig, characters: str, facts_json: str) -> CharacterTokenizer:
    return CharacterTokenizer(config=config, characters=characters, facts_json=facts_json)


@dataclass(frozen=True, slots=True, kw_only=True)
class CharacterTokenizer:
    """One id per character of a counted vocabulary; other characters get the unknown id."""

    config: TokenizerConfig
    #: The vocabulary's characters in id order (after the special tokens).
    characters: str
    facts_json: str = "{}"
    #: Id of every code point below the largest vocabulary code point + 1 (others are unknown).
    _table: np.ndarray = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        points = np.array([ord(char) for char in self.characters], dtype=np.int64)
        table = np.full(int(points.max()) + 1 if len(points) else 0, self.special_ids()["unknown"], np.uint32)
        table[points] = np.arange(len(self.config.specials()), self.vocab_size, dtype=np.uint32)
        object.__setattr__(self, "_table", table)

    def __reduce__(self) -> tuple[Any, ...]:
        return (_rebuild_characters, (self.config, self.characters, self.facts_json))

    @property
    def kind(self) -> str:
        return "characters"

    @property
    def vocab_size(self) -> int:
        return len(self.config.specials()) + len(self.characters)

    def special_ids(self) -> dict[str, int]:
        """Role -> id, in id order.

        >>> CharacterTokenizer(config=TokenizerConfig(kind="characters"), characters="ab").special_ids()
        {'end_of_document': 0, 'pad': 1, 'unknown': 2}
        """
        return {role: rank for rank, role in enumerate(self.config.specials())}

    def encode_batch(self, texts: Sequence[str]) -> list[np.ndarray]:
        """Ids of the code points of each text, as ``uint32`` arrays.

        >>> tok = CharacterTokenizer(config=TokenizerConfig(kind="characters"), characters="ab")
        >>> [ids.tolist() for ids in tok.encode_batch(["abc", "<eod>"])]
        [[3, 4, 2], [2, 2, 2, 2, 2]]
        """
        if not texts:
            return []
        points = np.frombuffer("".join(texts).encode("utf-32-le"), dtype=np.uint32)
        size = len(self._table)
        if size == 0:
            ids = np.full(len(points), self.special_ids()["unknown"], dtype=np.uint32)
        else:
            ids = self._table[np.minimum(points, size - 1)]
            ids[points >= size] = self.special_ids()["unknown"]
        bounds = np.cumsum([len(text) for text in texts])[:-1]
        return list(np.split(ids, bounds))

    def tokens(self) -> tuple[str, ...]:
        """The string of every id, in id order."""
        return (*self.config.specials().values(), *self.characters)

    def decode(self, ids: Sequence[int] | np.ndarray) -> str:
        """Characters of ``ids``; special and unknown tokens appear as their strings."""
        table = self.tokens()
        return "".join(table[token_id] for token_id in checked_ids(ids, self.vocab_size).tolist())

    def hf_json(self) -> str:
        """HF ``WordLevel`` JSON over single code points that gives the same ids (module docstring)."""
        vocab = {token: token_id for token_id, token in enumerate(self.tokens())}
        return _word_level_json(vocab, self.config.unknown, CHARACTER_PATTERN)

    def save(self, path: Path) -> None:
        """Write :meth:`hf_json` to ``path`` through a temporary file and a rename."""
        write_text_atomically(path, self.hf_json())

    def describe(self) -> dict[str, object]:
        """Kind, vocabulary size, special tokens and the training facts."""
        ids = self.special_ids()
        return {
            "kind": self.kind,
            "vocab_size": self.vocab_size,
            "special_tokens": {
                role: {"text": text, "id": ids[role]} for role, text in self.config.specials().items()
            },
            **json.loads(self.facts_json),
        }


def count_units(texts: Iterable[str], *, words: bool) -> tuple[int, Counter[str]]:
    """(documents read, counts of their characters or word pieces)."""
    counts: Counter[str] = Counter()
    documents = 0
    splitter = word_pre_tokenizer() if words else None
    for text in texts:
        if splitter is None:
            counts.update(text)
        else:
            counts.update(piece for piece, _ in splitter.pre_tokenize_str(text))
        documents += 1
    return documents, counts


def train_characters(config: TokenizerConfig, train_texts: TextSource) -> CharacterTokenizer:
    """Count the characters of the train texts and keep the most frequent (module docstring)."""
    documents, counts = count_units(_sample(config, train_texts), words=False)
    slots = config.vocab_size - len(config.specials())
    characters = choose_units(counts, slots=slots, min_count=config.min_count)
    return CharacterTokenizer(
        config=config,
        characters="".join(characters),
        facts_json=_facts(documents, counts, characters, config),
    )


def train_words(config: TokenizerConfig, train_texts: TextSource) -> JsonTokenizer:
    """Count the word pieces of the train texts and keep the most frequent (module docstring)."""
    documents, counts = count_units(_sample(config, train_texts), words=True)
    specials = config.specials()
    words = choose_units(counts, slots=config.vocab_size - len(specials), min_count=config.min_count)
    vocab = {token: token_id for token_id, token in enumerate([*specials.values(), *words])}
    return JsonTokenizer(
        kind="words",
        json_text=_word_level_json(vocab, config.unknown, WORD_PATTERN),
        special_tokens=tuple(specials.items()),
        facts_json=_facts(documents, counts, words, config),
    )
