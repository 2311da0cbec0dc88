"""Running a batch function over many batches, in order, on several processes.

:func:`ordered_map` yields results in the order of the inputs whatever the
number of workers, so a stage that is a pure function of its batch gives the
same output bytes for any worker count. At most ``workers * 2`` batches are
in flight, so memory stays bounded by the batch size, not the corpus.

Worker processes are started with the ``spawn`` method: the parent may hold
threads (Arrow's pool), and forking a threaded process is unsafe.
"""

from __future__ import annotations

import multiprocessing
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from typing import Any, TypeVar

from corpusprep.errors import WorkerDiedError

__all__ = ["Mapper", "local_mapper", "ordered_map"]

In = TypeVar("In")
Out = TypeVar("Out")

#: ``mapper(function, items)`` yields ``function(item)`` for every item, in input order.
#: The local engine is :func:`local_mapper`; another engine (a cluster) plugs in the same way.
Mapper = Callable[[Callable[[Any], Any], Iterable[Any]], Iterator[Any]]


def ordered_map(function: Callable[[In], Out], items: Iterable[In], *, workers: int) -> Iterator[Out]:
    """``map(function, items)`` on ``workers`` processes, results in input order.

    ``function`` must be picklable (a module-level function or a
    ``functools.partial`` of one). With ``workers <= 1`` it runs inline.

    >>> list(ordered_map(abs, [-3, 1, -2], workers=1))
    [3, 1, 2]
    """
    if workers <= 1:
        yield from map(function, items)
        return
    context = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=workers, mp_context=context) as executor:
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
    """The local engine: :func:`ordered_map` on ``workers`` processes."""

    def mapper(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        return ordered_map(function, items, workers=workers)

    return mapper
