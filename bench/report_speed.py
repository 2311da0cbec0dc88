"""Time of ``corpusprep report`` beside the pipeline's own run time for the same output.

Both are measured the way a person runs them: ``corpusprep run`` and ``corpusprep report``
each in a fresh process (interpreter start and imports included), the median of
``--repeat`` runs, on the same machine in the same session. Target: the report takes at
most 5% of the run. A second table splits one report, in this process, into its parts
(importing matplotlib, reading the output and counting token ids, drawing the figures),
so a miss shows where the time went.

Cases: the demo (the invented ferry archive through pipelines/demo.toml), and a real
corpus through bench/bench.toml when a corpus folder is given or bench/corpora/base
exists (``make bench`` builds it). Usage:
``python bench/report_speed.py [CORPUS] [--repeat N]``. Prints figures, never fails.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
CLI = [sys.executable, "-m", "corpusprep"]


def _seconds(command: list[str], repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        subprocess.run(command, check=True, stdout=subprocess.DEVNULL)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def _parts(output: Path) -> dict[str, float]:
    """One report in this process, split into its parts (the first import is only cold here)."""
    import corpusprep.report as report
    import corpusprep.report_figures as figures

    start = time.perf_counter()
    import matplotlib.figure  # noqa: F401

    parts = {"import matplotlib": time.perf_counter() - start}
    drawn = 0.0
    draw = figures._figure_svg

    def timed(*args: object, **kwargs: object) -> str:
        nonlocal drawn
        begin = time.perf_counter()
        svg = draw(*args, **kwargs)  # type: ignore[arg-type]
        drawn += time.perf_counter() - begin
        return svg

    figures._figure_svg = timed  # type: ignore[assignment]
    try:
        config = report.ReportConfig()
        begin = time.perf_counter()
        data = report._read(output, config)
        parts["read output, count token ids"] = time.perf_counter() - begin
        begin = time.perf_counter()
        page = report._page(data, config)
        parts["draw figures"] = drawn
        parts["tables, excerpts, HTML"] = time.perf_counter() - begin - drawn
    finally:
        figures._figure_svg = draw
    parts["page size MB"] = len(page.encode("utf-8")) / 1e6
    return parts


def _case(name: str, definition: Path, corpus: Path, work: Path, repeat: int) -> None:
    output = work / name
    folders = ["--input", str(corpus), "--output", str(output)]
    run = [*CLI, "run", str(definition), *folders, "--force", "--quiet"]
    run_seconds = _seconds(run, repeat)
    page = work / f"{name}.html"
    report_seconds = _seconds([*CLI, "report", str(output), "--to", str(page)], repeat)
    share = report_seconds / run_seconds
    print(f"\n{name}: {corpus}")
    print(f"  corpusprep run     {run_seconds:8.2f} s  (median of {repeat}, fresh process)")
    print(f"  corpusprep report  {report_seconds:8.2f} s  (median of {repeat}, fresh process)")
    print(f"  report / run       {share:8.1%}   target <= 5%: {'met' if share <= 0.05 else 'NOT met'}")
    print(f"  page               {page.stat().st_size / 1e6:8.2f} MB")
    for part, value in _parts(output).items():
        unit = "" if part.endswith("MB") else " s"
        print(f"    {part:<30} {value:8.3f}{unit}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("corpus", nargs="?", type=Path, help="a raw folder for bench/bench.toml")
    parser.add_argument("--repeat", type=int, default=3, help="runs per command (median)")
    arguments = parser.parse_args(argv)
    sys.path.insert(0, str(ROOT / "fixtures"))
    import make_ferry_archive

    with tempfile.TemporaryDirectory(prefix="report-speed-") as temporary:
        work = Path(temporary)
        archive = work / "ferry"
        make_ferry_archive.build(archive)
        _case("demo", ROOT / "pipelines" / "demo.toml", archive, work, arguments.repeat)
        corpus = arguments.corpus or HERE / "corpora" / "base"
        if corpus.is_dir():
            _case("corpus", HERE / "bench.toml", corpus, work, arguments.repeat)
        else:
            print(f"\n(no corpus at {corpus}: `make bench` builds one; only the demo was measured)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
