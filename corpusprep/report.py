"""A single self-contained HTML page describing a finished output folder.

>>> # path = write_report(Path("build/demo"))   # -> build/demo.report.html

The page is built only from the output folder (manifest, ledger, tokenizer
file, shards) and, when one is found, an audit result saved with
``corpusprep audit OUTPUT --json > OUTPUT.audit.json``. It needs nothing
from the network: styles are inline, figures are inline SVG
(:mod:`corpusprep.report_figures`), there is no script, and a
Content-Security-Policy ``default-src 'none'`` tells the browser to refuse
any fetch.

Where it goes
-------------
By default the page is written *beside* the output folder, as
``OUTPUT.report.html``, not inside it: a finished output is a sealed,
audited set of files, and the report must not change the folder it
describes. ``--to`` may point anywhere else, except onto a file the
manifest lists.

Every number is traceable
-------------------------
Each printed value that comes from the output carries ``data-from`` (where
it was read: ``manifest``, ``ledger`` or ``shards``), ``data-key`` (which
value) and ``data-type`` (how it is printed: ``count`` with thousands
separators, ``int``, ``fixed`` with the shown decimals, ``text`` or
``json``), so a test or a reader can check it against the source. Manifest
keys are dotted paths (``splits.train.tokens``, list items by index);
ledger keys are ``status:S``, ``reason:R`` (rejected rows whose reason starts
with ``R``), ``rows``, ``clusters``, ``cluster-size:ID``, ``similarities``,
``split-documents:S``, ``split-tokens:S``, ``tokens-min:S``,
``tokens-median:S``, ``tokens-max:S`` and ``row:ID:COLUMN``; shard keys are
``text-tokens:S`` and ``distinct-ids:S`` (special tokens left out).

Cluster excerpts
----------------
The ledger keeps no text. A representative's text is recovered from the
shards: the kept documents of a split, in ledger order, are packed in the
order :func:`corpusprep.pack.document_order` gives for the manifest's
``pack.seed``, each as ``[bod] + ids + [eod]``; the ledger's ``tokens``
column gives each document's length, hence its place in the token stream,
and stream position ``p`` is column ``p % length`` of window ``p // length``.
The decoded text is hashed and compared with the ledger's ``text_hash``;
the page says whether they match (they do for byte-level kinds; a
vocabulary with an unknown token cannot give back every character).
"""

from __future__ import annotations

import contextlib
import gc
import html
import itertools
import json
import os
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from corpusprep.errors import CorpusprepError
from corpusprep.manifest import MANIFEST_FILE, read_manifest

__all__ = [
    "AUDIT_RESULT_SUFFIX",
    "REPORT_SUFFIX",
    "ReportConfig",
    "ReportError",
    "audit_result_path",
    "build_report",
    "default_report_path",
    "token_frequencies",
    "write_report",
]

REPORT_SUFFIX = ".report.html"
AUDIT_RESULT_SUFFIX = ".audit.json"
_AUDIT_INSIDE = "audit.json"
_SPECIAL_ROLES = ("end_of_document", "begin_of_document", "pad", "unknown")
_FATE_ORDER = ("kept", "exact_copy", "near_copy", "empty", "rejected")
_MAX_VERIFIED_TOKENS = 1 << 20


class ReportError(CorpusprepError, ValueError):
    """The report cannot be made: not an output folder, a bad audit file, a refused target path."""


@dataclass(frozen=True, slots=True, kw_only=True)
class ReportConfig:
    """What the report shows; every field has a default."""

    rejected_rows: int = 25
    """Most rejected records listed (at least one per reason, then in ledger order)."""
    largest_clusters: int = 10
    """Near-duplicate clusters listed, largest first (ties by representative record id)."""
    excerpt_characters: int = 300
    """Characters of a representative's decoded text shown."""
    input_rows: int = 500
    """Most input files listed (in manifest order); the manifest lists them all."""
    chunk_rows: int = 1024
    """Windows counted per step in the shards (about a million tokens: the block's copy stays small)."""
    audit: Path | None = None
    """An audit result (``corpusprep audit OUTPUT --json``); None looks beside and inside the output."""

    def __post_init__(self) -> None:
        for name in ("rejected_rows", "largest_clusters", "excerpt_characters", "input_rows", "chunk_rows"):
            least = 1 if name == "chunk_rows" else 0
            if getattr(self, name) < least:
                raise ReportError(f"report setting {name} = {getattr(self, name)}: must be at least {least}")


def default_report_path(output: Path) -> Path:
    """Where the report of ``output`` goes by default: beside the folder.

    >>> default_report_path(Path("build/demo")).as_posix()
    'build/demo.report.html'
    """
    return output.with_name(output.name + REPORT_SUFFIX)


def audit_result_path(output: Path, given: Path | None = None) -> Path | None:
    """The audit result to show: ``given``, else ``OUTPUT.audit.json`` beside, else ``OUTPUT/audit.json``."""
    if given is not None:
        if not given.is_file():
            raise ReportError(f"{given}: no such audit result file; make one with corpusprep audit --json")
        return given
    for candidate in (output.with_name(output.name + AUDIT_RESULT_SUFFIX), output / _AUDIT_INSIDE):
        if candidate.is_file():
            return candidate
    return None


# --------------------------------------------------------------------------- reading the output
def _member(folder: Path, relative: str) -> Path:
    from corpusprep.windows import safe_member

    return safe_member(folder, relative)


def _split_shards(folder: Path, manifest: Mapping[str, Any], split: str) -> list[np.ndarray]:
    from corpusprep.shards import read_shard

    return [
        read_shard(_member(folder, str(shard["file"])), check_hash=False)
        for shard in manifest["splits"][split]["shards"]
    ]


def _special_ids(manifest: Mapping[str, Any]) -> dict[str, int]:
    specials = manifest["tokenizer"].get("special_tokens", {})
    return {role: int(specials[role]["id"]) for role in _SPECIAL_ROLES if role in specials}


def token_frequencies(folder: Path, split: str, *, chunk_rows: int = 1024) -> np.ndarray:
    """How often each token id occurs in the token stream of ``split``, special tokens set to zero.

    Every stream token is counted once. Window ``i`` holds stream tokens
    ``i * length .. i * length + length``, so its last column is the first
    column of the next window: all columns of every window are counted (each
    block of ``chunk_rows`` contiguous windows in one ``np.bincount`` over the
    memory-mapped shard, no copy of the block), then the first column of every
    window but the split's first is taken off again.
    """
    return _frequencies(folder, read_manifest(folder), split, chunk_rows)


def _frequencies(folder: Path, manifest: Mapping[str, Any], split: str, chunk_rows: int) -> np.ndarray:
    vocab = int(manifest["tokenizer"]["vocab_size"])
    windows = manifest["windows"]
    length = int(windows["length"])
    if int(windows["stored_length"]) != length + 1 or int(windows.get("stride", length)) != length:
        raise ReportError(
            f"{folder / MANIFEST_FILE}: windows.stored_length {windows['stored_length']} and stride "
            f"{windows.get('stride')}: expected length + 1 and length (consecutive windows share one token)"
        )
    counts = np.zeros(vocab, dtype=np.int64)
    shards = _split_shards(folder, manifest, split)
    for number, shard in enumerate(shards):
        for start in range(0, len(shard), chunk_rows):
            block = shard[start : start + chunk_rows]
            counts += np.bincount(block.reshape(-1), minlength=vocab)[:vocab]
            shared = block[1:, 0] if number == 0 and start == 0 else block[:, 0]
            counts -= np.bincount(shared, minlength=vocab)[:vocab]
    for token in _special_ids(manifest).values():
        if token < vocab:
            counts[token] = 0
    return counts


def _stream_tokens(shards: Sequence[np.ndarray], length: int, start: int, count: int) -> np.ndarray:
    """Stream tokens ``start .. start + count`` of a split (fewer if the tail was dropped)."""
    firsts = np.cumsum([0] + [len(shard) for shard in shards])
    windows = int(firsts[-1])
    stop = min(start + count, windows * length + 1) if windows else start
    positions = np.arange(start, max(stop, start), dtype=np.int64)
    rows = np.minimum(positions // length, windows - 1)
    columns = positions - rows * length
    shard_of = np.searchsorted(firsts, rows, side="right") - 1
    tokens = np.empty(len(positions), dtype=np.int64)
    for index in np.unique(shard_of).tolist():
        pick = shard_of == index
        tokens[pick] = shards[index][rows[pick] - firsts[index], columns[pick]]
    return tokens


def _document_starts(lengths: np.ndarray, seed: int, split: str, begin: bool) -> np.ndarray:
    """Stream position of the first text token of each document (``lengths`` in ledger order)."""
    from corpusprep.pack import document_order

    order = document_order(len(lengths), seed, split)
    packed = lengths[order] + 1 + int(begin)
    starts_in_order = np.concatenate([[0], np.cumsum(packed)[:-1]]).astype(np.int64)
    starts = np.empty(len(lengths), dtype=np.int64)
    starts[order] = starts_in_order
    return starts + int(begin)


@dataclass(frozen=True, slots=True)
class _Excerpt:
    text: str
    matches: bool | None  # None: not checked (document too long or cut by a dropped tail)
    note: str


def _bits(buffer: Any, offset: int, count: int) -> np.ndarray:
    """An Arrow bitmap (validity or boolean values) as a NumPy bool array."""
    bytes_ = np.frombuffer(buffer, np.uint8)
    return np.unpackbits(bytes_, bitorder="little")[offset : offset + count].astype(bool)


class _Ledger:
    """The ledger columns the page uses, as NumPy arrays.

    Read straight from the Arrow buffers: pyarrow's own conversions (``to_numpy``,
    ``pa.scalar``, compute calls on Python values) import pandas on first use,
    which took longer than reading the whole output. String columns with few
    distinct values are read dictionary-encoded (a code per row); the others are
    looked up one row at a time with :meth:`text`.
    """

    CODED = ("status", "reason", "cluster", "split")
    COLUMNS = ("record_id", "source", "line", "text_hash", "similarity", "tokens", *CODED)

    def __init__(self, path: Path) -> None:
        import pyarrow.parquet as pq

        try:
            parquet = pq.ParquetFile(path, read_dictionary=list(self.CODED))
        except (OSError, pa.ArrowException) as error:
            raise ReportError(f"{path}: not a readable Parquet ledger ({error})") from None
        missing = [name for name in self.COLUMNS if name not in parquet.schema_arrow.names]
        if missing:
            raise ReportError(f"{path}: the ledger has no column {', '.join(missing)}")
        self.table = parquet.read(columns=list(self.COLUMNS)).unify_dictionaries()
        self.rows = self.table.num_rows
        self.codes: dict[str, np.ndarray] = {}
        self.values: dict[str, list[str]] = {}
        for name in self.CODED:
            array = self.table.column(name).combine_chunks()
            if not isinstance(array, pa.DictionaryArray):  # an empty table has no dictionary
                array = array.dictionary_encode()
            codes = self._numbers(array.indices, np.int64, -1).astype(np.int64)
            self.codes[name] = codes
            self.values[name] = [str(value) for value in array.dictionary.to_pylist()]
        self.tokens = self._numbers(self.table.column("tokens").combine_chunks(), np.int64, 0)
        similarity = self.table.column("similarity").combine_chunks()
        self.similarity = self._numbers(similarity, np.float64, np.nan)
        self.has_similarity = (
            _bits(similarity.buffers()[0], similarity.offset, self.rows)
            if similarity.null_count
            else np.ones(self.rows, bool)
        )

    @staticmethod
    def _numbers(array: Any, dtype: Any, missing: float) -> np.ndarray:
        """A numeric Arrow array as NumPy, nulls replaced by ``missing``."""
        count = len(array)
        if not count:
            return np.zeros(0, dtype)
        validity, data = array.buffers()[:2]
        kind = "f" if pa.types.is_floating(array.type) else "i"
        stored = np.dtype(f"<{kind}{array.type.bit_width // 8}")
        values = np.frombuffer(data, stored, count=count, offset=array.offset * stored.itemsize).astype(dtype)
        if array.null_count:
            values[~_bits(validity, array.offset, count)] = missing
        return values

    def mask(self, name: str, value: str) -> np.ndarray:
        """Rows whose coded column ``name`` equals ``value`` (null is never equal)."""
        values = self.values[name]
        return self.codes[name] == values.index(value) if value in values else np.zeros(self.rows, bool)

    def counts(self, name: str, rows: np.ndarray | None = None) -> dict[str, int]:
        """Rows (of ``rows``, default all) holding each value of coded column ``name``; nulls left out."""
        codes = self.codes[name] if rows is None else self.codes[name][rows]
        counted = np.bincount(codes[codes >= 0], minlength=len(self.values[name]))
        return {
            value: int(count)
            for value, count in zip(self.values[name], counted.tolist(), strict=True)
            if count
        }

    def text(self, row: int, name: str) -> Any:
        """The value of column ``name`` at ``row`` (a str, int or None)."""
        return self.table.column(name)[row].as_py()

    def row_of(self, record_id: str, among: np.ndarray) -> int:
        """The row whose record_id is ``record_id``, looked for in ``among`` first, then everywhere."""
        for row in itertools.chain(among.tolist(), range(self.rows)):
            if self.text(row, "record_id") == record_id:
                return int(row)
        raise ReportError(f"ledger: no row has record_id {record_id!r}, which names a cluster")


def _excerpts(
    folder: Path, manifest: Mapping[str, Any], ledger: _Ledger, rows: Sequence[int], characters: int
) -> dict[int, _Excerpt]:
    """Decoded text of the kept ledger ``rows``, recovered from the shards (module docstring)."""
    from tokenizers import Tokenizer

    from corpusprep.hashing import hash_text

    tokenizer = Tokenizer.from_file(str(_member(folder, str(manifest["tokenizer"]["file"]))))
    length = int(manifest["windows"]["length"])
    seed = int(manifest["definition"]["pack"]["seed"])
    begin = "begin_of_document" in _special_ids(manifest)
    split_of = {row: str(ledger.text(row, "split")) for row in rows}
    tokens = ledger.tokens
    result: dict[int, _Excerpt] = {}
    for split in sorted(set(split_of.values())):
        members = np.flatnonzero(ledger.mask("status", "kept") & ledger.mask("split", split))
        starts = _document_starts(tokens[members], seed, split, begin)
        shards = _split_shards(folder, manifest, split)
        for row in rows:
            if split_of[row] != split:
                continue
            index = int(np.searchsorted(members, row))
            count = int(tokens[row])
            wanted = min(count, _MAX_VERIFIED_TOKENS)
            ids = _stream_tokens(shards, length, int(starts[index]), wanted)
            text = tokenizer.decode(ids.tolist(), skip_special_tokens=False)
            shown = text if len(text) <= characters else text[:characters] + "…"
            if len(ids) < count:
                cut = "the split's tail was dropped" if wanted == count else "the document is very long"
                result[row] = _Excerpt(shown, None, f"not checked: {cut}")
            elif hash_text(text) == ledger.text(row, "text_hash"):
                result[row] = _Excerpt(shown, True, "decoded text hashes to the ledger's text_hash")
            else:
                result[row] = _Excerpt(
                    shown, False, "decoded text differs from the cleaned text (its hash is not the ledger's)"
                )
    return result


@dataclass(frozen=True, slots=True, kw_only=True)
class _Data:
    """Everything the page shows, read once from the folder."""

    folder: Path
    name: str
    manifest: dict[str, Any]
    ledger: _Ledger
    audit: dict[str, Any] | None
    audit_name: str
    audit_older: bool
    frequencies: dict[str, np.ndarray]


def _read_audit(path: Path | None) -> dict[str, Any] | None:
    if path is None:
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as error:
        raise ReportError(f"{path}: not a readable audit result ({error})") from None
    if not isinstance(data, dict) or not {"outcome", "checks", "findings"} <= set(data):
        raise ReportError(f"{path}: not an audit result (expected the keys outcome, checks and findings)")
    return data


def _read(folder: Path, config: ReportConfig) -> _Data:
    if not (folder / MANIFEST_FILE).is_file():
        raise ReportError(f"{folder}: no {MANIFEST_FILE}; not a finished corpusprep output")
    manifest = read_manifest(folder)
    ledger = _Ledger(_member(folder, str(manifest["ledger"]["file"])))
    audit_path = audit_result_path(folder, config.audit)
    older = bool(
        audit_path is not None and audit_path.stat().st_mtime < (folder / MANIFEST_FILE).stat().st_mtime
    )
    frequencies = {
        split: _frequencies(folder, manifest, split, config.chunk_rows) for split in manifest["splits"]
    }
    return _Data(
        folder=folder,
        name=folder.resolve().name,
        manifest=manifest,
        ledger=ledger,
        audit=_read_audit(audit_path),
        audit_name=audit_path.name if audit_path is not None else "",
        audit_older=older,
        frequencies=frequencies,
    )


# --------------------------------------------------------------------------- HTML pieces
def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def _v(value: Any, source: str, key: str, kind: str = "count", decimals: int = 0) -> str:
    """A printed value with its origin (module docstring, "Every number is traceable")."""
    if kind == "count":
        shown = f"{int(value):,}"
    elif kind == "fixed":
        shown = f"{float(value):.{decimals}f}"
    elif kind == "json":
        shown = json.dumps(value, ensure_ascii=False)
    else:
        shown = str(value)
    return f'<span data-from="{source}" data-key="{_e(key)}" data-type="{kind}">{_e(shown)}</span>'


def _m(value: Any, key: str, kind: str = "count") -> str:
    return _v(value, "manifest", key, kind)


def _table(table_id: str, head: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    header = "".join(f"<th>{_e(cell)}</th>" for cell in head)
    body = "\n".join("<tr>" + "".join(f"<td>{cell}</td>" for cell in row) + "</tr>" for row in rows)
    return f'<table id="{table_id}"><thead><tr>{header}</tr></thead>\n<tbody>\n{body}\n</tbody></table>'


def _figure(svg: str, caption: str) -> str:
    return f"<figure>{svg}<figcaption>{caption}</figcaption></figure>"


def _section(section_id: str, title: str, body: str) -> str:
    return f'<section id="part-{section_id}"><h2>{_e(title)}</h2>\n{body}\n</section>'


def _fates(data: _Data) -> str:
    from corpusprep.report_figures import fates_figure

    ledger = data.ledger
    counts = ledger.counts("status")
    reasons = _reason_counts(ledger, np.flatnonzero(ledger.mask("status", "rejected")))
    bars: list[tuple[str, str, int]] = [
        (status, status, counts.get(status, 0)) for status in _FATE_ORDER[:-1] if status in counts
    ]
    bars += [(f"rejected: {reason}", "rejected", count) for reason, count in reasons]
    rows: list[Sequence[str]] = [
        [_e(status), _v(counts.get(status, 0), "ledger", f"status:{status}"),
         _m(data.manifest["ledger"]["by_status"].get(status, 0), f"ledger.by_status.{status}")]
        for status in _FATE_ORDER
    ]  # fmt: skip
    rows += [
        [_e(f"rejected: {reason}"), _v(count, "ledger", f"reason:{reason}"),
         _m(data.manifest["stages"]["read"]["rejected_by_reason"].get(reason, 0),
            f"stages.read.rejected_by_reason.{reason}")]
        for reason, count in reasons
    ]  # fmt: skip
    rows.append(
        [
            "<b>read</b>",
            _v(ledger.rows, "ledger", "rows"),
            _m(data.manifest["ledger"]["read"], "ledger.read"),
        ]
    )
    caption = (
        "One bar per fate of an input record, counted from the ledger's <code>status</code> column; "
        "rejected records by the reason code before the first colon of <code>reason</code>."
    )
    return _figure(fates_figure(bars), caption) + _table("fates", ["fate", "ledger rows", "manifest"], rows)


def _reason_code(reason: str | None) -> str:
    """The reason code of a ledger ``reason``: the part before the first colon ("" for none)."""
    return str(reason or "").split(":")[0]


def _reason_counts(ledger: _Ledger, rows: np.ndarray) -> list[tuple[str, int]]:
    """Rejected ``rows`` counted by reason code, most frequent first (ties by code)."""
    counted: dict[str, int] = {}
    missing = int(np.count_nonzero(ledger.codes["reason"][rows] < 0))
    for reason, count in [*ledger.counts("reason", rows).items(), *([(None, missing)] if missing else [])]:
        code = _reason_code(reason)
        counted[code] = counted.get(code, 0) + count
    return sorted(counted.items(), key=lambda item: (-item[1], item[0]))


def _kept_tokens(ledger: _Ledger, split: str) -> np.ndarray:
    tokens: np.ndarray = ledger.tokens[ledger.mask("status", "kept") & ledger.mask("split", split)]
    return tokens


def _splits(data: _Data) -> str:
    from corpusprep.report_figures import splits_figure

    manifest = data.manifest
    rows: list[Sequence[str]] = []
    bars = []
    for split, info in manifest["splits"].items():
        tokens = _kept_tokens(data.ledger, split)
        bars.append((split, int(info["documents"]), int(info["tokens"]), int(info["windows"])))
        fraction = manifest["stages"]["split"]["fractions"].get(split, 0.0)
        key = f"splits.{split}"
        rows.append([
            _e(split), _m(info["documents"], f"{key}.documents"),
            _v(len(tokens), "ledger", f"split-documents:{split}"),
            _v(f"{fraction:.4f}", "manifest", f"stages.split.fractions.{split}", "text"),
            _m(info["tokens"], f"{key}.tokens"), _v(int(tokens.sum()), "ledger", f"split-tokens:{split}"),
            _v(int(data.frequencies[split].sum()), "shards", f"text-tokens:{split}"),
            _m(info["windows"], f"{key}.windows"), _m(info["pad_tokens"], f"{key}.pad_tokens"),
            _m(info["dropped_tokens"], f"{key}.dropped_tokens"), _v(len(info["shards"]), "manifest",
                                                                    f"{key}.shards.length"),
        ])  # fmt: skip
    head = [
        "split", "documents", "ledger: kept rows", "fraction", "stream tokens", "ledger: sum of tokens",
        "shards: text tokens", "windows", "pad tokens", "dropped tokens", "shards",
    ]  # fmt: skip
    windows = manifest["windows"]
    caption = (
        f"Documents, tokens and windows per split, from the manifest. A window stores "
        f"{_m(windows['stored_length'], 'windows.stored_length')} tokens of "
        f"{_m(windows['dtype'], 'windows.dtype', 'text')}; input = {_e(windows['input'])}, target = "
        f"{_e(windows['target'])}. Stream tokens include one end-of-document token per document; the ledger "
        "sum and the shard count leave special tokens out."
    )
    return _figure(splits_figure(bars), caption) + _table("splits", head, rows)


def _lengths(data: _Data) -> str:
    from corpusprep.report_figures import lengths_figure

    by_split = {split: _kept_tokens(data.ledger, split) for split in data.manifest["splits"]}
    file_bytes = np.array([int(item["bytes"]) for item in data.manifest["inputs"]["files"]], dtype=np.int64)
    rows: list[Sequence[str]] = []
    for split, values in by_split.items():
        if not len(values):
            rows.append([_e(split), _v(0, "ledger", f"split-documents:{split}"), "", "", ""])
            continue
        rows.append([
            _e(split), _v(len(values), "ledger", f"split-documents:{split}"),
            _v(int(values.min()), "ledger", f"tokens-min:{split}"),
            _v(float(np.median(values)), "ledger", f"tokens-median:{split}", "fixed", 1),
            _v(int(values.max()), "ledger", f"tokens-max:{split}"),
        ])  # fmt: skip
    caption = (
        "Tokens per kept document, from the ledger's <code>tokens</code> column (counted after cleaning, "
        "special tokens left out); dashed line: median. The output keeps no per-record length from before "
        "cleaning, so the last panel shows what it does keep from before reading: the size on disk of every "
        "input file (manifest <code>inputs.files</code>; one file may hold many records)."
    )
    table = _table("lengths", ["split", "documents", "fewest tokens", "median", "most tokens"], rows)
    return _figure(lengths_figure(by_split, file_bytes), caption) + table


def _clusters(data: _Data, config: ReportConfig) -> str:
    from corpusprep.report_figures import cluster_figure

    ledger = data.ledger
    near = data.manifest["stages"].get("near", {})
    sizes = ledger.counts("cluster")
    if not near.get("enabled", False):
        return "<p>The near-duplicate step was off for this output: there are no clusters.</p>"
    similarity = ledger.similarity[ledger.has_similarity]
    threshold = data.manifest["definition"].get("near", {}).get("threshold")
    summary = (
        f"<p>{_v(len(sizes), 'ledger', 'clusters')} clusters (manifest: "
        f"{_m(near.get('clusters', 0), 'stages.near.clusters')}) holding "
        f"{_m(near.get('documents_in_clusters', 0), 'stages.near.documents_in_clusters')} documents; "
        f"{_v(len(similarity), 'ledger', 'similarities')} near copies with a similarity.</p>"
    )
    if not sizes:
        return summary
    caption = (
        "Cluster sizes count the ledger rows sharing a <code>cluster</code> value (the representative "
        "included); similarities are the ledger's <code>similarity</code> column of near copies."
    )
    figure = _figure(cluster_figure(np.array(list(sizes.values())), similarity, threshold), caption)
    largest = sorted(sizes.items(), key=lambda item: (-item[1], item[0]))[: config.largest_clusters]
    members_of = {rid: np.flatnonzero(ledger.mask("cluster", rid)) for rid, _size in largest}
    rows_of = {rid: ledger.row_of(rid, members_of[rid]) for rid, _size in largest}
    kept = [row for row in rows_of.values() if ledger.text(row, "status") == "kept"]
    excerpts = _excerpts(data.folder, data.manifest, ledger, kept, config.excerpt_characters) if kept else {}
    table_rows: list[Sequence[str]] = []
    for rid, size in largest:
        row = rows_of[rid]
        members = ledger.similarity[members_of[rid]]
        mean = float(np.nanmean(members)) if np.isfinite(members).any() else None
        excerpt = excerpts.get(row)
        text = (
            f'<pre class="excerpt">{_e(excerpt.text)}</pre><p class="note">{_e(excerpt.note)}</p>'
            if excerpt is not None
            else '<p class="note">the representative is not kept, so its text is not in the shards</p>'
        )
        table_rows.append([
            _v(rid, "ledger", f"row:{rid}:record_id", "text"),
            _v(ledger.text(row, "source"), "ledger", f"row:{rid}:source", "text"),
            _v(ledger.text(row, "split") or "", "ledger", f"row:{rid}:split", "text"),
            _v(size, "ledger", f"cluster-size:{rid}"),
            "" if mean is None else f"{mean:.3f}",
            text,
        ])  # fmt: skip
    head = ["representative", "source", "split", "documents", "mean similarity", "decoded start of its text"]
    return (
        summary
        + figure
        + f"<h3>The {len(largest)} largest clusters</h3>"
        + _table("clusters", head, table_rows)
    )


def _ranks(data: _Data) -> str:
    from corpusprep.report_figures import token_rank_figure

    ordered = {split: np.sort(counts[counts > 0])[::-1] for split, counts in data.frequencies.items()}
    rows = [
        [_e(split), _v(int(counts.sum()), "shards", f"text-tokens:{split}"),
         _v(len(counts), "shards", f"distinct-ids:{split}")]
        for split, counts in ordered.items()
    ]  # fmt: skip
    caption = (
        "How often each token id occurs in a split's shards (every stream token counted once, with "
        "<code>np.bincount</code> over memory-mapped windows), sorted from most to least frequent and drawn "
        "against its rank on log-log axes; the number at rank 1 is the top count. Special tokens (end of "
        "document, padding) are left out."
    )
    return _figure(token_rank_figure(ordered), caption) + _table(
        "ranks", ["split", "text tokens", "distinct ids"], rows
    )


def _rejected(data: _Data, config: ReportConfig) -> str:
    ledger = data.ledger
    rejected = np.flatnonzero(ledger.mask("status", "rejected"))
    total = len(rejected)
    if not total:
        return "<p>No input record was rejected.</p>"
    codes = [_reason_code(reason) for reason in ledger.values["reason"]]
    reasons = [codes[code] if code >= 0 else "" for code in ledger.codes["reason"][rejected].tolist()]
    chosen: list[int] = []
    seen: set[str] = set()
    for index, reason in enumerate(reasons):  # one of every reason first, then in ledger order
        if reason not in seen and len(chosen) < config.rejected_rows:
            seen.add(reason)
            chosen.append(index)
    for index in range(total):
        if len(chosen) >= config.rejected_rows:
            break
        if index not in chosen:
            chosen.append(index)
    chosen.sort()
    rows: list[Sequence[str]] = []
    for index in chosen:
        record = {
            name: ledger.text(int(rejected[index]), name)
            for name in ("record_id", "source", "line", "reason")
        }
        rid = record["record_id"]
        line = record["line"]
        rows.append([
            _v(record["source"], "ledger", f"row:{rid}:source", "text"),
            "—" if line is None else _v(line, "ledger", f"row:{rid}:line", "int"),
            _v(record["reason"] or "", "ledger", f"row:{rid}:reason", "text"),
            _v(rid, "ledger", f"row:{rid}:record_id", "text"),
        ])  # fmt: skip
    intro = (
        f"<p>{len(chosen)} of {_v(total, 'ledger', 'status:rejected')} rejected records: at least one of "
        "every reason, then the first in ledger order."
        " A dash means the whole file was rejected (no line).</p>"
    )
    return intro + _table("rejected", ["file", "line", "reason", "record id"], rows)


def _audit(data: _Data) -> str:
    from corpusprep.report_figures import audit_figure

    audit = data.audit
    if audit is None:
        return (
            "<p>No audit result was found beside or inside the output. Save one with "
            "<code>corpusprep audit OUTPUT --json &gt; OUTPUT.audit.json</code> and make the report "
            "again, or pass <code>--audit FILE</code>.</p>"
        )
    parts = [
        f"<p>Audit result <code>{_e(data.audit_name)}</code>: outcome "
        f'<strong class="outcome-{_e(audit["outcome"])}" data-audit="outcome">'
        f"{_e(audit['outcome'])}</strong>."
    ]
    if data.audit_older:
        parts.append(
            " <strong>This file is older than the manifest: it may describe an earlier run of this output."
            "</strong>"
        )
    parts.append("</p>")
    findings: dict[str, Any] = audit["findings"]
    kinds = [
        (str(kind), str(item.get("severity", "")), int(item.get("count", 0)))
        for kind, item in findings.items()
    ]
    if kinds:
        caption = "Findings of the audit by kind, as its JSON result counts them."
        parts.append(_figure(audit_figure(kinds), caption))
        rows = []
        for kind, item in findings.items():
            examples = "".join(
                f"<li>{_e(entry.get('message', ''))}</li>" for entry in item.get("items", [])[:5]
            )
            rows.append([
                _e(kind), _e(item.get("severity", "")),
                f'<span data-audit="findings.{_e(kind)}.count">{int(item.get("count", 0)):,}</span>',
                f"<ul>{examples}</ul>",
            ])  # fmt: skip
        parts.append(_table("audit-findings", ["kind", "severity", "count", "first findings"], rows))
    else:
        parts.append("<p>The audit found nothing.</p>")
    checks = [
        [_e(c.get("name", "")), _e(c.get("status", "")), _e(c.get("note", ""))] for c in audit["checks"]
    ]
    parts.append(_table("audit-checks", ["check", "status", "note"], checks))
    return "".join(parts)


def _flatten(value: Any, prefix: str) -> Iterator[tuple[str, Any]]:
    if isinstance(value, dict) and value:
        for key, item in value.items():
            yield from _flatten(item, f"{prefix}.{key}")
    else:
        yield prefix, value


def _definition(data: _Data) -> str:
    manifest = data.manifest
    rows = [
        [_e(key.removeprefix("definition.")),
         _v(value, "manifest", key, "text" if isinstance(value, str) else "json")]
        for key, value in _flatten(manifest["definition"], "definition")
    ]  # fmt: skip
    intro = (
        f"<p>The resolved pipeline definition (every setting, defaults included), hash "
        f"<code>{_m(manifest['definition_hash'], 'definition_hash', 'text')}</code>.</p>"
    )
    return intro + _table("definition", ["setting", "value"], rows)


def _inputs(data: _Data, config: ReportConfig) -> str:
    files = data.manifest["inputs"]["files"]
    rows = []
    for index, item in enumerate(files[: config.input_rows]):
        key = f"inputs.files.{index}"
        rows.append([
            _m(item["path"], f"{key}.path", "text"), _m(item["format"], f"{key}.format", "text"),
            _m(item["encoding"] or "", f"{key}.encoding", "text") if item["encoding"] else "—",
            _m(item["bytes"], f"{key}.bytes"), _m(item["records"], f"{key}.records"),
            _m(item["rejected"], f"{key}.rejected"),
            f"<code>{_m(item['xxh3_128'], f'{key}.xxh3_128', 'text')}</code>",
        ])  # fmt: skip
    inputs = data.manifest["inputs"]
    intro = (
        f"<p>{_m(inputs['count'], 'inputs.count')} input files, {_m(inputs['bytes'], 'inputs.bytes')} bytes"
        + (f"; the first {len(rows)} are listed, the manifest lists all" if len(rows) < len(files) else "")
        + ". Hashes are XXH3-128 of the bytes on disk.</p>"
    )
    head = ["path", "format", "encoding", "bytes", "records", "rejected", "xxh3_128"]
    return intro + _table("inputs", head, rows)


def _shards(data: _Data) -> str:
    rows = []
    for split, info in data.manifest["splits"].items():
        for index, shard in enumerate(info["shards"]):
            key = f"splits.{split}.shards.{index}"
            rows.append([
                _m(shard["file"], f"{key}.file", "text"), _e(split), _m(shard["shape"][0], f"{key}.shape.0"),
                _m(shard["shape"], f"{key}.shape", "json"), _m(shard["dtype"], f"{key}.dtype", "text"),
                _m(shard["bytes"], f"{key}.bytes"),
                f"<code>{_m(shard['xxh3_128'], f'{key}.xxh3_128', 'text')}</code>",
            ])  # fmt: skip
    tokenizer = data.manifest["tokenizer"]
    specials = ", ".join(
        f"{_e(role)} {_m(item['text'], f'tokenizer.special_tokens.{role}.text', 'text')} = id "
        f"{_m(item['id'], f'tokenizer.special_tokens.{role}.id', 'int')}"
        for role, item in tokenizer.get("special_tokens", {}).items()
    )
    about = (
        f"<p>Tokenizer: {_m(tokenizer['kind'], 'tokenizer.kind', 'text')}, "
        f"{_m(tokenizer['vocab_size'], 'tokenizer.vocab_size')} ids; special tokens: {specials}. "
        f"File <code>{_m(tokenizer['file'], 'tokenizer.file', 'text')}</code>, "
        f"{_m(tokenizer['bytes'], 'tokenizer.bytes')} bytes, XXH3-128 "
        f"<code>{_m(tokenizer['xxh3_128'], 'tokenizer.xxh3_128', 'text')}</code>.</p>"
    )
    head = ["file", "split", "windows", "shape", "dtype", "bytes", "xxh3_128"]
    return _table("shards", head, rows) + about


_STYLE = """
body { font: 15px/1.45 system-ui, "DejaVu Sans", sans-serif; color: #111; max-width: 1100px;
       margin: 0 auto; padding: 1em 1.5em; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; } h2 { border-bottom: 2px solid #0072B2; margin-top: 2em; }
figure { margin: 1em 0; break-inside: avoid; } figure svg { max-width: 100%; height: auto; }
figcaption { font-size: 0.9em; color: #333; }
table { border-collapse: collapse; margin: 0.8em 0; font-size: 0.88em; }
th, td { border: 1px solid #bbb; padding: 0.2em 0.5em; text-align: left; vertical-align: top; }
th { background: #eef3f8; } td:has(> span[data-type="count"]:only-child) { text-align: right; }
code { font-size: 0.92em; word-break: break-all; }
pre.excerpt { white-space: pre-wrap; max-width: 40em; margin: 0; font-size: 0.9em; }
.note { color: #555; font-size: 0.85em; margin: 0.2em 0 0; }
.outcome-clean { color: #009E73; } .outcome-leakage { color: #B35A00; } .outcome-damaged { color: #D55E00; }
nav ol { columns: 2; }
@media print { body { max-width: none; font-size: 11px; } nav { display: none; }
               section { break-before: auto; } tr, figure { break-inside: avoid; } }
"""
_CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"


def _page(data: _Data, config: ReportConfig) -> str:
    manifest = data.manifest
    ledger = manifest["ledger"]
    sections = [
        ("fates", "What became of every input record", _fates(data)),
        ("splits", "Splits: documents, tokens and windows", _splits(data)),
        ("lengths", "Document lengths", _lengths(data)),
        ("near", "Near duplicates", _clusters(data, config)),
        ("tokens", "Token frequencies", _ranks(data)),
        ("rejected", "Rejected records", _rejected(data, config)),
        ("audit", "Audit", _audit(data)),
        ("definition", "Pipeline definition", _definition(data)),
        ("inputs", "Input files", _inputs(data, config)),
        ("shards", "Shards and tokenizer", _shards(data)),
    ]
    contents = "".join(f'<li><a href="#part-{sid}">{_e(title)}</a></li>' for sid, title, _body in sections)
    summary = (
        f"<p>{_m(ledger['read'], 'ledger.read')} input records read from "
        f"{_m(manifest['inputs']['count'], 'inputs.count')} files: {_m(ledger['kept'], 'ledger.kept')} kept, "
        f"{_m(ledger['removed'], 'ledger.removed')} removed as copies or empty, "
        f"{_m(ledger['rejected'], 'ledger.rejected')} rejected. Made by corpusprep "
        f"{_m(manifest['tool_version'], 'tool_version', 'text')} (manifest schema "
        f"{_m(manifest['schema_version'], 'schema_version', 'int')}). Every number on this page is read from "
        "the output folder; each carries <code>data-from</code> and <code>data-key</code> attributes naming "
        "its source.</p>"
    )
    body = "\n".join(_section(sid, title, content) for sid, title, content in sections)
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>corpusprep report: {_e(data.name)}</title>\n<style>{_STYLE}</style>\n</head>\n<body>\n"
        f"<header><h1>corpusprep report: {_e(data.name)}</h1>\n{summary}\n"
        f"<nav><ol>{contents}</ol></nav></header>\n<main>\n{body}\n</main>\n</body>\n</html>\n"
    )


@contextlib.contextmanager
def _collector_paused() -> Iterator[None]:
    """Pause Python's cyclic garbage collector (restored after, if it was on).

    Importing matplotlib and drawing the figures makes tens of thousands of
    objects; each full collection then walks every object of the process (all
    of matplotlib, NumPy and pyarrow), which took about a sixth of the report's
    time. The figures' few reference cycles are freed at the next collection.
    """
    was_on = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_on:
            gc.enable()


def build_report(output: Path, config: ReportConfig | None = None) -> str:
    """The HTML text of the report of the finished ``output`` folder (deterministic for a given folder)."""
    config = config or ReportConfig()
    with _collector_paused():
        return _page(_read(Path(output), config), config)


def _listed_files(output: Path) -> set[Path]:
    manifest = read_manifest(output)
    names = [MANIFEST_FILE, str(manifest["ledger"]["file"]), str(manifest["tokenizer"]["file"])]
    if manifest.get("signatures"):
        names.append(str(manifest["signatures"]["file"]))
    names += [str(shard["file"]) for info in manifest["splits"].values() for shard in info["shards"]]
    return {(output / name).resolve() for name in names}


def write_report(output: Path, to: Path | None = None, config: ReportConfig | None = None) -> Path:
    """Write the report of ``output`` to ``to`` (default :func:`default_report_path`); return the path.

    The page is written to a temporary file in the target's folder and renamed.
    A target that is one of the output's listed files is refused.
    """
    output = Path(output)
    target = Path(to) if to is not None else default_report_path(output)
    if (output / MANIFEST_FILE).is_file() and target.resolve() in _listed_files(output):
        raise ReportError(f"{target}: this file belongs to the output; write the report somewhere else")
    if target.is_dir():
        raise ReportError(f"{target}: is a folder; give a file name for the report")
    text = build_report(output, config)
    target.parent.mkdir(parents=True, exist_ok=True)
    temporary = target.with_name(f".{target.name}.tmp-{os.getpid()}")
    try:
        with open(temporary, "w", encoding="utf-8", newline="\n") as handle:
            handle.write(text)
        os.replace(temporary, target)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    return target
