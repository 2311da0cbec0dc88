"""The whole job on the demo archive, checked with libraries outside the project.

- shards against the NumPy ``.npy`` format specification (numpy.lib.format docs, NEP 1) and
  ``numpy.load(mmap_mode="r", allow_pickle=False)``;
- shard and ledger hashes recomputed with python-xxhash (XXH3-128, big-endian hex digest);
- the ledger read back with pyarrow's Parquet reader;
- windows decoded with HF ``tokenizers`` from the written ``tokenizer.json``: the stream between
  end-of-document tokens must reproduce exactly the kept documents of that split.
"""

from __future__ import annotations

import ast
import json
import struct
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet as pq
import pytest
import xxhash

from corpusprep.definition import load_definition
from corpusprep.errors import OutputExistsError, TooManyRejectedError
from corpusprep.pipeline import run_pipeline

ROOT = Path(__file__).parent.parent

DEMO = ROOT / "pipelines" / "demo.toml"


def _tree_bytes(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _manifest(output: Path) -> dict[str, Any]:
    return json.loads((output / "manifest.json").read_text(encoding="utf-8"))


def test_ledger_sum_holds_and_matches_the_manifest(demo_output: Path) -> None:
    manifest = _manifest(demo_output)
    ledger = pq.read_table(demo_output / "ledger.parquet").to_pylist()
    statuses = Counter(row["status"] for row in ledger)
    assert len(ledger) == manifest["ledger"]["read"] == manifest["stages"]["read"]["records"]
    assert manifest["ledger"]["by_status"] == {s: statuses.get(s, 0) for s in manifest["ledger"]["by_status"]}
    assert sum(statuses.values()) == len(ledger)
    assert len({row["record_id"] for row in ledger}) == len(ledger)
    # every record that is not kept says why
    assert all(row["reason"] for row in ledger if row["status"] != "kept")
    # every kept document has a split and a token count; nothing else does
    for row in ledger:
        assert (row["split"] is not None) == (row["status"] == "kept")
    per_split = Counter(row["split"] for row in ledger if row["status"] == "kept")
    for split, info in manifest["splits"].items():
        assert info["documents"] == per_split.get(split, 0)


def test_input_files_are_listed_with_their_hashes(archive: Path, demo_output: Path) -> None:
    manifest = _manifest(demo_output)
    listed = {item["path"]: item for item in manifest["inputs"]["files"]}
    on_disk = {str(p.relative_to(archive)).replace("\\", "/"): p for p in archive.rglob("*") if p.is_file()}
    for path, item in listed.items():
        if item["xxh3_128"] == "":
            # not read on purpose (a link leading outside the input, an unreadable file): all rejected
            assert item["records"] == item["rejected"] >= 1
            continue
        data = on_disk[path].read_bytes()
        assert item["bytes"] == len(data)
        assert item["xxh3_128"] == xxhash.xxh3_128(data).hexdigest()


def _npy_header(data: bytes) -> tuple[int, dict[str, Any]]:
    # numpy.lib.format: magic "\x93NUMPY", major, minor, little-endian uint16 HEADER_LEN (v1.0),
    # ASCII dict header padded with spaces, ending in "\n", total divisible by 64.
    assert data[:6] == b"\x93NUMPY"
    assert (data[6], data[7]) == (1, 0)
    (header_len,) = struct.unpack("<H", data[8:10])
    assert (10 + header_len) % 64 == 0
    header = data[10 : 10 + header_len].decode("latin-1")
    assert header.endswith("\n")
    return 10 + header_len, ast.literal_eval(header)


def test_shards_follow_the_npy_format(demo_output: Path) -> None:
    manifest = _manifest(demo_output)
    length = manifest["windows"]["length"]
    shard_count = 0
    for info in manifest["splits"].values():
        for shard in info["shards"]:
            shard_count += 1
            data = (demo_output / shard["file"]).read_bytes()
            offset, header = _npy_header(data)
            assert header["descr"] == shard["dtype"] and header["descr"].startswith("<u")
            assert header["fortran_order"] is False
            assert list(header["shape"]) == shard["shape"] and shard["shape"][1] == length + 1
            itemsize = np.dtype(header["descr"]).itemsize
            assert len(data) == offset + shard["shape"][0] * shard["shape"][1] * itemsize
            assert xxhash.xxh3_128(data).hexdigest() == shard["xxh3_128"]
            array = np.load(demo_output / shard["file"], mmap_mode="r", allow_pickle=False)
            assert isinstance(array, np.memmap) and array.shape == tuple(shard["shape"])
            assert int(array.max()) < manifest["tokenizer"]["vocab_size"]
    assert shard_count >= 3


def test_windows_reproduce_the_kept_documents(demo_output: Path) -> None:
    from tokenizers import Tokenizer

    manifest = _manifest(demo_output)
    tokenizer = Tokenizer.from_file(str(demo_output / "tokenizer.json"))
    eod = manifest["tokenizer"]["special_tokens"]["end_of_document"]["id"]
    pad = manifest["tokenizer"]["special_tokens"]["pad"]["id"]
    ledger = pq.read_table(demo_output / "ledger.parquet").to_pylist()
    for split, info in manifest["splits"].items():
        expected = Counter(row["text_hash"] for row in ledger if row["split"] == split)
        stream: list[int] = []
        for shard in info["shards"]:
            windows = np.load(demo_output / shard["file"], mmap_mode="r", allow_pickle=False)
            for window in windows:
                # consecutive windows share one token: window k ends where window k+1 starts
                if stream:
                    assert stream[-1] == int(window[0])
                    stream.extend(int(t) for t in window[1:])
                else:
                    stream.extend(int(t) for t in window)
        while stream and stream[-1] == pad:
            stream.pop()
        pieces: list[list[int]] = [[]]
        for token in stream:
            if token == eod:
                pieces.append([])
            else:
                pieces[-1].append(token)
        complete = pieces[:-1]  # the last piece may be cut by the dropped or padded tail
        decoded = (tokenizer.decode(piece, skip_special_tokens=False) for piece in complete)
        found = Counter(xxhash.xxh3_128(text.encode()).hexdigest() for text in decoded)
        assert found <= expected, f"{split}: a decoded document is not a kept document of the split"
        assert sum(expected.values()) - sum(found.values()) <= 1


def test_rerun_and_worker_count_give_identical_bytes(
    archive: Path, demo_output: Path, tmp_path: Path
) -> None:
    definition = load_definition(DEMO)
    again = run_pipeline(definition.with_folders(input=archive, output=tmp_path / "one"), workers=1).output
    parallel = run_pipeline(definition.with_folders(input=archive, output=tmp_path / "two"), workers=2).output
    reference = _tree_bytes(demo_output)
    assert _tree_bytes(again) == reference
    assert _tree_bytes(parallel) == reference


def test_the_cut_of_the_inputs_into_first_pass_tasks_changes_no_byte(
    archive: Path, demo_output: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # One file per task (and, below, groups of three): the staged rows, the ledger (fixed row
    # groups) and every other file come out the same as from the default cut.
    import corpusprep.pipeline as pipeline_module

    definition = load_definition(DEMO)
    monkeypatch.setattr(pipeline_module, "_PART_BYTES", 1)
    one_each = run_pipeline(definition.with_folders(input=archive, output=tmp_path / "each"), workers=2)
    monkeypatch.setattr(pipeline_module, "_PART_BYTES", 1 << 30)
    monkeypatch.setattr(pipeline_module, "_PART_FILES", 3)
    threes = run_pipeline(definition.with_folders(input=archive, output=tmp_path / "threes"), workers=1)
    reference = _tree_bytes(demo_output)
    assert _tree_bytes(one_each.output) == reference
    assert _tree_bytes(threes.output) == reference


def test_input_groups_are_consecutive_runs_of_about_the_part_size(tmp_path: Path) -> None:
    from corpusprep.pipeline import input_groups
    from corpusprep.walk import Entry

    sizes = [5, 5, 20, 1, 1, 1, 9]
    entries = []
    for number, size in enumerate(sizes):
        path = tmp_path / f"{number}.txt"
        path.write_bytes(b"x" * size)
        entries.append(Entry(path.name, str(path), "file"))
    entries.append(Entry("gone.txt", str(tmp_path / "gone.txt"), "file"))  # vanished: size 0
    groups = input_groups(entries, part_bytes=10, part_files=2)
    assert [entry for group in groups for entry in group] == entries
    assert [[e.source for e in group] for group in groups] == [
        ["0.txt", "1.txt"], ["2.txt"], ["3.txt", "4.txt"], ["5.txt", "6.txt"], ["gone.txt"],
    ]  # fmt: skip


def test_refuses_a_non_empty_output_unless_forced(archive: Path, tmp_path: Path) -> None:
    output = tmp_path / "out"
    output.mkdir()
    (output / "keep.txt").write_text("earlier work", encoding="utf-8")
    definition = load_definition(DEMO).with_folders(input=archive, output=output)
    with pytest.raises(OutputExistsError, match="--force"):
        run_pipeline(definition)
    assert (output / "keep.txt").exists()
    run_pipeline(definition, force=True)
    assert (output / "manifest.json").exists() and not (output / "keep.txt").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")], "no temporary folder is left behind"


def test_too_many_rejected_records_stop_the_run(tmp_path: Path) -> None:
    raw = tmp_path / "raw"
    raw.mkdir()
    (raw / "bad.jsonl").write_text('{"text": "fine"}\nnot json\n{"nope": 1}\n', encoding="utf-8")
    definition = load_definition(DEMO).with_folders(input=raw, output=tmp_path / "out")
    with pytest.raises(TooManyRejectedError, match=r"bad.jsonl:2: invalid_json"):
        run_pipeline(definition)
    assert not (tmp_path / "out").exists()


def _planted() -> list[dict[str, Any]]:
    data = json.loads((ROOT / "fixtures" / "ferry_planted.json").read_text(encoding="utf-8"))
    planted: list[dict[str, Any]] = data["planted"]
    return planted


def test_every_planted_defect_shows_up_with_its_reason(demo_output: Path) -> None:
    # The demo archive records what it planted (fixtures/ferry_planted.json, invented data):
    # each planted defect must appear in the ledger or manifest as recorded there.
    manifest = _manifest(demo_output)
    rows = pq.read_table(demo_output / "ledger.parquet").to_pylist()
    by_place = {(row["source"], row["line"]): row for row in rows}
    by_id = {row["record_id"]: row for row in rows}
    encodings = {item["path"]: item["encoding"] for item in manifest["inputs"]["files"]}
    clean_counts = manifest["stages"]["clean"]
    seen_kinds = Counter()
    for entry in _planted():
        row = by_place.get((entry["source"], entry["line"]))
        kind = entry["kind"]
        seen_kinds[kind] += 1
        if kind in ("rejected", "empty"):
            assert row is not None, entry
            assert row["status"] == entry["status"], entry
            assert row["reason"].split(":")[0] == entry["reason"], entry
        elif kind == "exact_copy":
            assert row is not None and row["status"] == "exact_copy", entry
            original = by_place[(entry["copy_of_source"], entry["copy_of_line"])]
            assert row["duplicate_of"] == original["record_id"], entry
        elif kind == "fix":
            assert row is not None, entry
            assert clean_counts[entry["fix"]] >= 1, entry
            if "expected_text" in entry:
                assert row["text_hash"] == xxhash.xxh3_128(entry["expected_text"].encode()).hexdigest(), entry
        elif kind == "encoding":
            assert encodings[entry["source"]] == entry["encoding"], entry
        elif kind == "near_pair":
            other = by_place[(entry["other_source"], entry["other_line"])]
            assert row is not None
            together = row["cluster"] is not None and row["cluster"] == other["cluster"]
            if entry["relation"] == "near":
                assert together, entry
                copy = row if row["status"] == "near_copy" else other
                assert by_id[copy["duplicate_of"]]["status"] == "kept", entry
            elif entry["relation"] == "distinct":
                assert not together, entry
    assert seen_kinds["rejected"] >= 7 and seen_kinds["exact_copy"] >= 10 and seen_kinds["near_pair"] >= 10


def test_near_copies_never_straddle_splits_for_any_seed(archive: Path, tmp_path: Path) -> None:
    # With action = "cluster" every member stays; a cluster must still sit in one split, whatever the seed.
    import dataclasses

    base = load_definition(DEMO)
    for seed in (0, 1, 2, 3, 4):
        definition = dataclasses.replace(
            base.with_folders(input=archive, output=tmp_path / f"s{seed}"),
            near=dataclasses.replace(base.near, action="cluster"),
            split=dataclasses.replace(base.split, seed=seed),
        )
        output = run_pipeline(definition).output
        rows = pq.read_table(output / "ledger.parquet").to_pylist()
        split_of_cluster: dict[str, set[str]] = {}
        for row in rows:
            if row["cluster"] is not None and row["status"] == "kept":
                split_of_cluster.setdefault(row["cluster"], set()).add(row["split"])
        assert split_of_cluster, "the demo has near-duplicate clusters"
        assert all(len(splits) == 1 for splits in split_of_cluster.values())
        groups: dict[str, set[str]] = {}
        for row in rows:
            if row["group"] is not None and row["status"] == "kept":
                groups.setdefault(row["group"], set()).add(row["split"])
        assert all(len(splits) == 1 for splits in groups.values())


def _die_on_second_batch(batch: Any) -> Any:
    import os
    import signal

    if batch == 1:
        os.kill(os.getpid(), signal.SIGKILL)
    return batch


def test_a_worker_that_dies_fails_the_map_clearly() -> None:
    from corpusprep.errors import WorkerDiedError
    from corpusprep.pool import ordered_map

    with pytest.raises(WorkerDiedError, match="ended abruptly"):
        list(ordered_map(_die_on_second_batch, range(6), workers=2))


def test_document_starts_mark_every_document_beginning(demo_output: Path) -> None:
    # Reference: rebuild each split's token stream in plain Python from the shards (windows overlap
    # by one token) and list the stream positions that follow an end-of-document token (plus 0).
    manifest = _manifest(demo_output)
    assert manifest["windows"]["document_starts"] is True
    length = manifest["windows"]["length"]
    eod = manifest["tokenizer"]["special_tokens"]["end_of_document"]["id"]
    for info in manifest["splits"].values():
        stream: list[int] = []
        found: list[int] = []
        for shard in info["shards"]:
            windows = np.load(demo_output / shard["file"], mmap_mode="r", allow_pickle=False)
            entry = shard["document_starts"]
            data = (demo_output / entry["file"]).read_bytes()
            assert xxhash.xxh3_128(data).hexdigest() == entry["xxh3_128"] and len(data) == entry["bytes"]
            starts = np.load(demo_output / entry["file"], allow_pickle=False)
            assert starts.dtype == np.dtype("<i4") and starts.shape == (entry["count"], 2)
            base = len(stream) - (1 if stream else 0)
            for row, column in starts.tolist():
                found.append(base + row * length + column)
            for window in windows:
                stream.extend(int(t) for t in (window[1:] if stream else window))
        covered = len(stream) - 1  # positions that are some window's input
        expected = [p for p in range(covered) if p == 0 or stream[p - 1] == eod]
        assert found == expected


def test_large_files_read_by_the_driver_change_no_byte(
    archive: Path, demo_output: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Every file counts as large: the driver reads each one and its batches become the tasks
    # (the path a single multi-gigabyte file takes), in batches of seven rows.
    import corpusprep.pipeline as pipeline_module

    monkeypatch.setattr(pipeline_module, "_PART_BYTES", 1)
    monkeypatch.setattr(pipeline_module, "_DRIVER_READ_BYTES", 0)
    monkeypatch.setattr(pipeline_module, "_BATCH_ROWS", 7)
    definition = load_definition(DEMO)
    output = run_pipeline(
        definition.with_folders(input=archive, output=tmp_path / "driver"), workers=2
    ).output
    assert _tree_bytes(output) == _tree_bytes(demo_output)
