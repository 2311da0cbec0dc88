"""Packing: token ids of a split's documents -> fixed-length windows in shard files.

The stream of a split is, for its documents in packing order,
``[bod] + ids + [eod]`` one after the other (``bod`` only when the tokenizer
has a begin-of-document token). With ``L = length``, window ``k`` is
``stream[k*L : k*L + L + 1]``: ``L + 1`` tokens with stride ``L``, so
consecutive windows share one token, ``x = w[:-1]``, ``y = w[1:]``, and every
stream token except the first is a target exactly once.

Token accounting (checked at the end of every :func:`pack_split`)::

    tokens + pad_tokens == windows * length + min(windows, 1) + dropped_tokens

``tokens`` counts the stream (specials included, pads not); ``windows * length``
tokens are targets, and the first stored token is an input only. With
``tail = "drop"`` the tokens after the last full window are dropped
(``pad_tokens == 0``, ``dropped_tokens <= length``; a split shorter than one
window keeps nothing). With ``tail = "pad"`` they form one last window filled
up with the pad id (``dropped_tokens == 0``, ``pad_tokens <= length``); a
trainer should ignore targets equal to the pad id.

Shards are written while the documents are consumed; memory stays bounded by
about one shard, ``windows_per_shard * length`` tokens, whatever the split
size. A split with no windows writes no shard file.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from corpusprep.config import setting
from corpusprep.errors import DefinitionError, IntegrityError
from corpusprep.hashing import hash_bytes, keyed_hash64
from corpusprep.pool import Mapper, visible_path
from corpusprep.shards import ShardInfo, npy_header, read_shard, shard_dtype, shard_name, write_shard

__all__ = [
    "PackConfig",
    "PackResult",
    "document_order",
    "pack_split",
    "pack_split_mapped",
    "smallest_dtype",
    "write_document_starts",
]

TAILS = ("drop", "pad")
_MAX_SEED = 2**64 - 1


@dataclass(frozen=True, slots=True, kw_only=True)
class PackConfig:
    """Settings of the pack stage (definition table ``[pack]``)."""

    length: int = setting(
        256,
        "Tokens per input window; each stored window has length + 1 tokens (input and shifted target).",
        minimum=1,
        maximum=1 << 20,
    )
    windows_per_shard: int = setting(
        8192,
        "Most windows in one shard file; memory while packing is about one shard.",
        minimum=1,
        maximum=1 << 24,
    )
    tail: str = setting(
        "drop",
        "The tokens after the last full window of a split: 'drop' them or 'pad' them to one more window.",
        choices=TAILS,
    )
    seed: int = setting(0, "Seed of the order of documents inside each split.", minimum=0, maximum=_MAX_SEED)
    document_starts: bool = setting(
        False,
        "Also write, beside each shard, where documents start inside its windows "
        "(SHARD.starts.npy: int32 rows of [window, position]), so a trainer can stop attention "
        "at document boundaries.",
    )

    def __post_init__(self) -> None:
        for item in dataclasses.fields(self):
            value = getattr(self, item.name)
            meta = item.metadata
            prefix = f"pack.{item.name} = {value!r}"
            if meta["choices"] is not None and value not in meta["choices"]:
                allowed = ", ".join(repr(choice) for choice in meta["choices"])
                raise DefinitionError(f"{prefix}: must be one of {allowed}")
            if isinstance(value, int) and not isinstance(value, bool):
                if meta["minimum"] is not None and value < meta["minimum"]:
                    raise DefinitionError(f"{prefix}: must be >= {meta['minimum']}")
                if meta["maximum"] is not None and value > meta["maximum"]:
                    raise DefinitionError(f"{prefix}: must be <= {meta['maximum']}")


@dataclass(frozen=True, slots=True, kw_only=True)
class PackResult:
    """What :func:`pack_split` wrote and counted for one split."""

    split: str
    length: int
    tail: str
    dtype: str
    shards: tuple[ShardInfo, ...]
    documents: int
    tokens: int  # stream tokens, specials included, pads not
    windows: int
    pad_tokens: int
    dropped_tokens: int

    @property
    def targets(self) -> int:
        """Tokens that are a target (``y``) of some window, pads included."""
        return self.windows * self.length

    def check_accounting(self) -> None:
        """Raise :class:`IntegrityError` unless the counts obey the module's accounting identity."""
        stored_positions = self.windows * self.length + min(self.windows, 1)
        problems = []
        if self.tokens + self.pad_tokens != stored_positions + self.dropped_tokens:
            problems.append(
                f"tokens {self.tokens} + pad_tokens {self.pad_tokens} != windows {self.windows} * length "
                f"{self.length} + {min(self.windows, 1)} + dropped_tokens {self.dropped_tokens}"
            )
        if sum(shard.shape[0] for shard in self.shards) != self.windows:
            problems.append(
                f"the shards hold {sum(s.shape[0] for s in self.shards)} windows, not {self.windows}"
            )
        if self.tail == "drop" and (self.pad_tokens or self.dropped_tokens > self.length):
            problems.append(f"tail 'drop' with pad_tokens {self.pad_tokens}, dropped {self.dropped_tokens}")
        if self.tail == "pad" and (self.dropped_tokens or self.pad_tokens > self.length):
            problems.append(f"tail 'pad' with dropped_tokens {self.dropped_tokens}, pads {self.pad_tokens}")
        if problems:
            raise IntegrityError(f"packing split {self.split!r}: " + "; ".join(problems))


def smallest_dtype(vocab_size: int) -> np.dtype:
    """The smallest little-endian unsigned dtype that holds the ids ``0 .. vocab_size - 1``.

    >>> [smallest_dtype(size).str for size in (256, 257, 65536, 65537)]
    ['|u1', '<u2', '<u2', '<u4']
    """
    if vocab_size < 1:
        raise DefinitionError(f"a tokenizer needs at least one id, got vocab_size {vocab_size}")
    for candidate in ("<u1", "<u2", "<u4"):
        dtype = np.dtype(candidate)
        if vocab_size - 1 <= np.iinfo(dtype).max:
            return dtype
    raise DefinitionError(
        f"a vocabulary of {vocab_size} ids does not fit in uint32 (at most {2**32} ids); use a smaller one"
    )


def document_order(count: int, seed: int, split: str) -> np.ndarray:
    """A seeded permutation of ``range(count)``: the packing order of a split's documents.

    Document ``index`` gets the key XXH3-64(``f"{split}:{index}"``, seed) and
    the documents are sorted by key (ties, improbable, by index). This depends
    only on xxHash, whose output is fixed by its specification, and not on
    NumPy's random streams, which NumPy does not promise to keep across
    versions for ``Generator`` methods (NEP 19, from memory). Different splits
    get unrelated orders from the same seed.

    >>> order = document_order(6, 0, "train")
    >>> sorted(order.tolist()) == list(range(6)), order.dtype.name
    (True, 'int64')
    >>> bool((order == document_order(6, 0, "train")).all())
    True
    """
    if count < 0:
        raise IntegrityError(f"document count must not be negative, got {count}")
    if not 0 <= seed <= _MAX_SEED:
        raise DefinitionError(f"pack.seed = {seed}: must be between 0 and {_MAX_SEED}")
    keys = np.fromiter(
        (keyed_hash64(f"{split}:{index}", seed) for index in range(count)), dtype=np.uint64, count=count
    )
    return np.argsort(keys, kind="stable").astype(np.int64)


def _checked_ids(document: np.ndarray, dtype: np.dtype, number: int, split: str) -> np.ndarray:
    ids = np.asarray(document)
    if ids.ndim != 1 or ids.dtype.kind not in "iu":
        raise IntegrityError(
            f"split {split!r}, document {number}: token ids must be a 1-D integer array, "
            f"got {ids.dtype} with shape {ids.shape}"
        )
    if ids.size and not np.can_cast(ids.dtype, dtype, casting="safe"):
        low, high = int(ids.min()), int(ids.max())
        if low < 0 or high > np.iinfo(dtype).max:
            raise IntegrityError(
                f"split {split!r}, document {number}: token id {low if low < 0 else high} "
                f"does not fit in {dtype}; the dtype must come from the tokenizer's vocab_size"
            )
    return ids


def _window_view(stream: np.ndarray, count: int, length: int) -> np.ndarray:
    """Rows ``stream[k*length : k*length + length + 1]`` for ``k < count``, as a view (no copy)."""
    return np.lib.stride_tricks.sliding_window_view(stream[: count * length + 1], length + 1)[::length]


def _checked_setup(split: str, dtype: np.dtype, *, eod_id: int, pad_id: int, bod_id: int | None) -> np.dtype:
    """The shard dtype; refuses a split name unusable in file names and special ids that do not fit."""
    dtype = shard_dtype(dtype)
    shard_name(split, 0)
    top = int(np.iinfo(dtype).max)
    specials = {"eod_id": eod_id, "pad_id": pad_id} | ({} if bod_id is None else {"bod_id": bod_id})
    for key, value in specials.items():
        if not 0 <= value <= top:
            raise IntegrityError(f"{key} {value} does not fit in {dtype}")
    return dtype


def pack_split(
    split: str,
    documents: Iterable[np.ndarray],
    *,
    config: PackConfig,
    eod_id: int,
    pad_id: int,
    bod_id: int | None,
    dtype: np.dtype,
    folder: Path,
) -> PackResult:
    """Pack one split's documents (already in packing order) into shards in ``folder``.

    ``documents`` yields one 1-D integer array of token ids per document,
    without special tokens; it is consumed once and the arrays are not
    modified. Shards are named ``{split}-{index:05d}.npy`` from index 0.
    """
    dtype = _checked_setup(split, dtype, eod_id=eod_id, pad_id=pad_id, bod_id=bod_id)
    length, per_shard = config.length, config.windows_per_shard
    capacity = per_shard * length + 1  # one full shard of windows spans this many stream tokens
    buffer = np.empty(capacity, dtype=dtype)
    fill = 0
    shards: list[ShardInfo] = []
    document_count = 0
    tokens = 0
    windows = 0
    head = np.array([] if bod_id is None else [bod_id], dtype=dtype)
    tail = np.array([eod_id], dtype=dtype)

    for document_count, document in enumerate(documents, start=1):
        ids = _checked_ids(document, dtype, document_count, split)
        for piece in (head, ids, tail):
            tokens += len(piece)
            taken = 0
            while taken < len(piece):
                step = min(capacity - fill, len(piece) - taken)
                buffer[fill : fill + step] = piece[taken : taken + step]
                fill += step
                taken += step
                if fill == capacity:
                    rows = _window_view(buffer, per_shard, length)
                    shards.append(write_shard(folder, split=split, index=len(shards), windows=rows))
                    windows += per_shard
                    buffer[0] = buffer[capacity - 1]  # the last token of this shard starts the next window
                    fill = 1

    # The buffer now holds the rest of the stream; buffer[0] is already stored if a shard was written.
    full = (fill - 1) // length if fill else 0
    stored = full * length + 1 if (full or shards) else 0
    rest = fill - stored
    pad_tokens = dropped_tokens = 0
    last_rows: list[np.ndarray] = []
    if full:
        last_rows.append(_window_view(buffer, full, length))
    if rest and config.tail == "pad":
        start = full * length
        padded = np.full((1, length + 1), pad_id, dtype=dtype)
        padded[0, : fill - start] = buffer[start:fill]
        pad_tokens = length + 1 - (fill - start)
        last_rows.append(padded)
    elif rest:
        dropped_tokens = rest
    if last_rows:
        rows = last_rows[0] if len(last_rows) == 1 else np.concatenate(last_rows)
        shards.append(write_shard(folder, split=split, index=len(shards), windows=rows))
        windows += len(rows)

    result = PackResult(
        split=split,
        length=length,
        tail=config.tail,
        dtype=dtype.str,
        shards=tuple(shards),
        documents=document_count,
        tokens=tokens,
        windows=windows,
        pad_tokens=pad_tokens,
        dropped_tokens=dropped_tokens,
    )
    result.check_accounting()
    return result


def _starts_of(windows: np.ndarray, carry: int, length: int, eod_id: int) -> np.ndarray:
    """[window, position] of each document start in ``windows``; ``carry``: the stream token before them."""
    previous_last = np.concatenate(([carry], windows[:-1, length - 1])) if len(windows) else np.zeros(0)
    first = np.flatnonzero(previous_last == eod_id)
    rows, columns = np.nonzero(windows[:, : length - 1] == eod_id)
    starts = np.concatenate(
        [np.stack([first, np.zeros_like(first)], axis=1), np.stack([rows, columns + 1], axis=1)]
    ).astype("<i4")
    return starts[np.lexsort((starts[:, 1], starts[:, 0]))] if len(starts) else starts.reshape(0, 2)


def _write_starts(folder: Path, name: str, starts: np.ndarray, prefix: str) -> dict[str, Any]:
    target = folder / name.replace(".npy", ".starts.npy")
    data = npy_header(starts.dtype, starts.shape) + np.ascontiguousarray(starts).tobytes()
    temporary = target.with_name(f".{target.name}.partial")
    temporary.write_bytes(data)
    temporary.replace(target)
    return {
        "file": f"{prefix}{target.name}",
        "count": len(starts),
        "bytes": len(data),
        "xxh3_128": hash_bytes(data),
    }


def write_document_starts(
    folder: Path, files: Sequence[str], *, length: int, eod_id: int, prefix: str = ""
) -> dict[str, dict[str, Any]]:
    """Write ``NAME.starts.npy`` beside each shard of one split: [window, position] of every document start.

    ``files`` are the split's shard names in order. A document starts at the first token
    of the split's stream and right after each end-of-document token; positions index
    the window's input ``x = w[:-1]``. Returns, per shard name, the manifest entry
    (``file`` with ``prefix``, ``count``, ``bytes``, ``xxh3_128``).
    """
    carry = eod_id  # the stream's first token starts a document
    entries: dict[str, dict[str, Any]] = {}
    for name in files:
        windows = read_shard(folder / name, check_hash=False)
        starts = _starts_of(windows, carry, length, eod_id)
        if len(windows):
            carry = int(windows[-1, length - 1])
        entries[name] = _write_starts(folder, name, starts, prefix)
    return entries


# --------------------------------------------------------------------------- packing as shard tasks
@dataclass(frozen=True, slots=True, kw_only=True)
class _ShardTask:
    """One shard of a split: the stream range it stores and the documents that overlap it."""

    split: str
    index: int
    raw: str  # the split's token file: the documents' ids back to back, no specials
    dtype: str
    begin: int  # stream position of the shard's first stored token
    end: int  # one past its last
    starts: np.ndarray  # stream position of each overlapping document's first token
    offsets: np.ndarray  # its first id in ``raw``
    lengths: np.ndarray  # its id count
    bod_id: int | None
    eod_id: int
    pad_id: int
    length: int
    windows_per_shard: int
    last: bool
    tail: str
    had_shards: bool  # a full shard comes before this last one
    folder: str
    document_starts: bool
    prefix: str


def _stream_slice(task: _ShardTask, begin: int, end: int) -> np.ndarray:
    """Tokens ``begin .. end - 1`` of the split's stream, built from the overlapping documents."""
    dtype = np.dtype(task.dtype)
    out = np.empty(end - begin, dtype=dtype)
    if end <= begin:
        return out
    path = Path(task.raw)
    size = path.stat().st_size if path.exists() else 0
    ids = np.memmap(path, dtype=dtype, mode="r") if size else np.zeros(0, dtype=dtype)
    head = 0 if task.bod_id is None else 1
    for start, offset, count in zip(
        task.starts.tolist(), task.offsets.tolist(), task.lengths.tolist(), strict=True
    ):
        piece_begin, piece_end = start + head, start + head + count  # the ids of this document
        if head and begin <= start < end:
            out[start - begin] = task.bod_id
        low, high = max(piece_begin, begin), min(piece_end, end)
        if low < high:
            out[low - begin : high - begin] = ids[offset + low - piece_begin : offset + high - piece_begin]
        if begin <= piece_end < end:
            out[piece_end - begin] = task.eod_id
    del ids
    return out


def _pack_shard(task: _ShardTask) -> tuple[ShardInfo | None, dict[str, Any] | None, int, int, int]:
    """Task: write one shard (and its document starts); ``(info, starts entry, windows, pads, dropped)``."""
    length, folder = task.length, visible_path(task.folder, "output's shard folder")
    carry_needed = task.document_starts and task.begin > 0
    stream = _stream_slice(task, task.begin - carry_needed, task.end)
    carry = int(stream[0]) if carry_needed else task.eod_id
    buffer = stream[1:] if carry_needed else stream
    pads = dropped = 0
    if not task.last:
        rows = _window_view(buffer, task.windows_per_shard, length)
    else:
        fill = buffer.size
        full = (fill - 1) // length if fill else 0
        stored = full * length + 1 if (full or task.had_shards) else 0
        rest = fill - stored
        parts: list[np.ndarray] = [_window_view(buffer, full, length)] if full else []
        if rest and task.tail == "pad":
            start = full * length
            padded = np.full((1, length + 1), task.pad_id, dtype=buffer.dtype)
            padded[0, : fill - start] = buffer[start:fill]
            pads = length + 1 - (fill - start)
            parts.append(padded)
        elif rest:
            dropped = rest
        if not parts:
            return None, None, 0, pads, dropped
        rows = parts[0] if len(parts) == 1 else np.concatenate(parts)
    info = write_shard(folder, split=task.split, index=task.index, windows=rows)
    entry = None
    if task.document_starts:
        entry = _write_starts(folder, info.file, _starts_of(rows, carry, length, task.eod_id), task.prefix)
    return info, entry, int(rows.shape[0]), pads, dropped


def pack_split_mapped(
    split: str,
    raw: Path,
    offsets: np.ndarray,
    lengths: np.ndarray,
    order: np.ndarray,
    *,
    config: PackConfig,
    eod_id: int,
    pad_id: int,
    bod_id: int | None,
    dtype: np.dtype,
    folder: Path,
    mapper: Mapper,
    prefix: str = "",
) -> tuple[PackResult, dict[str, dict[str, Any]]]:
    """:func:`pack_split` with each shard written by a ``mapper`` task; the same files, byte for byte.

    The documents are ``raw[offsets[i] : offsets[i] + lengths[i]]`` taken in
    ``order``. Every document's place in the stream follows from the lengths
    alone, so the driver cuts the stream into shard ranges and each task
    builds its range from the documents that overlap it, writes the shard
    (and, with ``config.document_starts``, its starts file) and reports back.
    Returns the result and the starts entries by shard name (as
    :func:`write_document_starts`).
    """
    dtype = _checked_setup(split, dtype, eod_id=eod_id, pad_id=pad_id, bod_id=bod_id)
    length, per_shard = config.length, config.windows_per_shard
    span = per_shard * length
    head = 0 if bod_id is None else 1
    ordered_offsets = np.asarray(offsets, dtype=np.int64)[order]
    ordered_lengths = np.asarray(lengths, dtype=np.int64)[order]
    pieces = ordered_lengths + head + 1
    ends = np.cumsum(pieces)
    starts = ends - pieces
    total = int(ends[-1]) if ends.size else 0
    full_shards = (total - 1) // span if total else 0

    def task(index: int, begin: int, end: int, last: bool) -> _ShardTask:
        low = begin - (1 if config.document_starts and begin > 0 else 0)
        first = int(np.searchsorted(ends, low, side="right"))
        stop = int(np.searchsorted(starts, end, side="left"))
        return _ShardTask(
            split=split,
            index=index,
            raw=str(raw),
            dtype=dtype.str,
            begin=begin,
            end=end,
            starts=starts[first:stop],
            offsets=ordered_offsets[first:stop],
            lengths=ordered_lengths[first:stop],
            bod_id=bod_id,
            eod_id=eod_id,
            pad_id=pad_id,
            length=length,
            windows_per_shard=per_shard,
            last=last,
            tail=config.tail,
            had_shards=full_shards > 0,
            folder=str(folder),
            document_starts=config.document_starts,
            prefix=prefix,
        )

    tasks = [task(k, k * span, k * span + span + 1, False) for k in range(full_shards)]
    if total:
        tasks.append(task(full_shards, full_shards * span, total, True))
    shards: list[ShardInfo] = []
    entries: dict[str, dict[str, Any]] = {}
    windows = pads = dropped = 0
    for info, entry, rows, pad_tokens, dropped_tokens in mapper(_pack_shard, tasks):
        windows += rows
        pads += pad_tokens
        dropped += dropped_tokens
        if info is not None:
            shards.append(info)
        if info is not None and entry is not None:
            entries[info.file] = entry
    result = PackResult(
        split=split,
        length=length,
        tail=config.tail,
        dtype=dtype.str,
        shards=tuple(shards),
        documents=int(order.size),
        tokens=total,
        windows=windows,
        pad_tokens=pads,
        dropped_tokens=dropped,
    )
    result.check_accounting()
    return result, entries
