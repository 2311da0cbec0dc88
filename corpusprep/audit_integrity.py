"""The integrity half of the audit: is the output folder what its manifest says it is?

Everything is checked from the output folder alone:

* ``manifest.json`` parses, is a corpusprep output (``"format"``) of a
  supported ``schema_version``, has the keys the audit needs, and its
  ``definition_hash`` is the XXH3-128 of its definition (canonical JSON, as
  :meth:`corpusprep.definition.Definition.digest` computes it);
* every path it names is relative and inside the folder
  (:func:`corpusprep.windows.safe_member`); a path that is refused is reported
  and the file is never opened;
* the ledger, tokenizer and signature files have the recorded size and
  XXH3-128; every shard also has a valid ``.npy`` header
  (:func:`corpusprep.shards.read_shard`) with the recorded shape and dtype;
* the counts agree: the ledger sum (rows = kept + removed + rejected, and
  ``by_status``) against the ledger itself, kept documents per split against
  the ledger, windows per split against the shards, the packing identity
  ``tokens + pad_tokens = windows * length + min(windows, 1) + dropped_tokens``
  (:mod:`corpusprep.pack`), tokens per split against the ledger's token counts
  plus the special tokens of each document, and the signature rows against the
  kept documents;
* the tokenizer file loads with HF ``tokenizers`` and gives the special
  tokens the ids the manifest records.

Each problem is one :class:`Finding` of severity ``"damage"`` that names the
file and the expected and found values.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from corpusprep.errors import IntegrityError
from corpusprep.hashing import hash_file, hash_text
from corpusprep.ledger import LEDGER_SCHEMA
from corpusprep.manifest import MANIFEST_FILE, SCHEMA_VERSION
from corpusprep.schema import EMPTY, EXACT_COPY, KEPT, NEAR_COPY, REJECTED, STATUSES
from corpusprep.shards import read_shard
from corpusprep.split import SPLITS
from corpusprep.windows import safe_member

__all__ = [
    "DAMAGE",
    "LEAKAGE",
    "OUTPUT_FORMAT",
    "OVERLAP",
    "CheckResult",
    "Finding",
    "Integrity",
    "ShardFile",
    "check_integrity",
]

DAMAGE = "damage"
LEAKAGE = "leakage"
#: Reported but not failing: evaluation documents sharing some long n-grams with train, below the
#: contamination fraction (templated text shares boilerplate sentences; see audit_leakage).
OVERLAP = "overlap"
#: The ``"format"`` value of a corpusprep manifest.
OUTPUT_FORMAT = "corpusprep output"
_REQUIRED_KEYS = ("definition", "definition_hash", "ledger", "tokenizer", "windows", "splits")

Progress = Callable[[str, int, "int | None"], None]


@dataclass(frozen=True, slots=True, kw_only=True)
class Finding:
    """One problem the audit found: its kind, ``"damage"`` or ``"leakage"``, a sentence, and data."""

    kind: str
    severity: str
    message: str
    details: Mapping[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        return {"kind": self.kind, "severity": self.severity, "message": self.message, **self.details}


@dataclass(frozen=True, slots=True, kw_only=True)
class CheckResult:
    """A check that ran (``"passed"``, ``"failed"``) or could not run (``"skipped"``, with why)."""

    name: str
    status: str
    note: str = ""


@dataclass(frozen=True, slots=True, kw_only=True)
class ShardFile:
    """A shard that passed every check: its path and number of windows."""

    path: Path
    rows: int


@dataclass(frozen=True, slots=True, kw_only=True)
class Integrity:
    """What the integrity checks found, and which files the leakage checks may use.

    ``ledger``, ``signatures`` and ``tokenizer`` are None unless the file passed;
    ``shards[split]`` is None unless every shard of the split passed.
    """

    manifest: dict[str, Any] | None
    ledger: pa.Table | None
    signatures: Path | None
    tokenizer: Path | None
    shards: dict[str, list[ShardFile] | None]
    findings: tuple[Finding, ...]
    checks: tuple[CheckResult, ...]


def _damage(kind: str, message: str, **details: Any) -> Finding:
    return Finding(kind=kind, severity=DAMAGE, message=message, details=details)


class _Collector:
    """Findings and check results in the order they are made."""

    def __init__(self) -> None:
        self.findings: list[Finding] = []
        self.checks: list[CheckResult] = []

    def run(self, name: str, found: list[Finding], note: str = "") -> bool:
        self.findings.extend(found)
        self.checks.append(CheckResult(name=name, status="failed" if found else "passed", note=note))
        return not found

    def skip(self, name: str, why: str) -> None:
        self.checks.append(CheckResult(name=name, status="skipped", note=why))


def _load_manifest(folder: Path) -> tuple[dict[str, Any] | None, list[Finding]]:
    path = folder / MANIFEST_FILE
    try:
        with open(path, encoding="utf-8") as handle:
            data = json.load(handle)
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as error:
        return None, [_damage("manifest", f"{path}: cannot be read as JSON: {error}", file=MANIFEST_FILE)]
    if not isinstance(data, dict):
        return None, [
            _damage(
                "manifest", f"{path}: expected a JSON object, found {type(data).__name__}", file=MANIFEST_FILE
            )
        ]
    problems = []
    if data.get("format") != OUTPUT_FORMAT:
        problems.append(
            _damage(
                "manifest",
                f"{path}: format is {data.get('format')!r}, expected {OUTPUT_FORMAT!r}",
                file=MANIFEST_FILE,
                key="format",
                expected=OUTPUT_FORMAT,
                found=data.get("format"),
            )
        )
    if data.get("schema_version") != SCHEMA_VERSION:
        problems.append(
            _damage(
                "manifest",
                f"{path}: schema_version is {data.get('schema_version')!r}, this audit reads "
                f"{SCHEMA_VERSION}",
                file=MANIFEST_FILE,
                key="schema_version",
                expected=SCHEMA_VERSION,
                found=data.get("schema_version"),
            )
        )
    for key in _REQUIRED_KEYS:
        if key not in data:
            problems.append(
                _damage("manifest", f"{path}: key {key!r} is missing", file=MANIFEST_FILE, key=key)
            )
    return (None if problems else data), problems


def _member(folder: Path, relative: Any, where: str) -> tuple[Path | None, list[Finding]]:
    if not isinstance(relative, str):
        return None, [
            _damage(
                "manifest", f"{MANIFEST_FILE}: {where} is {relative!r}, expected a relative path", key=where
            )
        ]
    try:
        return safe_member(folder, relative), []
    except IntegrityError as error:
        return None, [_damage("path_refused", f"{MANIFEST_FILE}: {where}: {error}", key=where, path=relative)]


def _check_file(path: Path, record: Mapping[str, Any], relative: str) -> list[Finding]:
    if not path.is_file():
        return [_damage("file_missing", f"{relative}: listed in the manifest but missing", file=relative)]
    size, digest = hash_file(path)
    found = []
    if size != record.get("bytes"):
        found.append(
            _damage(
                "file_size",
                f"{relative}: {size} bytes, the manifest says {record.get('bytes')}",
                file=relative,
                expected=record.get("bytes"),
                found=size,
            )
        )
    if digest != record.get("xxh3_128"):
        found.append(
            _damage(
                "file_hash",
                f"{relative}: xxh3_128 {digest}, the manifest says {record.get('xxh3_128')}",
                file=relative,
                expected=record.get("xxh3_128"),
                found=digest,
            )
        )
    return found


def _count(where: str, expected: Any, found: Any, file: str = MANIFEST_FILE) -> list[Finding]:
    if expected == found:
        return []
    return [
        _damage(
            "count_mismatch",
            f"{file}: {where} is {expected!r}, but {found!r} was found",
            file=file,
            key=where,
            expected=expected,
            found=found,
        )
    ]


def _check_shards(
    folder: Path, manifest: dict[str, Any], progress: Progress
) -> tuple[dict[str, list[ShardFile] | None], list[Finding]]:
    windows = manifest["windows"]
    findings: list[Finding] = []
    usable: dict[str, list[ShardFile] | None] = {}
    total = sum(len(info.get("shards", [])) for info in manifest["splits"].values())
    done = 0
    for split, info in manifest["splits"].items():
        good: list[ShardFile] | None = []
        rows = 0
        for index, record in enumerate(info.get("shards", [])):
            where = f"splits.{split}.shards[{index}].file"
            path, refused = _member(folder, record.get("file"), where)
            found = list(refused)
            if path is not None:
                relative = str(record["file"])
                found = _check_file(path, record, relative)
                if path.is_file():
                    try:
                        array = read_shard(path)
                    except IntegrityError as error:
                        found.append(_damage("shard_header", str(error), file=relative))
                    else:
                        shape = [int(extent) for extent in array.shape]
                        found += _shard_fields(relative, record, shape, array.dtype.str, windows)
                        del array
            starts = record.get("document_starts")
            if isinstance(starts, dict):  # optional: where documents begin (pack.document_starts)
                starts_path, starts_refused = _member(
                    folder, starts.get("file"), f"{where[:-5]}.document_starts.file"
                )
                findings += starts_refused
                if starts_path is not None:
                    findings += _check_file(starts_path, starts, str(starts["file"]))
            rows += int(record.get("shape", [0])[0])
            if found or good is None:
                good = None
            else:
                assert path is not None
                good.append(ShardFile(path=path, rows=int(record["shape"][0])))
            findings += found
            done += 1
            progress("shards", done, total)
        findings += _count(f"splits.{split}.windows", info.get("windows"), rows)
        usable[split] = good
    return usable, findings


def _shard_fields(
    relative: str, record: Mapping[str, Any], shape: list[int], dtype: str, windows: Mapping[str, Any]
) -> list[Finding]:
    found = []
    if shape != list(record.get("shape", [])):
        found.append(
            _damage(
                "shard_shape",
                f"{relative}: shape {shape}, the manifest says {record.get('shape')}",
                file=relative,
                expected=record.get("shape"),
                found=shape,
            )
        )
    if len(shape) == 2 and shape[1] != windows.get("stored_length"):
        found.append(
            _damage(
                "shard_shape",
                f"{relative}: windows of {shape[1]} tokens, the manifest's windows.stored_length is "
                f"{windows.get('stored_length')}",
                file=relative,
                expected=windows.get("stored_length"),
                found=shape[1],
            )
        )
    for key, expected in (("dtype", record.get("dtype")), ("windows.dtype", windows.get("dtype"))):
        if dtype != expected:
            found.append(
                _damage(
                    "shard_dtype",
                    f"{relative}: dtype {dtype}, the manifest's {key} is {expected!r}",
                    file=relative,
                    expected=expected,
                    found=dtype,
                )
            )
    return found


def _packing_identity(manifest: dict[str, Any]) -> list[Finding]:
    length = manifest["windows"].get("length")
    found = []
    for split, info in manifest["splits"].items():
        windows = info.get("windows", 0)
        left = info.get("tokens", 0) + info.get("pad_tokens", 0)
        right = windows * length + min(windows, 1) + info.get("dropped_tokens", 0)
        if left != right:
            found.append(
                _damage(
                    "count_mismatch",
                    f"{MANIFEST_FILE}: splits.{split}: tokens + pad_tokens = {left}, but windows * length + "
                    f"min(windows, 1) + dropped_tokens = {right}",
                    file=MANIFEST_FILE,
                    key=f"splits.{split}",
                    expected=right,
                    found=left,
                )
            )
    return found


def _read_ledger(path: Path, relative: str) -> tuple[pa.Table | None, list[Finding]]:
    try:
        table = pq.read_table(path)
    except (OSError, pa.ArrowException) as error:
        return None, [_damage("ledger", f"{relative}: cannot be read as Parquet: {error}", file=relative)]
    missing = [name for name in LEDGER_SCHEMA.names if name not in table.column_names]
    if missing:
        return None, [
            _damage(
                "ledger", f"{relative}: columns missing: {', '.join(missing)}", file=relative, missing=missing
            )
        ]
    return table, []


def _ledger_counts(manifest: dict[str, Any], table: pa.Table, relative: str) -> list[Finding]:
    record = manifest["ledger"]
    status = table.column("status").to_pylist()
    split = table.column("split").to_pylist()
    by_status = Counter(status)
    kept = by_status.get(KEPT, 0)
    removed = sum(by_status.get(name, 0) for name in (EMPTY, EXACT_COPY, NEAR_COPY))
    rejected = by_status.get(REJECTED, 0)
    found = _count("ledger.rows", record.get("rows"), table.num_rows)
    found += _count("ledger.kept", record.get("kept"), kept)
    found += _count("ledger.removed", record.get("removed"), removed)
    found += _count("ledger.rejected", record.get("rejected"), rejected)
    found += _count(
        "ledger.by_status", record.get("by_status"), {name: by_status.get(name, 0) for name in STATUSES}
    )
    if kept + removed + rejected != table.num_rows:
        unknown = sorted(str(name) for name in set(by_status) - set(STATUSES))
        found.append(
            _damage(
                "ledger",
                f"{relative}: {table.num_rows} rows, but kept {kept} + removed {removed} + rejected "
                f"{rejected} = {kept + removed + rejected} "
                f"(unknown statuses: {', '.join(unknown) or 'none'})",
                file=relative,
                expected=table.num_rows,
                found=kept + removed + rejected,
            )
        )
    record_ids = table.column("record_id").to_pylist()
    if len(set(record_ids)) != len(record_ids):
        repeated = [key for key, count in Counter(record_ids).items() if count > 1][:5]
        found.append(_damage("ledger", f"{relative}: repeated record ids, e.g. {repeated}", file=relative))
    misplaced = sum(
        1 for state, name in zip(status, split, strict=True) if (state == KEPT) != (name in SPLITS)
    )
    if misplaced:
        found.append(
            _damage(
                "ledger",
                f"{relative}: {misplaced} rows with a split but not kept, or kept without a split",
                file=relative,
            )
        )
    per_split = Counter(name for state, name in zip(status, split, strict=True) if state == KEPT)
    tokens: Counter[str] = Counter()
    for state, name, count in zip(status, split, table.column("tokens").to_pylist(), strict=True):
        if state == KEPT and name is not None:
            tokens[name] += int(count or 0)
    specials = 1 + int("begin_of_document" in manifest["tokenizer"].get("special_tokens", {}))
    for name, info in manifest["splits"].items():
        found += _count(f"splits.{name}.documents", info.get("documents"), per_split.get(name, 0))
        found += _count(
            f"splits.{name}.tokens",
            info.get("tokens"),
            tokens.get(name, 0) + specials * per_split.get(name, 0),
        )
    for name in sorted(str(key) for key in set(per_split) - set(manifest["splits"])):
        found.append(
            _damage(
                "ledger",
                f"{relative}: kept documents in split {name!r}, which the manifest lacks",
                file=relative,
            )
        )
    return found


def _check_tokenizer(path: Path, manifest: dict[str, Any], relative: str) -> list[Finding]:
    from tokenizers import Tokenizer

    try:
        tokenizer = Tokenizer.from_file(str(path))
    except Exception as error:  # tokenizers raises its own exception type
        return [_damage("tokenizer", f"{relative}: does not load with tokenizers: {error}", file=relative)]
    found = []
    for role, special in manifest["tokenizer"].get("special_tokens", {}).items():
        identifier = tokenizer.token_to_id(special.get("text", ""))
        if identifier != special.get("id"):
            found.append(
                _damage(
                    "tokenizer",
                    f"{relative}: {role} {special.get('text')!r} has id {identifier}, the manifest says "
                    f"{special.get('id')}",
                    file=relative,
                    expected=special.get("id"),
                    found=identifier,
                )
            )
    return found


def _signature_shape(path: Path, manifest: dict[str, Any], kept: int | None, relative: str) -> list[Finding]:
    record = manifest["signatures"]
    try:
        array = np.load(path, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError) as error:
        return [_damage("signatures", f"{relative}: unreadable .npy: {error}", file=relative)]
    shape = [int(extent) for extent in array.shape]
    found = []
    if shape != list(record.get("shape", [])) or array.dtype.str != record.get("dtype"):
        found.append(
            _damage(
                "signatures",
                f"{relative}: shape {shape} dtype {array.dtype.str}, the manifest says {record.get('shape')} "
                f"{record.get('dtype')}",
                file=relative,
                expected=[record.get("shape"), record.get("dtype")],
                found=[shape, array.dtype.str],
            )
        )
    permutations = manifest["definition"].get("near", {}).get("permutations")
    if len(shape) != 2 or shape[1] != permutations:
        found.append(
            _damage(
                "signatures",
                f"{relative}: rows of {shape[1:]} values, near.permutations is {permutations}",
                file=relative,
                expected=permutations,
                found=shape[1:],
            )
        )
    if kept is not None and shape[:1] != [kept]:
        found.append(
            _damage(
                "signatures",
                f"{relative}: {shape[:1]} rows, but the ledger has {kept} kept documents",
                file=relative,
                expected=kept,
                found=shape[:1],
            )
        )
    return found


def check_integrity(folder: Path, *, progress: Progress | None = None) -> Integrity:
    """Run every integrity check on the output ``folder`` (which must hold a ``manifest.json``)."""
    report = progress or (lambda stage, done, total: None)
    out = _Collector()
    manifest, problems = _load_manifest(folder)
    out.run("manifest", problems)
    empty: dict[str, list[ShardFile] | None] = {}
    if manifest is None:
        for name in ("definition_hash", "files", "shards", "counts", "ledger", "tokenizer", "signatures"):
            out.skip(name, "the manifest is unusable")
        return Integrity(
            manifest=None,
            ledger=None,
            signatures=None,
            tokenizer=None,
            shards=empty,
            findings=tuple(out.findings),
            checks=tuple(out.checks),
        )

    digest = hash_text(json.dumps(manifest["definition"], sort_keys=True, separators=(",", ":")))
    out.run(
        "definition_hash",
        []
        if digest == manifest["definition_hash"]
        else [
            _damage(
                "definition_hash",
                f"{MANIFEST_FILE}: definition_hash is {manifest['definition_hash']}, the definition "
                f"hashes to {digest}",
                file=MANIFEST_FILE,
                expected=manifest["definition_hash"],
                found=digest,
            )
        ],
    )

    files: dict[str, Path | None] = {}
    file_findings: list[Finding] = []
    named = {"ledger": manifest["ledger"], "tokenizer": manifest["tokenizer"]}
    if manifest.get("signatures") is not None:
        named["signatures"] = manifest["signatures"]
    for name, record in named.items():
        path, refused = _member(
            folder, record.get("file") if isinstance(record, dict) else None, f"{name}.file"
        )
        found = refused
        if path is not None:
            found = _check_file(path, record, str(record["file"]))
        files[name] = None if found else path
        file_findings += found
    out.run("files", file_findings, note="ledger, tokenizer and signature files: size and xxh3_128")

    shards, shard_findings = _check_shards(folder, manifest, report)
    out.run(
        "shards", shard_findings, note="path, size, xxh3_128, .npy header, shape and dtype of every shard"
    )

    ledger: pa.Table | None = None
    count_findings = _packing_identity(manifest)
    if files["ledger"] is not None:
        ledger, found = _read_ledger(files["ledger"], str(manifest["ledger"]["file"]))
        out.run("ledger", found)
        if ledger is not None:
            count_findings += _ledger_counts(manifest, ledger, str(manifest["ledger"]["file"]))
    else:
        out.skip("ledger", "the ledger file failed its checks")
    out.run("counts", count_findings, note="ledger sum, documents, tokens and windows per split")

    tokenizer = files["tokenizer"]
    if tokenizer is not None:
        found = _check_tokenizer(tokenizer, manifest, str(manifest["tokenizer"]["file"]))
        out.run("tokenizer", found)
        tokenizer = None if found else tokenizer
    else:
        out.skip("tokenizer", "the tokenizer file failed its checks")

    signatures = files.get("signatures")
    if manifest.get("signatures") is None:
        out.skip("signatures", "the output has no signature file (near step off)")
    elif signatures is not None:
        kept = (
            manifest["ledger"].get("kept")
            if ledger is None
            else int(np.count_nonzero(np.asarray(ledger.column("status").to_pylist(), dtype=object) == KEPT))
        )
        found = _signature_shape(signatures, manifest, kept, str(manifest["signatures"]["file"]))
        out.run("signatures", found)
        signatures = None if found else signatures
    else:
        out.skip("signatures", "the signature file failed its checks")

    return Integrity(
        manifest=manifest,
        ledger=ledger,
        signatures=signatures,
        tokenizer=tokenizer,
        shards=shards,
        findings=tuple(out.findings),
        checks=tuple(out.checks),
    )
