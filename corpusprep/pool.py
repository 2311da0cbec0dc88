"""Running a batch function over many batches, in order, on several processes.

:func:`ordered_map` yields results in the order of the inputs whatever the
number of workers, so a stage that is a pure function of its batch gives the
same output bytes for any worker count. At most ``workers * 2`` batches are
in flight, so memory stays bounded by the batch size, not the corpus.

Worker processes are started with the ``spawn`` method: the parent may hold
threads (Arrow's pool), and forking a threaded process is unsafe. Starting one
costs a fresh interpreter and its imports (about a second), so a run keeps one
pool for all its steps: :func:`local_engine` holds it, and every map of the
run (first pass, duplicate partitions, LSH bands, encoding, shards) uses it.
"""

from __future__ import annotations

import contextlib
import multiprocessing
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Executor, Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path
from typing import Any, TypeVar

from corpusprep.errors import IntegrityError, WorkerDiedError

__all__ = ["Mapper", "local_engine", "local_mapper", "ordered_map", "visible_path"]

In = TypeVar("In")
Out = TypeVar("Out")

#: ``mapper(function, items)`` yields ``function(item)`` for every item, in input order.
#: The local engine is :func:`local_engine` (one pool a run); a cluster engine plugs in the same way.
Mapper = Callable[[Callable[[Any], Any], Iterable[Any]], Iterator[Any]]


def ordered_map(function: Callable[[In], Out], items: Iterable[In], *, workers: int) -> Iterator[Out]:
    """``map(function, items)`` on ``workers`` processes, results in input order.

    ``function`` must be picklable (a module-level function or a
    ``functools.partial`` of one). With ``workers <= 1`` it runs inline. A new
    pool is started for this one map; :func:`local_engine` keeps one for many.

    >>> list(ordered_map(abs, [-3, 1, -2], workers=1))
    [3, 1, 2]
    """
    if workers <= 1:
        yield from map(function, items)
        return
    context = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=workers, mp_context=context) as executor:
        yield from _executor_map(executor, function, items, workers)


def _executor_map(
    executor: Executor, function: Callable[[In], Out], items: Iterable[In], workers: int
) -> Iterator[Out]:
    pending: deque[Future[Out]] = deque()
    done = 0
    try:
        for item in items:
            pending.append(executor.submit(function, item))
            if len(pending) >= workers * 2:
                yield pending.popleft().result()
                done += 1
        while pending:
            yield pending.popleft().result()
            done += 1
    except BrokenProcessPool:
        raise WorkerDiedError(
            f"a worker process ended abruptly (killed, or out of memory) while batch {done + 1} "
            "was being processed; nothing was published. Run again, perhaps with fewer --workers."
        ) from None
    finally:
        for future in pending:
            future.cancel()


def local_mapper(workers: int) -> Mapper:
    """The local engine for one map at a time: :func:`ordered_map` on ``workers`` processes."""

    def mapper(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        return ordered_map(function, items, workers=workers)

    return mapper


@contextlib.contextmanager
def local_engine(workers: int) -> Iterator[Mapper]:
    """The local engine for a whole run: one pool of ``workers`` processes serves every map.

    With ``workers <= 1`` every map runs inline and no process is started. The
    processes start on the first task and stop when the block ends.
    """
    if workers <= 1:
        yield local_mapper(1)
        return
    context = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=workers, mp_context=context) as executor:

        def mapper(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
            return _executor_map(executor, function, items, workers)

        yield mapper


def visible_path(path: str | Path, what: str = "run's work folder") -> Path:
    """``path`` as a :class:`Path`, or a clear error when this process (a worker) cannot see it.

    Tasks read and write the run's folders by path; on a remote cluster those must
    be on storage that every worker mounts at the same path.
    """
    found = Path(path)
    if not found.exists():
        raise IntegrityError(
            f"{path}: this worker cannot see the {what}; with a remote cluster the output "
            "folder must be on storage that every worker mounts at the same path"
        )
    return found
