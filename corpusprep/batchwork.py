"""Per-batch work of the pipeline's two passes; these functions run in worker processes.

Each takes a batch (and frozen settings) and returns a new value; nothing is kept
between calls, so the same batches give the same results on any engine and any
number of workers.

:func:`stage_inputs` is the first pass's task: a worker reads a run of input
files itself, prepares their batches and writes them to a part file of the
run's work folder; only the fixed-width per-row results (statuses, hashes,
keys, groups) and the counts travel back to the driver, never the texts.
"""

from __future__ import annotations

import contextlib
import os
from collections import Counter
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from corpusprep.clean import CleanConfig, clean_batch
from corpusprep.errors import IntegrityError
from corpusprep.exact import ExactConfig, exact_keys
from corpusprep.near import NearConfig, signature_batch
from corpusprep.pool import visible_path
from corpusprep.read import InputFile, ReadConfig, read_entries
from corpusprep.schema import DOC_SCHEMA, KEPT, REJECTED, STATUSES
from corpusprep.split import SPLITS
from corpusprep.tokens import Tokenizer
from corpusprep.walk import Entry

__all__ = [
    "EncodeTask",
    "PreparedBatch",
    "StagePart",
    "StageTask",
    "bounded_slices",
    "encode_staged",
    "hex_pair",
    "merge_parts",
    "prepare_batch",
    "stage_inputs",
]

#: Status name -> the int8 code the driver keeps per row.
STATUS_CODE = {status: code for code, status in enumerate(STATUSES)}
#: Rejections quoted (file:line: reason) per part, for the error when too many records are rejected.
_EXAMPLES = 5


@dataclass(slots=True)
class PreparedBatch:
    """One batch after the first pass: cleaned rows plus per-row fixed-width data."""

    batch: pa.RecordBatch
    text_hashes: np.ndarray  # (rows, 2) uint64, zero for rows not kept
    exact_keys: np.ndarray  # (rows, 2) uint64
    signatures: np.ndarray | None  # (rows, permutations), rows not kept are zero
    counts: dict[str, Counter[str]] = field(default_factory=dict)


def prepare_batch(
    batch: pa.RecordBatch, clean: CleanConfig, exact: ExactConfig, near: NearConfig
) -> PreparedBatch:
    """First-pass work on one batch (runs in a worker process)."""
    cleaned, clean_counts = clean_batch(batch, clean)
    status = cleaned.column("status").to_pylist()
    texts = [
        text if state == KEPT else None
        for text, state in zip(cleaned.column("text").to_pylist(), status, strict=True)
    ]
    text_hashes = exact_keys(texts, ExactConfig(key="text"))
    keys = text_hashes if exact.key == "text" else exact_keys(texts, exact)
    signatures = None
    near_counts: dict[str, int] = {}
    if near.enabled:
        signatures, near_counts = signature_batch(cleaned, near)
    return PreparedBatch(
        batch=cleaned,
        text_hashes=text_hashes,
        exact_keys=keys,
        signatures=signatures,
        counts={"clean": Counter(clean_counts), "near": Counter(near_counts)},
    )


def bounded_slices(batch: pa.RecordBatch, limit: int) -> Iterator[pa.RecordBatch]:
    """Cut ``batch`` into consecutive slices holding at most ``limit`` bytes of text each.

    A slice always holds at least one row. The cut depends only on the batch, so
    the work is spread over workers the same way whatever their number.
    """
    text: Any = batch.column("text")
    measured: Any = pc.binary_length(text)
    lengths = np.asarray(pc.fill_null(measured, 0))
    start, total = 0, 0
    for row, length in enumerate(lengths.tolist()):
        if row > start and total + length > limit:
            yield batch.slice(start, row - start)
            start, total = row, 0
        total += length
    if start < batch.num_rows:
        yield batch.slice(start, batch.num_rows - start)


def hex_pair(pair: np.ndarray) -> str:
    """A (high, low) uint64 pair as 32 hex characters.

    >>> hex_pair(np.array([1, 255], dtype=np.uint64))
    '000000000000000100000000000000ff'
    """
    return f"{int(pair[0]):016x}{int(pair[1]):016x}"


@dataclass(frozen=True, slots=True, kw_only=True)
class StageTask:
    """One first-pass task: a run of consecutive inputs and where to write their staged rows.

    Either ``entries`` (the worker reads them) or ``batch`` (rows the driver read
    from one large file, so that its batches spread over the workers); ``inputs``
    are :class:`InputFile` entries the driver read along with ``batch``.
    """

    index: int
    entries: tuple[Entry, ...] = ()
    batch: pa.RecordBatch | None = None
    inputs: tuple[InputFile, ...] = ()
    root_real: str
    read: ReadConfig
    clean: CleanConfig
    exact: ExactConfig
    near: NearConfig
    folder: str  # the work folder's parts/ (on storage every worker sees)
    batch_rows: int
    batch_text_bytes: int

    @property
    def documents_file(self) -> Path:
        return Path(self.folder) / f"{self.index:06d}.arrow"

    @property
    def signatures_file(self) -> Path:
        return Path(self.folder) / f"{self.index:06d}.signatures"


@dataclass(slots=True, kw_only=True)
class StagePart:
    """What a :class:`StageTask` sends back: everything but the texts, which stay in its part files."""

    index: int
    inputs: list[InputFile]
    rows: int
    status: np.ndarray  # int8 codes of :data:`STATUS_CODE`
    text_hashes: np.ndarray  # (rows, 2) uint64
    exact_keys: np.ndarray  # (rows, 2) uint64
    groups: list[str | None]
    counts: dict[str, Counter[str]]
    reasons: Counter[str]
    examples: list[str]
    signature_dtype: str | None
    permutations: int


def merge_parts(parts: Sequence[StagePart], *, index: int = 0, inputs: Sequence[InputFile] = ()) -> StagePart:
    """The results of consecutive ``parts`` as one, rows in order (``inputs`` go before theirs)."""
    counts: dict[str, Counter[str]] = {"clean": Counter(), "near": Counter()}
    reasons: Counter[str] = Counter()
    examples: list[str] = []
    signed = [part for part in parts if part.signature_dtype is not None]
    for part in parts:
        for name, counter in part.counts.items():
            counts[name].update(counter)
        reasons.update(part.reasons)
        examples.extend(part.examples[: max(0, _EXAMPLES - len(examples))])
    return StagePart(
        index=index,
        inputs=[*inputs, *(item for part in parts for item in part.inputs)],
        rows=sum(part.rows for part in parts),
        status=np.concatenate([part.status for part in parts]) if parts else np.zeros(0, dtype=np.int8),
        text_hashes=(
            np.concatenate([part.text_hashes for part in parts]) if parts else np.zeros((0, 2), np.uint64)
        ),
        exact_keys=np.concatenate([part.exact_keys for part in parts])
        if parts
        else np.zeros((0, 2), np.uint64),
        groups=[group for part in parts for group in part.groups],
        counts=counts,
        reasons=reasons,
        examples=examples,
        signature_dtype=signed[-1].signature_dtype if signed else None,
        permutations=signed[-1].permutations if signed else 0,
    )


def _prepared_part(prepared: PreparedBatch) -> StagePart:
    """The per-row results of one prepared batch, as a part (inputs empty)."""
    batch = prepared.batch
    status = batch.column("status").to_pylist()
    reasons: Counter[str] = Counter()
    examples: list[str] = []
    columns = (batch.column(name).to_pylist() for name in ("reason", "source", "line"))
    for state, reason, source, line in zip(status, *columns, strict=True):
        if state == REJECTED:
            reasons[str(reason).split(":")[0]] += 1
            if len(examples) < _EXAMPLES:
                examples.append(f"{source}:{line if line is not None else '-'}: {reason}")
    signatures = prepared.signatures
    return StagePart(
        index=0,
        inputs=[],
        rows=batch.num_rows,
        status=np.array([STATUS_CODE[str(state)] for state in status], dtype=np.int8),
        text_hashes=prepared.text_hashes,
        exact_keys=prepared.exact_keys,
        groups=batch.column("group").to_pylist(),
        counts=prepared.counts,
        reasons=reasons,
        examples=examples,
        signature_dtype=None if signatures is None else signatures.dtype.str,
        permutations=0 if signatures is None else signatures.shape[1],
    )


def stage_inputs(task: StageTask) -> StagePart:
    """Read, clean, hash and sign ``task.entries``; write the part files; return the per-row results."""
    visible_path(task.folder)
    inputs: list[InputFile] = []
    pieces: list[StagePart] = []
    documents, signatures = task.documents_file, task.signatures_file
    temporary = [path.with_name(f".{path.name}.partial") for path in (documents, signatures)]
    items: Iterator[pa.RecordBatch | InputFile] = (
        read_entries(task.entries, task.read, task.root_real, batch_rows=task.batch_rows)
        if task.entries
        else iter([*([] if task.batch is None else [task.batch]), *task.inputs])
    )
    with (
        pa.OSFile(str(temporary[0]), "wb") as sink,
        pa.ipc.new_file(sink, DOC_SCHEMA) as writer,
        open(temporary[1], "wb") as signature_sink,
    ):
        for item in items:
            if isinstance(item, InputFile):
                inputs.append(item)
                continue
            for piece in bounded_slices(item, task.batch_text_bytes):
                prepared = prepare_batch(piece, task.clean, task.exact, task.near)
                writer.write_batch(prepared.batch)
                if prepared.signatures is not None:
                    signature_sink.write(np.ascontiguousarray(prepared.signatures).tobytes())
                pieces.append(_prepared_part(prepared))
    for path, final in zip(temporary, (documents, signatures), strict=True):
        os.replace(path, final)
    return merge_parts(pieces, index=task.index, inputs=inputs)


@dataclass(frozen=True, slots=True, kw_only=True)
class EncodeTask:
    """One encoding task: some consecutive batches of the staged documents and each row's split."""

    index: int
    documents: str  # the staged documents file (work folder)
    first_batch: int
    batches: int
    splits: np.ndarray  # int8 per row of those batches: index into SPLITS, -1 = not encoded
    folder: str  # where the token parts go (work folder)
    dtype: str

    def part(self, split: str) -> Path:
        return Path(self.folder) / f"tokens-{split}-{self.index:06d}.raw"


def encode_staged(tokenizer: Tokenizer, task: EncodeTask) -> np.ndarray:
    """Encode the rows of ``task`` that have a split; write their ids, per split, to part files.

    The worker reads the texts from the staged documents itself. Ids go to
    ``tokens-{split}-{index}.raw`` in row order, as ``task.dtype``; the result
    is each row's token count (-1 for rows without a split).
    """
    visible_path(task.folder)
    visible_path(task.documents)
    dtype = np.dtype(task.dtype)
    lengths = np.full(task.splits.size, -1, dtype=np.int64)
    temporary = {split: task.part(split).with_name(f".{task.part(split).name}.partial") for split in SPLITS}
    with contextlib.ExitStack() as stack:
        handles = {split: stack.enter_context(open(path, "wb")) for split, path in temporary.items()}
        source = stack.enter_context(pa.memory_map(task.documents))
        reader = pa.ipc.open_file(source)
        position = 0
        for number in range(task.first_batch, task.first_batch + task.batches):
            batch = reader.get_batch(number)
            codes = task.splits[position : position + batch.num_rows]
            wanted = np.flatnonzero(codes >= 0)
            texts = batch.column("text").take(pa.array(wanted, type=pa.int64())).to_pylist()
            encoded = tokenizer.encode_batch([str(text) for text in texts])
            for row, ids in zip(wanted.tolist(), encoded, strict=True):
                data = np.asarray(ids).astype(dtype, copy=False)
                handles[SPLITS[int(codes[row])]].write(data.tobytes())
                lengths[position + row] = data.size
            position += batch.num_rows
    if position != task.splits.size:
        raise IntegrityError(
            f"encoding task {task.index}: {position} staged rows, but {task.splits.size} split codes"
        )
    for split, path in temporary.items():
        os.replace(path, task.part(split))
    return lengths
