"""Audit a finished output folder for damage and leakage, from the folder alone.

>>> # report = audit_output(Path("build/demo"), AuditConfig())
>>> # report.outcome  ->  "clean", "leakage" or "damaged"

The integrity checks are in :mod:`corpusprep.audit_integrity`, the leakage
checks in :mod:`corpusprep.audit_leakage`, the n-gram hashing in
:mod:`corpusprep.ngrams`. This module runs them in order, reads an outside
evaluation set (``against``), and renders the report as JSON or for a
terminal. Outcome: ``"damaged"`` if any damage was found (it wins over
leakage, since leakage checks on a damaged output cannot be trusted),
else ``"leakage"`` if any leakage was found, else ``"clean"``.

Outside evaluation sets
-----------------------
By suffix (a further ``.gz`` is read through gzip):

* ``.jsonl``: one JSON object per line, text in ``text_field`` (a line that is
  a JSON string is the text itself); blank lines are skipped;
* ``.json``: one array of such objects or strings;
* ``.csv``: a header row naming ``text_field``;
* ``.parquet``: a string column ``text_field``;
* ``.txt``: **one item per non-blank line** (an item spanning lines needs one of
  the formats above).

Items are cleaned with the output's clean settings (``definition.clean`` of
the manifest, :func:`corpusprep.clean.clean_text`) before comparison, so
their XXH3-128 is comparable with the ledger's ``text_hash``. An item that
cleans to nothing is counted and skipped.
"""

from __future__ import annotations

import csv
import gzip
import io
import json
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

import numpy as np

from corpusprep.audit_integrity import (
    DAMAGE,
    LEAKAGE,
    OVERLAP,
    CheckResult,
    Finding,
    Integrity,
    ShardFile,
    check_integrity,
)
from corpusprep.errors import CorpusprepError
from corpusprep.manifest import MANIFEST_FILE
from corpusprep.ngrams import DEFAULT_NGRAM

__all__ = [
    "AGAINST_FORMATS",
    "AuditConfig",
    "AuditInputError",
    "AuditReport",
    "CheckResult",
    "Finding",
    "NotAnOutputError",
    "audit_output",
    "print_report",
    "read_items",
]

#: Suffixes of the outside evaluation set (each may be followed by ``.gz``).
AGAINST_FORMATS = (".jsonl", ".json", ".csv", ".parquet", ".txt")
CLEAN, LEAKED, DAMAGED = "clean", "leakage", "damaged"

Progress = Callable[[str, int, "int | None"], None]


class NotAnOutputError(CorpusprepError, FileNotFoundError):
    """The folder has no ``manifest.json``: it is not a finished output (a usage error)."""


class AuditInputError(CorpusprepError, ValueError):
    """The outside evaluation set cannot be read (a usage error)."""


DEFAULT_CONTAMINATED_AT = 0.7


def _severity(items: list[Finding]) -> str:
    """The gravest severity among findings of one kind."""
    order = [DAMAGE, LEAKAGE, OVERLAP]
    return min((item.severity for item in items), key=lambda s: order.index(s) if s in order else len(order))


@dataclass(frozen=True, slots=True, kw_only=True)
class AuditConfig:
    """What the audit runs."""

    ngram: int = DEFAULT_NGRAM  # words per n-gram (Brown et al. 2020, App. C: 13, from memory)
    skip_ngrams: bool = False  # leave out the n-gram check (it reads every shard)
    against: Path | None = None  # an outside evaluation set to compare with train
    text_field: str = "text"  # field or column of the text in ``against``
    chunk_tokens: int = 1 << 18  # tokens read per step when streaming shards (small arrays stay in cache)
    # A validation/test document is contaminated (leakage) when this fraction of its n-grams occurs in
    # train; below it, shared n-grams are reported as overlap. 0 = any shared n-gram (Brown et al. 2020).
    # Our default, 0.7, lets templated text share boilerplate sentences yet flags copied documents.
    contaminated_at: float = DEFAULT_CONTAMINATED_AT
    workers: int = 1  # threads for the n-gram scan of train; the result is the same for any count

    def __post_init__(self) -> None:
        if not 1 <= self.ngram <= 1000:
            raise AuditInputError(f"--ngram {self.ngram}: must be between 1 and 1000")
        if not 0.0 <= self.contaminated_at <= 1.0:
            raise AuditInputError(f"--contaminated-at {self.contaminated_at}: must be between 0 and 1")
        if self.workers < 1:
            raise AuditInputError(f"--workers {self.workers}: must be at least 1")
        if self.chunk_tokens < 1:
            raise AuditInputError(f"chunk_tokens = {self.chunk_tokens}: must be at least 1")

    def chunk_rows(self, stored_length: int) -> int:
        """Windows per step for windows of ``stored_length`` tokens."""
        return max(1, self.chunk_tokens // max(stored_length, 1))


@dataclass(frozen=True, slots=True, kw_only=True)
class AuditReport:
    """Everything one audit found."""

    output: Path
    checks: tuple[CheckResult, ...]
    findings: tuple[Finding, ...]
    statistics: dict[str, Any] = field(default_factory=dict)

    @property
    def outcome(self) -> str:
        """``"damaged"``, ``"leakage"`` or ``"clean"`` (damage wins)."""
        severities = {finding.severity for finding in self.findings}
        if DAMAGE in severities:
            return DAMAGED
        return LEAKED if LEAKAGE in severities else CLEAN

    def by_kind(self) -> dict[str, list[Finding]]:
        """Findings grouped by kind, kinds in the order first found."""
        groups: dict[str, list[Finding]] = {}
        for finding in self.findings:
            groups.setdefault(finding.kind, []).append(finding)
        return groups

    def to_json(self, *, examples: int | None = None) -> dict[str, Any]:
        """One JSON-ready document; ``examples`` caps the findings listed per kind (counts stay whole)."""
        return {
            "output": str(self.output),
            "outcome": self.outcome,
            "checks": [{"name": c.name, "status": c.status, "note": c.note} for c in self.checks],
            "findings": {
                kind: {
                    "severity": _severity(items),
                    "count": len(items),
                    "items": [item.to_dict() for item in (items if examples is None else items[:examples])],
                }
                for kind, items in self.by_kind().items()
            },
            "statistics": self.statistics,
        }


# --------------------------------------------------------------------------- outside items
def _open_text(path: Path) -> IO[str]:
    if path.name.endswith(".gz"):
        return io.TextIOWrapper(gzip.open(path, "rb"), encoding="utf-8", newline="")
    return open(path, encoding="utf-8", newline="")


def _item_text(value: Any, text_field: str, where: str) -> str:
    if isinstance(value, str):
        return value
    if isinstance(value, dict):
        text = value.get(text_field)
        if isinstance(text, str):
            return text
        raise AuditInputError(
            f"{where}: field {text_field!r} is {'missing' if text is None else type(text).__name__}, "
            "expected a string (choose the field with --text-field)"
        )
    raise AuditInputError(f"{where}: expected a JSON object or string, found {type(value).__name__}")


def read_items(path: Path, text_field: str = "text") -> list[tuple[str, str]]:
    """``(item_id, text)`` of every item of an outside evaluation set (formats: module docstring)."""
    name = path.name[: -len(".gz")] if path.name.endswith(".gz") else path.name
    suffix = Path(name).suffix.lower()
    if suffix not in AGAINST_FORMATS:
        raise AuditInputError(
            f"{path}: unknown evaluation-set format {suffix or '(no suffix)'!r}; use one of "
            + ", ".join(AGAINST_FORMATS)
        )
    if not path.is_file():
        raise AuditInputError(f"{path}: the evaluation set does not exist or is not a file")
    items: list[tuple[str, str]] = []
    try:
        if suffix == ".parquet":
            import pyarrow.parquet as pq

            table = pq.read_table(path)
            if text_field not in table.column_names:
                raise AuditInputError(
                    f"{path}: no column {text_field!r}; columns: {', '.join(table.column_names)}"
                )
            for row, text in enumerate(table.column(text_field).to_pylist()):
                items.append((f"{path.name}#{row}", _item_text(text, text_field, f"{path}: row {row}")))
            return items
        with _open_text(path) as handle:
            if suffix == ".txt":
                for number, line in enumerate(handle, start=1):
                    if line.strip():
                        items.append((f"{path.name}:{number}", line.rstrip("\r\n")))
            elif suffix == ".jsonl":
                for number, line in enumerate(handle, start=1):
                    if line.strip():
                        where = f"{path}:{number}"
                        items.append(
                            (f"{path.name}:{number}", _item_text(_json(line, where), text_field, where))
                        )
            elif suffix == ".json":
                data = _json(handle.read(), str(path))
                if not isinstance(data, list):
                    raise AuditInputError(f"{path}: expected a JSON array, found {type(data).__name__}")
                for index, value in enumerate(data):
                    where = f"{path}: item {index}"
                    items.append((f"{path.name}[{index}]", _item_text(value, text_field, where)))
            else:
                reader = csv.DictReader(handle)
                if reader.fieldnames is None or text_field not in reader.fieldnames:
                    raise AuditInputError(
                        f"{path}: no column {text_field!r} in the header; columns: "
                        + ", ".join(reader.fieldnames or [])
                    )
                for fields in reader:
                    where = f"{path}:{reader.line_num}"
                    items.append(
                        (f"{path.name}:{reader.line_num}", _item_text(fields[text_field], text_field, where))
                    )
    except UnicodeDecodeError as error:
        raise AuditInputError(f"{path}: not UTF-8 ({error})") from None
    return items


def _json(text: str, where: str) -> Any:
    try:
        return json.loads(text)
    except json.JSONDecodeError as error:
        raise AuditInputError(f"{where}: invalid JSON: {error}") from None


# --------------------------------------------------------------------------- the audit
class _Audit:
    """One audit run; every method is one step of :func:`audit_output`."""

    def __init__(self, folder: Path, config: AuditConfig, progress: Progress) -> None:
        self.folder, self.config, self.progress = folder, config, progress
        self.checks: list[CheckResult] = []
        self.findings: list[Finding] = []
        self.statistics: dict[str, Any] = {}

    def record(self, name: str, found: list[Finding], note: str = "") -> None:
        self.findings.extend(found)
        failing = [finding for finding in found if finding.severity != OVERLAP]
        if found and not failing:
            note = f"{note}; {len(found)} overlap note(s), none contaminated".lstrip("; ")
        self.checks.append(CheckResult(name=name, status="failed" if failing else "passed", note=note))

    def skip(self, name: str, why: str) -> None:
        self.checks.append(CheckResult(name=name, status="skipped", note=why))

    def leakage(self, state: Integrity, items: list[tuple[str, str]]) -> None:
        from corpusprep.audit_leakage import shared_keys

        ledger = state.ledger
        if ledger is None:
            for name in ("shared_text_hash", "group_across_splits", "cluster_across_splits"):
                self.skip(name, "the ledger failed its checks")
        else:
            self.record("shared_text_hash", shared_keys(ledger, "text_hash", "shared_text_hash"))
            self.record("group_across_splits", shared_keys(ledger, "group", "group_across_splits"))
            self.record("cluster_across_splits", shared_keys(ledger, "cluster", "cluster_across_splits"))
        self.near(state, items)
        self.ngrams(state, items)

    def near_settings(self, manifest: dict[str, Any]) -> tuple[Any, int, int] | None:
        from corpusprep.near import NearConfig, resolve_bands

        stage = manifest.get("stages", {}).get("near", {})
        if not stage.get("enabled", False):
            return None
        config = NearConfig(**manifest["definition"]["near"])
        bands, rows = resolve_bands(config)
        return config, int(stage.get("bands", bands)), int(stage.get("rows", rows))

    def near(self, state: Integrity, items: list[tuple[str, str]]) -> None:
        from corpusprep.audit_leakage import near_across_splits

        manifest = state.manifest
        assert manifest is not None
        settings = self.near_settings(manifest)
        names = ["near_copy_across_splits"] + (["against_near_copy"] if self.config.against else [])
        if settings is None or state.signatures is None or state.ledger is None:
            why = (
                "the near step was off"
                if settings is None
                else "the signature file or ledger failed its checks"
            )
            for name in names:
                self.skip(name, why)
            return
        config, bands, rows = settings
        self.progress("near copies", 0, None)
        signatures = np.load(state.signatures, mmap_mode="r", allow_pickle=False)
        found, counts = near_across_splits(
            signatures,
            state.ledger,
            bands=bands,
            rows=rows,
            threshold=config.threshold,
            bucket_limit=config.bucket_limit,
        )
        self.record(
            "near_copy_across_splits",
            found,
            note=f"{bands} bands of {rows} rows, threshold {config.threshold}",
        )
        self.statistics["near"] = {"bands": bands, "rows": rows, "threshold": config.threshold, **counts}
        if self.config.against:
            self.record("against_near_copy", self.against_near(signatures, state, items, config, bands, rows))
        del signatures

    def against_near(
        self,
        signatures: np.ndarray,
        state: Integrity,
        items: list[tuple[str, str]],
        config: Any,
        bands: int,
        rows: int,
    ) -> list[Finding]:
        from corpusprep.audit_leakage import kept_rows, query_near
        from corpusprep.minhash import MultiplyShift, signature_matrix
        from corpusprep.near import document_shingles

        assert state.ledger is not None
        functions = MultiplyShift(permutations=config.permutations, seed=config.seed)
        queries = signature_matrix([document_shingles(text, config) for _, text in items], functions)
        kept = kept_rows(state.ledger)
        split_of = np.asarray(state.ledger.column("split").to_pylist(), dtype=object)[kept]
        record_of = np.asarray(state.ledger.column("record_id").to_pylist(), dtype=object)[kept]
        found = []
        for train_row, item, estimate in query_near(
            signatures, queries, bands=bands, rows=rows, threshold=config.threshold
        ):
            if split_of[train_row] != "train":
                continue
            found.append(
                Finding(
                    kind="against_near_copy",
                    severity=LEAKAGE,
                    message=f"{items[item][0]} is a near copy of {record_of[train_row]} (train), "
                    f"signature estimate {estimate:.3f}",
                    details={
                        "item": items[item][0],
                        "train_record_id": record_of[train_row],
                        "similarity": estimate,
                    },
                )
            )
        return found

    def ngrams(self, state: Integrity, items: list[tuple[str, str]]) -> None:
        from corpusprep.audit_leakage import ngram_overlap, packed_rows
        from corpusprep.ngrams import StreamTables, id_bytes_of

        manifest = state.manifest
        assert manifest is not None
        names = ["shared_ngram"] + (["against_ngram"] if self.config.against else [])
        if self.config.skip_ngrams:
            for name in names:
                self.skip(name, "--skip-ngrams")
            return
        broken = [split for split, shards in state.shards.items() if shards is None]
        tokenizer = manifest["tokenizer"]
        if broken or state.ledger is None or (tokenizer.get("kind") != "bytes" and state.tokenizer is None):
            why = (
                f"shards of {', '.join(broken)} failed their checks"
                if broken
                else "the ledger or tokenizer failed its checks"
            )
            for name in names:
                self.skip(name, why)
            return
        specials = {role: int(item["id"]) for role, item in tokenizer.get("special_tokens", {}).items()}
        decode = None
        id_bytes = None
        if tokenizer.get("kind") != "bytes":
            from tokenizers import Tokenizer

            hf = Tokenizer.from_file(str(state.tokenizer))

            def decode(ids: list[int]) -> str:
                return str(hf.decode(ids, skip_special_tokens=False))

            id_bytes = id_bytes_of(hf, frozenset(specials.values()))  # None: decode document by document

        tables = StreamTables(
            end_of_document=specials["end_of_document"],
            specials=frozenset(specials.values()),
            byte_ids=tokenizer.get("kind") == "bytes",
            decode=decode,
            id_bytes=id_bytes,
        )
        seed = int(manifest["definition"]["pack"]["seed"])
        shards: dict[str, list[ShardFile]] = {
            split: list(files or []) for split, files in state.shards.items()
        }
        packed = {split: packed_rows(state.ledger, split, seed) for split in shards}
        tokens = state.ledger.column("tokens").to_pylist()
        train_total = int(
            sum(tokens[row] or 0 for row in packed.get("train", np.zeros(0, np.int64)).tolist())
        )
        started = time.perf_counter()
        result = ngram_overlap(
            shards=shards,
            packed=packed,
            ledger=state.ledger,
            tables=tables,
            ngram=self.config.ngram,
            pad_id=specials.get("pad", -1),
            tail=str(manifest["windows"].get("tail", "pad")),
            against=items,
            chunk_rows=self.config.chunk_rows(int(manifest["windows"]["stored_length"])),
            train_total=train_total,
            progress=self.progress,
            contaminated_at=self.config.contaminated_at,
            workers=self.config.workers,
        )
        result.statistics["seconds"] = round(time.perf_counter() - started, 3)
        self.statistics["ngrams"] = result.statistics
        by_name: dict[str, list[Finding]] = {"stream": [], "shared_ngram": [], "against_ngram": []}
        for finding in result.findings:
            by_name["stream" if finding.kind == "stream_mismatch" else finding.kind].append(finding)
        self.record(
            "stream", by_name["stream"], note="documents in the shards against the ledger's token counts"
        )
        for name in names:
            self.record(name, by_name[name], note=f"word {self.config.ngram}-grams")

    def against_exact(self, state: Integrity, items: list[tuple[str, str]]) -> None:
        from corpusprep.hashing import hash_text

        if state.ledger is None:
            self.skip("against_exact", "the ledger failed its checks")
            return
        rows = state.ledger.select(["record_id", "status", "split", "text_hash"]).to_pylist()
        train: dict[str, str] = {
            row["text_hash"]: row["record_id"]
            for row in rows
            if row["status"] == "kept" and row["split"] == "train"
        }
        found = []
        for item, text in items:
            digest = hash_text(text)
            if digest in train:
                found.append(
                    Finding(
                        kind="against_exact",
                        severity=LEAKAGE,
                        message=f"{item} is, once cleaned, the text of {train[digest]} (train)",
                        details={"item": item, "train_record_id": train[digest], "text_hash": digest},
                    )
                )
        self.record(
            "against_exact", found, note="xxh3_128 of the cleaned item against the ledger's text_hash"
        )


def _cleaned_items(manifest: dict[str, Any], raw: list[tuple[str, str]]) -> tuple[list[tuple[str, str]], int]:
    from corpusprep.clean import CleanConfig, clean_text

    config = CleanConfig(**manifest["definition"]["clean"])
    items = []
    empty = 0
    for item, text in raw:
        cleaned, _changes = clean_text(text, config)
        if cleaned.strip():
            items.append((item, cleaned))
        else:
            empty += 1
    return items, empty


def audit_output(
    folder: Path, config: AuditConfig | None = None, *, progress: Progress | None = None
) -> AuditReport:
    """Audit the output ``folder``: integrity first, then leakage (see the module docstrings)."""
    config = config or AuditConfig()
    if not (folder / MANIFEST_FILE).is_file():
        raise NotAnOutputError(f"{folder}: no {MANIFEST_FILE}; not a finished corpusprep output")
    raw = read_items(config.against, config.text_field) if config.against is not None else []
    run = _Audit(folder, config, progress or (lambda stage, done, total: None))
    state = check_integrity(folder, progress=run.progress)
    run.checks.extend(state.checks)
    run.findings.extend(state.findings)
    manifest = state.manifest
    if manifest is None:
        return AuditReport(output=folder, checks=tuple(run.checks), findings=tuple(run.findings))
    items: list[tuple[str, str]] = []
    if config.against is not None:
        items, empty = _cleaned_items(manifest, raw)
        run.statistics["against"] = {
            "file": str(config.against),
            "items": len(raw),
            "empty_after_clean": empty,
        }
        run.against_exact(state, items)
    run.leakage(state, items)
    kinds = Counter(finding.kind for finding in run.findings)
    run.statistics["findings"] = dict(kinds)
    return AuditReport(
        output=folder, checks=tuple(run.checks), findings=tuple(run.findings), statistics=run.statistics
    )


# --------------------------------------------------------------------------- terminal report
def print_report(report: AuditReport, *, examples: int = 5) -> None:
    """Print ``report`` for a person: checks, findings by kind with examples, n-gram figures, outcome."""
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    console = Console()
    table = Table(title=f"Audit of {report.output}", show_edge=False)
    table.add_column("check")
    table.add_column("result")
    table.add_column("note")
    colour = {"passed": "green", "failed": "red", "skipped": "yellow"}
    for check in report.checks:
        table.add_row(check.name, f"[{colour[check.status]}]{check.status}[/]", escape(check.note))
    console.print(table)
    for kind, items in report.by_kind().items():
        console.print(f"[bold]{kind}[/bold] ({_severity(items)}): {len(items):,}", highlight=False)
        for item in items[:examples]:
            console.print("  - " + escape(item.message), highlight=False)
        if len(items) > examples:
            console.print(f"  … and {len(items) - examples:,} more (--examples to show more, --json for all)")
    ngrams = report.statistics.get("ngrams")
    if ngrams:
        for side, figures in ngrams["sides"].items():
            console.print(
                f"{side}: {figures['documents_sharing_ngrams']:,} of {figures['documents']:,} documents "
                f"({figures['fraction']:.2%}) share a {ngrams['ngram']}-gram with train; "
                f"{figures.get('documents_contaminated', 0):,} contaminated "
                f"(>= {ngrams.get('contaminated_at', 0):.0%} of their {ngrams['ngram']}-grams)",
                highlight=False,
            )
    verdict = {
        CLEAN: "[green]clean[/green]",
        LEAKED: "[red]leakage found[/red]",
        DAMAGED: "[red]damaged[/red]",
    }
    console.print(f"outcome: {verdict[report.outcome]}")
