"""Where a run does its work: the ``[engine]`` table of a definition.

The engine never changes what a run writes: it is left out of the
definition's resolved settings, its digest and the checkpoint keys, so the
same definition gives the same bytes on the local engine and on Dask, and a
run interrupted on one engine resumes on the other. Command-line options
(``--engine``, ``--workers``, ``--scheduler``) override these keys.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

from corpusprep.config import setting
from corpusprep.errors import DefinitionError

__all__ = ["ENGINES", "EngineConfig", "default_workers"]

ENGINES = ("local", "dask")


def default_workers() -> int:
    """One worker per core, at most 8."""
    return max(1, min(os.cpu_count() or 1, 8))


@dataclass(frozen=True, slots=True, kw_only=True)
class EngineConfig:
    """Where the work runs; it never changes the output, and command-line options override it."""

    kind: str = setting(
        "local",
        "'local': a pool of worker processes on this machine; 'dask': a Dask cluster "
        "(pip install 'corpusprep[cluster]').",
        choices=ENGINES,
    )
    workers: int = setting(
        0,
        "Worker processes (local pool, or a local Dask cluster); 0 = one per core, at most 8.",
        minimum=0,
        maximum=4096,
    )
    scheduler: str = setting(
        "",
        "With kind = 'dask': address of a running Dask scheduler (tcp://HOST:PORT); empty = start a "
        "local cluster of `workers` processes.",
    )

    def __post_init__(self) -> None:
        if self.scheduler and self.kind != "dask":
            raise DefinitionError(f"engine.scheduler = {self.scheduler!r} needs engine.kind = 'dask'")

    def worker_count(self) -> int:
        """``workers``, with 0 meaning :func:`default_workers`."""
        return self.workers or default_workers()
