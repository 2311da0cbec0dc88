"""Human-readable progress and summaries for the command line (rich)."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TaskID, TextColumn, TimeElapsedColumn
from rich.table import Table

from corpusprep.pipeline import ProgressCallback

__all__ = ["print_summary", "progress_printer"]


@contextmanager
def progress_printer(*, enabled: bool = True) -> Iterator[ProgressCallback | None]:
    """A progress callback that draws one bar per stage on stderr."""
    if not enabled:
        yield None
        return
    console = Console(stderr=True)
    with Progress(
        TextColumn("{task.description:<10}"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        console=console,
        transient=True,
    ) as bars:
        tasks: dict[str, TaskID] = {}

        def callback(stage: str, done: int, total: int | None) -> None:
            if stage not in tasks:
                tasks[stage] = bars.add_task(stage, total=total)
            bars.update(tasks[stage], completed=done, total=total)

        yield callback


def print_summary(manifest: dict[str, Any], output: Path) -> None:
    """Print what a run produced: fates of the records, then splits."""
    console = Console()
    ledger = manifest["ledger"]
    fates = Table(title="Input records", show_edge=False)
    fates.add_column("fate")
    fates.add_column("records", justify="right")
    for status, count in ledger["by_status"].items():
        fates.add_row(status, f"{count:,}")
    fates.add_row("[bold]read[/bold]", f"[bold]{ledger['read']:,}[/bold]")
    console.print(fates)
    rejected = manifest["stages"]["read"].get("rejected_by_reason", {})
    if rejected:
        console.print("rejected: " + ", ".join(f"{reason} {count}" for reason, count in rejected.items()))
    near = manifest["stages"].get("near", {})
    if near.get("enabled", True) and "clusters" in near:
        console.print(
            f"near duplicates: {near.get('candidates', 0):,} candidate pairs, "
            f"{near.get('verified', 0):,} verified, "
            f"{near.get('clusters', 0):,} clusters, {near.get('near_copy', 0):,} removed"
        )
    splits = Table(title="Splits", show_edge=False)
    for column in ("split", "documents", "tokens", "windows", "pad tokens", "shards"):
        splits.add_column(column, justify="left" if column == "split" else "right")
    for name, split in manifest["splits"].items():
        splits.add_row(
            name,
            f"{split['documents']:,}",
            f"{split['tokens']:,}",
            f"{split['windows']:,}",
            f"{split['pad_tokens']:,}",
            f"{len(split['shards']):,}",
        )
    console.print(splits)
    windows = manifest["windows"]
    console.print(
        f"windows of {windows['stored_length']} tokens ({windows['dtype']}), input = {windows['input']}, "
        f"target = {windows['target']}; tokenizer {manifest['tokenizer']['kind']} "
        f"(vocabulary {manifest['tokenizer'].get('vocab_size', '?')})"
    )
    console.print(f"output: {output} (definition hash {manifest['definition_hash'][:12]}…)")


def print_overview(folder: Path, *, show: int = 0, split: str = "train") -> None:
    """Counts per split, the shard table, and optionally ``show`` windows decoded back to text.

    A decoded window is printed as its input (``x = w[:-1]``) and the target's
    last token, so the one-token shift is visible: the target is the input
    moved left by one token, plus the token after the input's end. Decoded
    text is printed as a Python literal on one logical line (no markup, no
    emoji codes, no inserted line breaks), so it can be compared and copied.
    """
    from rich.text import Text
    from tokenizers import Tokenizer

    from corpusprep.manifest import read_manifest
    from corpusprep.windows import open_split, safe_member

    console = Console()
    manifest = read_manifest(folder)
    ledger = manifest["ledger"]
    windows_info, tokenizer_info = manifest["windows"], manifest["tokenizer"]
    if show > 0 and split not in manifest["splits"]:
        raise KeyError(f"{folder}: no split {split!r}; the manifest has {', '.join(manifest['splits'])}")
    console.print(
        Text(
            f"{folder}: {ledger['read']:,} records read, {ledger['kept']:,} kept, {ledger['removed']:,} "
            f"removed, {ledger['rejected']:,} rejected; windows of {windows_info['stored_length']} tokens "
            f"({windows_info['dtype']}), input = {windows_info['input']}, target = {windows_info['target']}; "
            f"tokenizer {tokenizer_info['kind']} (vocabulary {tokenizer_info.get('vocab_size', '?')})"
        )
    )
    splits = Table(title="Splits", show_edge=False)
    for column in ("split", "documents", "tokens", "windows", "pad", "dropped", "shards"):
        splits.add_column(column, justify="left" if column == "split" else "right", no_wrap=True)
    for name, info in manifest["splits"].items():
        splits.add_row(
            name,
            f"{info['documents']:,}",
            f"{info['tokens']:,}",
            f"{info['windows']:,}",
            f"{info['pad_tokens']:,}",
            f"{info['dropped_tokens']:,}",
            f"{len(info['shards']):,}",
        )
    console.print(splits)
    shards = Table(title="Shards (xxh3_128 abbreviated; the manifest has it whole)", show_edge=False)
    for column in ("file", "windows", "bytes", "xxh3_128"):
        shards.add_column(column, justify="right" if column in ("windows", "bytes") else "left", no_wrap=True)
    for info in manifest["splits"].values():
        for shard in info["shards"]:
            shards.add_row(
                shard["file"], f"{shard['shape'][0]:,}", f"{shard['bytes']:,}", shard["xxh3_128"][:12] + "…"
            )
    console.print(shards)
    if show <= 0:
        return
    tokenizer = Tokenizer.from_file(str(safe_member(folder, manifest["tokenizer"]["file"])))
    windows = open_split(folder, split, verify=False)
    for index in range(min(show, len(windows))):
        x, y = windows[index]
        console.rule(f"{split} window {index}")
        text = tokenizer.decode(x.tolist(), skip_special_tokens=False)
        last = tokenizer.decode([int(y[-1])], skip_special_tokens=False)
        console.print(Text("input  ", style="bold") + Text(repr(text)), soft_wrap=True)
        console.print(
            Text("target ", style="bold") + Text(f"= input shifted left by one token, then {last!r}"),
            soft_wrap=True,
        )
        console.print(Text(f"ids x[:8] = {x[:8].tolist()}  y[:8] = {y[:8].tolist()}"), soft_wrap=True)
