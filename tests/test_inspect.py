"""``corpusprep inspect`` (typer.testing.CliRunner) on the demo output and on a hand-built one.

References: the manifest's counts and shard list (read with ``json``); window ids read with
``numpy.load(mmap_mode="r")`` from the shard files; text decoded with HF ``tokenizers``
(``Tokenizer.from_file`` of the output's ``tokenizer.json``).
"""

from __future__ import annotations

import json
import re
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from tokenizers import Tokenizer, models
from typer.testing import CliRunner

from corpusprep.cli import EXIT_OK, EXIT_USAGE, app

ROOT = Path(__file__).parent.parent
sys.path.insert(0, str(ROOT / "tests"))
from test_windows import build_output  # noqa: E402

runner = CliRunner()


def _manifest(output: Path) -> dict[str, Any]:
    data: dict[str, Any] = json.loads((output / "manifest.json").read_text(encoding="utf-8"))
    return data


def _inspect(*arguments: str) -> str:
    result = runner.invoke(app, ["inspect", *arguments])
    assert result.exit_code == EXIT_OK, result.output
    return result.output


def _numbers(text: str) -> list[int]:
    return [int(value.replace(",", "")) for value in re.findall(r"\d[\d,]*", text)]


def test_counts_and_shard_table_equal_the_manifest(demo_output: Path) -> None:
    manifest = _manifest(demo_output)
    output = _inspect(str(demo_output), "--show", "2")
    lines = output.splitlines()
    ledger = manifest["ledger"]
    head = " ".join(output.split())  # the first paragraph may wrap at the terminal width
    expected_head = (
        f"{ledger['read']:,} records read, {ledger['kept']:,} kept, {ledger['removed']:,} removed, "
        f"{ledger['rejected']:,} rejected; windows of {manifest['windows']['stored_length']} tokens"
    )
    assert expected_head in head
    for name, split in manifest["splits"].items():
        rows = [line for line in lines if re.match(rf"\s*{name}\s+│", line)]
        assert len(rows) == 1, (name, output)
        expected = [
            split["documents"],
            split["tokens"],
            split["windows"],
            split["pad_tokens"],
            split["dropped_tokens"],
            len(split["shards"]),
        ]
        assert _numbers(rows[0]) == expected
        for shard in split["shards"]:
            row = [line for line in lines if line.strip().startswith(shard["file"] + " ")]
            assert len(row) == 1, (shard["file"], output)
            # the file's own numbers (its index) are part of its name; the rest are windows and bytes
            cells = [cell.strip() for cell in row[0].split("│")]
            assert cells[0] == shard["file"]
            assert _numbers(cells[1]) == [shard["shape"][0]] and _numbers(cells[2]) == [shard["bytes"]]
            assert cells[3] == shard["xxh3_128"][:12] + "…"
    assert sum(1 for line in lines if re.match(r"\s*shards/\S+\.npy\s+│", line)) == sum(
        len(split["shards"]) for split in manifest["splits"].values()
    )


@pytest.mark.parametrize("split", ["train", "validation"])
def test_decoded_windows_equal_hf_tokenizers_decode(demo_output: Path, split: str) -> None:
    manifest = _manifest(demo_output)
    tokenizer = Tokenizer.from_file(str(demo_output / manifest["tokenizer"]["file"]))
    first_shard = manifest["splits"][split]["shards"][0]
    stored = np.load(demo_output / first_shard["file"], mmap_mode="r", allow_pickle=False)
    output = _inspect(str(demo_output), "--show", "2", "--split", split)
    lines = output.splitlines()
    inputs = [line for line in lines if line.startswith("input  ")]
    targets = [line for line in lines if line.startswith("target ")]
    assert len(inputs) == len(targets) == 2
    assert f"{split} window 1" in output and f"{split} window 2" not in output
    for index in range(2):
        window = np.array(stored[index])
        x, y = window[:-1], window[1:]
        text = tokenizer.decode(x.tolist(), skip_special_tokens=False)
        assert inputs[index] == "input  " + repr(text)
        last = tokenizer.decode([int(y[-1])], skip_special_tokens=False)
        assert targets[index].endswith(repr(last))
        assert f"ids x[:8] = {x[:8].tolist()}  y[:8] = {y[:8].tolist()}" in output


def test_without_show_no_window_is_decoded(demo_output: Path) -> None:
    output = _inspect(str(demo_output))
    assert "window 0" not in output and "input  " not in output
    assert "Shards" in output and "Splits" in output


def test_an_unknown_split_is_named_before_anything_is_printed(demo_output: Path) -> None:
    result = runner.invoke(app, ["inspect", str(demo_output), "--show", "1", "--split", "dev"])
    assert result.exit_code == EXIT_USAGE
    assert "--split dev: no such split" in result.stderr and "Shards" not in result.stdout


def test_decoded_text_is_printed_literally(tmp_path: Path) -> None:
    # text that looks like rich markup or an emoji code must come out unchanged (and must not crash)
    pieces = ["[bold]", "[/nothing]", ":ship:", "plain", "<eod>"]
    tokenizer = Tokenizer(
        models.WordLevel({piece: index for index, piece in enumerate(pieces)}, unk_token="plain")
    )
    folder = tmp_path / "out"
    build_output(folder, {"train": [2]}, length=9, dtype="|u1", vocab=len(pieces), seed=5)
    tokenizer.save(str(folder / "tokenizer.json"))
    manifest = _manifest(folder)
    manifest["ledger"] = {"read": 2, "kept": 2, "removed": 0, "rejected": 0}
    manifest["tokenizer"] = {"kind": "file", "vocab_size": len(pieces), "file": "tokenizer.json"}
    for split in manifest["splits"].values():
        split.update(documents=2, tokens=19, pad_tokens=0, dropped_tokens=0)
    (folder / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    # make sure the first window holds every tricky piece
    stored = np.load(folder / "shards" / "train-00000.npy", mmap_mode="r+")
    stored[0, :5] = np.arange(5)
    stored.flush()
    del stored
    output = _inspect(str(folder), "--show", "1")
    window = np.load(folder / "shards" / "train-00000.npy", mmap_mode="r")[0]
    expected = tokenizer.decode(window[:-1].tolist(), skip_special_tokens=False)
    assert "[bold]" in expected and ":ship:" in expected and "[/nothing]" in expected
    assert "input  " + repr(expected) in output.splitlines()
