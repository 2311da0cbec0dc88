"""The local engine beside the Dask engine: same corpus, same definition, same cores.

Run: ``.venv/bin/python bench/dask_speed.py [--corpus DIR] [--workers N] [--definition TOML]``.

The corpus is the ``base/`` folder written by ``bench/make_corpus.py`` (Python documentation
sources and Debian licence texts; ``--corpus bench/corpora`` takes base plus its perturbed
copies, 4x); build it first with ``.venv/bin/python bench/make_corpus.py bench/corpora``.
Each engine runs in a fresh Python process so peak memory figures do not mix:

- local: ``corpusprep.pool.local_engine(N)``, the one process pool of N workers that
  ``run_pipeline(workers=N)`` keeps for a whole run;
- dask: ``corpusprep.engine_dask.dask_engine(None, N)``, a LocalCluster of N worker processes
  with one thread each on 127.0.0.1 (what ``corpusprep run --engine dask`` starts).

Printed per engine: wall time of the run (and, for Dask, the cluster start-up apart), the
time and task count of each mapped phase (first pass, exact-duplicate partitions, LSH band
groups, pair checks, encoding, shard writing) and of the driver working alone between them, peak
memory of the driver and of the workers, both as ``resource.getrusage`` ``ru_maxrss`` and as
``VmHWM`` (see :func:`_high_water_mib` for why they differ): for Dask read on every worker with
``Client.run`` and on the scheduler with ``Client.run_on_scheduler`` (a LocalCluster's scheduler
lives in the driver process, so its figure is the driver's); for the local pool returned by each
batch beside its result. The driver's CPU time per phase (all its threads, the Dask scheduler's
included) shows how much of a mapped phase is serial work in the driver. Then the time ratio
Dask / local (target <= 1.5) and whether both outputs are byte-identical.

Nothing here is a pass/fail test: it prints figures.
"""

from __future__ import annotations

import argparse
import functools
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

import xxhash

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))

DEFAULT_CORPUS = HERE / "corpora" / "base"
DEFAULT_DEFINITION = HERE / "bench.toml"
TARGET_RATIO = 1.5


def _peak_rss_mib() -> float:
    """Peak resident set of this process in MiB (Linux reports ru_maxrss in KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _high_water_mib() -> float:
    """Peak resident set of this process image in MiB: ``VmHWM`` of ``/proc/self/status`` (Linux).

    ``ru_maxrss`` of a spawned process also counts its parent's resident set at the fork
    before ``exec`` (Linux keeps the larger of the two across ``exec``), so a worker spawned
    by a large driver reports the driver's size; ``VmHWM`` belongs to the new image only.
    """
    with open("/proc/self/status", encoding="ascii") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def _worker_peaks() -> tuple[float, float]:
    return _peak_rss_mib(), _high_water_mib()


def _measured(function: Callable[[Any], Any], item: Any) -> tuple[Any, float, float]:
    """``function(item)``, with the worker's peak memory after it (both measures)."""
    result = function(item)
    return result, _peak_rss_mib(), _high_water_mib()


#: Mapped task function -> the phase it belongs to.
_MAPPED_PHASES = {
    "stage_inputs": "first pass: read, clean, hashes, signatures (mapped)",
    "_exact_partition": "exact duplicates: key partitions (mapped)",
    "_band_task": "near duplicates: LSH band groups (mapped)",
    "_estimate_task": "near duplicates: pair checks (mapped)",
    "_exact_task": "near duplicates: pair checks (mapped)",
    "encode_staged": "encode (mapped)",
    "_pack_shard": "pack: shard tasks (mapped)",
}
_DRIVER_ONLY = "driver alone: staging, union-find, split, tokenizer training, ledger, manifest"


def _name(function: Callable[[Any], Any]) -> str:
    return str(getattr(getattr(function, "func", function), "__name__", "?"))


class _PhaseClock:
    """Wraps a mapper and notes when each map starts and ends, to cut the run into phases.

    A mapped phase's wall time runs from the start of its first map to the end of its
    last one (the driver's own work inside it, such as writing the staged documents, is
    included); everything between maps is the driver working alone.
    """

    def __init__(self, mapper: Callable[[Callable[[Any], Any], Iterable[Any]], Iterator[Any]]) -> None:
        self.inner = mapper
        self.marks: list[float] = []
        self.cpu_marks: list[float] = []
        self.maps: list[tuple[str, float, float, float, float, int]] = []
        self.worker_maxrss = 0.0
        self.worker_hwm = 0.0

    def mark(self) -> None:
        self.marks.append(time.perf_counter())
        self.cpu_marks.append(time.process_time())

    def __call__(self, function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        name = _name(function)
        wall, cpu, count = time.perf_counter(), time.process_time(), 0
        for result, maxrss, hwm in self.inner(functools.partial(_measured, function), items):
            self.worker_maxrss = max(self.worker_maxrss, maxrss)
            self.worker_hwm = max(self.worker_hwm, hwm)
            count += 1
            yield result
        self.maps.append((name, wall, time.perf_counter(), cpu, time.process_time(), count))

    def phases(self) -> dict[str, tuple[float, float, int]]:
        """Phase name -> (wall seconds, driver CPU seconds (all its threads), tasks)."""
        totals: dict[str, list[float]] = {}
        for name, wall_start, wall_end, cpu_start, cpu_end, count in self.maps:
            phase = _MAPPED_PHASES.get(name, f"{name} (mapped)")
            entry = totals.setdefault(phase, [0.0, 0.0, 0])
            entry[0] += wall_end - wall_start
            entry[1] += cpu_end - cpu_start
            entry[2] += count
        run_wall = self.marks[-1] - self.marks[0]
        run_cpu = self.cpu_marks[-1] - self.cpu_marks[0]
        alone = [
            run_wall - sum(v[0] for v in totals.values()),
            run_cpu - sum(v[1] for v in totals.values()),
            0,
        ]
        ordered = {
            phase: totals[phase] for phase in dict.fromkeys(_MAPPED_PHASES.values()) if phase in totals
        }
        ordered.update({phase: value for phase, value in totals.items() if phase not in ordered})
        ordered[_DRIVER_ONLY] = alone
        return {phase: (value[0], value[1], int(value[2])) for phase, value in ordered.items()}


def _tree_digest(folder: Path) -> str:
    digest = xxhash.xxh3_128()
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        digest.update(str(path.relative_to(folder)).encode())
        digest.update(xxhash.xxh3_128(path.read_bytes()).digest())
    return digest.hexdigest()


def _one(engine: str, corpus: Path, definition_path: Path, output: Path, workers: int) -> dict[str, Any]:
    """One run in this process; returns its figures."""
    from corpusprep.definition import load_definition
    from corpusprep.pipeline import run_pipeline
    from corpusprep.pool import local_engine

    definition = load_definition(definition_path).with_folders(input=corpus, output=output)
    figures: dict[str, Any] = {"engine": engine, "workers": workers}
    if engine == "local":
        with local_engine(workers) as mapper:  # what run_pipeline(workers=N) uses: one pool per run
            clock = _PhaseClock(mapper)
            clock.mark()
            result = run_pipeline(definition, mapper=clock)
            clock.mark()
        figures["peak_mib"] = {
            "driver": (_peak_rss_mib(), _high_water_mib()),
            "largest pool worker": (clock.worker_maxrss, clock.worker_hwm),
        }
    else:
        from distributed import default_client

        from corpusprep.engine_dask import dask_engine

        begin = time.perf_counter()
        with dask_engine(None, workers) as mapper:
            figures["cluster_start_s"] = time.perf_counter() - begin
            client = default_client()
            clock = _PhaseClock(mapper)
            clock.mark()
            result = run_pipeline(definition, mapper=clock)
            clock.mark()
            per_worker = client.run(_worker_peaks)
            scheduler = client.run_on_scheduler(_worker_peaks)
        figures["peak_mib"] = {
            "driver": (_peak_rss_mib(), _high_water_mib()),
            "scheduler (in the driver process)": scheduler,
            **{f"worker {address}": value for address, value in sorted(per_worker.items())},
        }
    figures["run_s"] = clock.marks[-1] - clock.marks[0]
    figures["phases_s"] = clock.phases()
    figures["output_digest"] = _tree_digest(result.output)
    figures["documents"] = result.manifest["ledger"]["rows"]
    figures["tokens"] = sum(split["tokens"] for split in result.manifest["splits"].values())
    return figures


def _spawn(engine: str, args: argparse.Namespace, output: Path) -> dict[str, Any]:
    command = [
        sys.executable,
        str(Path(__file__).resolve()),
        "--one",
        engine,
        "--corpus",
        str(args.corpus),
        "--definition",
        str(args.definition),
        "--workers",
        str(args.workers),
        "--output",
        str(output),
    ]
    done = subprocess.run(command, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise SystemExit(f"{engine} run failed:\n{done.stderr[-4000:]}")
    figures: dict[str, Any] = json.loads(done.stdout.strip().splitlines()[-1])
    return figures


def _show(figures: dict[str, Any]) -> None:
    print(f"\n{figures['engine']} engine, {figures['workers']} workers: run {figures['run_s']:.2f} s", end="")
    if "cluster_start_s" in figures:
        print(f" (+ {figures['cluster_start_s']:.2f} s starting the cluster)", end="")
    print()
    print("      wall  share  driver CPU   tasks  phase")
    for name, (seconds, cpu, tasks) in figures["phases_s"].items():
        share = seconds / figures["run_s"] * 100 if figures["run_s"] else 0.0
        print(f"  {seconds:8.2f} s {share:5.1f} % {cpu:8.2f} s {tasks:7d}  {name}")
    print("  peak memory (MiB): getrusage ru_maxrss / VmHWM")
    for name, (maxrss, hwm) in figures["peak_mib"].items():
        print(f"  {maxrss:8.1f} / {hwm:8.1f}  {name}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--corpus", type=Path, default=DEFAULT_CORPUS, help="Raw folder to run on.")
    parser.add_argument("--definition", type=Path, default=DEFAULT_DEFINITION, help="Pipeline definition.")
    parser.add_argument("--workers", type=int, default=2, help="Worker processes for both engines.")
    parser.add_argument("--one", choices=("local", "dask"), help=argparse.SUPPRESS)
    parser.add_argument("--output", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.one:
        print(json.dumps(_one(args.one, args.corpus, args.definition, args.output, args.workers)))
        return 0
    if not args.corpus.is_dir():
        print(
            f"{args.corpus}: no corpus; build it with `.venv/bin/python bench/make_corpus.py bench/corpora`",
            file=sys.stderr,
        )
        return 2
    files = [p for p in args.corpus.rglob("*") if p.is_file()]
    size = sum(p.stat().st_size for p in files)
    print(f"corpus {args.corpus}: {len(files)} files, {size / 2**20:.1f} MiB; definition {args.definition}")
    print(f"cores available: {len(os.sched_getaffinity(0))}; workers per engine: {args.workers}")
    with tempfile.TemporaryDirectory(prefix="dask-speed-") as folder:
        local = _spawn("local", args, Path(folder) / "local")
        shutil.rmtree(Path(folder) / "local")
        dask = _spawn("dask", args, Path(folder) / "dask")
    for figures in (local, dask):
        _show(figures)
    ratio = dask["run_s"] / local["run_s"]
    with_start = (dask["run_s"] + dask["cluster_start_s"]) / local["run_s"]
    print(
        f"\nDask / local time: {ratio:.2f} (target <= {TARGET_RATIO}: "
        f"{'met' if ratio <= TARGET_RATIO else 'NOT met'}); counting the cluster start: {with_start:.2f}"
    )
    same = local["output_digest"] == dask["output_digest"]
    print(f"outputs byte-identical: {'yes' if same else 'NO'} ({local['documents']} ledger rows)")
    return 0 if same else 1


if __name__ == "__main__":
    raise SystemExit(main())
