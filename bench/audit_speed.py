"""Throughput of the audit's n-gram check, beside merely reading the train shards.

::

    python bench/audit_speed.py OUTPUT_OR_CORPUS [--documents 10000] [--ngram 13] [--workers 1] [--repeat 1]

``OUTPUT_OR_CORPUS`` is a finished output folder (it holds ``manifest.json``) or a
benchmark corpus made by ``bench/make_corpus.py`` (it holds ``base/``); for a corpus the
output ``runs/base-w1`` beside it is used when present, else ``base/`` is run through
``bench/bench.toml`` into a temporary folder first.

The evaluation side is ``--documents`` paragraphs (at least 40 words each) taken in
sorted file order from the corpus's ``copies-1/`` (perturbed copies of the base text,
so some really overlap train), else from ``base/``, written as JSON Lines and used as
an outside evaluation set, together with the output's own validation and test splits.

Figures (``measure``):

* ``read`` — train tokens per second to memory-map every train shard and touch every
  token (a sum over blocks of windows), warm page cache; the floor any stream check pays,
  and the reference of the ratio;
* ``read_cold`` — the same after ``posix_fadvise(DONTNEED)`` on each shard (the kernel may
  drop its cached pages), as a disk read would be; an extra line, not the reference;
* ``kernels`` — seconds to compile the numba kernels with an empty cache (in a fresh
  process), and to load them from the on-disk cache in this one (``warm_up``), paid once
  per process before the first call; not part of the ``ngram`` time;
* ``ngram`` — train tokens per second of :func:`corpusprep.audit_leakage.ngram_overlap`
  (rebuilding the streams, hashing every word n-gram of the evaluation side and of train,
  looking train up in the evaluation set, writing the findings), its ratio to ``read``
  (target >= 0.3), and nanoseconds per train token of each pass and of reading;
* peak RSS of the process (``resource.getrusage``, kB on Linux) after each step.

Run it with a warm page cache (the read step runs first and warms it).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def read_only(output: Path, *, chunk_rows: int = 4096) -> dict[str, Any]:
    """Memory-map every train shard and touch every token; tokens per second."""
    manifest = json.loads((output / "manifest.json").read_text(encoding="utf-8"))
    started = time.perf_counter()
    tokens = 0
    checksum = 0
    for shard in manifest["splits"]["train"]["shards"]:
        windows = np.load(output / shard["file"], mmap_mode="r", allow_pickle=False)
        for begin in range(0, windows.shape[0], chunk_rows):
            block = windows[begin : begin + chunk_rows]
            checksum += int(block.sum(dtype=np.uint64))
            tokens += block.size
        del windows
    seconds = time.perf_counter() - started
    return {"tokens": tokens, "seconds": seconds, "tokens_per_second": tokens / seconds, "checksum": checksum}


def read_cold(output: Path, *, chunk_rows: int = 4096) -> dict[str, Any]:
    """:func:`read_only` after asking the kernel to drop each train shard's cached pages."""
    manifest = json.loads((output / "manifest.json").read_text(encoding="utf-8"))
    for shard in manifest["splits"]["train"]["shards"]:
        descriptor = os.open(output / shard["file"], os.O_RDONLY)
        try:
            os.posix_fadvise(descriptor, 0, 0, os.POSIX_FADV_DONTNEED)
        finally:
            os.close(descriptor)
    return read_only(output, chunk_rows=chunk_rows)


_COMPILE = """
import time
started = time.perf_counter()
from corpusprep.ngrams import warm_up
imported = time.perf_counter()
warm_up()
print(imported - started, time.perf_counter() - imported)
"""


def kernel_seconds() -> dict[str, float]:
    """Compile time of the kernels with an empty numba cache (fresh process), load time here."""
    with tempfile.TemporaryDirectory() as cache:
        done = subprocess.run(
            [sys.executable, "-c", _COMPILE],
            check=True,
            capture_output=True,
            text=True,
            env={**os.environ, "NUMBA_CACHE_DIR": cache},
        )
    imported, compiled = (float(value) for value in done.stdout.split())
    from corpusprep.ngrams import warm_up

    return {"import_seconds": imported, "compile_seconds_cold": compiled, "load_seconds_cached": warm_up()}


def evaluation_items(corpus: Path | None, count: int, folder: Path) -> Path:
    """Write ``count`` paragraphs of at least 40 words from the corpus as JSON Lines."""
    path = folder / "evaluation.jsonl"
    written = 0
    sources = [corpus / "copies-1", corpus / "base"] if corpus is not None else []
    with open(path, "w", encoding="utf-8") as handle:
        for source in sources:
            if not source.is_dir():
                continue
            for file in sorted(source.rglob("*.txt")):
                text = file.read_bytes().decode("utf-8", errors="replace")
                for paragraph in text.split("\n\n"):
                    if len(paragraph.split()) >= 40:
                        handle.write(json.dumps({"text": paragraph}) + "\n")
                        written += 1
                        if written == count:
                            return path
            if written:
                break
    if written < count:
        raise SystemExit(f"{corpus}: only {written} paragraphs of 40+ words found, {count} wanted")
    return path


def measure(
    output: Path, *, evaluation: Path | None = None, ngram: int = 13, workers: int = 1, repeat: int = 1
) -> dict[str, Any]:
    """Read-only and n-gram-check throughput on the train shards of ``output``, and peak RSS."""
    from corpusprep.audit import AuditConfig, _cleaned_items, read_items
    from corpusprep.audit_integrity import check_integrity
    from corpusprep.audit_leakage import ngram_overlap, packed_rows
    from corpusprep.ngrams import StreamTables, id_bytes_of

    figures: dict[str, Any] = {"output": str(output), "workers": workers, "repeat": repeat}
    figures["read_cold"] = read_cold(output)
    figures["read"] = min((read_only(output) for _ in range(repeat)), key=lambda run: run["seconds"])
    figures["read"]["peak_rss_mb"] = _peak_rss_mb()
    figures["kernels"] = kernel_seconds()

    state = check_integrity(output)
    if state.ledger is None or state.manifest is None or any(v is None for v in state.shards.values()):
        raise SystemExit(f"{output}: the output fails its integrity checks; audit it first")
    manifest = state.manifest
    config = AuditConfig(ngram=ngram, against=evaluation)
    items = _cleaned_items(manifest, read_items(evaluation))[0] if evaluation is not None else []
    specials = {role: int(item["id"]) for role, item in manifest["tokenizer"]["special_tokens"].items()}
    decode = None
    id_bytes = None
    if manifest["tokenizer"]["kind"] != "bytes":
        from tokenizers import Tokenizer

        hf = Tokenizer.from_file(str(output / manifest["tokenizer"]["file"]))

        def decode(ids: list[int]) -> str:
            return str(hf.decode(ids, skip_special_tokens=False))

        id_bytes = id_bytes_of(hf, frozenset(specials.values()))
        figures["id_bytes"] = id_bytes is not None  # ids expanded to bytes, not decoded per document

    tables = StreamTables(
        end_of_document=specials["end_of_document"],
        specials=frozenset(specials.values()),
        byte_ids=manifest["tokenizer"]["kind"] == "bytes",
        decode=decode,
        id_bytes=id_bytes,
    )
    seed = int(manifest["definition"]["pack"]["seed"])
    shards = {split: list(files or []) for split, files in state.shards.items()}
    packed = {split: packed_rows(state.ledger, split, seed) for split in shards}
    ledger_tokens = np.asarray(
        [value or 0 for value in state.ledger.column("tokens").to_pylist()], dtype=np.int64
    )
    rss_before = _peak_rss_mb()
    seconds = float("inf")
    for _ in range(repeat):
        started = time.perf_counter()
        run = ngram_overlap(
            shards=shards,
            packed=packed,
            ledger=state.ledger,
            tables=tables,
            ngram=config.ngram,
            pad_id=specials["pad"],
            tail=manifest["windows"]["tail"],
            against=items,
            chunk_rows=config.chunk_rows(int(manifest["windows"]["stored_length"])),
            workers=workers,
        )
        if time.perf_counter() - started < seconds:
            seconds, result = time.perf_counter() - started, run
    train_tokens = int(figures["read"]["tokens"])  # same stored tokens as the read step
    sides = result.statistics["sides"]
    passes = result.statistics["pass_seconds"]
    figures["ns_per_train_token"] = {
        "read": 1e9 * figures["read"]["seconds"] / train_tokens,
        "read_cold": 1e9 * figures["read_cold"]["seconds"] / train_tokens,
        **{f"ngram_{name}": 1e9 * value / train_tokens for name, value in passes.items()},
        "ngram": 1e9 * seconds / train_tokens,
    }
    figures["ngram"] = {
        "seconds": seconds,
        "train_tokens_per_second": train_tokens / seconds,
        "ratio_to_read": (train_tokens / seconds) / figures["read"]["tokens_per_second"],
        "pass_seconds": result.statistics["pass_seconds"],
        "train_pass_tokens_per_second": train_tokens / result.statistics["pass_seconds"]["train"],
        "evaluation_documents": sum(side["documents"] for side in sides.values()),
        "evaluation_tokens": {
            "validation_test": int(
                sum(ledger_tokens[packed[split]].sum() for split in packed if split != "train")
            ),
            "against_utf8_bytes": sum(len(text.encode("utf-8")) for _, text in items),
        },
        "evaluation_distinct_ngrams": result.statistics["evaluation_distinct_ngrams"],
        "flagged": {name: side["documents_sharing_ngrams"] for name, side in sides.items()},
        "peak_rss_mb_before": rss_before,
        "peak_rss_mb_after": _peak_rss_mb(),
    }
    return figures


def _output_for(target: Path, scratch: Path) -> tuple[Path, Path | None]:
    if (target / "manifest.json").is_file():
        return target, None
    if not (target / "base").is_dir():
        raise SystemExit(f"{target}: neither an output folder (manifest.json) nor a corpus (base/)")
    existing = target.parent / "runs" / "base-w1"
    if (existing / "manifest.json").is_file():
        return existing, target
    output = scratch / "base-run"
    subprocess.run(
        [
            str(Path(sys.executable).parent / "corpusprep"), "run", str(HERE / "bench.toml"),
            "--input", str(target / "base"), "--output", str(output), "--quiet",
        ],
        check=True,
    )  # fmt: skip
    return output, target


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("target", type=Path, help="an output folder or a bench corpus folder")
    parser.add_argument("--documents", type=int, default=10_000, help="evaluation paragraphs (default 10000)")
    parser.add_argument("--ngram", type=int, default=13, help="words per n-gram (default 13)")
    parser.add_argument("--workers", type=int, default=1, help="threads for the train scan (default 1)")
    parser.add_argument(
        "--repeat", type=int, default=1, help="runs of the read and of the check; the fastest of each counts"
    )
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as scratch:
        output, corpus = _output_for(args.target.resolve(), Path(scratch))
        evaluation = evaluation_items(corpus, args.documents, Path(scratch)) if corpus is not None else None
        figures = measure(
            output, evaluation=evaluation, ngram=args.ngram, workers=args.workers, repeat=args.repeat
        )
    print(json.dumps(figures, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
