"""Time of ``corpusprep report`` beside the pipeline's own run time for the same output.

Both are measured the way a person runs them: ``corpusprep run`` and ``corpusprep report``
each in a fresh process (interpreter start and imports included), the median of
``--repeat`` runs, on the same machine in the same session. Target: on the full benchmark
corpus (base + perturbed copies, the "4x" input of ``make bench``) the report takes at most
5% of the run. The base corpus alone (1x) and the demo are measured the same way and
printed beside it, as extra figures. A second table splits one report, made in a fresh
process of its own, into its parts (imports, reading the output and counting token ids,
drawing the figures, the rest of the page), so a miss shows where the time went.

Usage: ``python bench/report_speed.py [CORPORA] [--repeat N] [--workers N]``, where CORPORA
is the folder ``bench/make_corpus.py`` builds (default ``bench/corpora``; ``make bench``
builds it). Prints figures, never fails.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
CLI = [sys.executable, "-m", "corpusprep"]
TARGET = 0.05


def _seconds(command: list[str], repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        subprocess.run(command, check=True, stdout=subprocess.DEVNULL)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def parts(output: Path) -> dict[str, float]:
    """One report in this (fresh) process, split into its parts, as ``build_report`` makes it."""
    begin = time.perf_counter()
    import corpusprep.report as report
    import corpusprep.report_figures as figures

    result = {"import NumPy, pyarrow, corpusprep.report": time.perf_counter() - begin}
    with report._collector_paused():
        begin = time.perf_counter()
        import matplotlib.backends.backend_svg
        import matplotlib.figure  # noqa: F401

        result["import matplotlib (Figure, SVG canvas)"] = time.perf_counter() - begin
        drawn = 0.0
        draw = figures._figure_svg

        def timed(*args: object, **kwargs: object) -> str:
            nonlocal drawn
            start = time.perf_counter()
            svg = draw(*args, **kwargs)  # type: ignore[arg-type]
            drawn += time.perf_counter() - start
            return svg

        figures._figure_svg = timed
        config = report.ReportConfig()
        begin = time.perf_counter()
        data = report._read(output, config)
        result["read output, count token ids"] = time.perf_counter() - begin
        begin = time.perf_counter()
        page = report._page(data, config)
        result["draw figures"] = drawn
        result["tables, excerpts, HTML"] = time.perf_counter() - begin - drawn
    result["page size MB"] = len(page.encode("utf-8")) / 1e6
    return result


def _parts_in_fresh_process(output: Path) -> dict[str, float]:
    command = [sys.executable, str(Path(__file__).resolve()), "--parts-of", str(output)]
    found = subprocess.run(command, check=True, capture_output=True, text=True, cwd=ROOT)
    figures: dict[str, float] = json.loads(found.stdout)
    return figures


def _case(name: str, definition: Path, corpus: Path, work: Path, repeat: int, workers: int | None) -> float:
    """Measure one case, print it, return the report's share of the run."""
    output = work / name
    folders = ["--input", str(corpus), "--output", str(output)]
    chosen = [] if workers is None else ["--workers", str(workers)]
    run = [*CLI, "run", str(definition), *folders, *chosen, "--force", "--quiet"]
    run_seconds = _seconds(run, repeat)
    page = work / f"{name}.html"
    report_seconds = _seconds([*CLI, "report", str(output), "--to", str(page)], repeat)
    manifest = json.loads((output / "manifest.json").read_text(encoding="utf-8"))
    inputs, tokens = manifest["inputs"], sum(int(info["tokens"]) for info in manifest["splits"].values())
    share = report_seconds / run_seconds
    verdict = "met" if share <= TARGET else "NOT met"
    print(f"\n{name}: {corpus}")
    print(
        f"  input              {inputs['bytes'] / 1e6:8.1f} MB, {inputs['count']:,} files, "
        f"{manifest['ledger']['rows']:,} ledger rows, {tokens:,} tokens"
    )
    print(
        f"  corpusprep run     {run_seconds:8.2f} s  (median of {repeat}, fresh process, "
        f"workers {'default' if workers is None else workers})"
    )
    print(f"  corpusprep report  {report_seconds:8.2f} s  (median of {repeat}, fresh process)")
    print(f"  report / run       {share:8.1%}   target <= {TARGET:.0%}: {verdict}")
    print(f"  page               {page.stat().st_size / 1e6:8.2f} MB")
    print("  one report in a fresh process, by part:")
    for part, value in _parts_in_fresh_process(output).items():
        unit = "" if part.endswith("MB") else " s"
        print(f"    {part:<40} {value:8.3f}{unit}")
    return share


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "corpora", nargs="?", type=Path, default=HERE / "corpora", help="folder built by bench/make_corpus.py"
    )
    parser.add_argument("--repeat", type=int, default=3, help="runs per command (median)")
    parser.add_argument(
        "--workers", type=int, default=None, help="--workers for corpusprep run (default: its own)"
    )
    parser.add_argument("--parts-of", type=Path, default=None, help=argparse.SUPPRESS)
    arguments = parser.parse_args(argv)
    if arguments.parts_of is not None:  # the child process of _parts_in_fresh_process
        print(json.dumps(parts(arguments.parts_of)))
        return 0
    sys.path.insert(0, str(ROOT / "fixtures"))
    import make_ferry_archive

    corpora: Path = arguments.corpora
    startup = _seconds([*CLI, "--help"], arguments.repeat)
    print(
        f"machine: {os.cpu_count()} CPUs; python -m corpusprep --help takes {startup:.2f} s (start-up floor)"
    )
    shares: dict[str, float] = {}
    with tempfile.TemporaryDirectory(prefix="report-speed-") as temporary:
        work = Path(temporary)
        if (corpora / "base").is_dir():
            bench = HERE / "bench.toml"
            shares["full"] = _case("full", bench, corpora, work, arguments.repeat, arguments.workers)
            shares["1x"] = _case("1x", bench, corpora / "base", work, arguments.repeat, arguments.workers)
        else:
            print(
                f"\n(no benchmark corpus at {corpora}: build it with `python bench/make_corpus.py {corpora} "
                "--scale 3` or `make bench`; the target case was NOT measured)"
            )
        archive = work / "ferry"
        make_ferry_archive.build(archive)
        demo = ROOT / "pipelines" / "demo.toml"
        shares["demo"] = _case("demo", demo, archive, work, arguments.repeat, arguments.workers)
    print("\nreport / run: " + ", ".join(f"{name} {share:.1%}" for name, share in shares.items()))
    if "full" in shares:
        verdict = "met" if shares["full"] <= TARGET else "NOT met"
        print(f"target (full benchmark corpus) <= {TARGET:.0%}: {verdict}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
