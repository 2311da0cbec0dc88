"""Leaks planted by hand in copies of the demo output, each found by its kind.

How a leak is planted (the cleanest honest way we found): a copy of the finished demo output
is edited *consistently*, as if the pipeline had written it — a document's text is replaced,
or a document is added to train; its split is repacked with the project's packer
(``corpusprep.pack.pack_split``), its MinHash signature is recomputed with the project's
sketch (same NearConfig), the ledger row gets the new XXH3-128 and token count, and the
manifest gets the new counts, sizes and hashes (computed with python-xxhash, REFERENCES §6).
The tests first check that such a resealed copy passes every integrity check, so whatever
the audit reports afterwards is leakage, not damage.

The 13-gram rule is Brown et al. 2020 App. C, quoted from memory (REFERENCES §3.2).
"""

from __future__ import annotations

import json
import unicodedata
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import xxhash
from tokenizers import Tokenizer
from typer.testing import CliRunner

from corpusprep.audit import AuditConfig, audit_output
from corpusprep.cli import EXIT_LEAKAGE, app
from corpusprep.ledger import LEDGER_SCHEMA
from corpusprep.minhash import MultiplyShift, signature_matrix
from corpusprep.near import NearConfig, document_shingles
from corpusprep.pack import PackConfig, document_order, pack_split

ROOT = Path(__file__).parent.parent

INVENTED = [
    *["quillon", "marrow", "sextant", "larch", "pumice", "vellum", "cobalt", "tinder", "saffron", "garnet"],
    *["wicker", "ember", "thistle", "bramble", "quartz", "willow", "cinder", "juniper", "hazel", "sorrel"],
]


# ----------------------------------------------------------------------------- resealing helper
def _file_record(path: Path) -> dict[str, Any]:
    data = path.read_bytes()
    return {"bytes": len(data), "xxh3_128": xxhash.xxh3_128_hexdigest(data)}


def _split_documents(folder: Path, manifest: dict[str, Any], split: str) -> list[np.ndarray]:
    """The documents of a split in packing order, read back with plain NumPy (pack module docstring)."""
    parts = []
    for number, shard in enumerate(manifest["splits"][split]["shards"]):
        windows = np.load(folder / shard["file"], allow_pickle=False)
        parts.append(windows[0] if number == 0 else windows[0, 1:])
        parts.append(windows[1:, 1:].ravel())
    stream = np.concatenate(parts)
    specials = manifest["tokenizer"]["special_tokens"]
    stream = stream[stream != specials["pad"]["id"]]
    eod = specials["end_of_document"]["id"]
    ends = np.flatnonzero(stream == eod)
    starts = np.concatenate(([0], ends[:-1] + 1))
    return [stream[a:b] for a, b in zip(starts, ends, strict=True)]


def _tokenizer(folder: Path) -> Tokenizer:
    """The output's tokenizer file, loaded with HF tokenizers (the reference reader of that file)."""
    return Tokenizer.from_file(str(folder / "tokenizer.json"))


def _encode(tokenizer: Tokenizer, text: str) -> list[int]:
    return list(tokenizer.encode(text, add_special_tokens=False).ids)


def texts_by_record(folder: Path) -> dict[str, tuple[str, str]]:
    """record_id -> (split, text) of every kept document, decoded from the shards."""
    manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    rows = pq.read_table(folder / "ledger.parquet").to_pylist()
    seed = manifest["definition"]["pack"]["seed"]
    tokenizer = _tokenizer(folder)
    out = {}
    for split in manifest["splits"]:
        members = [row["record_id"] for row in rows if row["status"] == "kept" and row["split"] == split]
        documents = _split_documents(folder, manifest, split)
        for position, index in enumerate(document_order(len(members), seed, split).tolist()):
            ids = documents[position].tolist()
            out[members[index]] = (split, tokenizer.decode(ids, skip_special_tokens=False))
    return out


def reseal(
    folder: Path, *, replace: dict[str, str] | None = None, add: list[tuple[str, str, str]] = ()
) -> None:
    """Replace the text of kept documents and/or add kept documents ``(record_id, split, text)``."""
    replace = replace or {}
    manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    definition = manifest["definition"]
    texts = texts_by_record(folder)
    rows = pq.read_table(folder / "ledger.parquet").to_pylist()
    for record_id, split, text in add:
        rows.append(
            {name: None for name in LEDGER_SCHEMA.names}
            | {"record_id": record_id, "source": record_id, "status": "kept", "split": split}
        )
        texts[record_id] = (split, text)
    for record_id, text in replace.items():
        texts[record_id] = (texts[record_id][0], text)
    changed = set(replace) | {record_id for record_id, _, _ in add}
    tokenizer = _tokenizer(folder)
    for row in rows:
        if row["record_id"] in changed:
            text = texts[row["record_id"]][1]
            assert _encode(tokenizer, text) and tokenizer.decode(_encode(tokenizer, text)) == text
            row["text_hash"] = xxhash.xxh3_128_hexdigest(text.encode("utf-8"))
            row["tokens"] = len(_encode(tokenizer, text))
    kept = [row for row in rows if row["status"] == "kept"]

    # shards: repack the splits that changed, documents in the pipeline's packing order
    specials = manifest["tokenizer"]["special_tokens"]
    for split in sorted({texts[record_id][0] for record_id in changed}):
        for shard in manifest["splits"][split]["shards"]:
            (folder / shard["file"]).unlink()
        members = [row["record_id"] for row in kept if row["split"] == split]
        order = document_order(len(members), definition["pack"]["seed"], split).tolist()
        result = pack_split(
            split,
            (np.array(_encode(tokenizer, texts[members[i]][1]), dtype=np.int64) for i in order),
            config=PackConfig(**definition["pack"]),
            eod_id=specials["end_of_document"]["id"],
            pad_id=specials["pad"]["id"],
            bod_id=None,
            dtype=np.dtype(manifest["windows"]["dtype"]),
            folder=folder / "shards",
        )
        manifest["splits"][split].update(
            documents=result.documents,
            tokens=result.tokens,
            windows=result.windows,
            pad_tokens=result.pad_tokens,
            dropped_tokens=result.dropped_tokens,
            shards=[
                {
                    "file": f"shards/{s.file}",
                    "shape": list(s.shape),
                    "dtype": s.dtype,
                    "bytes": s.bytes,
                    "xxh3_128": s.xxh3_128,
                }
                for s in result.shards
            ],
        )

    # signatures: one row per kept ledger row, in ledger order
    near = NearConfig(**definition["near"])
    functions = MultiplyShift(permutations=near.permutations, seed=near.seed)
    old = np.load(folder / "signatures.npy", allow_pickle=False)
    old_rows = {
        row["record_id"]: index
        for index, row in enumerate(r for r in kept if r["record_id"] not in {a for a, _, _ in add})
    }
    signatures = np.empty((len(kept), near.permutations), dtype="<u4")
    for index, row in enumerate(kept):
        if row["record_id"] in changed:
            keys = document_shingles(texts[row["record_id"]][1], near)
            signatures[index] = signature_matrix([keys], functions)[0]
        else:
            signatures[index] = old[old_rows[row["record_id"]]]
    np.save(folder / "signatures.npy", signatures, allow_pickle=False)
    manifest["signatures"].update(shape=list(signatures.shape), **_file_record(folder / "signatures.npy"))

    # ledger and its totals
    pq.write_table(pa.Table.from_pylist(rows, schema=LEDGER_SCHEMA), folder / "ledger.parquet")
    manifest["ledger"].update(_file_record(folder / "ledger.parquet"))
    manifest["ledger"]["rows"] = manifest["ledger"]["read"] = len(rows)
    manifest["ledger"]["kept"] = len(kept)
    manifest["ledger"]["by_status"]["kept"] = len(kept)
    (folder / "manifest.json").write_text(json.dumps(manifest, indent=2), encoding="utf-8")


def findings(folder: Path, config: AuditConfig | None = None) -> dict[str, list[dict[str, Any]]]:
    report = audit_output(folder, config or AuditConfig())
    damage = [f.message for f in report.findings if f.severity == "damage"]
    assert damage == [], damage  # a planted leak must not look like damage
    out: dict[str, list[dict[str, Any]]] = {}
    for finding in report.findings:
        out.setdefault(finding.kind, []).append(finding.to_dict())
    return out


def _long_document(texts: dict[str, tuple[str, str]], split: str, words: int = 150) -> str:
    return next(
        record
        for record, (where, text) in sorted(texts.items())
        if where == split and len(text.split()) >= words and text.isascii()
    )


def _flagged(found: dict[str, list[dict[str, Any]]], kind: str) -> set[str]:
    return {item["record_id"] for item in found.get(kind, [])}


# ----------------------------------------------------------------------------- the planted leaks
def test_a_resealed_copy_without_changes_of_meaning_passes_integrity(copy: Path) -> None:
    texts = texts_by_record(copy)
    test_record = _long_document(texts, "test")
    reseal(copy, replace={test_record: texts[test_record][1]})  # same text: a no-op, resealed
    report = audit_output(copy, AuditConfig(skip_ngrams=True))
    assert report.outcome == "clean", [f.message for f in report.findings]


def test_a_test_document_copied_into_train_is_found(copy: Path) -> None:
    texts = texts_by_record(copy)
    test_record = _long_document(texts, "test")
    reseal(copy, add=[("planted/copy-of-test", "train", texts[test_record][1])])
    found = findings(copy)
    shared = found["shared_text_hash"]
    assert len(shared) == 1
    assert {d["record_id"] for d in shared[0]["documents"]} == {test_record, "planted/copy-of-test"}
    pairs = [{d["record_id"] for d in item["documents"]} for item in found["near_copy_across_splits"]]
    assert {test_record, "planted/copy-of-test"} in pairs
    assert test_record in _flagged(found, "shared_ngram")
    mine = next(item for item in found["shared_ngram"] if item["record_id"] == test_record)
    # the whole document is in train: contaminated (leakage) at the default fraction, not an overlap note
    assert mine["contaminated"] is True and mine["shared_fraction"] == 1.0
    assert CliRunner().invoke(app, ["audit", str(copy), "--quiet", "--skip-ngrams"]).exit_code == EXIT_LEAKAGE


def test_a_near_copy_of_a_train_document_in_test_is_found(copy: Path) -> None:
    texts = texts_by_record(copy)
    train_record = _long_document(texts, "train")
    test_record = _long_document(texts, "test")
    words = texts[train_record][1].split(" ")
    for position in (len(words) // 4, len(words) // 2, 3 * len(words) // 4):
        words[position] = INVENTED[position % len(INVENTED)]  # a few words changed
    reseal(copy, replace={test_record: " ".join(words)})
    found = findings(copy)
    pairs = {
        frozenset(d["record_id"] for d in item["documents"]): item["similarity"]
        for item in found["near_copy_across_splits"]
    }
    assert pairs[frozenset({train_record, test_record})] >= 0.8  # the run's near.threshold
    assert "shared_text_hash" not in found


def _reference_words(text: str) -> list[str]:
    """Brown et al. 2020 App. C (from memory): lowercase, punctuation (P*) ignored, whitespace split."""
    return "".join(" " if unicodedata.category(c).startswith("P") else c for c in text.lower()).split()


def _plant_run(copy: Path, length: int) -> tuple[str, str, str]:
    texts = texts_by_record(copy)
    train_record = _long_document(texts, "train")
    test_record = _long_document(texts, "test")
    train_words = _reference_words(texts[train_record][1])
    taken = " ".join(train_words[40 : 40 + length])
    filler = " ".join(f"{word}{index}" for index, word in enumerate(INVENTED * 3))
    reseal(copy, replace={test_record: f"{filler} {taken} {filler}"})
    return train_record, test_record, taken


def test_a_shared_13_gram_is_found(copy: Path) -> None:
    _train_record, test_record, taken = _plant_run(copy, 13)
    found = findings(copy)
    mine = [item for item in found["shared_ngram"] if item["record_id"] == test_record]
    assert len(mine) == 1
    assert mine[0]["shared_ngrams"] == 1
    assert mine[0]["ngram_text"] == taken
    split, text = texts_by_record(copy)[mine[0]["train_record_id"]]
    assert split == "train" and taken in " ".join(_reference_words(text))
    assert "near_copy_across_splits" not in found  # one shared run is not a near copy


def test_a_shared_12_gram_is_not_flagged_at_13(copy: Path) -> None:
    # Brown et al. 2020 App. C (from memory): the unit is the 13-gram; 12 shared words do not count.
    _train_record, test_record, _taken = _plant_run(copy, 12)
    assert test_record not in _flagged(findings(copy), "shared_ngram")
    assert test_record in _flagged(findings(copy, AuditConfig(ngram=12)), "shared_ngram")


def test_an_outside_evaluation_set_is_compared_with_train(copy: Path, tmp_path: Path) -> None:
    texts = texts_by_record(copy)
    train_record = _long_document(texts, "train")
    exact_record = sorted(r for r, (split, text) in texts.items() if split == "train" and r != train_record)[
        0
    ]
    edited = texts[train_record][1].split(" ")
    for position in (10, len(edited) // 2):
        edited[position] = INVENTED[position % len(INVENTED)]  # a lightly edited training paragraph
    items = [
        {"text": " ".join(edited)},
        # CRLF newlines and trailing spaces: the output's clean settings undo both
        {"text": texts[exact_record][1].replace("\n", " \r\n")},
        {"text": " ".join(INVENTED)},
    ]
    against = tmp_path / "evaluation.jsonl"
    against.write_text("".join(json.dumps(item) + "\n" for item in items), encoding="utf-8")
    found = findings(copy, AuditConfig(against=against))
    assert [(i["item"], i["train_record_id"]) for i in found["against_exact"]] == [
        ("evaluation.jsonl:2", exact_record)
    ]
    near = {(i["item"], i["train_record_id"]) for i in found["against_near_copy"]}
    assert ("evaluation.jsonl:1", train_record) in near
    assert "evaluation.jsonl:3" not in {i["item"] for i in found["against_near_copy"]}
    ngram = {i["record_id"] for i in found["against_ngram"]}
    assert {"evaluation.jsonl:1", "evaluation.jsonl:2"} <= ngram
    assert "evaluation.jsonl:3" not in ngram
    # the same items as CSV and Parquet give the same findings (readers: Python csv, pyarrow)
    table = pa.table({"body": [item["text"] for item in items]})
    pq.write_table(table, tmp_path / "evaluation.parquet")
    parquet = findings(copy, AuditConfig(against=tmp_path / "evaluation.parquet", text_field="body"))
    assert [i["item"] for i in parquet["against_exact"]] == ["evaluation.parquet#1"]


def test_the_findings_are_the_same_for_any_number_of_scan_threads(copy: Path) -> None:
    # determinism (project rule): threads only split the train scan; the merged marks are minima
    _train_record, test_record, _taken = _plant_run(copy, 13)
    one = audit_output(copy, AuditConfig(workers=1))
    assert test_record in {f.details.get("record_id") for f in one.findings if f.kind == "shared_ngram"}
    for workers in (2, 3):
        other = audit_output(copy, AuditConfig(workers=workers))
        assert [f.to_dict() for f in other.findings] == [f.to_dict() for f in one.findings]
    result = CliRunner().invoke(app, ["audit", str(copy), "--quiet", "--json", "--workers", "2"])
    # one shared 13-gram in a long document is an overlap note (below --contaminated-at): exit 0
    assert one.outcome == "clean" and result.exit_code == 0, result.output
    assert test_record in result.output
