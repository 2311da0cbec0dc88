"""The ``corpusprep`` command line: parse, call the library, print.

Exit codes (also in the README):

====  =====================================================
0     success
1     the run failed (input, output, integrity, internal error)
2     bad usage or an invalid pipeline definition
3     ``audit`` found leakage between splits or with an outside set
4     ``audit`` found the output damaged (missing or altered files, counts)
130   interrupted (Ctrl-C)
====  =====================================================

Heavy imports happen inside the commands so ``--help`` is instant.
"""

from __future__ import annotations

import contextlib
import enum
import sys
import traceback
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any, NoReturn, TypeVar

import typer

__all__ = [
    "EXIT_DAMAGED",
    "EXIT_FAILED",
    "EXIT_INTERRUPTED",
    "EXIT_LEAKAGE",
    "EXIT_OK",
    "EXIT_USAGE",
    "app",
    "main",
]

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_USAGE = 2
EXIT_LEAKAGE = 3
EXIT_DAMAGED = 4
EXIT_INTERRUPTED = 130

app = typer.Typer(
    name="corpusprep",
    help="Turn a raw folder of text into leak-free next-token training windows, and check such outputs.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

T = TypeVar("T")


class Engine(enum.StrEnum):
    """Where ``run`` does its per-batch work."""

    local = "local"
    dask = "dask"


DebugOption = Annotated[bool, typer.Option("--debug", help="Show the full traceback of an error.")]


def _fail(message: str, code: int) -> NoReturn:
    typer.echo(f"corpusprep: error: {message}", err=True)
    raise typer.Exit(code)


def _guard(debug: bool, action: Callable[[], T]) -> T:
    """Run ``action``, turning errors into one paragraph on stderr and an exit code."""
    from corpusprep.errors import CorpusprepError, DefinitionError

    try:
        return action()
    except typer.Exit:
        raise
    except KeyboardInterrupt:
        typer.echo("corpusprep: interrupted", err=True)
        raise typer.Exit(EXIT_INTERRUPTED) from None
    except DefinitionError as error:
        if debug:
            traceback.print_exc()
        _fail(str(error), EXIT_USAGE)
    except CorpusprepError as error:
        if debug:
            traceback.print_exc()
        _fail(str(error), EXIT_FAILED)
    except Exception as error:
        if debug:
            traceback.print_exc()
        _fail(
            f"unexpected {type(error).__name__}: {error} (run again with --debug for the traceback)",
            EXIT_FAILED,
        )


@app.command()
def check(
    pipeline: Annotated[Path, typer.Argument(help="Pipeline definition (TOML).")],
    debug: DebugOption = False,
) -> None:
    """Validate a pipeline definition without running it."""

    def action() -> None:
        from corpusprep.definition import load_definition

        definition = load_definition(pipeline)
        typer.echo(f"{pipeline}: valid (definition hash {definition.digest()})")
        typer.echo(f"  input:  {definition.input or '(not set: pass --input)'}")
        typer.echo(f"  output: {definition.output or '(not set: pass --output)'}")

    _guard(debug, action)


@app.command()
def run(
    pipeline: Annotated[Path, typer.Argument(help="Pipeline definition (TOML).")],
    input: Annotated[
        Path | None, typer.Option("--input", help="Read this folder instead of the definition's.")
    ] = None,
    output: Annotated[
        Path | None, typer.Option("--output", help="Write this folder instead of the definition's.")
    ] = None,
    workers: Annotated[
        int | None,
        typer.Option(
            "--workers",
            min=1,
            help="Worker processes (output is identical for any number); default: the definition's "
            "engine.workers, else one per core, at most 8.",
        ),
    ] = None,
    force: Annotated[bool, typer.Option("--force", help="Replace a non-empty output folder.")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress bars and no summary.")] = False,
    engine: Annotated[
        Engine | None,
        typer.Option(
            "--engine",
            help="Where the work runs: local processes, or Dask (a local cluster of --workers "
            "processes, or the cluster at --scheduler). Output is identical either way. "
            "Default: the definition's engine.kind (local).",
        ),
    ] = None,
    scheduler: Annotated[
        str | None,
        typer.Option(
            "--scheduler",
            metavar="ADDRESS",
            help="With --engine dask: connect to this running Dask scheduler (tcp://HOST:PORT); "
            "--workers is then ignored. Default: the definition's engine.scheduler.",
        ),
    ] = None,
    debug: DebugOption = False,
) -> None:
    """Run a pipeline definition on a raw folder and write shards, ledger and manifest."""
    if scheduler is not None and engine is Engine.local:
        raise typer.BadParameter("needs --engine dask", param_hint="--scheduler")

    def action() -> None:
        from corpusprep.definition import load_definition
        from corpusprep.pipeline import run_pipeline
        from corpusprep.summary import print_summary, progress_printer

        definition = load_definition(pipeline).with_folders(input=input, output=output)
        chosen = engine or Engine(definition.engine.kind)
        address = scheduler or definition.engine.scheduler or None
        count = workers or definition.engine.worker_count()
        if address is not None and chosen is not Engine.dask:
            _fail(
                f"a scheduler ({address}, from --scheduler or engine.scheduler) needs the dask engine: "
                "pass --engine dask or set "
                f"engine.kind = 'dask' in {pipeline}",
                EXIT_USAGE,
            )
        with contextlib.ExitStack() as stack:
            mapper = None
            if chosen is Engine.dask:
                from corpusprep.engine_dask import dask_engine

                mapper = stack.enter_context(dask_engine(address, count))
            progress = stack.enter_context(progress_printer(enabled=not quiet))
            result = run_pipeline(definition, workers=count, force=force, progress=progress, mapper=mapper)
        if not quiet:
            print_summary(result.manifest, result.output)

    _guard(debug, action)


@app.command()
def inspect(
    output: Annotated[Path, typer.Argument(help="A finished output folder.")],
    show: Annotated[int, typer.Option("--show", min=0, help="Decode this many windows back to text.")] = 0,
    split: Annotated[str, typer.Option("--split", help="Split whose windows --show decodes.")] = "train",
    debug: DebugOption = False,
) -> None:
    """Counts per split, the shard table, and a few windows decoded back to text."""

    def action() -> None:
        from corpusprep.summary import print_overview

        if not (output / "manifest.json").is_file():
            _fail(f"{output}: no manifest.json; not a finished corpusprep output", EXIT_USAGE)
        from corpusprep.manifest import read_manifest

        splits = read_manifest(output).get("splits", {})
        if show and split not in splits:
            names = ", ".join(splits) or "none"
            _fail(f"--split {split}: no such split in {output}; it has {names}", EXIT_USAGE)
        print_overview(output, show=show, split=split)

    _guard(debug, action)


@app.command()
def audit(
    output: Annotated[Path, typer.Argument(help="A finished output folder.")],
    against: Annotated[
        Path | None,
        typer.Option(
            "--against",
            help="An outside evaluation set (.jsonl, .json, .csv, .parquet, or .txt with one item per line; "
            "optionally .gz) to compare with train.",
        ),
    ] = None,
    text_field: Annotated[
        str, typer.Option("--text-field", help="Field or column holding the text in --against.")
    ] = "text",
    ngram: Annotated[
        int, typer.Option("--ngram", min=1, max=1000, help="Words per n-gram of the overlap check.")
    ] = 13,
    json_output: Annotated[
        bool, typer.Option("--json", help="Print one JSON document instead of tables.")
    ] = False,
    contaminated_at: Annotated[
        float,
        typer.Option(
            "--contaminated-at",
            min=0.0,
            max=1.0,
            help="Fraction of a validation/test document's n-grams found in train that makes it contaminated "
            "(leakage); below it shared n-grams are reported as overlap. 0 = any shared n-gram.",
        ),
    ] = 0.7,
    examples: Annotated[int, typer.Option("--examples", min=0, help="Findings shown per kind.")] = 5,
    skip_ngrams: Annotated[
        bool, typer.Option("--skip-ngrams", help="Leave out the n-gram check (it reads every shard).")
    ] = False,
    scan_threads: Annotated[
        int,
        typer.Option(
            "--workers",
            min=1,
            help="Threads that scan train for the n-gram check; the findings are the same for any count.",
        ),
    ] = 1,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress bars.")] = False,
    debug: DebugOption = False,
) -> None:
    """Check an output for damage (files, hashes, counts) and leakage between splits or with --against.

    Exit codes: 0 clean, 3 leakage found, 4 output damaged (wins over leakage), 2 bad usage.
    """

    def action() -> int:
        from corpusprep.audit import (
            AuditConfig,
            AuditInputError,
            NotAnOutputError,
            audit_output,
            print_report,
        )
        from corpusprep.manifest import dump_json
        from corpusprep.summary import progress_printer

        try:
            config = AuditConfig(
                ngram=ngram,
                skip_ngrams=skip_ngrams,
                against=against,
                text_field=text_field,
                contaminated_at=contaminated_at,
                workers=scan_threads,
            )
            with progress_printer(enabled=not quiet) as progress:
                report = audit_output(output, config, progress=progress)
        except (NotAnOutputError, AuditInputError) as error:
            if debug:
                traceback.print_exc()
            _fail(str(error), EXIT_USAGE)
        if json_output:
            typer.echo(dump_json(report.to_json(examples=None)), nl=False)
        else:
            print_report(report, examples=examples)
        return {"clean": EXIT_OK, "leakage": EXIT_LEAKAGE, "damaged": EXIT_DAMAGED}[report.outcome]

    code = _guard(debug, action)
    raise typer.Exit(code)


def main(argv: list[str] | None = None) -> Any:
    """Console-script entry point."""
    try:
        return app(args=argv, prog_name="corpusprep")
    except KeyboardInterrupt:
        typer.echo("corpusprep: interrupted", err=True)
        sys.exit(EXIT_INTERRUPTED)


@app.command()
def report(
    output: Annotated[Path, typer.Argument(help="A finished output folder.")],
    to: Annotated[
        Path | None,
        typer.Option("--to", help="Write the page here instead of beside the folder (OUTPUT.report.html)."),
    ] = None,
    audit_result: Annotated[
        Path | None,
        typer.Option(
            "--audit",
            help="An audit result saved with `corpusprep audit OUTPUT --json`; by default "
            "OUTPUT.audit.json beside the folder or audit.json inside it is shown when present.",
        ),
    ] = None,
    debug: DebugOption = False,
) -> None:
    """Write one self-contained HTML page of figures and tables describing a finished output.

    The page is built from the output folder alone, needs no network, and by default is
    written beside the folder so the audited output stays unchanged.
    """

    def action() -> None:
        from corpusprep.report import ReportConfig, ReportError, write_report

        if not (output / "manifest.json").is_file():
            _fail(f"{output}: no manifest.json; not a finished corpusprep output", EXIT_USAGE)
        try:
            path = write_report(output, to, ReportConfig(audit=audit_result))
        except ReportError as error:
            if debug:
                traceback.print_exc()
            _fail(str(error), EXIT_USAGE)
        typer.echo(f"report written to {path} ({path.stat().st_size:,} bytes)")

    _guard(debug, action)
