"""`make bench`: the pipeline on a real corpus, beside reference figures measured in the same run.

Builds the benchmark corpus from Debian packages with ``bench/make_corpus.py``
(Python documentation sources and licence texts, plus perturbed copies), then:

1. reference figures on the base corpus: reading the files alone, XXH3-128 of every
   file, ``ftfy.fix_text`` on every decoded document;
2. the whole pipeline on the base corpus (1x) and on base + copies (4x), each in a fresh
   process, wall time and peak RSS (workers = 1 for RSS, so one process holds all memory),
   and the wall time with two workers;
3. the stage benchmarks beside this file, each in its own process: clean, near, tokens, reader,
   audit, report and the Dask engine.

Nothing here is a pass/fail test: it prints figures. Usage:
``python bench/run.py [--corpus DIR] [--skip-build] [--only NAME,...]``.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import xxhash

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
DEFAULT_CORPUS = HERE / "corpora"


def _files(folder: Path) -> list[Path]:
    return sorted(p for p in folder.rglob("*") if p.is_file())


def _timed(action: Callable[[], Any]) -> tuple[float, Any]:
    start = time.perf_counter()
    result = action()
    return time.perf_counter() - start, result


def reference_figures(base: Path) -> dict[str, float]:
    files = _files(base)
    seconds, blobs = _timed(lambda: [p.read_bytes() for p in files])
    size = sum(len(b) for b in blobs)
    megabytes = size / 1e6
    hash_seconds, _ = _timed(lambda: [xxhash.xxh3_128_hexdigest(b) for b in blobs])
    texts = [b.decode("utf-8", errors="replace") for b in blobs]
    import ftfy

    ftfy_seconds, _ = _timed(lambda: [ftfy.fix_text(t) for t in texts])
    return {
        "files": len(files),
        "MB": megabytes,
        "read files MB/s": megabytes / seconds,
        "xxh3_128 MB/s": megabytes / hash_seconds,
        "ftfy.fix_text MB/s": megabytes / ftfy_seconds,
    }


def run_pipeline_process(input_folder: Path, output: Path, workers: int) -> dict[str, float]:
    """Run the CLI in a fresh process; wall seconds and that process's peak RSS in MB."""
    command = [
        sys.executable,
        "-m",
        "corpusprep",
        "run",
        str(HERE / "bench.toml"),
        "--input",
        str(input_folder),
        "--output",
        str(output),
        "--workers",
        str(workers),
        "--force",
        "--quiet",
    ]
    start = time.perf_counter()
    process = subprocess.Popen(command, cwd=ROOT)
    _, status, usage = os.wait4(process.pid, 0)
    seconds = time.perf_counter() - start
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"pipeline run failed on {input_folder} (exit {os.waitstatus_to_exitcode(status)})")
    manifest = json.loads((output / "manifest.json").read_text(encoding="utf-8"))
    megabytes = manifest["inputs"]["bytes"] / 1e6
    return {
        "MB": megabytes,
        "seconds": seconds,
        "MB/s": megabytes / seconds,
        "peak RSS MB": usage.ru_maxrss / 1024,
        "documents kept": manifest["ledger"]["kept"],
        "near copies": manifest["stages"].get("near", {}).get("near_copy", 0),
    }


def _print(title: str, figures: dict[str, Any]) -> None:
    print(f"\n== {title}")
    for key, value in figures.items():
        shown = f"{value:,.2f}" if isinstance(value, float) else str(value)
        print(f"  {key:<40} {shown}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--corpus", type=Path, default=DEFAULT_CORPUS)
    parser.add_argument("--skip-build", action="store_true", help="reuse an existing corpus folder")
    parser.add_argument(
        "--only",
        default="",
        help="comma-separated subset of: reference,pipeline,clean,near,tokens,reader,audit,report,dask",
    )
    args = parser.parse_args(argv)
    only = set(filter(None, args.only.split(",")))

    def wanted(name: str) -> bool:
        return not only or name in only

    corpus: Path = args.corpus
    if not args.skip_build or not (corpus / "base").is_dir():
        subprocess.run(
            [sys.executable, str(HERE / "make_corpus.py"), str(corpus), "--scale", "3"], check=True
        )
    base = corpus / "base"
    runs = corpus.parent / "runs"

    if wanted("reference"):
        _print("reference figures on the base corpus (same run)", reference_figures(base))

    if wanted("pipeline"):
        one = run_pipeline_process(base, runs / "base-w1", workers=1)
        four = run_pipeline_process(corpus, runs / "all-w1", workers=1)
        two_workers = run_pipeline_process(corpus, runs / "all-w2", workers=2)
        _print("pipeline, base corpus (1x), 1 worker", one)
        _print("pipeline, base + 3 perturbed copies (4x), 1 worker", four)
        _print("pipeline, 4x, 2 workers", two_workers)
        _print(
            "pipeline scaling",
            {
                "input growth": four["MB"] / one["MB"],
                "time growth (1 worker)": four["seconds"] / one["seconds"],
                "peak RSS growth (target <= 1.3)": four["peak RSS MB"] / one["peak RSS MB"],
                "speed-up of 2 workers": four["seconds"] / two_workers["seconds"],
            },
        )

    stage_benches = {
        "clean": ["clean_speed.py", str(base)],
        "near": ["near_speed.py"],
        "tokens": ["tokens_speed.py"],
        "reader": ["reader_speed.py"],
        # The corpus folder: its copies give the 10,000 outside evaluation documents, and the output
        # runs/base-w1 made above is audited.
        "audit": ["audit_speed.py", str(corpus)],
        "report": ["report_speed.py", str(corpus)],  # the folder holding base/ and the copies
        "dask": ["dask_speed.py", "--corpus", str(corpus)],  # base and copies: the 4x corpus
    }
    for name, command in stage_benches.items():
        if not wanted(name):
            continue
        print(f"\n== {name} (bench/{command[0]})", flush=True)
        result = subprocess.run([sys.executable, str(HERE / command[0]), *command[1:]], cwd=ROOT)
        if result.returncode != 0:
            print(f"   bench/{command[0]} exited {result.returncode} (a target missed or a step failed)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
