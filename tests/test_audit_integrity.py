"""The audit's integrity checks: a finished demo output, then copies of it damaged by hand.

The object under test is the demo output (the invented ferry archive run through
pipelines/demo.toml). Damage is made with outside tools only: raw byte edits, file removal,
Python's json module on the manifest, pyarrow on the ledger; expected hashes come from
python-xxhash (XXH3-128, REFERENCES §6).
"""

from __future__ import annotations

import builtins
import json
import os
import shutil
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import xxhash
from typer.testing import CliRunner

from corpusprep.audit import AuditConfig, audit_output
from corpusprep.cli import EXIT_DAMAGED, EXIT_OK, EXIT_USAGE, app

ROOT = Path(__file__).parent.parent

FAST = AuditConfig(skip_ngrams=True)


def _manifest(folder: Path) -> dict[str, Any]:
    return json.loads((folder / "manifest.json").read_text(encoding="utf-8"))


def _write_manifest(folder: Path, manifest: dict[str, Any]) -> None:
    (folder / "manifest.json").write_text(json.dumps(manifest, indent=2), encoding="utf-8")


def _kinds(folder: Path, config: AuditConfig = FAST) -> dict[str, list[dict[str, Any]]]:
    report = audit_output(folder, config)
    out: dict[str, list[dict[str, Any]]] = {}
    for finding in report.findings:
        out.setdefault(finding.kind, []).append(finding.to_dict())
    return out


def test_demo_passes_every_integrity_check(demo: Path) -> None:
    report = audit_output(demo, FAST)
    assert report.findings == ()
    assert report.outcome == "clean"
    statuses = {check.name: check.status for check in report.checks}
    integrity = ("manifest", "definition_hash", "files", "shards", "ledger", "counts", "tokenizer")
    for name in (*integrity, "signatures"):
        assert statuses[name] == "passed", name
    # groups and clusters of the demo all sit in one split (the pipeline's rule), so these pass too
    leakage = ("shared_text_hash", "group_across_splits", "cluster_across_splits", "near_copy_across_splits")
    for name in leakage:
        assert statuses[name] == "passed", name


def test_cli_exit_codes_and_json(demo: Path, tmp_path: Path) -> None:
    runner = CliRunner()
    result = runner.invoke(app, ["audit", str(demo), "--skip-ngrams", "--json", "--quiet"])
    assert result.exit_code == EXIT_OK, result.output
    document = json.loads(result.stdout)
    assert document["outcome"] == "clean"
    assert {check["name"] for check in document["checks"]} >= {"shards", "counts", "near_copy_across_splits"}
    # a folder without manifest.json is a usage error (README exit codes)
    empty = tmp_path / "nothing"
    empty.mkdir()
    assert runner.invoke(app, ["audit", str(empty), "--quiet"]).exit_code == EXIT_USAGE
    unknown = tmp_path / "items.xml"
    unknown.write_text("<x/>", encoding="utf-8")
    result = runner.invoke(app, ["audit", str(demo), "--against", str(unknown), "--quiet"])
    assert result.exit_code == EXIT_USAGE
    assert "items.xml" in result.output


def test_one_flipped_byte_in_a_shard_is_found(copy: Path) -> None:
    record = _manifest(copy)["splits"]["train"]["shards"][-1]
    shard = copy / record["file"]
    data = bytearray(shard.read_bytes())
    data[-1] ^= 0x01  # a token of the last window: header and size stay valid
    shard.write_bytes(bytes(data))
    found = _kinds(copy)
    assert [item["file"] for item in found["file_hash"]] == [record["file"]]
    assert found["file_hash"][0]["found"] == xxhash.xxh3_128_hexdigest(bytes(data))
    assert found["file_hash"][0]["expected"] == record["xxh3_128"]
    result = CliRunner().invoke(app, ["audit", str(copy), "--quiet"])
    assert result.exit_code == EXIT_DAMAGED
    # the n-gram check does not read a damaged split
    report = audit_output(copy, AuditConfig())
    assert {c.name: c.status for c in report.checks}["shared_ngram"] == "skipped"


def test_a_deleted_shard_is_found(copy: Path) -> None:
    (copy / "shards" / "validation-00000.npy").unlink()
    found = _kinds(copy)
    assert [item["file"] for item in found["file_missing"]] == ["shards/validation-00000.npy"]
    assert audit_output(copy, FAST).outcome == "damaged"


def test_a_truncated_shard_fails_its_header_check(copy: Path) -> None:
    shard = copy / "shards" / "test-00000.npy"
    shard.write_bytes(shard.read_bytes()[:-129])
    found = _kinds(copy)
    assert "file_size" in found and "shard_header" in found


def test_an_edited_count_in_the_manifest_is_found(copy: Path) -> None:
    manifest = _manifest(copy)
    documents = manifest["splits"]["validation"]["documents"]
    manifest["splits"]["validation"]["documents"] = documents + 1
    manifest["ledger"]["by_status"]["kept"] += 1
    _write_manifest(copy, manifest)
    found = _kinds(copy)
    keys = {item["key"]: item for item in found["count_mismatch"]}
    assert keys["splits.validation.documents"]["expected"] == documents + 1
    assert keys["splits.validation.documents"]["found"] == documents
    assert "ledger.by_status" in keys


def test_an_edited_window_count_breaks_the_packing_identity(copy: Path) -> None:
    manifest = _manifest(copy)
    manifest["splits"]["test"]["windows"] += 1
    _write_manifest(copy, manifest)
    found = _kinds(copy)
    assert {item["key"] for item in found["count_mismatch"]} == {"splits.test.windows", "splits.test"}


def test_an_edited_definition_no_longer_matches_its_hash(copy: Path) -> None:
    manifest = _manifest(copy)
    manifest["definition"]["split"]["seed"] += 1
    _write_manifest(copy, manifest)
    assert "definition_hash" in _kinds(copy)


def test_an_edited_ledger_is_found(copy: Path) -> None:
    table = pq.read_table(copy / "ledger.parquet")
    pq.write_table(table.slice(0, table.num_rows - 1), copy / "ledger.parquet")
    found = _kinds(copy)
    assert [item["file"] for item in found["file_hash"]] == ["ledger.parquet"]


def test_a_path_outside_the_output_is_refused_and_never_opened(
    copy: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    outside = tmp_path / "outside.npy"
    shutil.copy(copy / "shards" / "train-00000.npy", outside)  # a real file there, to tempt a reader
    manifest = _manifest(copy)
    manifest["splits"]["train"]["shards"][0]["file"] = "../outside.npy"
    manifest["tokenizer"]["file"] = str(tmp_path / "tokenizer.json")  # absolute: refused as well
    _write_manifest(copy, manifest)
    opened: list[str] = []
    real_open = builtins.open
    real_os_open = os.open

    def spy_open(file: Any, *args: Any, **kwargs: Any) -> Any:
        opened.append(os.path.abspath(os.fspath(file)) if not isinstance(file, int) else str(file))
        return real_open(file, *args, **kwargs)

    def spy_os_open(path: Any, *args: Any, **kwargs: Any) -> Any:
        opened.append(os.path.abspath(os.fspath(path)))
        return real_os_open(path, *args, **kwargs)

    monkeypatch.setattr(builtins, "open", spy_open)
    monkeypatch.setattr(os, "open", spy_os_open)
    report = audit_output(copy, AuditConfig())
    monkeypatch.undo()
    refused = [f.to_dict() for f in report.findings if f.kind == "path_refused"]
    assert {item["path"] for item in refused} == {"../outside.npy", str(tmp_path / "tokenizer.json")}
    assert report.outcome == "damaged"
    assert str(outside) not in opened and str(tmp_path / "tokenizer.json") not in opened
    assert any(path.endswith("manifest.json") for path in opened)  # the spy did see the audit's reads


def test_a_link_leading_outside_is_refused(copy: Path, tmp_path: Path) -> None:
    outside = tmp_path / "elsewhere.npy"
    shard = copy / "shards" / "test-00000.npy"
    shutil.move(shard, outside)
    shard.symlink_to(outside)
    found = _kinds(copy)
    assert [item["path"] for item in found["path_refused"]] == ["shards/test-00000.npy"]


def test_a_manifest_that_is_not_json_is_damage(copy: Path) -> None:
    (copy / "manifest.json").write_text("{ not json", encoding="utf-8")
    report = audit_output(copy, FAST)
    assert [f.kind for f in report.findings] == ["manifest"]
    assert report.outcome == "damaged"


def test_an_unknown_schema_version_is_refused(copy: Path) -> None:
    manifest = _manifest(copy)
    manifest["schema_version"] = 99
    _write_manifest(copy, manifest)
    found = _kinds(copy)
    assert found["manifest"][0]["found"] == 99


def test_the_demo_audits_clean_and_reports_template_overlap(demo: Path) -> None:
    """The ferry archive's bulletins come from templates, so documents in different splits share
    boilerplate 13-grams: reported as overlap notes, not contamination, at the default fraction.
    Under Brown et al.'s any-overlap rule (contaminated_at = 0; from memory) the same findings are
    leakage; no other kind of finding appears either way."""
    report = audit_output(demo, AuditConfig())
    assert report.outcome == "clean"
    assert {f.kind for f in report.findings} <= {"shared_ngram"}
    assert all(f.severity == "overlap" and f.details["shared_fraction"] < 0.7 for f in report.findings)
    strict = audit_output(demo, AuditConfig(contaminated_at=0.0))
    assert strict.outcome == "leakage"
    assert {f.kind for f in strict.findings} == {"shared_ngram"}
    flagged = {f.details["record_id"] for f in report.findings}
    assert {f.details["record_id"] for f in strict.findings} == flagged
    assert CliRunner().invoke(app, ["audit", str(demo), "--quiet"]).exit_code == 0


def test_ledger_token_counts_must_match_the_stream(copy: Path) -> None:
    table = pq.read_table(copy / "ledger.parquet")
    rows = table.to_pylist()
    target = next(row for row in rows if row["status"] == "kept" and row["split"] == "validation")
    target["tokens"] += 1
    pq.write_table(pa.Table.from_pylist(rows, schema=table.schema), copy / "ledger.parquet")
    manifest = _manifest(copy)
    data = (copy / "ledger.parquet").read_bytes()
    manifest["ledger"].update(bytes=len(data), xxh3_128=xxhash.xxh3_128_hexdigest(data))
    _write_manifest(copy, manifest)
    found = _kinds(copy, AuditConfig())
    assert {item["key"] for item in found["count_mismatch"]} == {"splits.validation.tokens"}
    assert [item["record_id"] for item in found["stream_mismatch"]] == [target["record_id"]]


def test_a_flipped_byte_in_a_document_starts_file_is_damage(copy: Path) -> None:
    # the demo writes shards/NAME.starts.npy (pack.document_starts); its hash is in the manifest
    manifest = _manifest(copy)
    entry = manifest["splits"]["train"]["shards"][0]["document_starts"]
    path = copy / entry["file"]
    data = bytearray(path.read_bytes())
    data[-1] ^= 0xFF
    path.write_bytes(bytes(data))
    found = _kinds(copy)
    assert found["file_hash"][0]["file"] == entry["file"]
    assert found["file_hash"][0]["found"] == xxhash.xxh3_128(bytes(data)).hexdigest()
