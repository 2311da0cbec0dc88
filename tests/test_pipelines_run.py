"""Every example definition in pipelines/ runs on a freshly built ferry archive.

Checks made with libraries outside the project: HF ``tokenizers`` loading the written
``tokenizer.json``, NumPy reading the shards, pyarrow reading the ledger, python-xxhash (XXH3-128)
hashing decoded documents against the ledger's text hashes. A trained vocabulary must not hold a
word planted only in documents that the split put outside train.
"""

from __future__ import annotations

import dataclasses
import json
import random
import sys
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet as pq
import pytest
import xxhash
from tokenizers import Tokenizer as HFTokenizer

from corpusprep.definition import load_definition
from corpusprep.pipeline import run_pipeline

ROOT = Path(__file__).parent.parent
sys.path.insert(0, str(ROOT / "fixtures"))
import make_ferry_archive  # noqa: E402

DEFINITIONS = sorted((ROOT / "pipelines").glob("*.toml"))
LOSSLESS = ("bytes", "bpe", "file")  # kinds whose decoding gives the text back exactly


def _planted_word(rng: random.Random) -> str:
    return "zq" + "".join(rng.choice("bcdfghjklmnpvwxz") for _ in range(10))


@pytest.fixture(scope="module")
def archive(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, str]]:
    """The ferry archive plus 40 notes, each with its own made-up word written three times."""
    folder = tmp_path_factory.mktemp("ferry") / "ferry"
    make_ferry_archive.build(folder)
    rng = random.Random(20240611)
    planted = folder / "planted"
    planted.mkdir()
    words: dict[str, str] = {}
    for number in range(40):
        word = _planted_word(rng)
        filler = " ".join(
            "".join(rng.choice("aeioulmnrst") for _ in range(rng.randint(3, 8))) for _ in range(40)
        )
        name = f"planted/note-{number:02d}.txt"
        (folder / name).write_text(f"Note {number}. {word} {filler} {word}, and {word}.\n", encoding="utf-8")
        words[name] = word
    return folder, words


@pytest.fixture(scope="module")
def runs(archive: tuple[Path, dict[str, str]], tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Output folder of every definition, run from a scratch folder laid out like the repository.

    Outputs go to ``<scratch>/build/<name>``, as the definitions' ``../build/<name>`` would from
    ``pipelines/``; a 'file' definition names the tokenizer of another run relative to its own
    folder (``../build/<name>/tokenizer.json``), so it runs last with its folder moved to
    ``<scratch>/pipelines``.
    """
    folder, _ = archive
    scratch = tmp_path_factory.mktemp("repo")
    (scratch / "pipelines").mkdir()
    definitions = {path.stem: load_definition(path) for path in DEFINITIONS}
    order = sorted(definitions, key=lambda name: (definitions[name].tokenizer.kind == "file", name))
    outputs: dict[str, Path] = {}
    with pytest.MonkeyPatch.context() as patch:
        patch.chdir(scratch)
        for name in order:
            definition = definitions[name]
            assert definition.output is not None
            output = scratch / "build" / definition.output.name
            definition = dataclasses.replace(definition, base=scratch / "pipelines")
            run_pipeline(definition.with_folders(input=folder, output=output), workers=1)
            outputs[name] = output
    return outputs


def _manifest(output: Path) -> dict[str, Any]:
    return json.loads((output / "manifest.json").read_text(encoding="utf-8"))


def _documents(output: Path, split: str, eod: int, pad: int) -> list[list[int]]:
    """The split's id stream rebuilt from its shards, cut at the end-of-document id (last piece dropped)."""
    manifest = _manifest(output)
    stream: list[int] = []
    for shard in manifest["splits"][split]["shards"]:
        for window in np.load(output / shard["file"], mmap_mode="r", allow_pickle=False):
            stream.extend(int(t) for t in (window[1:] if stream else window))
    while stream and stream[-1] == pad:
        stream.pop()
    pieces: list[list[int]] = [[]]
    for token in stream:
        if token == eod:
            pieces.append([])
        else:
            pieces[-1].append(token)
    return pieces[:-1]


@pytest.mark.parametrize("path", DEFINITIONS, ids=[path.stem for path in DEFINITIONS])
def test_definition_runs_and_its_output_decodes(path: Path, runs: dict[str, Path]) -> None:
    output = runs[path.stem]
    manifest = _manifest(output)
    definition = load_definition(path)
    described = manifest["tokenizer"]
    assert described["kind"] == definition.tokenizer.kind
    hf = HFTokenizer.from_file(str(output / "tokenizer.json"))
    specials = {role: item["id"] for role, item in described["special_tokens"].items()}
    for role, item in described["special_tokens"].items():
        assert hf.token_to_id(item["text"]) == item["id"], role
    assert hf.get_vocab_size(with_added_tokens=True) == described["vocab_size"]
    ledger = pq.read_table(output / "ledger.parquet").to_pylist()
    for split in manifest["splits"]:
        documents = _documents(output, split, specials["end_of_document"], specials["pad"])
        rows = [row for row in ledger if row["split"] == split]
        # Document lengths in the shards are the ledger's token counts (the ledger is written separately).
        assert Counter(map(len, documents)) <= Counter(row["tokens"] for row in rows)
        assert len(rows) - len(documents) <= 1
        if definition.tokenizer.kind in LOSSLESS:
            if definition.tokenizer.kind == "file":
                hf.encode_special_tokens = True
            decoded = (hf.decode(ids, skip_special_tokens=False) for ids in documents)
            found = Counter(xxhash.xxh3_128(text.encode()).hexdigest() for text in decoded)
            assert found <= Counter(row["text_hash"] for row in rows), split


def test_trained_tokenizers_report_train_documents(runs: dict[str, Path]) -> None:
    for name, output in runs.items():
        manifest = _manifest(output)
        training = manifest["tokenizer"].get("training")
        if manifest["tokenizer"]["kind"] in ("characters", "words", "bpe"):
            assert training is not None, name
            assert training["documents"] == manifest["splits"]["train"]["documents"], name


def _planted_splits(output: Path, words: dict[str, str]) -> dict[str, list[str]]:
    splits: dict[str, list[str]] = {"train": [], "outside": []}
    for row in pq.read_table(output / "ledger.parquet").to_pylist():
        if row["source"] in words and row["status"] == "kept":
            splits["train" if row["split"] == "train" else "outside"].append(words[row["source"]])
    return splits


def test_words_planted_outside_train_are_not_in_the_vocabulary(
    runs: dict[str, Path], archive: tuple[Path, dict[str, str]]
) -> None:
    _, words = archive
    output = runs["tokens-words"]
    planted = _planted_splits(output, words)
    assert planted["train"] and planted["outside"], planted  # both sides of the check are exercised
    vocab = HFTokenizer.from_file(str(output / "tokenizer.json")).get_vocab()
    for word in planted["train"]:
        assert word in vocab  # three times in a train document, min_count 2
    for word in planted["outside"]:
        assert word not in vocab


def test_bpe_has_no_token_spelling_a_word_planted_outside_train(
    runs: dict[str, Path], archive: tuple[Path, dict[str, str]]
) -> None:
    _, words = archive
    output = runs["tokens-bpe"]
    planted = _planted_splits(output, words)
    assert planted["outside"]
    hf = HFTokenizer.from_file(str(output / "tokenizer.json"))
    spelled = [hf.decode([token_id]) for token_id in range(hf.get_vocab_size())]
    for word in planted["outside"]:
        assert not any(word[2:] in piece for piece in spelled), word
        ids = hf.encode(word).ids
        assert len(ids) >= 4  # no merge covers it: it stays in short pieces


def test_worker_count_gives_identical_bytes_for_trained_kinds(
    archive: tuple[Path, dict[str, str]], runs: dict[str, Path], tmp_path: Path
) -> None:
    folder, _ = archive
    for name in ("tokens-characters", "tokens-words", "tokens-bpe"):
        definition = load_definition(ROOT / "pipelines" / f"{name}.toml")
        parallel = run_pipeline(
            definition.with_folders(input=folder, output=tmp_path / name), workers=2
        ).output
        first = {p.relative_to(runs[name]): p.read_bytes() for p in runs[name].rglob("*") if p.is_file()}
        second = {p.relative_to(parallel): p.read_bytes() for p in parallel.rglob("*") if p.is_file()}
        assert first == second, name
