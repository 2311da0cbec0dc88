"""The whole job: read, clean, exact, near, split, tokenize, pack, ledger, manifest.

All work runs as tasks through a mapper (:mod:`corpusprep.pool`, local
processes by default, or :mod:`corpusprep.engine_dask`): the first pass
(each task reads a run of input files, cleans, hashes and signs them and
writes a part file), the exact-duplicate partitions, the LSH band groups and
pair checks (:mod:`corpusprep.barriers`), encoding, and the shard writing.
The driver keeps fixed-width arrays per document (status, keys, split,
offsets), joins the part files into the staged documents, runs the
union-find, the split and the tokenizer training, and writes the ledger and
the manifest. Between the two passes over the corpus the cleaned documents
live in an Arrow IPC file in the run's work folder, so memory is bounded by
the batch size plus those arrays, never by the text.

A run writes into a hidden sibling of the output folder and publishes it by
renaming once the manifest, written last, is in place.
"""

from __future__ import annotations

import contextlib
import functools
import json
import os
import shutil
import signal
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from corpusprep import __version__
from corpusprep.barriers import MappedPairWork, SignatureStore, first_occurrences_mapped
from corpusprep.batchwork import (
    EncodeTask,
    StagePart,
    StageTask,
    bounded_slices,
    encode_staged,
    hex_pair,
    merge_parts,
    stage_inputs,
)
from corpusprep.checkpoint import Checkpoints, input_fingerprint, step_keys
from corpusprep.definition import Definition
from corpusprep.errors import InputError, IntegrityError, TooManyRejectedError
from corpusprep.hashing import hash_file, hash_text
from corpusprep.ledger import LEDGER_FILE, write_ledger
from corpusprep.manifest import MANIFEST_FILE, SCHEMA_VERSION, write_json_atomic
from corpusprep.near import find_clusters
from corpusprep.pack import document_order, pack_split_mapped, smallest_dtype
from corpusprep.pool import Mapper, local_engine
from corpusprep.publish import check_output_folder, publish_folder
from corpusprep.read import InputFile, input_entries, read_entries
from corpusprep.schema import DOC_SCHEMA, EMPTY, EXACT_COPY, KEPT, NEAR_COPY, REJECTED, STATUSES
from corpusprep.split import SPLITS, assign_splits, components
from corpusprep.tokens import build_tokenizer, tokenizer_from_state, tokenizer_state
from corpusprep.walk import Entry

__all__ = ["ProgressCallback", "RunResult", "run_pipeline"]

#: ``callback(stage, done, total)``: ``done`` units of ``stage`` are finished; ``total`` may be unknown.
ProgressCallback = Callable[[str, int, "int | None"], None]

SHARD_FOLDER = "shards"
TOKENIZER_FILE = "tokenizer.json"
SIGNATURE_FILE = "signatures.npy"
_STATUS_CODE = {status: code for code, status in enumerate(STATUSES)}
_WORK = ".work"
#: Attributes each checkpointed step leaves for later steps (besides ``stages``).
_STEP_STATE = {
    "first_pass": (
        "inputs",
        "rows",
        "status",
        "text_hashes",
        "keys",
        "groups",
        "has_signatures",
        "signature_dtype",
        "permutations",
        "near_counts",
    ),
    "exact_step": ("status", "duplicate_of"),
    "near_step": ("status", "duplicate_of", "cluster_of", "similarity", "signed_rows"),
    "split_step": ("split_of",),
    "tokenize_step": ("tokenizer", "dtype", "token_count", "offsets", "lengths"),
    "pack_train": ("splits",),
    "pack_validation": ("splits",),
    "pack_test": ("splits",),
}
#: Fault injection for the kill-and-resume tests: SIGKILL the run right after this step's checkpoint.
_KILL_AFTER_VARIABLE = "CORPUSPREP_FAULT_KILL_AFTER"
_CHUNK_ROWS = 1 << 16
#: A batch holds at most this many records and (but for one huge record) this much text.
_BATCH_ROWS = 1024
#: Input bytes (on disk) in one first-pass task, and most files in one: the work of a task is
#: reading, cleaning and signing about this much, written by the worker to its own part file.
_PART_BYTES = 4 << 20
_PART_FILES = 1024
#: A single input file larger than this is read by the driver and its batches are spread over
#: the workers; smaller files are read by the workers themselves, a run of them per task.
_DRIVER_READ_BYTES = 64 << 20
_PARTS = "parts"
_BATCH_TEXT_BYTES = 4 << 20


@dataclass(frozen=True, slots=True)
class RunResult:
    """What a finished run produced."""

    output: Path
    manifest: dict[str, Any]


class _Run:
    """State of one run; every method is one step of :func:`run_pipeline`."""

    def __init__(self, definition: Definition, mapper: Mapper, progress: ProgressCallback | None) -> None:
        assert definition.input is not None and definition.output is not None
        self.definition = definition
        self.input: Path = definition.input
        self.output: Path = definition.output
        self.mapper = mapper
        self.progress = progress or (lambda stage, done, total: None)
        self.partial = self.output.with_name(f".{self.output.name}.partial")
        self.work = self.partial / _WORK
        self.stages: dict[str, dict[str, Any]] = {}
        self.inputs: list[InputFile] = []
        self.split_of: list[str | None] = []
        self.splits: dict[str, Any] = {}
        self.signature_dtype = np.dtype(np.uint32)
        self.permutations = 0
        self.checkpoints = Checkpoints(self.work)

    # ------------------------------------------------------------------ checkpoints
    def state(self, step: str) -> dict[str, Any]:
        """What ``step`` leaves for the steps after it (saved in its checkpoint)."""
        names = _STEP_STATE[step]
        plain = ("split_of", "tokenizer", "offsets", "lengths")
        state = {name: getattr(self, name) for name in names if name not in plain}
        if "split_of" in names:
            codes = [SPLITS.index(split) if split is not None else -1 for split in self.split_of]
            state["split_codes"] = np.array(codes, dtype=np.int8)
        if "tokenizer" in names:
            state["tokenizer_state"] = tokenizer_state(self.tokenizer)
            for split in SPLITS:
                state[f"offsets_{split}"] = self.offsets[split]
                state[f"lengths_{split}"] = self.lengths[split]
        state["stages"] = self.stages
        return state

    def restore(self, step: str) -> None:
        """Load the state every step up to ``step`` left."""
        for name in list(_STEP_STATE)[: list(_STEP_STATE).index(step) + 1]:
            state = self.checkpoints.load(name, {"InputFile": InputFile})
            codes = state.pop("split_codes", None)
            if codes is not None:
                self.split_of = [SPLITS[code] if code >= 0 else None for code in codes.tolist()]
            described = state.pop("tokenizer_state", None)
            if described is not None:
                self.tokenizer = tokenizer_from_state(described)
                self.offsets = {split: state.pop(f"offsets_{split}") for split in SPLITS}
                self.lengths = {split: state.pop(f"lengths_{split}") for split in SPLITS}
            for key, value in state.items():
                setattr(self, key, value)

    # ------------------------------------------------------------------ pass 1
    def first_pass(self) -> None:
        definition = self.definition
        root_real, entries = input_entries(self.input, definition.read)
        parts = self.work / _PARTS
        parts.mkdir(exist_ok=True)
        tasks: list[StageTask] = []  # filled while the map draws them; joined in this order after
        stage = functools.partial(
            StageTask,
            root_real=root_real,
            read=definition.read,
            clean=definition.clean,
            exact=definition.exact,
            near=definition.near,
            folder=str(parts),
            batch_rows=_BATCH_ROWS,
            batch_text_bytes=_BATCH_TEXT_BYTES,
        )

        def drawn() -> Iterator[StageTask]:
            for group in input_groups(entries):
                if len(group) == 1 and _entry_bytes(group[0]) > _DRIVER_READ_BYTES:
                    # One large file: the driver reads it and its batches spread over the workers.
                    pending: pa.RecordBatch | None = None
                    carried: list[InputFile] = []
                    for item in read_entries(group, definition.read, root_real, batch_rows=_BATCH_ROWS):
                        if isinstance(item, InputFile):
                            carried.append(item)
                            continue
                        for piece in bounded_slices(item, _BATCH_TEXT_BYTES):  # tasks of a few MiB
                            if pending is not None:
                                tasks.append(stage(index=len(tasks), batch=pending, inputs=tuple(carried)))
                                carried = []
                                yield tasks[-1]
                            pending = piece
                    tasks.append(stage(index=len(tasks), batch=pending, inputs=tuple(carried)))
                else:
                    tasks.append(stage(index=len(tasks), entries=group))
                yield tasks[-1]

        results: list[StagePart] = []
        rows = 0
        for part in self.mapper(stage_inputs, drawn()):
            results.append(part)
            rows += part.rows
            self.progress("read", rows, None)
        self._join_parts(tasks)
        whole = merge_parts(results)
        self.inputs.extend(whole.inputs)
        self.rows = whole.rows
        self.status = whole.status
        self.text_hashes = whole.text_hashes
        self.keys = whole.exact_keys
        self.groups = whole.groups
        self.has_signatures = whole.signature_dtype is not None
        if whole.signature_dtype is not None:
            self.signature_dtype = np.dtype(whole.signature_dtype)
            self.permutations = whole.permutations
        counts, reasons, examples = whole.counts, whole.reasons, whole.examples
        rejected = int(np.count_nonzero(self.status == _STATUS_CODE[REJECTED]))
        formats = Counter(item.format for item in self.inputs)
        encodings = Counter(item.encoding for item in self.inputs if item.encoding)
        self.stages["read"] = {
            "files": len(self.inputs),
            "bytes": sum(item.size for item in self.inputs),
            "records": rows,
            "rejected": rejected,
            "rejected_by_reason": dict(sorted(reasons.items())),
            "files_by_format": dict(sorted(formats.items())),
            "files_by_encoding": dict(sorted(encodings.items())),
        }
        self.stages["clean"] = dict(sorted(counts["clean"].items()))
        self.near_counts = dict(sorted(counts["near"].items()))
        limit = self.definition.read.max_rejected_fraction
        if rows and rejected / rows > limit:
            raise TooManyRejectedError(
                f"{rejected} of {rows} input records were rejected ({rejected / rows:.1%}), more than "
                f"read.max_rejected_fraction = {limit:g} allows. First rejections: "
                + "; ".join(examples)
                + ". Fix the input or raise read.max_rejected_fraction."
            )

    def _join_parts(self, tasks: list[StageTask]) -> None:
        """Append the first pass's part files, in task order, to the staged documents and signatures."""
        with (
            pa.OSFile(str(self.work / "documents.arrow"), "wb") as sink,
            pa.ipc.new_file(sink, DOC_SCHEMA) as writer,
            open(self.work / "signatures.raw", "wb") as signatures,
        ):
            for task in tasks:
                with pa.memory_map(str(task.documents_file)) as source:
                    reader = pa.ipc.open_file(source)
                    for index in range(reader.num_record_batches):
                        writer.write_batch(reader.get_batch(index))
                with open(task.signatures_file, "rb") as part:
                    shutil.copyfileobj(part, signatures, 1 << 20)
                task.documents_file.unlink()
                task.signatures_file.unlink()

    # ------------------------------------------------------------------ barriers
    def exact_step(self) -> None:
        self.duplicate_of = np.full(self.rows, -1, dtype=np.int64)
        copies = 0
        if self.definition.exact.enabled:
            first = first_occurrences_mapped(self.keys, self.status == _STATUS_CODE[KEPT], self.mapper)
            is_copy = first >= 0
            self.status[is_copy] = _STATUS_CODE[EXACT_COPY]
            self.duplicate_of[is_copy] = first[is_copy]
            copies = int(np.count_nonzero(is_copy))
        self.stages["exact"] = {"key": self.definition.exact.key, "exact_copy": copies}

    def near_step(self) -> None:
        self.cluster_of = np.full(self.rows, -1, dtype=np.int64)
        self.similarity = np.full(self.rows, np.nan, dtype=np.float64)
        self.signed_rows = np.zeros(0, dtype=np.int64)
        near = self.definition.near
        if not near.enabled or not self.has_signatures:
            self.stages["near"] = {"enabled": False}
            return
        kept = np.flatnonzero(self.status == _STATUS_CODE[KEPT])
        signatures = self._compact_signatures(kept)
        store = SignatureStore(
            path=str(self.work / "signatures-kept.raw"),
            dtype=self.signature_dtype.str,
            documents=len(kept),
            permutations=self.permutations,
        )
        work = MappedPairWork(
            self.mapper, store, documents=str(self.work / "documents.arrow"), rows=kept, config=near
        )
        result = find_clusters(signatures, near, work=work)
        del signatures
        sizes = np.bincount(result.cluster, minlength=len(kept)) if len(kept) else np.zeros(0, np.int64)
        members = np.flatnonzero(sizes[result.cluster] > 1) if len(kept) else np.zeros(0, np.int64)
        self.cluster_of[kept[members]] = kept[result.cluster[members]]
        copies = np.flatnonzero(result.near_copy_of >= 0)
        self.similarity[kept[copies]] = result.similarity[copies]
        if near.action == "remove":
            self.status[kept[copies]] = _STATUS_CODE[NEAR_COPY]
            self.duplicate_of[kept[copies]] = kept[result.near_copy_of[copies]]
        self.signed_rows = kept
        report: dict[str, Any] = {"enabled": True, "action": near.action}
        report.update(self.near_counts)
        report.update(result.report)
        report["near_copy"] = len(copies) if near.action == "remove" else 0
        self.stages["near"] = report

    def _compact_signatures(self, rows: np.ndarray) -> np.ndarray:
        """Copy the signatures of ``rows`` into their own memory-mapped file, chunk by chunk."""
        raw = np.memmap(self.work / "signatures.raw", dtype=self.signature_dtype, mode="r")
        allrows = raw.reshape(-1, self.permutations)
        path = self.work / "signatures-kept.raw"
        if len(rows) == 0:
            return np.zeros((0, self.permutations), dtype=self.signature_dtype)
        compact = np.memmap(path, dtype=self.signature_dtype, mode="w+", shape=(len(rows), self.permutations))
        for start in range(0, len(rows), _CHUNK_ROWS):
            compact[start : start + _CHUNK_ROWS] = allrows[rows[start : start + _CHUNK_ROWS]]
        compact.flush()
        del raw, allrows
        return np.memmap(path, dtype=self.signature_dtype, mode="r", shape=(len(rows), self.permutations))

    def split_step(self) -> None:
        kept = np.flatnonzero(self.status == _STATUS_CODE[KEPT])
        position = np.full(self.rows, -1, dtype=np.int64)
        position[kept] = np.arange(len(kept))
        edges: list[tuple[np.ndarray, np.ndarray]] = []
        clustered = kept[self.cluster_of[kept] >= 0]
        if len(clustered):
            representatives = position[self.cluster_of[clustered]]
            ok = representatives >= 0
            edges.append((position[clustered][ok], representatives[ok]))
        first_of_group: dict[str, int] = {}
        group_left, group_right = [], []
        member_keys: list[str] = []
        for index, row in enumerate(kept.tolist()):
            group = self.groups[row]
            if group is not None:
                member_keys.append("g:" + group)
                first = first_of_group.setdefault(group, index)
                if first != index:
                    group_left.append(index)
                    group_right.append(first)
            else:
                member_keys.append("h:" + hex_pair(self.text_hashes[row]))
        if group_left:
            edges.append((np.array(group_left, dtype=np.int64), np.array(group_right, dtype=np.int64)))
        component_of = components(len(kept), edges)
        splits = assign_splits(member_keys, component_of, self.definition.split)
        self.split_of = [None] * self.rows
        for row, split in zip(kept.tolist(), splits, strict=True):
            self.split_of[row] = split
        documents = Counter(splits)
        self.stages["split"] = {
            "components": len(np.unique(component_of)) if len(kept) else 0,
            "documents": {name: documents.get(name, 0) for name in SPLITS},
            "fractions": {
                name: (documents.get(name, 0) / len(kept) if len(kept) else 0.0) for name in SPLITS
            },
        }

    # ------------------------------------------------------------------ pass 2
    def _staged_texts(self, wanted: Callable[[str | None], bool]) -> Iterator[tuple[list[int], list[str]]]:
        """Per staged batch: the rows whose split passes ``wanted``, and their cleaned texts."""
        start = 0
        with pa.memory_map(str(self.work / "documents.arrow")) as source:
            reader = pa.ipc.open_file(source)
            for index in range(reader.num_record_batches):
                batch = reader.get_batch(index)
                rows = [start + i for i in range(batch.num_rows) if wanted(self.split_of[start + i])]
                texts = batch.column("text").take(pa.array([r - start for r in rows], type=pa.int64()))
                start += batch.num_rows
                yield rows, [str(text) for text in texts.to_pylist()]

    def _train_texts(self) -> Iterator[str]:
        """The cleaned texts of the train split's kept documents, in ledger order, streamed."""
        for _, texts in self._staged_texts(lambda split: split == SPLITS[0]):
            yield from texts

    def tokenize_step(self) -> None:
        definition = self.definition
        self.tokenizer = build_tokenizer(definition.tokenizer, self._train_texts, base=definition.base)
        self.dtype = smallest_dtype(self.tokenizer.vocab_size)
        self.token_count = np.full(self.rows, -1, dtype=np.int64)
        codes = np.array(
            [SPLITS.index(split) if split is not None else -1 for split in self.split_of], dtype=np.int8
        )
        documents = self.work / "documents.arrow"
        with pa.memory_map(str(documents)) as source:
            reader = pa.ipc.open_file(source)
            batch_rows = [reader.get_batch(index).num_rows for index in range(reader.num_record_batches)]
        starts = np.concatenate(([0], np.cumsum(batch_rows, dtype=np.int64)))
        tasks = [
            EncodeTask(
                index=index,
                documents=str(documents),
                first_batch=index,
                batches=1,
                splits=codes[starts[index] : starts[index + 1]],
                folder=str(self.work),
                dtype=self.dtype.str,
            )
            for index in range(len(batch_rows))
        ]
        offsets: dict[str, list[np.ndarray]] = {name: [] for name in SPLITS}
        lengths: dict[str, list[np.ndarray]] = {name: [] for name in SPLITS}
        written = dict.fromkeys(SPLITS, 0)
        encode = functools.partial(encode_staged, self.tokenizer)
        done = 0
        for task, counts in zip(tasks, self.mapper(encode, tasks), strict=True):
            first = int(starts[task.index])
            encoded = np.flatnonzero(counts >= 0)
            self.token_count[first + encoded] = counts[encoded]
            for code, name in enumerate(SPLITS):
                mine = counts[task.splits == code]
                ends = np.cumsum(mine, dtype=np.int64)
                offsets[name].append(written[name] + ends - mine)
                lengths[name].append(mine)
                written[name] += int(ends[-1]) if ends.size else 0
            done += int(encoded.size)
            self.progress("tokenize", done, None)
        for name in SPLITS:
            with open(self.work / f"tokens-{name}.raw", "wb") as target:
                for task in tasks:
                    with open(task.part(name), "rb") as part:
                        shutil.copyfileobj(part, target, 1 << 20)
                    task.part(name).unlink()
        self.offsets = {
            name: np.concatenate(offsets[name]) if offsets[name] else np.zeros(0, np.int64) for name in SPLITS
        }
        self.lengths = {
            name: np.concatenate(lengths[name]) if lengths[name] else np.zeros(0, np.int64) for name in SPLITS
        }
        self.stages["tokenize"] = {
            "kind": self.tokenizer.kind,
            "documents": int(sum(len(v) for v in self.offsets.values())),
            "tokens": int(sum(written.values())),
        }
        self.tokenizer.save(self.partial / TOKENIZER_FILE)

    def pack_train(self) -> None:
        self._pack(SPLITS[0])

    def pack_validation(self) -> None:
        self._pack(SPLITS[1])

    def pack_test(self) -> None:
        self._pack(SPLITS[2])

    def _pack(self, split: str) -> None:
        """Pack one split into its shards (any earlier shard of that split is replaced)."""
        config = self.definition.pack
        specials = self.tokenizer.special_ids()
        shard_folder = self.partial / SHARD_FOLDER
        shard_folder.mkdir(exist_ok=True)
        # Earlier shards of this split, and files a killed shard task left half written.
        for pattern in (f"{split}-*", f".{split}-*.partial"):
            for stale in shard_folder.glob(pattern):
                stale.unlink()
        self.splits = {name: info for name, info in self.splits.items() if name != split}
        count = len(self.offsets[split])
        path = self.work / f"tokens-{split}.raw"
        order = document_order(count, config.seed, split)
        result, starts = pack_split_mapped(
            split,
            path,
            self.offsets[split],
            self.lengths[split],
            order,
            config=config,
            eod_id=specials["end_of_document"],
            pad_id=specials["pad"],
            bod_id=specials.get("begin_of_document"),
            dtype=self.dtype,
            folder=shard_folder,
            mapper=self.mapper,
            prefix=f"{SHARD_FOLDER}/",
        )
        self.splits[split] = {
            "documents": result.documents,
            "tokens": result.tokens,
            "windows": result.windows,
            "pad_tokens": result.pad_tokens,
            "dropped_tokens": result.dropped_tokens,
            "shards": [
                {
                    "file": f"{SHARD_FOLDER}/{shard.file}",
                    "shape": list(shard.shape),
                    "dtype": shard.dtype,
                    "bytes": shard.bytes,
                    "xxh3_128": shard.xxh3_128,
                    **({"document_starts": starts[shard.file]} if shard.file in starts else {}),
                }
                for shard in result.shards
            ],
        }
        self.progress("pack", SPLITS.index(split) + 1, len(SPLITS))

    # ------------------------------------------------------------------ records
    def signatures_step(self) -> dict[str, Any] | None:
        """Keep the MinHash signatures of the kept documents, so an audit needs no raw corpus."""
        if not len(self.signed_rows):
            return None
        still_kept = self.status[self.signed_rows] == _STATUS_CODE[KEPT]
        positions = np.flatnonzero(still_kept)
        source = np.memmap(
            self.work / "signatures-kept.raw",
            dtype=self.signature_dtype,
            mode="r",
            shape=(len(self.signed_rows), self.permutations),
        )
        path = self.partial / SIGNATURE_FILE
        target = np.lib.format.open_memmap(
            path,
            mode="w+",
            dtype=np.dtype(self.signature_dtype).newbyteorder("<"),
            shape=(len(positions), self.permutations),
        )
        for start in range(0, len(positions), _CHUNK_ROWS):
            target[start : start + _CHUNK_ROWS] = source[positions[start : start + _CHUNK_ROWS]]
        target.flush()
        del target, source
        size, digest = hash_file(path)
        return {
            "file": SIGNATURE_FILE,
            "rows": "one per ledger row with status kept, in ledger order",
            "shape": [len(positions), self.permutations],
            "dtype": np.dtype(self.signature_dtype).newbyteorder("<").str,
            "bytes": size,
            "xxh3_128": digest,
        }

    def ledger_step(self) -> dict[str, Any]:
        by_status = Counter(STATUSES[code] for code in self.status.tolist())
        kept = by_status.get(KEPT, 0)
        removed = sum(by_status.get(status, 0) for status in (EMPTY, EXACT_COPY, NEAR_COPY))
        rejected = by_status.get(REJECTED, 0)
        if kept + removed + rejected != self.rows:
            raise IntegrityError(
                f"ledger sum failed: read {self.rows} != "
                f"kept {kept} + removed {removed} + rejected {rejected}"
            )
        write_ledger(
            self.partial / LEDGER_FILE,
            self.work / "documents.arrow",
            status=[STATUSES[code] for code in self.status.tolist()],
            duplicate_of=self.duplicate_of,
            cluster_of=self.cluster_of,
            similarity=self.similarity,
            text_hashes=self.text_hashes,
            split_of=self.split_of,
            token_count=self.token_count,
        )
        size, digest = hash_file(self.partial / LEDGER_FILE)
        return {
            "file": LEDGER_FILE,
            "bytes": size,
            "xxh3_128": digest,
            "rows": self.rows,
            "read": self.rows,
            "kept": kept,
            "removed": removed,
            "rejected": rejected,
            "by_status": {status: by_status.get(status, 0) for status in STATUSES},
            "sum_checked": True,
        }

    def manifest(self, ledger: dict[str, Any], signatures: dict[str, Any] | None) -> dict[str, Any]:
        definition = self.definition
        files = [
            {
                "path": item.path,
                "format": item.format,
                "encoding": item.encoding,
                "bytes": item.size,
                "xxh3_128": item.xxh3_128,
                "records": item.records,
                "rejected": item.rejected,
            }
            for item in self.inputs
        ]
        tokenizer_size, tokenizer_hash = hash_file(self.partial / TOKENIZER_FILE)
        pack = definition.pack
        return {
            "format": "corpusprep output",
            "schema_version": SCHEMA_VERSION,
            "tool_version": __version__,
            "definition": definition.resolved(),
            "definition_hash": definition.digest(),
            "inputs": {
                "files": files,
                "count": len(files),
                "bytes": sum(item.size for item in self.inputs),
                "digest": hash_text(json.dumps(files, sort_keys=True, separators=(",", ":"))),
            },
            "stages": self.stages,
            "ledger": ledger,
            "tokenizer": {
                **self.tokenizer.describe(),
                "file": TOKENIZER_FILE,
                "bytes": tokenizer_size,
                "xxh3_128": tokenizer_hash,
            },
            "windows": {
                "length": pack.length,
                "stored_length": pack.length + 1,
                "stride": pack.length,
                "dtype": np.dtype(self.dtype).str,
                "input": "window[:-1]",
                "target": "window[1:]",
                "tail": pack.tail,
                "pad_id": self.tokenizer.special_ids()["pad"],
                "loss": "targets equal to pad_id are padding: leave them out of the loss",
                "document_starts": pack.document_starts,
            },
            "splits": self.splits,
            "signatures": signatures,
        }


def _entry_bytes(entry: Entry) -> int:
    try:
        return os.stat(entry.path).st_size if entry.kind == "file" else 0
    except OSError:
        return 0  # the task reports the file as unreadable


def input_groups(
    entries: list[Entry], *, part_bytes: int = 0, part_files: int = 0
) -> list[tuple[Entry, ...]]:
    """Cut the inputs into runs of consecutive entries of about ``part_bytes`` on disk (first-pass tasks).

    The cut depends only on the entries and their sizes, never on the engine or
    the number of workers. A file larger than ``part_bytes`` is a group of its
    own (the first pass has the driver read one larger than ``_DRIVER_READ_BYTES``).
    """
    part_bytes = part_bytes or _PART_BYTES
    part_files = part_files or _PART_FILES
    groups: list[tuple[Entry, ...]] = []
    current: list[Entry] = []
    size = 0
    for entry in entries:
        length = _entry_bytes(entry)
        if current and (size + length > part_bytes or len(current) >= part_files):
            groups.append(tuple(current))
            current, size = [], 0
        current.append(entry)
        size += length
    if current:
        groups.append(tuple(current))
    return groups


def run_pipeline(
    definition: Definition,
    *,
    workers: int = 1,
    force: bool = False,
    progress: ProgressCallback | None = None,
    mapper: Mapper | None = None,
) -> RunResult:
    """Run ``definition`` end to end and publish its output folder.

    Per-batch work runs on ``workers`` local processes, or through ``mapper``
    when one is given (another engine); the output bytes are the same either way.
    """
    if definition.input is None:
        raise InputError(
            f"{definition.source}: no input folder: set `input` in the definition or pass --input"
        )
    if definition.output is None:
        raise InputError(
            f"{definition.source}: no output folder: set `output` in the definition or pass --output"
        )
    if not definition.input.is_dir():
        raise InputError(f"{definition.input}: the input folder does not exist or is not a folder")
    check_output_folder(definition.output, force)
    with contextlib.ExitStack() as engine:
        if mapper is None:
            mapper = engine.enter_context(local_engine(workers))
        return _run_steps(definition, mapper, progress)


def _run_steps(definition: Definition, mapper: Mapper, progress: ProgressCallback | None) -> RunResult:
    assert definition.input is not None
    run = _Run(definition, mapper, progress)
    keys = step_keys(definition.resolved(), input_fingerprint(definition.input), __version__)
    resume = run.checkpoints.resume_point(keys) if run.partial.exists() else None
    if resume is None and run.partial.exists():
        shutil.rmtree(run.partial)
    run.work.mkdir(parents=True, exist_ok=True)
    kill_after = os.environ.get(_KILL_AFTER_VARIABLE)
    try:
        steps = list(_STEP_STATE)
        if resume is not None:
            run.restore(resume)
            run.stages["resumed_after"] = {"step": resume}
        for step in steps[steps.index(resume) + 1 if resume else 0 :]:
            getattr(run, step)()
            run.checkpoints.save(step, keys[step], run.state(step))
            if kill_after == step:
                os.kill(os.getpid(), signal.SIGKILL)
        run.stages.pop("resumed_after", None)
        ledger = run.ledger_step()
        signatures = run.signatures_step()
        manifest = run.manifest(ledger, signatures)
        # The record goes first: a run killed while the work folder is being deleted must start
        # over, not resume from checkpoints whose files are half gone.
        run.checkpoints.forget()
        shutil.rmtree(run.work)
        write_json_atomic(run.partial / MANIFEST_FILE, manifest)
        publish_folder(run.partial, run.output)
    except KeyboardInterrupt:
        raise  # keep the partial folder: the next run resumes from its last checkpoint
    except BaseException:
        shutil.rmtree(run.partial, ignore_errors=True)
        raise
    return RunResult(output=run.output, manifest=manifest)
